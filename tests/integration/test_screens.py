"""Resolved screens: ``[[detector]] resolved = true`` records the flux density
along a line (2D) or plane (3D), its time integral, and ``arrivals`` gives
what arrived where.

Reference from outside the project: a free Gaussian packet in 2D/3D is a
product of 1D free Gaussians, so its current through the line x = x_d is
separable, J_x(x_d, y, t) = J_1D(x_d, t) rho_y(y, t) (tests/analytic.py:
free_gaussian_current, free_gaussian_density, closed forms of the free
packet); the pattern P(y) = int J dt and the mean arrival per position are
integrated with scipy.integrate.quad.
"""
from __future__ import annotations

import copy
import json

import numpy as np
import pytest
import xarray as xr
from scipy.integrate import quad

from analytic import free_gaussian_current, free_gaussian_density
from conftest import make_job
from test_coupled_viz import CROSSING_2D
from wavesweep.analysis.arrivals import arrival_times, pattern_statistics
from wavesweep.errors import JobError
from wavesweep.job.validate import job_from_dict
from wavesweep.run import Simulation
from wavesweep.setup import CoupledSetup

X0, SX, P0, XD, Y0, SY = -10.0, 2.0, 4.0, 5.0, 1.0, 2.0
T_END = 12.0
FREE_2D = {
    "title": "free packet through a screen",
    "grid": {"x": {"min": -30.0, "max": 60.0, "points": 256}, "y": {"min": -20.0, "max": 20.0, "points": 64},
             "boundary": "periodic"},
    "packet": {"kind": "gaussian", "center": [X0, Y0], "width": [SX, SY], "momentum": [P0, 0.0]},
    "evolve": {"dt": 0.05, "duration": T_END, "scheme": "strang"},
    "absorber": {"kind": "none"},
    "record": {"every": 0.05, "snapshot_every": 6.0},
    "detector": [{"name": "screen", "x": XD, "resolved": True}, {"name": "plain", "x": 0.0}],
}
QUAD = dict(limit=400, epsabs=1e-14, epsrel=1e-12)


def _run(table, folder):
    return Simulation(make_job(copy.deepcopy(table))).run(folder, progress=False)


def _separable(y, t, xd=XD, x0=X0, sx=SX, p0=P0, y0=Y0, sy=SY):
    """J_x(x_d, y, t) of the free packet: the 1D current times the y-marginal (closed forms)."""
    return free_gaussian_current(xd, t, x0, sx, p0, 1.0) * free_gaussian_density(y, t, y0, sy, 0.0, 1.0)


def _pattern(y, t_end=T_END, **kw):
    """P(y) = int_0^T J dt and the mean arrival int t J dt / P(y) (quad)."""
    peak = (kw.get("xd", XD) - kw.get("x0", X0)) / kw.get("p0", P0)   # the classical arrival, a break point
    p = quad(lambda t: _separable(y, t, **kw), 0.0, t_end, points=[peak], **QUAD)[0]
    m = quad(lambda t: t * _separable(y, t, **kw), 0.0, t_end, points=[peak], **QUAD)[0]
    return p, m / p


@pytest.fixture(scope="module")
def screen_result(tmp_path_factory):
    return _run(FREE_2D, tmp_path_factory.mktemp("screen"))


def test_the_screen_records_the_separable_current_of_a_free_packet(screen_result):
    with xr.open_dataset(screen_result) as ds:
        assert list(ds["screen"].values) == ["screen"]
        assert ds["screen_flux"].dims == ("time", "screen", "y")
        assert ds["screen_flux"].attrs["units"] == "bohr-1 au_time-1"
        assert ds["screen_probability"].attrs["units"] == "bohr-1"
        y, t = ds["y"].values, ds["time"].values
        flux = ds["screen_flux"].values[:, 0]
        for i in (40, 75, 100):   # rising edge, peak, falling edge (t = 2, 3.75, 5)
            np.testing.assert_allclose(flux[i], _separable(y, t[i]), rtol=0, atol=1e-6)
        # the profile integrated over the line is the recorded total flux through it
        np.testing.assert_allclose(flux.sum(axis=1) * (y[1] - y[0]), ds["flux"].values[:, 0], rtol=0, atol=1e-12)
        reference = np.array([_pattern(v)[0] for v in y])
        np.testing.assert_allclose(ds["screen_probability"].values[0], reference, rtol=0, atol=1e-6)


def test_arrivals_gives_the_pattern_and_the_mean_arrival_per_position(screen_result):
    dist = arrival_times(screen_result, "screen")["screen"]
    pattern = dist.as_dict()["pattern"]
    assert pattern["axis"] == "y"
    y = np.array(pattern["position"])
    reference = np.array([_pattern(v) for v in y])
    np.testing.assert_allclose(pattern["probability"], reference[:, 0], rtol=0, atol=1e-6)
    arrived = reference[:, 0] > 1e-3 * reference[:, 0].max()
    np.testing.assert_allclose(np.array(pattern["mean_arrival"])[arrived], reference[arrived, 1], rtol=1e-6)
    assert pattern["units"] == {"position": "bohr", "probability": "bohr-1", "mean_arrival": "au_time"}
    # the detector without `resolved` has no pattern
    assert "pattern" not in arrival_times(screen_result, "plain")["plain"].as_dict()


def test_pattern_statistics_of_a_separable_flux_on_uneven_samples():
    # int t exp(-(t - 3)^2 / 2) dt / int exp(-(t - 3)^2 / 2) dt = 3 (a normal density's mean)
    t = np.sort(np.concatenate([np.linspace(-5, 11, 801), [3.01, 3.02]]))
    flux = np.exp(-(t - 3.0) ** 2 / 2)[:, None] * np.array([1.0, 2.0, 0.0])
    prob, mean = pattern_statistics(t, flux)
    # int exp(-(t - 3)^2 / 2) dt = sqrt(2 pi); the two uneven samples cost the trapezoid ~h^2 f''/12 locally
    np.testing.assert_allclose(prob[:2], np.sqrt(2 * np.pi) * np.array([1.0, 2.0]), rtol=1e-6)
    np.testing.assert_allclose(mean[:2], 3.0, rtol=1e-8)
    assert np.isnan(mean[2])   # nothing arrived there: no time


def test_a_box_grid_and_a_stride_give_the_profile_on_the_snapshot_grid(tmp_path):
    table = copy.deepcopy(FREE_2D)
    table["grid"]["boundary"] = "box"   # the sine transform's path
    table["record"]["stride"] = 2
    table["evolve"]["duration"] = 6.0
    table["record"]["snapshot_every"] = 3.0
    with xr.open_dataset(_run(table, tmp_path)) as ds:
        y = ds["y"].values
        assert len(y) == 32 and ds["screen_flux"].shape[1:] == (1, 32)
        t = ds["time"].values
        np.testing.assert_allclose(ds["screen_flux"].values[75, 0], _separable(y, t[75]), rtol=0, atol=1e-6)
        reference = np.array([_pattern(v, t_end=6.0)[0] for v in y])
        np.testing.assert_allclose(ds["screen_probability"].values[0], reference, rtol=0, atol=1e-6)


def test_a_plane_in_3d_gives_a_two_axis_pattern(tmp_path):
    x0, p0, xd, sx, s = -10.0, 4.0, -2.0, 2.0, 1.5
    table = {
        "title": "free packet through a plane",
        "grid": {"x": {"min": -24.0, "max": 40.0, "points": 128}, "y": {"min": -14.0, "max": 14.0, "points": 32},
                 "z": {"min": -14.0, "max": 14.0, "points": 32}, "boundary": "periodic"},
        "packet": {"kind": "gaussian", "center": [x0, 0.0, 0.0], "width": [sx, s, s], "momentum": [p0, 0.0, 0.0]},
        "evolve": {"dt": 0.05, "duration": 6.0, "scheme": "strang"},
        "absorber": {"kind": "none"},
        "record": {"every": 0.05, "snapshot_every": 6.0, "final_state": False},
        "detector": [{"name": "plane", "x": xd, "resolved": True}],
    }
    path = _run(table, tmp_path)
    pattern = arrival_times(path, "plane", classical=False)["plane"].as_dict()["pattern"]
    assert pattern["axes"] == ["y", "z"]
    y, z = (np.array(p) for p in pattern["position"])
    prob = np.array(pattern["probability"])
    assert prob.shape == (32, 32)
    # separable: J_1D(x_d, t) rho_y(y, t) rho_z(z, t); checked along a row and a column
    kw = dict(xd=xd, x0=x0, sx=sx, p0=p0, sy=s)

    def plane(a, b):
        def f(t):
            return _separable(a, t, y0=0.0, **kw) * free_gaussian_density(b, t, 0.0, s, 0.0, 1.0)
        return quad(f, 0.0, 6.0, points=[2.0], **QUAD)[0]

    j = int(np.argmin(abs(z)))
    np.testing.assert_allclose(prob[:, j], [plane(v, z[j]) for v in y], rtol=0, atol=1e-6)
    np.testing.assert_allclose(prob[j, :], [plane(y[j], v) for v in z], rtol=0, atol=1e-6)
    with xr.open_dataset(path) as ds:
        assert ds["screen_flux"].dims == ("time", "screen", "y", "z")
        assert ds["screen_probability"].attrs["units"] == "bohr-2"


def test_resolved_false_is_the_job_without_it_and_true_changes_the_run_id():
    without = copy.deepcopy(FREE_2D)
    del without["detector"][0]["resolved"]
    said_false = copy.deepcopy(without)
    said_false["detector"][0]["resolved"] = False
    assert job_from_dict(said_false).run_id == job_from_dict(without).run_id
    assert job_from_dict(FREE_2D).run_id != job_from_dict(without).run_id


def test_screens_across_two_axes_and_on_coupled_surfaces_are_refused():
    two = copy.deepcopy(FREE_2D)
    two["detector"].append({"name": "side", "y": 5.0, "resolved": True})
    with pytest.raises(JobError) as e:
        job_from_dict(two)
    assert e.value.field == "detector.2.resolved" and "not supported yet" in e.value.message
    coupled = copy.deepcopy(CROSSING_2D)
    coupled["detector"][0]["resolved"] = True
    with pytest.raises(JobError) as e:
        CoupledSetup(job_from_dict(coupled))
    assert e.value.field == "detector.0.resolved" and "coupled" in e.value.message


def test_cli_arrivals_json_carries_the_pattern(screen_result, tmp_path):
    from inprocess import run_main

    out = run_main("arrivals", str(screen_result), "--json", cwd=tmp_path)
    assert out.returncode == 0
    pattern = json.loads(out.stdout)["detectors"]["screen"]["pattern"]
    assert pattern["axis"] == "y" and len(pattern["position"]) == len(pattern["probability"]) == 64


def test_the_run_figure_draws_the_pattern_and_the_movie_marks_the_screen(screen_result):
    from wavesweep.viz.movie import MovieOptions, painter_for
    from wavesweep.viz.scene import FrameReader, read_scene
    from wavesweep.viz.summary import run_figure

    fig = run_figure(screen_result)
    panel = next(ax for ax in fig.axes if ax.get_title(loc="left").startswith("what arrived where"))
    with xr.open_dataset(screen_result) as ds:
        x, y = panel.lines[0].get_data()
        np.testing.assert_array_equal(x, ds["y"].values)
        np.testing.assert_array_equal(y, ds["screen_probability"].values[0])
    scene = read_scene(screen_result)
    assert scene.screens == ["screen"]
    painter = painter_for(scene, MovieOptions(size=(640, 360)))
    with FrameReader(scene.path) as reader:
        painter.prepare(reader, [0])
    labels = [t.get_text().strip() for ax in painter.fig.axes for t in ax.texts]
    assert "screen (screen)" in labels and "plain" in labels   # the screen named apart from the plain detector
    widths = {ln.get_linestyle(): ln.get_linewidth() for ax in painter.fig.axes for ln in ax.lines
              if ln.get_color() == "#D55E00"}
    assert widths["-"] > widths["--"]   # the screen solid and heavier, the plain detector dashed


def test_check_warns_when_the_samples_do_not_resolve_the_flux_through_a_screen():
    from conftest import setup_of
    from wavesweep.adequacy import assess

    def warned(table):
        return [f for f in assess(setup_of(table)) if f.field == "record.every" and "resolved" in f.message]

    assert warned(FREE_2D) == []                 # every 0.05 against a passage of ~0.36 (2 bohr at 5.5 bohr/au)
    coarse = copy.deepcopy(FREE_2D)
    coarse["record"]["every"] = 1.0
    (finding,) = warned(coarse)
    assert finding.level == "warn" and finding.values["passing_time"] == pytest.approx(2.0 / 5.5, rel=0.05)
    del coarse["detector"][0]["resolved"]
    assert warned(coarse) == []                  # a plain detector's total flux: as before


SHORT_2D = {**copy.deepcopy(FREE_2D), "evolve": {"dt": 0.05, "duration": 5.0, "scheme": "strang"},
            "record": {"every": 0.1, "snapshot_every": 2.5, "stride": 2}}


def test_a_resumed_run_integrates_every_sample_of_its_screen(tmp_path):
    from test_checkpoint import NEVER, assert_same_result, run, stop_after
    from wavesweep.io.checkpoint import CheckpointPolicy
    from wavesweep.errors import RunInterrupted

    ref = run(SHORT_2D, tmp_path / "ref.nc")
    policy = CheckpointPolicy(tmp_path / "run.ckpt", every_seconds=NEVER)
    out = tmp_path / "out" / "result.nc"
    with pytest.raises(RunInterrupted):
        run(SHORT_2D, out, checkpoint=policy, should_stop=stop_after(30))   # stopped mid-crossing
    assert run(SHORT_2D, out, checkpoint=policy) == out
    assert_same_result(ref, out)   # screen_flux and screen_probability included


def test_batch_members_record_the_screens_of_their_solo_runs(tmp_path):
    from test_batched import members
    from wavesweep.batched import BatchedRun

    jobs = members(SHORT_2D, [3.5, 4.0])
    solo = [Simulation(j).run(tmp_path / "solo", progress=False) for j in jobs]
    out = BatchedRun(jobs).run([tmp_path / "batch" / p.name for p in solo])
    for a, b in zip(solo, out):
        with xr.open_dataset(a) as one, xr.open_dataset(b) as two:
            assert two["screen_flux"].shape[1:] == (1, 32)
            for name in ("flux", "screen_flux", "screen_probability"):
                np.testing.assert_allclose(two[name].values, one[name].values, rtol=0, atol=1e-12, err_msg=name)


def test_cli_arrivals_table_points_to_the_pattern(screen_result, tmp_path):
    from inprocess import run_main

    out = run_main("arrivals", str(screen_result), cwd=tmp_path)
    assert out.returncode == 0 and "resolved: screen; the pattern" in out.stdout
