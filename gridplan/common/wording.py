"""Small helpers for the words every view shares."""

from __future__ import annotations


def plural(count: int, word: str, many: str | None = None) -> str:
    """'1 repeat', '2 repeats', '1,200 rows'."""
    return f"{count:,} {word if count == 1 else (many or word + 's')}"


def sig(value: float, digits: int = 3) -> str:
    """A number to `digits` significant figures, trailing zeros kept: 5.00, 0.0402, 1.44e+04."""
    text = f"{value:#.{digits}g}"
    return text[:-1] if text.endswith(".") else text


def money(value: float | None, missing: str = "-") -> str:
    """A cost in the user's units: whole amounts without decimals (14,440), others with two (2.50)."""
    if value is None:
        return missing
    return f"{value:,.0f}" if float(value).is_integer() else f"{value:,.2f}"


def number(value: float | None, digits: int = 3) -> str:
    """`sig`, with "-" for a missing value."""
    return "-" if value is None else sig(value, digits)


def interval(pair) -> str:
    """'[0.101, 0.134]', or "-" when the interval is missing."""
    return "-" if not pair or pair[0] is None else f"[{number(pair[0])}, {number(pair[1])}]"
