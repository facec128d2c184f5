"""Model families: the plain scikit-learn pipeline for any grid setting.

Built in: `poly-ridge` (polynomial features -> scaling -> ridge; RidgeClassifier
for classification), `poly-logistic` (the same with logistic regression,
C = 1/alpha), `tree` (decision tree). Any scikit-learn estimator can be named by
import path; paths outside `sklearn.` need an explicit opt-in.
"""

from __future__ import annotations

import importlib
import inspect
import math
import os
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from gridplan.common.errors import InputError
from gridplan.measuring.config import Config, _suggest
from gridplan.measuring.data import Dataset

if TYPE_CHECKING:  # pragma: no cover - typing only
    from sklearn.compose import ColumnTransformer
    from sklearn.pipeline import Pipeline

# scikit-learn is imported inside the functions that build estimators: a run
# whose every cell has an exact shortcut (plain poly-ridge) never loads it.

POLY_FAMILIES = ("poly-ridge", "poly-logistic")


@dataclass(frozen=True)
class ModelPlan:
    """Everything needed to build the plain model for any setting of a grid."""

    family: str | None               # built-in family, or None for an estimator path
    estimator_cls: type | None       # the class named by an import path
    task: str
    params: dict[str, Any]
    capacity_param: str | None
    capacity_values: tuple[Any, ...]
    feature_sets: tuple[tuple[str, ...], ...] | None
    regularization_param: str | None
    regularization_values: tuple[Any, ...]
    numeric: tuple[str, ...]
    categorical: tuple[str, ...]
    impute: bool
    seed: int
    #: An estimator object to clone for every setting (from Python); None: built from the names.
    prototype: Any = None

    def columns(self, capacity_index: int) -> tuple[str, ...]:
        """Feature columns used at a capacity step (all, unless the axis is feature sets)."""
        if self.feature_sets is not None:
            return self.feature_sets[capacity_index]
        return self.numeric + self.categorical

    def setting_params(self, capacity_index: int, regularization_index: int) -> dict[str, Any]:
        """The estimator parameters of one grid setting (feature sets excluded)."""
        out = dict(self.params)
        if self.capacity_param is not None and self.feature_sets is None:
            out[self.capacity_param] = self.capacity_values[capacity_index]
        if self.regularization_param is not None:
            out[self.regularization_param] = self.regularization_values[regularization_index]
        return out


def resolve_family(config: Config) -> str | None:
    """The built-in family name; poly-ridge means poly-logistic when log loss is asked."""
    if config.family == "poly-ridge" and config.task == "classification" \
            and config.metric == "log_loss":
        return "poly-logistic"
    return config.family


def import_estimator(path: str, allow_any_import: bool) -> type:
    """Import an estimator class by dotted path, refusing non-scikit-learn code by default."""
    if not path.startswith("sklearn.") and not allow_any_import:
        raise InputError(f"estimator {path!r} is outside scikit-learn; gridplan runs only "
                         f"sklearn.* estimators unless you pass --allow-any-estimator.")
    module_name, _, attr = path.rpartition(".")
    if not module_name:
        raise InputError(f"estimator {path!r} must be a dotted import path such as "
                         f"\"sklearn.ensemble.RandomForestRegressor\".")
    try:
        module = importlib.import_module(module_name)
    except ImportError as exc:
        raise InputError(f"estimator module {module_name!r} cannot be imported: {exc}.") from None
    if not hasattr(module, attr):
        names = [n for n in dir(module) if not n.startswith("_")]
        raise InputError(f"module {module_name!r} has no estimator {attr!r}{_suggest(attr, names)}.")
    cls = getattr(module, attr)
    if not inspect.isclass(cls) or not hasattr(cls, "fit") or not hasattr(cls, "get_params"):
        raise InputError(f"{path!r} is not a scikit-learn estimator class.")
    return cls


def plan_model(config: Config, dataset: Dataset, *, allow_any_import: bool = False) -> ModelPlan:
    """Check the model section against the estimator and the data; return a ModelPlan."""
    family = resolve_family(config)
    cls = None
    if config.estimator is not None:
        cls = import_estimator(config.estimator, allow_any_import)
    plan = ModelPlan(
        family=family, estimator_cls=cls, task=config.task, params=dict(config.params),
        capacity_param=config.capacity.param, capacity_values=config.capacity.values,
        feature_sets=config.capacity.feature_sets,
        regularization_param=config.regularization.param,
        regularization_values=config.regularization.values,
        numeric=dataset.numeric, categorical=dataset.categorical,
        impute=config.missing == "impute", seed=config.seed)
    _check_parameters(config, plan)
    return plan


def check_takes_weights(plan: ModelPlan, where: str) -> None:
    """Refuse per-row weights for a model whose final estimator cannot take them."""
    from sklearn.utils.validation import has_fit_parameter
    final = plan.prototype if plan.prototype is not None else _final_estimator(plan)
    if hasattr(final, "steps"):
        final = final.steps[-1][1]
    if not has_fit_parameter(final, "sample_weight"):
        raise InputError(f"{where}: {type(final).__name__} does not take sample_weight in "
                         f"fit, so per-row weights cannot be used with it.")


def _final_estimator(plan: ModelPlan) -> Any:
    """The last pipeline step with default parameters (nothing from the config)."""
    from sklearn.linear_model import LogisticRegression, Ridge, RidgeClassifier
    from sklearn.tree import DecisionTreeClassifier, DecisionTreeRegressor
    if plan.estimator_cls is not None:
        return plan.estimator_cls()
    if plan.family == "poly-logistic":
        return LogisticRegression()
    if plan.family == "poly-ridge":
        return RidgeClassifier() if plan.task == "classification" else Ridge()
    return DecisionTreeClassifier() if plan.task == "classification" else DecisionTreeRegressor()


def _check_parameters(config: Config, plan: ModelPlan) -> None:
    """Every parameter the config sets must exist on the model; the task must fit it."""
    if _plain_poly_ridge(plan):
        return
    from sklearn.base import is_classifier, is_regressor
    name = config.source.name
    final = _final_estimator(plan)
    if plan.estimator_cls is not None:
        if config.task == "regression" and is_classifier(final):
            raise InputError(f"{name}: {config.estimator} is a classifier but the task is regression.")
        if config.task == "classification" and is_regressor(final):
            raise InputError(f"{name}: {config.estimator} is a regressor but the task is classification.")
    available = set(final.get_params(deep=False))
    if plan.family in POLY_FAMILIES:
        available |= {"degree", "alpha"}
    for label, param in (("capacity", plan.capacity_param if plan.feature_sets is None else None),
                         ("regularization", plan.regularization_param)):
        if param is not None and param not in available:
            raise InputError(f"{name}: [model] {label}.param {param!r} is not a parameter of "
                             f"{config.model_name}{_suggest(param, sorted(available))}.")
    for param in plan.params:
        if param not in available:
            raise InputError(f"{name}: [model] params sets {param!r}, which "
                             f"{config.model_name} does not have{_suggest(param, sorted(available))}.")
    # The library checks each parameter on its own, so every value of each
    # axis is checked once (beside the other axis's first value), not every pair.
    settings = ([(ci, 0) for ci in range(len(plan.capacity_values))]
                + [(0, ri) for ri in range(1, len(plan.regularization_values))])
    try:
        for ci, ri in settings:
            build_model(plan, ci, ri, check=True)
    except (TypeError, ValueError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InputError(f"{name}: [model] values are not accepted by {config.model_name}: "
                         f"{first}") from None


def _plain_poly_ridge(plan: ModelPlan) -> bool:
    """poly-ridge with nothing set but whole degrees from 1 and positive finite alphas.

    Its parameters are the family's own, and these values are ones its
    estimators accept, so there is nothing left for scikit-learn to check.
    """
    def whole(value: Any) -> bool:
        return isinstance(value, int) and not isinstance(value, bool) and value >= 1

    def positive(value: Any) -> bool:
        return (isinstance(value, (int, float)) and not isinstance(value, bool)
                and math.isfinite(value) and value > 0)

    return (plan.family == "poly-ridge" and plan.estimator_cls is None and plan.prototype is None
            and not plan.params and plan.feature_sets is None and plan.capacity_param == "degree"
            and plan.regularization_param in (None, "alpha")
            and all(whole(d) for d in plan.capacity_values)
            and all(positive(a) for a in plan.regularization_values))


#: Copies of the widest feature table one poly fit holds at once (the expanded
#: features, their scaled copy and the solver's workspace).
POLY_TABLE_COPIES = 3


def polynomial_width(plan: ModelPlan, dataset: Dataset) -> int:
    """Columns after polynomial expansion at the grid's largest degree (0 for other models)."""
    if plan.family not in POLY_FAMILIES:
        return 0
    degree = _largest_degree(plan)
    columns = plan.feature_sets[-1] if plan.feature_sets is not None else plan.columns(0)
    inputs = sum(int(dataset.X[c].nunique()) if c in plan.categorical else 1 for c in columns)
    return math.comb(inputs + degree, degree) - 1


def available_memory() -> int:
    """Bytes of memory this machine can still hand out (MemAvailable, else physical memory)."""
    try:
        with open("/proc/meminfo", encoding="ascii") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    try:
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        return 2 ** 63


def check_polynomial_memory(plan: ModelPlan, dataset: Dataset, rows: int, where: str) -> None:
    """Refuse a polynomial expansion whose tables for one fit of `rows` rows exceed memory."""
    width = polynomial_width(plan, dataset)
    needed = width * rows * 8 * POLY_TABLE_COPIES
    free = available_memory()
    if needed > free:
        raise InputError(
            f"{where}: degree {_largest_degree(plan)} on these columns makes {width:,} polynomial "
            f"features; one fit on {rows:,} rows would need about {_bytes(needed)}, more than the "
            f"{_bytes(free)} of memory available; lower the degree or use fewer columns.")


def _largest_degree(plan: ModelPlan) -> int:
    if plan.capacity_param == "degree":
        return max(int(d) for d in plan.capacity_values)
    return int(plan.params.get("degree", 1))


def _bytes(n: float) -> str:
    for unit in ("B", "KiB", "MiB", "GiB", "TiB", "PiB"):
        if n < 1024 or unit == "PiB":
            return f"{n:,.0f} {unit}" if unit == "B" else f"{n:,.1f} {unit}"
        n /= 1024
    return f"{n:.1f} PiB"


def needs_encoder(plan: ModelPlan) -> bool:
    """False when the features are all numeric, complete and all used: no encoding step.

    A user's estimator object encodes for itself: it gets the data as given.
    """
    if plan.prototype is not None:
        return False
    return bool(plan.categorical) or plan.impute or plan.feature_sets is not None


def make_encoder(plan: ModelPlan, capacity_index: int) -> ColumnTransformer | None:
    """One-hot for categoricals (fitted on the training part only), numeric passed through.

    None when no encoding is needed (all-numeric, complete data on every capacity step).
    """
    if not needs_encoder(plan):
        return None
    from sklearn.compose import ColumnTransformer
    from sklearn.impute import SimpleImputer
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import OneHotEncoder
    columns = plan.columns(capacity_index)
    numeric = [c for c in plan.numeric if c in columns]
    categorical = [c for c in plan.categorical if c in columns]
    numeric_step: Any = SimpleImputer(strategy="median") if plan.impute else "passthrough"
    one_hot = OneHotEncoder(handle_unknown="ignore", sparse_output=False)
    categorical_step: Any = (Pipeline([("fill", SimpleImputer(strategy="most_frequent")),
                                       ("one_hot", one_hot)]) if plan.impute else one_hot)
    parts = []
    if numeric:
        parts.append(("numeric", numeric_step, numeric))
    if categorical:
        parts.append(("categorical", categorical_step, categorical))
    return ColumnTransformer(parts, sparse_threshold=0.0, verbose_feature_names_out=False)


def _from_prototype(plan: ModelPlan, capacity_index: int, params: dict) -> Any:
    """The user's estimator, cloned and set for one setting; feature sets pick its columns first."""
    from sklearn.base import clone
    from sklearn.compose import ColumnTransformer
    from sklearn.pipeline import Pipeline
    model = clone(plan.prototype)
    if model.get_params(deep=False).get("random_state", 0) is None:
        params.setdefault("random_state", plan.seed)      # the run's seed, as for a config
    model.set_params(**params)
    if plan.feature_sets is None:
        return model
    columns = ColumnTransformer([("keep", "passthrough", list(plan.feature_sets[capacity_index]))],
                                remainder="drop", verbose_feature_names_out=False)
    return Pipeline([("columns", columns.set_output(transform="pandas")), ("fit", model)])


def build_model(plan: ModelPlan, capacity_index: int, regularization_index: int,
                *, check: bool = True) -> Pipeline:
    """The plain scikit-learn pipeline for one grid setting."""
    from sklearn.base import clone
    from sklearn.linear_model import LogisticRegression, Ridge, RidgeClassifier
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import PolynomialFeatures, StandardScaler
    from sklearn.tree import DecisionTreeClassifier, DecisionTreeRegressor
    params = plan.setting_params(capacity_index, regularization_index)
    if plan.prototype is not None:
        return _from_prototype(plan, capacity_index, params)
    encoder = make_encoder(plan, capacity_index)
    if plan.family in POLY_FAMILIES:
        degree = int(params.pop("degree", 1))
        alpha = params.pop("alpha", 1.0)
        if plan.family == "poly-logistic":
            last: Any = LogisticRegression(C=1.0 / alpha if alpha > 0 else 1e12,
                                           max_iter=params.pop("max_iter", 1000), **params)
        elif plan.task == "classification":
            last = RidgeClassifier(alpha=alpha, **params)
        else:
            last = Ridge(alpha=alpha, **params)
        steps = [("poly", PolynomialFeatures(degree=degree, include_bias=False)),
                 ("scale", StandardScaler()), ("fit", last)]
    elif plan.family == "tree":
        cls = DecisionTreeClassifier if plan.task == "classification" else DecisionTreeRegressor
        params.setdefault("random_state", plan.seed)
        steps = [("fit", cls(**params))]
    else:
        assert plan.estimator_cls is not None
        estimator = plan.estimator_cls()
        if "random_state" in estimator.get_params() and "random_state" not in params:
            params["random_state"] = plan.seed
        steps = [("fit", clone(estimator).set_params(**params))]
    if encoder is not None:
        steps.insert(0, ("encode", encoder))
    model = Pipeline(steps)
    if check:
        # parameter validation without fitting, where the estimator offers it
        final = model.steps[-1][1]
        validate = getattr(final, "_validate_params", None)
        if callable(validate) and hasattr(final, "_parameter_constraints"):
            validate()
    return model
