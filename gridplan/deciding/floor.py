"""The data's noise floor shared by the settings of a grid, and the evidence it needs."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np

from gridplan.deciding.curves import CurveFit
from gridplan.deciding.shapes import TINY

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
        if high - low > INFORMATIVE_FLOOR_RATIO * max(fit.asymptote, TINY):
            continue
        if fit.validation_mean[-1] - fit.asymptote > CONVERGED_FRACTION * max(fit.asymptote, TINY):
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
    if any(h - lo > AGREEING_BAND_RATIO * max(v, TINY) for v, lo, h in (one, two)):
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
