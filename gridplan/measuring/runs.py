"""Reading a run folder: the run seen through one model table, and the folder's own files.

The store is where the measuring and deciding sides meet; this module opens
it for reading (`open_run`), so the deciding and showing sides never import
the API on top.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from gridplan.common.checks import check_path_text
from gridplan.common.errors import GridplanError
from gridplan.measuring.config import Config, parse_config
from gridplan.measuring.store import CONFIG_COPY, CURVES_NAME, MODELS_KEY, STORE_NAME, Store

LOCK_NAME = "run.lock"
#: Cell tables kept in memory, so one command reading a run several times reads the store once.
KEPT_TABLES = 8
_CELLS: dict[tuple[str, int], tuple[tuple, pd.DataFrame]] = {}


def _store_stamp(run_dir: Path) -> tuple:
    """Inode, size and modification time of the store and its journal files: change with every write."""
    stamp = []
    for name in (STORE_NAME, f"{STORE_NAME}-wal", f"{STORE_NAME}-journal"):
        try:
            status = (Path(run_dir) / name).stat()
            stamp.append((name, status.st_ino, status.st_size, status.st_mtime_ns))
        except OSError:
            stamp.append((name, None, None, None))
    return tuple(stamp)


@dataclass
class Run:
    """A run folder opened for reading, seen through one of its model tables (`model`)."""

    run_dir: Path
    meta: dict
    axes: dict
    config: Config | None
    model: int = 0

    @property
    def model_names(self) -> list[str]:
        """Every model table's name, in config order (one entry for a single [model])."""
        entries = self.meta.get(MODELS_KEY) or []
        if not entries:
            return [self.meta.get("model_label") or self.meta.get("model") or "model"]
        return [e.get("model_label") or e.get("model") for e in entries]

    @property
    def model_name(self) -> str:
        return self.model_names[self.model]

    def axis_labels(self, axis: str) -> list[str]:
        """Ordered labels of one axis as text (stored as (label, value) pairs or plain labels)."""
        return [str(e[0]) if isinstance(e, (list, tuple)) else str(e) for e in self.axes.get(axis, [])]

    def cells(self) -> pd.DataFrame:
        """This model's tidy per-fold table (a fresh copy; read once per state of the store)."""
        key = (str(Path(self.run_dir).resolve()), self.model)
        stamp = _store_stamp(self.run_dir)
        kept = _CELLS.get(key)
        if kept is None or kept[0] != stamp:
            with Store.open_existing(self.run_dir, model=self.model) as store:
                kept = (stamp, store.cells())
            _CELLS.pop(key, None)
            _CELLS[key] = kept
            while len(_CELLS) > KEPT_TABLES:
                _CELLS.pop(next(iter(_CELLS)))
        return kept[1].copy()

    def all_cells(self) -> pd.DataFrame:
        """Every model's per-fold table, one after another (the `model` column tells them apart)."""
        frames = [self.for_model(i).cells() for i in range(len(self.model_names))]
        return pd.concat(frames, ignore_index=True) if len(frames) > 1 else frames[0]

    def for_model(self, model: str | int) -> "Run":
        """The same run seen through another model table (by name or index)."""
        return open_run(self.run_dir, model=model)


def model_index(names: list[str], model: str | int | None, where: str = "model") -> int:
    """The index of a model table named `model` (None: the first); a clear error otherwise."""
    if model is None:
        return 0
    if isinstance(model, int) and not isinstance(model, bool):
        if 0 <= model < len(names):
            return model
    elif model in names:
        return names.index(model)
    raise GridplanError(f"{where} {model!r} is not a model of this run; it has "
                        f"{', '.join(names)}.")


def open_run(run_dir: str | Path | Run, model: str | int | None = None) -> Run:
    """Open a run folder written by `run` (today's or from another machine).

    `model` names the model table to see (default: the first). A Run (one
    kept in memory, say) is returned as it is, seen through that model.
    """
    if isinstance(run_dir, Run):
        return run_dir if model is None else run_dir.for_model(model)
    run_dir = Path(run_dir)
    check_path_text(run_dir, "run folder")
    with Store.open_existing(run_dir) as store:
        index = model_index(Run(run_dir, store.meta(), {}, None).model_names, model)
        store.model = index            # the same store, seen through that model
        meta, axes = store.meta(), store.axes()
    config = None
    copy = run_dir / CONFIG_COPY
    if copy.is_file():
        import tomllib
        try:
            text = copy.read_text(encoding="utf-8")
            config = parse_config(tomllib.loads(text), copy.resolve(), text)
        except (GridplanError, tomllib.TOMLDecodeError, UnicodeDecodeError, OSError):
            config = None      # the store alone still describes the run
    if config is not None and len(config.models) > 1:
        config = config.for_model(index) if index < len(config.models) else None
    return Run(run_dir=run_dir, meta=meta, axes=axes, config=config, model=index)


#: Files of a run folder that an export may never replace.
RUN_FILES = (STORE_NAME, f"{STORE_NAME}-wal", f"{STORE_NAME}-shm", f"{STORE_NAME}-journal",
             CONFIG_COPY, LOCK_NAME, CURVES_NAME)
EXPORTS_KEY = "exports"   # store meta: resolved path -> sha256 of each export written


def refuse_run_file(run_dir: str | Path, out: str | Path, example: str | Path) -> Path:
    """The resolved output path, refused when it is one of the run folder's own files."""
    run_dir, out = Path(run_dir), Path(out)
    check_path_text(out, "output")
    target = out.resolve()
    if target.parent == run_dir.resolve() and target.name in RUN_FILES:
        raise GridplanError(f"{out} is the run folder's own {target.name}; write to another "
                            f"file name, e.g. {example}.")
    return target


