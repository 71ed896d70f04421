"""`wavesweep run` on coupled surfaces: the result file's surface dimension
(issue 16, item 3).

Sources: the Landau-Zener probability of a diabatic passage,
P = exp(-2 pi V12^2 / (hbar v |F1 - F2|)) (Landau 1932; Zener 1932; from
memory; tests/coupled_reference.py); the file's final psi against the
in-memory propagation of the same set-up (CoupledSetup, tested in
test_coupled_setup.py against single-surface runs and the matrix
Hamiltonian); conservation of probability (norm on the grid plus what the
absorber removed, over every surface and face) and of the energy <T + V>.
"""
from __future__ import annotations

import copy
import json
import math

import numpy as np
import pytest
import xarray as xr

from coupled_reference import landau_zener_probability
from test_checkpoint import assert_same_result, stop_after
from test_coupled_setup import D_F, LZ_JOB, P0, V12
from wavesweep.check import check_job, preflight
from wavesweep.cli import main
from wavesweep.errors import JobError, RunInterrupted
from wavesweep.io.checkpoint import CheckpointPolicy
from wavesweep.job import job_from_dict
from wavesweep.run import Simulation
from wavesweep.setup import CoupledSetup, resolve_job

# a packet that runs into a CAP of given strength on both faces within the run (a small grid)
ABSORBED_JOB = {
    **copy.deepcopy(LZ_JOB),
    "grid": {"x": {"min": -60.0, "max": 60.0, "points": 512}},
    "packet": {"kind": "gaussian", "center": -10.0, "width": 4.0, "momentum": 3.0, "surface": "A"},
    "evolve": {"dt": 0.02, "duration": 24.0, "scheme": "strang"},
    "record": {"every": 0.4, "snapshot_every": 2.0},
    "absorber": {"kind": "cap", "thickness": 15.0, "strength": 1.0},
    "detector": [{"name": "right", "x": 30.0}],
}


def _job(table):
    return resolve_job(job_from_dict(copy.deepcopy(table)))


def test_landau_zener_run_writes_each_surface(tmp_path):
    table = {**copy.deepcopy(LZ_JOB), "detector": [{"name": "after", "x": 60.0}],
             "record": {**LZ_JOB["record"], "snapshot_every": 9.6}}
    job = _job(table)
    sim = Simulation(job)
    path = sim.run(tmp_path, progress=False)
    with xr.open_dataset(path) as ds:
        assert list(ds["surface"].values) == ["A", "B"]
        n_time, n_snap = len(ds["time"]), len(ds["snapshot_time"])
        assert ds["density"].dims == ("snapshot_time", "surface", "x") and ds["density"].shape == (n_snap, 2, 2048)
        for name in ("norm", "x_mean", "x_std", "p_mean"):
            assert ds[name].dims == ("time", "surface"), name
        assert ds["energy"].dims == ("time",)
        assert ds["flux"].dims == ("time", "surface", "detector")
        assert ds["detector_psi_real"].dims == ("time", "surface", "detector")
        assert ds["absorbed"].dims == ("time", "surface", "boundary")
        assert ds["psi_real"].dims == ("surface", "x") and ds["potential"].dims == ("surface", "x")
        assert ds["coupling_potential"].dims == ("pair", "x") and list(ds["pair"].values) == ["A,B"]
        assert list(ds.attrs["surfaces"]) == ["A", "B"]
        assert "autocorrelation_real" not in ds and "initial_position_marginal_x" not in ds
        x = ds["x"].values
        np.testing.assert_allclose(ds["potential"].sel(surface="A"), D_F / 2 * x, rtol=0, atol=1e-12)
        np.testing.assert_allclose(ds["potential"].sel(surface="B"), -D_F / 2 * x, rtol=0, atol=1e-12)
        np.testing.assert_allclose(ds["coupling_potential"].sel(pair="A,B"), V12, rtol=0, atol=1e-15)
        # Landau-Zener (in its regime; the same tolerance as the in-memory check of test_coupled_setup)
        velocity = math.sqrt(2 * (P0**2 / 2 + D_F / 2 * -120.0))
        stay = float(ds["norm"].sel(surface="A")[-1])
        assert abs(stay / landau_zener_probability(V12, velocity, D_F) - 1) < 1.2e-3
        # the snapshots' density integrates to each surface's norm at the same time
        dx = x[1] - x[0]
        last = ds["density"].isel(snapshot_time=-1).sum("x").values * dx
        np.testing.assert_allclose(last, ds["norm"].isel(time=-1).values, rtol=1e-6)
        assert ds["flux"].sel(surface="A").max() > 0 and ds["flux"].sel(surface="B").max() > 0
        assert ds["energy"].values == pytest.approx(ds["energy"].values[0], rel=1e-6)
        psi = ds["psi_real"].values + 1j * ds["psi_imag"].values
        assert n_time == 101
    # the file's final state is the set-up's propagation in memory
    s = CoupledSetup(job)
    prop = s.make_propagator()
    ref = prop.step(prop.load(s.psi0), s.total_steps)
    np.testing.assert_allclose(psi, ref, rtol=0, atol=1e-12)


def test_absorbed_on_each_surface_and_resume_from_a_checkpoint(tmp_path):
    job = _job(ABSORBED_JOB)
    ref = Simulation(job).run(path=tmp_path / "ref.nc", progress=False)
    with xr.open_dataset(ref) as ds:
        absorbed = ds["absorbed"].sum(("surface", "boundary"))
        total = ds["norm"].sum("surface") + absorbed
        assert float(absorbed[-1]) > 0.3          # the CAP took a good part, on both surfaces
        assert (ds["absorbed"].isel(time=-1).sum("boundary") > 1e-3).all()
        np.testing.assert_allclose(total, 1.0, rtol=0, atol=1e-10)
    policy = CheckpointPolicy(tmp_path / "run.ckpt", every_seconds=1e9)
    out = tmp_path / "out" / "result.nc"
    with pytest.raises(RunInterrupted) as info:
        Simulation(job).run(path=out, progress=False, checkpoint=policy, should_stop=stop_after(7))
    assert info.value.step == 7 * 20 and policy.path.exists()
    assert Simulation(job).run(path=out, progress=False, checkpoint=policy) == out
    assert_same_result(ref, out)


def test_analysis_commands_refuse_a_coupled_result(tmp_path, capsys):
    path = Simulation(_job({**ABSORBED_JOB, "evolve": {**ABSORBED_JOB["evolve"], "duration": 2.0},
                            "record": {"every": 0.4, "snapshot_every": 0.8}})).run(tmp_path, progress=False)
    capsys.readouterr()
    # arrivals and transmission read them (test_coupled_analysis.py), movie and plot draw them
    # (test_coupled_viz.py)
    for args in (["levels", "--from", str(path)],):
        assert main(args) == 2, args
        err = capsys.readouterr().err.strip()
        assert len(err.splitlines()) == 1 and "coupled surfaces" in err and "xarray" in err, err


def test_check_judges_a_coupled_job():
    job = _job(ABSORBED_JOB)
    report = check_job(job, trial_seconds=0)
    topics = {f.topic: f for f in report.findings}
    assert not report.errors
    assert "coupled surfaces" not in topics                  # every criterion is judged now (test_coupled_check)
    # the potential matrix's eigenvalues over the grid: +-sqrt((F x / 2)^2 + V12^2) (closed form, 2 x 2)
    x_edge = 60.0
    span = 2 * math.sqrt((D_F / 2 * x_edge) ** 2 + V12**2)
    assert topics["time step"].values["grid_potential_phase"] == pytest.approx(span * 0.02, rel=1e-3)
    # where the packet goes (its curves' classical trajectories), less of that range
    assert 0 < topics["time step"].values["potential_phase"] < topics["time step"].values["grid_potential_phase"]
    memory = topics["memory"].values
    assert memory["psi_bytes"] == 2 * 512 * 16
    assert not any("classical-trajectory" in line for line in preflight([job]))
    too_coarse = _job({**ABSORBED_JOB, "evolve": {**ABSORBED_JOB["evolve"], "dt": 2.0, "duration": 24.0},
                       "record": {"every": 4.0, "snapshot_every": 8.0}})
    with pytest.raises(JobError) as e:
        preflight([too_coarse])
    assert e.value.field == "evolve.dt"


@pytest.mark.parametrize("record, field", [({"column": "x"}, "record.column"),
                                           ({"snapshot_psi": True}, "record.snapshot_psi")])
def test_what_a_coupled_run_does_not_record_yet_is_refused(record, field):
    table = {**copy.deepcopy(ABSORBED_JOB), "record": {**ABSORBED_JOB["record"], **record}}
    # a plane (a column density integrates along an axis of a 2D or 3D grid)
    table["grid"] = {"x": {"min": -30.0, "max": 30.0, "points": 32}, "y": {"min": -20.0, "max": 20.0, "points": 16}}
    table["packet"] = {"kind": "gaussian", "center": [-5.0, 0.0], "width": [3.0, 3.0], "momentum": [2.0, 0.0],
                       "surface": "A"}
    table["detector"] = []
    with pytest.raises(JobError) as e:
        Simulation(job_from_dict(table))
    assert e.value.field == field


def test_a_study_of_coupled_runs_collects(tmp_path):
    from test_collect import submit_and_run   # lazy: test_collect sets matplotlib's backend on import

    from wavesweep.studies.collect import collect
    table = {**copy.deepcopy(ABSORBED_JOB), "evolve": {**ABSORBED_JOB["evolve"], "duration": 1.2},
             "record": {"every": 0.4, "snapshot_every": 1.2}, "sweep": {"packet.momentum": [2.5, 3.0]}}
    submit_and_run(table, tmp_path, "coupled")   # (their batches: test_coupled_batched.py)
    with xr.open_dataset(collect(tmp_path, "coupled")) as ds:   # the surface dimension kept (test_coupled_collect.py)
        assert ds["norm"].dims == ("momentum", "time", "surface")


def test_each_surface_in_the_job_units(tmp_path):
    """The recorded V_ss and V_ab are the job's expressions, in its own units
    (eV, angstrom); a surface without probability has NaN moments."""
    table = {**copy.deepcopy(ABSORBED_JOB), "units": {"energy": "eV", "length": "angstrom"},
             "evolve": {**ABSORBED_JOB["evolve"], "duration": 0.8}, "record": {"every": 0.4, "snapshot_every": 0.8}}
    path = Simulation(_job(table)).run(tmp_path, progress=False)
    with xr.open_dataset(path) as ds:
        assert (ds.attrs["units_energy"], ds["potential"].attrs["units"]) == ("eV", "eV")
        x = ds["x"].values
        np.testing.assert_allclose(ds["potential"].sel(surface="B"), -D_F / 2 * x, rtol=0, atol=1e-12)
        np.testing.assert_allclose(ds["coupling_potential"], V12, rtol=0, atol=1e-12)
        assert float(ds["x_mean"].sel(surface="A")[0]) == pytest.approx(-10.0, abs=1e-9)   # angstrom, as given
        assert np.isnan(float(ds["x_mean"].sel(surface="B")[0])) and float(ds["norm"].sel(surface="B")[0]) == 0


def test_a_coupled_file_keeps_its_grid_and_the_warnings_its_analysis_repeats(tmp_path):
    """A coupled run stores its grid's attributes (``grid_axes`` tells the
    grid's dimensions from ``surface``) and the adequacy warnings judged at
    run time; arrivals and transmission repeat them from the file, as for
    one surface.  Here dt is too long for the packet's kinetic phase (a
    warning, not an error: common practice is <= 1 rad per step)."""
    from wavesweep.analysis.arrivals import arrival_times
    from wavesweep.analysis.transmission import transmission
    table = {**copy.deepcopy(ABSORBED_JOB), "evolve": {"dt": 0.3, "duration": 24.0, "scheme": "strang"},
             "record": {"every": 0.6, "snapshot_every": 6.0}}
    job = _job(table)
    said = [f.message for f in check_job(job).findings if f.level == "warn"]
    assert any("phase per step" in m for m in said)
    path = Simulation(job).run(tmp_path, progress=False)
    with xr.open_dataset(path) as ds:
        assert ds.attrs["grid_axes"] == "x" and ds.attrs["grid_x_points"] == 512
        stored = json.loads(ds.attrs["adequacy_warnings"])
    assert any("phase per step" in w for w in stored)
    notes = arrival_times(path, surfaces=True)["right"]["A"].warnings
    assert any("phase per step" in n for n in notes)
    assert any("phase per step" in w for w in transmission(path)["warnings"])
