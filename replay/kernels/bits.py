"""Bit-level helpers for numba kernels."""

from __future__ import annotations

import numpy as np
from numba import njit, types
from numba.core.extending import intrinsic


@intrinsic
def f64_bits(typingctx, x):
    """The IEEE-754 bit pattern of a float64 as int64 (a register move: no store and load
    through a scratch array). For x >= 0 the pattern orders like the value."""
    sig = types.int64(types.float64)

    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], context.get_value_type(types.int64))

    return sig, codegen


@intrinsic
def bits_f64(typingctx, x):
    """The float64 whose IEEE-754 bit pattern is the int64 x (inverse of ``f64_bits``)."""
    sig = types.float64(types.int64)

    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], context.get_value_type(types.float64))

    return sig, codegen


#: ``UNIT[int(cond)]``: 0.0 or 1.0. Pass it to a kernel as an argument (never a global,
#: which numba folds into a constant): a value loaded from memory cannot be turned back
#: into a branch. LLVM lowers ``x if cond else 0.0`` on float64 to a conditional jump on
#: x86, which costs about 5 ns per row when ``cond`` is a coin flip (a won auction); a
#: product with ``UNIT[cond]`` is exact (``x * 1.0 == x``, ``x * 0.0 == 0.0`` for finite x)
#: and has no branch.
UNIT = np.array([0.0, 1.0])
#: ``MASK[int(cond)]``: 0 or all bits set, for ``pick`` (same reason as ``UNIT``).
MASK = np.array([0, -1], np.int64)


@njit(cache=True, nogil=True, inline="always")
def pick(mask, a, b):
    """``a`` if ``mask`` is all ones else ``b`` (``mask`` from ``MASK``), bit for bit and
    without a branch."""
    return bits_f64((f64_bits(a) & mask) | (f64_bits(b) & ~mask))
