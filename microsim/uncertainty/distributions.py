"""Parameter distributions for probabilistic sensitivity analysis (PSA), read from uniforms.

Every family turns caller-supplied uniforms into values through its quantile function
(`ppf`), so a parameter draw is a pure function of the uniforms handed in: the project's
counter-based streams make the uniforms, this module never draws random numbers itself.
Parameters are checked once, at construction; bad ones raise ValueError (the scenario
reader turns that into a ScenarioError naming the field).

Method-of-moments constructors (`from_mean_sd`) follow Briggs, Claxton & Sculpher (2006),
"Decision Modelling for Health Economic Evaluation", ch. 4.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping

import numpy as np
import pandas as pd
from scipy import special


def _number(name: str, value: object) -> float:
    try:
        number = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a number, got {value!r}") from None
    if not math.isfinite(number):
        raise ValueError(f"{name} must be finite, got {value!r}")
    return number


def _positive(name: str, value: object) -> float:
    number = _number(name, value)
    if number <= 0:
        raise ValueError(f"{name} must be > 0, got {value!r}")
    return number


def _uniforms(u: object) -> np.ndarray:
    """Uniforms in [0, 1]; the end points map to the ends of the support, as in scipy."""
    array = np.asarray(u, dtype=float)
    if not np.all((array >= 0.0) & (array <= 1.0)):  # also refuses NaN
        raise ValueError("uniforms must lie in [0, 1]")
    return array


def _set(instance: object, **values: object) -> None:
    for name, value in values.items():
        object.__setattr__(instance, name, value)


@dataclass(frozen=True)
class Beta:
    """Beta(alpha, beta): probabilities and utilities bounded by 0 and 1."""
    alpha: float
    beta: float
    n_uniforms = 1

    def __post_init__(self) -> None:
        _set(self, alpha=_positive("alpha", self.alpha), beta=_positive("beta", self.beta))

    @classmethod
    def from_mean_sd(cls, mean: float, sd: float) -> Beta:
        """alpha = m*(m(1-m)/s^2 - 1), beta = (1-m)*(m(1-m)/s^2 - 1)."""
        m, s = _number("mean", mean), _positive("sd", sd)
        if not 0 < m < 1:
            raise ValueError(f"mean of a beta must be in (0, 1), got {mean!r}")
        if s * s >= m * (1 - m):
            raise ValueError(f"sd of a beta with mean {m:g} must be < {math.sqrt(m * (1 - m)):.6g}, got {sd!r}")
        common = m * (1 - m) / (s * s) - 1
        return cls(m * common, (1 - m) * common)

    @property
    def mean(self) -> float:
        return self.alpha / (self.alpha + self.beta)

    @property
    def variance(self) -> float:
        total = self.alpha + self.beta
        return self.alpha * self.beta / (total * total * (total + 1))

    def ppf(self, u: object) -> np.ndarray:
        return special.betaincinv(self.alpha, self.beta, _uniforms(u))


@dataclass(frozen=True)
class Gamma:
    """Gamma(shape, scale): costs and rates, positive and right-skewed."""
    shape: float
    scale: float
    n_uniforms = 1

    def __post_init__(self) -> None:
        _set(self, shape=_positive("shape", self.shape), scale=_positive("scale", self.scale))

    @classmethod
    def from_mean_sd(cls, mean: float, sd: float) -> Gamma:
        """shape = m^2/s^2, scale = s^2/m."""
        m, s = _positive("mean", mean), _positive("sd", sd)
        return cls(m * m / (s * s), s * s / m)

    @property
    def mean(self) -> float:
        return self.shape * self.scale

    @property
    def variance(self) -> float:
        return self.shape * self.scale**2

    def ppf(self, u: object) -> np.ndarray:
        return self.scale * special.gammaincinv(self.shape, _uniforms(u))


@dataclass(frozen=True)
class LogNormal:
    """Log-normal: exp of Normal(meanlog, sdlog); relative risks, hazard ratios, costs."""
    meanlog: float
    sdlog: float
    n_uniforms = 1

    def __post_init__(self) -> None:
        _set(self, meanlog=_number("meanlog", self.meanlog), sdlog=_positive("sdlog", self.sdlog))

    @classmethod
    def from_mean_sd(cls, mean: float, sd: float) -> LogNormal:
        """sdlog^2 = log(1 + s^2/m^2), meanlog = log(m) - sdlog^2/2."""
        m, s = _positive("mean", mean), _positive("sd", sd)
        variance_log = math.log1p((s / m) ** 2)
        return cls(math.log(m) - variance_log / 2, math.sqrt(variance_log))

    @property
    def mean(self) -> float:
        return math.exp(self.meanlog + self.sdlog**2 / 2)

    @property
    def variance(self) -> float:
        return math.expm1(self.sdlog**2) * math.exp(2 * self.meanlog + self.sdlog**2)

    def ppf(self, u: object) -> np.ndarray:
        return np.exp(self.meanlog + self.sdlog * special.ndtri(_uniforms(u)))


@dataclass(frozen=True)
class Normal:
    """Normal(mean, sd): regression coefficients and other unbounded quantities."""
    mean: float
    sd: float
    n_uniforms = 1

    def __post_init__(self) -> None:
        _set(self, mean=_number("mean", self.mean), sd=_positive("sd", self.sd))

    @property
    def variance(self) -> float:
        return self.sd**2

    def ppf(self, u: object) -> np.ndarray:
        return self.mean + self.sd * special.ndtri(_uniforms(u))


@dataclass(frozen=True)
class Uniform:
    """Uniform(lower, upper): when only a plausible range is known."""
    lower: float
    upper: float
    n_uniforms = 1

    def __post_init__(self) -> None:
        lower, upper = _number("lower", self.lower), _number("upper", self.upper)
        if not lower < upper:
            raise ValueError(f"lower must be < upper, got lower={self.lower!r}, upper={self.upper!r}")
        _set(self, lower=lower, upper=upper)

    @property
    def mean(self) -> float:
        return (self.lower + self.upper) / 2

    @property
    def variance(self) -> float:
        return (self.upper - self.lower) ** 2 / 12

    def ppf(self, u: object) -> np.ndarray:
        return self.lower + (self.upper - self.lower) * _uniforms(u)


@dataclass(frozen=True)
class Fixed:
    """A parameter held at one value; it still takes one uniform column, which it ignores,
    so that switching a parameter between fixed and uncertain leaves the others' draws alone."""
    value: float
    n_uniforms = 1

    def __post_init__(self) -> None:
        _set(self, value=_number("value", self.value))

    @property
    def mean(self) -> float:
        return self.value

    @property
    def variance(self) -> float:
        return 0.0

    def ppf(self, u: object) -> np.ndarray:
        return np.full_like(_uniforms(u), self.value)


@dataclass(frozen=True)
class Dirichlet:
    """Dirichlet(alphas): a row of multinomial probabilities that sums to one.

    Drawn as independent Gamma(alpha_i, 1) quantiles of one uniform per component,
    divided by their sum (Briggs, Claxton & Sculpher 2006, ch. 4)."""
    alphas: tuple[float, ...]

    def __post_init__(self) -> None:
        alphas = tuple(_positive(f"alphas[{i}]", a) for i, a in enumerate(np.ravel(self.alphas)))
        if len(alphas) < 2:
            raise ValueError(f"a dirichlet needs at least 2 alphas, got {len(alphas)}")
        _set(self, alphas=alphas)

    @property
    def n_uniforms(self) -> int:
        return len(self.alphas)

    @property
    def mean(self) -> np.ndarray:
        alphas = np.array(self.alphas)
        return alphas / alphas.sum()

    @property
    def variance(self) -> np.ndarray:
        alphas = np.array(self.alphas)
        total = alphas.sum()
        return alphas * (total - alphas) / (total**2 * (total + 1))

    def ppf(self, u: object) -> np.ndarray:
        """Uniforms of shape (..., k) to probability vectors of shape (..., k)."""
        uniforms = _uniforms(u)
        if uniforms.shape[-1:] != (self.n_uniforms,):
            raise ValueError(f"dirichlet needs {self.n_uniforms} uniforms on the last axis, got shape {uniforms.shape}")
        gammas = special.gammaincinv(np.array(self.alphas), uniforms)
        return gammas / gammas.sum(axis=-1, keepdims=True)


Distribution = Beta | Gamma | LogNormal | Normal | Uniform | Fixed | Dirichlet

FAMILIES: dict[str, type] = {
    "beta": Beta, "gamma": Gamma, "lognormal": LogNormal, "normal": Normal,
    "uniform": Uniform, "fixed": Fixed, "dirichlet": Dirichlet,
}


def make_distribution(family: str, params: Mapping[str, object]) -> Distribution:
    """Build a distribution from a family name and its parameters, as a scenario file gives them.

    Beta, gamma and lognormal also accept `mean` and `sd` (method of moments)."""
    if family not in FAMILIES:
        raise ValueError(f"unknown distribution family {family!r}; known: {', '.join(FAMILIES)}")
    cls = FAMILIES[family]
    given = set(params)
    if given == {"mean", "sd"} and hasattr(cls, "from_mean_sd"):
        return cls.from_mean_sd(params["mean"], params["sd"])
    expected = set(cls.__dataclass_fields__)
    if given != expected:
        alternative = " (or mean, sd)" if hasattr(cls, "from_mean_sd") else ""
        raise ValueError(f"{family} takes parameters {', '.join(sorted(expected))}{alternative}; "
                         f"got {', '.join(sorted(given)) or 'none'}")
    return cls(**params)


def correlation_root(correlation: object) -> np.ndarray:
    """The symmetric square root of a correlation matrix (identity maps to identity).

    Refuses a matrix that is not square, symmetric, with unit diagonal and positive
    semi-definite; the message names the smallest eigenvalue."""
    matrix = np.asarray(correlation, dtype=float)
    if matrix.ndim != 2 or matrix.shape[0] != matrix.shape[1] or not np.all(np.isfinite(matrix)):
        raise ValueError(f"correlation must be a finite square matrix, got shape {matrix.shape}")
    if not np.allclose(matrix, matrix.T, rtol=0, atol=1e-9):
        raise ValueError("correlation matrix must be symmetric")
    if not np.allclose(np.diag(matrix), 1.0, rtol=0, atol=1e-9):
        raise ValueError("correlation matrix must have ones on the diagonal")
    eigenvalues, eigenvectors = np.linalg.eigh((matrix + matrix.T) / 2)
    if eigenvalues.min() < -1e-9:
        raise ValueError(f"correlation matrix is not positive semi-definite: "
                         f"smallest eigenvalue {eigenvalues.min():.6g}")
    return (eigenvectors * np.sqrt(np.clip(eigenvalues, 0.0, None))) @ eigenvectors.T


def draw_parameters(distributions: Mapping[str, Distribution], uniforms: object,
                    correlation: object = None) -> dict[str, np.ndarray]:
    """Turn a (draws x columns) array of uniforms into parameter draws.

    Columns are consumed in the mapping's order, `n_uniforms` each (one per scalar
    parameter, k per k-component Dirichlet). `correlation`, if given, is a correlation
    matrix over the scalar parameters in that order (Dirichlets excluded) applied through a
    Gaussian copula: z = Phi^-1(u) is mixed by the matrix's symmetric square root and mapped
    back through Phi, so every marginal keeps its family. Returns name -> array of shape
    (draws,) for scalars and (draws, k) for Dirichlets.
    """
    u = _uniforms(uniforms)
    widths = [d.n_uniforms for d in distributions.values()]
    if u.ndim != 2 or u.shape[1] != sum(widths):
        raise ValueError(f"uniforms must have shape (draws, {sum(widths)}), got {u.shape}")
    starts = np.concatenate([[0], np.cumsum(widths)[:-1]]).astype(int)
    scalar_columns = [int(s) for s, d in zip(starts, distributions.values()) if not isinstance(d, Dirichlet)]
    if correlation is not None:
        root = correlation_root(correlation)
        if root.shape[0] != len(scalar_columns):
            raise ValueError(f"correlation must be {len(scalar_columns)} x {len(scalar_columns)} "
                             f"(one row per scalar parameter), got {root.shape}")
        u = u.copy()
        u[:, scalar_columns] = special.ndtr(special.ndtri(u[:, scalar_columns]) @ root.T)
    return {
        name: d.ppf(u[:, start:start + d.n_uniforms]) if isinstance(d, Dirichlet) else d.ppf(u[:, start])
        for (name, d), start in zip(distributions.items(), starts)
    }


def draws_table(draws: Mapping[str, np.ndarray]) -> pd.DataFrame:
    """Long table of parameter draws: draw, parameter, component (0 for scalars), value."""
    pieces = []
    for name, values in draws.items():
        matrix = np.asarray(values, dtype=float).reshape(len(values), -1)
        n_draws, n_components = matrix.shape
        pieces.append(pd.DataFrame({
            "draw": np.repeat(np.arange(n_draws, dtype=np.int64), n_components),
            "parameter": pd.Series([name] * matrix.size, dtype="string"),
            "component": np.tile(np.arange(n_components, dtype=np.int64), n_draws),
            "value": matrix.ravel(),
        }))
    return pd.concat(pieces, ignore_index=True)
