"""Write a file next to its destination, then rename it into place.

A reader never sees a half-written output: either the old file or the complete new one.
"""

from __future__ import annotations

import os
import tempfile
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

__all__ = ["atomic_path", "publishable"]


@contextmanager
def atomic_path(path: str | Path, suffix: str | None = None) -> Iterator[Path]:
    """Yield a temporary path in the destination folder; rename it onto ``path`` on success.

    The temporary name keeps the destination's suffix (some writers choose the format by
    it). On error the temporary file is removed and ``path`` is untouched.
    """
    dest = Path(path)
    dest.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(
        prefix=f".{dest.stem}.", suffix=suffix if suffix is not None else dest.suffix,
        dir=dest.parent,
    )
    os.close(fd)
    tmp_path = Path(tmp)
    # writers that refuse to overwrite (GDAL, SQLite-based formats) want no file there
    tmp_path.unlink()
    try:
        yield tmp_path
        os.replace(tmp_path, dest)
    finally:
        # the file itself on failure, and sidecars a writer may leave (.aux.xml, -wal, -shm)
        for leftover in tmp_path.parent.iterdir():
            if leftover.name.startswith(tmp_path.name):
                try:
                    leftover.unlink()
                except FileNotFoundError:
                    pass


def publishable(folder: str | Path) -> None:
    """Give a folder built under a private temporary name, and everything in it, the
    permissions of ordinary new files and folders (``tempfile`` makes them owner-only)."""
    folder = Path(folder)
    mask = os.umask(0)
    os.umask(mask)
    os.chmod(folder, 0o777 & ~mask)
    for path in folder.rglob("*"):
        os.chmod(path, (0o777 if path.is_dir() else 0o666) & ~mask)
