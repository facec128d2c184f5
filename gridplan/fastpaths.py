"""Exact shortcuts that evaluate a whole row of the grid from one fit.

Two model families have a shortcut that gives the same numbers as fitting every
cell separately, at a fraction of the cost:

poly-ridge
    The plain model is ``PolynomialFeatures(d) -> StandardScaler -> Ridge(alpha)``
    (``RidgeClassifier`` for classification). The polynomial features are built
    once at the largest degree; the degree-``d`` design is the first columns of
    that output. Per degree, the scaler is fitted on the slice, the design is
    centred as ``Ridge(fit_intercept=True)`` does, and one thin SVD gives the
    solution for every alpha: ``w(alpha) = V diag(s / (s^2 + alpha)) U^T y_c``.

    The plain pipeline solves the normal equations (``X^T X + alpha I``, or the
    ``n x n`` kernel system when there are at least as many features as rows)
    by Cholesky, whose rounding error grows like ``eps * kappa`` with
    ``kappa = (s_max^2 + alpha) / (s_min^2 + alpha)`` (``s_min = 0`` when the
    centred design has at least as many columns as rows). The SVD result is the
    more accurate of the two, but the contract is agreement with the plain fit,
    so a cell whose ``kappa`` exceeds ``KAPPA_MAX`` is fitted the plain way and
    reported with ``path="plain-fallback"``. Measured over 10,560 cells
    (uniform, normal, log-normal, badly scaled and one-hot inputs; 12 to 1600
    rows; degrees 1 to 10; alpha 1e-6 to 1e3; mse and mae) the relative
    difference between the two paths never exceeded ``7.6e-16 * kappa`` once
    ``kappa > 1e4`` (and 2e-14 below that); the worst cell with
    ``kappa <= 1e8`` differed by 1.1e-8, against 1.3e-6 for ``kappa`` up to
    1e10. For classification a cell also falls back when some row's decision
    lies so close to a tie (zero for two classes, the runner-up for more) that
    rounding in the plain fit could flip it.

tree
    One tree is grown to the largest depth; the tree of depth ``d`` is read off
    it by stopping each row's descent at depth ``d`` (inputs cast to float32
    and compared with ``<=`` against the stored thresholds, as the library
    does). The depth-first builder decides every node from its own rows alone,
    but it draws a random feature order at every node in build order, and a
    deeper tree draws more numbers before it reaches a given node. So the
    truncated tree equals the depth-``d`` fit exactly with one input; with
    several inputs the two agree down to the first node where two splits are
    exactly equally good. For a continuous regression target the ties we
    measured all split the training rows the same way (two inputs separating
    a small node identically), so training errors stay equal and only
    validation rows move; for classification, Gini gains computed from class counts
    also tie between different partitions, and below such a node the training
    errors can differ too. Either way the truncated tree is a tree the library
    builds under another feature order.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from gridplan.metrics import (
    CLASSIFICATION_METRICS,
    REGRESSION_METRICS,
    error_of,
    proba_for_labels,
)

#: Largest (s_max^2 + alpha) / (s_min^2 + alpha) at which the SVD path is used.
KAPPA_MAX = 1e8
#: A decision closer to a tie than TIE_GUARD * kappa * (largest |decision|, at
#: least 1) is treated as one that rounding in the plain fit could flip.
TIE_GUARD = 1e-14

TASKS = ("regression", "classification")
_TREE_REGULARIZATION = (None, "min_samples_leaf", "min_samples_split")
# Fixed tree settings the truncation check knows. Each node's fate must depend
# only on its own rows and the depth limit, so some are allowed only at their
# defaults: ccp_alpha=0 (pruning looks at whole subtrees), max_leaf_nodes=None
# (best-first growth), splitter="best" and max_features=None (random draws in
# build order). Settings not listed are refused rather than trusted.
_TREE_PARAMS_THAT_COMMUTE = frozenset({
    "criterion", "splitter", "min_samples_split", "min_samples_leaf",
    "min_weight_fraction_leaf", "min_impurity_decrease", "class_weight",
    "max_features", "ccp_alpha", "max_leaf_nodes",
})


@dataclass(frozen=True)
class FastCell:
    """Training and validation error of one grid cell, and how they were got."""

    train_error: float
    validation_error: float
    path: str        # "svd" | "plain-fallback" | "tree-truncation"
    note: str = ""   # e.g. why the fallback happened ("ill-conditioned: cond=3e+13")


def has_fast_path(family: str, regularization_param: str | None, task: str, metric: str) -> bool:
    """True when `family` with this regularisation axis, task and metric has an exact shortcut.

    poly-ridge: the regularisation axis must be alpha (or absent); any
    regression metric, and error_rate only for classification (RidgeClassifier
    gives no probabilities). tree: no regularisation axis, min_samples_leaf or
    min_samples_split; not ccp_alpha, because pruning does not commute with
    truncation.
    """
    if task == "regression":
        metric_ok = metric in REGRESSION_METRICS
    elif task == "classification":
        metric_ok = metric in CLASSIFICATION_METRICS
    else:
        return False
    if not metric_ok:
        return False
    if family == "poly-ridge":
        return regularization_param in (None, "alpha") and (
            task == "regression" or metric == "error_rate")
    if family == "tree":
        return regularization_param in _TREE_REGULARIZATION
    return False


def tree_params_commute(tree_params: dict | None) -> bool:
    """True when trees with these fixed settings can be truncated exactly."""
    return _tree_params_problem(tree_params or {}) is None


# ---------------------------------------------------------------- poly-ridge

def poly_ridge_grid(X_train: np.ndarray, y_train: np.ndarray, X_val: np.ndarray, y_val: np.ndarray,
                    degrees: Sequence[int], alphas: Sequence[float], *, task: str, metric: str,
                    labels: np.ndarray | None = None) -> list[list[FastCell]]:
    """Errors of the poly-ridge pipeline for every (degree, alpha); result[i][j] is degrees[i], alphas[j].

    Equal to fitting ``PolynomialFeatures(d, include_bias=False) -> StandardScaler
    -> Ridge(alpha)`` (``RidgeClassifier`` for classification) on the training
    rows to within 1e-6 relative; cells where that cannot be promised are
    fitted the plain way (path "plain-fallback", with the reason in note).
    """
    from sklearn.preprocessing import PolynomialFeatures

    X_train, X_val = _as_design(X_train, "X_train"), _as_design(X_val, "X_val")
    y_train, y_val = np.asarray(y_train).ravel(), np.asarray(y_val).ravel()
    _check_rows(X_train, y_train, X_val, y_val)
    _check_task_metric(task, metric)
    if task == "classification" and metric != "error_rate":
        raise ValueError(f"poly-ridge classification has no probabilities; metric {metric!r} "
                         "needs them (only error_rate is possible)")
    degrees = [_positive_int(d, "degree") for d in degrees]
    alphas = np.asarray(alphas, dtype=float).ravel()
    if alphas.size == 0 or not degrees:
        return [[] for _ in degrees]
    if not np.all(np.isfinite(alphas)) or np.any(alphas <= 0):
        raise ValueError("alphas must be positive and finite")

    targets, decide = _ridge_targets(y_train, task)
    poly = PolynomialFeatures(max(degrees), include_bias=False).fit(X_train)
    P_train, P_val = poly.transform(X_train), poly.transform(X_val)

    grid: list[list[FastCell]] = []
    for degree in degrees:
        # the column count depends only on the number of inputs
        width = PolynomialFeatures(degree, include_bias=False).fit(X_train[:1]).n_output_features_
        grid.append(_one_degree(P_train[:, :width], P_val[:, :width], targets, decide,
                                y_train, y_val, X_train, X_val, degree, alphas, task, metric, labels))
    return grid


def _one_degree(P_train, P_val, targets, decide, y_train, y_val, X_train, X_val,
                degree, alphas, task, metric, labels) -> list[FastCell]:
    """All alphas of one degree from one thin SVD of the centred, scaled design."""
    from sklearn.preprocessing import StandardScaler

    def fallback(alpha: float, why: str) -> FastCell:
        train_error, validation_error = _plain_poly_ridge(
            X_train, y_train, X_val, y_val, degree, alpha, task, metric, labels)
        return FastCell(train_error, validation_error, "plain-fallback", why)

    scaler = StandardScaler().fit(P_train)
    S_train, S_val = scaler.transform(P_train), scaler.transform(P_val)
    # Ridge(fit_intercept=True) centres X and y on their training means and
    # leaves the intercept unpenalised.
    x_mean, y_mean = S_train.mean(axis=0), targets.mean(axis=0)
    C_train, C_val = S_train - x_mean, S_val - x_mean
    try:
        s, Vt, projected = _thin_svd(C_train, targets - y_mean)
    except np.linalg.LinAlgError as exc:
        return [fallback(a, f"SVD failed: {exc}") for a in alphas]

    n_rows, n_cols = C_train.shape
    s_max2 = s[0] ** 2 if s.size else 0.0
    s_min2 = s[-1] ** 2 if (s.size and n_cols < n_rows) else 0.0
    kappas = (s_max2 + alphas) / (s_min2 + alphas)

    # Coefficients for every alpha at once: (features) x (alphas * targets).
    n_targets = targets.shape[1]
    shrink = s[:, None] / (s[:, None] ** 2 + alphas[None, :])          # (k, A)
    coefs = Vt.T @ (shrink[:, :, None] * projected[:, None, :]).reshape(s.size, -1)
    fit_train = (C_train @ coefs).reshape(n_rows, alphas.size, n_targets) + y_mean
    fit_val = (C_val @ coefs).reshape(C_val.shape[0], alphas.size, n_targets) + y_mean

    cells = []
    for j, alpha in enumerate(alphas):
        kappa = kappas[j]
        if not kappa <= KAPPA_MAX:
            cells.append(fallback(alpha, f"ill-conditioned: cond={kappa:.1e} > {KAPPA_MAX:.0e}"))
            continue
        if task == "classification":
            margin = min(_tie_margin(fit_train[:, j]), _tie_margin(fit_val[:, j]))
            scale = max(1.0, float(np.max(np.abs(fit_train[:, j]), initial=0.0)))
            if margin <= TIE_GUARD * kappa * scale:
                cells.append(fallback(alpha, f"near tie: decision margin {margin:.1e}"))
                continue
        cells.append(FastCell(
            error_of(metric, y_train, decide(fit_train[:, j]), labels),
            error_of(metric, y_val, decide(fit_val[:, j]), labels),
            "svd"))
    return cells


def _thin_svd(C: np.ndarray, Yc: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """s, Vt and U^T Yc of the thin SVD C = U diag(s) Vt.

    For a tall C this goes through R of the QR decomposition of [C | Yc]
    (C = Q R11, Q^T Yc = R12, R11 = Ur diag(s) Vt, so U = Q Ur and
    U^T Yc = Ur^T R12), which never forms the n x k matrix U; LAPACK's gesdd
    takes the same QR step internally but then builds U, and that is most of
    its cost here (about 2.6x at 1600 x 285).
    """
    n_rows, n_cols = C.shape
    if n_rows > n_cols:
        R = np.linalg.qr(np.hstack([C, Yc]), mode="r")
        Ur, s, Vt = np.linalg.svd(R[:n_cols, :n_cols], full_matrices=False)
        return s, Vt, Ur.T @ R[:n_cols, n_cols:]
    U, s, Vt = np.linalg.svd(C, full_matrices=False)
    return s, Vt, U.T @ Yc


def _ridge_targets(y_train: np.ndarray, task: str):
    """Regression targets as a column, or RidgeClassifier's +-1 columns, and the decision rule."""
    if task == "regression":
        return np.asarray(y_train, dtype=float).reshape(-1, 1), lambda fitted: fitted[:, 0]
    from sklearn.preprocessing import LabelBinarizer

    # As RidgeClassifier: LabelBinarizer(pos_label=1, neg_label=-1); one column
    # for two classes (decision > 0 -> classes_[1]), argmax for more.
    binarizer = LabelBinarizer(pos_label=1, neg_label=-1)
    targets = binarizer.fit_transform(y_train).astype(float)
    classes = binarizer.classes_

    def decide(fitted: np.ndarray) -> np.ndarray:
        if fitted.shape[1] == 1:
            return classes.take((fitted[:, 0] > 0).astype(np.intp))
        return classes.take(np.argmax(fitted, axis=1))

    return targets, decide


def _tie_margin(fitted: np.ndarray) -> float:
    """Smallest distance of any row's decision from a tie."""
    if fitted.shape[0] == 0:
        return np.inf
    if fitted.shape[1] == 1:
        return float(np.min(np.abs(fitted[:, 0])))
    top2 = np.partition(fitted, -2, axis=1)[:, -2:]
    return float(np.min(top2[:, 1] - top2[:, 0]))


def _plain_poly_ridge(X_train, y_train, X_val, y_val, degree, alpha, task, metric, labels):
    """The reference pipeline fitted for one cell: (training error, validation error)."""
    from sklearn.linear_model import Ridge, RidgeClassifier
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import PolynomialFeatures, StandardScaler

    last = Ridge(alpha=alpha) if task == "regression" else RidgeClassifier(alpha=alpha)
    model = Pipeline([("poly", PolynomialFeatures(degree, include_bias=False)),
                      ("scale", StandardScaler()), ("ridge", last)]).fit(X_train, y_train)
    return (error_of(metric, y_train, model.predict(X_train), labels),
            error_of(metric, y_val, model.predict(X_val), labels))


# ---------------------------------------------------------------------- tree

def tree_depth_grid(X_train, y_train, X_val, y_val, depths: Sequence[int], *, task: str, metric: str,
                    labels: np.ndarray | None = None, tree_params: dict | None = None,
                    random_state: int = 0) -> list[FastCell]:
    """Errors of the decision tree at every depth from one tree grown to max(depths); result[i] is depths[i].

    The tree is ``DecisionTreeRegressor`` / ``DecisionTreeClassifier(max_depth,
    random_state, **tree_params)``. Depths are positive ints in any order.
    """
    from sklearn.tree import DecisionTreeClassifier, DecisionTreeRegressor

    X_train, X_val = _as_design(X_train, "X_train", allow_nan=True), _as_design(X_val, "X_val", allow_nan=True)
    y_train, y_val = np.asarray(y_train).ravel(), np.asarray(y_val).ravel()
    _check_rows(X_train, y_train, X_val, y_val)
    _check_task_metric(task, metric)
    depths = [_positive_int(d, "depth") for d in depths]
    if not depths:
        return []
    params = dict(tree_params or {})
    problem = _tree_params_problem(params)
    if problem:
        raise ValueError(problem)
    if metric == "log_loss" and labels is None:
        labels = np.unique(np.concatenate([y_train, y_val]))

    Tree = DecisionTreeRegressor if task == "regression" else DecisionTreeClassifier
    model = Tree(max_depth=max(depths), random_state=random_state, **params).fit(X_train, y_train)
    tree = model.tree_
    wanted = sorted(set(depths))
    # The library compares float32 inputs against float64 thresholds.
    train_nodes = _nodes_at_depths(tree, X_train.astype(np.float32), wanted)
    val_nodes = _nodes_at_depths(tree, X_val.astype(np.float32), wanted)
    if task == "classification":
        proba = tree.value[:, 0, :model.n_classes_]
        total = proba.sum(axis=1, keepdims=True)
        if not np.allclose(total, 1.0):  # scikit-learn < 1.4 stored weighted counts
            proba = proba / np.where(total == 0.0, 1.0, total)

    def errors(nodes: np.ndarray, y: np.ndarray) -> float:
        if task == "regression":
            return error_of(metric, y, tree.value[nodes, 0, 0], labels)
        if metric == "log_loss":
            return error_of(metric, y, proba_for_labels(_Fixed(model.classes_, proba[nodes]), None, labels), labels)
        return error_of(metric, y, model.classes_.take(np.argmax(proba[nodes], axis=1)), labels)

    by_depth = {d: FastCell(errors(train_nodes[d], y_train), errors(val_nodes[d], y_val), "tree-truncation")
                for d in wanted}
    return [by_depth[d] for d in depths]


def _nodes_at_depths(tree, X32: np.ndarray, depths: Sequence[int]) -> dict[int, np.ndarray]:
    """Node each row reaches when its descent stops at each depth (or at a leaf above it)."""
    from sklearn.tree._tree import TREE_LEAF

    left, right = tree.children_left, tree.children_right
    feature, threshold = tree.feature, tree.threshold
    nan_left = np.asarray(tree.missing_go_to_left, dtype=bool)
    node = np.zeros(X32.shape[0], dtype=np.intp)
    reached = {0: node.copy()} if 0 in depths else {}
    for level in range(1, max(depths) + 1):
        moving = np.flatnonzero(left[node] != TREE_LEAF)
        if moving.size:
            at = node[moving]
            x = X32[moving, feature[at]]
            go_left = np.where(np.isnan(x), nan_left[at], x <= threshold[at])
            node[moving] = np.where(go_left, left[at], right[at])
        if level in depths:
            reached[level] = node.copy()
    return reached


class _Fixed:
    """Stands in for a fitted classifier whose probabilities are already known."""

    def __init__(self, classes: np.ndarray, proba: np.ndarray):
        self.classes_, self._proba = classes, proba

    def predict_proba(self, X) -> np.ndarray:
        return self._proba


def _tree_params_problem(params: dict) -> str | None:
    """Why these fixed tree settings break truncation, or None when they do not."""
    for key in ("max_depth", "random_state"):
        if key in params:
            return f"{key} is set by the grid, not by tree_params"
    unknown = sorted(set(params) - _TREE_PARAMS_THAT_COMMUTE)
    if unknown:
        return f"tree settings {unknown} are not known to commute with depth truncation"
    if params.get("splitter", "best") != "best":
        return "a random splitter draws thresholds in build order, so truncation is not exact"
    max_features = params.get("max_features")
    if not (max_features is None or (isinstance(max_features, float) and max_features == 1.0)):
        return "feature subsampling draws features in build order, so truncation is not exact"
    if params.get("ccp_alpha", 0.0) != 0.0:
        return "cost-complexity pruning does not commute with depth truncation"
    if params.get("max_leaf_nodes") is not None:
        return "max_leaf_nodes grows best-first, so truncation is not exact"
    return None


# ------------------------------------------------------------------- helpers

def _as_design(X, name: str, allow_nan: bool = False) -> np.ndarray:
    X = np.asarray(X, dtype=float)
    if X.ndim != 2:
        raise ValueError(f"{name} must be a 2-d array, got shape {X.shape}")
    bad = ~np.isfinite(X) if not allow_nan else np.isinf(X)
    if bad.any():
        raise ValueError(f"{name} holds non-finite values")
    return X


def _check_rows(X_train, y_train, X_val, y_val) -> None:
    if X_train.shape[0] != y_train.shape[0] or X_val.shape[0] != y_val.shape[0]:
        raise ValueError("X and y must have the same number of rows")
    if X_train.shape[1] != X_val.shape[1]:
        raise ValueError("training and validation rows must have the same columns")
    if X_train.shape[0] == 0:
        raise ValueError("no training rows")


def _check_task_metric(task: str, metric: str) -> None:
    if task not in TASKS:
        raise ValueError(f"task must be one of {TASKS}, got {task!r}")
    allowed = REGRESSION_METRICS if task == "regression" else CLASSIFICATION_METRICS
    if metric not in allowed:
        raise ValueError(f"metric {metric!r} does not apply to {task}; use one of {allowed}")


def _positive_int(value, name: str) -> int:
    try:
        ok = not isinstance(value, bool) and int(value) == value and value >= 1
    except (TypeError, ValueError):
        ok = False
    if not ok:
        raise ValueError(f"{name} must be a positive integer, got {value!r}")
    return int(value)
