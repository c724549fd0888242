"""numba kernels only: pure functions over arrays and state; no I/O, no threads."""


def kernel_for(kind):
    if kind == "dynamics":
        from .dynamics import dynamics_block

        return dynamics_block
    if kind == "limiter":
        from .limiter import limiter_block

        return limiter_block
    raise ValueError(f"no kernel of kind {kind!r}")
