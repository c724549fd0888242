"""The kernel sweep of ``livedyn bench kernels``: block sizes, channel counts, sample rates.

Three axes, each around the reference point (stereo, 48 kHz, block 64) rather than their full
product, so that a full run stays within minutes on a 2-core machine:

* block sizes 16 to 4096 (stereo, 48 kHz),
* 1, 2 and 8 channels (block 64, 48 kHz),
* 44.1, 48 and 96 kHz (stereo, block 64).

Every row is checked against the Python twin (and the C twin where a compiler exists) before it
is timed (livedyn.bench.kernels.run_kernels). Each row also says how many instances would fit in one
core at 70 % load: ``floor(0.7 * (1e9 / fs) / ns_per_frame)`` (common practice, no source: keep
30 % of a core for the rest of the system).
"""
from __future__ import annotations

import math

BLOCKSIZES = (16, 32, 64, 128, 256, 512, 1024, 2048, 4096)
QUICK_BLOCKSIZES = (64, 1024)
CHANNELS = (1, 2, 8)
RATES = (44100, 48000, 96000)
CORE_SHARE = 0.7


def instances_per_core(ns_per_frame, samplerate, share=CORE_SHARE):
    """How many instances fit in ``share`` of one core (0 when one does not)."""
    if not ns_per_frame or ns_per_frame <= 0:
        return None
    return int(math.floor(share * (1e9 / samplerate) / ns_per_frame))


def run_sweep(quick=False, out=print, progress=None, ctwin=True, wide=False):
    """All three axes; returns the rows of livedyn.bench.kernels.run_kernels with an ``axis`` and an
    ``instances_per_core`` key added."""
    from .kernels import run_kernels

    plan = [("blocksize", dict(blocksizes=QUICK_BLOCKSIZES if quick else BLOCKSIZES,
                               channels=2, samplerate=48000))]
    if not quick:
        plan += [("channels", dict(blocksizes=(64,), channels=c, samplerate=48000))
                 for c in CHANNELS if c != 2]
        plan += [("samplerate", dict(blocksizes=(64,), channels=2, samplerate=r))
                 for r in RATES if r != 48000]
    rows = []
    for axis, kw in plan:
        got = run_kernels(quick=quick, out=out, ctwin=ctwin, wide=wide,
                          seconds=(0.5 if quick else 1.5), **kw,
                          **({} if progress is None else {"progress": progress}))
        for r in got:
            r["axis"] = axis
            r["instances_per_core"] = instances_per_core(r.get("numba_ns_per_frame"),
                                                         r["samplerate"])
        rows += got
    if out:
        out("")
        out(f"instances of each algorithm that fit in {int(100 * CORE_SHARE)} % of one core:")
        for r in rows:
            if r.get("instances_per_core") is not None:
                out(f"  {r['case']:24} block {r['blocksize']:5} {r['channels']} ch "
                    f"{r['samplerate']:g} Hz: {r['instances_per_core']}")
    return rows
