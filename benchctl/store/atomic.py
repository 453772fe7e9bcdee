"""Atomic file replacement: write a temporary file beside the target, fsync, ``os.replace``."""

from __future__ import annotations

import contextlib
import json
import os
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import IO, Any


def write_atomic(path: Path, writer: Callable[[IO[bytes]], None]) -> None:
    """Replace ``path`` with what ``writer`` writes, so a reader sees the old or the new file.

    The data goes to a temporary file in the same directory (same file system), is flushed
    and fsync'd, then renamed over ``path`` with :func:`os.replace`, which is atomic on
    POSIX and Windows. On any error the temporary file is removed and ``path`` is left as
    it was.
    """
    path = Path(path)
    fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            writer(fh)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp_name, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp_name)
        raise
    _fsync_dir(path.parent)


def write_text_atomic(path: Path, text: str) -> None:
    """Atomically replace ``path`` with ``text`` (UTF-8)."""
    data = text.encode("utf-8")
    write_atomic(path, lambda fh: fh.write(data))


def write_json_atomic(path: Path, obj: Any) -> None:
    """Atomically replace ``path`` with ``obj`` as indented JSON (UTF-8, trailing newline)."""
    write_text_atomic(path, json.dumps(obj, indent=2, ensure_ascii=False) + "\n")


def _fsync_dir(directory: Path) -> None:
    """Make the rename durable where the platform allows fsync on a directory."""
    try:
        fd = os.open(directory, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)
