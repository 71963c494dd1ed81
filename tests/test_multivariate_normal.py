"""[[uncertainty.multivariate_normal]]: parameters drawn together from one normal, some on
the log scale. Checked against the normal's own moments (sample means and covariances
within |z| < 4 of their standard errors, the covariance's from the fourth moments: common
practice), scipy.stats.norm for linear combinations (a'x ~ N(a'mu, a' Sigma a), closed form)
and the randomness contract of DESIGN.md (a draw is a function of seed and draw number)."""
import math

import numpy as np
import pytest
from scipy import stats

from microsim.scenario import parse_scenario
from microsim.uncertainty import parameter_draws
from microsim.uncertainty.draw_checks import check_draws
from microsim.uncertainty.draws import ParameterSampler
from support import (KS_LEVEL, Z, assert_refused, edited, horizon, nested, parameters, rate,
                     scenario_text, section, start, state, transition)

MEANS = [math.log(2.0), math.log(5.0), 0.3]
COVARIANCE = [[0.04, -0.012, 0.01], [-0.012, 0.09, -0.02], [0.01, -0.02, 0.25]]


def model(group=None, **extra_parameters):
    group = group if group is not None else nested(
        parameters=["shape", "scale", "coef"], means=MEANS, covariance=COVARIANCE,
        on_log_scale=["shape", "scale"])
    return scenario_text(
        horizon(10), start(well=1), state("well"), state("dead", absorbing=True),
        transition("well", "dead", hazard=dict(family="weibull", shape="shape", scale="scale")),
        rate("well", "dead_too", "rate_b") if "rate_b" in extra_parameters else "",
        state("dead_too", absorbing=True) if "rate_b" in extra_parameters else "",
        parameters(shape=2.0, scale=5.0, coef=0.3, **extra_parameters),
        section("uncertainty", draws=10, multivariate_normal=[group]))


def sampler_of(text):
    s = parse_scenario(text)
    u = s.uncertainty
    return s, ParameterSampler(s.parameters, None, u.dirichlets, u.normal_groups)


def test_draws_have_the_group_means_and_covariance_on_the_drawn_scale():
    _, sampler = sampler_of(model())
    table = sampler.draws(5, np.arange(6000))
    x = np.column_stack([np.log(table["shape"]), np.log(table["scale"]), table["coef"]])
    n = len(x)
    centred = x - x.mean(axis=0)
    for i in range(3):
        se = x[:, i].std(ddof=1) / math.sqrt(n)
        assert abs(x[:, i].mean() - MEANS[i]) < Z * se
        for j in range(i + 1):
            products = centred[:, i] * centred[:, j]
            se = products.std(ddof=1) / math.sqrt(n)
            assert abs(products.mean() - COVARIANCE[i][j]) < Z * se, (i, j)
    assert (table["shape"] > 0).all() and (table["scale"] > 0).all() and (table.coef < 0).any()


def test_a_linear_combination_is_normal_with_its_closed_form_moments():
    # reference: a'x ~ N(a'mu, a' Sigma a) for a multivariate normal x (closed form),
    # Kolmogorov-Smirnov against scipy.stats.norm at level 1e-3
    _, sampler = sampler_of(model())
    table = sampler.draws(8, np.arange(3000))
    a = np.array([1.0, -2.0, 0.5])
    combined = np.column_stack([np.log(table["shape"]), np.log(table["scale"]),
                                table["coef"]]) @ a
    reference = stats.norm(a @ MEANS, math.sqrt(a @ np.array(COVARIANCE) @ a))
    assert stats.kstest(combined, reference.cdf).pvalue > KS_LEVEL


def test_a_semi_definite_covariance_keeps_its_exact_relation():
    # reference: with covariance [[1, 1], [1, 1]] the two components differ by their means'
    # difference in every draw (the normal lies on a line)
    group = nested(parameters=["coef", "other"], means=[0.3, 1.0], covariance=[[1, 1], [1, 1]])
    text = edited(model(group), ("coef = 0.3", "coef = 0.3\nother = 1.0"))
    _, sampler = sampler_of(text)
    table = sampler.draws(3, np.arange(200))
    np.testing.assert_allclose(table.other - table.coef, 0.7, rtol=1e-12)


def test_a_draw_is_a_function_of_the_seed_and_its_number_only():
    s = parse_scenario(model())
    few = parameter_draws(s.parameters, 11, 20, normal_groups=s.uncertainty.normal_groups)
    many = parameter_draws(s.parameters, 11, 2000, normal_groups=s.uncertainty.normal_groups)
    assert few.equals(many.iloc[:20])


def test_draws_are_checked_against_every_use_as_before():
    # a member used as a rate drawn from a normal that reaches below 0: refused, naming the
    # draw; "redraw" then gives draws that are all valid
    group = nested(parameters=["coef", "rate_b"], means=[0.3, 0.05],
                   covariance=[[0.01, 0.0], [0.0, 0.01]])
    text = model(group, rate_b=0.05)
    s, sampler = sampler_of(text)
    with pytest.raises(Exception) as caught:
        check_draws(s, sampler, 40, 7)
    assert "rate_b" in str(caught.value) and "a rate must be at least 0" in str(caught.value)
    s, sampler = sampler_of(text.replace("draws = 10", 'draws = 10\ninvalid_draws = "redraw"'))
    checked = check_draws(s, sampler, 40, 7)
    assert (checked.table.rate_b >= 0).all() and len(checked.changed)


PATH = "uncertainty.multivariate_normal[0]"


@pytest.mark.parametrize("edit, path, phrase", [
    (("means = [", "means = [1.0, "), f"{PATH}.means", "has 4 means for 3 parameters"),
    (("[-0.012, 0.09, -0.02]", "[-0.013, 0.09, -0.02]"), f"{PATH}.covariance[1][0]",
     "a covariance matrix is symmetric"),
    (("[[0.04, -0.012, 0.01]", "[[0.0001, -0.012, 0.01]"), f"{PATH}.covariance",
     "not positive semi-definite"),
    (("[[0.04, -0.012, 0.01]", "[[-0.04, -0.012, 0.01]"), f"{PATH}.covariance[0][0]",
     "is a variance and must be at least 0"),
    (("[0.01, -0.02, 0.25]]", "[0.01, -0.02]]"), f"{PATH}.covariance[2]",
     "must be a row of 3 numbers"),
    (('on_log_scale = ["shape", "scale"]', 'on_log_scale = ["shape", "sclae"]'),
     f"{PATH}.on_log_scale[1]", "is not one of this group's parameters"),
    (('parameters = ["shape", "scale", "coef"]', 'parameters = ["shape", "scale", "coeff"]'),
     f"{PATH}.parameters[2]", "did you mean 'coef'"),
    (("scale = 5.0\n", 'scale = { value = 5.0, distribution = { family = "gamma", '
                       'shape = 2, scale = 2.5 } }\n'),
     f"{PATH}.parameters[1]", "has its own distribution"),
    ((("coef = 0.3", "coef = -0.3"), ('["shape", "scale"]', '["shape", "scale", "coef"]')),
     f"{PATH}.parameters[2]", "drawn on the log scale"),
    (("covariance =", "covariances ="), f"{PATH}.covariances", "did you mean 'covariance'"),
    (("coef = 0.3", 'coef = { formula = "shape - 1.7" }'), f"{PATH}.parameters[2]",
     "is derived"),
])
def test_refusals(edit, path, phrase):
    edits = edit if isinstance(edit[0], tuple) else (edit,)
    assert_refused(edited(model(), *edits), path, phrase)


def test_a_parameter_in_a_dirichlet_group_too_is_refused():
    text = model().replace("[[uncertainty.multivariate_normal]]",
                           '[[uncertainty.dirichlet]]\n  parameters = ["coef", "other"]\n'
                           '  alphas = [1, 1]\n\n  [[uncertainty.multivariate_normal]]')
    text = text.replace("coef = 0.3", "coef = 0.3\nother = 0.7")
    assert_refused(text, "uncertainty.dirichlet[0].parameters[0]",
                   "is already in uncertainty.multivariate_normal[0]")
