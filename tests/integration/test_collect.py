"""`collect`: one study dataset from the runs' result files (design.md,
"wavesweep collect STUDY --root ROOT").

The studies are laid out on disk as the queue lays them out: ROOT/STUDY/
study.json (``Study.manifest()``) and ROOT/STUDY/RUN_ID.nc, the runs executed
in-process with ``Simulation(job).run(path=...)``.

The main study sends a Gaussian packet at a symmetric Eckart barrier
V(x) = V0 / cosh^2(x / a) (atomic units, a = 1 bohr), sweeping the central
momentum p0 in {1.0, 1.4} and V0 in {0.3, 0.5, 0.7} hartree (grid mode, 2 x 3
runs, from tunnelling below the top to passing over it).  Its transmission is
checked against the closed form, averaged over the packet's momenta.
"""
from __future__ import annotations

import copy
import json
import math
import shutil
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import numpy as np
import pytest
import xarray as xr
from scipy.integrate import quad

from wavesweep.studies.collect import collect
from wavesweep.study import expand_study
from wavesweep.errors import JobError
from wavesweep.run import Simulation
from wavesweep.units import UnitSet

HALF, LAYER, SIGMA_X, ECKART_A = 50.0, 20.0, 3.0, 1.0
MOMENTA, HEIGHTS = [1.0, 1.4], [0.3, 0.5, 0.7]

ECKART = {
    "title": "Eckart barrier scan",
    # hard walls behind the layers: what crosses a layer comes back through it
    "grid": {"x": {"min": -HALF, "max": HALF, "points": 512}, "boundary": "box"},
    "potential": [{"kind": "eckart", "height": 0.5, "width": ECKART_A}],
    "packet": {"kind": "gaussian", "center": -HALF / 2 + LAYER / 2, "width": SIGMA_X, "momentum": 1.0},
    "evolve": {"dt": 0.05, "duration": 140.0},
    # strength and exponent given: tuning them to each packet costs ~1.5 s a run
    "absorber": {"kind": "cap", "thickness": LAYER, "strength": 1.0, "power": 3.0},
    "record": {"every": 1.0, "snapshot_every": 140.0},
    "detector": [{"name": "before", "x": -10.0}, {"name": "after", "x": 5.0}],
    "sweep": {"mode": "grid", "packet.momentum": MOMENTA, "potential.0.height": HEIGHTS},
}

# a free packet, a few dozen steps: for layouts where the physics does not matter
TINY = {
    "title": "tiny",
    "grid": {"x": {"min": -30.0, "max": 30.0, "points": 128}, "boundary": "periodic"},
    "potential": [{"kind": "gaussian", "height": 0.2, "width": 1.0}],
    "packet": {"kind": "gaussian", "center": -10.0, "width": 2.0, "momentum": 1.0},
    "evolve": {"dt": 0.1, "duration": 3.0},
    "absorber": {"kind": "cap", "thickness": 6.0, "strength": 1.0, "power": 2.0},
    "record": {"every": 0.5, "snapshot_every": 3.0},
    "detector": [{"name": "d", "x": 5.0}],
}


def submit_and_run(table, root: Path, name: str, skip=()):
    """Expand, write study.json, run every run (but the indices in ``skip``)."""
    study = expand_study(copy.deepcopy(table), name=name)
    folder = root / name
    folder.mkdir(parents=True, exist_ok=True)
    for i, spec in enumerate(study.runs):
        if i not in skip:
            Simulation(spec.job).run(path=folder / f"{spec.run_id}.nc", progress=False)
    (folder / "study.json").write_text(json.dumps(study.manifest()))
    return study


@pytest.fixture(scope="module")
def eckart(tmp_path_factory):
    root = tmp_path_factory.mktemp("root")
    study = submit_and_run(ECKART, root, "eckart-scan")
    path = collect(root, "eckart-scan")
    with xr.open_dataset(path) as ds:
        ds.load()
    return root, study, path, ds


def _point(spec):
    return {"momentum": spec.params["packet.momentum"], "height": spec.params["potential.0.height"]}


# -- layout --------------------------------------------------------------------------
def test_grid_study_dimensions_coordinates_and_attributes(eckart):
    root, study, path, ds = eckart
    assert path == root / "eckart-scan" / "summary.nc"
    # spectrum_point: each run's momentum spectra (wavesweep spectrum's 401 points)
    assert dict(ds.sizes) == {"momentum": 2, "height": 3, "time": 141, "boundary": 2, "detector": 2,
                              "spectrum_point": 401}
    assert ds.momentum.values.tolist() == MOMENTA
    assert ds.height.values.tolist() == HEIGHTS
    assert ds.momentum.attrs["sweep_key"] == "packet.momentum"
    assert ds.height.attrs["sweep_key"] == "potential.0.height"
    au = UnitSet()
    assert ds.height.attrs["units"] == au.unit_label("energy") == "hartree"
    assert ds.momentum.attrs["units"] == au.unit_label("momentum")
    assert ds.absorbed.dims == ("momentum", "height", "time", "boundary")
    assert ds.flux.dims == ("momentum", "height", "time", "detector")
    assert ds.norm.dims == ("momentum", "height", "time")
    for name in ("final_norm", "wall_seconds", "run_id", "has_result"):
        assert ds[name].dims == ("momentum", "height")
    assert ds.boundary.values.tolist() == ["x-", "x+"]
    assert ds.detector.values.tolist() == ["before", "after"]
    for name in ds.variables:
        assert ds[name].attrs.get("units"), name
        assert ds[name].attrs.get("long_name"), name
    with xr.open_dataset(root / "eckart-scan" / f"{study.runs[0].run_id}.nc") as one:
        for key in ("units_length", "units_energy", "units_time", "units_mass"):
            assert ds.attrs[key] == one.attrs[key]
        assert ds.time.attrs["units"] == one.time.attrs["units"]
        assert ds.flux.attrs["units"] == one.flux.attrs["units"]
        # the coordinate's unit is the unit the result writes energies in
        assert ds.height.attrs["units"] == one.potential.attrs["units"]
    assert ds.attrs["study"] == "eckart-scan"
    assert ds.attrs["sweep_mode"] == "grid"
    assert ds.attrs["runs_found"] == 6 and ds.attrs["runs_expected"] == 6
    assert ds.attrs["runs_missing"] == ""
    assert "union" in ds.attrs["time_alignment"]
    assert (ds.has_result.values == 1).all()
    assert not [p for p in path.parent.iterdir() if p.name.endswith(".part")]


def test_values_are_the_runs_values_exactly(eckart):
    root, study, _, ds = eckart
    for spec in study.runs:
        at = ds.sel(_point(spec))
        with xr.open_dataset(root / "eckart-scan" / f"{spec.run_id}.nc") as one:
            assert at.run_id.item() == spec.run_id == one.attrs["run_id"]
            assert at.expected_run_id.item() == spec.run_id
            for face in ("x-", "x+"):
                last = one.absorbed.sel(boundary=face).values[-1]
                assert at.absorbed.sel(boundary=face).isel(time=-1).item() == last
                assert at.final_absorbed.sel(boundary=face).item() == last
            np.testing.assert_array_equal(at.absorbed.values, one.absorbed.values)
            np.testing.assert_array_equal(at.flux.values, one.flux.values)
            np.testing.assert_array_equal(at.norm.values, one.norm.values)
            np.testing.assert_array_equal(ds.time.values, one.time.values)
            assert at.final_norm.item() == one.norm.values[-1]
            assert at.wall_seconds.item() == one.attrs["wall_seconds"]


def test_transmission_plots_against_the_swept_parameter(eckart):
    import matplotlib.pyplot as plt

    _, _, _, ds = eckart
    transmitted = ds.absorbed.sel(boundary="x+").isel(time=-1)
    fig = plt.figure()
    mesh = transmitted.plot()          # two swept axes: a colour map over them
    np.testing.assert_array_equal(np.asarray(mesh.get_array()).ravel(), transmitted.values.ravel())
    assert "packet.momentum" in fig.axes[0].get_ylabel()
    plt.close(fig)
    fig = plt.figure()
    lines = transmitted.sel(momentum=1.0).plot(marker="o")   # T against V0
    x, y = lines[0].get_data()
    assert list(x) == HEIGHTS
    np.testing.assert_array_equal(y, transmitted.sel(momentum=1.0).values)
    assert "potential.0.height" in fig.axes[0].get_xlabel()
    assert "hartree" in fig.axes[0].get_xlabel()
    plt.close(fig)


# -- physics -------------------------------------------------------------------------
def eckart_transmission(energy, height, a, mass=1.0):
    """T(E) of V = V0 / cosh^2(x / a), hbar = 1, with k = sqrt(2 m E):

    T = sinh^2(pi k a) / (sinh^2(pi k a) + cosh^2((pi/2) sqrt(8 m V0 a^2 - 1)))

    (cosh -> cos with sqrt(1 - 8 m V0 a^2) when 8 m V0 a^2 < 1).  Landau &
    Lifshitz, Quantum Mechanics, section 25, problem 4 (Eckart 1930); from
    memory.
    """
    k = math.sqrt(2 * mass * energy)
    s = 8 * mass * height * a * a - 1
    c = math.cosh(0.5 * math.pi * math.sqrt(s)) if s > 0 else math.cos(0.5 * math.pi * math.sqrt(-s))
    num = math.sinh(math.pi * k * a) ** 2
    return num / (num + c * c)


def packet_transmission(p0, sigma_p, height, a):
    """The closed form averaged over the packet's momentum density, a normal
    density of mean p0 and standard deviation hbar / (2 sigma_x) for the
    minimum-uncertainty Gaussian (scipy.integrate.quad)."""
    def integrand(p):
        w = math.exp(-0.5 * ((p - p0) / sigma_p) ** 2) / (math.sqrt(2 * math.pi) * sigma_p)
        return w * eckart_transmission(p * p / 2, height, a)
    value, err = quad(integrand, p0 - 10 * sigma_p, p0 + 10 * sigma_p, limit=200,
                      epsabs=1e-12, epsrel=1e-10)
    assert err < 1e-9
    return value


def test_transmission_through_the_eckart_barrier(eckart):
    _, _, _, ds = eckart
    transmitted = ds.absorbed.sel(boundary="x+").isel(time=-1)
    # monotonicity, a sanity check only: T(E) of the Eckart barrier grows with
    # k and falls with V0 (no resonances), so the packet averages do too
    assert (transmitted.diff("momentum") > 0).all()
    assert (transmitted.diff("height") < 0).all()
    # the books close: on the grid plus absorbed is 1 (result contract)
    total = ds.final_norm + ds.final_absorbed.sum("boundary")
    np.testing.assert_allclose(total.values, 1.0, atol=1e-6)
    # Against the closed form.  Measured |T - T_ref| <= 3.2e-5 (p0 = 1.0,
    # V0 = 0.3), the same to two digits with 1024 points (dt = 0.1 instead of
    # 0.05: 1.1e-4).  Bounds on what is not yet absorbed: <= 1.6e-4 of the slow
    # part of the p0 = 1.0 packets is still on the grid at the end (final_norm),
    # hence the tolerance 3e-4.  (On a periodic grid the part that crosses the
    # CAP wraps around into the other face's layer: T was then off by 1.2e-3.)
    for p0 in MOMENTA:
        for v0 in HEIGHTS:
            ref = packet_transmission(p0, 0.5 / SIGMA_X, v0, ECKART_A)
            got = transmitted.sel(momentum=p0, height=v0).item()
            assert abs(got - ref) < 3e-4, (p0, v0, got, ref)


def test_arrival_statistics_and_transmission_per_run(eckart):
    """The summary holds, per run and detector, what `arrivals` and
    `transmission` give for the run's own file, and T beyond 'after' is the
    closed form again (as above)."""
    from wavesweep.analysis import arrival_times, transmission

    root, study, _, ds = eckart
    for spec in study.runs:
        point = _point(spec)
        path = root / "eckart-scan" / f"{spec.run_id}.nc"
        stats = arrival_times(path)["after"].stats
        for key in ("mean", "std", "median", "probability", "backflow", "classical_mean"):
            assert ds[f"arrival_{key}"].sel(detector="after", **point).item() == stats[key]
        beyond = transmission(path)["totals"]["detectors"]["after"]["beyond"]
        assert ds.transmitted_beyond.sel(detector="after", **point).item() == beyond
        ref = packet_transmission(point["momentum"], 0.5 / SIGMA_X, point["height"], ECKART_A)
        assert abs(beyond - ref) < 3e-4
    assert ds.arrival_mean.attrs["units"] == ds.time.attrs["units"]
    # one line: the mean arrival at 'after' against V0 for p0 = 1.4; faster
    # packets arrive earlier
    line = ds.arrival_mean.sel(detector="after", momentum=1.4)
    assert line.dims == ("height",) and np.isfinite(line).all()
    assert (ds.arrival_mean.sel(detector="after").diff("momentum") < 0).all()


# -- incomplete studies ----------------------------------------------------------------
def test_runs_without_a_result_are_nan(eckart, tmp_path):
    root, study, _, full = eckart
    shutil.copytree(root / "eckart-scan", tmp_path / "eckart-scan")
    gone = [study.runs[1], study.runs[5]]
    for spec in gone:
        (tmp_path / "eckart-scan" / f"{spec.run_id}.nc").unlink()
    (tmp_path / "eckart-scan" / "summary.nc").unlink()
    with xr.open_dataset(collect(tmp_path, "eckart-scan")) as ds:
        assert dict(ds.sizes) == dict(full.sizes)
        assert ds.attrs["runs_found"] == 4 and ds.attrs["runs_expected"] == 6
        assert sorted(ds.attrs["runs_missing"].split()) == sorted(s.run_id for s in gone)
        for spec in study.runs:
            at = ds.sel(_point(spec))
            if spec in gone:
                for name in ("norm", "absorbed", "flux", "final_norm", "final_absorbed", "wall_seconds"):
                    assert np.isnan(at[name].values).all(), name
                assert at.run_id.item() == "" and at.has_result.item() == 0
                assert at.expected_run_id.item() == spec.run_id
            else:
                assert at.has_result.item() == 1
                xr.testing.assert_identical(at.absorbed, full.sel(_point(spec)).absorbed)


def test_an_unreadable_result_counts_as_missing(tmp_path):
    study = submit_and_run(TINY | {"sweep": {"packet.momentum": [1.0, 1.5]}}, tmp_path, "s")
    (tmp_path / "s" / f"{study.runs[1].run_id}.nc").write_bytes(b"\x89HDF\r\n\x1a\n cut off")
    with xr.open_dataset(collect(tmp_path, "s")) as ds:
        assert ds.has_result.values.tolist() == [1, 0]
        assert np.isnan(ds.norm.sel(momentum=1.5)).all()
        assert study.runs[1].run_id in ds.attrs["collect_notes"]


def test_a_union_of_submissions(tmp_path):
    """The manifest's axes may not list every value its runs use, and a run may
    be listed twice: the coordinate is the union, sorted; each run once."""
    study = submit_and_run(TINY | {"sweep": {"packet.momentum": [1.5, 1.0, 1.25]}}, tmp_path, "u")
    manifest = json.loads((tmp_path / "u" / "study.json").read_text())
    manifest["axes"]["packet.momentum"] = [1.5]
    manifest["runs"].append(dict(manifest["runs"][0]))
    (tmp_path / "u" / "study.json").write_text(json.dumps(manifest))
    with xr.open_dataset(collect(tmp_path, "u")) as ds:
        assert ds.momentum.values.tolist() == [1.0, 1.25, 1.5]
        assert ds.attrs["runs_expected"] == 3 and ds.attrs["runs_found"] == 3
        for spec in study.runs:
            assert ds.run_id.sel(momentum=spec.params["packet.momentum"]).item() == spec.run_id


# -- zip mode and time grids ------------------------------------------------------------
def test_zip_mode_has_one_run_dimension(tmp_path):
    table = TINY | {"sweep": {"mode": "zip", "packet.momentum": [0.8, 1.0, 1.2],
                              "potential.0.height": [0.1, 0.2, 0.3]}}
    study = submit_and_run(table, tmp_path, "z", skip=(1,))
    import matplotlib.pyplot as plt

    with xr.open_dataset(collect(tmp_path, "z")) as ds:
        assert ds.attrs["sweep_mode"] == "zip"
        assert ds.absorbed.dims == ("run", "time", "boundary")
        assert ds.momentum.dims == ("run",) and ds.height.dims == ("run",)
        assert ds.momentum.values.tolist() == [0.8, 1.0, 1.2]
        assert ds.height.values.tolist() == [0.1, 0.2, 0.3]
        assert ds.height.attrs["sweep_key"] == "potential.0.height"
        assert ds.run_id.values.tolist() == [study.runs[0].run_id, "", study.runs[2].run_id]
        assert ds.attrs["runs_found"] == 2 and ds.attrs["runs_expected"] == 3
        assert np.isnan(ds.absorbed.isel(run=1)).all()
        for i in (0, 2):
            with xr.open_dataset(tmp_path / "z" / f"{study.runs[i].run_id}.nc") as one:
                np.testing.assert_array_equal(ds.absorbed.isel(run=i).values, one.absorbed.values)
        fig = plt.figure()
        line = ds.absorbed.sel(boundary="x+").isel(time=-1).plot(x="momentum")[0]
        assert list(line.get_data()[0]) == [0.8, 1.0, 1.2]
        plt.close(fig)


def test_swept_duration_and_sampling_align_on_the_union_of_times(tmp_path):
    table = TINY | {"sweep": {"evolve.duration": [3.0, 4.5], "record.every": [0.5, 0.75]}}
    table["evolve"] = {"dt": 0.05, "duration": 3.0}
    table["record"] = {"every": 0.5, "snapshot_every": 1.5}
    study = submit_and_run(table, tmp_path, "t")
    with xr.open_dataset(collect(tmp_path, "t")) as ds:
        assert ds.duration.attrs["units"] == ds.time.attrs["units"] == ds.every.attrs["units"]
        union = sorted({round(0.5 * i, 9) for i in range(10)} | {round(0.75 * i, 9) for i in range(7)})
        np.testing.assert_allclose(ds.time.values, union, rtol=0, atol=1e-12)
        for spec in study.runs:
            at = ds.sel(duration=spec.params["evolve.duration"], every=spec.params["record.every"])
            with xr.open_dataset(tmp_path / "t" / f"{spec.run_id}.nc") as one:
                sampled = np.isin(np.round(ds.time.values, 9), np.round(one.time.values, 9))
                assert sampled.sum() == one.sizes["time"]
                np.testing.assert_array_equal(at.norm.values[sampled], one.norm.values)
                np.testing.assert_array_equal(at.absorbed.values[sampled], one.absorbed.values)
                assert np.isnan(at.norm.values[~sampled]).all()
                assert at.final_time.item() == one.time.values[-1] == spec.params["evolve.duration"]
                assert at.final_norm.item() == one.norm.values[-1]


def test_times_that_differ_by_rounding_are_one_sample(tmp_path):
    """n * dt converted to the job's time unit can differ in the last bits
    between runs: such times are merged, not doubled into NaN-filled pairs."""
    import netCDF4

    study = submit_and_run(TINY | {"sweep": {"packet.momentum": [1.0, 1.5]}}, tmp_path, "r")
    with netCDF4.Dataset(tmp_path / "r" / f"{study.runs[1].run_id}.nc", "a") as nc:
        nc["time"][:] = nc["time"][:] * (1 + 4e-15) + 1e-15
    with xr.open_dataset(collect(tmp_path, "r")) as ds, \
            xr.open_dataset(tmp_path / "r" / f"{study.runs[0].run_id}.nc") as one:
        np.testing.assert_array_equal(ds.time.values, one.time.values)
        assert not np.isnan(ds.norm.values).any()


def test_runs_in_different_unit_sets_are_an_error(tmp_path):
    # energy given: a length in angstrom beside atomic energies is then not a silent default
    submit_and_run(TINY | {"units": {"energy": "hartree"}, "sweep": {"units.length": ["bohr", "angstrom"]}},
                   tmp_path, "m")
    with pytest.raises(JobError, match=r"different unit sets .*length=bohr.*length=angstrom"):
        collect(tmp_path, "m")


def test_names_clash_and_units_of_a_job_in_nm_mev_fs(tmp_path):
    """Two keys ending in `width` take more parts; quantities are in the job's
    units, a value written with its own unit is converted to them."""
    table = {
        "title": "units",
        "units": {"length": "nm", "energy": "meV", "time": "fs"},
        "particle": {"mass": 0.067},
        "grid": {"x": {"min": -100.0, "max": 100.0, "points": 256}},
        "potential": [{"kind": "gaussian", "height": 50.0, "width": 2.0}],
        "packet": {"center": -40.0, "width": 10.0, "energy": 60.0},
        "evolve": {"dt": 0.5, "duration": 5.0},
        "record": {"every": 1.0, "snapshot_every": 5.0},
        "sweep": {"packet.width": [8.0, 10.0], "potential.0.width": [2.0, "3 nm"],
                  "potential.0.height": ["0.1 eV", 50.0]},
    }
    submit_and_run(table, tmp_path, "n", skip=range(1, 8))
    with xr.open_dataset(collect(tmp_path, "n")) as ds:
        assert set(ds.dims) == {"packet_width", "potential_0_width", "height", "time",
                                "boundary", "detector"}
        assert ds.packet_width.attrs["sweep_key"] == "packet.width"
        assert ds.potential_0_width.attrs["sweep_key"] == "potential.0.width"
        assert ds.packet_width.attrs["units"] == ds.potential_0_width.attrs["units"] == "nm"
        assert ds.height.attrs["units"] == "meV" == ds.attrs["units_energy"]
        np.testing.assert_allclose(ds.potential_0_width.values, [2.0, 3.0], rtol=1e-12)
        np.testing.assert_allclose(ds.height.values, [50.0, 100.0], rtol=1e-12)
        assert ds.attrs["runs_found"] == 1 and ds.attrs["runs_expected"] == 8
        assert ds.time.attrs["units"] == "fs"


# -- errors and the write ----------------------------------------------------------------
def test_unknown_study_lists_the_submitted_ones(eckart, tmp_path):
    root = eckart[0]
    with pytest.raises(JobError, match=r"no such study 'nope'.*submitted studies: eckart-scan$"):
        collect(root, "nope")
    with pytest.raises(JobError, match=r"no such study 'x'.*submitted studies: none"):
        collect(tmp_path / "absent", "x")
    with pytest.raises(JobError, match="not a study name"):
        collect(root, "../eckart-scan")


def test_a_study_without_results_is_an_error(tmp_path):
    submit_and_run(TINY | {"sweep": {"packet.momentum": [1.0, 1.5]}}, tmp_path, "q", skip=(0, 1))
    with pytest.raises(JobError, match=r"'q' has no finished run yet: none of its 2 runs"):
        collect(tmp_path, "q")
    assert not (tmp_path / "q" / "summary.nc").exists()


def test_a_failed_write_keeps_the_previous_summary(tmp_path, monkeypatch):
    submit_and_run(TINY | {"sweep": {"packet.momentum": [1.0]}}, tmp_path, "w")
    path = collect(tmp_path, "w")
    before = path.read_bytes()

    def broken(self, target, *args, **kwargs):
        Path(target).write_bytes(b"half a file")
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(xr.Dataset, "to_netcdf", broken)
    with pytest.raises(OSError):
        collect(tmp_path, "w")
    assert path.read_bytes() == before
    assert sorted(p.name for p in (tmp_path / "w").iterdir() if p.suffix != ".nc") == ["study.json"]


# -- momentum spectra per run (issue 17) ------------------------------------------------------
def test_the_summary_carries_each_runs_spectra(tmp_path):
    """Per run and detector, `wavesweep spectrum --json`'s momenta,
    densities against momentum and energy, and total, to 1e-12; each run on
    its own momenta (the ``spectrum_point`` dimension); a detector whose
    spectrum is refused ('back': the samples alias what crosses it) is NaN,
    the summary still written."""
    from wavesweep.analysis.surface_flux import spectrum

    table = {
        "title": "spectra",
        "grid": {"x": {"min": -64.0, "max": 40.0, "points": 640}, "boundary": "periodic"},
        "packet": {"kind": "gaussian", "center": -16.0, "width": 4.0, "momentum": 2.0},
        "evolve": {"dt": 0.01, "duration": 40.0, "scheme": "strang"},
        "absorber": {"kind": "cap", "thickness": 12.0},
        "record": {"every": 0.1, "snapshot_every": 40.0},
        "detector": [{"name": "d", "x": 10.0}, {"name": "back", "x": -6.0}],
        "sweep": {"packet.momentum": [1.8, 2.2]},
    }
    study = submit_and_run(table, tmp_path, "sp")
    with xr.open_dataset(collect(tmp_path, "sp")) as ds:
        density = ds.spectrum_probability_density
        assert density.dims == ("momentum", "detector", "spectrum_point")
        assert ds.spectrum_momentum.attrs["units"] == "m_e bohr au_time-1"
        assert density.attrs["units"] == "1/(m_e bohr au_time-1)"
        assert ds.spectrum_energy_density.attrs["units"] == "1/(hartree)"
        assert ds.spectrum_total.dims == ("momentum", "detector")
        for spec in study.runs:
            at = ds.sel(momentum=spec.params["packet.momentum"])
            ref = spectrum(tmp_path / "sp" / f"{spec.run_id}.nc", detector="d")["detectors"][0]
            for name, key in (("spectrum_momentum", "momentum"), ("spectrum_probability_density",
                              "probability_density"), ("spectrum_energy", "energy"),
                              ("spectrum_energy_density", "energy_density")):
                got, want = at[name].sel(detector="d").values, np.asarray(ref[key])
                assert np.max(np.abs(got - want)) <= 1e-12 * np.max(np.abs(want)), name
            assert at.spectrum_total.sel(detector="d").item() == pytest.approx(ref["total"], rel=1e-12)
            assert np.isnan(at.spectrum_probability_density.sel(detector="back")).all()
            assert np.isnan(at.spectrum_total.sel(detector="back")).all()
        # the peak moves with the packet's momentum
        peak = ds.spectrum_momentum.sel(detector="d").isel(
            spectrum_point=density.sel(detector="d").argmax("spectrum_point"))
        assert peak.values == pytest.approx([1.8, 2.2], abs=0.01)


def test_the_summary_carries_a_lines_spectrum_as_its_normal_marginal(tmp_path):
    """A 2D study with a `spectrum = true` line: the summary keeps, per
    run, the density along the normal summed over the transverse momenta
    (``probability_density_normal`` of `spectrum`), to 1e-12, and the
    energy density summed over directions; each run's spectrum is the one
    of its own packet (the peak follows p_x)."""
    from wavesweep.analysis.surface_flux import spectrum

    table = {
        "title": "line spectra",
        "grid": {"x": {"min": -30.0, "max": 60.0, "points": 192}, "y": {"min": -24.0, "max": 24.0, "points": 32},
                 "boundary": "periodic"},
        "packet": {"kind": "gaussian", "center": [-10.0, 0.0], "width": [2.0, 3.0], "momentum": [4.0, 0.5]},
        "evolve": {"dt": 0.04, "duration": 12.0, "scheme": "strang"},
        "absorber": {"kind": "none"},
        "record": {"every": 0.08, "snapshot_every": 12.0},
        "detector": [{"name": "line", "x": 5.0, "spectrum": True}, {"name": "plain", "x": 0.0}],
        "sweep": {"packet.momentum": [[3.8, 0.5], [4.2, 0.5]]},
    }
    study = submit_and_run(table, tmp_path, "line")
    with xr.open_dataset(collect(tmp_path, "line")) as ds:
        dim = ds.spectrum_total.dims[0]
        for i, spec in enumerate(study.runs):
            at = ds.isel({dim: i})
            ref = spectrum(tmp_path / "line" / f"{spec.run_id}.nc", detector="line")["detectors"][0]
            for name, key in (("spectrum_momentum", "momentum"),
                              ("spectrum_probability_density", "probability_density_normal"),
                              ("spectrum_energy_density", "energy_density")):
                got, want = at[name].sel(detector="line").values, np.asarray(ref[key])
                assert np.max(np.abs(got - want)) <= 1e-12 * np.max(np.abs(want)), name
            peak = float(ref["momentum"][np.argmax(ref["probability_density_normal"])])
            assert peak == pytest.approx(spec.params["packet.momentum"][0], abs=0.02)
            assert np.isnan(at.spectrum_total.sel(detector="plain")).all()
