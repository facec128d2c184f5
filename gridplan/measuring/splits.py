"""Cross-validation folds, nested training subsets and the training-size ladder.

Each training fold is put in a fixed random order once; the subset of size m is
its first m rows, so smaller subsets are contained in larger ones. For
classification the order interleaves the classes so that every prefix keeps
the class proportions of the fold (up to rounding).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from gridplan.common.errors import InputError


@dataclass(frozen=True)
class Fold:
    """One resampling split: the ordered training rows and the held-out rows."""

    repeat: int
    fold: int
    train: np.ndarray   # ordered: train[:m] is the subset of size m
    test: np.ndarray


def make_folds(y: np.ndarray, *, classification: bool, folds: int, repeats: int,
               seed: int, groups: np.ndarray | None = None,
               time: np.ndarray | None = None) -> list[Fold]:
    """K folds x R repeats, stratified for classification, identical for a given seed.

    With `groups`, no group is split across training and validation rows
    (grouped K-fold, stratified for classification; repeats shuffle the
    groups). With `time`, forward-in-time splits (see `time_folds`).
    """
    if time is not None:
        return time_folds(time, folds=folds, repeats=repeats)
    if groups is not None:
        return grouped_folds(y, groups, classification=classification, folds=folds,
                             repeats=repeats, seed=seed)
    if classification:
        from sklearn.model_selection import RepeatedStratifiedKFold
        splitter = RepeatedStratifiedKFold(n_splits=folds, n_repeats=repeats, random_state=seed)
        splits = splitter.split(np.zeros(len(y)), y)
    else:
        splits = repeated_kfold(len(y), folds=folds, repeats=repeats, seed=seed)
    out = []
    for k, (train, test) in enumerate(splits):
        repeat, fold = divmod(k, folds)
        rng = np.random.default_rng([seed, repeat, fold])
        out.append(Fold(repeat=repeat, fold=fold, train=train[nested_order(y[train], rng,
                                                                           classification)],
                        test=test))
    return out


def repeated_kfold(n_rows: int, *, folds: int, repeats: int, seed: int):
    """(training rows, held-out rows) as ``RepeatedKFold(folds, repeats, random_state=seed)`` gives them.

    Each repeat shuffles the row numbers with one shared ``RandomState(seed)``
    stream and cuts them into `folds` consecutive blocks, the first
    n_rows % folds of them one row longer; both index arrays come sorted. In
    numpy alone, so a run that needs no scikit-learn model does not import it.
    """
    if not 2 <= folds <= n_rows:
        raise InputError(f"{folds} folds cannot be cut from {n_rows:,} rows; use 2 to {n_rows:,}.")
    rng = np.random.RandomState(seed)
    rows = np.arange(n_rows)
    sizes = np.full(folds, n_rows // folds)
    sizes[:n_rows % folds] += 1
    stops = np.cumsum(sizes)
    for _ in range(repeats):
        order = rows.copy()
        rng.shuffle(order)
        for stop, size in zip(stops, sizes):
            held_out = np.zeros(n_rows, dtype=bool)
            held_out[order[stop - size:stop]] = True
            yield rows[~held_out], rows[held_out]


def grouped_folds(y: np.ndarray, groups: np.ndarray, *, classification: bool, folds: int,
                  repeats: int, seed: int) -> list[Fold]:
    """Grouped K-fold (stratified for classification), each repeat with its own shuffle of groups."""
    from sklearn.model_selection import GroupKFold, StratifiedGroupKFold
    n_groups = len(np.unique(groups))
    if n_groups < folds:
        raise InputError(f"grouped resampling needs at least as many groups as folds: "
                         f"{n_groups} groups for {folds} folds.")
    out = []
    for repeat in range(repeats):
        kind = StratifiedGroupKFold if classification else GroupKFold
        splitter = kind(folds, shuffle=True, random_state=seed + repeat)
        for fold, (train, test) in enumerate(splitter.split(np.zeros(len(y)), y, groups)):
            rng = np.random.default_rng([seed, repeat, fold])
            out.append(Fold(repeat=repeat, fold=fold,
                            train=train[nested_order(y[train], rng, classification)], test=test))
    return out


def time_folds(time: np.ndarray, *, folds: int, repeats: int = 1) -> list[Fold]:
    """Forward-in-time splits: K validation blocks in time order, each trained on what came before.

    Rows are ordered by time (ties kept in file order); the data are cut into
    K + 1 blocks (scikit-learn's TimeSeriesSplit) and block k + 1 is validated
    on the rows before it. The training rows run from the most recent back,
    so the subset of size m is the latest m rows before the block: less
    history, not a random thinning.
    """
    from sklearn.model_selection import TimeSeriesSplit
    if repeats != 1:
        raise InputError(f"forward-in-time splits have one order only; set repeats = 1 "
                         f"(got {repeats}).")
    order = np.argsort(np.asarray(time), kind="stable")
    out = []
    for fold, (train, test) in enumerate(TimeSeriesSplit(n_splits=folds).split(order)):
        out.append(Fold(repeat=0, fold=fold, train=order[train][::-1], test=order[test]))
    return out


def nested_order(y_train: np.ndarray, rng: np.random.Generator, classification: bool) -> np.ndarray:
    """The fixed order of a training fold: its first m rows are the subset of size m."""
    return _stratified_order(y_train, rng) if classification else rng.permutation(len(y_train))


def _stratified_order(y_train: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """An order whose every prefix holds the classes in their fold proportions."""
    keys = np.empty(len(y_train))
    for label in np.unique(y_train):
        members = np.flatnonzero(y_train == label)
        ranks = rng.permutation(len(members))
        keys[members] = (ranks + rng.uniform(size=len(members))) / len(members)
    return np.argsort(keys, kind="stable")


def size_ladder(full: int, *, values: tuple[int, ...] | None, count: int,
                smallest: int | None, where: str = "[sizes]") -> tuple[int, ...]:
    """Training sizes: the explicit list, or a geometric ladder ending at the full fold."""
    if values is not None:
        if values[-1] > full:
            raise InputError(f"{where} values asks for {values[-1]} training rows, but a "
                             f"training fold holds only {full}.")
        return tuple(int(v) for v in values)
    start = smallest if smallest is not None else max(10, full // 50)
    if start > full:
        raise InputError(f"{where} smallest = {start} is larger than a training fold ({full} rows).")
    if count == 1 or start == full:
        return (full,)
    ladder = np.unique(np.round(np.geomspace(start, full, count)).astype(int))
    return tuple(int(v) for v in ladder)


def smallest_training_fold(folds: list[Fold]) -> int:
    """The size every fold can supply: the smallest training fold."""
    return min(len(f.train) for f in folds)
