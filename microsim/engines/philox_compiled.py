"""Philox4x64-10 compiled with numba, for the compiled engines' draws one patient at a time.

The same function as `microsim.streams.philox4x64_10` (Salmon, Moraes, Dror & Shaw 2011,
"Parallel random numbers: as easy as 1, 2, 3", SC'11) and the same layout (key = (seed,
purpose id), counter = (patient id, occurrence // 4, 0, 0), draw = word occurrence % 4
mapped by `streams.to_open_unit`), so a compiled engine draws exactly the numbers the SimPy
engines read from `streams.block`, but only for the patients and occurrences it needs.
The 128-bit product of the multiply-high is one LLVM `mul i128`, which compiles to the
processor's widening multiply.
"""
from __future__ import annotations

import numpy as np
from llvmlite import ir
from numba import njit, types
from numba.extending import intrinsic

# Philox4x64 multipliers and Weyl key increments (Salmon et al. 2011, section 4).
_M0 = np.uint64(0xD2E7470EE14C6C93)
_M1 = np.uint64(0xCA5A826395121157)
_W0 = np.uint64(0x9E3779B97F4A7C15)
_W1 = np.uint64(0xBB67AE8584CAA73B)
_TOP = np.uint64(12)  # a word's top 52 bits make the uniform (streams.to_open_unit)
_STEP = 2.0**-52
_HALF_STEP = 2.0**-53


@intrinsic
def _mulhi(typingctx, a, b):
    """High word of the 128-bit product of two unsigned 64-bit words."""
    def codegen(context, builder, signature, args):
        wide = ir.IntType(128)
        product = builder.mul(builder.zext(args[0], wide), builder.zext(args[1], wide))
        return builder.trunc(builder.lshr(product, ir.Constant(wide, 64)), ir.IntType(64))
    return types.uint64(types.uint64, types.uint64), codegen


@njit(cache=True, inline="always")
def philox_block(patient, block, seed, purpose, out):
    """The four words of block `block` of `patient` under key (seed, purpose), into out."""
    c0, c1, c2, c3 = patient, block, np.uint64(0), np.uint64(0)
    k0, k1 = seed, purpose
    for round_number in range(10):
        if round_number:
            k0 += _W0
            k1 += _W1
        hi0, lo0 = _mulhi(c0, _M0), c0 * _M0
        hi1, lo1 = _mulhi(c2, _M1), c2 * _M1
        c0, c1, c2, c3 = hi1 ^ c1 ^ k0, lo1, hi0 ^ c3 ^ k1, lo0
    out[0], out[1], out[2], out[3] = c0, c1, c2, c3


@njit(cache=True, inline="always")
def open_unit(word):
    """`streams.to_open_unit` of one word: (2k + 1) / 2**53 with k its top 52 bits (k * 2**-52
    and the half step are exact, so this is that function's number to the bit)."""
    return float(word >> _TOP) * _STEP + _HALF_STEP


@njit(cache=True, nogil=True)
def first_units(ids, seed, purpose):
    """Occurrence 0 of `purpose` for each patient id (uint64): the numbers of
    `streams.uniforms(seed, ids, purpose)`, one Philox block a patient."""
    out = np.empty(ids.size)
    words = np.empty(4, np.uint64)
    for b in range(ids.size):
        philox_block(ids[b], np.uint64(0), seed, purpose, words)
        out[b] = open_unit(words[0])
    return out
