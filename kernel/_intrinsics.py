"""Tiny LLVM intrinsics for the scalar tier.

* ``fma(a, b, c)``: a*b + c with one rounding, via ``llvm.fma.f64``.  The ``contract``
  fast-math flag only *allows* LLVM to fuse, so code whose correctness depends on the
  exact product error (double-word squares, Cody-Waite reduction) calls this instead.
  On a CPU without FMA instructions LLVM lowers it to libm's ``fma`` (correct, slower).
* ``f64_as_i64`` / ``i64_as_f64``: reinterpret the 64 bits (no conversion).  Used to
  build 2**n and to split exponent and mantissa with integer arithmetic, which
  vectorises on any x86-64 (AVX2 has no packed float64<->int64 conversion).

All are usable only from jitted code.
"""

from llvmlite import ir
from numba import types
from numba.extending import intrinsic

_F64 = ir.DoubleType()
_I64 = ir.IntType(64)


@intrinsic
def fma(typingctx, a, b, c):
    """a*b + c rounded once (float64)."""
    for arg in (a, b, c):
        if not isinstance(arg, (types.Float, types.Integer)):
            return None
    sig = types.float64(a, b, c)

    def codegen(context, builder, signature, args):
        vals = [context.cast(builder, v, t, types.float64)
                for v, t in zip(args, signature.args)]
        return builder.fma(*vals)

    return sig, codegen


@intrinsic
def f64_as_i64(typingctx, x):
    """The bits of a float64 as an int64."""
    if not isinstance(x, (types.Float, types.Integer)):
        return None
    sig = types.int64(x)

    def codegen(context, builder, signature, args):
        v = context.cast(builder, args[0], signature.args[0], types.float64)
        return builder.bitcast(v, _I64)

    return sig, codegen


@intrinsic
def i64_as_f64(typingctx, n):
    """The float64 whose bits are the int64 n."""
    if not isinstance(n, types.Integer):
        return None
    sig = types.float64(n)

    def codegen(context, builder, signature, args):
        v = context.cast(builder, args[0], signature.args[0], types.int64)
        return builder.bitcast(v, _F64)

    return sig, codegen
