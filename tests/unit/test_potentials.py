"""Potential kinds: each named kind against its closed form on a small grid.

The closed forms are written here from their sources (named beside each);
the library must reproduce them.  Several kinds are checked in a job written
in nm / meV / fs with the formula evaluated in SI units from CODATA
(:mod:`scipy.constants`), so that a unit slip in a parameter cannot hide.
Expression terms are checked for their unit contract (x in the job's length
unit, t in its time unit, the value in its energy unit) and for refusing
anything that is not arithmetic; file terms for a round trip through netCDF
written with xarray.
"""
from __future__ import annotations

import copy
import math

import numpy as np
import pytest
import scipy.constants as sc
import xarray as xr

from conftest import setup_of
from wavesweep.errors import JobError
from wavesweep.potentials import REGISTRY

PC = sc.physical_constants
BOHR_M = PC["Bohr radius"][0]
HARTREE_J = PC["Hartree energy"][0]
AU_TIME_S = PC["atomic unit of time"][0]
NM = 1e-9 / BOHR_M                      # bohr per nm
MEV = 1e-3 * sc.eV / HARTREE_J          # hartree per meV
FS = 1e-15 / AU_TIME_S                  # atomic time units per fs
NM_UNITS = {"length": "nm", "energy": "meV", "time": "fs"}

GRID_1D = {"x": {"min": -10.0, "max": 10.0, "points": 64}}
GRID_2D = {"x": {"min": -10.0, "max": 10.0, "points": 64},
           "y": {"min": -8.0, "max": 8.0, "points": 16}}


def _job(potentials, grid=None, units=None, particle=None):
    grid = copy.deepcopy(grid or GRID_1D)
    ndim = sum(a in grid for a in "xyz")
    job = {
        "grid": grid,
        "potential": copy.deepcopy(potentials),
        "packet": {"kind": "gaussian", "center": [0.5] * ndim, "width": [1.2] * ndim,
                   "momentum": [0.0] * ndim},
        "evolve": {"dt": 0.01, "duration": 0.1},
    }
    if units:
        job["units"] = dict(units)
    if particle:
        job["particle"] = dict(particle)
    return job


def static(potentials, grid=None, units=None, particle=None):
    """(setup, coordinates in the job's length unit by axis, V in hartree)."""
    s = setup_of(_job(potentials, grid, units, particle))
    lf = NM if units else 1.0
    coords = {name: c / lf for name, c in s.grid.mesh().items()}
    return s, coords, s.hamiltonian.static_potential


def assert_close(actual, expected, rtol=1e-12):
    expected = np.broadcast_to(expected, np.shape(actual))
    scale = max(float(np.max(np.abs(expected))), 1e-300)
    assert np.max(np.abs(actual - expected)) <= rtol * scale, \
        f"max deviation {np.max(np.abs(actual - expected)):.3e} of scale {scale:.3e}"


def test_every_named_kind_is_covered_here():
    # the list of the job-file contract (design.md) plus the ones this file checks
    tested = {"free", "step", "barrier", "double_barrier", "gaussian", "eckart", "harmonic",
              "morse", "double_well", "soft_coulomb", "coulomb", "lattice", "slits", "field",
              "expression", "file", "gravity"}
    assert tested <= set(REGISTRY), tested - set(REGISTRY)
    assert set(REGISTRY) <= tested, f"untested kinds: {set(REGISTRY) - tested}"


# --- piecewise constant kinds: the value at each grid point ---------------------------

def test_free():
    _, _, v = static([{"kind": "free"}])
    assert v.shape == (64,) and np.all(v == 0.0)


def test_step_sharp_and_smooth():
    # Heaviside step; smoothed form (1 + tanh(s / l)) / 2 (common practice)
    # sharp: the step's indicator averaged over each grid cell [x - dx/2, x + dx/2]
    s, c, v = static([{"kind": "step", "height": 0.7, "position": 1.1}])
    x, dx = c["x"], s.grid.axes[0].dx
    assert_close(v, 0.7 * np.clip((x + dx / 2 - 1.1) / dx, 0.0, 1.0))
    assert 0.0 < v[np.argmin(np.abs(x - 1.1))] < 0.7          # the cell holding the edge is split
    assert_close(v[np.abs(x - 1.1) > dx], np.where(x >= 1.1, 0.7, 0.0)[np.abs(x - 1.1) > dx])
    _, c, v = static([{"kind": "step", "height": -0.4, "position": 0.3, "smoothing": 0.8}])
    assert_close(v, -0.4 * 0.5 * (1 + np.tanh((c["x"] - 0.3) / 0.8)))


def test_barrier_is_height_inside_the_open_interval():
    # rectangular barrier V0 for |x - c| < w/2 (Griffiths, problem 2.33; from memory).
    # dx = 20/64 = 0.3125; c = 0.15625 = dx/2 and w = 8 dx put both edges
    # midway between grid points: exactly 8 points inside.
    s, c, v = static([{"kind": "barrier", "height": 1.3, "width": 2.5, "center": 0.15625}])
    x = c["x"]
    assert_close(v, np.where(np.abs(x - 0.15625) < 1.25, 1.3, 0.0))
    assert np.count_nonzero(v) * s.grid.axes[0].dx == pytest.approx(2.5, rel=1e-12)
    # a well (negative height) and the smoothed edges (product of two tanh steps)
    _, c, v = static([{"kind": "barrier", "height": -0.5, "width": 3.0, "smoothing": 0.4}])
    x = c["x"]
    want = -0.5 * 0.25 * (1 + np.tanh((x + 1.5) / 0.4)) * (1 + np.tanh((1.5 - x) / 0.4))
    assert_close(v, want)


def test_double_barrier():
    # two barriers of width w, inner edges gap/2 from the centre
    _, c, v = static([{"kind": "double_barrier", "height": 0.9, "width": 1.5, "gap": 2.2,
                       "center": 0.4}])
    d = np.abs(c["x"] - 0.4)
    # away from the edges: V0 inside, 0 outside; in all: the area is 2 w V0 exactly
    s, _, _ = static([{"kind": "double_barrier", "height": 0.9, "width": 1.5, "gap": 2.2,
                       "center": 0.4}])
    dx = s.grid.axes[0].dx
    far = (np.abs(d - 1.1) > dx) & (np.abs(d - 2.6) > dx)
    assert_close(v[far], np.where((d > 1.1) & (d < 2.6), 0.9, 0.0)[far])
    assert v.sum() * dx == pytest.approx(2 * 1.5 * 0.9, rel=1e-12)


def test_slits_in_2d():
    # a wall |x - x_w| < t/2 with openings |y - y_k| < a/2
    _, c, v = static([{"kind": "slits", "height": 5.0, "position": 1.0, "thickness": 1.4,
                       "openings": [-3.0, 2.5], "opening_width": 2.0}], GRID_2D)
    x, y = c["x"], c["y"]
    wall = np.abs(x - 1.0) < 0.7
    hole = (np.abs(y + 3.0) < 1.0) | (np.abs(y - 2.5) < 1.0)
    assert_close(v, np.where(wall & ~hole, 5.0, 0.0))
    assert v.shape == (64, 16) and 0 < np.count_nonzero(v) < 64 * 16


def test_slits_need_two_dimensions():
    with pytest.raises(JobError) as info:
        static([{"kind": "slits", "height": 5.0, "thickness": 1.0, "openings": [0.0],
                 "opening_width": 1.0}])
    assert info.value.field == "potential.0.kind"


# --- smooth kinds in atomic units -------------------------------------------------

def test_gaussian_1d_and_2d():
    # height exp(-|r - c|^2 / (2 w^2)), w a standard deviation
    _, c, v = static([{"kind": "gaussian", "height": 0.6, "width": 1.7, "center": -0.8}])
    assert_close(v, 0.6 * np.exp(-((c["x"] + 0.8) ** 2) / (2 * 1.7**2)))
    _, c, v = static([{"kind": "gaussian", "height": -0.3, "width": [1.2, 2.5],
                       "center": [0.5, -1.0]}], GRID_2D)
    want = -0.3 * np.exp(-((c["x"] - 0.5) ** 2) / (2 * 1.2**2) - ((c["y"] + 1.0) ** 2) / (2 * 2.5**2))
    assert_close(v, want)


def test_eckart():
    # symmetric Eckart barrier V0 / cosh^2((x - c)/a) (C. Eckart, Phys. Rev. 35,
    # 1303 (1930); from memory); along y in 2D it does not depend on x
    _, c, v = static([{"kind": "eckart", "height": 0.45, "width": 1.3, "center": 0.7}])
    assert_close(v, 0.45 / np.cosh((c["x"] - 0.7) / 1.3) ** 2)
    _, c, v = static([{"kind": "eckart", "height": 0.45, "width": 1.3, "axis": "y"}], GRID_2D)
    assert_close(v, np.broadcast_to(0.45 / np.cosh(c["y"] / 1.3) ** 2, (64, 16)))


def test_double_well():
    # quartic double well h ((x - c)^2 / a^2 - 1)^2, minima at c +/- a, h at c
    _, c, v = static([{"kind": "double_well", "height": 0.2, "separation": 6.0, "center": 0.5}])
    assert_close(v, 0.2 * (((c["x"] - 0.5) / 3.0) ** 2 - 1) ** 2)


def test_lattice():
    # optical lattice V0 sin^2(pi (x - x0) / d) (e.g. Morsch & Oberthaler,
    # Rev. Mod. Phys. 78, 179 (2006), with d the period; from memory)
    _, c, v = static([{"kind": "lattice", "depth": 0.35, "spacing": 2.2, "origin": 0.3}])
    assert_close(v, 0.35 * np.sin(np.pi * (c["x"] - 0.3) / 2.2) ** 2)
    _, c, v = static([{"kind": "lattice", "depth": 0.35, "spacing": 2.2, "axis": "y"}], GRID_2D)
    assert_close(v, np.broadcast_to(0.35 * np.sin(np.pi * c["y"] / 2.2) ** 2, (64, 16)))


def test_coulomb_cartesian_and_radial():
    # -Z / |r - c| in hartree (atomic units)
    grid = {"x": {"min": -10.0, "max": 10.0, "points": 64}, "y": {"min": -8.0, "max": 8.0, "points": 16}}
    _, c, v = static([{"kind": "coulomb", "charge": 2.0, "center": [0.1, 0.2]}], grid)
    assert_close(v, -2.0 / np.hypot(c["x"] - 0.1, c["y"] - 0.2))
    # radial grid: -Z / r on the interior points of (0, r_max)
    job = _job([{"kind": "coulomb", "charge": 1.0}], {"r": {"max": 20.0, "points": 99}})
    job["packet"] = {"kind": "gaussian", "center": 8.0, "width": 1.0, "momentum": 0.0}
    s = setup_of(job)
    r = s.grid.axes[0].coordinates
    assert r[0] == pytest.approx(0.2) and r[-1] == pytest.approx(19.8)
    assert_close(s.hamiltonian.static_potential, -1.0 / r)


def test_coulomb_on_a_grid_point_is_an_error():
    # x = 0 is a grid point of GRID_1D (-10 + 32 dx): the singularity is refused
    with pytest.raises(JobError) as info:
        static([{"kind": "coulomb"}])
    assert info.value.field == "potential.0.center"


def test_morse_and_its_far_wall_stays_finite():
    # Morse: D (1 - exp(-a (x - c)))^2, zero at the minimum, D far out
    # (P. M. Morse, Phys. Rev. 34, 57 (1929); from memory)
    _, c, v = static([{"kind": "morse", "depth": 0.17, "stiffness": 1.02, "center": 1.4}])
    assert_close(v, 0.17 * (1 - np.exp(-1.02 * (c["x"] - 1.4))) ** 2)
    # a wide grid reaches far into the repulsive wall: exp(2 a |x|) would be
    # inf there (exp overflows past 709) and turn psi into NaN
    wide = {"x": {"min": -400.0, "max": 20.0, "points": 2100}}
    _, c, v = static([{"kind": "morse", "depth": 0.17, "stiffness": 1.0}], wide)
    assert np.all(np.isfinite(v))
    assert v.min() >= 0.0 and v[0] > 1e15 * 0.17
    inner = c["x"] > -15.0           # the closed form where it is not capped
    assert_close(v[inner], 0.17 * (1 - np.exp(-c["x"][inner])) ** 2)


# --- kinds in job units: the closed form in SI from CODATA ---------------------------

def _si_energy_to_mev(joules):
    return joules / (1e-3 * sc.eV)


def test_harmonic_in_job_units():
    # V = m omega^2 x^2 / 2 in SI, with m = 0.067 m_e and omega in rad/fs
    m, omega = 0.067, [0.8, 0.5]
    grid = {"x": {"min": -10.0, "max": 10.0, "points": 64}, "y": {"min": -8.0, "max": 8.0, "points": 16}}
    _, c, v = static([{"kind": "harmonic", "omega": omega, "center": [1.0, -0.5]}], grid,
                     NM_UNITS, {"mass": m})
    want_j = 0.5 * m * sc.m_e * ((omega[0] * 1e15 * (c["x"] - 1.0) * 1e-9) ** 2
                                 + (omega[1] * 1e15 * (c["y"] + 0.5) * 1e-9) ** 2)
    assert_close(v / MEV, _si_energy_to_mev(want_j), rtol=1e-10)


def test_harmonic_ground_state_energy_in_job_units():
    # the lowest eigenvalue of the discretised H is hbar omega / 2 (textbook
    # oscillator); reference: scipy.linalg.eigh of the Fourier-grid Hamiltonian
    # (kinetic matrix from the DFT of k^2 / 2m), hbar omega in meV from CODATA
    import scipy.linalg

    m, omega = 0.067, 0.3                          # m_e, rad/fs
    grid = {"x": {"min": -40.0, "max": 40.0, "points": 128}}
    s, _, v = static([{"kind": "harmonic", "omega": omega}], grid, NM_UNITS, {"mass": m})
    n = s.grid.axes[0].points
    dft = np.fft.fft(np.eye(n), axis=0)
    kin = np.conj(dft.T) @ (s.grid.kinetic_energy(s.mass)[:, None] * dft) / n
    e0 = scipy.linalg.eigh(kin + np.diag(v), eigvals_only=True)[0]
    hbar_omega_mev = _si_energy_to_mev(sc.hbar * omega * 1e15)
    assert e0 / MEV == pytest.approx(0.5 * hbar_omega_mev, rel=1e-9)


def test_morse_and_gaussian_in_job_units():
    # stiffness in 1/nm, depth and height in meV
    _, c, v = static([{"kind": "morse", "depth": 80.0, "stiffness": 0.4, "center": 1.0},
                      {"kind": "gaussian", "height": 25.0, "width": 2.0, "center": -3.0}],
                     None, NM_UNITS)
    want = 80.0 * (1 - np.exp(-0.4 * (c["x"] - 1.0))) ** 2 + 25.0 * np.exp(-((c["x"] + 3) ** 2) / 8.0)
    assert_close(v / MEV, want, rtol=1e-10)


def test_soft_coulomb_and_coulomb_in_job_units():
    # -Z e^2 / (4 pi eps0 sqrt(r^2 + a^2)) in SI (Javanainen, Eberly & Su,
    # Phys. Rev. A 38, 3430 (1988) for the soft-core form; from memory)
    _, c, v = static([{"kind": "soft_coulomb", "charge": 1.0, "softening": 0.05, "center": 0.1}],
                     None, NM_UNITS)
    r_m = np.sqrt((c["x"] - 0.1) ** 2 + 0.05**2) * 1e-9
    want = _si_energy_to_mev(-sc.e**2 / (4 * np.pi * sc.epsilon_0 * r_m))
    assert_close(v / MEV, want, rtol=1e-9)
    # 1 / 1 nm of a unit charge is 1.44 eV (e^2 / 4 pi eps0 = 1.44 eV nm; from memory)
    _, c, v = static([{"kind": "coulomb", "charge": 3.0, "center": 0.1}], None, NM_UNITS)
    want = _si_energy_to_mev(-3.0 * sc.e**2 / (4 * np.pi * sc.epsilon_0 * np.abs(c["x"] - 0.1) * 1e-9))
    assert_close(v / MEV, want, rtol=1e-9)
    # V r is the constant -Z e^2 / (4 pi eps0) = -Z 1439.96 meV nm (from memory)
    vr = v / MEV * np.abs(c["x"] - 0.1)
    assert vr.min() == pytest.approx(-3 * 1439.96, rel=1e-5)
    assert vr.max() == pytest.approx(-3 * 1439.96, rel=1e-5)


def test_barrier_and_lattice_in_job_units():
    _, c, v = static([{"kind": "barrier", "height": 150.0, "width": 5.0, "center": 0.1},
                      {"kind": "lattice", "depth": 10.0, "spacing": 1.5}], None, NM_UNITS)
    x = c["x"]
    s, _, _ = static([{"kind": "barrier", "height": 150.0, "width": 5.0, "center": 0.1}], None, NM_UNITS)
    dx = s.grid.axes[0].dx / NM
    cell = np.clip((np.minimum(x + dx / 2, 2.6) - np.maximum(x - dx / 2, -2.4)) / dx, 0.0, 1.0)
    want = 150.0 * cell + 10.0 * np.sin(np.pi * x / 1.5) ** 2
    assert_close(v / MEV, want, rtol=1e-11)


# --- the driving field: V(x, t) = -q E(t) x -----------------------------------------

def _dynamic(s, t_au):
    return s.hamiltonian.potential(t_au) - s.hamiltonian.static_potential


def test_field_sin2_in_job_units():
    # length gauge -q E(t) x (e.g. Bransden & Joachain, ch. on atoms in fields;
    # from memory); E(t) = E0 sin^2(pi t / T) cos(omega t + phi) for 0 <= t <= T.
    # amplitude in meV / (e nm): -q E x with q = -1 e is E0 x meV at x nm.
    term = {"kind": "field", "amplitude": 2.0, "omega": 0.9, "phase": 0.3,
            "envelope": "sin2", "duration": 40.0}
    s, c, v = static([term], None, NM_UNITS, {"mass": 0.067, "charge": -1.0})
    assert np.all(v == 0.0)                           # nothing static
    assert s.hamiltonian.time_dependent
    for t_fs in (7.3, 20.0, 33.1):
        e_t = 2.0 * math.sin(math.pi * t_fs / 40.0) ** 2 * math.cos(0.9 * t_fs + 0.3)
        got = _dynamic(s, t_fs * FS) / MEV
        assert_close(got, np.broadcast_to(e_t * c["x"], got.shape), rtol=1e-10)
    for t_fs in (0.0, 45.0):                         # before and after the pulse
        assert np.all(_dynamic(s, t_fs * FS) == 0.0)


@pytest.mark.parametrize(("envelope", "extra", "shape"), [
    ("constant", {}, lambda t: 1.0),
    ("constant", {"duration": 30.0}, lambda t: 1.0 if t <= 30.0 else 0.0),
    ("trapezoid", {"duration": 30.0, "ramp": 5.0}, lambda t: max(0.0, min(1.0, t / 5.0, (30.0 - t) / 5.0))),
    # gaussian: intensity E^2 has FWHM f, so E ~ exp(-2 ln 2 ((t - t_p)/f)^2)
    ("gaussian", {"fwhm": 8.0, "peak": 15.0}, lambda t: math.exp(-2 * math.log(2) * ((t - 15.0) / 8.0) ** 2)),
])
def test_field_envelopes_atomic_units(envelope, extra, shape):
    term = {"kind": "field", "amplitude": 0.05, "omega": 0.2, "envelope": envelope, **extra}
    s, c, _ = static([term], None, None, {"charge": 2.0})
    for t in (0.0, 2.5, 15.0, 28.0, 31.0):
        want = -2.0 * 0.05 * shape(t) * math.cos(0.2 * t) * c["x"]
        got = _dynamic(s, t)
        np.testing.assert_allclose(got, np.broadcast_to(want, got.shape), rtol=1e-12, atol=1e-15)
    if envelope == "gaussian":
        # half the peak intensity at t_p +/- f/2 (definition of the FWHM)
        e_half = shape(15.0 + 4.0) ** 2
        assert e_half == pytest.approx(0.5, rel=1e-12)


def test_field_needs_a_charge():
    with pytest.raises(JobError) as info:
        static([{"kind": "field", "amplitude": 0.05, "omega": 0.0, "envelope": "constant"}])
    assert info.value.field == "particle.charge"


# --- gravity: V = m g s along the vertical axis ----------------------------------------
# A cold-atom unit set (um, ms, Da; energy derived as Da um^2 / ms^2) and Rb-87,
# 86.909180527 u (atomic mass evaluation; from memory).  V = m g s in SI from
# CODATA (scipy.constants: atomic_mass, g = 9.80665 m s^-2, standard gravity).
COLD_UNITS = {"length": "um", "time": "ms", "mass": "Da"}
RB87_U = 86.909180527
DA_UM2_PER_MS2_J = sc.atomic_mass * 1e-12 / 1e-6     # the derived energy unit in J
GRID_BOX_1D = {"x": {"min": -10.0, "max": 10.0, "points": 64}, "boundary": "box"}


def _gravity_v(potentials, grid, **kw):
    """(coordinates in um by axis, V in J) of a cold-atom job."""
    s = setup_of(_job(potentials, grid, COLD_UNITS, {"mass": RB87_U}))
    um = 1e-6 / BOHR_M
    coords = {name: c / um for name, c in s.grid.mesh().items()}
    return coords, s.hamiltonian.static_potential * HARTREE_J


def test_gravity_default_is_standard_gravity_along_the_last_axis():
    # 1D: along x; the default acceleration is scipy.constants.g (9.80665 m/s^2)
    c, v = _gravity_v([{"kind": "gravity"}], GRID_BOX_1D)
    m_kg = RB87_U * sc.atomic_mass
    assert sc.g == 9.80665                               # standard gravity (CGPM 1901; from memory)
    assert_close(v, m_kg * sc.g * c["x"] * 1e-6, rtol=1e-11)
    # in the job's units V = m g x with g = 9.80665 um/ms^2 (m/s^2 = 1e6 um / 1e6 ms^2)
    assert_close(v / DA_UM2_PER_MS2_J, RB87_U * 9.80665 * c["x"], rtol=1e-11)
    # 2D: along y, constant along x; 3D: along z
    grid_2d = {**GRID_2D, "boundary": "box"}
    c, v = _gravity_v([{"kind": "gravity"}], grid_2d)
    assert v.shape == (1, 16) or v.shape == (64, 16)
    assert_close(np.broadcast_to(v, (64, 16)), np.broadcast_to(m_kg * sc.g * c["y"] * 1e-6, (64, 16)),
                 rtol=1e-11)
    grid_3d = {**grid_2d, "z": {"min": -8.0, "max": 9.0, "points": 24}}
    c, v = _gravity_v([{"kind": "gravity"}], grid_3d)
    assert_close(np.broadcast_to(v, (64, 16, 24)),
                 np.broadcast_to(m_kg * sc.g * c["z"] * 1e-6, (64, 16, 24)), rtol=1e-11)


def test_gravity_acceleration_in_job_units_a_string_and_negative():
    m_kg = RB87_U * sc.atomic_mass
    grid_2d = {**GRID_2D, "boundary": "box"}
    # a number is in [units] length/time^2: 2.5 um/ms^2 = 2.5 m/s^2
    c, v = _gravity_v([{"kind": "gravity", "acceleration": 2.5, "axis": "x"}], grid_2d)
    assert_close(np.broadcast_to(v, (64, 16)), np.broadcast_to(m_kg * 2.5 * c["x"] * 1e-6, (64, 16)),
                 rtol=1e-11)
    # a string with its own unit; negative pulls toward +s
    c, v = _gravity_v([{"kind": "gravity", "acceleration": "-162 cm/s^2"}], GRID_BOX_1D)
    assert_close(v, m_kg * -1.62 * c["x"] * 1e-6, rtol=1e-11)
    # the force is -m g on the vertical axis (hartree/bohr), 0 on the others
    s = setup_of(_job([{"kind": "gravity", "acceleration": 2.5}], grid_2d, COLD_UNITS, {"mass": RB87_U}))
    newton = HARTREE_J / BOHR_M
    np.testing.assert_allclose(s.terms[0].force() * newton, [0.0, -m_kg * 2.5], rtol=1e-11, atol=0)


def test_acceleration_kind_against_codata():
    # m/s^2 in atomic units: a_0 / t_au^2 (CODATA, scipy.constants)
    from wavesweep.units import UnitSet, quantity_to_atomic

    au = BOHR_M / AU_TIME_S**2
    cold = UnitSet.from_table(COLD_UNITS)
    assert cold.factor("acceleration") == pytest.approx(1e-6 / 1e-6 / au, rel=1e-12)
    assert quantity_to_atomic("9.80665 m/s^2", "acceleration") == pytest.approx(sc.g / au, rel=1e-12)
    assert quantity_to_atomic("981 cm s^-2", "acceleration") == pytest.approx(9.81 / au, rel=1e-12)
    with pytest.raises(JobError, match="'9.8 m/s' is not an acceleration"):
        quantity_to_atomic("9.8 m/s", "acceleration")


@pytest.mark.parametrize(("grid", "extra", "field", "piece"), [
    ({"x": {"min": -10.0, "max": 10.0, "points": 64}, "boundary": "periodic"}, {}, "grid.x.boundary", "box"),
    ({**GRID_2D, "boundary": "periodic", "y": {**GRID_2D["y"], "boundary": "box"}}, {"axis": "x"},
     "grid.x.boundary", "box"),
    (GRID_BOX_1D, {"axis": "z"}, "potential.0.axis", "not an axis"),
])
def test_gravity_refusals(grid, extra, field, piece):
    with pytest.raises(JobError) as info:
        setup_of(_job([{"kind": "gravity", **extra}], grid, COLD_UNITS, {"mass": RB87_U}))
    assert info.value.field == field and piece in info.value.message


def test_gravity_along_a_box_axis_of_a_mixed_grid():
    # x periodic, y box: gravity along y is fine
    grid = {**GRID_2D, "boundary": "periodic", "y": {**GRID_2D["y"], "boundary": "box"}}
    c, v = _gravity_v([{"kind": "gravity"}], grid)
    m_kg = RB87_U * sc.atomic_mass
    assert_close(np.broadcast_to(v, (64, 16)), np.broadcast_to(m_kg * sc.g * c["y"] * 1e-6, (64, 16)),
                 rtol=1e-11)


# --- expressions: job units and safety -------------------------------------------------

def test_expression_in_job_units():
    # x in nm, parameters as written (meV, nm), the value read as meV
    term = {"kind": "expression", "expression": "V1 * exp(-((x - x1) / w)**2) + F * x",
            "params": {"V1": 40.0, "x1": 1.5, "w": "20 angstrom", "F": -0.5}}
    _, c, v = static([term], None, NM_UNITS)
    x = c["x"]
    want = 40.0 * np.exp(-((x - 1.5) / 2.0) ** 2) - 0.5 * x
    assert_close(v / MEV, want, rtol=1e-11)


def test_expression_in_atomic_units_equals_the_library_kind():
    _, _, v_expr = static([{"kind": "expression", "expression": "h / cosh((x - c) / a)**2",
                            "params": {"h": 0.45, "c": 0.7, "a": 1.3}}])
    _, _, v_lib = static([{"kind": "eckart", "height": 0.45, "width": 1.3, "center": 0.7}])
    assert_close(v_expr, v_lib, rtol=1e-14)


def test_time_dependent_expression_in_job_units():
    # t in fs, omega in rad/fs: V = A x cos(omega t) meV with x in nm
    term = {"kind": "expression", "expression": "A * x * cos(w0 * t) + B * y",
            "params": {"A": 3.0, "w0": 0.25, "B": 1.0}}
    grid = {"x": {"min": -10.0, "max": 10.0, "points": 64}, "y": {"min": -8.0, "max": 8.0, "points": 16}}
    s, c, v = static([term], grid, NM_UNITS)
    assert s.hamiltonian.time_dependent
    for t_fs in (0.0, 3.0, 11.0):
        got = s.hamiltonian.potential(t_fs * FS) / MEV
        want = 3.0 * c["x"] * math.cos(0.25 * t_fs) + 1.0 * c["y"]
        assert_close(got, np.broadcast_to(want, got.shape), rtol=1e-11)


def test_time_unit_derived_from_the_energy_unit():
    # without a time unit, t counts hbar / meV (design.md)
    term = {"kind": "expression", "expression": "cos(t) * x", "params": {}}
    units = {"length": "nm", "energy": "meV"}
    s, c, _ = static([term], None, units)
    hbar_over_mev_au = (sc.hbar / (1e-3 * sc.eV)) / AU_TIME_S
    got = s.hamiltonian.potential(2.0 * hbar_over_mev_au) / MEV
    assert_close(got, math.cos(2.0) * c["x"], rtol=1e-11)


@pytest.mark.parametrize("text", [
    "__import__('os').system('echo owned')",
    "__import__",
    "x.real",
    "(1).__class__",
    "exp.__globals__",
    "x.__class__.__bases__[0].__subclasses__()",
    "np.exp(x)",
    "[c for c in ()]",
    "(lambda: 1)()",
])
def test_expression_refuses_code(text):
    with pytest.raises(JobError) as info:
        static([{"kind": "expression", "expression": text}])
    assert info.value.field == "potential.0.expression", str(info.value)


def test_expression_error_when_not_finite():
    with pytest.raises(JobError) as info:
        static([{"kind": "expression", "expression": "1 / (x - x)"}])
    assert info.value.field == "potential.0.expression"


# --- file: a round trip through netCDF -------------------------------------------------

def test_file_round_trip_on_the_same_grid(tmp_path):
    # write V on the grid's own points with xarray; reading it back must give
    # the same numbers
    s0, c, _ = static([{"kind": "free"}], GRID_2D)
    rng = np.random.default_rng(7)
    v = rng.normal(size=s0.grid.shape)
    ds = xr.Dataset({"potential": (("x", "y"), v, {"units": "hartree"})},
                    coords={"x": ("x", s0.grid.axes[0].coordinates, {"units": "bohr"}),
                            "y": ("y", s0.grid.axes[1].coordinates, {"units": "bohr"})})
    path = tmp_path / "v.nc"
    ds.to_netcdf(path)
    _, _, got = static([{"kind": "file", "path": str(path)}], GRID_2D)
    assert_close(got, v, rtol=1e-13)


def test_file_with_its_own_units_and_a_finer_grid(tmp_path):
    # a linear function in nm / meV on a finer, wider grid: linear
    # interpolation is exact for it; the job is in atomic units
    xf = np.linspace(-1.2, 1.2, 241)                 # nm (the grid spans +/- 10 bohr = 0.53 nm)
    vf = 2.0 + 30.0 * xf                             # meV
    path = tmp_path / "v.nc"
    xr.Dataset({"V": (("x",), vf, {"units": "meV"})},
               coords={"x": ("x", xf, {"units": "nm"})}).to_netcdf(path)
    _, c, got = static([{"kind": "file", "path": str(path), "variable": "V"}])
    want = (2.0 + 30.0 * c["x"] / NM) * MEV
    assert_close(got, want, rtol=1e-11)


def test_file_without_units_is_in_job_units(tmp_path):
    xf = np.linspace(-12.0, 12.0, 97)                # nm
    path = tmp_path / "v.nc"
    xr.Dataset({"potential": (("x",), 5.0 - 0.5 * xf)}, coords={"x": xf}).to_netcdf(path)
    _, c, got = static([{"kind": "file", "path": str(path)}], None, NM_UNITS)
    assert_close(got / MEV, 5.0 - 0.5 * c["x"], rtol=1e-11)


def test_file_errors_name_the_field(tmp_path):
    with pytest.raises(JobError) as info:
        static([{"kind": "file", "path": str(tmp_path / "missing.nc")}])
    assert info.value.field == "potential.0.path"
    path = tmp_path / "short.nc"
    xf = np.linspace(-3.0, 3.0, 13)                  # does not cover +/- 10 bohr
    xr.Dataset({"potential": (("x",), xf)}, coords={"x": xf}).to_netcdf(path)
    with pytest.raises(JobError) as info:
        static([{"kind": "file", "path": str(path)}])
    assert info.value.field == "potential.0.path"
    with pytest.raises(JobError) as info:
        static([{"kind": "file", "path": str(path), "variable": "V"}])
    assert info.value.field == "potential.0.variable"


def test_terms_add_up():
    # several [[potential]] tables are summed (design.md)
    s, c, v = static([{"kind": "gaussian", "height": 0.6, "width": 1.7},
                      {"kind": "lattice", "depth": 0.35, "spacing": 2.2},
                      {"kind": "step", "height": 0.2, "position": 3.0}])
    x, dx = c["x"], s.grid.axes[0].dx
    step = 0.2 * np.clip((x + dx / 2 - 3.0) / dx, 0.0, 1.0)     # cell-averaged edge
    want = 0.6 * np.exp(-(x**2) / (2 * 1.7**2)) + 0.35 * np.sin(np.pi * x / 2.2) ** 2 + step
    assert_close(v, want)


def test_an_expression_parameter_in_cycles_is_refused_as_ambiguous():
    """'2 kHz' in an expression's params could be the energy h x 2 kHz or the
    angular frequency 2 pi x 2 kHz (the two differ by 2 pi): one line naming
    the parameter; rad/s and lengths convert as before."""
    from wavesweep.potentials.external import _param_in_job_units
    from wavesweep.units import UnitSet

    units = UnitSet.from_table({"length": "um", "energy": "kHz"})
    with pytest.raises(JobError, match=r"potential\.0\.params\.f.*rad/s"):
        _param_in_job_units("2 kHz", units, "potential.0.params.f")
    assert _param_in_job_units("3 rad/ms", units, "p") == pytest.approx(3.0)   # kHz energy -> ms time
    assert _param_in_job_units("2 um", units, "p") == pytest.approx(2.0)
