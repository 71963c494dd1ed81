"""The report's figures: each drawn from invented tables of the shape a run writes, with one
series per strategy, state, parameter or subgroup in the data, and written as SVG and PNG.

References outside the project: the PNG file signature and SVG as XML (the W3C formats,
checked with the standard library), matplotlib's own artists (what was drawn), networkx's
graph of the scenario (what the structure shows), and Python's format mini-language for the
numbers on the page.
"""
import xml.etree.ElementTree as ET

import numpy as np
import pandas as pd
import pytest
from matplotlib.collections import PathCollection, PolyCollection
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.container import BarContainer, ErrorbarContainer

from microsim.report import figures
from microsim.report.structure import layered_positions, structure_figure, structure_graph
from microsim.report.style import Z95, house_style, rendered
from microsim.report.tables import interval, normal_interval, number, percent, whole
from microsim.scenario import parse_scenario
from support import (event, effect, horizon, move, nested, population, attribute, rate,
                     scenario_text, start, state, strategy)

STRATEGIES = ["usual", "drug", "both"]
LABELS = {"usual": "Usual care", "drug": "A drug", "both": "A drug and a visit"}
STATES = ["well", "ill", "dead"]
TIMES = np.arange(6.0)


def shares() -> pd.DataFrame:
    """validation_shares: time, state, simulated, analytic, se, strategy (invented)."""
    rows = []
    for k, name in enumerate(STRATEGIES[:2]):
        for t in TIMES:
            dead = 1 - np.exp(-0.1 * (k + 1) * t)
            for state_name, share in zip(STATES, [(1 - dead) * 0.7, (1 - dead) * 0.3, dead]):
                rows.append((t, state_name, share + 0.01, share, 0.02, name))
    return pd.DataFrame(rows, columns=["time", "state", "simulated", "analytic", "se", "strategy"])


def survival() -> pd.DataFrame:
    return pd.DataFrame([(t, np.exp(-0.1 * t), np.exp(-0.1 * t), 0.01, 0.0, name)
                         for name in STRATEGIES for t in TIMES],
                        columns=["time", "simulated", "analytic", "se", "z", "strategy"])


def assert_written(figure):
    files = rendered(figure)
    assert files["png"].startswith(b"\x89PNG\r\n\x1a\n") and len(files["png"]) > 5000
    root = ET.fromstring(files["svg"])
    assert root.tag == "{http://www.w3.org/2000/svg}svg"
    assert b"Date" not in files["svg"]  # reruns give the same file


def test_the_trace_has_a_band_and_two_lines_per_state_in_each_strategy_panel():
    figure = figures.trace_figure(shares(), LABELS, {"well": "Well"}, "years")
    axes = figure.axes
    assert [ax.get_title() for ax in axes] == ["Usual care", "A drug"]
    for ax in axes:
        assert len(ax.lines) == 2 * len(STATES)  # simulated and analytic per state
        assert sum(isinstance(c, PolyCollection) for c in ax.collections) == len(STATES)
    # the band is simulated +- 1.96 SE (normal interval, common practice)
    band = axes[0].collections[0].get_paths()[0].vertices
    assert band[:, 1].max() == pytest.approx(0.7 + 0.01 + Z95 * 0.02)
    assert "Well" in [t.get_text() for t in figure.legends[0].get_texts()]
    assert_written(figure)


def test_survival_has_one_band_and_two_lines_per_strategy():
    figure = figures.survival_figure(survival(), LABELS, "years")
    [ax] = figure.axes
    assert len(ax.lines) == 2 * len(STRATEGIES)
    assert sum(isinstance(c, PolyCollection) for c in ax.collections) == len(STRATEGIES)
    assert_written(figure)


def test_the_plane_shows_every_draw_the_base_case_and_the_threshold():
    rng = np.random.default_rng(3)
    plane = pd.DataFrame([(d, name, rng.normal(500, 200), rng.normal(0.05, 0.02))
                          for d in range(40) for name in STRATEGIES[1:]],
                         columns=["draw", "strategy", "incremental_costs", "incremental_qalys"])
    increments = pd.DataFrame([(name, m, mean, 1.0, mean - 10, mean + 10, 100)
                               for name in STRATEGIES[1:]
                               for m, mean in [("incremental_costs", 480.0),
                                               ("incremental_qalys", 0.04),
                                               ("incremental_nmb", 320.0)]],
                              columns=["strategy", "measure", "mean", "standard_error", "lower",
                                       "upper", "n"])
    figure = figures.ce_plane_figure(plane, increments, 20000, "usual", LABELS, "test dollars")
    [ax] = figure.axes
    scatters = [c for c in ax.collections if isinstance(c, PathCollection)]
    assert [len(c.get_offsets()) for c in scatters] == [40, 40]
    base = [c for c in ax.containers if isinstance(c, ErrorbarContainer)]
    assert len(base) == 2
    assert tuple(base[0].lines[0].get_xydata()[0]) == (0.04, 480.0)
    threshold = next(line for line in ax.lines if "threshold" in line.get_label())
    x, y = threshold.get_xdata(), threshold.get_ydata()
    assert (y[1] - y[0]) / (x[1] - x[0]) == pytest.approx(20000)
    assert_written(figure)


def acceptability() -> pd.DataFrame:
    thresholds = np.arange(0, 50001, 5000.0)
    rows = []
    for t in thresholds:
        p_drug = min(1.0, t / 40000)
        best = "drug" if p_drug > 0.5 else "usual"
        rows += [(t, "usual", 1 - p_drug, 100.0, best == "usual"),
                 (t, "drug", p_drug, 90.0, best == "drug")]
    return pd.DataFrame(rows, columns=["threshold", "strategy", "probability_best",
                                       "expected_nmb", "on_acceptability_frontier"])


def test_acceptability_has_a_curve_per_strategy_and_the_frontier():
    table = acceptability()
    figure = figures.acceptability_figure(table, 20000, LABELS, "test dollars")
    [ax] = figure.axes
    frontier = next(line for line in ax.lines if "frontier" in line.get_label())
    curves = [line for line in ax.lines if line.get_label() in LABELS.values()]
    assert len(curves) == 2
    expected = table[table.on_acceptability_frontier].sort_values("threshold")
    np.testing.assert_array_equal(frontier.get_ydata(), expected.probability_best)
    assert_written(figure)


def test_evpi_is_one_curve_with_the_threshold_marked():
    evpi = pd.DataFrame({"threshold": [0.0, 1e4, 2e4], "nmb_current_information": 0.0,
                         "nmb_perfect_information": 0.0, "evpi": [5.0, 20.0, 8.0]})
    figure = figures.evpi_figure(evpi, 10000, "test dollars")
    [ax] = figure.axes
    curve, marker = ax.lines
    np.testing.assert_array_equal(curve.get_ydata(), [5.0, 20.0, 8.0])
    assert list(marker.get_xdata()) == [10000, 10000]
    assert_written(figure)


def one_way(simulated: bool) -> pd.DataFrame:
    rows = []
    for name in ["drug", "both"]:
        for parameter, low, high, swing in [("hr", 100.0, -300.0, 400.0), ("cost", 50.0, -60.0, 110.0),
                                            ("p", -10.0, 5.0, 15.0)]:
            se = 4.0 if simulated else np.nan
            rows.append((name, "incremental_nmb", "usual", parameter, 0.1, 0.9, 0.5, low, high,
                         -20.0, swing, se, se, se, "basis"))
    return pd.DataFrame(rows, columns=["strategy", "measure", "compared_with", "parameter", "low",
                                       "high", "base", "result_low", "result_high",
                                       "result_base", "swing", "se_low", "se_high", "se_base",
                                       "basis"])


@pytest.mark.parametrize("simulated", [False, True])
def test_the_tornado_has_two_bars_per_parameter_widest_on_top(simulated):
    figure = figures.tornado_figure(one_way(simulated), LABELS, "incremental NMB", "test dollars")
    assert len(figure.axes) == 2
    for ax in figure.axes:
        low, high = [c for c in ax.containers if isinstance(c, BarContainer)]
        assert len(low) == len(high) == 3
        # widest swing on top: the top bar (highest y) is "hr", from -20 to 100 and -300
        top = int(np.argmax([bar.get_y() for bar in low]))
        assert low[top].get_x() == -20.0 and low[top].get_width() == pytest.approx(120.0)
        assert high[top].get_width() == pytest.approx(-280.0)
        assert ax.get_yticklabels()[-1].get_text().startswith("hr")
        errors = [c for c in ax.containers if isinstance(c, ErrorbarContainer)]
        assert len(errors) == (1 if simulated else 0)
        assert ax.get_title() == "A drug against Usual care" or ax.get_title().startswith("A drug and")
    assert_written(figure)


def test_subgroups_have_one_interval_per_strategy_and_level():
    table = pd.DataFrame([(a, l, name, 50, nmb, 30.0, "uncertain")
                          for a, levels in [("sex", ["female", "male"]), ("band", ["low", "mid", "high"])]
                          for l in levels for name, nmb in [("drug", 40.0), ("both", -10.0)]],
                         columns=["attribute", "level", "strategy", "patients", "incremental_nmb",
                                  "se", "verdict"])
    figure = figures.subgroup_figure(table, LABELS, "test dollars")
    [ax] = figure.axes
    series = [c for c in ax.containers if isinstance(c, ErrorbarContainer)]
    assert len(series) == 2 and all(len(s.lines[0].get_xdata()) == 5 for s in series)
    assert [t.get_text() for t in ax.get_yticklabels()][-1] == "sex: female"  # file order, top down
    assert_written(figure)


WARD = scenario_text(
    horizon(30, unit="days"), start(ward=1.0), state("ward", label="On the ward"),
    state("icu"), state("home", absorbing=True), state("dead", absorbing=True),
    rate("ward", "home", 0.1, effects=[effect("frail", 0.7)]), rate("ward", "icu", 0.02),
    rate("icu", "ward", 0.3), rate("icu", "dead", 0.05),
    event("fall", ["ward", "icu"], rate=0.01),
    population(10, attribute("frail", "yesno", prevalence=0.3)),
    strategy("usual", comparator=True),
    strategy("early_discharge", states=[nested(name="day_unit", label="Day unit")],
             transitions=[move("ward", "day_unit", name="fast_track", rate=0.05),
                          move("day_unit", "home", rate=0.5, while_treated=False)]),
    title="Ward", provenance="invented for a test")


def test_the_structure_draws_every_state_transition_event_and_addition():
    scenario = parse_scenario(WARD)
    graph = structure_graph(scenario)
    # networkx's own view of the scenario: 4 states and the strategy's added one; 4
    # transitions and 2 added ones between distinct states
    assert set(graph) == {"ward", "icu", "home", "dead", "day_unit"}
    assert graph.number_of_edges() == 6
    assert graph.nodes["day_unit"]["added_by"] == "early_discharge"
    assert graph.edges["ward", "day_unit"]["added_by"] == "early_discharge"
    assert graph.nodes["dead"]["absorbing"] and not graph.nodes["ward"]["absorbing"]
    assert "rate 0.1 per day" in graph.edges["ward", "home"]["text"]
    assert "effects: frail" in graph.edges["ward", "home"]["text"]
    figure = structure_figure(scenario)
    texts = [t.get_text() for t in figure.axes[0].texts]
    assert sum(t.startswith("event: fall") for t in texts) == 1
    assert any("added by early_discharge" in t for t in texts)
    # one arrow per transition and one dotted link per state an event occurs in; text for
    # the 5 states, 6 transition labels, the event and the key
    arrows = [a for a in figure.axes[0].texts if getattr(a, "arrow_patch", None) is not None]
    assert len(arrows) == 6 + 2
    assert len(figure.axes[0].texts) - len(arrows) == 5 + 6 + 1 + 1
    assert_written(figure)


def test_the_structure_draws_what_a_later_treatment_adds():
    # networkx's own view: the second treatment's move to icu is an edge added by it, and
    # its event is drawn in the event row, marked as its own
    text = WARD + "\n" + strategy("sequenced", stop_on="icu", changes=[nested(cost=1)], then=[
        nested(name="second", transitions=[move("icu", "home", rate=0.05, name="step_down")],
               events=[nested(name="delirium", states=["icu"], rate=0.3)])])
    scenario = parse_scenario(text)
    graph = structure_graph(scenario)
    assert graph.edges["icu", "home"]["added_by"] == "sequenced, then second"
    texts = [t.get_text() for t in structure_figure(scenario).axes[0].texts]
    assert any(t.startswith("event: delirium") and t.endswith("[sequenced, then second]")
               for t in texts)
    assert sum(t.startswith("event: fall") for t in texts) == 1


def test_the_structure_layers_follow_the_flow():
    graph = structure_graph(parse_scenario(WARD))
    pos = layered_positions(graph)
    # ward first; icu, home and the day unit one step on; dead after icu (longest path)
    layers = {n: graph.nodes[n]["layer"] for n in graph}
    assert layers == {"ward": 0, "icu": 1, "home": 2, "dead": 2, "day_unit": 1}
    assert pos["ward"][0] < pos["icu"][0] < pos["dead"][0]


@pytest.mark.parametrize("value, text", [
    (1234567.891, "1,234,568"), (-4321.5, "-4,322"), (100.4, "100"), (12.3456, "12.35"),
    (0.0123456, "0.0123"), (0.0, "0"), (float("nan"), "–"), (None, "–")])
def test_numbers_take_thousands_separators_and_sensible_digits(value, text):
    # Reference: Python's format mini-language (",.0f", ",.2f", ".3g"), by hand
    assert number(value) == text


def test_intervals_and_percentages_say_what_they_are():
    assert interval(10.0, 8.0, 12.5) == "10.00 (8.00 to 12.50)"
    assert normal_interval(1000.0, 100.0) == "1,000 (804 to 1,196)"  # 1000 -+ 1.96 x 100
    assert normal_interval(5.0, float("nan")) == "5.00"
    assert percent(0.367) == "36.7%" and whole(1234.0) == "1,234"


def test_acceptability_without_noise_draws_its_own_column():
    table = acceptability().assign(probability_best_noise_removed=lambda t: t.probability_best ** 2)
    figure = figures.acceptability_figure(table, 20000, LABELS, "test dollars",
                                          column="probability_best_noise_removed")
    [ax] = figure.axes
    drug = next(line for line in ax.lines if line.get_label() == "A drug")
    expected = table[table.strategy == "drug"].sort_values("threshold")
    np.testing.assert_array_equal(drug.get_ydata(), expected.probability_best_noise_removed)
    assert_written(figure)


def test_evpi_takes_a_population_scale_when_the_population_is_given():
    evpi = pd.DataFrame({"threshold": [0.0, 1e4, 2e4], "nmb_current_information": 0.0,
                         "nmb_perfect_information": 0.0, "evpi": [5.0, 20.0, 8.0]})
    figure = figures.evpi_figure(evpi.assign(population_evpi=evpi.evpi * 2e6), 10000, "test dollars")
    [ax] = figure.axes
    assert_written(figure)  # drawing sets the secondary axis's limits
    [right] = ax.child_axes  # the secondary axis: EVPI x 2e6 people, in millions
    assert "population EVPI" in right.get_ylabel()
    assert right.get_ylim()[1] == pytest.approx(ax.get_ylim()[1] * 2.0)


def evppi() -> pd.DataFrame:
    thresholds = np.arange(0, 40001, 10000.0)
    evpi = np.array([10.0, 40.0, 60.0, 30.0, 20.0])
    return pd.concat([pd.DataFrame({"threshold": thresholds, "group": group, "parameters": size,
                                    "evppi": evpi * share, "se": 1.0, "evpi": evpi,
                                    "edf": 4.0, "edf_fits": "new: QALYs 3, costs 4",
                                    "method": "a cubic spline"})
                      for group, size, share in [("hr", 1, 0.5), ("c_drug + hr", 2, 0.8)]],
                     ignore_index=True)


def test_evppi_has_a_curve_per_group_under_the_evpi():
    figure = figures.evppi_figure(evppi(), 20000, "test dollars")
    [ax] = figure.axes
    labels = [line.get_label() for line in ax.lines]
    assert labels[:3] == ["EVPI (all parameters, from the draws)", "hr", "c_drug + hr"]
    np.testing.assert_array_equal(ax.lines[0].get_ydata(), [10.0, 40.0, 60.0, 30.0, 20.0])
    np.testing.assert_array_equal(ax.lines[2].get_ydata(), 0.8 * ax.lines[0].get_ydata())
    assert ax.lines[1].get_color() != ax.lines[2].get_color()  # tones of another lightness
    assert_written(figure)


def two_way(simulated: bool = False) -> pd.DataFrame:
    """A grid of hr x price with the base (0.6, 500) inside; the result crosses 0."""
    rows = []
    for name in ["drug", "both"]:
        for hr in [0.4, 0.6, 0.8]:
            for price in [300.0, 500.0, 600.0, 900.0]:
                rows.append((name, "incremental_nmb", "usual", "hr", hr, "c_drug", price,
                             1000.0 - 1500.0 * hr - price, 5.0 if simulated else np.nan,
                             hr == 0.6 or price == 500.0, "basis"))
    return pd.DataFrame(rows, columns=["strategy", "measure", "compared_with",
                                       "first_parameter", "first_value", "second_parameter",
                                       "second_value", "result", "se", "at_base", "basis"])


def test_the_two_way_grid_has_a_map_a_zero_line_and_the_base_case():
    from matplotlib.contour import ContourSet
    figure = figures.two_way_figure(two_way(), LABELS, "incremental NMB", "test dollars")
    panels_ = [ax for ax in figure.axes if ax.get_title()]
    assert [ax.get_title() for ax in panels_] == ["A drug against Usual care",
                                                  "A drug and a visit against Usual care"]
    for ax in panels_:
        contours = [c for c in ax.collections if isinstance(c, ContourSet)] or [
            c for c in ax.get_children() if isinstance(c, ContourSet)]
        assert any(list(c.levels) == [0.0] for c in contours)  # the break-even line
        [base] = [line for line in ax.lines if line.get_label() == "base case"]
        assert tuple(base.get_xydata()[0]) == (0.6, 500.0)
        assert ax.get_xlabel() == "hr" and ax.get_ylabel() == "c_drug"
    assert_written(figure)


def test_break_even_marks_each_crossing_with_its_interval():
    values = np.array([0.0, 500.0, 1000.0, 2000.0])
    curve = pd.DataFrame({"strategy": "drug", "measure": "incremental_nmb",
                          "compared_with": "usual", "parameter": "c_drug", "value": values,
                          "result": 1000.0 - values, "se": 20.0, "basis": "simulated"})
    found = pd.DataFrame([{"strategy": "drug", "measure": "incremental_nmb",
                           "compared_with": "usual", "parameter": "c_drug", "low": 0.0,
                           "high": 2000.0, "base": 500.0, "crossing": 1, "value": 1000.0,
                           "se": 20.0, "lower": 960.8, "upper": 1039.2,
                           "result_at_value": 0.0, "slope": -1.0, "basis": "simulated",
                           "finding": "crosses 0"}])
    figure = figures.break_even_figure(curve, found, LABELS, "incremental NMB", "test dollars")
    [ax] = figure.axes
    [root] = [line for line in ax.lines if line.get_label().startswith("break-even")]
    assert tuple(root.get_xydata()[0]) == (1000.0, 0.0)
    spans = [p for p in ax.patches]
    assert len(spans) == 1 and spans[0].get_x() == pytest.approx(960.8)
    assert sum(isinstance(c, PolyCollection) for c in ax.collections) == 1  # the SE band
    assert_written(figure)


def test_the_budget_has_bars_per_year_and_strategy_and_the_impact_below():
    years = [1, 2, 3]
    budget = pd.concat([pd.DataFrame({"year": years, "strategy": name, "new_patients": 100.0,
                                      "patients_entered": [1100.0, 1200.0, 1300.0],
                                      "cost": np.array([1.0, 2.0, 3.0]) * 1e6 * (k + 1),
                                      "se": np.nan, "impact": np.array([1.0, 2.0, 3.0]) * 1e6 * k,
                                      "impact_se": np.nan, "compared_with": "usual",
                                      "basis": "exact"})
                        for k, name in enumerate(STRATEGIES)], ignore_index=True)
    figure = figures.budget_figure(budget, LABELS, "test dollars")
    costs, impact = figure.axes
    bars = [c for c in costs.containers if isinstance(c, BarContainer)]
    assert [len(b) for b in bars] == [3, 3, 3]
    assert bars[2][2].get_height() == pytest.approx(9.0)  # millions
    assert bars[0][0].get_hatch() != bars[1][0].get_hatch()  # apart in greyscale
    impacts = [c for c in impact.containers if isinstance(c, BarContainer)]
    assert len(impacts) == 2 and impacts[1][1].get_height() == pytest.approx(4.0)
    assert_written(figure)


def test_the_budget_s_axis_labels_fit_in_the_figure_with_a_long_currency():
    # the demo's currency ran the top label past the figure's edge; matplotlib's own
    # extents of the drawn labels must lie within the figure's
    budget = pd.DataFrame({"year": [1, 2] * 2, "strategy": ["usual"] * 2 + ["drug"] * 2,
                           "new_patients": 100.0, "patients_entered": 1100.0,
                           "cost": [2.0e7, 2.5e7, 3.0e7, 3.5e7], "se": np.nan,
                           "impact": [0.0, 0.0, 1.0e7, 1.0e7], "impact_se": np.nan,
                           "compared_with": "usual", "basis": "exact"})
    figure = figures.budget_figure(budget, LABELS, "Lakemoor dollars of the long name")
    with house_style():  # drawn as `rendered` draws it: constrained layout, house fonts
        canvas = FigureCanvasAgg(figure)
        canvas.draw()
    box, renderer = figure.bbox, canvas.get_renderer()
    for axes in figure.axes:
        label = axes.yaxis.label.get_window_extent(renderer)
        assert box.x0 <= label.x0 and label.x1 <= box.x1
        assert box.y0 <= label.y0 and label.y1 <= box.y1, axes.get_ylabel()


def test_contour_labels_sit_inside_the_frame_and_corner_lines_get_none():
    # z = x + y on the unit square (a hand-made plane): its contour x + y = c is a
    # diagonal whose point farthest from the edges is its middle (c/2, c/2) for c <= 1;
    # the line at c = 0.05 never leaves the corner and is left unlabelled
    from matplotlib.figure import Figure
    x = y = np.linspace(0.0, 1.0, 41)
    z = x[None, :] + y[:, None]
    lines = Figure().subplots().contour(x, y, z, levels=[0.05, 0.5, 1.0, 1.5])
    points = figures.inmost_points(lines, x, y)
    assert len(points) == 3
    np.testing.assert_allclose(points, [(0.25, 0.25), (0.5, 0.5), (0.75, 0.75)], atol=0.03)
