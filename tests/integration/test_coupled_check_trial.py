"""What a user's trial of coupled surfaces found in ``check`` and the run's
health checks (issue 16, trial P3, P7, P10, P11, P12), each against a
reference outside the criterion judged:

* the momentum measured at the grid's edge: a Gaussian's momentum tail,
  (1/2) erfc((k - p0) / (sqrt 2 sigma_p)) (scipy.special.erfc), and runs
  on a grid with twice the momenta (the hop's fast part is real there);
* the accuracy pilot on coupled surfaces: its estimated dt error against
  the difference to a run at a quarter of the step (common practice:
  a far finer run as the converged value);
* the resolution criterion: diabatic populations of the same conical
  intersection on two grids (the dynamics need no finer grid);
* a box without absorber: the packet's classical flight time to the wall,
  x / v with v = sqrt(2 E / m) (free flight, closed form);
* a short coupling pulse: the eigenvalues of the 2x2 potential matrix at
  the pulse's peak by scipy.linalg.eigvalsh.
"""
from __future__ import annotations

import copy
import json
import math

import numpy as np
import pytest
import scipy.linalg
from scipy.special import erfc

from conftest import make_job, run_table
from test_coupled_check import LEAVING_JOB, WELL_JOB
from wavesweep.adequacy import (EDGE_FRACTION, EDGE_WEIGHT_MAX, coupled_findings, local_eigen_range,
                                momentum_edge_weights, stored_edge_weight)
from wavesweep.analysis.arrivals import stored_warnings
from wavesweep.check import check_job
from wavesweep.grid import Axis, Grid
from wavesweep.pilot import plan_pilot, run_pilot
from wavesweep.setup import CoupledSetup


# --- P7: momentum at the grid's edge, measured during the run -----------------------
def test_the_edge_weight_of_a_gaussian_is_its_momentum_tail():
    """A Gaussian packet's weight with k > 0.9 k_max is (1/2) erfc((0.9 k_max - p0) / (sqrt 2 sigma_p))
    (its momentum density is a Gaussian of spread sigma_p = 1 / (2 sigma_x)); the file stores it to
    two digits, 0 below 1e-12."""
    grid = Grid((Axis("x", -40.0, 40.0, 512, "periodic"),))
    x = grid.axes[0].coordinates
    k_max = grid.axes[0].k_max
    sigma_x = 0.2
    sigma_p = 1 / (2 * sigma_x)
    p0 = 0.9 * k_max - 2 * sigma_p          # two sigma_p below the edge band
    psi = np.exp(-x**2 / (4 * sigma_x**2) + 1j * p0 * x)
    psi /= math.sqrt(np.sum(np.abs(psi) ** 2) * grid.cell_volume)
    both = np.stack([0.6 ** 0.5 * psi, 0.4 ** 0.5 * np.exp(-x**2 / 8)])    # the second: slow, nothing at the edge
    weights = momentum_edge_weights(both, grid)
    expected = 0.5 * erfc((EDGE_FRACTION * k_max - p0) / (math.sqrt(2) * sigma_p))   # 0.0228
    assert weights.shape == (2, 1)
    assert weights[0, 0] == pytest.approx(0.6 * expected, rel=2e-2)     # the grid's bins against the integral
    assert weights[1, 0] < 1e-12
    assert stored_edge_weight(0.0228456) == 0.023 and stored_edge_weight(3e-13) == 0.0


def _run(table, tmp_path, name):
    ds = run_table(table, tmp_path / name)
    return ds, json.loads(ds.attrs["momentum_edge_weight"]), stored_warnings(ds)


def test_a_hop_beyond_the_grid_is_measured_stored_and_repeated(tmp_path):
    """WELL_JOB: a hop into a 40 hartree well outruns the 320-point grid on
    the lower surface (check only warns: how much hops it cannot judge).
    The run measures it, says so with the fix, and stores the line that
    analysis repeats; on twice the points nothing reaches the edge."""
    ds, edge, said = _run(copy.deepcopy(WELL_JOB), tmp_path, "coarse")
    assert edge["lower"]["x"] > 1e3 * EDGE_WEIGHT_MAX and edge["upper"]["x"] < EDGE_WEIGHT_MAX
    measured = [line for line in said if "measured during the run" in line]
    assert len(measured) == 1 and "surface lower" in measured[0] and "grid.x.points" in measured[0]
    assert "instead of 320" in measured[0]
    fine = copy.deepcopy(WELL_JOB)
    fine["grid"]["x"]["points"] = 640
    _, edge, said = _run(fine, tmp_path, "fine")
    assert max(edge["lower"]["x"], edge["upper"]["x"]) < EDGE_WEIGHT_MAX
    assert not any("measured during the run" in line for line in said)


# --- P3: the accuracy pilot on coupled surfaces ------------------------------------
def test_the_pilot_measures_each_surfaces_outputs(tmp_path):
    """LEAVING_JOB at a coarse step: the pilot's dt share of each surface's
    population is the base run's difference to a run at a quarter of the
    step (the converged value, common practice), to within a factor 2
    (Richardson's estimate times the 1.25 safety, the next order left out)."""
    table = copy.deepcopy(LEAVING_JOB)
    table["evolve"]["dt"] = 0.1
    table["grid"]["x"]["points"] = 512
    job = make_job(table)
    plan = plan_pilot(job, 1e-6, timing_seconds=0.0)
    findings = run_pilot(job, 1e-6, plan=plan)
    by = {f.values["output"]: f for f in findings if "output" in f.values}
    assert {"on surface A at the end (left + absorbed)", "on surface B at the end (left + absorbed)",
            "absorbed on surface B at x+"} <= set(by)
    base = run_table(table, tmp_path / "base")
    fine = copy.deepcopy(table)
    fine["evolve"]["dt"] = 0.025
    ref = run_table(fine, tmp_path / "ref")
    for s, name in enumerate(["A", "B"]):
        f = by[f"on surface {name} at the end (left + absorbed)"]
        true = abs(float(base["norm"][-1, s] + base["absorbed"][-1, s].sum())
                   - float(ref["norm"][-1, s] + ref["absorbed"][-1, s].sum()))
        assert true > 1e-8                                    # a measurable dt error
        assert 0.5 * true < f.values["errors"]["evolve.dt"] < 2.0 * true
    assert any(f.level == "warn" and f.field == "evolve.dt" for f in by.values())


def test_check_tolerance_on_a_coupled_job_runs_the_pilot(tmp_path):
    from inprocess import run_main
    import tomli_w

    table = copy.deepcopy(LEAVING_JOB)
    table["grid"]["x"]["points"] = 256
    table["evolve"] = {"dt": 0.1, "duration": 4.0, "scheme": "strang"}
    table["record"] = {"every": 0.4, "snapshot_every": 4.0}
    path = tmp_path / "leaving.toml"
    path.write_text(tomli_w.dumps(table))
    done = run_main("check", path, "--tolerance", "0.01", "--json", "--trial-seconds", "0", cwd=tmp_path)
    assert done.returncode in (0, 1), done.stderr            # before: 2, "set up by CoupledSetup"
    report = json.loads(done.stdout)
    outputs = [f["values"].get("output", "") for f in report["findings"] if f["topic"] == "accuracy"]
    assert "on surface A at the end (left + absorbed)" in outputs


# --- P10: the resolution criterion judges the diabatic matrix --------------------
CI_JOB = {
    "title": "conical intersection",
    "particle": {"mass": 1.0},
    "grid": {"x": {"min": -16.0, "max": 16.0, "points": 64}, "y": {"min": -16.0, "max": 16.0, "points": 64},
             "boundary": "periodic"},
    "potential": [{"kind": "harmonic", "omega": [0.1, 0.1]}],
    "surface": [{"name": "lower", "potential": [{"kind": "expression", "expression": "0.01 * x"}]},
                {"name": "upper", "potential": [{"kind": "expression", "expression": "0.02 - 0.01 * x"}]}],
    "coupling": [{"surfaces": ["lower", "upper"], "potential": [{"kind": "expression", "expression": "0.005 * y"}]}],
    "packet": {"kind": "gaussian", "surface": "upper", "center": [0.0, 0.0], "width": [2.236, 2.236]},
    "evolve": {"dt": 0.25, "duration": 40.0},
    "record": {"every": 1.0, "snapshot_every": 40.0, "adiabatic": True},
}


def test_a_conical_intersection_cusp_is_judged_for_the_adiabatic_populations_only(tmp_path):
    findings = coupled_findings(CoupledSetup(make_job(CI_JOB)))
    resolution = [f for f in findings if f.topic == "resolution"]
    dynamics = [f for f in resolution if f.field != "record.adiabatic"]
    assert len(dynamics) == 1 and dynamics[0].level == "ok"        # V_ss and V_ab are smooth
    (adiabatic,) = [f for f in resolution if f.field == "record.adiabatic"]
    assert adiabatic.level == "warn" and "population_adiabatic" in adiabatic.message
    off = copy.deepcopy(CI_JOB)
    off["record"]["adiabatic"] = False
    assert all(f.level == "ok" for f in coupled_findings(CoupledSetup(make_job(off))) if f.topic == "resolution")
    # the reason: the diabatic populations do not move with the grid (the trial: 6e-10 at 64 vs 128)
    fine = copy.deepcopy(off)
    fine["grid"]["x"]["points"] = fine["grid"]["y"]["points"] = 128
    coarse_norm = run_table(off, tmp_path / "c")["norm"].values
    fine_norm = run_table(fine, tmp_path / "f")["norm"].values
    assert np.max(np.abs(coarse_norm - fine_norm)) < 1e-6


# --- P11: a box without absorber sends the packet back through the detector --------
BOX_JOB = {
    "title": "tanh crossing in a box",
    "particle": {"mass": 2000.0},
    "grid": {"x": {"min": -64.0, "max": 64.0, "points": 640}, "boundary": "box"},
    "surface": [{"name": "A", "potential": [{"kind": "expression", "expression": "-0.02 * tanh(x / 4)"}]},
                {"name": "B", "potential": [{"kind": "expression", "expression": "0.02 * tanh(x / 4)"}]}],
    "coupling": [{"surfaces": ["A", "B"], "potential": [{"kind": "gaussian", "height": 0.002, "center": 0.0,
                                                          "width": 3.0}]}],
    "packet": {"surface": "A", "kind": "gaussian", "center": -30.0, "width": 1.5, "energy": 0.06},
    "evolve": {"dt": 5.0, "duration": 16000.0},
    "record": {"every": 10.0, "snapshot_every": 1000.0},
    "detector": [{"name": "right", "x": 40.0}],
}


def test_a_box_without_absorber_that_returns_the_packet_through_a_detector_is_a_warning():
    # free flight at 0.06 hartree (0.08 on A beyond the crossing): 94 + 24 bohr to the wall and back to
    # the detector take about (94 + 24) / sqrt(2 * 0.08 / 2000) = 1.3e4 au: within 16000, not within 3000
    # (so the run below is long enough for the return and a 3000 run is not: the job's own numbers)
    report = check_job(make_job(BOX_JOB), trial_seconds=0)
    (absorber,) = [f for f in report.findings if f.topic == "absorber"]
    assert absorber.level == "warn" and absorber.field == "absorber.kind" and "'right'" in absorber.message
    short = copy.deepcopy(BOX_JOB)
    short["evolve"]["duration"] = 3000.0
    (absorber,) = [f for f in check_job(make_job(short), trial_seconds=0).findings if f.topic == "absorber"]
    assert absorber.level == "ok" and "a box" in absorber.message


# --- P12: a short coupling pulse between the old sample times ----------------------
PULSE_JOB = {
    "title": "a short coupling pulse",
    "particle": {"mass": 1.0},
    "grid": {"x": {"min": -12.0, "max": 12.0, "points": 63}, "boundary": "box"},
    "surface": [{"name": "g", "potential": [{"kind": "harmonic", "omega": 0.2}]},
                {"name": "e", "potential": [{"kind": "harmonic", "omega": 0.2},
                                            {"kind": "expression", "expression": "0.1"}]}],
    "coupling": [{"surfaces": ["g", "e"], "potential": [{"kind": "expression",
                                                         "expression": "V0 * exp(-((t - 103.1) / 0.5)**2)",
                                                         "params": {"V0": 40.0}}]}],
    "packet": {"kind": "ground_state", "surface": "g"},
    "evolve": {"dt": 0.1, "duration": 200.0},
    "record": {"every": 1.0, "snapshot_every": 100.0},
}


def test_a_short_coupling_pulse_sets_the_potential_phase():
    """The pulse (0.5 au wide at t = 103.1) falls between 33 times spread
    over 200 au (6.25 apart); at its peak the eigenvalues of the 2x2 matrix
    span about 2 V0 = 80 hartree: 8 rad per 0.1 au step, an error."""
    setup = CoupledSetup(make_job(PULSE_JOB))
    x = setup.grid.axes[0].coordinates
    peak = [scipy.linalg.eigvalsh([[0.02 * xi**2, 40.0], [40.0, 0.02 * xi**2 + 0.1]]) for xi in x]
    span = max(e[1] for e in peak) - min(e[0] for e in peak)
    (step,) = [f for f in coupled_findings(setup) if f.topic == "time step"]
    assert step.level == "error" and step.field == "evolve.dt"
    # sampled every step or two (at most 2000 times): within 0.1 au of the peak, exp(-(0.1/0.5)^2) = 0.96
    assert step.values["grid_potential_phase"] >= 0.95 * span * 0.1
    assert step.values["potential_phase"] > math.pi


def test_the_closed_form_eigenvalue_range_matches_eigvalsh():
    rng = np.random.default_rng(3)
    for size in (2, 3):
        a = rng.normal(size=(size, size, 50))
        v = a + a.transpose(1, 0, 2)
        lo, hi = local_eigen_range(v)
        ref = np.array([scipy.linalg.eigvalsh(v[:, :, i]) for i in range(50)])
        assert np.max(np.abs(lo - ref[:, 0])) < 1e-12 and np.max(np.abs(hi - ref[:, -1])) < 1e-12
