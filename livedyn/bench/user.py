"""A user algorithm file's cost beside the built-in compressor (``bench kernels --algorithm``).

The baseline is the built-in compressor kernel with the file's values of livedyn's parameters
and the stages the file leaves out left in: a file with only ``gain_curve`` is set against the
compressor running its built-in curve with the same detector, ballistics, lookahead and makeup
(:func:`livedyn.bench.bare._shared_params`). Both run the same signal (seeded noise bursts, see
:func:`livedyn.bench.kernels.noise_bursts`) through the same numba block driver, from fresh
state, in interleaved rounds so that machine noise hits both alike, in every precision the
Processor offers. Each figure is the median over the rounds of ns per frame; the stage's own
cost is the median of the per-round differences (file minus baseline) with their spread.
"""
from __future__ import annotations

import numpy as np

from .bare import PRECISIONS, Run, _diff, _shared_params, make_processor
from .kernels import machine_info, noise_bursts


def run_user(path, blocksizes=(64, 1024), channels=2, samplerate=48000, seconds=2.0, rounds=7,
             baseline="compressor", quick=False, precisions=None):
    """Rows of {algorithm, precision, blocksize, ns_per_frame, ns_min, ns_max,
    share_of_real_time, over_baseline}, the user file first, then the baseline, per precision
    and block size; and ``stage`` rows of {precision, blocksize, diff_ns, diff_min, diff_max,
    diff_q1, diff_q3}: the file's stage cost over the baseline."""
    from livedyn.loader import get

    if quick:
        seconds, rounds = 0.5, 3
    user = get(str(path))  # float64 here; make_processor loads it again in float32
    base = get(baseline)
    frames = int(seconds * samplerate)
    rows, stage, sets = [], [], []
    precisions = tuple(precisions or PRECISIONS)
    for prec in precisions:
        for bs in blocksizes:
            n = max(bs, frames // bs * bs)
            x = noise_bursts(7, n, channels, samplerate)
            up = make_processor(user, samplerate, channels, 0, prec)
            bp = make_processor(base, samplerate, channels, 0, prec)
            runs = {"user": Run(None, x, x, bs, up),
                    "base": Run(None, x, x, bs, bp, p=_shared_params(up.p, bp.p))}
            for r in runs.values():
                r.run(record=False)  # compile the driver for this kernel
            sets.append((prec, bs, runs))
    for _ in range(rounds):
        for _, _, runs in sets:
            for r in runs.values():
                r.run()
    for prec, bs, runs in sets:
        med = {k: float(np.median(r.ns)) for k, r in runs.items()}
        for label, alg in (("user", user), ("base", base)):
            t = runs[label].ns
            rows.append({"algorithm": alg.name if label == "base" else f"{alg.name} ({path})",
                         "precision": prec, "blocksize": bs, "channels": channels,
                         "samplerate": samplerate, "ns_per_frame": med[label],
                         "ns_min": float(min(t)), "ns_max": float(max(t)),
                         "share_of_real_time": med[label] * samplerate / 1e9,
                         "over_baseline": med[label] / med["base"]})
        stage.append({"precision": prec, "blocksize": bs,
                      **_diff(runs["user"], runs["base"])})
    return {"rows": rows, "stage": stage, "machine": machine_info(), "rounds": rounds,
            "seconds": seconds, "baseline": baseline, "precisions": list(precisions)}


def format_user(result):
    rows = result["rows"]
    out = [f"{'algorithm':<36} {'prec':<8}{'block':>5} {'ns/frame':>9} {'min':>8} {'max':>8} "
           f"{'% real time':>11} {'x ' + result['baseline']:>14}"]
    for r in rows:
        out.append(f"{r['algorithm'][:36]:<36} {r['precision']:<8}{r['blocksize']:>5} "
                   f"{r['ns_per_frame']:>9.1f} {r['ns_min']:>8.1f} {r['ns_max']:>8.1f} "
                   f"{100 * r['share_of_real_time']:>11.3f} {r['over_baseline']:>14.2f}")
    out.append(f"({rows[0]['channels']} channels, {rows[0]['samplerate'] / 1000:g} kHz, median "
               f"of {result['rounds']} interleaved rounds of {result['seconds']:g} s each)")
    out.append("")
    out.append(f"the file's stages over the {result['baseline']} with the stages it leaves out "
               "(ns per frame, per-round differences):")
    out.append(f"{'prec':<8}{'block':>6}{'stage ns/fr':>12}{'[min-max]':>18}{'[q1-q3]':>18}")
    for s in result["stage"]:
        out.append(f"{s['precision']:<8}{s['blocksize']:>6}{s['diff_ns']:>12.1f}"
                   f"{'[%.1f, %.1f]' % (s['diff_min'], s['diff_max']):>18}"
                   f"{'[%.1f, %.1f]' % (s['diff_q1'], s['diff_q3']):>18}")
    return "\n".join(out)
