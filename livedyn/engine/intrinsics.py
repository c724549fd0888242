"""The callback's LLVM intrinsics live in :mod:`livedyn.dsp.intrinsics` (below the kernels and
the engine both); this name stays for code that imports them from the engine."""
from ..dsp.intrinsics import (  # noqa: F401
    CLOCK_MONOTONIC, CLOCK_THREAD_CPUTIME_ID, PlatformError, call_job, compare_exchange, cycles,
    fence_acquire, fence_release, fence_seq_cst, int_to_voidptr, load_acquire, load_relaxed,
    monotonic_ns, platform_clocks, store_relaxed, store_release, thread_cpu_ns, voidptr_to_int,
)
