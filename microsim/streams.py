"""Counter-based random numbers: every draw is a pure function of
(run seed, patient id, purpose, occurrence), never of processing order, batch size or
which other patients exist.

The generator is Philox4x64-10 (Salmon, Moraes, Dror & Shaw 2011, "Parallel random
numbers: as easy as 1, 2, 3", SC'11), written with numpy uint64 arrays so that one call
evaluates it for millions of (key, counter) pairs at once.

Layout of one draw (all words unsigned 64-bit):

    key     = (seed, purpose_id(purpose))
    counter = (occurrence // 4, patient id, 0, 0)
    draw    = word number occurrence % 4 of the Philox output block

So patient p's draws for one purpose are exactly the raw output stream of
`numpy.random.Philox(key=(seed, purpose_id), counter=p * 2**64 - 1)`: numpy adds one to
the counter before each block, and occurrence j is the j-th 64-bit word. The two last
counter words are zero and free for a later need (e.g. a replicate index). Purposes are
keyed by a hash of their name, not by position, so adding a purpose (a strategy with one
more transition) never shifts the draws of the others, and strategies that use the same
purpose name share the same draws (common random numbers).
"""
from __future__ import annotations

import hashlib
import operator
from typing import Sequence

import numpy as np
from scipy.special import ndtri

_MASK32 = np.uint64(0xFFFFFFFF)
_SHIFT32 = np.uint64(32)
# Philox4x64 multipliers and Weyl key increments (Salmon et al. 2011, section 4).
_M0 = 0xD2E7470EE14C6C93
_M1 = 0xCA5A826395121157
_W0 = np.uint64(0x9E3779B97F4A7C15)
_W1 = np.uint64(0xBB67AE8584CAA73B)
_ROUNDS = 10
_PURPOSE_SALT = b"microsim-purpose"


def _mulhilo(a: np.ndarray, multiplier: int) -> tuple[np.ndarray, np.ndarray]:
    """High and low words of the 128-bit product a * multiplier, from 32-bit halves
    (the multiply-high of Warren 2012, "Hacker's Delight", 2nd ed., section 8-2); no
    intermediate sum can overflow 64 bits."""
    m_lo, m_hi = np.uint64(multiplier & 0xFFFFFFFF), np.uint64(multiplier >> 32)
    a_lo, a_hi = a & _MASK32, a >> _SHIFT32
    t = a_hi * m_lo
    t += (a_lo * m_lo) >> _SHIFT32
    w = t & _MASK32
    w += a_lo * m_hi
    high = a_hi * m_hi
    high += t >> _SHIFT32
    high += w >> _SHIFT32
    return high, a * np.uint64(multiplier)


def philox4x64_10(counter, key) -> np.ndarray:
    """Philox4x64-10 of each counter under each key (Salmon et al. 2011).

    counter: uint64 array of shape (4, ...); key: uint64 array of shape (2, ...); the
    trailing shapes broadcast. Returns the output blocks, shape (4, ...).
    """
    c0, c1, c2, c3 = (np.atleast_1d(np.asarray(w, dtype=np.uint64)) for w in counter)
    k0, k1 = (np.atleast_1d(np.asarray(w, dtype=np.uint64)) for w in key)
    for round_number in range(_ROUNDS):
        if round_number:
            k0, k1 = k0 + _W0, k1 + _W1
        hi0, lo0 = _mulhilo(c0, _M0)
        hi1, lo1 = _mulhilo(c2, _M1)
        c0, c1, c2, c3 = hi1 ^ c1 ^ k0, lo1, hi0 ^ c3 ^ k1, lo0
    return np.stack(np.broadcast_arrays(c0, c1, c2, c3))


def purpose_id(name: str) -> int:
    """A stable 64-bit id for a purpose name (BLAKE2b, 8-byte digest, little-endian)."""
    digest = hashlib.blake2b(name.encode("utf-8"), digest_size=8, person=_PURPOSE_SALT)
    return int.from_bytes(digest.digest(), "little")


def to_open_unit(words) -> np.ndarray:
    """Map 64-bit words to floats strictly inside (0, 1): (2k + 1) / 2**53 with k the
    top 52 bits.

    The points are evenly spaced and symmetric about 1/2, so 1 - u is exact and also a
    possible draw. (Top 53 bits plus half a step would need 54 significant bits and
    round to exactly 1.0 for the largest word.)
    """
    k = np.asarray(words, dtype=np.uint64) >> np.uint64(12)
    return (2.0 * k.astype(np.float64) + 1.0) * 2.0**-53


def _as_seed(seed) -> np.uint64:
    value = operator.index(seed)
    if not 0 <= value < 2**64:
        raise ValueError(f"seed must be in [0, 2**64), got {value}")
    return np.uint64(value)


def _as_indices(values, what: str) -> np.ndarray:
    """Non-negative integers (patient ids, occurrences) as uint64."""
    array = np.asarray(values)
    if array.dtype.kind not in "iu":
        raise TypeError(f"{what} must be integers, got dtype {array.dtype}")
    if array.dtype.kind == "i" and array.size and array.min() < 0:
        raise ValueError(f"{what} must be >= 0")
    return array.astype(np.uint64)


def uniforms(seed: int, patient_ids, purpose: str, occurrences=0) -> np.ndarray:
    """Uniform draws in (0, 1) for each (patient id, occurrence) pair.

    `patient_ids` and `occurrences` broadcast like numpy arrays: pass `ids[:, None]` and
    `np.arange(m)` for an (n, m) table, or two equal-length arrays for one draw per
    patient at its own occurrence. For many consecutive occurrences, `block` is cheaper.
    """
    patients = _as_indices(patient_ids, "patient ids")
    occurrence = _as_indices(occurrences, "occurrences")
    patients, occurrence = np.broadcast_arrays(patients, occurrence)
    zero = np.uint64(0)
    words = philox4x64_10(
        (occurrence >> np.uint64(2), patients, zero, zero),
        (_as_seed(seed), np.uint64(purpose_id(purpose))),
    )
    lane = (occurrence & np.uint64(3)).astype(np.intp)
    chosen = np.take_along_axis(words.reshape(4, -1), lane.reshape(1, -1), axis=0)
    return to_open_unit(chosen.reshape(patients.shape))


def sequence(seed: int, patient_id: int, purpose: str, start: int, n: int) -> np.ndarray:
    """Occurrences start .. start+n-1 of one patient's draws for one purpose.

    The same numbers as `uniforms`, taken from numpy's own Philox4x64-10 (the layout above
    makes one (patient, purpose) stream a plain numpy Philox stream), so a long run of one
    patient's draws costs microseconds instead of a vectorised call's fixed overhead."""
    blocks_before, skip = divmod(operator.index(start), 4)
    counter = (operator.index(patient_id) << 64) + blocks_before - 1
    # the key as uint64 words: numpy reads a tuple of Python ints through float64 when one
    # of them needs all 64 bits, which rounds the purpose id
    bits = np.random.Philox(counter=counter % 2**256,
                            key=np.array([_as_seed(seed), purpose_id(purpose)], np.uint64))
    return to_open_unit(bits.random_raw(skip + n)[skip:])


def normals(seed: int, patient_ids, purpose: str, occurrences=0) -> np.ndarray:
    """Standard normal draws: the inverse normal CDF of the same `uniforms`."""
    return ndtri(uniforms(seed, patient_ids, purpose, occurrences))


def block(seed: int, patient_ids, purposes: Sequence[str], n_occurrences: int) -> np.ndarray:
    """All draws of occurrences 0..n_occurrences-1 for each patient and purpose.

    Returns shape (n_patients, n_purposes, n_occurrences), equal element by element to
    `uniforms`, but using all four words of every Philox block.
    """
    patients = _as_indices(patient_ids, "patient ids").reshape(-1)
    if n_occurrences < 0:
        raise ValueError(f"n_occurrences must be >= 0, got {n_occurrences}")
    n_blocks = -(-n_occurrences // 4)
    ids = np.array([purpose_id(p) for p in purposes], dtype=np.uint64)
    counter_block = np.arange(n_blocks, dtype=np.uint64)[None, None, :]
    zero = np.uint64(0)
    words = philox4x64_10(
        (counter_block, patients[:, None, None], zero, zero),
        (_as_seed(seed), ids[None, :, None]),
    )
    words = np.broadcast_to(words, (4, patients.size, ids.size, n_blocks))
    ordered = np.moveaxis(words, 0, -1).reshape(patients.size, ids.size, 4 * n_blocks)
    return to_open_unit(ordered[:, :, :n_occurrences])
