"""exp(A h) and its integral for a whole stack of small rate matrices, by numpy products.

The exact exposure of a rate model needs, for every patient and step, F = exp(A h) and
G = integral_0^h exp(A u) du, with A = Q - delta I (a generator less the discount rate).
They are the two blocks of the exponential of Van Loan's block matrix (Van Loan 1978,
"Computing integrals involving the matrix exponential", IEEE Trans. Automatic Control):

    exp([[A, I], [0, 0]] h) = [[F, G], [0, I]].

scipy.linalg.expm takes a stack of matrices but visits them one by one in Python, each
with its own LAPACK solve, and on small matrices that (with BLAS threads waking for each
one) is all the cost. Here every step is a product over the whole stack instead:

- scaling and squaring (Moler & Van Loan 2003, "Nineteen dubious ways to compute the
  exponential of a matrix, twenty-five years later", SIAM Review 45:3-49): with
  X = A h / 2^s small, squaring the block matrix s times is F <- F F, G <- G + F G;
- uniformisation (Jensen 1953, "Markoff chains as an aid in the study of Markoff
  processes", Skandinavisk Aktuarietidskrift 36:87-91): X + c I = Y has no negative entry
  when c = max(-X_ii) (A's off-diagonal entries are rates), so exp(X) = e^{-c} exp(Y) and

      F_s = e^{-c} sum_k Y^k / k!,   G_s = (h / 2^s) sum_k b_k Y^k,
      b_k = integral_0^1 e^{-c t} t^k / k! dt = e^{-c} / (k + 1)! + c b_{k+1}

  (integration by parts): sums of non-negative terms, with no cancellation anywhere.

Scaling takes c and ||Y||_inf to at most RATE_PER_STEP; then the series stop where what they
leave out, at most sum_{k > m} N^k / k! of their norm (N = max(c, ||Y||_inf); F_s >= e^{-c} I
and G_s >= b_0 h I entrywise), is below TAIL, and never before MIN_TERMS: an entry reached
in d jumps is about N^d / d! (the chance of dying within a short step, say), and what the
series leave out of it about N^{m+1-d} d! / (m+1)! of it, so small entries keep their
relative accuracy too. A relative error e in F_s grows to about
2^s e over s squarings (as in every scaling and squaring method), so scaling as little as
the positive series allow keeps that small: with N <= 4 it is 2^s * 1e-16 for
||Q h|| = 4 * 2^s (1e-13 for a rate of 4000 per step).
"""
from __future__ import annotations

import math

import numpy as np

RATE_PER_STEP = 4.0  # the most N may be after scaling
TAIL = 1e-17  # what the series may leave out, relative to their norm
MIN_TERMS = 12  # the fewest powers kept, for the accuracy of small entries


def exponential_and_integral(A: np.ndarray, h: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """For a stack A (U, E, E) with no negative off-diagonal entry and steps h >= 0 (U,):
    exp(A h) and integral_0^h exp(A u) du, each (U, E, E)."""
    U, E, _ = A.shape
    eye = np.eye(E, dtype=bool)
    X = A * h[:, None, None]
    if (X[:, ~eye] < 0).any():
        raise ValueError("uniformisation needs non-negative off-diagonal entries (rates)")
    shift = np.maximum(-X[:, eye], 0.0).max(axis=1)
    Y = X + shift[:, None, None] * np.eye(E)
    size = np.maximum(shift, Y.sum(axis=2).max(axis=1))  # N before scaling
    halvings = np.zeros(U, int)
    big = size > RATE_PER_STEP
    halvings[big] = np.ceil(np.log2(size[big] / RATE_PER_STEP)).astype(int)
    scale = np.exp2(-halvings)
    Y *= scale[:, None, None]
    shift *= scale
    F, G = series(Y, shift, terms(size * scale))
    G *= (h * scale)[:, None, None]
    for k in range(int(halvings.max(initial=0))):
        more = np.flatnonzero(halvings > k)
        F_k, G_k = F[more], G[more]
        G[more] = G_k + F_k @ G_k
        F[more] = F_k @ F_k
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


def series(Y: np.ndarray, shift: np.ndarray, last: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """e^{-c} sum_k Y^k / k! and sum_k b_k Y^k for k = 0..last (c = shift, both per matrix)."""
    top = int(last.max(initial=0))
    weights = integral_weights(shift, top) * (np.arange(top + 1)[:, None] <= last)  # (top + 1, U)
    power = np.broadcast_to(np.eye(Y.shape[1]), Y.shape).copy()
    F, G = power.copy(), weights[0][:, None, None] * power
    for k in range(1, top + 1):
        power = power @ Y
        F += ((k <= last) / math.factorial(k))[:, None, None] * power
        G += weights[k][:, None, None] * power
    return np.exp(-shift)[:, None, None] * F, G


EXTRA = 40  # terms of each b_k's own series beyond b_m


def integral_weights(shift: np.ndarray, m: int) -> np.ndarray:
    """b_k = integral_0^1 e^{-c t} t^k / k! dt = e^{-c} sum_j c^j / (k + j + 1)! for
    k = 0..m, by the recursion b_k = e^{-c} / (k + 1)! + c b_{k+1} started at 0 for
    k = m + EXTRA: it sums the first m + EXTRA - k + 1 >= EXTRA + 1 terms of that positive
    series exactly, and what it leaves out is below c^41 / 41! < 1e-24 of it (c <= 4)."""
    decay = np.exp(-shift)
    weights = np.empty((m + 1, len(shift)))
    b = np.zeros_like(shift)
    for k in range(m + EXTRA, -1, -1):
        b = decay / math.factorial(k + 1) + shift * b
        if k <= m:
            weights[k] = b
    return weights
