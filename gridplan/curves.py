"""Learning-curve models: fit, choose, extrapolate with bootstrap bands, noise floor, samples needed.

A setting's learning curve is its mean validation error against training-set
size.  Each parametric family below is fitted by weighted non-linear least
squares (weights 1 / standard error of the mean at each size, floored) in the
scaled size x = m / (largest measured size), with bounds that keep every curve
non-increasing in m and its asymptote (the noise-floor estimate) non-negative.
Uncertainty comes from a bootstrap over whole (repeat, fold) units.

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
import warnings
from dataclasses import dataclass, field
from statistics import NormalDist
from typing import TYPE_CHECKING, Callable, Iterable, Mapping, Sequence

import numpy as np
import pandas as pd

from gridplan.batchfit import fit_batch, nonnegative_line, parameters_view
from gridplan.checks import DEFAULT_BOOT, MAX_BOOT, check_boot  # noqa: F401 (re-exported)
from gridplan.errors import GridplanError, NumericalError
from gridplan.jsonable import plain as _plain

if TYPE_CHECKING:
    from gridplan.results import CurvesSummary

# --- documented thresholds -------------------------------------------------

#: A forecast band is "too wide to be useful" when (high - low) / predicted
#: exceeds this ratio at the size being forecast (the band is wider than the
#: forecast itself).
WIDE_BAND_RATIO = 1.0

#: The spread floor: a size's standard error is raised to at least this
#: fraction of the median standard error over sizes, so a size whose folds
#: happen to agree cannot dominate the fit.
SE_FLOOR_FRACTION = 0.1

#: Family choice: a family's hold-out error counts as tied with the best one
#: when it is within HOLDOUT_TIE_FACTOR times the best, or within
#: HOLDOUT_TIE_SE standard errors of the held-out sizes' mean errors; among
#: tied families the one with fewest parameters (then the earlier in
#: DEFAULT_FAMILIES) wins.  A more flexible family must win clearly.
HOLDOUT_TIE_FACTOR = 1.10
HOLDOUT_TIE_SE = 2.0

#: Band widening for misfit starts when the weighted residuals' chi-square
#: exceeds this quantile of its distribution under a correct family.
MISFIT_LEVEL = 0.9

#: Fewest sizes for which the family is chosen by hold-out; below it pow3 is used.
MIN_SIZES_FOR_CHOICE = 5
#: Bootstrap resamples per curve, the same for every command, so that `advise`,
#: `report` and `demo` on one run give the same bands and plans.

#: Largest training size the samples-needed search will consider.
DEFAULT_MAX_SIZE = 1e12

#: Doublings beyond the data after which the level shape error stops growing:
#: the corpus measures it two doublings out (x4) and no further.
LEVEL_DOUBLINGS_CAP = 2.0
#: Points of the log grid on which the upper band edge is made monotone beyond the data.
MONOTONE_GRID = 256

_TINY = 1e-12


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


def _starts(family: str, x, y, w) -> list[np.ndarray]:
    """Starting points for a family, each (K, p), derived from a pow3 rate scan.

    Rows are problems with their points left-aligned (column 0 is the smallest size).
    """
    a3, b3, c3 = _scan_start(x, y, w, lambda x, c: x ** -c, POW3_RATES)
    y0, x0 = y[:, 0], x[:, 0]
    drop = np.maximum(y0 - a3, 1e-6 * np.maximum(np.abs(y0), _TINY))
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


def _fit_family(fam: Family, x, y, w, starts: list[np.ndarray],
                floor: np.ndarray | float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """Fit one family to every row of (K, n) from each start; the lowest cost wins per row.

    `floor` (scalar or (K,)) bounds the asymptote, theta[:, 0], from below.
    Rows whose every start failed get cost inf.
    """
    lower = np.tile(np.array(fam.lower, dtype=float), (len(x), 1))
    lower[:, 0] = np.maximum(lower[:, 0], floor)
    upper = np.array(fam.upper, dtype=float)
    best_theta = np.full((len(x), fam.n_params), np.nan)
    best_cost = np.full(len(x), np.inf)
    for start in starts:
        theta, cost = fit_batch(fam.evaluate, fam.jacobian, x, y, w, start, lower, upper)
        finite = np.all(np.isfinite(theta), axis=1)
        better = finite & (cost < best_cost)
        best_theta[better], best_cost[better] = theta[better], cost[better]
    return best_theta, best_cost


# --- level and spread at each size ------------------------------------------

def _row_means(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean of the finite values along the last axis (NaN where none) and their count."""
    counts = np.sum(np.isfinite(values), axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.nansum(values, axis=-1) / counts, counts


def _level_and_spread(errors: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean over units and floored standard error of the mean, per size.

    `errors` is (..., sizes, units); the floor is set per leading index from
    that curve's own spreads. Sizes without any unit get a NaN level.
    """
    level, counts = _row_means(errors)
    with np.errstate(invalid="ignore", divide="ignore"):
        squares = np.nansum((errors - level[..., None]) ** 2, axis=-1)
        spread = np.sqrt(squares / (counts - 1) / counts)
    spread = np.where(counts > 1, spread, np.nan)
    positive = np.isfinite(spread) & (spread > 0)
    has_positive = positive.any(axis=-1)
    masked = np.where(positive, spread, np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        largest = np.nanmax(masked, axis=-1)
        middle = np.nanmedian(masked, axis=-1)
        top_level = np.nanmax(np.abs(level), axis=-1)
    spread = np.where(np.isfinite(spread) | ~has_positive[..., None], spread, largest[..., None])
    floor = np.where(has_positive, SE_FLOOR_FRACTION * middle, 0.0)
    floor = np.maximum(np.maximum(floor, 1e-6 * np.nan_to_num(top_level)), _TINY)
    return level, np.maximum(np.where(np.isfinite(spread), spread, floor[..., None]),
                             floor[..., None])


# --- results -----------------------------------------------------------------

@dataclass(frozen=True)
class SamplesNeeded:
    """How many training samples a setting needs to reach a target error.

    `needed` is the smallest size whose upper band edge (at `confidence`) is at
    or below the target; `low`/`high` are where the band's lower/upper edges
    reach it; `point` is where the fitted curve itself reaches it.
    """

    target: float
    confidence: float
    reachable: bool
    needed: int | None
    low: int | None
    high: int | None
    point: int | None
    reason: str


@dataclass(frozen=True)
class SettingInfo:
    """Labels of one (capacity, regularisation) setting and how many rows were unusable."""

    capacity_index: int
    regularization_index: int
    capacity: str
    regularization: str
    skipped_rows: int = 0


@dataclass
class CurveFit:
    """One setting's fitted learning curve with its bootstrap replicates."""

    family: str
    theta: np.ndarray              # internal parameters, scaled size
    scale: float                   # largest measured size; x = m / scale
    sizes: np.ndarray
    validation_mean: np.ndarray
    validation_se: np.ndarray
    train_mean: np.ndarray | None
    boot_theta: np.ndarray         # (n_boot, n_params)
    n_units: int
    inflation: float               # band scale factor (unit count, residual spread), >= 1
    holdout_errors: dict[str, float | None] = field(default_factory=dict)
    setting: SettingInfo | None = None
    asymptote_min: float = 0.0     # lower bound imposed on the asymptote (shared floor)
    n_repeats: int = 1             # repeats among the units: passes over the same rows
    #: Calibration from this run's own past extrapolations (gridplan.calibration).
    #: Beyond the largest measured size the curve forecasts a further drop D;
    #: `drop_lean` of it is taken back (0 <= lean <= 1; this run's curves have
    #: fallen less than forecast) and `drop_spread` x D is the shape error's
    #: standard deviation, added to the band.
    drop_lean: float = 0.0
    drop_spread: float = 0.0
    #: ... and `level_spread` x the forecast x doublings beyond the data (at most
    #: LEVEL_DOUBLINGS_CAP) is a second shape error, which stays when a curve is
    #: forecast flat but keeps falling.
    level_spread: float = 0.0
    _tables: dict = field(default_factory=dict, repr=False, compare=False)

    @property
    def unseen_se(self) -> float:
        """The part of the largest size's standard error that a bootstrap over units misses.

        Units of different repeats validate on the same rows, so they share
        the data set's own noise draw. One pass over the data has n_units /
        n_repeats folds, and the usual standard error of a cross-validated
        error is the spread of its folds over the square root of their number
        (common practice, e.g. the one-standard-error rule; it leans low
        because folds overlap). Resampling all n_units as if independent
        gives only 1 / n_repeats of that variance; this is the rest.
        """
        return float(self.validation_se[-1] * np.sqrt(self.n_repeats - 1))

    # -- point forecasts
    @property
    def params(self) -> dict[str, float]:
        """Parameters in the original size units, named as in the family's formula."""
        return {k: float(v) for k, v in FAMILIES[self.family].original(self.theta, self.scale).items()}

    @property
    def asymptote(self) -> float:
        """The fitted error as m -> infinity (noise-floor estimate)."""
        return float(self.theta[0])

    def raw_predict(self, m) -> np.ndarray:
        """The fitted family's own value at training size(s) m, without calibration."""
        x = np.asarray(m, dtype=float) / self.scale
        return FAMILIES[self.family].evaluate(x, self.theta)

    def drop_beyond_data(self, m) -> np.ndarray:
        """The fitted curve's further drop from the largest measured size to m (0 inside the data)."""
        last = self.raw_predict(float(self.sizes[-1]))
        m = np.asarray(m, dtype=float)
        return np.where(m > self.sizes[-1], np.maximum(last - self.raw_predict(m), 0.0), 0.0)

    @property
    def calibrated(self) -> bool:
        return self.drop_lean > 0 or self.drop_spread > 0 or self.level_spread > 0

    def doublings_beyond_data(self, m) -> np.ndarray:
        """log2(m / largest measured size), 0 inside the data, at most LEVEL_DOUBLINGS_CAP."""
        ratio = np.maximum(np.asarray(m, dtype=float) / float(self.sizes[-1]), 1.0)
        return np.minimum(np.log2(ratio), LEVEL_DOUBLINGS_CAP)

    def predict(self, m) -> np.ndarray:
        """Forecast validation error at training size(s) m (calibrated beyond the data).

        With a lean, the forecast keeps only (1 - lean) of the curve's further
        drop: a blend of the curve and its value at the largest measured size,
        so it never rises with m.
        """
        raw = self.raw_predict(m)
        if self.drop_lean <= 0:
            return raw
        return raw + self.drop_lean * self.drop_beyond_data(m)

    # -- bands
    def _band_from(self, point: np.ndarray, replicates: np.ndarray, confidence: float):
        """Percentile band of the replicates, its distances from the point scaled by `inflation`.

        Each edge is then widened, in quadrature, by the data-set noise the
        bootstrap cannot see when repeats share rows (`unseen_se`).
        """
        alpha = 1.0 - _check_confidence(confidence)
        q_low, q_high = np.quantile(replicates, [alpha / 2, 1 - alpha / 2], axis=0,
                                    method="weibull")
        unseen = NormalDist().inv_cdf(1 - alpha / 2) * self.unseen_se
        below = np.maximum(self.inflation * (point - q_low), 0.0)
        above = np.maximum(self.inflation * (q_high - point), 0.0)
        return np.maximum(point - np.hypot(below, unseen), 0.0), point + np.hypot(above, unseen)

    def _edges(self, m: np.ndarray, confidence: float):
        """(point, low, high) at sizes m, calibrated; the upper edge not yet made monotone.

        Beyond the data each edge's distance from the point grows in quadrature
        by z x drop_spread x the forecast further drop: the shape error this
        run's own extrapolations showed.
        """
        m = np.asarray(m, dtype=float)
        x = m / self.scale
        fam = FAMILIES[self.family]
        with np.errstate(all="ignore"):
            replicates = fam.evaluate(x[None, :], parameters_view(self.boot_theta))
        raw = fam.evaluate(x, self.theta)
        low, high = self._band_from(raw, replicates, confidence)
        if not self.calibrated:
            return raw, low, high
        drop = self.drop_beyond_data(m)
        z = NormalDist().inv_cdf(0.5 + _check_confidence(confidence) / 2)
        point = raw + self.drop_lean * drop
        shape = z * np.hypot(self.drop_spread * drop,
                             self.level_spread * point * self.doublings_beyond_data(m))
        return (point, np.maximum(point - np.hypot(raw - low, shape), 0.0),
                point + np.hypot(high - raw, shape))

    def _upper_table(self, confidence: float) -> tuple[np.ndarray, np.ndarray]:
        """log sizes from the largest measured one to DEFAULT_MAX_SIZE and the running minimum
        of the upper edge there (computed once per confidence)."""
        key = float(confidence)
        if key not in self._tables:
            grid = np.geomspace(float(self.sizes[-1]), max(DEFAULT_MAX_SIZE, 2.0 * self.sizes[-1]),
                                MONOTONE_GRID)
            self._tables[key] = (np.log(grid),
                                 np.minimum.accumulate(self._edges(grid, confidence)[2]))
        return self._tables[key]

    def _monotone_upper(self, sizes: np.ndarray, high: np.ndarray, confidence: float) -> np.ndarray:
        """The upper edge made non-increasing beyond the data.

        Errors do not rise with more data, so an upper bound at m also holds
        at every larger size: past the largest measured size the edge is its
        running minimum, read off a fine log grid by linear interpolation
        (non-increasing, and never below the running minimum).
        """
        beyond = sizes > self.sizes[-1]
        if not beyond.any():
            return high
        log_grid, running = self._upper_table(confidence)
        out = high.copy()
        out[beyond] = np.interp(np.log(sizes[beyond]), log_grid, running)
        return out

    def band(self, m, confidence: float = 0.9) -> tuple[np.ndarray, np.ndarray]:
        """Two-sided confidence band (low, high) for the error at size(s) m."""
        sizes = np.atleast_1d(np.asarray(m, dtype=float))
        _, low, high = self._edges(sizes, confidence)
        if self.calibrated:
            high = self._monotone_upper(sizes, high, confidence)
        if np.ndim(m) == 0:
            return low[0], high[0]
        return low, high

    def asymptote_band(self, confidence: float = 0.9) -> tuple[float, float]:
        """Confidence interval for the asymptote (noise floor)."""
        low, high = self._band_from(np.array([self.asymptote]), self.boot_theta[:, :1], confidence)
        return float(low[0]), float(high[0])

    def band_too_wide(self, m, confidence: float = 0.9) -> bool:
        """True when the band at m is wider than WIDE_BAND_RATIO times the forecast."""
        low, high = self.band(float(m), confidence)
        predicted = float(self.predict(float(m)))
        return bool(high - low > WIDE_BAND_RATIO * max(predicted, _TINY))

    # -- samples needed
    def samples_needed(self, target: float, confidence: float = 0.9,
                       max_size: float = DEFAULT_MAX_SIZE) -> SamplesNeeded:
        """Smallest training size whose upper band edge reaches `target` (None if never).

        Kept per (target, confidence, max_size): the advice and the summary ask alike.
        """
        if not np.isfinite(target) or target < 0:
            raise GridplanError(f"The target error must be a non-negative number, got {target!r}.")
        _check_confidence(confidence)
        key = ("samples needed", float(target), float(confidence), float(max_size))
        if key not in self._tables:
            self._tables[key] = self._samples_needed(float(target), float(confidence),
                                                     float(max_size))
        return self._tables[key]

    def _samples_needed(self, target: float, confidence: float, max_size: float) -> SamplesNeeded:
        fam = FAMILIES[self.family]
        grid = np.geomspace(1.0, max_size, 721)
        if self.drop_lean > 0:
            point = _edge_reach(lambda m: self.predict(m), grid, self.predict(grid), target)
        else:
            point = _point_reach(fam, self.theta, self.scale, target, max_size)
        low_edge, high_edge = self.band(grid, confidence)
        low = _edge_reach(lambda m: self.band(m, confidence)[0], grid, low_edge, target)
        high = _edge_reach(lambda m: self.band(m, confidence)[1], grid, high_edge, target)
        floor_low, floor_high = self.asymptote_band(confidence)
        largest = int(self.sizes[-1])
        if high is not None:
            reason = ("already reached at the largest measured size" if high <= largest
                      else "reachable with more data")
            return SamplesNeeded(target, confidence, True, high, low, high, point, reason)
        if target < floor_low:
            reason = (f"target {target:g} is below this setting's plateau band "
                      f"[{floor_low:.3g}, {floor_high:.3g}]")
        elif target <= floor_high:
            reason = (f"target {target:g} lies inside this setting's plateau band "
                      f"[{floor_low:.3g}, {floor_high:.3g}], so it cannot be promised "
                      f"at {confidence:.0%} confidence")
        else:
            reason = f"target needs more than {max_size:.3g} samples at {confidence:.0%} confidence"
        return SamplesNeeded(target, confidence, False, None, low, None, point, reason)

    # -- noise floor cross-check
    def midpoint_check(self, confidence: float = 0.9) -> dict:
        """Cross-check the asymptote against the training/validation errors at the largest size.

        For a well-behaved model the mean training error lies below and the
        mean validation error above the noise floor (Cortes et al. 1994), and
        their midpoint is a rough estimate of it.  Rule: the check
        `disagrees` when the asymptote's confidence interval lies wholly
        outside [training error, validation error] at the largest size.
        """
        low, high = self.asymptote_band(confidence)
        validation = float(self.validation_mean[-1])
        if self.train_mean is None or not np.isfinite(self.train_mean[-1]):
            return {"available": False, "train_at_largest": None,
                    "validation_at_largest": validation, "midpoint": None,
                    "asymptote": self.asymptote, "relative_difference": None,
                    "bracket_contains_asymptote": None, "disagree": False}
        train = float(self.train_mean[-1])
        bottom, top = min(train, validation), max(train, validation)
        midpoint = 0.5 * (train + validation)
        overlaps = high >= bottom and low <= top
        return {"available": True, "train_at_largest": train,
                "validation_at_largest": validation, "midpoint": midpoint,
                "asymptote": self.asymptote,
                "relative_difference": (self.asymptote - midpoint) / max(abs(midpoint), _TINY),
                "bracket_contains_asymptote": bool(bottom <= self.asymptote <= top),
                "disagree": not overlaps}


def _check_confidence(confidence: float) -> float:
    from gridplan.checks import check_confidence
    return check_confidence(confidence)


def _point_reach(fam: Family, theta, scale, target, max_size) -> int | None:
    """Closed-form size at which the fitted curve reaches the target."""
    if target <= theta[0]:
        return None
    if fam.evaluate(np.array([1.0 / scale]), theta)[0] <= target:
        return 1
    with np.errstate(all="ignore"):
        x = fam.invert(theta, target)
    m = x * scale
    if not np.isfinite(m) or m > max_size:
        return None
    return max(1, int(math.ceil(m - 1e-9 * m)))


def _edge_reach(edge: Callable, grid: np.ndarray, values: np.ndarray, target: float) -> int | None:
    """Smallest m on [1, grid max] with edge(m) <= target: grid scan, then brentq in log m."""
    from scipy.optimize import brentq

    hits = np.flatnonzero(values <= target * (1 + 1e-9))
    if hits.size == 0:
        return None
    first = hits[0]
    if first == 0:
        return 1
    root = brentq(lambda log_m: float(edge(math.exp(log_m))) - target,
                  math.log(grid[first - 1]), math.log(grid[first]), xtol=1e-10)
    m = math.exp(root)
    size = max(1, int(math.ceil(m - 1e-9 * m)))
    return size if float(edge(float(size))) <= target * (1 + 1e-9) else size + 1


# --- fitting a setting ----------------------------------------------------------

def _as_matrix(sizes, fold_errors, name: str) -> tuple[np.ndarray, np.ndarray]:
    sizes = np.asarray(sizes, dtype=float)
    errors = np.asarray(fold_errors, dtype=float)
    if errors.ndim == 1:
        errors = errors[:, None]
    if sizes.ndim != 1 or errors.ndim != 2 or errors.shape[0] != sizes.size:
        raise GridplanError(f"The {name} errors must have one row per training size.")
    return sizes, errors


def _band_inflation(chi_square: float, dof: int, n_units: int) -> float:
    """Scale for bootstrap band widths, >= 1.

    The bootstrap of a mean over n units shrinks its spread by
    sqrt((n - 1) / n), so widths are scaled back by sqrt(n / (n - 1)).  When
    the weighted residuals show the family does not fit (chi-square above
    its MISFIT_LEVEL quantile) widths also grow by sqrt(chi-square / dof).
    """
    from scipy.special import chdtri

    scale = math.sqrt(n_units / (n_units - 1))
    if dof > 0 and chi_square > chdtri(dof, 1.0 - MISFIT_LEVEL):
        scale *= math.sqrt(chi_square / dof)
    return scale


# --- fitting many settings at once ------------------------------------------------

@dataclass
class _Problem:
    """One learning curve to fit: its usable sizes and (size x unit) error matrices."""

    sizes: np.ndarray
    errors: np.ndarray
    train_mean: np.ndarray | None
    setting: SettingInfo | None
    n_repeats: int
    seed: int | np.random.SeedSequence
    asymptote_min: float = 0.0


def _problem(sizes, fold_errors, train_fold_errors, setting, n_repeats, seed,
             asymptote_min: float = 0.0) -> _Problem:
    """Check and order one curve's data; a GridplanError says why it cannot be fitted."""
    sizes_in = sizes
    sizes, errors = _as_matrix(sizes, fold_errors, "validation")
    order = np.argsort(sizes)
    sizes, errors = sizes[order], errors[order]
    usable = np.any(np.isfinite(errors), axis=1) & (sizes > 0)
    sizes, errors = sizes[usable], errors[usable]
    if len(np.unique(sizes)) != len(sizes):
        raise GridplanError("Each training size must appear once in a learning curve.")
    if len(sizes) < 3:
        raise GridplanError(f"A learning curve needs at least 3 training sizes with results, got {len(sizes)}.")
    if errors.shape[1] < 2:
        raise GridplanError("The bootstrap needs at least two (repeat, fold) units per size.")
    train_mean = None
    if train_fold_errors is not None:
        _, train = _as_matrix(sizes_in, train_fold_errors, "training")
        train_mean = _row_means(train[order][usable])[0]
    return _Problem(sizes, errors, train_mean, setting, max(1, int(n_repeats)), seed,
                    float(asymptote_min))


def _padded(rows: list[np.ndarray], width: int, fill: float) -> np.ndarray:
    out = np.full((len(rows), width), fill)
    for i, row in enumerate(rows):
        out[i, :len(row)] = row
    return out


def _choose_families(x, y, se, counts, families: tuple[str, ...], floor) -> tuple[list, list]:
    """Per curve: the family that best predicts its largest sizes when fitted on the smaller ones.

    Curves with fewer than MIN_SIZES_FOR_CHOICE sizes (or a single family on
    offer) take the simplest family. Returns (chosen names, hold-out scores).
    """
    simplest = "pow3" if "pow3" in families else min(families, key=lambda k: FAMILIES[k].n_params)
    held = np.where(counts < 7, 1, 2)
    columns = np.arange(x.shape[1])[None, :]
    fit_mask = columns < (counts - held)[:, None]
    held_mask = (columns >= (counts - held)[:, None]) & (columns < counts[:, None])
    choosing = (counts >= MIN_SIZES_FOR_CHOICE) & (len(families) > 1)
    scores = [{name: None for name in families} for _ in range(len(x))]
    rows = np.flatnonzero(choosing)
    for name in families:
        fam = FAMILIES[name]
        eligible = rows[(counts[rows] - held[rows]) >= fam.n_params + 1]
        if eligible.size == 0:
            continue
        xs, ys = x[eligible], y[eligible]
        ws = np.where(fit_mask[eligible], 1.0 / se[eligible], 0.0)
        theta, cost = _fit_family(fam, xs, ys, ws, _starts(name, xs, ys, ws),
                                  np.asarray(floor)[eligible])
        with np.errstate(all="ignore"):
            predicted = fam.evaluate(xs, parameters_view(theta))
        gaps = np.where(held_mask[eligible], np.abs(predicted - ys), 0.0).sum(axis=1)
        gaps = gaps / held[eligible]
        for row, gap, c in zip(eligible, gaps, cost):
            if np.isfinite(c) and np.isfinite(gap):
                scores[row][name] = float(gap)
    chosen = []
    for row in range(len(x)):
        scored = {k: v for k, v in scores[row].items() if v is not None}
        if not choosing[row] or not scored:
            chosen.append(simplest)
            continue
        best = min(scored.values())
        last = held_mask[row]
        noise = float(np.sqrt(np.mean(se[row][last] ** 2)))
        margin = max((HOLDOUT_TIE_FACTOR - 1.0) * best, HOLDOUT_TIE_SE * noise)
        tied = [k for k, v in scored.items() if v <= best + margin + _TINY]
        chosen.append(min(tied, key=lambda k: (FAMILIES[k].n_params, families.index(k))))
    return chosen, scores


def _bootstrap_levels(problem: _Problem, n_boot: int, width: int):
    """Level, weights and usability of `n_boot` resamples of a curve's units, padded to `width`."""
    rng = np.random.default_rng(problem.seed)
    n_sizes, n_units = problem.errors.shape
    picks = rng.integers(0, n_units, (n_boot, n_units))
    picked = problem.errors[:, picks].transpose(1, 0, 2)            # (B, sizes, units)
    level, spread = _level_and_spread(picked)
    keep = np.isfinite(level)
    y = np.zeros((n_boot, width))
    w = np.zeros((n_boot, width))
    y[:, :n_sizes] = np.where(keep, level, 0.0)
    w[:, :n_sizes] = np.where(keep, 1.0 / spread, 0.0)
    return y, w, keep.sum(axis=1)


def _fit_problems(problems: list[_Problem], families: tuple[str, ...],
                  n_boot: int) -> list[CurveFit | str]:
    """Fit every curve: family choice, main fit and bootstrap, all batched across curves."""
    if not problems:
        return []
    width = max(len(p.sizes) for p in problems)
    counts = np.array([len(p.sizes) for p in problems])
    scales = np.array([float(p.sizes[-1]) for p in problems])
    x = _padded([p.sizes / p.sizes[-1] for p in problems], width, 1.0)
    levels, spreads = zip(*(_level_and_spread(p.errors) for p in problems))
    y = _padded(list(levels), width, 0.0)
    se = _padded(list(spreads), width, 1.0)
    present = np.arange(width)[None, :] < counts[:, None]
    w = np.where(present, 1.0 / se, 0.0)
    floors = np.array([p.asymptote_min for p in problems])
    chosen, scores = _choose_families(x, y, se, counts, families, floors)

    results: list[CurveFit | str] = ["not fitted"] * len(problems)
    for name in dict.fromkeys(chosen):
        fam = FAMILIES[name]
        rows = np.array([i for i, c in enumerate(chosen) if c == name])
        theta, cost = _fit_family(fam, x[rows], y[rows], w[rows],
                                  _starts(name, x[rows], y[rows], w[rows]), floors[rows])
        boot_y, boot_w, boot_ok = zip(*(_bootstrap_levels(problems[i], n_boot, width)
                                        for i in rows))
        start = np.repeat(np.nan_to_num(theta, nan=1.0), n_boot, axis=0)
        boot_theta, boot_cost = _fit_family(
            fam, np.repeat(x[rows], n_boot, axis=0), np.concatenate(boot_y),
            np.concatenate(boot_w), [start], np.repeat(floors[rows], n_boot))
        boot_theta = boot_theta.reshape(len(rows), n_boot, fam.n_params)
        boot_cost = boot_cost.reshape(len(rows), n_boot)
        for j, i in enumerate(rows):
            problem = problems[i]
            if not np.isfinite(cost[j]):
                results[i] = f"The {name} curve could not be fitted to these errors."
                continue
            good = np.isfinite(boot_cost[j]) & (np.asarray(boot_ok[j]) >= fam.n_params)
            if good.sum() < 2:
                results[i] = "Too few bootstrap resamples could be fitted; the curve has too many gaps."
                continue
            n_units = problem.errors.shape[1]
            dof = counts[i] - fam.n_params
            results[i] = CurveFit(
                family=name, theta=theta[j], scale=float(scales[i]), sizes=problem.sizes,
                validation_mean=y[i, :counts[i]].copy(), validation_se=se[i, :counts[i]].copy(),
                train_mean=problem.train_mean, boot_theta=boot_theta[j][good], n_units=n_units,
                inflation=_band_inflation(2.0 * float(cost[j]), int(dof), n_units),
                holdout_errors=scores[i], setting=problem.setting,
                asymptote_min=problem.asymptote_min, n_repeats=problem.n_repeats)
    return results


#: Most bootstrap resamples per curve; past it the stacked fits outgrow memory.


def _check_boot(n_boot: int) -> None:
    check_boot(n_boot)


def _check_families(families: Iterable[str]) -> tuple[str, ...]:
    families = tuple(families)
    for name in families:
        if name not in FAMILIES:
            raise GridplanError(f"Unknown curve family {name!r}; choose from {', '.join(FAMILIES)}.")
    if not families:
        raise GridplanError("At least one curve family is needed.")
    return families


def fit_setting(sizes, fold_errors, train_fold_errors=None, *,
                families: Iterable[str] = DEFAULT_FAMILIES, n_boot: int = DEFAULT_BOOT,
                seed: int | np.random.SeedSequence = 0,
                setting: SettingInfo | None = None, asymptote_min: float = 0.0,
                n_repeats: int = 1) -> CurveFit:
    """Fit one learning curve.

    `asymptote_min` bounds the asymptote from below (see `fit_grid`'s shared
    noise floor): no setting can beat the error every setting shares.

    `fold_errors` has one row per training size and one column per
    (repeat, fold) unit (NaN where a unit is missing); `train_fold_errors`
    is the same for training error.  The family is chosen by hold-out on
    the largest sizes, then refitted on `n_boot` bootstrap resamples of the
    units (deterministic given `seed`). `n_repeats` says how many of the units
    are repeats of one pass over the same rows (see `CurveFit.unseen_se`).
    """
    families = _check_families(families)
    _check_boot(n_boot)
    problem = _problem(sizes, fold_errors, train_fold_errors, setting, n_repeats, seed,
                       asymptote_min)
    result = _fit_problems([problem], families, n_boot)[0]
    if isinstance(result, str):
        raise NumericalError(result)
    return result


# --- a whole grid ----------------------------------------------------------------

CELL_COLUMNS = ("capacity_index", "regularization_index", "capacity", "regularization",
                "train_size", "repeat", "fold", "train_error", "validation_error", "status")


#: A setting's asymptote informs the shared noise floor when its band (at
#: FLOOR_CONFIDENCE) is no wider than INFORMATIVE_FLOOR_RATIO x the asymptote,
#: its curve has nearly converged (the measured error at the largest size is
#: within CONVERGED_FRACTION x the asymptote of it, and the curve falls by
#: less than that error's standard error over the next doubling) and it is
#: consistent with the setting's own training/validation bracket. Converged
#: also means the two learning curves have met: training error within
#: CONVERGED_GAP x the validation error of it at the largest size. A large
#: gap is variance that more rows still remove, so the curve's level there
#: is no floor (a deep tree on a smooth target levels off for a while far
#: above the noise, training error well below it).
INFORMATIVE_FLOOR_RATIO = 1.0
CONVERGED_FRACTION = 0.1
CONVERGED_GAP = 0.2
#: Two plateaus outside each other's bands may still agree (and so make a
#: floor) when each is well determined: its band no wider than this share of
#: its value (see _same_level).
AGREEING_BAND_RATIO = 0.25
FLOOR_CONFIDENCE = 0.9


@dataclass(frozen=True)
class SharedFloor:
    """The irreducible error all settings share: estimate, band, and where it came from."""

    value: float
    low: float
    high: float
    capacity_index: int
    regularization_index: int
    informative: int          # how many settings had a well-determined asymptote
    evidence: str = ""        # why it counts as the data's floor, in words
    model_index: int = 0      # the model table of that setting (runs of several models)


def shared_floor(fits: Mapping[tuple, CurveFit], confidence: float = FLOOR_CONFIDENCE,
                 model_names: Sequence[str] = ()) -> SharedFloor | None:
    """Estimate the noise floor from the settings whose asymptote is well determined.

    Every setting's asymptote is the noise floor plus its own bias, so the
    floor lies below all of them. Among informative settings (narrow
    asymptote band, nearly converged, consistent with their
    training/validation bracket) the one with the lowest upper band edge
    gives the estimate and its band. None when no setting qualifies, when no
    informative setting of another capacity agrees with it (one model level
    cannot tell noise from bias), or when
    that estimate lies above another setting's measured error (the converged
    settings are biased, so the data bound the floor only from above).
    Curves still falling steeply are left out: their asymptote is an
    extrapolation that can land anywhere down to zero.

    Keys are (capacity_index, regularization_index), or (model_index,
    capacity_index, regularization_index) when the settings of several
    model tables (named `model_names`) are pooled: another model counts as
    another capacity.
    """
    informative = {}
    for key, fit in fits.items():
        if fit.asymptote_min > 0:      # pinned by an earlier floor, not measured
            continue
        low, high = fit.asymptote_band(confidence)
        if high - low > INFORMATIVE_FLOOR_RATIO * max(fit.asymptote, _TINY):
            continue
        if fit.validation_mean[-1] - fit.asymptote > CONVERGED_FRACTION * max(fit.asymptote, _TINY):
            continue
        largest = float(fit.sizes[-1])
        if float(fit.raw_predict(largest) - fit.raw_predict(2 * largest)) > fit.validation_se[-1]:
            continue          # still falling by more than its own noise per doubling
        if fit.midpoint_check(confidence).get("disagree"):
            continue
        if fit.train_mean is not None and np.isfinite(fit.train_mean[-1]) and \
                fit.validation_mean[-1] - fit.train_mean[-1] > CONVERGED_GAP * fit.validation_mean[-1]:
            continue          # training and validation curves have not met yet
        informative[key] = (fit.asymptote, low, high)
    if not informative:
        return None
    key = min(informative, key=lambda k: (informative[k][2], informative[k][0], k))
    value, low, high = informative[key]
    # One converged curve cannot tell noise from its own bias: a model too
    # simple for the data levels off above the floor, and its training and
    # validation errors bracket its own plateau, not the data's floor (the
    # bracket holds for any model's asymptote, biased or not). The floor
    # counts as known only when a converged setting of another capacity or
    # another model levels off at the same height (see _same_level): two
    # different amounts of flexibility sharing one level
    # leave no room for bias that more flexibility would remove.
    agreeing = [k for k, band in informative.items()
                if k[:-1] != key[:-1] and _same_level((value, low, high), band)]
    agreeing.sort(key=lambda k: (k[0] == key[0], k))    # another model first
    if not agreeing:
        return None
    evidence = _agreement_words(fits, key, agreeing[0], model_names)
    # The floor lies below every measured validation error (up to its noise).
    # When the converged settings' floor sits above another setting's
    # measurement they are biased, and the data do not pin the floor down.
    measured = [(float(f.validation_mean[-1]), float(f.validation_se[-1])) for f in fits.values()]
    ceiling = min(m + 2.0 * se for m, se in measured)
    if value > ceiling:
        return None
    high = min(high, ceiling)
    return SharedFloor(float(value), float(max(low, 0.0)), float(high), int(key[-2]),
                       int(key[-1]), len(informative), evidence,
                       int(key[0]) if len(key) == 3 else 0)


def _same_level(one: tuple[float, float, float], two: tuple[float, float, float]) -> bool:
    """Two plateaus (value, low, high) that level off at one height.

    Each inside the other's band; or, when both are well determined (band
    no wider than AGREEING_BAND_RATIO x the value), their difference within
    the root sum of squares of the band half-widths facing each other (the
    usual test of a difference of two independent estimates, normal
    approximation). A barely identified level agrees with nothing by the
    second rule, or it would agree with anything.
    """
    (value, low, high), (other, other_low, other_high) = one, two
    if low <= other <= high and other_low <= value <= other_high:
        return True
    if any(h - lo > AGREEING_BAND_RATIO * max(v, _TINY) for v, lo, h in (one, two)):
        return False
    (lower, _, lower_high), (upper, upper_low, _) = sorted([one, two])
    return upper - lower <= math.hypot(lower_high - lower, upper - upper_low)


def _agreement_words(fits: Mapping[tuple, CurveFit], key: tuple, other: tuple,
                     model_names: Sequence[str]) -> str:
    """Why two converged settings agreeing makes a floor, naming both."""
    def capacity(k: tuple) -> str:
        info = fits[k].setting
        return str(info.capacity if info else k[-2])
    if len(key) == 3 and key[0] != other[0] and model_names:
        return (f"converged settings of different models level off at the same error "
                f"(e.g. {model_names[key[0]]} at capacity {capacity(key)} and "
                f"{model_names[other[0]]} at capacity {capacity(other)})")
    of_model = f" of model {model_names[key[0]]}" if len(key) == 3 and model_names else ""
    return (f"converged settings of different capacity level off at the same error "
            f"(e.g. capacity {capacity(key)} and {capacity(other)}{of_model})")


def floor_across_models(grids: Sequence[Mapping[tuple[int, int], CurveFit]],
                        model_names: Sequence[str],
                        confidence: float = FLOOR_CONFIDENCE) -> SharedFloor | None:
    """The noise floor from the settings of every model table of a run pooled (see shared_floor)."""
    pooled = {(m, *key): fit for m, grid in enumerate(grids) for key, fit in grid.items()}
    return shared_floor(pooled, confidence, model_names) if pooled else None


class GridCurves(dict):
    """Fitted curves keyed by (capacity_index, regularization_index).

    `unfitted` lists the settings that could not be fitted, each with a reason;
    `floor` is the shared noise floor (None when no setting determines it).
    """

    def __init__(self, *args, unfitted: list[dict] | None = None, **kwargs):
        super().__init__(*args, **kwargs)
        self.unfitted: list[dict] = list(unfitted or [])
        self.floor: SharedFloor | None = None
        self.from_cache = False     # read back from the run folder (gridplan.curvestore)
        self.calibration = None     # gridplan.calibration.Calibration, when calibrated


@dataclass(frozen=True)
class _SettingData:
    """One setting's usable measurements as (size x unit) matrices."""

    info: SettingInfo
    sizes: np.ndarray
    validation: np.ndarray
    training: np.ndarray
    n_repeats: int
    seed: np.random.SeedSequence


def _settings_data(cells: pd.DataFrame, seed: int) -> list[_SettingData]:
    """Every setting's matrices, built from the cells table in one pass."""
    keys = cells[["capacity_index", "regularization_index"]].to_numpy(dtype=np.int64)
    settings, setting_of = np.unique(keys, axis=0, return_inverse=True)
    setting_of = setting_of.reshape(-1)
    ok = (cells["status"] == "ok").to_numpy()
    sizes, size_of = np.unique(cells["train_size"].to_numpy(dtype=float), return_inverse=True)
    unit_pairs = cells[["repeat", "fold"]].to_numpy(dtype=np.int64)
    units, unit_of = np.unique(unit_pairs, axis=0, return_inverse=True)
    unit_of = unit_of.reshape(-1)
    shape = (len(settings), len(sizes), len(units))
    validation, training = np.full(shape, np.nan), np.full(shape, np.nan)
    picked = (setting_of[ok], size_of.reshape(-1)[ok], unit_of[ok])
    validation[picked] = cells["validation_error"].to_numpy(dtype=float)[ok]
    training[picked] = cells["train_error"].to_numpy(dtype=float)[ok]
    measured = np.zeros(shape, dtype=bool)
    measured[picked] = True
    first = pd.Series(np.arange(len(cells))).groupby(setting_of).first().to_numpy()
    skipped = np.bincount(setting_of[~ok], minlength=len(settings))
    capacity = cells["capacity"].to_numpy()
    regularization = cells["regularization"].to_numpy()
    out = []
    for s, (cap, reg) in enumerate(settings):
        info = SettingInfo(int(cap), int(reg), str(capacity[first[s]]),
                           str(regularization[first[s]]), int(skipped[s]))
        rows = measured[s].any(axis=1)
        cols = measured[s].any(axis=0)
        out.append(_SettingData(
            info, sizes[rows], validation[s][np.ix_(rows, cols)],
            training[s][np.ix_(rows, cols)], len(np.unique(units[cols, 0])),
            np.random.SeedSequence([int(seed), int(cap), int(reg)])))
    return out


def _unfitted(info: SettingInfo, reason: str) -> dict:
    return {"capacity_index": info.capacity_index,
            "regularization_index": info.regularization_index,
            "capacity": info.capacity, "regularization": info.regularization,
            "skipped_rows": info.skipped_rows, "reason": reason}


def _fit_settings(settings: list[_SettingData], families: tuple[str, ...], n_boot: int,
                  asymptote_min: float = 0.0) -> list[CurveFit | dict]:
    """Fit the given settings together; a dict describes each one that could not be fitted."""
    results: list[CurveFit | dict | None] = [None] * len(settings)
    problems, where = [], []
    for i, data in enumerate(settings):
        try:
            if data.sizes.size == 0:
                raise GridplanError("no rows with status 'ok'")
            problems.append(_problem(data.sizes, data.validation, data.training, data.info,
                                     data.n_repeats, data.seed, asymptote_min))
            where.append(i)
        except GridplanError as problem:
            results[i] = _unfitted(data.info, str(problem))
    for i, fitted in zip(where, _fit_problems(problems, families, n_boot)):
        results[i] = _unfitted(settings[i].info, fitted) if isinstance(fitted, str) else fitted
    return results


def fit_grid(cells: pd.DataFrame, *, families: Iterable[str] = DEFAULT_FAMILIES,
             n_boot: int = DEFAULT_BOOT, seed: int = 0, share_floor: bool = True,
             calibrate: bool = True) -> GridCurves:
    """Fit a learning curve for every (capacity, regularisation) setting of a grid.

    Only rows with status "ok" are used; the others are counted per setting.
    Each setting's bootstrap is seeded from (seed, capacity_index,
    regularization_index), so results do not depend on order. All settings
    are fitted together (`gridplan.batchfit`). With `share_floor`, the noise
    floor is estimated from the well-determined settings (`shared_floor`) and
    every setting whose asymptote fell below the floor's lower band edge is
    refitted with its asymptote bounded there. With `calibrate`, every
    forecast beyond the data carries this run's own extrapolation record
    (`gridplan.calibration`), kept in `GridCurves.calibration`.
    """
    missing = [c for c in CELL_COLUMNS if c not in cells.columns]
    if missing:
        raise GridplanError(f"The cells table lacks the column(s): {', '.join(missing)}.")
    if cells.empty:
        raise GridplanError("The cells table is empty, so there are no learning curves to fit.")
    families = _check_families(families)
    _check_boot(n_boot)
    settings = _settings_data(cells, seed)
    grid = GridCurves()
    for data, result in zip(settings, _fit_settings(settings, families, n_boot)):
        info = data.info
        if isinstance(result, CurveFit):
            grid[(info.capacity_index, info.regularization_index)] = result
        else:
            grid.unfitted.append(result)
    grid.floor = shared_floor(grid) if grid else None
    if share_floor and grid.floor is not None:
        bound = grid.floor.low
        again = [data for data in settings
                 if (key := (data.info.capacity_index, data.info.regularization_index)) in grid
                 and grid[key].asymptote < bound]
        for data, result in zip(again, _fit_settings(again, families, n_boot, bound)):
            if isinstance(result, CurveFit):
                grid[(data.info.capacity_index, data.info.regularization_index)] = result
    if calibrate and grid:
        from gridplan.calibration import calibrate as calibrate_fits
        grid.calibration = calibrate_fits(settings, grid, families)
    return grid


# --- summary ----------------------------------------------------------------------

def _setting_summary(fit: CurveFit, target: float | None, confidence: float,
                     current_size: float | None, max_size: float) -> dict:
    info = fit.setting or SettingInfo(-1, -1, "", "")
    largest = float(fit.sizes[-1])
    reference = float(current_size) if current_size else largest
    floor_low, floor_high = fit.asymptote_band(confidence)
    row = {"capacity": info.capacity, "regularization": info.regularization,
           "capacity_index": info.capacity_index,
           "regularization_index": info.regularization_index,
           "family": fit.family, "formula": FAMILIES[fit.family].formula,
           "params": fit.params, "holdout_errors": fit.holdout_errors,
           "asymptote": fit.asymptote, "asymptote_low": floor_low, "asymptote_high": floor_high,
           "largest_size": int(largest), "error_at_largest": float(fit.validation_mean[-1]),
           "reference_size": int(reference)}
    for factor in (2, 4):
        low, high = fit.band(factor * reference, confidence)
        row[f"predicted_{factor}x"] = float(fit.predict(factor * reference))
        row[f"predicted_{factor}x_low"], row[f"predicted_{factor}x_high"] = float(low), float(high)
    row["band_too_wide"] = fit.band_too_wide(2 * reference, confidence)
    if target is None:
        row.update(samples_needed=None, samples_needed_low=None, samples_needed_high=None,
                   samples_needed_point=None, reachable=None, reason="no target given")
    else:
        need = fit.samples_needed(target, confidence, max_size)
        row.update(samples_needed=need.needed, samples_needed_low=need.low,
                   samples_needed_high=need.high, samples_needed_point=need.point,
                   reachable=need.reachable, reason=need.reason)
    row["midpoint_check"] = fit.midpoint_check(confidence)
    row["skipped_rows"] = info.skipped_rows
    return row


def curves_summary(fits: Mapping[tuple[int, int], CurveFit], *, target: float | None,
                   confidence: float = 0.9, current_size: float | None = None,
                   max_size: float = DEFAULT_MAX_SIZE) -> "CurvesSummary":
    """A typed summary: one entry per setting with floor, forecasts and samples needed.

    Forecasts are at 2x and 4x `current_size` (default: each setting's
    largest measured size).
    """
    _check_confidence(confidence)
    settings = [_setting_summary(fits[key], target, confidence, current_size, max_size)
                for key in sorted(fits)]
    calibration = getattr(fits, "calibration", None)
    from gridplan.results import CurvesSummary
    return CurvesSummary.from_dict(_plain({
        "target": target, "confidence": confidence, "wide_band_ratio": WIDE_BAND_RATIO,
        "settings": settings, "unfitted": list(getattr(fits, "unfitted", [])),
        "calibration": calibration.as_dict() if calibration is not None else None,
        "metric": None, "model": None}))


def _number(value, digits: int = 3) -> str:
    from gridplan.wording import sig
    return "-" if value is None else sig(value, digits)


def _size(value) -> str:
    return "-" if value is None else f"{int(value):,}"


def render_summary(summary: dict) -> str:
    """Plain-text table of a curves summary, one line per setting."""
    conf = summary["confidence"]
    headers = ["capacity", "regularization", "family", "plateau [band]",
               "error @ largest size", "error @ 2x size [band]", "rows needed", "notes"]
    lines = []
    for s in summary["settings"]:
        notes = []
        if s["band_too_wide"]:
            forecast = "band too wide"
        else:
            forecast = (f"{_number(s['predicted_2x'])} [{_number(s['predicted_2x_low'])}, "
                        f"{_number(s['predicted_2x_high'])}]")
        if s["reachable"]:
            central = s["samples_needed_point"] or s["samples_needed"]
            samples = (f"about {_size(central)}; {_size(s['samples_needed'])} to be "
                       f"{conf:.0%} sure")
            if s["samples_needed"] <= s["largest_size"]:
                notes.append("target already met at the measured sizes")
        elif s["reachable"] is None:
            samples = "-"
        elif s["samples_needed_point"] is not None:
            samples = f"about {_size(s['samples_needed_point'])}; not at {conf:.0%}"
            notes.append(s["reason"])
        else:
            samples = "not reachable"
            notes.append(s["reason"])
        check = s["midpoint_check"]
        if check.get("disagree"):
            notes.append("floor outside the training/validation bracket")
        if s["skipped_rows"]:
            notes.append(f"rows skipped: {s['skipped_rows']}")
        lines.append([s["capacity"], s["regularization"], s["family"],
                      f"{_number(s['asymptote'])} [{_number(s['asymptote_low'])}, "
                      f"{_number(s['asymptote_high'])}]",
                      f"{_number(s['error_at_largest'])} @ {_size(s['largest_size'])}",
                      forecast, samples, "; ".join(notes)])
    widths = [max(len(str(row[i])) for row in [headers] + lines) for i in range(len(headers))]
    title = f"Learning curves: target {_number(summary['target'])}, bands at {conf:.0%} confidence"
    out = [title, "  ".join(h.ljust(w) for h, w in zip(headers, widths)).rstrip(),
           "  ".join("-" * w for w in widths)]
    out += ["  ".join(str(c).ljust(w) for c, w in zip(row, widths)).rstrip() for row in lines]
    for u in summary.get("unfitted", []):
        out.append(f"{u['capacity']}  {u['regularization']}  not fitted: {u['reason']}")
    if summary.get("calibration"):
        from gridplan.calibration import Calibration
        out.append(f"Forecasts beyond the data: {Calibration(**summary['calibration']).sentence()}.")
    return "\n".join(out)


# --- joint surface over capacity and data ------------------------------------------

@dataclass(frozen=True)
class JointSurface:
    """Error as a function of capacity N and training size D: E + A / N^alpha + B / D^beta.

    The form of Hoffmann et al. (2022); useful where a single setting has
    too few sizes for its own curve but neighbouring capacities share data.
    """

    E: float
    A: float
    alpha: float
    B: float
    beta: float

    @property
    def params(self) -> dict[str, float]:
        return {"E": self.E, "A": self.A, "alpha": self.alpha, "B": self.B, "beta": self.beta}

    def predict(self, capacity, size) -> np.ndarray:
        """Predicted error at capacity value(s) N and training size(s) D."""
        n = np.asarray(capacity, dtype=float)
        d = np.asarray(size, dtype=float)
        return self.E + self.A * np.power(n, -self.alpha) + self.B * np.power(d, -self.beta)


def fit_joint_surface(capacity, size, error, *, huber_delta: float = 1e-3) -> JointSurface:
    """Fit E + A/N^alpha + B/D^beta to (capacity, size, error) points.

    Like Hoffmann et al. (2022): residuals are differences of log errors, the
    loss is Huber with threshold `huber_delta`, log A, log B, log E are free
    and alpha, beta >= 0; several starts, the lowest loss wins.  N and D are
    scaled by their largest values while fitting.
    """
    from scipy.optimize import least_squares
    from scipy.special import logsumexp, softmax

    n = np.asarray(capacity, dtype=float).ravel()
    d = np.asarray(size, dtype=float).ravel()
    e = np.asarray(error, dtype=float).ravel()
    if not (n.size == d.size == e.size):
        raise GridplanError("Capacity, size and error must have one value per point.")
    keep = np.isfinite(n) & np.isfinite(d) & np.isfinite(e) & (n > 0) & (d > 0) & (e > 0)
    if keep.sum() < 6 or len(np.unique(n[keep])) < 2 or len(np.unique(d[keep])) < 2:
        raise GridplanError("A joint surface needs at least 6 positive errors spread over "
                            "two or more capacities and sizes.")
    n, d, e = n[keep], d[keep], e[keep]
    n_top, d_top = n.max(), d.max()
    log_n, log_d, log_e = np.log(n / n_top), np.log(d / d_top), np.log(e)

    def terms(t):
        return np.stack([t[0] - t[1] * log_n, t[2] - t[3] * log_d, np.full_like(log_n, t[4])])

    def residuals(t):
        return logsumexp(terms(t), axis=0) - log_e

    def jacobian(t):
        shares = softmax(terms(t), axis=0)
        return np.column_stack([shares[0], -shares[0] * log_n, shares[1], -shares[1] * log_d,
                                shares[2]])

    lower = [-np.inf, 0.0, -np.inf, 0.0, -np.inf]
    upper = [np.inf, 5.0, np.inf, 5.0, np.inf]
    floor_guess = np.log(0.5 * e.min())
    best = None
    for exponent in (0.3, 1.0):
        for log_a in (np.log(0.1 * e.min()), np.log(e.mean())):
            start = [log_a, exponent, log_a, exponent, floor_guess]
            result = least_squares(residuals, start, jac=jacobian, bounds=(lower, upper),
                                   loss="huber", f_scale=huber_delta, max_nfev=300)
            if best is None or result.cost < best.cost:
                best = result
    la, alpha, lb, beta, le = best.x
    return JointSurface(E=float(np.exp(le)), A=float(np.exp(la) * n_top ** alpha),
                        alpha=float(alpha), B=float(np.exp(lb) * d_top ** beta), beta=float(beta))
