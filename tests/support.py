"""What several test files share: scenario text built from one call per TOML block, binding,
the Monte-Carlo tolerances, and the checks written the same way in more than one file.

Plain functions, no fixtures, so a test still shows the model it runs. The text comes out
as a person would write it: `title` and `provenance` on lines 1 and 2, the blocks after them
with one blank line between blocks, `key = value` lines in the order the call gives them
(a key given None is left out), nested tables ([[transitions.effects]],
[[population.attributes]], [strategies.eligible], ...) after their parent's keys and indented
by two spaces. Catalogue tests edit that text by exact substrings.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats

from microsim.binding import bind
from microsim.scenario import ScenarioError, parse_scenario

Z = 4.0  # |z| < 4 for Monte-Carlo checks (common practice)
KS_LEVEL = 0.001  # a correct sampler fails a KS test at this level once in 1000 seeds

TITLE = "test model"
PROVENANCE = "invented for a test"


# ------------------------------------------------------------------------- scenario text

class Nested(dict):
    """The keys of a table nested in another: written as its own [parent.key] block (or,
    in a list, [[parent.key]] blocks), not inline."""


def nested(**fields) -> Nested:
    return Nested(fields)


def toml(value) -> str:
    """A Python value as a TOML value: dicts become inline tables."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return json.dumps(value)
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{k} = {toml(v)}" for k, v in value.items()) + " }"
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(toml(v) for v in value) + "]"
    if isinstance(value, (int, float)):
        return repr(value)
    raise TypeError(f"no TOML form for {value!r}")


def _is_nested_list(value) -> bool:
    return isinstance(value, (list, tuple)) and bool(value) and all(
        isinstance(v, Nested) for v in value)


def _block(path: str, fields: dict, array: bool, depth: int = 0) -> str:
    pad = "  " * depth
    header = f"[[{path}]]" if array else f"[{path}]"
    lines, inner = [pad + header], []
    for key, value in fields.items():
        if value is None:
            continue
        if isinstance(value, Nested):
            inner.append(_block(f"{path}.{key}", value, False, depth + 1))
        elif _is_nested_list(value):
            inner += [_block(f"{path}.{key}", v, True, depth + 1) for v in value]
        else:
            lines.append(f"{pad}{key} = {toml(value)}")
    return "\n".join(lines) + "\n" + "".join("\n" + b for b in inner)


def scenario_text(*blocks: str, title: str = TITLE, provenance: str = PROVENANCE) -> str:
    return f"title = {toml(title)}\nprovenance = {toml(provenance)}\n" + "\n".join(blocks)


def section(path: str, **fields) -> str:
    """A plain [path] table: [outcomes], [simulation], [economics], ..."""
    return _block(path, fields, array=False)


def horizon(length, *, unit: str = "years", cycle=None, rule=None) -> str:
    """[time]; `rule` is the probability_rule of cycle models."""
    return section("time", unit=unit, cycle=cycle, horizon=length, probability_rule=rule)


def start(*, age=None, **shares) -> str:
    return section("start", age=age, shares=shares)


def outcomes(**fields) -> str:
    return section("outcomes", **fields)


def parameters(**values) -> str:
    return section("parameters", **values)


def table(name: str, *, by: str | None = None, starts=None, values, attribute=None) -> str:
    """[tables.<name>]; with `attribute`, `values` is {level: values} (a list per level with
    `by` and `starts`, a number per level without)."""
    return section(f"tables.{name}", by=by, starts=starts, attribute=attribute, values=values)


def state(name: str, **fields) -> str:
    return _block("states", {"name": name, **fields}, array=True)


def move(source: str, target: str, **fields) -> Nested:
    """The keys of a transition (from, to, ...), for [[transitions]] or a strategy's own."""
    return Nested({"from": source, "to": target, **fields})


def transition(source: str, target: str, **fields) -> str:
    return _block("transitions", move(source, target, **fields), array=True)


def rate(source: str, target: str, value, **fields) -> str:
    return transition(source, target, rate=value, **fields)


def probability(source: str, target: str, value, **fields) -> str:
    return transition(source, target, probability=value, **fields)


def effect(attribute_name: str, hazard_ratio, **fields) -> Nested:
    """One [[transitions.effects]] entry."""
    return Nested({"attribute": attribute_name, "hazard_ratio": hazard_ratio, **fields})


def after(event_name: str, **fields) -> Nested:
    """One memory entry: the hazard changes after occurrences of `event_name`."""
    return Nested({"after": event_name, **fields})


def event(name: str, states, **fields) -> str:
    return _block("events", {"name": name, "states": states, **fields}, array=True)


def population(size: int, *attributes: Nested, **fields) -> str:
    return _block("population", {"patients": size, "attributes": list(attributes) or None,
                                 **fields}, array=False)


def attribute(name: str, distribution: str, **params) -> Nested:
    """One [[population.attributes]] entry."""
    return Nested({"name": name, "distribution": distribution, **params})


def strategy(name: str, **fields) -> str:
    return _block("strategies", {"name": name, **fields}, array=True)


def arrivals(**fields) -> str:
    return section("arrivals", **fields)


def resource(name: str, **fields) -> str:
    """One [[resources]] entry: a shared resource (capacity, held state, waiting states)."""
    return _block("resources", {"name": name, **fields}, array=True)


def replications(**fields) -> str:
    return section("replications", **fields)


def model_of(text: str):
    """Parse and bind scenario text."""
    return bind(parse_scenario(text))


# ------------------------------------------------------------------ catalogues of edits

def edited(base: str, *edits: tuple[str, str]) -> str:
    """Apply (old, new) replacements; each `old` must occur exactly once in the text."""
    text = base
    for old, new in edits:
        assert text.count(old) == 1, f"edit target not unique: {old!r}"
        text = text.replace(old, new)
    return text


def refusal(text: str) -> ScenarioError:
    with pytest.raises(ScenarioError) as caught:
        parse_scenario(text)
    return caught.value


def assert_refused(text: str, path: str, phrase: str):
    """Refused naming exactly `path`, in one line whose message contains `phrase`."""
    error = refusal(text)
    assert error.path == path, str(error)
    assert phrase in error.message, str(error)
    assert "\n" not in str(error)  # one line


# ------------------------------------------------------------------ Monte-Carlo checks

def state_shares(sim) -> np.ndarray:
    """(T, S) simulated share of patients in each state at each grid time."""
    return np.stack([(sim.states == s).mean(axis=0) for s in range(sim.model.n_states)], axis=1)


def assert_mean_agrees(values: np.ndarray, expected: float, *context):
    """|mean - expected| < Z sample standard errors (central limit theorem)."""
    se = values.std(ddof=1) / math.sqrt(len(values))
    assert abs(values.mean() - expected) < Z * se, (*context, values.mean(), expected, se)


def assert_follows(sample: np.ndarray, cdf):
    """Kolmogorov-Smirnov test against `cdf` at level KS_LEVEL (scipy.stats.kstest,
    reference library)."""
    result = stats.kstest(sample, cdf)
    assert result.pvalue > KS_LEVEL, result


def assert_moments_match(sample: np.ndarray, mean: float, variance: float):
    """Sample mean and variance within |z| < Z of the reference values; the variance's
    standard error from the sample's fourth central moment (common practice)."""
    n = sample.size
    centred = sample - sample.mean()
    sample_variance = centred.var(ddof=1)
    z_mean = (sample.mean() - mean) / math.sqrt(sample_variance / n)
    z_variance = (sample_variance - variance) / math.sqrt(((centred**4).mean() - sample_variance**2) / n)
    assert abs(z_mean) < Z, z_mean
    assert abs(z_variance) < Z, z_variance


# ------------------------------------------------------------------ engine identity

def records_by_patient(h, ids) -> dict:
    """{patient id: its records (time, from, to, risk)} of one batch's histories."""
    out = {}
    for b, pid in enumerate(ids):
        mine = h.patient == b
        out[int(pid)] = np.column_stack([h.time[mine], h.source[mine], h.target[mine],
                                         h.risk[mine]])
    return out


def both_engines(model, ids, seed):
    """Histories of the SimPy engine and of the vectorised one of the model's kind (cycle
    or rate) for patients `ids` in one batch, and the multipliers both read."""
    import pandas as pd
    from microsim.engines.cycle_engine import simulate_cycles
    from microsim.engines.event_engine import simulate_events
    from microsim.engines.compiled_cycles import simulate_cycles_compiled
    from microsim.engines.vectorised_events import simulate_events_vectorised
    from microsim.patients.population import PATIENT, draw_population
    from microsim.patients.treatment import patient_multipliers
    spec = model.scenario.population
    patients = (pd.DataFrame({PATIENT: ids}) if spec is None
                else draw_population(spec, seed, ids))
    mult = patient_multipliers(model, patients, seed)
    pair = ((simulate_cycles, simulate_cycles_compiled) if model.discrete
            else (simulate_events, simulate_events_vectorised))
    return (*(engine(model, mult, ids, seed) for engine in pair), mult)


def assert_engines_agree(model, ids, seed, rtol: float = 0.0):
    """The vectorised engine gives the SimPy engine's histories for `model` (cycle or rate
    model): records equal, times equal (or within `rtol`, for rate models), and every risk
    that is recorded (staying put is not) happens at least once, so an equality of empty histories cannot pass."""
    expected, got, _ = both_engines(model, ids, seed)
    for name in ("patient", "source", "target", "risk"):
        assert np.array_equal(getattr(expected, name), getattr(got, name)), name
    np.testing.assert_allclose(got.time, expected.time, rtol=rtol, atol=0)
    recorded = {r for r, risk in enumerate(model.risks) if risk.target != risk.source}
    assert recorded <= set(got.risk.tolist()), "some risk never happens"
    return expected


def assert_equal_columns(expected, got, columns) -> None:
    """Two engines' histories: the same patients, and the same `columns`, dtype and value,
    element for element (the first differing rows named when they are not)."""
    assert got.n_patients == expected.n_patients
    for name in columns:
        a, b = getattr(expected, name), getattr(got, name)
        assert a.dtype == b.dtype, name
        assert np.array_equal(a, b), (name, np.flatnonzero(a != b)[:5] if a.shape == b.shape
                                      else (a.shape, b.shape))
