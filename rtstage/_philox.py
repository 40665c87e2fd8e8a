"""Philox4x64-10 counter-based generator, compiled for the audio kernel.

The generator is the one numpy ships as :class:`numpy.random.Philox`; the tests
check every word against it.  A counter-based generator makes dither a pure
function of ``(seed, channel, sample index)``: there is no generator state to
carry between blocks, so any split of the input into blocks gives the same
words.

References
----------
.. [1] J. K. Salmon, M. A. Moraes, R. O. Dror, D. E. Shaw, "Parallel random
   numbers: as easy as 1, 2, 3", Proc. SC11, 2011.
"""

import numpy as np
from numba import njit, types
from numba.extending import intrinsic
from llvmlite import ir

PHILOX_M0 = np.uint64(0xD2E7470EE14C6C93)
PHILOX_M1 = np.uint64(0xCA5A826395121157)
PHILOX_W0 = np.uint64(0x9E3779B97F4A7C15)
PHILOX_W1 = np.uint64(0xBB67AE8584CAA73B)
PHILOX_ROUNDS = 10


@intrinsic
def _mulhi64(typingctx, a, b):
    """High 64 bits of the 128-bit product of two uint64 (one ``mul`` on x86-64)."""
    sig = types.uint64(types.uint64, types.uint64)

    def codegen(context, builder, signature, args):
        wide = ir.IntType(128)
        product = builder.mul(builder.zext(args[0], wide), builder.zext(args[1], wide))
        return builder.trunc(builder.lshr(product, ir.Constant(wide, 64)), ir.IntType(64))

    return sig, codegen


@njit(nogil=True, cache=True, inline="always")
def philox4x64(c0, c1, c2, c3, k0, k1, out, row):
    """Write Philox4x64-10 of counter ``(c0..c3)`` under key ``(k0, k1)`` to ``out[row, 0:4]``.

    All arguments are ``uint64``; ``out`` is a preallocated ``uint64`` array of
    shape ``(rows, 4)``.  Nothing is allocated.
    """
    m0 = PHILOX_M0
    m1 = PHILOX_M1
    for r in range(PHILOX_ROUNDS):
        if r > 0:
            k0 = k0 + PHILOX_W0
            k1 = k1 + PHILOX_W1
        hi0 = _mulhi64(m0, c0)
        lo0 = m0 * c0
        hi1 = _mulhi64(m1, c2)
        lo1 = m1 * c2
        n0 = hi1 ^ c1 ^ k0
        n2 = hi0 ^ c3 ^ k1
        c0 = n0
        c1 = lo1
        c2 = n2
        c3 = lo0
    out[row, 0] = c0
    out[row, 1] = c1
    out[row, 2] = c2
    out[row, 3] = c3


@njit(nogil=True, cache=True)
def philox_block(c0, k0, k1, n_blocks, out):
    """Fill ``out[i, :]`` with Philox4x64-10 of counter ``(c0 + i, 0, 0, 0)``; a test helper."""
    for i in range(n_blocks):
        philox4x64(c0 + np.uint64(i), np.uint64(0), np.uint64(0), np.uint64(0), k0, k1, out, i)
