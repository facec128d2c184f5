"""The run store: one SQLite file per run folder, written as folds finish.

The measuring side writes through `Store.write_rows`; the deciding side reads
`Store.cells()`. Every write is one transaction, so a killed run leaves a
consistent store that holds every committed row exactly once.
"""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path
from typing import Any, Iterable, NamedTuple

import pandas as pd

from gridplan.common.errors import GridplanError

STORE_NAME = "store.sqlite"
CONFIG_COPY = "config.toml"
CURVES_NAME = "curves.json"      # fitted curves kept by gridplan.deciding.curvestore

SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS axes (
    axis TEXT NOT NULL, idx INTEGER NOT NULL, label TEXT NOT NULL, value TEXT NOT NULL,
    PRIMARY KEY (axis, idx));
CREATE TABLE IF NOT EXISTS folds (
    model_index INTEGER NOT NULL DEFAULT 0,
    capacity_index INTEGER NOT NULL, regularization_index INTEGER NOT NULL,
    size_index INTEGER NOT NULL, repeat INTEGER NOT NULL, fold INTEGER NOT NULL,
    train_size INTEGER NOT NULL, train_error REAL, validation_error REAL,
    fit_seconds REAL NOT NULL, status TEXT NOT NULL, path TEXT NOT NULL, message TEXT NOT NULL,
    PRIMARY KEY (model_index, capacity_index, regularization_index, size_index, repeat, fold));
"""
#: Stores written before several models per run: their folds table has no
#: model_index; it is rebuilt once, every row becoming model 0.
_UPGRADE = """
ALTER TABLE folds RENAME TO folds_single;
{create}
INSERT INTO folds (model_index, {fields}) SELECT 0, {fields} FROM folds_single;
DROP TABLE folds_single;
"""
#: Store meta key: one entry per model table (name, family, params and axes).
MODELS_KEY = "models"
#: Per-model meta fields a model's view of the store takes from its entry.
MODEL_META = ("model", "model_label", "family", "capacity_param", "regularization_param")

EXPORT_COLUMNS = ["model", "capacity", "regularization", "train_size", "repeat", "fold",
                  "train_error", "validation_error", "fit_seconds", "status", "path",
                  "message", "model_index", "capacity_index", "regularization_index",
                  "size_index"]


class FoldRow(NamedTuple):
    """One fit: a (capacity, regularisation, size) cell on one fold of one repeat.

    A named tuple rather than a dataclass: runs create thousands per second.
    """

    capacity_index: int
    regularization_index: int
    size_index: int
    repeat: int
    fold: int
    train_size: int
    train_error: float | None
    validation_error: float | None
    fit_seconds: float
    status: str          # "ok" or "failed"
    path: str            # "plain", "svd", "plain-fallback", "tree-truncation"
    message: str = ""

    def astuple(self) -> tuple[Any, ...]:
        """The row's values in ROW_FIELDS order."""
        return tuple(self)


ROW_FIELDS = FoldRow._fields


class Store:
    """A run's SQLite store, seen through one model table (`model`, an index).

    Rows written go to that model; rows, meta and axes read are that model's.
    A run of one model table is model 0 throughout.
    """

    def __init__(self, path: Path, model: int = 0):
        self.path = Path(path)
        self.model = int(model)
        try:
            self.connection = sqlite3.connect(self.path, timeout=30.0)
            self.connection.execute("PRAGMA journal_mode=WAL")
            self.connection.execute("PRAGMA synchronous=NORMAL")
            self.connection.executescript(SCHEMA)
            self._upgrade()
        except sqlite3.DatabaseError as exc:
            raise GridplanError(f"store {self.path} cannot be opened: {exc}.") from None

    def _upgrade(self) -> None:
        columns = [row[1] for row in self.connection.execute("PRAGMA table_info(folds)")]
        if "model_index" in columns:
            return
        create = SCHEMA[SCHEMA.index("CREATE TABLE IF NOT EXISTS folds"):].strip()
        script = _UPGRADE.format(create=create, fields=", ".join(ROW_FIELDS))
        self.connection.executescript(f"BEGIN; {script} COMMIT;")

    @classmethod
    def open_existing(cls, run_dir: Path, model: int = 0) -> "Store":
        """Open the store of a finished or partial run, refusing a folder without one."""
        path = Path(run_dir) / STORE_NAME
        if not path.is_file():
            raise GridplanError(f"{run_dir} is not a gridplan run folder (no {STORE_NAME}).")
        return cls(path, model)

    def close(self) -> None:
        self.connection.close()

    def __enter__(self) -> "Store":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- metadata ---------------------------------------------------------
    def set_meta(self, values: dict[str, Any]) -> None:
        with self.connection:
            self.connection.executemany(
                "INSERT OR REPLACE INTO meta (key, value) VALUES (?, ?)",
                [(k, json.dumps(v)) for k, v in values.items()])

    def meta(self) -> dict[str, Any]:
        """The run's meta, with this model's own fields (MODEL_META) from its entry."""
        rows = self.connection.execute("SELECT key, value FROM meta").fetchall()
        meta = {k: json.loads(v) for k, v in rows}
        models = meta.get(MODELS_KEY) or []
        if self.model < len(models):
            meta.update({k: models[self.model][k] for k in MODEL_META if k in models[self.model]})
        elif self.model > 0:
            raise GridplanError(f"store {self.path} has no model number {self.model + 1}.")
        return meta

    def set_axes(self, axes: dict[str, list[tuple[str, Any]]]) -> None:
        with self.connection:
            self.connection.execute("DELETE FROM axes")
            self.connection.executemany(
                "INSERT INTO axes (axis, idx, label, value) VALUES (?, ?, ?, ?)",
                [(axis, i, label, json.dumps(value))
                 for axis, entries in axes.items() for i, (label, value) in enumerate(entries)])

    def axes(self) -> dict[str, list[tuple[str, Any]]]:
        """This model's axes: label and value per index (model 0's are also a table)."""
        if self.model > 0:
            entry = self.meta()[MODELS_KEY][self.model]
            return {axis: [(label, value) for label, value in entries]
                    for axis, entries in entry["axes"].items()}
        out: dict[str, list[tuple[str, Any]]] = {}
        for axis, _, label, value in self.connection.execute(
                "SELECT axis, idx, label, value FROM axes ORDER BY axis, idx"):
            out.setdefault(axis, []).append((label, json.loads(value)))
        return out

    # -- fold rows --------------------------------------------------------
    def write_rows(self, rows: Iterable[FoldRow]) -> int:
        """Insert or replace rows in one transaction; returns how many were written."""
        batch = [(self.model, *r.astuple()) for r in rows]
        if not batch:
            return 0
        placeholders = ", ".join("?" for _ in range(len(ROW_FIELDS) + 1))
        try:
            with self.connection:
                self.connection.executemany(
                    f"INSERT OR REPLACE INTO folds (model_index, {', '.join(ROW_FIELDS)}) "
                    f"VALUES ({placeholders})", batch)
        except sqlite3.OperationalError as exc:
            raise GridplanError(f"cannot write to the store {self.path}: {exc}; finished cells "
                                f"up to now are kept.") from None
        return len(batch)

    def finished_keys(self) -> set[tuple[int, int, int, int, int]]:
        """Keys of fold rows that finished successfully (failed rows are retried)."""
        rows = self.connection.execute(
            "SELECT capacity_index, regularization_index, size_index, repeat, fold "
            "FROM folds WHERE status = 'ok' AND model_index = ?", (self.model,))
        return {tuple(r) for r in rows}

    def fold_rows(self) -> pd.DataFrame:
        """This model's fold rows with the index columns only."""
        return pd.read_sql_query(
            f"SELECT {', '.join(ROW_FIELDS)} FROM folds WHERE model_index = ? ORDER BY "
            "capacity_index, regularization_index, size_index, repeat, fold", self.connection,
            params=(self.model,))

    def cells(self) -> pd.DataFrame:
        """This model's tidy per-fold table with axis labels (see EXPORT_COLUMNS)."""
        frame = self.fold_rows()
        axes = self.axes()
        capacity = [label for label, _ in axes.get("capacity", [])]
        regularization = [label for label, _ in axes.get("regularization", [])]
        meta = self.meta()
        frame.insert(0, "model", meta.get("model_label") or meta.get("model") or "")
        frame.insert(1, "capacity", [capacity[i] for i in frame["capacity_index"]])
        frame.insert(2, "regularization", [regularization[i] for i in frame["regularization_index"]])
        frame["model_index"] = self.model
        return frame[EXPORT_COLUMNS]

    def integrity_ok(self) -> bool:
        """SQLite's own integrity check."""
        return self.connection.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
