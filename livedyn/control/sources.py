"""Built-in test sources: :class:`TestSource`, played as the main or the key input.

Kinds (names of livedyn's own; levels in dBFS, a full-scale sine being 0 dBFS as in AES17):

==========================================  ===============================================
``tone [HZ [DBFS]]``                        a sine (default 1000 Hz, -20 dBFS: its peak)
``pink [DBFS]``                             pink noise, 20 Hz to half the sample rate, power
                                            density falling 3 dB an octave (default -30 dBFS
                                            rms, sine-referenced)
``white [DBFS]``                            white (Gaussian) noise (default -30 dBFS rms)
``sweep [F1 [F2 [SECONDS [DBFS]]]]``        a logarithmic sine sweep from F1 to F2 (default
                                            20 Hz to 20 kHz in 10 s at -20 dBFS), then 0.5 s
                                            of silence, repeated
``bursts [HZ [HIGH [LOW [ON_MS [OFF_MS]]]]]``  a sine stepping between two levels (default
                                            1000 Hz, -12 and -32 dBFS, 500 ms each): the
                                            steps up show the attack, the steps down the
                                            release; LOW may be ``off``
``input``                                   the input the run started with (a file or the
                                            demo scene), when there is one
==========================================  ===============================================

Every kind is level-limited: no sample exceeds :data:`CAP_DBFS` (-6 dBFS peak; common
practice, no source: headroom for a processor with makeup gain and a listener's ears). A
level that would pass it is refused; noise (whose peaks are random) is asked for by its rms,
at most :data:`NOISE_MAX_DBFS`, and any sample beyond the cap is clipped to it and counted.

Each kind is computed once, when it is chosen, into a loop buffer that repeats seamlessly
(a whole number of sine cycles; noise made periodic in the frequency domain); the engine's
feeder thread copies from it into the input ring, as it does for a file. Nothing is computed
or allocated on the audio thread.

References
----------
A. Farina, "Simultaneous measurement of impulse response and distortion with a swept-sine
technique", 108th AES Convention, Paris, 2000, preprint 5093, eq. (1): the exponential sweep
x(t) = sin(2 pi f1 T / ln(f2/f1) (exp(t ln(f2/f1) / T) - 1)), whose instantaneous frequency
is f1 exp(t ln(f2/f1) / T).
AES17 (dBFS: a full-scale sine is 0 dBFS; rms levels are sine-referenced).
"""
from __future__ import annotations

import math
import threading

import numpy as np

from ..params import ParamError

#: No sample of any test source exceeds this (common practice, no source).
CAP_DBFS = -6.0
#: Noise is asked for by its rms (sine-referenced); its crest factor needs room below the cap.
NOISE_MAX_DBFS = -18.0
TONE_LOOP_S = 4.0  # a tone's frequency is rounded to 1 / TONE_LOOP_S Hz
NOISE_LOOP = 1 << 18  # frames of a noise loop (5.5 s at 48 kHz)
PINK_LOW_HZ = 20.0  # pink noise starts here (below it, 1/f power would dominate the rms)
SWEEP_GAP_S = 0.5
SWEEP_FADE_S = 0.01  # half-Hann fades at a sweep's ends, so its repetition does not click
KINDS = ("tone", "pink", "white", "sweep", "bursts", "input")
USAGE = ("tone [HZ [DBFS]], pink [DBFS], white [DBFS], sweep [F1 [F2 [SECONDS [DBFS]]]], "
         "bursts [HZ [HIGH [LOW [ON_MS [OFF_MS]]]]]")


class SourceError(ParamError):
    """A test source that cannot be made; one line."""


def _amp(db):
    return 10.0 ** (db / 20.0)


def _num(text, what, kind, unit):
    t = str(text).strip().lower()
    scale = 1.0
    for suffix, k in (("dbfs", 1.0), ("db", 1.0), ("khz", 1000.0), ("hz", 1.0), ("ms", 1.0),
                      ("s", 1.0)):
        if t.endswith(suffix):
            t, scale = t[: -len(suffix)].strip(), k
            break
    try:
        v = float(t) * scale
    except ValueError:
        raise SourceError(f"{kind} {what} {text!r}: expected a number in {unit} "
                          f"({USAGE})") from None
    if not math.isfinite(v):
        raise SourceError(f"{kind} {what} {text!r}: expected a finite number in {unit}")
    return v


def _level(text, what, kind, top):
    v = _num(text, what, kind, "dBFS")
    if v > top:
        raise SourceError(f"{kind} {what} {v:g} dBFS: above the test sources' limit, expected "
                          f"at most {top:g} dBFS")
    if v < -100.0:
        raise SourceError(f"{kind} {what} {v:g} dBFS: expected -100 dBFS or more")
    return v


def parse_spec(text):
    """``"tone 1000 -20"`` or ``"tone:1000:-20"`` -> ``(kind, [arguments])``."""
    words = str(text).replace(":", " ").replace(",", " ").split()
    if not words:
        raise SourceError(f"test source {text!r}: expected one of {USAGE}")
    kind = words[0].lower()
    if kind not in KINDS:
        raise SourceError(f"test source {words[0]!r}: expected one of {', '.join(KINDS)} "
                          f"({USAGE})")
    return kind, words[1:]


class TestSource:
    """A test signal (or the wrapped original input) as an engine source.

    Parameters
    ----------
    samplerate : float
    channels : int
        Every channel carries the same signal.
    spec : str
        What to play (see the module docstring), e.g. ``"tone 1000 -20"``.
    inner : source, optional
        The run's own input (a file or array source), played while the kind is ``input``.
    seed : int
        Seed of the noise generator (the same noise each run).
    """

    __test__ = False  # not a pytest class

    def __init__(self, samplerate, channels, spec=None, inner=None, seed=1):
        self.fs = float(samplerate)
        self.channels = int(channels)
        self.inner = inner
        self.finished = False
        self.clipped = 0  # noise samples clipped to the cap
        self._rng = np.random.default_rng(seed)
        self._lock = threading.Lock()
        self._out = np.zeros((0, self.channels), np.float32)
        self._loop = None  # (kind, mono float32 loop buffer or None, description)
        self._pos = 0
        self.description = ""
        self.program(spec if spec else ("input" if inner is not None else "tone"))

    # ---- what to play ---------------------------------------------------------------------------
    def program(self, text) -> str:
        """Choose what to play (from any thread); returns a one-line description. A spec
        that cannot be made raises SourceError and changes nothing."""
        kind, args = parse_spec(text)
        if kind == "input":
            if args:
                raise SourceError(f"input {' '.join(args)!r}: 'input' takes no arguments")
            if self.inner is None:
                raise SourceError("input: this run has no input file or demo scene to go back "
                                  "to; choose a test signal")
            loop = ("input", None, "the run's own input")
        else:
            buf, desc = getattr(self, "_make_" + kind)(args)
            cap = np.float32(_amp(CAP_DBFS))
            buf = np.clip(buf.astype(np.float32), -cap, cap)  # the hard cap, whatever the kind
            loop = (kind, buf, desc)
        with self._lock:
            self._loop = loop
            self._pos = 0
            self.finished = False
        self.description = loop[2]
        return loop[2]

    @property
    def kind(self):
        return self._loop[0]

    @property
    def loop_buffer(self):
        """The mono loop being played (None while the run's own input plays)."""
        return self._loop[1]

    def _args(self, kind, args, n):
        if len(args) > n:
            raise SourceError(f"{kind}: too many values {' '.join(args)!r}, expected {USAGE}")
        return list(args) + [None] * (n - len(args))

    def _freq(self, text, what, kind, default):
        f = default if text is None else _num(text, what, kind, "Hz")
        top = min(20000.0, 0.45 * self.fs)
        if not 10.0 <= f <= top:
            raise SourceError(f"{kind} {what} {f:g} Hz: expected 10 to {top:g} Hz")
        return f

    def _make_tone(self, args):
        f, lv = self._args("tone", args, 2)
        f = self._freq(f, "frequency", "tone", 1000.0)
        lv = -20.0 if lv is None else _level(lv, "level", "tone", CAP_DBFS)
        n = int(round(TONE_LOOP_S * self.fs))
        k = max(1, int(round(f * n / self.fs)))  # whole cycles in the loop: seamless
        actual = k * self.fs / n
        buf = _amp(lv) * np.sin(2 * np.pi * k * np.arange(n) / n)
        return buf, f"tone {actual:g} Hz at {lv:g} dBFS"

    def _noise_scale(self, x, lv):
        rms = _amp(lv) / math.sqrt(2.0)  # sine-referenced: a sine of peak A reads A/sqrt(2)
        x = x * (rms / math.sqrt(np.mean(x * x)))
        cap = _amp(CAP_DBFS)
        self.clipped += int(np.count_nonzero(np.abs(x) > cap))
        return np.clip(x, -cap, cap)

    def _make_white(self, args):
        (lv,) = self._args("white", args, 1)
        lv = -30.0 if lv is None else _level(lv, "level", "white", NOISE_MAX_DBFS)
        x = self._rng.standard_normal(NOISE_LOOP)
        return self._noise_scale(x, lv), f"white noise at {lv:g} dBFS rms"

    def _make_pink(self, args):
        (lv,) = self._args("pink", args, 1)
        lv = -30.0 if lv is None else _level(lv, "level", "pink", NOISE_MAX_DBFS)
        n = NOISE_LOOP
        spec = np.fft.rfft(self._rng.standard_normal(n))
        f = np.fft.rfftfreq(n, 1.0 / self.fs)
        shape = np.zeros_like(f)
        band = f >= PINK_LOW_HZ
        shape[band] = 1.0 / np.sqrt(f[band])  # power 1/f: -3 dB an octave
        x = np.fft.irfft(spec * shape, n)  # periodic in n: the loop is seamless
        return self._noise_scale(x, lv), (f"pink noise {PINK_LOW_HZ:g} Hz to {self.fs / 2:g} Hz "
                                          f"at {lv:g} dBFS rms")

    def _make_sweep(self, args):
        f1, f2, t, lv = self._args("sweep", args, 4)
        f1 = self._freq(f1, "start", "sweep", 20.0)
        f2 = self._freq(f2, "end", "sweep", min(20000.0, 0.45 * self.fs))
        if not f2 > f1:
            raise SourceError(f"sweep {f1:g} to {f2:g} Hz: expected the end above the start")
        t = 10.0 if t is None else _num(t, "length", "sweep", "s")
        if not 0.1 <= t <= 60.0:
            raise SourceError(f"sweep length {t:g} s: expected 0.1 to 60 s")
        lv = -20.0 if lv is None else _level(lv, "level", "sweep", CAP_DBFS)
        buf = _amp(lv) * sweep(self.fs, f1, f2, t)
        nf = int(round(SWEEP_FADE_S * self.fs))
        fade = np.sin(0.5 * np.pi * np.arange(nf) / nf) ** 2
        buf[:nf] *= fade
        buf[len(buf) - nf:] *= fade[::-1]
        buf = np.concatenate([buf, np.zeros(int(round(SWEEP_GAP_S * self.fs)))])
        return buf, f"log sweep {f1:g} Hz to {f2:g} Hz in {t:g} s at {lv:g} dBFS, then " \
                    f"{SWEEP_GAP_S:g} s of silence"

    def _make_bursts(self, args):
        f, hi, lo, on, off = self._args("bursts", args, 5)
        f = self._freq(f, "frequency", "bursts", 1000.0)
        hi = -12.0 if hi is None else _level(hi, "high level", "bursts", CAP_DBFS)
        if lo is not None and str(lo).strip().lower() == "off":
            lo_db = -math.inf
        else:
            lo_db = -32.0 if lo is None else _level(lo, "low level", "bursts", CAP_DBFS)
            if lo_db >= hi:
                raise SourceError(f"bursts low level {lo_db:g} dBFS: expected below the high "
                                  f"level {hi:g} dBFS (or off)")
        on = 500.0 if on is None else _num(on, "on time", "bursts", "ms")
        off = 500.0 if off is None else _num(off, "off time", "bursts", "ms")
        for what, v in (("on time", on), ("off time", off)):
            if not 5.0 <= v <= 10000.0:
                raise SourceError(f"bursts {what} {v:g} ms: expected 5 to 10000 ms")
        m = max(2, int(round(self.fs / f)))  # samples a cycle: the steps fall on zero crossings
        actual = self.fs / m
        n_on = max(1, int(round(on / 1000.0 * actual))) * m
        n_off = max(1, int(round(off / 1000.0 * actual))) * m
        phase = np.sin(2 * np.pi * np.arange(n_on + n_off) / m)
        env = np.full(n_on + n_off, 0.0 if math.isinf(lo_db) else _amp(lo_db))
        env[:n_on] = _amp(hi)
        low = "off" if math.isinf(lo_db) else f"{lo_db:g} dBFS"
        return phase * env, (f"bursts {actual:g} Hz: {hi:g} dBFS for {1000 * n_on / self.fs:g} "
                             f"ms, {low} for {1000 * n_off / self.fs:g} ms")

    # ---- the engine's source interface -----------------------------------------------------------
    def read(self, n):
        """The next ``n`` frames (the engine's feeder thread calls this)."""
        loop = self._loop
        if loop[0] == "input":
            blk = self.inner.read(n)
            if blk is None:
                self.finished = True
            return blk
        if self._out.shape[0] < n:
            self._out = np.zeros((n, self.channels), np.float32)
        out = self._out[:n]
        buf = loop[1]
        with self._lock:
            pos = self._pos
            done = 0
            while done < n:
                take = min(n - done, len(buf) - pos)
                out[done:done + take, 0] = buf[pos:pos + take]
                done += take
                pos = (pos + take) % len(buf)
            self._pos = pos
        if self.channels > 1:
            out[:, 1:] = out[:, :1]
        return out

    def close(self):
        if self.inner is not None:
            self.inner.close()


def sweep(fs, f1, f2, seconds):
    """Farina's exponential sweep (eq. (1) of the paper in the module References), unit peak,
    ``round(seconds * fs)`` samples."""
    t = np.arange(int(round(seconds * fs))) / fs
    r = math.log(f2 / f1)
    return np.sin(2 * np.pi * f1 * seconds / r * (np.exp(t * r / seconds) - 1.0))
