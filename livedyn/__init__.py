"""livedyn: dynamics processors (compressor, limiter, expander, gate, ducker) for live and
offline use, with numba kernels, key input, meters and measurements."""
__version__ = "0.1.0"


def _refresh_numba_cache():
    """Drop numba's cached machine code when any of livedyn's sources changed.

    numba keys a cached function on its own file only: a kernel whose callee in another module
    changed (a stage in dsp/stages.py, the kernel a callback in engine/callback.py calls) would
    load stale code. So the cache is kept only while a hash of every livedyn source file is
    unchanged; otherwise the cache files beside the sources are removed and rebuilt on use.
    """
    import hashlib
    import os
    from pathlib import Path

    if os.environ.get("NUMBA_CACHE_DIR"):
        return  # a cache elsewhere is its owner's to manage
    root = Path(__file__).resolve().parent
    h = hashlib.sha256()
    for f in sorted(root.rglob("*.py")):
        try:
            h.update(f.relative_to(root).as_posix().encode())
            h.update(f.read_bytes())
        except OSError:
            return
    digest = h.hexdigest()
    stamp = root / "__pycache__" / "numba-sources.sha256"
    try:
        if stamp.read_text().strip() == digest:
            return
    except OSError:
        pass
    for pat in ("*.nbi", "*.nbc"):
        for f in root.rglob(f"__pycache__/{pat}"):
            try:
                f.unlink()
            except OSError:
                pass
    try:
        stamp.parent.mkdir(exist_ok=True)
        tmp = stamp.with_suffix(f".{os.getpid()}.tmp")
        tmp.write_text(digest + "\n")
        os.replace(tmp, stamp)
    except OSError:
        pass


_refresh_numba_cache()


def __getattr__(name):
    # Lazy so that `import livedyn.params` does not pull numba in.
    if name == "Processor":
        from .processor import Processor

        return Processor
    if name == "load_algorithm":
        from .loader import load

        return load
    raise AttributeError(name)
