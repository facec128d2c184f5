"""Turn results into plain JSON values (numpy scalars to Python, NaN and inf to None)."""

from __future__ import annotations

import math
from typing import Any

import numpy as np


def plain(value: Any) -> Any:
    """A copy of `value` that json.dumps accepts: dicts, lists, bool, int, float or None."""
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain(v) for v in value]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(value) else None
    return value
