"""Durable file operations: write through a temp name, fsync, rename, fsync the folder."""
from __future__ import annotations

import os
from pathlib import Path

TEMP_SUFFIX = ".tmp"


def fsync_dir(folder: Path) -> None:
    fd = os.open(folder, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_durably(path: Path, data: bytes, sync_folder: bool = True) -> None:
    """Write ``data`` to ``path`` so a crash leaves either the old file or the whole new one.

    The bytes go to ``.<name>.tmp`` in the same folder, are fsynced, renamed over
    ``path``, and the folder is fsynced so the rename itself survives power loss.
    """
    temp = path.with_name(f".{path.name}{TEMP_SUFFIX}")
    fd = os.open(temp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
    try:
        view = memoryview(data)
        while view:
            written = os.write(fd, view)
            view = view[written:]
        os.fsync(fd)
    finally:
        os.close(fd)
    os.replace(temp, path)
    if sync_folder:
        fsync_dir(path.parent)


def unique_path(folder: Path, name: str) -> Path:
    """``folder/name``, or ``folder/name.1``, ``.2``… when that name is taken."""
    candidate = folder / name
    counter = 0
    while candidate.exists() or candidate.is_symlink():
        counter += 1
        candidate = folder / f"{name}.{counter}"
    return candidate
