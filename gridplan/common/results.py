"""Typed results of the deciding commands: advice, curve summaries and backtests.

Each result is a dataclass whose fields are the keys of its JSON (`to_dict`);
text, report and figures read the same fields, by attribute or by key
(`advice.plan` and `advice["plan"]` alike), so a field is defined once, here.
`from_dict` rebuilds a result from its JSON and refuses missing or unknown
keys, so the two cannot drift apart.
"""

from __future__ import annotations

import dataclasses
import functools
import typing
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar, Iterator

from gridplan.common.jsonable import plain


class Record(Mapping):
    """A dataclass readable as a read-only mapping of its JSON keys."""

    #: JSON key -> attribute, where the key is no valid name ("from").
    _renamed: ClassVar[dict[str, str]] = {}

    @classmethod
    def json_keys(cls) -> list[str]:
        back = {attr: key for key, attr in cls._renamed.items()}
        return [back.get(f.name, f.name) for f in dataclasses.fields(cls)]

    def _attr(self, key: str) -> str:
        return self._renamed.get(key, key)

    def __getitem__(self, key: str) -> Any:
        if key not in self.json_keys():
            raise KeyError(key)
        return getattr(self, self._attr(key))

    def __iter__(self) -> Iterator[str]:
        return iter(self.json_keys())

    def __len__(self) -> int:
        return len(dataclasses.fields(self))

    def to_dict(self) -> dict:
        """The JSON-ready dict (nested records as dicts, numpy numbers as floats)."""
        return {key: _as_json(getattr(self, self._attr(key))) for key in self.json_keys()}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]):
        """Rebuild from a dict with exactly this record's keys (nested records too)."""
        keys = set(cls.json_keys())
        missing, unknown = keys - set(data), set(data) - keys
        if missing or unknown:
            raise ValueError(f"{cls.__name__}: missing keys {sorted(missing)}, "
                             f"unknown keys {sorted(unknown)}")
        hints = _type_hints(cls)
        values = {}
        for key in cls.json_keys():
            attr = cls._renamed.get(key, key)
            values[attr] = _from_json(hints[attr], data[key])
        return cls(**values)


@functools.cache
def _type_hints(cls: type) -> dict[str, Any]:
    """A record class's resolved field types, worked out once per class."""
    return typing.get_type_hints(cls)


def _as_json(value: Any) -> Any:
    if isinstance(value, Record):
        return value.to_dict()
    if isinstance(value, (list, tuple)):
        return [_as_json(v) for v in value]
    if isinstance(value, Mapping):
        return {k: _as_json(v) for k, v in value.items()}
    return plain(value)


def _from_json(hint: Any, value: Any) -> Any:
    """Turn nested dicts into the records the type hint names (Record, Record | None, list[Record])."""
    if value is None:
        return None
    options = typing.get_args(hint) if typing.get_origin(hint) in (typing.Union, _union_type()) \
        else (hint,)
    for option in options:
        if isinstance(option, type) and issubclass(option, Record) and isinstance(value, Mapping):
            return option.from_dict(value)
        if typing.get_origin(option) is list:
            (item,) = typing.get_args(option) or (Any,)
            if isinstance(item, type) and issubclass(item, Record):
                return [item.from_dict(v) for v in value]
    return value


def _union_type():
    import types
    return types.UnionType


# --- advice -----------------------------------------------------------------------------------

@dataclass(frozen=True)
class Place(Record):
    """A state on the way to the target: model, setting, size and its error with interval."""

    model: str
    capacity: str
    regularization: str
    size: int
    predicted_error: float
    interval: list[float]
    error_at_confidence: float     # the interval's upper edge: what the target is checked with
    measured: bool


@dataclass(frozen=True)
class OperatingPoint(Record):
    """Where the user stands: model, setting, largest measured size and its measured interval."""

    model: str
    capacity: str
    regularization: str
    size: int
    capacity_index: int
    regularization_index: int
    chosen: str                    # "given" or "best measured"
    interval: list[float]


@dataclass(frozen=True)
class PlanStep(Record):
    """One action of the plan, with its cost, the running total and the state it reaches."""

    _renamed: ClassVar[dict[str, str]] = {"from": "from_"}
    action: str
    cost: float
    cumulative_cost: float
    predicted_error: float
    worse_on_the_way: bool
    from_: Place
    to: Place


@dataclass(frozen=True)
class Move(Record):
    """A possible first move, ranked by the cheapest whole plan that starts with it."""

    action: str
    to: Place | None               # None: the move is not possible (reason says why)
    step_cost: float | None
    predicted_error: float | None
    interval: list[float] | None
    plan_cost: float | None
    reachable: bool
    reason: str
    then: list[str]


@dataclass(frozen=True)
class ModelOffer(Record):
    """What one model of the run offers at its best measured setting."""

    name: str
    family: str | None
    capacity_param: str
    regularization_param: str
    best_setting: str
    validation_error: float
    plateau: float | None
    plateau_band: list[float] | None
    plateau_setting: str | None
    reachable: bool
    plan_cost: float | None
    binding_limit: str | None


@dataclass(frozen=True)
class Advice(Record):
    """The advisor's answer for a run (`gridplan advise --json` is its `to_dict()`)."""

    headline: str
    run_dir: str
    metric: str | None
    target: float
    confidence: float
    operating_point: OperatingPoint
    verdict: str
    verdict_reason: str
    diagnosis: dict                # gridplan.deciding.diagnosis.SettingDiagnosis.as_dict()
    thresholds: dict
    noise_floor: float | None      # the data's floor; None when the run gives no evidence
    noise_floor_band: list[float] | None
    noise_floor_setting: str | None
    noise_floor_model: str | None
    noise_floor_at_capacity_edge: bool
    noise_floor_evidence: str | None
    plateau: float | None          # the lowest plateau: an upper bound on the floor
    plateau_band: list[float] | None
    plateau_setting: str | None
    plateau_model: str | None
    calibration: dict | None       # gridplan.deciding.calibration.Calibration.as_dict()
    reachable: bool
    binding_limit: str | None
    binding_detail: str | None
    label_next_rows: int | None
    plan_cost: float | None
    plan: list[PlanStep]
    actions: list[Move]
    costs: dict
    settings: list[dict]
    skipped: dict
    horizon_size: int              # CHECKED_HORIZON x the largest measured size
    plan_end_check_error: float | None   # own check of the plan's last setting, if forecast
    models: list[ModelOffer] = field(default_factory=list)


# --- curves and backtests ---------------------------------------------------------------------

@dataclass(frozen=True)
class SettingCurve(Record):
    """One setting's fitted learning curve: plateau, forecasts and rows needed."""

    capacity: str
    regularization: str
    capacity_index: int
    regularization_index: int
    family: str
    formula: str
    params: dict
    holdout_errors: dict
    asymptote: float
    asymptote_low: float
    asymptote_high: float
    largest_size: int
    error_at_largest: float
    reference_size: int
    predicted_2x: float
    predicted_2x_low: float
    predicted_2x_high: float
    predicted_4x: float
    predicted_4x_low: float
    predicted_4x_high: float
    band_too_wide: bool
    samples_needed: int | None
    samples_needed_low: int | None
    samples_needed_high: int | None
    samples_needed_point: int | None
    reachable: bool | None
    reason: str
    midpoint_check: dict
    skipped_rows: int
    horizon_size: int              # forecasts past it are beyond anything checked
    plateau_at_floor: bool         # the plateau sits on the shared floor's lower edge: not its own
    own_check_error: float | None  # its refits on smaller sizes vs its larger ones, median |rel|


@dataclass(frozen=True)
class CurvesSummary(Record):
    """Every setting's curve of one model (`gridplan curves --json`)."""

    target: float | None
    confidence: float
    wide_band_ratio: float
    settings: list[SettingCurve]
    unfitted: list[dict]
    calibration: dict | None
    metric: str | None = None
    model: str | None = None


@dataclass(frozen=True)
class BacktestRow(Record):
    """One setting's forecast at the full size against its measurement."""

    model: str
    capacity: str
    regularization: str
    capacity_index: int
    regularization_index: int
    family: str
    largest_fitted_size: int
    full_size: int
    predicted: float
    low: float
    high: float
    measured: float
    abs_error: float
    rel_error: float | None
    inside_band: bool
    own_check_error: float | None = None   # the fit's own check on its smaller sizes


@dataclass(frozen=True)
class Backtest(Record):
    """Curves fitted on small sizes, checked at the full size (`gridplan backtest --json`)."""

    run_dir: str
    fraction: float
    confidence: float
    metric: str
    fitted_sizes: list[int]
    full_size: int
    rows: list[BacktestRow]
    median_abs_rel_error: float | None
    coverage: float
    unfitted: list[dict]
    calibration: dict | None       # the first model's (the only one for a single [model])
    models: list[str] = field(default_factory=list)
    calibrations: dict = field(default_factory=dict)    # model name -> its calibration
