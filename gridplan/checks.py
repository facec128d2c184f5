"""Checks shared by several modules: paths a user hands over."""

from __future__ import annotations

import stat
from pathlib import Path

from gridplan.errors import GridplanError


def check_path_text(path: Path, what: str) -> None:
    """Refuse a path holding a NUL byte, which no file system accepts."""
    if "\0" in str(path):
        raise GridplanError(f"{what} path {str(path)!r} contains a NUL byte.")


def check_regular_file(path: Path, what: str) -> None:
    """Refuse a path that is missing, holds a NUL byte, or is not a regular file."""
    check_path_text(path, what)
    try:
        info = path.stat()
    except FileNotFoundError:
        raise GridplanError(f"{what} {str(path)!r} does not exist.") from None
    except OSError as exc:
        raise GridplanError(f"{what} {str(path)!r} cannot be opened: {exc.strerror}.") from None
    if not stat.S_ISREG(info.st_mode):
        kind = ("a directory" if stat.S_ISDIR(info.st_mode) else
                "a named pipe (FIFO)" if stat.S_ISFIFO(info.st_mode) else
                "a device" if stat.S_ISCHR(info.st_mode) or stat.S_ISBLK(info.st_mode) else
                "a socket" if stat.S_ISSOCK(info.st_mode) else "a special file")
        raise GridplanError(f"{what} {str(path)!r} is {kind}, not a regular file.")
