"""A multivariate normal over a group of PSA parameters, some of them on the log scale.

A fit's estimates (log scale, log shape, coefficients) are approximately jointly normal with
the covariance of the fit (the inverse of the observed information; e.g. Pawitan 2001, "In
All Likelihood", ch. 9), so drawing them together keeps their correlation, which drawing each
alone would lose. A member `on the log scale` is drawn as exp of its normal component: its
value in the scenario stays on its natural scale (a shape, a scale) and is always positive.

Like every PSA family (`microsim.uncertainty.distributions`), this one turns caller-supplied
uniforms into values: component k of draw d is Phi^-1 of the uniform of member k, and
x = means + R z with R the symmetric square root of the covariance (from its eigenvalues,
so a semi-definite covariance, such as one with a fixed member, is fine).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import special

from microsim.scenario.correlation import covariance_problem

@dataclass(frozen=True)
class MultivariateNormal:
    """Normal(means, covariance) over k parameters; members with on_log[k] True are exp of
    their component. Checked at construction (ValueError)."""
    means: tuple[float, ...]
    covariance: tuple[tuple[float, ...], ...]
    on_log: tuple[bool, ...]
    root: np.ndarray = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        means = np.asarray(self.means, dtype=float)
        if means.ndim != 1 or not means.size or not np.all(np.isfinite(means)):
            raise ValueError(f"means must be finite numbers, got {self.means!r}")
        problem = covariance_problem(self.covariance)
        if problem is not None:
            raise ValueError(f"covariance{problem[0]} {problem[1]}")
        matrix = np.asarray(self.covariance, dtype=float)
        if matrix.shape != (means.size, means.size) or len(self.on_log) != means.size:
            raise ValueError(f"{means.size} means need a {means.size} x {means.size} covariance "
                             f"and {means.size} log flags, got {matrix.shape} and "
                             f"{len(self.on_log)}")
        values, vectors = np.linalg.eigh((matrix + matrix.T) / 2)
        root = (vectors * np.sqrt(np.clip(values, 0.0, None))) @ vectors.T
        object.__setattr__(self, "root", root)

    @property
    def n_uniforms(self) -> int:
        return len(self.means)

    def ppf(self, u) -> np.ndarray:
        """Uniforms (draws, k) in (0, 1) to parameter values (draws, k)."""
        z = special.ndtri(np.asarray(u, dtype=float))
        x = np.asarray(self.means) + z @ self.root.T
        log = np.asarray(self.on_log, dtype=bool)
        x[:, log] = np.exp(x[:, log])
        return x
