"""Load the user's table and check it before any fitting starts."""

from __future__ import annotations

import hashlib
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from pandas.api.types import is_numeric_dtype

from gridplan.common.checks import check_regular_file
from gridplan.common.errors import GridplanError, InputError
from gridplan.measuring.config import Config


@dataclass(frozen=True)
class Dataset:
    """Features, target and what the runner needs to know about them."""

    X: pd.DataFrame
    y: np.ndarray
    numeric: tuple[str, ...]
    categorical: tuple[str, ...]
    labels: np.ndarray | None      # sorted classes for classification
    fingerprint: str               # sha256 of the file's bytes
    warnings: tuple[str, ...] = ()
    groups: np.ndarray | None = None   # [resampling] groups column, per row
    time: np.ndarray | None = None     # [resampling] time column, per row
    weights: np.ndarray | None = None  # [data] weights column: per-row weights for fits and errors

    @property
    def n_rows(self) -> int:
        return len(self.y)


def file_fingerprint(path: Path) -> str:
    """sha256 of a file's bytes, read in chunks."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for chunk in iter(lambda: handle.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def read_table(path: Path) -> pd.DataFrame:
    """Read a CSV or Parquet file; one clear sentence when it cannot be read."""
    check_regular_file(path, "data file")
    suffix = path.suffix.lower()
    try:
        if suffix in (".parquet", ".pq"):
            frame = pd.read_parquet(path)
        elif suffix in (".csv", ".txt", ".tsv"):
            with open(path, "rb") as handle:
                head = handle.readline()
            if not head.strip():
                raise InputError(f"data file {path.name} is empty.")
            names = [n.strip() for n in head.decode("utf-8", "replace").strip().split(
                "\t" if suffix == ".tsv" else ",")]
            duplicated = sorted({n for n in names if names.count(n) > 1})
            if duplicated:
                raise InputError(f"data file {path.name} has duplicate column names: "
                                 f"{', '.join(duplicated)}.")
            frame = pd.read_csv(path, sep="\t" if suffix == ".tsv" else ",")
        else:
            raise InputError(f"data file {path.name} must be .csv, .tsv or .parquet, "
                             f"got {suffix or 'no extension'}.")
    except GridplanError:
        raise
    except pd.errors.EmptyDataError:
        raise InputError(f"data file {path.name} is empty.") from None
    except Exception as exc:  # parser errors of every kind end here
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InputError(f"data file {path.name} cannot be read: {first}.") from None
    if frame.columns.duplicated().any():
        dup = sorted(set(map(str, frame.columns[frame.columns.duplicated()])))
        raise InputError(f"data file {path.name} has duplicate column names: {', '.join(dup)}.")
    if len(frame) == 0:
        raise InputError(f"data file {path.name} has a header but no rows.")
    return frame


def load_dataset(config: Config) -> Dataset:
    """Read and check the data set a config names."""
    path = config.data_path
    frame = read_table(path)
    frame.columns = [str(c) for c in frame.columns]
    name = path.name
    if config.target not in frame.columns:
        raise InputError(f"{name} has no target column {config.target!r}; columns are "
                         f"{', '.join(frame.columns[:12])}{' ...' if frame.shape[1] > 12 else ''}.")
    resampling = {}
    if config.weights_column is not None:
        weights = _weights(frame, config.weights_column, name)
        resampling["weights"] = weights
        frame = frame.drop(columns=[config.weights_column])
    for key, column in (("groups", config.groups_column), ("time", config.time_column)):
        if column is None:
            continue
        if column not in frame.columns:
            raise InputError(f"{name} has no column {column!r} named in [resampling] {key}.")
        if frame[column].isna().any():
            raise InputError(f"{name}: the [resampling] {key} column {column!r} has "
                             f"{int(frame[column].isna().sum())} missing values.")
        resampling[key] = frame[column].to_numpy()
        frame = frame.drop(columns=[column])      # it sets the splits; it is no feature
    wanted = _feature_columns(config, frame)
    y_raw = frame[config.target]
    if y_raw.isna().all():
        raise InputError(f"{name}: the target column {config.target!r} is entirely missing.")
    if y_raw.isna().any():
        raise InputError(f"{name}: the target column {config.target!r} has "
                         f"{int(y_raw.isna().sum())} missing values; drop or fill those rows.")
    X = frame[list(wanted)].copy()
    missing = X.isna().sum()
    missing = missing[missing > 0]
    if len(missing) and config.missing != "impute":
        listed = ", ".join(f"{c} ({n})" for c, n in missing.items())
        raise InputError(f"{name} has missing feature values in {listed}; fill them or set "
                         f"missing = \"impute\" in [data].")
    numeric = tuple(c for c in wanted if is_numeric_dtype(X[c]) and not X[c].dtype == bool)
    infinite = {c: int(np.isinf(X[c].to_numpy(dtype=float)).sum()) for c in numeric}
    infinite = {c: n for c, n in infinite.items() if n}
    if infinite:
        listed = ", ".join(f"{c} ({n})" for c, n in infinite.items())
        raise InputError(f"{name} has infinite feature values in {listed}; replace them with "
                         f"finite numbers or leave the cells empty (missing = \"impute\" "
                         f"fills only empty cells).")
    categorical = tuple(c for c in wanted if c not in numeric)
    for c in numeric:
        X[c] = X[c].astype(float)
    for c in categorical:
        X[c] = X[c].astype(str).where(X[c].notna(), np.nan)
    notes = [f"{name}: column {c!r} is constant and carries no information."
             for c in wanted if X[c].nunique(dropna=True) <= 1]
    for note in notes:
        warnings.warn(note, stacklevel=2)

    labels = None
    if config.task == "regression":
        if not is_numeric_dtype(y_raw) or y_raw.dtype == bool:
            raise InputError(f"{name}: the target column {config.target!r} is not numeric, "
                             f"but the task is regression (set task = \"classification\"?).")
        y = y_raw.to_numpy(dtype=float)
        if not np.isfinite(y).all():
            raise InputError(f"{name}: the target column {config.target!r} has infinite values.")
        if np.all(y == y[0]):
            raise InputError(f"{name}: the target column {config.target!r} is constant (every "
                             f"value is {y[0]:g}), so there is nothing to learn.")
    else:
        y = y_raw.to_numpy()
        if not is_numeric_dtype(y_raw):
            y = y_raw.astype(str).to_numpy()
        labels, counts = np.unique(y, return_counts=True)
        if len(labels) < 2:
            raise InputError(f"{name}: the target column {config.target!r} has a single class "
                             f"({labels[0]!r}); classification needs at least two.")
        rare = [(lab, n) for lab, n in zip(labels, counts) if n < config.folds]
        if rare:
            lab, n = rare[0]
            raise InputError(f"{name}: class {lab!r} of {config.target!r} has only {n} rows, "
                             f"fewer than the {config.folds} folds.")
    return Dataset(X=X, y=y, numeric=numeric, categorical=categorical, labels=labels,
                   fingerprint=file_fingerprint(path), warnings=tuple(notes),
                   groups=resampling.get("groups"), time=resampling.get("time"),
                   weights=resampling.get("weights"))


def _weights(frame: pd.DataFrame, column: str, name: str) -> np.ndarray:
    """The [data] weights column: finite, non-negative numbers, not all zero."""
    if column not in frame.columns:
        raise InputError(f"{name} has no column {column!r} named in [data] weights.")
    values = frame[column]
    if not is_numeric_dtype(values) or values.dtype == bool:
        raise InputError(f"{name}: the weights column {column!r} must hold numbers.")
    weights = values.to_numpy(dtype=float)
    bad = int((~np.isfinite(weights) | (weights < 0)).sum())
    if bad:
        raise InputError(f"{name}: the weights column {column!r} has {bad} missing, "
                         f"negative or infinite values; weights must be finite and >= 0.")
    if not weights.any():
        raise InputError(f"{name}: the weights column {column!r} is zero everywhere.")
    return weights


def _feature_columns(config: Config, frame: pd.DataFrame) -> tuple[str, ...]:
    """Columns the model may use: listed features, feature-set columns, or all but the target."""
    name = config.data_path.name
    if config.capacity.feature_sets is not None:
        wanted = config.capacity.feature_sets[-1]
    elif config.features is not None:
        wanted = config.features
    else:
        wanted = tuple(c for c in frame.columns if c != config.target)
    absent = [c for c in wanted if c not in frame.columns]
    if absent:
        raise InputError(f"{name} has no column {absent[0]!r} named in the config.")
    if config.target in wanted:
        raise InputError(f"the target column {config.target!r} cannot also be a feature.")
    if not wanted:
        raise InputError(f"{name} has no feature columns besides the target {config.target!r}.")
    return tuple(wanted)
