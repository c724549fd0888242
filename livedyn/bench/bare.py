"""Cost in the precision you ship: the numba kernels against bare-C loops, float64 and float32.

The bare loops (``livedyn/bench/bare/bare.c`` and ``loops.h``, package data) are hand-written C
of only the features one configuration uses, each compiled with float state and the float libm
functions and with double state and the double ones. They are built on first use by the C
twin's machinery (:func:`livedyn.bench.ctwin.build`: same compiler search, flags and generated
constants header) into the user's cache folder (``$XDG_CACHE_HOME/livedyn/bare``).

For every case (:data:`BARE_CASES`), block size and precision:

1. **check**: the numba kernel of that precision (``Processor(..., precision=...)``) and the
   bare loop of the same precision run the same seeded noise bursts from fresh state, block by
   block; their outputs must agree within :data:`TOLERANCE` of the precision (absolute, full
   scale 1.0) and their largest gain reduction of the last block within :data:`GR_TOLERANCE`
   dB. A disagreement is ``MISMATCH``: no timings for that row, and the command exits 1.
2. **timing**: the numba kernel from an ``@njit`` block loop
   (:func:`livedyn.bench.ctwin.numba_drive_timed`) and the bare loop from its C block loop,
   both reading ``CLOCK_MONOTONIC`` around themselves through the bare library's
   ``bare_now_ns``; in each round every row runs numba then C, so that load from other
   processes falls on both alike. Medians with min, max and quartiles over the rounds.
   ``numba/C`` is the ratio of the medians; ``instances`` is how many instances fit in 70 % of
   one core (:func:`livedyn.bench.sweep.instances_per_core`).

The user-stage section (:func:`run_curves`) times two gain-curve files synthesised from
:data:`CURVE_TEMPLATE` into a temporary folder: the built-in compressor's curve written as a user
``gain_curve`` (target: within 5 % of the built-in), and the same with one ``math.tanh`` and one
``math.log`` more per sample, whose extra cost is set against the same two calls added to the
bare-C compressor loop (``comp_x``; target: within 25 % of C's extra). The 5 % and 25 % are
this project's targets (no outside source).

The float32 kernels are :mod:`livedyn.dsp.precision`'s single-precision variants
(``Processor(..., precision="float32")``; a user file loaded with ``precision="float32"``).
"""
from __future__ import annotations

import ctypes
import statistics
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..shipped import bare_source, cache_folder
from .kernels import (SEED, _compare, _spread, _stderr, _whole_blocks, checked_runs, drive,
                      noise_bursts)
from .sweep import CORE_SHARE, instances_per_core

__all__ = ["BARE_CASES", "BareCase", "Bare", "CURVE_TEMPLATE", "COMP_SETTINGS", "PRECISIONS",
           "TOLERANCE", "check_bare", "format_bare", "format_curves", "load",
           "make_processor", "run_bare", "run_curves", "write_curves"]

BUILD_DIR = cache_folder("bare")
PRECISIONS = ("float64", "float32")  # the order of the rows (livedyn.dsp.precision's)
SUFFIX = {"float64": "f64", "float32": "f32"}
#: Largest accepted |numba - bare C| per output sample, by precision (absolute, full scale 1.0):
#: rounding of double maths for float64; for float32, float rounding of the same maths done in
#: possibly another order (a bound of our own, no outside source).
TOLERANCE = {"float64": 1e-9, "float32": 1e-5}
#: Largest accepted difference of the last block's largest gain reduction, dB.
GR_TOLERANCE = {"float64": 1e-9, "float32": 1e-3}
CONFIGS = ("comp", "comp_x", "limiter", "ducker")
CHECK_SECONDS = 0.25

#: The compressor the bare loop and the curve files are measured with.
COMP_SETTINGS = dict(threshold=-24.0, ratio=4.0, knee=6.0, attack=10.0, release=150.0,
                     makeup=3.0, lookahead=1.0)


@dataclass(frozen=True)
class BareCase:
    """A built-in algorithm with settings, and the bare loop (``config``) that covers them."""

    name: str
    algorithm: str
    config: str
    settings: dict = field(default_factory=dict)
    key_channels: int = 0


BARE_CASES = (
    BareCase("compressor", "compressor", "comp", COMP_SETTINGS),
    BareCase("limiter", "limiter", "limiter"),  # its defaults: 5 ms lookahead and attack
    BareCase("ducker (stereo key)", "ducker", "ducker", {}, 2),  # its defaults
)


def make_processor(algorithm, samplerate, channels, key_channels=0, precision="float64",
                   **settings):
    """A Processor in ``precision`` ("float64" or "float32"); a user file (or its Algorithm)
    is loaded in that precision first. Its kernel variant for the setting is made
    (:meth:`Processor.specialise`), as the live engine installs it: ``kernel_now()`` is what
    is timed."""
    from livedyn.loader import get
    from livedyn.processor import Processor

    if precision not in PRECISIONS:
        raise ValueError(f"precision = {precision!r}: expected one of {', '.join(PRECISIONS)}")
    proc = Processor(get(algorithm, precision), samplerate, channels, key_channels,
                     precision=precision, **settings)
    proc.specialise()
    return proc


# ---- the library ----------------------------------------------------------------------------

_P = ctypes.c_void_p
_I64 = ctypes.c_int64
_BLOCK = [_P, _P, _P, _P, _P, _I64, _I64]


class Bare:
    """The loaded bare-C library; one state buffer per run, made by :meth:`state`."""

    def __init__(self, path):
        self.path = Path(path)
        self.lib = ctypes.CDLL(str(self.path))
        self._fn = {}
        for cfg in CONFIGS:
            for suf in SUFFIX.values():
                def sym(what):
                    return getattr(self.lib, f"bare_{cfg}_{what}_{suf}")

                size = sym("size")
                size.argtypes, size.restype = [], ctypes.c_size_t
                init = sym("init")
                init.argtypes, init.restype = [_P, _P], ctypes.c_int
                block = sym("block")
                block.argtypes, block.restype = _BLOCK, None
                drv = sym("drive")
                drv.argtypes, drv.restype = _BLOCK + [_I64], ctypes.c_int64
                gr = sym("gr_max")
                gr.argtypes, gr.restype = [_P], ctypes.c_double
                self._fn[cfg, suf] = (int(size()), init, block, drv, gr)
        self.now_ns = self.lib.bare_now_ns
        self.now_ns.argtypes, self.now_ns.restype = [], ctypes.c_int64

    def _get(self, cfg, precision):
        if cfg not in CONFIGS:
            raise ValueError(f"config = {cfg!r}: expected one of {', '.join(CONFIGS)}")
        if precision not in SUFFIX:
            raise ValueError(f"precision = {precision!r}: expected one of {', '.join(SUFFIX)}")
        return self._fn[cfg, SUFFIX[precision]]

    def state(self, cfg, precision, p):
        """Fresh state of loop ``cfg`` in ``precision`` for the parameter array ``p``."""
        size, init, *_ = self._get(cfg, precision)
        p = _f64(p)
        s = np.zeros(size, np.uint8)
        rc = init(s.ctypes.data, p.ctypes.data)
        if rc != 0:
            raise ValueError(f"bare loop {cfg}: these settings are not covered by it (code {rc}); "
                             "expected those of its case (see livedyn/bench/bare/bare.c)")
        return s

    def _args(self, s, p, x, key, out):
        p = _f64(p)
        for name, a in (("x", x), ("key", key), ("out", out)):
            if a.dtype != np.float32 or a.ndim != 2 or not a.flags.c_contiguous:
                raise ValueError(f"{name}: {a.dtype} {a.ndim}-D: expected a C-ordered float32 "
                                 "2-D array")
        if x.shape[1] != 2 or out.shape != x.shape:
            raise ValueError(f"x, out: shapes {x.shape}, {out.shape}: expected (frames, 2) both")
        if key.shape[0] < x.shape[0]:
            raise ValueError(f"key: {key.shape[0]} frames: expected at least {x.shape[0]}")
        return (s.ctypes.data, p.ctypes.data, x.ctypes.data, key.ctypes.data, out.ctypes.data,
                x.shape[0], key.shape[1])

    def block(self, cfg, precision, s, p, x, key, out):
        """One block of ``x`` (frames, 2) through loop ``cfg``."""
        self._get(cfg, precision)[2](*self._args(s, p, x, key, out))

    def drive(self, cfg, precision, s, p, x, key, out, blocksize):
        """Whole blocks of ``blocksize`` frames over ``x`` from a C loop; elapsed ns."""
        if int(blocksize) < 1:
            raise ValueError(f"blocksize = {blocksize}: expected a whole number >= 1")
        return int(self._get(cfg, precision)[3](*self._args(s, p, x, key, out), int(blocksize)))

    def gr_max(self, cfg, precision, s):
        """The last block's largest gain reduction, dB (as the kernels' ``S_GR_MAX``)."""
        return float(self._get(cfg, precision)[4](s.ctypes.data))


def _f64(p):
    if not isinstance(p, np.ndarray) or p.dtype != np.float64 or not p.flags.c_contiguous:
        raise ValueError("p: expected the kernels' C-ordered float64 parameter array")
    from livedyn.params import NPARAM

    if p.shape[0] < NPARAM:
        raise ValueError(f"p: {p.shape[0]} slots: expected {NPARAM}")
    return p


def load(build_dir=None, cc=None):
    """Build if needed and load the bare loops; :class:`livedyn.bench.ctwin.CTwinUnavailable`
    (one line) without a compiler or when the build fails."""
    from . import ctwin

    return ctwin.load_library(Bare, build_dir or BUILD_DIR, cc, source=bare_source(),
                              stem="bare", what="bare-C loops")


def numba_ns(lib, kernel, x, key, out, p, st, ring, tr, blocksize):
    """Elapsed ns of the numba kernel over whole blocks: inside the compiled loop with the bare
    library's clock, or (``lib`` None) around :func:`livedyn.bench.kernels.drive`."""
    if lib is not None:
        from .ctwin import numba_drive_timed

        return numba_drive_timed(lib, kernel, x, key, out, p, st, ring, tr, blocksize)
    t0 = time.perf_counter_ns()
    drive(kernel, x, key, out, p, st, ring, tr, blocksize)
    return time.perf_counter_ns() - t0


# ---- one row: numba kernel and bare loop of one precision -------------------------------------

class Pair:
    """A case in one precision and block size: the processor, its signals, both paths."""

    def __init__(self, lib, case, precision, samplerate, frames, blocksize, config=None,
                 proc=None):
        self.lib, self.case, self.precision, self.bs = lib, case, precision, blocksize
        self.config = config or case.config
        self.proc = proc or make_processor(case.algorithm, samplerate, 2, case.key_channels,
                                           precision, **case.settings)
        self.kernel = self.proc.kernel_now()
        self.p = self.proc.p.copy()
        self.p_bare = self.proc.p.copy()
        self.st0, self.ring0 = self.proc.st.copy(), self.proc.ring.copy()
        self.st, self.ring = self.proc.st.copy(), self.proc.ring.copy()
        self.tr = self.proc._no_trace
        self.x = noise_bursts(SEED, frames, 2, samplerate)
        self.key = (noise_bursts(SEED + 1, frames, case.key_channels, samplerate)
                    if case.key_channels else self.x)
        self.out_n = np.zeros_like(self.x)
        self.out_c = np.zeros_like(self.x)
        self.frames = frames - frames % blocksize
        self.numba_ns, self.c_ns = [], []

    def run_numba(self, n=None):
        """The kernel over the first ``n`` frames (default all) from fresh state; elapsed ns
        (the check uses the timed driver too: one compilation per kernel, not two)."""
        np.copyto(self.st, self.st0)
        np.copyto(self.ring, self.ring0)
        n = self.frames if n is None else n
        return numba_ns(self.lib, self.kernel, self.x[:n], self.key[:n], self.out_n[:n], self.p,
                        self.st, self.ring, self.tr, self.bs)

    def run_c(self, n=None):
        s = self.lib.state(self.config, self.precision, self.p_bare)
        n = self.frames if n is None else n
        ns = self.lib.drive(self.config, self.precision, s, self.p_bare, self.x[:n], self.key[:n],
                            self.out_c[:n], self.bs)
        return ns, s

    def check(self, frames):
        """numba against the bare loop on the first ``frames``: the row's check fields."""
        from livedyn.dsp.layout import S_GR_MAX

        n = frames - frames % self.bs
        self.run_numba(n)
        _, s = self.run_c(n)
        tol = TOLERANCE[self.precision]
        max_diff, ok, note = _compare(self.out_n, self.out_c, n, "bare C", tol)
        gr_n, gr_c = float(self.st[S_GR_MAX, 0]), self.lib.gr_max(self.config, self.precision, s)
        gr_diff = abs(gr_n - gr_c)
        if ok and not gr_diff <= GR_TOLERANCE[self.precision]:
            ok = False
            note = (f"largest gain reduction of the last block: kernel {gr_n:.9g} dB, bare C "
                    f"{gr_c:.9g} dB (more than {GR_TOLERANCE[self.precision]:g} dB apart)")
        return dict(check="ok" if ok else "MISMATCH", max_abs_diff=max_diff, tolerance=tol,
                    gr_max_diff_db=gr_diff, check_frames=n, mismatch=note,
                    bit_identical=bool(np.array_equal(self.out_n[:n], self.out_c[:n])))

    def time_round(self):
        self.numba_ns.append(self.run_numba() / self.frames)
        self.c_ns.append(self.run_c()[0] / self.frames)

    def result(self, samplerate):
        n, c = _spread(self.numba_ns), _spread(self.c_ns)
        return dict(
            frames=self.frames, repeats=len(self.numba_ns),
            numba_ns_per_frame=n["median"], numba_ns_min=n["min"], numba_ns_max=n["max"],
            numba_ns_q1=n["q1"], numba_ns_q3=n["q3"],
            bare_ns_per_frame=c["median"], bare_ns_min=c["min"], bare_ns_max=c["max"],
            bare_ns_q1=c["q1"], bare_ns_q3=c["q3"],
            numba_over_bare=n["median"] / c["median"],
            numba_over_bare_paired=statistics.median(a / b for a, b in
                                                     zip(self.numba_ns, self.c_ns)),
            instances_per_core=instances_per_core(n["median"], samplerate),
            bare_instances_per_core=instances_per_core(c["median"], samplerate),
        )


BARE_ROW_KEYS = (
    "case", "algorithm", "config", "settings", "precision", "blocksize", "channels",
    "key_channels", "samplerate", "check", "max_abs_diff", "tolerance", "gr_max_diff_db",
    "check_frames", "mismatch", "bit_identical", "frames", "repeats",
    "numba_ns_per_frame", "numba_ns_min", "numba_ns_max", "numba_ns_q1", "numba_ns_q3",
    "bare_ns_per_frame", "bare_ns_min", "bare_ns_max", "bare_ns_q1", "bare_ns_q3",
    "numba_over_bare", "numba_over_bare_paired", "instances_per_core",
    "bare_instances_per_core",
)


def check_bare(lib, case, precision, samplerate=48000, blocksize=64, seconds=CHECK_SECONDS,
               p_bare=None):
    """The check fields of one case in one precision (``p_bare``: another parameter array for
    the bare side, to show that a difference is caught)."""
    frames = _whole_blocks(seconds, samplerate, blocksize)
    pr = Pair(lib, case, precision, samplerate, frames, blocksize)
    if p_bare is not None:
        pr.p_bare = p_bare
    return pr.check(frames)


def run_bare(quick=False, blocksizes=(64, 1024), samplerate=48000, seconds=None, repeats=None,
             out=print, progress=_stderr, lib=None, cases=BARE_CASES, wide=False):
    """Check and time every case, block size and precision; print the table; return the rows.

    ``lib`` is the loaded loops (default :func:`load`; without a compiler its one-line note is
    printed and every row is "skipped"). Returns rows with the keys of :data:`BARE_ROW_KEYS`;
    why C or float32 is missing is printed under the table.
    """
    progress = progress or (lambda msg: None)
    seconds = (0.5 if quick else 2.0) if seconds is None else float(seconds)
    blocksizes, repeats = checked_runs(blocksizes, (3 if quick else 9) if repeats is None
                                       else repeats)
    notes = []
    if lib is None:
        from .ctwin import CTwinUnavailable

        try:
            lib = load()
        except CTwinUnavailable as exc:
            notes.append(str(exc))
            progress(str(exc))
    rows, pairs = [], []
    for case in cases:
        for bs in blocksizes:
            for prec in PRECISIONS:
                row = dict.fromkeys(BARE_ROW_KEYS)
                row.update(case=case.name, algorithm=case.algorithm, config=case.config,
                           settings=dict(case.settings), precision=prec, blocksize=bs,
                           channels=2, key_channels=case.key_channels,
                           samplerate=float(samplerate), check="skipped")
                rows.append(row)
                if lib is None:
                    continue
                frames = _whole_blocks(max(seconds, CHECK_SECONDS), samplerate, bs)
                pr = Pair(lib, case, prec, samplerate, frames, bs)
                progress(f"check {case.name}, block {bs}, {prec}: numba kernel vs bare C")
                row.update(pr.check(_whole_blocks(CHECK_SECONDS, samplerate, bs)))
                if row["check"] == "ok":
                    pairs.append((row, pr))
                else:
                    progress(f"    MISMATCH: {row['mismatch']}")
    if pairs:
        for _, pr in pairs:  # warm-up: compile the timed driver for each kernel
            pr.run_numba()
            pr.run_c()
        for r in range(repeats):
            progress(f"bare-C round {r + 1}/{repeats}: numba, bare C")
            for _, pr in pairs:
                pr.time_round()
        for row, pr in pairs:
            row.update(pr.result(samplerate))
    if out is not None:
        for line in format_bare(rows, notes, lib, wide=wide):
            out(line)
    return rows


def format_bare(rows, notes=(), lib=None, wide=False):
    """The rows of :func:`run_bare` as lines of a text table (``wide``: also the spreads)."""
    from .ctwin import compiler_line

    lines = ["", "cost in the precision you ship: numba kernel against a bare-C loop of only the "
             "features in use"]
    lines.append(f"C: {compiler_line()}" + (f"; {lib.path.name}" if lib is not None else ""))
    if rows:
        r0 = rows[0]
        lines.append(f"{r0['channels']} ch, {r0['samplerate']:g} Hz; ns per stereo frame, median"
                     f"{' [min-max]' if wide else ''} of {r0['repeats'] or '-'} interleaved runs; "
                     f"instances in {int(100 * CORE_SHARE)} % of one core")
    sp = 14 if wide else 0
    head = (f"{'case':<20}{'block':>6} {'prec':<8}{'check':<15}{'numba':>8}{'':<{sp}}"
            f"{'bare C':>8}{'':<{sp}}{'numba/C':>8}{'paired':>7}{'inst numba':>11}{'bare':>6}")
    lines += [head, "-" * len(head)]
    for r in rows:
        chk = r["check"]
        if chk == "ok":
            chk = "bit-identical" if r["bit_identical"] else f"ok {r['max_abs_diff']:.1e}"
        lead = f"{r['case'][:20]:<20}{r['blocksize']:>6} {r['precision']:<8}{chk:<15}"
        if r.get("numba_ns_per_frame") is None:
            why = r["mismatch"] if r["check"] == "MISMATCH" else "; ".join(notes) or "not timed"
            lines.append(lead + f"no timings: {why}")
            continue
        ns = f"{r['numba_ns_per_frame']:>8.1f}"
        cs = f"{r['bare_ns_per_frame']:>8.1f}"
        if wide:
            ns += f" {'[%.1f-%.1f]' % (r['numba_ns_min'], r['numba_ns_max']):<13}"
            cs += f" {'[%.1f-%.1f]' % (r['bare_ns_min'], r['bare_ns_max']):<13}"
        lines.append(lead + ns + cs + f"{r['numba_over_bare']:>8.2f}"
                     f"{r['numba_over_bare_paired']:>7.2f}{r['instances_per_core']:>11}"
                     f"{r['bare_instances_per_core']:>6}")
    lines.append("numba/C: ratio of the medians, per precision; paired: median of the per-round "
                 "ratios.")
    lines.append(f"inst: floor({CORE_SHARE} * 1e9 / (samplerate * ns per frame)), the numba kernel"
                 " and the bare loop.")
    for n in notes:
        lines.append(f"note: {n}")
    bad = [f"{r['case']} {r['blocksize']} {r['precision']}" for r in rows
           if r["check"] == "MISMATCH"]
    if bad:
        lines.append("MISMATCH (no timings): " + ", ".join(bad))
    return lines


# ---- a user stage's own cost: the two curve files ---------------------------------------------

#: The built-in compressor's soft-knee curve (livedyn.dsp.stages.compressor_gain) as a user
#: gain curve; ``{extra}`` is empty for the identical curve and one tanh and one log more per
#: sample for the costlier one (the same two calls as the bare loop ``comp_x``).
CURVE_TEMPLATE = '''"""bench: {what}."""
import math

NAME = "{name}"
PARAMS = ["threshold", "ratio", "knee", "attack", "release", "makeup", "lookahead"]


def gain_curve(level_db, p):
    slope = 1.0 - 1.0 / p[P.ratio]
    knee = p[P.knee]
    d = level_db - p[P.threshold]
    if 2.0 * d < -knee:
        g = 0.0
    elif 2.0 * d <= knee:
        e = d + 0.5 * knee
        g = -slope * e * e / (2.0 * knee)
    else:
        g = -slope * d
    return g{extra}
'''
CURVES = {
    "same": ("bench-same-curve", "the built-in compressor's soft-knee curve", ""),
    "costly": ("bench-costly-curve", "the same curve with one tanh and one log more per sample",
               " - 1e-6 * math.log(2.0 + math.tanh(level_db * 0.05))"),
}


def write_curves(folder):
    """Write the two curve files into ``folder``; {"same": path, "costly": path}."""
    out = {}
    for key, (name, what, extra) in CURVES.items():
        path = Path(folder) / f"{name.replace('-', '_')}.py"
        path.write_text(CURVE_TEMPLATE.format(name=name, what=what, extra=extra),
                        encoding="utf-8")
        out[key] = path
    return out


def _shared_params(user_p, base_p):
    """``base_p`` with the user processor's values of livedyn's own slots, the built-in law and
    no user stage: the compressor with the stages the file leaves out left in."""
    from livedyn.params import (LAW_COMPRESSOR, P_LAW, P_USER_CURVE, P_USER_DETECTOR,
                                P_USER_SMOOTHER, USER_SLOT0)

    p = base_p.copy()
    p[:USER_SLOT0] = user_p[:USER_SLOT0]
    p[P_LAW] = LAW_COMPRESSOR
    p[P_USER_CURVE] = p[P_USER_DETECTOR] = p[P_USER_SMOOTHER] = 0.0
    return p


class Run:
    """One timed path: a kernel with its fresh state, or a bare loop."""

    def __init__(self, lib, x, key, bs, proc=None, p=None, config=None, precision=None):
        self.lib, self.x, self.key, self.bs = lib, x, key, bs
        self.out = np.zeros_like(x)
        self.ns = []
        self.proc, self.config, self.precision = proc, config, precision
        if proc is not None:
            self.p = proc.p.copy() if p is None else p
            self.st0, self.ring0 = proc.st.copy(), proc.ring.copy()
            self.st, self.ring = proc.st.copy(), proc.ring.copy()
        else:
            self.p = p

    def run(self, record=True, n=None):
        n = self.x.shape[0] if n is None else n
        x, key, out = self.x[:n], self.key[:n], self.out[:n]
        if self.proc is not None:
            np.copyto(self.st, self.st0)
            np.copyto(self.ring, self.ring0)
            ns = numba_ns(self.lib, self.proc.kernel_now(), x, key, out, self.p, self.st,
                          self.ring,
                          self.proc._no_trace, self.bs)
        else:
            s = self.lib.state(self.config, self.precision, self.p)
            ns = self.lib.drive(self.config, self.precision, s, self.p, x, key, out, self.bs)
        if record:
            self.ns.append(ns / (n - n % self.bs))


def _diff(a, b):
    """Median and spread of the per-round differences a - b (ns per frame)."""
    d = _spread([x - y for x, y in zip(a.ns, b.ns)])
    return dict(diff_ns=d["median"], diff_min=d["min"], diff_max=d["max"], diff_q1=d["q1"],
                diff_q3=d["q3"])


def run_curves(quick=False, blocksizes=(64, 1024), samplerate=48000, seconds=None, repeats=None,
               out=print, progress=_stderr, lib=None):
    """The two targets of a user stage's cost, per precision and block size; prints them.

    Paths timed in each round, one after the other: the built-in compressor
    (:data:`COMP_SETTINGS`), the identical user curve, the costlier user curve, the bare-C
    compressor and its costlier copy. Checks first: the identical curve against the built-in,
    the costlier curve against the bare loop ``comp_x``, each within the precision's
    :data:`TOLERANCE` (a MISMATCH gets no timings).

    Returns
    -------
    list of dict
        Per precision and block size: the medians, ``same_over_builtin`` (ratio of medians),
        ``same_over_builtin_paired``, ``numba_extra_ns`` and ``c_extra_ns`` with spreads, and
        ``extra_over_c``.
    """
    from livedyn.loader import load as load_file

    progress = progress or (lambda msg: None)
    seconds = (0.5 if quick else 2.0) if seconds is None else float(seconds)
    blocksizes, repeats = checked_runs(blocksizes, (3 if quick else 9) if repeats is None
                                       else repeats)
    note = None
    if lib is None:
        from .ctwin import CTwinUnavailable

        try:
            lib = load()
        except CTwinUnavailable as exc:
            note = str(exc)
    rows, sets = [], []
    with tempfile.TemporaryDirectory(prefix="livedyn-curves-") as tmp:
        files = write_curves(tmp)
        # compiled in each precision while the folder exists; without the load-time checks
        # (about 3 s a file here): these are the bench's own files, and their output is
        # checked against the built-in compressor and the bare loop below
        algs = {prec: {k: load_file(v, check=False, precision=prec) for k, v in files.items()}
                for prec in PRECISIONS}
    for bs in blocksizes:
        frames = _whole_blocks(seconds, samplerate, bs)
        x = noise_bursts(SEED, frames, 2, samplerate)
        for prec in PRECISIONS:
            procs = {k: make_processor(a, samplerate, 2, 0, prec, **COMP_SETTINGS)
                     for k, a in algs[prec].items()}
            base = make_processor("compressor", samplerate, 2, 0, prec, **COMP_SETTINGS)
            runs = dict(builtin=Run(lib, x, x, bs, base),
                        same=Run(lib, x, x, bs, procs["same"]),
                        costly=Run(lib, x, x, bs, procs["costly"]))
            if lib is not None:
                runs["c"] = Run(lib, x, x, bs, p=base.p.copy(), config="comp", precision=prec)
                runs["c_x"] = Run(lib, x, x, bs, p=base.p.copy(), config="comp_x",
                                  precision=prec)
            row = dict(blocksize=bs, precision=prec, samplerate=float(samplerate),
                       settings=dict(COMP_SETTINGS), check="ok", mismatch=None,
                       same_params_equal=bool(np.array_equal(
                           _shared_params(procs["same"].p, base.p), base.p)))
            n = _whole_blocks(CHECK_SECONDS, samplerate, bs)
            for r in runs.values():
                r.run(record=False, n=n)
            tol = TOLERANCE[prec]
            pairs = [("builtin", "same", "identical user curve")]
            if lib is not None:
                pairs.append(("c_x", "costly", "costlier user curve against bare C comp_x"))
            for ref, got, label in pairs:
                d, ok, why = _compare(runs[ref].out, runs[got].out, n, label, tol)
                row[f"{got}_max_abs_diff"] = d
                if not ok and row["check"] == "ok":
                    row.update(check="MISMATCH", mismatch=f"{label}: {why}")
            if not row["same_params_equal"]:
                row.update(check="MISMATCH", mismatch="the identical curve's parameters differ "
                                                      "from the built-in compressor's")
            rows.append(row)
            if row["check"] == "ok":
                sets.append((row, runs))
            else:
                progress(f"    MISMATCH: {row['mismatch']}")
    for _, runs in sets:
        for r in runs.values():
            r.run(record=False)
    for i in range(repeats):
        progress(f"curve round {i + 1}/{repeats}: built-in, identical, costlier, bare C")
        for _, runs in sets:
            for r in runs.values():
                r.run()
    for row, runs in sets:
        med = {k: statistics.median(r.ns) for k, r in runs.items()}
        row.update({f"{k}_ns_per_frame": v for k, v in med.items()})
        row["same_over_builtin"] = med["same"] / med["builtin"]
        row["same_over_builtin_paired"] = statistics.median(
            a / b for a, b in zip(runs["same"].ns, runs["builtin"].ns))
        row["same_minus_builtin"] = _diff(runs["same"], runs["builtin"])
        row["numba_extra"] = _diff(runs["costly"], runs["same"])
        row["numba_extra_ns"] = row["numba_extra"]["diff_ns"]
        if "c" in runs:
            row["c_extra"] = _diff(runs["c_x"], runs["c"])
            row["c_extra_ns"] = row["c_extra"]["diff_ns"]
            row["extra_over_c"] = (row["numba_extra_ns"] / row["c_extra_ns"]
                                   if row["c_extra_ns"] > 0 else None)
        row["repeats"] = repeats
    if out is not None:
        for line in format_curves(rows, note):
            out(line)
    return rows


def _met(ok):
    return "met" if ok else "missed"


def format_curves(rows, note=None):
    """The rows of :func:`run_curves` as lines of text, with the two targets."""
    lines = ["", "a user stage's own cost: the compressor's curve as a user gain_curve "
             f"({', '.join(f'{k} {v:g}' for k, v in COMP_SETTINGS.items())})"]
    head = (f"{'block':>5} {'prec':<8}{'built-in':>9}{'same':>8}{'same/bi':>8}{'target':>8}"
            f"{'costly':>8}{'+numba':>8}{'+C':>7}{'+n/+C':>7}{'target':>8}")
    lines += [head, "-" * len(head)]
    for r in rows:
        lead = f"{r['blocksize']:>5} {r['precision']:<8}"
        if r.get("builtin_ns_per_frame") is None:
            lines.append(lead + f"{r['check']}: {r['mismatch'] or 'not timed'}")
            continue
        a = r["same_over_builtin"]
        line = (lead + f"{r['builtin_ns_per_frame']:>9.1f}{r['same_ns_per_frame']:>8.1f}"
                f"{a:>8.3f}{_met(abs(a - 1.0) <= 0.05):>8}{r['costly_ns_per_frame']:>8.1f}"
                f"{r['numba_extra_ns']:>8.1f}")
        if r.get("extra_over_c") is not None:
            e = r["extra_over_c"]
            line += f"{r['c_extra_ns']:>7.1f}{e:>7.2f}{_met(abs(e - 1.0) <= 0.25):>8}"
        else:
            line += f"{'-':>7}{'-':>7}{'-':>8}"
        lines.append(line)
    lines.append("ns per stereo frame, medians of interleaved rounds; same/bi: identical user "
                 "curve / built-in (target within 5 %);")
    lines.append("+numba: costlier minus identical user curve; +C: the same two calls added to "
                 "the bare-C loop; +n/+C target within 25 %.")
    if note:
        lines.append(f"note: {note}")
    return lines


def run_precision(quick=False, blocksizes=(64, 1024), samplerate=48000, wide=False, out=print,
                  progress=_stderr, seconds=None):
    """Both sections (:func:`run_bare`, then :func:`run_curves`), as ``bench kernels`` runs them.

    Returns
    -------
    dict
        ``bare`` and ``curves`` rows, and ``ok``: False when any check gave MISMATCH.
    """
    from .ctwin import CTwinUnavailable

    try:
        lib = load()
    except CTwinUnavailable:
        lib = None  # each section loads again, gets the remembered failure and prints its note
    bare_rows = run_bare(quick=quick, blocksizes=blocksizes, samplerate=samplerate, out=out,
                         progress=progress, lib=lib, wide=wide, seconds=seconds)
    curve_rows = run_curves(quick=quick, blocksizes=blocksizes, samplerate=samplerate, out=out,
                            progress=progress, lib=lib, seconds=seconds)
    ok = all(r["check"] != "MISMATCH" for r in bare_rows + curve_rows)
    return dict(bare=bare_rows, curves=curve_rows, ok=ok)
