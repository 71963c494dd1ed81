"""Tables by an attribute's level: a life table by age and sex, and a table by level alone.

Each patient reads its own level's row, so a population of women and men is the mixture of
two single-sex models. The checks: the analytic result of every woman equals that of a
hand-built women-only scenario (a plain table holding the women's row) and likewise for
men, within 1e-12; a table by level alone equals a constant rate (closed form exp(-r t))
or probability ((1 - p)^n, from memory); simulated deaths agree with the per-patient
analytic expectations (|z| < 4, fixed seed); the average patient takes the share-weighted
geometric mean of the levels' hazards (its definition, computed by hand); and bad tables
are refused in one line.
"""
import math

import numpy as np
import pandas as pd
import pytest

from microsim.binding import bind
from microsim.cohort.analytic import analytic
from microsim.engines.cycle_engine import simulate_cycles
from microsim.engines.event_engine import simulate_events
from microsim.patients.multipliers import cohort_multipliers, multipliers
from microsim.patients.population import draw_population
from microsim.scenario import ScenarioError, parse_scenario, read_scenario
from support import (Z, assert_refused, attribute, horizon, model_of, population, probability,
                     rate, scenario_text, start, state, table)

STARTS = [0, 60, 70, 80]
WOMEN = [0.005, 0.02, 0.05, 0.15]
MEN = [0.01, 0.03, 0.09, 0.2]
AGES = attribute("age", "uniform", lower=50, upper=85)
SEX = attribute("sex", "categorical", levels=["female", "male"], shares=[0.4, 0.6])


def life_model(kind: str, life_table: str, *attributes):
    """Alive -> dead by the table `life`, a rate model or a yearly-cycle model."""
    if kind == "rate":
        time, moves = horizon(30), [rate("alive", "dead", "life")]
    else:
        time, moves = horizon(30, cycle=1), [probability("alive", "dead", "life"),
                                             probability("alive", "alive", "remainder")]
    return model_of(scenario_text(time, start(alive=1), state("alive", utility=0.8),
                                  state("dead", absorbing=True), *moves, life_table,
                                  population(2000, *attributes)))


BY_AGE_AND_SEX = table("life", by="age", starts=STARTS, attribute="sex",
                       values={"female": WOMEN, "male": MEN})


@pytest.mark.parametrize("kind", ["rate", "cycle"])
def test_age_by_sex_life_table_is_the_mixture_of_two_single_sex_models(kind):
    model = life_model(kind, BY_AGE_AND_SEX, AGES, SEX)
    patients = draw_population(model.scenario.population, 7, np.arange(400))
    mixed = analytic(model, patients=patients)
    for sex, row in (("female", WOMEN), ("male", MEN)):
        alone = life_model(kind, table("life", by="age", starts=STARTS, values=row), AGES)
        mine = (patients.sex == sex).to_numpy()
        assert 50 < mine.sum() < 350
        own = analytic(alone, patients=patients[mine][["age"]])
        np.testing.assert_allclose(mixed.trace[mine], own.trace, rtol=0, atol=1e-12)
        np.testing.assert_allclose(mixed.exposure.occupancy[mine], own.exposure.occupancy,
                                   rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("kind", ["rate", "cycle"])
def test_simulated_deaths_agree_with_the_per_patient_expectations(kind):
    model = life_model(kind, BY_AGE_AND_SEX, AGES, SEX)
    ids = np.arange(3000)
    patients = draw_population(model.scenario.population, 11, ids)
    mult = multipliers(model, patients)
    expected = analytic(model, patients=patients).trace[:, -1, 1]  # dead by the horizon
    engine = simulate_events if kind == "rate" else simulate_cycles
    histories = engine(model, mult, ids, 11)
    dead = np.zeros(len(ids), bool)
    dead[histories.patient[histories.target == 1]] = True
    for sex in ("female", "male"):  # each sex on its own row: a wrong row would show
        mine = (patients.sex == sex).to_numpy()
        p = expected[mine]
        z = (dead[mine].sum() - p.sum()) / math.sqrt((p * (1 - p)).sum())  # Poisson-binomial
        assert abs(z) < Z, (sex, z)


@pytest.mark.parametrize("kind", ["rate", "cycle"])
def test_a_table_by_level_alone_is_each_levels_constant(kind):
    values = {"female": 0.03, "male": 0.08}
    model = life_model(kind, table("life", attribute="sex", values=values), SEX)
    patients = pd.DataFrame({"sex": ["male", "female", "male"]})
    trace = analytic(model, patients=patients).trace[:, :, 0]  # alive
    n = np.arange(31)
    for b, sex in enumerate(patients.sex):
        closed = np.exp(-values[sex] * n) if kind == "rate" else (1 - values[sex]) ** n
        np.testing.assert_allclose(trace[b], closed, rtol=1e-12, atol=1e-15)


def test_a_table_by_level_alone_in_a_rate_model_keeps_any_clock():
    text = scenario_text(horizon(10), start(alive=1), state("alive"), state("dead", absorbing=True),
                         rate("alive", "dead", "life", clock="since_entry"),
                         table("life", attribute="sex", values={"female": 0.03, "male": 0.08}),
                         population(10, SEX))
    assert model_of(text).risks[0].clock == "since_entry"


@pytest.mark.parametrize("kind", ["rate", "cycle"])
def test_the_average_patient_takes_the_share_weighted_geometric_mean(kind):
    # the definition (docs/scenario-format.md): h = h_f^0.4 h_m^0.6 band by band, on the
    # rate scale for probabilities (L = -ln(1 - p)); computed here by hand
    model = life_model(kind, table("life", attribute="sex",
                                   values={"female": 0.03, "male": 0.08}), SEX)
    n = np.arange(31)
    if kind == "rate":
        h = 0.03 ** 0.4 * 0.08 ** 0.6
        closed = np.exp(-h * n)
    else:
        L = (-math.log(1 - 0.03)) ** 0.4 * (-math.log(1 - 0.08)) ** 0.6
        closed = math.exp(-L) ** n
    average = analytic(model, mult=cohort_multipliers(model)).trace[0, :, 0]
    np.testing.assert_allclose(average, closed, rtol=1e-12)


def test_the_average_patient_of_an_age_by_sex_table_reads_the_mean_row():
    model = life_model("rate", BY_AGE_AND_SEX, AGES, SEX)
    rows = cohort_multipliers(model).tables[0]
    hand = np.array(WOMEN) ** 0.4 * np.array(MEN) ** 0.6
    np.testing.assert_allclose(rows.values[0], hand, rtol=1e-14)


def test_rows_by_level_are_bounded_level_by_level():
    def row(ill, die):  # ({level: p} of a->b, {level: p} of a->dead), separate rule
        return scenario_text(
            horizon(5, cycle=1), start(a=1), state("a"), state("b"), state("dead", absorbing=True),
            probability("a", "b", "ill"), probability("a", "dead", "die"),
            probability("a", "a", "remainder"),
            table("ill", attribute="sex", values=ill), table("die", attribute="sex", values=die),
            population(10, SEX))
    # men's 0.6 + 0.5 is above 1
    assert_refused(row({"female": 0.5, "male": 0.6}, {"female": 0.45, "male": 0.5}),
                   "transitions.a->*", "sum to 1.1 (in the highest table band)")
    # each level's own sum counts, not each table's largest level (0.6 + 0.6)
    model_of(row({"female": 0.6, "male": 0.3}, {"female": 0.3, "male": 0.6}))


def test_a_row_without_remainder_sums_to_one_for_every_level():
    def row(male_stay):
        return scenario_text(
            horizon(5, cycle=1), start(a=1), state("a"), state("dead", absorbing=True),
            probability("a", "dead", "die"), probability("a", "a", "stay"),
            table("die", attribute="sex", values={"female": 0.1, "male": 0.2}),
            table("stay", attribute="sex", values={"female": 0.9, "male": male_stay}),
            population(10, SEX))
    model_of(row(0.8))
    assert_refused(row(0.7), "transitions.a->*", "between 0.9 and 1")


# ----------------------------------------------------------------------------- refusals

def refused_table(path: str, phrase: str, life_table: str, *attributes):
    text = scenario_text(horizon(10), start(alive=1), state("alive"),
                         state("dead", absorbing=True), rate("alive", "dead", "life"),
                         life_table, population(10, *attributes))
    assert_refused(text, path, phrase)


def test_a_missing_level_is_refused():
    refused_table("tables.life.values", "gives no values for 'male' of 'sex'",
                  table("life", attribute="sex", values={"female": 0.1}), SEX)


def test_an_unknown_level_is_refused_with_the_close_match():
    refused_table("tables.life.values.mael", "did you mean 'male'?",
                  table("life", attribute="sex", values={"female": 0.1, "mael": 0.2}), SEX)


def test_a_level_list_of_another_length_than_starts_is_refused():
    refused_table("tables.life.values.male", "has 3 values but starts has 4",
                  table("life", by="age", starts=STARTS, attribute="sex",
                        values={"female": WOMEN, "male": MEN[:3]}), AGES, SEX)


def test_a_table_by_an_attribute_the_population_lacks_is_refused():
    refused_table("tables.life.attribute", "the population has no attribute 'gender'",
                  table("life", attribute="gender", values={"female": 0.1, "male": 0.2}),
                  SEX)


@pytest.mark.parametrize("other, words", [
    (attribute("sex", "uniform", lower=0, upper=1), "'sex' is continuous"),
    (attribute("sex", "yesno", prevalence=0.5), "'sex' is yes/no"),
])
def test_a_table_by_a_non_categorical_attribute_is_refused(other, words):
    refused_table("tables.life.attribute", words,
                  table("life", attribute="sex", values={"female": 0.1, "male": 0.2}), other)


def test_a_level_table_needs_a_number_or_a_list_per_level():
    refused_table("tables.life.values", "must be a table with a number or parameter name per level",
                  table("life", attribute="sex", values=[0.1, 0.2]), SEX)
    refused_table("tables.life.values.male", "must be a number",
                  table("life", attribute="sex", values={"female": 0.1, "male": [0.2]}), SEX)
    refused_table("tables.life.values.male[1]", "must be at least 0",
                  table("life", by="age", starts=STARTS, attribute="sex",
                        values={"female": WOMEN, "male": [0.1, -0.2, 0.3, 0.4]}), AGES, SEX)


def test_a_probability_table_by_level_above_one_names_the_level():
    text = scenario_text(horizon(5, cycle=1), start(a=1), state("a"), state("dead", absorbing=True),
                         probability("a", "dead", "die"), probability("a", "a", "remainder"),
                         table("die", attribute="sex", values={"female": 0.1, "male": 1.2}),
                         population(10, SEX))
    assert_refused(text, "tables.die.values.male", "above 1")


# ----------------------------------------------------------------------- population files

def file_scenario(folder, rows: str):
    """The life table by age and sex with patients from a CSV file of ages and sexes."""
    (folder / "people.csv").write_text("age,sex\n" + rows)
    text = scenario_text(horizon(20), start(alive=1), state("alive"),
                         state("dead", absorbing=True), rate("alive", "dead", "life"),
                         BY_AGE_AND_SEX, population(100, file="people.csv"))
    path = folder / "scenario.toml"
    path.write_text(text)
    return bind(read_scenario(path))


def test_a_file_column_gives_the_levels_like_a_drawn_attribute(tmp_path):
    model = file_scenario(tmp_path, "62,female\n71,male\n55,male\n80,female\n")
    patients = draw_population(model.scenario.population, 3, np.arange(200))
    mixed = analytic(model, patients=patients)
    alone = life_model("rate", table("life", by="age", starts=STARTS, values=MEN), AGES)
    men = (patients.sex == "male").to_numpy()
    own = analytic(alone, patients=patients[men][["age"]], times=mixed.times)
    np.testing.assert_allclose(mixed.trace[men], own.trace, rtol=0, atol=1e-12)
    # the average patient reads the file's shares (one half each)
    hand = np.sqrt(np.array(WOMEN) * np.array(MEN))
    np.testing.assert_allclose(cohort_multipliers(model).tables[0].values[0], hand, rtol=1e-14)


def test_a_file_column_without_a_level_of_the_table_is_refused_when_read(tmp_path):
    model = file_scenario(tmp_path, "62,female\n71,Male\n")
    with pytest.raises(ScenarioError) as caught:
        cohort_multipliers(model)
    assert caught.value.path == "tables.life.values.male", str(caught.value)
    assert "did you mean 'Male'?" in caught.value.message


def test_the_reports_diagram_names_a_table_by_level_alone_by_its_attribute():
    from microsim.report.structure import value_text
    text = scenario_text(horizon(5), start(a=1), state("a"), state("dead", absorbing=True),
                         rate("a", "dead", "die"),
                         table("die", attribute="sex", values={"female": 0.1, "male": 0.2}),
                         population(10, SEX))
    assert value_text("die", parse_scenario(text)) == "table die by the level of 'sex'"
