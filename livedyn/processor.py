"""Processor: one configured algorithm with its state.

>>> import numpy as np, livedyn
>>> comp = livedyn.Processor("compressor", 48000, 2, threshold=-24, ratio="4:1")
>>> y = comp.process(np.zeros((64, 2), np.float32))
"""
from __future__ import annotations

import math

import numpy as np

from . import algorithms
from .dsp import layout as L
from .params import (
    ALL, KEY_EXTERNAL, LAW_COMPRESSOR, LINK_MEAN, LINK_NONE, MAX_LOOKAHEAD_MS, NPARAM, P_KEY, P_LAW, P_LINK,
    P_LOOKAHEAD, P_SAMPLERATE, P_TOPOLOGY, P_TRUE_PEAK, P_USER_CURVE, P_USER_DETECTOR,
    P_ATTACK, P_RATIO, P_RELEASE,
    P_USER_SMOOTHER, TOPOLOGY_FEEDBACK, ParamError, feedback_problem,
)

MAX_CHANNELS = 8


class Processor:
    """One algorithm, configured for a sample rate and channel layout, with its state.

    Parameters
    ----------
    algorithm : str or Algorithm
        A built-in name (``compressor``, ``limiter``, ``expander``, ``gate``, ``ducker``).
    samplerate : float
        Hz.
    channels : int
        Main channels, 1 to 8.
    key_channels : int
        Channels of the external key input (0: no external key).
    warm : bool
        Run the kernel once now on scratch copies (compiling or loading it), not at first use.
    precision : str, optional
        ``"float64"`` or ``"float32"``: the arithmetic of the kernel (see
        :mod:`livedyn.dsp.precision`). A structural setting, fixed for the processor's life.
        Default: a user file's compiled precision, else float64. A user file compiled in one
        precision cannot run in the other (load it again with ``precision=``).
    **params
        Initial parameter values by name, as numbers or text (``ratio="4:1"``).
    """

    def __init__(self, algorithm, samplerate, channels, key_channels=0, *, warm=True,
                 precision=None, **params):
        from .dsp.precision import check as check_precision

        self.algorithm = algorithms.get(algorithm)
        self.schema = self.algorithm.schema
        own = self.algorithm.precision
        self.precision = check_precision(precision if precision is not None else own)
        if self.algorithm.source is not None and self.precision != own:
            raise ParamError(
                f"precision = {self.precision}: {self.algorithm.source} was compiled in {own}; "
                f"load it in {self.precision} (livedyn.loader.load(path, precision="
                f"{self.precision!r}))")
        samplerate = float(samplerate)
        if not (8000 <= samplerate <= 384000):
            raise ParamError(f"samplerate = {samplerate:g} Hz: expected 8000 to 384000 Hz")
        if not (1 <= int(channels) <= MAX_CHANNELS):
            raise ParamError(f"channels = {channels}: expected 1 to {MAX_CHANNELS}")
        if not (0 <= int(key_channels) <= MAX_CHANNELS):
            raise ParamError(f"key_channels = {key_channels}: expected 0 to {MAX_CHANNELS}")
        self.samplerate = samplerate
        self.channels = int(channels)
        self.key_channels = int(key_channels)
        self._kernel = self.algorithm.kernel(self.precision)
        self._variant = None  # the kernel compiled for one setting (specialise())

        self.p = np.zeros(NPARAM, dtype=np.float64)
        for prm in ALL.values():  # every slot sane, also those this algorithm lacks
            self.p[prm.slot] = prm.default
        for prm in self.schema:
            self.p[prm.slot] = prm.default
        self.p[P_SAMPLERATE] = samplerate
        self.p[P_LAW] = self.algorithm.law
        for slot, stage in ((P_USER_CURVE, self.algorithm.user_curve),
                            (P_USER_DETECTOR, self.algorithm.user_detector),
                            (P_USER_SMOOTHER, self.algorithm.user_smoother)):
            self.p[slot] = float(stage.address) if stage is not None else 0.0
        if self.algorithm.needs_key and self.key_channels == 0 and "key" in self.schema:
            self.p[self.schema["key"].slot] = 0.0  # no key input: fall back to the main input
        self.check_combination(self.p)
        for name, value in params.items():
            self.set(name, value)

        ncols = max(self.channels, self.key_channels, 12)
        # rows from NROWS on: a user algorithm's declared state, read as a C-ordered
        # (2 * ncols, nstate) block: a row per key channel for its detector (or per channel for
        # its kernel), then a row per gain channel for its smoother
        nstate = self.algorithm.state_size
        self.st = np.zeros((L.NROWS + 2 * nstate, ncols), dtype=np.float64)
        from .dsp.limiter import TP_DELAY, TP_SPREAD

        self._tp_delay = TP_DELAY
        ring_len = int(math.ceil(MAX_LOOKAHEAD_MS * samplerate / 1000.0)) + TP_DELAY + TP_SPREAD + 8
        self.ring = np.zeros((ring_len, L.RING_COLS_PER_CHANNEL * self.channels), dtype=np.float64)
        self._no_trace = np.zeros((L.NTRACE, 0, ncols), dtype=np.float64)
        self.reset()
        if warm:  # the load-time checks build one cold: nothing of a user file runs unchecked
            self._warm()

    def _warm(self):
        """Compile (or load) the kernel now, on a scratch copy of the state, not at first use."""
        from .dsp import warm

        x = np.zeros((1, self.channels), np.float32)
        k = np.zeros((1, max(self.key_channels, 1)), np.float32) if self.key_channels else x
        label = f"{self.algorithm.kind} kernel" + (
            f" in {self.precision}" if self.precision != "float64" else "")
        warm(self._kernel, label, x, k, np.empty_like(x), self.p.copy(),
             self.st.copy(), self.ring.copy(), self._no_trace)

    # -- parameters ---------------------------------------------------------------------------
    def set(self, name, value):
        """Set a parameter from a number or text; raises ParamError with a one-line reason."""
        prm, v = self.validate(name, value)
        self.p[prm.slot] = v
        return v

    def validate(self, name, value, base=None):
        """Check a parameter change without making it.

        Parameters
        ----------
        name : str
            A parameter of this algorithm.
        value : float or str
            A number or text such as ``"4:1"`` or ``"off"``.
        base : numpy.ndarray, optional
            The parameter array the change would apply to (default this processor's own; the
            live engine passes the values it has pending).

        Returns
        -------
        (Param, float)
            The parameter and the value as it would be stored.

        Raises
        ------
        ParamError
            One line: a value out of range, a filter at or above half the sample rate, or a
            combination this processor cannot run (see :meth:`check_combination`).
        """
        trial, parsed = self.validate_many({name: value}, base)
        return parsed[0]

    def validate_many(self, values, base=None):
        """Check several parameter changes made together (a whole preset, say) without making
        them: each value on its own, then the combination they make.

        Returns ``(trial, [(Param, float), ...])``: the parameter array with the changes applied
        (a copy of ``base``, default this processor's own) and each parameter with its stored
        value. Raises ParamError (one line) as :meth:`validate` does.
        """
        trial = (self.p if base is None else base).copy()
        parsed = []
        for name, value in dict(values).items():
            prm = self.schema[name]
            v = prm.parse(value)
            if prm.name in ("key_lpf", "key_bpf") and v >= self.samplerate / 2:
                raise ParamError(
                    f"{prm.name} = {v:g} Hz: must be below half the sample rate "
                    f"({self.samplerate / 2:g} Hz)")
            trial[prm.slot] = v
            parsed.append((prm, v))
        self.check_combination(trial)
        return trial, parsed

    def get(self, name) -> float:
        return float(self.p[self.schema[name].slot])

    def values(self) -> dict:
        """Current parameter values by name (floats, choices as indices)."""
        return {prm.name: float(self.p[prm.slot]) for prm in self.schema}

    def describe(self) -> dict:
        """Current parameter values by name as the user reads them."""
        return {prm.name: prm.format(self.p[prm.slot]) for prm in self.schema}

    def check_combination(self, p):
        """Raise ParamError when the values in parameter array ``p`` cannot run together here
        (an external key without key channels, unlinked gain with a key of another width, a
        feedback detector on an external key, a limiter linked by the mean)."""
        if "key" in self.schema and int(p[P_KEY]) == KEY_EXTERNAL and self.key_channels == 0:
            raise ParamError(
                f"key = external: this {self.algorithm.name} has no key input "
                "(give a key signal or key channels, or set key = main)")
        if "key" in self.schema and int(p[P_KEY]) == KEY_EXTERNAL:
            if int(p[P_LINK]) == LINK_NONE and self.key_channels not in (1, self.channels):
                raise ParamError(
                    f"link = none with {self.key_channels} key channels: unlinked gain needs a "
                    f"mono key or one key channel per main channel ({self.channels})")
            if "topology" in self.schema and int(p[P_TOPOLOGY]) == TOPOLOGY_FEEDBACK:
                raise ParamError("topology = feedback: the detector reads the output, so the key "
                                 "must be main")
        if ("topology" in self.schema and int(p[P_TOPOLOGY]) == TOPOLOGY_FEEDBACK
                and self.algorithm.law == LAW_COMPRESSOR and self.algorithm.kind == "dynamics"):
            problem = feedback_problem(p[P_RATIO], p[P_ATTACK], p[P_RELEASE], self.samplerate)
            if problem:
                raise ParamError(problem)
        if self.algorithm.kind == "limiter" and int(p[P_LINK]) == LINK_MEAN:
            raise ParamError("link = mean: the limiter's ceiling needs max or none")

    # -- state --------------------------------------------------------------------------------
    def reset(self):
        """Forget all signal history; parameters stay."""
        self.st[:] = 0.0
        self.ring[:] = 0.0
        if self.algorithm.kind == "limiter":
            from .dsp.limiter import limiter_init

            limiter_init(self.st, self.ring, self.channels)

    @property
    def latency_samples(self) -> int:
        """Delay of the main path in samples: the lookahead (plus the true-peak filter delay)."""
        return self.latency_for(self.p)

    def latency_for(self, p) -> int:
        """The latency these parameter values ``p`` would give (``p`` is only read)."""
        if self.algorithm.kind == "user":
            return int(self.algorithm.latency)
        d = int(math.floor(p[P_LOOKAHEAD] * self.samplerate / 1000.0 + 0.5))
        if self.algorithm.kind == "limiter" and p[P_TRUE_PEAK] > 0.5:
            d += self._tp_delay
        return d

    @property
    def nonfinite_count(self) -> int:
        """Non-finite input samples replaced by 0 since reset."""
        return int(self.st[L.S_NONFINITE, 0])

    @property
    def gain_reduction_db(self) -> float:
        """Largest gain reduction in the last processed block, dB (>= 0)."""
        return float(self.st[L.S_GR_MAX, 0])

    # -- variants -----------------------------------------------------------------------------
    def specialise(self):
        """Compile (or load from the cache) the kernel variant for the current structural
        choices (law, detector, ballistics, domain, topology, key, link, key filters, user
        stages; see :mod:`livedyn.dsp.variants`): it runs only the code they use, with the
        general kernel's output bit for bit. Later :meth:`process` calls with the same choices
        run it; other choices run the general kernel. Returns the variant's module, or None
        for an algorithm without variants (the limiter, a file's whole kernel)."""
        if self.algorithm.kind != "dynamics":
            return None
        from .dsp.dynamics import dynamics_modes
        from .dsp.variants import dynamics_variant

        self._variant = dynamics_variant(int(dynamics_modes(self.p)), self.precision)
        return self._variant

    def kernel_now(self):
        """The kernel :meth:`process` runs with the current values: the variant made by
        :meth:`specialise` while the structural choices are its own, else the general one."""
        v = self._variant
        if v is not None:
            from .dsp.dynamics import dynamics_modes

            if dynamics_modes(self.p) == v.MODES:
                return v.dynamics_block
        return self._kernel

    # -- processing ---------------------------------------------------------------------------
    def _prepare(self, x, key):
        x = np.asarray(x)
        squeeze = x.ndim == 1
        if squeeze:
            x = x[:, None]
        if x.ndim != 2 or x.shape[1] != self.channels:
            raise ParamError(
                f"input shape {x.shape}: expected (frames, {self.channels})")
        x = np.ascontiguousarray(x, dtype=np.float32)
        if key is None:
            if "key" in self.schema and int(self.p[P_KEY]) == KEY_EXTERNAL:
                raise ParamError("key = external but no key signal was given")
            k = x
        else:
            k = np.asarray(key)
            if k.ndim == 1:
                k = k[:, None]
            if k.shape[0] != x.shape[0] or k.shape[1] != max(self.key_channels, 1):
                raise ParamError(
                    f"key shape {k.shape}: expected ({x.shape[0]}, {self.key_channels})")
            k = np.ascontiguousarray(k, dtype=np.float32)
        return x, k, squeeze

    def _new_out(self, x):
        # a user kernel that leaves samples unwritten shows NaN there (caught by the checks)
        return np.full_like(x, np.nan) if self.algorithm.kind == "user" else np.empty_like(x)

    def process(self, x, key=None):
        """Process a block: float32 (frames, channels) in, same shape out."""
        x, k, squeeze = self._prepare(x, key)
        out = self._new_out(x)
        self.kernel_now()(x, k, out, self.p, self.st, self.ring, self._no_trace)
        return out[:, 0] if squeeze else out

    def process_traced(self, x, key=None):
        """Process a block and return (output, traces).

        traces maps each name of ``livedyn.dsp.layout.TRACE_NAMES`` to a float64 array of shape
        (frames, n): the filtered key per key channel, then per gain channel the detector level
        (dB), the gain computer output (dB), the smoothed gain (dB) and the total gain (dB).
        """
        x, k, squeeze = self._prepare(x, key)
        out = self._new_out(x)
        tr = np.zeros((L.NTRACE, x.shape[0], self.st.shape[1]), dtype=np.float64)
        self.kernel_now()(x, k, out, self.p, self.st, self.ring, tr)
        ngain = self.channels if int(self.p[P_LINK]) == LINK_NONE else 1
        nkey = ngain if self.algorithm.kind == "limiter" else k.shape[1]
        traces = {}
        for i, name in enumerate(L.TRACE_NAMES):
            width = nkey if i == L.T_KEY else ngain
            traces[name] = tr[i, :, :width].copy()
        return (out[:, 0] if squeeze else out), traces
