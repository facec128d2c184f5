"""The cost-aware planner: a graph of (setting, training size) states and the cheapest path to the target.

A state is (capacity_index, regularization_index, training size), with sizes
on a ladder that starts at the operating point's size and climbs in
geometric steps up to `max_samples`.  Moves and their costs:

- more-data: to any larger size on the ladder, per_sample x added rows;
- more-capacity: one step up the capacity axis, capacity_step, or for a
  nested feature-set axis the cost named for the added group in
  feature_groups (keyed by the capacity label, e.g. "+humidity");
- less-capacity: one step down; it is a setting change that needs no new
  data or features, so it costs one regularization_step (overridable);
- more-regularization / less-regularization: one step, regularization_step;
- every move optionally adds per_fit_second x the destination's expected fit
  time (measured mean, scaled linearly in size beyond the measured sizes).

Every state has a best estimate of its validation error and an interval at
the chosen confidence: where its size was measured, the mean over folds and
the corrected resampled t interval; elsewhere the setting's curve forecast and
band. Forecasts never go below the grid's noise-floor lower band edge. A state
meets the target when the upper edge of its interval is at or below it, so
measured and forecast states are held to the same standard.
"""

from __future__ import annotations

import heapq
import itertools
import math
from dataclasses import dataclass
from typing import Callable, Hashable, Mapping, Sequence

import numpy as np

from gridplan.common.errors import GridplanError
from gridplan.measuring.config import Costs

ACTIONS = ("more-data", "more-capacity", "less-capacity", "more-regularization",
           "less-regularization")

#: Geometric step of the size ladder beyond the data at hand.
LADDER_RATIO = math.sqrt(2.0)
#: Without max_samples, the ladder stops at this multiple of the data at hand.
DEFAULT_REACH = 64


# --- generic shortest paths -----------------------------------------------------------

def _level(cost: float) -> float:
    """Cost rounded for comparisons, so float noise cannot break a tie the wrong way."""
    return round(cost, 9)


@dataclass(frozen=True)
class Edge:
    """One move: an action leading to `target` at `cost`."""

    action: str
    target: Hashable
    cost: float


Graph = Mapping[Hashable, Sequence[Edge]]


def cheapest_plan(graph: Graph, start: Hashable,
                  is_goal: Callable[[Hashable], bool]) -> tuple[float, list[Edge]] | None:
    """Dijkstra from `start` to the nearest goal: (total cost, edges), or None when none is reachable.

    Among equally cheap plans the one with fewer steps wins.
    """
    counter = itertools.count()
    best: dict[Hashable, tuple[float, int]] = {start: (0.0, 0)}
    came_from: dict[Hashable, tuple[Hashable, Edge]] = {}
    heap = [(0.0, 0, next(counter), 0.0, start)]
    done: set = set()
    while heap:
        _, steps, _, cost, node = heapq.heappop(heap)
        if node in done:
            continue
        done.add(node)
        if is_goal(node):
            path: list[Edge] = []
            while node != start:
                node, edge = came_from[node]
                path.append(edge)
            return cost, path[::-1]
        for edge in graph.get(node, ()):
            key = (cost + edge.cost, steps + 1)
            if edge.target not in done and (_level(key[0]), key[1]) < tuple(
                    map(_level, best.get(edge.target, (math.inf, 0)))):
                best[edge.target] = key
                came_from[edge.target] = (node, edge)
                heapq.heappush(heap, (_level(key[0]), key[1], next(counter), key[0], edge.target))
    return None


def costs_to_goal(graph: Graph, is_goal: Callable[[Hashable], bool]) -> dict[Hashable, float]:
    """Cheapest cost from every node to any goal (Dijkstra on the reversed graph); absent when unreachable."""
    reverse: dict[Hashable, list[tuple[Hashable, float]]] = {}
    nodes = set(graph)
    for node, edges in graph.items():
        for edge in edges:
            reverse.setdefault(edge.target, []).append((node, edge.cost))
            nodes.add(edge.target)
    counter = itertools.count()
    heap = [(0.0, next(counter), node) for node in nodes if is_goal(node)]
    heapq.heapify(heap)
    distance: dict[Hashable, float] = {}
    while heap:
        cost, _, node = heapq.heappop(heap)
        if node in distance:
            continue
        distance[node] = cost
        for source, step in reverse.get(node, ()):
            if source not in distance:
                heapq.heappush(heap, (cost + step, next(counter), source))
    return distance


# --- states, forecasts and costs ----------------------------------------------------

@dataclass(frozen=True, order=True)
class State:
    """A setting of the grid at a training size."""

    capacity_index: int
    regularization_index: int
    size: int


@dataclass(frozen=True)
class Forecast:
    """Error at a state: best estimate `point` and interval [low, high] at the chosen confidence."""

    point: float
    low: float
    high: float
    measured: bool

    @property
    def predicted(self) -> float:
        """What the planner compares with the target: the interval's upper edge."""
        return self.high


@dataclass(frozen=True)
class CostModel(Costs):
    """The user's costs (config.Costs) as the planner uses them, checked, plus the price of less capacity."""

    less_capacity_step: float | None = None

    def __post_init__(self) -> None:
        for name in ("per_sample", "capacity_step", "regularization_step", "per_fit_second",
                     "switch_model"):
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and math.isfinite(value) and value >= 0):
                raise GridplanError(f"cost {name} must be a non-negative number, got {value!r}.")
        if self.less_capacity_step is not None and not self.less_capacity_step >= 0:
            raise GridplanError(f"cost less_capacity_step must be non-negative, got {self.less_capacity_step!r}.")
        if self.max_samples is not None and (isinstance(self.max_samples, bool) or self.max_samples < 1):
            raise GridplanError(f"max_samples must be a positive whole number, got {self.max_samples!r}.")

    def more_capacity(self, label: str) -> float:
        """Cost of moving up to the capacity labelled `label`."""
        return float(self.feature_groups.get(label, self.capacity_step))

    def less_capacity(self) -> float:
        return float(self.regularization_step if self.less_capacity_step is None
                     else self.less_capacity_step)


def size_ladder(start: int, max_samples: int | None, ratio: float = LADDER_RATIO) -> list[int]:
    """Sizes from `start` up to max_samples (default DEFAULT_REACH x start) in geometric steps, cap included."""
    if start < 1:
        raise GridplanError(f"the size ladder needs a positive start size, got {start}.")
    top = DEFAULT_REACH * start if max_samples is None else int(max_samples)
    sizes = [int(start)]
    m = float(start)
    while True:
        m *= ratio
        step = int(round(m))
        if step >= top:
            break
        if step > sizes[-1]:
            sizes.append(step)
    if top > sizes[-1]:
        sizes.append(top)
    return sizes


@dataclass
class StateGraph:
    """The planner's graph plus what it needs to explain itself."""

    graph: dict[State, list[Edge]]
    forecasts: dict[State, Forecast]
    blocked: dict[State, dict[str, str]]
    ladder: list[int]
    target: float

    def is_goal(self, state: State) -> bool:
        forecast = self.forecasts.get(state)
        return forecast is not None and forecast.predicted <= self.target


def build_state_graph(forecast: Callable[[State], Forecast | None], *, n_capacity: int,
                      n_regularization: int, ladder: Sequence[int], capacity_labels: Sequence[str],
                      costs: CostModel, target: float,
                      fit_seconds: Callable[[State], float] | None = None) -> StateGraph:
    """All states with a forecast and every move between them, with costs and blocked moves' reasons."""
    forecasts: dict[State, Forecast] = {}
    for ci, ri, m in itertools.product(range(n_capacity), range(n_regularization), ladder):
        f = forecast(State(ci, ri, m))
        if f is not None:
            forecasts[State(ci, ri, m)] = f

    def compute(state: State) -> float:
        if fit_seconds is None or costs.per_fit_second == 0:
            return 0.0
        return costs.per_fit_second * float(fit_seconds(state))

    graph: dict[State, list[Edge]] = {}
    blocked: dict[State, dict[str, str]] = {}
    for state in forecasts:
        ci, ri, m = state.capacity_index, state.regularization_index, state.size
        edges: list[Edge] = []
        why: dict[str, str] = {}
        larger = [s for s in ladder if s > m]
        for size in larger:
            nxt = State(ci, ri, size)
            if nxt in forecasts:
                edges.append(Edge("more-data", nxt, costs.per_sample * (size - m) + compute(nxt)))
        if not larger:
            why["more-data"] = (f"no larger training size is allowed (max_samples {ladder[-1]:,})")
        elif not any(e.action == "more-data" for e in edges):
            why["more-data"] = "this setting has no forecast beyond its measured sizes"
        moves = (("more-capacity", ci + 1, ri, "no larger capacity in the grid"),
                 ("less-capacity", ci - 1, ri, "no smaller capacity in the grid"),
                 ("more-regularization", ci, ri + 1, "no stronger regularisation in the grid"),
                 ("less-regularization", ci, ri - 1, "no weaker regularisation in the grid"))
        for action, nc, nr, edge_reason in moves:
            if not (0 <= nc < n_capacity and 0 <= nr < n_regularization):
                why[action] = edge_reason
                continue
            nxt = State(nc, nr, m)
            if nxt not in forecasts:
                why[action] = "the neighbouring setting has no usable results at this size"
                continue
            if action == "more-capacity":
                step = costs.more_capacity(capacity_labels[nc])
            elif action == "less-capacity":
                step = costs.less_capacity()
            else:
                step = costs.regularization_step
            edges.append(Edge(action, nxt, step + compute(nxt)))
        graph[state] = edges
        blocked[state] = why
    return StateGraph(graph, forecasts, blocked, list(ladder), target)


# --- ranking the first move --------------------------------------------------------------

@dataclass(frozen=True)
class RankedAction:
    """One possible first move and the cheapest plan that starts with it."""

    action: str
    edge: Edge | None
    plan_cost: float | None
    reason: str

    @property
    def reachable(self) -> bool:
        return self.plan_cost is not None


def rank_first_moves(states: StateGraph, start: State,
                     distance: Mapping[Hashable, float] | None = None) -> list[RankedAction]:
    """Every move out of `start`, cheapest total plan first; moves that cannot lead to the target last.

    Moves the grid does not allow (its edges, max_samples) are listed last with their reason.
    """
    distance = costs_to_goal(states.graph, states.is_goal) if distance is None else distance
    ranked: list[tuple[tuple, RankedAction]] = []
    for edge in states.graph.get(start, []):
        rest = distance.get(edge.target)
        predicted = states.forecasts[edge.target].predicted
        if rest is None:
            entry = RankedAction(edge.action, edge, None, "no plan from there reaches the target")
            key = (1, math.inf, predicted, edge.cost)
        else:
            total = edge.cost + rest
            reason = ("meets the target" if states.is_goal(edge.target)
                      else "meets the target after further steps")
            entry = RankedAction(edge.action, edge, total, reason)
            key = (0, _level(total), predicted, edge.cost)
        ranked.append((key, entry))
    ranked.sort(key=lambda pair: (pair[0], pair[1].action, getattr(pair[1].edge.target, "size", 0)))
    out = [entry for _, entry in ranked]
    for action, reason in states.blocked.get(start, {}).items():
        out.append(RankedAction(action, None, None, reason))
    return out


def state_error_forecasts(curves: Mapping[tuple[int, int], object],
                          measured: Mapping[State, tuple[float, float, float]], *,
                          confidence: float, floor_low: float | None,
                          bracket_bottom: Mapping[tuple[int, int], float] | None = None,
                          floor_value: float | None = None,
                          sizes: Sequence[int] = ()
                          ) -> Callable[[State], Forecast | None]:
    """Forecast function over states: measured (mean, low, high) where measured, else the curve band.

    `floor_low` (the grid noise floor's lower band edge) and, per setting,
    `bracket_bottom` (used for settings whose fitted asymptote contradicts
    their own data) bound forecasts from below: no forecast promises better
    than that; a forecast's central value is never below `floor_value`, the
    floor estimate the advice states. A setting's forecasts at `sizes` (the
    planner's ladder) are computed together the first time one is asked for.
    """
    bracket_bottom = bracket_bottom or {}
    ahead: dict[tuple[int, int], dict[float, tuple[float, float, float]]] = {}

    def curve_values(fit, key: tuple[int, int], size: float) -> tuple[float, float, float]:
        known = ahead.setdefault(key, {})
        if size not in known:
            batch = np.array(sorted({float(s) for s in sizes} | {size}))
            points = np.asarray(fit.predict(batch), dtype=float)
            lows, highs = (np.asarray(v, dtype=float) for v in fit.band(batch, confidence))
            known.update(zip(batch.tolist(), zip(points.tolist(), lows.tolist(), highs.tolist())))
        return known[size]

    def forecast(state: State) -> Forecast | None:
        if state in measured:
            mean, low, high = measured[state]
            return Forecast(mean, low, high, True)
        key = (state.capacity_index, state.regularization_index)
        fit = curves.get(key)
        if fit is None:
            return None
        point, low, high = curve_values(fit, key, float(state.size))
        bound = max(floor_low if floor_low is not None else 0.0, bracket_bottom.get(key, 0.0))
        if not (np.isfinite(high) and np.isfinite(point)):
            return None
        point = max(point, bound, floor_value if floor_value is not None else 0.0)
        low, high = max(low, bound), max(high, bound, point)
        return Forecast(point, low, high, False)

    return forecast
