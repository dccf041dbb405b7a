"""Output safety (tiltedring/io/output_safety.py): nothing the user has is ever lost.

One test per failure class of issue 13's data-loss list and beyond: protected folders, folders
holding inputs, overwrite of folders the tool did not write, files added to a tool folder,
manifest names used as paths, duplicate names, two writers, stale leftovers of killed runs,
permissions, odd output paths, batch reruns over damaged folders.
"""

import json
import os
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest
from astropy.table import Table

from tiltedring import jobs
from tiltedring.batch import read_manifest, run_batch
from tiltedring.cli import main
from tiltedring.errors import InputError, OutputFolderExists
from tiltedring.io import output_safety as safety
from tiltedring.io.atomic import atomic_folder
from tiltedring.synthetic import DiscTruth, make_field

ROOT = Path(__file__).parent.parent
FAST = ["--no-report", "--resamples", "0", "--no-beam-correction", "-q"]


@pytest.fixture(scope="module")
def small_map(tmp_path_factory):
    folder = tmp_path_factory.mktemp("maps")
    field = make_field(DiscTruth(x_center=23.5, y_center=23.5, r_turn=10.0), shape=(48, 48), pixel_scale=2.0,
                       beam_fwhm=6.0, noise=2.0, seed=3)
    path = folder / "galaxy.fits"
    field.velocity_hdu.writeto(path)
    return path


def _copy(src: Path, folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    dst = folder / src.name
    dst.write_bytes(src.read_bytes())
    return dst


def _snapshot(folder: Path) -> dict:
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in folder.rglob("*") if p.is_file()}


# ---------------------------------------------------------------------------------------------- rule 1
@pytest.mark.parametrize("where", ["cwd", "home", "root", "parent_of_cwd"])
def test_protected_folders_are_refused_even_with_overwrite(where, small_map, capsys, monkeypatch, tmp_path):
    work = tmp_path / "work" / "inner"
    work.mkdir(parents=True)
    monkeypatch.chdir(work)
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    (tmp_path / "home").mkdir()
    out = {"cwd": ".", "home": str(tmp_path / "home"), "root": "/", "parent_of_cwd": ".."}[where]
    assert main(["fit", str(small_map), "--out", out, "--overwrite", *FAST]) == 2
    err = capsys.readouterr().err
    assert "never writes there" in err and "--out" in err
    assert list(work.iterdir()) == []


def test_a_folder_holding_the_map_is_never_replaced(small_map, tmp_path, capsys):
    """Issue: fit MAP --out FOLDER_OF_MAP --overwrite deleted the map and everything beside it."""
    data = tmp_path / "data"
    galaxy = _copy(small_map, data)
    (data / "notes.txt").write_text("observing log")
    before = _snapshot(data)
    assert main(["fit", str(galaxy), "--out", str(data), "--overwrite", *FAST]) == 2
    assert "holds an input" in capsys.readouterr().err
    # a parent of the input, too
    assert main(["fit", str(galaxy), "--out", str(tmp_path), "--overwrite", *FAST]) == 2
    assert _snapshot(data) == before


def test_an_input_given_through_a_link_is_still_recognised(small_map, tmp_path, capsys):
    data = tmp_path / "data"
    galaxy = _copy(small_map, data)
    (tmp_path / "link").symlink_to(data)
    assert main(["fit", str(tmp_path / "link" / galaxy.name), "--out", str(data), "--overwrite", *FAST]) == 2
    assert galaxy.exists()


def test_an_output_that_is_a_file_a_link_or_too_long_is_refused(small_map, tmp_path, capsys):
    target = tmp_path / "result.txt"
    target.write_text("keep")
    assert main(["fit", str(small_map), "--out", str(target), *FAST]) == 2
    assert "is a file" in capsys.readouterr().err and target.read_text() == "keep"
    (tmp_path / "real").mkdir()
    (tmp_path / "alias").symlink_to(tmp_path / "real")
    assert main(["fit", str(small_map), "--out", str(tmp_path / "alias"), *FAST]) == 2
    assert "symbolic link" in capsys.readouterr().err
    assert main(["fit", str(small_map), "--out", str(tmp_path / ("x" * 250)), *FAST]) == 2
    assert "longer than" in capsys.readouterr().err
    assert main(["fit", str(small_map), "--out", str(target / "below"), *FAST]) == 2
    assert "is a file" in capsys.readouterr().err


def test_a_parent_that_cannot_be_written_is_refused_before_any_work(small_map, tmp_path, monkeypatch, capsys):
    """Simulated: the tests run as root, whom file modes do not stop, so opening the claim is made to fail."""
    import errno

    real_open = os.open

    def read_only(path, flags, *args):
        if str(path).endswith(".claim"):
            raise OSError(errno.EROFS, "Read-only file system", str(path))
        return real_open(path, flags, *args)

    monkeypatch.setattr(os, "open", read_only)
    monkeypatch.setattr(jobs, "read_maps", lambda job: pytest.fail("work started before the refusal"))
    assert main(["fit", str(small_map), "--out", str(tmp_path / "fit"), *FAST]) == 2
    assert "read-only file system" in capsys.readouterr().err


def test_odd_output_names_are_refused_cleanly(small_map, tmp_path, capsys):
    for out in ("", "a\0b"):
        assert main(["fit", str(small_map), "--out", out, *FAST]) == 2
        assert "Traceback" not in capsys.readouterr().err


# ---------------------------------------------------------------------------------------------- rule 2
def test_overwrite_replaces_only_a_folder_the_tool_wrote(small_map, tmp_path, capsys):
    mine = tmp_path / "papers"
    mine.mkdir()
    (mine / "draft.tex").write_text("two years of work")
    assert main(["fit", str(small_map), "--out", str(mine), "--overwrite", *FAST]) == 2
    assert "not written by tiltedring" in capsys.readouterr().err
    assert (mine / "draft.tex").read_text() == "two years of work"

    fit = tmp_path / "fit"
    assert main(["fit", str(small_map), "--out", str(fit), *FAST]) == 0
    marker = json.loads((fit / safety.MARKER).read_text())
    assert marker["tool"] == "tiltedring" and "rings.ecsv" in marker["files"]
    assert main(["fit", str(small_map), "--out", str(fit), "--overwrite", *FAST]) == 0  # its own folder: replaced
    (fit / "my_plot.png").write_bytes(b"figure")
    assert main(["fit", str(small_map), "--out", str(fit), "--overwrite", *FAST]) == 2
    assert "my_plot.png" in capsys.readouterr().err
    assert (fit / "my_plot.png").read_bytes() == b"figure"


def test_a_fit_folder_of_an_earlier_version_is_recognised(tmp_path):
    old = tmp_path / "old_fit"
    old.mkdir()
    (old / "fit.json").write_text(json.dumps({"tool": "tiltedring", "version": "0.0.9"}))
    (old / "rings.ecsv").write_text("x")
    assert safety.is_tool_folder(old)
    (old / "thesis.pdf").write_text("x")
    assert not safety.is_tool_folder(old)


def test_the_api_follows_the_same_rules(small_map, tmp_path):
    job = jobs.Job.from_values(small_map, {"resamples": 0, "beam_correction": False})
    with pytest.raises(InputError, match="holds an input"):
        jobs.run_job(job, small_map.parent, overwrite=True)
    other = tmp_path / "other"
    other.mkdir()
    (other / "keep.txt").write_text("k")
    with pytest.raises(OutputFolderExists, match="overwrite=True"):
        jobs.run_job(job, other)
    with pytest.raises(InputError, match="not written by tiltedring"):
        jobs.run_job(job, other, overwrite=True)
    outcome = jobs.run_job(job, tmp_path / "fit")
    with pytest.raises(InputError, match="holds an input"):
        outcome.result.write(small_map.parent, overwrite=True)
    assert small_map.exists() and (other / "keep.txt").exists()


# ---------------------------------------------------------------------------------------------- rule 3
@pytest.mark.parametrize("name, problem", [
    ("/tmp/elsewhere", "absolute"), ("../up", "contains '/'"), ("a/b", "contains '/'"), ("..", "reference"),
    (".", "reference"), ("a\\b", "contains"), (".hidden", "starts with '.'"), ("tab\there", "control"),
    ("x" * 201, "longer than"), ("~user", "absolute"), ("c:d", "contains"),
])
def test_manifest_names_must_be_plain_components(name, problem, tmp_path):
    (tmp_path / "m.csv").write_text(f'name,velocity_map\n"{name}",a.fits\n')
    with pytest.raises(InputError, match="row 1") as refused:
        read_manifest(tmp_path / "m.csv")
    assert problem in str(refused.value)


def test_names_with_outer_spaces_are_refused_from_python():
    with pytest.raises(InputError, match="spaces"):
        safety.check_name(" padded ")
    assert safety.check_name("NGC 2403 field") == "NGC 2403 field"


def test_duplicate_names_are_refused_with_the_rows_named(tmp_path):
    """Issue: rows named x_2, x, x ended with the third row's results over the first's."""
    (tmp_path / "m.csv").write_text("name,velocity_map\nx_2,a.fits\nx,a.fits\nx,b.fits\nY,c.fits\ny,d.fits\n")
    with pytest.raises(InputError) as refused:
        read_manifest(tmp_path / "m.csv")
    text = str(refused.value)
    assert "row 2 (line 3), row 3 (line 4) have the same name" in text
    assert "row 4 (line 5), row 5 (line 6) have names differing only in case" in text
    # names derived from the map files collide too
    (tmp_path / "n.csv").write_text("velocity_map\none/g.fits\ntwo/g.fits.gz\n")
    with pytest.raises(InputError, match="same name"):
        read_manifest(tmp_path / "n.csv")


def test_a_batch_never_writes_outside_its_folder(small_map, tmp_path):
    """Issue: a name with .. or an absolute path replaced a folder elsewhere on disk (with overwrite on)."""
    victim = tmp_path / "victim"
    victim.mkdir()
    (victim / "precious.txt").write_text("keep")
    _copy(small_map, tmp_path)
    for name in (str(victim), "../victim"):
        (tmp_path / "m.csv").write_text(f"name,velocity_map\n{name},galaxy.fits\n")
        assert main(["batch", str(tmp_path / "m.csv"), "--out", str(tmp_path / "out"), "--workers", "1", "-q"]) == 2
    assert (victim / "precious.txt").read_text() == "keep"
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())


def test_a_galaxy_folder_holding_its_own_input_or_foreign_files_stops_the_batch_before_any_fit(small_map, tmp_path,
                                                                                               capsys):
    out = tmp_path / "out"
    _copy(small_map, out / "g1")  # the map sits where the galaxy's folder would go
    (out / "g2").mkdir()
    (out / "g2" / "mine.txt").write_text("k")
    (tmp_path / "m.csv").write_text("name,velocity_map\ng1,out/g1/galaxy.fits\ng2,out/g1/galaxy.fits\n")
    assert main(["batch", str(tmp_path / "m.csv"), "--out", str(out), "--workers", "1", "-q"]) == 2
    err = capsys.readouterr().err
    assert "row 1 (line 2) (g1)" in err and "holds an input" in err
    assert "row 2 (line 3) (g2)" in err and "not written by tiltedring" in err
    assert (out / "g1" / "galaxy.fits").exists() and (out / "g2" / "mine.txt").read_text() == "k"
    assert not (out / "catalogue.ecsv").exists()


def test_a_foreign_catalogue_is_not_replaced(small_map, tmp_path, capsys):
    _copy(small_map, tmp_path)
    (tmp_path / "out").mkdir()
    (tmp_path / "out" / "catalogue.ecsv").write_text("my own catalogue")
    (tmp_path / "m.csv").write_text("velocity_map\ngalaxy.fits\n")
    assert main(["batch", str(tmp_path / "m.csv"), "--out", str(tmp_path / "out"), "--workers", "1", "-q"]) == 2
    assert "not written by tiltedring batch" in capsys.readouterr().err
    assert (tmp_path / "out" / "catalogue.ecsv").read_text() == "my own catalogue"


def test_a_damaged_folder_in_a_rerun_is_refitted_not_fatal(small_map, tmp_path):
    """Issue: a damaged rings.ecsv in a batch rerun aborted the whole batch."""
    _copy(small_map, tmp_path)
    (tmp_path / "m.csv").write_text("name,velocity_map\ng,galaxy.fits\n")
    shared = {"resamples": 0, "beam_correction": False}
    assert run_batch(tmp_path / "m.csv", tmp_path / "out", shared, workers=1)["failed"] == 0
    (tmp_path / "out" / "g" / "rings.ecsv").write_text("# %ECSV 1.0\n# ---\ngarbage that is no table\n")
    again = run_batch(tmp_path / "m.csv", tmp_path / "out", shared, workers=1)
    assert again["failed"] == 0 and again["fitted"] == 1
    assert Table.read(tmp_path / "out" / "g" / "rings.ecsv")["v_rotation"].unit == "km / s"


# ---------------------------------------------------------------------------------------------- rule 4
HOLDER = textwrap.dedent("""
    import sys, time
    sys.path.insert(0, {root!r})
    from tiltedring.io.output_safety import claim_output
    with claim_output({out!r}, command="holder"):
        print("claimed", flush=True)
        time.sleep(60)
""")


def _hold(out: Path):
    proc = subprocess.Popen([sys.executable, "-c", HOLDER.format(root=str(ROOT), out=str(out))],
                            stdout=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "claimed"
    return proc


def test_a_second_writer_is_refused_at_once(small_map, tmp_path, capsys, monkeypatch):
    """Issue: two writers of one folder raced; the later replaced the earlier or died after its fit."""
    out = tmp_path / "fit"
    proc = _hold(out)
    try:
        monkeypatch.setattr(jobs, "read_maps", lambda job: pytest.fail("work started before the refusal"))
        start = time.perf_counter()
        assert main(["fit", str(small_map), "--out", str(out), *FAST]) == 2
        assert time.perf_counter() - start < 10
        err = capsys.readouterr().err
        assert "being written by another run" in err and f"process {proc.pid}" in err
        # the same for massmodel, compare and batch, and for the API
        assert main(["compare", str(small_map), str(small_map), "--out", str(out)]) == 2
        with pytest.raises(safety.OutputBusy):
            with atomic_folder(out):
                pass
    finally:
        proc.kill()
        proc.wait()
    # the holder was killed: its claim is stale and the folder can be written
    monkeypatch.undo()
    assert main(["fit", str(small_map), "--out", str(out), *FAST]) == 0


def test_two_batches_on_one_folder_are_refused(small_map, tmp_path, capsys):
    _copy(small_map, tmp_path)
    (tmp_path / "m.csv").write_text("velocity_map\ngalaxy.fits\n")
    proc = _hold(tmp_path / "out")
    try:
        assert main(["batch", str(tmp_path / "m.csv"), "--out", str(tmp_path / "out"), "--workers", "1", "-q"]) == 2
        assert "being written by another run" in capsys.readouterr().err
    finally:
        proc.kill()
        proc.wait()


def test_claims_are_reentrant_in_one_thread_only(tmp_path):
    import threading

    out = tmp_path / "o"
    seen = []
    with safety.claim_output(out):
        with safety.claim_output(out):
            seen.append("inner")

        def other():
            try:
                with safety.claim_output(out):
                    seen.append("other thread got in")
            except safety.OutputBusy:
                seen.append("busy")

        t = threading.Thread(target=other)
        t.start()
        t.join()
    assert seen == ["inner", "busy"]
    assert not (tmp_path / ".o.claim").exists()


# ---------------------------------------------------------------------------------------------- rule 5
def _dead_pid() -> int:
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def test_stale_leftovers_of_a_dead_run_are_cleaned(small_map, tmp_path):
    dead = _dead_pid()
    tag = safety.owner_tag(dead)
    partial = tmp_path / f".fit.{tag}.abc123.partial"
    partial.mkdir()
    (partial / "rings.ecsv").write_text("half")
    other_host = tmp_path / ".fit.00000000-1.zz.partial"  # another host's: never touched
    other_host.mkdir()
    live = tmp_path / f".fit.{safety.owner_tag()}.live.partial"  # a live process's (this one): never touched
    live.mkdir()
    assert main(["fit", str(small_map), "--out", str(tmp_path / "fit"), *FAST]) == 0
    assert not partial.exists() and other_host.exists() and live.exists()


def test_an_interrupted_replacement_is_put_back(tmp_path):
    """Killed between the two renames of an overwrite: the old folder is restored, not lost."""
    old = tmp_path / f".fit.old-{safety.owner_tag(_dead_pid())}"
    old.mkdir()
    (old / "rings.ecsv").write_text("earlier results")
    notes = safety.clean_stale(tmp_path, "fit")
    assert (tmp_path / "fit" / "rings.ecsv").read_text() == "earlier results"
    assert "restored" in notes[0]


def test_a_killed_run_leaves_nothing_that_blocks_the_next(small_map, tmp_path):
    out = tmp_path / "fit"
    code = (f"import sys, os; sys.path.insert(0, {str(ROOT)!r})\n"
            "from tiltedring.io.atomic import atomic_folder\n"
            f"with atomic_folder({str(out)!r}) as tmp:\n"
            "    (tmp / 'rings.ecsv').write_text('half'); os.kill(os.getpid(), 9)\n")
    subprocess.run([sys.executable, "-c", code])
    assert list(tmp_path.glob(".fit.*.partial")) and (tmp_path / ".fit.claim").exists()
    assert not out.exists()
    assert main(["fit", str(small_map), "--out", str(out), *FAST]) == 0
    assert not list(tmp_path.glob(".fit*"))


# ---------------------------------------------------------------------------------------------- rule 6
def test_output_folders_follow_the_umask(small_map, tmp_path):
    """Issue: output folders were created with mode 0700."""
    old = os.umask(0o022)
    try:
        assert main(["fit", str(small_map), "--out", str(tmp_path / "fit"), *FAST]) == 0
    finally:
        os.umask(old)
    assert (tmp_path / "fit").stat().st_mode & 0o777 == 0o755
    assert (tmp_path / "fit" / "rings.ecsv").stat().st_mode & 0o777 == 0o644


def test_an_existing_folder_is_refused_before_any_work(small_map, tmp_path, monkeypatch, capsys):
    """Issue: an existing --out was refused only after the whole fit."""
    (tmp_path / "fit").mkdir()
    (tmp_path / "fit" / "x").write_text("x")
    monkeypatch.setattr(jobs, "read_maps", lambda job: pytest.fail("work started before the refusal"))
    assert main(["fit", str(small_map), "--out", str(tmp_path / "fit"), *FAST]) == 2
    assert main(["massmodel", str(small_map), "--out", str(tmp_path / "fit")]) == 2
    assert main(["compare", str(small_map), str(small_map), "--out", str(tmp_path / "fit")]) == 2


def test_every_writer_leaves_its_marker_and_nothing_beside_the_folder(small_map, tmp_path):
    _copy(small_map, tmp_path / "in")
    before = set(os.listdir(tmp_path))
    assert main(["compare", str(small_map), str(small_map), "--out", str(tmp_path / "cmp"), "-q"]) == 0
    assert json.loads((tmp_path / "cmp" / safety.MARKER).read_text())["kind"] == "compare"
    assert set(os.listdir(tmp_path)) == before | {"cmp"}
    r = np.linspace(0.5, 12, 12)
    (tmp_path / "c.csv").write_text("radius_kpc,v,e\n" + "\n".join(f"{a},{150 * np.tanh(a / 3)},5" for a in r))
    assert main(["massmodel", str(tmp_path / "c.csv"), "--radius-column", "radius_kpc", "--velocity-column", "v",
                 "--error-column", "e", "--models", "nfw", "--out", str(tmp_path / "mass"), "-q"]) == 0
    assert json.loads((tmp_path / "mass" / safety.MARKER).read_text())["kind"] == "massmodel"
    assert main(["massmodel", str(tmp_path / "c.csv"), "--radius-column", "radius_kpc", "--velocity-column", "v",
                 "--error-column", "e", "--models", "nfw", "--out", str(tmp_path / "mass"), "--overwrite", "-q"]) == 0
