"""Read a TOML config file into a validated, immutable `Config`.

Every problem becomes a `GridplanError` naming the file, the key and the value.
Data-dependent checks (sizes against the training fold, columns) live in
`gridplan.measuring.data` and `gridplan.measuring.spec`.
"""

from __future__ import annotations

import difflib
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from gridplan.common.checks import check_confidence, check_metric, check_regular_file, check_target
from gridplan.common.errors import InputError

FAMILIES = ("poly-ridge", "tree")
TASKS = ("regression", "classification")

# section -> {key: description}; the description is only for messages and docs.
SCHEMA: dict[str, dict[str, str]] = {
    "data": {"path": "str", "target": "str", "task": "str", "features": "list",
             "missing": "str", "weights": "str"},
    "model": {"name": "str", "family": "str", "estimator": "str", "params": "table",
              "capacity": "table", "regularization": "table"},
    "sizes": {"values": "list", "count": "int", "smallest": "int"},
    "resampling": {"folds": "int", "repeats": "int", "seed": "int", "groups": "str",
                   "time": "str"},
    "goal": {"metric": "str", "target": "number", "confidence": "number"},
    "costs": {"per_sample": "number", "capacity_step": "number",
              "regularization_step": "number", "max_samples": "int",
              "feature_groups": "table", "per_fit_second": "number",
              "switch_model": "number"},
    "diagnosis": {"floor_margin": "number", "min_share": "number", "alpha": "number",
                  "flat_fraction": "number"},
    "run": {"jobs": "int", "scheduler": "str", "fit_time_limit": "number",
            "name": "str", "fast_path": "bool", "max_fits": "int"},
}
REQUIRED_SECTIONS = ("data", "model")
AXIS_KEYS = ("param", "values", "features", "more")
#: Parameters whose smaller values mean more of the axis: more regularisation
#: (C, the tree limits, learning rates, ...) or, on the capacity axis, more
#: capacity (penalties, leaf minimums, neighbour counts). Any other parameter
#: means more with larger values; an axis's `more` key overrides both.
SMALLER_MEANS_MORE = {
    "capacity": frozenset({"alpha", "ccp_alpha", "l2_regularization", "min_impurity_decrease",
                           "min_samples_leaf", "min_samples_split", "min_weight_fraction_leaf",
                           "n_neighbors"}),
    "regularization": frozenset({"C", "gamma", "learning_rate", "max_depth", "max_features",
                                 "max_iter", "max_leaf_nodes", "max_samples", "subsample"}),
}

#: Bounds on a grid, checked before any work. Past them a run outgrows what its
#: store holds and its curves can be estimated for in reasonable time; fits
#: may be raised with `[run] max_fits`, the others are hard limits.
DEFAULT_MAX_FITS = 2_000_000
MAX_AXIS_VALUES = 1_000
MAX_SETTINGS = 20_000
MAX_SIZES = 100
MAX_JOBS = 1_024
MAX_FIT_SECONDS = 1e6
#: Model tables one run may compare ([[model]]); each is a grid of its own.
MAX_MODELS = 8
#: Model names: short, and safe in file names, options and "NAME:CAPACITY,REG".
MODEL_NAME_CHARS = frozenset("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789-_.")
MAX_MODEL_NAME = 40
SEED_RANGE = (0, 2 ** 32 - 1)

DEFAULT_CAPACITY_PARAM = {"poly-ridge": "degree", "tree": "max_depth"}
DEFAULT_REGULARIZATION_PARAM = {"poly-ridge": "alpha", "tree": "min_samples_leaf"}
DEFAULT_METRIC = {"regression": "mse", "classification": "error_rate"}


@dataclass(frozen=True)
class Axis:
    """One model axis: a parameter name and its values, or feature sets.

    Values run from least to most capacity (or regularisation): ascending when
    larger values mean more (`more == "larger"`), descending otherwise.
    """

    param: str | None
    values: tuple[Any, ...]
    feature_sets: tuple[tuple[str, ...], ...] | None = None
    more: str = "larger"

    @property
    def labels(self) -> tuple[str, ...]:
        """Short text labels, one per value."""
        if self.feature_sets is not None:
            return feature_set_labels(self.feature_sets)
        return tuple(value_label(v) for v in self.values)

    def __len__(self) -> int:
        return len(self.values)


@dataclass(frozen=True)
class Costs:
    """The user's own costs; all optional, in the user's currency."""

    per_sample: float = 1.0
    capacity_step: float = 100.0
    regularization_step: float = 1.0
    max_samples: int | None = None
    feature_groups: dict[str, float] = field(default_factory=dict)
    per_fit_second: float = 0.0
    switch_model: float = 100.0


@dataclass(frozen=True)
class ModelConfig:
    """One model table: a name and its own family or estimator, parameters and axes."""

    name: str
    family: str | None
    estimator: str | None
    params: dict[str, Any]
    capacity: Axis
    regularization: Axis


@dataclass(frozen=True)
class Config:
    """A validated config file."""

    source: Path
    text: str
    data_path: Path
    target: str
    task: str
    features: tuple[str, ...] | None
    missing: str
    family: str | None
    estimator: str | None
    params: dict[str, Any]
    capacity: Axis
    regularization: Axis
    size_values: tuple[int, ...] | None
    size_count: int
    smallest_size: int | None
    folds: int
    repeats: int
    seed: int
    metric: str
    target_error: float | None
    confidence: float
    costs: Costs
    jobs: int
    scheduler: str | None
    fit_time_limit: float | None
    name: str
    fast_path: bool = True
    thresholds: dict[str, float] = field(default_factory=dict)
    max_fits: int = DEFAULT_MAX_FITS
    #: Columns that set the resampling: rows of one group never split across
    #: training and validation; or forward-in-time splits by this column.
    groups_column: str | None = None
    time_column: str | None = None
    #: A column of per-row weights, passed to every fit and to the errors.
    weights_column: str | None = None
    #: Every model table, in config order; the fields family ... regularization
    #: above are the first one's (a single [model] table has one entry).
    models: tuple[ModelConfig, ...] = ()

    @property
    def model_name(self) -> str:
        """The family name or the estimator's import path."""
        return self.family or self.estimator or "?"

    @property
    def model_names(self) -> tuple[str, ...]:
        return tuple(m.name for m in self.models)

    def for_model(self, index: int) -> "Config":
        """This config with one model table only: the one at `index`."""
        import dataclasses
        m = self.models[index]
        return dataclasses.replace(self, family=m.family, estimator=m.estimator,
                                   params=dict(m.params), capacity=m.capacity,
                                   regularization=m.regularization, models=(m,))


def value_label(value: Any) -> str:
    """Compact text for an axis value: 3, 0.001, 1e-06, none."""
    if value is None:
        return "none"
    if isinstance(value, float):
        return f"{value:g}"
    return str(value)


def feature_set_labels(sets: tuple[tuple[str, ...], ...]) -> tuple[str, ...]:
    """Label nested feature sets by the group each one adds: 'a,b', '+c', '+d,e'."""
    labels = []
    previous: tuple[str, ...] = ()
    for current in sets:
        added = [c for c in current if c not in previous]
        prefix = "" if not previous else "+"
        labels.append(prefix + ",".join(added))
        previous = current
    return tuple(labels)


def _where(path: Path, section: str, key: str | None = None) -> str:
    return f"{path.name}: [{section}] {key}" if key else f"{path.name}: [{section}]"


def _suggest(word: str, options: list[str]) -> str:
    close = difflib.get_close_matches(word, options, n=1, cutoff=0.6)
    return f" (did you mean {close[0]!r}?)" if close else ""


def _check_keys(path: Path, raw: dict[str, Any]) -> None:
    for section, body in raw.items():
        if section not in SCHEMA:
            raise InputError(
                f"{path.name}: unknown section [{section}]"
                f"{_suggest(section, list(SCHEMA))}; known sections are "
                f"{', '.join(SCHEMA)}.")
        if section == "model" and isinstance(body, list):
            if not body or not all(isinstance(b, dict) for b in body):
                raise InputError(f"{path.name}: model must be one [model] table or several "
                                 f"[[model]] tables.")
            if len(body) > MAX_MODELS:
                raise InputError(f"{path.name}: {len(body)} [[model]] tables, more than the "
                                 f"{MAX_MODELS} one run may compare.")
            bodies = body
        elif not isinstance(body, dict):
            raise InputError(f"{path.name}: {section} must be a table like [{section}].")
        else:
            bodies = [body]
        for number, one in enumerate(bodies, start=1):
            label = section if len(bodies) == 1 else f"{section} {number}"
            for key in one:
                if key not in SCHEMA[section]:
                    raise InputError(
                        f"{_where(path, label)} has unknown key {key!r}"
                        f"{_suggest(key, list(SCHEMA[section]))}.")
    for section in REQUIRED_SECTIONS:
        if section not in raw:
            raise InputError(f"{path.name}: the [{section}] section is missing.")


class _Reader:
    """Typed access to one section, raising one-sentence errors."""

    def __init__(self, path: Path, section: str, body: dict[str, Any]):
        self.path, self.section, self.body = path, section, body

    def where(self, key: str) -> str:
        return _where(self.path, self.section, key)

    def get(self, key: str, kind: str, default: Any = None, required: bool = False) -> Any:
        if key not in self.body:
            if required:
                raise InputError(f"{self.where(key)} is missing.")
            return default
        value = self.body[key]
        if kind == "str" and not isinstance(value, str):
            raise InputError(f"{self.where(key)} must be text, got {value!r}.")
        if kind == "int" and (isinstance(value, bool) or not isinstance(value, int)):
            raise InputError(f"{self.where(key)} must be a whole number, got {value!r}.")
        if kind == "number":
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise InputError(f"{self.where(key)} must be a number, got {value!r}.")
            if not math.isfinite(value):
                raise InputError(f"{self.where(key)} must be finite, got {value!r}.")
            value = float(value)
        if kind == "list" and not isinstance(value, list):
            raise InputError(f"{self.where(key)} must be a list, got {value!r}.")
        if kind == "bool" and not isinstance(value, bool):
            raise InputError(f"{self.where(key)} must be true or false, got {value!r}.")
        if kind == "table" and not isinstance(value, dict):
            raise InputError(f"{self.where(key)} must be a table, got {value!r}.")
        return value


def _check_ascending(where: str, values: list[Any]) -> None:
    if not values:
        raise InputError(f"{where} is empty; give at least one value.")
    if len(set(map(repr, values))) != len(values):
        raise InputError(f"{where} has duplicated values: {values!r}.")
    if any(values[i] >= values[i + 1] for i in range(len(values) - 1)):
        raise InputError(f"{where} must be sorted ascending, got {values!r}.")


def _read_axis(reader: _Reader, key: str, default_param: str | None,
               required: bool) -> Axis:
    where = reader.where(key)
    table = reader.get(key, "table", required=required)
    if table is None:
        return Axis(param=None, values=(None,))
    for k in table:
        if k not in AXIS_KEYS:
            raise InputError(f"{where} has unknown key {k!r}{_suggest(k, list(AXIS_KEYS))}.")
    if "features" in table:
        if key != "capacity":
            raise InputError(f"{where}: feature sets belong on the capacity axis only.")
        if "values" in table:
            raise InputError(f"{where}: give either values or features, not both.")
        if "more" in table:
            raise InputError(f"{where}: feature sets are ordered by nesting; more does not apply.")
        return _read_feature_sets(where, table["features"])
    if "values" not in table:
        raise InputError(f"{where}.values is missing.")
    values = table["values"]
    if not isinstance(values, list):
        raise InputError(f"{where}.values must be a list, got {values!r}.")
    if len(values) > MAX_AXIS_VALUES:
        raise InputError(f"{where}.values holds {len(values):,} values, more than the "
                         f"{MAX_AXIS_VALUES:,} an axis may have; space them out (a few dozen "
                         f"on a log scale usually suffice).")
    for v in values:
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise InputError(f"{where}.values must hold finite numbers, got {v!r}.")
    _check_ascending(f"{where}.values", values)
    param = table.get("param", default_param)
    if not isinstance(param, str) or not param:
        raise InputError(f"{where}.param must name the estimator parameter, e.g. param = \"alpha\".")
    more = table.get("more", "smaller" if param in SMALLER_MEANS_MORE[key] else "larger")
    if more not in ("larger", "smaller"):
        raise InputError(f"{where}.more must be \"larger\" or \"smaller\" (which values mean "
                         f"more {key}), got {more!r}.")
    ordered = tuple(values) if more == "larger" else tuple(reversed(values))
    return Axis(param=param, values=ordered, more=more)


def _read_feature_sets(where: str, sets: Any) -> Axis:
    if isinstance(sets, list) and len(sets) > MAX_AXIS_VALUES:
        raise InputError(f"{where}.features holds {len(sets):,} sets, more than the "
                         f"{MAX_AXIS_VALUES:,} an axis may have.")
    if not isinstance(sets, list) or not sets or not all(
            isinstance(s, list) and s and all(isinstance(c, str) for c in s) for s in sets):
        raise InputError(
            f"{where}.features must be a list of non-empty lists of column names, "
            f"e.g. [[\"temp\"], [\"temp\", \"humidity\"]].")
    for i in range(1, len(sets)):
        if not set(sets[i - 1]) < set(sets[i]):
            raise InputError(
                f"{where}.features must be nested, each set adding columns to the one "
                f"before; set {i + 1} {sets[i]!r} does not extend {sets[i - 1]!r}.")
    for s in sets:
        if len(set(s)) != len(s):
            raise InputError(f"{where}.features repeats a column in {s!r}.")
    frozen = tuple(tuple(s) for s in sets)
    return Axis(param=None, values=tuple(range(1, len(sets) + 1)), feature_sets=frozen)


def load_config(path: str | Path) -> Config:
    """Read and validate a config file; paths inside are resolved relative to it."""
    path = Path(path)
    check_regular_file(path, "config file")
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"config file {str(path)!r} cannot be read: {exc}.") from None
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{path.name} is not valid TOML: {exc}.") from None
    return parse_config(raw, path.resolve(), text)


#: Other spellings accepted for keys: (section, alias) -> key.
KEY_ALIASES = {("model", "regularisation"): "regularization",
               ("costs", "regularisation_step"): "regularization_step"}


def _resolve_aliases(path: Path, raw: dict[str, Any]) -> dict[str, Any]:
    """The document with alias keys renamed; both spellings at once is refused."""
    out = dict(raw)
    for (section, alias), key in KEY_ALIASES.items():
        body = out.get(section)
        bodies = body if isinstance(body, list) else [body]
        renamed = []
        for one in bodies:
            if isinstance(one, dict) and alias in one:
                if key in one:
                    raise InputError(f"{path.name}: [{section}] has both {key} and {alias}; "
                                     f"keep one.")
                one = {key if k == alias else k: v for k, v in one.items()}
            renamed.append(one)
        if body is not None:
            out[section] = renamed if isinstance(body, list) else renamed[0]
    return out


def parse_config(raw: dict[str, Any], path: Path, text: str = "") -> Config:
    """Validate an already-parsed TOML document."""
    raw = _resolve_aliases(path, raw)
    _check_keys(path, raw)
    data = _Reader(path, "data", raw["data"])
    sizes = _Reader(path, "sizes", raw.get("sizes", {}))
    resampling = _Reader(path, "resampling", raw.get("resampling", {}))
    goal = _Reader(path, "goal", raw.get("goal", {}))
    costs = _Reader(path, "costs", raw.get("costs", {}))
    run = _Reader(path, "run", raw.get("run", {}))
    diagnosis = _Reader(path, "diagnosis", raw.get("diagnosis", {}))
    thresholds = {}
    for key in SCHEMA["diagnosis"]:
        value = diagnosis.get(key, "number")
        if value is None:
            continue
        if value < 0 or (key in ("alpha", "min_share") and not 0 < value <= 1) or \
                (key == "alpha" and value >= 1):
            raise InputError(f"{diagnosis.where(key)} is out of range, got {value:g}.")
        thresholds[key] = value

    data_path = data.get("path", "str", required=True)
    if "\0" in data_path:
        raise InputError(f"{data.where('path')} contains a NUL byte, got {data_path!r}.")
    resolved_data = (path.parent / data_path).resolve()
    target = data.get("target", "str", required=True)
    task = data.get("task", "str", default="regression")
    if task not in TASKS:
        raise InputError(f"{data.where('task')} must be one of {', '.join(TASKS)}, got {task!r}"
                         f"{_suggest(task, list(TASKS))}.")
    features = data.get("features", "list")
    if features is not None:
        if not features or not all(isinstance(c, str) for c in features):
            raise InputError(f"{data.where('features')} must be a non-empty list of column names.")
        if len(set(features)) != len(features):
            raise InputError(f"{data.where('features')} names a column twice.")
        if target in features:
            raise InputError(f"{data.where('features')} includes the target column {target!r}.")
        features = tuple(features)
    weights_column = data.get("weights", "str")
    if weights_column is not None and (weights_column == target or
                                       (features is not None and weights_column in features)):
        raise InputError(f"{data.where('weights')} {weights_column!r} is the target or a "
                         f"feature; weights need a column of their own.")
    missing = data.get("missing", "str", default="refuse")
    if missing not in ("refuse", "impute"):
        raise InputError(f"{data.where('missing')} must be \"refuse\" or \"impute\", got {missing!r}.")

    models = _read_models(path, raw["model"])
    first = models[0]
    family, estimator, params = first.family, first.estimator, first.params
    capacity, regularization = first.capacity, first.regularization

    size_values = sizes.get("values", "list")
    if size_values is not None:
        for v in size_values:
            if isinstance(v, bool) or not isinstance(v, int) or v <= 0:
                raise InputError(f"{sizes.where('values')} must hold positive whole numbers, got {v!r}.")
        if len(size_values) > MAX_SIZES:
            raise InputError(f"{sizes.where('values')} holds {len(size_values):,} sizes, more "
                             f"than the {MAX_SIZES} a learning curve may have.")
        _check_ascending(sizes.where("values"), size_values)
        size_values = tuple(size_values)
    size_count = sizes.get("count", "int", default=8)
    if not 1 <= size_count <= MAX_SIZES:
        raise InputError(f"{sizes.where('count')} must lie between 1 and {MAX_SIZES}, got "
                         f"{size_count:,}; a learning curve needs a handful of sizes, not more.")
    smallest = sizes.get("smallest", "int")
    if smallest is not None and smallest < 1:
        raise InputError(f"{sizes.where('smallest')} must be positive, got {smallest}.")

    folds = resampling.get("folds", "int", default=5)
    if folds < 2:
        raise InputError(f"{resampling.where('folds')} must be at least 2, got {folds}.")
    repeats = resampling.get("repeats", "int", default=1)
    if repeats < 1:
        raise InputError(f"{resampling.where('repeats')} must be at least 1, got {repeats}.")
    groups_column = resampling.get("groups", "str")
    time_column = resampling.get("time", "str")
    if groups_column is not None and time_column is not None:
        raise InputError(f"{resampling.where('groups')} and time cannot both be set; choose "
                         f"grouped or forward-in-time splits.")
    for key, column in (("groups", groups_column), ("time", time_column)):
        if column is not None and column == target:
            raise InputError(f"{resampling.where(key)} names the target column {target!r}.")
        if column is not None and features is not None and column in features:
            raise InputError(f"{resampling.where(key)} {column!r} is also listed in [data] "
                             f"features; a resampling column is not a feature.")
    if time_column is not None and repeats != 1:
        raise InputError(f"{resampling.where('repeats')} must be 1 with time = "
                         f"{time_column!r}: forward-in-time splits have one order only.")
    seed = resampling.get("seed", "int", default=0)
    if not SEED_RANGE[0] <= seed <= SEED_RANGE[1]:
        raise InputError(f"{resampling.where('seed')} must lie between {SEED_RANGE[0]} and "
                         f"{SEED_RANGE[1]:,} (2^32 - 1), got {seed:,}.")

    metric = check_metric(goal.get("metric", "str", default=DEFAULT_METRIC[task]), task,
                          goal.where("metric"))
    target_error = goal.get("target", "number")
    if target_error is not None:
        check_target(target_error, goal.where("target"))
    confidence = goal.get("confidence", "number", default=0.9)
    check_confidence(confidence, goal.where("confidence"))

    cost_values = {}
    for key in ("per_sample", "capacity_step", "regularization_step", "per_fit_second",
                "switch_model"):
        value = costs.get(key, "number")
        if value is not None:
            if value < 0:
                raise InputError(f"{costs.where(key)} must not be negative, got {value:g}.")
            cost_values[key] = value
    max_samples = costs.get("max_samples", "int")
    if max_samples is not None and max_samples < 1:
        raise InputError(f"{costs.where('max_samples')} must be positive, got {max_samples}.")
    groups = costs.get("feature_groups", "table", default={})
    for name, value in groups.items():
        if isinstance(value, bool) or not isinstance(value, (int, float)) or value < 0:
            raise InputError(f"{costs.where('feature_groups')}.{name} must be a non-negative "
                             f"number, got {value!r}.")
    cost_obj = Costs(**cost_values, max_samples=max_samples,
                     feature_groups={k: float(v) for k, v in groups.items()})

    jobs = check_jobs(run.get("jobs", "int", default=-1), run.where("jobs"))
    scheduler = run.get("scheduler", "str")
    limit = run.get("fit_time_limit", "number")
    if limit is not None and not 0 < limit <= MAX_FIT_SECONDS:
        raise InputError(f"{run.where('fit_time_limit')} must be positive seconds up to "
                         f"{MAX_FIT_SECONDS:,.0f}, got {limit:g}.")
    name = check_run_name(run.get("name", "str", default=path.stem), run.where("name"))
    max_fits = run.get("max_fits", "int", default=DEFAULT_MAX_FITS)
    if max_fits < 1:
        raise InputError(f"{run.where('max_fits')} must be positive, got {max_fits:,}.")
    _check_grid_size(path, models, size_values, size_count, folds, repeats, max_fits)

    return Config(
        source=path, text=text, data_path=resolved_data, target=target, task=task,
        features=features, missing=missing, family=family, estimator=estimator,
        params=dict(params), capacity=capacity, regularization=regularization,
        size_values=size_values, size_count=size_count, smallest_size=smallest,
        folds=folds, repeats=repeats, seed=seed, metric=metric,
        target_error=target_error, confidence=confidence, costs=cost_obj, jobs=jobs,
        scheduler=scheduler, fit_time_limit=limit, name=name, max_fits=max_fits,
        fast_path=run.get("fast_path", "bool", default=True), thresholds=thresholds,
        models=models, groups_column=groups_column, time_column=time_column,
        weights_column=weights_column)


def _read_models(path: Path, raw: Any) -> tuple[ModelConfig, ...]:
    """One [model] table or several [[model]] tables, each checked; names unique."""
    bodies = raw if isinstance(raw, list) else [raw]
    several = len(bodies) > 1
    models = []
    for number, body in enumerate(bodies, start=1):
        section = "model" if not several else f"model {number}"
        models.append(_read_model(_Reader(path, section, body), several))
    names = [m.name for m in models]
    for name in names:
        if names.count(name) > 1:
            raise InputError(f"{path.name}: two [[model]] tables are named {name!r}; give "
                             f"each its own name.")
    return tuple(models)


def _read_model(model: "_Reader", several: bool) -> ModelConfig:
    """One model table: family or estimator, params, axes and name (required when several)."""
    family = model.get("family", "str")
    estimator = model.get("estimator", "str")
    if (family is None) == (estimator is None):
        raise InputError(f"{_where(model.path, model.section)} needs exactly one of family = "
                         f"\"poly-ridge\"|\"tree\" or estimator = \"sklearn....\".")
    if family is not None and family not in FAMILIES:
        raise InputError(f"{model.where('family')} must be one of {', '.join(FAMILIES)}, "
                         f"got {family!r}{_suggest(family, list(FAMILIES))}.")
    params = model.get("params", "table", default={})
    capacity = _read_axis(model, "capacity", DEFAULT_CAPACITY_PARAM.get(family or ""),
                          required=True)
    regularization = _read_axis(model, "regularization",
                                DEFAULT_REGULARIZATION_PARAM.get(family or ""), required=False)
    for axis_name, axis in (("capacity", capacity), ("regularization", regularization)):
        if axis.param and axis.param in params:
            raise InputError(f"{model.where('params')} sets {axis.param!r}, which the "
                             f"{axis_name} axis already varies.")
    if family is not None and capacity.param is not None and capacity.feature_sets is None:
        _check_family_axis(model.where("capacity"), family, capacity)
    if family is not None and regularization.param is not None:
        _check_family_axis(model.where("regularization"), family, regularization)
    name = model.get("name", "str", required=several)
    if name is None:
        name = family or estimator.rsplit(".", 1)[-1]
    elif not name or len(name) > MAX_MODEL_NAME or not set(name) <= MODEL_NAME_CHARS:
        raise InputError(f"{model.where('name')} must be 1 to {MAX_MODEL_NAME} letters, digits, "
                         f"'-', '_' or '.', got {name!r}.")
    return ModelConfig(name=name, family=family, estimator=estimator, params=dict(params),
                       capacity=capacity, regularization=regularization)


def check_jobs(jobs: int, where: str) -> int:
    """A worker count: -1 (all cores) or 1 .. MAX_JOBS."""
    if jobs == 0 or abs(jobs) > MAX_JOBS:
        raise InputError(f"{where} must be -1 (all cores) or a count from 1 to {MAX_JOBS:,}, "
                         f"got {jobs:,}.")
    return jobs


def check_run_name(name: str, where: str) -> str:
    """A run name must be a plain, printable folder name."""
    if not name or "/" in name or "\\" in name or name in (".", ".."):
        raise InputError(f"{where} must be a plain folder name, got {name!r}.")
    if not name.isprintable():
        bad = next(ch for ch in name if not ch.isprintable())
        raise InputError(f"{where} must hold printable characters only; {name!r} contains "
                         f"U+{ord(bad):04X}.")
    return name


def _check_grid_size(path: Path, models: tuple[ModelConfig, ...],
                     size_values: tuple[int, ...] | None, size_count: int, folds: int,
                     repeats: int, max_fits: int) -> None:
    """Refuse, before any work, a grid with more settings or fits than a run can hold."""
    for m in models:
        count = len(m.capacity) * len(m.regularization)
        if count > MAX_SETTINGS:
            where = "[model]" if len(models) == 1 else f"[[model]] {m.name!r}"
            raise InputError(f"{path.name}: {where} the grid has {count:,} settings "
                             f"({len(m.capacity):,} capacity x {len(m.regularization):,} "
                             f"regularization values), more than the {MAX_SETTINGS:,} whose "
                             f"curves gridplan can estimate; use fewer values on an axis.")
    settings = sum(len(m.capacity) * len(m.regularization) for m in models)
    n_sizes = len(size_values) if size_values is not None else size_count
    fits = settings * n_sizes * folds * repeats
    if fits > max_fits:
        raise InputError(f"{path.name}: the grid asks for {fits:,} fits ({settings:,} "
                         f"settings x {n_sizes} sizes x {folds:,} folds x {repeats:,} repeats), "
                         f"above the limit of {max_fits:,}; shrink an axis, the sizes, folds "
                         f"or repeats, or raise [run] max_fits if you mean it.")


def _check_family_axis(where: str, family: str, axis: Axis) -> None:
    """Built-in families know which parameters they have and what values fit."""
    known = {"poly-ridge": {"degree", "alpha"},
             "tree": {"max_depth", "min_samples_leaf", "min_samples_split", "ccp_alpha",
                      "max_leaf_nodes"}}[family]
    if axis.param not in known:
        raise InputError(f"{where}.param {axis.param!r} is not a parameter of the {family} "
                         f"family{_suggest(axis.param, sorted(known))}; it has "
                         f"{', '.join(sorted(known))}.")
    integer_params = {"degree", "max_depth", "min_samples_leaf", "min_samples_split",
                      "max_leaf_nodes"}
    for v in axis.values:
        if axis.param in integer_params and (not isinstance(v, int) or v < 1):
            raise InputError(f"{where}.values for {axis.param!r} must be positive whole "
                             f"numbers, got {v!r}.")
        if axis.param in ("alpha", "ccp_alpha") and v < 0:
            raise InputError(f"{where}.values for {axis.param!r} must not be negative, got {v!r}.")
