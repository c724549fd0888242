"""Kernel cost: each built-in algorithm's fused kernel, checked against its Python twin, timed.

For every case and block size:

1. **check**: the numba kernel and the twin (:mod:`livedyn.bench.twins`) process the same seeded noise
   bursts block by block from identical fresh state; their outputs must agree within
   :data:`TOLERANCE`. A case whose twin disagrees gets no timings, only the mismatch.
2. **numba**: an ``@njit`` driver calls the kernel block after block over a preallocated input, so
   no Python call per block is in the figure (as the native live callback calls it). Warm-up, then
   ``repeats`` runs from fresh state, interleaved across cases (each round times every case
   once, so load from other processes falls on all cases alike); median, min, max and
   quartiles of ns per frame.
   ``x realtime`` = block period / time per block.
3. **call**: the same blocks driven from a Python loop calling the kernel (what
   ``Processor.process`` does, without its checks), and through ``Processor.process`` itself;
   reported as the extra microseconds per block over the numba-driven figure (median over the
   rounds of the difference to the numba-driven run just before it, under similar load).
4. **twin**: the twin on a shorter signal, ns per frame, and the ratio twin / numba.
5. **C**: the plain-C twin (:mod:`livedyn.bench.ctwin`), compiled at bench time with the system C
   compiler, is checked against the numba kernel on the check signal (it is expected to be
   bit-identical) and timed from its own C block loop in every round, right after the numba
   run; ``numba/C`` is the ratio of the medians. Without a compiler the C columns are empty
   and the table says why. :func:`run_ctwin` is the dedicated numba-versus-C comparison, with
   both timed by the same clock inside their native loops.

Figures are ratios within one run on one machine, never bounds: see :func:`machine_info` for
what they were measured on.
"""
from __future__ import annotations

import math
import os
import platform
import statistics
import sys
import time
from dataclasses import dataclass, field

import numba as nb
import numpy as np

from livedyn.processor import Processor

from .twins import twin_for

TOLERANCE = 1e-6  # largest accepted |kernel - twin| per output sample (absolute, full scale 1.0)
SEED = 1770
CHECK_SECONDS = 0.25
DEFAULT_SECONDS = 4.0
ROW_KEYS = (
    "case", "algorithm", "settings", "blocksize", "channels", "key_channels", "samplerate",
    "check", "max_abs_diff", "bit_identical", "state_identical", "driver_identical",
    "check_frames", "tolerance", "mismatch",
    "frames", "repeats", "numba_ns_per_frame", "numba_ns_min", "numba_ns_max", "numba_ns_q1",
    "numba_ns_q3", "us_per_block", "x_realtime",
    "py_call_ns_per_frame", "py_call_overhead_us_per_block",
    "process_ns_per_frame", "process_overhead_us_per_block",
    "twin_frames", "twin_ns_per_frame", "twin_ns_min", "twin_ratio", "twin_ratio_of_minima",
    "c_check", "c_max_abs_diff", "c_bit_identical", "c_mismatch", "c_driver_identical",
    "c_ns_per_frame", "c_ns_min", "c_ns_max", "numba_over_c", "numba_over_c_of_minima",
)


@dataclass(frozen=True)
class Case:
    """One benchmarked configuration: a built-in algorithm and the settings that differ."""

    name: str
    algorithm: str
    settings: dict = field(default_factory=dict)
    key_channels: int = 0


CASES = (
    Case("compressor", "compressor"),
    Case("compressor+hpf+look5", "compressor", {"key_hpf": 100.0, "lookahead": 5.0}),
    Case("limiter", "limiter"),
    Case("expander", "expander"),
    Case("gate", "gate"),
    Case("ducker (stereo key)", "ducker", {}, 2),
)


# ---- signals --------------------------------------------------------------------------------

def noise_bursts(seed, frames, channels, samplerate):
    """Seeded Gaussian noise in bursts of 5 to 60 ms, float32 (frames, channels).

    Each burst has its own level (noise rms from -66 to -6 dBFS, so peaks reach about +6 dBFS)
    or, one burst in eight, is digital silence; the channels share the envelope and differ in
    their noise.
    """
    rng = np.random.default_rng(seed)
    env = np.empty(frames)
    i = 0
    while i < frames:
        n = int(rng.integers(int(0.005 * samplerate), int(0.060 * samplerate) + 1))
        level = 0.0 if rng.random() < 0.125 else 10.0 ** (rng.uniform(-66.0, -6.0) / 20.0)
        env[i:i + n] = level
        i += n
    return (rng.standard_normal((frames, channels)) * env[:, None]).astype(np.float32)


def _ct():
    """livedyn.bench.ctwin, imported on first use (it builds nothing until asked)."""
    from . import ctwin

    return ctwin


def _whole_blocks(seconds, samplerate, blocksize):
    return max(1, int(seconds * samplerate) // blocksize) * blocksize


# ---- drivers --------------------------------------------------------------------------------

@nb.njit(nogil=True, error_model="numpy")
def drive(kernel, x, key, out, p, st, ring, tr, blocksize):
    """Call ``kernel`` on consecutive whole blocks of ``x``; returns the frames processed."""
    n = x.shape[0] - x.shape[0] % blocksize
    for i in range(0, n, blocksize):
        kernel(x[i:i + blocksize], key[i:i + blocksize], out[i:i + blocksize], p, st, ring, tr)
    return n


def python_blocks(fn, x, key, out, p, st, ring, tr, blocksize):
    """The same, from a Python loop (one Python call per block); fn is the kernel or its twin."""
    n = x.shape[0] - x.shape[0] % blocksize
    for i in range(0, n, blocksize):
        fn(x[i:i + blocksize], key[i:i + blocksize], out[i:i + blocksize], p, st, ring, tr)
    return n


def process_blocks(proc, x, key, blocksize):
    """Through ``Processor.process`` (input checks and an output array per block)."""
    n = x.shape[0] - x.shape[0] % blocksize
    for i in range(0, n, blocksize):
        proc.process(x[i:i + blocksize], None if key is None else key[i:i + blocksize])
    return n


# ---- one case -------------------------------------------------------------------------------

class Setup:
    """A case made concrete: processor, fresh state, signals."""

    def __init__(self, case, samplerate, channels, frames):
        self.case = case
        self.proc = Processor(case.algorithm, samplerate, channels, case.key_channels,
                              **case.settings)
        self.kernel = self.proc._kernel
        self.twin = twin_for(self.proc.algorithm.kind)
        self.st0 = self.proc.st.copy()
        self.ring0 = self.proc.ring.copy()
        self.tr = self.proc._no_trace
        self.x = noise_bursts(SEED, frames, channels, samplerate)
        if case.key_channels:
            self.key_in = noise_bursts(SEED + 1, frames, case.key_channels, samplerate)
            self.key = self.key_in
        else:
            self.key_in = None
            self.key = self.x  # what Processor.process passes when the key is the main input

    def fresh(self):
        return self.proc.p.copy(), self.st0.copy(), self.ring0.copy()

    def reset(self, st, ring):
        np.copyto(st, self.st0)
        np.copyto(ring, self.ring0)


def _state_equal(a, b):
    return bool(np.array_equal(a, b, equal_nan=True))


def check_case(s, frames, blocksize):
    """Kernel and twin on the first ``frames`` of the signal from fresh state; a result dict."""
    x, key = s.x[:frames], s.key[:frames]
    p1, st1, ring1 = s.fresh()
    p2, st2, ring2 = s.fresh()
    y1 = np.zeros_like(x)
    y2 = np.zeros_like(x)
    n = python_blocks(s.kernel, x, key, y1, p1, st1, ring1, s.tr, blocksize)
    error = None
    try:
        python_blocks(s.twin, x, key, y2, p2, st2, ring2, s.tr, blocksize)
    except Exception as exc:  # a twin that cannot run is a mismatch, reported as such
        error = f"twin raised {type(exc).__name__}: {exc}"
    diff = np.abs(y1[:n].astype(np.float64) - y2[:n].astype(np.float64))
    max_diff = float(np.nanmax(diff)) if n else 0.0
    if np.isnan(diff).any():
        max_diff = math.inf
    ok = error is None and max_diff <= TOLERANCE
    mismatch = error
    if error is None and not ok:
        i, c = np.unravel_index(int(np.argmax(np.where(np.isnan(diff), np.inf, diff))), diff.shape)
        bad = int(np.count_nonzero(~(diff <= TOLERANCE)))
        mismatch = (f"{bad} samples differ by more than {TOLERANCE:g}; the largest at frame {i}, "
                    f"channel {c}: kernel {float(y1[i, c]):.9g}, twin {float(y2[i, c]):.9g}")
    return dict(
        check="ok" if ok else "MISMATCH",
        max_abs_diff=max_diff,
        bit_identical=bool(error is None and np.array_equal(y1, y2)),
        state_identical=bool(error is None and _state_equal(st1, st2)
                             and _state_equal(ring1, ring2)),
        check_frames=n,
        tolerance=TOLERANCE,
        mismatch=mismatch,
    )


def _compare(y_ref, y, n, label, tolerance=TOLERANCE):
    """Largest difference, agreement (within ``tolerance``), and a one-line mismatch note (None
    when it agrees)."""
    diff = np.abs(y_ref[:n].astype(np.float64) - y[:n].astype(np.float64))
    max_diff = float(np.nanmax(diff)) if n else 0.0
    if np.isnan(diff).any():
        max_diff = math.inf
    ok = max_diff <= tolerance
    note = None
    if not ok:
        i, c = np.unravel_index(int(np.argmax(np.where(np.isnan(diff), np.inf, diff))), diff.shape)
        bad = int(np.count_nonzero(~(diff <= tolerance)))
        note = (f"{bad} samples differ by more than {tolerance:g}; the largest at frame {i}, "
                f"channel {c}: kernel {float(y_ref[i, c]):.9g}, {label} {float(y[i, c]):.9g}")
    return max_diff, ok, note


def check_ctwin(s, lib, frames, blocksize):
    """The C twin against the numba kernel on the first ``frames``, both from fresh state.

    Both are driven block by block from their native loops; the result dict has ``c_check``
    ("ok" or "MISMATCH"), ``c_max_abs_diff``, ``c_bit_identical`` (outputs and final states)
    and ``c_mismatch``.
    """
    x, key = s.x[:frames], s.key[:frames]
    p1, st1, ring1 = s.fresh()
    p2, st2, ring2 = s.fresh()
    y1 = np.zeros_like(x)
    y2 = np.zeros_like(x)
    n = drive(s.kernel, x, key, y1, p1, st1, ring1, s.tr, blocksize)
    lib.drive(s.proc.algorithm.kind, x, key, y2, p2, st2, ring2, s.tr, blocksize)
    max_diff, ok, note = _compare(y1, y2, n, "C twin")
    return dict(c_check="ok" if ok else "MISMATCH", c_max_abs_diff=max_diff,
                c_bit_identical=bool(np.array_equal(y1, y2) and _state_equal(st1, st2)
                                     and _state_equal(ring1, ring2)),
                c_mismatch=note)


def _spread(samples):
    q1, _, q3 = statistics.quantiles(samples, n=4, method="inclusive") if len(samples) > 1 \
        else (samples[0],) * 3
    return dict(median=statistics.median(samples), min=min(samples), max=max(samples), q1=q1,
                q3=q3)


class Timer:
    """The timed paths of one checked case, each run once per call from the same fresh state."""

    def __init__(self, setup, blocksize, twin_frames):
        self.s = setup
        self.bs = blocksize
        self.twin_frames = twin_frames
        self.p, self.st, self.ring = setup.fresh()
        self.out = np.zeros_like(setup.x)
        self.out_call = np.zeros_like(setup.x)
        self.out_twin = np.zeros_like(setup.x[:twin_frames])
        self.numba_ns, self.call_ns, self.proc_ns, self.twin_ns = [], [], [], []
        self.frames = setup.x.shape[0] - setup.x.shape[0] % blocksize

    def warm_up(self):
        """Compile the driver for this kernel, then one untimed pass of every path."""
        s, bs = self.s, self.bs
        drive(s.kernel, s.x[:bs], s.key[:bs], self.out[:bs], self.p, self.st, self.ring, s.tr, bs)
        self.numba(record=False)
        self.call(record=False)
        self.process(record=False)

    def numba(self, record=True):
        s = self.s
        s.reset(self.st, self.ring)
        t0 = time.perf_counter_ns()
        n = drive(s.kernel, s.x, s.key, self.out, self.p, self.st, self.ring, s.tr, self.bs)
        if record:
            self.numba_ns.append((time.perf_counter_ns() - t0) / n)

    def call(self, record=True):
        s = self.s
        s.reset(self.st, self.ring)
        t0 = time.perf_counter_ns()
        n = python_blocks(s.kernel, s.x, s.key, self.out_call, self.p, self.st, self.ring, s.tr,
                          self.bs)
        if record:
            self.call_ns.append((time.perf_counter_ns() - t0) / n)

    def process(self, record=True):
        s = self.s
        s.reset(s.proc.st, s.proc.ring)
        t0 = time.perf_counter_ns()
        n = process_blocks(s.proc, s.x, s.key_in, self.bs)
        if record:
            self.proc_ns.append((time.perf_counter_ns() - t0) / n)

    def twin(self):
        s, n = self.s, self.twin_frames
        p, st, ring = s.fresh()
        t0 = time.perf_counter_ns()
        python_blocks(s.twin, s.x[:n], s.key[:n], self.out_twin, p, st, ring, s.tr, self.bs)
        self.twin_ns.append((time.perf_counter_ns() - t0) / n)

    def attach_ctwin(self, lib):
        """Also time the C twin (``lib``, a :class:`livedyn.bench.ctwin.CTwin`) in every round."""
        self.c_lib = lib
        self.p_c, self.st_c, self.ring_c = self.s.fresh()
        self.out_c = np.zeros_like(self.s.x)
        self.c_ns = []

    def ctwin(self, record=True):
        """The C twin from its own C block loop (elapsed ns of CLOCK_MONOTONIC around it)."""
        s = self.s
        s.reset(self.st_c, self.ring_c)
        ns = self.c_lib.drive(s.proc.algorithm.kind, s.x, s.key, self.out_c, self.p_c,
                              self.st_c, self.ring_c, s.tr, self.bs)
        if record:
            self.c_ns.append(ns / self.frames)

    def c_result(self):
        """The C timing fields of a row (empty when the C twin was not timed)."""
        if not getattr(self, "c_ns", None):
            return {}
        csp = _spread(self.c_ns)
        med = statistics.median(self.numba_ns)
        return dict(
            c_driver_identical=bool(np.array_equal(self.out[:self.frames],
                                                   self.out_c[:self.frames])
                                    and _state_equal(self.st, self.st_c)
                                    and _state_equal(self.ring, self.ring_c)),
            c_ns_per_frame=csp["median"], c_ns_min=csp["min"], c_ns_max=csp["max"],
            numba_over_c=med / csp["median"],
            numba_over_c_of_minima=min(self.numba_ns) / csp["min"],
        )

    def result(self):
        """The timing fields of a row."""
        nsp = _spread(self.numba_ns)
        med = nsp["median"]
        fs = self.s.proc.samplerate
        call_med = statistics.median(self.call_ns)
        proc_med = statistics.median(self.proc_ns)
        twin_med = statistics.median(self.twin_ns)
        # Overheads: median over rounds of the difference between a path and the numba-driven
        # run just before it in the same round (adjacent in time, so under similar load).
        call_extra = statistics.median(c - b for c, b in zip(self.call_ns, self.numba_ns))
        proc_extra = statistics.median(c - b for c, b in zip(self.proc_ns, self.numba_ns))
        per_us = self.bs / 1000.0
        return dict(
            driver_identical=bool(np.array_equal(self.out[:self.frames],
                                                 self.out_call[:self.frames])),
            frames=self.frames,
            repeats=len(self.numba_ns),
            numba_ns_per_frame=med,
            numba_ns_min=nsp["min"],
            numba_ns_max=nsp["max"],
            numba_ns_q1=nsp["q1"],
            numba_ns_q3=nsp["q3"],
            us_per_block=med * per_us,
            x_realtime=1e9 / (fs * med),
            py_call_ns_per_frame=call_med,
            py_call_overhead_us_per_block=call_extra * per_us,
            process_ns_per_frame=proc_med,
            process_overhead_us_per_block=proc_extra * per_us,
            twin_frames=self.twin_frames,
            twin_ns_per_frame=twin_med,
            twin_ns_min=min(self.twin_ns),
            twin_ratio=twin_med / med,
            twin_ratio_of_minima=min(self.twin_ns) / nsp["min"],
        )


# ---- the run --------------------------------------------------------------------------------

def _stderr(msg):
    print(msg, file=sys.stderr, flush=True)


def run_kernels(quick=False, blocksizes=(64, 1024), channels=2, samplerate=48000, seconds=None,
                out=print, *, repeats=None, check_seconds=CHECK_SECONDS, twin_seconds=None,
                twin_repeats=None, cases=CASES, progress=_stderr, ctwin=True, wide=False):
    """Check every case's kernel against its twin, time both, print a table; return the rows.

    The timed runs are interleaved: each round times every case once, so that changes in the
    load from other processes during the run fall on all cases alike.

    Parameters
    ----------
    quick : bool
        Fewer repeats and a shorter timing signal.
    blocksizes : sequence of int
        Frames per block.
    channels : int
        Main channels.
    samplerate : float
        Hz.
    seconds : float, optional
        Length of the timing signal (default 4 s, quick 1 s).
    out : callable
        Receives each line of the table (``print`` by default; ``None`` for no table).
    repeats : int, optional
        Timed rounds (default 7, quick 3).
    check_seconds : float
        Length of the kernel/twin comparison signal.
    twin_seconds : float, optional
        Length of the signal the twin is timed on (default 0.1 s, quick 0.05 s).
    twin_repeats : int, optional
        Timed twin runs (default 3, quick 1).
    cases : sequence of Case
        What to run.
    progress : callable or None
        Receives progress messages (stderr by default).
    ctwin : bool
        Also check and time the plain-C twin (:mod:`livedyn.bench.ctwin`); compiled on first use. Where
        no C compiler exists its columns stay empty and the table says why.
    wide : bool
        Print every column (wider than 100 characters); see :func:`format_table`.

    Returns
    -------
    list of dict
        One row per case and block size, with the keys of :data:`ROW_KEYS`; the timing values are
        None where the check failed. ``c_check`` is "ok", "MISMATCH" (no C timings) or
        "skipped".
    """
    progress = progress or (lambda msg: None)
    seconds = (1.0 if quick else DEFAULT_SECONDS) if seconds is None else float(seconds)
    repeats = (3 if quick else 7) if repeats is None else int(repeats)
    twin_seconds = (0.05 if quick else 0.1) if twin_seconds is None else float(twin_seconds)
    twin_repeats = (1 if quick else 3) if twin_repeats is None else int(twin_repeats)
    blocksizes = [int(b) for b in blocksizes]
    for b in blocksizes:
        if b < 1:
            raise ValueError(f"blocksize = {b}: expected a whole number of frames >= 1")
    if repeats < 1 or twin_repeats < 1:
        raise ValueError(f"repeats = {repeats}, twin_repeats = {twin_repeats}: expected >= 1")

    info = machine_info()
    c_lib, c_note = None, "C twin not run (ctwin=False)"
    if ctwin:
        try:
            c_lib = _ct().load()
            c_note = None
            progress(f"C twin: {c_lib.path.name} ({_ct().compiler_line()})")
        except _ct().CTwinUnavailable as exc:
            c_note = str(exc)
            progress(c_note)
    rows, timers = [], []
    total = len(cases) * len(blocksizes)
    k = 0
    for case in cases:
        for bs in blocksizes:
            k += 1
            frames = _whole_blocks(max(seconds, check_seconds, twin_seconds), samplerate, bs)
            s = Setup(case, samplerate, channels, frames)
            check_frames = min(frames, _whole_blocks(check_seconds, samplerate, bs))
            twin_frames = min(frames, _whole_blocks(twin_seconds, samplerate, bs))
            progress(f"check [{k}/{total}] {case.name}, block {bs}: kernel vs twin on "
                     f"{check_frames} frames")
            row = dict.fromkeys(ROW_KEYS)
            row.update(case=case.name, algorithm=case.algorithm,
                       settings=dict(case.settings), blocksize=bs, channels=channels,
                       key_channels=case.key_channels, samplerate=float(samplerate))
            row.update(check_case(s, check_frames, bs))
            row["c_check"] = "skipped"
            if c_lib is not None:
                row.update(check_ctwin(s, c_lib, check_frames, bs))
                if row["c_check"] != "ok":
                    progress(f"    C twin {row['c_check']}: {row['c_mismatch']}")
            rows.append(row)
            if row["check"] == "ok":
                timer = Timer(s, bs, twin_frames)
                if row["c_check"] == "ok":
                    timer.attach_ctwin(c_lib)
                timers.append((row, timer))
            else:
                progress(f"    {row['check']}: {row['mismatch']}")

    progress(f"warm-up of {len(timers)} case(s)")
    for _, t in timers:
        t.warm_up()
        if hasattr(t, "c_ns"):
            t.ctwin(record=False)
    for r in range(repeats):
        progress(f"timing round {r + 1}/{repeats}: numba-driven, C twin, Python calls, "
                 "Processor.process")
        for _, t in timers:
            t.numba()
            if hasattr(t, "c_ns"):
                t.ctwin()
            t.call()
            t.process()
    for r in range(twin_repeats):
        progress(f"twin round {r + 1}/{twin_repeats}")
        for _, t in timers:
            t.twin()
    for row, t in timers:
        row.update(t.result())
        row.update(t.c_result())
    if out is not None:
        for line in format_table(rows, info, repeats, c_note=c_note, wide=wide):
            out(line)
    return rows


# ---- numba kernel versus its C twin ---------------------------------------------------------

CTWIN_ROW_KEYS = (
    "case", "algorithm", "settings", "blocksize", "channels", "key_channels", "samplerate",
    "c_check", "c_max_abs_diff", "c_bit_identical", "c_mismatch", "c_driver_identical",
    "frames", "repeats", "numba_ns_per_frame", "numba_ns_min", "numba_ns_max", "numba_ns_q1",
    "numba_ns_q3", "c_ns_per_frame", "c_ns_min", "c_ns_max", "c_ns_q1", "c_ns_q3",
    "numba_over_c", "numba_over_c_of_minima", "numba_over_c_paired",
)


def checked_runs(blocksizes, repeats):
    """The block sizes as a list of whole numbers and the repeats, each checked (>= 1)."""
    blocksizes = [int(b) for b in blocksizes]
    for b in blocksizes:
        if b < 1:
            raise ValueError(f"blocksize = {b}: expected a whole number of frames >= 1")
    if int(repeats) < 1:
        raise ValueError(f"repeats = {repeats}: expected >= 1")
    return blocksizes, int(repeats)


class CPair:
    """One case timed both ways from identical fresh state, each from its native block loop."""

    def __init__(self, setup, blocksize, lib):
        self.s, self.bs, self.lib = setup, blocksize, lib
        self.p_n, self.st_n, self.ring_n = setup.fresh()
        self.p_c, self.st_c, self.ring_c = setup.fresh()
        self.out_n = np.zeros_like(setup.x)
        self.out_c = np.zeros_like(setup.x)
        self.frames = setup.x.shape[0] - setup.x.shape[0] % blocksize
        self.numba_ns, self.c_ns = [], []

    def numba(self, record=True):
        s = self.s
        s.reset(self.st_n, self.ring_n)
        ns = _ct().numba_drive_timed(self.lib, s.kernel, s.x, s.key, self.out_n, self.p_n,
                                  self.st_n, self.ring_n, s.tr, self.bs)
        if record:
            self.numba_ns.append(ns / self.frames)

    def c(self, record=True):
        s = self.s
        s.reset(self.st_c, self.ring_c)
        ns = self.lib.drive(s.proc.algorithm.kind, s.x, s.key, self.out_c, self.p_c, self.st_c,
                            self.ring_c, s.tr, self.bs)
        if record:
            self.c_ns.append(ns / self.frames)

    def result(self):
        n, c = _spread(self.numba_ns), _spread(self.c_ns)
        return dict(
            c_driver_identical=bool(np.array_equal(self.out_n[:self.frames],
                                                   self.out_c[:self.frames])
                                    and _state_equal(self.st_n, self.st_c)
                                    and _state_equal(self.ring_n, self.ring_c)),
            frames=self.frames, repeats=len(self.numba_ns),
            numba_ns_per_frame=n["median"], numba_ns_min=n["min"], numba_ns_max=n["max"],
            numba_ns_q1=n["q1"], numba_ns_q3=n["q3"],
            c_ns_per_frame=c["median"], c_ns_min=c["min"], c_ns_max=c["max"], c_ns_q1=c["q1"],
            c_ns_q3=c["q3"],
            numba_over_c=n["median"] / c["median"],
            numba_over_c_of_minima=n["min"] / c["min"],
            numba_over_c_paired=statistics.median(a / b for a, b in zip(self.numba_ns,
                                                                        self.c_ns)),
        )


def run_ctwin(quick=False, blocksizes=(64, 1024), channels=2, samplerate=48000, seconds=None,
              out=print, *, repeats=None, check_seconds=CHECK_SECONDS, cases=CASES,
              progress=_stderr, lib=None, wide=False):
    """The numba kernels against their plain-C twins: check, time both, print a table.

    Each case runs from identical fresh state on the same seeded noise bursts. The C twin
    (:mod:`livedyn.bench.ctwin`) must agree with the numba kernel on the check signal (bit-identical is
    expected; within :data:`TOLERANCE` is accepted and shown) and again over the whole timing
    signal. Timing: the numba kernel from an ``@njit`` block loop, the C twin from a C block
    loop in the same library as the clock; both loops read ``CLOCK_MONOTONIC`` around
    themselves, so the figures cover the same work. Warm-up, then ``repeats`` rounds; in each
    round every case runs numba then C, so load from other processes falls on both alike.

    Parameters
    ----------
    quick : bool
        Fewer repeats (5) and a shorter timing signal (1 s).
    blocksizes : sequence of int
        Frames per block.
    channels : int
        Main channels.
    samplerate : float
        Hz.
    seconds : float, optional
        Length of the timing signal (default 4 s, quick 1 s).
    out : callable or None
        Receives each line of the table.
    repeats : int, optional
        Timed rounds (default 15, quick 5).
    check_seconds : float
        Length of the check signal.
    cases : sequence of Case
        What to run.
    progress : callable or None
        Receives progress messages.
    lib : livedyn.bench.ctwin.CTwin, optional
        The C twin (default: :func:`livedyn.bench.ctwin.load`).

    Returns
    -------
    list of dict
        One row per case and block size with the keys of :data:`CTWIN_ROW_KEYS`. Without a C
        compiler every row has ``c_check = "skipped"`` and no timings, and the table says why.
    """
    progress = progress or (lambda msg: None)
    seconds = (1.0 if quick else DEFAULT_SECONDS) if seconds is None else float(seconds)
    blocksizes, repeats = checked_runs(blocksizes, (5 if quick else 15) if repeats is None
                                       else repeats)
    info = machine_info()
    note = None
    if lib is None:
        try:
            lib = _ct().load()
        except _ct().CTwinUnavailable as exc:
            note = str(exc)
            progress(note)
    rows, pairs = [], []
    for case in cases:
        for bs in blocksizes:
            row = dict.fromkeys(CTWIN_ROW_KEYS)
            row.update(case=case.name, algorithm=case.algorithm, settings=dict(case.settings),
                       blocksize=bs, channels=channels, key_channels=case.key_channels,
                       samplerate=float(samplerate), c_check="skipped")
            rows.append(row)
            if lib is None:
                continue
            frames = _whole_blocks(max(seconds, check_seconds), samplerate, bs)
            s = Setup(case, samplerate, channels, frames)
            progress(f"check {case.name}, block {bs}: numba kernel vs C twin")
            row.update(check_ctwin(s, lib, min(frames, _whole_blocks(check_seconds, samplerate,
                                                                     bs)), bs))
            if row["c_check"] == "ok":
                pairs.append((row, CPair(s, bs, lib)))
            else:
                progress(f"    {row['c_check']}: {row['c_mismatch']}")
    if pairs:
        progress(f"warm-up of {len(pairs)} case(s)")
        for _, pr in pairs:
            pr.numba(record=False)
            pr.c(record=False)
        for r in range(repeats):
            progress(f"timing round {r + 1}/{repeats}: numba, C")
            for _, pr in pairs:
                pr.numba()
                pr.c()
        for row, pr in pairs:
            row.update(pr.result())
    if out is not None:
        for line in format_ctwin_table(rows, info, lib, note, wide=wide):
            out(line)
    return rows


def format_ctwin_table(rows, info=None, lib=None, note=None, wide=False):
    """The rows of :func:`run_ctwin` as lines of a text table (:data:`NARROW` columns; with
    ``wide`` also the [min-max] spreads)."""
    lines = []
    if info is not None:
        load = info.get("load_average_1_5_15")
        lines.append(f"CPU: {info['cpu_model']}, {info['cores']} cores; load "
                     + (" ".join(f"{v:.2f}" for v in load) if load else "unknown")
                     + f"; numba {info['numba']}, llvmlite {info['llvmlite']}")
    lines.append(f"C: {_ct().compiler_line()}" + (f"; {lib.path.name}" if lib is not None else ""))
    if rows:
        r0 = rows[0]
        lines.append(f"{r0['channels']} ch, {r0['samplerate']:g} Hz; ns per frame (all channels), "
                     f"median{' [min-max]' if wide else ''} of {r0['repeats'] or '-'} "
                     "interleaved runs each")
    if wide:
        head = (f"{'case':<22}{'block':>6}  {'check':<14}{'numba ns/fr':>12} {'[min-max]':<14}"
                f"{'C ns/fr':>9} {'[min-max]':<14}{'numba/C':>8}{'of minima':>10}{'paired':>8}")
    else:
        head = (f"{'case':<22}{'block':>6}  {'check':<14}{'numba ns/fr':>12}{'C ns/fr':>9}"
                f"{'numba/C':>8}{'of minima':>10}{'paired':>8}")
    lines.append(head)
    lines.append("-" * len(head))
    for r in rows:
        if r["c_check"] == "ok":
            chk = "bit-identical" if r["c_bit_identical"] else f"ok {r['c_max_abs_diff']:.1e}"
            if r["c_driver_identical"] is False:
                chk += "*"
        else:
            chk = r["c_check"]
        if r["c_ns_per_frame"] is None:
            why = note if r["c_check"] == "skipped" else r["c_mismatch"]
            lines.append(f"{r['case']:<22}{r['blocksize']:>6}  {chk:<14}no timings: {why}")
            continue
        ns = f"[{r['numba_ns_min']:.1f}-{r['numba_ns_max']:.1f}]"
        cs = f"[{r['c_ns_min']:.1f}-{r['c_ns_max']:.1f}]"
        ratios = (f"{r['numba_over_c']:>8.2f}{r['numba_over_c_of_minima']:>10.2f}"
                  f"{r['numba_over_c_paired']:>8.2f}")
        if wide:
            lines.append(
                f"{r['case']:<22}{r['blocksize']:>6}  {chk:<14}{r['numba_ns_per_frame']:>12.1f} "
                f"{ns:<14}{r['c_ns_per_frame']:>9.1f} {cs:<14}{ratios}")
        else:
            lines.append(
                f"{r['case']:<22}{r['blocksize']:>6}  {chk:<14}{r['numba_ns_per_frame']:>12.1f}"
                f"{r['c_ns_per_frame']:>9.1f}{ratios}")
    lines.append("numba/C: ratio of the medians; of minima: of the fastest runs; paired: median")
    lines.append("  of the per-round ratios (numba and C run back to back).")
    if any(r["c_driver_identical"] is False for r in rows):
        lines.append("*: outputs or states differed over the whole timing signal.")
    return lines


# ---- reporting ------------------------------------------------------------------------------

def _cpu_model():
    try:
        with open("/proc/cpuinfo", encoding="utf-8") as f:
            for line in f:
                if line.lower().startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def machine_info():
    """What the figures were measured on: CPU, cores, load, library versions."""
    import llvmlite

    try:
        affinity = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        affinity = None
    try:
        load = list(os.getloadavg())
    except OSError:
        load = None
    return dict(
        cpu_model=_cpu_model(),
        cores=os.cpu_count(),
        cores_usable=affinity,
        load_average_1_5_15=load,
        machine=platform.machine(),
        system=platform.platform(),
        python=platform.python_version(),
        numpy=np.__version__,
        numba=nb.__version__,
        llvmlite=llvmlite.__version__,
        numba_disable_jit=bool(nb.config.DISABLE_JIT),
        numba_boundscheck=nb.config.BOUNDSCHECK,
        time=time.strftime("%Y-%m-%dT%H:%M:%S%z"),
    )


def _num(v, fmt):
    return "-" if v is None else format(v, fmt)


def _c_cells(r):
    """The two C columns of a row: C ns/fr and numba/C, or why they are empty."""
    chk = r.get("c_check")
    if chk == "MISMATCH":
        return "MISMATCH", "-"
    if r.get("c_ns_per_frame") is None:
        return "-", "-"
    return f"{r['c_ns_per_frame']:.1f}", f"{r['numba_over_c']:.2f}"


#: Width of the default table; ``wide=True`` (``--wide``) adds the remaining columns.
NARROW = 100


def cost_cell(v, fmt=".2f"):
    """A call-cost cell: the extra microseconds, or "within noise" when the difference of two
    medians came out negative (the Python call cannot be faster than no call; on a loaded
    machine the difference is below what one run can resolve)."""
    if v is None:
        return "-"
    return "within noise" if v < 0 else format(v, fmt)


def format_table(rows, info=None, repeats=None, c_note=None, wide=False):
    """The rows as lines of a text table; ``c_note`` says why the C columns are empty.

    The default table fits :data:`NARROW` columns (case, block, check, numba ns/fr,
    x realtime, call +us, proc +us, numba/C); ``wide`` adds the numba spread, us per block,
    the twin's ns per frame and ratio, and the C twin's ns per frame.
    """
    lines = []
    if info is not None:
        load = info.get("load_average_1_5_15")
        lines.append(f"CPU: {info['cpu_model']}, {info['cores']} cores; load "
                     + (" ".join(f"{v:.2f}" for v in load) if load else "unknown")
                     + f"; numpy {info['numpy']}, numba {info['numba']}")
    if rows:
        r0 = rows[0]
        lines.append(f"{r0['channels']} ch, {r0['samplerate']:g} Hz; ns per frame (all channels); "
                     f"numba = median{' [min-max]' if wide else ''} of "
                     f"{repeats or r0['repeats'] or '-'} runs; check tolerance {TOLERANCE:g}")
    if wide:
        head = (f"{'case':<21}{'block':>6}  {'check':<14}{'numba ns/fr':>11} {'[min-max]':<14}"
                f"{'us/blk':>8}{'x realtime':>11}{'call +us':>13}{'proc +us':>13}"
                f"{'twin ns/fr':>12}{'twin/numba':>11}{'C ns/fr':>10}{'numba/C':>9}")
    else:
        head = (f"{'case':<21}{'block':>6}  {'check':<14}{'numba ns/fr':>11}{'x realtime':>11}"
                f"{'call +us':>13}{'proc +us':>13}{'numba/C':>9}")
    lines.append(head)
    lines.append("-" * len(head))
    for r in rows:
        if r["check"] == "ok":
            chk = "bit-identical" if r["bit_identical"] else f"ok {r['max_abs_diff']:.1e}"
        else:
            chk = "MISMATCH"
        if r["numba_ns_per_frame"] is None:
            lines.append(f"{r['case'][:21]:<21}{r['blocksize']:>6}  {chk:<14}"
                         f"no timings: {r['mismatch']} (max |diff| {r['max_abs_diff']:.3g})")
            continue
        calls = (f"{cost_cell(r['py_call_overhead_us_per_block']):>13}"
                 f"{cost_cell(r['process_overhead_us_per_block']):>13}")
        c_ns, c_ratio = _c_cells(r)
        if wide:
            spread = f"[{r['numba_ns_min']:.1f}-{r['numba_ns_max']:.1f}]"
            lines.append(
                f"{r['case'][:21]:<21}{r['blocksize']:>6}  {chk:<14}"
                f"{r['numba_ns_per_frame']:>11.1f} {spread:<14}{r['us_per_block']:>8.2f}"
                f"{r['x_realtime']:>11.0f}{calls}{r['twin_ns_per_frame']:>12.0f}"
                f"{r['twin_ratio']:>11.0f}{c_ns:>10}{c_ratio:>9}")
        else:
            lines.append(
                f"{r['case'][:21]:<21}{r['blocksize']:>6}  {chk:<14}"
                f"{r['numba_ns_per_frame']:>11.1f}{r['x_realtime']:>11.0f}{calls}{c_ratio:>9}")
    lines.append("call +us / proc +us: extra time per block when each block is a Python call to")
    lines.append("  the kernel / to Processor.process; within noise: the difference came out < 0.")
    if c_note:
        lines.append(f"numba/C: {c_note}")
    else:
        lines.append("numba/C: numba median / the plain-C twin's (livedyn/bench/ctwin/kernels.c)")
        lines.append("  median, both from native block loops.")
        bad = [f"{r['case']} {r['blocksize']}" for r in rows if r.get("c_check") == "MISMATCH"]
        if bad:
            lines.append("C twin MISMATCH (no C timings): " + ", ".join(bad))
    if not wide:
        lines.append("--wide adds the numba spread, us/blk, the Python twin and C ns/fr.")
    return lines


def _clean_json(v):
    if isinstance(v, float) and not math.isfinite(v):
        return None if math.isnan(v) else ("inf" if v > 0 else "-inf")
    if isinstance(v, dict):
        return {k: _clean_json(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_clean_json(x) for x in v]
    if isinstance(v, (np.floating, np.integer, np.bool_)):
        return _clean_json(v.item())
    return v


def report(rows, info=None, settings=None, precision=None):
    """The JSON document of a run: machine info, run settings and the rows (strict JSON);
    with ``precision`` (what :func:`livedyn.bench.bare.run_precision` returns) also its
    ``bare`` rows (numba against bare C, per precision) and ``curves`` rows."""
    doc = dict(benchmark="kernels", machine=info or machine_info(), settings=settings or {},
               rows=rows)
    if precision is not None:
        doc.update(bare=precision["bare"], curves=precision["curves"])
    return _clean_json(doc)
