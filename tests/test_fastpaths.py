"""The exact fast paths against the plain scikit-learn fits they stand in for."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from sklearn.linear_model import Ridge, RidgeClassifier
from sklearn.pipeline import Pipeline
from sklearn.preprocessing import PolynomialFeatures, StandardScaler
from sklearn.tree import DecisionTreeClassifier, DecisionTreeRegressor

from gridplan.common.metrics import error_of, proba_for_labels
from gridplan.measuring import fastpaths
from gridplan.measuring.fastpaths import FastCell, has_fast_path, poly_ridge_grid, tree_depth_grid

DEGREES = [1, 2, 3, 4, 5, 6]
ALPHAS = list(np.logspace(-6, 3, 10))


def rel_diff(a: float, b: float) -> float:
    """|a - b| relative to |b| (absolute when b is zero)."""
    return abs(a - b) / abs(b) if b != 0 else abs(a)


def plain_poly_ridge(X_train, y_train, X_val, y_val, degree, alpha, task, metric):
    """The reference: scikit-learn Pipeline(PolynomialFeatures, StandardScaler, Ridge/RidgeClassifier)."""
    last = Ridge(alpha=alpha) if task == "regression" else RidgeClassifier(alpha=alpha)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # ill-conditioned solves warn; the numbers are what we compare
        model = Pipeline([("poly", PolynomialFeatures(degree, include_bias=False)),
                          ("scale", StandardScaler()), ("ridge", last)]).fit(X_train, y_train)
    return (error_of(metric, y_train, model.predict(X_train)),
            error_of(metric, y_val, model.predict(X_val)))


def largest_difference(grid, data, degrees, alphas, task, metric) -> float:
    """Largest relative difference of any cell's training or validation error from the plain pipeline."""
    worst = 0.0
    for degree, row in zip(degrees, grid):
        for alpha, cell in zip(alphas, row):
            train_ref, val_ref = plain_poly_ridge(*data, degree, alpha, task, metric)
            worst = max(worst, rel_diff(cell.train_error, train_ref),
                        rel_diff(cell.validation_error, val_ref))
    return worst


def regression_data(n_train=120, n_val=80, n_inputs=3, seed=0):
    rng = np.random.default_rng(seed)
    X = rng.uniform(-1.5, 1.5, size=(n_train + n_val, n_inputs))
    y = np.sin(2 * X[:, 0]) + X[:, 1] ** 2 - X[:, 0] * X[:, -1] + 0.3 * rng.normal(size=len(X))
    return X[:n_train], y[:n_train], X[n_train:], y[n_train:]


def classification_data(n_classes, n_train=150, n_val=100, seed=1):
    X_train, y_train, X_val, y_val = regression_data(n_train, n_val, seed=seed)
    edges = np.quantile(np.concatenate([y_train, y_val]), np.linspace(0, 1, n_classes + 1)[1:-1])
    names = np.array(["low", "mid", "high"])[:n_classes] if n_classes == 3 else np.array(["no", "yes"])
    return X_train, names[np.digitize(y_train, edges)], X_val, names[np.digitize(y_val, edges)]


# ------------------------------------------------------------------ poly-ridge

def test_polynomial_features_of_lower_degree_are_a_prefix():
    # reference library: scikit-learn PolynomialFeatures orders columns by degree,
    # so the degree-d output is bit-for-bit the first columns of the degree-D output
    X, *_ = regression_data()
    high = PolynomialFeatures(6, include_bias=False).fit_transform(X)
    for d in range(1, 6):
        low = PolynomialFeatures(d, include_bias=False).fit_transform(X)
        assert np.array_equal(high[:, :low.shape[1]], low)


@pytest.mark.parametrize("task, metric, n_classes", [
    ("regression", "mse", None),
    ("regression", "mae", None),
    ("classification", "error_rate", 2),
    ("classification", "error_rate", 3),
])
def test_poly_ridge_grid_equals_plain_pipeline(task, metric, n_classes):
    # reference library: scikit-learn Pipeline(PolynomialFeatures, StandardScaler, Ridge / RidgeClassifier)
    if task == "regression":
        X_train, y_train, X_val, y_val = regression_data()
    else:
        X_train, y_train, X_val, y_val = classification_data(n_classes)
    grid = poly_ridge_grid(X_train, y_train, X_val, y_val, DEGREES, ALPHAS, task=task, metric=metric)
    assert len(grid) == len(DEGREES) and all(len(row) == len(ALPHAS) for row in grid)
    assert largest_difference(grid, (X_train, y_train, X_val, y_val), DEGREES, ALPHAS,
                              task, metric) <= 1e-6
    # the fast path did the work, not the fallback
    paths = [cell.path for row in grid for cell in row]
    assert paths.count("svd") >= 0.9 * len(paths)


def test_poly_ridge_grid_keeps_the_order_it_was_given():
    # common practice, no published source: result[i][j] belongs to degrees[i], alphas[j]
    X_train, y_train, X_val, y_val = regression_data()
    degrees, alphas = [4, 1, 2], [10.0, 1e-3]
    grid = poly_ridge_grid(X_train, y_train, X_val, y_val, degrees, alphas, task="regression", metric="rmse")
    assert largest_difference(grid, (X_train, y_train, X_val, y_val), degrees, alphas,
                              "regression", "rmse") <= 1e-9


def test_ill_conditioned_cells_fall_back_to_the_plain_fit():
    # reference library: scikit-learn Pipeline with Ridge; the fallback cells are that fit itself
    rng = np.random.default_rng(3)
    x = rng.normal(size=(30, 1))
    # two near copies of one input, degree up to 7 on 30 rows, alphas down to 1e-6
    X = np.hstack([x, x + 1e-7 * rng.normal(size=x.shape), rng.normal(size=x.shape)])
    y = np.sin(x[:, 0]) + 0.1 * rng.normal(size=30)
    X_train, y_train, X_val, y_val = X[:20], y[:20], X[20:], y[20:]
    degrees, alphas = [1, 3, 7], [1e-6, 1e-2, 1e3]
    grid = poly_ridge_grid(X_train, y_train, X_val, y_val, degrees, alphas, task="regression", metric="mse")
    fallbacks = [(d, a, c) for d, row in zip(degrees, grid) for a, c in zip(alphas, row)
                 if c.path == "plain-fallback"]
    assert fallbacks, "the near-collinear design should trigger the fallback"
    for degree, alpha, cell in fallbacks:
        assert cell.note.startswith("ill-conditioned: cond=")
        kappa = float(cell.note.split("cond=")[1].split()[0])
        assert kappa > fastpaths.KAPPA_MAX
        ref = plain_poly_ridge(X_train, y_train, X_val, y_val, degree, alpha, "regression", "mse")
        assert (cell.train_error, cell.validation_error) == ref   # the same arithmetic, bit for bit
    # strong regularisation keeps the same design well conditioned
    assert all(row[-1].path == "svd" for row in grid)
    assert largest_difference(grid, (X_train, y_train, X_val, y_val), degrees, alphas,
                              "regression", "mse") <= 1e-6


@pytest.mark.parametrize("shape", [(40, 6), (8, 30)])
@pytest.mark.parametrize("targets", [1, 3])
def test_cholesky_ridge_is_the_library_solve_bit_for_bit(shape, targets):
    # reference library: sklearn.linear_model.ridge_regression (default dense solver: Cholesky on
    # X^T X + alpha I, or on X X^T + alpha I when there are more columns than rows)
    from sklearn.linear_model import ridge_regression
    rng = np.random.default_rng(shape[0] + targets)
    X = rng.normal(size=shape)
    X[:, 1] = X[:, 0] + 1e-8 * rng.normal(size=shape[0])       # nearly collinear: rounding shows
    X -= X.mean(axis=0)
    y = rng.normal(size=(shape[0], targets)) if targets > 1 else rng.normal(size=shape[0])
    weights = np.ones(shape[0]) if targets > 1 else None
    for alpha in (1e-9, 1e-3, 10.0):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            theirs = ridge_regression(X, y, alpha, sample_weight=weights)
        ours = fastpaths._cholesky_ridge(X, y, alpha, weights)
        assert ours.shape == theirs.shape and np.array_equal(ours, theirs)


def test_cholesky_ridge_hands_a_singular_system_to_the_library():
    # reference library: ridge_regression changes to its SVD solver when Cholesky fails
    # (a zero column with alpha 0 makes X^T X singular)
    from sklearn.linear_model import ridge_regression
    rng = np.random.default_rng(4)
    X = np.hstack([rng.normal(size=(12, 3)), np.zeros((12, 1))])
    X -= X.mean(axis=0)
    y = rng.normal(size=12)
    ours = fastpaths._cholesky_ridge(X, y, 0.0, None)
    assert np.array_equal(ours, ridge_regression(X, y, 0.0))
    assert ours[-1] == 0.0


def test_decision_on_a_tie_falls_back():
    # reference library: scikit-learn RidgeClassifier predicts classes_[1] only when the decision is > 0;
    # a validation row at the centre of symmetric training data has decision exactly 0
    X_train = np.array([[-2.0], [-1.0], [1.0], [2.0]])
    y_train = np.array([0, 0, 1, 1])
    X_val, y_val = np.array([[0.0], [1.5]]), np.array([1, 1])
    [[cell]] = poly_ridge_grid(X_train, y_train, X_val, y_val, [1], [1.0],
                               task="classification", metric="error_rate")
    assert cell.path == "plain-fallback" and cell.note.startswith("near tie")
    ref = plain_poly_ridge(X_train, y_train, X_val, y_val, 1, 1.0, "classification", "error_rate")
    assert (cell.train_error, cell.validation_error) == ref == (0.0, 0.5)


def test_fallback_on_ill_conditioned_classification_equals_ridge_classifier():
    # reference library: scikit-learn Pipeline with RidgeClassifier; the fallback repeats its
    # arithmetic (unit sample weights, +-1 columns), so the errors agree exactly
    rng = np.random.default_rng(8)
    for n_classes in (2, 3):
        X_train, y_train, X_val, y_val = classification_data(n_classes, n_train=40, n_val=60, seed=n_classes)
        X_train = np.hstack([X_train, X_train[:, :1] + 1e-7 * rng.normal(size=(40, 1))])
        X_val = np.hstack([X_val, X_val[:, :1] + 1e-7 * rng.normal(size=(60, 1))])
        degrees, alphas = [4, 6], [1e-6, 1e-3]
        grid = poly_ridge_grid(X_train, y_train, X_val, y_val, degrees, alphas,
                               task="classification", metric="error_rate")
        fallbacks = [(d, a, c) for d, row in zip(degrees, grid) for a, c in zip(alphas, row)
                     if c.path == "plain-fallback"]
        assert fallbacks
        for degree, alpha, cell in fallbacks:
            ref = plain_poly_ridge(X_train, y_train, X_val, y_val, degree, alpha, "classification", "error_rate")
            assert (cell.train_error, cell.validation_error) == ref


def test_features_built_once_give_the_same_cells():
    # reference library: scikit-learn PolynomialFeatures works row by row, so the rows of the
    # features of all rows equal the features of those rows
    X_train, y_train, X_val, y_val = regression_data()
    everything = fastpaths.polynomial_features(np.vstack([X_train, X_val]), 7)
    shared = (everything[:len(X_train)], everything[len(X_train):])
    own = poly_ridge_grid(X_train, y_train, X_val, y_val, [2, 5], ALPHAS, task="regression", metric="mse")
    given = poly_ridge_grid(X_train, y_train, X_val, y_val, [2, 5], ALPHAS, task="regression", metric="mse",
                            features=shared)
    assert own == given
    with pytest.raises(ValueError, match="polynomial columns"):
        poly_ridge_grid(X_train, y_train, X_val, y_val, [2, 5], ALPHAS, task="regression", metric="mse",
                        features=(shared[0][:, :9], shared[1][:, :9]))


def test_single_class_training_subset():
    # reference library: scikit-learn RidgeClassifier on a training subset that holds one class
    X_train, y_train, X_val, y_val = classification_data(3)
    keep = y_train == "mid"
    grid = poly_ridge_grid(X_train[keep], y_train[keep], X_val, y_val, [1, 2], [1.0],
                           task="classification", metric="error_rate")
    for degree, [cell] in zip([1, 2], grid):
        ref = plain_poly_ridge(X_train[keep], y_train[keep], X_val, y_val, degree, 1.0,
                               "classification", "error_rate")
        assert (cell.train_error, cell.validation_error) == ref


def test_poly_ridge_rejects_probability_metrics_and_bad_alphas():
    # common practice, no published source: RidgeClassifier has no predict_proba
    X_train, y_train, X_val, y_val = classification_data(2)
    with pytest.raises(ValueError):
        poly_ridge_grid(X_train, y_train, X_val, y_val, [1], [1.0], task="classification", metric="log_loss")
    X_train, y_train, X_val, y_val = regression_data()
    with pytest.raises(ValueError):
        poly_ridge_grid(X_train, y_train, X_val, y_val, [1], [0.0], task="regression", metric="mse")
    with pytest.raises(ValueError):
        poly_ridge_grid(X_train, y_train, X_val, y_val, [0], [1.0], task="regression", metric="mse")


# ------------------------------------------------------------------------ tree

def separate_tree_errors(X_train, y_train, X_val, y_val, depth, task, metric, labels, params, random_state):
    """The reference: one scikit-learn DecisionTree fitted with max_depth=depth."""
    Tree = DecisionTreeRegressor if task == "regression" else DecisionTreeClassifier
    model = Tree(max_depth=depth, random_state=random_state, **params).fit(X_train, y_train)
    if metric == "log_loss":
        return model, (error_of(metric, y_train, proba_for_labels(model, X_train, labels), labels),
                       error_of(metric, y_val, proba_for_labels(model, X_val, labels), labels))
    return model, (error_of(metric, y_train, model.predict(X_train)),
                   error_of(metric, y_val, model.predict(X_val)))


def tree_data(task, n_inputs, seed, n_train=400, n_val=300):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n_train + n_val, n_inputs))
    y = np.sin(2 * X[:, 0]) + (X[:, 1] if n_inputs > 1 else 0) + 0.5 * rng.normal(size=len(X))
    if task == "classification":
        y = np.array(["a", "b", "c"])[np.digitize(y, [-0.5, 0.5])]
    return X[:n_train], y[:n_train], X[n_train:], y[n_train:]


@pytest.mark.parametrize("task, metric", [
    ("regression", "mse"), ("regression", "mae"),
    ("classification", "error_rate"), ("classification", "log_loss"),
])
@pytest.mark.parametrize("random_state", [0, 7])
def test_tree_truncation_with_one_input_equals_separate_fits(task, metric, random_state):
    # reference library: scikit-learn DecisionTreeRegressor/Classifier(max_depth=d) fitted per depth
    X_train, y_train, X_val, y_val = tree_data(task, 1, seed=random_state)
    labels = np.unique(np.concatenate([y_train, y_val])) if task == "classification" else None
    depths = list(range(1, 13))
    params = {"min_samples_leaf": 3}
    cells = tree_depth_grid(X_train, y_train, X_val, y_val, depths, task=task, metric=metric,
                            labels=labels, tree_params=params, random_state=random_state)
    for depth, cell in zip(depths, cells):
        assert cell.path == "tree-truncation"
        _, (train_ref, val_ref) = separate_tree_errors(X_train, y_train, X_val, y_val, depth, task,
                                                       metric, labels, params, random_state)
        assert cell.train_error == train_ref
        assert cell.validation_error == val_ref


def _gain(tree, node) -> float:
    """Weighted impurity decrease of a split, as the library's builder scores it."""
    w, imp = tree.weighted_n_node_samples, tree.impurity
    left, right = tree.children_left[node], tree.children_right[node]
    return w[node] * imp[node] - w[left] * imp[left] - w[right] * imp[right]


def _walk_until_ties(separate, deep, X_train, depth) -> dict:
    """Walk the depth-limited tree and the deep tree cut at `depth` side by side.

    Asserts that both hold the same training rows at every node they share and
    that every place they choose different splits is an exact tie in impurity
    decrease. Counts ties that split the training rows the same way (the walk
    continues below them) and ties that split them differently (it stops).
    """
    ps, pd = separate.decision_path(X_train).tocsc(), deep.decision_path(X_train).tocsc()
    a, b = separate.tree_, deep.tree_

    def rows(path, node):
        return frozenset(path[:, node].nonzero()[0])

    counts = {"same_split": 0, "tie_same_rows": 0, "tie_other_rows": 0}
    stack = [(0, 0, 0)]
    while stack:
        na, nb, level = stack.pop()
        assert rows(ps, na) == rows(pd, nb)
        a_leaf = a.children_left[na] == -1
        assert a_leaf == (b.children_left[nb] == -1 or level == depth)
        if a_leaf:
            continue
        pairs = [(a.children_left[na], b.children_left[nb]), (a.children_right[na], b.children_right[nb])]
        if a.feature[na] == b.feature[nb] and a.threshold[na] == b.threshold[nb]:
            counts["same_split"] += 1
        else:
            assert _gain(a, na) == pytest.approx(_gain(b, nb), rel=1e-12, abs=0)
            left_a = rows(ps, a.children_left[na])
            if left_a == rows(pd, b.children_left[nb]):
                counts["tie_same_rows"] += 1
            elif left_a == rows(pd, b.children_right[nb]):
                counts["tie_same_rows"] += 1
                pairs = [(a.children_left[na], b.children_right[nb]), (a.children_right[na], b.children_left[nb])]
            else:
                counts["tie_other_rows"] += 1
                continue
        stack.extend((x, y, level + 1) for x, y in pairs)
    return counts


@pytest.mark.parametrize("task, metric", [("regression", "mse"), ("classification", "error_rate"),
                                          ("classification", "log_loss")])
@pytest.mark.parametrize("random_state", [0, 1, 2])
def test_tree_truncation_with_several_inputs_differs_only_at_ties(task, metric, random_state):
    # reference library: scikit-learn DecisionTree(max_depth=d) per depth. The builder draws a random
    # feature order at every node in build order, so a deeper tree can break a tie between equally
    # good splits the other way; the walk checks that every disagreement starts at such a tie.
    X_train, y_train, X_val, y_val = tree_data(task, 4, seed=10 + random_state)
    labels = np.unique(np.concatenate([y_train, y_val])) if task == "classification" else None
    depths = list(range(1, 12))
    params = {"min_samples_leaf": 3}
    Tree = DecisionTreeRegressor if task == "regression" else DecisionTreeClassifier
    deep = Tree(max_depth=max(depths), random_state=random_state, **params).fit(X_train, y_train)
    cells = tree_depth_grid(X_train, y_train, X_val, y_val, depths, task=task, metric=metric,
                            labels=labels, tree_params=params, random_state=random_state)
    agreeing = 0
    for depth, cell in zip(depths, cells):
        separate, (train_ref, val_ref) = separate_tree_errors(
            X_train, y_train, X_val, y_val, depth, task, metric, labels, params, random_state)
        counts = _walk_until_ties(separate, deep, X_train, depth)
        if counts["tie_other_rows"] == 0:
            # same training partition: same training error
            assert cell.train_error == pytest.approx(train_ref, rel=1e-12, abs=1e-15)
        if counts["tie_same_rows"] == 0 and counts["tie_other_rows"] == 0:
            # same splits everywhere: same validation error too
            assert cell.validation_error == pytest.approx(val_ref, rel=1e-12, abs=1e-15)
            agreeing += 1
        if task == "regression":
            # continuous target: the ties met here separate the training rows identically
            assert counts["tie_other_rows"] == 0
    # shallow trees meet no ties at all
    assert agreeing >= 3


def test_tree_threshold_is_compared_in_float32():
    # reference library: scikit-learn trees cast X to float32 and send x <= threshold left
    X_train = np.array([[0.0], [0.0], [0.0], [1.0], [1.0], [1.0]])
    y_train = np.array([0.0, 0.0, 0.0, 10.0, 10.0, 10.0])
    just_above = 0.5 + 1e-9            # above the 0.5 threshold in float64, equal to it in float32
    assert just_above > 0.5 and np.float32(just_above) == 0.5
    X_val, y_val = np.array([[just_above], [0.75]]), np.array([0.0, 10.0])
    model = DecisionTreeRegressor(max_depth=1, random_state=0).fit(X_train, y_train)
    assert model.tree_.threshold[0] == 0.5
    assert list(model.predict(X_val)) == [0.0, 10.0]
    [cell] = tree_depth_grid(X_train, y_train, X_val, y_val, [1], task="regression", metric="mse")
    assert cell.validation_error == 0.0 and cell.train_error == 0.0
    # the same for classification
    [cell] = tree_depth_grid(X_train, y_train > 5, X_val, y_val > 5, [1], task="classification",
                             metric="error_rate")
    assert cell.validation_error == 0.0


def test_tree_depth_grid_order_and_shallow_tree():
    # reference library: scikit-learn DecisionTreeRegressor(max_depth=d); a tree that stops
    # growing early gives the same errors at every larger depth
    X_train, y_train, X_val, y_val = tree_data("regression", 1, seed=3, n_train=40)
    depths = [6, 1, 30, 3]
    params = {"min_samples_leaf": 8}
    cells = tree_depth_grid(X_train, y_train, X_val, y_val, depths, task="regression", metric="mse",
                            tree_params=params)
    for depth, cell in zip(depths, cells):
        _, ref = separate_tree_errors(X_train, y_train, X_val, y_val, depth, "regression", "mse",
                                      None, params, 0)
        assert (cell.train_error, cell.validation_error) == ref
    assert cells[0] == cells[2]


def test_tree_rejects_settings_that_do_not_commute():
    # common practice, no published source: pruning, best-first growth and random draws in build
    # order make a shallow tree something other than the top of a deep one
    X_train, y_train, X_val, y_val = tree_data("regression", 2, seed=0)
    for params in [{"ccp_alpha": 0.01}, {"max_leaf_nodes": 8}, {"splitter": "random"},
                   {"max_features": 1}]:
        assert not fastpaths.tree_params_commute(params)
        with pytest.raises(ValueError):
            tree_depth_grid(X_train, y_train, X_val, y_val, [1, 2], task="regression", metric="mse",
                            tree_params=params)
    assert fastpaths.tree_params_commute({"min_samples_leaf": 5, "min_samples_split": 4, "ccp_alpha": 0.0})
    # settings nobody has checked are refused rather than trusted
    assert not fastpaths.tree_params_commute({"monotonic_cst": [1, 0]})


# ------------------------------------------------------------------ truth table

@pytest.mark.parametrize("family, param, task, metric, expected", [
    # poly-ridge: regression any metric, classification error_rate only
    ("poly-ridge", "alpha", "regression", "mse", True),
    ("poly-ridge", "alpha", "regression", "rmse", True),
    ("poly-ridge", "alpha", "regression", "mae", True),
    ("poly-ridge", None, "regression", "mse", True),
    ("poly-ridge", "alpha", "classification", "error_rate", True),
    ("poly-ridge", "alpha", "classification", "log_loss", False),
    ("poly-ridge", "alpha", "regression", "error_rate", False),
    ("poly-ridge", "l1_ratio", "regression", "mse", False),
    # tree: no regularisation axis, min_samples_leaf or min_samples_split; not ccp_alpha
    ("tree", None, "regression", "mse", True),
    ("tree", "min_samples_leaf", "regression", "mae", True),
    ("tree", "min_samples_split", "classification", "error_rate", True),
    ("tree", "min_samples_leaf", "classification", "log_loss", True),
    ("tree", "ccp_alpha", "regression", "mse", False),
    ("tree", "ccp_alpha", "classification", "error_rate", False),
    ("tree", "max_leaf_nodes", "regression", "mse", False),
    ("tree", None, "classification", "mse", False),
    # everything else is fitted the plain way
    ("sklearn.ensemble.RandomForestRegressor", None, "regression", "mse", False),
    ("poly-ridge", "alpha", "ranking", "mse", False),
])
def test_has_fast_path(family, param, task, metric, expected):
    # common practice, no published source: the rules stated in the fast-path issue
    assert has_fast_path(family, param, task, metric) is expected


def test_fast_cell_is_frozen():
    # common practice, no published source
    cell = FastCell(0.1, 0.2, "svd")
    assert cell.note == ""
    with pytest.raises(Exception):
        cell.train_error = 0.0  # type: ignore[misc]
