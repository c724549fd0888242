"""A user algorithm file's cost beside the built-in compressor (``bench kernels --algorithm``).

Both run the same signal (seeded noise bursts, see :func:`livedyn.bench.kernels.noise_bursts`) through
the same numba block driver, from fresh state, in interleaved rounds so that machine noise hits
both alike; each figure is the median over the rounds of ns per frame.
"""
from __future__ import annotations

import time

import numpy as np

from .kernels import drive, machine_info, noise_bursts


def _setup(alg, samplerate, channels, frames):
    from livedyn.processor import Processor

    proc = Processor(alg, samplerate, channels)
    x = noise_bursts(7, frames, channels, samplerate)
    return proc, x


def run_user(path, blocksizes=(64, 1024), channels=2, samplerate=48000, seconds=2.0, rounds=7,
             baseline="compressor", quick=False):
    """Rows of {algorithm, blocksize, ns_per_frame, ns_min, ns_max, share_of_real_time,
    over_baseline}; the user file first, then the baseline, per block size."""
    from livedyn.loader import get

    if quick:
        seconds, rounds = 0.5, 3
    user = get(str(path))
    base = get(baseline)
    frames = int(seconds * samplerate)
    rows = []
    for bs in blocksizes:
        n = max(bs, frames // bs * bs)
        runs = {}
        for label, alg in (("user", user), ("base", base)):
            proc, x = _setup(alg, samplerate, channels, n)
            out = np.zeros_like(x)
            p0, st0, ring0 = proc.p.copy(), proc.st.copy(), proc.ring.copy()
            runs[label] = [proc, x, out, p0, st0, ring0, []]
            drive(proc._kernel, x[:bs], x[:bs], out[:bs], proc.p, proc.st, proc.ring,
                  proc._no_trace, bs)  # compile the driver for this kernel
        for _ in range(rounds):
            for label in ("user", "base"):
                proc, x, out, p0, st0, ring0, times = runs[label]
                proc.p[:], proc.st[:], proc.ring[:] = p0, st0, ring0
                t0 = time.perf_counter_ns()
                done = drive(proc._kernel, x, x, out, proc.p, proc.st, proc.ring, proc._no_trace,
                             bs)
                times.append((time.perf_counter_ns() - t0) / done)
        med = {k: float(np.median(v[-1])) for k, v in runs.items()}
        for label, alg in (("user", user), ("base", base)):
            t = runs[label][-1]
            rows.append({"algorithm": alg.name if label == "base" else f"{alg.name} ({path})",
                         "blocksize": bs, "channels": channels, "samplerate": samplerate,
                         "ns_per_frame": med[label], "ns_min": float(min(t)),
                         "ns_max": float(max(t)),
                         "share_of_real_time": med[label] * samplerate / 1e9,
                         "over_baseline": med[label] / med["base"]})
    return {"rows": rows, "machine": machine_info(), "rounds": rounds, "seconds": seconds,
            "baseline": baseline}


def format_user(result):
    rows = result["rows"]
    out = [f"{'algorithm':<44} {'block':>5} {'ns/frame':>9} {'min':>8} {'max':>8} "
           f"{'% real time':>11} {'x ' + result['baseline']:>14}"]
    for r in rows:
        out.append(f"{r['algorithm'][:44]:<44} {r['blocksize']:>5} {r['ns_per_frame']:>9.1f} "
                   f"{r['ns_min']:>8.1f} {r['ns_max']:>8.1f} "
                   f"{100 * r['share_of_real_time']:>11.3f} {r['over_baseline']:>14.2f}")
    out.append(f"({rows[0]['channels']} channels, {rows[0]['samplerate'] / 1000:g} kHz, median "
               f"of {result['rounds']} interleaved rounds of {result['seconds']:g} s each)")
    return "\n".join(out)
