"""Penalised regression splines in one to four inputs, smoothing chosen by generalised
cross-validation: the smoother behind EVPPI by regression (`microsim.uncertainty.evppi`).

Each input gets a cubic B-spline basis with interior knots at quantiles of its values and
the O'Sullivan penalty, the integrated squared second derivative of the fitted curve
(O'Sullivan 1986, "A statistical perspective on ill-posed inverse problems", Statistical
Science 1:502-518; Wand & Ormerod 2008, "On semiparametric regression with O'Sullivan
penalized splines", Australian & New Zealand Journal of Statistics 50:179-198). Its null
space is the straight lines whatever the knots, so a response linear in the inputs is
fitted without penalty bias. Several inputs are joined by a tensor product of the marginal
bases, with one penalty per input acting along its own margin (the Kronecker-sum penalty
of Wood 2006, "Low-rank scale-invariant tensor product smooths for generalized additive
mixed models", Biometrics 62:1025-1036); its null space holds the products of lines,
so interactions such as price x effect are not penalised either.

The coefficients minimise sum_i (y_i - x_i' b)^2 + sum_j lambda_j b' S_j b, and the
smoothing parameters minimise the generalised cross-validation score
n RSS / (n - tr A)^2, A the hat matrix (Craven & Wahba 1979, "Smoothing noisy data with
spline functions", Numerische Mathematik 31:377-403): by a grid over one common lambda,
then Nelder-Mead over each log lambda for several inputs. Once the smoothing is chosen
the fit is linear in the response (fitted = A y), which `Fit.smooth` applies to others.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import linalg, optimize
from scipy.interpolate import BSpline

DEGREE = 3
BASIS_SIZE = {1: 12, 2: 7, 3: 5, 4: 4}  # per input, by the number of inputs
LOG_LAMBDA = (-8.0, 8.0)  # search range of log10 lambda (penalties scaled to the data)
GRID = 33  # points of the first, common search


def marginal_basis(x: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray]:
    """Cubic B-spline design (n, k) on x scaled to [0, 1], interior knots at quantiles, and
    the penalty matrix (k, k) of integrals of products of second derivatives over [0, 1].
    Simpson's rule is exact for them: second derivatives of cubic splines are piecewise
    linear, so each product is a quadratic between knots."""
    low, high = float(x.min()), float(x.max())
    u = (x - low) / (high - low)
    inner = np.unique(np.quantile(u, np.linspace(0.0, 1.0, size - DEGREE + 1)[1:-1]))
    inner = inner[(inner > 0.0) & (inner < 1.0)]
    knots = np.concatenate([np.zeros(DEGREE + 1), inner, np.ones(DEGREE + 1)])
    design = BSpline.design_matrix(u, knots, DEGREE).toarray()
    k = design.shape[1]
    curvature = BSpline(knots, np.eye(k), DEGREE).derivative(2)
    ends = np.concatenate([[0.0], inner, [1.0]])
    a, b = ends[:-1], ends[1:]
    d_a, d_m, d_b = curvature(a), curvature((a + b) / 2), curvature(b)  # (intervals, k)
    width = (b - a)[:, None, None] / 6.0
    penalty = (width * (d_a[:, :, None] * d_a[:, None, :] + 4 * d_m[:, :, None] * d_m[:, None, :]
                        + d_b[:, :, None] * d_b[:, None, :])).sum(axis=0)
    return design, penalty


def minimum_rows(d: int) -> int:
    """The fewest rows a smoother of d inputs takes: two per coefficient of the smallest
    (cubic, no interior knot) basis."""
    return 2 * (DEGREE + 1) ** d


def row_kron(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Row-wise Kronecker product: row i is kron(a_i, b_i)."""
    return (a[:, :, None] * b[:, None, :]).reshape(a.shape[0], -1)


class Smoother:
    """The design and penalties for inputs (n, d), d from 1 to 4, ready to fit any
    response. Raises ValueError when an input does not vary or there are too few rows."""

    def __init__(self, inputs: np.ndarray):
        inputs = np.asarray(inputs, dtype=float)
        n, d = inputs.shape
        if d not in BASIS_SIZE:
            raise ValueError(f"a smoother takes 1 to {max(BASIS_SIZE)} inputs, got {d}")
        if np.any(inputs.max(axis=0) == inputs.min(axis=0)):
            raise ValueError("every input must vary")
        if n < minimum_rows(d):
            raise ValueError(f"{n} rows are too few for {d} inputs: at least "
                             f"{minimum_rows(d)} are needed")
        size = BASIS_SIZE[d]
        while size > DEGREE + 1 and size**d > n / 4:  # at least four rows per coefficient
            size -= 1
        margins = [marginal_basis(inputs[:, j], size) for j in range(d)]
        design = margins[0][0]
        for basis, _ in margins[1:]:
            design = row_kron(design, basis)
        sizes = [basis.shape[1] for basis, _ in margins]
        self.design = design
        self.penalties = []
        for j, (_, penalty) in enumerate(margins):
            full = np.ones((1, 1))
            for i, k in enumerate(sizes):
                full = np.kron(full, penalty if i == j else np.eye(k))
            self.penalties.append(full)
        self.n = n

    def fit(self, y: np.ndarray, log_lambdas: np.ndarray | None = None) -> "Fit":
        """The penalised least-squares fit of y at every row; smoothing chosen by GCV unless
        `log_lambdas` (log10, one per input) are given."""
        y = np.asarray(y, dtype=float)
        centre, scale = float(y.mean()), float(y.std())
        X = self.design
        gram = X.T @ X
        # each penalty scaled to the Gram matrix, so that lambda = 1 is a middling fit
        penalties = [P * (np.trace(gram) / np.trace(P)) for P in self.penalties]
        ridge = 1e-10 * np.trace(gram) / gram.shape[0] * np.eye(gram.shape[0])
        z = (y - centre) / (scale or 1.0)
        moment, total = X.T @ z, float(z @ z)

        def solve(logs) -> tuple[tuple, np.ndarray, float, float]:
            system = gram + ridge + sum(10.0**l * P for l, P in zip(logs, penalties))
            factor = linalg.cho_factor(system)
            beta = linalg.cho_solve(factor, moment)
            rss = max(total - 2 * beta @ moment + beta @ gram @ beta, 0.0)
            return factor, beta, rss, float(np.trace(linalg.cho_solve(factor, gram)))

        def gcv(logs) -> float:
            _, _, rss, trace = solve(np.clip(logs, *LOG_LAMBDA))
            return self.n * rss / max(self.n - trace, 1e-9) ** 2

        if log_lambdas is None:  # a constant response is fitted exactly by any smoothing
            log_lambdas = choose(gcv, len(penalties)) if scale else np.zeros(len(penalties))
        factor, beta, _, trace = solve(np.asarray(log_lambdas, dtype=float))
        return Fit(centre + scale * (X @ beta), np.asarray(log_lambdas, dtype=float), trace,
                   X, factor)


def choose(score, d: int) -> np.ndarray:
    """log10 smoothing parameters minimising `score`: the best common value on a grid,
    then a bounded refinement (one input) or Nelder-Mead from it (several inputs; at most
    25 evaluations per input, each a Cholesky factorisation)."""
    common = np.linspace(*LOG_LAMBDA, GRID)
    best = common[int(np.argmin([score(np.full(d, l)) for l in common]))]
    step = common[1] - common[0]
    if d == 1:
        found = optimize.minimize_scalar(
            lambda l: score(np.array([l])), method="bounded",
            bounds=(max(best - step, LOG_LAMBDA[0]), min(best + step, LOG_LAMBDA[1])))
        return np.array([found.x])
    simplex = best + step * np.vstack([np.zeros(d), np.eye(d)])
    found = optimize.minimize(score, np.full(d, best), method="Nelder-Mead",
                              options={"maxfev": 25 * d, "xatol": 0.05, "fatol": 1e-6,
                                       "initial_simplex": simplex})
    return np.clip(found.x, *LOG_LAMBDA)


@dataclass(frozen=True)
class Fit:
    """Fitted values at every row, the log10 smoothing parameters, the effective degrees of
    freedom tr A, and the factorised system that applies the same smoother to others."""
    fitted: np.ndarray
    log_lambdas: np.ndarray
    edf: float
    design: np.ndarray
    factor: tuple

    def smooth(self, values: np.ndarray) -> np.ndarray:
        """A v for each column v of `values` (n, m), at this fit's smoothing."""
        return self.design @ linalg.cho_solve(self.factor, self.design.T @ values)


def smoothing_words(d: int) -> str:
    """How the smoother of d inputs is made, in a table's words."""
    shape = "a cubic spline" if d == 1 else f"a tensor product of {d} cubic splines"
    return (f"{shape} (O'Sullivan penalty, knots at quantiles), smoothing by generalised "
            "cross-validation")
