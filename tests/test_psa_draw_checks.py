"""PSA draws are checked before anything is simulated: refused, redrawn or truncated.

References: two beta-distributed probabilities beside a remainder, with no effects, make a
row whose sum is exactly p_a + p_b, so which draws are invalid is computed here by hand from
the draws table; a redrawn draw must equal an independent draw of the same draw number at
the next stream occurrence (the randomness contract of DESIGN.md: every draw a function of
(seed, draw, purpose, occurrence)); truncation is numpy.clip's.
"""
from __future__ import annotations

import json
import math
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

from microsim.cli import main
from microsim.present import changed_draws
from microsim.scenario import ScenarioError, parse_scenario, read_scenario
from microsim.scenario.fields import (COMPETING_PROBABILITY, HAZARD_RATIO, PROBABILITY, RATE,
                                      UTILITY, show)
from microsim.uncertainty import parameter_draws
from microsim.uncertainty.draw_checks import check_draws
from microsim.uncertainty.draws import ParameterSampler
from microsim.uncertainty.psa import parameter_uncertainty
from support import (horizon, parameters, probability, scenario_text, section, start, state,
                     strategy)

SEED, DRAWS = 77, 40


def two_betas(policy: str | None = None, utility=0.9, strategies: bool = True) -> str:
    """well -> sick (p_a) and well -> dead (p_b) beside a remainder, means 0.5 and 0.45."""
    return scenario_text(
        horizon(4), start(well=1),
        state("well", utility="u_well"), state("sick", utility=0.5), state("dead", absorbing=True),
        probability("well", "sick", "p_a"), probability("well", "dead", "p_b"),
        probability("well", "well", "remainder"),
        probability("sick", "dead", 0.2), probability("sick", "sick", "remainder"),
        parameters(p_a=dict(value=0.5, distribution=dict(family="beta", alpha=20, beta=20)),
                   p_b=dict(value=0.45, distribution=dict(family="beta", alpha=18, beta=22)),
                   u_well=dict(value=0.9, distribution=utility)),
        *([strategy("usual", comparator=True),
           strategy("slower", changes=[{"transition": "well->sick", "hazard_ratio": 0.8}])]
          if strategies else []),
        section("uncertainty", draws=DRAWS, patients_per_draw=20, invalid_draws=policy),
        section("simulation", seed=SEED))


BETA_UTILITY = dict(family="beta", alpha=90, beta=10)
NORMAL_UTILITY = dict(family="normal", mean=0.9, sd=0.08)


def checked(text: str, n: int = DRAWS):
    s = parse_scenario(text)
    return check_draws(s, ParameterSampler(s.parameters), n, SEED)


def by_hand(n: int = DRAWS) -> tuple[pd.DataFrame, np.ndarray]:
    s = parse_scenario(two_betas(utility=BETA_UTILITY))
    table = parameter_draws(s.parameters, SEED, n)
    return table, (table.p_a + table.p_b > 1).to_numpy()


def test_a_draw_whose_row_sums_above_1_is_refused_with_its_number_and_values():
    table, bad = by_hand()
    assert 0 < bad.sum() < DRAWS
    first = int(np.argmax(bad))
    with pytest.raises(ScenarioError) as caught:
        checked(two_betas(utility=BETA_UTILITY))
    error = caught.value
    row = table.iloc[first]
    assert error.path == "transitions.well->*"
    assert (f"PSA draw {first} (p_a = {show(row.p_a)}, p_b = {show(row.p_b)}) lets the "
            f"probabilities from 'well' other than the remainder sum to "
            f"{show(row.p_a + row.p_b)}") in error.message
    assert f"{bad.sum()} of {DRAWS} draws are invalid" in error.message
    assert 'set uncertainty.invalid_draws = "redraw"' in error.message
    assert "\n" not in str(error)


def test_redraw_gives_valid_draws_from_the_next_stream_occurrence():
    s = parse_scenario(two_betas("redraw", BETA_UTILITY))
    result = check_draws(s, ParameterSampler(s.parameters), DRAWS, SEED)
    first, bad = by_hand()
    table, changed = result.table, result.changed
    assert np.all(table.p_a + table.p_b <= 1)
    pd.testing.assert_frame_equal(table[~bad], first[~bad])  # valid draws stay as drawn
    assert sorted(changed.draw.unique()) == np.flatnonzero(bad).tolist()
    assert set(changed.parameter) == {"p_a", "p_b"}
    sampler = ParameterSampler(s.parameters)
    for draw, attempts in changed.groupby("draw").attempts.first().items():
        again = sampler.draws(SEED, [draw], attempts)
        assert again.p_a[0] == table.p_a[draw] and again.p_b[0] == table.p_b[draw]
        before = sampler.draws(SEED, [draw], attempts - 1)
        assert before.p_a[0] + before.p_b[0] > 1  # every earlier attempt was invalid
    # a draw is the same whether 20 or 40 are asked for
    fewer = check_draws(s, sampler, 20, SEED).table
    pd.testing.assert_frame_equal(fewer, table.iloc[:20])


def test_redraw_is_the_same_with_one_or_two_workers(tmp_path):
    s = parse_scenario(two_betas("redraw", BETA_UTILITY))
    one = parameter_uncertainty(s, tmp_path / "one", draws=8, patients=20, progress=False)
    two = parameter_uncertainty(s, tmp_path / "two", draws=8, patients=20, workers=2,
                                progress=False)
    assert len(one.changed) > 0
    for a, b in ((one.draws, two.draws), (one.results, two.results), (one.changed, two.changed)):
        pd.testing.assert_frame_equal(a, b)


def test_truncate_clips_values_to_their_use_and_says_so():
    s = parse_scenario(two_betas("truncate", NORMAL_UTILITY).replace(
        "p_a = { value = 0.5, distribution = { family = \"beta\", alpha = 20, beta = 20 } }",
        "p_a = 0.3"))
    sampler = ParameterSampler(s.parameters)
    drawn = sampler.draws(SEED, np.arange(DRAWS))
    result = check_draws(s, sampler, DRAWS, SEED)
    np.testing.assert_array_equal(result.table.u_well, np.clip(drawn.u_well, None, 1.0))
    over = np.flatnonzero(drawn.u_well > 1)
    assert over.size > 0
    changed = result.changed
    assert changed.draw.tolist() == over.tolist() and set(changed.parameter) == {"u_well"}
    assert (changed.used == 1.0).all() and (changed.drawn > 1).all()
    assert set(changed.reason) == {"states.well.utility: a utility weight must be at most 1"}

    line = changed_draws(SimpleNamespace(draws=result.table, changed=result.changed))
    assert f"{over.size} value(s) in {over.size} of {DRAWS} draws were outside" in line
    assert line.count("u_well in draw") == 1  # one reason, said once, with its draws


def test_a_change_shows_the_digits_that_tell_its_values_apart():
    from microsim.present import apart
    assert apart(1.0, 0.9999999999999999) == ("1", "0.9999999999999999")
    assert apart(1.2345678, 0.5) == ("1.23457", "0.5")


def test_truncate_refuses_a_row_it_cannot_mend():
    with pytest.raises(ScenarioError) as caught:
        checked(two_betas("truncate", BETA_UTILITY))
    assert caught.value.path == "transitions.well->*"
    assert 'cannot mend this; set uncertainty.invalid_draws = "redraw"' in caught.value.message


def test_by_default_a_distribution_beyond_its_role_is_refused_when_read(tmp_path):
    text = two_betas(utility=NORMAL_UTILITY)
    with pytest.raises(ScenarioError) as caught:
        parse_scenario(text)
    assert caught.value.path == "parameters.u_well.distribution"
    assert 'or set uncertainty.invalid_draws = "redraw" or "truncate"' in caught.value.message
    assert parse_scenario(two_betas("redraw", NORMAL_UTILITY)).uncertainty.invalid_draws == "redraw"
    path = tmp_path / "scenario.toml"
    path.write_text(text)
    assert read_scenario(path, {"invalid_draws": "truncate"}).uncertainty.invalid_draws \
        == "truncate"


def test_the_invalid_draws_option_reaches_the_check_made_when_the_file_is_read(tmp_path):
    """--invalid-draws redraw acts as the key would: the read-time refusal of a normal
    utility (which can exceed 1) gives way to redrawing, on the command line too."""
    path = tmp_path / "scenario.toml"
    path.write_text(two_betas(utility=NORMAL_UTILITY))
    run = ["run", str(path), "--patients", "20", "--psa", "--draws", "4", "--json",
           "--out", str(tmp_path / "out")]
    assert main(run) == 2
    assert main([*run, "--invalid-draws", "redraw"]) == 0


@pytest.mark.parametrize("role", [PROBABILITY, UTILITY, RATE, HAZARD_RATIO, COMPETING_PROBABILITY])
def test_vectorised_role_checks_agree_with_the_scalar_ones(role):
    values = np.array([-math.inf, -1.0, -0.0, 0.0, 5e-324, 0.5, 1.0 - 2**-53, 1.0, 1.5, math.inf])
    assert role.outside(values).tolist() == [role.problem(v) is not None for v in values]
    assert not role.outside(role.clip(values)).any()


def test_the_command_line_refuses_or_redraws(tmp_path, capsys):
    path = tmp_path / "two.toml"
    path.write_text(two_betas(utility=BETA_UTILITY))
    base = ["run", str(path), "--patients", "40", "--psa", "--draws", "8", "--patients-per-draw", "10"]
    assert main([*base, "--out", str(tmp_path / "refused")]) == 2
    error = capsys.readouterr().err.strip()
    assert error.startswith("error: transitions.well->*: PSA draw ") and "\n" not in error
    assert not (tmp_path / "refused").exists()  # refused before anything is simulated
    assert main([*base, "--invalid-draws", "redraw", "--out", str(tmp_path / "ok")]) == 0
    assert "were invalid and were drawn again" in capsys.readouterr().out
    folder = tmp_path / "ok" / "two" / "latest"
    changed = pd.read_csv(folder / "psa_changed_draws.csv")
    summary = json.loads((folder / "summary.json").read_text())["psa"]["invalid_draws"]
    assert summary["changed_draws"] == changed.draw.nunique() > 0


def test_a_draw_that_rounds_onto_an_open_end_is_told_so():
    # a gamma draws from (0, inf), which a hazard ratio allows, but with shape 0.002 about
    # a fifth of its draws lie below the smallest float and are 0.0 (scipy.stats.gamma(0.002,
    # scale=100).cdf(1e-320) = 0.227); the advice is then to narrow it, not to pick another
    text = two_betas(utility=BETA_UTILITY).replace(
        'p_a = { value = 0.5, distribution = { family = "beta", alpha = 20, beta = 20 } }',
        'p_a = 0.3\nhr = { value = 0.8, distribution = { family = "gamma", shape = 0.002, '
        'scale = 100 } }').replace("hazard_ratio = 0.8", 'hazard_ratio = "hr"')
    s = parse_scenario(text)
    drawn = ParameterSampler(s.parameters).draws(SEED, np.arange(DRAWS)).hr.to_numpy()
    zero = np.flatnonzero(drawn == 0)
    assert 0 < zero.size < DRAWS
    with pytest.raises(ScenarioError) as caught:
        check_draws(s, ParameterSampler(s.parameters), DRAWS, SEED)
    error = caught.value
    assert error.path == "parameters.hr.distribution", str(error)
    assert error.message.startswith(f"PSA draw {zero[0]} gives hr = 0"), str(error)
    assert error.message.endswith("or narrow the distribution away from that end (its range "
                                  "is allowed, but a draw this near the end rounds onto it in "
                                  "floating point)")


def test_a_scenario_without_strategies_still_says_which_draws_were_changed(tmp_path, capsys):
    path = tmp_path / "alone.toml"
    path.write_text(two_betas(utility=BETA_UTILITY, strategies=False))
    assert main(["run", str(path), "--patients", "40", "--psa", "--draws", "8",
                 "--patients-per-draw", "10", "--invalid-draws", "redraw",
                 "--out", str(tmp_path / "out")]) == 0
    out = capsys.readouterr().out
    assert "they need at least two, and this scenario defines none" in out
    assert "were invalid and were drawn again" in out


def test_the_summary_keeps_a_truncated_value_to_its_last_digit():
    from microsim.present import records
    table = pd.DataFrame({"drawn": [1.0, math.nan], "used": [1.0 - 2**-53, math.inf],
                          "draw": np.array([3, 4], np.int64)})
    assert records(table) == [{"drawn": 1.0, "used": 0.9999999999999999, "draw": 3},
                              {"drawn": None, "used": None, "draw": 4}]
    assert json.dumps(records(table))  # plain JSON: no numpy scalars, no NaN
