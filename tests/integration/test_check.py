"""wavesweep check: the split-operator time-aliasing finding.

A grid mode with kinetic phase T(k) dt > pi per step wraps its phase; sharp
features of V then couple the packet into such modes spuriously.  The check
must flag a sharp barrier at a large dt, pass it at a dt with no wrapped
modes (T_max dt < pi), and pass a smooth potential at the large dt.  That
the flagged case really is wrong is shown here too: its transmission differs
from the converged one, while the passing cases agree.
"""
from __future__ import annotations

import copy

import numpy as np
import pytest

from wavesweep.check import check_job

from conftest import make_job, run_table

BARRIER = {
    "grid": {"x": {"min": -150.0, "max": 150.0, "points": 1024}},
    "potential": [{"kind": "barrier", "height": 0.6, "width": 2.0, "center": 0.1464844}],
    "packet": {"kind": "gaussian", "center": -50.0, "width": 8.0, "momentum": 1.0},
    "evolve": {"dt": 0.2, "duration": 110.0},
    "absorber": {"kind": "cap", "thickness": 30.0},
    "record": {"every": 1.0, "snapshot_every": 110.0},
}


def _finding(table):
    report = check_job(make_job(table), trial_seconds=0.05)
    return next(f for f in report.findings if f.topic == "splitting")


def _transmitted(table, tmp_path):
    ds = run_table(table, tmp_path)
    x = ds.x.values
    final = ds.isel(time=-1)
    right = float(ds.density.isel(snapshot_time=-1).where(ds.x > 1.2).sum()) * (x[1] - x[0])
    return float(final.absorbed.sel(boundary="x+")) + right


def _with(**changes):
    t = copy.deepcopy(BARRIER)
    for path, value in changes.items():
        node = t
        *head, last = path.split("__")
        for part in head:
            node = node[int(part)] if isinstance(node, list) else node[part]
        node[last] = value
    return t


def test_sharp_barrier_is_flagged_where_the_error_stops_following_dt2(tmp_path):
    # flagged while modes with T(k) dt > pi exist, passed once none does
    flagged = _finding(_with(evolve__dt=0.2))
    assert flagged.level == "warn" and flagged.values["aliased_weight"] > 1e-5
    assert _finding(_with(evolve__dt=0.1)).level == "warn"
    # the suggested step passes, and it is no smaller than the step that has no
    # wrapped modes at all (T_max dt = pi)
    limit = flagged.values["dt_limit"]
    dx = 300.0 / 1024
    t_max = (np.pi / dx) ** 2 / 2
    assert limit >= np.pi / t_max * (1 - 1e-9)
    steps = 10 * np.ceil(110.0 / (0.999 * limit) / 10)    # whole steps, 10 per sample
    safe = 110.0 / steps
    assert _finding(_with(evolve__dt=safe, record__every=110.0 / 10,
                          record__snapshot_every=110.0)).level == "ok"
    assert _finding(_with(evolve__dt=0.05)).level == "ok"
    # and the flag means something: there the Strang error does not fall as
    # dt^2 (a factor 4 from dt 0.2 to 0.1, as the smooth case below does).
    # Measured against dt = 0.01: with point-sampled edges 1.6e-4 at dt 0.2 and
    # 7.9e-4 at 0.1 (it grew); with cell-averaged edges 8.5e-4 and 3.0e-4 (x2.8).
    ref = _transmitted(_with(evolve__dt=0.01), tmp_path / "ref")
    e2 = abs(_transmitted(_with(evolve__dt=0.2), tmp_path / "a") - ref)
    e1 = abs(_transmitted(_with(evolve__dt=0.1), tmp_path / "b") - ref)
    assert e2 / e1 < 3.3, (e2, e1)


def test_smooth_potential_passes_and_converges_as_dt2(tmp_path):
    def smooth(dt):
        return _with(potential__0__smoothing=1.5, evolve__dt=dt)

    assert _finding(smooth(0.2)).level == "ok"
    ref = _transmitted(smooth(0.01), tmp_path / "ref")
    e2 = abs(_transmitted(smooth(0.2), tmp_path / "a") - ref)
    e1 = abs(_transmitted(smooth(0.1), tmp_path / "b") - ref)
    # Strang is second order (halving dt divides the error by 4; measured 3.9)
    assert 2.8 < e2 / e1 < 5.2, (e2, e1)


def test_free_packet_and_detector_inside_absorber():
    # no static potential at all (a regression: the aliasing estimate divided by zero)
    free = {
        "grid": {"x": {"min": -100.0, "max": 100.0, "points": 512}},
        "packet": {"center": -20.0, "width": 3.0, "momentum": 1.0},
        "evolve": {"dt": 0.05, "duration": 10.0},
        "absorber": {"kind": "cap", "thickness": 20.0},
        "detector": [{"name": "in", "x": 90.0}, {"name": "out", "x": 50.0}],
    }
    report = check_job(make_job(free), trial_seconds=0.05)
    assert not report.errors
    split = next(f for f in report.findings if f.topic == "splitting")
    assert split.level == "ok"
    det = [f for f in report.findings if f.topic == "detector"]
    # only the detector inside the x+ layer (80..100) is flagged, naming its field
    assert [f.values["detector"] for f in det] == ["in"]
    assert det[0].level == "warn" and det[0].field == "detector.0.x"


@pytest.mark.parametrize("boundary", ["periodic", "box"])
def test_eigenstate_packet_momenta_are_measured(boundary):
    """The ground state of a harmonic trap (m = 1, w = 0.5) is the Gaussian of
    width sqrt(hbar / 2 m w) = 1 (Griffiths sec. 2.3; from memory), and a
    boost exp(i p x) shifts its momenta by p, so check must find for the
    boosted eigenstate what it finds for that Gaussian packet: momenta up to
    |p| + 6 sigma_p = 8 + 3 (here measured from the state's transform, to
    within 1.5 dk of the grid; measured 1.03 dk on the box, unboosted), the phase per step (|p| + 6 sigma_p)^2 dt / 2m =
    1.21 rad (before: 0 rad for any eigenstate or file packet) and the
    margins in widths."""
    def job(packet):
        return make_job({"grid": {"x": {"min": -40.0, "max": 40.0, "points": 512}, "boundary": boundary},
                         "potential": [{"kind": "harmonic", "omega": 0.5}], "packet": packet,
                         "evolve": {"dt": 0.02, "duration": 1.0}})

    def findings(packet):
        report = check_job(job(packet), trial_seconds=0.05)
        return {topic: [f for f in report.findings if f.topic == topic]
                for topic in ("momentum", "margin", "time step")}

    p, sigma_p, dt = 8.0, 0.5, 0.02
    measured = findings({"kind": "eigenstate", "n": 0, "momentum": p})
    gaussian = findings({"kind": "gaussian", "center": 0.0, "width": 1.0, "momentum": p})
    dk = (2 * np.pi if boundary == "periodic" else np.pi) / 80.0
    reach = measured["momentum"][0].values["packet_reach"]
    assert measured["momentum"][0].values["measured"] and measured["momentum"][0].level == "ok"
    assert abs(reach - (p + 6 * sigma_p)) < 1.5 * dk
    assert reach == pytest.approx(gaussian["momentum"][0].values["packet_reach"], abs=1.5 * dk)
    phase = measured["time step"][0].values["packet_phase"]
    assert phase == pytest.approx((p + 6 * sigma_p) ** 2 / 2 * dt, rel=3 * dk / (p + 6 * sigma_p))
    assert measured["time step"][0].level == gaussian["time step"][0].level == "warn"   # 1.21 rad > 1
    assert [f.values["widths"] for f in measured["margin"]] == pytest.approx(
        [f.values["widths"] for f in gaussian["margin"]], rel=1e-6)
    # without the boost the phase is that of the trap's own momenta, 6 sigma_p, not 0
    still = findings({"kind": "eigenstate", "n": 0})["time step"][0].values["packet_phase"]
    assert still == pytest.approx((6 * sigma_p) ** 2 / 2 * dt, rel=3 * dk / (6 * sigma_p))
