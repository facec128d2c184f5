"""Error metrics (lower is better) for the grid, computed with scikit-learn."""

from __future__ import annotations

import numpy as np

REGRESSION_METRICS = ("mse", "rmse", "mae")
CLASSIFICATION_METRICS = ("error_rate", "log_loss")
ALL_METRICS = REGRESSION_METRICS + CLASSIFICATION_METRICS

METRIC_LABELS = {
    "mse": "mean squared error",
    "rmse": "root mean squared error",
    "mae": "mean absolute error",
    "error_rate": "error rate (1 - accuracy)",
    "log_loss": "log loss",
}


#: scikit-learn scorers whose score is a negated loss without the "neg_" prefix.
NEGATED_LOSSES = frozenset({"max_error"})


def is_scorer(metric: str) -> bool:
    """True when `metric` is a scikit-learn scorer name rather than a built-in metric."""
    if metric in ALL_METRICS:
        return False
    from sklearn.metrics import get_scorer_names
    return metric in get_scorer_names()


def scorer_rule(metric: str) -> str:
    """How a scorer's score (higher is better) becomes an error (lower is better), in words."""
    if metric.startswith("neg_") or metric in NEGATED_LOSSES:
        return f"-{metric}" if metric in NEGATED_LOSSES else metric.removeprefix("neg_")
    return f"1 - {metric}"


def metric_label(metric: str | None) -> str:
    """The metric in words: 'mean squared error', or a scorer's rule ('1 - r2')."""
    if metric is None:
        return "error"
    return METRIC_LABELS.get(metric) or scorer_rule(metric)


def scorer_error(metric: str, estimator, X, y, sample_weight=None) -> float:
    """A fitted estimator's error by a scikit-learn scorer: minus a negated loss, else 1 - score.

    Scores that are best at 1 (r2, accuracy, roc_auc, f1, ...) become 1 - score;
    scikit-learn's negated losses (neg_*, max_error) become the loss itself.
    """
    from sklearn.metrics import get_scorer
    scorer = get_scorer(metric)
    score = float(scorer(estimator, X, y) if sample_weight is None else
                  scorer(estimator, X, y, sample_weight=sample_weight))
    if metric.startswith("neg_") or metric in NEGATED_LOSSES:
        return -score
    return 1.0 - score


def needs_proba(metric: str) -> bool:
    """True when the metric scores class probabilities rather than labels."""
    return metric == "log_loss"


def error_of(metric: str, y_true: np.ndarray, prediction: np.ndarray,
             labels: np.ndarray | None = None, sample_weight: np.ndarray | None = None) -> float:
    """Error of a prediction (weighted by rows when given); for log loss one column per label."""
    from sklearn import metrics as skm  # imported here: deciding commands never need it
    w = sample_weight
    if metric == "mse":
        return float(skm.mean_squared_error(y_true, prediction, sample_weight=w))
    if metric == "rmse":
        return float(np.sqrt(skm.mean_squared_error(y_true, prediction, sample_weight=w)))
    if metric == "mae":
        return float(skm.mean_absolute_error(y_true, prediction, sample_weight=w))
    if metric == "error_rate":
        return float(1.0 - skm.accuracy_score(y_true, prediction, sample_weight=w))
    if metric == "log_loss":
        return float(skm.log_loss(y_true, prediction, labels=labels, sample_weight=w))
    raise ValueError(f"unknown metric {metric!r}")


def errors_by_row(metric: str, y_true: np.ndarray, predictions: np.ndarray) -> np.ndarray:
    """The error of each row of `predictions` (one prediction per column) against y_true.

    The formulas of error_of for mse, rmse, mae and error_rate, in plain
    numpy: the fast paths score hundreds of predictions per task, and
    scikit-learn's input checks would cost more than the fits. error_of keeps
    scikit-learn's functions, so the fast-path tests have an independent reference.
    """
    if metric in ("mse", "rmse"):
        mse = np.mean((y_true - predictions) ** 2, axis=1)
        return mse if metric == "mse" else np.sqrt(mse)
    if metric == "mae":
        return np.mean(np.abs(y_true - predictions), axis=1)
    if metric == "error_rate":
        return 1.0 - np.mean(predictions == y_true, axis=1)
    raise ValueError(f"metric {metric!r} needs probabilities, not predictions")


def proba_for_labels(estimator, X, labels: np.ndarray) -> np.ndarray:
    """predict_proba with one column per label of the whole data set.

    A model fitted on a small subset may have seen fewer classes than exist;
    the classes it never saw get probability zero (log loss clips them).
    """
    proba = estimator.predict_proba(X)
    seen = list(getattr(estimator, "classes_", labels))
    if len(seen) == len(labels) and np.array_equal(seen, labels):
        return proba
    full = np.zeros((proba.shape[0], len(labels)))
    index = {label: i for i, label in enumerate(labels)}
    for j, label in enumerate(seen):
        full[:, index[label]] = proba[:, j]
    return full
