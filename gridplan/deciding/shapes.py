"""Learning-curve families: formulas, Jacobians, inverses, starting points, one family's fit.

Families (error e against training size m; names as in the learning-curve
literature, e.g. Viering & Loog 2023 and Mohr et al. 2022, written here for
an error that falls with m):

    pow3  e = a + b * m^(-c)                    inverse power law; asymptote a
    pow4  e = a + (b * m + d)^(-c)              asymptote a
    mmf4  e = (a * b + c * m^d) / (b + m^d)     Morgan-Mercer-Flodin; a at m = 0, asymptote c
    wbl4  e = a + b * exp(-c * m^d)             Weibull; asymptote a
    exp3  e = a + b * exp(-c * m)               asymptote a (opt-in)

All parameters are constrained non-negative (d > 0 where it is an exponent),
which makes every curve non-increasing.  mmf4 and wbl4 are fitted in an
equivalent parametrisation that stays well conditioned when the data look
like a plain power law; `CurveFit.params` reports the formula's own a, b, c, d.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

from gridplan.common.errors import GridplanError
from gridplan.deciding.batchfit import fit_batch, nonnegative_line

TINY = 1e-12

# --- curve families --------------------------------------------------------

@dataclass(frozen=True)
class Family:
    """A parametric learning-curve family, written in the scaled size x = m / scale.

    The first internal parameter is always the asymptote (limit as m -> inf).
    """

    name: str
    formula: str
    param_names: tuple[str, ...]
    lower: tuple[float, ...]
    upper: tuple[float, ...]
    evaluate: Callable[[np.ndarray, np.ndarray], np.ndarray]
    invert: Callable[[np.ndarray, float], float]
    original: Callable[[np.ndarray, float], dict[str, float]]
    jacobian: Callable[[np.ndarray, np.ndarray], np.ndarray] | None = None

    @property
    def n_params(self) -> int:
        return len(self.param_names)


def _columns(parts: list) -> np.ndarray:
    """Jacobian columns stacked on a last axis: (n, p) for one curve, (K, n, p) for many."""
    return np.stack(np.broadcast_arrays(*parts), axis=-1)


def _pow3(x, t):
    return t[0] + t[1] * np.power(x, -t[2])


def _pow3_jacobian(x, t):
    power = np.power(x, -t[2])
    return _columns([np.ones_like(x), power, -t[1] * power * np.log(x)])


def _pow3_invert(t, target):
    return (t[1] / (target - t[0])) ** (1.0 / t[2]) if t[2] > 0 else math.inf


def _pow4(x, t):
    return t[0] + np.power(t[1] * x + t[3], -t[2])


def _pow4_jacobian(x, t):
    base = t[1] * x + t[3]
    power = np.power(base, -t[2])
    slope = -t[2] * power / base
    return _columns([np.ones_like(x), slope * x, -power * np.log(base), slope])


def _pow4_invert(t, target):
    if t[1] <= 0 or t[2] <= 0:
        return math.inf
    return ((target - t[0]) ** (-1.0 / t[2]) - t[3]) / t[1]


def _exp3(x, t):
    return t[0] + t[1] * np.exp(-t[2] * x)


def _exp3_jacobian(x, t):
    decay = np.exp(-t[2] * x)
    return _columns([np.ones_like(x), decay, -t[1] * x * decay])


def _exp3_invert(t, target):
    return -math.log((target - t[0]) / t[1]) / t[2] if t[2] > 0 else math.inf


def _mmf4(x, t):
    # internal: (asymptote c, A = (a - c) * b, b, d); value c + A / (b + x^d)
    return t[0] + t[1] / (t[2] + np.power(x, t[3]))


def _mmf4_jacobian(x, t):
    power = np.power(x, t[3])
    denominator = t[2] + power
    ratio = t[1] / denominator**2
    return _columns([np.ones_like(x), 1.0 / denominator, -ratio,
                            -ratio * power * np.log(x)])


def _mmf4_invert(t, target):
    return (t[1] / (target - t[0]) - t[2]) ** (1.0 / t[3])


def _mmf4_original(t, s):
    a = t[0] + t[1] / t[2] if t[2] > 0 else math.inf
    return {"a": a, "b": t[2] * s ** t[3], "c": t[0], "d": t[3]}


def _box_cox(x, d):
    """(x^d - 1) / d, continuous at d -> 0 where it becomes log(x)."""
    return np.expm1(d * np.log(x)) / d


def _wbl4(x, t):
    # internal: (a, B = value above a at the largest size, k = c * d, d);
    # value a + B * exp(-k * (x^d - 1) / d), which tends to pow3 as d -> 0
    return t[0] + t[1] * np.exp(-t[2] * _box_cox(x, t[3]))


def _wbl4_jacobian(x, t):
    log_x = np.log(x)
    shape = _box_cox(x, t[3])
    decay = np.exp(-t[2] * shape)
    shape_slope = (np.power(x, t[3]) * log_x - shape) / t[3]
    return _columns([np.ones_like(x), decay, -t[1] * shape * decay,
                            -t[1] * t[2] * shape_slope * decay])


def _wbl4_invert(t, target):
    if t[2] <= 0:
        return math.inf
    return (1.0 - t[3] * math.log((target - t[0]) / t[1]) / t[2]) ** (1.0 / t[3])


def _wbl4_original(t, s):
    c = t[2] / t[3]
    with np.errstate(over="ignore"):
        b = float(t[1] * np.exp(c))
    return {"a": t[0], "b": b, "c": c / s ** t[3], "d": t[3]}


_INF = np.inf

FAMILIES: dict[str, Family] = {
    "pow3": Family(
        "pow3", "e(m) = a + b * m^(-c)", ("a", "b", "c"),
        (0.0, 0.0, 0.0), (_INF, _INF, 10.0), _pow3, _pow3_invert,
        lambda t, s: {"a": t[0], "b": t[1] * s ** t[2], "c": t[2]}, _pow3_jacobian,
    ),
    "exp3": Family(
        "exp3", "e(m) = a + b * exp(-c * m)", ("a", "b", "c"),
        (0.0, 0.0, 0.0), (_INF, _INF, 1e3), _exp3, _exp3_invert,
        lambda t, s: {"a": t[0], "b": t[1], "c": t[2] / s}, _exp3_jacobian,
    ),
    "pow4": Family(
        "pow4", "e(m) = a + (b * m + d)^(-c)", ("a", "b", "c", "d"),
        (0.0, 1e-12, 0.0, 0.0), (_INF, _INF, 10.0, _INF), _pow4, _pow4_invert,
        lambda t, s: {"a": t[0], "b": t[1] / s, "c": t[2], "d": t[3]}, _pow4_jacobian,
    ),
    "mmf4": Family(
        "mmf4", "e(m) = (a * b + c * m^d) / (b + m^d)", ("c", "A", "b", "d"),
        (0.0, 0.0, 0.0, 1e-3), (_INF, _INF, _INF, 10.0), _mmf4, _mmf4_invert, _mmf4_original,
        _mmf4_jacobian,
    ),
    "wbl4": Family(
        "wbl4", "e(m) = a + b * exp(-c * m^d)", ("a", "B", "k", "d"),
        (0.0, 0.0, 0.0, 1e-6), (_INF, _INF, 50.0, 10.0), _wbl4, _wbl4_invert, _wbl4_original,
        _wbl4_jacobian,
    ),
}

#: Families tried by default, simplest first (the order breaks ties).  exp3 is
#: available on request but not tried by default: exponential decay flattens
#: too early for most learning curves and, picked by a lucky hold-out, gives
#: over-confident forecasts.
DEFAULT_FAMILIES: tuple[str, ...] = ("pow3", "pow4", "mmf4", "wbl4")


# --- starting points ---------------------------------------------------------

#: Rate grids scanned for starting points (pow3 exponents, exp3 rates).
POW3_RATES = np.geomspace(0.02, 5.0, 30)
EXP3_RATES = np.geomspace(0.05, 500.0, 40)


def _scan_start(x, y, w, basis: Callable[[np.ndarray, np.ndarray], np.ndarray],
                rates: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per row of (K, n): the rate whose non-negative (asymptote, amplitude) line fits best."""
    with np.errstate(all="ignore"):
        shapes = basis(x[:, None, :], rates[None, :, None])          # (K, R, n)
    a, b, rss = nonnegative_line(shapes, y[:, None, :], w[:, None, :])
    pick = np.argmin(np.where(np.isfinite(rss), rss, np.inf), axis=1)
    rows = np.arange(len(x))
    found = np.isfinite(rss[rows, pick])
    fallback = np.nanmin(np.where(w > 0, y, np.nan), axis=1)
    return (np.where(found, a[rows, pick], fallback), np.where(found, b[rows, pick], 0.0),
            np.where(found, rates[pick], rates[0]))


def start_points(family: str, x, y, w) -> list[np.ndarray]:
    """Starting points for a family, each (K, p), derived from a pow3 rate scan.

    Rows are problems with their points left-aligned (column 0 is the smallest size).
    """
    a3, b3, c3 = _scan_start(x, y, w, lambda x, c: x ** -c, POW3_RATES)
    y0, x0 = y[:, 0], x[:, 0]
    drop = np.maximum(y0 - a3, 1e-6 * np.maximum(np.abs(y0), TINY))
    if family == "pow3":
        return [np.column_stack([a3, b3, c3])]
    if family == "exp3":
        a, b, c = _scan_start(x, y, w, lambda x, c: np.exp(-c * x), EXP3_RATES)
        return [np.column_stack([a, b, c])]
    zeros = np.zeros_like(a3)
    if family == "pow4":
        c = np.maximum(c3, 0.05)
        b = np.maximum(b3, 1e-9) ** (-1.0 / c)
        return [np.column_stack([a3, b, c, zeros]),
                np.column_stack([0.5 * a3, 1.0 / drop, np.ones_like(a3), zeros])]
    if family == "mmf4":
        d = 1.5
        return [np.column_stack([a3, b3, zeros, np.maximum(c3, 0.05)]),
                np.column_stack([a3, 2.0 * drop * x0 ** d, x0 ** d, np.full_like(a3, d)])]
    if family == "wbl4":
        return [np.column_stack([a3, b3, c3, np.full_like(a3, 1e-3)]),
                np.column_stack([a3, b3, c3, np.ones_like(a3)])]
    raise GridplanError(f"Unknown curve family {family!r}; choose from {', '.join(FAMILIES)}.")


def fit_family(fam: Family, x, y, w, starts: list[np.ndarray],
                floor: np.ndarray | float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """Fit one family to every row of (K, n) from each start; the lowest cost wins per row.

    `floor` (scalar or (K,)) bounds the asymptote, theta[:, 0], from below.
    Rows whose every start failed get cost inf.
    """
    lower = np.tile(np.array(fam.lower, dtype=float), (len(x), 1))
    lower[:, 0] = np.maximum(lower[:, 0], floor)
    upper = np.array(fam.upper, dtype=float)
    # All starts in one batch (each row's fit is independent of the others'),
    # so the iterations' fixed cost is paid once, not once per start.
    n = len(starts)
    stacked = [np.concatenate([a] * n) for a in (np.asarray(x), np.asarray(y), np.asarray(w), lower)]
    theta, cost = fit_batch(fam.evaluate, fam.jacobian, *stacked[:3], np.concatenate(starts),
                            stacked[3], upper)
    best_theta = np.full((len(x), fam.n_params), np.nan)
    best_cost = np.full(len(x), np.inf)
    for start_theta, start_cost in zip(np.split(theta, n), np.split(cost, n)):
        finite = np.all(np.isfinite(start_theta), axis=1)
        better = finite & (start_cost < best_cost)
        best_theta[better], best_cost[better] = start_theta[better], start_cost[better]
    return best_theta, best_cost


# --- level and spread at each size ------------------------------------------
