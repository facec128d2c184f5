"""gridplan: where should the next budget go - data, capacity or regularisation?"""

__version__ = "0.1.0"
