"""Atomic writing of files and folders: nothing half-written ever looks finished."""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from contextlib import contextmanager
from pathlib import Path


@contextmanager
def atomic_path(path):
    """Yield a temporary path beside ``path``; rename it onto ``path`` only on success."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".partial", dir=path.parent)
    os.close(fd)
    os.unlink(tmp)
    try:
        yield Path(tmp)
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)


def write_json(path, record) -> None:
    with atomic_path(path) as tmp:
        tmp.write_text(json.dumps(record, indent=2, default=_json_default) + "\n")


def _json_default(value):
    import numpy as np

    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, Path):
        return str(value)
    raise TypeError(f"cannot store {type(value).__name__} in JSON")


def check_output_folder(folder, overwrite: bool = False) -> None:
    """Refuse an existing non-empty ``folder`` unless ``overwrite`` (:class:`..errors.OutputFolderExists`),
    so earlier results are never silently lost; a job checks before its work and again when writing."""
    folder = Path(folder)
    if folder.exists() and not overwrite and (not folder.is_dir() or any(folder.iterdir())):
        from ..errors import OutputFolderExists

        raise OutputFolderExists(folder)


@contextmanager
def atomic_folder(folder, overwrite: bool = False):
    """Yield a temporary folder; on success it replaces ``folder`` in one rename.

    An existing non-empty ``folder`` is refused unless ``overwrite`` is true, so earlier
    results are never silently lost.
    """
    folder = Path(folder)
    check_output_folder(folder, overwrite)
    folder.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{folder.name}.", suffix=".partial", dir=folder.parent))
    try:
        yield tmp
        if folder.exists():
            old = folder.with_name(f".{folder.name}.old-{os.getpid()}")
            os.replace(folder, old)
            os.replace(tmp, folder)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, folder)
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)
