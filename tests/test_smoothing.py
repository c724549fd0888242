"""Parameter changes make no zipper noise: gain-affecting values glide per sample."""
import numpy as np
import scipy.signal as sps

import livedyn
from livedyn.params import GLIDE_MS


def sideband_level_dbc(y, fs, f0, min_offset_hz):
    """Largest spectral line farther than min_offset_hz from f0, relative to the f0 line.

    Blackman-Harris window (4-term, sidelobes below -92 dB; scipy.signal.windows), one window
    over the whole signal, so a step in the middle is seen with its full spectrum.
    """
    w = sps.windows.blackmanharris(len(y))
    spec = np.abs(np.fft.rfft(y * w))
    f = np.fft.rfftfreq(len(y), 1 / fs)
    carrier = spec[np.argmin(np.abs(f - f0))]
    far = np.abs(f - f0) > min_offset_hz
    return 20 * np.log10(spec[far].max() / carrier)


def run_threshold_step(blocksize, fs=48000):
    t = np.arange(fs) / fs
    x = (0.5 * np.sin(2 * np.pi * 1000 * t)).astype(np.float32)[:, None]
    p = livedyn.Processor("compressor", fs, 1, threshold=-20, ratio=4, knee=0, attack=50,
                          release=50, detector="rms", rms_time=1000)
    out = []
    for i in range(0, len(x), blocksize):
        if i >= len(x) // 2 and p.get("threshold") != -10:
            p.set("threshold", -10)
        out.append(p.process(x[i:i + blocksize]))
    return np.concatenate(out)[:, 0].astype(np.float64)


def test_threshold_step_artefacts_below_minus_80_dbc():
    # A 10 dB threshold step on a 1 kHz sine at -6 dBFS changes the gain by 7.5 dB. With the
    # per-sample glide (tau = GLIDE_MS) the modulation it causes falls off outside the glide's
    # bandwidth; from 10x that bandwidth on, nothing may stand above -80 dBc (our own bound:
    # DEVELOPERS.md, "Conventions the tests rely on"; no outside source).
    fs = 48000
    bandwidth = 1 / (2 * np.pi * GLIDE_MS / 1000)  # one-pole -3 dB frequency, Hz
    y = run_threshold_step(64, fs)
    assert sideband_level_dbc(y, fs, 1000, 10 * bandwidth) <= -80


def test_the_measurement_sees_a_zipper():
    # Control: the same gain change applied as a bare step (what a block-wise update without
    # glide does) stands well above -80 dBc, so the check above is able to fail.
    fs = 48000
    t = np.arange(fs) / fs
    g = np.where(t < 0.5, 10 ** (-10.5 / 20), 10 ** (-3 / 20))
    y = 0.5 * np.sin(2 * np.pi * 1000 * t) * g
    bandwidth = 1 / (2 * np.pi * GLIDE_MS / 1000)
    assert sideband_level_dbc(y, fs, 1000, 10 * bandwidth) > -60
