"""Patient generator: attributes drawn from distributions (optionally correlated) or
rows resampled from a data file, plus banded attributes derived from them.

Patient i's row depends only on (seed, i): each attribute reads its own counter-based
stream (`streams.uniforms`, purpose "population:attribute:<name>"), and a resampled row
is chosen from the patient's own draw (purpose "population:file-row"). So a patient is
the same in a population of 100 or 5000, in any order, in any batch.

Values come from inverse CDFs (scipy.stats `ppf`, or `isf` on the complement in the
upper half so the upper tail keeps full precision). Correlation uses a Gaussian copula
(Nelsen 2006, "An Introduction to Copulas", section 2.3 / 5.1): independent standard
normals e, correlated z = L e with L L' the correlation matrix, u = Phi(z), then each
marginal's inverse CDF. The matrix is on the normal scale; for categorical and yes/no
attributes it is the correlation of the latent normal.
"""
from __future__ import annotations

import math
import numbers
from dataclasses import dataclass
from typing import Mapping

import numpy as np
import pandas as pd
from scipy import stats
from scipy.special import ndtr, ndtri

from microsim import streams
from microsim.scenario.errors import ScenarioError
from microsim.scenario.fields import AGE
from microsim.scenario.file_uses import check_column_uses, check_file_population
from microsim.scenario.population_file import RESERVED, PopulationFile, read_population_file
from microsim.scenario.read_population import band_gap
from microsim.scenario.rows import check_row_bounds
from microsim.scenario.spec import AttributeSpec, DerivedSpec, PopulationSpec, Scenario

PATIENT = RESERVED  # the column of patient ids, which no file or attribute may take
ROW_PURPOSE = "population:file-row"
_EIGENVALUE_TOLERANCE = 1e-10
_SHARE_TOLERANCE = 1e-6


def attribute_purpose(name: str) -> str:
    """The stream purpose of an attribute's draws: keyed by name, not by position."""
    return f"population:attribute:{name}"


@dataclass(frozen=True)
class _Family:
    required: tuple[str, ...]
    optional: tuple[str, ...] = ()
    positive: tuple[str, ...] = ()


_FAMILIES: Mapping[str, _Family] = {
    "normal": _Family(("mean", "sd"), ("lower", "upper"), positive=("sd",)),
    "lognormal": _Family(("meanlog", "sdlog"), positive=("sdlog",)),
    "uniform": _Family(("lower", "upper")),
    "beta": _Family(("alpha", "beta"), positive=("alpha", "beta")),
    "gamma": _Family(("shape", "scale"), positive=("shape", "scale")),
    "categorical": _Family(("levels", "shares")),
    "yesno": _Family(("prevalence",)),
}
_DISCRETE = ("categorical", "yesno")


# ----------------------------------------------------------------------------- checks

def _attribute_path(name: str) -> str:
    return f"population.attributes.{name}"


def _number(attribute: AttributeSpec, key: str, allow_infinite: bool = False) -> float:
    value = attribute.params[key]
    path = f"{_attribute_path(attribute.name)}.{key}"
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise ScenarioError(path, f"must be a number, got {value!r}")
    if math.isnan(value) or (math.isinf(value) and not allow_infinite):
        raise ScenarioError(path, f"must be a finite number, got {value}")
    return float(value)


def _check_attribute(attribute: AttributeSpec) -> None:
    path = _attribute_path(attribute.name)
    family = _FAMILIES.get(attribute.distribution)
    if family is None:
        raise ScenarioError(f"{path}.distribution",
                            f"unknown distribution {attribute.distribution!r}; "
                            f"use one of {', '.join(_FAMILIES)}")
    allowed = family.required + family.optional
    for key in attribute.params:
        if key not in allowed:
            raise ScenarioError(f"{path}.{key}",
                                f"unknown parameter of the {attribute.distribution} "
                                f"distribution; it takes {', '.join(allowed)}")
    for key in family.required:
        if key not in attribute.params:
            raise ScenarioError(f"{path}.{key}", f"missing; the {attribute.distribution} "
                                f"distribution needs {', '.join(family.required)}")
    if attribute.distribution == "categorical":
        _check_categorical(attribute)
        return
    infinite_ok = attribute.distribution == "normal"
    values = {k: _number(attribute, k, infinite_ok and k in family.optional)
              for k in attribute.params}
    for key in family.positive:
        if values[key] <= 0:
            raise ScenarioError(f"{path}.{key}", f"must be > 0, got {values[key]:g}")
    if attribute.distribution == "yesno" and not 0 <= values["prevalence"] <= 1:
        raise ScenarioError(f"{path}.prevalence",
                            f"must be between 0 and 1, got {values['prevalence']:g}")
    lower, upper = values.get("lower", -math.inf), values.get("upper", math.inf)
    if lower >= upper:
        raise ScenarioError(f"{path}.upper",
                            f"must be greater than lower ({lower:g}), got {upper:g}")


def _check_categorical(attribute: AttributeSpec) -> None:
    path = _attribute_path(attribute.name)
    levels, shares = attribute.params["levels"], attribute.params["shares"]
    if (not isinstance(levels, (tuple, list)) or not levels
            or not all(isinstance(level, str) and level for level in levels)):
        raise ScenarioError(f"{path}.levels", f"must be a non-empty list of names, got {levels!r}")
    if len(set(levels)) != len(levels):
        raise ScenarioError(f"{path}.levels", f"names must be distinct, got {list(levels)}")
    if not isinstance(shares, (tuple, list)) or len(shares) != len(levels):
        raise ScenarioError(f"{path}.shares", f"must list one share per level ({len(levels)})")
    values = np.asarray(shares, dtype=float)
    if not np.all(np.isfinite(values)) or np.any(values < 0):
        raise ScenarioError(f"{path}.shares", f"must be numbers >= 0, got {list(shares)}")
    if abs(values.sum() - 1) > _SHARE_TOLERANCE:
        raise ScenarioError(f"{path}.shares", f"must sum to 1, got {values.sum():g}")


def _copula_factor(spec: PopulationSpec) -> np.ndarray | None:
    """A factor L with L L' = the correlation matrix (Cholesky, or from the eigen
    decomposition when the matrix is positive semi-definite but singular)."""
    names, rows = spec.correlation_attributes, spec.correlation
    if not names and not rows:
        return None
    path = "population.correlation"
    known = {a.name: a for a in spec.attributes}
    for name in names:
        if name not in known:
            raise ScenarioError("population.correlation_attributes",
                                f"{name!r} is not an attribute; attributes are {', '.join(known)}")
    if len(set(names)) != len(names):
        raise ScenarioError("population.correlation_attributes", f"names repeat: {list(names)}")
    k = len(names)
    if len(rows) != k or any(len(row) != k for row in rows):
        raise ScenarioError(path, f"must be a {k} x {k} matrix, one row and column per name "
                            f"in correlation_attributes")
    try:
        matrix = np.asarray(rows, dtype=float)
    except (TypeError, ValueError):
        raise ScenarioError(path, "entries must be numbers") from None
    if not np.all(np.isfinite(matrix)):
        raise ScenarioError(path, "entries must be finite numbers")
    i, j = np.unravel_index(np.argmax(np.abs(matrix - matrix.T)), matrix.shape)
    if abs(matrix[i, j] - matrix[j, i]) > 1e-12:
        raise ScenarioError(path, f"must be symmetric; row {i + 1} column {j + 1} is "
                            f"{matrix[i, j]:g} but row {j + 1} column {i + 1} is {matrix[j, i]:g}")
    bad_diagonal = np.flatnonzero(np.abs(np.diag(matrix) - 1) > 1e-12)
    if bad_diagonal.size:
        d = bad_diagonal[0]
        raise ScenarioError(path, f"the diagonal must be 1; row {d + 1} has {matrix[d, d]:g}")
    if np.any(np.abs(matrix) > 1):
        i, j = np.unravel_index(np.argmax(np.abs(matrix)), matrix.shape)
        raise ScenarioError(path, f"entries must lie in [-1, 1]; row {i + 1} column {j + 1} "
                            f"is {matrix[i, j]:g}")
    eigenvalues, vectors = np.linalg.eigh(matrix)
    if eigenvalues[0] < -_EIGENVALUE_TOLERANCE:
        raise ScenarioError(path, f"must be positive semi-definite, but its smallest eigenvalue "
                            f"is {eigenvalues[0]:.6g}; the pairwise correlations are inconsistent "
                            f"with each other: weaken some of them")
    if eigenvalues[0] > _EIGENVALUE_TOLERANCE:
        return np.linalg.cholesky(matrix)
    # Numerically singular: a pivot or eigenvalue of rounding size would add noise of
    # ~1e-8 where the matrix says there is none, so those directions are dropped.
    # Unit rows keep every marginal exactly standard normal.
    kept = np.where(eigenvalues > _EIGENVALUE_TOLERANCE, eigenvalues, 0.0)
    factor = vectors * np.sqrt(kept)
    return factor / np.linalg.norm(factor, axis=1, keepdims=True)


def _check_derived(spec: PopulationSpec, derived: DerivedSpec, taken: set[str]) -> None:
    path = f"population.derived.{derived.name}"
    if derived.name in taken:
        raise ScenarioError(path, "this name is already used by another attribute")
    edges = np.asarray(derived.edges, dtype=float)
    if edges.size < 1 or np.any(np.isnan(edges)) or np.any(np.diff(edges) <= 0):
        raise ScenarioError(f"{path}.edges", f"must be increasing numbers (the lower edge of "
                            f"each band), got {list(derived.edges)}")
    if len(derived.labels) != edges.size:
        raise ScenarioError(f"{path}.labels", f"needs one label per edge (each edge starts a "
                            f"band): {edges.size} edges, got {len(derived.labels)} labels")
    if len(set(derived.labels)) != len(derived.labels):
        raise ScenarioError(f"{path}.labels",
                            f"labels must be distinct, got {list(derived.labels)}")
    source = next((a for a in spec.attributes if a.name == derived.source), None)
    if source is None:
        if spec.file is None:
            raise ScenarioError(f"{path}.from", f"{derived.source!r} is not an attribute")
        return  # a column of the file: checked when the file is read (file_uses.check_band)
    if source.distribution in _DISCRETE:
        raise ScenarioError(f"{path}.from", f"{derived.source!r} is {source.distribution}; "
                            f"bands need a numeric attribute")
    gap = band_gap(derived.source, float(edges[0]), marginal_distribution(source).support()[0])
    if gap:
        raise ScenarioError(f"{path}.edges", f"{gap} or truncate {derived.source!r}")


def check_population(spec: PopulationSpec) -> None:
    """Refuse a population spec that cannot be generated, naming the field.

    Everything that can be known without reading `spec.file`; the file's columns and
    weights are checked when it is read.
    """
    if spec.size is not None and spec.size < 1:
        raise ScenarioError("population.patients", f"must be at least 1, got {spec.size}")
    taken = {PATIENT}
    for attribute in spec.attributes:
        if attribute.name in taken:
            raise ScenarioError(_attribute_path(attribute.name),
                                "this name is used twice (or is the reserved name 'patient')")
        taken.add(attribute.name)
        _check_attribute(attribute)
    _copula_factor(spec)
    for derived in spec.derived:
        _check_derived(spec, derived, taken)
        taken.add(derived.name)


# ------------------------------------------------------------------------- marginals

def marginal_distribution(attribute: AttributeSpec):
    """The frozen scipy.stats distribution of a continuous attribute."""
    p = attribute.params
    match attribute.distribution:
        case "normal":
            mean, sd = p["mean"], p["sd"]
            lower, upper = p.get("lower", -math.inf), p.get("upper", math.inf)
            if math.isinf(lower) and math.isinf(upper):
                return stats.norm(loc=mean, scale=sd)
            return stats.truncnorm((lower - mean) / sd, (upper - mean) / sd, loc=mean, scale=sd)
        case "lognormal":
            return stats.lognorm(s=p["sdlog"], scale=math.exp(p["meanlog"]))
        case "uniform":
            return stats.uniform(loc=p["lower"], scale=p["upper"] - p["lower"])
        case "beta":
            return stats.beta(p["alpha"], p["beta"])
        case "gamma":
            return stats.gamma(p["shape"], scale=p["scale"])
    raise ValueError(f"{attribute.distribution!r} is not a continuous distribution")


def _values(attribute: AttributeSpec, u: np.ndarray, u_complement: np.ndarray):
    """Inverse CDF of the attribute at u (given u and 1 - u, each to full precision)."""
    if attribute.distribution == "yesno":
        return u < attribute.params["prevalence"]
    if attribute.distribution == "categorical":
        cumulative = np.cumsum(np.asarray(attribute.params["shares"], dtype=float))
        codes = np.searchsorted(cumulative / cumulative[-1], u, side="right")
        return pd.Categorical.from_codes(codes, categories=list(attribute.params["levels"]))
    distribution = marginal_distribution(attribute)
    lower_half = u <= 0.5
    values = np.empty_like(u)
    values[lower_half] = distribution.ppf(u[lower_half])
    values[~lower_half] = distribution.isf(u_complement[~lower_half])
    return values


def _draw_attributes(spec: PopulationSpec, seed: int, ids: np.ndarray) -> dict:
    if not spec.attributes:
        return {}
    names = [a.name for a in spec.attributes]
    u = streams.block(seed, ids, [attribute_purpose(n) for n in names], 1)[:, :, 0]
    u_complement = 1.0 - u  # exact: the draws are odd multiples of 2**-53
    factor = _copula_factor(spec)
    if factor is not None:
        columns = [names.index(n) for n in spec.correlation_attributes]
        z = ndtri(u[:, columns]) @ factor.T
        u[:, columns], u_complement[:, columns] = ndtr(z), ndtr(-z)
    return {a.name: _values(a, u[:, j], u_complement[:, j])
            for j, a in enumerate(spec.attributes)}


# ------------------------------------------------------------------------ bands

def _band(values: pd.Series, derived: DerivedSpec) -> pd.Categorical:
    """labels[i] for values in [edges[i], edges[i+1]); the last band has no upper end.
    Every value lies in a band: the first edge is checked against the source's lowest
    value (`_check_derived`, `file_uses.check_band`)."""
    codes = np.searchsorted(np.asarray(derived.edges, dtype=float), values.to_numpy(dtype=float),
                            side="right") - 1
    return pd.Categorical.from_codes(codes, categories=list(derived.labels), ordered=True)


# ------------------------------------------------------------------------ data file

def population_file(spec: PopulationSpec) -> PopulationFile:
    """The spec's file, read and typed (once per process while it is unchanged), with the
    population's own uses of its columns checked: names, bands, age."""
    file = read_population_file(spec.file, spec.weights)
    check_file_population(spec, file)
    return file


def check_population_file(scenario: Scenario) -> None:
    """Read the scenario's population file, if it has one, and refuse every use of its
    columns that what they hold cannot answer, before anything is simulated."""
    spec = scenario.population
    if spec is not None and spec.file is not None:
        check_column_uses(scenario, population_file(spec))


def _resample_file(spec: PopulationSpec, seed: int, ids: np.ndarray) -> pd.DataFrame:
    """Sampling with replacement: patient i takes the row where its own uniform falls
    on the cumulative weights (inverse CDF of the weighted empirical distribution)."""
    file = population_file(spec)
    cumulative = np.cumsum(file.weights)
    rows = np.searchsorted(cumulative / cumulative[-1], streams.uniforms(seed, ids, ROW_PURPOSE),
                           side="right")
    return file.rows.iloc[rows].reset_index(drop=True)


# ------------------------------------------------------------------------ the generator

def draw_population(spec: PopulationSpec, seed: int, patient_ids=None) -> pd.DataFrame:
    """One row per patient: `patient`, then file columns, attributes and bands.

    patient_ids default to 0..size-1; each row depends only on (seed, patient id).
    Categorical attributes and bands are pandas categoricals, yes/no attributes bool.
    """
    check_population(spec)
    ids = np.arange(spec.size) if patient_ids is None else np.asarray(patient_ids)
    frame = pd.DataFrame({PATIENT: ids.astype(np.int64)})
    if spec.file is not None:
        frame = pd.concat([frame, _resample_file(spec, seed, ids)], axis=1)
    for name, values in _draw_attributes(spec, seed, ids).items():
        frame[name] = values
    for derived in spec.derived:
        if derived.name not in frame.columns:
            frame[derived.name] = _band(frame[derived.source], derived)
    return frame


DEFAULT_PATIENTS = 2000  # patients of a scenario without a population section


def cohort_patients(size: int) -> pd.DataFrame:
    """Identical patients (ids only), for scenarios without a population section."""
    return pd.DataFrame({PATIENT: np.arange(size, dtype=np.int64)})


def scenario_patients(scenario: Scenario, seed: int, ids: np.ndarray) -> pd.DataFrame:
    """The scenario's patients with these ids: drawn from its population section, or
    identical patients when it has none. A population file's ranges first bound the rows
    (`microsim.scenario.rows`), as the spec's attributes did when the scenario was read."""
    spec = scenario.population
    if spec is not None and spec.file is not None:
        check_row_bounds(scenario, file_ranges(spec))
    if spec is not None and (spec.attributes or spec.file):
        check_population_file(scenario)
        return draw_population(spec, seed, ids)
    return pd.DataFrame({PATIENT: np.asarray(ids, dtype=np.int64)})


def patients_for(scenario: Scenario, size: int | None, seed: int) -> pd.DataFrame:
    """Patients 0..size-1 of a scenario (size: the population's, or DEFAULT_PATIENTS, also
    for an open population, which has no size of its own)."""
    spec = scenario.population
    n = size if size is not None else (spec.size if spec and spec.size else DEFAULT_PATIENTS)
    return scenario_patients(scenario, seed, np.arange(n))


def subgroup_attributes(patients: pd.DataFrame) -> list[str]:
    """Attributes that define subgroups: categories, yes/no, and bands."""
    return [c for c in patients.columns if c != PATIENT and (
        patients[c].dtype == bool or isinstance(patients[c].dtype, pd.CategoricalDtype))]


def file_ranges(spec: PopulationSpec) -> dict[str, tuple[float, float]]:
    """The lowest and highest value of each numeric (or yes/no, as 0/1) column of the
    population file over all its rows, any of which a patient may draw."""
    return {name: (column.lowest, column.highest)
            for name, column in population_file(spec).columns.items()
            if column.lowest is not None}


# ------------------------------------------------------------------------ expectations

def gives_age(spec: PopulationSpec | None) -> bool:
    """True when the population gives each patient its own age: an attribute named age, or
    a column age of its file (which then wins over `start.age`, for the patients and for
    the average patient alike)."""
    if spec is None:
        return False
    if any(a.name == AGE for a in spec.attributes):
        return True
    return spec.file is not None and AGE in population_file(spec).rows


def expected_covariate(spec: PopulationSpec, attribute: str, level: str | None = None) -> float:
    """The population mean of an attribute (or the share at `level`), exactly, from the
    spec rather than from a draw: what the 'average patient' cohort is given."""
    derived = next((d for d in spec.derived if d.name == attribute), None)
    source = attribute if derived is None else derived.source
    if spec.file is not None and not any(a.name == source for a in spec.attributes):
        file = population_file(spec)
        column = file.rows[source] if derived is None else _band(file.rows[source], derived)
        x = (column.astype(str) == level) if level is not None else column
        return float(np.average(x.to_numpy(dtype=float), weights=file.weights))
    if derived is not None:
        source = next(a for a in spec.attributes if a.name == derived.source)
        k = list(derived.labels).index(level)
        cdf = marginal_distribution(source).cdf
        upper = derived.edges[k + 1] if k + 1 < len(derived.edges) else math.inf  # open last band
        return float(cdf(upper) - cdf(derived.edges[k]))
    spec_attribute = next(a for a in spec.attributes if a.name == attribute)
    match spec_attribute.distribution:
        case "yesno":
            return float(spec_attribute.params["prevalence"])
        case "categorical":
            levels = list(spec_attribute.params["levels"])
            return float(spec_attribute.params["shares"][levels.index(level)])
    return float(marginal_distribution(spec_attribute).mean())


# ------------------------------------------------------------------------ the summary

@dataclass(frozen=True)
class PopulationSummary:
    """attributes: attribute, statistic, level, value (numbers: mean, sd, min,
    quantiles, max; categories and yes/no: one share per level).
    correlations: first, second, pearson, spearman for each pair of numeric attributes."""
    attributes: pd.DataFrame
    correlations: pd.DataFrame


_QUANTILES = {"5%": 0.05, "25%": 0.25, "median": 0.5, "75%": 0.75, "95%": 0.95}


def _number_rows(name: str, column: pd.Series) -> list[tuple]:
    statistics = {"mean": column.mean(), "sd": column.std(), "min": column.min()}
    statistics |= {label: column.quantile(q) for label, q in _QUANTILES.items()}
    statistics["max"] = column.max()
    return [(name, statistic, "", float(value)) for statistic, value in statistics.items()]


def _share_rows(name: str, column: pd.Series) -> list[tuple]:
    if pd.api.types.is_bool_dtype(column):
        column = column.map({True: "yes", False: "no"}).astype(
            pd.CategoricalDtype(["yes", "no"]))
    shares = column.value_counts(normalize=True, sort=False)
    return [(name, "share", str(level), float(share)) for level, share in shares.items()]


def describe_population(frame: pd.DataFrame) -> PopulationSummary:
    """Summaries for a preview: marginal statistics and pairwise correlations."""
    rows, numbers = [], []
    for name in frame.columns.drop(PATIENT, errors="ignore"):
        column = frame[name]
        if pd.api.types.is_numeric_dtype(column) and not pd.api.types.is_bool_dtype(column):
            rows += _number_rows(name, column)
            numbers.append(name)
        else:
            rows += _share_rows(name, column)
    attributes = pd.DataFrame(rows, columns=["attribute", "statistic", "level", "value"])
    pearson = frame[numbers].corr(method="pearson")
    spearman = frame[numbers].corr(method="spearman")
    pairs = [(a, b, float(pearson.loc[a, b]), float(spearman.loc[a, b]))
             for i, a in enumerate(numbers) for b in numbers[i + 1:]]
    correlations = pd.DataFrame(pairs, columns=["first", "second", "pearson", "spearman"])
    return PopulationSummary(attributes, correlations)
