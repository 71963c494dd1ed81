"""The model's structure, drawn from the scenario: states as boxes, transitions as arrows
labelled with their per-cycle probability, rate or hazard family, events apart (dotted,
below the states they occur in), and what a strategy adds marked by dashes.

networkx lays it out: states are layered along the flow, each strongly connected group of
states one layer after every group that leads into it (the longest-path layering of
Sugiyama, Tagawa & Toda 1981, "Methods for visual understanding of hierarchical system
structures", IEEE Trans. Systems, Man and Cybernetics 11:109-125), and
`networkx.multipartite_layout` places the layers. matplotlib draws the boxes and arrows.
Staying in a state (a "remainder" back to itself) is not drawn.
"""
from __future__ import annotations

import networkx as nx
import numpy as np
from matplotlib.figure import Figure

from microsim.report.style import INK, house_style, wrapped
from microsim.scenario.spec import REMAINDER, Ref, Scenario, TransitionSpec

LAYER_GAP, ROW_GAP, MARGIN = 3.0, 1.35, 0.9  # inches between layers, between rows, around
ABSORBING_FILL, STATE_FILL = "#e6e6e6", "#ffffff"
STATE_FONT, LABEL_FONT = 9.5, 7.5  # points


def per_unit(unit: str) -> str:
    return unit[:-1] if unit.endswith("s") else unit


def value_text(value: Ref, scenario: Scenario) -> str:
    """A number, a parameter (with its base value) or a table, as a reader sees it."""
    if not isinstance(value, str):
        return f"{value:g}"
    if value in scenario.tables:
        return f"table {value} by {scenario.tables[value].axis_words.replace('_', ' ')}"
    if value in scenario.parameters:
        return f"{value} = {scenario.parameters[value].value:g}"
    return value


def hazard_text(spec, scenario: Scenario) -> str:
    """The probability, rate or hazard family of a transition or event."""
    if getattr(spec, "by_state", None):
        kind = "p" if spec.probability is not None else "rate"
        return f"{kind} by state: " + ", ".join(f"{state} {value_text(value, scenario)}"
                                                for state, value in spec.by_state.items())
    if spec.probability is not None:
        return "remainder" if spec.probability == REMAINDER else (
            f"p {'from' if spec.probability in scenario.tables else '='} "
            f"{value_text(spec.probability, scenario)}")
    family, params = spec.hazard.family, spec.hazard.params
    clock = "" if spec.clock == "since_entry" else f" on the {spec.clock.replace('_', ' ')} clock"
    if family == "constant":
        text = f"rate {value_text(params['rate'], scenario)} per {per_unit(scenario.time.unit)}"
    elif family == "table":
        text = f"rate from {value_text(params['table'], scenario)}"
    else:
        text = f"{family}: " + ", ".join(f"{k} {value_text(v, scenario)}"
                                         for k, v in params.items())
    return text + clock


def risk_label(spec, scenario: Scenario) -> str:
    lines = [hazard_text(spec, scenario)]
    if spec.effects:
        lines.append("effects: " + ", ".join(dict.fromkeys(e.attribute for e in spec.effects)))
    if spec.memory:
        lines.append("memory: " + ", ".join(dict.fromkeys(m.after for m in spec.memory)))
    return "\n".join(wrapped(line, 36) for line in lines)


def structure_graph(scenario: Scenario) -> nx.DiGraph:
    """States (with strategies' added states) and the transitions between distinct states."""
    graph = nx.DiGraph()
    starts = scenario.start.shares

    def add_state(state, added_by=None):
        share = starts.get(state.name, 0.0)
        text = wrapped(state.label, 18) + (f"\n{share:.0%} at start" if share else "")
        if added_by:
            text += f"\nadded by {added_by}"
        graph.add_node(state.name, text=text, absorbing=state.absorbing, added_by=added_by)

    def add_transition(t: TransitionSpec, added_by=None):
        if t.source == t.target:
            return
        text = risk_label(t, scenario)
        if t.name != t.key:
            text = f"{t.name}\n{text}"
        text += f"\n[{added_by}]" if added_by else ""
        if graph.has_edge(t.source, t.target):  # a second way between them (another cause)
            first = graph.edges[t.source, t.target]
            text, added_by = first["text"] + "\n" + text, first["added_by"]
        graph.add_edge(t.source, t.target, text=text, added_by=added_by)

    for state in scenario.states:
        add_state(state)
    for strategy in scenario.strategies:
        for state in strategy.states:
            add_state(state, strategy.name)
    for t in scenario.transitions:
        add_transition(t)
    for treatment, added_by in additions(scenario):
        for t in treatment.transitions:
            add_transition(t, added_by)
    return graph


def additions(scenario: Scenario):
    """(treatment, who adds, in words) for each strategy and each later treatment of its
    sequence: what may add transitions and events."""
    for strategy in scenario.strategies:
        yield strategy, strategy.name
        for line in strategy.then:
            yield line, f"{strategy.name}, then {line.name}"


def back_edges(graph: nx.DiGraph) -> set[tuple[str, str]]:
    """Transitions that close a cycle (to a state still open in a depth-first search in
    file order): left out when layering, so a way back does not pull states together."""
    open_states, back = set(), set()
    for source, target, kind in nx.dfs_labeled_edges(graph):
        if kind == "forward":
            open_states.add(target)
        elif kind == "reverse":
            open_states.discard(target)
        elif kind == "nontree" and target in open_states:
            back.add((source, target))
    return back


def layered_positions(graph: nx.DiGraph) -> dict[str, np.ndarray]:
    """Positions in inches: layers along x by the longest path through the graph without
    its back edges, states of a layer spread along y by networkx's multipartite layout."""
    flow = graph.copy()
    flow.remove_edges_from(back_edges(graph))
    for name in nx.topological_sort(flow):
        graph.nodes[name]["layer"] = max(
            (graph.nodes[p]["layer"] + 1 for p in flow.predecessors(name)), default=0)
    raw = nx.multipartite_layout(graph, subset_key="layer", align="vertical", scale=1.0)
    layers = [graph.nodes[n]["layer"] for n in graph]
    tallest = max(layers.count(k) for k in set(layers))
    xy = np.array(list(raw.values()))
    span = np.ptp(xy, axis=0)
    size = np.array([LAYER_GAP * max(layers), ROW_GAP * (tallest - 1)])
    scale = size / np.where(span > 0, span, 1)
    return {name: (np.asarray(p) - xy.min(axis=0)) * scale for name, p in raw.items()}


def half_size(text: str) -> np.ndarray:
    """Half the width and height of a state's box in inches, from its text (a character
    is about 0.6 em wide, a line 1.2 em high) and the box's padding."""
    lines, em = text.split("\n"), STATE_FONT / 72
    return np.array([0.3 * em * max(map(len, lines)), 0.6 * em * len(lines)]) + 0.7 * em


def arc_points(a, b, rad: float, count: int = 41) -> np.ndarray:
    """Points along matplotlib's arc3 curve from a to b: the quadratic Bezier whose
    control point lies rad x |ab| off the chord's midpoint, to its right."""
    a, b = np.asarray(a, float), np.asarray(b, float)
    (dx, dy) = b - a
    control = (a + b) / 2 + rad * np.array([dy, -dx])
    t = np.linspace(0, 1, count)[:, None]
    return (1 - t) ** 2 * a + 2 * t * (1 - t) * control + t ** 2 * b


def arcs(graph: nx.DiGraph, pos: dict) -> dict[tuple[str, str], float]:
    """The bend of each arrow (matplotlib's arc3 rad): straight where that clears the other
    boxes, else the gentlest arc that does, above before below. A transition with one back
    bends a little, so the two arrows and their labels lie apart."""
    halves = {n: half_size(graph.nodes[n]["text"]) + 0.08 for n in graph}

    def clear(points, ends) -> bool:
        return not any(np.all(np.abs(points - pos[n]) < halves[n], axis=1).any()
                       for n in graph if n not in ends)

    bends = {}
    for source, target in graph.edges:
        (x1, y1), (x2, y2) = pos[source], pos[target]
        length = max(np.hypot(x2 - x1, y2 - y1), 1e-9)
        upward = -(np.sign(x2 - x1) or np.sign(y2 - y1) or 1.0)  # rad sign that bends up
        if graph.has_edge(target, source):
            candidates = [0.2, 0.35, 0.5]
        else:
            apexes = [0.5, 0.8, 1.1, 1.4, 1.7]  # inches off the chord at the middle
            candidates = [0.0, *(upward * 2 * h / length for h in apexes),
                          *(-upward * 2 * h / length for h in apexes)]
        bends[source, target] = next(
            (rad for rad in candidates
             if clear(arc_points(pos[source], pos[target], rad), (source, target))),
            candidates[-1])
    return bends


def structure_figure(scenario: Scenario) -> Figure:
    """The diagram of the scenario's states, transitions, events and strategies' additions."""
    graph = structure_graph(scenario)
    pos = layered_positions(graph)
    bends = arcs(graph, pos)
    middles = {edge: arc_points(pos[edge[0]], pos[edge[1]], rad, 3)[1]
               for edge, rad in bends.items()}
    xy = np.array(list(pos.values()))
    events = [(e, None) for e in scenario.events] + [
        (e, added_by) for treatment, added_by in additions(scenario) for e in treatment.events]
    event_row = xy[:, 1].min() - ROW_GAP
    points = np.vstack([xy, *middles.values(), *([[xy[0, 0], event_row]] if events else [])])
    (left, bottom), (right, top) = points.min(axis=0) - MARGIN, points.max(axis=0) + MARGIN
    bottom -= 0.3  # room for the key
    key = "grey box: absorbing state;  dashed: added by a strategy" + (
        ";  dotted: an event, which does not change the state" if events else "")
    right = max(right, left + 0.4 + 0.6 * LABEL_FONT / 72 * len(key))
    with house_style():
        figure = Figure(figsize=(right - left, top - bottom))
        ax = figure.add_axes((0, 0, 1, 1))
        ax.set_xlim(left, right)
        ax.set_ylim(bottom, top)
        ax.set_axis_off()
        boxes = {}
        for name, (x, y) in pos.items():
            node = graph.nodes[name]
            boxes[name] = ax.text(x, y, node["text"], ha="center", va="center", fontsize=STATE_FONT,
                                  zorder=3, bbox=dict(
                                      boxstyle="round,pad=0.45", linewidth=1.1, edgecolor=INK,
                                      facecolor=ABSORBING_FILL if node["absorbing"] else STATE_FILL,
                                      linestyle="--" if node["added_by"] else "-"))
        for (source, target), rad in bends.items():
            edge = graph.edges[source, target]
            ax.annotate("", xy=pos[target], xytext=pos[source], zorder=4, arrowprops=dict(
                arrowstyle="-|>,head_length=0.5,head_width=0.25", color=INK, linewidth=0.9,
                linestyle="--" if edge["added_by"] else "-", shrinkA=1, shrinkB=1,
                connectionstyle=f"arc3,rad={rad}", patchA=boxes[source].get_bbox_patch(),
                patchB=boxes[target].get_bbox_patch()))
            ax.text(*middles[source, target], edge["text"], ha="center", va="center",
                    fontsize=LABEL_FONT, zorder=5, bbox=dict(boxstyle="square,pad=0.15",
                                                      facecolor="white", edgecolor="none"))
        for k, (event, added_by) in enumerate(events):
            x = np.mean([pos[s][0] for s in event.states]) + 0.35 * (k - (len(events) - 1) / 2)
            text = f"event: {event.name}\n{risk_label(event, scenario)}" + (
                f"\n[{added_by}]" if added_by else "")
            box = ax.text(x, event_row, text,
                          ha="center", va="center", fontsize=LABEL_FONT, zorder=3, bbox=dict(
                              boxstyle="round,pad=0.4", facecolor="white", edgecolor=INK,
                              linestyle=":", linewidth=1.0))
            for state in event.states:
                ax.annotate("", xy=pos[state], xytext=(x, event_row), zorder=2, arrowprops=dict(
                    arrowstyle="-", color=INK, linestyle=":", linewidth=0.9,
                    patchA=box.get_bbox_patch(), patchB=boxes[state].get_bbox_patch()))
        ax.text(left + 0.2, bottom + 0.15, key, fontsize=LABEL_FONT, va="bottom", color=INK)
    return figure
