"""Bit-level helpers for numba kernels."""

from __future__ import annotations

from numba import types
from numba.core.extending import intrinsic


@intrinsic
def f64_bits(typingctx, x):
    """The IEEE-754 bit pattern of a float64 as int64 (a register move: no store and load
    through a scratch array). For x >= 0 the pattern orders like the value."""
    sig = types.int64(types.float64)

    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], context.get_value_type(types.int64))

    return sig, codegen
