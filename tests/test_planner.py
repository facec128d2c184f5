"""The planner: shortest paths against brute force, the size ladder, costs and the state graph."""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from gridplan.common.errors import GridplanError
from gridplan.deciding.planner import (
    CostModel,
    Edge,
    Forecast,
    State,
    build_state_graph,
    cheapest_plan,
    costs_to_goal,
    rank_first_moves,
    size_ladder,
    state_error_forecasts,
)

# --- brute force ---------------------------------------------------------------------------

def brute_force_cost(graph, start, goals) -> float:
    """Cheapest cost over every simple path from start to a goal (non-negative costs make simple paths enough)."""
    best = math.inf

    def walk(node, cost, seen):
        nonlocal best
        if node in goals:
            best = min(best, cost)
        for edge in graph.get(node, ()):
            if edge.target not in seen:
                walk(edge.target, cost + edge.cost, seen | {edge.target})

    walk(start, 0.0, {start})
    return best


@st.composite
def small_graphs(draw):
    n = draw(st.integers(2, 7))
    nodes = list(range(n))
    graph = {}
    for node in nodes:
        targets = draw(st.lists(st.sampled_from(nodes), max_size=4))
        graph[node] = [Edge(draw(st.sampled_from(["more-data", "more-capacity", "less-capacity"])),
                            t, float(draw(st.integers(0, 20))))
                       for t in targets]
    goals = set(draw(st.lists(st.sampled_from(nodes), max_size=3)))
    start = draw(st.sampled_from(nodes))
    return graph, start, goals


@settings(max_examples=150, deadline=None)
@given(small_graphs())
def test_cheapest_plan_equals_brute_force_on_random_graphs(problem):
    graph, start, goals = problem
    expected = brute_force_cost(graph, start, goals)
    found = cheapest_plan(graph, start, goals.__contains__)
    if math.isinf(expected):
        assert found is None
        return
    cost, path = found
    assert cost == pytest.approx(expected)
    # the path is a real walk from start to a goal whose edge costs add up
    node = start
    for edge in path:
        assert edge in graph[node]
        node = edge.target
    assert node in goals
    assert sum(e.cost for e in path) == pytest.approx(cost)


@settings(max_examples=150, deadline=None)
@given(small_graphs())
def test_costs_to_goal_and_ranking_equal_brute_force(problem):
    graph, start, goals = problem
    distance = costs_to_goal(graph, goals.__contains__)
    for node in graph:
        expected = brute_force_cost(graph, node, goals)
        assert distance.get(node, math.inf) == pytest.approx(expected)


def test_ranking_orders_first_moves_by_the_cheapest_plan_through_them():
    # a -> goal directly costs 10; a -> b costs 1 and b -> goal costs 2; a -> dead end costs 0.
    a, b, dead, goal = (State(0, 0, m) for m in (10, 20, 30, 40))
    forecasts = {a: Forecast(5, 5, 5, True), b: Forecast(4, 4, 4, False),
                 dead: Forecast(3, 3, 3, False), goal: Forecast(1, 1, 1, False)}
    from gridplan.deciding.planner import StateGraph
    graph = {a: [Edge("more-capacity", goal, 10.0), Edge("more-data", b, 1.0),
                 Edge("more-regularization", dead, 0.0)],
             b: [Edge("more-data", goal, 2.0)], dead: [], goal: []}
    states = StateGraph(graph, forecasts, {a: {"less-capacity": "no smaller capacity"}}, [], 2.0)
    ranked = rank_first_moves(states, a)
    assert [r.action for r in ranked] == ["more-data", "more-capacity", "more-regularization",
                                          "less-capacity"]
    assert [r.plan_cost for r in ranked] == [3.0, 10.0, None, None]
    assert ranked[0].plan_cost == cheapest_plan(graph, a, states.is_goal)[0]
    assert ranked[-1].reason == "no smaller capacity"


# --- ladder and costs ----------------------------------------------------------------------------

def test_size_ladder_is_geometric_up_to_max_samples():
    ladder = size_ladder(100, 1000)
    assert ladder[0] == 100 and ladder[-1] == 1000
    assert all(b > a for a, b in zip(ladder, ladder[1:]))
    # sqrt(2) steps: 100, 141, 200, 283, 400, 566, 800, then the cap
    assert ladder == [100, 141, 200, 283, 400, 566, 800, 1000]
    assert size_ladder(100, None)[-1] == 6400          # default reach: 64x the data at hand
    assert size_ladder(100, 120) == [100, 120]


def test_cost_model_prices_feature_groups_by_label_and_refuses_negative_costs():
    costs = CostModel(capacity_step=150.0, feature_groups={"+humidity": 300.0})
    assert costs.more_capacity("+humidity") == 300.0
    assert costs.more_capacity("+wind") == 150.0       # not named: one capacity step
    assert costs.less_capacity() == costs.regularization_step
    with pytest.raises(GridplanError, match="per_sample"):
        CostModel(per_sample=-1.0)
    with pytest.raises(GridplanError, match="max_samples"):
        CostModel(max_samples=0)


def _toy_forecast(errors: dict):
    def forecast(state):
        value = errors.get((state.capacity_index, state.regularization_index), {}).get(state.size)
        return None if value is None else Forecast(value, value, value, False)
    return forecast


def test_state_graph_moves_costs_and_blocked_moves():
    # two capacities ("a", "+b") x two regularisations, sizes 100 and 200
    errors = {(0, 0): {100: 3.0, 200: 2.5}, (0, 1): {100: 3.1, 200: 2.6},
              (1, 0): {100: 2.0, 200: 1.5}, (1, 1): {100: 1.8}}
    costs = CostModel(per_sample=0.5, capacity_step=100.0, regularization_step=2.0,
                      feature_groups={"+b": 40.0}, per_fit_second=10.0, max_samples=200)
    states = build_state_graph(_toy_forecast(errors), n_capacity=2, n_regularization=2,
                               ladder=[100, 200], capacity_labels=["a", "+b"], costs=costs,
                               target=1.9, fit_seconds=lambda s: s.size / 1000)
    edges = {(e.action, e.target): e.cost for e in states.graph[State(0, 0, 100)]}
    # every move adds per_fit_second x the destination's fit time (0.1 s or 0.2 s here)
    assert edges == {("more-data", State(0, 0, 200)): 0.5 * 100 + 2.0,
                     ("more-capacity", State(1, 0, 100)): 40.0 + 1.0,
                     ("more-regularization", State(0, 1, 100)): 2.0 + 1.0}
    assert states.blocked[State(0, 0, 100)]["less-capacity"] == "no smaller capacity in the grid"
    assert "max_samples" in states.blocked[State(0, 0, 200)]["more-data"]
    assert "no usable results" in states.blocked[State(1, 0, 200)]["more-regularization"]
    cost, path = cheapest_plan(states.graph, State(0, 0, 100), states.is_goal)
    # both orders of the two setting changes cost 41 + 3 and end at the one goal state
    assert sorted(e.action for e in path) == ["more-capacity", "more-regularization"]
    assert path[-1].target == State(1, 1, 100)
    assert cost == pytest.approx(41.0 + 3.0)


def test_equal_cost_plans_prefer_fewer_steps_despite_float_noise():
    # 0.01 x 58 + 0.01 x 82 and 0.01 x 140 differ only by float rounding: one jump must win
    errors = {(0, 0): {140: 1.19, 198: 1.189, 280: 1.168}}
    states = build_state_graph(_toy_forecast(errors), n_capacity=1, n_regularization=1,
                               ladder=[140, 198, 280], capacity_labels=["2"],
                               costs=CostModel(per_sample=0.01), target=1.17)
    cost, path = cheapest_plan(states.graph, State(0, 0, 140), states.is_goal)
    assert [e.target.size for e in path] == [280]
    assert cost == pytest.approx(1.4)
    ranked = rank_first_moves(states, State(0, 0, 140))
    assert ranked[0].edge.target.size == 280 and ranked[1].plan_cost == pytest.approx(1.4)


class _LineCurve:
    """A curve stand-in: error 2 - size/1000, band +-0.1."""

    def predict(self, size: float) -> float:
        return 2.0 - size / 1000.0

    def band(self, size: float, confidence: float) -> tuple[float, float]:
        return self.predict(size) - 0.1, self.predict(size) + 0.1


def test_measured_and_forecast_states_meet_the_target_by_the_same_rule():
    # common practice, no published source: "meets the target at the chosen confidence" means the
    # upper edge of the interval is at or below the target, whether the error was measured or forecast
    measured = {State(0, 0, 500): (1.45, 1.30, 1.60)}
    forecast = state_error_forecasts({(0, 0): _LineCurve()}, measured, confidence=0.9, floor_low=1.05)
    here, later, far = forecast(State(0, 0, 500)), forecast(State(0, 0, 600)), forecast(State(0, 0, 990))
    assert (here.point, here.low, here.high, here.measured) == (1.45, 1.30, 1.60, True)
    assert here.predicted == 1.60                       # the mean alone (1.45) would pass a 1.5 target
    assert (later.point, later.high, later.measured) == (pytest.approx(1.4), pytest.approx(1.5), False)
    # the noise floor's lower edge bounds point and band alike
    assert (far.point, far.low) == (1.05, 1.05)
    states = build_state_graph(forecast, n_capacity=1, n_regularization=1, ladder=[500, 600],
                               capacity_labels=["a"], costs=CostModel(), target=1.5)
    assert not states.is_goal(State(0, 0, 500)) and states.is_goal(State(0, 0, 600))
