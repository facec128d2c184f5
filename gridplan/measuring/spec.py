"""Resolve a config against its data into the exact grid a run measures."""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from typing import Any

from gridplan.common.errors import InputError
from gridplan.measuring.config import Config
from gridplan.measuring.data import Dataset, load_dataset
from gridplan.measuring.families import ModelPlan, check_polynomial_memory, check_takes_weights, plan_model
from gridplan.measuring.splits import Fold, make_folds, size_ladder, smallest_training_fold


@dataclass(frozen=True)
class GridSpec:
    """A config resolved against its data: model plan, folds and training sizes."""

    config: Config
    dataset: Dataset
    plan: ModelPlan
    folds: tuple[Fold, ...]
    sizes: tuple[int, ...]

    @property
    def model_label(self) -> str:
        """The model table's name (the family or estimator when unnamed)."""
        return self.config.models[0].name if self.config.models else self.config.model_name

    @property
    def n_settings(self) -> int:
        return len(self.plan.capacity_values) * len(self.plan.regularization_values)

    @property
    def n_cells(self) -> int:
        return self.n_settings * len(self.sizes)

    @property
    def n_fits(self) -> int:
        return self.n_cells * len(self.folds)

    def measuring_identity(self) -> dict[str, Any]:
        """Everything that changes the measured numbers; a resumed run must match it."""
        c = self.config
        return {
            "data": {"sha256": self.dataset.fingerprint, "target": c.target, "task": c.task,
                     "features": list(self.dataset.numeric + self.dataset.categorical),
                     "missing": c.missing,
                     **({"weights": c.weights_column} if c.weights_column else {})},
            "model": {"name": c.model_name, "resolved_family": self.plan.family,
                      "params": _jsonable(c.params), "fast_path": c.fast_path,
                      "capacity": _axis_identity(c.capacity),
                      "regularization": _axis_identity(c.regularization)},
            "sizes": list(self.sizes),
            "resampling": {"folds": c.folds, "repeats": c.repeats, "seed": c.seed,
                           **({"groups": c.groups_column} if c.groups_column else {}),
                           **({"time": c.time_column} if c.time_column else {})},
            "metric": c.metric,
        }

    def fingerprint(self) -> str:
        """A short hash of the measuring identity."""
        blob = json.dumps(self.measuring_identity(), sort_keys=True).encode()
        return hashlib.sha256(blob).hexdigest()[:16]


def _axis_identity(axis: Any) -> dict[str, Any]:
    return {"param": axis.param, "values": _jsonable(list(axis.values)),
            "features": [list(s) for s in axis.feature_sets] if axis.feature_sets else None}


def _jsonable(value: Any) -> Any:
    return json.loads(json.dumps(value, default=str))


@dataclass(frozen=True)
class RunSpec:
    """Every model table of a config resolved against the same data, folds and sizes.

    `dataset`, `folds`, `sizes` and `plan` are the first model's
    (the folds and sizes are the same for all); counts add up over models.
    """

    config: Config                 # the whole config (every model table)
    models: tuple[GridSpec, ...]

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(m.model_label for m in self.models)

    @property
    def dataset(self) -> Dataset:
        return self.models[0].dataset

    @property
    def plan(self) -> ModelPlan:
        return self.models[0].plan

    @property
    def folds(self) -> tuple[Fold, ...]:
        return self.models[0].folds

    @property
    def sizes(self) -> tuple[int, ...]:
        return self.models[0].sizes

    @property
    def n_settings(self) -> int:
        return sum(m.n_settings for m in self.models)

    @property
    def n_cells(self) -> int:
        return sum(m.n_cells for m in self.models)

    @property
    def n_fits(self) -> int:
        return sum(m.n_fits for m in self.models)

    def measuring_identity(self) -> dict[str, Any]:
        """One model: as GridSpec's (so older run folders still resume); several: a list of models."""
        identity = self.models[0].measuring_identity()
        if len(self.models) > 1:
            identity["model"] = [dict(m.measuring_identity()["model"], label=m.model_label)
                                 for m in self.models]
        return identity

    def fingerprint(self) -> str:
        blob = json.dumps(self.measuring_identity(), sort_keys=True).encode()
        return hashlib.sha256(blob).hexdigest()[:16]


def resolve_run(config: Config, *, allow_any_import: bool = False) -> RunSpec:
    """Resolve every model table; all must see the same rows (same folds and sizes)."""
    specs = tuple(resolve(config.for_model(i), allow_any_import=allow_any_import)
                  for i in range(max(len(config.models), 1)))
    first = specs[0]
    for other in specs[1:]:
        if other.dataset.n_rows != first.dataset.n_rows or other.sizes != first.sizes:
            raise InputError(f"{config.source.name}: [[model]] {other.model_label!r} sees "
                             f"{other.dataset.n_rows:,} rows but {first.model_label!r} sees "
                             f"{first.dataset.n_rows:,}; models of one run must be measured "
                             f"on the same rows.")
    return RunSpec(config, specs)


def resolve(config: Config, *, allow_any_import: bool = False) -> GridSpec:
    """Load the data, check the model, build folds and the training-size ladder.

    With several model tables, the first one's grid (see `resolve_run` for all).
    """
    if len(config.models) > 1:
        config = config.for_model(0)
    dataset = load_dataset(config)
    plan = plan_model(config, dataset, allow_any_import=allow_any_import)
    classification = config.task == "classification"
    if dataset.n_rows < 2 * config.folds:
        raise InputError(f"{config.data_path.name} has {dataset.n_rows} rows, too few for "
                         f"{config.folds} folds (need at least {2 * config.folds}).")
    folds = make_folds(dataset.y, classification=classification, folds=config.folds,
                       repeats=config.repeats, seed=config.seed, groups=dataset.groups,
                       time=dataset.time)
    full = smallest_training_fold(folds)
    sizes = size_ladder(full, values=config.size_values, count=config.size_count,
                        smallest=config.smallest_size, where=f"{config.source.name}: [sizes]")
    if classification and sizes[0] < len(dataset.labels):
        raise InputError(f"{config.source.name}: [sizes] smallest training size {sizes[0]} is "
                         f"below the number of classes ({len(dataset.labels)}).")
    check_polynomial_memory(plan, dataset, sizes[-1], config.source.name)
    if dataset.weights is not None:
        check_takes_weights(plan, f"{config.source.name}: [data] weights")
    return GridSpec(config=config, dataset=dataset, plan=plan, folds=tuple(folds), sizes=sizes)


def identity_difference(old: dict[str, Any], new: dict[str, Any]) -> str:
    """Name the first part of the measuring identity that differs, for messages."""
    names = {"data": "the data (file contents, target, task or features)",
             "model": "the [model] section", "sizes": "the training sizes",
             "resampling": "the [resampling] section", "metric": "the metric"}
    for key, label in names.items():
        if old.get(key) != new.get(key):
            return label
    return "the config"
