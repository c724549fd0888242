"""Load-time checks of a user algorithm, on test signals livedyn synthesises.

They run the compiled file through a :class:`~livedyn.processor.Processor`, so they sit above
it; :mod:`livedyn.loader` calls them after :mod:`livedyn.algorithms.user` has compiled a file.

In order, each reported as one line (``Algorithm.report``):

1. bounds: every stage of the file is compiled again with bounds checking on and run on test
   input; an out-of-bounds index refuses the file, naming the stage.
2. allocation: a stage that allocates on the heap per call is reported (allocation is not
   real-time safe; declare STATE instead). Reported, not refused.
3. finite: the whole algorithm, inside livedyn's pipeline, on the test programme (silence, sine
   steps from -80 to 0 dBFS, noise bursts, clicks, a full-scale square) with the key taken from
   the main input and, when the file has a key parameter, from a separate key signal. Any NaN
   or infinity in the output refuses it.
4. boost: stages inside the built-in pipeline: the smoothed gain (before makeup) must stay at or
   below 0 dB. A whole kernel: each 1 ms window of output may not peak above the makeup gain
   times the input's peak over the same window widened by the declared latency and one window
   either side. Refused unless the file declares ``BOOST = True``.
5. block size: the output for host blocks of 1, 7, 64 and 1000 frames must equal the output of
   one block to within 1e-6 (-120 dBFS). A file that declares ``BLOCK`` (its own frame size) is
   accepted and reported as block-based instead; otherwise a difference refuses it.
6. time per frame (measured before checks 3-5, so that a file far too slow is refused at
   once; reported last): the file and the built-in compressor are timed in the same check, in
   interleaved passes at 1024-frame blocks, stereo (the median of five each), and the file's
   cost is judged as a ratio to the compressor's, so that a machine busy with other work (which
   slows both alike) cannot refuse a good file. More than MAX_OVER_COMPRESSOR times the
   compressor refuses it. The report also gives ns per frame and the share of real time at the
   check's sample rate.
"""
from __future__ import annotations

import dataclasses
import time

import numpy as np

from .algorithms.user import STAGES, UserAlgorithmError, jit_of
from .processor import Processor

#: A file may cost this many times the built-in compressor, timed in the same check. Common
#: practice, no source: a live swap runs the old and the new version together for its
#: crossfade, so each should leave half of the block budget, about 25 % of one core's real time
#: at 48 kHz stereo; where this was chosen the compressor measured 57-81 ns per frame
#: (1024-frame blocks), so 80 times it is 4.6 to 6.5 us per frame, 22 to 31 % of real time.
MAX_OVER_COMPRESSOR = 80.0
#: The share of real time the limit stood for (reported beside the ratio; not a test).
MAX_SHARE = 0.25
INVARIANCE_TOL = 1e-6
BLOCKS = (1, 7, 64, 1000)
FS = 48000.0


def test_programme(fs=FS, channels=2, seed=1):
    """Main and key test signals, float32 (frames, channels) and (frames, 1): about 2.2 s."""
    rng = np.random.default_rng(seed)
    seg = int(0.15 * fs)
    t = np.arange(seg) / fs
    parts = [np.zeros(seg)]
    for db in (-80, -50, -30, -18, -9, -3, 0):
        parts.append(10 ** (db / 20) * np.sin(2 * np.pi * 997 * t))
    parts.append(0.5 * rng.standard_normal(seg))
    parts.append(np.zeros(seg))
    clicks = np.zeros(seg)
    clicks[::int(0.03 * fs)] = 0.99
    parts.append(clicks)
    parts.append(np.sign(np.sin(2 * np.pi * 113 * t)) * 1.0)
    parts.append(0.05 * rng.standard_normal(seg))
    main = np.concatenate(parts)
    x = np.stack([main * (1.0 if c % 2 == 0 else 0.7) for c in range(channels)], axis=1)
    # key: speech-like bursts of a band of noise, on and off every 0.3 s
    n = len(main)
    env = ((np.arange(n) // int(0.3 * fs)) % 2 == 1).astype(float)
    key = env * 0.3 * rng.standard_normal(n)
    return np.clip(x, -1, 1).astype(np.float32), key[:, None].astype(np.float32)


def check_algorithm(alg, samplerate=FS):
    """Run every check; return ``alg`` with its report, or raise UserAlgorithmError."""
    path = alg.source
    lines = [f"compiles in nopython mode: {', '.join(alg.stages)}"]
    x, key = test_programme(samplerate)

    # 1. bounds-checked pass, 2. allocation
    _bounds_pass(alg, x, key, samplerate)
    lines.append("bounds-checked pass: no out-of-bounds access (parameters at their defaults, "
                 "lowest and highest" + ("; mono and stereo, key 1 or 2 channels)"
                                         if alg.kind == "user" else ")"))
    alloc = _allocates(alg)
    lines.append("allocation: " + (f"{', '.join(alloc)} allocate(s) on the heap per call "
                                   "(not real-time safe: declare STATE instead)" if alloc
                                   else "none per call"))
    # 6. (timed now, reported last) a file far too slow is refused before the long passes
    speed = speed_verdict(path, *time_against_compressor(alg, samplerate), samplerate)

    configs = [("main", None)]
    if "key" in alg.schema:
        configs.append(("external", key))
    for keymode, k in configs:
        proc = Processor(alg, samplerate, x.shape[1], key_channels=1 if k is not None else 0)
        if "key" in alg.schema:
            proc.set("key", keymode)
        ref, gain_db = _run(proc, x, k, None, traced=alg.kind != "user")
        # 3. finite
        bad = ~np.isfinite(ref)
        if bad.any():
            i = int(np.argwhere(bad)[0][0])
            hint = "; does the kernel write every out[n, c]?" if alg.kind == "user" else ""
            raise UserAlgorithmError(f"{path}: refused: output is not finite (first at "
                                     f"{i / samplerate:.3f} s of the test signal, key "
                                     f"{keymode}{hint})")
        # 4. boost
        over = _boost(alg, proc, x, ref, gain_db, samplerate)
        if over is not None and not alg.boost:
            db, i = over
            raise UserAlgorithmError(f"{path}: refused: gain {db:+.2f} dB above makeup at "
                                     f"{i / samplerate:.3f} s of the test signal (declare "
                                     "BOOST = True if that is intended)")
        # 5. block size
        worst = 0.0
        for b in BLOCKS:
            proc.reset()
            y, _ = _run(proc, x, k, b)
            d = float(np.max(np.abs(y.astype(np.float64) - ref))) if len(y) else 0.0
            if not np.isfinite(d):
                d = float("inf")
            worst = max(worst, d)
        if keymode == "main":
            lines.append("finite output: yes, on silence, sine steps to 0 dBFS, noise, clicks "
                         "and a full-scale square")
            if over is None:
                lines.append("gain above makeup: none")
            else:
                lines.append(f"gain above makeup: {over[0]:+.2f} dB (declared: BOOST = True)")
        if worst > INVARIANCE_TOL:
            if alg.block:
                lines.append(f"block size: block-based, frame {alg.block}, latency "
                             f"{alg.latency} samples (declared); output depends on the host "
                             f"block (up to {worst:.2g})")
            else:
                raise UserAlgorithmError(
                    f"{path}: refused: output depends on the host block size (differs by "
                    f"{worst:.3g} between blocks of {', '.join(map(str, BLOCKS))} and one "
                    "block; keep state per sample, or declare BLOCK and LATENCY)")
        elif keymode == "main":
            exact = worst == 0.0
            lines.append(f"block size: {'bit-identical' if exact else f'within {worst:.1g}'} "
                         f"for blocks of {', '.join(map(str, BLOCKS))} frames"
                         + (f"; block-based, frame {alg.block}, latency {alg.latency} samples "
                            "(declared)" if alg.block else ""))

    # 6. time per frame, as a ratio to the built-in compressor timed alongside (timed above)
    lines.append(speed)
    return dataclasses.replace(alg, report=tuple(lines))


def _run(proc, x, key, block, traced=False):
    """Output (float64) and, when traced, the smoothed gain in dB, for blocks of ``block``."""
    n = len(x)
    step = n if block is None else block
    out = np.empty((n, x.shape[1]), np.float64)
    gains = []
    for i in range(0, n, step):
        xb = x[i:i + step]
        kb = key[i:i + step] if key is not None else None
        if traced:
            yb, tr = proc.process_traced(xb, kb)
            gains.append(tr["gain_db"])
        else:
            yb = proc.process(xb, kb)
        out[i:i + len(xb)] = yb
    return out, (np.concatenate(gains) if gains else None)


def _boost(alg, proc, x, y, gain_db, fs):
    """(largest boost in dB, frame) or None."""
    if alg.kind != "user":
        if gain_db is None or len(gain_db) == 0:
            return None
        m = float(np.max(gain_db))
        if m > 1e-3:
            return m, int(np.argmax(np.max(gain_db, axis=1)))
        return None
    mk = 0.0
    if "makeup" in alg.schema:
        mk = proc.get("makeup")
    lim = 10 ** (mk / 20) * 10 ** (0.01 / 20)  # 0.01 dB for rounding
    w = max(1, int(fs / 1000))
    lat = alg.latency + (alg.block or 0)
    a_in = np.max(np.abs(x.astype(np.float64)), axis=1)
    a_out = np.max(np.abs(y), axis=1)
    n = len(a_in)
    nw = (n + w - 1) // w
    pad = nw * w - n
    win_in = np.pad(a_in, (0, pad)).reshape(nw, w).max(axis=1)
    win_out = np.pad(a_out, (0, pad)).reshape(nw, w).max(axis=1)
    spread = lat // w + 2
    allowed = np.zeros(nw)
    for i in range(nw):
        lo = max(0, i - spread)
        allowed[i] = win_in[lo:i + 2].max()
    bad = win_out > lim * allowed + 1e-6
    if bad.any():
        i = int(np.argmax(bad))
        ratio = win_out[i] / max(allowed[i], 1e-12)
        return 20 * np.log10(ratio) - mk, i * w
    return None


def _bounds_pass(alg, x, key, fs):
    """Run each stage compiled with bounds checking on; an IndexError refuses the file."""
    path = alg.source
    mod = alg.module

    from numba.core.registry import CPUDispatcher

    proc = Processor(alg, fs, x.shape[1], warm=False)  # nothing unchecked runs before this pass
    p = proc.p.copy()
    ns = max(alg.state_size, 0)
    # the file's own numba helpers are bounds-checked too: while the stages compile, the
    # module's names point at bounds-checked copies of them (made once, shared by the stages)
    saved = {k: v for k, v in vars(mod).items() if isinstance(v, CPUDispatcher)}
    checked = {}
    try:
        vars(mod).update({k: jit_of(v, boundscheck=True) for k, v in saved.items()
                          if k not in STAGES})
        for stage in alg.stages:
            try:
                checked[stage] = jit_of(getattr(mod, stage), boundscheck=True)
                checked[stage].compile(_stage_sig(stage, ns))
            except Exception as e:  # pragma: no cover (it compiled a moment ago without)
                from .algorithms.user import compile_error

                raise compile_error(path, stage, e) from None
    finally:
        vars(mod).update(saved)
    for stage, bc in checked.items():
        what = "parameters at their defaults"
        try:
            for label, pv in _param_sets(alg, p):
                what = f"parameters at {label}"
                if stage == "kernel":
                    # mono and stereo, a mono key and a key as wide as the main input
                    for ch, kw in ((1, 1), (2, 1), (2, 2)):
                        xs = np.ascontiguousarray(x[:4800, :ch])
                        ks = np.ascontiguousarray(key[:4800, :1] if kw == 1 and ch > 1
                                                  else x[:4800, :kw])
                        s = np.zeros((max(ch, kw, 12), ns))
                        out = np.zeros_like(xs)
                        what = f"{ch} channel(s), key width {kw}, parameters at {label}"
                        for i in range(0, len(xs), 64):
                            bc(xs[i:i + 64], ks[i:i + 64], out[i:i + 64], pv, s)
                elif stage == "gain_curve":
                    levels = np.concatenate([np.linspace(-200, 30, 461), [-np.inf, np.inf]])
                    _drive_curve(bc, levels, pv)
                else:
                    s = np.zeros(ns)
                    if stage == "detector":
                        v = np.concatenate([x[::16, 0], key[::16, 0]]).astype(np.float64)
                    else:
                        v = np.concatenate([np.linspace(0, -60, 2400), np.full(1200, -60.0),
                                            np.linspace(-60, 0, 2400), np.zeros(1200)])
                    _drive_stage(bc, v, pv, s)
        except IndexError as e:
            raise UserAlgorithmError(f"{path}: refused: {stage} reads or writes out of bounds "
                                     f"with {what} ({e}; STATE declares {ns} slot(s) per "
                                     "channel)") from None
        except Exception as e:
            raise UserAlgorithmError(f"{path}: refused: {stage} raised {type(e).__name__}: {e}"
                                     f" with {what}") from None


def _param_sets(alg, p):
    """The parameter array at the defaults, then with every parameter at its lowest and at its
    highest value (an index or a loop bound made from a parameter is checked at its ends)."""
    yield "their defaults", p
    for end in ("lowest", "highest"):
        q = p.copy()
        for prm in alg.schema:
            if prm.taper == "choice":
                q[prm.slot] = 0 if end == "lowest" else len(prm.choices) - 1
            else:
                q[prm.slot] = prm.lo if end == "lowest" else prm.hi
        yield f"their {end}", q


def _stage_sig(stage, ns):
    from numba import types

    f64v = types.Array(types.float64, 1, "C")
    if stage == "kernel":
        f32 = types.Array(types.float32, 2, "C")
        return (f32, f32, f32, f64v, types.Array(types.float64, 2, "C"))
    if stage == "gain_curve":
        return (types.float64, f64v)
    return (types.float64, f64v, f64v)


def _drive_curve(fn, levels, p):
    for v in levels:
        fn(float(v), p)


def _drive_stage(fn, v, p, s):
    # called from Python, sample by sample: compiling a numba driver per file costs seconds
    for x in v:
        fn(float(x), p, s)


def _allocates(alg):
    """Stages whose compiled code calls the numba runtime's allocator."""
    found = []
    for stage, cf in (("gain_curve", alg.user_curve), ("detector", alg.user_detector),
                      ("smoother", alg.user_smoother), ("kernel", alg.user_job)):
        if cf is None:
            continue
        try:
            ir = cf.inspect_llvm()
        except Exception:  # pragma: no cover
            continue
        if "NRT_MemInfo_alloc" in ir or "NRT_Allocate" in ir:
            found.append(stage)
    return found


def time_per_frame(alg, fs=FS, channels=2, block=1024, seconds=0.5, repeats=5):
    """Median ns per frame of the algorithm's kernel on noise, called at ``block`` frames."""
    proc = Processor(alg, fs, channels)
    rng = np.random.default_rng(3)
    n = int(seconds * fs) // block * block
    x = (0.3 * rng.standard_normal((n, channels))).astype(np.float32)
    out = np.empty_like(x)
    kern, p, st, ring, tr = proc._kernel, proc.p, proc.st, proc.ring, proc._no_trace
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter_ns()
        for i in range(0, n, block):
            xb = x[i:i + block]
            kern(xb, xb, out[i:i + block], p, st, ring, tr)
        times.append((time.perf_counter_ns() - t0) / n)
    return float(np.median(times))


def time_against_compressor(alg, fs=FS, channels=2, block=1024, seconds=0.5, repeats=5):
    """``(file ns, compressor ns)`` per frame: medians of interleaved passes of the algorithm's
    kernel and the built-in compressor's on the same noise, so that both see the same load."""
    from . import algorithms

    mine, ref = [], []
    comp = algorithms.get("compressor")
    for _ in range(repeats):
        ref.append(time_per_frame(comp, fs, channels, block, seconds, repeats=1))
        mine.append(time_per_frame(alg, fs, channels, block, seconds, repeats=1))
        if mine[-1] > 4 * MAX_OVER_COMPRESSOR * ref[-1]:
            break  # far over the limit: more passes cannot change the verdict
    return float(np.median(mine)), float(np.median(ref))


def speed_verdict(path, ns, ref_ns, fs=FS):
    """The report line of the time check, or UserAlgorithmError when ``ns`` is more than
    :data:`MAX_OVER_COMPRESSOR` times ``ref_ns`` (the compressor timed in the same check)."""
    ratio = ns / max(ref_ns, 1e-9)
    share = ns * fs / 1e9
    if ratio > MAX_OVER_COMPRESSOR:
        raise UserAlgorithmError(
            f"{path}: refused: too slow for live use: {ns:.0f} ns per frame is {ratio:.0f} "
            f"times the built-in compressor timed alongside ({ref_ns:.0f} ns; limit "
            f"{MAX_OVER_COMPRESSOR:g} times, about {100 * MAX_SHARE:.0f} % of real time: a live "
            "swap runs two versions)")
    return (f"time per frame: {ns:.0f} ns at 1024-frame blocks, stereo, {ratio:.1f} times the "
            f"built-in compressor timed alongside ({100 * share:.2f} % of real time at "
            f"{fs / 1000:g} kHz)")


__all__ = ["check_algorithm", "time_per_frame", "time_against_compressor", "speed_verdict",
           "test_programme", "MAX_OVER_COMPRESSOR", "MAX_SHARE", "STAGES"]
