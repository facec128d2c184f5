"""Small helpers for the words every view shares."""

from __future__ import annotations


def plural(count: int, word: str, many: str | None = None) -> str:
    """'1 repeat', '2 repeats', '1,200 rows'."""
    return f"{count:,} {word if count == 1 else (many or word + 's')}"
