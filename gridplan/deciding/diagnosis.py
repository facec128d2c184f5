"""Bias/variance diagnosis of each setting from the measured cells and its fitted curve.

For a setting at its largest measured size m the diagnosis reports the mean
training error, the mean validation error, their gap, the drop of the
validation error per doubling of data between the last two measured sizes,
the setting's fitted asymptote and the grid's noise-floor estimate, and a
verdict.  Significance of the gap and of the drop uses the corrected
resampled t-test of Nadeau & Bengio (2003), which widens the variance of
cross-validated differences by 1/J + n_test/n_train (J = repeats x folds)
because the training sets of the folds overlap.

Verdict rules (thresholds in `Thresholds`, all relative to the target T and
the noise floor F):

1. fine: validation error <= T.
2. noise-floor: validation error - F <= floor_margin x F (already within a
   small fraction of the best any setting can reach).
3. Otherwise the excess E_val - T splits exactly into a bias share
   (E_train - T, the training error's own excess; 0 when E_train <= T) and a
   variance share (the gap E_val - E_train, or the whole excess when E_train
   <= T).  Bias is present when its share of the excess is at least
   min_share; variance when its share is at least min_share and the gap is
   significant at level alpha.  Both present: both.  Neither: the larger
   share decides.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd
from scipy import special

from gridplan.common.errors import GridplanError
from gridplan.common.jsonable import plain as _plain
from gridplan.deciding.curves import CurveFit

VERDICTS = ("high-bias", "high-variance", "both", "noise-floor", "fine")


@dataclass(frozen=True)
class Thresholds:
    """The documented, configurable thresholds behind every verdict."""

    #: near the noise floor when validation error - floor <= floor_margin x floor
    floor_margin: float = 0.05
    #: a cause (bias or variance) counts when it explains at least this share of the excess
    min_share: float = 0.25
    #: significance level for the gap (one-sided corrected resampled t-test)
    alpha: float = 0.05
    #: the curve counts as flat when it drops less than flat_fraction x target per doubling
    flat_fraction: float = 0.02

    def __post_init__(self) -> None:
        for name in ("floor_margin", "min_share", "flat_fraction"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value >= 0):
                raise GridplanError(f"threshold {name} must be a non-negative number, got {value!r}.")
        if not 0 < self.alpha < 1:
            raise GridplanError(f"threshold alpha must lie strictly between 0 and 1, got {self.alpha!r}.")
        if self.min_share > 1:
            raise GridplanError(f"threshold min_share must be at most 1, got {self.min_share!r}.")


# --- corrected resampled t-test ---------------------------------------------------

def corrected_variance_factor(n_units: int, n_train: float, n_test: float) -> float:
    """Nadeau & Bengio's factor 1/J + n_test/n_train for J resampled train/test splits."""
    if n_units < 1 or n_train <= 0 or n_test <= 0:
        raise GridplanError(f"the corrected t-test needs J >= 1 and positive set sizes, got "
                            f"J={n_units}, n_train={n_train}, n_test={n_test}.")
    return 1.0 / n_units + n_test / n_train


@dataclass(frozen=True)
class CorrectedTest:
    """Mean of per-split differences with its corrected interval and one-sided p-value (mean > 0)."""

    mean: float
    standard_error: float
    factor: float
    dof: int
    t: float
    p_value: float
    low: float
    high: float
    confidence: float

    def significant(self, alpha: float) -> bool:
        return self.p_value < alpha


def corrected_t_test(differences, n_train: float, n_test: float,
                     confidence: float = 0.9) -> CorrectedTest | None:
    """Corrected resampled t-test on per-split differences (None with fewer than two splits)."""
    d = np.asarray(differences, dtype=float)
    d = d[np.isfinite(d)]
    if d.size < 2:
        return None
    factor = corrected_variance_factor(d.size, n_train, n_test)
    mean = float(d.mean())
    se = math.sqrt(factor * float(d.var(ddof=1)))
    dof = d.size - 1
    if se > 0:
        t = mean / se
        p = float(special.stdtr(dof, -t))
    else:
        t = math.copysign(math.inf, mean) if mean else 0.0
        p = 0.0 if mean > 0 else 1.0
    half = float(special.stdtrit(dof, 0.5 + confidence / 2)) * se
    return CorrectedTest(mean, se, factor, dof, float(t), p, mean - half, mean + half, confidence)


# --- per-setting diagnosis ----------------------------------------------------------

@dataclass
class SettingDiagnosis:
    """The numbers behind one setting's verdict, at its largest measured size."""

    capacity_index: int
    regularization_index: int
    capacity: str
    regularization: str
    size: int
    train_error: float
    validation_error: float
    gap: float
    gap_test: CorrectedTest | None
    previous_size: int | None
    drop_per_doubling: CorrectedTest | None
    curve_drop_next_doubling: float | None
    setting_asymptote: float | None
    setting_asymptote_band: tuple[float, float] | None
    noise_floor: float | None
    target: float
    bias_share: float
    variance_share: float
    removable_by_data: float | None
    removable_band: tuple[float, float] | None
    not_removable: float | None
    not_removable_band: tuple[float, float] | None
    flat: bool | None
    verdict: str
    reason: str
    failed_rows: int = 0
    units: int = 0
    own_check_error: float | None = None   # the curve's own check (CurveFit.own_check_error)

    def as_dict(self) -> dict:
        return _plain(asdict(self))


#: (repeat, fold) pairs are coded as one integer, repeat * UNIT_STRIDE + fold.
UNIT_STRIDE = 1 << 20


def _mean(values: np.ndarray) -> float:
    """Mean of the non-missing values (NaN when there are none)."""
    kept = values[~np.isnan(values)]
    return float(kept.mean()) if kept.size else math.nan


def split_excess(validation_error: float, target: float, fit: CurveFit | None,
                 confidence: float) -> dict:
    """Excess over target = part more data removes (E_val - asymptote) + part it cannot (asymptote - T)."""
    if fit is None:
        return {"removable_by_data": None, "removable_band": None,
                "not_removable": None, "not_removable_band": None}
    low, high = fit.asymptote_band(confidence)
    return {"removable_by_data": validation_error - fit.asymptote,
            "removable_band": (validation_error - high, validation_error - low),
            "not_removable": fit.asymptote - target,
            "not_removable_band": (low - target, high - target)}


def verdict_for(train_error: float, validation_error: float, target: float,
                noise_floor: float | None, gap_test: CorrectedTest | None,
                thresholds: Thresholds) -> tuple[str, float, float, str]:
    """(verdict, bias share, variance share, one-sentence reason with the numbers)."""
    excess = validation_error - target
    gap = validation_error - train_error
    bias_part = max(0.0, train_error - target)
    variance_part = excess - bias_part if excess > 0 else 0.0
    bias_share = bias_part / excess if excess > 0 else 0.0
    variance_share = variance_part / excess if excess > 0 else 0.0
    numbers = (f"validation {validation_error:.3g}, training {train_error:.3g}, gap {gap:.3g}, "
               f"target {target:.3g}")
    if excess <= 0:
        return "fine", 0.0, 0.0, f"validation error meets the target ({numbers})"
    if noise_floor is not None and validation_error - noise_floor <= thresholds.floor_margin * noise_floor:
        return ("noise-floor", bias_share, variance_share,
                f"validation error is within {thresholds.floor_margin:.0%} of the noise floor "
                f"{noise_floor:.3g} ({numbers})")
    significant = gap_test is not None and gap_test.significant(thresholds.alpha)
    if gap_test is None:
        gap_words = "too few folds to test the gap"
    else:
        gap_words = (f"the gap is {'' if significant else 'not '}significant "
                     f"(p={gap_test.p_value:.2g})")
    bias = bias_share >= thresholds.min_share
    variance = variance_share >= thresholds.min_share and significant
    shares = (f"of the excess {excess:.3g} over the target, {bias_share:.0%} is training error "
              f"above the target (bias) and {variance_share:.0%} the gap (variance); {gap_words}")
    if bias and variance:
        verdict = "both"
    elif bias or variance:
        verdict = "high-bias" if bias else "high-variance"
    else:
        verdict = "high-bias" if bias_share >= variance_share else "high-variance"
        larger = "bias" if verdict == "high-bias" else "variance"
        shares += (f", so neither part reaches {thresholds.min_share:.0%} with significance and "
                   f"the larger one, {larger}, names the verdict")
    return verdict, bias_share, variance_share, f"{shares} ({numbers})"


def diagnose_setting(rows: pd.DataFrame, fit: CurveFit | None, *, target: float,
                     noise_floor: float | None, n_test: float, confidence: float,
                     thresholds: Thresholds, size: int | None = None) -> SettingDiagnosis:
    """Diagnose one setting from its cells (all statuses) at `size` (default: its largest ok size)."""
    ok = rows[rows["status"] == "ok"]
    if ok.empty:
        raise GridplanError("a setting has no successful cells to diagnose.")
    cell_sizes = ok["train_size"].to_numpy(dtype=np.int64)
    units = ok["repeat"].to_numpy(dtype=np.int64) * UNIT_STRIDE + ok["fold"].to_numpy(dtype=np.int64)
    train_all = ok["train_error"].to_numpy(dtype=float)
    valid_all = ok["validation_error"].to_numpy(dtype=float)
    sizes = sorted(int(s) for s in np.unique(cell_sizes))
    m = sizes[-1] if size is None else int(size)
    if m not in sizes:
        raise GridplanError(f"training size {m} has no successful cells for this setting.")
    here = cell_sizes == m
    train, valid = train_all[here], valid_all[here]
    train_error, validation_error = _mean(train), _mean(valid)
    gap_test = corrected_t_test(valid - train, m, n_test, confidence)

    previous = max((s for s in sizes if s < m), default=None)
    drop = None
    if previous is not None:
        before = cell_sizes == previous
        _, at_before, at_here = np.intersect1d(units[before], units[here], return_indices=True)
        paired = valid_all[before][at_before] - valid[at_here]
        paired = paired[~np.isnan(paired)] / math.log2(m / previous)
        drop = corrected_t_test(paired, m, n_test, confidence)
    curve_drop = float(fit.predict(m) - fit.predict(2 * m)) if fit is not None else None
    flat = None
    if drop is not None:
        flat = abs(drop.mean) < thresholds.flat_fraction * target

    verdict, bias_share, variance_share, reason = verdict_for(
        train_error, validation_error, target, noise_floor, gap_test, thresholds)
    first = rows.iloc[0]
    return SettingDiagnosis(
        capacity_index=int(first["capacity_index"]),
        regularization_index=int(first["regularization_index"]),
        capacity=str(first["capacity"]), regularization=str(first["regularization"]),
        size=m, train_error=train_error, validation_error=validation_error,
        gap=validation_error - train_error, gap_test=gap_test, previous_size=previous,
        drop_per_doubling=drop, curve_drop_next_doubling=curve_drop,
        setting_asymptote=fit.asymptote if fit is not None else None,
        setting_asymptote_band=fit.asymptote_band(confidence) if fit is not None else None,
        noise_floor=noise_floor, target=target, bias_share=bias_share,
        variance_share=variance_share, **split_excess(validation_error, target, fit, confidence),
        flat=flat, verdict=verdict, reason=reason,
        failed_rows=int((rows["status"] != "ok").sum()), units=int(len(valid)),
        own_check_error=fit.own_check_error if fit is not None else None)


# --- the grid's noise floor ---------------------------------------------------------------

@dataclass(frozen=True)
class NoiseFloor:
    """The data's noise floor (one setting's asymptote with its band), and what it rests on."""

    value: float
    low: float
    high: float
    capacity_index: int
    regularization_index: int
    trusted_settings: int
    evidence: str = ""

    def as_dict(self) -> dict:
        return _plain(asdict(self))


@dataclass(frozen=True)
class Plateau:
    """The lowest level this model's curves approach: an upper bound on the data's floor."""

    value: float
    low: float
    high: float
    capacity_index: int
    regularization_index: int

    def as_dict(self) -> dict:
        return _plain(asdict(self))


def estimate_noise_floor(curves: dict, confidence: float) -> NoiseFloor | None:
    """The data's noise floor, only where the run gives evidence for it (floor.shared_floor).

    A single model's lowest asymptote is that model's plateau, which may be
    its own bias; see `best_plateau`. None when the floor is unknown.
    """
    from gridplan.deciding.floor import shared_floor
    if not curves:
        return None
    shared = getattr(curves, "floor", None) or shared_floor(curves, confidence)
    if shared is None:
        return None
    return NoiseFloor(shared.value, shared.low, shared.high, shared.capacity_index,
                      shared.regularization_index, shared.informative, shared.evidence)


def best_plateau(curves: dict, confidence: float) -> Plateau | None:
    """The setting whose asymptote band reaches lowest at its upper edge, with that band.

    Settings whose asymptote band lies wholly outside their own
    training/validation bracket are skipped when others remain.
    """
    if not curves:
        return None
    trusted = {k: f for k, f in curves.items() if not f.midpoint_check(confidence)["disagree"]}
    pool = trusted or dict(curves)
    bands = {k: f.asymptote_band(confidence) for k, f in pool.items()}
    key = min(bands, key=lambda k: (bands[k][1], pool[k].asymptote, k))
    low, high = bands[key]
    return Plateau(float(pool[key].asymptote), float(low), float(high), int(key[0]), int(key[1]))


def diagnose_grid(cells: pd.DataFrame, curves: dict, *, target: float, n_test: float,
                  confidence: float, noise_floor: float | None,
                  thresholds: Thresholds = Thresholds()) -> dict[tuple[int, int], SettingDiagnosis]:
    """Diagnose every setting that has successful cells, keyed by (capacity_index, regularization_index).

    `noise_floor` is the value the noise-floor rule compares with (None: the rule is off).
    """
    out: dict[tuple[int, int], SettingDiagnosis] = {}
    for (ci, ri), rows in cells.groupby(["capacity_index", "regularization_index"], sort=True):
        if not (rows["status"] == "ok").any():
            continue
        out[(int(ci), int(ri))] = diagnose_setting(
            rows, curves.get((int(ci), int(ri))), target=target,
            noise_floor=noise_floor, n_test=n_test, confidence=confidence,
            thresholds=thresholds)
    return out
