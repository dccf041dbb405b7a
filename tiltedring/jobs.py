"""One job runner for the command line, batch and the API: read -> bin -> fit -> curve -> gas -> report -> write.

A :class:`Job` is one galaxy's work: the velocity map and three option dataclasses
(:class:`.pipeline.options.InputOptions`, :class:`.pipeline.options.FitOptions`,
:class:`.pipeline.options.CurveOptions`), plus whether to draw the report. :func:`run_job` runs the
steps and writes every output, ``gas.ecsv`` and ``report.pdf`` included, into a temporary folder
that is renamed into place only when all are written (:func:`write_fit_folder`, also behind
:meth:`.products.result.FitResult.write`), so ``tiltedring fit``, ``tiltedring batch`` and a
notebook give the same folder for the same options.

Option values reach a job by one flat vocabulary, the field names of the three dataclasses (each
``[fit.initial]`` entry by its own name, e.g. ``v_systemic``), plus ``report`` and ``png``: the
command line spells them ``--name``, a batch manifest as columns, and :func:`read_run_file` turns
a TOML run file's ``[inputs]``, ``[fit]`` (with ``[fit.initial]``) and ``[curve]`` tables into it.

Example::

    import tiltedring as tr
    job = tr.Job.from_values("galaxy_velocity.fits", {"intensity_map": "galaxy_mom0.fits", "distance": 9.5,
                                                      "ring_width": "0.5beam"})
    outcome = tr.run_job(job, "galaxy_fit")   # outcome.result, outcome.curve, outcome.gas, outcome.files
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path

from .errors import InputError
from .pipeline.option_fields import OptionSpec, coerce, field_specs, flat_specs
from .pipeline.options import CubeOptions, CurveOptions, FitOptions, InputOptions

__all__ = ["Job", "JobOutcome", "run_job", "read_run_file", "job_specs", "write_fit_folder", "write_result",
           "RUN_FILE_TABLES"]

RUN_FILE_TABLES = {"inputs": InputOptions, "fit": FitOptions, "curve": CurveOptions,
                   "cube": CubeOptions}  # table -> Job field
OUTPUT_SWITCHES = {
    "report": OptionSpec("report", "--report", bool, "switch", False, "also write report.pdf"),
    "png": OptionSpec("png", "--png", bool, "switch", False, "also write the report pages as PNG files"),
}


@lru_cache(maxsize=None)
def job_specs() -> dict:
    """Every option of a job by its flat name (:func:`.option_fields.flat_specs` of the three classes)."""
    return flat_specs(*RUN_FILE_TABLES.values())


@dataclass
class Job:
    """One galaxy's work. ``velocity_map``: a path, an HDU, an HDUList or ``(array, header)``.

    ``record``: extra entries for the ``inputs`` section of ``fit.json`` (batch puts its key there).
    """

    velocity_map: object
    inputs: InputOptions = field(default_factory=InputOptions)
    fit: FitOptions = field(default_factory=FitOptions)
    curve: CurveOptions = field(default_factory=CurveOptions)
    cube: CubeOptions = field(default_factory=CubeOptions)
    report: bool = False
    png: bool = False
    record: dict = field(default_factory=dict)

    @classmethod
    def from_values(cls, velocity_map, values: dict, where: str = "option", record: dict | None = None) -> "Job":
        """A job from flat option values (module docstring; dashes or underscores), checked against
        the declared types. Errors name ``where`` and the option."""
        specs = job_specs()
        entries_fields = {s.name: s for c in RUN_FILE_TABLES.values() for s in field_specs(c) if s.form == "entries"}
        groups = {c: {} for c in RUN_FILE_TABLES.values()}
        switches = {}
        for key, value in values.items():
            key = str(key).replace("-", "_")
            if key in OUTPUT_SWITCHES:
                switches[key] = coerce(OUTPUT_SWITCHES[key], value, f"{where} {key}")
            elif key in entries_fields:  # a whole table of entries, e.g. initial = {...}
                spec = entries_fields[key]
                groups[spec.owner].setdefault(key, {}).update(coerce(spec, value, f"{where} {key}"))
            elif key in specs:
                spec = specs[key]
                value = coerce(spec, value, f"{where} {key}")
                if spec.parent:
                    groups[spec.owner].setdefault(spec.parent, {})[key] = value
                else:
                    groups[spec.owner][key] = value
            else:
                known = sorted(specs) + sorted(OUTPUT_SWITCHES)
                raise InputError(f"unknown {where} {key!r}; known: {', '.join(known)}")
        parts = {table: owner(**groups[owner]) for table, owner in RUN_FILE_TABLES.items()}
        return cls(velocity_map, **parts, record=dict(record or {}), **switches)


@dataclass
class JobOutcome:
    """What :func:`run_job` made. ``cautions``: every :class:`.errors.FitCaution` raised while reading
    and fitting (``result.cautions`` holds the fit's own); ``gas_note`` says why there is no ``gas.ecsv``."""

    folder: Path
    files: list
    result: object
    curve: object
    gas: object = None
    gas_note: str | None = None
    cautions: list = field(default_factory=list)


def read_run_file(path, per_galaxy_maps: bool = True) -> dict:
    """Flat option values from a TOML run file (``[inputs]``, ``[fit]`` with ``[fit.initial]``, ``[curve]``).

    Map file names are read relative to the run file's folder. ``per_galaxy_maps=False`` (batch)
    refuses map files there: they differ per galaxy and belong in the manifest.
    """
    if path is None:
        return {}
    config = _load_toml(path)
    unknown = set(config) - set(RUN_FILE_TABLES)
    if unknown:
        raise InputError(f"run file {path}: unknown table(s) {sorted(unknown)}; use "
                         + ", ".join(f"[{t}]" for t in RUN_FILE_TABLES))
    values = {}
    for table, cls in RUN_FILE_TABLES.items():
        specs = {spec.name: spec for spec in field_specs(cls)}
        for key, value in config.get(table, {}).items():
            key = str(key).replace("-", "_")
            where = f"run file {path}: [{table}] {key}"
            if key not in specs:
                raise InputError(f"run file {path}: unknown key {key!r} in [{table}]; known: {', '.join(specs)}")
            spec = specs[key]
            value = coerce(spec, value, where)
            if spec.path:
                if not per_galaxy_maps:
                    raise InputError(f"{where}: maps differ per galaxy; give them as manifest columns")
                value = str(Path(path).parent / value)
            if spec.form == "entries":
                values.update(value)
            else:
                values[key] = value
    return values


def _load_toml(path) -> dict:
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        import tomli as tomllib
    from .io.input_files import read_text

    text = read_text(path, "run file")
    try:
        config = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"run file {path} is not valid TOML: {exc}; see 'tiltedring fit --help' for an example") from None
    for table, content in config.items():
        if table in RUN_FILE_TABLES and not isinstance(content, dict):
            raise InputError(f"run file {path}: {table} must be a table ([{table}] followed by name = value lines), "
                             f"not a value")
    return config


# ---------------------------------------------------------------------------------------------- the steps
def read_maps(job: Job):
    """Steps read and bin: the :class:`.io.maps.VelocityMap` of the job (binned when ``bin`` > 1)."""
    return read_job_maps(job)[0]


def read_job_maps(job: Job) -> tuple:
    """Steps read and bin: (the job's :class:`.io.maps.VelocityMap`, the :class:`.io.velocity_fields.VelocityMaps`
    made from it and the :class:`.io.cube.LineCube` when ``velocity_map`` is a spectral cube, else None, None)."""
    from .io.binning import bin_map, check_memory
    from .io.maps import read_velocity_map

    cube_maps, cube = cube_velocity_maps(job)
    if cube_maps is not None:
        vmap = cube_maps.to_velocity_map(beam=job.inputs.beam)
    else:
        vmap = read_velocity_map(job.velocity_map, **job.inputs.read_arguments())
    if job.inputs.bin is not None:
        vmap = bin_map(vmap, job.inputs.bin)
    check_memory(vmap, options=job.fit)
    return vmap, cube_maps, cube


def cube_velocity_maps(job: Job):
    """(velocity maps, the cube) when the job's input is a spectral cube (:mod:`.io.velocity_fields`), else (None, None).

    Map inputs that the cube replaces are refused, and so are cube options given for a 2-D map."""
    from .io.cube import LineCube, looks_like_cube

    source = job.velocity_map
    if not (isinstance(source, LineCube) or (isinstance(source, (str, Path)) and looks_like_cube(source))):
        if job.cube != CubeOptions():
            given = [k for k, v in job.cube.__dict__.items() if v != getattr(CubeOptions(), k)]
            raise InputError(f"cube option(s) {', '.join(given)} given, but {source} is not a spectral cube")
        return None, None
    replaced = [k for k in ("error_map", "intensity_map", "dispersion_map", "velocity_unit", "pixel_scale",
                            "velocity_map_kind") if getattr(job.inputs, k) is not None]
    if replaced:
        raise InputError(f"{source} is a spectral cube, whose maps are made from it, so {', '.join(replaced)} cannot "
                         "be given; make maps with 'tiltedring maps' and fit those to use your own (the kind of "
                         "velocity map made from a cube is velocity_kind)")
    from .io.velocity_fields import make_velocity_maps

    cube = read_job_cube(job)
    return make_velocity_maps(cube, **job.cube.map_arguments(job.inputs.velocity_convention)), cube


def read_job_cube(job: Job):
    """The job's input as a :class:`.io.cube.LineCube` (read with the cube options; a LineCube is kept)."""
    from .io.cube import LineCube, read_cube

    if isinstance(job.velocity_map, LineCube):
        return job.velocity_map
    arguments = job.cube.map_arguments(job.inputs.velocity_convention)
    return read_cube(job.velocity_map, brightness_unit=arguments["brightness_unit"],
                     rest_frequency=arguments["rest_frequency"], convention=arguments["convention"])


def curve_from_cube(job: Job, result, cube, cube_maps=None) -> None:
    """Step "curve from the cube" (cube inputs, unless ``curve_from_cube`` is off): the inner rings refitted on
    the cube, the model cube made (:mod:`.pipeline.cube_curve`). The cube is the one the maps were made
    from; the velocity ranges left out of its maps (``cube_maps``' record, else the job's) are left out of the fit."""
    if cube is None or not job.cube.curve_from_cube:
        return
    from .pipeline.cube_curve import refit_curve_on_cube

    if result.vmap.shape != cube.data.shape[1:]:
        raise InputError("the curve cannot be fitted on the cube when its maps were binned (bin); leave out bin, "
                         "or turn the cube fit off (--no-curve-from-cube)")
    excluded = cube_maps.record["mask"]["excluded_velocities"] if cube_maps is not None else \
        job.cube.exclude_velocities
    refit_curve_on_cube(result, cube, within_beams=job.cube.cube_fit_beams, response=job.cube.channel_response,
                        exclude_velocities=excluded)


def input_record(job: Job, cube_maps=None) -> dict:
    """The ``inputs`` section of ``fit.json``: every file with its SHA-256, the other input options, the
    curve options, and ``job.record``; for a cube, the cube, its options and the maps made from it."""
    record = {"velocity_map": _file_entry(job.velocity_map)}
    if cube_maps is not None:
        record = {"cube": _file_entry(job.velocity_map), "cube_options": job.cube.to_dict(),
                  "maps_from_cube": {"folder": "maps", **{k: cube_maps.record[k] for k in (
                      "velocity_kind", "velocity_convention", "velocity_frame", "rest_frequency_hz")}}}
    for spec in field_specs(type(job.inputs)):
        value = getattr(job.inputs, spec.name)
        if value is not None:
            record[spec.name] = _file_entry(value) if spec.path else value
    record["curve"] = job.curve.to_dict()
    record.update(job.record)
    return record


def _file_entry(source) -> dict:
    from .products.result import file_checksum

    if isinstance(source, (str, Path)):
        return {"path": str(Path(source).resolve()), "sha256": file_checksum(source)}
    return {"path": None, "sha256": None, "given_as": type(source).__name__}


def gas_product(result, curve) -> tuple:
    """Step gas: (``gas.ecsv`` table or None, why it is missing or None).

    Needs the intensity map in K km/s or Jy/beam km/s and a distance (:mod:`.massmodel.gas`)."""
    from .massmodel.gas import gas_table

    if result.vmap.intensity is None:
        return None, "no gas.ecsv: no intensity map given"
    distance = (curve.meta.get("distance") or {}).get("value_mpc")
    if distance is None:
        return None, "no gas.ecsv: no distance (give a distance or a redshift)"
    try:
        return gas_table(result, distance), None
    except InputError as exc:
        return None, f"no gas.ecsv: {exc}"


def write_fit_folder(folder, result, curve, gas=None, gas_note: str | None = None, report: bool = False,
                     png: bool = False, overwrite: bool = False, cube_maps=None, inputs=()) -> list:
    """Steps report and write: every output into a temporary folder, renamed onto ``folder`` when all
    are written (:func:`.io.atomic.atomic_folder`). Returns the names of the files written.

    Files: ``rings.ecsv``, ``stage_<name>.ecsv``, ``model.fits``, ``residual.fits``, ``left_out.fits`` (when the
    outlier screen left pixels out: 1 where it did), ``curve.ecsv``,
    ``curve_covariance.ecsv``, ``gas.ecsv`` (when ``gas``), ``fit.json`` and ``report.pdf`` (with ``report``;
    ``report_*.png`` with ``png``), and ``maps/`` (the velocity maps made from a cube, ``cube_maps``). ``fit.json``
    says under ``gas`` whether ``gas.ecsv`` was written and why not. ``inputs``: paths the folder
    may not be or hold (:mod:`.io.output_safety`; the files named in the result's input record are
    added).
    """
    from .io.atomic import atomic_folder, write_json
    from .io.maps import write_map
    from .products.result import write_table

    record = result.record()
    record["gas"] = {"written": gas is not None, "note": gas_note}
    inputs = list(inputs) + recorded_paths(result.inputs)
    with atomic_folder(folder, overwrite=overwrite, inputs=inputs, kind="fit") as tmp:
        write_table(result.rings, tmp / "rings.ecsv")
        for name, table in result.stages.items():
            if name != "final":
                write_table(table, tmp / f"stage_{name}.ecsv")
        write_map(tmp / "model.fits", result.model, result.vmap, extra={"ORIGIN": "tiltedring model field"})
        write_map(tmp / "residual.fits", result.residual, result.vmap, extra={"ORIGIN": "tiltedring data - model"})
        left_out = getattr(result, "left_out", None)
        if left_out is not None and left_out.any():
            write_map(tmp / "left_out.fits", left_out.astype("float32"), result.vmap, bunit="",
                      extra={"ORIGIN": "tiltedring outlier screen: 1 = pixel left out of the fit"})
        if getattr(result, "model_cube", None) is not None:
            from .io.cube_files import write_cube

            write_cube(tmp / "model_cube.fits", result.model_cube, result.cube, "tiltedring model cube")
            write_cube(tmp / "residual_cube.fits", result.cube.data - result.model_cube, result.cube,
                       "tiltedring data - model cube")
        curve.write(tmp / "curve.ecsv")
        curve.write_covariance(tmp / "curve_covariance.ecsv")
        if gas is not None:
            write_table(gas, tmp / "gas.ecsv", comment=gas.meta.get("comment"))
        write_json(tmp / "fit.json", record)
        if cube_maps is not None:
            cube_maps.write_into(tmp / "maps")
        if report:
            from .products.plotting import write_report

            write_report(result, tmp / "report.pdf", png_folder=tmp if png else None)
        files = sorted(p.name for p in tmp.iterdir())
    return files


def write_result(result, folder, overwrite: bool = False, curve=None, report: bool = False, png: bool = False) -> list:
    """Steps gas, report and write for a fit already made (:meth:`.products.result.FitResult.write`).

    ``curve``: the :class:`.products.curve.RotationCurve` to write (default: one without a distance).
    """
    from .products.sanity import check_physical

    check_physical(result)
    curve = curve if curve is not None else result.curve()
    gas, note = gas_product(result, curve)
    return write_fit_folder(folder, result, curve, gas, note, report=report, png=png, overwrite=overwrite)


def job_inputs(job: Job) -> list:
    """The files a job reads (the velocity map and every map of its input options)."""
    from .io.output_safety import paths_of

    return paths_of([job.velocity_map] + [getattr(job.inputs, s.name) for s in field_specs(type(job.inputs)) if s.path])


def recorded_paths(inputs: dict) -> list:
    """The file paths of an input record (``fit.json``'s ``inputs``)."""
    return [entry["path"] for entry in (inputs or {}).values() if isinstance(entry, dict) and entry.get("path")]


def run_job(job: Job, folder, overwrite: bool = False) -> JobOutcome:
    """Read, bin, fit, make the curve and the gas profile, draw the report and write it all into ``folder``.

    A spectral cube as ``velocity_map`` is first turned into velocity maps (``job.cube``), written
    into ``folder/maps`` with the rest.

    The folder is checked and claimed before any work (:mod:`.io.output_safety`): an existing
    non-empty ``folder`` is refused unless ``overwrite=True`` and written by this tool, a folder
    holding an input is always refused, and a second run writing the same folder is refused at
    once. Nothing is left in ``folder`` when a step fails.
    """
    from .errors import FitCaution
    from .io.output_safety import claim_output

    folder = Path(folder)
    inputs = job_inputs(job)
    with claim_output(folder, overwrite, inputs, command="tiltedring job"):
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", FitCaution)
            result, curve, cube_maps = _fit_and_curve(job)
        result.inputs = input_record(job, cube_maps)
        gas, gas_note = gas_product(result, curve)
        files = write_fit_folder(folder, result, curve, gas, gas_note, report=job.report, png=job.png,
                                 overwrite=overwrite, cube_maps=cube_maps, inputs=inputs)
    cautions = [str(w.message) for w in caught if issubclass(w.category, FitCaution)]
    return JobOutcome(folder, files, result, curve, gas, gas_note, cautions)


def _broke_down(job: Job, exc: Exception):
    """A fit whose arithmetic broke down: exit 2 when the rings were laid by hand (the usual cause: rings
    without data), else :class:`.errors.ResultNotPhysical` (exit 1). Never a traceback."""
    from .errors import ResultNotPhysical

    given = [n for n in ("ring_edges", "first_radius", "max_radius") if getattr(job.fit, n) not in (None, 0, 0.0)]
    what = f"{type(exc).__name__}: {exc}"
    if given:
        raise InputError(f"the fit broke down ({what}) with the rings you laid ({', '.join(given)}): rings that hold no "
                         "data are the usual cause; give radii inside the valid data of the map") from None
    raise ResultNotPhysical(f"the fit broke down ({what}); nothing was written. Check the map (units, masking, blank "
                            "values) or steer the fit with starting values (--inclination, --position-angle, "
                            "--x-center/--y-center)") from None


def _fit_and_curve(job: Job):
    """Steps read, bin, fit (and the curve from the cube) and curve: (result, curve, the maps made from a cube or
    None)."""
    import numpy as np

    from .pipeline.staged import fit_velocity_map
    from .products.sanity import check_physical

    vmap, cube_maps, cube = read_job_maps(job)
    try:
        result = fit_velocity_map(vmap, job.fit)
        curve_from_cube(job, result, cube, cube_maps)
    except (ZeroDivisionError, FloatingPointError, np.linalg.LinAlgError) as exc:
        _broke_down(job, exc)
    check_physical(result)
    curve = result.curve(**job.curve.to_dict())
    if cube_maps is not None:  # the maps' cautions (e.g. a foreground found) reach fit.json and the report
        result.cautions[:0] = [text for text in cube_maps.record["cautions"] if text not in result.cautions]
    return result, curve, cube_maps
