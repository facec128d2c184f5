"""Imports flow one way: common <- measuring <- deciding <- showing <- faces (the top-level modules)."""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "gridplan"
ORDER = ["common", "measuring", "deciding", "showing", "faces"]
SIDES = ORDER[:-1]


def _layer(dotted: str) -> str:
    """The layer of a gridplan module given as 'gridplan.side.module' or 'gridplan.module'."""
    parts = dotted.split(".")
    if dotted == "gridplan.__version__":      # the package root, loaded before any module
        return "common"
    return parts[1] if len(parts) > 1 and parts[1] in SIDES else "faces"


def _module_of(path: Path) -> str:
    return ".".join(("gridplan", *path.relative_to(PACKAGE).with_suffix("").parts))


def _imported(path: Path) -> set[str]:
    """gridplan modules a file imports, at any depth (lazy imports inside functions count)."""
    out = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("gridplan"):
            if node.module == "gridplan" or node.module.split(".")[-1] in SIDES:
                out |= {f"{node.module}.{alias.name}" for alias in node.names}
            else:
                out.add(node.module)
        elif isinstance(node, ast.Import):
            out |= {a.name for a in node.names if a.name.startswith("gridplan.")}
    return out


def test_every_module_sits_in_a_side_or_on_top():
    folders = {p.parent.name for p in PACKAGE.rglob("*.py")} - {"gridplan"}
    assert folders <= set(SIDES), f"unknown subpackages {sorted(folders - set(SIDES))}"
    for side in SIDES:
        init = PACKAGE / side / "__init__.py"
        assert ast.get_docstring(ast.parse(init.read_text(encoding="utf-8"))), f"{side} says what it holds"
    on_top = {p.stem for p in PACKAGE.glob("*.py")}
    assert on_top == {"__init__", "__main__", "api", "cli", "grid", "backtest", "demo"}, on_top


def test_lower_layers_never_import_upper_ones():
    wrong = []
    for path in sorted(PACKAGE.rglob("*.py")):
        here = _module_of(path)
        for module in _imported(path):
            if ORDER.index(_layer(module)) > ORDER.index(_layer(here)):
                wrong.append(f"{here} ({_layer(here)}) imports {module} ({_layer(module)})")
    assert not wrong, "; ".join(wrong)


def test_an_upward_import_inside_a_function_is_seen(tmp_path):
    # The check itself: a lazy import of the showing side from a deciding module counts.
    path = tmp_path / "probe.py"
    path.write_text("def f():\n    from gridplan.showing import report\n    import gridplan.api\n")
    found = _imported(path)
    assert found == {"gridplan.showing.report", "gridplan.api"}
    assert [ORDER.index(_layer(m)) > ORDER.index("deciding") for m in sorted(found)] == [True, True]


def test_the_api_module_keeps_its_public_names():
    # Moving modules into sides must not take names away from gridplan.api.
    from gridplan import api
    for name in ("run", "check", "open_run", "export_cells", "fit_curves", "curves_report",
                 "default_run_dir", "effective_jobs", "Run", "RUN_FILES", "model_index",
                 "load_config", "Config", "GridplanError"):
        assert hasattr(api, name), name
