"""Output safety: one set of rules for where every command and the API may write, replace and clean.

``tiltedring fit``, ``batch``, ``compare``, ``massmodel``, ``maps`` and the Python API (``run_job``,
``FitResult.write``, ``MapComparison.write``, ``write_results``) all write through
:func:`.atomic.atomic_folder`, which applies these rules; the command line also claims ``--out``
before any work (:func:`claim_output`).

The rules
---------
1. **Never these folders** (refused whatever ``overwrite`` says): a filesystem root or mount point,
   the home folder, the current folder or any folder that contains it, a folder that is or holds
   an input of the run (the map, the run file, the manifest, the curve...), a symbolic link, or a
   path that is an existing file.
2. **Overwrite replaces only our own folders**: an existing non-empty folder is refused unless
   ``overwrite``; with ``overwrite`` it is replaced only when this tool wrote it — it carries the
   run marker ``.tiltedring-output.json`` (written last into every output folder, listing its
   files), or for folders of earlier versions a ``fit.json`` with ``"tool": "tiltedring"`` and
   only the fit's file names — and holds nothing else. Files someone added are named in the
   refusal and never deleted.
3. **Names from manifests** are single plain path components (:func:`check_name`): not empty, no
   ``/`` or ``\\``, not ``.`` or ``..``, not absolute, no control or non-portable characters, not
   hidden (leading ``.``: the tool's temporary names start so), at most 200 bytes; duplicates,
   also ones differing only in case, are refused with the rows named (:func:`check_names`).
4. **One writer per folder**: the folder is claimed before any work by an exclusive lock
   (``fcntl.flock``) on a claim file beside it, ``.NAME.claim``, holding host, process id and
   start time. A second writer is refused at once (:class:`OutputBusy`, exit 2) with the owner
   named. The claim is released (and the file removed) when the run ends, however it ends.
   Claims are re-entrant within one thread of one process (the command line claims, then
   ``run_job`` and the writer claim again).
5. **Stale leftovers are cleaned when provably safe**: temporary folders and files are named
   ``.NAME.<host tag>-<pid>.<random>.partial``. When a claim is taken, leftovers of NAME made on
   this host by a process that no longer runs (pid gone, or a different process start time) are
   removed; an interrupted replacement (``.NAME.old-<host tag>-<pid>``) is put back when NAME is
   missing and removed otherwise. Leftovers of another host or of a live process are left alone.
6. **Normal permissions**: folders get mode ``0o777 & ~umask`` (a temporary folder is made 0700
   and widened before the rename), files the writers' default (``0o666 & ~umask``).
7. **Names the file system can hold**: a name longer than 200 bytes is refused before any work
   (the temporary name adds about 40); a parent that cannot be written is refused when claiming.

Only the claim file and the temporary folder live beside the output folder, and both are gone
when the run ends; everything that remains is inside it.
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import re
import shutil
import socket
import threading
import time
from contextlib import contextmanager
from pathlib import Path

from ..errors import InputError, OutputFolderExists

__all__ = ["MARKER", "OutputBusy", "check_output_folder", "claim_output", "check_name", "check_names",
           "is_tool_folder", "write_marker", "temporary_name", "owner_tag", "clean_stale", "folder_mode", "paths_of"]

MARKER = ".tiltedring-output.json"
MAX_NAME_BYTES = 200
LEGACY_FIT_FILES = re.compile(r"^(rings\.ecsv|curve\.ecsv|gas\.ecsv|stage_\w+\.ecsv|model\.fits|residual\.fits|"
                              r"fit\.json|report\.pdf|report_\w*\.png)$")
_FORBIDDEN_CHARACTERS = set('/\\<>:"|?*')


class OutputBusy(InputError):
    """The output folder is claimed by another run that is still going (rule 4)."""


# ---------------------------------------------------------------------------------------------- names
def _host_tag() -> str:
    return hashlib.sha256(socket.gethostname().encode()).hexdigest()[:8]


def owner_tag(pid: int | None = None) -> str:
    """``<host tag>-<pid>`` of this process (rule 5)."""
    return f"{_host_tag()}-{os.getpid() if pid is None else pid}"


def temporary_name(name: str) -> str:
    """Prefix of a temporary folder or file for ``name`` (rule 5): ``.NAME.<host tag>-<pid>.``"""
    return f".{name}.{owner_tag()}."


def check_name(name, where: str = "name") -> str:
    """``name`` as a single plain path component (rule 3), else :class:`InputError` naming ``where``."""
    text = "" if name is None else str(name)
    problem = None
    if not text.strip():
        problem = "is empty"
    elif text in (".", ".."):
        problem = "is a reference to a folder, not a name"
    elif os.path.isabs(text) or text.startswith("~"):
        problem = "is an absolute path"
    elif _FORBIDDEN_CHARACTERS & set(text):
        problem = f"contains {''.join(sorted(_FORBIDDEN_CHARACTERS & set(text)))!r} (path separators and characters " \
                  "some file systems refuse)"
    elif any(ord(c) < 32 or ord(c) == 127 for c in text):
        problem = "contains control characters"
    elif text.startswith("."):
        problem = "starts with '.' (hidden; the tool's temporary names start so)"
    elif text != text.strip():
        problem = "starts or ends with spaces"
    elif len(text.encode("utf-8", "surrogatepass")) > MAX_NAME_BYTES:
        problem = f"is longer than {MAX_NAME_BYTES} bytes"
    if problem:
        raise InputError(f"{where} {text!r} {problem}; names become folder names inside --out, so give a plain "
                         "name such as galaxy_01 (letters, digits, '_', '-', '.' and spaces)")
    return text


def check_names(names, rows=None, where: str = "manifest") -> list:
    """Every name checked (:func:`check_name`) and unique, also ignoring case; ``rows`` label them.

    Refusals name every offending row at once."""
    rows = list(rows) if rows is not None else [f"row {k + 1}" for k in range(len(names))]
    problems, seen = [], {}
    for name, row in zip(names, rows):
        try:
            check_name(name, f"{row}: name")
        except InputError as exc:
            problems.append(str(exc).split(";")[0])
            continue
        seen.setdefault(str(name).casefold(), []).append((row, str(name)))
    for group in seen.values():
        if len(group) > 1:
            same = "the same name" if len({n for _, n in group}) == 1 else "names differing only in case"
            problems.append(f"{', '.join(r for r, _ in group)} have {same} "
                            f"({', '.join(repr(n) for _, n in group)}) and would write one folder")
    if problems:
        raise InputError(f"{where}: " + "; ".join(problems) + "; give every galaxy its own plain name in a name "
                         "column (names become folder names inside --out)")
    return [str(n) for n in names]


# ---------------------------------------------------------------------------------------------- checks
def paths_of(values) -> list:
    """Existing paths among ``values`` (strings, paths, lists of them; other objects skipped)."""
    out = []
    for value in values:
        if isinstance(value, (list, tuple)):
            out += paths_of(value)
        elif isinstance(value, (str, os.PathLike)) and str(value) and "\0" not in str(value) and os.path.exists(value):
            out.append(Path(value))
    return out


def _forms(path: Path) -> set:
    """The absolute forms of ``path``: as given (symbolic links kept) and resolved."""
    absolute = Path(os.path.abspath(path))
    return {absolute, Path(os.path.realpath(path))}


def _within(inner: Path, outer: Path) -> bool:
    return inner == outer or outer in inner.parents


def _protected(folder: Path) -> str | None:
    """Why ``folder`` may never be an output folder (rule 1), or None."""
    forms = _forms(folder)
    cwd = _forms(Path.cwd())
    home = _forms(Path.home())
    for f in forms:
        if f == Path(f.anchor) or (f.exists() and os.path.ismount(f)):
            return "is a filesystem root or mount point"
        if f in home:
            return "is your home folder"
        if any(_within(c, f) for c in cwd):
            return "is the current folder or contains it"
    return None


def _validate_path(folder: Path) -> None:
    if not str(folder).strip():
        raise InputError("the output folder name is empty; give --out FOLDER")
    if "\0" in str(folder):
        raise InputError("the output folder name holds a NUL character; give a plain folder name")
    for part in folder.parts:
        if len(part.encode("utf-8", "surrogateescape")) > MAX_NAME_BYTES:
            raise InputError(f"output folder {folder}: the name {part[:40]!r}... is longer than {MAX_NAME_BYTES} bytes, "
                             "more than the file system can hold with the temporary name added; choose a shorter name")
    if folder.is_symlink():
        raise InputError(f"output folder {folder} is a symbolic link; give the folder it points to "
                         f"({os.path.realpath(folder)}) or another name")
    if folder.exists() and not folder.is_dir():
        raise InputError(f"output {folder} exists and is a file, not a folder; choose a folder name for --out")
    for parent in folder.absolute().parents:
        if parent.exists():
            if not parent.is_dir():
                raise InputError(f"output folder {folder}: {parent} is a file, so no folder can be made there; "
                                 "choose another --out")
            break


def check_output_folder(folder, overwrite: bool = False, inputs=(), adding: bool = False) -> None:
    """Refuse an output folder the rules forbid (module docstring, rules 1, 2 and 7).

    ``inputs``: paths read by the run; the folder may not be or hold any of them.
    ``adding``: the run adds to the folder and never replaces it (``batch``'s ``--out``): only
    roots, mount points, the home folder, links and files are refused.
    Raises :class:`..errors.OutputFolderExists` for an existing non-empty folder without
    ``overwrite``, :class:`..errors.InputError` for everything else.
    """
    folder = Path(folder)
    _validate_path(folder)
    why = _protected(folder)
    if why and not (adding and why.startswith("is the current")):
        raise InputError(f"output folder {folder} {why}: the tool never writes there; give a new folder for the "
                         "results, e.g. --out fit_results")
    if adding:
        return
    mine = _forms(folder)
    for source in paths_of(inputs):
        if any(_within(s, m) for s in _forms(source) for m in mine):
            raise InputError(f"output folder {folder} holds an input of this run ({source}); writing there could "
                             "destroy it: choose another folder for the results")
    if not folder.is_dir() or not any(folder.iterdir()):
        return
    if not overwrite:
        raise OutputFolderExists(folder)
    foreign = _foreign_entries(folder)
    if foreign is None:
        raise InputError(f"output folder {folder} was not written by tiltedring (it has no run marker {MARKER}), "
                         "so overwrite will not replace it; choose another folder, or move its files away yourself")
    if foreign:
        shown = ", ".join(foreign[:5]) + (f" and {len(foreign) - 5} more" if len(foreign) > 5 else "")
        raise InputError(f"output folder {folder} was written by tiltedring but now also holds files it did not "
                         f"write ({shown}); overwrite would delete them, so it is refused: move them away or "
                         "choose another folder")


def _entries(folder: Path) -> list:
    """Every file and folder below ``folder`` as relative POSIX paths (folders end with '/')."""
    out = []
    for root, dirs, files in os.walk(folder):
        rel = Path(root).relative_to(folder)
        out += [(rel / d).as_posix() + "/" for d in dirs] + [(rel / f).as_posix() for f in files]
    return out


def _foreign_entries(folder: Path):
    """Entries of ``folder`` this tool did not write, or None when it is not a tool folder at all."""
    entries = [e for e in _entries(folder) if e != MARKER]
    record = _read_json(folder / MARKER)
    if record is not None and record.get("tool") == "tiltedring" and isinstance(record.get("files"), list):
        known = set(record["files"])
        return [e for e in entries if e not in known and not (e.endswith("/") and any(k.startswith(e) for k in known))]
    fit = _read_json(folder / "fit.json")
    if fit is not None and fit.get("tool") == "tiltedring":  # a fit folder of an earlier version
        return [e for e in entries if not LEGACY_FIT_FILES.match(e)]
    return None


def is_tool_folder(folder) -> bool:
    """True when ``folder`` was written by this tool and holds nothing else (rule 2)."""
    folder = Path(folder)
    return folder.is_dir() and _foreign_entries(folder) == []


def _read_json(path: Path):
    try:
        if not path.is_file():
            return None
        value = json.loads(path.read_text(encoding="utf-8"))
        return value if isinstance(value, dict) else None
    except (OSError, ValueError):
        return None


def write_marker(folder, kind: str = "output") -> None:
    """Write the run marker (rule 2) listing every entry of ``folder`` as it is now."""
    from .. import __version__

    folder = Path(folder)
    record = {"tool": "tiltedring", "version": __version__, "kind": kind,
              "written": time.strftime("%Y-%m-%dT%H:%M:%S%z"), "files": sorted(_entries(folder))}
    (folder / MARKER).write_text(json.dumps(record, indent=1) + "\n", encoding="utf-8")


def folder_mode() -> int:
    """``0o777 & ~umask`` (rule 6), the umask read without changing it where the system allows."""
    try:
        with open("/proc/self/status") as status:
            for line in status:
                if line.startswith("Umask:"):
                    return 0o777 & ~int(line.split()[1], 8)
    except (OSError, ValueError):
        pass
    with _LOCK:
        mask = os.umask(0o022)
        os.umask(mask)
    return 0o777 & ~mask


# ---------------------------------------------------------------------------------------------- claims
_LOCK = threading.RLock()
_HELD: dict = {}  # claim path -> [fd, depth, thread id]


def _process_start(pid: int) -> str | None:
    try:
        with open(f"/proc/{pid}/stat") as stat:
            return stat.read().rsplit(")", 1)[1].split()[19]
    except (OSError, IndexError):
        return None


def _alive(pid: int, start: str | None) -> bool:
    """Is process ``pid`` (started at ``start``, when known) still running on this host?"""
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        pass
    now = _process_start(pid)
    return start is None or now is None or now == start


def _owner_text(info: dict) -> str:
    return (f"process {info.get('pid', '?')} on {info.get('host', 'an unknown host')} since "
            f"{info.get('started', 'an unknown time')} ({info.get('command', 'tiltedring')})")


def clean_stale(parent, name: str | None = None) -> list:
    """Remove leftovers (rule 5) of dead processes of this host in ``parent`` (for ``name``, or any).

    Returns what was removed or put back, as text."""
    parent = Path(parent)
    if not parent.is_dir():
        return []
    tag = re.escape(_host_tag())
    stem = re.escape(name) if name is not None else r".+"
    partial = re.compile(rf"^\.({stem})\.{tag}-(\d+)\..*\.partial$")
    old = re.compile(rf"^\.({stem})\.old-{tag}-(\d+)$")
    done = []
    for entry in list(parent.iterdir()):
        m = partial.match(entry.name) or old.match(entry.name)
        if not m or _alive(int(m.group(2)), None):
            continue
        target = parent / m.group(1)
        if m.re is old and not target.exists():
            os.replace(entry, target)
            done.append(f"restored {target} from an interrupted replacement")
        elif entry.is_dir() and not entry.is_symlink():
            shutil.rmtree(entry, ignore_errors=True)
            done.append(f"removed {entry.name}, left by a run that stopped")
        else:
            entry.unlink(missing_ok=True)
            done.append(f"removed {entry.name}, left by a run that stopped")
    return done


def _open_claim(claim: Path, folder: Path):
    try:
        claim.parent.mkdir(parents=True, exist_ok=True)
        return os.open(claim, os.O_RDWR | os.O_CREAT, 0o666)
    except OSError as exc:
        reason = {errno.EACCES: "permission denied", errno.EPERM: "permission denied",
                  errno.EROFS: "read-only file system", errno.ENAMETOOLONG: "name too long",
                  errno.ENOSPC: "no space left"}.get(exc.errno, exc.strerror)
        raise InputError(f"cannot write output folder {folder} in {claim.parent}: {reason}; choose a folder you can "
                         "write to with --out") from None


def _acquire(claim: Path, folder: Path, command: str) -> int:
    import fcntl

    for _ in range(20):
        fd = _open_claim(claim, folder)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            info = _read_claim(fd)
            os.close(fd)
            raise OutputBusy(f"output folder {folder} is being written by another run ({_owner_text(info)}); wait "
                             "for it to finish or choose another --out") from None
        try:
            same = os.stat(claim).st_ino == os.fstat(fd).st_ino
        except FileNotFoundError:
            same = False
        if not same:  # the previous owner removed the file between our open and our lock: try again
            os.close(fd)
            continue
        info = {"tool": "tiltedring", "host": socket.gethostname(), "pid": os.getpid(),
                "start": _process_start(os.getpid()), "started": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
                "command": command}
        os.ftruncate(fd, 0)
        os.pwrite(fd, json.dumps(info).encode(), 0)
        return fd
    raise OutputBusy(f"output folder {folder} is being claimed and released by other runs; try again")


def _read_claim(fd) -> dict:
    try:
        value = json.loads(os.pread(fd, 4096, 0).decode() or "{}")
        return value if isinstance(value, dict) else {}
    except (OSError, ValueError):
        return {}


def _release(claim: Path, fd: int) -> None:
    try:
        claim.unlink(missing_ok=True)
    finally:
        os.close(fd)


@contextmanager
def claim_output(folder, overwrite: bool = False, inputs=(), command: str = "tiltedring", adding: bool = False):
    """Check ``folder`` (:func:`check_output_folder`) and hold it for this run (rules 4 and 5).

    ``adding``: see :func:`check_output_folder`. Yields the notes of stale leftovers cleaned. Re-entrant within one thread; another thread or
    process gets :class:`OutputBusy`.
    """
    folder = Path(folder)
    _validate_path(folder)
    claim = Path(os.path.abspath(folder)).parent / f".{folder.name}.claim"
    key = str(claim)
    with _LOCK:
        held = _HELD.get(key)
        if held is not None:
            if held[2] != threading.get_ident():
                raise OutputBusy(f"output folder {folder} is being written by another thread of this process; "
                                 "give each run its own folder")
            held[1] += 1
    if held is not None:
        try:
            check_output_folder(folder, overwrite, inputs, adding)
            yield []
        finally:
            with _LOCK:
                held[1] -= 1
        return
    check_output_folder(folder, overwrite, inputs, adding)
    fd = _acquire(claim, folder, command)
    with _LOCK:
        _HELD[key] = [fd, 1, threading.get_ident()]
    try:
        notes = clean_stale(claim.parent, folder.name)
        check_output_folder(folder, overwrite, inputs, adding)  # again: a restored folder, or one finished meanwhile
        yield notes
    finally:
        with _LOCK:
            _HELD.pop(key, None)
        _release(claim, fd)
