"""Set-ups that would give wrong numbers are flagged (issue: never silently).

Each case below was run silently (0 warnings) before the criteria of
``wavesweep.adequacy`` judged the whole run rather than the initial packet;
each is kept here as a regression test.  References: closed forms of
classical mechanics (free fall, the simple-man model of strong-field
ionisation), CODATA constants from scipy.constants.
"""
from __future__ import annotations

import copy
import math
import re
from pathlib import Path

import numpy as np
import pytest
import scipy.constants as sc
import tomllib

from wavesweep.adequacy import (dynamics, field_driven_momentum, memory_estimate, nearest_fast_points,
                                size_findings)
from wavesweep.study import expand_study
from wavesweep.check import check_job, check_study, preflight
from wavesweep.errors import JobError
from wavesweep.job import load_job
from wavesweep.setup import Setup

from conftest import make_job

ROOT = Path(__file__).resolve().parents[2]


def _by_topic(report, topic):
    return [f for f in report.findings if f.topic == topic]


# -- momentum over the run: an atom falling 1 mm ------------------------------------
def _falling_atom(points: int) -> dict:
    """Rb-87 released at x = 0 and falling 1 mm under gravity, V = m g x.
    m g in nK per um from CODATA (scipy.constants): atomic mass unit, k_B and
    standard gravity g_n = 9.80665 m s^-2."""
    mass_da = 86.909
    mg_nk_per_um = mass_da * sc.atomic_mass * sc.g * 1e-6 / (1e-9 * sc.k)
    return {
        "units": {"length": "um", "time": "ms", "mass": "Da", "energy": "nK"},
        "particle": {"mass": mass_da},
        "grid": {"x": {"min": -250.0, "max": 50.0, "points": points}, "boundary": "periodic"},
        "potential": [{"kind": "expression", "expression": "F * x", "params": {"F": mg_nk_per_um}}],
        "packet": {"kind": "gaussian", "center": 0.0, "width": 2.0, "momentum": 0.0},
        "evolve": {"dt": 0.01, "duration": 5.0},
        "absorber": {"kind": "cap", "thickness": 40.0},
    }


def test_a_falling_atom_that_outruns_the_grid_is_an_error():
    """Free fall for t = 5 ms (122 um): v = g t = 0.049 m/s, k = m v / hbar =
    66.9 um^-1 for Rb-87 (closed form, CODATA constants).  A grid of 150
    points over 300 um resolves |k| <= pi / dx = 1.57 um^-1, a fortieth of
    it: the momentum wraps round the grid and the packet oscillates in place.
    Before, check printed 0 warnings (the issue's case was a 1 mm drop)."""
    report = check_job(make_job(_falling_atom(150)), trial_seconds=0)
    (mom,) = _by_topic(report, "momentum")
    assert mom.level == "error" and mom.field == "grid.x.points"
    k_fall = 86.909 * sc.atomic_mass * sc.g * 5e-3 / sc.hbar * 1e-6      # um^-1
    p_unit = sc.atomic_mass * 1e-6 / 1e-3 / sc.hbar * 1e-6             # 1 Da um/ms as k in um^-1
    # the 6-sigma stencil adds 6 sigma_p = 6 / (2 x 2 um) = 1.5 um^-1 to the fall
    assert mom.values["run_reach"] * p_unit == pytest.approx(k_fall + 1.5, rel=0.01)
    # it names a point count that resolves the fall, and run refuses the job
    need = mom.values["points_needed"]
    assert need >= 300 * k_fall / math.pi
    with pytest.raises(JobError) as err:
        preflight([make_job(_falling_atom(150))])
    assert err.value.field == "grid.x.points"
    assert preflight([make_job(_falling_atom(150))], force=True)   # forced: said as a warning
    # the layer below (at -210 um) is not reached in 5 ms: it is not tuned for
    # the 21000 nK a fall to it would give (that tuning took minutes)
    setup = Setup(make_job(_falling_atom(150)))
    dyn = dynamics(setup)
    assert dyn.unreached == {"x-", "x+"}
    assert dyn.windows["x-"][1] / setup.units.factor("energy") < 1000.0
    # with the points it names, the fall is resolved
    (ok,) = _by_topic(check_job(make_job(_falling_atom(need)), trial_seconds=0), "momentum")
    assert ok.level == "ok", ok.message


# -- electrons a driving field frees: the simple-man model ---------------------------
def test_field_driven_momentum_reaches_the_rescattering_cutoff():
    """Simple-man model (Corkum 1993; Paulus et al., J. Phys. B 27, L703
    (1994)): electrons freed in a monochromatic field E0 cos(w t) reach
    2 U_p directly and 10.007 U_p after backscattering, U_p = E0^2 / 4 w^2
    (atomic units, charge -1, mass 1; the 10.007 from memory).  While the
    field is on, the momentum is the drift plus the quiver A(t), of
    amplitude A0 = E0 / w: the largest instantaneous |p| on the grid is
    sqrt(2 x 10.007 U_p) + A0."""
    e0, w = 0.05, 0.057
    job = make_job({
        "particle": {"charge": -1.0},
        "grid": {"x": {"min": -300.0, "max": 300.0, "points": 4096}},
        "potential": [{"kind": "soft_coulomb", "softening": 1.41},
                      {"kind": "field", "amplitude": e0, "omega": w, "envelope": "constant"}],
        # the atom's ground state without the field (the field is on from t = 0)
        "packet": {"kind": "eigenstate", "n": 0, "potential": [{"kind": "soft_coulomb", "softening": 1.41}]},
        "evolve": {"dt": 0.05, "duration": 900.0},          # about 8 cycles
        "absorber": {"kind": "cap", "thickness": 60.0},
    })
    setup = Setup(job)
    up = e0**2 / (4 * w**2)
    p = field_driven_momentum(setup)[0]
    assert p == pytest.approx(math.sqrt(2 * 10.007 * up) + e0 / w, rel=0.01)
    # the absorber is tuned to, and judged at, what the field brings to the faces
    dyn = dynamics(setup)
    assert dyn.bound
    assert dyn.windows["x+"][1] >= 0.98 * 10.007 * up


# -- absorbers: a figure above the target is never "ok" ------------------------------
def test_an_absorber_above_its_target_is_never_ok():
    """The 2D slit bench with a given, weak CAP: the y faces' worst return is
    far above 1e-6, and before it was reported "ok" because the packet does
    not move along y, while diffracted waves do reach those faces."""
    table = tomllib.loads((ROOT / "jobs" / "lantern-slits-2d.toml").read_text())
    table["absorber"].update(strength=1.0, power=2.0)
    report = check_job(make_job(table), trial_seconds=0)
    absorbers = _by_topic(report, "absorber")
    assert absorbers
    for f in absorbers:
        assert f.level != "ok" or f.values["worst_return"] <= 1e-6, f.message
    assert any(f.level == "warn" and f.values["face"].startswith("y") for f in absorbers)


# -- sharp features of V against dx ---------------------------------------------------
def _diode(points, smoothing):
    table = tomllib.loads((ROOT / "jobs" / "kestrel-diode.toml").read_text())
    table["grid"]["x"]["points"] = points
    table["potential"][0]["smoothing"] = smoothing
    return make_job(table)


def test_a_sharp_double_barrier_is_flagged_and_a_graded_one_is_not():
    """A sharp 150 meV double barrier at dx = 0.244 nm transmits up to 3 %
    off its converged value (the issue's measurement; it converges about as
    dx^2.5).  Graded over 1 nm at dx = 0.39 nm the transmitted probability is
    within 9e-5 of the converged value (our measurement, 1280-16384 points)."""
    (sharp,) = _by_topic(check_job(_diode(4096, 0.0), trial_seconds=0), "resolution")
    assert sharp.level == "warn" and sharp.field == "grid.x.points"
    (graded,) = _by_topic(check_job(_diode(2560, 1.0), trial_seconds=0), "resolution")
    assert graded.level == "ok"


# -- transform sizes ------------------------------------------------------------------
def test_a_box_of_8192_points_is_slow_and_8191_is_not():
    """The sine transform of N box points is computed through a transform of
    length N + 1: 8193 = 3 x 2731 has a large prime factor, 8192 = 2^13 none."""
    slow = make_job({"grid": {"x": {"min": -50.0, "max": 50.0, "points": 8192}, "boundary": "box"},
                     "packet": {"center": 0.0, "width": 2.0}, "evolve": {"dt": 0.01, "duration": 0.1}})
    (f,) = size_findings(Setup(slow).grid)
    assert f.level == "warn" and f.values["prime_factor"] == 2731 and f.values["fast_points"] == 8191
    assert f.field == "grid.x.points"
    fast = Setup(make_job({"grid": {"x": {"min": -50.0, "max": 50.0, "points": 8191}, "boundary": "box"},
                           "packet": {"center": 0.0, "width": 2.0},
                           "evolve": {"dt": 0.01, "duration": 0.1}}))
    assert size_findings(fast.grid) == []
    assert nearest_fast_points(Setup(make_job({"grid": {"x": {"min": 0, "max": 1, "points": 1009}},
                                               "packet": {"center": 0.5, "width": 0.05},
                                               "evolve": {"dt": 1e-4, "duration": 1e-3}})).grid.axes[0]) \
        in (1008, 1000, 1024, 1029)


# -- memory from shapes, before anything is allocated --------------------------------
def test_memory_is_judged_from_shapes_before_allocating():
    """A 4096^3 grid (1 TiB of psi) is refused from its shape alone: building
    it would take the machine down."""
    huge = make_job({"grid": {"x": {"min": -1, "max": 1, "points": 4096}, "y": {"min": -1, "max": 1, "points": 4096},
                              "z": {"min": -1, "max": 1, "points": 4096}},
                     "packet": {"center": [0, 0, 0], "width": [0.1, 0.1, 0.1]},
                     "evolve": {"dt": 0.01, "duration": 0.1}})
    assert memory_estimate(huge)["psi_bytes"] == 16 * 4096**3
    report = check_job(huge, trial_seconds=1.0)   # returns at once: no Setup, no trial
    (mem,) = _by_topic(report, "memory")
    assert mem.level == "error"
    assert [f.topic for f in report.findings if f.topic != "defaults"] == ["units", "memory"]


# -- the run-time line ------------------------------------------------------------------
def test_run_time_estimate_is_steps_times_step_plus_samples_times_sample(free_job):
    """The estimate was 37 s for a run of 1 s: a sample's cost was measured
    once, with the planning of its transform in it.  It is now the median of
    several, and the arithmetic is spelt out in the values."""
    report = check_job(make_job(free_job), trial_seconds=0.05)
    (rt,) = _by_topic(report, "run time")
    v = rt.values
    setup = Setup(make_job(free_job))
    samples = setup.total_steps // setup.sample_steps + 1
    assert v["estimate_seconds"] == pytest.approx(
        v["seconds_per_step"] * setup.total_steps + v["seconds_per_sample"] * samples, rel=1e-12)
    assert f"{samples} samples" in rt.message


# -- studies: every sweep point is judged ------------------------------------------------
def _study(steps):
    table = {
        "grid": {"x": {"min": -60.0, "max": 60.0, "points": 256}},
        "packet": {"kind": "gaussian", "center": -20.0, "width": 2.0, "energy": 1.0},
        "evolve": {"dt": 0.01, "duration": 2.0},
        "absorber": {"kind": "cap", "thickness": 15.0},
        "sweep": {"evolve.dt": steps},
    }
    return expand_study(copy.deepcopy(table), name="probe")


def test_check_of_a_study_names_the_failing_points():
    """A packet of 1 hartree, p0 = sqrt(2), sigma_p = 1/4: its highest
    kinetic energy (p0 + 6 sigma_p)^2 / 2 = 4.2 hartree turns by 4.2 rad in a
    step of 1.0, more than pi (the phase wraps); at 0.01 and 0.1 it is fine.
    Only that sweep point fails, and check names it; run and submit refuse."""
    study = _study([0.01, 0.1, 1.0])
    report = check_study(study, trial_seconds=0)
    bad = [f for f in report.findings if f.level == "error"]
    assert [f.topic for f in bad] == ["time step"]
    failing = bad[0].values["failing_points"]
    assert [p["params"]["evolve.dt"] for p in failing] == [1.0]
    assert "evolve.dt = 1.0" in bad[0].message and bad[0].field == "evolve.dt"
    with pytest.raises(JobError) as err:
        preflight(study.runs)
    assert err.value.field == "evolve.dt" and "evolve.dt = 1.0" in str(err.value)
    assert preflight(_study([0.01, 0.1]).runs) == []


# -- no false alarms: the demo jobs and the README's jobs --------------------------------
def _readme_jobs():
    text = (ROOT / "README.md").read_text()
    for block in re.findall(r"```toml\n(.*?)```", text, re.S):
        table = tomllib.loads(block)
        if "grid" in table and "evolve" in table:
            yield table


@pytest.mark.parametrize("path", sorted((ROOT / "jobs").glob("*.toml")), ids=lambda p: p.name)
def test_demo_jobs_have_no_warnings(path):
    from wavesweep.study import load_study

    report = check_study(load_study(path), trial_seconds=0)
    noisy = [f"{f.topic}: {f.message}" for f in report.findings if f.level != "ok"]
    assert noisy == []


def test_readme_jobs_have_no_warnings():
    tables = list(_readme_jobs())
    assert len(tables) >= 2
    for table in tables:
        report = check_job(make_job(table), trial_seconds=0)
        noisy = [f"{f.topic}: {f.message}" for f in report.findings if f.level != "ok"]
        assert noisy == [], table.get("title")


# -- review findings ------------------------------------------------------------------
def test_uniform_force_is_not_an_unresolved_feature_and_uphill_arrivals_count():
    """V = F x has no feature to resolve (its residual after the linear trend
    is rounding).  Uphill towards x+, the packet arrives there slower than it
    started: the window of x+ reaches down to what the trajectories bring
    (energy conservation: p0^2/2m - F (x_layer - x0), closed form)."""
    table = {"grid": {"x": {"min": -100.0, "max": 100.0, "points": 1024}},
             "potential": [{"kind": "expression", "expression": "0.02 * x"}],
             "packet": {"center": -20.0, "width": 3.0, "momentum": 2.0},
             "evolve": {"dt": 0.01, "duration": 60.0}, "absorber": {"kind": "cap", "thickness": 20.0}}
    report = check_job(make_job(table), trial_seconds=0)
    (res,) = _by_topic(report, "resolution")
    assert res.level == "ok"
    setup = Setup(make_job(table))
    dyn = dynamics(setup)
    e_lo = dyn.windows["x+"][0]
    # free flight over the 91 bohr from x0 + 3 sigma_x to the layer in 60
    # would need (91/60)^2/2 = 1.15 hartree; climbing, the packet arrives with less
    assert e_lo == pytest.approx(dyn.reach.arrivals["x+"][0]) and e_lo < 1.15


def test_default_sampling_divides_the_duration():
    """1500 / 0.2 = 7500 steps: the default sample interval is a whole
    number of steps that divides them (it was 7 steps, and the job refused)."""
    job = make_job({"grid": {"x": {"min": -50.0, "max": 50.0, "points": 256}},
                    "packet": {"center": 0.0, "width": 3.0}, "evolve": {"dt": 0.2, "duration": 1500.0}})
    every = job.table["record"]["every"]
    assert round(1500.0 / every) * every == pytest.approx(1500.0)


def test_levels_refuses_a_grid_that_cannot_fit_before_allocating(tmp_path, capsys):
    """`levels` on a 4096^3 grid was 'out of memory' (exit 1) after trying to
    allocate it; now it is one line from the shapes, naming the points."""
    from wavesweep.cli import main

    job = tmp_path / "big.toml"
    job.write_text('[grid]\nx = { min = -1.0, max = 1.0, points = 4096 }\ny = { min = -1.0, max = 1.0, points = 4096 }\n'
                   'z = { min = -1.0, max = 1.0, points = 4096 }\n[packet]\ncenter = [0.0, 0.0, 0.0]\n'
                   'width = [0.1, 0.1, 0.1]\n[evolve]\ndt = 0.01\nduration = 0.1\n')
    assert main(["levels", str(job), "--count", "2"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "grid.z.points" in err and "TiB" in err


# The compiled classical loop (kernels.classical) against the array version it replaces for a static V:
# the same velocity-Verlet steps and arithmetic, so every field of the Reach must agree exactly.  The
# array version stays (it runs time-dependent V) and is what the checks above judge through `dynamics`.
REACH_CASES = {
    "1d barrier, layers both ends": {
        "grid": {"x": {"min": -150.0, "max": 150.0, "points": 2048}},
        "potential": [{"kind": "barrier", "height": 0.5, "width": 1.0}],
        "packet": {"center": -40.0, "width": 6.0, "momentum": 1.2},
        "absorber": {"kind": "cap", "thickness": 20.0}, "evolve": {"dt": 0.02, "duration": 150.0}},
    "1d periodic harmonic, no layers": {
        "grid": {"x": {"min": -40.0, "max": 40.0, "points": 512}},
        "potential": [{"kind": "harmonic", "omega": 0.05}],
        "packet": {"center": -5.0, "width": 2.0, "momentum": 1.0}, "evolve": {"dt": 0.05, "duration": 200.0}},
    "2d box walls, one layer": {
        "grid": {"x": {"min": -30.0, "max": 30.0, "points": 96, "boundary": "box"},
                 "y": {"min": -20.0, "max": 20.0, "points": 64}},
        "potential": [{"kind": "gaussian", "height": 0.3, "width": 2.0}],
        "packet": {"center": [-10.0, 0.0], "width": [2.0, 2.0], "momentum": [1.0, 0.5]},
        "absorber": {"kind": "cap", "thickness": 6.0, "faces": ["x+"]}, "evolve": {"dt": 0.05, "duration": 60.0}},
    "3d trap, layers on every face": {
        "grid": {a: {"min": -15.0, "max": 15.0, "points": 32} for a in "xyz"},
        "potential": [{"kind": "harmonic", "omega": 0.1}],
        "packet": {"center": [-3.0, 1.0, 0.0], "width": [1.5, 1.5, 1.5], "momentum": [1.0, 0.2, 0.0]},
        "absorber": {"kind": "cap", "thickness": 4.0}, "evolve": {"dt": 0.05, "duration": 40.0}},
}


@pytest.mark.parametrize("case", list(REACH_CASES))
def test_the_compiled_classical_loop_takes_the_array_versions_steps(case):
    from wavesweep.adequacy import classical_reach
    setup = Setup(make_job(copy.deepcopy(REACH_CASES[case])))
    array, compiled = classical_reach(setup, compiled=False), classical_reach(setup)
    assert compiled.time_steps == array.time_steps > 10
    for name in ("momentum", "centre", "sampled", "visited", "edges_reached"):
        np.testing.assert_array_equal(np.asarray(getattr(compiled, name)), np.asarray(getattr(array, name)), name)
    assert compiled.arrivals == array.arrivals
    assert list(compiled.arrivals) == list(array.arrivals)   # in the order the faces were first reached
    if "no layers" not in case:
        assert array.arrivals   # the case exercises the layers' bookkeeping
