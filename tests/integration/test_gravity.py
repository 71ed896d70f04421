"""A packet falling in uniform gravity, against the closed form; gravity's adequacy.

Closed form (exact for a Gaussian in a linear potential V = m g x; e.g. the
Avron-Herbst transformation, or Ehrenfest's theorem, which is exact for a
potential at most quadratic; from memory): the density stays Gaussian with

    <x>(t) = x0 + v0 t - g t^2 / 2,   <p>(t) = p0 - m g t,
    sigma(t) = sigma0 sqrt(1 + (hbar t / (2 m sigma0^2))^2)

(the free spreading width: a uniform force shifts the packet, it does not
reshape it).  The jobs are in cold-atom units (um, ms, Da) for Rb-87, with
hbar from CODATA (scipy.constants) converted to Da um^2 / ms.
"""
from __future__ import annotations

import copy

import numpy as np
import pytest
import scipy.constants as sc

from conftest import make_job, run_table, setup_of
from wavesweep.adequacy import assess
from wavesweep.fft import make_transform

RB87_U = 86.909180527                                  # u (atomic mass evaluation; from memory)
HBAR = sc.hbar / (sc.atomic_mass * 1e-12 / 1e-3)       # hbar in Da um^2 / ms (CODATA)
G = sc.g * 1e6 / 1e6                                   # standard gravity in um / ms^2

X0, V0, SIGMA0 = 0.0, 3.0, 1.0                         # um, um/ms (upward), um
DROP = {
    "title": "Rb-87 thrown up and falling back",
    "units": {"length": "um", "time": "ms", "mass": "Da"},
    "particle": {"mass": RB87_U},
    "grid": {"x": {"min": -20.0, "max": 10.0, "points": 320}, "boundary": "box"},
    "potential": [{"kind": "gravity"}],
    "packet": {"kind": "gaussian", "center": X0, "width": SIGMA0, "momentum": RB87_U * V0},
    "evolve": {"dt": 0.005, "duration": 1.5, "scheme": "strang"},
    "record": {"every": 0.25, "snapshot_every": 1.5},
}


def centre(t, x0=X0, v0=V0, g=G):
    return x0 + v0 * t - 0.5 * g * t**2


def width(t, sigma0=SIGMA0, m=RB87_U):
    return sigma0 * np.sqrt(1.0 + (HBAR * t / (2.0 * m * sigma0**2)) ** 2)


def test_falling_packet_follows_the_classical_centre_and_spreads_freely(tmp_path):
    ds = run_table(DROP, tmp_path)
    t = ds["time"].values
    assert t[-1] == pytest.approx(1.5)
    # the drop is several widths: a test that cannot tell gravity from none
    assert abs(centre(1.5) - X0) > 6 * SIGMA0
    np.testing.assert_allclose(ds["x_mean"].values, centre(t), rtol=0, atol=1e-10 * 10.0)
    np.testing.assert_allclose(ds["x_std"].values, width(t), rtol=1e-10)
    np.testing.assert_allclose(ds["p_mean"].values, RB87_U * (V0 - G * t), rtol=1e-10, atol=1e-10 * RB87_U * 10)
    assert ds["norm"].values[-1] == pytest.approx(1.0, abs=1e-12)
    # the energy <H> = <p^2>/2m + m g <x> is conserved (a static H)
    e = ds["energy"].values
    assert np.ptp(e) <= 1e-8 * abs(e[0])


def test_gravity_along_y_leaves_x_alone():
    # 2D: x periodic and free, y a box axis with gravity (the default axis in 2D)
    table = copy.deepcopy(DROP)
    table["grid"] = {"x": {"min": -12.0, "max": 12.0, "points": 64},
                     "y": {"min": -20.0, "max": 10.0, "points": 320, "boundary": "box"},
                     "boundary": "periodic"}
    vx = 1.5                                                   # um/ms along x
    table["packet"] = {"kind": "gaussian", "center": [-2.0, X0], "width": [1.5, SIGMA0],
                       "momentum": [RB87_U * vx, RB87_U * V0]}
    s = setup_of(table)
    steps = 300                                                # 1.5 ms
    psi = s.make_propagator(make_transform(s.grid, "scipy")).step(s.psi0.copy(), steps)
    t = steps * 0.005
    um = s.units.factor("length")
    x, y = (c / um for c in s.grid.mesh().values())
    rho = np.abs(psi) ** 2
    rho /= rho.sum()

    def moments(coord, axis):
        mean = float(np.sum(rho * coord))
        return mean, float(np.sqrt(np.sum(rho * (coord - mean) ** 2)))

    def mean_wavenumber(axis, d):
        # psi vanishes at both ends of each axis here: the FFT of the samples is
        # the packet's spectrum (per um)
        spec = np.abs(np.fft.fft(psi, axis=axis)) ** 2
        k = 2 * np.pi * np.fft.fftfreq(psi.shape[axis], d)
        shape = [1, 1]
        shape[axis] = -1
        return float(np.sum(spec * k.reshape(shape)) / np.sum(spec))

    xm, xs = moments(x, 0)
    ym, ys = moments(y, 1)
    dx, dy = s.grid.axes[0].dx / um, s.grid.axes[1].dx / um
    assert xm == pytest.approx(-2.0 + vx * t, abs=1e-8 * 10)
    assert xs == pytest.approx(float(width(t, 1.5)), rel=1e-8)
    assert ym == pytest.approx(centre(t), abs=1e-8 * 10)
    assert ys == pytest.approx(float(width(t)), rel=1e-8)
    assert HBAR * mean_wavenumber(0, dx) == pytest.approx(RB87_U * vx, rel=1e-8)
    assert HBAR * mean_wavenumber(1, dy) == pytest.approx(RB87_U * (V0 - G * t), rel=1e-8)


def test_check_sees_the_momentum_a_long_drop_gains():
    """The momentum m g t gained over the run must fit the grid: a 44 um drop
    (3 ms) reaches hbar k = m g t, 40 per um, where 256 points over 70 um
    resolve 11.5 per um.  The packet alone (sigma_p = hbar / 2 sigma) fits
    easily, so only the run's dynamics can tell."""
    table = copy.deepcopy(DROP)
    table["grid"]["x"] = {"min": -60.0, "max": 10.0, "points": 256}
    table["packet"]["momentum"] = 0.0
    table["evolve"] = {"dt": 0.001, "duration": 3.0}
    table["record"] = {"every": 0.5}
    s = setup_of(table)
    k_max = np.pi / (s.grid.axes[0].dx / s.units.factor("length"))
    assert k_max < RB87_U * G * 3.0 / HBAR / 3                 # the gain is 3x what the grid holds
    assert 6 / (2 * SIGMA0) < k_max                            # the packet itself fits
    found = {f.topic: f for f in assess(s) if f.topic == "momentum"}
    momentum = found["momentum"]
    assert momentum.level == "error" and momentum.field == "grid.x.points"
    assert "classical trajectories" in momentum.message
    # the reach is the fastest trajectory of the 6 sigma_p stencil: m g t + 6 hbar / (2 sigma0)
    assert momentum.values["run_reach"] == pytest.approx(RB87_U * G * 3.0 + 6 * HBAR / (2 * SIGMA0), rel=1e-3)
    # and the same drop on enough points is fine, every criterion of it: a
    # linear V has no feature to alias or resolve.  2559 points resolve k up to
    # 115 per um, beyond the 93 per um whose kinetic phase is pi per step:
    # the trend-free rest of V is rounding there, whose flat spectrum the
    # splitting criterion once read as 13 % of V's weight in aliased modes
    assert momentum.values["points_needed"] <= 2559
    table["grid"]["x"]["points"] = 2559
    bad = [f.message for f in assess(setup_of(table)) if f.level != "ok"]
    assert not bad, bad


def test_the_classical_arrival_estimate_falls_under_gravity(tmp_path):
    """The classical column of `arrivals` was free flight, off by orders of
    magnitude under gravity (190 ms against 2.3 ms was seen for a drop).
    Now the run records gravity's constant acceleration and the classical
    ensemble falls: for a Gaussian in a linear potential its Wigner function
    moves classically (exact for a potential at most quadratic; e.g.
    Schleich, Quantum Optics in Phase Space, ch. 3; from memory), so the
    classical first arrival is the quantum one up to backflow."""
    from conftest import make_job

    from wavesweep.analysis.arrivals import arrival_times
    from wavesweep.run import Simulation

    table = {**DROP, "detector": [{"name": "floor", "x": -6.0}], "evolve": {**DROP["evolve"], "duration": 2.0},
             "record": {"every": 0.01, "snapshot_every": 2.0}}
    path = Simulation(make_job(table)).run(tmp_path, progress=False)
    floor = arrival_times(path)["floor"]
    assert not any("free-flight" in n for n in floor.warnings)
    assert floor.stats["classical_is_reference"] is True
    # the centre reaches the floor at the root of 6 + V0 t - G t^2 / 2 = 0 (textbook kinematics)
    t_centre = (V0 + np.sqrt(V0**2 + 2 * G * 6.0)) / G
    assert abs(floor.stats["classical_mean"] - t_centre) < 0.01 * t_centre
    assert abs(floor.stats["classical_mean"] - floor.stats["mean"]) < 1e-6 * floor.stats["mean"]
    free = {**table, "potential": [{"kind": "free"}]}
    path = Simulation(make_job(free)).run(tmp_path / "free", progress=False)
    assert not any("free-flight" in n for n in arrival_times(path)["floor"].warnings)
