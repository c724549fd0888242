"""Built-in test sources (livedyn.control.sources) against their definitions.

Sources of the checks:
* dBFS and sine-referenced rms: AES17 (a full-scale sine is 0 dBFS; its rms is peak/sqrt(2)).
* Pink noise: power spectral density proportional to 1/f, i.e. -10 log10(2) = -3.01 dB an
  octave; white noise: flat. Both estimated with scipy.signal.welch.
* Log sweep: A. Farina, "Simultaneous measurement of impulse response and distortion with a
  swept-sine technique", 108th AES Convention, 2000, eq. (1); its instantaneous frequency
  f1 exp(t ln(f2/f1) / T) is compared with the phase derivative of the analytic signal
  (scipy.signal.hilbert).
* The -6 dBFS peak cap, burst steps on zero crossings: livedyn's own rule (common practice,
  no source), as the module docstring states.
"""
from __future__ import annotations

import math
import shutil
import threading
import time

import numpy as np
import pytest
from scipy import signal

from livedyn.control.sources import (CAP_DBFS, NOISE_MAX_DBFS, SourceError, TestSource,
                                     parse_spec)

FS = 48000.0
CAP = 10 ** (CAP_DBFS / 20)


def db(x):
    return 20 * np.log10(x)


def sine_rms_dbfs(x):
    return db(np.sqrt(np.mean(np.asarray(x, np.float64) ** 2)) * math.sqrt(2))


def octave_slope(x, lo, hi):
    f, pxx = signal.welch(x, FS, nperseg=16384)
    band = (f >= lo) & (f <= hi)
    slope, _ = np.polyfit(np.log2(f[band]), 10 * np.log10(pxx[band]), 1)
    return slope


def test_tone_level_frequency_and_a_seamless_loop():
    s = TestSource(FS, 2, "tone 997 -20")
    buf = s.loop_buffer.astype(np.float64)
    assert db(np.max(np.abs(buf))) == pytest.approx(-20.0, abs=1e-4)
    assert sine_rms_dbfs(buf) == pytest.approx(-20.0, abs=1e-4)  # AES17: rms = peak/sqrt 2
    spec = np.abs(np.fft.rfft(buf))
    assert np.argmax(spec) * FS / len(buf) == pytest.approx(997.0, abs=0.25)
    assert "997 Hz" in s.description
    x = s.read(len(buf) + 5000)  # across the loop's end
    assert x.shape == (len(buf) + 5000, 2) and np.array_equal(x[:, 0], x[:, 1])
    step = np.max(np.abs(np.diff(x[:, 0].astype(np.float64))))
    assert step <= 2 * math.pi * 997 / FS * 10 ** (-20 / 20) * 1.001  # no jump at the seam


@pytest.mark.parametrize("kind,want", [("white", 0.0), ("pink", -10 * math.log10(2))])
def test_noise_level_and_spectrum(kind, want):
    s = TestSource(FS, 1, f"{kind} -30")
    x = s.read(len(s.loop_buffer))[:, 0].copy()
    assert sine_rms_dbfs(x) == pytest.approx(-30.0, abs=0.01)
    slope = octave_slope(x, 100.0, 16000.0)
    print(f"{kind}: {slope:.3f} dB/octave (want {want:.3f})")
    assert slope == pytest.approx(want, abs=0.15)
    if kind == "pink":  # nothing below 20 Hz
        f, pxx = signal.welch(x, FS, nperseg=65536)
        assert np.sum(pxx[(f > 1) & (f < 12)]) < 1e-3 * np.sum(pxx[(f > 25) & (f < 40)])


def test_sweep_follows_farinas_instantaneous_frequency():
    f1, f2, t_len = 50.0, 16000.0, 4.0
    s = TestSource(FS, 1, f"sweep {f1:g} {f2:g} {t_len:g} -12")
    x = s.loop_buffer.astype(np.float64)
    n = int(round(t_len * FS))
    assert len(x) == n + int(0.5 * FS) and np.all(x[n:] == 0)  # then silence
    phase = np.unwrap(np.angle(signal.hilbert(x[:n])))
    f_inst = np.diff(phase) * FS / (2 * np.pi)
    t = (np.arange(n - 1) + 0.5) / FS
    want = f1 * np.exp(t * math.log(f2 / f1) / t_len)  # Farina 2000, eq. (1) differentiated
    mid = slice(int(0.1 * n), int(0.9 * n))
    rel = np.abs(f_inst[mid] - want[mid]) / want[mid]
    print(f"sweep: median relative error {np.median(rel):.2e}, 99th {np.percentile(rel, 99):.2e}")
    assert np.percentile(rel, 99) < 0.01
    assert db(np.max(np.abs(x))) == pytest.approx(-12.0, abs=0.01)


def test_bursts_step_between_two_levels_on_zero_crossings():
    s = TestSource(FS, 1, "bursts 1000 -10 -30 200 300")
    x = s.loop_buffer.astype(np.float64)
    n_on, n_off = int(0.2 * FS), int(0.3 * FS)  # 1000 Hz is 48 samples: whole cycles
    assert len(x) == n_on + n_off
    assert db(np.max(np.abs(x[:n_on]))) == pytest.approx(-10.0, abs=1e-3)
    assert db(np.max(np.abs(x[n_on:]))) == pytest.approx(-30.0, abs=1e-3)
    assert abs(x[n_on]) < 1e-6 and abs(x[0]) < 1e-6  # each step on a zero crossing
    s.program("bursts 1000 -10 off 50 50")
    x = s.loop_buffer
    assert np.all(x[int(0.05 * FS):] == 0)


def test_every_kind_stays_under_the_cap_and_louder_asks_are_refused():
    s = TestSource(FS, 2)
    for spec in ("tone 20 -6", "tone 19000 -6", f"white {NOISE_MAX_DBFS:g}",
                 f"pink {NOISE_MAX_DBFS:g}", "sweep 20 20000 1 -6", "bursts 100 -6 -7 5 5"):
        s.program(spec)
        x = s.read(200000)
        assert np.max(np.abs(x)) <= CAP * (1 + 1e-6), spec
    for spec, word in (("tone 1000 -5", "-5 dBFS"), ("white -10", "-10 dBFS"),
                       ("sweep 20 20000 10 0", "0 dBFS"), ("bursts 1000 -3", "-3 dBFS"),
                       ("tone 30000", "30000 Hz"), ("tone loud", "'loud'"),
                       ("sweep 1000 100", "end above the start"), ("hum", "'hum'"),
                       ("bursts 1000 -20 -10", "below the high level"),
                       ("tone 1000 -20 3", "too many")):
        before = s.description
        with pytest.raises(SourceError, match=word):
            s.program(spec)
        assert s.description == before  # a refused spec changes nothing
    assert parse_spec("tone:440:-18") == ("tone", ["440", "-18"])
    assert TestSource(FS, 1, "tone 1khz -20dbfs").description.startswith("tone 1000 Hz")


def test_input_plays_the_runs_own_source_and_programming_from_another_thread():
    from livedyn.engine.engine import ArraySource

    inner = ArraySource(np.full((1000, 2), 0.25, np.float32))
    s = TestSource(FS, 2, inner=inner)
    assert s.kind == "input" and np.all(s.read(100) == 0.25)
    with pytest.raises(SourceError, match="no input file"):
        TestSource(FS, 2, "input")
    stop = threading.Event()
    seen = set()

    def feeder():
        while not stop.is_set():
            blk = s.read(1024)
            if blk is not None:
                seen.add(round(float(np.max(np.abs(blk))), 3))

    t = threading.Thread(target=feeder)
    t.start()
    for spec in ("tone 1000 -20", "pink -30", "input", "white -24", "bursts"):
        s.program(spec)
        time.sleep(0.02)
    stop.set()
    t.join()
    assert 0.1 in seen  # the -20 dBFS tone came through whole
    assert max(seen) <= CAP * (1 + 1e-6) or 0.25 in seen


@pytest.mark.jack(capture=2, playback=2)
def test_a_test_source_through_the_engine_feeds_the_callback(jack_server):
    if shutil.which("jackd") is None:
        pytest.skip("jackd not installed")
    import livedyn
    from livedyn.engine import callback as cb
    from livedyn.engine.engine import Engine

    proc = livedyn.Processor("compressor", int(FS), 2, threshold=0)
    src = TestSource(FS, 2, "tone 1000 -20")
    eng = Engine(proc, 64, device="system", main_source=src)
    eng.start()
    try:
        t_end = time.monotonic() + 5
        while time.monotonic() < t_end and eng.stats[cb.S_BLOCKS] < 1200:
            time.sleep(0.05)
        peak = eng.snapshot()["peak_in_dbfs"]
        src.program("tone 500 -8")
        # the input ring holds up to 1 s of the old tone: wait for the new one to arrive (a
        # starved machine drains the ring more slowly than real time)
        t_end = time.monotonic() + 10
        peak2 = eng.snapshot()["peak_in_dbfs"]
        while time.monotonic() < t_end and abs(peak2[0] + 8.0) > 0.1:
            time.sleep(0.1)
            peak2 = eng.snapshot()["peak_in_dbfs"]
    finally:
        eng.stop()
    print("input peaks", peak, peak2)
    assert peak[0] == pytest.approx(-20.0, abs=0.1) and peak[1] == pytest.approx(-20.0, abs=0.1)
    assert peak2[0] == pytest.approx(-8.0, abs=0.1)
    assert eng.stats[cb.S_UNDER_MAIN] == 0
