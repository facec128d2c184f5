"""How wrong this run's own extrapolations have been, and the band and lean that follow.

The bootstrap behind each band sees only sampling noise; past the data the
larger error is usually the curve's shape. Each setting with enough sizes is
refitted (the same family choice and fit) on its smaller sizes only and its
forecasts compared with the sizes it did not see. A forecast beyond the data
is the fitted value at the last fitted size minus a further drop D; pooled
over settings, the residuals (measured - forecast) are modelled as

    residual ~ Normal(lean * D, sd_boot^2 + sd_meas^2 + (spread * D)^2
                                + (level_spread * forecast * doublings)^2)

with sd_boot the forecast's own bootstrap spread and sd_meas the measured
mean's standard error. `lean` is the share of the forecast drop that did not
happen (> 0: this run's curves have been optimistic), `spread` the relative
error of the drop itself, `level_spread` a shape error per doubling beyond
the data on the forecast itself, which stays when the curve is forecast flat
(a curve that looked converged and was not). All three are fitted by maximum likelihood and shrunk
toward a prior worth PRIOR_SETTINGS settings (the spread measured on the
project's corpus, benchmarks/corpus.py; no lean). A lean in (0, 1] takes that
share of every forecast's further drop back (a negative one, pessimistic
curves, is reported but not credited); the spread widens every band beyond
the data.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from statistics import NormalDist
from typing import Iterable

import numpy as np

from gridplan.common.errors import GridplanError
from gridplan.deciding.curves import CurveFit, Problem, level_and_spread, make_problem

#: Prior shape errors (relative error of a forecast's further drop; relative
#: error of the forecast per doubling beyond the data) and their weight in
#: settings. Set on the corpus (benchmarks/corpus.py): with these, x4
#: backtests put 96% of measurements inside the 90% band pooled, every member
#: at least 67%; a run's own checks, which reach only a doubling or two,
#: found less shape error than the x4 backtests show.
PRIOR_SPREAD = 0.3
PRIOR_LEVEL_SPREAD = 0.1
PRIOR_SETTINGS = 6.0
#: A lean counts (is said and applied) when more than this share of the
#: forecast drops failed to happen (or, negative, was exceeded).
CLEAR_LEAN = 0.05
#: Fewest pooled checks on which a lean is applied (below it, only reported).
MIN_LEAN_CHECKS = 10
#: Refits use sizes up to the last ORIGINS measured ones, keeping at least
#: MIN_FIT_SIZES sizes to fit on.
ORIGINS = 3
MIN_FIT_SIZES = 4
#: A setting's own check error above which its forecasts are called rough: on the
#: corpus, settings in the top quartile of own-check error (above 10.9%) missed by a
#: median 8.5% at x4, the others by 3.9% (benchmarks/corpus.py prints both).
OWN_CHECK_CAUTION = 0.10
#: Bootstrap resamples per refit (only their spread at the held sizes is used).
CHECK_BOOT = 12
#: Spreads searched for the maximum-likelihood fit.
SPREAD_GRID = np.concatenate([[0.0], np.geomspace(1e-3, 10.0, 80)])
LEVEL_GRID = np.concatenate([[0.0], np.geomspace(1e-3, 1.0, 60)])
#: Grid points x checks worked on at once in that search (a few MB).
GRID_CELLS_PER_CHUNK = 200_000


@dataclass(frozen=True)
class Calibration:
    """This run's record of extrapolation error and what is applied because of it."""

    lean_fitted: float | None          # share of forecast drops that did not happen
    spread_fitted: float | None        # relative error of the forecast drop
    level_spread_fitted: float | None  # relative forecast error per doubling
    lean: float                        # applied to forecasts, in [0, 1]
    spread: float                      # applied to bands
    level_spread: float                # applied to bands
    checks: int                        # (setting, origin, size) comparisons pooled
    settings: int                      # settings that could be checked
    median_abs_rel_error: float | None  # of the uncorrected forecasts in the checks
    optimistic_share: float | None     # share of checks where the forecast was too low

    def as_dict(self) -> dict:
        return asdict(self)

    def sentence(self) -> str:
        """One plain sentence on what this run's past extrapolations showed."""
        if not self.checks:
            return (f"too few training sizes to check this run's own extrapolations, so bands "
                    f"carry the usual shape error ({self.spread:.0%} of each forecast drop and "
                    f"{self.level_spread:.1%} of the forecast per doubling beyond the data)")
        lean = self.lean_fitted or 0.0
        text = (f"refitted on their smaller sizes, {self.settings} settings forecast their larger "
                f"ones with a median error of {self.median_abs_rel_error or 0.0:.1%} "
                f"({self.optimistic_share or 0.0:.0%} of {self.checks} forecasts too low)")
        if lean > CLEAR_LEAN:
            text += (f"; the forecast drops fell short by {lean:.0%} (larger drops weigh more): "
                     f"optimistic")
            text += (f", so forecasts count on only {1 - self.lean:.0%} of the further drop "
                     f"their curve promises" if self.lean > 0 else
                     f", but {self.checks} checks are too few to correct forecasts for it")
        elif lean < -CLEAR_LEAN:
            text += (f"; the curves fell {-lean:.0%} more than forecast (larger drops weigh "
                     f"more): pessimistic, left uncorrected")
        else:
            text += "; the forecast drops were about right"
        return text + (f"; bands carry {self.spread:.0%} of each forecast drop and "
                       f"{self.level_spread:.1%} of the forecast per doubling beyond the data as "
                       f"shape error")


def prior() -> Calibration:
    """What is applied when a run has nothing to check its extrapolations on."""
    return Calibration(None, None, None, 0.0, PRIOR_SPREAD, PRIOR_LEVEL_SPREAD, 0, 0, None, None)


def fit_calibration(drops: np.ndarray, residuals: np.ndarray, variances: np.ndarray,
                    levels: np.ndarray, excesses: np.ndarray, doublings: np.ndarray,
                    settings: int) -> Calibration:
    """Maximum-likelihood lean and spreads from pooled checks, shrunk toward the prior."""
    arrays = [np.asarray(a, dtype=float)
              for a in (drops, residuals, variances, levels, excesses, doublings)]
    keep = np.all([np.isfinite(a) for a in arrays], axis=0) & (arrays[5] > 0)
    d, r, v, level, excess, doubled = (a[keep] for a in arrays)
    if d.size == 0 or settings == 0:
        return prior()
    v = np.maximum(v, 1e-24)
    lean = np.empty((SPREAD_GRID.size, LEVEL_GRID.size))
    loglik = np.empty_like(lean)
    level_part = (LEVEL_GRID[:, None] * excess * doubled) ** 2               # (k, checks)
    rows = max(1, GRID_CELLS_PER_CHUNK // max(1, LEVEL_GRID.size * d.size))
    for start in range(0, SPREAD_GRID.size, rows):   # in chunks that stay in the cache
        spread = SPREAD_GRID[start:start + rows, None, None]
        total = v + (spread * d) ** 2 + level_part                          # (s, k, checks)
        weights = 1.0 / total
        denominator = (weights * d * d).sum(axis=-1)
        chunk_lean = np.where(denominator > 0, (weights * r * d).sum(axis=-1)
                              / np.maximum(denominator, 1e-300), 0.0)
        misfit = r - chunk_lean[..., None] * d
        lean[start:start + rows] = chunk_lean
        loglik[start:start + rows] = -0.5 * (misfit ** 2 / total + np.log(total)).sum(axis=-1)
    i, j = np.unravel_index(int(np.argmax(loglik)), loglik.shape)
    spread_hat, level_hat, lean_hat = float(SPREAD_GRID[i]), float(LEVEL_GRID[j]), float(lean[i, j])
    # Settings of one grid share their rows and much of their shape, so they
    # count as the square root of their number against the prior.
    evidence = math.sqrt(settings)
    share = evidence / (evidence + PRIOR_SETTINGS)

    def shrunk(fitted: float, prior_value: float) -> float:
        return math.sqrt(share * fitted ** 2 + (1 - share) * prior_value ** 2)

    applied = (min(1.0, share * lean_hat) if lean_hat > CLEAR_LEAN and d.size >= MIN_LEAN_CHECKS
               else 0.0)
    positive = level > 0
    median = float(np.median(np.abs(r[positive]) / level[positive])) if positive.any() else 0.0
    return Calibration(lean_hat, spread_hat, level_hat, applied, shrunk(spread_hat, PRIOR_SPREAD),
                       shrunk(level_hat, PRIOR_LEVEL_SPREAD), int(d.size), int(settings),
                       median, float(np.mean(r > 0)))


def check_problems(data, asymptote_min: float = 0.0) -> list[tuple[Problem, tuple]]:
    """One setting's refits on its smaller sizes: each problem with what it must forecast.

    `data` is the setting's measurements (`gridplan.deciding.gridfit`); each
    entry pairs a problem (sizes up to the last one, two or three, keeping
    at least MIN_FIT_SIZES) with the sizes it did not see and their measured
    level and spread.
    """
    usable = np.any(np.isfinite(data.validation), axis=1)
    sizes, validation = data.sizes[usable], data.validation[usable]
    training = data.training[usable]
    level, spread = level_and_spread(validation)
    checks = []
    for back in range(1, ORIGINS + 1):
        cut = len(sizes) - back
        if cut < MIN_FIT_SIZES:
            break
        try:
            problem = make_problem(sizes[:cut], validation[:cut], training[:cut], data.info,
                                   data.n_repeats, data.seed, asymptote_min)
        except GridplanError:   # a truncated curve that cannot be fitted is not a check
            continue
        checks.append((problem, (sizes[cut:], level[cut:], spread[cut:])))
    return checks


def check_record(checks: Iterable[list[tuple[CurveFit | str, tuple]]]):
    """The pooled outcome of the refits, one list of (refit, held sizes) per setting.

    Returns (forecast drops, residuals, their noise variances, measured levels,
    forecasts, doublings beyond the fitted sizes (capped as in the bands),
    settings checked), one entry per held size of each refit.
    """
    z = NormalDist().inv_cdf(0.95)
    drops, residuals, variances, levels, excesses, doublings, checked = [], [], [], [], [], [], 0
    for setting_checks in checks:
        any_ok = False
        for refit, (sizes, level, spread) in setting_checks:
            if isinstance(refit, str):
                continue
            forecast = refit.raw_predict(sizes)
            low, high = refit.band(sizes, 0.9)
            ok = np.isfinite(level) & np.isfinite(forecast)
            if not ok.any():
                continue
            any_ok = True
            drops.append(refit.drop_beyond_data(sizes)[ok])
            residuals.append((level - forecast)[ok])
            variances.append((((high - low) / (2 * z)) ** 2 + spread ** 2)[ok])
            levels.append(level[ok])
            excesses.append(forecast[ok])
            doublings.append(refit.doublings_beyond_data(sizes)[ok])
        checked += any_ok
    if not drops:
        return (*[np.array([])] * 6, 0)
    return (*(np.concatenate(a) for a in (drops, residuals, variances, levels, excesses,
                                          doublings)), checked)


def own_check_error(setting_checks: list[tuple[CurveFit | str, tuple]]) -> float | None:
    """Median |relative error| of one setting's refits at the sizes they did not see."""
    errors = []
    for refit, (sizes, level, _) in setting_checks:
        if isinstance(refit, str):
            continue
        forecast = refit.raw_predict(sizes)
        ok = np.isfinite(level) & np.isfinite(forecast) & (level > 0)
        errors.append(np.abs(forecast[ok] / level[ok] - 1.0))
    joined = np.concatenate(errors) if errors else np.array([])
    return float(np.median(joined)) if joined.size else None


def calibrate(fits: dict, checks: dict) -> Calibration:
    """This run's calibration from the refits `checks` (one list per key of `fits`),
    applied to every fit in `fits` (in place), each also given its own check error."""
    calibration = fit_calibration(*check_record(checks.values()))
    for key, fit in fits.items():
        fit.drop_lean = calibration.lean
        fit.drop_spread = calibration.spread
        fit.level_spread = calibration.level_spread
        fit.own_check_error = own_check_error(checks.get(key, []))
    return calibration
