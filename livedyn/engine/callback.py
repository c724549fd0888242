"""The native audio callback and what it touches.

The callback is a numba ``@cfunc`` with PortAudio's stream-callback signature. It never takes the
interpreter lock, allocates nothing and makes no system call but a clock read: every array it
uses is preallocated by :class:`livedyn.engine.engine.Engine` and reached through one int64
*user-data block* ``ud`` of addresses and sizes (``U_*`` below). Parameters arrive through a
sequence lock; meters, statistics and a tap of the signals leave through arrays and
single-producer single-consumer rings whose indices are published with release stores and read
with acquire loads (LLVM atomics, see :mod:`livedyn.dsp.intrinsics`). The layouts of all
those blocks, the job functions and the last stage are declared in :mod:`livedyn.dsp.abi`.

Per callback: ``timing_stage`` (wake-up interval, host cycles, lateness); then, per piece of at
most ``U_MAXF`` frames, ``block_body``: the parameter handoff, ``input_stage`` (device channels
or file rings), ``kernel_stage`` (the kernel through an address table, so that it can change at
a block boundary without recompiling the callback), ``swap_stage`` (a live swap's second
version and crossfade), ``dry_stage`` (dry delay line: bypass, delta, the guard's fade; the key
monitor), ``safety_stage`` (non-finite mute, fade, mute, ceiling), ``output_stage`` (channel
map, at the output level), ``meter_stage`` (peaks), ``tap_stage`` (for the recorder and meters); then the canary,
``guard_stage`` (the overrun guard on the callback's CPU time) and ``account_stage`` (the
callback's own figures).
"""
import numba as nb
import numpy as np
from numba import carray, types

# the shared layouts (U_*, J_*, S_*, F_*, M_*, H_*), the job functions and the last stage
from ..dsp.abi import *  # noqa: F401,F403
from ..dsp.abi import JIT, safety_stage  # noqa: F401  (named for readers)
from ..dsp.intrinsics import (
    call_job, compare_exchange, fence_acquire, fence_release, int_to_voidptr, load_acquire,
    load_relaxed, monotonic_ns, store_relaxed, store_release, thread_cpu_ns, voidptr_to_int,
)
from ..dsp.layout import NTRACE, S_GR_MAX, T_KEY
from ..params import P_OUTPUT_LEVEL


@nb.njit(**JIT)
def ring_read(hdr, dst, n, col0, width):
    """Consumer: move n frames into dst[:, col0:col0+width]; missing frames become 0.

    Returns the number of frames that were missing (an underrun)."""
    buf = carray(int_to_voidptr(hdr[H_BUF]), (hdr[H_CAP], hdr[H_WIDTH]), np.float32)
    cap = hdr[H_CAP]
    head = load_acquire(hdr, H_HEAD)
    tail = hdr[H_TAIL]
    avail = head - tail
    take = n if avail >= n else avail
    for i in range(take):
        j = (tail + i) % cap
        for c in range(width):
            dst[i, col0 + c] = buf[j, c]
    for i in range(take, n):
        for c in range(width):
            dst[i, col0 + c] = 0.0
    store_release(hdr, H_TAIL, tail + take)
    return n - take


@nb.njit(**JIT)
def ring_write(hdr, src, n):
    """Producer: append up to n frames of src (n, width); returns the frames written."""
    buf = carray(int_to_voidptr(hdr[H_BUF]), (hdr[H_CAP], hdr[H_WIDTH]), np.float32)
    cap = hdr[H_CAP]
    width = hdr[H_WIDTH]
    head = hdr[H_HEAD]
    tail = load_acquire(hdr, H_TAIL)
    free = cap - (head - tail)
    put = n if free >= n else free
    for i in range(put):
        j = (head + i) % cap
        for c in range(width):
            buf[j, c] = src[i, c]
    store_release(hdr, H_HEAD, head + put)
    return put


@nb.njit(**JIT)
def ring_take(hdr, dst):
    """Consumer on the control side: move everything available (up to len(dst)) into dst."""
    buf = carray(int_to_voidptr(hdr[H_BUF]), (hdr[H_CAP], hdr[H_WIDTH]), np.float32)
    cap = hdr[H_CAP]
    head = load_acquire(hdr, H_HEAD)
    tail = hdr[H_TAIL]
    n = head - tail
    if n > dst.shape[0]:
        n = dst.shape[0]
    for i in range(n):
        j = (tail + i) % cap
        for c in range(hdr[H_WIDTH]):
            dst[i, c] = buf[j, c]
    store_release(hdr, H_TAIL, tail + n)
    return n


@nb.njit(**JIT)
def ring_fill(hdr):
    """Frames waiting in the ring."""
    return load_acquire(hdr, H_HEAD) - load_acquire(hdr, H_TAIL)


# ---- parameter handoff (sequence lock) ------------------------------------------------------

@nb.njit(**JIT)
def publish_params(ud, values):
    """Writer (control side): publish a complete parameter array; the callback takes it at its
    next block. Odd sequence numbers mean 'being written'."""
    s = ud[U_SEQ]
    store_relaxed(ud, U_SEQ, s + 1)
    fence_release()
    n = values.shape[0]
    pend = carray(int_to_voidptr(ud[U_PPEND]), (n,), np.float64)
    for i in range(n):
        pend[i] = values[i]
    store_release(ud, U_SEQ, s + 2)
    return s + 2


@nb.njit(**JIT)
def publish_swap(ud, req):
    """Control side: the incoming slot is filled; ask the callback to switch to it."""
    store_release(ud, U_SWAP_REQ, req)


@nb.njit(**JIT)
def cancel_swap(ud, req):
    """Control side: withdraw request ``req``. True when it was withdrawn (the callback will
    never complete it); False when the callback had already completed it."""
    return compare_exchange(ud, U_SWAP_REQ, req, 0) == req


@nb.njit(**JIT)
def take_params(ud, stats, frame0):
    s1 = load_acquire(ud, U_SEQ)
    if s1 == ud[U_LAST_SEQ] or (s1 & 1) == 1:
        return
    table = carray(int_to_voidptr(ud[U_KTABLE]), (ud[U_NKSLOT], 2), np.int64)
    job = carray(int_to_voidptr(table[load_relaxed(ud, U_KSLOT), 1]), (JOB_SIZE,), np.int64)
    n = job[J_PLEN]
    pend = carray(int_to_voidptr(ud[U_PPEND]), (n,), np.float64)
    tmp = carray(int_to_voidptr(ud[U_PTMP]), (n,), np.float64)
    for i in range(n):
        tmp[i] = pend[i]
    fence_acquire()
    if load_relaxed(ud, U_SEQ) != s1:
        stats[S_PARAM_TORN] += 1
        return
    p = carray(int_to_voidptr(job[J_P]), (n,), np.float64)
    for i in range(n):
        p[i] = tmp[i]
    ud[U_LAST_SEQ] = s1
    ll = ud[U_SEQLOG_LEN]
    if ll > 0:
        log = carray(int_to_voidptr(ud[U_SEQLOG]), (ll, 2), np.int64)
        k = (s1 // 2) % ll
        log[k, 0] = s1
        log[k, 1] = frame0
    store_release(stats, S_PARAM_FRAME, frame0)
    store_release(stats, S_PARAM_SEQ, s1)


@nb.njit(**JIT)
def _spin_ns(ns):
    t = monotonic_ns()
    while monotonic_ns() - t < ns:
        pass


# ---- the callback's stages, in the order a block runs them ----------------------------------

@nb.njit(**JIT)
def timing_stage(ud, stats, t0):
    """Wake-up interval and lateness, once per callback.

    Hosts often serve one host period as several callbacks back to back. A callback that
    begins within a quarter of a block period of the previous one's end continues the same
    host cycle; at each new cycle the frames delivered since the last cycle start are the host
    period, and the cycle is late when it began more than 1.5 host periods after the last
    (unless a callback of the last cycle overran: an overrun is counted by that callback).
    Returns (interval since the previous callback's start, late)."""
    blocks = stats[S_BLOCKS]
    period = stats[S_PERIOD_NS]
    interval = 0
    late = False
    if blocks == 0:
        stats[S_T_FIRST] = t0
        ud[U_CYCLE_T0] = t0
        ud[U_CYCLE_F0] = stats[S_FRAMES]
    else:
        interval = t0 - stats[S_T_LAST]
        gap = t0 - ud[U_T_END]
        if 4 * gap >= period:  # a new host cycle
            frames = stats[S_FRAMES] - ud[U_CYCLE_F0]
            host_ns = frames * period // ud[U_BLOCKSIZE]
            stats[S_HOST_FRAMES] = frames
            late = period > 0 and 2 * (t0 - ud[U_CYCLE_T0]) > 3 * host_ns and \
                ud[U_CYCLE_OVER] == 0
            if late:
                stats[S_LATE] += 1
            ud[U_CYCLE_T0] = t0
            ud[U_CYCLE_F0] = stats[S_FRAMES]
            ud[U_CYCLE_OVER] = 0
    stats[S_T_LAST] = t0
    return interval, late


@nb.njit(**JIT)
def input_stage(inp, has_in, n, ud, stats, x, k, ch, kch):
    """Main and key input from the device channels or from the file rings."""
    if ud[U_MAIN_RING] != 0:
        hdr = carray(int_to_voidptr(ud[U_MAIN_RING]), (RING_HDR,), np.int64)
        if ring_read(hdr, x, n, 0, ch) > 0:
            stats[S_UNDER_MAIN] += 1
    else:
        mmap = carray(int_to_voidptr(ud[U_MAIN_MAP]), (ch,), np.int64)
        for i in range(n):
            for c in range(ch):
                j = mmap[c]
                x[i, c] = inp[i, j] if (has_in and j >= 0) else 0.0
    if kch > 0:
        if ud[U_KEY_RING] != 0:
            hdr = carray(int_to_voidptr(ud[U_KEY_RING]), (RING_HDR,), np.int64)
            if ring_read(hdr, k, n, 0, kch) > 0:
                stats[S_UNDER_KEY] += 1
        else:
            kmap = carray(int_to_voidptr(ud[U_KEY_MAP]), (kch,), np.int64)
            for i in range(n):
                for c in range(kch):
                    j = kmap[c]
                    k[i, c] = inp[i, j] if (has_in and j >= 0) else 0.0


@nb.njit(**JIT)
def kernel_stage(ud, n, monitor, guard):
    """The processor kernel of the slot in use, through the address table (not called once the
    guard has bypassed it), then the extra instances a load measurement asks for."""
    table = carray(int_to_voidptr(ud[U_KTABLE]), (ud[U_NKSLOT], 2), np.int64)
    slot = load_acquire(ud, U_KSLOT)
    jaddr = table[slot, 1]
    job = carray(int_to_voidptr(jaddr), (JOB_SIZE,), np.int64)
    if guard != GUARD_BYPASSED:
        job[J_FRAMES] = n
        job[J_TRN] = n if monitor == MONITOR_KEY else 0
        call_job(table[slot, 0], int_to_voidptr(jaddr))
    ne = ud[U_NEXTRA]
    if ne > 0:
        extra = carray(int_to_voidptr(ud[U_EXTRA]), (ne, 2), np.int64)
        for e in range(ne):
            ej = carray(int_to_voidptr(extra[e, 1]), (JOB_SIZE,), np.int64)
            ej[J_FRAMES] = n
            call_job(extra[e, 0], int_to_voidptr(extra[e, 1]))
    return jaddr  # an address, not the array: returning an array would take a reference


@nb.njit(**JIT)
def swap_stage(ud, stats, x, y, n, ch, monitor, guard, dry, dl, dpos, lat, frame0, jaddr):
    """A live swap: run the incoming version beside the current one (warm-up, then a linear
    crossfade into ``y``); complete it by compare-and-swap of the request to 0 (the control
    side may have withdrawn it). Returns (whether two versions ran, the current job's
    address)."""
    req = load_acquire(ud, U_SWAP_REQ)
    if req == 0:
        return False, jaddr
    table = carray(int_to_voidptr(ud[U_KTABLE]), (ud[U_NKSLOT], 2), np.int64)
    nslot = ud[U_SWAP_SLOT]
    njaddr = table[nslot, 1]
    njob = carray(int_to_voidptr(njaddr), (JOB_SIZE,), np.int64)
    njob[J_FRAMES] = n
    njob[J_TRN] = n if monitor == MONITOR_KEY else 0  # (overwrites the old one's key trace)
    call_job(table[nslot, 0], int_to_voidptr(njaddr))
    y2 = carray(int_to_voidptr(ud[U_Y2]), (n, ch), np.float32)
    warm = ud[U_SWAP_WARM]
    pos = ud[U_SWAP_POS]
    xfl = ud[U_SWAP_XF]
    from_dry = guard == GUARD_BYPASSED  # the guard had bypassed: fade from the dry signal
    for i in range(n):
        if from_dry:  # the dry signal, delayed by the latency (this block is not yet in it)
            if i >= lat:
                for c in range(ch):
                    y[i, c] = x[i - lat, c]
            else:
                r = dpos + i - lat
                if r < 0:
                    r += dl
                for c in range(ch):
                    y[i, c] = dry[r, c]
        if warm > 0:  # the incoming delay line fills with live input; its output unused
            warm -= 1
        elif pos < xfl:
            w = (pos + 1.0) / (xfl + 1.0)
            for c in range(ch):
                y[i, c] = np.float32((1.0 - w) * y[i, c] + w * y2[i, c])
            pos += 1
        else:
            for c in range(ch):
                y[i, c] = y2[i, c]
    ud[U_SWAP_WARM] = warm
    ud[U_SWAP_POS] = pos
    if warm == 0 and pos >= xfl and compare_exchange(ud, U_SWAP_REQ, req, 0) == req:
        # done (and not withdrawn meanwhile): the incoming version is the current one
        njob[J_Y] = ud[U_Y]
        ud[U_LATENCY] = ud[U_SWAP_LAT]
        ud[U_GUARD_STATE] = GUARD_OK
        ud[U_GUARD_COUNT] = 0
        store_release(ud, U_KSLOT, nslot)
        stats[S_SWAPS] += 1
        stats[S_SWAP_FRAME] = frame0 + n
        ud[U_SWAP_TAIL] = 2
        store_release(ud, U_SWAP_DONE, req)
        return True, njaddr
    return True, jaddr


@nb.njit(**JIT)
def dry_stage(ud, x, y, n, ch, monitor, guard, swapping, dry, dl, dpos, lat, jaddr, kch):
    """The dry delay line (aligned with the latency) for bypass, delta and the guard's fade to
    bypass; then the key monitor."""
    pos = dpos
    bypass = load_relaxed(ud, U_BYPASS)
    gpos = ud[U_GUARD_POS]
    gxf = ud[U_GUARD_XF]
    for i in range(n):
        for c in range(ch):
            dry[pos, c] = x[i, c]
        r = pos - lat
        if r < 0:
            r += dl
        if bypass != 0 or (guard == GUARD_BYPASSED and not swapping):
            for c in range(ch):
                y[i, c] = dry[r, c]
        elif guard == GUARD_FADING:
            w = (gpos + 1.0) / (gxf + 1.0) if gpos < gxf else 1.0
            for c in range(ch):
                y[i, c] = np.float32((1.0 - w) * y[i, c] + w * dry[r, c])
            gpos += 1
        elif monitor == MONITOR_DELTA:
            for c in range(ch):
                y[i, c] = dry[r, c] - y[i, c]
        pos += 1
        if pos >= dl:
            pos = 0
    ud[U_DRY_POS] = pos
    if guard == GUARD_FADING:
        ud[U_GUARD_POS] = gpos
        if gpos >= gxf:
            ud[U_GUARD_STATE] = GUARD_BYPASSED
    if monitor == MONITOR_KEY and bypass == 0 and guard != GUARD_BYPASSED:
        job = carray(int_to_voidptr(jaddr), (JOB_SIZE,), np.int64)
        tr = carray(int_to_voidptr(job[J_TR]), (NTRACE, n, job[J_TRC]), np.float64)
        nk = kch if kch > 0 else ch
        for i in range(n):
            for c in range(ch):
                y[i, c] = tr[T_KEY, i, c % nk]


@nb.njit(**JIT)
def output_stage(ud, y, out, n, nout, jaddr, safe):
    """The output channel map at the output level: processed channel per device output, or
    silence. The level is in dB in the running job's parameter array (``P_OUTPUT_LEVEL``) and
    glides per sample; attenuation only, so the ceiling holds; meters and the tap read ``y``,
    before it."""
    job = carray(int_to_voidptr(jaddr), (JOB_SIZE,), np.int64)
    omap = carray(int_to_voidptr(ud[U_OUT_MAP]), (nout,), np.int64)
    lv_db = carray(int_to_voidptr(job[J_P]), (job[J_PLEN],), np.float64)[P_OUTPUT_LEVEL]
    lt = 10.0 ** (0.05 * min(lv_db, 0.0)) if lv_db > -120.0 else 0.0
    lv, a = safe[F_LEVEL], safe[F_LEVEL_COEF]
    for i in range(n):
        lv = lt + a * (lv - lt)
        if abs(lv - lt) < 1e-9:  # arrived (and no subnormal tail toward 0)
            lv = lt
        for c in range(nout):
            j = omap[c]
            out[i, c] = np.float32(y[i, j] * lv) if j >= 0 else 0.0
    safe[F_LEVEL] = lv


@nb.njit(**JIT)
def meter_stage(ud, x, k, y, n, ch, kch, jaddr):
    """Peaks of input, output and key, and the kernel's largest gain reduction."""
    m = carray(int_to_voidptr(ud[U_METER]), (METER_SIZE,), np.float64)
    for c in range(ch):
        a = 0.0
        b = 0.0
        for i in range(n):
            v = abs(x[i, c])
            if v > a:
                a = v
            v = abs(y[i, c])
            if v > b:
                b = v
        m[M_IN + c] = a
        m[M_OUT + c] = b
    for c in range(kch):
        a = 0.0
        for i in range(n):
            v = abs(k[i, c])
            if v > a:
                a = v
        m[M_KEY + c] = a
    job = carray(int_to_voidptr(jaddr), (JOB_SIZE,), np.int64)
    st = carray(int_to_voidptr(job[J_ST]), (job[J_STR], job[J_STC]), np.float64)
    m[M_GR] = st[S_GR_MAX, 0]


@nb.njit(**JIT)
def tap_stage(ud, stats, x, k, y, n, ch, kch):
    """Main in, key in and output into the tap ring (for the recorder and the loudness
    meters); a block that does not fit is counted, never waited for."""
    if ud[U_TAP_RING] == 0:
        return
    hdr = carray(int_to_voidptr(ud[U_TAP_RING]), (RING_HDR,), np.int64)
    buf = carray(int_to_voidptr(hdr[H_BUF]), (hdr[H_CAP], hdr[H_WIDTH]), np.float32)
    cap = hdr[H_CAP]
    head = hdr[H_HEAD]
    tail = load_acquire(hdr, H_TAIL)
    if cap - (head - tail) >= n:
        for i in range(n):
            jj = (head + i) % cap
            for c in range(ch):
                buf[jj, c] = x[i, c]
            for c in range(kch):
                buf[jj, ch + c] = k[i, c]
            for c in range(ch):
                buf[jj, ch + kch + c] = y[i, c]
        store_release(hdr, H_HEAD, head + n)
    else:
        stats[S_TAP_DROPPED] += 1


@nb.njit(**JIT)
def block_body(inp, has_in, out, n, ud, stats):
    """One piece of at most U_MAXF frames: every stage from the parameter handoff to the tap."""
    ch = ud[U_CH]
    kch = ud[U_KCH]
    frame0 = stats[S_FRAMES]
    take_params(ud, stats, frame0)
    x = carray(int_to_voidptr(ud[U_X]), (n, ch), np.float32)
    k = carray(int_to_voidptr(ud[U_K]), (n, kch if kch > 0 else 1), np.float32)
    y = carray(int_to_voidptr(ud[U_Y]), (n, ch), np.float32)
    input_stage(inp, has_in, n, ud, stats, x, k, ch, kch)
    monitor = load_relaxed(ud, U_MONITOR)
    guard = ud[U_GUARD_STATE]
    jaddr = kernel_stage(ud, n, monitor, guard)
    dl = ud[U_DRY_LEN]
    dry = carray(int_to_voidptr(ud[U_DRY]), (dl, ch), np.float32)
    dpos = ud[U_DRY_POS]
    lat = ud[U_LATENCY]
    if lat >= dl:  # never read outside the dry line (the engine refuses such latencies)
        lat = dl - 1
    swapping, jaddr = swap_stage(ud, stats, x, y, n, ch, monitor, guard, dry, dl, dpos, lat,
                                 frame0, jaddr)
    ud[U_SWAP_ACTIVE] = 1 if swapping else 0
    if ud[U_GUARD_STATE] != guard:  # a completed swap cleared the guard
        guard = ud[U_GUARD_STATE]
    dry_stage(ud, x, y, n, ch, monitor, guard, swapping, dry, dl, dpos, lat, jaddr, kch)
    safe = carray(int_to_voidptr(ud[U_SAFE]), (SAFE_SIZE,), np.float64)
    safety_stage(y, n, ch, safe, load_relaxed(ud, U_MUTE), stats)
    output_stage(ud, y, out, n, ud[U_NOUT], jaddr, safe)
    meter_stage(ud, x, k, y, n, ch, kch, jaddr)
    tap_stage(ud, stats, x, k, y, n, ch, kch)
    store_release(stats, S_FRAMES, frame0 + n)


@nb.njit(**JIT)
def guard_stage(ud, stats, cpu):
    """The overrun guard: a kernel over its budget of the callback's own CPU time for
    U_GUARD_N blocks in a row starts the fade to bypass."""
    if ud[U_GUARD_ON] != 0 and ud[U_GUARD_STATE] == GUARD_OK:
        if cpu > ud[U_BUDGET_NS]:
            ud[U_GUARD_COUNT] += 1
            if ud[U_GUARD_COUNT] >= ud[U_GUARD_N]:
                ud[U_GUARD_POS] = 0
                ud[U_GUARD_STATE] = GUARD_FADING
                stats[S_GUARD_TRIPS] += 1
                stats[S_GUARD_EL] = cpu
        else:
            ud[U_GUARD_COUNT] = 0


@nb.njit(**JIT)
def account_stage(ud, stats, el, cpu, interval, late, status):
    """The callback's own figures: elapsed and CPU time, overruns, the swap blocks, the
    elapsed-time ring."""
    stats[S_EL_LAST] = el
    if el > stats[S_EL_MAX]:
        stats[S_EL_MAX] = el
    if cpu > stats[S_CPU_MAX]:
        stats[S_CPU_MAX] = cpu
    period = stats[S_PERIOD_NS]
    over = 1 if (period > 0 and el > period) else 0
    if over and not late:  # a block that started late was counted already: count once
        stats[S_LATE] += 1
    stats[S_LAST_OVERRUN] = over
    if over:
        ud[U_CYCLE_OVER] = 1
    if status != 0:
        stats[S_FLAGGED] += 1
        stats[S_FLAGS_OR] |= status
    # the blocks of a live swap (and the two after it, whose flags describe it)
    if ud[U_SWAP_ACTIVE] != 0 or ud[U_SWAP_TAIL] > 0:
        if ud[U_SWAP_ACTIVE] == 0:
            ud[U_SWAP_TAIL] -= 1
        stats[S_SWAP_BLOCKS] += 1
        if el > stats[S_SWAP_EL_MAX]:
            stats[S_SWAP_EL_MAX] = el
        if status != 0:
            stats[S_SWAP_FLAGGED] += 1
        if over or late:
            stats[S_SWAP_LATE] += 1
    rl = ud[U_RINGLEN]
    rng = carray(int_to_voidptr(ud[U_ELRING]), (rl, 3), np.int64)
    b = stats[S_BLOCKS] % rl
    rng[b, 0] = el
    rng[b, 1] = interval
    rng[b, 2] = status | (ud[U_SWAP_ACTIVE] << SWAP_BIT) | \
        ((1 if (over or late) else 0) << LATE_BIT)
    stats[S_BLOCKS] += 1


# int cb(const void* input, void* output, unsigned long frameCount,
#        const PaStreamCallbackTimeInfo* timeInfo, PaStreamCallbackFlags statusFlags,
#        void* userData)      -- unsigned long: 64-bit on the LP64 platforms the engine accepts
#                                (livedyn.engine.intrinsics refuses the others at import)
CB_SIG = types.intc(types.voidptr, types.voidptr, types.uint64, types.voidptr, types.uint64,
                    types.voidptr)


@nb.cfunc(CB_SIG, nopython=True, error_model="numpy", cache=True)
def native_callback(inp_ptr, out_ptr, frames, time_info, status, user):
    t0 = monotonic_ns()
    ud = carray(user, (UD_SIZE,), np.int64)
    # the guard's clock is a real system call on Linux (not the vDSO): read only when it is on
    guarded = ud[U_GUARD_ON] != 0
    c0 = thread_cpu_ns() if guarded else 0
    stats = carray(int_to_voidptr(ud[U_STATS]), (STATS_SIZE,), np.int64)
    n = np.int64(frames)
    nout = ud[U_NOUT]
    nin = ud[U_NIN]
    w_in = nin if nin > 0 else 1
    maxf = ud[U_MAXF]
    interval, late = timing_stage(ud, stats, t0)
    has_in = voidptr_to_int(inp_ptr) != 0
    if n > maxf:  # more than the arrays hold: processed in pieces, counted
        stats[S_TOO_BIG] += 1
    off = 0
    while off < n:
        m = n - off if n - off < maxf else maxf
        if has_in:
            inp = carray(int_to_voidptr(voidptr_to_int(inp_ptr) + 4 * off * nin), (m, w_in),
                         np.float32)
        else:  # no input buffer: never read (has_in is False); any array of the right type
            inp = carray(int_to_voidptr(ud[U_X]), (1, 1), np.float32)
        out = carray(int_to_voidptr(voidptr_to_int(out_ptr) + 4 * off * nout), (m, nout),
                     np.float32)
        block_body(inp, has_in, out, m, ud, stats)
        off += m
    # the canary: a test-only switch that overruns the budget on purpose
    every = ud[U_CANARY_EVERY]
    if every > 0 and (stats[S_BLOCKS] + 1) % every == 0:
        stats[S_CANARY] += 1
        _spin_ns(ud[U_CANARY_NS])
    cpu = thread_cpu_ns() - c0 if guarded else 0
    guard_stage(ud, stats, cpu)
    el = monotonic_ns() - t0
    account_stage(ud, stats, el, cpu, interval, late, np.int64(status))
    ud[U_T_END] = monotonic_ns()
    return 0  # paContinue
