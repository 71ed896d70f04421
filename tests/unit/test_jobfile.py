"""Job files: --set overrides, defaults, run ids, quantities with units, and
error messages that name the field."""
from __future__ import annotations

import copy
import tomllib

import pytest
import scipy.constants as sc
import tomli_w

from wavesweep.errors import JobError
from wavesweep.job import apply_overrides, job_from_dict, load_job, parse_override
from wavesweep.setup import Setup, resolve_job

BOHR_M = sc.physical_constants["Bohr radius"][0]
AU_TIME_S = sc.hbar / sc.physical_constants["Hartree energy"][0]

JOB = {
    "title": "jobfile unit test",
    "grid": {"x": {"min": -60.0, "max": 60.0, "points": 256}, "boundary": "periodic"},
    "potential": [
        {"kind": "barrier", "height": 0.3, "width": 1.0, "center": 10.0},
        {"kind": "gaussian", "height": 0.1, "width": 2.0, "center": 25.0},
    ],
    "packet": {"kind": "gaussian", "center": -20.0, "width": 2.0, "momentum": 1.0},
    "evolve": {"dt": 0.02, "duration": 4.0},
    "record": {"every": 0.2, "snapshot_every": 1.0},
    "detector": [{"name": "far", "x": 30.0}],
}


def job(overrides=(), **patch):
    table = copy.deepcopy(JOB)
    for dotted, value in patch.items():
        node = table
        *path, last = dotted.split("__")
        for part in path:
            node = node[part]
        node[last] = value
    return job_from_dict(table, overrides)


def error(table_or_overrides, overrides=()) -> JobError:
    with pytest.raises(JobError) as info:
        if isinstance(table_or_overrides, dict):
            job_from_dict(table_or_overrides, overrides)
        else:
            job_from_dict(copy.deepcopy(JOB), table_or_overrides)
    return info.value


# -- parse_override: values are read as TOML ------------------------------------------
@pytest.mark.parametrize(("text", "key", "value"), [
    ("packet.width=15", "packet.width", 15),
    ("packet.width = 1.5", "packet.width", 1.5),
    ("packet.center=[-10.0, 0.0]", "packet.center", [-10.0, 0.0]),
    ("record.final_state=false", "record.final_state", False),
    ("evolve.scheme='order4'", "evolve.scheme", "order4"),
    ("evolve.scheme=order4", "evolve.scheme", "order4"),          # bare word: a string
    ("packet.width=3 nm", "packet.width", "3 nm"),                # bare quantity: a string
    ("packet.width=\"3 nm\"", "packet.width", "3 nm"),
    ("potential.0={kind = 'free'}", "potential.0", {"kind": "free"}),
    ("evolve.dt=1e-2", "evolve.dt", 0.01),
    ("title=a=b", "title", "a=b"),                                # only the first = splits
])
def test_parse_override(text, key, value):
    k, v = parse_override(text)
    assert k == key
    assert v == value and type(v) is type(value)


@pytest.mark.parametrize("text", ["packet.width", "=3", "  = 3"])
def test_parse_override_needs_key_and_value(text):
    with pytest.raises(JobError) as info:
        parse_override(text)
    assert info.value.field == "--set"


# -- apply_overrides: nested tables and array tables ----------------------------------
def test_overrides_reach_nested_tables_without_touching_the_input():
    table = copy.deepcopy(JOB)
    out = apply_overrides(table, ["grid.x.points=512", "evolve.scheme=order4", "units.length=nm"])
    assert out["grid"]["x"]["points"] == 512
    assert out["evolve"]["scheme"] == "order4"
    assert out["units"] == {"length": "nm"}          # a missing table is created
    assert table == JOB                               # the input is a copy


def test_overrides_index_array_tables():
    out = apply_overrides(JOB, ["potential.0.height=2.5", "potential.1.center=-3",
                                "potential.-1.width=4.0", "detector.0.name=near"])
    assert out["potential"][0]["height"] == 2.5
    assert out["potential"][1]["center"] == -3
    assert out["potential"][1]["width"] == 4.0
    assert out["detector"][0]["name"] == "near"
    assert out["potential"][0]["kind"] == "barrier"   # the rest of the table stays


def test_override_in_a_loaded_job_file(tmp_path):
    path = tmp_path / "scan.toml"
    path.write_text(tomli_w.dumps(JOB))
    loaded = load_job(path, ["potential.0.height=0.45", "packet.width=2.5", "evolve.dt=0.01"])
    assert loaded.table["potential"][0]["height"] == 0.45
    assert loaded.table["packet"]["width"] == 2.5
    assert loaded.table["evolve"]["dt"] == 0.01
    assert loaded.name == "scan"
    assert load_job(path).table["potential"][0]["height"] == 0.3


@pytest.mark.parametrize(("override", "field", "piece"), [
    ("potential.7.height=1", "potential.7", "0..1"),
    ("potential.one.height=1", "potential.one", "index"),
    ("packet.width.x=1", "packet.width.x", "value, not a table"),
    ("detector.3.x=1", "detector.3", "out of range"),
    ("packet.widht=3", "packet.widht", "'width'"),
    ("grid.x.points=many", "grid.x.points", "integer"),
    ("evolve.dt=[1]", "evolve.dt", "list"),
])
def test_bad_overrides_name_the_field(override, field, piece):
    e = error([override])
    assert e.field == field, str(e)
    assert piece in str(e)


def test_override_cannot_invent_array_table_entries():
    """``--set detector.0.x=5`` on a job without detectors used to build a
    table keyed "0"; it must say there is nothing to index."""
    table = copy.deepcopy(JOB)
    del table["detector"]
    e = error(table, ["detector.0.x=5"])
    assert e.field == "detector.0.x"
    assert "[[detector]]" in str(e)


# -- defaults -------------------------------------------------------------------------
def test_defaults_are_filled():
    table = copy.deepcopy(JOB)
    del table["potential"], table["detector"], table["record"], table["grid"]["boundary"]
    t = job_from_dict(table).table
    assert t["potential"] == [{"kind": "free"}]
    assert t["detector"] == []
    assert t["grid"]["boundary"] == "periodic"
    assert t["evolve"]["scheme"] == "strang" and t["evolve"]["precision"] == "double"
    assert t["absorber"] == {"kind": "none"}
    assert t["particle"]["mass"] == 1.0
    assert t["units"] == {"length": "bohr", "energy": "hartree", "mass": "m_e", "time": "au_time"}
    rec = t["record"]
    assert rec["stride"] == 1 and rec["final_state"] is True
    # 200 steps: a sample every step (about 1000 samples at most), a snapshot
    # every 2 samples (about 100 snapshots)
    assert rec["every"] == 0.02
    assert rec["snapshot_every"] == 0.04


def test_default_sampling_is_written_as_by_hand():
    """10 000 steps of 0.01: samples every 10 steps, snapshots every 100;
    the TOML says 0.1 and 1.0, not 0.09999999999999999."""
    t = job(evolve__dt=0.01, evolve__duration=100.0, record={}).table
    assert t["record"]["every"] == 0.1
    assert t["record"]["snapshot_every"] == 1.0
    assert "every = 0.1\n" in job(evolve__dt=0.01, evolve__duration=100.0, record={}).to_toml()


def test_default_sampling_in_femtoseconds():
    t = job_from_dict({**copy.deepcopy(JOB), "units": {"length": "bohr", "energy": "hartree", "time": "fs"},
                       "evolve": {"dt": 0.3, "duration": 3000.0}, "record": {}}).table
    assert t["record"]["every"] == 3.0            # 10 000 steps -> every 10 steps
    assert t["record"]["snapshot_every"] == 30.0


def test_resolved_job_is_a_fixed_point():
    first = resolve_job(job(absorber={"kind": "cap", "thickness": 10.0}))
    text = first.to_toml()
    second = job_from_dict(tomllib.loads(text))
    assert second.to_toml() == text
    assert second.table == first.table


# -- run ids ----------------------------------------------------------------------------
def _reversed(obj):
    if isinstance(obj, dict):
        return {k: _reversed(obj[k]) for k in reversed(list(obj))}
    if isinstance(obj, list):
        return [_reversed(v) for v in obj]
    return obj


def test_run_id_ignores_key_order():
    assert job_from_dict(_reversed(copy.deepcopy(JOB))).run_id == job().run_id


def test_run_id_ignores_number_formatting():
    a = job()
    b = job(grid__x={"min": -60, "max": 60, "points": 256.0}, packet__width=2, packet__momentum=1,
            evolve__duration=4, record__snapshot_every=1)
    c = job_from_dict(tomllib.loads(tomli_w.dumps(JOB).replace("0.02", "2e-2").replace("4.0", "4.000")))
    assert a.run_id == b.run_id == c.run_id


def test_run_id_ignores_title_and_how_it_is_computed():
    base = job().run_id
    assert job(title="another title").run_id == base
    assert job(["evolve.fft=scipy"]).run_id == base
    assert job(["evolve.threads=1"]).run_id == base


@pytest.mark.parametrize("override", [
    "packet.width=2.5", "potential.0.height=0.31", "evolve.dt=0.01", "grid.x.points=512",
    "particle.mass=2.0", "record.every=0.1", "evolve.scheme=order4", "detector.0.x=31.0",
    "absorber={kind = 'mask', thickness = 10.0}",
])
def test_run_id_changes_with_the_physics(override):
    assert job([override]).run_id != job().run_id


def test_resolution_is_a_function_with_a_result_and_no_side_effect():
    """The CAP strength is tuned by resolve_job, which returns a new, complete
    Job: the given one is not changed, has no id or TOML of its own (a clear
    error, not a silently different id), and the id is the same however the
    complete job is reached (resolve_job, a Setup, its stored TOML)."""
    j = job(absorber={"kind": "cap", "thickness": 10.0})
    table_before = copy.deepcopy(j.table)
    assert j.needs_tuning and j.table["absorber"].get("strength") is None
    with pytest.raises(ValueError, match="resolve_job"):
        j.run_id
    complete = resolve_job(j)
    assert j.table == table_before                    # the document is untouched
    assert not complete.needs_tuning
    assert all(v > 0 for v in complete.table["absorber"]["strength"].values())   # one per face
    assert Setup(j).job.run_id == complete.run_id     # a Setup reaches the same complete job
    assert j.table == table_before
    again = job_from_dict(tomllib.loads(complete.to_toml()))
    assert resolve_job(again) is again and again.run_id == complete.run_id
    given = job()                                      # nothing to choose: the job itself
    assert resolve_job(given) is given


# -- quantities with units ------------------------------------------------------------
def test_strings_with_units_are_accepted_and_kept_as_written():
    j = job(packet__width="0.1 nm", packet__center="-1 nm", evolve__dt="2 as", evolve__duration="80 as",
            record={"every": "8 as", "snapshot_every": "40 as"})
    assert j.table["packet"]["width"] == "0.1 nm"          # the job file says what it said
    assert 'width = "0.1 nm"' in j.to_toml()
    s = Setup(j)
    assert s.packet["width"][0] == pytest.approx(0.1e-9 / BOHR_M, rel=1e-12)
    assert s.packet["center"][0] == pytest.approx(-1e-9 / BOHR_M, rel=1e-12)
    assert s.dt == pytest.approx(2e-18 / AU_TIME_S, rel=1e-12)
    assert (s.total_steps, s.sample_steps, s.snapshot_steps) == (40, 4, 20)


def test_number_in_job_units_equals_string_with_that_unit():
    in_units = job_from_dict({**copy.deepcopy(JOB), "units": {"length": "nm", "energy": "hartree"},
                              "grid": {"x": {"min": -3.0, "max": 3.0, "points": 256}},
                              "packet": {"center": -1.0, "width": 0.1, "momentum": 0.0},
                              "detector": []})
    as_strings = job(grid__x={"min": "-3 nm", "max": "3 nm", "points": 256},
                     packet={"center": "-1 nm", "width": "0.1 nm", "momentum": 0.0}, detector=[])
    a, b = Setup(in_units), Setup(as_strings)
    assert a.grid.axes[0].dx == pytest.approx(b.grid.axes[0].dx, rel=1e-12)
    assert a.packet["center"][0] == pytest.approx(b.packet["center"][0], rel=1e-12)


@pytest.mark.parametrize(("patch", "field", "piece"), [
    ({"packet__width": "3 fs"}, "packet.width", "not a length"),
    ({"evolve__dt": "1 nm"}, "evolve.dt", "not a time"),
    ({"packet__width": "3 parsec"}, "packet.width", "unknown unit 'parsec'"),
    ({"packet__width": "three nm"}, "packet.width", "cannot read"),
])
def test_bad_quantities_name_the_field(patch, field, piece):
    with pytest.raises(JobError) as info:
        job(**patch)
    assert info.value.field == field
    assert piece in str(info.value)


# -- messages ---------------------------------------------------------------------------
@pytest.mark.parametrize(("patch", "field", "pieces"), [
    ({"evolv": {"dt": 1.0}}, "evolv", ["'evolve'", "top level"]),
    ({"packet": {"center": -20.0, "widht": 2.0}}, "packet.widht", ["'width'"]),
    ({"grid": {"x": {"min": -60.0, "max": 60.0, "pionts": 256}}}, "grid.x.pionts", ["'points'"]),
    ({"evolve": {"duration": 4.0}}, "evolve.dt", ["missing", "dt = "]),
    ({"units": "nm"}, "units", ["table"]),
    ({"packet": {"kind": ["gaussian"], "center": 0.0, "width": 1.0}}, "packet.kind", ["string"]),
    ({"packet": {"kind": "gausian", "center": 0.0, "width": 1.0}}, "packet.kind", ["'gaussian'"]),
    ({"evolve": {"dt": 0.02, "duration": 4.0, "fft": "fastest"}}, "evolve.fft", ["'scipy'"]),
    ({"record": {"every": 0.03}}, "record.every", ["whole number", "0.02", "0.04"]),
    ({"record": {"every": 0.2, "snapshot_every": 0.3}}, "record.snapshot_every", ["multiple"]),
    ({"evolve": {"dt": 0.02, "duration": 4.1}}, "evolve.duration", ["multiple of record.every"]),
    ({"grid": {"x": {"min": 60.0, "max": -60.0, "points": 256}}}, "grid.x.max", ["larger"]),
    ({"grid": {"x": {"min": -60.0, "max": 60.0, "points": 2}}}, "grid.x.points", ["at least 4"]),
    ({"detector": [{"name": "a", "x": 1.0}, {"name": "a", "x": 2.0}]}, "detector.1.name", ["twice"]),
])
def test_errors_name_the_field(patch, field, pieces):
    table = copy.deepcopy(JOB)
    table.update(patch)
    e = error(table)
    assert e.field == field, str(e)
    for piece in pieces:
        assert piece in str(e), str(e)
    assert "\n" not in str(e)


@pytest.mark.parametrize(("content", "piece"), [
    (None, "not found"),
    (b'title = "caf\xe9"\n', "not UTF-8"),
    (b'title = "x"\n[grid\n', "not valid TOML"),
])
def test_unreadable_job_files(tmp_path, content, piece):
    path = tmp_path / "job.toml"
    if content is not None:
        path.write_bytes(content)
    with pytest.raises(JobError) as info:
        load_job(path)
    assert piece in str(info.value)
    assert "\n" not in str(info.value)


def test_absurd_momentum_is_a_grid_error_not_an_overflow():
    """p0 = 1e50 used to overflow while tuning the CAP (p^2 ... p^8) before the
    grid check ran; the grid check now comes first.  p0 = 1e300 is refused
    when the job is read: beyond 1e100 atomic units products overflow."""
    j = job(packet__momentum=1e50, absorber={"kind": "cap", "thickness": 10.0})
    with pytest.raises(JobError) as info:
        Setup(j)
    assert info.value.field == "grid.x.points"
    with pytest.raises(JobError) as info:
        job(packet__momentum=1e300)
    assert info.value.field == "packet.momentum" and "1e-100..1e+100" in info.value.message


# -- data files given as job files ---------------------------------------------------
@pytest.mark.parametrize("head", [b"CDF\x01", b"CDF\x02", b"\x89HDF\r\n\x1a\n"])
def test_a_netcdf_or_hdf5_file_is_named_as_data_not_job(tmp_path, head):
    path = tmp_path / "RUN.nc"
    path.write_bytes(head + bytes(range(256)) * 4)     # not UTF-8 after the magic either
    with pytest.raises(JobError) as info:
        load_job(path)
    text = str(info.value)
    assert "RUN.nc" in text and "netCDF/HDF5" in text and "not a job file" in text
    assert "wavesweep plot" in text and "arrivals" in text and "TOML" in text
    assert "UTF-8" not in text and "\n" not in text


def test_a_real_netcdf4_file_is_recognised(tmp_path):
    import netCDF4

    path = tmp_path / "states.nc"
    with netCDF4.Dataset(path, "w", format="NETCDF4") as ds:
        ds.setncattr("title", "a result")
    with pytest.raises(JobError, match="netCDF/HDF5 data file"):
        load_job(path)


def test_windows_line_endings_still_load(tmp_path):
    path = tmp_path / "crlf.toml"
    path.write_bytes(tomli_w.dumps(JOB).replace("\n", "\r\n").encode())
    assert load_job(path).table["packet"]["width"] == 2.0


# -- --set and [sweep] ---------------------------------------------------------------
def _swept_file(tmp_path, sweep):
    table = copy.deepcopy(JOB)
    table["sweep"] = sweep
    path = tmp_path / "scan.toml"
    path.write_text(tomli_w.dumps(table))
    return path


@pytest.mark.parametrize(("override", "swept"), [
    ("packet.width=3", "packet.width"),                         # the swept key itself
    ("packet={kind = 'gaussian', center = -20.0, width = 3.0}", "packet.width"),   # its table
    ("potential.-1.height=0.2", "potential.1.height"),          # the same entry, counted from the end
    ("potential.1.params.a=1", "potential.1.params"),           # a field inside a swept table
])
def test_an_override_of_a_swept_key_is_refused(tmp_path, override, swept):
    from wavesweep.study import load_study

    values = [{"a": 0.0}, {"a": 1.0}] if swept.endswith("params") else [1.5, 2.5]
    path = _swept_file(tmp_path, {"packet.center": [-25.0, -20.0], swept: values})
    key = override.split("=", 1)[0]
    for load in (load_job, load_study):        # check and levels / run and submit
        with pytest.raises(JobError) as info:
            load(path, [override])
        e = info.value
        assert e.field == f"--set {key}", str(e)
        assert f"'{swept}'" in str(e) and "[sweep] of scan.toml" in str(e)
        assert f"drop --set {key}" in str(e) and "remove" in str(e) and "\n" not in str(e)


def test_an_override_of_a_key_not_swept_reaches_every_run(tmp_path):
    from wavesweep.study import expand_study, load_study

    path = _swept_file(tmp_path, {"packet.width": [1.5, 2.5]})
    study = load_study(path, ["packet.center=-25.0", "potential.0.height=0.4"])
    assert [r.job.table["packet"]["width"] for r in study.runs] == [1.5, 2.5]
    assert {r.job.table["packet"]["center"] for r in study.runs} == {-25.0}
    assert {r.job.table["potential"][0]["height"] for r in study.runs} == {0.4}
    assert load_job(path, ["packet.center=-25.0"]).table["packet"]["center"] == -25.0
    # without [sweep] every key may be set; a library caller's tuples are checked too
    plain_file = tmp_path / "plain.toml"
    plain_file.write_text(tomli_w.dumps(JOB))
    assert load_job(plain_file, ["packet.width=3"]).table["packet"]["width"] == 3
    with pytest.raises(JobError, match="--set packet.width"):
        expand_study(tomllib.loads(path.read_text()), overrides=[("packet.width", 3.0)])
    plain = copy.deepcopy(JOB)
    assert expand_study(plain, overrides=["packet.width=3"]).runs[0].job.table["packet"]["width"] == 3


def test_layers_on_one_axis_only_need_room_on_that_axis():
    """absorber.faces = y only: a short x axis is fine (a review finding: it
    was refused as if x had two layers)."""
    from wavesweep.job import job_from_dict
    table = {
        "grid": {"x": {"min": -10.0, "max": 10.0, "points": 64}, "y": {"min": -60.0, "max": 60.0, "points": 256}},
        "packet": {"center": [0.0, -20.0], "width": [2.0, 3.0], "momentum": [0.0, 1.0]},
        "evolve": {"dt": 0.05, "duration": 1.0},
        "absorber": {"kind": "cap", "thickness": 15.0, "faces": ["y-", "y+"]},
    }
    job_from_dict(table)                       # x is 20 long, under two 15-thick layers: no matter
    table["absorber"]["faces"] = ["x+"]
    with pytest.raises(JobError) as info:
        job_from_dict(table | {"absorber": {"kind": "cap", "thickness": 25.0, "faces": ["x+"]}})
    assert info.value.field == "absorber.thickness" and "the layer does not fit" in info.value.message


# -- all errors at once (issue 12) -----------------------------------------------------
def test_independent_errors_are_reported_together_in_file_order():
    """Five mistakes in five tables: one JobError (JobErrors) listing all
    five in the order of the job file; ``field`` is the first one's, and
    ``str()`` stays one line, so callers written for one error still work."""
    from wavesweep.errors import JobErrors

    text = """
title = "five mistakes"
[particle]
mass = -1.0
[grid]
x = { min = -60.0, max = 60.0, points = 0 }
[[potential]]
kind = "barrier"
height = 0.3
widht = 1.0
center = 10.0
[packet]
center = -20.0
width = 2.0
momentum = 1.0
[evolve]
dt = 0.02
duration = 4.0
scheme = "leapfrog"
[record]
every = 0.03
"""
    with pytest.raises(JobError) as info:
        job_from_dict(tomllib.loads(text))
    e = info.value
    assert isinstance(e, JobErrors)
    assert [x.field for x in e.errors] == ["particle.mass", "grid.x.points", "potential.0.widht",
                                          "evolve.scheme", "record.every"]
    assert e.field == "particle.mass" and "positive" in e.message
    assert len(e.lines()) == 5 and all("\n" not in line for line in e.lines())
    assert "\n" not in str(e) and "record.every" in str(e)
    # the order is the file's, not the validator's: [record] first, then [particle]
    moved = text.replace("[record]\nevery = 0.03\n", "").replace("[particle]", "[record]\nevery = 0.03\n[particle]")
    with pytest.raises(JobError) as info:
        job_from_dict(tomllib.loads(moved))
    assert [x.field for x in info.value.errors][:2] == ["record.every", "particle.mass"]


def test_every_bad_key_of_one_table_is_reported():
    e = error({**copy.deepcopy(JOB), "packet": {"center": "3 meV", "width": -2.0, "momentum": "x",
                                                 "colour": 1}})
    assert [x.field for x in e.errors] == ["packet.center", "packet.width", "packet.momentum",
                                          "packet.colour"]


@pytest.mark.parametrize(("patch", "fields"), [
    # a misspelled key is not also missing
    ({"packet": {"center": -20.0, "widht": 2.0}}, ["packet.widht"]),
    ({"evolve": None, "evolv": {"dt": 0.02, "duration": 4.0}}, ["evolv"]),
    # the record's sampling needs evolve.dt: not judged without it
    ({"evolve": {"duration": 4.0}, "record": {"every": 0.03}}, ["evolve.dt"]),
    # detectors and absorber layers need the axis extent: not judged without it
    ({"grid": {"x": {"min": 60.0, "max": -60.0, "points": 256}}, "detector": [{"x": 100.0}],
      "absorber": {"kind": "cap", "thickness": 100.0}}, ["grid.x.max"]),
    ({"grid": None, "detector": [{"x": 1.0}]}, ["grid"]),
    # ... but a bad point count does not hide a detector outside the axis
    ({"grid": {"x": {"min": -60.0, "max": 60.0, "points": 0}}, "detector": [{"x": 100.0}]},
     ["grid.x.points", "detector.0.x"]),
    # bad [units]: values are still checked one by one, not compared
    ({"units": {"length": "nmm", "energy": "meV"}, "packet": {"center": -20.0, "width": -2.0, "momentum": 1.0},
      "detector": [{"x": 100.0}]}, ["packet.width", "units.length"]),
])
def test_a_consequence_of_an_error_is_not_an_error_of_its_own(patch, fields):
    table = copy.deepcopy(JOB)
    for key, value in patch.items():
        if value is None:
            table.pop(key)
        else:
            table[key] = value
    assert [x.field for x in error(table).errors] == fields


def test_each_potential_checks_itself_at_load_time():
    """A term's own checks (here: a driving field needs the particle's
    charge; slits need a 2D grid) ran only when the run was set up, after
    the table checks: they now come with the job's other errors."""
    table = copy.deepcopy(JOB)
    table["potential"] = [{"kind": "field", "amplitude": 0.01, "omega": 0.05},
                          {"kind": "slits", "position": 0.0, "height": 1.0, "thickness": 1.0,
                           "opening_width": 1.0, "openings": [0.0]}]
    table["packet"]["width"] = -2.0
    e = error(table)
    assert [x.field for x in e.errors] == ["potential.1.kind", "packet.width", "particle.charge"]


def test_a_study_reports_each_error_once_with_the_points_it_occurs_at():
    from wavesweep.study import expand_study
    from wavesweep.errors import JobErrors

    table = copy.deepcopy(JOB)
    table["packet"]["center"] = "-20 meV"           # wrong at every point
    table["sweep"] = {"packet.width": [2.0, -1.0], "potential.0.height": [0.1, 0.2, 0.3]}
    with pytest.raises(JobErrors) as info:
        expand_study(table)
    lines = info.value.lines()
    assert len(lines) == 2, lines
    assert lines[0].startswith("packet.center:") and lines[0].endswith("(in all 6 sweep points)")
    assert lines[1].startswith("packet.width: must be positive, got -1.0 (in 3 of 6 sweep points: "
                               "packet.width = -1.0, potential.0.height = 0.1;")


def test_a_study_too_large_is_refused_from_its_sizes():
    """A product of 1000 x 1000 x 1000 runs, or a range of 1e9 values, was
    expanded (hanging, or out of memory) before it was judged; now the sizes
    are refused first, naming the key."""
    import pytest
    from wavesweep.job.sweep import MAX_RUNS, sweep_axes
    from wavesweep.errors import JobError

    rng = {"start": 1.0, "stop": 2.0, "num": 1000}
    with pytest.raises(JobError) as err:
        sweep_axes({"a.b": rng, "c.d": rng, "e.f": rng})
    assert err.value.field == "sweep" and "1000000000 runs" in str(err.value)
    with pytest.raises(JobError) as err:
        sweep_axes({"a.b": {"start": 1.0, "stop": 2.0, "num": 10**9}})
    assert err.value.field == "sweep.a.b.num"
    assert len(sweep_axes({"a.b": {**rng, "num": MAX_RUNS}})[1]["a.b"]) == MAX_RUNS
