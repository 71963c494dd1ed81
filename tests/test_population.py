"""Patient generator: marginals, Gaussian copula, bands, resampling a file, refusals and
order-free reproducibility. Statistical checks use fixed seeds and |z| < 4 bounds."""
import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from microsim.patients.population import describe_population, draw_population
from microsim.scenario import parse_scenario
from microsim.scenario.errors import ScenarioError
from microsim.scenario.spec import AttributeSpec, DerivedSpec, PopulationSpec
from microsim.workflow import run_population
from support import (Z, assert_refused, horizon, rate, scenario_text, section, start, state,
                     strategy)

SEED = 7
N = 20_000


def spec_of(*attributes, size=N, **fields):
    return PopulationSpec(size=size, attributes=tuple(attributes), **fields)


def normal(name, mean=0.0, sd=1.0, **truncation):
    return AttributeSpec(name, "normal", {"mean": mean, "sd": sd, **truncation})


# Each family with the reference distribution written out in scipy's own parameterisation.
FAMILIES = [
    (normal("a", 60, 10), stats.norm(60, 10)),
    (AttributeSpec("b", "lognormal", {"meanlog": 3.2, "sdlog": 0.25}),
     stats.lognorm(s=0.25, scale=math.exp(3.2))),
    (AttributeSpec("c", "uniform", {"lower": 2.0, "upper": 5.0}), stats.uniform(2.0, 3.0)),
    (AttributeSpec("d", "beta", {"alpha": 2.0, "beta": 5.0}), stats.beta(2.0, 5.0)),
    (AttributeSpec("e", "gamma", {"shape": 1.5, "scale": 2.0}), stats.gamma(1.5, scale=2.0)),
    (normal("f", 60, 10, lower=50, upper=85), stats.truncnorm(-1.0, 2.5, loc=60, scale=10)),
]


@pytest.fixture(scope="module")
def family_draws():
    return draw_population(spec_of(*(a for a, _ in FAMILIES)), SEED)


@pytest.mark.parametrize("attribute,reference", FAMILIES, ids=[a.name for a, _ in FAMILIES])
def test_marginals_match_scipy(family_draws, attribute, reference):
    # Reference: scipy.stats moments and CDF; Monte-Carlo SE of a mean is sd / sqrt(n).
    x = family_draws[attribute.name].to_numpy()
    assert abs(x.mean() - reference.mean()) / (reference.std() / math.sqrt(N)) < Z
    assert stats.kstest(x, reference.cdf).pvalue > 1e-4


def test_closed_form_means():
    # Closed forms (Johnson, Kotz & Balakrishnan 1994, Continuous Univariate
    # Distributions): lognormal mean exp(mu + s^2/2); truncated normal mean
    # mu + sd (phi(a) - phi(b)) / (Phi(b) - Phi(a)), here with a = -1, b = 2.5.
    frame = draw_population(spec_of(FAMILIES[1][0], FAMILIES[5][0]), SEED)
    lognormal_mean = math.exp(3.2 + 0.25**2 / 2)
    lognormal_sd = lognormal_mean * math.sqrt(math.exp(0.25**2) - 1)
    assert abs(frame["b"].mean() - lognormal_mean) / (lognormal_sd / math.sqrt(N)) < Z
    phi, big_phi = stats.norm.pdf, stats.norm.cdf
    truncated_mean = 60 + 10 * (phi(-1) - phi(2.5)) / (big_phi(2.5) - big_phi(-1))
    assert abs(frame["f"].mean() - truncated_mean) / (frame["f"].std() / math.sqrt(N)) < Z


def test_truncation_is_respected_one_and_two_sided():
    frame = draw_population(spec_of(normal("two", 0, 1, lower=-0.5, upper=0.2),
                                    normal("low", 1, 2, lower=0.0)), SEED)
    assert frame["two"].between(-0.5, 0.2).all()
    assert (frame["low"] >= 0).all()
    # Reference: scipy.stats.truncnorm with a = (0 - 1) / 2 and no upper bound.
    reference = stats.truncnorm(-0.5, np.inf, loc=1, scale=2)
    assert abs(frame["low"].mean() - reference.mean()) / (reference.std() / math.sqrt(N)) < Z


def test_categorical_and_yesno_shares_within_binomial_bounds():
    levels, shares = ("none", "mild", "severe", "never"), (0.2, 0.5, 0.3, 0.0)
    frame = draw_population(spec_of(
        AttributeSpec("stage", "categorical", {"levels": levels, "shares": shares}),
        AttributeSpec("smoker", "yesno", {"prevalence": 0.15})), SEED)
    assert isinstance(frame["stage"].dtype, pd.CategoricalDtype)
    assert list(frame["stage"].cat.categories) == list(levels)
    assert frame["smoker"].dtype == bool
    observed = frame["stage"].value_counts(normalize=True)
    for level, share in zip(levels, shares):
        if share == 0:
            assert observed[level] == 0
        else:  # binomial SE sqrt(p (1 - p) / n) (common practice)
            assert abs(observed[level] - share) / math.sqrt(share * (1 - share) / N) < Z
    assert abs(frame["smoker"].mean() - 0.15) / math.sqrt(0.15 * 0.85 / N) < Z


def test_attributes_without_correlation_are_independent():
    frame = draw_population(spec_of(normal("x"), normal("y")), SEED)
    # Under independence sqrt(n) r is approximately standard normal (common practice).
    assert abs(stats.spearmanr(frame["x"], frame["y"]).statistic) * math.sqrt(N) < Z


CORRELATED = (normal("a", 50, 5), FAMILIES[1][0], FAMILIES[4][0], FAMILIES[3][0])
REFERENCES = (stats.norm(50, 5), FAMILIES[1][1], FAMILIES[4][1], FAMILIES[3][1])
TARGET = np.array([[1.0, 0.6, -0.4, 0.3],
                   [0.6, 1.0, -0.2, 0.5],
                   [-0.4, -0.2, 1.0, 0.0],
                   [0.3, 0.5, 0.0, 1.0]])


@pytest.fixture(scope="module")
def correlated():
    assert np.linalg.eigvalsh(TARGET)[0] > 0  # precondition: a valid correlation matrix
    spec = spec_of(*CORRELATED, correlation_attributes=("a", "b", "e", "d"),
                   correlation=tuple(map(tuple, TARGET)))
    return draw_population(spec, SEED)


def test_copula_reproduces_normal_scale_correlation(correlated):
    # Normal scores Phi^-1(F(x)) are the copula's z (Nelsen 2006, An Introduction to
    # Copulas); Fisher's z: atanh(r) has SE 1 / sqrt(n - 3) (Fisher 1915/1921).
    names = ["a", "b", "e", "d"]
    scores = np.column_stack([stats.norm.ppf(ref.cdf(correlated[n].to_numpy()))
                              for n, ref in zip(names, REFERENCES)])
    r = np.corrcoef(scores, rowvar=False)
    for i, j in zip(*np.triu_indices(4, 1)):
        assert abs(np.arctanh(r[i, j]) - np.arctanh(TARGET[i, j])) * math.sqrt(N - 3) < Z


def test_copula_spearman_matches_closed_form(correlated):
    # Gaussian copula: rho_s = (6 / pi) arcsin(rho / 2) (Pearson 1907). SE of Fisher-z of
    # Spearman's rho is sqrt(1.06 / (n - 3)) (Fieller, Hartley & Pearson 1957, from memory).
    names = ["a", "b", "e", "d"]
    rs = stats.spearmanr(correlated[names].to_numpy()).statistic
    for i, j in zip(*np.triu_indices(4, 1)):
        target = 6 / math.pi * math.asin(TARGET[i, j] / 2)
        assert abs(np.arctanh(rs[i, j]) - np.arctanh(target)) / math.sqrt(1.06 / (N - 3)) < Z


def test_copula_keeps_the_marginals(correlated):
    for name, reference in zip(["a", "b", "e", "d"], REFERENCES):
        assert stats.kstest(correlated[name].to_numpy(), reference.cdf).pvalue > 1e-4


def test_singular_but_semi_definite_matrix_is_used_exactly():
    # Rank-2 matrix: z3 = (z1 + z2) / sqrt(2) has correlation 1/sqrt(2) with each
    # (eigenvalues 0, 1, 2); and rho = -1 makes y a decreasing function of x.
    s = 1 / math.sqrt(2)
    frame = draw_population(spec_of(
        normal("z1"), normal("z2"), normal("z3"), normal("x"), normal("y", 3, 2),
        correlation_attributes=("z1", "z2", "z3", "x", "y"),
        correlation=((1, 0, s, 0, 0), (0, 1, s, 0, 0), (s, s, 1, 0, 0),
                     (0, 0, 0, 1, -1), (0, 0, 0, -1, 1))), SEED, np.arange(2000))
    np.testing.assert_allclose(frame["z3"], (frame["z1"] + frame["z2"]) * s, atol=1e-9)
    np.testing.assert_allclose(frame["y"], 3 - 2 * frame["x"], atol=1e-9)


NOT_PSD = ((1, 0.9, -0.9), (0.9, 1, 0.9), (-0.9, 0.9, 1))


@pytest.mark.parametrize("matrix,words", [
    (NOT_PSD, f"smallest eigenvalue is {np.linalg.eigvalsh(np.array(NOT_PSD))[0]:.6g}"),
    (((1, 0.2, 0), (0.3, 1, 0), (0, 0, 1)), "symmetric"),
    (((1, 0.2, 0), (0.2, 0.9, 0), (0, 0, 1)), "diagonal"),
    (((1, 1.2, 0), (1.2, 1, 0), (0, 0, 1)), "[-1, 1]"),
    (((1, 0.2), (0.2, 1)), "3 x 3"),
])
def test_bad_correlation_matrix_is_refused(matrix, words):
    spec = spec_of(normal("x"), normal("y"), normal("w"),
                   correlation_attributes=("x", "y", "w"), correlation=matrix)
    with pytest.raises(ScenarioError) as refused:
        draw_population(spec, SEED)
    assert refused.value.path == "population.correlation"
    assert words in refused.value.message


def test_correlation_naming_an_unknown_attribute_is_refused():
    spec = spec_of(normal("x"), correlation_attributes=("x", "age"),
                   correlation=((1, 0), (0, 1)))
    with pytest.raises(ScenarioError, match="'age' is not an attribute") as refused:
        draw_population(spec, SEED)
    assert refused.value.path == "population.correlation_attributes"


@pytest.mark.parametrize("attribute,path", [
    (normal("x", 0, -1), "population.attributes.x.sd"),
    (normal("x", 0, 1, lower=2, upper=1), "population.attributes.x.upper"),
    (AttributeSpec("x", "normal", {"mean": 0}), "population.attributes.x.sd"),
    (AttributeSpec("x", "normal", {"mean": 0, "sd": 1, "sigma": 1}),
     "population.attributes.x.sigma"),
    (AttributeSpec("x", "weibull", {"shape": 1}), "population.attributes.x.distribution"),
    (AttributeSpec("x", "gamma", {"shape": 0, "scale": 1}), "population.attributes.x.shape"),
    (AttributeSpec("x", "uniform", {"lower": 0, "upper": math.inf}),
     "population.attributes.x.upper"),
    (AttributeSpec("x", "yesno", {"prevalence": 1.5}), "population.attributes.x.prevalence"),
    (AttributeSpec("x", "categorical", {"levels": ("a", "b"), "shares": (0.5, 0.6)}),
     "population.attributes.x.shares"),
    (AttributeSpec("x", "categorical", {"levels": ("a", "a"), "shares": (0.5, 0.5)}),
     "population.attributes.x.levels"),
    (AttributeSpec("patient", "yesno", {"prevalence": 0.5}), "population.attributes.patient"),
])
def test_bad_attribute_is_refused_with_its_path(attribute, path):
    with pytest.raises(ScenarioError) as refused:
        draw_population(spec_of(attribute, size=10), SEED)
    assert refused.value.path == path


def test_bands_match_pandas_cut():
    edges, labels = (-math.inf, 50.0, 65.0), ("under 50", "50-64", "65 and over")
    frame = draw_population(spec_of(normal("age", 60, 10), derived=(
        DerivedSpec("age_band", "age", edges, labels),)), SEED, np.arange(3000))
    # Reference: pandas.cut with left-closed bins [edges[i], edges[i+1]), the last open.
    expected = pd.cut(frame["age"], bins=[*edges, math.inf], right=False, labels=list(labels))
    assert frame["age_band"].cat.ordered
    assert (frame["age_band"].astype(str) == expected.astype(str)).all()


def test_bands_that_cannot_hold_every_value_are_refused():
    spec = spec_of(normal("age", 60, 10), derived=(
        DerivedSpec("age_band", "age", (40.0, 65.0), ("40-64", "65+")),))
    with pytest.raises(ScenarioError, match="lower the first edge") as refused:
        draw_population(spec, SEED)
    assert refused.value.path == "population.derived.age_band.edges"
    truncated = spec_of(normal("age", 60, 10, lower=40, upper=90), derived=spec.derived)
    assert set(draw_population(truncated, SEED)["age_band"]) == {"40-64", "65+"}


def write_csv(tmp_path, text, name="people.csv"):
    path = tmp_path / name
    path.write_text(text)
    return path


PEOPLE = "group,age,w\na,40,1\nb,65,2\nc,70,3\nd,90,4\ne,55,0\n"


def test_resampling_reproduces_weighted_shares(tmp_path):
    spec = PopulationSpec(size=N, file=write_csv(tmp_path, PEOPLE), weights="w")
    frame = draw_population(spec, SEED)
    assert list(frame.columns) == ["patient", "group", "age"]
    assert list(frame["group"].cat.categories) == ["a", "b", "c", "d", "e"]
    shares = frame["group"].value_counts(normalize=True)
    assert shares["e"] == 0  # zero weight: never drawn
    for group, share in zip("abcd", (0.1, 0.2, 0.3, 0.4)):
        # Weighted bootstrap: each draw picks row k with probability w_k / sum(w).
        assert abs(shares[group] - share) / math.sqrt(share * (1 - share) / N) < Z


def test_resampling_parquet_without_weights_is_uniform(tmp_path):
    path = tmp_path / "people.parquet"
    pd.DataFrame({"x": np.arange(8.0), "treated": [True, False] * 4}).to_parquet(path)
    frame = draw_population(PopulationSpec(size=N, file=path), SEED)
    assert frame["treated"].dtype == bool
    counts = np.bincount(frame["x"].astype(int), minlength=8)
    assert stats.chisquare(counts).pvalue > 1e-4  # reference: scipy.stats.chisquare


def test_bands_of_a_file_column_leave_the_last_band_open(tmp_path):
    spec = PopulationSpec(size=500, file=write_csv(tmp_path, PEOPLE), weights="w", derived=(
        DerivedSpec("band", "age", (40.0, 65.0), ("40-64", "65+")),))
    frame = draw_population(spec, SEED)
    expected = {"a": "40-64", "b": "65+", "c": "65+", "d": "65+"}
    assert (frame["band"].astype(str) == frame["group"].astype(str).map(expected)).all()
    outside = PopulationSpec(size=10, file=spec.file, derived=(
        DerivedSpec("band", "age", (50.0,), ("50+",)),))
    with pytest.raises(ScenarioError, match=r"lowest value 'age' can take \(40\)") as refused:
        draw_population(outside, SEED)  # the whole file counts: age 40 (weight 1) is out
    assert refused.value.path == "population.derived.band.edges"


@pytest.mark.parametrize("text,weights,path", [
    (None, None, "population.file"),
    (PEOPLE, "weight", "population.weights"),
    ("group,w\na,1\nb,-2\n", "w", "population.weights"),
    ("group,w\na,0\nb,0\n", "w", "population.weights"),
    ("patient,w\n1,1\n", "w", "population.file"),
    ("group,age\na,\nb,3\n", None, "population.file"),
])
def test_bad_file_or_weights_are_refused(tmp_path, text, weights, path):
    file = tmp_path / "missing.csv" if text is None else write_csv(tmp_path, text)
    with pytest.raises(ScenarioError) as refused:
        draw_population(PopulationSpec(size=10, file=file, weights=weights), SEED)
    assert refused.value.path == path


def full_spec(file):
    return PopulationSpec(
        size=100, file=file, weights="w",
        attributes=(normal("bmi", 27, 4), AttributeSpec("sex", "categorical", {
            "levels": ("female", "male"), "shares": (0.52, 0.48)}),
            AttributeSpec("smoker", "yesno", {"prevalence": 0.2})),
        correlation_attributes=("bmi", "smoker"), correlation=((1, 0.3), (0.3, 1)),
        derived=(DerivedSpec("bmi_band", "bmi", (-math.inf, 30.0), ("<30", "30+")),))


def test_patient_row_does_not_depend_on_size_or_order(tmp_path):
    spec = full_spec(write_csv(tmp_path, PEOPLE))
    small = draw_population(spec, SEED).set_index("patient")
    large = draw_population(PopulationSpec(**{**spec.__dict__, "size": 5000}), SEED)
    shuffled = draw_population(spec, SEED, np.random.default_rng(0).permutation(5000))
    for other in (large.set_index("patient"), shuffled.set_index("patient")):
        pd.testing.assert_series_equal(other.loc[42], small.loc[42])
    assert not small.loc[42].equals(small.loc[43])


def test_adding_an_attribute_does_not_change_the_others():
    # Draws are keyed by attribute name, not position.
    one = draw_population(spec_of(normal("x"), size=50), SEED)
    two = draw_population(spec_of(normal("w"), normal("x"), size=50), SEED)
    pd.testing.assert_series_equal(one["x"], two["x"])


def test_describe_population_agrees_with_pandas_and_scipy(correlated):
    frame = correlated.assign(
        stage=draw_population(spec_of(AttributeSpec("stage", "categorical", {
            "levels": ("early", "late"), "shares": (0.7, 0.3)})), SEED)["stage"],
        smoker=correlated["a"] > 52)
    summary = describe_population(frame)
    table = summary.attributes.set_index(["attribute", "statistic", "level"])["value"]
    x = frame["b"].to_numpy()
    # References: numpy mean, sd with ddof=1, median; pandas value_counts; scipy
    # pearsonr and spearmanr.
    assert table[("b", "mean", "")] == pytest.approx(np.mean(x))
    assert table[("b", "sd", "")] == pytest.approx(np.std(x, ddof=1))
    assert table[("b", "median", "")] == pytest.approx(np.median(x))
    assert table[("stage", "share", "late")] == pytest.approx(
        frame["stage"].value_counts(normalize=True)["late"])
    assert table[("smoker", "share", "yes")] == pytest.approx(frame["smoker"].mean())
    pairs = summary.correlations.set_index(["first", "second"])
    assert len(pairs) == 6  # numeric pairs only: a, b, e, d
    assert pairs.loc[("a", "e"), "pearson"] == pytest.approx(
        stats.pearsonr(frame["a"], frame["e"]).statistic)
    assert pairs.loc[("b", "d"), "spearman"] == pytest.approx(
        stats.spearmanr(frame["b"], frame["d"]).statistic)


def test_a_population_of_patients_alone_is_that_many_identical_patients():
    # [population] with only `patients`: identical patients, the very ones (ids, draws,
    # outcomes) of the same scenario without the section run with --patients; a
    # correlation or band with no attribute to act on is refused
    blocks = (horizon(5), start(age=60, well=1.0), state("well", cost=100.0, utility=1),
              state("dead", absorbing=True), rate("well", "dead", 0.1),
              strategy("usual", comparator=True), strategy("more", changes=[{"cost": 5.0}]))
    text = scenario_text(*blocks, section("population", patients=120))
    scenario = parse_scenario(text)
    assert scenario.population == PopulationSpec(size=120)
    alone = run_population(scenario, None, 4)
    without = run_population(parse_scenario(scenario_text(*blocks)), 120, 4)
    assert alone.size == 120
    pd.testing.assert_frame_equal(alone.outcomes, without.outcomes)
    pd.testing.assert_frame_equal(alone.patients, without.patients)
    assert_refused(text + '\n[[population.derived]]\nname = "b"\nfrom = "age"\nedges = [0]\n'
                   'labels = ["all"]\n', "population.derived", "needs attributes")


@pytest.mark.parametrize("sdlog, refused", [(3.0, True), (0.5, False)])
def test_an_attribute_whose_hazard_ratio_overflows_is_refused_naming_it(sdlog, refused):
    # a lognormal marker with sdlog 3 reaches e^9 ~ 8000 among 500 patients (its 99.99th
    # percentile is e^(3 * 3.72), scipy.stats.lognorm): a hazard ratio of 1.75 per unit
    # then makes exp(0.56 * 8000), beyond any double; with sdlog 0.5 every patient is fine
    from microsim.binding import bind
    from microsim.patients.multipliers import multipliers
    from support import attribute, effect, population
    scenario = parse_scenario(scenario_text(
        horizon(10), start(well=1), state("well"), state("dead", absorbing=True),
        rate("well", "dead", 0.1, effects=[effect("marker", 1.75)]),
        population(500, attribute("marker", "lognormal", meanlog=0.0, sdlog=sdlog))))
    people = draw_population(scenario.population, 3)
    if not refused:
        assert np.isfinite(multipliers(bind(scenario), people).log_static).all()
        return
    with pytest.raises(ScenarioError) as caught:
        multipliers(bind(scenario), people)
    assert caught.value.path == "population.attributes.marker"
    assert "bound it (a normal with lower and upper, or a uniform)" in caught.value.message


def test_an_age_attribute_wins_over_start_age_for_the_average_patient_too():
    """The patients take their ages from the attribute, so the average patient (and the
    cohort trace) must take the attribute's mean, not start.age, and the file is told that
    start.age goes unused. Reference: the truncated normal's mean (scipy.stats.truncnorm)."""
    from microsim.binding import bind
    from microsim.patients.multipliers import cohort_multipliers
    from support import attribute, population, probability
    text = scenario_text(
        horizon(10, cycle=1), start(age=40, well=1.0), state("well"),
        state("dead", absorbing=True), probability("well", "dead", 0.05,
                                                   effects=[{"attribute": "age", "hazard_ratio": 1.05, "centre": 60}]),
        probability("well", "well", "remainder"),
        population(100, attribute("age", "normal", mean=68, sd=8, lower=45, upper=90)))
    scenario = parse_scenario(text)
    assert any(w.startswith("start.age: 40 is not used") for w in scenario.warnings)
    mean = stats.truncnorm((45 - 68) / 8, (90 - 68) / 8, loc=68, scale=8).mean()
    assert cohort_multipliers(bind(scenario)).entry_age[0] == pytest.approx(mean, rel=1e-12)
