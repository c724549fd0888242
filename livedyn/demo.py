"""Built-in demo scenario: a small theatre rehearsal, synthesised by livedyn itself.

Three signals, all made here from a fixed seed, with no recordings and no outside material:

``drum_loop``
    Stereo kit at 120 beats per minute: kick (centre), snare (a little left), closed and open
    hi-hat (right). Most hits sit well below a few accented ones, so a compressor or limiter has
    peaks to tame. The loop is scaled so that its sample peak is just under -1 dBFS.
``music_bed``
    Stereo pad of sustained chords that cross-fade bar to bar, over a soft bass line; no strong
    transients, steady level near -20 LUFS. This is the signal a ducker turns down.
``narrator``
    Mono, speech-like but not speech: a glottal-like pulse train (pitch drifting between about
    100 and 180 Hz) exciting formant resonances that glide between vowel-like targets, in
    syllables of 100-300 ms grouped into phrases of a few seconds, with pauses of 1-3 s and
    occasional fricative-like noise bursts. About -18 dBFS RMS over a phrase; in the pauses only
    room noise at -70 dBFS RMS. This is the key signal of a ducker.

All times are in seconds and all frequencies in Hz, so the content is the same at any sample
rate (32 kHz to 384 kHz); only the sampling grid and the sample-level noise differ.

Level conventions
-----------------
dBFS per AES17: a full-scale sine reads 0 dBFS, so an RMS level in dBFS is
``20 log10(rms) + 3.01``. Loudness in LUFS per ITU-R BS.1770-4.

Determinism
-----------
Every sample is built from IEEE 754 basic arithmetic only (add, subtract, multiply, divide,
square root, floor, ldexp), applied element by element by numpy or on Python floats, and from the
raw 64-bit output of the PCG64 bit generator behind ``numpy.random.default_rng(seed)``. These
operations are correctly rounded, so they give the same bits on every platform. Sine and
exponential are evaluated with polynomials written here instead of the C maths library, and
filters are FIR sums written here instead of compiled IIR or FFT routines, because those may
differ in the last bit from one machine or build to another. No order-dependent reductions
(sums, dot products) enter the samples; fixed level constants are used instead.

Command line::

    python -m livedyn.demo OUTDIR [--seconds 16] [--samplerate 48000]

References
----------
.. [1] AES17-2020, "AES standard method for digital audio engineering - Measurement of digital
   audio equipment", clause 3, definitions of full-scale amplitude and decibels full scale
   (clause number recalled from memory).
.. [2] ITU-R BS.1770-4, "Algorithms to measure audio programme loudness and true-peak audio
   level", 2015.
.. [3] IEEE 754-2019, "IEEE Standard for Floating-Point Arithmetic", clause 5, operations that
   are correctly rounded (clause number recalled from memory).
"""
from __future__ import annotations

import argparse
import math
import numbers
import os
import sys
from pathlib import Path

import numpy as np

__all__ = ["drum_loop", "music_bed", "narrator", "scenario", "write_scenario", "main"]

SAMPLERATE_MIN = 32000
SAMPLERATE_MAX = 384000
SECONDS_MAX = 600.0

# Level targets, written as decimal literals so that every platform parses the same bits.
# Each literal is checked against its formula in tests/test_demo.py.
MINUS_1_DBFS = 0.8912509381337456  # 10 ** (-1 / 20): the drums' sample peak never exceeds it
DRUM_PEAK = 0.89125  # the drums' scaled peak, just under -1 dBFS even after rounding to float32
NARRATOR_RMS_DBFS = -18.0  # over a phrase, AES17 convention
ROOM_RMS = 2.2360679774997898e-04  # 10 ** (-70 / 20) / sqrt(2): -70 dBFS RMS per AES17
BED_LUFS = -20.0  # target integrated loudness of the music bed (BS.1770-4)

# Fixed gains that put the default renderings on the targets above. They were measured once
# with this very synthesis (the narrator's RMS over its phrases; the bed's loudness read with
# pyloudnorm as the BS.1770 reference) and are checked by the tests, which fail if the synthesis
# drifts away from the targets.
_NARRATOR_GAIN = 0.34
_BED_GAIN = 0.062

_PI = math.pi
_SQRT3 = math.sqrt(3.0)  # sqrt is correctly rounded (IEEE 754)
_TWO_POW_M53 = math.ldexp(1.0, -53)
_INV_LN2 = 1.4426950408889634  # 1 / ln 2
_LN2 = 0.6931471805599453  # ln 2
# Taylor coefficients; factorials and int / int division are exact / correctly rounded.
_SIN_COEFFS = tuple(((-1) ** k) / math.factorial(2 * k + 1) for k in range(9))
_EXP_COEFFS = tuple(1 / math.factorial(j) for j in range(14))


# ---------------------------------------------------------------------------------------------
# Portable arithmetic: sine, exponential, random numbers, FIR filters.


def _sin_turns(x):
    """sin(2 pi x) for x in turns (cycles), by range reduction and an odd polynomial.

    The argument is reduced exactly (floor, Sterbenz subtractions) to b in [0, 1/4] turn with
    sin(2 pi x) = +-sin(2 pi b); a Taylor polynomial of degree 17 follows (error below 1e-13).
    """
    x = np.asarray(x, dtype=np.float64)
    r = x - np.floor(x + 0.5)  # [-0.5, 0.5]
    a = np.abs(r)
    y = np.minimum(a, 0.5 - a)
    y *= 2.0 * _PI
    y2 = y * y
    p = np.full_like(y2, _SIN_COEFFS[-1])
    for c in reversed(_SIN_COEFFS[:-1]):
        p *= y2
        p += c
    p *= y
    return np.copysign(p, r)


def _sin_rows(step, phase, n: int) -> np.ndarray:
    """sin(2 pi (phase + step m)) for m = 0 .. n-1: one row per entry of ``step`` and ``phase``.

    ``step`` is in turns per sample, ``phase`` in turns. The rows are built in blocks by the
    angle-addition identity sin(a + b) = sin a cos b + cos a sin b, so the polynomial is
    evaluated on about 4 sqrt(n) points per row instead of n.
    """
    step, phase = np.broadcast_arrays(np.asarray(step, dtype=np.float64).reshape(-1, 1),
                                      np.asarray(phase, dtype=np.float64).reshape(-1, 1))
    block = max(8, int(math.isqrt(max(n, 1))))
    blocks = -(-n // block)
    inner = step * np.arange(block, dtype=np.float64)
    outer = step * (np.arange(blocks, dtype=np.float64) * block) + phase
    out = _sin_turns(outer)[:, :, None] * _cos_turns(inner)[:, None, :]
    out += _cos_turns(outer)[:, :, None] * _sin_turns(inner)[:, None, :]
    return out.reshape(step.shape[0], blocks * block)[:, :n]


def _sin_turns_scalar(x: float) -> float:
    """:func:`_sin_turns` for one Python float (same reduction and polynomial)."""
    r = x - math.floor(x + 0.5)
    a = abs(r)
    y = min(a, 0.5 - a) * (2.0 * _PI)
    y2 = y * y
    p = _SIN_COEFFS[-1]
    for c in reversed(_SIN_COEFFS[:-1]):
        p = p * y2 + c
    return math.copysign(p * y, r)


def _rise_scalar(u: float) -> float:
    """:func:`_rise` for one Python float."""
    u = min(max(u, 0.0), 1.0)
    return 0.5 - 0.5 * _sin_turns_scalar(0.5 * u + 0.25)


def _cos_turns(x):
    """cos(2 pi x) for x in turns."""
    return _sin_turns(np.asarray(x, dtype=np.float64) + 0.25)


def _exp(x):
    """exp(x) by x = k ln 2 + r, a degree-13 Taylor polynomial in r, and ldexp (exact)."""
    x = np.clip(np.asarray(x, dtype=np.float64), -700.0, 700.0)
    k = np.floor(x * _INV_LN2 + 0.5)
    r = x - k * _LN2  # |r| <= 0.35
    p = np.full_like(r, _EXP_COEFFS[-1])
    for c in reversed(_EXP_COEFFS[:-1]):
        p *= r
        p += c
    return np.ldexp(p, k.astype(np.int32))


def _rise(u):
    """Raised-cosine rise: 0 for u <= 0, 1 for u >= 1, 0.5 - 0.5 cos(pi u) between."""
    u = np.clip(np.asarray(u, dtype=np.float64), 0.0, 1.0)
    return 0.5 - 0.5 * _cos_turns(0.5 * u)


class _Draws:
    """Uniform numbers in [0, 1) read straight from the PCG64 bit stream of a seed.

    Only the bit generator's raw 64-bit words are used (top 53 bits times 2**-53), not the
    Generator's distribution methods, so the numbers do not depend on how a numpy version
    implements those methods.
    """

    def __init__(self, seed: int):
        self._bits = np.random.default_rng(np.random.PCG64(seed)).bit_generator

    def one(self) -> float:
        return (int(self._bits.random_raw()) >> 11) * _TWO_POW_M53

    def many(self, shape) -> np.ndarray:
        raw = self._bits.random_raw(shape)
        return (raw >> np.uint64(11)).astype(np.float64) * _TWO_POW_M53

    def pick(self, n: int) -> int:
        return min(int(self.one() * n), n - 1)

    def between(self, lo: float, hi: float) -> float:
        return lo + (hi - lo) * self.one()


def _fir_taps(fs: int, low_hz: float, high_hz: float, transition_hz: float) -> np.ndarray:
    """Windowed-sinc (Hann) band-pass taps, or low-pass when ``low_hz`` is 0.

    The number of taps is odd and about 3.3 fs / transition (common practice, no source).
    """
    n = int(math.ceil(3.3 * fs / transition_hz))
    n += 1 - n % 2
    m = np.arange(n, dtype=np.float64) - (n - 1) // 2
    safe = np.where(m == 0.0, 1.0, m)

    def ideal_lowpass(fc):
        a = 2.0 * fc / fs
        return np.where(m == 0.0, a, _sin_turns(0.5 * a * m) / (_PI * safe))

    h = ideal_lowpass(high_hz)
    if low_hz > 0:
        h = h - ideal_lowpass(low_hz)
    k = np.arange(1, n + 1, dtype=np.float64)
    return h * (0.5 - 0.5 * _cos_turns(k / (n + 1)))


def _fir_valid(x: np.ndarray, h: np.ndarray) -> np.ndarray:
    """Convolve along the last axis, keeping only fully overlapped outputs (tap by tap)."""
    taps = h.shape[0]
    n = x.shape[-1] - taps + 1
    y = h[0] * x[..., taps - 1 : taps - 1 + n]
    for k in range(1, taps):
        y += h[k] * x[..., taps - 1 - k : taps - 1 - k + n]
    return y


def _band_noise(draws: _Draws, rows: int, n: int, fs: int, low_hz: float, high_hz: float,
                transition_hz: float) -> np.ndarray:
    """Unit-variance band-limited noise, shape (rows, n), the same level at any sample rate."""
    h = _fir_taps(fs, low_hz, high_hz, transition_hz)
    white = (2.0 * draws.many((rows, n + h.shape[0] - 1)) - 1.0) * _SQRT3
    power = math.fsum((h * h).tolist())  # fsum is correctly rounded
    return _fir_valid(white, h) * (1.0 / math.sqrt(power))


def _room_noise(draws: _Draws, frames: int, fs: int) -> np.ndarray:
    """Unit-variance soft room noise: white noise on a fixed 6 kHz time grid, interpolated.

    The grid is in seconds, not samples, so the noise is the same signal at any sample rate.
    Linear interpolation between independent values has mean power 2/3 of theirs; the factor
    sqrt(3/2) restores unit variance on average.
    """
    grid = 6000.0
    t = np.arange(frames, dtype=np.float64) * (grid / fs)
    i = np.floor(t)
    f = t - i
    idx = i.astype(np.intp)
    v = (2.0 * draws.many(int(idx[-1]) + 2) - 1.0) * (_SQRT3 * math.sqrt(1.5))
    return v[idx] + f * (v[idx + 1] - v[idx])


def _onset(t: float, fs: int):
    """First sample at or after time t, and that sample's lag behind t (seconds)."""
    n = int(math.ceil(t * fs))
    return n, n / fs - t


def _pan(position: float):
    """Constant-power pan gains (left, right) for position -1 (left) to +1 (right)."""
    turns = (position + 1.0) / 8.0  # 0 .. 1/4 turn
    return float(_cos_turns(turns)), float(_sin_turns(turns))


def _overlay(out: np.ndarray, start: int, seg: np.ndarray, gain: float = 1.0) -> None:
    stop = min(start + seg.shape[0], out.shape[0])
    if stop > start:
        out[start:stop] += gain * seg[: stop - start]


# ---------------------------------------------------------------------------------------------
# Checks and finishing.


def _check_samplerate(samplerate) -> int:
    ok = isinstance(samplerate, numbers.Real) and not isinstance(samplerate, bool)
    if ok:
        ok = math.isfinite(samplerate) and float(samplerate) == int(samplerate)
    if not ok or not SAMPLERATE_MIN <= int(samplerate) <= SAMPLERATE_MAX:
        raise ValueError(
            f"samplerate = {samplerate!r}: out of range, expected a whole number of Hz from "
            f"{SAMPLERATE_MIN} to {SAMPLERATE_MAX}"
        )
    return int(samplerate)


def _check_seconds(seconds, samplerate: int) -> float:
    ok = isinstance(seconds, numbers.Real) and not isinstance(seconds, bool)
    if not ok or not math.isfinite(seconds) or not 0.0 < seconds <= SECONDS_MAX:
        raise ValueError(
            f"seconds = {seconds!r}: out of range, expected more than 0 and at most {SECONDS_MAX:g}"
        )
    if round(float(seconds) * samplerate) < 1:
        raise ValueError(f"seconds = {seconds!r}: too short, expected at least one frame")
    return float(seconds)


def _check_seed(seed) -> int:
    if not isinstance(seed, numbers.Integral) or isinstance(seed, bool) or seed < 0:
        raise ValueError(f"seed = {seed!r}: expected a whole number 0 or more")
    return int(seed)


def _frames(seconds: float, samplerate: int) -> int:
    return int(round(seconds * samplerate))


def _finish(name: str, x: np.ndarray, limit: float) -> np.ndarray:
    """Flush values too small for float32 to zero, convert, and check the bounds."""
    x = np.where(np.abs(x) < 1e-30, 0.0, x)  # no subnormal float32 samples downstream
    y = np.ascontiguousarray(x, dtype=np.float32)
    peak = float(np.max(np.abs(y))) if y.size else 0.0
    if not np.all(np.isfinite(y)) or not peak <= limit:
        raise AssertionError(f"{name}: sample peak {peak!r} exceeds {limit!r} or is not finite")
    return y


# ---------------------------------------------------------------------------------------------
# Drums.

_BEAT = 0.5  # seconds: 120 beats per minute
_BAR = 4 * _BEAT
_STEP = _BEAT / 4  # a sixteenth note

# name: (length in s, pan position)
_DRUM_VOICES = {
    "kick": (0.6, 0.0),
    "snare": (0.35, -0.2),
    "hat": (0.12, 0.45),
    "open_hat": (0.5, 0.45),
}


def _drum_plan(draws: _Draws, seconds: float) -> dict:
    """Hit times (s) and velocities (linear) per voice, bar by bar."""
    hits = {name: [] for name in _DRUM_VOICES}

    def add(name, bar_start, step, velocity):
        t = max(bar_start + step * _STEP + 0.004 * (2.0 * draws.one() - 1.0), 0.0)
        if t < seconds:
            hits[name].append((t, velocity))

    for bar in range(int(math.ceil(seconds / _BAR))):
        t0 = bar * _BAR
        kicks = [0, 8] + [s for s in (3, 6, 7, 10, 11, 14) if draws.one() < 0.3]
        for s in sorted(kicks):
            body, chance, loud = draws.between(0.3, 0.38), draws.one(), draws.between(0.92, 1.0)
            accent = (s == 0 and bar % 4 == 0) or chance < 0.1
            add("kick", t0, s, loud if accent else body)
        for s in (4, 12):
            body, chance, loud = draws.between(0.26, 0.32), draws.one(), draws.between(0.7, 0.78)
            accent = (s == 12 and bar % 4 == 3) or chance < 0.12
            add("snare", t0, s, loud if accent else body)
        for s in (2, 7, 9, 13, 15):
            chance, ghost = draws.one(), draws.between(0.05, 0.1)
            if chance < 0.15:
                add("snare", t0, s, ghost)
        for s in range(16):
            chance, level = draws.one(), draws.one()
            if s % 2 == 0:
                name = "open_hat" if (s == 14 and chance < 0.3) else "hat"
                add(name, t0, s, (0.13 if s % 4 == 0 else 0.09) + 0.03 * level)
            elif chance < 0.2:
                add("hat", t0, s, 0.05 + 0.02 * level)
    return hits


def _tail(n: int, fs: int, length: float) -> np.ndarray:
    """1 for the first 75 % of a hit of ``length`` s, then a raised-cosine fade to 0; n samples."""
    out = np.ones(n)
    first = int(math.ceil(0.75 * length * fs))
    if first < n:
        u = (np.arange(first, n, dtype=np.float64) / fs - 0.75 * length) / (0.25 * length)
        out[first:] = 1.0 - _rise(u)
    return out


def _decay(n: int, fs: int, lags: np.ndarray, seconds: float) -> np.ndarray:
    """exp(-(m / fs + lag) / seconds), rows by lag, as the product of two exponentials."""
    along = _exp(np.arange(n, dtype=np.float64) * (-1.0 / (fs * seconds)))
    return _exp(-lags / seconds)[:, None] * along


def _drum_voice(name: str, n: int, lags: np.ndarray, draws: _Draws, fs: int) -> np.ndarray:
    """One row per hit, n samples each; row k starts lags[k] seconds after its hit time."""
    rows = lags.shape[0]
    if name == "kick":
        sweep = 0.03
        tau = np.arange(n, dtype=np.float64) / fs + lags[:, None]
        phase = 46.0 * tau + (150.0 - 46.0) * sweep * (1.0 - _decay(n, fs, lags, sweep))
        out = _sin_turns(phase) * _decay(n, fs, lags, 0.16)
        short = min(n, int(math.ceil(0.025 * fs)))  # the click has decayed by 80 dB here
        click = _sin_rows(1700.0 / fs, 1700.0 * lags, short) * _decay(short, fs, lags, 0.0025)
        out[:, :short] += 0.3 * click
        return out
    if name == "snare":
        out = 0.45 * _sin_rows(185.0 / fs, 185.0 * lags, n) * _decay(n, fs, lags, 0.05)
        out += 0.25 * _sin_rows(330.0 / fs, 330.0 * lags, n) * _decay(n, fs, lags, 0.03)
        noise = _band_noise(draws, rows, n, fs, 1200.0, 9000.0, 1500.0)
        out += 0.28 * noise * _decay(n, fs, lags, 0.07)
        return out
    decay = 0.02 if name == "hat" else 0.14
    noise = _band_noise(draws, rows, n, fs, 7000.0, 13000.0, 2500.0)
    return 0.5 * noise * _decay(n, fs, lags, decay)


def drum_loop(samplerate: int = 48000, seconds: float = 16.0, seed: int = 1) -> np.ndarray:
    """Synthesise the stereo drum loop of the demo scenario.

    A kit at 120 beats per minute in 2 s bars: kick, snare with ghost notes, closed and open
    hi-hat, each hit placed a few ms off the grid. Ordinary hits are 9 to 12 dB below the
    accented ones (the first kick of every fourth bar, the last snare of every fourth bar, and a
    few at random), so a compressor or limiter has peaks to act on. Kick in the centre, snare
    slightly left, hi-hat right (constant-power panning).

    Parameters
    ----------
    samplerate : int, optional
        Sample rate in Hz, 32000 to 384000.
    seconds : float, optional
        Duration in seconds (more than 0, at most 600).
    seed : int, optional
        Seed of the PCG64 bit stream (``numpy.random.default_rng``); the same seed gives the
        same samples.

    Returns
    -------
    numpy.ndarray
        float32, shape ``(round(seconds * samplerate), 2)``. The sample peak is scaled to just
        under -1 dBFS (``DRUM_PEAK`` = 0.89125).

    Raises
    ------
    ValueError
        If an argument is out of range.

    References
    ----------
    .. [1] AES17-2020, clause 3 (clause number recalled from memory): dBFS, a full-scale sine
       reads 0 dBFS.
    """
    fs = _check_samplerate(samplerate)
    seconds = _check_seconds(seconds, fs)
    draws = _Draws(_check_seed(seed))
    frames = _frames(seconds, fs)
    plan = _drum_plan(draws, seconds)
    out = np.zeros((frames, 2))
    for name, (length, position) in _DRUM_VOICES.items():
        hits = plan[name]
        if not hits:
            continue
        n = int(math.ceil(length * fs))
        starts, lags = zip(*(_onset(t, fs) for t, _ in hits))
        velocity = np.asarray([v for _, v in hits])[:, None]
        seg = _drum_voice(name, n, np.asarray(lags), draws, fs)
        seg *= velocity
        seg *= _tail(n, fs, length)
        left, right = _pan(position)
        for start, row in zip(starts, seg):
            _overlay(out[:, 0], start, row, left)
            _overlay(out[:, 1], start, row, right)
    peak = float(np.max(np.abs(out))) if out.size else 0.0
    if peak > 0.0:
        out *= DRUM_PEAK / peak
    return _finish("drum_loop", out, MINUS_1_DBFS)


# ---------------------------------------------------------------------------------------------
# Music bed.

# One chord per 2 s bar, each tuned pure to its own root (Hz): A minor, F, C (over G), G.
_CHORDS = (
    (220.0, 264.0, 330.0),
    (176.0, 220.0, 264.0),
    (198.0, 264.0, 330.0),
    (198.0, 247.5, 297.0),
)
_BASS_ROOTS = (55.0, 44.0, 66.0, 49.5)
_PAD_HARMONICS = (1.0, 0.35, 0.16, 0.08, 0.04, 0.02)
_BASS_HARMONICS = (1.0, 0.45, 0.2, 0.08)
_TABLE_SIZE = 4096
_CROSSFADE = 0.6  # s, chord to chord
_DETUNE = 0.0016  # relative, each of two voices per note (about 2.8 cents)
_EDGE_FADE = 0.05  # s, at the start and end of the bed


def _wavetable(harmonics):
    """One cycle of a sum of harmonics, and its differences for linear interpolation."""
    k = np.arange(_TABLE_SIZE + 1, dtype=np.float64) / _TABLE_SIZE
    table = np.zeros(_TABLE_SIZE + 1)
    for h, a in enumerate(harmonics, start=1):
        table += a * _sin_turns(h * k)
    return table[:-1].copy(), np.diff(table)


def _lookup(wavetable, turns: np.ndarray) -> np.ndarray:
    """Linearly interpolated wavetable at non-negative phases ``turns``."""
    table, slope = wavetable
    p = turns * _TABLE_SIZE
    i = np.floor(p)
    p -= i
    idx = i.astype(np.intp)
    idx &= _TABLE_SIZE - 1  # the table size is a power of two
    out = slope[idx]
    out *= p
    out += table[idx]
    return out


def music_bed(samplerate: int = 48000, seconds: float = 16.0, seed: int = 2) -> np.ndarray:
    """Synthesise the stereo music bed of the demo scenario.

    A pad of three-note chords, one per 2 s bar (A minor, F, C, G, repeating), each note two
    slightly detuned voices spread left and right, with power-complementary 0.6 s cross-fades
    between chords; under it a bass line on the beat (root, root, root, then fifth or octave).
    Soft attacks (30 ms) and no percussive content: the level is steady, near -20 LUFS.

    Parameters
    ----------
    samplerate : int, optional
        Sample rate in Hz, 32000 to 384000.
    seconds : float, optional
        Duration in seconds (more than 0, at most 600).
    seed : int, optional
        Seed of the PCG64 bit stream (voice phases and bass choices).

    Returns
    -------
    numpy.ndarray
        float32, shape ``(round(seconds * samplerate), 2)``.

    Raises
    ------
    ValueError
        If an argument is out of range.

    References
    ----------
    .. [1] ITU-R BS.1770-4: integrated loudness in LUFS (the -20 LUFS target is checked with a
       BS.1770 implementation in the tests).
    """
    fs = _check_samplerate(samplerate)
    seconds = _check_seconds(seconds, fs)
    draws = _Draws(_check_seed(seed))
    frames = _frames(seconds, fs)
    left, right = np.zeros(frames), np.zeros(frames)
    pad = _wavetable(_PAD_HARMONICS)
    bass = _wavetable(_BASS_HARMONICS)
    wide, narrow = 0.8, 0.45  # gains of a voice to its own side and to the other side
    half = 0.5 * _CROSSFADE

    bar = 0
    while bar * _BAR - half < seconds:
        chord = _CHORDS[bar % len(_CHORDS)]
        phases = [draws.one() for _ in range(2 * len(chord))]
        fifth_or_octave = 1.5 if draws.one() < 0.5 else 2.0
        a = max(0, int(math.ceil((bar * _BAR - half) * fs)))
        b = min(frames, int(math.ceil(((bar + 1) * _BAR + half) * fs)))
        if b > a:
            t = np.arange(a, b, dtype=np.float64) / fs
            weight = np.ones(b - a)
            # Power-complementary cross-fades: sine rising into the bar, cosine falling out.
            rise_end = min(b, int(math.ceil((bar * _BAR + half) * fs))) - a
            if bar > 0 and rise_end > 0:
                u = (t[:rise_end] - (bar * _BAR - half)) / _CROSSFADE
                weight[:rise_end] = _sin_turns(0.25 * np.clip(u, 0.0, 1.0))
            fall = max(a, int(math.ceil(((bar + 1) * _BAR - half) * fs))) - a
            if fall < b - a:
                u = (t[fall:] - ((bar + 1) * _BAR - half)) / _CROSSFADE
                weight[fall:] *= _cos_turns(0.25 * np.clip(u, 0.0, 1.0))
            for j, f in enumerate(chord):
                low = _lookup(pad, f * (1.0 - _DETUNE) * t + phases[2 * j])
                high = _lookup(pad, f * (1.0 + _DETUNE) * t + phases[2 * j + 1])
                low *= weight
                high *= weight
                left[a:b] += wide * low + narrow * high
                right[a:b] += narrow * low + wide * high
        # Bass: four notes per bar, 0.47 s each, slow decay, soft attack and release.
        root = _BASS_ROOTS[bar % len(_BASS_ROOTS)]
        for beat in range(4):
            f = root * (fifth_or_octave if beat == 3 else 1.0)
            t_on = bar * _BAR + beat * _BEAT
            start, lag = _onset(t_on, fs)
            stop = min(frames, int(math.ceil((t_on + 0.47) * fs)))
            if stop <= start:
                continue
            n = stop - start
            tau = np.arange(n, dtype=np.float64) / fs + lag
            env = 0.9 * _exp(tau * (-1.0 / 1.2))
            attack = min(n, int(math.ceil(0.03 * fs)) + 1)
            env[:attack] *= _rise(tau[:attack] / 0.03)
            release = min(n, max(0, int(math.floor((t_on + 0.39) * fs)) - start))
            env[release:] *= 1.0 - _rise((tau[release:] - 0.39) / 0.08)
            note = env * _lookup(bass, f * tau)
            left[start:stop] += note
            right[start:stop] += note
        bar += 1

    out = np.stack([left, right], axis=1)
    out *= _BED_GAIN
    edge = min(frames, int(math.ceil(_EDGE_FADE * fs)) + 1)
    t = np.arange(edge, dtype=np.float64) / fs
    out[:edge] *= _rise(t / _EDGE_FADE)[:, None]
    t = np.arange(frames - edge, frames, dtype=np.float64) / fs
    out[frames - edge:] *= _rise((seconds - t) / _EDGE_FADE)[:, None]
    return _finish("music_bed", out, 1.0)


# ---------------------------------------------------------------------------------------------
# Narrator.

# Vowel-like formant targets F1, F2, F3 in Hz: round figures typical of an adult voice
# (values recalled from memory, approximate; any set of distinct vowel-like targets would do).
_VOWELS = (
    (750.0, 1200.0, 2550.0),
    (300.0, 2250.0, 2950.0),
    (330.0, 850.0, 2350.0),
    (520.0, 1800.0, 2500.0),
    (480.0, 900.0, 2450.0),
)
_F4 = 3400.0
_BANDWIDTHS = (80.0, 100.0, 140.0, 200.0)  # Hz, one per formant
_FORMANT_LEVELS = (1.0, 0.5, 0.28, 0.12)  # falling like a glottal source's spectrum
# Wavelet durations (s): about ln(1000) / (pi B), where a formant has decayed by 60 dB.
_WAVELET_SECONDS = (0.0275, 0.022, 0.0157, 0.011)
_PITCH_LO, _PITCH_HI = 100.0, 180.0


def _narrator_plan(draws: _Draws, seconds: float):
    """Phrases, voiced pulses and fricative bursts, in seconds; independent of the sample rate.

    Returns
    -------
    phrases : list of (float, float)
    pulses : list of (time, amplitude, F1, F2, F3, F4)
    bursts : list of (start, end, amplitude)
    """
    limit = seconds - 0.05
    tail = max(_WAVELET_SECONDS) + 0.001
    phrases, pulses, bursts = [], [], []
    t = draws.between(0.8, 1.4)
    while t + 1.5 <= limit:  # no phrase starts unless 1.5 s are left for it
        target = draws.between(1.8, 4.0)
        f_begin, f_end = draws.between(150.0, 175.0), draws.between(100.0, 120.0)
        wobble = draws.one()
        ends = []
        s = t
        truncated = False
        while True:
            length = draws.between(0.10, 0.30)
            pre, post = draws.one() < 0.18, draws.one() < 0.10
            pre_len = length * draws.between(0.25, 0.4) if pre else 0.0
            post_len = length * draws.between(0.2, 0.3) if post else 0.0
            v0, v1 = draws.pick(len(_VOWELS)), draws.pick(len(_VOWELS))
            accent, bump = draws.between(0.7, 1.0), draws.between(0.0, 25.0)
            gap = draws.between(0.04, 0.14)
            va = s + pre_len - (0.01 if pre else 0.0)  # voicing begins as the noise fades
            vb = s + length - post_len + (0.01 if post else 0.0)
            end = max(vb + tail, s + length)
            if end > limit:
                truncated = True
                break
            # Voiced pulses: each period is 1 / f0 at the pulse, with 1 % jitter.
            tp = va
            while tp < vb:
                x = (tp - va) / (vb - va)
                f0 = (f_begin + (f_end - f_begin) * min((tp - t) / target, 1.0)
                      + 6.0 * _sin_turns_scalar(0.8 * (tp - t) + wobble)
                      + bump * _sin_turns_scalar(0.5 * x))
                f0 = min(max(f0, _PITCH_LO), _PITCH_HI)
                envelope = _rise_scalar((tp - va) / 0.025) * _rise_scalar((vb - tp) / 0.04)
                shimmer = 1.0 + 0.06 * (draws.one() - 0.5)
                glide = x * x * (3.0 - 2.0 * x)
                formants = [lo + (hi - lo) * glide for lo, hi in zip(_VOWELS[v0], _VOWELS[v1])]
                pulses.append((tp, accent * envelope * shimmer, *formants, _F4))
                tp += (1.0 + 0.01 * (draws.one() - 0.5)) / f0
            if pre:
                bursts.append((s, s + pre_len, 0.35 * accent))
            if post:
                bursts.append((s + length - post_len, s + length, 0.3 * accent))
            ends.append(end)
            s += length + gap
            if s - t >= target:
                break
        if not ends:
            break
        phrases.append((t, max(ends)))
        if truncated:
            break
        t = max(ends) + draws.between(1.0, 3.0)
    return phrases, pulses, bursts


def _narrator(samplerate, seconds, seed):
    fs = _check_samplerate(samplerate)
    seconds = _check_seconds(seconds, fs)
    draws = _Draws(_check_seed(seed))
    frames = _frames(seconds, fs)
    phrases, pulses, bursts = _narrator_plan(draws, seconds)
    voice = np.zeros(frames)
    if pulses:
        p = np.asarray(pulses)
        starts, lags = zip(*(_onset(tp, fs) for tp in p[:, 0]))
        lags = np.asarray(lags)
        longest = int(math.ceil(max(_WAVELET_SECONDS) * fs))
        wavelets = np.zeros((p.shape[0], longest))
        # Each pulse excites each formant as a damped sinusoid sampled on the output grid.
        for i, (bw, level, dur) in enumerate(zip(_BANDWIDTHS, _FORMANT_LEVELS, _WAVELET_SECONDS)):
            n = int(math.ceil(dur * fs))
            freq = p[:, 2 + i]
            ring = _sin_rows(freq / fs, freq * lags, n)
            ring *= (level * p[:, 1] * _exp(-_PI * bw * lags))[:, None]
            ring *= _exp(np.arange(n, dtype=np.float64) * (-_PI * bw / fs)) * _tail(n, fs, dur)
            wavelets[:, :n] += ring
        for start, row in zip(starts, wavelets):
            _overlay(voice, start, row)
    for a, b, level in bursts:
        start, lag = _onset(a, fs)
        stop = min(frames, int(math.ceil(b * fs)))
        if stop <= start:
            continue
        u = (np.arange(stop - start, dtype=np.float64) / fs + lag) / (b - a)
        noise = _band_noise(draws, 1, stop - start, fs, 2500.0, 9000.0, 1500.0)[0]
        voice[start:stop] += level * (0.5 - 0.5 * _cos_turns(u)) * noise
    out = _NARRATOR_GAIN * voice + ROOM_RMS * _room_noise(draws, frames, fs)
    return _finish("narrator", out[:, None], 1.0), phrases


def narrator(samplerate: int = 48000, seconds: float = 16.0, seed: int = 3) -> np.ndarray:
    """Synthesise the speech-like key signal of the demo scenario (mono).

    Not speech: a voiced source, a pulse train whose pitch drifts from about 150-175 Hz down to
    100-120 Hz over a phrase (with a slow wobble and a rise on each syllable, kept within 100 to
    180 Hz), excites four formant resonances (each pulse rings each formant as a damped
    sinusoid) whose centre frequencies glide between vowel-like targets within a syllable.
    Syllables last 100-300 ms with short gaps; phrases last a few seconds and are separated by
    pauses of 1-3 s. Some syllables begin or end with a fricative-like burst of band-passed
    noise (2.5-9 kHz). Phrases are near -18 dBFS RMS; a soft room noise at -70 dBFS RMS runs
    throughout and is all there is in the pauses.

    Parameters
    ----------
    samplerate : int, optional
        Sample rate in Hz, 32000 to 384000.
    seconds : float, optional
        Duration in seconds (more than 0, at most 600).
    seed : int, optional
        Seed of the PCG64 bit stream (timing, vowels, pitch and noise).

    Returns
    -------
    numpy.ndarray
        float32, shape ``(round(seconds * samplerate), 1)``. Use :func:`scenario` to get the
        phrase times as well.

    Raises
    ------
    ValueError
        If an argument is out of range.

    References
    ----------
    .. [1] AES17-2020, clause 3 (clause number recalled from memory): RMS levels in dBFS, a
       full-scale sine reads 0 dBFS.
    """
    return _narrator(samplerate, seconds, seed)[0]


def scenario(samplerate: int = 48000, seconds: float = 16.0) -> dict:
    """All three signals of the demo scenario, with the narrator's phrase times.

    Parameters
    ----------
    samplerate : int, optional
        Sample rate in Hz, 32000 to 384000.
    seconds : float, optional
        Duration in seconds (more than 0, at most 600).

    Returns
    -------
    dict
        ``"drums"`` and ``"music"``: float32 ``(frames, 2)``; ``"narrator"``: float32
        ``(frames, 1)``; ``"phrases"``: list of ``(start_s, end_s)`` tuples, the spans in which
        the narrator sounds (from the first onset to the end of the last ring or burst). Outside
        them the narrator is room noise only. Seeds are the functions' defaults (1, 2, 3).
    """
    voice, phrases = _narrator(samplerate, seconds, 3)
    return {
        "drums": drum_loop(samplerate, seconds),
        "music": music_bed(samplerate, seconds),
        "narrator": voice,
        "phrases": phrases,
    }


def write_scenario(folder, samplerate: int = 48000, seconds: float = 16.0) -> dict:
    """Write the scenario as drums.wav, music.wav and narrator.wav (32-bit float WAV).

    Each file is first written under a temporary name in ``folder`` and moved into place with
    ``os.replace`` only after all three were written, so a failure leaves no half-written file
    and does not touch files already there.

    Parameters
    ----------
    folder : str or os.PathLike
        Output folder; created if missing.
    samplerate : int, optional
        Sample rate in Hz, 32000 to 384000.
    seconds : float, optional
        Duration in seconds (more than 0, at most 600).

    Returns
    -------
    dict
        ``{"drums": Path, "music": Path, "narrator": Path}``.
    """
    import soundfile

    data = scenario(samplerate, seconds)
    fs = _check_samplerate(samplerate)
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    finals = {name: folder / f"{name}.wav" for name in ("drums", "music", "narrator")}
    temps = {}
    try:
        for name, final in finals.items():
            temp = folder / f".{final.name}.{os.getpid()}.part"
            temps[name] = temp
            with open(temp, "wb") as fh:
                soundfile.write(fh, data[name], fs, format="WAV", subtype="FLOAT")
                fh.flush()
                os.fsync(fh.fileno())
        for name, final in finals.items():
            os.replace(temps.pop(name), final)
    finally:
        for temp in temps.values():
            try:
                temp.unlink()
            except FileNotFoundError:
                pass
    return finals


def main(argv=None) -> int:
    """Command line: write the demo scenario's WAV files into a folder and print their paths."""
    parser = argparse.ArgumentParser(
        prog="python -m livedyn.demo",
        description="Write livedyn's demo scenario (a small theatre rehearsal: drum loop, music "
        "bed, speech-like narrator key) as 32-bit float WAV files.",
    )
    parser.add_argument("outdir", help="folder for drums.wav, music.wav and narrator.wav")
    parser.add_argument("--seconds", type=float, default=16.0,
                        help="duration in seconds (default 16)")
    parser.add_argument("--samplerate", type=int, default=48000,
                        help="sample rate in Hz, 32000 to 384000 (default 48000)")
    args = parser.parse_args(argv)
    try:
        paths = write_scenario(args.outdir, args.samplerate, args.seconds)
    except (ValueError, OSError) as exc:
        parser.error(str(exc))
    for path in paths.values():
        print(path)
    return 0


if __name__ == "__main__":
    sys.exit(main())
