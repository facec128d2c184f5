"""gridplan: where should the next budget go - data, capacity or regularisation?

    >>> import gridplan
    >>> grid = gridplan.measure(estimator, X, y, capacity=("max_depth", [2, 4, 8]))
    >>> grid.advise(target=0.3).headline

Heavy modules (scikit-learn, pandas) load on first use of these names.
"""

__version__ = "0.1.0"
__all__ = ["measure", "Grid", "open_grid", "open_run", "advise", "GridplanError"]

_HOMES = {"measure": "gridplan.grid", "Grid": "gridplan.grid", "open_grid": "gridplan.grid",
          "open_run": "gridplan.api", "advise": "gridplan.advisor",
          "GridplanError": "gridplan.errors"}


def __getattr__(name: str):
    """Import the public names lazily, so `import gridplan` stays quick."""
    if name in _HOMES:
        import importlib
        return getattr(importlib.import_module(_HOMES[name]), name)
    raise AttributeError(f"module 'gridplan' has no attribute {name!r}")
