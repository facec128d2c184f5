"""Files written whole or not at all."""

from __future__ import annotations

import os
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator


@contextmanager
def replaced(target: Path) -> Iterator[Path]:
    """A temporary path beside `target` to write to; it replaces `target` when the block
    ends without an error and is removed otherwise, so no half-written file is left."""
    temporary = target.with_name(f".{target.name}.{os.getpid()}.partial")
    try:
        yield temporary
        os.replace(temporary, target)
    finally:
        temporary.unlink(missing_ok=True)
