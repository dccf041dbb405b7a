"""Many galaxies: one manifest in, one folder per galaxy and one catalogue out, resumable.

The manifest (CSV or ECSV) has one galaxy per row: a required ``velocity_map`` column (a path
relative to the manifest's folder) and optional ``name``, ``report`` and any job option by its
flat name (:mod:`.jobs`: ``error_map``, ``intensity_map``, ``dispersion_map`` paths, ``distance``,
``redshift``, ``bin``, ``ring_width``, ``azimuth_weight``, ``fixed``, ``v_systemic``...); an
unknown column is refused before any fit. Shared options come from the caller (command line or
TOML run file, as flat names), per-row values win.

Each galaxy is fitted by :func:`.jobs.run_job`, exactly as ``tiltedring fit`` would, into
``OUT/<name>/`` (temporary folder renamed into place, so an interrupted run never leaves a
finished-looking folder). A galaxy counts as finished when its folder holds ``fit.json`` whose
``batch_key`` (a hash of the row, the shared options and the tool version) matches the current
one; re-running the same command skips finished galaxies and retries failed ones. Failures are
recorded, never fatal. ``OUT/catalogue.ecsv`` has one row per galaxy: name, status (``ok`` /
``failed``), geometry, v_flat, residual rms, the number of cautions, decisions, flags, run time and
the error message.

Runs on a local dask.distributed cluster (one single-threaded worker process per core) by
default, on an existing cluster with ``scheduler``, or in this process with ``workers=1``.
"""

from __future__ import annotations

import hashlib
import json
import os
import time
import traceback
from pathlib import Path

import numpy as np

from .errors import InputError

__all__ = ["read_manifest", "fit_one", "run_batch"]

CATALOGUE_COMMENT = "tiltedring batch catalogue"
_ROW_COLUMNS = ("name", "velocity_map", "_row")  # the galaxy itself; every other column is a job option


def _manifest_columns() -> tuple:
    """(known column names, columns holding paths relative to the manifest)."""
    from .jobs import OUTPUT_SWITCHES, job_specs

    specs = job_specs()
    known = {"name", "velocity_map"} | set(specs) | set(OUTPUT_SWITCHES)
    paths = {"velocity_map"} | {name for name, spec in specs.items() if spec.path}
    return known, paths


def read_manifest(path) -> list:
    """Rows of the manifest as dicts with absolute map paths and a checked, unique ``name``.

    Names (given, or the velocity map's file name without ``.fits``) must be single plain path
    components and unique (:func:`.io.output_safety.check_names`); refusals name the rows.
    """
    from .io.input_files import read_table
    from .io.output_safety import check_names

    path = Path(path)
    fmt = "ascii.ecsv" if path.suffix.lower() == ".ecsv" else "ascii.csv"
    table = read_table(path, "manifest", fmt)
    if "velocity_map" not in table.colnames:
        hint = (" (it has one column: are the columns separated by something other than commas?)"
                if len(table.colnames) == 1 else "")
        raise InputError(f"manifest {path} has no velocity_map column{hint}; give one path per galaxy, relative to "
                         "the manifest, under a header line such as name,velocity_map")
    known, path_columns = _manifest_columns()
    unknown = [c for c in table.colnames if c not in known]
    if unknown:
        raise InputError(f"manifest {path}: unknown column(s) {unknown}; columns are name, velocity_map and the "
                         f"options of 'tiltedring fit' by their run-file names: {', '.join(sorted(known))}")
    if len(table) == 0:
        raise InputError(f"manifest {path} has a header but no rows; add one row per galaxy")
    rows, labels, missing = [], [], []
    for k, row in enumerate(table):
        label = f"row {k + 1}" + (f" (line {k + 2})" if fmt == "ascii.csv" else "")
        item = {}
        for name in table.colnames:
            value = row[name]
            if np.ma.is_masked(value) or (isinstance(value, str) and not value.strip()):
                continue
            item[name] = value.item() if hasattr(value, "item") else value
        if "velocity_map" not in item:
            missing.append(label)
            continue
        for key in path_columns:
            if key in item:
                item[key] = str((path.parent / str(item[key]).strip()).resolve())
        item["name"] = str(item["name"]) if "name" in item else _stem(item["velocity_map"])
        rows.append(item)
        labels.append(label)
    if missing:
        raise InputError(f"manifest {path}: {', '.join(missing)}: no velocity_map; fill in the map of every row or "
                         "remove the row")
    check_names([r["name"] for r in rows], labels, where=f"manifest {path}")
    for row, label in zip(rows, labels):
        row["_row"] = label
    return rows


def _stem(map_path: str) -> str:
    """A galaxy's default name: its map's file name without .fits, .fits.gz and the like."""
    name = Path(str(map_path)).name
    for suffix in (".gz", ".bz2", ".fz", ".fits", ".fit", ".fts"):
        if name.lower().endswith(suffix) and len(name) > len(suffix):
            name = name[: -len(suffix)]
    return name


def _key(row: dict, shared: dict) -> str:
    from . import __version__

    row = {k: v for k, v in row.items() if k != "_row"}
    text = json.dumps({"row": row, "shared": shared, "version": __version__}, sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def _v_flat(rings) -> float:
    v = np.asarray(rings["v_rotation"].value, float)
    ok = np.isfinite(v) & np.array(["fit_failed" not in f for f in rings["flags"]])
    if ok.sum() < 3:
        return float("nan")
    outer = np.flatnonzero(ok)[-max(ok.sum() // 3, 2):]
    return float(np.median(v[outer]))


def fit_one(row: dict, shared: dict, out_dir) -> dict:
    """Fit one manifest row into ``out_dir/<name>`` through :func:`.jobs.run_job`; returns its catalogue
    row (never raises)."""
    from .jobs import Job, run_job

    start = time.perf_counter()
    name = row["name"]
    entry = {"name": name, "status": "failed", "error": "", "seconds": 0.0}
    try:
        values = dict(shared)
        values.update({k: v for k, v in row.items() if k not in _ROW_COLUMNS})
        job = Job.from_values(row["velocity_map"], values, where="batch option",
                              record={"batch_key": _key(row, shared)})
        result = run_job(job, Path(out_dir) / name, overwrite=True).result
        g = result.geometry()
        entry.update({k: g[k] for k in ("x_center", "y_center", "ra_center", "dec_center", "v_systemic",
                                       "position_angle", "inclination")})
        entry.update(status="ok", v_flat=_v_flat(result.rings), cautions=len(result.cautions),
                     residual_rms=result.statistics()["residual_rms"],
                     warp=bool(result.diagnostics.get("warp", {}).get("detected")),
                     non_circular=bool(result.diagnostics.get("non_circular", {}).get("detected")),
                     flags=";".join(sorted({f for s in result.rings["flags"] for f in str(s).split(",") if f})))
    except InputError as exc:
        entry["error"] = str(exc)
    except Exception as exc:  # a broken galaxy must never stop the batch
        entry["error"] = f"{type(exc).__name__}: {exc} | {traceback.format_exc(limit=2).splitlines()[-1]}"
    entry["seconds"] = round(time.perf_counter() - start, 3)
    return entry


def _finished(row, shared, out_dir):
    """The catalogue row of a galaxy already done with the same key, or None."""
    folder = Path(out_dir) / row["name"]
    record = folder / "fit.json"
    if not (record.exists() and (folder / "rings.ecsv").exists() and (folder / "curve.ecsv").exists()):
        return None
    try:
        fit = json.loads(record.read_text())
    except (OSError, ValueError):
        return None
    if not isinstance(fit, dict) or not isinstance(fit.get("inputs"), dict) or \
            fit["inputs"].get("batch_key") != _key(row, shared):
        return None
    from astropy.table import QTable

    try:  # a damaged folder is refitted, never fatal to the batch
        rings = QTable.read(folder / "rings.ecsv", format="ascii.ecsv")
        g = fit["geometry"]
        entry = {"name": row["name"], "status": "ok", "error": "", "seconds": 0.0,
                 **{k: g[k] for k in ("x_center", "y_center", "ra_center", "dec_center", "v_systemic", "position_angle",
                                      "inclination")},
                 "v_flat": _v_flat(rings), "cautions": len(fit.get("cautions", [])),
                 "residual_rms": (fit.get("statistics") or {}).get("residual_rms"),
                 "warp": bool(fit.get("warp", {}).get("detected")),
                 "non_circular": bool(fit.get("non_circular", {}).get("detected")),
                 "flags": ";".join(sorted({f for s in rings["flags"] for f in str(s).split(",") if f})), "skipped": True}
    except Exception:
        return None
    return entry


def _write_catalogue(out_dir, entries):
    from astropy.table import Table

    from .io.atomic import atomic_path

    columns = ("name", "status", "x_center", "y_center", "ra_center", "dec_center", "v_systemic", "position_angle",
               "inclination", "v_flat", "residual_rms", "cautions", "warp", "non_circular", "flags", "seconds", "error")
    units = {"ra_center": "deg", "dec_center": "deg", "v_systemic": "km/s", "position_angle": "deg",
             "inclination": "deg", "v_flat": "km/s", "residual_rms": "km/s", "seconds": "s", "x_center": "pix",
             "y_center": "pix"}
    data = {c: [e.get(c, np.nan if c not in ("name", "status", "flags", "error", "warp", "non_circular") else "")
                for e in entries] for c in columns}
    data["cautions"] = [int(v) if np.isfinite(v) else -1 for v in np.asarray(data["cautions"], float)]
    data["residual_rms"] = [np.nan if v is None else float(v) for v in data["residual_rms"]]
    for c in ("warp", "non_circular"):
        data[c] = [str(v) if v != "" else "" for v in data[c]]
    table = Table(data)
    for c, unit in units.items():
        table[c].unit = unit
    table.meta["comment"] = (CATALOGUE_COMMENT + "; status ok or failed; error gives the reason; cautions: number of "
                             "cautions in the galaxy's fit.json (-1 for a failed fit); residual_rms: rms of data - model "
                             "over the modelled pixels")
    with atomic_path(Path(out_dir) / "catalogue.ecsv") as tmp:
        table.write(tmp, format="ascii.ecsv")


class _Counter:
    def __init__(self, total, quiet):
        from .fitting.resampling import Progress

        self.progress = Progress("galaxies", total, quiet=quiet, delay=0.0)
        self.done = self.failed = 0
        self.total = total

    def add(self, entry):
        import sys

        self.done += 1
        self.failed += entry["status"] != "ok"
        elapsed = time.perf_counter() - self.progress.start
        rate = self.done / elapsed * 60 if elapsed > 0 else 0.0
        left = (self.total - self.done) / (rate / 60) if rate > 0 else float("nan")
        if not self.progress.quiet:
            sys.stderr.write(f"\rgalaxies: {self.done}/{self.total} done, {self.failed} failed, {rate:.1f}/min, "
                             f"{left:.0f} s left   ")
            sys.stderr.flush()
            self.progress.shown = True


def check_rows(rows, shared: dict, out_dir, manifest=None) -> None:
    """Everything about the rows that can be checked before any fit, all rows at once (refusals name them):
    option values (shared and per row, against the declared options), and each galaxy's folder
    inside ``out_dir`` (:func:`.io.output_safety.check_output_folder`: a folder written by this tool
    may be replaced, nothing else; never one holding an input)."""
    from .io.output_safety import check_output_folder, paths_of
    from .jobs import Job

    problems = []
    for row in rows:
        label = row.get("_row", row["name"])
        values = dict(shared)
        values.update({k: v for k, v in row.items() if k not in _ROW_COLUMNS})
        try:
            Job.from_values(row["velocity_map"], values, where="column")
            inputs = paths_of([row["velocity_map"], manifest] + [row[k] for k in _manifest_columns()[1] if k in row])
            check_output_folder(Path(out_dir) / row["name"], overwrite=True, inputs=inputs)
        except InputError as exc:
            problems.append(f"{label} ({row['name']}): {exc}")
    if problems:
        shown = "\n  ".join(problems[:20]) + (f"\n  ... and {len(problems) - 20} more" if len(problems) > 20 else "")
        raise InputError(f"manifest {manifest}: {len(problems)} row(s) cannot be run; nothing was fitted:\n  {shown}")


def _check_catalogue(out_dir: Path) -> None:
    """Refuse to replace a catalogue.ecsv (or anything of that name) this tool did not write."""
    path = out_dir / "catalogue.ecsv"
    if not os.path.lexists(path):
        return
    try:
        ours = path.is_file() and not path.is_symlink() and CATALOGUE_COMMENT in path.read_text(errors="replace")[:2000]
    except OSError:
        ours = False
    if not ours:
        raise InputError(f"{path} exists and was not written by tiltedring batch; it would be replaced by the "
                         "catalogue: move it away or choose another --out")


def run_batch(manifest, out_dir, shared: dict | None = None, workers: int | None = None, scheduler: str | None = None,
              quiet: bool = True) -> dict:
    """Fit every galaxy of ``manifest`` into ``out_dir`` (module docstring). Returns a summary dict.

    Before any fit: the manifest, the options of every row and every galaxy's folder are checked
    (:func:`check_rows`), and ``out_dir`` is claimed, so a second batch writing it is refused.
    """
    from .io.output_safety import claim_output, clean_stale

    shared = dict(shared or {})
    if workers is not None and not (isinstance(workers, int) and 1 <= workers <= 1024):
        raise InputError(f"--workers {workers}: give a whole number of worker processes from 1 to 1024")
    rows = read_manifest(manifest)
    out_dir = Path(out_dir)
    with claim_output(out_dir, inputs=[manifest], command="tiltedring batch", adding=True):
        check_rows(rows, shared, out_dir, manifest)
        _check_catalogue(out_dir)
        out_dir.mkdir(parents=True, exist_ok=True)
        clean_stale(out_dir)
        return _run_rows(rows, shared, out_dir, workers, scheduler, quiet)


def _run_rows(rows, shared, out_dir, workers, scheduler, quiet) -> dict:
    entries, todo = {}, []
    for row in rows:
        done = _finished(row, shared, out_dir)
        if done is not None:
            entries[row["name"]] = done
        else:
            todo.append(row)
    counter = _Counter(len(todo), quiet)
    start = time.perf_counter()
    n_workers = workers or os.cpu_count() or 1
    if todo and n_workers == 1 and scheduler is None:
        for row in todo:
            entries[row["name"]] = fit_one(row, shared, out_dir)
            counter.add(entries[row["name"]])
    elif todo:
        _run_on_cluster(todo, shared, out_dir, n_workers, scheduler, entries, counter)
    counter.progress.close()
    ordered = [entries[row["name"]] for row in rows]
    _write_catalogue(out_dir, ordered)
    elapsed = time.perf_counter() - start
    return {"total": len(rows), "skipped": len(rows) - len(todo), "fitted": len(todo),
            "failed": sum(e["status"] != "ok" for e in ordered), "seconds": elapsed,
            "rate_per_minute": len(todo) / elapsed * 60 if elapsed > 0 and todo else None}


def _run_on_cluster(todo, shared, out_dir, n_workers, scheduler, entries, counter) -> None:
    try:
        from dask.distributed import Client, LocalCluster, as_completed
    except ImportError:
        raise InputError("batch runs use dask.distributed: pip install 'tiltedring[batch]', or run in this "
                         "process with --workers 1") from None

    cluster = None
    if scheduler is None:
        cluster = LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True, dashboard_address=None)
        client = Client(cluster)
    else:
        try:
            client = Client(scheduler, timeout="15s")
        except Exception as exc:
            raise InputError(f"cannot reach the dask scheduler {scheduler!r} ({type(exc).__name__}: {exc}); check the "
                             "address (tcp://HOST:PORT) or leave out --scheduler to use a local cluster") from None
    try:
        futures = {client.submit(fit_one, row, shared, str(out_dir), key=f"fit-{row['name']}-{_key(row, shared)}",
                                 retries=2, pure=False): row["name"] for row in todo}
        for future in as_completed(futures):
            name = futures[future]
            try:
                entries[name] = future.result()
            except Exception as exc:  # a lost worker after all retries
                entries[name] = {"name": name, "status": "failed", "error": f"worker lost: {exc}", "seconds": 0.0}
            counter.add(entries[name])
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
