"""Counter-based random numbers: every draw is a pure function of
(run seed, patient id, purpose, occurrence), never of processing order, batch size or
which other patients exist.

The generator is Philox4x64-10 (Salmon, Moraes, Dror & Shaw 2011, "Parallel random
numbers: as easy as 1, 2, 3", SC'11). Layout of one draw (all words unsigned 64-bit):

    key     = (seed, purpose_id(purpose))
    counter = (patient id, occurrence // 4, 0, 0)
    draw    = word number occurrence % 4 of the Philox output block

For one purpose and one block of four occurrences, consecutive patient ids are therefore
consecutive counter values of one keyed stream: the draws of patients p .. p + n - 1 for
occurrences 4k .. 4k + 3 are exactly the 4n raw words of
`numpy.random.Philox(key=(seed, purpose_id), counter=k * 2**64 + p - 1)` (numpy adds one to
the counter before each block), so numpy's compiled generator fills whole arrays of a batch
at its own speed (`block`, and `uniforms` for one occurrence). Scattered (patient,
occurrence) pairs are evaluated by the same function written with numpy uint64 arrays
(`philox4x64_10`), bit for bit. The two last counter words are zero and free for a later
need (e.g. a replicate index). Purposes are keyed by a hash of their name, not by position,
so adding a purpose (a strategy with one more transition) never shifts the draws of the
others, and strategies that use the same purpose name share the same draws (common random
numbers).
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
    # 1 + k / 2**52 by its bits (exponent of 1.0, k as the mantissa), then 1 taken away
    # (exact, Sterbenz 1974) and half a step added (exact: 2k + 1 < 2**53): the same
    # numbers as (2k + 1) * 2**-53, without numpy's slow integer-to-float conversion
    top = np.asarray(words, dtype=np.uint64) >> np.uint64(12)
    one_plus = (top | np.uint64(0x3FF0000000000000)).view(np.float64)
    one_plus -= 1.0
    one_plus += 2.0**-53
    return one_plus


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


def _contiguous(patients: np.ndarray) -> bool:
    """True for ids p, p + 1, ..., p + n - 1: one run of counters of a keyed stream."""
    return patients.ndim == 1 and patients.size > 0 and bool(
        int(patients[-1]) - int(patients[0]) == patients.size - 1
        and (patients.size == 1 or np.all(np.diff(patients) == 1)))


def _run(seed: int, first: int, n: int, purpose: int, block_number: int) -> np.ndarray:
    """(n, 4) words of block `block_number` for patients first .. first + n - 1, from
    numpy's Philox keyed by (seed, purpose) and set to the run's first counter."""
    counter = ((block_number << 64) + first - 1) % 2**256
    bits = np.random.Philox(counter=counter, key=int(_as_seed(seed)) + (purpose << 64))
    return bits.random_raw(4 * n).reshape(n, 4)


def uniforms(seed: int, patient_ids, purpose: str, occurrences=0) -> np.ndarray:
    """Uniform draws in (0, 1) for each (patient id, occurrence) pair.

    `patient_ids` and `occurrences` broadcast like numpy arrays: pass `ids[:, None]` and
    `np.arange(m)` for an (n, m) table, or two equal-length arrays for one draw per
    patient at its own occurrence. For many consecutive occurrences, `block` is cheaper.
    """
    patients = _as_indices(patient_ids, "patient ids")
    occurrence = _as_indices(occurrences, "occurrences")
    if occurrence.ndim == 0 and _contiguous(patients):
        k, lane = divmod(int(occurrence), 4)
        words = _run(seed, int(patients[0]), patients.size, purpose_id(purpose), k)[:, lane]
        return to_open_unit(words)
    patients, occurrence = np.broadcast_arrays(patients, occurrence)
    zero = np.uint64(0)
    words = philox4x64_10(
        (patients, occurrence >> np.uint64(2), zero, zero),
        (_as_seed(seed), np.uint64(purpose_id(purpose))),
    )
    lane = (occurrence & np.uint64(3)).astype(np.intp)
    chosen = np.take_along_axis(words.reshape(4, -1), lane.reshape(1, -1), axis=0)
    return to_open_unit(chosen.reshape(patients.shape))


def sequence(seed: int, patient_id: int, purpose: str, start: int, n: int) -> np.ndarray:
    """Occurrences start .. start+n-1 of one patient's draws for one purpose (the same
    numbers as `uniforms`; one vectorised evaluation of the blocks they fall in)."""
    first, skip = divmod(operator.index(start), 4)
    blocks = np.arange(first, first + -(-(skip + n) // 4), dtype=np.uint64)
    zero = np.uint64(0)
    words = philox4x64_10((np.uint64(operator.index(patient_id)), blocks, zero, zero),
                          (_as_seed(seed), np.uint64(purpose_id(purpose))))
    return to_open_unit(words.T.reshape(-1)[skip:skip + n])


def normals(seed: int, patient_ids, purpose: str, occurrences=0) -> np.ndarray:
    """Standard normal draws: the inverse normal CDF of the same `uniforms`."""
    return ndtri(uniforms(seed, patient_ids, purpose, occurrences))


def block(seed: int, patient_ids, purposes: Sequence[str], n_occurrences: int,
          first: int = 0) -> np.ndarray:
    """All draws of occurrences first .. first + n_occurrences - 1 for each patient and
    purpose: shape (n_patients, n_purposes, n_occurrences), equal element by element to
    `uniforms`. Contiguous patient ids (a batch) are filled by numpy's generator directly;
    any other ids by the vectorised function, using all four words of every block."""
    patients = _as_indices(patient_ids, "patient ids").reshape(-1)
    if n_occurrences < 0 or first < 0:
        raise ValueError(f"occurrences must be >= 0, got {first} and {n_occurrences}")
    low, skip = divmod(first, 4)
    n_blocks = -(-(skip + n_occurrences) // 4)
    ids = [purpose_id(p) for p in purposes]
    if _contiguous(patients):
        start = int(patients[0])
        words = np.empty((patients.size, len(ids), 4 * n_blocks), np.uint64)
        for j, purpose in enumerate(ids):
            for b in range(n_blocks):
                words[:, j, 4 * b:4 * b + 4] = _run(seed, start, patients.size, purpose, low + b)
    else:
        counter_block = np.arange(low, low + n_blocks, dtype=np.uint64)[None, None, :]
        zero = np.uint64(0)
        blocks = philox4x64_10(
            (patients[:, None, None], counter_block, zero, zero),
            (_as_seed(seed), np.asarray(ids, dtype=np.uint64)[None, :, None]),
        )
        blocks = np.broadcast_to(blocks, (4, patients.size, len(ids), n_blocks))
        words = np.moveaxis(blocks, 0, -1).reshape(patients.size, len(ids), 4 * n_blocks)
    return to_open_unit(words[:, :, skip:skip + n_occurrences])
