"""Durable file operations: write a temporary file, fsync it, rename it, fsync the folder."""

from __future__ import annotations

import os
from pathlib import Path

__all__ = ["fsync_dir", "write_durably"]


def fsync_dir(path) -> None:
    """Make a folder's entries (renames, new files) durable."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_durably(path, data: bytes | str) -> None:
    """Replace ``path`` atomically with ``data``: temp file, fsync, rename, fsync the folder."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp")
    with open(tmp, "wb") as fh:
        fh.write(data.encode("utf-8") if isinstance(data, str) else data)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    fsync_dir(path.parent)
