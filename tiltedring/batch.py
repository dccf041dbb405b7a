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
import time
import traceback
from pathlib import Path

import numpy as np

from .errors import InputError

__all__ = ["read_manifest", "fit_one", "run_batch"]

_ROW_COLUMNS = ("name", "velocity_map")  # the galaxy itself; every other column is a job option


def _manifest_columns() -> tuple:
    """(known column names, columns holding paths relative to the manifest)."""
    from .jobs import OUTPUT_SWITCHES, job_specs

    specs = job_specs()
    known = set(_ROW_COLUMNS) | set(specs) | set(OUTPUT_SWITCHES)
    paths = {"velocity_map"} | {name for name, spec in specs.items() if spec.path}
    return known, paths


def read_manifest(path) -> list:
    """Rows of the manifest as dicts with absolute map paths and a unique ``name``."""
    from astropy.table import Table

    path = Path(path)
    if not path.exists():
        raise InputError(f"manifest {path} does not exist")
    try:
        fmt = "ascii.ecsv" if path.suffix == ".ecsv" else "ascii.csv"
        table = Table.read(path, format=fmt)
    except Exception as exc:
        raise InputError(f"cannot read manifest {path}: {exc}; give a CSV or ECSV table") from None
    if "velocity_map" not in table.colnames:
        raise InputError(f"manifest {path} has no velocity_map column (one path per galaxy, relative to the manifest)")
    known, path_columns = _manifest_columns()
    unknown = [c for c in table.colnames if c not in known]
    if unknown:
        raise InputError(f"manifest {path}: unknown column(s) {unknown}; columns are name, velocity_map and the "
                         f"options of 'tiltedring fit' by their run-file names: {', '.join(sorted(known))}")
    rows, seen = [], set()
    for k, row in enumerate(table):
        item = {}
        for name in table.colnames:
            value = row[name]
            if np.ma.is_masked(value) or (isinstance(value, str) and not value.strip()):
                continue
            item[name] = value.item() if hasattr(value, "item") else value
        for key in path_columns:
            if key in item:
                item[key] = str((path.parent / str(item[key])).resolve())
        name = str(item.get("name") or Path(item["velocity_map"]).stem)
        if name in seen:
            name = f"{name}_{k}"
        seen.add(name)
        item["name"] = name
        rows.append(item)
    return rows


def _key(row: dict, shared: dict) -> str:
    from . import __version__

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
    if fit.get("inputs", {}).get("batch_key") != _key(row, shared):
        return None
    from astropy.table import QTable

    rings = QTable.read(folder / "rings.ecsv")
    g = fit["geometry"]
    return {"name": row["name"], "status": "ok", "error": "", "seconds": 0.0,
            **{k: g[k] for k in ("x_center", "y_center", "ra_center", "dec_center", "v_systemic", "position_angle",
                                 "inclination")},
            "v_flat": _v_flat(rings), "cautions": len(fit.get("cautions", [])),
            "residual_rms": (fit.get("statistics") or {}).get("residual_rms"),
            "warp": bool(fit.get("warp", {}).get("detected")),
            "non_circular": bool(fit.get("non_circular", {}).get("detected")),
            "flags": ";".join(sorted({f for s in rings["flags"] for f in str(s).split(",") if f})), "skipped": True}


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
    table.meta["comment"] = ("tiltedring batch catalogue; status ok or failed; error gives the reason; cautions: "
                             "number of cautions in the galaxy's fit.json (-1 for a failed fit); residual_rms: rms of "
                             "data - model over the modelled pixels")
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


def run_batch(manifest, out_dir, shared: dict | None = None, workers: int | None = None, scheduler: str | None = None,
              quiet: bool = True) -> dict:
    """Fit every galaxy of ``manifest`` into ``out_dir`` (module docstring). Returns a summary dict."""
    import os

    shared = dict(shared or {})
    rows = read_manifest(manifest)
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
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
            client = Client(scheduler)
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
    counter.progress.close()
    ordered = [entries[row["name"]] for row in rows]
    _write_catalogue(out_dir, ordered)
    elapsed = time.perf_counter() - start
    return {"total": len(rows), "skipped": len(rows) - len(todo), "fitted": len(todo),
            "failed": sum(e["status"] != "ok" for e in ordered), "seconds": elapsed,
            "rate_per_minute": len(todo) / elapsed * 60 if elapsed > 0 and todo else None}
