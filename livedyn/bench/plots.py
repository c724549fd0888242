"""PNG plots of bench results (needs matplotlib, the ``plot`` extra)."""
from __future__ import annotations

from pathlib import Path


def have_matplotlib():
    try:
        import matplotlib  # noqa: F401

        return True
    except ImportError:
        return False


def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def plot_kernel_cost(rows, path, title="kernel cost against block size"):
    """ns per frame against block size, one line per case (rows from livedyn.bench.kernels)."""
    plt = _plt()
    fig, ax = plt.subplots(figsize=(7, 4.5), dpi=100)
    cases = sorted({r["case"] for r in rows})
    for case in cases:
        rr = sorted((r for r in rows if r["case"] == case and r.get("numba_ns_per_frame")),
                    key=lambda r: r["blocksize"])
        if rr:
            ax.plot([r["blocksize"] for r in rr], [r["numba_ns_per_frame"] for r in rr], "o-",
                    label=case, ms=3)
    ax.set_xscale("log", base=2)
    ax.set_xlabel("block size, frames")
    ax.set_ylabel("ns per frame (all channels)")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=7)
    ax.set_title(title)
    fig.tight_layout()
    fig.savefig(Path(path))
    plt.close(fig)


def plot_callback_histogram(shares, path, title="callback time"):
    """Histogram of callback times as shares of the block period."""
    plt = _plt()
    fig, ax = plt.subplots(figsize=(7, 4.5), dpi=100)
    ax.hist([100 * s for s in shares], bins=100, log=True)
    ax.set_xlabel("callback time, % of the block period")
    ax.set_ylabel("blocks")
    ax.grid(True, alpha=0.3)
    ax.set_title(title)
    fig.tight_layout()
    fig.savefig(Path(path))
    plt.close(fig)
