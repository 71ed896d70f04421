"""Result files, job-named files and outputs as the user gives them (issue 13,
items 2, 8 and 9).

- Analysis reads what the result holds: a file whose ``job`` attribute names
  a 512^3 grid (a 173 KB file took 5.4 GB when `arrivals`, `transmission`
  and `levels --from` rebuilt the set-up from it) gives the same numbers as
  the untouched file, and no Setup or Model is built.  A file written before
  results kept that record is rebuilt only when the machine's memory holds
  it, judged from the job's grid shape first.
- Not regular files (a FIFO, /dev/zero, a folder) as job file, potential
  file, state file or result are refused at once, naming the argument or
  field.  A FIFO is opened by a writer after a delay, so code that opened it
  fails these tests instead of hanging them.
- Outputs are checked before the work (a folder or special file in their
  place, a parent that is a file, a wrong suffix) and never replaced without
  --overwrite; user text is drawn plain in figures and movies.
"""
from __future__ import annotations

import copy
import json
import os
import shutil
import threading
import time

import netCDF4
import numpy as np
import pytest

from conftest import make_job
from test_cli import write_job
from wavesweep import setup as setup_layer
from wavesweep.cli import main
from wavesweep.run import Simulation

FREE = {
    "title": "free packet past a detector",
    "grid": {"x": {"min": -40.0, "max": 60.0, "points": 256}, "boundary": "periodic"},
    "packet": {"kind": "gaussian", "center": -15.0, "width": 3.0, "momentum": 1.5},
    "evolve": {"dt": 0.02, "duration": 30.0, "scheme": "strang"},
    "absorber": {"kind": "cap", "thickness": 15.0},
    "record": {"every": 0.1, "snapshot_every": 5.0},
    "detector": [{"name": "d", "x": 15.0}],
}
WELL = {
    "title": "displaced packet in a harmonic well",
    "grid": {"x": {"min": -12.0, "max": 12.0, "points": 128}},
    "potential": [{"kind": "harmonic", "omega": 1.0}],
    "packet": {"kind": "gaussian", "center": 1.5, "width": 0.7071067811865476},
    "evolve": {"dt": 0.1, "duration": 50.0, "scheme": "chebyshev"},
    "record": {"every": 0.1, "snapshot_every": 50.0},
}
# What the hostile file's job attribute says: 512^3 points (2 GiB of psi in double).
HUGE_GRID = '[grid]\nboundary = "periodic"\n' + "".join(
    f'\n[grid.{a}]\nmin = -10.0\nmax = 10.0\npoints = 512\n' for a in "xyz")
# A valid job of as many points, for the rebuild of an older file (judged, never built).
HUGE_1D = {"FREE": '[grid]\nboundary = "periodic"\n\n[grid.x]\nmin = -40.0\nmax = 60.0\npoints = 134217728\n',
           "WELL": '[grid]\nboundary = "periodic"\n\n[grid.x]\nmin = -12.0\nmax = 12.0\npoints = 134217728\n'}


@pytest.fixture(scope="module")
def free_result(tmp_path_factory):
    return Simulation(make_job(copy.deepcopy(FREE))).run(tmp_path_factory.mktemp("free"), progress=False)


@pytest.fixture(scope="module")
def well_result(tmp_path_factory):
    return Simulation(make_job(copy.deepcopy(WELL))).run(tmp_path_factory.mktemp("well"), progress=False)


def _with_job(source, folder, grid_text=HUGE_GRID, keep_record=True):
    """A copy of ``source`` whose job attribute has ``grid_text`` as its
    [grid] (and, without ``keep_record``, no record: an older file)."""
    out = folder / f"edited-{source.name}"
    shutil.copy(source, out)
    with netCDF4.Dataset(out, "a") as ds:
        job = ds.getncattr("job")
        start = job.index("[grid]")
        end = job.find("\n[", job.index("\n", start))
        while end != -1 and job.startswith("[grid.", end + 1):
            end = job.find("\n[", end + 1)
        if grid_text is not None:
            ds.setncattr("job", job[:start] + grid_text + ("" if end == -1 else job[end:]))
        if not keep_record:
            ds.delncattr("analysis_record")
    return out


def _output(argv, capsys):
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err


def _forbid_setups(monkeypatch):
    def refuse(self, *args, **kwargs):
        raise AssertionError("analysis built a set-up from the job attribute")
    monkeypatch.setattr(setup_layer.Model, "__init__", refuse)


# --- item 2: analysis reads the record ------------------------------------------------

@pytest.mark.parametrize("command", [["arrivals", "--json"], ["transmission", "--json"]])
def test_analysis_never_builds_the_set_up_a_job_attribute_names(free_result, tmp_path, capsys, monkeypatch,
                                                                command):
    """A file whose job names 512^3 points: the same JSON as the untouched
    file and no Setup (nor Model) built (before: the set-up of the named
    grid was rebuilt, 5.4 GB)."""
    expected = _output([command[0], str(free_result), *command[1:]], capsys)
    hostile = _with_job(free_result, tmp_path)
    _forbid_setups(monkeypatch)
    code, out, err = _output([command[0], str(hostile), *command[1:]], capsys)
    assert code == 0, err
    assert json.loads(out) == json.loads(expected[1])
    assert err == expected[2]     # the same warnings, read from the file


def test_levels_from_never_builds_the_set_up(well_result, tmp_path, capsys, monkeypatch):
    expected = _output(["levels", "--from", str(well_result), "--count", "3", "--json"], capsys)
    assert expected[0] == 0, expected[2]
    hostile = _with_job(well_result, tmp_path)
    _forbid_setups(monkeypatch)
    code, out, err = _output(["levels", "--from", str(hostile), "--count", "3", "--json"], capsys)
    assert code == 0, err
    assert json.loads(out) == json.loads(expected[1])
    # the levels of the harmonic well, E_n = (n + 1/2) hbar omega (Griffiths sec. 2.3; from memory)
    np.testing.assert_allclose(json.loads(out)["energies"], [0.5, 1.5, 2.5], atol=1e-3)


@pytest.mark.parametrize("argv", [["arrivals"], ["transmission"], ["levels", "--from"]])
def test_an_older_file_is_rebuilt_only_within_memory(free_result, well_result, tmp_path, capsys, monkeypatch,
                                                     argv):
    """Without the record (a file of an older version) the set-up is rebuilt
    from the job, but first its memory is judged from the grid's shape:
    512^3 points against 1 GB available is one line, exit 2, naming the
    file, before anything is built."""
    from wavesweep import adequacy

    source = well_result if argv[0] == "levels" else free_result
    old = _with_job(source, tmp_path, grid_text=None, keep_record=False)
    field = "--from" if argv[0] == "levels" else "RUN.nc"
    with_record = _output([*argv, str(source)], capsys)
    assert with_record[0] == 0, with_record[2]
    assert _output([*argv, str(old)], capsys)[:2] == with_record[:2]   # the same numbers, rebuilt
    (tmp_path / "huge").mkdir()
    huge = _with_job(source, tmp_path / "huge", HUGE_1D["WELL" if argv[0] == "levels" else "FREE"],
                     keep_record=False)
    monkeypatch.setattr(adequacy, "available_memory", lambda: (1e9, 2e9))
    _forbid_setups(monkeypatch)
    code, out, err = _output([*argv, str(huge)], capsys)
    assert code == 2 and out == "", err
    assert len(err.splitlines()) == 1 and f"{field}: " in err and str(huge) in err and "needs about" in err


def test_the_record_holds_the_set_up_in_job_units(free_result):
    """What the run wrote: the grid as the job gave it, the initial packet's
    marginals (a Gaussian of width sigma has position variance sigma^2 and
    momentum mean p0: the definition of the packet), psi0, and the
    recurrence of psi0 (its first alpha is <H> at t = 0, the energy the run
    recorded first)."""
    import xarray as xr

    from wavesweep.io.record import read_record

    with xr.open_dataset(free_result) as ds:
        rec = read_record(ds)
        assert ds.attrs["grid_x_points"] == 256 and ds.attrs["grid_x_min"] == -40.0
        x = rec.grid.axes[0].coordinates
        rho, k, w = rec.marginals[0]
        assert np.sum(rho * x) == pytest.approx(-15.0, abs=1e-9)
        assert np.sum(rho * (x + 15.0) ** 2) == pytest.approx(9.0, rel=1e-6)
        assert np.sum(w * k) == pytest.approx(1.5, rel=1e-6)
        assert rec.psi0.shape == (256,) and np.sum(np.abs(rec.psi0) ** 2) * rec.grid.axes[0].dx == \
            pytest.approx(1.0, abs=1e-12)
        assert rec.lanczos[0][0] == pytest.approx(float(ds.energy.values[0]), rel=1e-9)
        assert json.loads(ds.attrs["adequacy_warnings"]) == rec.warnings


def test_the_recorded_band_is_the_live_one():
    """energy_band from H and from the recurrence a run records agree
    exactly (the same quadratures, step for step), on a displaced packet in
    a harmonic well (reference: the live computation on the same H)."""
    from conftest import setup_of
    from wavesweep.eigen import energy_band, lanczos_recurrence, recorded_energy_band

    setup = setup_of(WELL)
    h, psi0 = setup.hamiltonian, setup.psi0
    for threshold, resolution, width in ((1e-6, 0.05, None), (1e-8, 0.01, 40.0), (1e-4, 0.1, 60.0),
                                         (1e-6, 0.12, 0.5)):     # too narrow: the ground level is the edge
        recorded = lanczos_recurrence(h, psi0, threshold, resolution, width)
        assert recorded_energy_band(recorded, threshold, resolution, width) == \
            energy_band(h, psi0, threshold, resolution, width)


# --- item 8: not regular files ---------------------------------------------------------

def _fifo(folder, name="pipe"):
    """A FIFO that, from a few seconds on, a writer keeps opening and
    closing at once: code that opened it for reading gets end of file and
    fails the test instead of hanging it."""
    path = folder / name
    os.mkfifo(path)

    def unblock():
        time.sleep(5.0)
        deadline = time.monotonic() + 300.0
        while time.monotonic() < deadline and os.path.exists(path):
            try:
                os.close(os.open(path, os.O_WRONLY | os.O_NONBLOCK))   # ENXIO while no reader waits
            except OSError:
                pass
            time.sleep(0.1)
    threading.Thread(target=unblock, daemon=True).start()
    return path


def _refused(argv, capsys, field, *words):
    code, out, err = _output([str(a) for a in argv], capsys)
    assert code == 2 and out == "", (code, err)
    lines = [line for line in err.strip().splitlines() if ": warning: " not in line]   # the set-up's, if any
    assert len(lines) == 1, err
    assert f": {field}: " in lines[0] or (field == "" and lines[0].startswith("wavesweep ")), lines[0]
    for w in words:
        assert w in lines[0], lines[0]
    return lines[0]


@pytest.mark.parametrize("special", ["fifo", "/dev/zero", "folder"])
def test_a_job_file_that_is_not_a_regular_file(tmp_path, capsys, special):
    path = {"fifo": lambda: _fifo(tmp_path), "/dev/zero": lambda: "/dev/zero",
            "folder": lambda: tmp_path}[special]()
    word = {"fifo": "FIFO", "/dev/zero": "character device", "folder": "folder"}[special]
    for command in (["check"], ["run", "-o", tmp_path / "out"], ["levels", "--count", "2"]):
        _refused([command[0], path, *command[1:]], capsys, "", str(path), word)


@pytest.mark.parametrize("special", ["fifo", "/dev/zero", "folder"])
def test_a_potential_or_state_file_that_is_not_a_regular_file(tmp_path, capsys, special):
    path = {"fifo": lambda: _fifo(tmp_path), "/dev/zero": lambda: "/dev/zero",
            "folder": lambda: tmp_path / "sub"}[special]()
    if special == "folder":
        path.mkdir()
    word = {"fifo": "FIFO", "/dev/zero": "character device", "folder": "folder"}[special]
    table = copy.deepcopy(FREE)
    table["potential"] = [{"kind": "file", "path": str(path)}]
    _refused(["check", write_job(tmp_path, table)], capsys, "potential.0.path", word)
    table = copy.deepcopy(FREE)
    table["packet"] = {"kind": "file", "path": str(path)}
    _refused(["run", write_job(tmp_path, table), "-o", tmp_path / "out", "--quiet"], capsys, "packet.path", word)
    assert not (tmp_path / "out").exists() or not list((tmp_path / "out").iterdir())


@pytest.mark.parametrize("special", ["fifo", "/dev/zero", "folder"])
def test_a_result_that_is_not_a_regular_file(tmp_path, capsys, special):
    path = {"fifo": lambda: _fifo(tmp_path), "/dev/zero": lambda: "/dev/zero",
            "folder": lambda: tmp_path}[special]()
    word = {"fifo": "FIFO", "/dev/zero": "character device", "folder": "folder"}[special]
    for argv, field in ((["arrivals", path], "RUN.nc"), (["transmission", path], "RUN.nc"),
                        (["plot", path, "-o", tmp_path / "p.png"], "RUN.nc"),
                        (["movie", path, "-o", tmp_path / "m.mp4"], "RUN.nc"),
                        (["levels", "--from", path], "--from")):
        _refused(argv, capsys, field, word)


# --- item 9: outputs ---------------------------------------------------------------------

def test_an_existing_states_file_is_kept_without_overwrite(tmp_path, capsys):
    job = write_job(tmp_path, WELL)
    states = tmp_path / "states.nc"
    states.write_bytes(b"an earlier result\n")
    _refused(["levels", job, "--count", "2", "--states", states], capsys, "--states", "already exists",
             "--overwrite")
    assert states.read_bytes() == b"an earlier result\n"        # before: silently replaced
    code, out, err = _output(["levels", str(job), "--count", "2", "--states", str(states), "--overwrite"], capsys)
    assert code == 0, err
    with netCDF4.Dataset(states) as ds:
        np.testing.assert_allclose(ds["energy"][:], [0.5, 1.5], rtol=1e-8)   # (n + 1/2) hbar omega


def test_figures_and_movies_are_kept_without_overwrite(free_result, tmp_path, capsys):
    for argv, field in ((["plot", free_result, "-o"], "-o"), (["movie", free_result, "--size", "160x90", "-o"], "-o"),
                        (["arrivals", free_result, "--plot"], "--plot")):
        out = tmp_path / ("m.mp4" if argv[0] == "movie" else "p.png")
        out.write_bytes(b"keep me")
        _refused([*argv, out], capsys, field, "already exists", "--overwrite")
        assert out.read_bytes() == b"keep me"
        code, _, err = _output([str(a) for a in (*argv, out, "--overwrite")], capsys)
        assert code == 0, err
        assert out.read_bytes() != b"keep me"


@pytest.mark.parametrize("case", ["folder", "parent_is_a_file", "suffix", "device"])
def test_outputs_are_checked_before_the_work(free_result, tmp_path, capsys, monkeypatch, case):
    """Each output refused before its command reads or computes anything
    (the reading and solving functions are replaced by ones that fail)."""
    import wavesweep.analysis.arrivals as arrivals
    import wavesweep.viz.movie as movie
    import wavesweep.viz.summary as summary

    def fail(*args, **kwargs):
        raise AssertionError("the work started before the output was checked")
    monkeypatch.setattr(arrivals, "open_result", fail)
    monkeypatch.setattr(movie, "read_scene", fail)
    monkeypatch.setattr(summary, "plot_run", fail)
    (tmp_path / "taken.png").mkdir()
    (tmp_path / "taken.mp4").mkdir()
    (tmp_path / "taken.nc").mkdir()
    (tmp_path / "file").write_text("a file\n")
    target = {"folder": lambda s: tmp_path / f"taken{s}", "parent_is_a_file": lambda s: tmp_path / "file" / f"x{s}",
              "suffix": lambda s: tmp_path / "x.txt", "device": lambda s: "/dev/null"}[case]
    word = {"folder": "folder", "parent_is_a_file": "not a folder", "suffix": "type",
            "device": "character device"}[case]
    _refused(["plot", free_result, "-o", target(".png")], capsys, "-o", word)
    _refused(["movie", free_result, "-o", target(".mp4")], capsys, "-o", word)
    _refused(["arrivals", free_result, "--plot", target(".png")], capsys, "--plot", word)
    _refused(["levels", write_job(tmp_path, WELL), "--count", "2", "--states", target(".nc")], capsys, "--states",
             word)


def test_a_folder_where_the_result_goes_is_found_before_the_run(tmp_path, capsys, monkeypatch):
    """`run -o OUT` with a folder standing at OUT/NAME-RUNID.nc: exit 2
    before a step is taken (before: the run was computed, then lost at the
    rename)."""
    job = make_job(copy.deepcopy(FREE))
    (tmp_path / "out" / f"job-{job.run_id}.nc").mkdir(parents=True)
    stepped = []
    monkeypatch.setattr(Simulation, "write_snapshot", lambda *a: stepped.append(1))
    _refused(["run", write_job(tmp_path, FREE), "-o", tmp_path / "out", "--quiet"], capsys, "--output",
             "is a folder")
    assert not stepped
    _refused(["run", write_job(tmp_path, FREE), "-o", tmp_path / "job.toml", "--quiet"], capsys, "--output",
             "not a folder")


def test_titles_and_names_are_drawn_as_plain_text(tmp_path, capsys):
    """A title and a detector name that are malformed math text: plot,
    movie and arrivals --plot draw them (before: a mathtext parse error,
    exit 1)."""
    table = copy.deepcopy(FREE)
    table["title"] = "bad $\\frac{1}{$ title"
    table["detector"] = [{"name": "$\\sqrt{", "x": 15.0}]
    table["record"]["snapshot_every"] = 10.0
    path = Simulation(make_job(table)).run(tmp_path, progress=False)
    for argv in (["plot", path, "-o", tmp_path / "p.png"], ["movie", path, "-o", tmp_path / "m.gif", "--size",
                                                            "160x90"],
                 ["arrivals", path, "--plot", tmp_path / "a.png"]):
        code, _, err = _output([str(a) for a in argv], capsys)
        assert code == 0, err


def test_a_changed_set_up_attribute_is_damage(free_result, tmp_path, capsys):
    """Attributes carry no HDF5 checksum: the record's CRC-32 catches a
    changed grid bound (before the record, analysis read the job text)."""
    edited = tmp_path / "edited.nc"
    shutil.copy(free_result, edited)
    with netCDF4.Dataset(edited, "a") as ds:
        ds.setncattr("grid_x_min", -41.0)
    _refused(["arrivals", edited], capsys, "RUN.nc", "checksum", "damaged")
    _refused(["transmission", edited], capsys, "RUN.nc", "checksum", "damaged")
