"""One setting's learning curve: level and spread per size, family choice by hold-out,
bootstrap bands, extrapolation, samples needed (the families are in gridplan.deciding.shapes).

A setting's learning curve is its mean validation error against training-set
size.  Each parametric family (see shapes) is fitted by weighted non-linear least
squares (weights 1 / standard error of the mean at each size, floored) in the
scaled size x = m / (largest measured size), with bounds that keep every curve
non-increasing in m and its asymptote (the noise-floor estimate) non-negative.
Uncertainty comes from a bootstrap over whole (repeat, fold) units.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from statistics import NormalDist
from typing import Callable, Iterable, Sequence

import numpy as np

from gridplan.common.checks import DEFAULT_BOOT, check_boot, check_confidence
from gridplan.common.errors import GridplanError, NumericalError
from gridplan.common.forked import local_cores, run_parts
from gridplan.deciding.batchfit import parameters_view
from gridplan.deciding.shapes import DEFAULT_FAMILIES, FAMILIES, TINY, Family, fit_family, start_points

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
#: Largest training size the samples-needed search will consider.
DEFAULT_MAX_SIZE = 1e12

#: Doublings beyond the data after which the level shape error stops growing:
#: the corpus measures it two doublings out (x4) and no further.
LEVEL_DOUBLINGS_CAP = 2.0
#: Points of the log grid on which the upper band edge is made monotone beyond the data.
MONOTONE_GRID = 256
#: Whole sizes tried at once in each round of the samples-needed search (see _edge_reach).
SEARCH_POINTS = 64
#: Forecasts past this multiple of a curve's largest measured size lie beyond anything
#: checked: the corpus backtests x4 (benchmarks/corpus.py), a run's own checks reach one
#: to three sizes. Rows needed beyond it are told as "beyond", not as a number.
CHECKED_HORIZON = 8.0
#: Curves a part must hold before a fit is split over cores (fewer: forking costs more).
MIN_PROBLEMS_PER_PART = 40



# --- level and spread at each size ------------------------------------------

def _row_means(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean of the finite values along the last axis (NaN where none) and their count."""
    counts = np.sum(np.isfinite(values), axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.nansum(values, axis=-1) / counts, counts


def _nanmedian_last(values: np.ndarray) -> np.ndarray:
    """np.nanmedian along the last axis, without its slow path for short rows."""
    if values.shape[-1] == 0:
        return np.full(values.shape[:-1], np.nan)
    ordered = np.sort(values, axis=-1)                 # NaN sort to the end
    count = np.sum(np.isfinite(values), axis=-1)
    low = np.take_along_axis(ordered, np.maximum(count - 1, 0)[..., None] // 2, axis=-1)[..., 0]
    high = np.take_along_axis(ordered, (count // 2)[..., None], axis=-1)[..., 0]
    return np.where(count > 0, (low + high) / 2, np.nan)


def level_and_spread(errors: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
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
        middle = _nanmedian_last(masked)
        top_level = np.nanmax(np.abs(level), axis=-1)
    spread = np.where(np.isfinite(spread) | ~has_positive[..., None], spread, largest[..., None])
    floor = np.where(has_positive, SE_FLOOR_FRACTION * middle, 0.0)
    floor = np.maximum(np.maximum(floor, 1e-6 * np.nan_to_num(top_level)), TINY)
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
    #: Calibration from this run's own past extrapolations (gridplan.deciding.calibration).
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
    #: Median |relative error| with which this setting's own refits on its smaller sizes
    #: forecast its larger ones (None: too few sizes to check). On the corpus, settings
    #: whose own check missed by more also missed by more at x4 (Spearman 0.41).
    own_check_error: float | None = None
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
        alpha = 1.0 - check_confidence(confidence)
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
        z = NormalDist().inv_cdf(0.5 + check_confidence(confidence) / 2)
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
        """Confidence interval for the asymptote (noise floor), worked out once per confidence."""
        key = ("asymptote band", float(confidence))
        if key not in self._tables:
            low, high = self._band_from(np.array([self.asymptote]), self.boot_theta[:, :1],
                                        confidence)
            self._tables[key] = (float(low[0]), float(high[0]))
        return self._tables[key]

    def band_too_wide(self, m, confidence: float = 0.9) -> bool:
        """True when the band at m is wider than WIDE_BAND_RATIO times the forecast."""
        low, high = self.band(float(m), confidence)
        predicted = float(self.predict(float(m)))
        return bool(high - low > WIDE_BAND_RATIO * max(predicted, TINY))

    # -- samples needed
    def samples_needed(self, target: float, confidence: float = 0.9,
                       max_size: float = DEFAULT_MAX_SIZE) -> SamplesNeeded:
        """Smallest training size whose upper band edge reaches `target` (None if never).

        Kept per (target, confidence, max_size): the advice and the summary ask alike.
        """
        if not np.isfinite(target) or target < 0:
            raise GridplanError(f"The target error must be a non-negative number, got {target!r}.")
        check_confidence(confidence)
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
                "relative_difference": (self.asymptote - midpoint) / max(abs(midpoint), TINY),
                "bracket_contains_asymptote": bool(bottom <= self.asymptote <= top),
                "disagree": not overlaps}


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
    """Smallest whole m on [1, grid max] with edge(m) <= target: a grid scan, then a search by rows.

    Sizes are whole rows, so the crossing between the two grid points that
    bracket it is found among integers: each round evaluates the edge at up to
    SEARCH_POINTS integers of the bracket at once and keeps the piece where it
    crosses, until the bracket is one row wide.
    """
    reached = target * (1 + 1e-9)
    hits = np.flatnonzero(values <= reached)
    if hits.size == 0:
        return None
    first = hits[0]
    if first == 0:
        return 1
    # edge(low) > target and edge(high) <= target, for an edge falling with m
    low, high = int(math.floor(grid[first - 1])), int(math.ceil(grid[first]))
    while high - low > 1:
        inside = np.unique(np.linspace(low, high, SEARCH_POINTS + 2)[1:-1].astype(np.int64))
        inside = inside[(inside > low) & (inside < high)]     # never empty: high - low >= 2
        below = np.flatnonzero(np.asarray(edge(inside.astype(float))) <= reached)
        if below.size == 0:
            low = int(inside[-1])
        else:
            high = int(inside[below[0]])
            low = int(inside[below[0] - 1]) if below[0] > 0 else low
    return max(1, high)


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
class Problem:
    """One learning curve to fit: its usable sizes and (size x unit) error matrices."""

    sizes: np.ndarray
    errors: np.ndarray
    train_mean: np.ndarray | None
    setting: SettingInfo | None
    n_repeats: int
    seed: int | np.random.SeedSequence
    asymptote_min: float = 0.0


def make_problem(sizes, fold_errors, train_fold_errors, setting, n_repeats, seed,
             asymptote_min: float = 0.0) -> Problem:
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
    return Problem(sizes, errors, train_mean, setting, max(1, int(n_repeats)), seed,
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
        theta, cost = fit_family(fam, xs, ys, ws, start_points(name, xs, ys, ws),
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
        tied = [k for k, v in scored.items() if v <= best + margin + TINY]
        chosen.append(min(tied, key=lambda k: (FAMILIES[k].n_params, families.index(k))))
    return chosen, scores


def _bootstrap_levels(problem: Problem, n_boot: int, width: int):
    """Level, weights and usability of `n_boot` resamples of a curve's units, padded to `width`."""
    rng = np.random.default_rng(problem.seed)
    n_sizes, n_units = problem.errors.shape
    picks = rng.integers(0, n_units, (n_boot, n_units))
    picked = problem.errors[:, picks].transpose(1, 0, 2)            # (B, sizes, units)
    level, spread = level_and_spread(picked)
    keep = np.isfinite(level)
    y = np.zeros((n_boot, width))
    w = np.zeros((n_boot, width))
    y[:, :n_sizes] = np.where(keep, level, 0.0)
    w[:, :n_sizes] = np.where(keep, 1.0 / spread, 0.0)
    return y, w, keep.sum(axis=1)


def fit_problems(problems: list[Problem], families: tuple[str, ...],
                  n_boot: int | Sequence[int], jobs: int | None = 1) -> list[CurveFit | str]:
    """Fit every curve: family choice, main fit and bootstrap, all batched across curves.

    `n_boot` is one count of bootstrap resamples for every curve or one per curve.

    With `jobs` other than 1 (None: every core) a long list is split into
    interleaved parts fitted side by side (`gridplan.common.forked`); each
    curve's fit does not depend on the others in its batch, so the results
    are the same.
    """
    boots = np.broadcast_to(np.asarray(n_boot, dtype=int), (len(problems),))
    parts = min(local_cores() if jobs is None else jobs, len(problems) // MIN_PROBLEMS_PER_PART)
    if parts > 1:
        def part(k: int) -> Callable[[], list[CurveFit | str]]:
            return lambda: fit_problems(problems[k::parts], families, boots[k::parts])
        results: list[CurveFit | str] = [""] * len(problems)
        for k, fitted in enumerate(run_parts([part(k) for k in range(parts)], parts)):
            results[k::parts] = fitted
        return results
    if not problems:
        return []
    width = max(len(p.sizes) for p in problems)
    counts = np.array([len(p.sizes) for p in problems])
    scales = np.array([float(p.sizes[-1]) for p in problems])
    x = _padded([p.sizes / p.sizes[-1] for p in problems], width, 1.0)
    levels, spreads = zip(*(level_and_spread(p.errors) for p in problems))
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
        theta, cost = fit_family(fam, x[rows], y[rows], w[rows],
                                  start_points(name, x[rows], y[rows], w[rows]), floors[rows])
        boot_y, boot_w, boot_ok = zip(*(_bootstrap_levels(problems[i], int(boots[i]), width)
                                        for i in rows))
        start = np.repeat(np.nan_to_num(theta, nan=1.0), boots[rows], axis=0)
        boot_theta, boot_cost = fit_family(
            fam, np.repeat(x[rows], boots[rows], axis=0), np.concatenate(boot_y),
            np.concatenate(boot_w), [start], np.repeat(floors[rows], boots[rows]))
        ends = np.cumsum(boots[rows])[:-1]
        boot_theta, boot_cost = np.split(boot_theta, ends), np.split(boot_cost, ends)
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


def check_families(families: Iterable[str]) -> tuple[str, ...]:
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
    families = check_families(families)
    check_boot(n_boot)
    problem = make_problem(sizes, fold_errors, train_fold_errors, setting, n_repeats, seed,
                       asymptote_min)
    result = fit_problems([problem], families, n_boot)[0]
    if isinstance(result, str):
        raise NumericalError(result)
    return result
