"""Checks shared by several modules: paths, confidences and targets a user hands over.

One rule each, used by the config, the library and every command, so that
they cannot drift apart. Messages name the parameter as the caller passes it.
"""

from __future__ import annotations

import math
import stat
from pathlib import Path

from gridplan.common.errors import InputError

#: Bootstrap resamples per curve: one default for every command and function
#: (so they agree on one run), and the most a curve may ask for.
DEFAULT_BOOT = 100
MAX_BOOT = 10_000

#: Confidence for bands and plans: at least even odds, below certainty.
CONFIDENCE_RANGE = "[0.5, 1)"


def check_confidence(value, name: str = "confidence") -> float:
    """A confidence in [0.5, 1): bands and plans below even odds mean nothing useful."""
    if isinstance(value, bool) or not isinstance(value, (int, float)) \
            or not 0.5 <= value < 1:
        raise InputError(f"{name} must lie in {CONFIDENCE_RANGE}, got {value!r}.")
    return float(value)


def check_target(value, name: str = "target") -> float:
    """A target error: a finite number above zero."""
    if isinstance(value, bool) or not isinstance(value, (int, float)) \
            or not math.isfinite(value) or value <= 0:
        raise InputError(f"{name} must be a positive error, got {value!r}.")
    return float(value)


def check_boot(n_boot, name: str = "n_boot") -> int:
    """Bootstrap resamples per curve: a whole number from 2 to MAX_BOOT."""
    if isinstance(n_boot, bool) or not isinstance(n_boot, int) or not 2 <= n_boot <= MAX_BOOT:
        raise InputError(f"{name}: the bootstrap takes 2 to {MAX_BOOT:,} resamples per curve, "
                         f"got {n_boot!r}.")
    return n_boot


def check_metric(metric: str, task: str, where: str = "metric") -> str:
    """A metric that fits the task: one of gridplan's for that task, or a scikit-learn scorer name."""
    from gridplan.common.metrics import CLASSIFICATION_METRICS, REGRESSION_METRICS, is_scorer
    allowed = REGRESSION_METRICS if task == "regression" else CLASSIFICATION_METRICS
    if metric not in allowed and (metric in REGRESSION_METRICS + CLASSIFICATION_METRICS
                                  or not is_scorer(metric)):
        raise InputError(f"{where} {metric!r} does not fit a {task} task; use one of "
                         f"{', '.join(allowed)}, or a scikit-learn scorer name such as "
                         f"\"r2\" or \"roc_auc\".")
    return metric


def check_path_text(path: Path, what: str) -> None:
    """Refuse a path holding a NUL byte, which no file system accepts."""
    if "\0" in str(path):
        raise InputError(f"{what} path {str(path)!r} contains a NUL byte.")


def check_regular_file(path: Path, what: str) -> None:
    """Refuse a path that is missing, holds a NUL byte, or is not a regular file."""
    check_path_text(path, what)
    try:
        info = path.stat()
    except FileNotFoundError:
        raise InputError(f"{what} {str(path)!r} does not exist.") from None
    except OSError as exc:
        raise InputError(f"{what} {str(path)!r} cannot be opened: {exc.strerror}.") from None
    if not stat.S_ISREG(info.st_mode):
        kind = ("a directory" if stat.S_ISDIR(info.st_mode) else
                "a named pipe (FIFO)" if stat.S_ISFIFO(info.st_mode) else
                "a device" if stat.S_ISCHR(info.st_mode) or stat.S_ISBLK(info.st_mode) else
                "a socket" if stat.S_ISSOCK(info.st_mode) else "a special file")
        raise InputError(f"{what} {str(path)!r} is {kind}, not a regular file.")
