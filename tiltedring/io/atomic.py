"""Atomic writing of files and folders: nothing half-written ever looks finished.

Every output folder goes through :func:`atomic_folder`, which applies the rules of
:mod:`.output_safety` (where writing is allowed, what overwrite may replace, one writer per
folder, stale leftovers, permissions): files are written into a temporary folder beside the
target, the run marker is added, and the folder is renamed into place in one step.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from contextlib import contextmanager
from pathlib import Path

from .output_safety import check_output_folder, claim_output, folder_mode, owner_tag, temporary_name, write_marker

__all__ = ["atomic_path", "atomic_folder", "write_json", "check_output_folder"]


@contextmanager
def atomic_path(path):
    """Yield a temporary path beside ``path``; rename it onto ``path`` only on success."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=temporary_name(path.name), suffix=".partial", dir=path.parent)
    os.close(fd)
    os.unlink(tmp)
    try:
        yield Path(tmp)
        os.replace(tmp, path)
    finally:
        if os.path.lexists(tmp):
            if os.path.isdir(tmp) and not os.path.islink(tmp):
                shutil.rmtree(tmp, ignore_errors=True)
            else:
                os.unlink(tmp)


def write_json(path, record) -> None:
    with atomic_path(path) as tmp:
        tmp.write_text(json.dumps(record, indent=2, default=_json_default, allow_nan=True) + "\n")


def _json_default(value):
    import numpy as np

    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, Path):
        return str(value)
    raise TypeError(f"cannot store {type(value).__name__} in JSON")


@contextmanager
def atomic_folder(folder, overwrite: bool = False, inputs=(), kind: str = "output"):
    """Yield a temporary folder; on success it replaces ``folder`` in one rename.

    The folder is claimed and checked first (:func:`.output_safety.claim_output`): an existing
    non-empty ``folder`` is refused unless ``overwrite`` and written by this tool, and never one
    that is or holds one of ``inputs``. The run marker (``kind`` says what wrote it) is written
    last, and the folder gets the umask's permissions.
    """
    folder = Path(folder)
    with claim_output(folder, overwrite, inputs):
        folder.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=temporary_name(folder.name), suffix=".partial", dir=folder.parent))
        try:
            yield tmp
            write_marker(tmp, kind)
            os.chmod(tmp, folder_mode())
            if folder.exists():
                old = folder.with_name(f".{folder.name}.old-{owner_tag()}")
                os.replace(folder, old)
                os.replace(tmp, folder)
                shutil.rmtree(old, ignore_errors=True)
            else:
                os.replace(tmp, folder)
        finally:
            if tmp.exists():
                shutil.rmtree(tmp, ignore_errors=True)
