"""The precision audit: one setting run in float64 and in float32, and what differs.

``audit(setup)`` runs the same settings through a float64 and a float32 Processor (see
:mod:`livedyn.dsp.precision`) over the load checks' synthesised test programme
(:func:`livedyn.checks.test_programme`) and over any WAV files given, traced, and reports per
signal the largest and the rms difference of the applied gain (dB) and of the output (as a
level, dBFS), where the gain difference is worst (the time, and the part of the test
programme), and the largest difference of each traced stage, so that a reader can see where it
grows (a release whose pole lies near 1.0 is the usual place: its one-pole step
``a y + (1 - a) x`` loses the small ``1 - a`` to rounding first).

:data:`BOUND_DB` is the bound the README states for the built-ins at their shipped presets.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .checks import test_programme

#: Largest gain difference (dB) between float32 and float64 that the built-ins at their shipped
#: presets stay within (a bound of our own: a tenth of the smallest step a console nudges a
#: gain parameter by is 0.01 dB; common practice, no source, takes 0.1 dB as inaudible).
BOUND_DB = 0.01

#: The parts of the test programme, 0.15 s each (see livedyn.checks.test_programme).
PROGRAMME_PARTS = ("silence", "sine -80 dBFS", "sine -50 dBFS", "sine -30 dBFS",
                   "sine -18 dBFS", "sine -9 dBFS", "sine -3 dBFS", "sine 0 dBFS", "noise",
                   "silence", "clicks", "square 113 Hz", "quiet noise")
PART_SECONDS = 0.15

#: Traced stages compared (livedyn.dsp.layout.TRACE_NAMES), in signal order, with the level
#: below which a detector difference is not counted (a level at the -200 dB floor in one
#: precision and a little above it in the other is no difference a listener has).
STAGES = ("detector_db", "curve_db", "gain_db", "total_gain_db")
DETECTOR_FLOOR_DB = -120.0


@dataclass
class SignalAudit:
    signal: str
    seconds: float
    gain_max_db: float | None  # None: a whole user kernel has no gain trace
    gain_rms_db: float | None
    out_max_dbfs: float
    out_rms_dbfs: float
    worst_s: float | None
    worst_part: str
    stages: dict = field(default_factory=dict)  # stage -> largest difference, dB
    diff_gain: np.ndarray | None = None  # per frame (largest over gain channels)
    diff_out: np.ndarray | None = None  # per frame |y64 - y32| (largest over channels)

    @property
    def within(self) -> bool:
        return self.gain_max_db is None or self.gain_max_db <= BOUND_DB

    @property
    def flipped(self) -> bool:
        """The gain computer's output differs by far more than its input: a decision (a gate
        opening, a knee edge) went the other way, because the level sat within rounding of
        a threshold. A difference of timing, not of the gain law."""
        det = self.stages.get("detector_db")
        cur = self.stages.get("curve_db")
        return det is not None and cur is not None and cur > 1.0 and det < 0.01


@dataclass
class Audit:
    label: str
    samplerate: float
    rows: list

    @property
    def gain_max_db(self):
        vals = [r.gain_max_db for r in self.rows if r.gain_max_db is not None]
        return max(vals) if vals else None

    @property
    def within(self) -> bool:
        return all(r.within for r in self.rows)


def _db(v):
    return 20.0 * math.log10(v) if v > 1e-30 else -math.inf


def _part(t):
    i = int(t // PART_SECONDS)
    return PROGRAMME_PARTS[i] if 0 <= i < len(PROGRAMME_PARTS) else ""


def _run(proc, x, key, blocksize):
    outs, traces = [], []
    for i in range(0, len(x), blocksize):
        y, tr = proc.process_traced(x[i:i + blocksize],
                                    None if key is None else key[i:i + blocksize])
        outs.append(y)
        traces.append(tr)
    tr = {k: np.concatenate([t[k] for t in traces]) for k in traces[0]} if traces else {}
    return np.concatenate(outs), tr


def compare(make, x, key, signal, samplerate, blocksize=1024, programme=False):
    """One signal through ``make("float64")`` and ``make("float32")`` (fresh Processors)."""
    p64, p32 = make("float64"), make("float32")
    y64, t64 = _run(p64, x, key, blocksize)
    y32, t32 = _run(p32, x, key, blocksize)
    dy = np.abs(y64.astype(np.float64) - y32.astype(np.float64)).max(axis=1)
    user_kernel = p64.algorithm.kind == "user"
    row = SignalAudit(signal, len(x) / samplerate, None, None, _db(float(dy.max())),
                      _db(float(np.sqrt(np.mean(dy ** 2)))), None, "")
    row.diff_out = dy
    if not user_kernel:
        dg = np.abs(t64["total_gain_db"] - t32["total_gain_db"]).max(axis=1)
        row.gain_max_db = float(dg.max())
        row.gain_rms_db = float(np.sqrt(np.mean(dg ** 2)))
        i = int(np.argmax(dg))
        row.worst_s = i / samplerate
        row.worst_part = _part(row.worst_s) if programme else ""
        row.diff_gain = dg
        live = t64["detector_db"] > DETECTOR_FLOOR_DB
        for stage in STAGES:
            d = np.abs(t64[stage] - t32[stage])
            if stage == "detector_db":
                d = np.where(live, d, 0.0)
            row.stages[stage] = float(d.max()) if d.size else 0.0
    return row


def audit(setup, samplerate=48000.0, channels=2, inputs=(), key_path=None, blocksize=1024):
    """Audit a :class:`livedyn.render.Setup` (algorithm, preset, settings) over the test
    programme and each WAV file of ``inputs`` (with ``key_path`` as their key when the
    algorithm takes one). A precision the setup asks for is left out: both are run. Returns
    an :class:`Audit`."""
    from dataclasses import replace
    from pathlib import Path

    from .render import build_processor
    from .wavio import read_wav

    setup = replace(setup, precision=None, settings=[
        s for s in setup.settings if s[0].strip().lower() != "precision"])
    probe = build_processor(replace(setup, precision="float64"), samplerate, channels)
    keyed = "key" in probe.schema and probe.algorithm.needs_key

    def maker(fs, ch, kch):
        return lambda precision: build_processor(replace(setup, precision=precision), fs, ch,
                                                 kch)

    rows = []
    x, key = test_programme(samplerate, channels)
    rows.append(compare(maker(samplerate, channels, 1 if keyed else 0), x,
                        key if keyed else None, "test programme", samplerate, blocksize,
                        programme=True))
    key_data = read_wav(key_path) if key_path else None
    for path in inputs:
        data, fs = read_wav(path)
        k = None
        if key_data is not None and keyed:
            k = key_data[0][:len(data)]
            if len(k) < len(data):
                k = np.concatenate([k, np.zeros((len(data) - len(k), k.shape[1]), np.float32)])
        rows.append(compare(maker(fs, data.shape[1], 0 if k is None else k.shape[1]), data, k,
                            str(path), fs, blocksize))
    label = setup.preset or setup.algorithm or probe.algorithm.name
    if str(label).endswith(".py"):
        label = Path(label).name
    return Audit(str(label), samplerate, rows)


def format_audit(a: Audit) -> str:
    lines = [f"precision audit: {a.label}, float32 against float64 (bound {BOUND_DB:g} dB "
             "of gain)"]
    head = (f"  {'signal':<22} {'gain max':>10} {'gain rms':>10} {'out max':>11} "
            f"{'out rms':>11}  worst at")
    lines.append(head)
    for r in a.rows:
        g = (f"{r.gain_max_db:8.5f}dB {r.gain_rms_db:8.5f}dB" if r.gain_max_db is not None
             else f"{'n/a':>10} {'n/a':>10}")
        where = ""
        if r.worst_s is not None:
            where = f"{r.worst_s:.3f} s" + (f" ({r.worst_part})" if r.worst_part else "")
        name = r.signal if len(r.signal) <= 22 else "..." + r.signal[-19:]
        lines.append(f"  {name:<22} {g} {r.out_max_dbfs:7.1f}dBFS {r.out_rms_dbfs:7.1f}dBFS"
                     f"  {where}")
        if r.stages:
            lines.append("  " + " " * 22 + " stage maxima: " + ", ".join(
                f"{k.removesuffix('_db')} {v:.2g} dB" for k, v in r.stages.items()))
        if r.flipped:
            lines.append("  " + " " * 22 + " a threshold decision flipped: the detector "
                         f"differs by {r.stages['detector_db']:.2g} dB only, the curve by "
                         f"{r.stages['curve_db']:.3g} dB (a level within rounding of the "
                         "threshold opens or closes one sample apart)")
    verdict = ("within the bound" if a.within else
               f"OVER the bound: {a.gain_max_db:.4f} dB > {BOUND_DB:g} dB")
    lines.append(f"  verdict: {verdict}")
    return "\n".join(lines)


def plot(a: Audit, path):
    """Draw the gain and output differences over time (needs matplotlib)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    n = len(a.rows)
    fig, axes = plt.subplots(n, 1, figsize=(8, 2.6 * n + 0.6), dpi=100, squeeze=False)
    for ax, r in zip(axes[:, 0], a.rows):
        fs = len(r.diff_out) / r.seconds if r.seconds else a.samplerate
        t = np.arange(len(r.diff_out)) / fs
        ax.plot(t, 20 * np.log10(np.maximum(r.diff_out, 1e-12)), lw=0.6, color="0.5",
                label="output difference, dBFS")
        ax.set_ylabel("dBFS")
        ax.set_ylim(-240, 0)
        if r.diff_gain is not None:
            ax2 = ax.twinx()
            ax2.plot(t, r.diff_gain, lw=0.8, color="tab:red", label="gain difference, dB")
            ax2.axhline(BOUND_DB, lw=0.6, ls="--", color="tab:red")
            ax2.set_ylabel("gain difference, dB")
        ax.set_title(r.signal, fontsize=9)
        ax.set_xlabel("time, s")
        ax.grid(True, alpha=0.3)
    fig.suptitle(f"{a.label}: float32 against float64", fontsize=10)
    fig.tight_layout()
    import os

    tmp = f"{path}.{os.getpid()}.tmp.png"  # the old plot stays until the new one is whole
    try:
        fig.savefig(tmp)
        os.replace(tmp, path)
    finally:
        plt.close(fig)
        if os.path.exists(tmp):
            os.unlink(tmp)
