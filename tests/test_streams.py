"""Counter-based streams: Philox4x64-10 against numpy's, uniformity, independence and
invariance to batch size and order."""
import hashlib
import time

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from scipy.special import ndtri

from microsim import streams

SEED = 20261201
TWO_64 = 2**64


def as_int(words):
    """Little-endian 64-bit words -> one Python int (numpy's convention for Philox
    counter and key: array[i] = (value // 2**(64*i)) % 2**64)."""
    return sum(int(w) << (64 * i) for i, w in enumerate(words))


def numpy_block(counter_words, key_words):
    """Reference: numpy.random.Philox (Philox4x64-10) adds one to the 256-bit counter
    before producing each block, so to get the block of counter c start it at c - 1."""
    start = (as_int(counter_words) - 1) % 2**256
    return np.random.Philox(counter=start, key=as_int(key_words)).random_raw(4)


def test_known_answer_vectors():
    # Random123 known-answer vectors for philox4x64-10 (from memory; numpy agrees,
    # see the next tests): counter 0, key 0; and the pi-digit counter and key.
    zero = streams.philox4x64_10(np.zeros((4, 1), np.uint64), np.zeros((2, 1), np.uint64))
    assert [int(w) for w in zero[:, 0]] == [
        0x16554D9ECA36314C, 0xDB20FE9D672D0FDC, 0xD7E772CEE186176B, 0x7E68B68AEC7BA23B]
    counter = np.array([[0x243F6A8885A308D3], [0x13198A2E03707344],
                        [0xA4093822299F31D0], [0x082EFA98EC4E6C89]], np.uint64)
    key = np.array([[0x452821E638D01377], [0xBE5466CF34E90C6C]], np.uint64)
    assert [int(w) for w in streams.philox4x64_10(counter, key)[:, 0]] == [
        0xA528F45403E61D95, 0x38C72DBD566E9788, 0xA5A1610E72FD18B5, 0x57BD43B5E52B7FE6]


def test_philox_bit_exact_against_numpy_for_random_keys_and_counters():
    # Reference library: numpy.random.Philox, documented as Philox (4x64), 10 rounds.
    rng = np.random.default_rng(1)
    n = 300
    counters = rng.integers(0, TWO_64, size=(4, n), dtype=np.uint64)
    keys = rng.integers(0, TWO_64, size=(2, n), dtype=np.uint64)
    counters[:, 0] = TWO_64 - 1  # all-ones words exercise the 128-bit product carries
    keys[:, 1] = 0
    ours = streams.philox4x64_10(counters, keys)
    for i in range(n):
        np.testing.assert_array_equal(ours[:, i], numpy_block(counters[:, i], keys[:, i]))


def test_a_batch_is_one_run_of_numpys_philox_stream():
    # Documented layout: for one purpose and block k of four occurrences, patients
    # p .. p + n - 1 are the 4n raw words of numpy.random.Philox(key=(seed, purpose_id),
    # counter=k * 2**64 + p - 1), including the borrow at p = 0 (2**256 - 1 for k = 0).
    key = as_int([SEED, streams.purpose_id("death")])
    for first, k in ((0, 0), (0, 3), (5, 1), (2**40 + 3, 2)):
        reference = np.random.Philox(counter=(k * TWO_64 + first - 1) % 2**256,
                                     key=key).random_raw(4 * 7).reshape(7, 4)
        ids = np.arange(first, first + 7)
        ours = streams.uniforms(SEED, ids[:, None], "death", np.arange(4 * k, 4 * k + 4))
        np.testing.assert_array_equal(ours, streams.to_open_unit(reference))
        # the bulk path (contiguous ids) and the scattered path give the same numbers
        np.testing.assert_array_equal(streams.block(SEED, ids, ["death"], 4, first=4 * k)[:, 0],
                                      ours)
        for lane in range(4):
            np.testing.assert_array_equal(streams.uniforms(SEED, ids, "death", 4 * k + lane),
                                          ours[:, lane])


def test_scattered_and_contiguous_ids_agree():
    ids = np.arange(100, 400)
    bulk = streams.block(SEED, ids, ["a", "b"], 9, first=3)
    order = np.random.default_rng(2).permutation(ids.size)
    np.testing.assert_array_equal(streams.block(SEED, ids[order], ["a", "b"], 9, first=3),
                                  bulk[order])
    np.testing.assert_array_equal(streams.sequence(SEED, 117, "b", 3, 9), bulk[17, 1])


def test_sequence_equals_uniforms_for_every_purpose():
    # the documented meaning of `sequence`: the same numbers as `uniforms`; purpose ids with
    # the top bit set (about half of them) once came out of a float64-rounded key
    names = ["death", "well->dead@well", "a", "b", "flare@sick"]
    assert any(streams.purpose_id(n) >= 2**63 for n in names)
    assert any(streams.purpose_id(n) < 2**63 for n in names)
    for name in names:
        for patient, start in ((0, 0), (7, 33), (2**40 + 3, 130)):
            np.testing.assert_array_equal(
                streams.sequence(SEED, patient, name, start, 9),
                streams.uniforms(SEED, patient, name, np.arange(start, start + 9)))


def test_purpose_id_is_blake2b_of_the_name():
    # Reference: hashlib.blake2b, 8-byte digest read little-endian (the documented rule).
    expected = int.from_bytes(
        hashlib.blake2b(b"population:age", digest_size=8, person=b"microsim-purpose").digest(),
        "little")
    assert streams.purpose_id("population:age") == expected
    names = [f"transition:{i}" for i in range(1000)]
    assert len({streams.purpose_id(n) for n in names}) == len(names)


def test_open_unit_interval_never_reaches_zero_or_one():
    # Extreme words: 0 and 2**64 - 1 map to 2**-53 and 1 - 2**-53 (exactly representable).
    u = streams.to_open_unit(np.array([0, TWO_64 - 1, 2**63], dtype=np.uint64))
    assert u[0] == 2.0**-53 and u[1] == 1.0 - 2.0**-53 and u[2] == 0.5 + 2.0**-53
    assert np.all((u > 0) & (u < 1))


def test_uniformity_ks_and_chi_square():
    # Reference: scipy.stats.kstest and chisquare; fixed seed, level 1e-4.
    u = streams.uniforms(SEED, np.arange(50_000)[:, None], "uniformity", np.arange(4)).ravel()
    assert stats.kstest(u, "uniform").pvalue > 1e-4
    counts = np.bincount((u * 100).astype(int), minlength=100)
    assert stats.chisquare(counts).pvalue > 1e-4


# Pairs of draws that must be independent: (seed, patient offset, purpose, occurrence).
PAIRS = {
    "purposes": ((SEED, 0, "a", 0), (SEED, 0, "b", 0)),
    "patients": ((SEED, 0, "a", 0), (SEED, 1, "a", 0)),
    "lanes": ((SEED, 0, "a", 0), (SEED, 0, "a", 1)),
    "blocks": ((SEED, 0, "a", 3), (SEED, 0, "a", 4)),
    "seeds": ((1, 0, "a", 0), (2, 0, "a", 0)),
}


@pytest.mark.parametrize("pair", list(PAIRS.values()), ids=list(PAIRS))
def test_draws_are_uncorrelated(pair):
    # Under independence sqrt(n) * r is approximately standard normal (common practice).
    ids = np.arange(0, 80_000, 2)
    x, y = (streams.uniforms(seed, ids + offset, purpose, occurrence)
            for seed, offset, purpose, occurrence in pair)
    r = np.corrcoef(x, y)[0, 1]
    assert abs(r) * np.sqrt(ids.size) < 4


def test_block_equals_uniforms_element_by_element():
    ids = np.array([3, 17, 2**33])
    purposes = ["a", "b", "death"]
    table = streams.block(SEED, ids, purposes, 7)
    assert table.shape == (3, 3, 7)
    for p, purpose in enumerate(purposes):
        np.testing.assert_array_equal(
            table[:, p, :], streams.uniforms(SEED, ids[:, None], purpose, np.arange(7)))


@settings(max_examples=25, deadline=None)
@given(others=st.lists(st.integers(0, 10**6), max_size=40), position=st.integers(0, 40))
def test_patient_draws_do_not_depend_on_the_batch(others, position):
    # The invariance promised by the design: same draws alone, in any batch, any order.
    alone = streams.block(SEED, [17], ["a", "b"], 6)[0]
    batch = list(others)
    batch.insert(min(position, len(batch)), 17)
    where = batch.index(17)
    np.testing.assert_array_equal(streams.block(SEED, batch, ["a", "b"], 6)[where], alone)
    one = streams.uniforms(SEED, np.array(batch)[:, None], "b", np.arange(6))[where]
    np.testing.assert_array_equal(one, alone[1])


def test_patient_draws_same_in_batches_of_10_and_10000_shuffled():
    rng = np.random.default_rng(3)
    alone = streams.uniforms(SEED, 17, "event", np.arange(9))
    for size in (10, 10_000):
        ids = rng.permutation(np.arange(10, 10 + size))  # always holds 17
        where = int(np.flatnonzero(ids == 17)[0])
        grid = streams.uniforms(SEED, ids[:, None], "event", np.arange(9))
        np.testing.assert_array_equal(grid[where], alone)


def test_normals_are_inverse_normal_of_uniforms_and_standard():
    ids = np.arange(40_000)
    z = streams.normals(SEED, ids, "copula")
    np.testing.assert_array_equal(z, ndtri(streams.uniforms(SEED, ids, "copula")))
    # Reference: standard normal mean 0, variance 1; var of s^2 is 2/n for a normal.
    assert abs(z.mean()) * np.sqrt(ids.size) < 4
    assert abs(z.var() - 1) / np.sqrt(2 / ids.size) < 4
    assert stats.kstest(z, "norm").pvalue > 1e-4


def test_bad_arguments_are_programming_errors():
    with pytest.raises(ValueError):
        streams.uniforms(-1, [0], "a")
    with pytest.raises(ValueError):
        streams.uniforms(0, [-3], "a")
    with pytest.raises(TypeError):
        streams.uniforms(0, [0.5], "a")


def test_block_of_a_million_speed_and_mean():
    # Speed is reported, not asserted. The mean is checked: sd of a U(0,1) is 1/sqrt(12).
    start = time.perf_counter()
    table = streams.block(SEED, np.arange(250_000), ["speed"], 4)
    seconds = time.perf_counter() - start
    print(f"\nblock: {table.size / seconds:,.0f} uniforms per second")
    assert table.size == 1_000_000
    assert abs(table.mean() - 0.5) / (np.sqrt(1 / 12) / 1000) < 4


def test_the_compiled_philox_is_numpys_for_random_keys_and_counters():
    # Reference library: numpy.random.Philox. The compiled engines' own Philox
    # (engines.philox_compiled) must give the same block for counter (patient, block, 0, 0)
    # and key (seed, purpose), including all-ones words (the 128-bit product's carries).
    from microsim.engines.philox_compiled import philox_block
    rng = np.random.default_rng(5)
    words = rng.integers(0, TWO_64, size=(200, 4), dtype=np.uint64)
    words[0] = TWO_64 - 1
    words[1] = 0
    out = np.empty(4, np.uint64)
    for patient, block, seed, purpose in words:
        philox_block(patient, block, seed, purpose, out)
        np.testing.assert_array_equal(out, numpy_block([patient, block, 0, 0], [seed, purpose]))


def test_the_compiled_unit_map_is_to_open_unit():
    from microsim.engines.philox_compiled import open_unit
    rng = np.random.default_rng(6)
    words = np.concatenate([np.array([0, 1, 2**12 - 1, 2**12, TWO_64 - 1], np.uint64),
                            rng.integers(0, TWO_64, size=2000, dtype=np.uint64)])
    assert [open_unit(w) for w in words] == streams.to_open_unit(words).tolist()


def test_the_compiled_first_draws_are_the_streams_uniforms():
    # streams.uniforms (numpy's Philox, a run of counters for contiguous ids; our own Philox
    # for scattered ones) against the compiled engines' one block a patient
    from microsim.engines.philox_compiled import first_units
    ids = np.concatenate([np.arange(10, 500), np.random.default_rng(7).integers(0, 2**40, 300)])
    for seed in (0, 12345, TWO_64 - 1):
        for chunk in (ids[:490], ids[490:]):
            got = first_units(chunk.astype(np.uint64), np.uint64(seed),
                              np.uint64(streams.purpose_id("start")))
            assert got.tolist() == streams.uniforms(seed, chunk, "start").tolist()
