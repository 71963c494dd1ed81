"""Reading [uncertainty]: how many PSA draws, which parameters are drawn together
(correlated, as the shares of a Dirichlet group, or from a multivariate normal), and whose
EVPPI is reported."""
from __future__ import annotations

from .correlation import covariance_problem, read_correlation_matrix
from .errors import ScenarioError
from .fields import (ANY, IDENTIFIER, MAX_PATIENTS, POSITIVE, Node, describe, listing, show,
                     undefined)
from .formulas import derived_refusal, inputs
from .spec import INVALID_DRAWS, PSA_BASES, NormalGroupSpec, Scenario, UncertaintySpec

UNCERTAINTY_KEYS = ("draws", "patients_per_draw", "correlation", "dirichlet",
                    "multivariate_normal", "invalid_draws", "evppi", "basis")
MAX_EVPPI_GROUP = 4  # parameters in one group: the tensor-product smoother's limit
CORRELATION_KEYS = ("parameters", "matrix")
DIRICHLET_KEYS = ("parameters", "alphas")
NORMAL_KEYS = ("parameters", "means", "covariance", "on_log_scale")
DIRICHLET_SUM_TOLERANCE = 1e-6


def read_uncertainty(node: Node | None) -> UncertaintySpec:
    defaults = UncertaintySpec()
    if node is None:
        return defaults
    names, matrix = read_parameter_correlation(node.node("correlation", CORRELATION_KEYS, None))
    dirichlets = []
    for entry in node.nodes("dirichlet", DIRICHLET_KEYS):
        members = entry.names("parameters")
        if len(members) < 2:
            entry.fail("parameters", "needs at least two parameters (a Dirichlet draws a row "
                                     "of shares that sums to 1)")
        alphas = entry.numbers("alphas", role=POSITIVE)
        if len(alphas) != len(members):
            entry.fail("alphas", f"has {len(alphas)} alphas for {len(members)} parameters; give "
                                 "one alpha per parameter")
        dirichlets.append((members, alphas))
    return UncertaintySpec(
        draws=node.whole("draws", defaults.draws, minimum=1, maximum=1_000_000),
        patients=node.whole("patients_per_draw", None, minimum=1, maximum=MAX_PATIENTS),
        correlation_parameters=names, correlation=matrix, dirichlets=tuple(dirichlets),
        invalid_draws=node.text("invalid_draws", defaults.invalid_draws, choices=INVALID_DRAWS),
        normal_groups=tuple(read_normal_group(n)
                            for n in node.nodes("multivariate_normal", NORMAL_KEYS)),
        evppi=read_evppi_groups(node),
        basis=node.text("basis", defaults.basis, choices=PSA_BASES))


def read_normal_group(node: Node) -> NormalGroupSpec:
    """One [[uncertainty.multivariate_normal]]: names, means, a covariance that is
    symmetric and positive semi-definite, and the members drawn on the log scale."""
    members = node.names("parameters")
    means = node.numbers("means", role=ANY)
    if len(means) != len(members):
        node.fail("means", f"has {len(means)} means for {len(members)} parameters; give one "
                           "mean per parameter, in the same order")
    covariance = node.matrix("covariance", len(members), ANY, per="parameter")
    problem = covariance_problem(covariance)
    if problem is not None:
        node.fail(f"covariance{problem[0]}", problem[1])
    logged = node.names("on_log_scale") if node.has("on_log_scale") else ()
    for i, name in enumerate(logged):
        if name not in members:
            node.fail(f"on_log_scale[{i}]", f"{name!r} is not one of this group's parameters "
                                            f"({listing(members)})")
    return NormalGroupSpec(members, means, covariance, logged)


def read_evppi_groups(node: Node) -> tuple[tuple[str, ...], ...]:
    """`evppi`: a list whose items are a parameter name or a list of names (a group whose
    values would be learnt together)."""
    items = node.raw("evppi", [])
    if not isinstance(items, list) or not items and node.has("evppi"):
        node.fail("evppi", "must be a non-empty list of parameter names or lists of names "
                           f"(evppi = [\"p_a\", [\"c_x\", \"c_y\"]]), got {describe(items)}")
    groups = []
    for i, item in enumerate(items):
        path = f"evppi[{i}]"
        names = item if isinstance(item, list) else [item]
        if not names:
            node.fail(path, "is an empty group; name at least one parameter")
        for j, name in enumerate(names):
            if not isinstance(name, str) or not IDENTIFIER.fullmatch(name):
                where = path if item is name else f"{path}[{j}]"
                node.fail(where, f"must be a parameter name, got {describe(name)}")
        node.distinct(path, names)
        if len(names) > MAX_EVPPI_GROUP:
            node.fail(path, f"has {len(names)} parameters; EVPPI by regression is computed "
                            f"for groups of at most {MAX_EVPPI_GROUP} (split the group)")
        if tuple(names) in groups:
            node.fail(path, f"repeats the group {listing(names)}; give each group once")
        groups.append(tuple(names))
    return tuple(groups)


def read_parameter_correlation(node: Node | None
                               ) -> tuple[tuple[str, ...], tuple[tuple[float, ...], ...]]:
    if node is None:
        return (), ()
    names = node.names("parameters")
    return names, read_correlation_matrix(node, "parameters", names, empty_as_short=True)


def check_uncertainty(s: Scenario) -> list[str]:
    """Correlated parameters are drawn by the PSA, Dirichlet members by their group only;
    returns a warning for each group whose base values do not sum to 1."""
    spec, parameters = s.uncertainty, s.parameters
    for i, name in enumerate(spec.correlation_parameters):
        path = f"uncertainty.correlation.parameters[{i}]"
        defined(s, name, path)
        distribution = parameters[name].distribution
        if distribution is None or distribution.family == "fixed":
            raise ScenarioError(path, f"{name!r} has no distribution that varies, so the PSA "
                                "does not draw it; only parameters with a distribution can be "
                                "correlated")
    check_evppi_groups(s)
    found = []
    grouped: dict[str, str] = {}
    for i, group in enumerate(spec.normal_groups):
        for j, name in enumerate(group.parameters):
            path = f"uncertainty.multivariate_normal[{i}].parameters[{j}]"
            drawn_by_group(s, name, path, "a multivariate normal group", grouped)
            grouped[name] = f"uncertainty.multivariate_normal[{i}]"
            if name in group.on_log_scale and not parameters[name].value > 0:
                raise ScenarioError(path, f"{name!r} is drawn on the log scale (on_log_scale), "
                                    "so every draw is above 0, but its value is "
                                    f"{show(parameters[name].value)}; give a value above 0 or "
                                    "draw it on its own scale")
    for i, (names, _) in enumerate(spec.dirichlets):
        for j, name in enumerate(names):
            path = f"uncertainty.dirichlet[{i}].parameters[{j}]"
            drawn_by_group(s, name, path, "a Dirichlet group", grouped)
            grouped[name] = f"uncertainty.dirichlet[{i}]"
        total = sum(parameters[name].value for name in names)
        if abs(total - 1.0) > DIRICHLET_SUM_TOLERANCE:
            found.append(f"uncertainty.dirichlet[{i}]: the base values of {listing(names)} sum "
                         f"to {show(total)}, not 1; every PSA draw of the group sums to 1")
    return found


def drawn_by_group(s: Scenario, name: str, path: str, group: str,
                   grouped: dict[str, str]) -> None:
    """A member of a group that draws its parameters together (`group`, in words) must be
    a defined number, with no distribution of its own, in no other group."""
    defined(s, name, path)
    parameter = s.parameters[name]
    if parameter.distribution is not None:
        raise ScenarioError(path, f"{name!r} has its own distribution (parameters.{name}."
                                  f"distribution); {group} draws its members, so remove that "
                                  "distribution")
    if parameter.formula is not None:
        raise ScenarioError(path, f"{name!r} is derived (computed by its formula); {group} "
                                  "draws parameters that are numbers")
    if name in grouped:
        raise ScenarioError(path, f"{name!r} is already in {grouped[name]}; a parameter can "
                                  "be in one group only")


def defined(s: Scenario, name: str, path: str) -> None:
    if name not in s.parameters:
        raise ScenarioError(path, undefined("parameter", name, list(s.parameters)))


def drawn_parameters(s: Scenario) -> set[str]:
    """The parameters a PSA draws: those with a distribution that varies, and the members
    of Dirichlet and multivariate normal groups (derived ones not included)."""
    drawn = {name for names, _ in s.uncertainty.dirichlets for name in names}
    drawn |= {name for group in s.uncertainty.normal_groups for name in group.parameters}
    drawn |= {name for name, p in s.parameters.items()
              if p.distribution is not None and p.distribution.family != "fixed"}
    return drawn


def psa_tables(s: Scenario) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """The tables the model reads, as (varied, fixed) by a PSA: a table varies when an
    entry names a drawn parameter, or a derived one computed from one."""
    drawn = drawn_parameters(s)
    varies = {name for name, p in s.parameters.items() if name in drawn or (
        p.formula is not None and drawn.intersection(inputs(s.parameters, name)))}
    read = [name for name in s.tables if name in {use.name for use in s.uses}]
    varied = tuple(name for name in read if varies.intersection(s.tables[name].names))
    return varied, tuple(name for name in read if name not in varied)


def check_evppi_groups(s: Scenario) -> None:
    """Every EVPPI parameter is defined and drawn by the PSA (a distribution that varies,
    a Dirichlet or a multivariate normal group): a parameter that never varies has no value
    of information."""
    drawn = drawn_parameters(s)
    for i, group in enumerate(s.uncertainty.evppi):
        for j, name in enumerate(group):
            path = f"uncertainty.evppi[{i}]" + (f"[{j}]" if len(group) > 1 else "")
            defined(s, name, path)
            if s.parameters[name].formula is not None:
                raise derived_refusal(path, s.parameters, name, "list as one group")
            if name not in drawn:
                raise ScenarioError(path, f"{name!r} is not drawn by the PSA (it has no "
                                    "distribution that varies), so learning it is worth "
                                    "nothing; give it a distribution or leave it out")
