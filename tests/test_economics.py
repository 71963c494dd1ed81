"""Economic evaluation checked against hand-derived examples and published closed forms.

Monte-Carlo checks use fixed seeds and |z| < 4 with standard errors estimated from the
sample (common practice).
"""
import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings, strategies as st
from scipy import stats

from microsim.decision.economics import (
    acceptability_curve, best_strategy, between_estimate_variance, cost_effectiveness_plane,
    discounted_population, incremental_analysis, net_benefit, optimal_sample_split,
    paired_difference, patients_needed, per_person_evpi, population_evpi, regret, variance_components,
)


def rows_by_strategy(table):
    return {row.strategy: row for row in table.itertuples()}


# ---------------------------------------------------------------- incremental analysis

def test_incremental_analysis_with_strong_and_extended_dominance():
    # Hand-derived, definitions of Drummond et al. (2015) ch. 4 and Cantor (1994).
    # A (1000, 5), B (3000, 5.5), C (4000, 6), D (5000, 5.8), E (9000, 6.5).
    # D costs more than C and is less effective: dominated by C.
    # ICER B vs A = 2000/0.5 = 4000 > ICER C vs B = 1000/0.5 = 2000: B is extendedly
    # dominated by a mix of A and C. Then C vs A = 3000/1 = 3000, E vs C = 5000/0.5 = 10000.
    table = incremental_analysis(list("ABCDE"), [1000, 3000, 4000, 5000, 9000], [5, 5.5, 6, 5.8, 6.5])
    assert list(table.strategy) == list("ABCDE")  # cost order
    r = rows_by_strategy(table)
    assert r["A"].status == "frontier" and pd.isna(r["A"].icer) and pd.isna(r["A"].compared_with)
    assert (r["B"].status, r["B"].dominated_by) == ("extendedly dominated", "A and C")
    assert (r["C"].status, r["C"].compared_with) == ("frontier", "A")
    assert (r["C"].incremental_costs, r["C"].incremental_qalys, r["C"].icer) == (3000, 1, 3000)
    assert (r["D"].status, r["D"].dominated_by) == ("dominated", "C")
    assert (r["E"].status, r["E"].compared_with) == ("frontier", "C")
    assert (r["E"].incremental_costs, r["E"].incremental_qalys, r["E"].icer) == (5000, 0.5, 10000)
    assert all(pd.isna(r[s].icer) for s in "BD")


def test_extended_dominance_needs_iteration():
    # Hand-derived (Cantor 1994 procedure): A (0, 0), B (10, 1), C (25, 2), D (28, 3).
    # First pass ICERs 10, 15, 3: C's 15 > 3, C goes. Second pass A->B 10, B->D 18/2 = 9:
    # B goes. Left A and D, ICER 28/3. Both removed points lie above the A-D line.
    table = incremental_analysis(list("ABCD"), [0, 10, 25, 28], [0, 1, 2, 3])
    r = rows_by_strategy(table)
    assert [r[s].status for s in "ABCD"] == ["frontier", "extendedly dominated", "extendedly dominated", "frontier"]
    assert r["B"].dominated_by == r["C"].dominated_by == "A and D"
    assert r["D"].icer == pytest.approx(28 / 3)


def test_ties_are_resolved_as_documented():
    # Hand-derived. X (5, 1) and Y, Z (5, 2) cost the same: X is less effective, dominated
    # by Y (the first of the two most effective); Z is identical to Y and later in input
    # order, so dominated by Y; W (7, 2) costs more for no more effect: dominated by Y.
    table = incremental_analysis(list("XYZW"), [5, 5, 5, 7], [1, 2, 2, 2])
    r = rows_by_strategy(table)
    assert list(table.strategy) == ["Y", "Z", "X", "W"]
    assert r["Y"].status == "frontier"
    assert all((r[s].status, r[s].dominated_by) == ("dominated", "Y") for s in "XZW")


def test_equal_icers_keep_every_strategy_on_the_frontier():
    # Hand-derived: collinear points (0, 0), (1, 0.1), (2, 0.2) have ICERs 10 and 10; the
    # rule removes only ICERs higher than the next (Drummond et al. 2015), so all stay.
    table = incremental_analysis(["P", "Q", "R"], [0, 1, 2], [0, 0.1, 0.2])
    assert list(table.status) == ["frontier"] * 3
    np.testing.assert_allclose(table.icer.iloc[1:], [10, 10])


distinct_points = st.lists(st.tuples(st.integers(0, 10_000), st.integers(0, 10_000)), min_size=1, max_size=7,
                           unique_by=(lambda p: p[0], lambda p: p[1]))


@settings(max_examples=60, deadline=None)
@given(points=distinct_points, threshold=st.floats(0.01, 100.0), seed=st.integers(0, 2**16))
def test_frontier_icers_give_the_net_benefit_decision(points, threshold, seed):
    # Decision rule (Drummond et al. 2015; Stinnett & Mullahy 1998): at a threshold the best
    # strategy is the frontier strategy with the largest ICER not above it, and it has the
    # highest NMB. The frontier is the same whatever the input order.
    names = [f"s{i}" for i in range(len(points))]
    costs = [float(c) for c, _ in points]
    effects = [e / 100 for _, e in points]
    table = incremental_analysis(names, costs, effects)
    frontier = table[table.status == "frontier"]
    assert (frontier.icer.iloc[1:].diff().dropna() >= -1e-9 * frontier.icer.abs().max()).all()
    chosen = frontier[~(frontier.icer > threshold)].iloc[-1]
    best = best_strategy(names, costs, effects, threshold).iloc[0]
    assert best.nmb == pytest.approx(threshold * chosen.qalys_discounted - chosen.costs_discounted, rel=1e-9, abs=1e-6)
    order = np.random.default_rng(seed).permutation(len(names))
    shuffled = incremental_analysis([names[i] for i in order], [costs[i] for i in order], [effects[i] for i in order])
    pd.testing.assert_frame_equal(shuffled, table)


def test_bad_strategy_inputs_are_refused():
    with pytest.raises(ValueError):
        incremental_analysis(["A", "A"], [1, 2], [1, 2])
    with pytest.raises(ValueError):
        incremental_analysis(["A", "B"], [1, np.nan], [1, 2])


# ---------------------------------------------------------------- net benefit

def test_net_monetary_and_health_benefit_arithmetic():
    # Hand-derived from NMB = lambda*E - C and NHB = E - C/lambda (Stinnett & Mullahy 1998):
    # at 20000, A (1000, 2): NMB 39000, NHB 1.95; B (9000, 2.3): NMB 37000, NHB 1.85.
    table = net_benefit(["A", "B"], [1000, 9000], [2.0, 2.3], [20000, 40000, 0])
    at = {(row.threshold, row.strategy): row for row in table.itertuples()}
    assert (at[20000, "A"].nmb, at[20000, "A"].nhb) == (39000, pytest.approx(1.95))
    assert (at[20000, "B"].nmb, at[20000, "B"].nhb) == (37000, pytest.approx(1.85))
    assert at[20000, "A"].best and not at[20000, "B"].best
    # At 40000: A 79000, B 83000 (ICER of B is 8000/0.3 = 26667 < 40000).
    assert (at[40000, "B"].nmb, at[40000, "B"].best) == (83000, True)
    assert at[0, "A"].nmb == -1000 and pd.isna(at[0, "A"].nhb) and at[0, "A"].best
    assert list(best_strategy(["A", "B"], [1000, 9000], [2.0, 2.3], 40000).strategy) == ["B"]


# ---------------------------------------------------------------- PSA: plane, CEAC, EVPI

def two_strategy_psa(n_draws, seed):
    """'usual' costs 0 and gains 0; 'new' has effect N(0.5, 0.4^2) and cost N(8000, 6000^2),
    so its incremental NMB at lambda is N(0.5 lambda - 8000, 0.16 lambda^2 + 6000^2)."""
    rng = np.random.default_rng(seed)
    draws = np.arange(n_draws)
    new = pd.DataFrame({"draw": draws, "strategy": "new", "costs_discounted": rng.normal(8000, 6000, n_draws),
                        "qalys_discounted": rng.normal(0.5, 0.4, n_draws)})
    usual = pd.DataFrame({"draw": draws, "strategy": "usual", "costs_discounted": 0.0, "qalys_discounted": 0.0})
    return pd.concat([usual, new], ignore_index=True)


def incremental_nmb_distribution(threshold):
    return 0.5 * threshold - 8000, math.sqrt(0.16 * threshold**2 + 6000**2)


N_PSA = 200_000
THRESHOLDS = [10_000, 20_000, 40_000]


@pytest.fixture(scope="module")
def normal_psa():
    return two_strategy_psa(N_PSA, seed=11)


def test_plane_points_are_increments_against_the_comparator(normal_psa):
    # Definition (common practice): incremental = strategy minus comparator, per draw.
    plane = cost_effectiveness_plane(normal_psa, "usual")
    new = normal_psa[normal_psa.strategy == "new"].sort_values("draw")
    assert set(plane.strategy) == {"new"} and len(plane) == N_PSA
    np.testing.assert_array_equal(plane.incremental_costs.to_numpy(), new.costs_discounted.to_numpy())
    with pytest.raises(ValueError):
        cost_effectiveness_plane(normal_psa, "nobody")


def test_plane_keeps_the_draw_labels_it_was_given():
    # Hand-made table: draws labelled 7 and 3, rows in no particular order.
    psa = pd.DataFrame({"draw": [7, 3, 3, 7], "strategy": ["b", "a", "b", "a"],
                        "costs_discounted": [50.0, 10.0, 40.0, 20.0], "qalys_discounted": [1.5, 1.0, 1.2, 1.1]})
    plane = cost_effectiveness_plane(psa, "a")
    assert list(plane.draw) == [3, 7] and list(plane.strategy) == ["b", "b"]
    np.testing.assert_allclose(plane.incremental_costs, [30.0, 30.0])
    np.testing.assert_allclose(plane.incremental_qalys, [0.2, 0.4])


def test_acceptability_against_the_normal_closed_form(normal_psa):
    # Reference: P(new has the higher NMB) = P(X > 0) = Phi(mu/sigma) for X ~ N(mu, sigma^2);
    # binomial SE sqrt(p(1-p)/n). Frontier: the sign of mu (Fenwick et al. 2001).
    curve = acceptability_curve(normal_psa, THRESHOLDS)
    np.testing.assert_allclose(curve.groupby("threshold").probability_best.sum(), 1.0, rtol=1e-12)
    for threshold in THRESHOLDS:
        mu, sigma = incremental_nmb_distribution(threshold)
        p = stats.norm.cdf(mu / sigma)
        row = curve[(curve.threshold == threshold) & (curve.strategy == "new")].iloc[0]
        assert abs(row.probability_best - p) / math.sqrt(p * (1 - p) / N_PSA) < 4
        assert row.on_acceptability_frontier == (mu > 0)
    assert curve.groupby("threshold").on_acceptability_frontier.sum().eq(1).all()


def test_evpi_against_the_normal_closed_form(normal_psa):
    # Reference: E[max(X, 0)] = mu Phi(mu/sigma) + sigma phi(mu/sigma) for X ~ N(mu, sigma^2)
    # (standard normal calculus), so per-person EVPI = that - max(mu, 0) (Briggs et al. 2006
    # ch. 7). The thresholds are chosen so the sign of the mean of X is certain; the
    # estimator is then the sample mean of max(X, 0) - X [mu > 0], whose SE is its sd/sqrt(n).
    evpi = per_person_evpi(normal_psa, THRESHOLDS).set_index("threshold")
    new = normal_psa[normal_psa.strategy == "new"]
    for threshold in THRESHOLDS:
        mu, sigma = incremental_nmb_distribution(threshold)
        expected = mu * stats.norm.cdf(mu / sigma) + sigma * stats.norm.pdf(mu / sigma) - max(mu, 0.0)
        x = threshold * new.qalys_discounted.to_numpy() - new.costs_discounted.to_numpy()
        per_draw = np.maximum(x, 0) - x * (mu > 0)
        assert abs(evpi.loc[threshold, "evpi"] - expected) / (per_draw.std(ddof=1) / math.sqrt(N_PSA)) < 4


def test_evpi_is_never_negative_and_zero_when_one_strategy_always_wins():
    # Jensen: E[max] >= max E (Claxton 1999). A strategy cheaper and more effective in every
    # draw always has the highest NMB, so there is nothing to learn: EVPI = 0.
    rng = np.random.default_rng(5)
    n = 2000
    base_cost, base_effect = rng.gamma(2.0, 1000.0, n), rng.normal(1.0, 0.3, n)
    psa = pd.concat([
        pd.DataFrame({"draw": np.arange(n), "strategy": "winner", "costs_discounted": base_cost, "qalys_discounted": base_effect}),
        pd.DataFrame({"draw": np.arange(n), "strategy": "loser", "costs_discounted": base_cost + rng.gamma(1.0, 100.0, n),
                      "qalys_discounted": base_effect - rng.gamma(1.0, 0.05, n)}),
        pd.DataFrame({"draw": np.arange(n), "strategy": "third", "costs_discounted": rng.normal(3000, 1500, n),
                      "qalys_discounted": rng.normal(1.1, 0.3, n)}),
    ])
    thresholds = np.linspace(0, 100_000, 11)
    assert (per_person_evpi(psa, thresholds).evpi >= 0).all()
    assert (per_person_evpi(psa, thresholds).evpi > 0).any()
    two = psa[psa.strategy != "third"]
    assert (per_person_evpi(two, thresholds).evpi == 0.0).all()
    curve = acceptability_curve(two, thresholds)
    assert (curve[curve.strategy == "winner"].probability_best == 1.0).all()


def test_evpi_is_exactly_zero_when_one_strategy_wins_every_draw_at_any_scale():
    # Nothing to learn when the same strategy is best in every draw (Claxton 1999): EVPI is
    # exactly 0, not the round-off of E[max] - max E over net benefits of 1e5 (the two means
    # of the same numbers summed in other orders differ by 1e-11, of either sign), and the
    # population EVPI is 0 too. Invented draws of the size of the demo's.
    rng = np.random.default_rng(7)
    n = 60
    cost, effect = rng.normal(63000.0, 5000.0, n), rng.normal(10.3, 0.5, n)
    psa = pd.concat([
        pd.DataFrame({"draw": np.arange(n), "strategy": "usual", "costs_discounted": cost,
                      "qalys_discounted": effect}),
        pd.DataFrame({"draw": np.arange(n), "strategy": "costly",
                      "costs_discounted": cost + rng.uniform(3000.0, 6000.0, n),
                      "qalys_discounted": effect + rng.uniform(0.02, 0.08, n)})])
    # costly's ICER is at least 3000 / 0.08 = 37,500 in every draw
    thresholds = np.arange(10000.0, 30001.0, 1000.0)
    evpi = per_person_evpi(psa, thresholds)
    assert (evpi.evpi == 0.0).all()
    assert (population_evpi(evpi, [1200] * 10, 0.035).population_evpi == 0.0).all()
    assert (acceptability_curve(psa, thresholds).query("strategy == 'usual'").probability_best == 1).all()
    # the same net benefits laid out strategy by strategy in memory: the difference of the
    # two means is round-off there (which of them numpy sums pairwise depends on the
    # layout), the mean regret still exactly 0
    nmb = np.ascontiguousarray(thresholds[:, None, None] * np.stack(
        [effect, effect + 0.05], axis=1)[None] - np.stack([cost, cost + 4000.0], axis=1)[None])
    assert np.any(nmb.max(axis=2).mean(axis=1) != nmb.mean(axis=1).max(axis=1))
    assert (regret(nmb).mean(axis=1) == 0.0).all()


def test_evpi_is_the_mean_of_the_draws_best_less_the_mean_best_by_hand():
    # Reference: EVPI = E[max_s NMB] - max_s E[NMB] (Claxton 1999; Briggs et al. 2006
    # ch. 7), here with numpy draw by draw, at thresholds where no strategy wins every draw
    rng = np.random.default_rng(11)
    n = 500
    psa = pd.concat([pd.DataFrame({"draw": np.arange(n), "strategy": name,
                                   "costs_discounted": rng.normal(cost, 800.0, n),
                                   "qalys_discounted": rng.normal(effect, 0.1, n)})
                     for name, cost, effect in (("a", 2000.0, 1.0), ("b", 3000.0, 1.05),
                                                ("c", 3500.0, 1.1))])
    thresholds = [0.0, 20000.0, 50000.0]
    found = per_person_evpi(psa, thresholds).set_index("threshold")
    for lam in thresholds:
        nmb = np.stack([lam * g.qalys_discounted.to_numpy() - g.costs_discounted.to_numpy()
                        for _, g in psa.groupby("strategy")], axis=1)
        perfect = np.mean([max(row) for row in nmb])
        current = max(nmb[:, s].mean() for s in range(3))
        assert perfect - current > 10.0  # well above round-off
        assert found.loc[lam, "evpi"] == pytest.approx(perfect - current, rel=1e-10)
        assert found.loc[lam, "nmb_perfect_information"] == pytest.approx(perfect, rel=1e-12)
        assert found.loc[lam, "nmb_current_information"] == pytest.approx(current, rel=1e-12)


def test_population_evpi_uses_the_annuity_of_the_discounted_population():
    # Reference: sum_{t=1..T} N/(1+r)^t = N (1 - (1+r)^-T)/r (annuity formula, common practice).
    people = discounted_population([1000] * 10, 0.035)
    assert people == pytest.approx(1000 * (1 - 1.035**-10) / 0.035, rel=1e-12)
    table = population_evpi(pd.DataFrame({"threshold": [20000.0], "evpi": [12.5]}), [1000] * 10, 0.035)
    assert table.population_evpi.item() == pytest.approx(12.5 * people)


def test_psa_tables_with_missing_or_duplicate_cells_are_refused():
    psa = two_strategy_psa(5, seed=1)
    with pytest.raises(ValueError):
        per_person_evpi(psa.iloc[:-1], [20000])
    with pytest.raises(ValueError):
        per_person_evpi(pd.concat([psa, psa.iloc[:1]]), [20000])


# ---------------------------------------------------------------- paired Monte-Carlo summaries

def test_paired_difference_matches_scipy_and_covers_the_truth():
    # Reference: scipy.stats.sem of the paired differences, scipy.stats.norm.interval.
    # Simulated truth (invented): extra cost 500, extra QALYs 0.05, so incremental NMB at
    # 20000 is 500; the estimate is within 4 SE of it.
    rng = np.random.default_rng(21)
    n = 20_000
    cost_a = rng.gamma(2.0, 2000.0, n)
    effect_a = rng.normal(5.0, 1.0, n)
    cost_b = cost_a + rng.normal(500.0, 300.0, n)
    effect_b = effect_a + rng.normal(0.05, 0.02, n)
    table = paired_difference(cost_a, effect_a, cost_b, effect_b, threshold=20000, confidence=0.9).set_index("measure")
    nmb = 20000 * (effect_b - effect_a) - (cost_b - cost_a)
    row = table.loc["incremental_nmb"]
    assert row.standard_error == pytest.approx(stats.sem(nmb), rel=1e-10)
    assert (row.lower, row.upper) == pytest.approx(stats.norm.interval(0.9, loc=nmb.mean(), scale=stats.sem(nmb)))
    assert abs(row["mean"] - 500.0) / row.standard_error < 4
    assert abs(table.loc["incremental_qalys", "mean"] - 0.05) / table.loc["incremental_qalys", "standard_error"] < 4
    assert table.n.eq(n).all()


def test_patients_needed_for_a_target_precision():
    # Reference: n = (z sd / h)^2 with z = 1.959964 (standard normal tables): sd 10000,
    # h 500 gives 39.19928^2 = 1536.58, so 1537; n = (sd/se)^2: 3/0.1 gives 900 (common practice).
    assert patients_needed(10_000, half_width=500) == 1537
    assert patients_needed(3.0, standard_error=0.1) == 900
    with pytest.raises(ValueError):
        patients_needed(1.0, standard_error=0.1, half_width=0.2)


# ---------------------------------------------------------------- ANOVA inner/outer split

def test_anova_components_are_unbiased_on_a_normal_hierarchical_model():
    # Model (O'Hagan, Stevenson & Madan 2007): draw means mu_i ~ N(3, sigma^2 = 4), patients
    # y_ij ~ N(mu_i, tau^2 = 25); N = 10 draws x n = 8 patients, 4000 replicate pilots.
    # E[sigma^2 estimate] = 4 while the naive variance of draw means has E = 4 + 25/8; the
    # estimate's variance matches the normal-theory formula (chi-square algebra, from memory),
    # and its plug-in estimate is unbiased for it.
    rng = np.random.default_rng(31)
    replicates, n_draws, n_patients, sigma2, tau2 = 4000, 10, 8, 4.0, 25.0
    means = 3 + math.sqrt(sigma2) * rng.standard_normal((replicates, n_draws, 1))
    pilots = means + math.sqrt(tau2) * rng.standard_normal((replicates, n_draws, n_patients))
    fits = [variance_components(y) for y in pilots]
    between = np.array([f.between_draw_variance for f in fits])
    naive = np.array([f.variance_of_draw_means for f in fits])
    within = np.array([f.within_draw_variance for f in fits])
    estimated_variance = np.array([f.variance_of_between_estimate for f in fits])

    def z(sample, target):
        return (sample.mean() - target) / (sample.std(ddof=1) / math.sqrt(sample.size))

    assert abs(z(between, sigma2)) < 4
    assert abs(z(within, tau2)) < 4
    assert abs(z(naive, sigma2 + tau2 / n_patients)) < 4
    assert z(naive, sigma2) > 8  # the uncorrected estimate is visibly biased
    true_variance = between_estimate_variance(sigma2, tau2, n_draws, n_patients)
    centred = between - between.mean()
    se_of_variance = math.sqrt(((centred**4).mean() - centred.var() ** 2) / replicates)
    assert abs(between.var(ddof=1) - true_variance) / se_of_variance < 4
    assert abs(z(estimated_variance, true_variance)) < 4


@pytest.mark.parametrize("ratio", [4.0, 20.0, 99.0])
def test_optimal_inner_sample_is_one_plus_the_variance_ratio(ratio):
    # Reference: with many outer draws the optimal inner n is 1 + tau^2/sigma^2
    # (O'Hagan, Stevenson & Madan 2007, from memory).
    split = optimal_sample_split(between=1.0, within=ratio, total_patients=10**8)
    assert abs(split.patients_per_draw - (1 + ratio)) <= 1
    assert split.n_draws == 10**8 // split.patients_per_draw


@pytest.mark.parametrize("between, within, total", [(1.0, 9.0, 600), (0.3, 40.0, 5000), (2.0, 0.5, 97), (0.0, 1.0, 50)])
def test_optimal_split_is_the_minimum_of_the_variance_formula(between, within, total):
    # Brute force over every whole n >= 2 with N = total // n >= 2 of the normal-theory
    # variance of the sigma^2 estimate (from memory, as above).
    split = optimal_sample_split(between, within, total)
    brute = min(between_estimate_variance(between, within, total // n, n) for n in range(2, total // 2 + 1))
    assert split.variance_of_between_estimate == pytest.approx(brute, rel=1e-12)
    assert split.n_draws * split.patients_per_draw <= total
