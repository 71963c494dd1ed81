"""Reading [population]: attribute distributions, their correlation and banded attributes,
or a CSV/Parquet file of patients to resample (only its header is read here; the whole file
is read and its uses checked when patients are drawn: population_file.py, file_uses.py)."""
from __future__ import annotations

import math
from pathlib import Path

from .correlation import read_correlation_matrix
from .fields import (AGE, ANY, MAX_PATIENTS, POSITIVE, PROBABILITY, REQUIRED, SHARE,
                     TOLERANCE, Node, did_you_mean, listing, show)
from .population_file import read_header
from .spec import AttributeSpec, DerivedSpec, PopulationSpec

POPULATION_KEYS = ("patients", "attributes", "correlation", "derived", "file", "weights")
ATTRIBUTE_KEYS = {
    "normal": ("mean", "sd", "lower", "upper"), "lognormal": ("meanlog", "sdlog"),
    "uniform": ("lower", "upper"), "beta": ("alpha", "beta"), "gamma": ("shape", "scale"),
    "categorical": ("levels", "shares"), "yesno": ("prevalence",)}
POSITIVE_ATTRIBUTE_KEYS = {"sd", "sdlog", "alpha", "beta", "shape", "scale"}
CORRELATION_KEYS = ("attributes", "matrix")
DERIVED_KEYS = ("name", "from", "edges", "labels")
MIN_TRUNCATED_MASS = 1e-6  # less than this between lower and upper: nobody can be drawn


def read_population(node: Node | None, base: Path, fixed_size: bool = True
                    ) -> PopulationSpec | None:
    """`base` is the folder a relative `file` is read from (the scenario file's folder);
    without a `fixed_size` (an open population, [arrivals]) `size` is optional: the most
    patients that arrive in one replication."""
    if node is None:
        return None
    node.only(POPULATION_KEYS)
    size = node.whole("patients", REQUIRED if fixed_size else None, minimum=1, maximum=MAX_PATIENTS)
    if node.has("file"):
        for key in ("attributes", "correlation"):
            if node.has(key):
                node.fail(key, "cannot be combined with file; a file population takes its "
                               "attributes from the file's columns")
        given = node.text("file", nonempty=True)
        file = base / given
        columns = read_header(file, given)
        weights = node.text("weights", None, nonempty=True)
        if weights is not None and weights not in columns:
            node.fail("weights", f"{weights!r} is not a column of {file.name}; columns: "
                                 f"{listing(columns)}")
        attributes = [c for c in columns if c != weights]
        node.reading.file_columns = {c: ("column", ()) for c in attributes}
        return PopulationSpec(size=size, file=file, weights=weights,
                              derived=read_derived(node, dict.fromkeys(attributes),
                                                   set(columns)))
    if node.has("weights"):
        node.fail("weights", "is only used with file")
    if not node.has("attributes"):  # identical patients, as many as `patients` says
        for key in ("correlation", "derived"):
            if node.has(key):
                node.fail(key, "needs attributes ([[population.attributes]]) or file = "
                               "\"...\" (a CSV or Parquet file of patients) to act on")
        return PopulationSpec(size=size)
    attributes = read_attributes(node.nodes("attributes", None, required=True))
    continuous = {a.name for a in attributes if a.continuous}
    names, matrix = read_correlation(node.node("correlation", CORRELATION_KEYS, None),
                                     continuous)
    lowest = {a.name: lowest_value(a) for a in attributes if a.continuous}
    return PopulationSpec(size=size, attributes=attributes, correlation_attributes=names,
                          correlation=matrix,
                          derived=read_derived(node, lowest, {a.name for a in attributes}))


def read_attributes(nodes: list[Node]) -> tuple[AttributeSpec, ...]:
    attributes: list[AttributeSpec] = []
    for node in nodes:
        name = node.name("name")
        if any(a.name == name for a in attributes):
            node.fail("name", f"duplicate attribute name {name!r}")
        node.path = f"population.attributes.{name}"
        distribution = node.text("distribution", choices=tuple(ATTRIBUTE_KEYS))
        node.only(("name", "distribution") + ATTRIBUTE_KEYS[distribution],
                  f" for a {distribution} attribute")
        attribute = AttributeSpec(name, distribution, attribute_params(node, distribution))
        if name == AGE and not attribute.continuous:
            node.fail("distribution", f"the attribute 'age' is the age at time 0 and needs a "
                                      f"continuous distribution, not {distribution}")
        attributes.append(attribute)
    return tuple(attributes)


def attribute_params(node: Node, distribution: str) -> dict[str, float | tuple]:
    if distribution == "categorical":
        levels = node.texts("levels")
        shares = node.numbers("shares", role=SHARE)
        if len(shares) != len(levels):
            node.fail("shares", f"has {len(shares)} shares for {len(levels)} levels; give one "
                                "share per level")
        if abs(sum(shares) - 1.0) > TOLERANCE:
            node.fail("shares", f"shares sum to {show(sum(shares))}, not 1")
        return {"levels": levels, "shares": shares}
    if distribution == "yesno":
        return {"prevalence": node.number("prevalence", role=PROBABILITY)}
    optional = {"lower": -math.inf, "upper": math.inf} if distribution == "normal" else {}
    params = {k: node.number(k, optional.get(k, REQUIRED),
                             role=POSITIVE if k in POSITIVE_ATTRIBUTE_KEYS else ANY)
              for k in ATTRIBUTE_KEYS[distribution]}
    if "lower" in params:
        node.above("upper", params["upper"], "lower", params["lower"])
    if distribution == "normal":
        mass = normal_mass(params["mean"], params["sd"], params["lower"], params["upper"])
        if mass < MIN_TRUNCATED_MASS:
            node.fail("lower", f"lower and upper leave almost no patients (a share of "
                               f"{show(mass)}) of a normal with mean {show(params['mean'])} "
                               f"and sd {show(params['sd'])}")
    return params


def normal_mass(mean: float, sd: float, lower: float, upper: float) -> float:
    """P(lower < X < upper) for X ~ Normal(mean, sd), through the error function."""
    scale = sd * math.sqrt(2.0)
    return 0.5 * (math.erf((upper - mean) / scale) - math.erf((lower - mean) / scale))


def read_correlation(node: Node | None, continuous: set[str]
                     ) -> tuple[tuple[str, ...], tuple[tuple[float, ...], ...]]:
    if node is None:
        return (), ()
    names = node.names("attributes")
    for i, name in enumerate(names):
        if name not in continuous:
            node.fail(f"attributes[{i}]", f"{name!r} is not a continuous attribute of the "
                                          f"population; continuous attributes: "
                                          f"{listing(sorted(continuous))}")
    return names, read_correlation_matrix(node, "attributes", names)


def lowest_value(attribute: AttributeSpec) -> float:
    """The lowest value a continuous attribute can be drawn at."""
    return attribute.params.get("lower", 0.0)  # lognormal, gamma and beta start at 0


def band_gap(source: str, first_edge: float, lowest: float) -> str | None:
    """Why some patients would fit no band: the first edge is above the lowest value of
    the source (None when it is not)."""
    if first_edge <= lowest:
        return None
    return (f"the first edge ({show(first_edge)}) is above the lowest value {source!r} can "
            f"take ({show(lowest)}), so some patients would fit no band; lower the first "
            "edge (it may be -inf)")


def read_derived(node: Node, sources: dict[str, float | None], taken: set[str]
                 ) -> tuple[DerivedSpec, ...]:
    """Banded attributes from `sources`: continuous attributes with their lowest value,
    or file columns (lowest value unknown until the file is read: None)."""
    derived: list[DerivedSpec] = []
    for entry in node.nodes("derived", None):
        name = entry.name("name")
        if name in taken:
            entry.fail("name", f"{name!r} is already an attribute name")
        taken.add(name)
        entry.path = f"population.derived.{name}"
        entry.only(DERIVED_KEYS)
        source = entry.name("from")
        if source not in sources:
            entry.fail("from", f"{source!r} is not a continuous attribute or column"
                               f"{did_you_mean(source, sources)}; choose one of: "
                               f"{listing(sorted(sources))}")
        edges = entry.numbers("edges", open_start=True, increasing=True)
        gap = None if sources[source] is None else band_gap(source, edges[0], sources[source])
        if gap:
            entry.fail("edges", f"{gap} or truncate {source!r}")
        labels = entry.texts("labels")
        if len(labels) != len(edges):
            entry.fail("labels", f"has {len(labels)} labels for {len(edges)} edges; label i "
                                 "names the band from edges[i] to the next edge")
        derived.append(DerivedSpec(name, source, edges, labels))
    return tuple(derived)
