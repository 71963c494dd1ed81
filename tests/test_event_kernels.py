"""The vectorised event engine's compiled draws against `microsim.streams`, whose
Philox4x64-10 is checked against numpy.random.Philox and the Random123 known-answer
vectors in test_streams.py (as is the compiled Philox the kernel calls): the kernel's
round counts and blocks of four occurrences must give the streams' uniforms bit for bit,
for any patient ids and occurrences, however the rounds of patients interleave."""
import numpy as np

from microsim import streams
from microsim.engines import event_kernels
from microsim.engines.event_engine import DEPTH

PURPOSES = ("progress@well", "death@well", "flare@well")
KEYS = np.array([streams.purpose_id(p) for p in PURPOSES], np.uint64)


def test_draws_are_the_streams_uniforms_round_by_round():
    rng = np.random.default_rng(4)
    # scattered ids, and the largest an id can be
    ids = np.concatenate([rng.choice(2**40, 300, replace=False), [2**63 - 1]])
    seed = 2**64 - 5
    rounds = np.zeros(ids.size, np.int64)
    blocks = np.empty((ids.size, len(PURPOSES), 4))
    cached = np.full((ids.size, len(PURPOSES)), -1, np.int64)
    slots = np.arange(len(PURPOSES))
    made = [[] for _ in ids]
    for _ in range(200):  # patients take their rounds on different steps
        rows = np.flatnonzero(rng.random(ids.size) < 0.7)
        k = rounds[rows].copy()
        u = event_kernels.draws(np.uint64(seed), KEYS, slots, ids.astype(np.uint64), rows,
                                rounds, cached, blocks)
        assert np.array_equal(rounds[rows], k + 1)
        for j, purpose in enumerate(PURPOSES):
            np.testing.assert_array_equal(u[j], streams.uniforms(seed, ids[rows], purpose, k))
        for p, b in enumerate(rows):
            made[b].append(u[:, p])
    assert max(map(len, made)) > 4 * DEPTH  # past the event engine's first windows
    b = int(np.argmax(list(map(len, made))))  # one patient's whole sequence, at once
    for j, purpose in enumerate(PURPOSES):
        expected = streams.sequence(seed, int(ids[b]), purpose, 0, len(made[b]))
        np.testing.assert_array_equal([u[j] for u in made[b]], expected)


def test_copies_of_a_state_share_its_blocks_and_continue_its_rounds():
    # a state's copies (treatment phases) hold the state's purposes among theirs: each
    # round reads some of them at the state's count of rounds, which may have moved on in
    # another copy (a copy's first round inside a block, a purpose skipping blocks); the
    # uniforms must still be the streams' (streams.uniforms) at that occurrence
    rng = np.random.default_rng(8)
    ids = rng.choice(2**40, 200, replace=False)
    seed = 12345
    rounds = np.zeros(ids.size, np.int64)
    blocks = np.empty((ids.size, len(PURPOSES), 4))
    cached = np.full((ids.size, len(PURPOSES)), -1, np.int64)
    copies = [np.array([0, 1]), np.array([2, 0]), np.array([1])]
    for _ in range(300):
        slots = copies[rng.integers(len(copies))]
        rows = np.flatnonzero(rng.random(ids.size) < 0.5)
        k = rounds[rows].copy()
        u = event_kernels.draws(np.uint64(seed), KEYS, slots, ids.astype(np.uint64), rows,
                                rounds, cached, blocks)
        assert np.array_equal(rounds[rows], k + 1)
        for j, s in enumerate(slots.tolist()):
            np.testing.assert_array_equal(u[j], streams.uniforms(seed, ids[rows], PURPOSES[s], k))
    assert rounds.max() > 4 * DEPTH
