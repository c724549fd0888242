"""The native callback's shared layouts, the one job-function factory, the always-on last stage.

Everything the audio callback shares with the control side is an int64 or float64 array whose
fields are declared here once, as IntEnums (the ``U_*``, ``J_*``, ``S_*``, ``F_*``, ``M_*`` and
``H_*`` names are their plain-int aliases, which numba folds to constants). Import checks that
no two fields of a block share an index and that every field fits its block.

Blocks
------
user data ``ud`` (int64, ``UD_SIZE``)
    Addresses and sizes of every array the callback touches, its switches and its own state;
    the job block of kernel slot 0 lives inside it at ``U_JOB``.
job (int64, ``JOB_SIZE``)
    One kernel call: the addresses and shapes of ``x, key, out, p, st, ring, tr`` (the kernel
    contract of :mod:`livedyn.dsp.layout`). ``void fn(void *job)`` functions made by
    :func:`job_function` run a kernel on it; built-ins and user kernels share it.
statistics (int64, ``STATS_SIZE``)
    Counters and times the callback writes for the control side.
safety (float64, ``SAFE_SIZE``)
    The last stage's fade gain, target, steps and ceiling.
meters (float64, ``METER_SIZE``)
    Per-block peaks (up to ``METER_CHANNELS`` channels each) and gain reduction.
ring header (int64, ``RING_HDR``)
    A single-producer single-consumer float32 ring: buffer, capacity, width, head, tail.

The real-time contract of everything here is in DEVELOPERS.md, "The live engine".
"""
from enum import IntEnum

import numba as nb
import numpy as np
from numba import carray, types

from .dynamics import dynamics_block
from .intrinsics import int_to_voidptr
from .layout import NTRACE
from .limiter import limiter_block

JIT = dict(cache=True, nogil=True, error_model="numpy")


class J(IntEnum):
    """Job block: one kernel call."""
    X = 0; K = 1; Y = 2; FRAMES = 3; CH = 4; KCH = 5  # noqa: E702
    P = 6; PLEN = 7  # noqa: E702
    ST = 8; STR = 9; STC = 10  # noqa: E702
    RING = 11; RINGR = 12; RINGC = 13  # noqa: E702
    TR = 14; TRN = 15; TRC = 16  # trace buffer; TRN = frames to trace (0: none)  # noqa: E702
    FALLBACK = 17  # the general kernel's job function: a variant's job calls it for another
    #                setting (livedyn.dsp.variants)


JOB_SIZE = 24


class U(IntEnum):
    """User-data block of the callback."""
    STATS = 0
    NIN = 2; NOUT = 3  # device channels  # noqa: E702
    CH = 4; KCH = 5  # processor main and key channels  # noqa: E702
    X = 6; K = 7; Y = 8; MAXF = 9  # scratch float32 (maxf, ch)/(maxf, kch)/(maxf, ch)  # noqa
    MAIN_MAP = 10; KEY_MAP = 11; OUT_MAP = 12  # int64: device channel per channel  # noqa
    MAIN_RING = 13; KEY_RING = 14; TAP_RING = 15  # ring headers (0: not used)  # noqa: E702
    SEQ = 16; PPEND = 17; PTMP = 18; LAST_SEQ = 19  # the parameter sequence lock  # noqa
    KSLOT = 20; KTABLE = 21; NKSLOT = 22  # kernel address table (fn, job) per slot  # noqa
    MONITOR = 23; BYPASS = 24; MUTE = 25  # noqa: E702
    SAFE = 26  # float64 safety state
    DRY = 27; DRY_LEN = 28; DRY_POS = 29; LATENCY = 30  # float32 (len, ch) dry line  # noqa
    METER = 31  # float64 meters
    CANARY_EVERY = 33; CANARY_NS = 34  # test switch: overrun on purpose every Nth  # noqa
    ELRING = 35; RINGLEN = 36  # int64 (ringlen, 3): elapsed ns, interval ns, flags  # noqa
    SEQLOG = 37; SEQLOG_LEN = 38  # int64 (len, 2): (sequence, frame) when applied  # noqa
    EXTRA = 40; NEXTRA = 41  # int64 (n, 2) (fn, job) of extra instances (bench)  # noqa
    # live swap: the control side fills the incoming slot, then stores a new request number in
    # SWAP_REQ (release); the callback runs both versions (warm-up, then crossfade) while it is
    # not 0 and completes by a compare-and-swap of SWAP_REQ from that number to 0, then echoes
    # SWAP_DONE = the number. The control side cancels with a compare-and-swap to 0 of its
    # own: exactly one of the two succeeds, so a cancelled swap never completes later.
    SWAP_REQ = 42; SWAP_DONE = 43; SWAP_SLOT = 44  # noqa: E702
    SWAP_WARM = 45; SWAP_XF = 46; SWAP_POS = 47; SWAP_LAT = 48  # noqa: E702
    Y2 = 49  # float32 (maxf, ch) scratch output of the incoming version
    SWAP_TAIL = 50  # blocks after a swap still counted as part of it (flags arrive late)
    SWAP_ACTIVE = 51  # 1 while this block ran two versions
    # overrun guard: after GUARD_N blocks in a row over BUDGET_NS of the callback's own CPU
    # time, crossfade to bypass
    GUARD_ON = 52; GUARD_N = 53; GUARD_COUNT = 54; GUARD_STATE = 55; GUARD_POS = 56  # noqa
    GUARD_XF = 57; BUDGET_NS = 58  # noqa: E702
    # host cycles: start time and frame count of the current one, the end of the previous
    # callback, the engine's block size, whether a callback of this cycle overran
    CYCLE_T0 = 59; CYCLE_F0 = 60; T_END = 61; BLOCKSIZE = 62; CYCLE_OVER = 63  # noqa: E702
    JOB = 64  # the job block of kernel slot 0 lives at ud[JOB:JOB + JOB_SIZE]


UD_SIZE = U.JOB + JOB_SIZE


class S(IntEnum):
    """Statistics written by the callback."""
    BLOCKS = 0; FRAMES = 1; T_FIRST = 2; T_LAST = 3  # noqa: E702
    EL_LAST = 4; EL_MAX = 5  # noqa: E702
    LATE = 6; FLAGGED = 7; FLAGS_OR = 8  # noqa: E702
    PARAM_SEQ = 9; PARAM_FRAME = 10; PARAM_TORN = 11  # noqa: E702
    UNDER_MAIN = 12; UNDER_KEY = 13; TAP_DROPPED = 14  # noqa: E702
    NONFINITE_BLOCKS = 15; TOO_BIG = 16; PERIOD_NS = 17  # noqa: E702
    CANARY = 18; LAST_OVERRUN = 20  # noqa: E702
    SWAPS = 22; SWAP_BLOCKS = 23; SWAP_EL_MAX = 24; SWAP_FLAGGED = 25; SWAP_LATE = 26  # noqa
    GUARD_TRIPS = 27; GUARD_EL = 28  # times the guard bypassed; the CPU time then  # noqa
    SWAP_FRAME = 29  # first frame the last swapped-in version ran alone
    HOST_FRAMES = 30; CPU_MAX = 31  # frames of the last host cycle; largest CPU ns  # noqa


STATS_SIZE = 32


class F(IntEnum):
    """Safety state of the last stage."""
    GAIN = 0; TARGET = 1; FADE_STEP = 2; MUTE_STEP = 3; CEIL = 4  # noqa: E702
    LEVEL = 5; LEVEL_COEF = 6  # output level: gliding linear gain, its one-pole coefficient  # noqa


SAFE_SIZE = 8
METER_CHANNELS = 8


class M(IntEnum):
    """Meters: [IN, IN + 8) input peak per main channel, then output and key peaks, then the
    block's largest gain reduction in dB."""
    IN = 0; OUT = 8; KEY = 16; GR = 24  # noqa: E702


METER_SIZE = 32


class H(IntEnum):
    """Header of a single-producer single-consumer ring."""
    BUF = 0; CAP = 1; WIDTH = 2; HEAD = 3; TAIL = 4  # noqa: E702


RING_HDR = 8

GUARD_OK, GUARD_FADING, GUARD_BYPASSED = 0, 1, 2
MONITOR_OUT, MONITOR_KEY, MONITOR_DELTA = 0, 1, 2
SWAP_BIT = 16  # set in a block's flags column of the elapsed-time ring when it ran two versions
LATE_BIT = 17  # set there when the block was counted late (S_LATE)


def _check(enum, size, widths=None):
    """No two fields share an index (IntEnum makes equal values silent aliases) and every
    field, with its width, fits the block."""
    names = list(enum.__members__)
    values = [int(enum[n]) for n in names]
    if len(set(values)) != len(values):
        dup = [n for n in names if enum[n].name != n]
        raise AssertionError(f"{enum.__name__}: fields share an index: {dup}")
    taken = {}
    for n in names:
        w = (widths or {}).get(n, 1)
        for i in range(int(enum[n]), int(enum[n]) + w):
            if i >= size:
                raise AssertionError(f"{enum.__name__}.{n}: index {i} outside the block of "
                                     f"{size}")
            if i in taken:
                raise AssertionError(f"{enum.__name__}.{n} overlaps {taken[i]} at {i}")
            taken[i] = n


_check(J, JOB_SIZE)
_check(U, UD_SIZE, {"JOB": JOB_SIZE})
_check(S, STATS_SIZE)
_check(F, SAFE_SIZE)
_check(M, METER_SIZE, {"IN": METER_CHANNELS, "OUT": METER_CHANNELS, "KEY": METER_CHANNELS})
_check(H, RING_HDR)

# plain-int aliases: U_STATS, J_X, S_BLOCKS, F_GAIN, M_IN, H_BUF, ...
_ALIASES = {f"{e.__name__}_{m.name}": int(m) for e in (J, U, S, F, M, H) for m in e}
globals().update(_ALIASES)
__all__ = sorted(_ALIASES) + [
    "J", "U", "S", "F", "M", "H", "JIT", "JOB_SIZE", "UD_SIZE", "STATS_SIZE", "SAFE_SIZE",
    "METER_SIZE", "METER_CHANNELS", "RING_HDR", "GUARD_OK", "GUARD_FADING", "GUARD_BYPASSED",
    "MONITOR_OUT", "MONITOR_KEY", "MONITOR_DELTA", "SWAP_BIT", "LATE_BIT", "JOB_SIG",
    "job_arrays", "job_function", "job_dynamics", "job_limiter", "safety_stage"]


# ---- jobs: void fn(void *job) ---------------------------------------------------------------

JOB_SIG = types.void(types.voidptr)


@nb.njit(**JIT)
def job_arrays(job):
    """The kernel's arguments ``x, key, out, p, st, ring, tr`` as views of a job block."""
    n = job[J.FRAMES]
    x = carray(int_to_voidptr(job[J.X]), (n, job[J.CH]), np.float32)
    k = carray(int_to_voidptr(job[J.K]), (n, job[J.KCH]), np.float32)
    y = carray(int_to_voidptr(job[J.Y]), (n, job[J.CH]), np.float32)
    p = carray(int_to_voidptr(job[J.P]), (job[J.PLEN],), np.float64)
    st = carray(int_to_voidptr(job[J.ST]), (job[J.STR], job[J.STC]), np.float64)
    ring = carray(int_to_voidptr(job[J.RING]), (job[J.RINGR], job[J.RINGC]), np.float64)
    tr = carray(int_to_voidptr(job[J.TR]), (NTRACE, job[J.TRN], job[J.TRC]), np.float64)
    return x, k, y, p, st, ring, tr


def job_function(kernel):
    """The one job-function factory: a C-callable ``void fn(void *job)`` that runs ``kernel``
    (an njit function of the kernel contract) on the job block at its argument, for the
    callback's address table. User kernels are made here; the two built-ins below are the same
    two lines written out at module level, because numba caches no function made in a
    closure (and the built-ins must load from the cache, not compile, when a run starts)."""
    def job(jp):
        x, k, y, p, st, ring, tr = job_arrays(carray(jp, (JOB_SIZE,), np.int64))
        kernel(x, k, y, p, st, ring, tr)

    return nb.cfunc(JOB_SIG, nopython=True, error_model="numpy")(job)


@nb.cfunc(JOB_SIG, nopython=True, error_model="numpy", cache=True)
def job_dynamics(jp):
    """Job function of the dynamics kernel (compressor, expander, gate, ducker, user stages)."""
    x, k, y, p, st, ring, tr = job_arrays(carray(jp, (JOB_SIZE,), np.int64))
    dynamics_block(x, k, y, p, st, ring, tr)


@nb.cfunc(JOB_SIG, nopython=True, error_model="numpy", cache=True)
def job_limiter(jp):
    """Job function of the lookahead limiter."""
    x, k, y, p, st, ring, tr = job_arrays(carray(jp, (JOB_SIZE,), np.int64))
    limiter_block(x, k, y, p, st, ring, tr)


# ---- the last stage, always on: live and offline ---------------------------------------------

@nb.njit(**JIT)
def safety_stage(y, n, ch, safe, mute, stats):
    """Non-finite samples mute the whole block (counted); then fade/mute gain; then ceiling."""
    bad = False
    for i in range(n):
        for c in range(ch):
            v = y[i, c]
            if not (v - v == 0.0):  # NaN or +-inf
                bad = True
    if bad:
        stats[S.NONFINITE_BLOCKS] += 1
        for i in range(n):
            for c in range(ch):
                y[i, c] = 0.0
    g = safe[F.GAIN]
    target = 0.0 if mute != 0 else safe[F.TARGET]
    step = safe[F.MUTE_STEP] if mute != 0 else safe[F.FADE_STEP]
    ceil = safe[F.CEIL]
    for i in range(n):
        if g < target:
            g += step
            if g > target:
                g = target
        elif g > target:
            g -= step
            if g < target:
                g = target
        for c in range(ch):
            v = y[i, c] * g
            if v > ceil:
                v = ceil
            elif v < -ceil:
                v = -ceil
            y[i, c] = v
    safe[F.GAIN] = g
