"""Input files checked before they are opened, and text tables read whatever their byte-order mark.

:func:`check_input_file` looks at a path with ``stat`` only, so a FIFO, a device or a socket is
refused at once instead of blocking the run (opening a FIFO with no writer waits forever); folders,
empty files and unreadable files are refused with a message naming the fix. :func:`read_text` and
:func:`read_table` strip a UTF-8 byte-order mark (spreadsheet programs write one at the start of a
CSV file), so the first column keeps its name.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path

from ..errors import InputError

__all__ = ["check_input_file", "read_text", "read_table"]

_KINDS = ((stat.S_ISFIFO, "a named pipe (FIFO)"), (stat.S_ISCHR, "a character device"),
          (stat.S_ISBLK, "a block device"), (stat.S_ISSOCK, "a socket"), (stat.S_ISDIR, "a folder"))


def check_input_file(path, role: str = "input file") -> Path:
    """``path`` as a :class:`Path` when it is a readable, non-empty regular file; else :class:`InputError`."""
    if path is None or not str(path).strip():
        raise InputError(f"{role}: no file name given")
    if "\0" in str(path):
        raise InputError(f"{role} {str(path)!r}: the name holds a NUL character; give a plain file name")
    path = Path(path)
    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        raise InputError(f"{role} {path} does not exist; check the path (paths in a manifest or run file are "
                         "read relative to that file)") from None
    except NotADirectoryError:
        raise InputError(f"{role} {path} does not exist (a part of the path is a file, not a folder)") from None
    except OSError as exc:
        raise InputError(f"cannot look at {role} {path}: {exc.strerror}; check the path") from None
    for test, kind in _KINDS:
        if test(mode):
            raise InputError(f"{role} {path} is {kind}, not a regular file; give the path of a file")
    if os.stat(path).st_size == 0:
        raise InputError(f"{role} {path} is empty (0 bytes); give the finished file")
    if not os.access(path, os.R_OK):
        raise InputError(f"{role} {path} cannot be read (permission denied); make it readable")
    return path


def read_text(path, role: str = "input file") -> str:
    """The text of a regular file as UTF-8, a byte-order mark removed."""
    path = check_input_file(path, role)
    try:
        return path.read_bytes().decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise InputError(f"{role} {path} is not UTF-8 text (byte {exc.start}); save it as UTF-8 text") from None
    except OSError as exc:
        raise InputError(f"cannot read {role} {path}: {exc.strerror}") from None


def read_table(path, role: str = "table", format: str | None = None):
    """An astropy :class:`~astropy.table.Table` from a text table (BOM removed; column names stripped).

    ``format``: an astropy format; default by suffix (``.ecsv`` ECSV, ``.csv`` CSV, else astropy's guess).
    """
    import warnings

    from astropy.table import Table

    path = Path(path)
    text = read_text(path, role)
    if format is None:
        format = {".ecsv": "ascii.ecsv", ".csv": "ascii.csv"}.get(path.suffix.lower())
    if not text.strip():
        raise InputError(f"{role} {path} holds no table (only blank lines)")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            lines = text.splitlines()
            table = Table.read(lines, format=format) if format else Table.read(lines, format="ascii")
    except Exception as exc:  # astropy raises many kinds for malformed tables
        kind = {"ascii.ecsv": "an ECSV", "ascii.csv": "a CSV"}.get(format, "a text")
        raise InputError(f"cannot read {role} {path} as {kind} table ({str(exc).splitlines()[0][:200]}); check "
                         "that every line has the same columns, separated as the header is") from None
    for name in list(table.colnames):
        clean = name.strip()
        if clean != name:
            if clean in table.colnames:
                raise InputError(f"{role} {path} has the column {clean!r} twice; keep one")
            table.rename_column(name, clean)
    return table
