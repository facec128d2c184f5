"""Small builders shared by the tests: write a data frame and a config, run it."""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pandas as pd

from gridplan import api
from gridplan.measuring.config import load_config


def toml_key(key: str) -> str:
    """A bare key where TOML allows one, else a quoted key."""
    return key if re.fullmatch(r"[A-Za-z0-9_-]+", key) else toml_value(key)


def toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return json.dumps(value)   # JSON's string escapes are valid TOML basic-string escapes
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{toml_key(k)} = {toml_value(v)}" for k, v in value.items()) + " }"
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    if isinstance(value, float):
        return repr(value)
    return str(value)


def write_config(folder: Path, sections: dict, name: str = "grid.toml") -> Path:
    """Write a TOML config from nested dicts (one level of sections)."""
    lines = []
    for section, body in sections.items():
        lines.append(f"[{section}]")
        lines.extend(f"{k} = {toml_value(v)}" for k, v in body.items())
        lines.append("")
    path = folder / name
    path.write_text("\n".join(lines), encoding="utf-8")
    return path


def linear_data(n: int, p: int, sigma: float, seed: int) -> pd.DataFrame:
    """Gaussian design, y = X beta + N(0, sigma^2) noise."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, p))
    beta = rng.normal(size=p)
    y = X @ beta + 1.5 + rng.normal(scale=sigma, size=n)
    frame = pd.DataFrame(X, columns=[f"x{i}" for i in range(p)])
    frame["y"] = y
    return frame


def quadratic_data(n: int, sigma: float, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.uniform(-2, 2, n)
    y = 1.0 - 0.5 * x + 0.8 * x ** 2 + rng.normal(scale=sigma, size=n)
    return pd.DataFrame({"x": x, "y": y})


def run_frame(tmp: Path, frame: pd.DataFrame, sections: dict, *, jobs: int = 1,
              out: str = "run", name: str = "grid.toml") -> tuple[Path, pd.DataFrame]:
    """Write data and config, run the grid, return (run folder, per-fold table)."""
    frame.to_csv(tmp / "data.csv", index=False)
    sections = {"data": {"path": "data.csv", **sections.get("data", {})},
                **{k: v for k, v in sections.items() if k != "data"}}
    config = load_config(write_config(tmp, sections, name))
    run_dir = api.run(config, out=tmp / out, jobs=jobs)
    return run_dir, api.open_run(run_dir).cells()


def without_times(cells: pd.DataFrame) -> pd.DataFrame:
    return cells.drop(columns=["fit_seconds"]).reset_index(drop=True)
