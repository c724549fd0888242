"""livedyn: dynamics processors (compressor, limiter, expander, gate, ducker) for live and
offline use, with numba kernels, key input, meters and measurements."""
__version__ = "0.1.0"


def __getattr__(name):
    # Lazy so that `import livedyn.params` does not pull numba in.
    if name == "Processor":
        from .processor import Processor

        return Processor
    raise AttributeError(name)
