"""numba intrinsics for the native audio callback: pointers, a clock, fences, atomics, calls.

Everything here compiles to a few LLVM instructions; none takes the interpreter lock.

- int_to_voidptr / voidptr_to_int : inttoptr / ptrtoint
- monotonic_ns                    : clock_gettime(CLOCK_MONOTONIC) declared in the module
                                    (vDSO on Linux x86-64: no system call, no GIL)
- thread_cpu_ns                   : clock_gettime(CLOCK_THREAD_CPUTIME_ID): the calling
                                    thread's CPU time (a real system call on Linux)
- cycles                          : llvm.readcyclecounter (rdtsc on x86-64)
- fence_acquire / fence_release / fence_seq_cst : LLVM `fence`
- load_acquire(a, i) / load_relaxed(a, i) / store_release(a, i, v) / store_relaxed(a, i, v):
                                    atomic load/store of an int64 array element
- compare_exchange(a, i, expected, new) : atomic compare-and-swap of an int64 array element
                                    (acq_rel); returns the value found
- call_job(addr, job)             : call the function at integer address `addr` with signature
                                    void(void*) — used to switch kernels at a block boundary
"""
from llvmlite import ir
from numba import types
from numba.core import cgutils
from numba.extending import intrinsic

_i64 = ir.IntType(64)
_i32 = ir.IntType(32)


@intrinsic
def int_to_voidptr(typingctx, addr):
    sig = types.voidptr(types.int64)

    def codegen(context, builder, signature, args):
        return builder.inttoptr(args[0], cgutils.voidptr_t)

    return sig, codegen


@intrinsic
def voidptr_to_int(typingctx, ptr):
    sig = types.int64(types.voidptr)

    def codegen(context, builder, signature, args):
        return builder.ptrtoint(args[0], _i64)

    return sig, codegen


class PlatformError(OSError):
    """The live engine does not support this platform; one line for the user."""


def platform_clocks(platform=None, ulong_bytes=None):
    """(CLOCK_MONOTONIC, CLOCK_THREAD_CPUTIME_ID) of ``platform`` (default: this one).

    The callback's signature takes PortAudio's ``unsigned long`` as 64 bits and reads
    ``struct timespec`` as two 64-bit fields: true on LP64 Linux and macOS, false on Windows
    (LLP64) and on 32-bit systems, which are refused with one line. Clock ids from the
    platforms' <time.h> (Linux: 1 and 3; macOS: 6 and 16; recalled from memory)."""
    import ctypes
    import sys

    platform = sys.platform if platform is None else platform
    ulong_bytes = ctypes.sizeof(ctypes.c_ulong) if ulong_bytes is None else ulong_bytes
    clocks = {"linux": (1, 3), "darwin": (6, 16)}
    key = "linux" if platform.startswith("linux") else platform
    if key not in clocks or ulong_bytes != 8:
        raise PlatformError(f"livedyn's live engine runs on 64-bit Linux or macOS; this is "
                            f"{platform} with a {8 * ulong_bytes}-bit unsigned long")
    return clocks[key]


CLOCK_MONOTONIC, CLOCK_THREAD_CPUTIME_ID = platform_clocks()


def _clock_reader(clock_id):
    @intrinsic
    def read(typingctx):
        sig = types.int64()

        def codegen(context, builder, signature, args):
            ts_t = ir.LiteralStructType([_i64, _i64])  # struct timespec on LP64
            ts = cgutils.alloca_once(builder, ts_t)  # in the entry block: no allocation per call
            fnty = ir.FunctionType(_i32, [_i32, ts_t.as_pointer()])
            fn = cgutils.get_or_insert_function(builder.module, fnty, "clock_gettime")
            builder.call(fn, [ir.Constant(_i32, clock_id), ts])
            sec = builder.load(cgutils.gep_inbounds(builder, ts, 0, 0))
            nsec = builder.load(cgutils.gep_inbounds(builder, ts, 0, 1))
            return builder.add(builder.mul(sec, ir.Constant(_i64, 1_000_000_000)), nsec)

        return sig, codegen

    return read


monotonic_ns = _clock_reader(CLOCK_MONOTONIC)
# The calling thread's CPU time. On Linux this clock is not served by the vDSO: each read is a
# real (short) system call; the callback makes two per block (see DEVELOPERS.md).
thread_cpu_ns = _clock_reader(CLOCK_THREAD_CPUTIME_ID)


@intrinsic
def cycles(typingctx):
    sig = types.int64()

    def codegen(context, builder, signature, args):
        fn = cgutils.get_or_insert_function(builder.module, ir.FunctionType(_i64, []),
                                            "llvm.readcyclecounter")
        return builder.call(fn, [])

    return sig, codegen


def _fence(ordering):
    @intrinsic
    def fence(typingctx):
        sig = types.void()

        def codegen(context, builder, signature, args):
            builder.fence(ordering)
            return context.get_dummy_value()

        return sig, codegen

    return fence


fence_acquire = _fence("acquire")
fence_release = _fence("release")
fence_seq_cst = _fence("seq_cst")


def _elem_ptr(context, builder, aryty, ary, idx):
    arr = context.make_array(aryty)(context, builder, ary)
    return cgutils.get_item_pointer(context, builder, aryty, arr, [idx], wraparound=False)


def _atomic_load(ordering):
    @intrinsic
    def load(typingctx, a, i):
        if not (isinstance(a, types.Array) and a.dtype == types.int64 and a.ndim == 1):
            return None
        sig = types.int64(a, types.intp)

        def codegen(context, builder, signature, args):
            ptr = _elem_ptr(context, builder, signature.args[0], args[0], args[1])
            return builder.load_atomic(ptr, ordering, 8)

        return sig, codegen

    return load


def _atomic_store(ordering):
    @intrinsic
    def store(typingctx, a, i, v):
        if not (isinstance(a, types.Array) and a.dtype == types.int64 and a.ndim == 1):
            return None
        sig = types.void(a, types.intp, types.int64)

        def codegen(context, builder, signature, args):
            ptr = _elem_ptr(context, builder, signature.args[0], args[0], args[1])
            builder.store_atomic(args[2], ptr, ordering, 8)
            return context.get_dummy_value()

        return sig, codegen

    return store


load_acquire = _atomic_load("acquire")
load_relaxed = _atomic_load("monotonic")  # LLVM's name for C++ relaxed
store_release = _atomic_store("release")
store_relaxed = _atomic_store("monotonic")


@intrinsic
def compare_exchange(typingctx, a, i, expected, new):
    """Atomically: if ``a[i] == expected`` then ``a[i] = new``; returns the old ``a[i]``
    (sequentially consistent on success, acquire on failure)."""
    if not (isinstance(a, types.Array) and a.dtype == types.int64 and a.ndim == 1):
        return None
    sig = types.int64(a, types.intp, types.int64, types.int64)

    def codegen(context, builder, signature, args):
        ptr = _elem_ptr(context, builder, signature.args[0], args[0], args[1])
        res = builder.cmpxchg(ptr, args[2], args[3], "seq_cst", "acquire")
        return builder.extract_value(res, 0)

    return sig, codegen


@intrinsic
def call_job(typingctx, addr, job):
    """Call ``void fn(void *job)`` where fn's address is the int64 ``addr``."""
    sig = types.void(types.int64, types.voidptr)

    def codegen(context, builder, signature, args):
        fnty = ir.FunctionType(ir.VoidType(), [cgutils.voidptr_t])
        fptr = builder.inttoptr(args[0], fnty.as_pointer())
        builder.call(fptr, [args[1]])
        return context.get_dummy_value()

    return sig, codegen
