"""numba kernels only: pure functions over arrays and state; no I/O, no threads."""
import os
import sys
import time

#: Called with one line of text when a kernel is about to be compiled (not loaded from the
#: cache). The command line sets it to print on stdout; library users may set their own.
announce = None


def kernel_for(kind):
    if kind == "dynamics":
        from .dynamics import dynamics_block

        return dynamics_block
    if kind == "limiter":
        from .limiter import limiter_block

        return limiter_block
    raise ValueError(f"no kernel of kind {kind!r}")


def needs_compiling(dispatcher) -> bool:
    """True when calling ``dispatcher`` now would compile it (nothing in memory or on disk)."""
    if dispatcher.signatures:
        return False
    try:
        return not os.path.exists(dispatcher._cache._cache_file._index_path)
    except AttributeError:
        return True


def warm(dispatcher, label, *args):
    """Call ``dispatcher(*args)`` once so that it is compiled (or loaded) before real use,
    announcing a compilation that is about to take time."""
    if dispatcher.signatures:
        return
    cold = needs_compiling(dispatcher)
    if cold and announce is not None:
        announce(f"compiling the {label} (first run only; cached afterwards) ...")
    t0 = time.perf_counter()
    dispatcher(*args)
    if cold and announce is not None:
        announce(f"compiled the {label} in {time.perf_counter() - t0:.1f} s")


def announce_on_stdout(text):
    """Compile notices go to standard output, so that standard error holds only the one-line
    error of a command that fails."""
    print(f"livedyn: {text}", file=sys.stdout, flush=True)
