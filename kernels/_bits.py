"""Bit patterns of doubles, for maximum reductions that vectorise without fastmath.

LLVM does not vectorise a floating-point ``max`` reduction unless it may
assume there are no NaNs (a fastmath flag this project keeps off). For a
non-negative double the IEEE-754 bit pattern read as a signed 64-bit integer
orders exactly like the value, and every NaN pattern (sign cleared) is larger
than +inf's. So ``max`` over ``abs_bits(x)`` is an integer reduction, which
vectorises, and ``from_bits`` of the result is the largest |x|, or NaN if any
x was NaN: a non-finite update cannot hide.

A float32 argument (a single-precision field's difference computed in float32)
is widened to float64 first, exactly; the sweeps of ``relaxtui.kernels.sweeps``
compute their updates in float64 whatever the field's type, so their path is the
float64 one.

With ``NUMBA_DISABLE_JIT=1`` the same functions run as plain Python.
"""

import numpy as np
from numba import config

if config.DISABLE_JIT:

    def abs_bits(x):
        """|x| as its IEEE-754 bit pattern (int64)."""
        return int(np.array([abs(x)], dtype=np.float64).view(np.int64)[0])

    def from_bits(i):
        """The double whose bit pattern is the int64 ``i``."""
        return float(np.array([i], dtype=np.int64).view(np.float64)[0])

else:
    from llvmlite import ir
    from numba.core import types
    from numba.extending import intrinsic

    @intrinsic
    def abs_bits(typingctx, x):
        """|x| as its IEEE-754 bit pattern (int64) of a double; a float32 is widened to double first
        (exact, order- and NaN-preserving), so maxima of either type come back through from_bits."""
        if x == types.float32:
            sig = types.int64(types.float32)

            def codegen(context, builder, signature, args):
                bits = builder.bitcast(builder.fpext(args[0], ir.DoubleType()), ir.IntType(64))
                return builder.and_(bits, ir.Constant(ir.IntType(64), 0x7FFFFFFFFFFFFFFF))

            return sig, codegen
        sig = types.int64(types.float64)

        def codegen(context, builder, signature, args):
            bits = builder.bitcast(args[0], ir.IntType(64))
            return builder.and_(bits, ir.Constant(ir.IntType(64), 0x7FFFFFFFFFFFFFFF))

        return sig, codegen

    @intrinsic
    def from_bits(typingctx, i):
        """The double whose bit pattern is the int64 ``i``."""
        sig = types.float64(types.int64)

        def codegen(context, builder, signature, args):
            return builder.bitcast(args[0], ir.DoubleType())

        return sig, codegen
