"""The one job runner and the one source of option names.

- ``tiltedring fit`` and ``tiltedring batch`` with the same options give the same folder: every
  table column by column, every map pixel by pixel, fit.json apart from the batch key and the
  recorded command line;
- every output, gas.ecsv and report.pdf included, is in the temporary folder when it is renamed;
- ``FitResult.write`` writes the same files; its refusal names the Python argument;
- every declared option reaches the command line, TOML run files and manifests, generically, and
  a field added to a dataclass appears in all of them with nothing else edited.
"""

import dataclasses
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table

from tiltedring import jobs
from tiltedring.cli import build_parser, job_values, main
from tiltedring.errors import InputError, OutputFolderExists
from tiltedring.io.output_safety import MARKER
from tiltedring.pipeline.option_fields import field_specs, option
from tiltedring.pipeline.options import FitOptions

OPTIONS = ["--ring-width", "6pix", "--azimuth-weight", "cos-squared", "--resamples", "4", "--fix", "v_systemic"]


def _compare_folders(a: Path, b: Path):
    """Same files; tables equal column by column, maps pixel by pixel, fit.json apart from the batch key."""
    names = {p.name for p in a.iterdir() if p.name != MARKER}
    assert names == {p.name for p in b.iterdir() if p.name != MARKER}
    for name in sorted(names):
        if name.endswith(".ecsv"):
            ta, tb = Table.read(a / name), Table.read(b / name)
            assert ta.colnames == tb.colnames, name
            assert ta.meta == tb.meta, name
            for col in ta.colnames:
                assert ta[col].unit == tb[col].unit, (name, col)
                if ta[col].dtype.kind == "f":
                    np.testing.assert_array_equal(ta[col], tb[col], err_msg=f"{name} {col}")
                else:
                    assert list(ta[col]) == list(tb[col]), (name, col)
        elif name.endswith(".fits"):
            np.testing.assert_array_equal(fits.getdata(a / name), fits.getdata(b / name), err_msg=name)
            ha, hb = fits.getheader(a / name), fits.getheader(b / name)
            assert {k: ha[k] for k in ha if k != "DATE"} == {k: hb[k] for k in hb if k != "DATE"}, name
    ra, rb = json.loads((a / "fit.json").read_text()), json.loads((b / "fit.json").read_text())
    rb["inputs"].pop("batch_key")
    ra["inputs"].pop("command", None)  # the command line that ran `tiltedring fit`
    assert ra == rb


def test_fit_and_batch_give_the_same_folder(tmp_path, demo_fields):
    velocity, intensity = demo_fields / "brenmoor_velocity.fits", demo_fields / "brenmoor_intensity.fits"
    single = tmp_path / "single"
    assert main(["fit", str(velocity), "--intensity-map", str(intensity), "--distance", "12", *OPTIONS,
                 "--no-report", "-q", "--out", str(single)]) == 0
    # the same options spread over manifest columns and shared command-line flags
    manifest = tmp_path / "survey.csv"
    manifest.write_text("name,velocity_map,intensity_map,distance,ring_width,fixed\n"
                        f"brenmoor,{velocity},{intensity},12,6pix,v_systemic\n")
    assert main(["batch", str(manifest), "--out", str(tmp_path / "survey"), "--workers", "1", "--azimuth-weight",
                 "cos-squared", "--resamples", "4", "-q"]) == 0
    assert Table.read(tmp_path / "survey" / "catalogue.ecsv")["status"][0] == "ok"
    batch = tmp_path / "survey" / "brenmoor"
    assert {"gas.ecsv", "curve.ecsv", "rings.ecsv", "model.fits", "residual.fits", "fit.json"} <= {
        p.name for p in batch.iterdir()}
    _compare_folders(single, batch)
    record = json.loads((batch / "fit.json").read_text())
    assert record["options"]["azimuth_weight"] == "cos-squared" and record["options"]["fixed"] == ["v_systemic"]
    assert record["gas"] == {"written": True, "note": None}
    assert len(record["inputs"]["intensity_map"]["sha256"]) == 64


def test_everything_is_in_the_folder_before_it_is_renamed(tmp_path, demo_fields, monkeypatch):
    """The report is the point here: gas.ecsv and report.pdf must be written before the rename."""
    real_replace = os.replace
    seen = {}

    def spy(src, dst):
        if Path(src).is_dir() and str(src).endswith(".partial"):
            seen[Path(dst).name] = sorted(p.name for p in Path(src).iterdir() if p.name != MARKER)
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", spy)
    job = jobs.Job.from_values(demo_fields / "ashgrove_velocity.fits",
                               {"intensity_map": str(demo_fields / "ashgrove_intensity.fits"), "distance": "9.5Mpc",
                                "resamples": 0, "report": True})
    outcome = jobs.run_job(job, tmp_path / "fit")
    monkeypatch.setattr(os, "replace", real_replace)
    final = sorted(p.name for p in (tmp_path / "fit").iterdir() if p.name != MARKER)
    assert seen["fit"] == final == outcome.files
    assert {"gas.ecsv", "report.pdf", "fit.json"} <= set(final)
    gas = Table.read(tmp_path / "fit" / "gas.ecsv")
    np.testing.assert_allclose(gas["radius_kpc"], np.radians(gas["radius"] / 3600) * 9.5e3, rtol=1e-12)

    # the API writer gives the same files (report on request) and names its own argument when refusing
    again = tmp_path / "again"
    outcome.result.write(again, curve=outcome.curve, report=True)
    assert sorted(p.name for p in again.iterdir() if p.name != MARKER) == final
    for name in ("rings.ecsv", "gas.ecsv", "curve.ecsv", "stage_free.ecsv"):
        assert (again / name).read_bytes() == (tmp_path / "fit" / name).read_bytes(), name
    with pytest.raises(OutputFolderExists) as refused:
        outcome.result.write(again)
    assert "overwrite=True" in str(refused.value) and "--overwrite" not in str(refused.value)


def test_an_existing_folder_is_refused_before_any_fitting(tmp_path, demo_fields, monkeypatch):
    (tmp_path / "fit").mkdir()
    (tmp_path / "fit" / "keep.txt").write_text("earlier work")
    monkeypatch.setattr(jobs, "read_maps", lambda job: pytest.fail("the map was read before the refusal"))
    with pytest.raises(OutputFolderExists, match="overwrite=True"):
        jobs.run_job(jobs.Job(demo_fields / "ashgrove_velocity.fits"), tmp_path / "fit")
    assert (tmp_path / "fit" / "keep.txt").read_text() == "earlier work"


# ---------------------------------------------------------------------------------------------- options
def _sample(spec):
    """(command-line words, TOML value, expected field value) for one option, differing from its default."""
    if spec.form == "switch":
        return [spec.flag], not spec.default, not spec.default
    if spec.form == "numbers":
        return [spec.flag, "1.5,2.5"], [1.5, 2.5], (1.5, 2.5)
    if spec.form == "names":
        name = "inclination" if "inclination" in spec.choices else spec.choices[-1]
        return [spec.flag, name], [name], (name,)
    if spec.choices:
        choice = next(c for c in spec.choices if c != spec.default)
        return [spec.flag, choice], choice, choice
    if spec.kind is int:
        return [spec.flag, "3"], 3, 3
    if spec.kind is float:
        value = next(v for v in (0.37, 1.5, 3.0, 50.0) if spec.bounds is None or spec.bounds.holds(v))
        return [spec.flag, str(value)], value, value
    if spec.name == "beam":
        return [spec.flag, "12,8,30"], "12,8,30", "12,8,30"
    if spec.name == "velocity_unit":
        return [spec.flag, "m/s"], "m/s", "m/s"
    if spec.name == "distance":
        return [spec.flag, "850kpc"], "850kpc", "850kpc"
    if spec.name == "cosmology":
        return [spec.flag, "WMAP9"], "WMAP9", "WMAP9"
    return [spec.flag, "4pix"], "4pix", "4pix"  # text, or number-or-text


# options that need a companion to make sense (refused alone: tests/test_input_validation.py)
COMPANIONS = {"growth": ["--spacing", "logarithmic"], "dispersion_map": ["--intensity-map", "i.fits"]}
# options that exclude others: left out of the all-at-once run file (each is checked alone above)
EXCLUSIVE = {"ring_edges", "redshift", "ra_center", "dec_center"}


def _field_value(job, spec):
    part = getattr(job, {c: t for t, c in jobs.RUN_FILE_TABLES.items()}[spec.owner])
    return getattr(part, spec.parent)[spec.name] if spec.parent else getattr(part, spec.name)


def test_every_declared_option_is_on_the_command_line_and_in_toml(tmp_path):
    specs = jobs.job_specs()
    assert {n for n, s in specs.items() if not s.command_line} == {"quiet"}  # set by -q/--quiet
    parser = build_parser()
    for name, spec in specs.items():
        if not spec.command_line:
            continue
        words, _, expected = _sample(spec)
        args = parser.parse_args(["fit", "map.fits", "--out", "o", *words, *COMPANIONS.get(name, [])])
        job = jobs.Job.from_values("map.fits", job_values(args))
        assert _field_value(job, spec) == expected, name
    # TOML: every field of every table, written generically
    lines = []
    for table, cls in jobs.RUN_FILE_TABLES.items():
        lines.append(f"[{table}]")
        sub = []
        for spec in field_specs(cls):
            if spec.name in EXCLUSIVE:
                continue
            if spec.form == "entries":
                sub += [f"[{table}.{spec.name}]"] + [f"{entry} = 1.5" for entry, _ in spec.entries
                                                     if entry not in EXCLUSIVE]
            else:
                lines.append(f"{spec.name} = {json.dumps(_sample(spec)[1])}")
        lines += sub
    (tmp_path / "run.toml").write_text("\n".join(lines) + "\n")
    job = jobs.Job.from_values("map.fits", jobs.read_run_file(tmp_path / "run.toml"))
    for name, spec in specs.items():
        if name in EXCLUSIVE:
            continue
        expected = 1.5 if spec.parent else _sample(spec)[2]
        if spec.path:
            expected = str(tmp_path / expected)  # relative to the run file
        assert _field_value(job, spec) == expected, name


def test_a_new_field_appears_everywhere(tmp_path, monkeypatch):
    """One field added to a FitOptions subclass: parser, TOML, manifest and fit.json pick it up."""

    @dataclasses.dataclass
    class WiderFitOptions(FitOptions):
        ring_overlap: float = option(0.0, group="rings", help="fraction by which neighbouring rings overlap")

    monkeypatch.setitem(jobs.RUN_FILE_TABLES, "fit", WiderFitOptions)
    jobs.job_specs.cache_clear()
    try:
        args = build_parser().parse_args(["fit", "map.fits", "--out", "o", "--ring-overlap", "0.25"])
        assert jobs.Job.from_values("map.fits", job_values(args)).fit.ring_overlap == 0.25
        (tmp_path / "run.toml").write_text("[fit]\nring_overlap = 0.5\n")
        job = jobs.Job.from_values("map.fits", jobs.read_run_file(tmp_path / "run.toml"))
        assert job.fit.ring_overlap == 0.5 and job.fit.to_dict()["ring_overlap"] == 0.5  # fit.json's options
        (tmp_path / "m.csv").write_text("velocity_map,ring_overlap\na.fits,0.75\n")
        from tiltedring.batch import read_manifest

        assert read_manifest(tmp_path / "m.csv")[0]["ring_overlap"] == 0.75
        assert "--ring-overlap" in build_parser()._subparsers._group_actions[0].choices["batch"].format_help()
    finally:
        jobs.job_specs.cache_clear()


def test_every_argument_of_every_command_has_help():
    parser = build_parser()
    for name, sub in parser._subparsers._group_actions[0].choices.items():
        for action in sub._actions:
            assert action.help and action.help.strip(), f"tiltedring {name} {action.option_strings or action.dest}"
        assert "examples:" in sub.epilog, name


def test_declared_names_match_the_numerics():
    from tiltedring.fitting.engine import AZIMUTH_WEIGHTS, HALVES
    from tiltedring.fitting.kinematics import PARAMETERS
    from tiltedring.pipeline import options

    assert options.RING_PARAMETER_NAMES == tuple(PARAMETERS)
    assert options.AZIMUTH_WEIGHT_NAMES == tuple(AZIMUTH_WEIGHTS) and options.HALF_NAMES == tuple(HALVES)


def test_building_the_command_line_imports_no_numerics():
    code = ("import sys, tiltedring.cli as c; c.build_parser().parse_args(['fit', 'm.fits', '--out', 'o']); "
            "print(sorted(m for m in sys.modules if m.split('.')[0] in ('numpy', 'numba', 'astropy', 'scipy')))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         env={**os.environ, "PYTHONPATH": str(Path(__file__).parent.parent)})
    assert out.stdout.strip() == "[]"


def test_bad_values_name_where_they_came_from(tmp_path, capsys):
    assert main(["fit", "m.fits", "--out", str(tmp_path / "o"), "--ring-edges", "0,a"]) == 2
    assert "--ring-edges '0,a': give comma-separated numbers" in capsys.readouterr().err
    (tmp_path / "run.toml").write_text("[fit]\nresamples = 2.5\n")
    with pytest.raises(InputError, match=r"\[fit\] resamples: expected a whole number"):
        jobs.read_run_file(tmp_path / "run.toml")
    (tmp_path / "run.toml").write_text("[fit]\nring_sizes = 3\n")
    with pytest.raises(InputError, match="unknown key 'ring_sizes' in \\[fit\\]"):
        jobs.read_run_file(tmp_path / "run.toml")
    (tmp_path / "run.toml").write_text('[inputs]\nerror_map = "e.fits"\n')
    with pytest.raises(InputError, match="manifest columns"):
        jobs.read_run_file(tmp_path / "run.toml", per_galaxy_maps=False)
    (tmp_path / "m.csv").write_text("velocity_map,ring_wdth\na.fits,4\n")
    from tiltedring.batch import read_manifest

    with pytest.raises(InputError, match="unknown column.*ring_wdth"):
        read_manifest(tmp_path / "m.csv")
