"""exp(Q h) and its discounted integrals for a whole stack of rate matrices, by numpy products.

The exact exposure of a rate model needs, for every patient and step, F = exp(Q h) and,
for each discount rate delta, G = integral_0^h e^{-delta u} exp(Q u) du: the two blocks of
the exponential of Van Loan's block matrix (Van Loan 1978, "Computing integrals involving
the matrix exponential", IEEE Trans. Automatic Control), with A = Q - delta I:

    exp([[A, I], [0, 0]] h) = [[e^{-delta h} F, G], [0, I]].

scipy.linalg.expm takes a stack of matrices but visits them one by one in Python, each
with its own LAPACK solve, and on small matrices that (with BLAS threads waking for each
one) is all the cost. Here every step is a product over the whole stack instead:

- scaling and squaring (Moler & Van Loan 2003, "Nineteen dubious ways to compute the
  exponential of a matrix, twenty-five years later", SIAM Review 45:3-49): with
  X = Q h / 2^s small, squaring the block matrix s times is G <- G + e^{-delta L} F G,
  F <- F F (L the step reached so far);
- uniformisation (Jensen 1953, "Markoff chains as an aid in the study of Markoff
  processes", Skandinavisk Aktuarietidskrift 36:87-91): X + c I = Y has no negative entry
  when c = max(-X_ii) (Q's off-diagonal entries are rates), so exp(X) = e^{-c} exp(Y) and,
  with c_delta = c + delta h / 2^s (the same Y for every delta),

      F_s = e^{-c} sum_k Y^k / k!,   G_s = (h / 2^s) sum_k b_k(c_delta) Y^k,
      b_k(c) = integral_0^1 e^{-c t} t^k / k! dt = e^{-c} / (k + 1)! + c b_{k+1}(c)

  (integration by parts): sums of non-negative terms, with no cancellation anywhere.

Scaling takes every c_delta and ||Y||_inf to at most RATE_PER_STEP; then the series stop
where what they leave out, at most sum_{k > m} N^k / k! of their norm (N the larger of
the two; F_s >= e^{-c} I and G_s >= b_0 h I entrywise), is below TAIL, and never before
MIN_TERMS: an entry reached in d jumps is about N^d / d! (the chance of dying within a
short step, say), and what the series leave out of it about N^{m+1-d} d! / (m+1)! of it,
so small entries keep their relative accuracy too. A relative error e in F_s grows to
about 2^s e over s squarings (as in every scaling and squaring method), so scaling only as
far as the positive series need keeps that small: 2^s < ||Q h|| / 2 (1e-13 for a rate of
4000 per step).
"""
from __future__ import annotations

import math

import numpy as np

RATE_PER_STEP = 4.0  # the most N may be after scaling
TAIL = 1e-17  # what the series may leave out, relative to their norm
MIN_TERMS = 12  # the fewest powers kept, for the accuracy of small entries


def exponential_and_integrals(Q: np.ndarray, h: np.ndarray,
                              deltas: tuple[float, ...]) -> tuple[np.ndarray, list[np.ndarray]]:
    """For a stack Q (U, E, E) with no negative off-diagonal entry, steps h >= 0 (U,) and
    discount rates delta >= 0: exp(Q h) and, for each delta, integral_0^h e^{-delta u}
    exp(Q u) du, each (U, E, E). Empty steps (h = 0) are I and 0 without any work."""
    U, E, _ = Q.shape
    F = np.broadcast_to(np.eye(E), Q.shape).copy()
    G = [np.zeros(Q.shape) for _ in deltas]
    moving = np.flatnonzero(h > 0)
    if moving.size:
        F[moving], parts = moving_steps(Q[moving], h[moving], deltas)
        for whole, part in zip(G, parts):
            whole[moving] = part
    return F, G


def moving_steps(Q: np.ndarray, h: np.ndarray, deltas: tuple[float, ...]) -> tuple:
    """exponential_and_integrals for steps h > 0: scale, sum the series, square back."""
    eye = np.eye(Q.shape[1], dtype=bool)
    X = Q * h[:, None, None]
    if (X[:, ~eye] < 0).any() or min(deltas, default=0.0) < 0:
        raise ValueError("uniformisation needs non-negative rates and discount rates")
    shift = np.maximum(-X[:, eye], 0.0).max(axis=1)
    Y = X + shift[:, None, None] * eye
    size = np.maximum(shift + max(deltas, default=0.0) * h, Y.sum(axis=2).max(axis=1))
    halvings = np.zeros(len(h), int)
    big = size > RATE_PER_STEP
    halvings[big] = np.ceil(np.log2(size[big] / RATE_PER_STEP)).astype(int)
    step = h * np.exp2(-halvings)  # L, the step the blocks are for so far
    Y *= (step / h)[:, None, None]
    shift *= step / h
    last = terms(size * step / h)
    total, sums = series(Y, last, [shift + delta * step for delta in deltas])
    F = np.exp(-shift)[:, None, None] * total
    G = [step[:, None, None] * weighted for weighted in sums]
    for k in range(int(halvings.max(initial=0))):
        more = np.flatnonzero(halvings > k)
        F_k = F[more]
        for delta, G_delta in zip(deltas, G):
            G_k = G_delta[more]
            G_delta[more] = G_k + np.exp(-delta * step[more])[:, None, None] * (F_k @ G_k)
        F[more] = F_k @ F_k
        step[more] *= 2
    return F, G


def terms(size: np.ndarray) -> np.ndarray:
    """Each matrix's last power m to keep: the first from MIN_TERMS on with
    sum_{k > m} size^k / k! < TAIL (the tail after term m + 1 is below that term /
    (1 - size / (m + 2))). Each matrix stops at its own m, so its numbers do not depend on
    the others in its stack."""
    m = np.full(size.shape, MIN_TERMS)
    term = size ** (MIN_TERMS + 1) / math.factorial(MIN_TERMS + 1)  # size^(m + 1) / (m + 1)!
    while True:
        with np.errstate(divide="ignore"):
            bound = np.where(m + 2 > size, term / (1 - size / (m + 2)), np.inf)
        short = bound >= TAIL
        if not short.any():
            return m
        m += short
        term = np.where(short, term * size / (m + 1), term)


def series(Y: np.ndarray, last: np.ndarray, shifts: list[np.ndarray]) -> tuple:
    """sum_k Y^k / k! and, for each shift c (per matrix), sum_k b_k(c) Y^k, for
    k = 0..last (per matrix): the powers of Y once for all of them."""
    top = int(last.max(initial=0))
    kept = np.arange(top + 1)[:, None] <= last  # (top + 1, U)
    factorials = np.array([math.factorial(k) for k in range(top + 1)], float)[:, None]
    weights = [kept / factorials] + [kept * integral_weights(c, top) for c in shifts]
    power = np.broadcast_to(np.eye(Y.shape[1]), Y.shape).copy()
    sums = [w[0][:, None, None] * power for w in weights]
    for k in range(1, top + 1):
        power = power @ Y
        for total, w in zip(sums, weights):
            total += w[k][:, None, None] * power
    return sums[0], sums[1:]


EXTRA = 40  # terms of each b_k's own series beyond b_m


def integral_weights(shift: np.ndarray, m: int) -> np.ndarray:
    """b_k(c) = integral_0^1 e^{-c t} t^k / k! dt = e^{-c} sum_j c^j / (k + j + 1)! for
    k = 0..m, (m + 1, U), by the recursion b_k = e^{-c} / (k + 1)! + c b_{k+1} started at 0
    for k = m + EXTRA: it sums the first m + EXTRA - k + 1 >= EXTRA + 1 terms of that
    positive series exactly, and what it leaves out is below c^41 / 41! < 1e-24 of it
    (c <= 4)."""
    decay = np.exp(-shift)
    weights = np.empty((m + 1, len(shift)))
    b = np.zeros_like(shift)
    for k in range(m + EXTRA, -1, -1):
        b = decay / math.factorial(k + 1) + shift * b
        if k <= m:
            weights[k] = b
    return weights
