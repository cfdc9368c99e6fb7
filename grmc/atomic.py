"""Atomic file writes: a temporary file in the target's folder, renamed over it on success.

A failed or interrupted write never leaves a partial file where a good one is expected
(rename within one filesystem is atomic on POSIX).
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

__all__ = ["atomic_target", "write_text_atomic"]


@contextmanager
def atomic_target(path: str | os.PathLike[str]) -> Iterator[Path]:
    """Yield a temporary path next to ``path``; rename it to ``path`` if the block succeeds,
    delete it if the block raises (including KeyboardInterrupt)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    os.close(fd)
    try:
        yield Path(tmp)
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise


def write_text_atomic(path: str | os.PathLike[str], text: str) -> Path:
    """Write UTF-8 text atomically (flushed to disk before the rename)."""
    with atomic_target(path) as tmp, open(tmp, "w", encoding="utf-8", newline="\n") as fh:
        fh.write(text)
        fh.flush()
        os.fsync(fh.fileno())
    return Path(path)
