"""Imports flow one way: base <- measuring <- deciding <- showing <- faces on top."""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "gridplan"

LAYERS = {
    "base": ["errors", "checks", "wording", "jsonable", "metrics", "results"],
    "measuring": ["config", "data", "splits", "families", "fastpaths", "runner", "store", "spec",
                  "cluster", "runs"],
    "deciding": ["batchfit", "curves", "calibration", "curvestore", "diagnosis", "planner",
                 "advisor"],
    "showing": ["views", "report"],
    "faces": ["api", "cli", "grid", "backtest", "demo", "__main__", "__init__"],
}
ORDER = list(LAYERS)
RANK = {module: ORDER.index(layer) for layer, modules in LAYERS.items() for module in modules}


def _imported(path: Path) -> set[str]:
    """gridplan modules a file imports, at any depth (lazy imports inside functions count)."""
    out = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("gridplan"):
            if node.module == "gridplan":
                out |= {alias.name for alias in node.names}
            else:
                out.add(node.module.split(".")[1])
        elif isinstance(node, ast.Import):
            out |= {a.name.split(".")[1] for a in node.names if a.name.startswith("gridplan.")}
    return out


def test_every_module_has_a_layer():
    modules = {p.stem for p in PACKAGE.glob("*.py")}
    assert modules == set(RANK), f"place {sorted(modules ^ set(RANK))} in LAYERS"


def test_lower_layers_never_import_upper_ones():
    wrong = []
    for path in sorted(PACKAGE.glob("*.py")):
        for module in _imported(path):
            if module in RANK and RANK[module] > RANK[path.stem]:
                wrong.append(f"{path.stem} ({ORDER[RANK[path.stem]]}) imports {module} "
                             f"({ORDER[RANK[module]]})")
    assert not wrong, "; ".join(wrong)
