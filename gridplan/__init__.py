"""gridplan: where should the next budget go - data, capacity or regularisation?

    >>> import gridplan
    >>> grid = gridplan.measure(estimator, X, y, capacity=("max_depth", [2, 4, 8]))
    >>> grid.advise(target=0.3).headline

Heavy modules (scikit-learn, pandas) load on first use of these names.
"""

__version__ = "0.1.0"
__all__ = ["measure", "Grid", "open_grid", "open_run", "advise", "GridplanError"]

#: public name -> (module, name there); `open_run` gives a Grid (gridplan.api.open_run a Run).
_HOMES = {"measure": ("gridplan.grid", "measure"), "Grid": ("gridplan.grid", "Grid"),
          "open_grid": ("gridplan.grid", "open_grid"), "open_run": ("gridplan.grid", "open_grid"),
          "advise": ("gridplan.deciding.advisor", "advise"),
          "GridplanError": ("gridplan.common.errors", "GridplanError")}


def __getattr__(name: str):
    """Import the public names lazily, so `import gridplan` stays quick."""
    if name in _HOMES:
        import importlib
        module, attr = _HOMES[name]
        return getattr(importlib.import_module(module), attr)
    raise AttributeError(f"module 'gridplan' has no attribute {name!r}")
