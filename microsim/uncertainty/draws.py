"""Parameter draws for probabilistic sensitivity analysis (PSA): one row per draw.

Draw d of parameter `name` reads the uniform `streams.uniforms(seed, d, "psa:" + name, k)`:
the draw index sits in the patient-id slot of the counter-based streams, the occurrence k
is the attempt (0, or more when an invalid draw is drawn again), and the "psa:" prefix
keeps these purposes apart from every patient-level purpose. So a draw is a pure function
of (seed, draw index, attempt): draw 17 is the same whether 20 or 2000 draws are asked
for, and fixing, adding or removing one parameter leaves the others' draws alone. Families and the Gaussian copula come from `microsim.uncertainty.distributions`.
"""
from __future__ import annotations

from typing import Mapping, Sequence

import numpy as np
import pandas as pd

from .distributions import Dirichlet, Distribution, correlation_root, draw_parameters, make_distribution
from .multivariate_normal import MultivariateNormal
from .. import streams
from ..scenario.errors import ScenarioError
from ..scenario.formulas import with_derived
from ..scenario.spec import NormalGroupSpec, ParameterSpec

Correlation = tuple[Sequence[str], object]
"""Parameter names and their correlation matrix (rows and columns in that order)."""
DirichletGroup = tuple[Sequence[str], Sequence[float]]
"""Parameter names and one alpha each: component k of one Dirichlet draw goes to name k."""


def purpose(name: str) -> str:
    """The stream purpose of one parameter's PSA uniforms."""
    return "psa:" + name


def _distribution(spec: ParameterSpec) -> Distribution:
    family, params = spec.distribution.family, dict(spec.distribution.params)
    if family == "fixed":
        params.setdefault("value", spec.value)
    try:
        return make_distribution(family, params)
    except ValueError as error:
        raise ScenarioError(f"parameters.{spec.name}.distribution", str(error)) from None


def _known(names: Sequence[str], parameters: Mapping[str, ParameterSpec], path: str) -> list[str]:
    names = [str(n) for n in names]
    unknown = [n for n in names if n not in parameters]
    if unknown:
        raise ScenarioError(path, f"unknown parameter {unknown[0]!r}; known: {', '.join(parameters)}")
    if len(set(names)) != len(names):
        raise ScenarioError(path, "names a parameter twice; give each parameter once")
    return names


def _dirichlet_groups(parameters: Mapping[str, ParameterSpec],
                      dirichlets: Sequence[DirichletGroup]) -> dict[str, tuple[list[str], Dirichlet]]:
    """Checked groups keyed "dirichlets[i]": member names and their Dirichlet."""
    groups: dict[str, tuple[list[str], Dirichlet]] = {}
    grouped: set[str] = set()
    for i, (names, alphas) in enumerate(dirichlets):
        path = f"dirichlets[{i}]"
        names = _known(names, parameters, path)
        if grouped & set(names):
            raise ScenarioError(path, f"{sorted(grouped & set(names))[0]!r} is already in an earlier group")
        if len(alphas) != len(names):
            raise ScenarioError(f"{path}.alphas", f"has {len(alphas)} alphas for {len(names)} "
                                                  "parameters; give one alpha per parameter")
        for name in names:
            if parameters[name].distribution is not None:
                raise ScenarioError(f"parameters.{name}.distribution", f"{name} is drawn by "
                                    f"{path}; remove its own distribution")
        try:
            groups[path] = names, Dirichlet(tuple(alphas))
        except ValueError as error:
            raise ScenarioError(f"{path}.alphas", str(error)) from None
        grouped |= set(names)
    return groups


def _copula_matrix(scalars: Sequence[str], correlation: Correlation | None,
                   parameters: Mapping[str, ParameterSpec]) -> np.ndarray | None:
    """The correlation over all scalar uncertain parameters: the given block, identity elsewhere."""
    if correlation is None:
        return None
    names, matrix = correlation
    names = _known(names, parameters, "correlation")
    outside = [n for n in names if n not in scalars]
    if outside:
        raise ScenarioError("correlation", f"{outside[0]!r} has no distribution of its own "
                                           "(or is in a dirichlet group); only such parameters can be correlated")
    block = np.asarray(matrix, dtype=float)
    if block.shape != (len(names), len(names)):
        raise ScenarioError("correlation", f"must be {len(names)} x {len(names)} (one row per "
                                           f"named parameter), got shape {block.shape}")
    try:
        correlation_root(block)
    except ValueError as error:
        raise ScenarioError("correlation", str(error)) from None
    positions = [scalars.index(n) for n in names]
    full = np.eye(len(scalars))
    full[np.ix_(positions, positions)] = block
    return full


def _normal_groups(parameters: Mapping[str, ParameterSpec], groups: Sequence[NormalGroupSpec],
                   taken: set[str]) -> dict[str, tuple[list[str], MultivariateNormal]]:
    """Checked multivariate normal groups keyed "multivariate_normal[i]"."""
    out: dict[str, tuple[list[str], MultivariateNormal]] = {}
    for i, group in enumerate(groups):
        path = f"multivariate_normal[{i}]"
        names = _known(group.parameters, parameters, path)
        if taken & set(names):
            raise ScenarioError(path, f"{sorted(taken & set(names))[0]!r} is already in another group")
        try:
            out[path] = names, MultivariateNormal(group.means, group.covariance, group.on_log)
        except ValueError as error:
            raise ScenarioError(path, str(error)) from None
        taken |= set(names)
    return out


class ParameterSampler:
    """The scenario's PSA distributions, checked once, ready to draw any draws.

    `correlation` (names, matrix) correlates named parameters through a Gaussian copula,
    keeping each marginal. Each Dirichlet group (names, alphas) fills its parameters from
    one Dirichlet draw, and each multivariate normal group (`NormalGroupSpec`) from one
    draw of its normal, component k from the uniforms of parameter k. Parameters without a
    distribution keep their value in every draw."""

    def __init__(self, parameters: Mapping[str, ParameterSpec], correlation: Correlation | None = None,
                 dirichlets: Sequence[DirichletGroup] = (),
                 normal_groups: Sequence[NormalGroupSpec] = ()):
        if "draw" in parameters:
            raise ScenarioError("parameters.draw", "'draw' names the draw column of PSA tables; rename the parameter")
        self.parameters = parameters
        self.groups = _dirichlet_groups(parameters, dirichlets)
        taken = {name for names, _ in self.groups.values() for name in names}
        self.normals = _normal_groups(parameters, normal_groups, taken)
        self.uncertain: dict[str, Distribution] = {
            name: _distribution(spec) for name, spec in parameters.items() if spec.distribution is not None}
        self.matrix = _copula_matrix(list(self.uncertain), correlation, parameters)
        self.columns = [*self.uncertain, *(name for groups in (self.groups, self.normals)
                                           for names, _ in groups.values() for name in names)]

    def draws(self, seed: int, ids: np.ndarray, attempts=0) -> pd.DataFrame:
        """Draws `ids` (column `draw`), then one float column per parameter; draw d reads
        occurrence attempts[d] (default 0) of its streams."""
        ids = np.asarray(ids, dtype=np.uint64)
        uniforms = np.empty((len(ids), len(self.columns)))
        for j, name in enumerate(self.columns):
            uniforms[:, j] = streams.uniforms(seed, ids, purpose(name), attempts)
        own = len(self.columns) - sum(len(names) for names, _ in self.normals.values())
        drawn = draw_parameters({**self.uncertain, **{key: d for key, (_, d) in self.groups.items()}},
                                uniforms[:, :own], self.matrix)
        values = {name: np.full(len(ids), spec.value, dtype=float) for name, spec in self.parameters.items()}
        values.update({name: drawn[name] for name in self.uncertain})
        for key, (names, _) in self.groups.items():
            values.update({name: drawn[key][:, k] for k, name in enumerate(names)})
        for names, normal in self.normals.values():
            joint = normal.ppf(uniforms[:, [self.columns.index(name) for name in names]])
            values.update({name: joint[:, k] for k, name in enumerate(names)})
        values = with_derived(self.parameters, values)  # vectorised over the draws
        return pd.DataFrame({"draw": ids.astype(np.int64), **values})


def parameter_draws(parameters: Mapping[str, ParameterSpec], seed: int, n_draws: int,
                    correlation: Correlation | None = None,
                    dirichlets: Sequence[DirichletGroup] = (),
                    normal_groups: Sequence[NormalGroupSpec] = ()) -> pd.DataFrame:
    """PSA draws, wide: column `draw` (0..n_draws-1), then one float column per parameter
    (see `ParameterSampler`)."""
    if isinstance(n_draws, bool) or not isinstance(n_draws, (int, np.integer)) or n_draws < 1:
        raise ScenarioError("n_draws", f"must be a whole number >= 1, got {n_draws!r}")
    return ParameterSampler(parameters, correlation, dirichlets,
                            normal_groups).draws(seed, np.arange(n_draws))
