"""The one exception type that reaches users as a single clear sentence."""


class GridplanError(Exception):
    """A problem with the user's input or environment, stated in one sentence.

    The CLI prints the message and exits non-zero; no traceback is shown.
    """
