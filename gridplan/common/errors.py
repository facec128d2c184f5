"""The exceptions that reach users as a single clear sentence.

`GridplanError` is the base every command catches (it prints the message and
exits 1, no traceback). Its kinds: `InputError` for what the user handed over
(also a `ValueError`), `NumericalError` for a computation that could not
finish on the data, `ClusterError` for a scheduler or its workers.
"""


class GridplanError(Exception):
    """A problem stated in one sentence; the CLI prints it and exits non-zero."""


class InputError(GridplanError, ValueError):
    """Bad input: a file, section, key, column, option or value, named in the message."""


class NumericalError(GridplanError):
    """A computation (a curve fit, say) that could not finish on these numbers."""


class ClusterError(GridplanError):
    """A dask scheduler or its workers that cannot be reached or used."""
