"""Calls through a function address held in the parameter array.

A user-written stage is compiled once, off the audio thread, as a C-callable function; its
address travels in a float64 slot of the parameter array (addresses on 64-bit Linux fit the
53-bit mantissa exactly). The fused kernel calls it through :func:`call_curve`, so the kernel
itself is compiled and cached once for every user curve.
"""
from llvmlite import ir
from numba import types
from numba.extending import intrinsic

_f64 = ir.DoubleType()


@intrinsic
def call_curve(typingctx, addr, x, p):
    """``double fn(double x, double *p)`` at the address ``addr`` (a float64), called on
    ``x`` and the data of the float64 array ``p``."""
    if not (isinstance(p, types.Array) and p.dtype == types.float64):
        return None
    sig = types.float64(types.float64, types.float64, p)

    def codegen(context, builder, signature, args):
        a, xv, arr = args
        fnty = ir.FunctionType(_f64, [_f64, _f64.as_pointer()])
        fptr = builder.inttoptr(builder.fptosi(a, ir.IntType(64)), fnty.as_pointer())
        data = context.make_array(signature.args[2])(context, builder, arr).data
        return builder.call(fptr, [xv, data])

    return sig, codegen


@intrinsic
def call_stage(typingctx, addr, x, p, st, offset):
    """``double fn(double x, double *p, double *s)`` at the address ``addr`` (a float64), called
    on ``x``, the data of ``p`` and ``s = st.data + offset`` (elements): a user stage with its
    own row of declared state inside the kernel's state array."""
    if not (isinstance(p, types.Array) and p.dtype == types.float64
            and isinstance(st, types.Array) and st.dtype == types.float64
            and isinstance(offset, types.Integer)):
        return None
    sig = types.float64(types.float64, types.float64, p, st, offset)

    def codegen(context, builder, signature, args):
        a, xv, parr, sarr, off = args
        fnty = ir.FunctionType(_f64, [_f64, _f64.as_pointer(), _f64.as_pointer()])
        fptr = builder.inttoptr(builder.fptosi(a, ir.IntType(64)), fnty.as_pointer())
        pdata = context.make_array(signature.args[2])(context, builder, parr).data
        sdata = context.make_array(signature.args[3])(context, builder, sarr).data
        off64 = context.cast(builder, off, signature.args[4], types.int64)
        srow = builder.gep(sdata, [off64])
        return builder.call(fptr, [xv, pdata, srow])

    return sig, codegen
