"""Meters: loudness (BS.1770-4 / EBU R 128), true peak (BS.1770-4 Annex 2), peak and RMS levels.

Each meter class owns preallocated state arrays and runs one numba kernel of
:mod:`livedyn.dsp` over every block. The arrays are exposed as ``meter.arrays`` (name ->
ndarray) and, in the kernel's argument order after the input block, as ``meter.kernel_args``;
``meter.kernel`` is the kernel itself and ``meter.kernel_name`` its dotted name. A live engine
can therefore call ``meter.kernel(block, *meter.kernel_args)`` from its own compiled callback,
and the control side reads the readings from the same arrays with the methods below.

Readings are floats in LUFS, dBTP or dBFS; a silent reading is ``LEVEL_FLOOR_DB`` (-200.0),
never ``-inf``. Non-finite input samples are counted as 0 by every kernel.

Offline helpers: :func:`integrated_loudness` and :func:`true_peak_dbtp` measure a whole signal.

References
----------
.. [1] ITU-R BS.1770-4 (10/2015), loudness (Annex 1) and true-peak level (Annex 2).
.. [2] EBU R 128 and EBU Tech 3341: momentary (400 ms), short-term (3 s), integrated loudness.
.. [3] IEC 61672-1:2013, time weightings F (125 ms) and S (1 s).
"""
from __future__ import annotations

import math

import numpy as np

from .dsp import levels as _lv
from .dsp import loudness as _ld
from .dsp import truepeak as _tp
from .params import LEVEL_FLOOR_DB, ParamError

__all__ = [
    "LoudnessMeter",
    "TruePeakMeter",
    "LevelMeter",
    "MeterSet",
    "integrated_loudness",
    "true_peak_dbtp",
    "LEVEL_FLOOR_DB",
]


def _check_channels(channels):
    if isinstance(channels, bool) or not isinstance(channels, (int, np.integer)) or channels < 1:
        raise ValueError(f"channels = {channels!r}: out of range, expected a whole number 1 or more")
    return int(channels)


def _as_block(block, channels):
    """The block as C-contiguous float32 (frames, channels); a 1-D block is one channel."""
    x = np.asarray(block)
    if x.ndim == 1 and channels == 1:
        x = x.reshape(-1, 1)
    if x.ndim != 2 or x.shape[1] != channels:
        raise ValueError(f"block shape {x.shape}: wrong shape, expected (frames, {channels})")
    if x.dtype != np.float32 or not x.flags.c_contiguous:
        x = np.ascontiguousarray(x, dtype=np.float32)
    return x


def _amp_db(v):
    return float(_lv.amplitude_to_db(v))


def _ms_db(ms):
    return float(_lv.mean_square_to_db(ms))


class _Meter:
    kernel = None
    kernel_name = ""
    arg_names = ()

    @property
    def kernel_args(self):
        """The state arrays in the order the kernel takes them after the input block."""
        return tuple(self.arrays[name] for name in self.arg_names)

    def process(self, block):
        """Meter one block, float32 (frames, channels)."""
        x = _as_block(block, self.channels)
        self.kernel(x, *self.kernel_args)


class LoudnessMeter(_Meter):
    """Momentary, short-term and gated integrated loudness, LUFS.

    Parameters
    ----------
    samplerate : float
        Sample rate, Hz (8000 to 768000).
    channels : int
        Channel count.
    weights : sequence of float, optional
        Channel weights G_i; default per :func:`livedyn.dsp.loudness.default_weights`
        (6 channels: L R C LFE Ls Rs -> 1, 1, 1, 0, 1.41, 1.41).

    Notes
    -----
    Kernel: :func:`livedyn.dsp.loudness.loudness_block`. Readings change every 100 ms hop.
    Integrated loudness is computed on demand from a fixed-size histogram of gating blocks
    (:func:`livedyn.dsp.loudness.loudness_integrated`), so memory does not grow with time.

    References
    ----------
    .. [1] ITU-R BS.1770-4, Annex 1 and section 2.
    .. [2] EBU Tech 3341.
    """

    kernel = staticmethod(_ld.loudness_block)
    kernel_name = "livedyn.dsp.loudness.loudness_block"
    arg_names = ("coef", "weights", "filt", "ring", "hist_count", "hist_sum", "state")

    def __init__(self, samplerate, channels, weights=None):
        self.samplerate = _ld._check_fs(samplerate)
        self.channels = _check_channels(channels)
        if weights is None:
            w = _ld.default_weights(self.channels)
        else:
            w = np.array(weights, dtype=np.float64).reshape(-1)
            if w.shape[0] != self.channels or not np.all(np.isfinite(w)) or np.any(w < 0):
                raise ValueError(
                    f"weights = {list(weights)!r}: wrong, expected {self.channels} finite "
                    "numbers >= 0"
                )
        self.hop = _ld.hop_length(self.samplerate)
        self.arrays = {
            "coef": _ld.pack_coeffs(self.samplerate),
            "weights": w,
            "filt": np.zeros((self.channels, 4)),
            "ring": np.zeros(_ld.SHORT_TERM_HOPS),
            "hist_count": np.zeros(_ld.HIST_BINS),
            "hist_sum": np.zeros(_ld.HIST_BINS),
            "state": _ld.new_state(self.samplerate),
        }

    def reset(self):
        """Forget all input: readings back to silence, histogram emptied."""
        for name in ("filt", "ring", "hist_count", "hist_sum"):
            self.arrays[name][:] = 0.0
        _ld.reset_state(self.arrays["state"], self.hop)

    def momentary(self):
        """Momentary loudness (last 400 ms), LUFS."""
        return float(self.arrays["state"][_ld.S_MOMENTARY])

    def short_term(self):
        """Short-term loudness (last 3 s), LUFS."""
        return float(self.arrays["state"][_ld.S_SHORT_TERM])

    def max_momentary(self):
        """Highest momentary loudness since reset, LUFS."""
        return float(self.arrays["state"][_ld.S_MAX_MOMENTARY])

    def max_short_term(self):
        """Highest short-term loudness since reset, LUFS."""
        return float(self.arrays["state"][_ld.S_MAX_SHORT_TERM])

    def integrated(self):
        """Gated integrated loudness since reset, LUFS (BS.1770-4 gating)."""
        return float(_ld.loudness_integrated(self.arrays["hist_count"], self.arrays["hist_sum"]))

    def gating_blocks(self):
        """Number of 400 ms blocks above the absolute gate since reset."""
        return int(self.arrays["state"][_ld.S_NGATED])


class TruePeakMeter(_Meter):
    """Maximum true-peak level per channel since reset, dBTP (4x oversampling).

    Parameters
    ----------
    samplerate : float
        Sample rate, Hz. The same 4x interpolation filter is used at every rate (see
        :mod:`livedyn.dsp.truepeak`); at 96 kHz and above it is finer than required.
    channels : int
        Channel count.

    Notes
    -----
    Kernel: :func:`livedyn.dsp.truepeak.true_peak_block`. The interpolated values trail the
    input by ``TP_DELAY`` = 5.875 samples, so the last few samples of a stream are measured
    only once more input (or :func:`true_peak_dbtp`'s zero padding) follows.

    References
    ----------
    .. [1] ITU-R BS.1770-4, Annex 2.
    """

    kernel = staticmethod(_tp.true_peak_block)
    kernel_name = "livedyn.dsp.truepeak.true_peak_block"
    arg_names = ("hist", "state", "taps", "peak")

    def __init__(self, samplerate, channels):
        self.samplerate = _ld._check_fs(samplerate)
        self.channels = _check_channels(channels)
        self.arrays = {
            "hist": _tp.new_history(self.channels),
            "state": np.zeros(1, dtype=np.int64),
            "taps": _tp.new_taps(),
            "peak": np.zeros(self.channels),
        }

    def reset(self):
        """Forget all input."""
        self.arrays["hist"][:] = 0.0
        self.arrays["state"][:] = 0
        self.arrays["peak"][:] = 0.0

    def max_dbtp(self):
        """``(per_channel, overall)``: list of dBTP per channel and the largest of them."""
        per = [_amp_db(float(v)) for v in self.arrays["peak"]]
        return per, max(per)


class LevelMeter(_Meter):
    """Sample peak (bar, hold, maximum) and RMS levels per channel, dBFS.

    Parameters
    ----------
    samplerate : float
        Sample rate, Hz.
    channels : int
        Channel count.
    rms_tau_ms : float
        RMS time constant tau, ms: 125 is IEC 61672-1 Fast, 1000 is Slow.
    hold_ms : float
        Peak hold time, ms (default 1000; common practice, no source).
    fall_db_per_s : float
        Fall rate of the peak bar and hold, dB/s (default 20; common practice, no source).

    Notes
    -----
    Kernel: :func:`livedyn.dsp.levels.level_block`. RMS reads ``10 log10(2 ms)`` so that a
    full-scale sine reads 0 dBFS (AES17).

    References
    ----------
    .. [1] IEC 61672-1:2013, time weightings F and S.
    .. [2] AES17-2020, full-scale sine as the 0 dBFS reference.
    """

    kernel = staticmethod(_lv.level_block)
    kernel_name = "livedyn.dsp.levels.level_block"
    arg_names = ("coef", "state")

    def __init__(self, samplerate, channels, rms_tau_ms=125.0, hold_ms=1000.0, fall_db_per_s=20.0):
        self.samplerate = _ld._check_fs(samplerate)
        self.channels = _check_channels(channels)
        self.arrays = {
            "coef": _lv.level_coeffs(
                self.samplerate,
                rms_tau_s=_ms_to_s("rms_tau_ms", rms_tau_ms),
                hold_s=_ms_to_s("hold_ms", hold_ms, zero_ok=True),
                fall_db_per_s=fall_db_per_s,
            ),
            "state": _lv.new_state(self.channels),
        }

    def reset(self):
        """Forget all input."""
        self.arrays["state"][:] = 0.0

    def _col(self, col, conv):
        return [conv(float(v)) for v in self.arrays["state"][:, col]]

    def peak_db(self):
        """Peak bar per channel, dBFS."""
        return self._col(_lv.L_BAR, _amp_db)

    def peak_hold_db(self):
        """Peak hold per channel, dBFS."""
        return self._col(_lv.L_HOLD, _amp_db)

    def max_peak_db(self):
        """Largest sample magnitude per channel since reset, dBFS."""
        return self._col(_lv.L_MAX, _amp_db)

    def rms_db(self):
        """Time-weighted RMS per channel, dBFS (sine-referenced)."""
        return self._col(_lv.L_MS, _ms_db)


def _ms_to_s(name, value, zero_ok=False):
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} = {value!r}: not a number, expected a time in ms") from None
    if not (v >= 0.0 if zero_ok else v > 0.0) or math.isinf(v) or math.isnan(v):
        limit = "0 ms or more" if zero_ok else "above 0 ms"
        raise ValueError(f"{name} = {value!r} ms: out of range, expected {limit}")
    return v / 1000.0


class MeterSet:
    """Loudness, true-peak and level meters over the same stream.

    Parameters
    ----------
    samplerate : float
        Sample rate, Hz.
    channels : int
        Channel count.
    rms_tau_ms : float
        RMS time constant of the level meter, ms.
    layout : str, optional
        Channel layout for the loudness weights (``livedyn.dsp.loudness.LAYOUTS``: mono,
        stereo, 5.0, 5.1, 7.1); by default the channel count decides.
    """

    def __init__(self, samplerate, channels, rms_tau_ms=125.0, layout=None):
        weights = None
        if layout is not None:
            try:
                weights = _ld.default_weights(channels, layout)
            except ValueError as e:
                raise ParamError(str(e)) from None
        self.loudness = LoudnessMeter(samplerate, channels, weights)
        self.true_peak = TruePeakMeter(samplerate, channels)
        self.levels = LevelMeter(samplerate, channels, rms_tau_ms=rms_tau_ms)
        self.samplerate = self.loudness.samplerate
        self.channels = self.loudness.channels
        self.meters = (self.loudness, self.true_peak, self.levels)
        from .dsp import warm

        empty = np.zeros((0, self.channels), np.float32)
        for m in self.meters:
            warm(m.kernel, f"meter kernel {m.kernel_name}", empty, *m.kernel_args)

    def process(self, block):
        """Meter one block, float32 (frames, channels), with every meter."""
        x = _as_block(block, self.channels)
        for m in self.meters:
            m.kernel(x, *m.kernel_args)

    def reset(self):
        for m in self.meters:
            m.reset()

    def snapshot(self):
        """All readings as a dict of plain floats and lists of floats."""
        tp_per, tp_max = self.true_peak.max_dbtp()
        return {
            "momentary_lufs": self.loudness.momentary(),
            "short_term_lufs": self.loudness.short_term(),
            "integrated_lufs": self.loudness.integrated(),
            "max_momentary_lufs": self.loudness.max_momentary(),
            "max_short_term_lufs": self.loudness.max_short_term(),
            "true_peak_dbtp": tp_per,
            "max_true_peak_dbtp": tp_max,
            "peak_dbfs": self.levels.peak_db(),
            "peak_hold_dbfs": self.levels.peak_hold_db(),
            "max_peak_dbfs": self.levels.max_peak_db(),
            "rms_dbfs": self.levels.rms_db(),
        }


def _as_signal(x):
    a = np.asarray(x)
    if a.ndim == 1:
        a = a.reshape(-1, 1)
    if a.ndim != 2 or a.shape[0] == 0 or a.shape[1] == 0:
        raise ValueError(f"signal shape {np.shape(x)}: wrong shape, expected (frames,) or (frames, channels)")
    return np.ascontiguousarray(a, dtype=np.float32)


def integrated_loudness(x, fs, weights=None):
    """Gated integrated loudness of a whole signal, LUFS.

    Parameters
    ----------
    x : array_like, (frames,) or (frames, channels)
        Samples, full scale 1.0 (converted to float32).
    fs : float
        Sample rate, Hz.
    weights : sequence of float, optional
        Channel weights; see :class:`LoudnessMeter`.

    Returns
    -------
    float
        LUFS, or ``LEVEL_FLOOR_DB`` (-200.0) if no 400 ms block passes the -70 LUFS gate.
        Only whole 400 ms blocks (on a 100 ms grid from the first sample) are counted.

    References
    ----------
    .. [1] ITU-R BS.1770-4, Annex 1 and section 2.
    """
    a = _as_signal(x)
    m = LoudnessMeter(fs, a.shape[1], weights=weights)
    m.process(a)
    return m.integrated()


def true_peak_dbtp(x, fs):
    """Largest true-peak level of a whole signal over all channels, dBTP.

    The signal is taken as zero after its end: 12 zero samples are appended so that the
    interpolated values around the last samples are measured too.

    Parameters
    ----------
    x : array_like, (frames,) or (frames, channels)
        Samples, full scale 1.0 (converted to float32).
    fs : float
        Sample rate, Hz.

    Returns
    -------
    float
        dBTP, or ``LEVEL_FLOOR_DB`` for silence.

    References
    ----------
    .. [1] ITU-R BS.1770-4, Annex 2.
    """
    a = _as_signal(x)
    m = TruePeakMeter(fs, a.shape[1])
    m.process(a)
    m.process(np.zeros((_tp.TP_PHASE_TAPS, a.shape[1]), dtype=np.float32))
    return m.max_dbtp()[1]
