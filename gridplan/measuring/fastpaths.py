"""Exact shortcuts that evaluate a whole row of the grid from one fit.

Two model families have a shortcut that gives the same numbers as fitting every
cell separately, at a fraction of the cost:

poly-ridge
    The plain model is ``PolynomialFeatures(d) -> StandardScaler -> Ridge(alpha)``
    (``RidgeClassifier`` for classification). The polynomial features are built
    once at the largest degree; the degree-``d`` design is the first columns of
    that output. Scaling and Ridge's centring (``fit_intercept=True``) act
    column by column, so they too are done once at the largest degree. One QR
    of the centred design with the centred targets appended then serves every
    degree (the factor of the first columns is the leading block of R), and
    one SVD of that block per degree gives the solution for every alpha:
    ``w(alpha) = V diag(s / (s^2 + alpha)) U^T y_c``. Errors for all alphas
    come from one matrix product per degree and plain numpy formulas.

    The plain pipeline solves the normal equations (``X^T X + alpha I``, or the
    ``n x n`` kernel system when there are at least as many features as rows)
    by Cholesky, whose rounding error grows like ``eps * kappa`` with
    ``kappa = (s_max^2 + alpha) / (s_min^2 + alpha)`` (``s_min = 0`` when the
    centred design has at least as many columns as rows). The SVD result is the
    more accurate of the two, but the contract is agreement with the plain fit,
    so a cell whose ``kappa`` exceeds ``KAPPA_MAX`` is fitted the plain way and
    reported with ``path="plain-fallback"``; the fallback takes a contiguous
    copy of the same scaled polynomial columns and repeats Ridge's own steps
    on it (centring, the same Cholesky solve of the normal equations on the
    same products, intercept, prediction), which gives the pipeline's numbers
    bit for bit without loading scikit-learn. Measured over 10,560 cells
    (uniform, normal, log-normal, badly scaled and one-hot inputs; 12 to 1600
    rows; degrees 1 to 10; alpha 1e-6 to 1e3; mse and mae) the relative
    difference between the two paths never exceeded ``7.6e-16 * kappa`` once
    ``kappa > 1e4`` (and 2e-14 below that); the worst cell with
    ``kappa <= 1e8`` differed by 1.1e-8, against 1.3e-6 for ``kappa`` up to
    1e10. ``KAPPA_MAX = 1e9`` keeps that bound (7.6e-7) under the 1e-6
    contract and halves the fallbacks of the benchmark grid (239 -> 99 of 4,800). For classification a cell also falls back when some row's decision
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

import warnings
from dataclasses import dataclass
from math import comb
from typing import Sequence

import numpy as np

from gridplan.common.metrics import (
    CLASSIFICATION_METRICS,
    REGRESSION_METRICS,
    error_of,
    errors_by_row,
    proba_for_labels,
)

#: Largest (s_max^2 + alpha) / (s_min^2 + alpha) at which the SVD path is used.
KAPPA_MAX = 1e9
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
                    labels: np.ndarray | None = None,
                    features: tuple[np.ndarray, np.ndarray] | None = None) -> list[list[FastCell]]:
    """Errors of the poly-ridge pipeline for every (degree, alpha); result[i][j] is degrees[i], alphas[j].

    Equal to fitting ``PolynomialFeatures(d, include_bias=False) -> StandardScaler
    -> Ridge(alpha)`` (``RidgeClassifier`` for classification) on the training
    rows to within 1e-6 relative; cells where that cannot be promised are
    fitted the plain way (path "plain-fallback", with the reason in note).
    `features` may pass in the rows' polynomial features at max(degrees) or
    higher (see `polynomial_features`), when they have been built once for many calls.
    """
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
    width = n_poly_columns(X_train.shape[1], max(degrees))
    if features is None:
        features = (polynomial_features(X_train, max(degrees)), polynomial_features(X_val, max(degrees)))
    elif any(P.shape != (X.shape[0], P.shape[1]) or P.shape[1] < width
             for P, X in zip(features, (X_train, X_val))):
        raise ValueError(f"features must hold the rows' first {width} polynomial columns")

    return _poly_ridge_grid(features[0][:, :width], y_train, features[1][:, :width], y_val,
                            X_train.shape[1], degrees, alphas, task, metric)


def polynomial_features(X: np.ndarray, degree: int) -> np.ndarray:
    """``PolynomialFeatures(degree, include_bias=False)`` of X, bit for bit, in numpy alone.

    Columns come in that transformer's order (degree by degree, monomials in
    lexicographic order of their inputs), and each degree-d column is the same
    product as there: a degree-(d-1) column times one input. Each output row
    depends on its own input row alone, so the features of a subset of rows are
    those rows of the features of all rows; and the degree-d columns are the
    first columns of any higher degree's.
    """
    X = np.asarray(X, dtype=float)
    n_rows, n_inputs = X.shape
    out = np.empty((n_rows, n_poly_columns(n_inputs, degree)))
    out[:, :n_inputs] = X
    # starts[j]: first column of the previous degree's block whose monomials use
    # no input before j; multiplying those columns by input j keeps the order.
    starts, end = list(range(n_inputs)), n_inputs
    for _ in range(2, degree + 1):
        new_starts, column = [], end
        for j in range(n_inputs):
            new_starts.append(column)
            width = end - starts[j]
            np.multiply(out[:, starts[j]:end], X[:, j:j + 1], out=out[:, column:column + width])
            column += width
        starts, end = new_starts, column
    return out


def standard_scaling(P: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(mean, scale) of each column as ``StandardScaler().fit(P)`` sets them, bit for bit.

    The corrected two-pass variance (Chan, Golub & LeVeque 1983): the sum of
    squared deviations from the mean, less the square of their sum over n.
    A column whose variance is within rounding of zero gets scale 1.
    """
    n = P.shape[0]
    total = np.sum(P, axis=0)
    mean = total / n
    deviations = P - mean
    correction = np.sum(deviations, axis=0)
    deviations **= 2
    variance = (np.sum(deviations, axis=0) - correction ** 2 / n) / n
    eps = np.finfo(np.float64).eps
    constant = variance <= n * eps * variance + (n * mean * eps) ** 2
    scale = np.sqrt(variance)
    scale[constant] = 1.0
    return mean, scale


def _poly_ridge_grid(P_train, y_train, P_val, y_val, n_inputs, degrees, alphas, task,
                     metric) -> list[list[FastCell]]:
    """poly_ridge_grid on checked inputs and their polynomial features: one scaling and QR for all degrees."""
    targets, decide = _ridge_targets(y_train, task)
    n_train = P_train.shape[0]
    # Scaling and centring work column by column, so doing them on training
    # and validation rows together, at the largest degree for all, gives bit
    # for bit what the pipeline of each degree computes: the scaled degree-d
    # design is the first columns of S, and the triangular factor of its
    # centred version is the leading block of R (see _design_factor).
    P = np.vstack([P_train, P_val])
    mean, scale = standard_scaling(P[:n_train])
    S = P - mean                    # StandardScaler.transform's two steps, without its checks
    S /= scale
    S_train, S_val = S[:n_train], S[n_train:]
    x_mean, y_mean = S_train.mean(axis=0), targets.mean(axis=0)
    C_train, C_val = S_train - x_mean, S_val - x_mean
    R = _design_factor(C_train, targets - y_mean)
    data = _RidgeData(S_train, S_val, C_train, C_val, R, targets, y_train, y_val, y_mean, decide)

    by_degree = {}
    for degree in sorted(set(degrees)):
        width = n_poly_columns(n_inputs, degree)
        by_degree[degree] = _one_degree(data, width, alphas, task, metric)
    return [by_degree[d] for d in degrees]


@dataclass(frozen=True)
class _RidgeData:
    """What every degree of one poly-ridge grid shares."""

    S_train: np.ndarray      # scaled polynomial features at the largest degree
    S_val: np.ndarray
    C_train: np.ndarray      # scaled and centred as Ridge sees them
    C_val: np.ndarray
    R: np.ndarray            # triangular factor of [C_train | centred targets]
    targets: np.ndarray      # what Ridge fits: y as one column, or +-1 columns per class
    y_train: np.ndarray
    y_val: np.ndarray
    y_mean: np.ndarray       # one per target column
    decide: object           # fitted values (..., rows, targets) -> predictions (..., rows)


def n_poly_columns(n_inputs: int, degree: int) -> int:
    """Columns of PolynomialFeatures(degree, include_bias=False) on n_inputs inputs."""
    return comb(n_inputs + degree, degree) - 1


def _design_factor(C: np.ndarray, Yc: np.ndarray) -> np.ndarray:
    """R of the QR decomposition of [C | Yc] (min(rows, columns) rows).

    Householder QR treats columns left to right, so for the first w columns of
    C, R[:m, :w] (m = min(rows, w)) is their own triangular factor and
    R[:m, C.shape[1]:] is Q_w^T Yc: one factorisation serves every degree, and
    the n x k matrix U of an SVD of C is never formed. SciPy's QR is used
    because it asks LAPACK for its best workspace (a blocked factorisation,
    a third faster here) and lets other threads run meanwhile.
    """
    from scipy.linalg import qr

    stacked = np.empty((C.shape[0], C.shape[1] + Yc.shape[1]), order="F")
    stacked[:, :C.shape[1]], stacked[:, C.shape[1]:] = C, Yc
    _, R = qr(stacked, mode="raw", overwrite_a=True, check_finite=False)
    return R


def _one_degree(data: _RidgeData, width: int, alphas: np.ndarray, task: str,
                metric: str) -> list[FastCell]:
    """All alphas of one degree from one SVD of its triangular factor."""
    n_rows = data.C_train.shape[0]
    n_cols = data.C_train.shape[1]
    m = min(n_rows, width)
    try:
        Ur, s, Vt = np.linalg.svd(data.R[:m, :width], full_matrices=False)
    except np.linalg.LinAlgError as exc:
        return _fallback_cells(data, width, alphas, task, metric, [f"SVD failed: {exc}"] * alphas.size)
    projected = Ur.T @ data.R[:m, n_cols:]                              # U^T y_c, (k, targets)

    # The plain fit solves X^T X + alpha I (or the n x n kernel system when the
    # design is at least as wide as it is tall) by Cholesky; its rounding error
    # grows with this condition number (see KAPPA_MAX).
    s_max2 = s[0] ** 2 if s.size else 0.0
    s_min2 = s[-1] ** 2 if (s.size and width < n_rows) else 0.0
    kappas = (s_max2 + alphas) / (s_min2 + alphas)

    # w(alpha) = V diag(s / (s^2 + alpha)) U^T y_c for every alpha at once;
    # fitted values come out as (alphas * targets) x rows.
    shrink = s[:, None] / (s[:, None] ** 2 + alphas[None, :])           # (k, alphas)
    coefs = Vt.T @ (shrink[:, :, None] * projected[:, None, :]).reshape(s.size, -1)
    fit_train = _fitted(coefs, data.C_train[:, :width], data.y_mean, alphas.size)
    fit_val = _fitted(coefs, data.C_val[:, :width], data.y_mean, alphas.size)

    reasons: list[str | None] = [None] * alphas.size
    for j in np.flatnonzero(~(kappas <= KAPPA_MAX)):
        reasons[j] = f"ill-conditioned: cond={kappas[j]:.1e} > {KAPPA_MAX:.0e}"
    if task == "classification":
        for j, kappa in enumerate(kappas):
            if reasons[j] is None:
                margin = min(_tie_margin(fit_train[j]), _tie_margin(fit_val[j]))
                scale = max(1.0, float(np.max(np.abs(fit_train[j]), initial=0.0)))
                if margin <= TIE_GUARD * kappa * scale:
                    reasons[j] = f"near tie: decision margin {margin:.1e}"

    train_errors = errors_by_row(metric, data.y_train, data.decide(fit_train))
    val_errors = errors_by_row(metric, data.y_val, data.decide(fit_val))
    cells = [FastCell(float(tr), float(va), "svd") for tr, va in zip(train_errors, val_errors)]
    if any(reasons):
        falling = [j for j, why in enumerate(reasons) if why]
        replaced = _fallback_cells(data, width, alphas[falling], task, metric,
                                   [reasons[j] for j in falling])
        for j, cell in zip(falling, replaced):
            cells[j] = cell
    return cells


def _fitted(coefs: np.ndarray, C: np.ndarray, y_mean: np.ndarray, n_alphas: int) -> np.ndarray:
    """Fitted values as (alphas, rows, targets) from coefficients (features, alphas * targets)."""
    values = (coefs.T @ C.T).reshape(n_alphas, y_mean.size, C.shape[0])
    return values.transpose(0, 2, 1) + y_mean


def _fallback_cells(data: _RidgeData, width: int, alphas: np.ndarray, task: str, metric: str,
                    reasons: list[str]) -> list[FastCell]:
    """The plain pipeline's arithmetic for some alphas of one degree, on the very arrays it builds.

    A contiguous copy of the first columns of the scaled largest-degree design
    is bit for bit what the pipeline of this degree hands to Ridge. Ridge.fit
    centres it and its targets (``np.average``), solves the normal equations
    by Cholesky (``_cholesky_ridge``) and sets ``intercept = y_offset -
    X_offset @ coef`` (RidgeClassifier the same on its +-1 columns, with unit
    sample weights); predict is ``X @ coef + intercept``. Doing those steps
    here, once per degree for the centring, gives the library's numbers on
    the cells whose rounding depends on how they are solved, without loading
    scikit-learn or its per-call checks.
    """
    S_train = np.ascontiguousarray(data.S_train[:, :width])
    S_val = np.ascontiguousarray(data.S_val[:, :width])
    # Ridge sees a 1-d target and no weights; RidgeClassifier its +-1 columns
    # and unit weights (which make the library take its weighted averages).
    if task == "regression":
        targets, weights = data.targets[:, 0], None
    else:
        targets, weights = data.targets, np.ones(S_train.shape[0])
    x_offset = np.average(S_train, axis=0, weights=weights)
    y_offset = np.average(targets, axis=0, weights=weights)
    X_centred, y_centred = S_train - x_offset, targets - y_offset
    cells = []
    for alpha, why in zip(alphas, reasons):
        coef = _cholesky_ridge(X_centred, y_centred, float(alpha), weights)
        intercept = y_offset - x_offset @ coef.T       # coef is 1-d for a single column
        fitted = [(S @ coef.T + intercept).reshape(S.shape[0], -1) for S in (S_train, S_val)]
        train_error, validation_error = (
            errors_by_row(metric, y, data.decide(f[None]))[0]
            for y, f in zip((data.y_train, data.y_val), fitted))
        cells.append(FastCell(float(train_error), float(validation_error), "plain-fallback", why))
    return cells


def _cholesky_ridge(X: np.ndarray, y: np.ndarray, alpha: float,
                    weights: np.ndarray | None) -> np.ndarray:
    """Ridge coefficients of centred X, y as Ridge's default dense solver computes them.

    (X^T X + alpha I) w = X^T y by Cholesky, or, when X has more columns than
    rows, the dual (X X^T + alpha I) d = y with w = X^T d (Hoerl & Kennard
    1970; the dual form as in kernel ridge regression). The same products and
    the same LAPACK solve as the library, so ill-conditioned systems round
    the same way. A system that is not positive definite (the library then
    changes solver) is handed to scikit-learn itself.
    """
    from scipy.linalg import LinAlgError, LinAlgWarning, solve

    Y = y.reshape(y.shape[0], -1)
    n_rows, n_cols = X.shape
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", LinAlgWarning)   # the cell's note says it is ill-conditioned
            if n_cols > n_rows:
                K = X @ X.T
                K.flat[::n_rows + 1] += alpha
                coef = (X.T @ solve(K, Y, assume_a="pos", overwrite_a=False)).T
            else:
                A = X.T @ X
                Xy = X.T @ Y
                A.flat[::n_cols + 1] += alpha
                coef = solve(A, Xy, assume_a="pos", overwrite_a=True).T
    except LinAlgError:
        from sklearn import config_context
        from sklearn.linear_model import ridge_regression

        # the inputs are checked; the library's repeated checks change no arithmetic
        with config_context(assume_finite=True, skip_parameter_validation=True):
            return ridge_regression(X, y, alpha, sample_weight=weights, check_input=False)
    return coef[0] if y.ndim == 1 else coef


def _ridge_targets(y_train: np.ndarray, task: str):
    """Regression targets as a column, or RidgeClassifier's +-1 columns, and the decision rule."""
    if task == "regression":
        return np.asarray(y_train, dtype=float).reshape(-1, 1), lambda fitted: fitted[..., 0]
    from sklearn.preprocessing import LabelBinarizer

    # As RidgeClassifier: LabelBinarizer(pos_label=1, neg_label=-1); one column
    # for two classes (decision > 0 -> classes_[1]), argmax for more.
    binarizer = LabelBinarizer(pos_label=1, neg_label=-1)
    targets = binarizer.fit_transform(y_train).astype(float)
    classes = binarizer.classes_

    def decide(fitted: np.ndarray) -> np.ndarray:
        if fitted.shape[-1] == 1:
            return classes.take((fitted[..., 0] > 0).astype(np.intp))
        return classes.take(np.argmax(fitted, axis=-1))

    return targets, decide


def _tie_margin(fitted: np.ndarray) -> float:
    """Smallest distance of any row's decision from a tie."""
    if fitted.shape[0] == 0:
        return np.inf
    if fitted.shape[1] == 1:
        return float(np.min(np.abs(fitted[:, 0])))
    top2 = np.partition(fitted, -2, axis=1)[:, -2:]
    return float(np.min(top2[:, 1] - top2[:, 0]))


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

    def errors(y: np.ndarray, nodes: dict[int, np.ndarray]) -> np.ndarray:
        """One error per depth in `wanted`."""
        if metric == "log_loss":
            return np.array([error_of(metric, y, proba_for_labels(_Fixed(model.classes_, proba[nodes[d]]),
                                                                  None, labels), labels)
                             for d in wanted])
        at = np.stack([nodes[d] for d in wanted])                       # (depths, rows)
        if task == "regression":
            return errors_by_row(metric, y, tree.value[at, 0, 0])
        return errors_by_row(metric, y, model.classes_.take(np.argmax(proba[at], axis=2)))

    train_errors, val_errors = errors(y_train, train_nodes), errors(y_val, val_nodes)
    by_depth = {d: FastCell(float(tr), float(va), "tree-truncation")
                for d, tr, va in zip(wanted, train_errors, val_errors)}
    return [by_depth[d] for d in depths]


def _nodes_at_depths(tree, X32: np.ndarray, depths: Sequence[int]) -> dict[int, np.ndarray]:
    """Node each row reaches when its descent stops at each depth (or at a leaf above it)."""
    from sklearn.tree._tree import TREE_LEAF

    left, right = tree.children_left, tree.children_right
    feature, threshold = tree.feature, tree.threshold
    nan_left = np.asarray(tree.missing_go_to_left, dtype=bool)
    node = np.zeros(X32.shape[0], dtype=np.intp)
    reached = {0: node.copy()} if 0 in depths else {}
    # Below the tree's own depth every row sits in a leaf: a depth limit of
    # 10^18 must not walk 10^18 levels.
    deepest = min(max(depths), int(tree.max_depth))
    for level in range(1, deepest + 1):
        moving = np.flatnonzero(left[node] != TREE_LEAF)
        if moving.size:
            at = node[moving]
            x = X32[moving, feature[at]]
            go_left = np.where(np.isnan(x), nan_left[at], x <= threshold[at])
            node[moving] = np.where(go_left, left[at], right[at])
        if level in depths:
            reached[level] = node.copy()
    for depth in depths:
        if depth > deepest:
            reached[depth] = node.copy()
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
