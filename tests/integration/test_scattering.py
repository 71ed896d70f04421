"""Scattering runs end to end: transmission through a rectangular barrier,
the probability books of the absorbers, absorber quality, and a separable 2D
problem against the product of two 1D runs.

Atomic units throughout (hbar = m_e = 1; bohr, hartree, hbar/E_h).  The
references are textbook closed forms (named beside each check), scipy
quadrature of them, and exact identities of the discretised problem (the
Strang step of a separable H factorises, the bookkeeping is exact).
"""
from __future__ import annotations

import copy
import math
import tomllib

import numpy as np
import pytest
from conftest import run_table, setup_of
from scipy.integrate import quad

from wavesweep.absorbers.tuning import cap_profile, return_probability
from wavesweep.job import job_from_dict
from wavesweep.setup import Setup


def _psi(ds):
    return ds.psi_real.values + 1j * ds.psi_imag.values


def _absorbed(ds, face):
    return float(ds.absorbed.sel(boundary=face).values[-1])


# --- 1. rectangular barrier ---------------------------------------------------------

def barrier_transmission(energy, height, width, mass=1.0):
    """T(E) of a rectangular barrier, hbar = 1.

    E < V0:  T = [1 + V0^2 sinh^2(kappa a) / (4 E (V0 - E))]^-1, kappa = sqrt(2m(V0-E))
    E > V0:  T = [1 + V0^2 sin^2(q a) / (4 E (E - V0))]^-1,     q = sqrt(2m(E-V0))
    (Griffiths, Introduction to Quantum Mechanics, 2nd ed., problem 2.33;
    Merzbacher, Quantum Mechanics, ch. 6; from memory.)
    """
    if energy < height:
        kappa = math.sqrt(2 * mass * (height - energy))
        return 1.0 / (1.0 + height**2 * math.sinh(kappa * width) ** 2 / (4 * energy * (height - energy)))
    if energy > height:
        q = math.sqrt(2 * mass * (energy - height))
        return 1.0 / (1.0 + height**2 * math.sin(q * width) ** 2 / (4 * energy * (energy - height)))
    return 1.0 / (1.0 + mass * width**2 * height / 2)     # the E -> V0 limit of both


def packet_transmission(p0, sigma_p, height, width, mass=1.0):
    """T averaged over the packet's momentum density |phi(p)|^2, a normal
    density of mean p0 and standard deviation sigma_p = hbar / (2 width_x)
    (minimum-uncertainty Gaussian); scipy.integrate.quad."""
    def integrand(p):
        w = math.exp(-0.5 * ((p - p0) / sigma_p) ** 2) / (math.sqrt(2 * math.pi) * sigma_p)
        return w * barrier_transmission(p * p / (2 * mass), height, width, mass)
    lo, hi = p0 - 10 * sigma_p, p0 + 10 * sigma_p
    p_top = math.sqrt(2 * mass * height)
    value, err = quad(integrand, lo, hi, points=[p_top] if lo < p_top < hi else None,
                      limit=200, epsabs=1e-12, epsrel=1e-10)
    assert err < 1e-9
    return value


# The barrier is V0 = 1 hartree, a = 2 bohr, centred at c = dx/2 on a periodic
# grid with dx = 1/16 bohr whose points are x_j = min + j dx with min a
# multiple of dx.  The edges c -/+ a/2 = dx/2 -/+ 16 dx then fall midway between
# grid points, so exactly a/dx = 32 points satisfy |x - c| < a/2 in
# Barrier.static() (none lies on an edge, where rounding could flip the strict
# inequality), and the discrete barrier -- 32 cells of width dx centred on
# those points -- spans exactly [c - a/2, c + a/2]: its width equals the
# nominal one, and the textbook T(E) is compared for the nominal width.
# The remaining difference is the grid's O(dx^2) error for a sharp step
# (measured over the barrier, p0 = 1.6: -7.9e-3 at dx = 1/4, -1.8e-3 at 1/8,
# -5e-4 at 1/16) plus the time step's (< 1e-4 here); here T is off by
# -7e-5 (p0 = 1.2) and -4.3e-4 (p0 = 1.84), measured.  The check
# is sensitive to the width: centred at 0 instead, the edges sit on grid
# points, only 31 points are inside, and T is off by +1.3e-2 (tunnelling) and
# -1.2e-2 (over the barrier), measured.
BARRIER_DX = 1.0 / 16.0
BARRIER = {"height": 1.0, "width": 2.0}


def barrier_job(p0, width, duration):
    th = 30.0                                    # > 5 wavelengths 2 pi / p0
    x0 = -(8 * width + 10.0)                     # 8 widths from the barrier
    hi = BARRIER["width"] / 2 + 15.0 + th
    lo = x0 - 8 * width - th                     # 8 widths from the x- layer
    n = math.ceil((hi - lo) / BARRIER_DX)
    n += n % 2
    lo = hi - n * BARRIER_DX                     # still a multiple of dx
    return {
        "title": f"rectangular barrier, p0 = {p0}",
        "grid": {"x": {"min": lo, "max": hi, "points": n}, "boundary": "periodic"},
        "potential": [{"kind": "barrier", **BARRIER, "center": BARRIER_DX / 2}],
        "packet": {"kind": "gaussian", "center": x0, "width": width, "momentum": p0},
        "evolve": {"dt": 0.02, "duration": duration, "scheme": "strang"},
        "absorber": {"kind": "cap", "thickness": th},
        "record": {"every": 10.0, "snapshot_every": duration},
    }


@pytest.mark.slow
@pytest.mark.parametrize(("p0", "duration"), [
    (1.2, 170.0),      # E = 0.72 < V0: tunnelling, T ~ 0.15
    # E = 1.69 > V0: over the barrier, T ~ 0.90; q a ~ 3 pi / 4, where T
    # depends most on the width (at q a ~ pi / 2 it would hardly notice it)
    (1.84, 110.0),
])
def test_rectangular_barrier_transmission(tmp_path, p0, duration):
    width = 10.0                                 # sigma_x; sigma_p = 0.05
    job = barrier_job(p0, width, duration)
    ds = run_table(job, tmp_path)
    s = setup_of(job)
    x = s.grid.axes[0].coordinates
    c, half = BARRIER_DX / 2, BARRIER["width"] / 2
    inside = np.abs(x - c) < half
    assert np.count_nonzero(inside) * BARRIER_DX == BARRIER["width"]      # see above
    assert np.min(np.abs(np.abs(x - c) - half)) == pytest.approx(BARRIER_DX / 2, rel=1e-12)

    density = np.abs(_psi(ds)) ** 2
    dx = s.grid.axes[0].dx
    # the packet has left the barrier: the measurement is not cut through it
    assert density[np.abs(x - c) < half + 10.0].sum() * dx < 1e-6
    transmitted = _absorbed(ds, "x+") + density[x > c + half].sum() * dx
    reflected = _absorbed(ds, "x-") + density[x < c - half].sum() * dx
    expected = packet_transmission(p0, 0.5 / width, **BARRIER)
    assert 0.1 < expected < 0.95
    assert transmitted == pytest.approx(expected, abs=2e-3)
    assert transmitted + reflected == pytest.approx(1.0, abs=1e-6)


@pytest.mark.slow
def test_a_barrier_with_edges_on_grid_points_keeps_its_width(tmp_path):
    """Centred at 0, both edges fall on grid points: point samples made the
    barrier 33 cells wide and T came out +1.3e-2 off (measured, see above);
    cell-averaged edges (half cells there) give the nominal width and the
    textbook T (Griffiths problem 2.33, averaged over the packet) again."""
    job = barrier_job(1.2, 10.0, 170.0)
    job["potential"][0]["center"] = 0.0
    s = setup_of(job)
    v = s.hamiltonian.static_potential
    assert v.sum() * BARRIER_DX == pytest.approx(BARRIER["height"] * BARRIER["width"], rel=1e-12)
    ds = run_table(job, tmp_path)
    x = s.grid.axes[0].coordinates
    density = np.abs(_psi(ds)) ** 2
    transmitted = _absorbed(ds, "x+") + density[x > BARRIER["width"] / 2].sum() * BARRIER_DX
    expected = packet_transmission(1.2, 0.5 / 10.0, **BARRIER)
    assert transmitted == pytest.approx(expected, abs=2e-3)


# --- 2. the probability books: norm + absorbed = 1 ------------------------------------

BOOKS_1D = {
    "grid": {"x": {"min": -60.0, "max": 60.0, "points": 512}},
    "packet": {"kind": "gaussian", "center": 0.0, "width": 3.0, "momentum": 2.0},
    "evolve": {"dt": 0.02, "duration": 60.0},
    "absorber": {"thickness": 20.0},
    "record": {"every": 0.2, "snapshot_every": 60.0},
}
# a packet moving along the diagonal into the (x+, y+) corner of a square grid
# with absorbers on all four faces: the corner, where both layers overlap, is
# where its main part is absorbed
BOOKS_2D = {
    "grid": {"x": {"min": -40.0, "max": 40.0, "points": 128},
             "y": {"min": -40.0, "max": 40.0, "points": 128}},
    "packet": {"kind": "gaussian", "center": [5.0, 5.0], "width": [3.0, 3.0], "momentum": [1.5, 1.5]},
    "evolve": {"dt": 0.05, "duration": 45.0},
    "absorber": {"thickness": 15.0},
    "record": {"every": 0.5, "snapshot_every": 45.0},
}


@pytest.mark.parametrize("scheme", ["strang", "order4"])
@pytest.mark.parametrize("kind", ["cap", "mask"])
@pytest.mark.parametrize("case", ["1d", "2d-corner"])
def test_norm_plus_absorbed_is_one(tmp_path, case, kind, scheme):
    job = copy.deepcopy(BOOKS_1D if case == "1d" else BOOKS_2D)
    job["absorber"]["kind"] = kind
    job["evolve"]["scheme"] = scheme
    ds = run_table(job, tmp_path)
    absorbed = ds.absorbed.values                        # (time, boundary)
    total = ds.norm.values + absorbed.sum(axis=1)
    # exact bookkeeping (design.md): to rounding at every sample
    assert np.max(np.abs(total - 1.0)) < 1e-10
    assert ds.norm.values[-1] < 1e-3                     # the books were really used
    faces = list(ds.boundary.values)
    if case == "1d":
        assert faces == ["x-", "x+"]
        assert _absorbed(ds, "x+") > 0.99
    else:
        assert faces == ["x-", "x+", "y-", "y+"]
        # both faces of the corner took their share; by the x <-> y symmetry of
        # grid, packet and layers the shares are equal to rounding
        xp, yp = _absorbed(ds, "x+"), _absorbed(ds, "y+")
        assert 0.45 < xp < 0.55
        assert xp == pytest.approx(yp, rel=1e-10)
        assert _absorbed(ds, "x-") == pytest.approx(_absorbed(ds, "y-"), rel=1e-8, abs=1e-14)


def test_books_with_an_asymmetric_corner(tmp_path):
    # unequal shares, different CAP strengths per axis: the sum is still exact
    job = copy.deepcopy(BOOKS_2D)
    job["packet"]["momentum"] = [1.5, 1.3]
    job["absorber"].update(kind="cap", strength=[2.0, 0.7])
    ds = run_table(job, tmp_path)
    total = ds.norm.values + ds.absorbed.values.sum(axis=1)
    assert np.max(np.abs(total - 1.0)) < 1e-10
    assert ds.norm.values[-1] < 1e-6
    xp, yp = _absorbed(ds, "x+"), _absorbed(ds, "y+")
    assert xp > 0.6 and yp > 0.1          # measured 0.80 and 0.20


# --- 3. absorber quality with the tuned strength ---------------------------------------

# Periodic grid, CAP on both faces, strength omitted (tuned to the packet's
# energy window).  The packet runs into the x+ layer; what comes back out of it
# (reflection by the CAP's gradient) or through it (wrapped round into the x-
# layer and out of its inner edge) stays on the grid.  The free region between
# the layers is long enough that this remainder sits in it, untouched, for a
# while (t = 76 .. 112) before it reaches a layer again.
QUALITY_TH, QUALITY_P0, QUALITY_W = 20.0, 1.5, 5.0
QUALITY = {
    "grid": {"x": {"min": -20.0 - 120.0, "max": 40.0 + 20.0, "points": 800}},
    "packet": {"kind": "gaussian", "center": 0.0, "width": QUALITY_W, "momentum": QUALITY_P0},
    "evolve": {"dt": 0.05, "duration": 100.0},
    "absorber": {"kind": "cap", "thickness": QUALITY_TH},
    "record": {"every": 2.0, "snapshot_every": 100.0},
}


def _predicted_return(strength, thickness, p0, width, power):
    """The stationary return probability |r(E)|^2 of the layer (tuning module,
    itself checked against solve_ivp and finite differences in
    test_absorber_tuning) averaged over the packet's momentum density."""
    sigma = 0.5 / width
    p = np.linspace(p0 - 8 * sigma, p0 + 8 * sigma, 801)
    depth = np.linspace(0.0, thickness, 513)
    r2 = return_probability(depth, cap_profile(depth, thickness, strength, power), 1.0, p**2 / 2)
    weight = np.exp(-0.5 * ((p - p0) / sigma) ** 2)
    return float(np.trapezoid(r2 * weight, p) / np.trapezoid(weight, p))


def test_tuned_cap_returns_less_than_1e6(tmp_path):
    ds = run_table(QUALITY, tmp_path)
    resolved = tomllib.loads(ds.attrs["job"])
    strength = resolved["absorber"]["strength"]["x+"]     # written by the tuning, per face
    power = resolved["absorber"]["power"]                 # chosen by the tuning (2 or 3)
    assert isinstance(strength, float) and strength > 0
    assert power in (2.0, 3.0)
    t = ds.time.values
    plateau = ds.norm.values[(t >= 80.0) & (t <= 100.0)]
    assert plateau.size >= 10
    left = float(plateau.mean())
    assert plateau.max() / plateau.min() < 1.01           # nothing is in a layer now
    predicted = _predicted_return(strength, QUALITY_TH, QUALITY_P0, QUALITY_W, power)
    # target of the numerics notes: below 1e-6 (measured 3.4e-8 with power 2,
    # 2.4e-10 with the power 3 the tuning now picks)
    assert left < 1e-6
    # the layer on the grid behaves like the stationary model (measured ratio 0.994)
    assert left == pytest.approx(predicted, rel=0.03)


def test_tuned_strength_reproduces_the_layer():
    # the resolved job carries the strength: a job that states it builds the
    # same layer, and the tuning saw the packet's energy window
    auto = Setup(job_from_dict(copy.deepcopy(QUALITY)))   # the set-up tunes the open CAP itself
    strength = auto.job.table["absorber"]["strength"]["x+"]
    fixed = copy.deepcopy(QUALITY)
    fixed["absorber"]["strength"] = dict(auto.job.table["absorber"]["strength"])
    fixed["absorber"]["power"] = auto.job.table["absorber"]["power"]
    again = setup_of(fixed)
    np.testing.assert_allclose(again.absorber.rate, auto.absorber.rate, rtol=1e-11, atol=0)
    window = auto.cap_tuning["x+"]
    sigma = 0.5 / QUALITY_W
    # the window covers p0 -/+ 6 sigma_p (common-practice margin, numerics notes)
    assert window["e_min"] <= (QUALITY_P0 - 6 * sigma) ** 2 / 2 * (1 + 1e-12)
    assert window["e_max"] >= (QUALITY_P0 + 6 * sigma) ** 2 / 2 * (1 - 1e-12)
    # the worst case over the window bounds the packet's average
    assert window["worst_return"] >= _predicted_return(strength, QUALITY_TH, QUALITY_P0, QUALITY_W,
                                                       auto.job.table["absorber"]["power"])


# --- 4. a separable 2D problem is the product of two 1D runs -----------------------------

# H = H_x + H_y with an Eckart barrier (and, for one case, a driving field)
# along x and a harmonic + lattice potential along y; absorbers only on the x
# faces.  The Strang step of a separable H factorises exactly, as does the
# fourth-order composition of Strang steps, so the 2D run must be the outer
# product of the 1D runs to rounding; the x detector's flux integrates the
# y factor, whose norm is 1.
SEP_X = {"min": -40.0, "max": 40.0, "points": 256}
SEP_Y = {"min": -12.0, "max": 12.0, "points": 64}
SEP_EVOLVE = {"dt": 0.02, "duration": 20.0}
SEP_RECORD = {"every": 0.2, "snapshot_every": 20.0}
SEP_DETECTORS = [{"name": "after", "x": 15.0}, {"name": "on", "x": 2.0}]
SEP_PARTICLE = {"mass": 1.0, "charge": -1.0}
SEP_ABSORBER = {"kind": "cap", "thickness": 10.0, "strength": 0.5}


def _separable_jobs(scheme, field):
    x_terms = [{"kind": "eckart", "height": 0.6, "width": 1.0, "center": 2.0}]
    if field:
        x_terms.append({"kind": "field", "amplitude": 0.02, "omega": 0.3, "envelope": "sin2",
                        "duration": 20.0})
    y_terms = [{"kind": "harmonic", "omega": 0.5, "center": 0.5},
               {"kind": "lattice", "depth": 0.3, "spacing": 2.0}]
    evolve = dict(SEP_EVOLVE, scheme=scheme)
    job_2d = {
        "particle": SEP_PARTICLE, "grid": {"x": SEP_X, "y": SEP_Y},
        "potential": [dict(t, axis="x") for t in x_terms]
        + [{"kind": "harmonic", "omega": [0.0, 0.5], "center": [0.0, 0.5]},
           dict(y_terms[1], axis="y")],
        "packet": {"kind": "gaussian", "center": [-15.0, -1.0], "width": [3.0, 1.2],
                   "momentum": [1.0, 0.3]},
        "evolve": evolve, "absorber": dict(SEP_ABSORBER, faces=["x-", "x+"]),
        "record": SEP_RECORD, "detector": SEP_DETECTORS,
    }
    job_x = {
        "particle": SEP_PARTICLE, "grid": {"x": SEP_X}, "potential": x_terms,
        "packet": {"kind": "gaussian", "center": -15.0, "width": 3.0, "momentum": 1.0},
        "evolve": evolve, "absorber": SEP_ABSORBER, "record": SEP_RECORD,
        "detector": SEP_DETECTORS,
    }
    job_y = {       # the y factor on a 1D grid (its axis is called x there)
        "particle": SEP_PARTICLE, "grid": {"x": SEP_Y}, "potential": y_terms,
        "packet": {"kind": "gaussian", "center": -1.0, "width": 1.2, "momentum": 0.3},
        "evolve": evolve, "record": SEP_RECORD,
    }
    return job_2d, job_x, job_y


@pytest.mark.parametrize(("scheme", "field"), [("strang", False), ("order4", True)])
def test_separable_2d_is_the_product_of_1d_runs(tmp_path, scheme, field):
    job_2d, job_x, job_y = _separable_jobs(scheme, field)
    d2 = run_table(job_2d, tmp_path / "2d")
    dx_ = run_table(job_x, tmp_path / "x")
    dy_ = run_table(job_y, tmp_path / "y")
    psi_2d = _psi(d2)
    product = np.multiply.outer(_psi(dx_), _psi(dy_))
    assert psi_2d.shape == (256, 64)
    scale = np.max(np.abs(psi_2d))
    assert np.max(np.abs(psi_2d - product)) < 1e-8 * scale
    # something happened along both axes: part of the x packet crossed the
    # barrier and reached the far detector, the y packet moved in its well
    assert np.max(dx_.flux.sel(detector="after").values) > 1e-3
    assert abs(dy_.x_mean.values[-1] - dy_.x_mean.values[0]) > 0.1
    # x flux through the 2D line = 1D x flux times the y norm (= 1)
    np.testing.assert_allclose(dy_.norm.values, 1.0, atol=1e-12)
    f2, f1 = d2.flux.values, dx_.flux.values
    assert np.max(np.abs(f1)) > 1e-3
    assert np.max(np.abs(f2 - f1)) < 1e-8 * np.max(np.abs(f1))
    # and the books agree: absorbed per x face, and the norm
    np.testing.assert_allclose(d2.absorbed.values, dx_.absorbed.values, rtol=1e-8, atol=1e-15)
    np.testing.assert_allclose(d2.norm.values, dx_.norm.values, rtol=1e-10)


@pytest.mark.parametrize("scheme", ["strang", "order4", "order4_suzuki"])
@pytest.mark.parametrize("mask_exponent", [0.125, 1.0])
def test_mask_with_negative_substeps_stays_bounded(tmp_path, scheme, mask_exponent):
    """The fourth-order compositions have a negative sub-step; an absorber
    kicked inside the composition would be multiplied by exp(+|tau| W) there
    (the norm reached 1e263 with a strong mask).  The absorber acts once per
    whole step, so the norm only falls and all of it is booked."""
    table = {
        "grid": {"x": {"min": -60.0, "max": 60.0, "points": 512}},
        "packet": {"center": 0.0, "width": 3.0, "momentum": 2.0},
        "evolve": {"dt": 0.05, "duration": 40.0, "scheme": scheme},
        "absorber": {"kind": "mask", "thickness": 15.0, "mask_exponent": mask_exponent},
        "record": {"every": 1.0},
    }
    ds = run_table(table, tmp_path)
    norm = ds.norm.values
    assert np.all(np.diff(norm) <= 1e-13)
    assert norm[-1] < 1e-4                       # the packet has gone into the layers
    total = ds.norm + ds.absorbed.sum("boundary")
    assert float(abs(total - 1).max()) < 1e-10


def test_cap_is_tuned_for_the_energy_arriving_at_each_face(tmp_path):
    """A packet (p0 = 1, E = 0.5) runs down a 2-hartree step towards x+: it
    reaches that layer with E + 2.  Tuned for the energies at the start, the
    layer sent back 9.4e-4 (review measurement); tuned per face for E - V in
    the layer, the x+ layer is much stronger than the x- one, and what comes
    back between the step and the layer is small and falling (measured 7e-4,
    2e-5, 1.2e-6 at t = 110, 130, 150 as the slow tail drains)."""
    table = {
        # 1024 points: dx = 0.2 resolves |p| <= 16 against 2.3 at most here, and
        # 5 points grade the step; the values above were measured again on this
        # grid (7.1e-4, 2.2e-5, 1.2e-6; 2048 points gave the same to 1 %, at 5x
        # the cost: the box axis's sine transform of 2048 points has a factor 683)
        "grid": {"x": {"min": -100.0, "max": 100.0, "points": 1024}, "boundary": "box"},
        "potential": [{"kind": "step", "height": -2.0, "smoothing": 1.0, "position": 20.0}],
        "packet": {"center": -30.0, "width": 4.0, "momentum": 1.0},
        "evolve": {"dt": 0.01, "duration": 150.0},
        "absorber": {"kind": "cap", "thickness": 25.0},
        "record": {"every": 1.0, "snapshot_every": 10.0},
    }
    ds = run_table(table, tmp_path)
    strength = tomllib.loads(ds.attrs["job"])["absorber"]["strength"]
    assert strength["x+"] > 4 * strength["x-"]
    x = ds.x.values
    between = (x > 25) & (x < 70)
    left = [float(ds.density.sel(snapshot_time=t).values[between].sum()) * (x[1] - x[0])
            for t in (130.0, 150.0)]
    assert left[1] < left[0] and left[1] < 1e-5
    assert float(ds.absorbed.sel(boundary="x+").isel(time=-1)) > 0.99
