"""The result dataset of one run (design.md, "Result dataset" — contract).

Coordinates, variables with their dims and dtypes, ``units``/``long_name``
on everything, the global attributes, the ``job`` attribute as a complete job
that reproduces the run, snapshot decimation, 2D and radial layouts, one
float32 frame per chunk, and a writer that streams frames instead of keeping
them.  Runs are in-process and tiny (tens of steps on 128-point grids).
"""
from __future__ import annotations

import copy
import math
import re
import tomllib
import tracemalloc

import netCDF4
import numpy as np
import pytest
import scipy.constants as sc
import tomli_w
import xarray as xr

import wavesweep
from wavesweep.io.recorder import ResultWriter
from wavesweep.job import job_from_dict, load_job
from wavesweep.run import Simulation
from wavesweep.setup import resolve_job

BASE_1D = {
    "title": "contract 1D",
    "grid": {"x": {"min": -40.0, "max": 40.0, "points": 128}, "boundary": "periodic"},
    "potential": [{"kind": "barrier", "height": 0.5, "width": 1.0, "center": 0.0}],
    "packet": {"kind": "gaussian", "center": -10.0, "width": 2.0, "momentum": 1.0},
    "evolve": {"dt": 0.05, "duration": 1.0, "scheme": "strang"},
    "absorber": {"kind": "cap", "thickness": 8.0},
    "record": {"every": 0.1, "snapshot_every": 0.5},
    "detector": [{"name": "before", "x": -5.0}, {"name": "after", "x": 10.0}],
}

BASE_2D = {
    "title": "contract 2D",
    "grid": {"x": {"min": -20.0, "max": 20.0, "points": 64}, "y": {"min": -16.0, "max": 16.0, "points": 48}},
    "packet": {"center": [-5.0, 0.0], "width": [1.5, 1.5], "momentum": [1.0, 0.0]},
    "evolve": {"dt": 0.05, "duration": 0.4},
    "absorber": {"kind": "cap", "thickness": 4.0},
    "record": {"every": 0.1, "snapshot_every": 0.2, "stride": 2},
    "detector": [{"x": 5.0}, {"name": "side", "y": 4.0}],
}

BASE_RADIAL = {
    "title": "contract radial",
    "grid": {"r": {"max": 40.0, "points": 128}, "l": 1},
    "potential": [{"kind": "coulomb"}],
    "packet": {"center": 15.0, "width": 2.0, "momentum": -0.5},
    "evolve": {"dt": 0.05, "duration": 0.4},
    "absorber": {"kind": "cap", "thickness": 8.0},
    "record": {"every": 0.1, "snapshot_every": 0.2},
}

SCALARS_1D = ("norm", "x_mean", "x_std", "p_mean", "energy", "autocorrelation_real", "autocorrelation_imag")


def run_file(table: dict, folder, name: str = "job"):
    """Write ``table`` as ``folder/name.toml``, run it, return (result path, job)."""
    folder.mkdir(parents=True, exist_ok=True)
    src = folder / f"{name}.toml"
    src.write_text(tomli_w.dumps(table))
    job = load_job(src)
    return Simulation(job).run(folder / "out", progress=False), job


@pytest.fixture(scope="module")
def run_1d(tmp_path_factory):
    folder = tmp_path_factory.mktemp("contract1d")
    src = folder / "job.toml"
    src.write_text(tomli_w.dumps(BASE_1D))
    run_id_before = resolve_job(load_job(src)).run_id  # the complete job, the loaded one unchanged
    path = Simulation(load_job(src)).run(folder / "out", progress=False)
    return {"path": path, "run_id_before": run_id_before, "folder": folder}


@pytest.fixture(scope="module")
def ds_1d(run_1d):
    with xr.open_dataset(run_1d["path"]) as ds:
        yield ds.load()


# -- layout --------------------------------------------------------------------------
def test_coordinates(ds_1d):
    ds = ds_1d
    for name in ("x", "time", "snapshot_time", "detector", "detector_x", "boundary"):
        assert name in ds.coords, f"{name} is not a coordinate"
    assert ds["detector_x"].dims == ("detector",)
    assert list(ds["detector"].values) == ["before", "after"]
    np.testing.assert_array_equal(ds["detector_x"].values, [-5.0, 10.0])
    assert list(ds["boundary"].values) == ["x-", "x+"]
    # periodic axis: x_j = min + j L / N
    np.testing.assert_allclose(ds["x"].values, -40.0 + np.arange(128) * 80.0 / 128, rtol=0, atol=1e-12)
    np.testing.assert_allclose(ds["time"].values, np.arange(11) * 0.1, rtol=0, atol=1e-12)
    np.testing.assert_allclose(ds["snapshot_time"].values, [0.0, 0.5, 1.0], rtol=0, atol=1e-12)


def test_variables_dims_and_dtypes(ds_1d):
    ds = ds_1d
    assert ds["density"].dims == ("snapshot_time", "x")
    assert ds["density"].dtype == np.float32
    assert ds["potential"].dims == ("x",)
    for name in SCALARS_1D:
        assert ds[name].dims == ("time",), name
        assert ds[name].dtype == np.float64, name
    assert ds["flux"].dims == ("time", "detector")
    assert ds["absorbed"].dims == ("time", "boundary")
    assert ds["density"].shape == (3, 128)
    assert ds["flux"].shape == (11, 2)
    assert ds["absorbed"].shape == (11, 2)


def test_every_coordinate_and_variable_has_units_and_long_name(run_1d):
    # read the file itself (xarray may move attributes into encodings)
    with netCDF4.Dataset(run_1d["path"]) as nc:
        assert nc.variables, "no variables"
        for name, var in nc.variables.items():
            attrs = var.ncattrs()
            assert "units" in attrs and "long_name" in attrs, f"{name}: {attrs}"
            assert str(var.getncattr("long_name")).strip(), name
            assert str(var.getncattr("units")).strip(), name


def test_values_are_physical(ds_1d):
    ds = ds_1d
    # norm on the grid plus absorbed probability is 1 to rounding (contract)
    total = ds["norm"] + ds["absorbed"].sum("boundary")
    np.testing.assert_allclose(total.values, 1.0, rtol=0, atol=1e-10)
    # the first density frame is the initial packet: |psi|^2 integrates to 1
    dx = float(ds["x"][1] - ds["x"][0])
    assert float(ds["density"][0].sum()) * dx == pytest.approx(1.0, abs=1e-6)
    assert float(ds["x_mean"][0]) == pytest.approx(-10.0, abs=1e-9)
    assert float(ds["x_std"][0]) == pytest.approx(2.0, abs=1e-9)
    assert float(ds["autocorrelation_real"][0]) == pytest.approx(1.0, abs=1e-12)
    # the barrier's static potential, on the snapshot grid
    assert float(ds["potential"].max()) == pytest.approx(0.5)


def test_global_attributes(run_1d, ds_1d):
    a = ds_1d.attrs
    for key in ("job", "run_id", "wavesweep_version", "scheme", "dt", "steps", "wall_seconds",
                "units_length", "units_energy", "units_time", "units_mass"):
        assert key in a, key
    assert re.fullmatch(r"[0-9a-f]{12}", a["run_id"])
    assert a["wavesweep_version"] == wavesweep.__version__
    assert a["scheme"] == "strang"
    assert a["dt"] == pytest.approx(0.05)
    assert int(a["steps"]) == 20
    assert float(a["wall_seconds"]) > 0
    assert (a["units_length"], a["units_energy"], a["units_mass"]) == ("bohr", "hartree", "m_e")
    # the id a queue computes from the job file before running is the file's id
    assert run_1d["run_id_before"] == a["run_id"]


# -- the job attribute reproduces the run ----------------------------------------------
def test_job_attribute_is_a_complete_job_that_reproduces_the_run(run_1d, ds_1d, tmp_path):
    text = ds_1d.attrs["job"]
    table = tomllib.loads(text)
    assert all(v > 0 for v in table["absorber"]["strength"].values())  # the tuned CAP, per face
    assert table["record"]["stride"] == 1 and table["evolve"]["precision"] == "double"
    # from a dict, as a script would do
    assert job_from_dict(tomllib.loads(text)).run_id == ds_1d.attrs["run_id"]
    # from a file, as a user would do: run it again
    src = tmp_path / "again.toml"
    src.write_text(text)
    again = load_job(src)
    assert again.run_id == ds_1d.attrs["run_id"]
    path = Simulation(again).run(tmp_path / "out", progress=False)
    with xr.open_dataset(path) as ds2:
        ds2 = ds2.load()
    assert ds2.attrs["run_id"] == ds_1d.attrs["run_id"]
    assert ds2.attrs["job"] == text  # the resolved job is a fixed point
    assert set(ds2.variables) == set(ds_1d.variables)
    for name in ds_1d.variables:
        xr.testing.assert_identical(ds2[name], ds_1d[name])
    differ = {k for k in ds_1d.attrs if ds_1d.attrs[k] != ds2.attrs.get(k)}
    assert differ <= {"wall_seconds"}, differ


def test_run_id_changes_with_the_physics(ds_1d):
    table = tomllib.loads(ds_1d.attrs["job"])
    table["packet"]["width"] = 2.5
    assert job_from_dict(table).run_id != ds_1d.attrs["run_id"]


# -- snapshots ----------------------------------------------------------------------
def test_stride_decimates_snapshots_only(ds_1d, tmp_path):
    table = copy.deepcopy(BASE_1D)
    table["record"]["stride"] = 4
    path, _ = run_file(table, tmp_path)
    with xr.open_dataset(path) as ds:
        ds = ds.load()
    assert ds.sizes["x"] == 32
    np.testing.assert_array_equal(ds["x"].values, ds_1d["x"].values[::4])
    np.testing.assert_array_equal(ds["density"].values, ds_1d["density"].values[:, ::4])
    np.testing.assert_array_equal(ds["potential"].values, ds_1d["potential"].values[::4])
    # the physics is the same: every scalar sample agrees
    for name in SCALARS_1D + ("flux", "absorbed"):
        np.testing.assert_array_equal(ds[name].values, ds_1d[name].values, err_msg=name)


def test_density_is_float32_in_chunks_of_whole_frames(run_1d):
    """Frames are written in blocks (a chunk of whole frames, no more than
    the run writes), with Fletcher-32 checksums and without zlib (a
    split-operator density's mantissas are round-off noise: see
    recorder.FRAME_COMPRESSION); every time series is chunked in blocks of
    samples, not one chunk per sample."""
    with netCDF4.Dataset(run_1d["path"]) as nc:
        dens = nc["density"]
        assert dens.dtype == np.float32
        assert dens.chunking() == [len(nc.dimensions["snapshot_time"]), 128]
        assert dens.filters()["fletcher32"] and not dens.filters()["zlib"]
        assert nc.dimensions["snapshot_time"].isunlimited()
        n_time = len(nc.dimensions["time"])
        for name, var in nc.variables.items():
            if var.dimensions[:1] == ("time",):
                assert var.chunking()[0] == n_time, name


def test_2d_layout(tmp_path):
    path, _ = run_file(BASE_2D, tmp_path)
    with xr.open_dataset(path) as ds:
        ds = ds.load()
    assert ds["density"].dims == ("snapshot_time", "x", "y")
    assert ds["density"].shape == (3, 32, 24)  # stride 2 on 64 x 48
    assert ds["potential"].dims == ("x", "y")
    assert ds["flux"].dims == ("time", "detector")
    assert list(ds["detector"].values) == ["x=5.0", "side"]
    np.testing.assert_array_equal(ds["detector_x"].values, [5.0, 4.0])
    assert list(ds["boundary"].values) == ["x-", "x+", "y-", "y+"]
    assert ds["absorbed"].shape == (5, 4)
    for name in ("x", "y"):
        assert ds[name].attrs["units"] == "bohr" and ds[name].attrs["long_name"]
    dxdy = float(ds["x"][1] - ds["x"][0]) * float(ds["y"][1] - ds["y"][0])
    assert float(ds["density"][0].sum()) * dxdy == pytest.approx(1.0, rel=1e-3)  # decimated sum
    with netCDF4.Dataset(path) as nc:
        assert nc["density"].chunking() == [3, 32, 24]   # the run's 3 frames: one block


def test_radial_layout(tmp_path):
    path, _ = run_file(BASE_RADIAL, tmp_path)
    with xr.open_dataset(path) as ds:
        ds = ds.load()
    assert ds["density"].dims == ("snapshot_time", "r")
    assert ds["potential"].dims == ("r",)
    assert "x" not in ds.dims and "r" in ds.coords
    assert ds["r"].attrs["units"] == "bohr"
    assert float(ds["r"].min()) > 0.0  # u(0) = 0 is not stored as a point
    assert list(ds["boundary"].values) == ["r+"]
    assert ds.sizes["detector"] == 0 and ds["flux"].shape == (5, 0)
    assert ds.attrs["grid_kind"] == "radial" and int(ds.attrs["angular_momentum"]) == 1
    total = ds["norm"] + ds["absorbed"].sum("boundary")
    np.testing.assert_allclose(total.values, 1.0, rtol=0, atol=1e-10)


def test_results_are_in_the_job_units(tmp_path):
    """nm / meV / fs job: coordinates, times and observables come back in
    those units.  p0 = sqrt(2 m E) and <H> = E + hbar^2 / (8 m sigma^2) for a
    minimum-uncertainty Gaussian (design.md, job file: `energy`), computed
    here from CODATA values in scipy.constants."""
    m_rel, e_mev, sigma_nm, x0_nm = 0.067, 50.0, 5.0, -30.0
    table = {
        "units": {"length": "nm", "energy": "meV", "time": "fs"},
        "particle": {"mass": m_rel},
        "grid": {"x": {"min": -100.0, "max": 100.0, "points": 256}},
        "packet": {"center": x0_nm, "width": sigma_nm, "energy": e_mev},
        "evolve": {"dt": 1.0, "duration": 10.0},
        "record": {"every": 2.0, "snapshot_every": 10.0},
    }
    path, _ = run_file(table, tmp_path)
    with xr.open_dataset(path) as ds:
        ds = ds.load()
    a = ds.attrs
    assert (a["units_length"], a["units_energy"], a["units_time"]) == ("nm", "meV", "fs")
    assert a["dt"] == pytest.approx(1.0)
    assert ds["x"].attrs["units"] == "nm" and ds["time"].attrs["units"] == "fs"
    assert ds["energy"].attrs["units"] == "meV"
    assert float(ds["x"][0]) == pytest.approx(-100.0)
    np.testing.assert_allclose(ds["time"].values, [0, 2, 4, 6, 8, 10], atol=1e-9)
    assert float(ds["x_mean"][0]) == pytest.approx(x0_nm, abs=1e-9)
    m_si, e_si = m_rel * sc.m_e, e_mev * 1e-3 * sc.eV
    p0 = math.sqrt(2 * m_si * e_si) / (sc.m_e * 1e-9 / 1e-15)  # in m_e nm / fs
    assert float(ds["p_mean"][0]) == pytest.approx(p0, rel=1e-9)
    mean_e = (e_si + sc.hbar**2 / (8 * m_si * (sigma_nm * 1e-9) ** 2)) / (1e-3 * sc.eV)
    assert float(ds["energy"][0]) == pytest.approx(mean_e, rel=1e-9)
    # free motion: <H> is conserved, to the scheme's (second-order) error
    np.testing.assert_allclose(ds["energy"].values, mean_e, rtol=1e-6)


# -- streaming -------------------------------------------------------------------------
def _layout(n):
    x = np.linspace(-1.0, 1.0, n, endpoint=False)
    units = {"length": "bohr", "time": "au_time", "energy": "hartree", "momentum": "m_e bohr au_time-1",
             "density": "bohr-1", "flux": "au_time-1"}
    return x, {"axes": [("x", x, "position x")], "stride": 1, "units": units, "detectors": [],
               "faces": [], "potential": np.zeros(n), "autocorrelation": True, "final_state": False}


def _sample(i):
    return {"norm": 1.0, "x_mean": 0.1 * i, "x_std": 1.0, "p_mean": 0.0, "energy": 0.5,
            "flux": np.zeros(0), "absorbed": np.zeros(0),
            "autocorrelation_real": 1.0, "autocorrelation_imag": 0.0}


def test_writer_streams_frames_instead_of_keeping_them(tmp_path):
    """40 frames of 100 000 points (16 MB as float32) pass through the writer
    while the memory Python holds grows by less than two frames."""
    n, frames = 100_000, 40
    x, layout = _layout(n)
    frame = np.exp(-(x / 0.1) ** 2)
    writer = ResultWriter(tmp_path / "stream.nc", layout, {"run_id": "stream-test"})
    writer.add_snapshot(0.0, frame)
    writer.add_sample(0.0, _sample(0))
    tracemalloc.start()
    try:
        base = tracemalloc.get_traced_memory()[0]
        for i in range(1, frames):
            writer.add_snapshot(float(i), frame * i)
            writer.add_sample(float(i), _sample(i))
        grown = tracemalloc.get_traced_memory()[0] - base
    finally:
        tracemalloc.stop()
    assert grown < 2 * frame.nbytes, f"writer holds {grown / 2**20:.1f} MiB after {frames} frames"
    # scalar samples are buffered in a bounded block, frames not at all
    for i in range(frames, frames + 2 * ResultWriter.block):
        writer.add_sample(float(i), _sample(i))
    assert len(writer._buf) < ResultWriter.block
    assert all(not isinstance(v, np.ndarray) or v.size <= 1
               for row in writer._buf for v in row.values())
    path = writer.close()
    assert not (tmp_path / ".stream.nc.part").exists()
    with netCDF4.Dataset(path) as nc:
        assert nc["density"].shape == (frames, n)
        np.testing.assert_array_equal(nc["density"][frames - 1], (frame * (frames - 1)).astype(np.float32))
        assert nc["time"].shape == (frames + 2 * ResultWriter.block,)
        np.testing.assert_allclose(nc["x_mean"][:5], 0.1 * np.arange(5))


def test_buffered_frames_and_samples_reach_a_checkpoint_copy_and_the_file(tmp_path):
    """Frames wait in a block (a chunk of whole frames) and samples in
    theirs: a checkpoint's copy taken with both buffered holds every one of
    them, and frames are the values given when added, even when the caller
    reuses its array before the block is written."""
    x, layout = _layout(64)
    layout["expected"] = {"samples": 20, "snapshots": 20}
    writer = ResultWriter(tmp_path / "r.nc", layout, {"run_id": "buffered"})
    assert writer.frames_per_block == 20            # 256-byte frames: the whole run in one chunk
    frame = np.empty(64, np.float32)             # as the run gives it: no conversion, no copy
    for i in range(7):
        frame[:] = np.cos(x * i)                    # one array, refilled for each frame
        writer.add_snapshot(float(i), frame)
        writer.add_sample(float(i), _sample(i))
    assert writer.position == (7, 7)
    writer.save_copy(tmp_path / "copy.nc")
    with netCDF4.Dataset(tmp_path / "copy.nc") as nc:
        assert len(nc.dimensions["snapshot_time"]) == 7 and len(nc.dimensions["time"]) == 7
        np.testing.assert_array_equal(nc["density"][:], np.cos(np.outer(np.arange(7), x)).astype(np.float32))
        np.testing.assert_array_equal(nc["snapshot_time"][:], np.arange(7.0))
        np.testing.assert_allclose(nc["x_mean"][:], 0.1 * np.arange(7))
    for i in range(7, 20):
        frame[:] = np.cos(x * i)
        writer.add_snapshot(float(i), frame)
        writer.add_sample(float(i), _sample(i))
    path = writer.close()
    with netCDF4.Dataset(path) as nc:
        np.testing.assert_array_equal(nc["density"][:], np.cos(np.outer(np.arange(20), x)).astype(np.float32))
        np.testing.assert_array_equal(nc["time"][:], np.arange(20.0))


def test_writer_abort_leaves_nothing(tmp_path):
    _, layout = _layout(64)
    writer = ResultWriter(tmp_path / "gone.nc", layout, {})
    writer.add_snapshot(0.0, np.ones(64))
    assert (tmp_path / ".gone.nc.part").exists()  # written under a temporary name
    writer.abort()
    assert list(tmp_path.iterdir()) == []


def test_writer_reports_an_unwritable_folder_as_bad_output(tmp_path, monkeypatch):
    """netCDF4 refusing to create the file (permissions, full disk) is a
    one-line error about --output, not a traceback."""
    from wavesweep.errors import JobError

    def refuse(*args, **kwargs):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(netCDF4, "Dataset", refuse)   # the recorder imports netCDF4 on first use
    _, layout = _layout(8)
    with pytest.raises(JobError) as info:
        ResultWriter(tmp_path / "r.nc", layout, {})
    assert info.value.field == "--output"
    assert "Permission denied" in str(info.value)
    assert list(tmp_path.iterdir()) == []


def test_the_sample_buffer_is_bounded_in_bytes_too(tmp_path, monkeypatch):
    """Samples wait in a block of ResultWriter.block rows, fewer when a row
    is large (a 3D spectrum plane is MiBs a sample): the block's bytes stay
    within SAMPLE_BUFFER_BYTES, here set small, and every sample still
    reaches the file in order."""
    from wavesweep.io import recorder
    x, layout = _layout(64)
    writer = ResultWriter(tmp_path / "b.nc", layout, {"run_id": "bounded"})
    row = writer._row_bytes()
    monkeypatch.setattr(recorder, "SAMPLE_BUFFER_BYTES", 10 * row)
    assert writer._sample_block() == 10
    most = 0
    for i in range(95):
        writer.add_sample(float(i), _sample(i))
        most = max(most, len(writer._buf))
    assert most == 9   # the tenth sample wrote the block
    path = writer.close()
    with netCDF4.Dataset(path) as nc:
        np.testing.assert_array_equal(nc["time"][:], np.arange(95.0))
        np.testing.assert_allclose(nc["x_mean"][:], 0.1 * np.arange(95))
