"""Stationary states, the static Hamiltonian as operator and matrix, eigenstate
packets, and the autocorrelation spectrum of a known signal.

References: closed forms named beside each check; dense matrices built here
from the definitions of the Fourier-grid Hamiltonian and diagonalised with
scipy.linalg.eigh.
"""
from __future__ import annotations

import copy
import itertools
import math

import numpy as np
import pytest
import scipy.linalg
import xarray as xr

import analytic as an
from conftest import make_job, setup_of
from wavesweep.analysis.spectra import autocorrelation_levels, stationary_states, write_states
from wavesweep.eigen import eigenpairs
from wavesweep.errors import JobError
from wavesweep.grid import Axis, Grid
from wavesweep.hamiltonian import Hamiltonian


def _coordinates(lo, hi, n, boundary):
    """Grid points by the documented convention (numerics.md), not by grid.py."""
    if boundary == "periodic":
        return lo + (hi - lo) / n * np.arange(n)
    return lo + (hi - lo) / (n + 1) * np.arange(1, n + 1)


def _dense_kinetic(lo, hi, n, boundary, mass):
    """The spectral kinetic energy as a dense matrix, from the definitions:
    periodic F^-1 diag(k^2/2m) F with the DFT matrix F_jk = exp(-2 pi i j k / N),
    k = 2 pi fftfreq(N, dx); box S diag(k^2/2m) S with the orthonormal DST-I
    S_jn = sqrt(2/(N+1)) sin(pi j n / (N+1)), k_n = n pi / L (e.g. Press et al.,
    Numerical Recipes, ch. 12-13; from memory)."""
    j = np.arange(n)
    if boundary == "periodic":
        k = 2.0 * np.pi * np.fft.fftfreq(n, (hi - lo) / n)
        f = np.exp(-2j * np.pi * np.outer(j, j) / n)
        return ((f.conj().T * (k**2 / (2.0 * mass))) @ f / n).real
    jj = j + 1
    s = math.sqrt(2.0 / (n + 1)) * np.sin(np.pi * np.outer(jj, jj) / (n + 1))
    return (s * ((np.pi * jj / (hi - lo)) ** 2 / (2.0 * mass))) @ s


def _job(grid, potential, packet=None, mass=1.0, **extra):
    table = {"particle": {"mass": mass}, "grid": grid, "potential": potential,
             "packet": packet or {"kind": "eigenstate", "n": 0},
             "evolve": {"dt": 0.01, "duration": 0.1}}
    table.update(extra)
    return table


# -- the operator and the matrix ------------------------------------------------------
@pytest.mark.parametrize("boundary", ["periodic", "box"])
def test_static_matrix_is_the_fourier_grid_hamiltonian(boundary):
    """H = T (Kronecker sum over axes) + diag(V), against the definitions; and
    apply_static(psi) = H psi for real, complex and stacked psi."""
    mass, (nx, ny) = 1.3, (12, 9)
    setup = setup_of(_job({"x": {"min": -5.0, "max": 6.0, "points": nx}, "y": {"min": -4.0, "max": 4.0, "points": ny},
                           "boundary": boundary},
                          [{"kind": "harmonic", "omega": [0.7, 1.1], "center": [0.5, -0.2]}], mass=mass))
    x = _coordinates(-5.0, 6.0, nx, boundary)[:, None]
    y = _coordinates(-4.0, 4.0, ny, boundary)[None, :]
    v = 0.5 * mass * (0.7**2 * (x - 0.5) ** 2 + 1.1**2 * (y + 0.2) ** 2)   # V = m/2 sum w^2 (x - c)^2
    reference = (np.kron(_dense_kinetic(-5.0, 6.0, nx, boundary, mass), np.eye(ny))
                 + np.kron(np.eye(nx), _dense_kinetic(-4.0, 4.0, ny, boundary, mass)) + np.diag(v.ravel()))
    h = setup.hamiltonian
    np.testing.assert_allclose(h.static_matrix(), reference, rtol=0, atol=1e-12)
    rng = np.random.default_rng(3)
    psi = rng.standard_normal((3, nx, ny)) + 1j * rng.standard_normal((3, nx, ny))
    for p in (psi[0].real, psi[0], psi):
        expected = (reference @ p.reshape(-1, nx * ny).T).T.reshape(p.shape)
        out = h.apply_static(p)
        assert np.isrealobj(out) == np.isrealobj(p)
        np.testing.assert_allclose(out, expected, rtol=0, atol=1e-11)


def test_radial_matrix_has_the_centrifugal_term():
    """Radial grid: S diag(k^2/2m) S + diag(V + l(l+1)/(2 m r^2)) (u = r R;
    e.g. Griffiths sec. 4.1, from memory)."""
    n, r_max, l, mass = 40, 10.0, 2, 0.9
    setup = setup_of(_job({"r": {"max": r_max, "points": n}, "l": l}, [{"kind": "coulomb", "charge": 2.0}],
                          mass=mass, packet={"kind": "gaussian", "center": 5.0, "width": 0.7}))
    r = _coordinates(0.0, r_max, n, "box")
    v = -2.0 / r + l * (l + 1) / (2 * mass * r**2)
    np.testing.assert_allclose(setup.hamiltonian.static_matrix(),
                               _dense_kinetic(0.0, r_max, n, "box", mass) + np.diag(v), rtol=0, atol=1e-11)


# -- closed forms -----------------------------------------------------------------------
def test_harmonic_oscillator_levels():
    """E_n = (n + 1/2) hbar w (Griffiths sec. 2.3; from memory): the first 10
    to 1e-8 relative on a periodic grid (dense path)."""
    mass, omega = 1.7, 0.8
    job = make_job(_job({"x": {"min": -12.0, "max": 12.0, "points": 128}}, [{"kind": "harmonic", "omega": omega}],
                        mass=mass))
    energies, states = stationary_states(job, 10)
    n = np.arange(10)
    np.testing.assert_allclose(energies, (n + 0.5) * omega, rtol=1e-8)
    dv = 24.0 / 128
    np.testing.assert_allclose(states.reshape(10, -1) @ states.reshape(10, -1).T * dv, np.eye(10), atol=1e-10)


def test_particle_in_a_box_levels_and_states():
    """E_n = n^2 pi^2 hbar^2 / (2 m L^2) with L = max - min, the walls where psi
    = 0, and psi_n = sqrt(2/L) sin(n pi (x - min) / L) (Griffiths sec. 2.2;
    from memory; tests/analytic.py).  The sign convention makes the first
    lobe positive, as sin is."""
    mass, lo, hi, points = 0.7, -3.0, 5.0, 127
    job = make_job(_job({"x": {"min": lo, "max": hi, "points": points}, "boundary": "box"}, [{"kind": "free"}],
                        mass=mass))
    energies, states = stationary_states(job, 6)
    n = np.arange(1, 7)
    # exact on the sine grid up to eigh's rounding, eps ||H|| (||H|| = T_max = 140 hartree)
    np.testing.assert_allclose(energies, an.box_energy(n, hi - lo, mass), rtol=1e-11)
    x = _coordinates(lo, hi, points, "box")
    for k in range(6):
        np.testing.assert_allclose(states[k], an.box_eigenstate(x, k + 1, lo, hi - lo), atol=1e-10)


def test_morse_levels_next_to_its_capped_wall():
    """Morse levels E_n = hbar w (n + 1/2) - [hbar w (n + 1/2)]^2 / (4 D),
    w = a sqrt(2 D / m) (Morse, Phys. Rev. 34, 57 (1929); from memory), on a
    grid that reaches far into the repulsive wall (capped at ~2.4e17 D):
    there the potential is a hard wall for the eigensolver."""
    depth, a, mass = 10.0, 1.0, 1.0
    job = make_job(_job({"x": {"min": -20.0, "max": 20.0, "points": 1024}},
                        [{"kind": "morse", "depth": depth, "stiffness": a}], mass=mass))
    energies, states = stationary_states(job, 4)
    w = a * math.sqrt(2 * depth / mass)
    n = np.arange(4)
    np.testing.assert_allclose(energies, w * (n + 0.5) - (w * (n + 0.5)) ** 2 / (4 * depth), rtol=0, atol=1e-9)
    assert np.all(np.isfinite(states))


def test_huge_step_is_the_hard_wall_limit():
    """A 1e12 hartree step is an infinite wall at the grid's resolution: the
    levels equal those of the matrix without the wall's points (the V ->
    infinity limit of the discrete problem), by scipy.linalg.eigh of the
    definitions."""
    points = 256
    job = make_job(_job({"x": {"min": -10.0, "max": 10.0, "points": points}},
                        [{"kind": "harmonic", "omega": 1.0}, {"kind": "step", "height": 1e12, "position": 2.0}]))
    energies, states = stationary_states(job, 4)
    x = _coordinates(-10.0, 10.0, points, "periodic")
    inside = x < 2.0                                        # step: V = height for x >= position
    h = _dense_kinetic(-10.0, 10.0, points, "periodic", 1.0) + np.diag(0.5 * x**2)
    reference = scipy.linalg.eigh(h[np.ix_(inside, inside)], eigvals_only=True, subset_by_index=[0, 3])
    np.testing.assert_allclose(energies, reference, rtol=1e-12)
    assert np.all(states[:, ~inside] == 0.0)


def test_huge_step_in_2d_is_the_hard_wall_limit():
    """The same limit on a 2D box grid, a wall along y only: the levels equal
    those of the Kronecker sum T_x (x) 1 + 1 (x) T_y + V (row-major, x
    first) without the wall's points, by scipy.linalg.eigh of the
    definitions (the eigensolver builds only the kept points' block)."""
    nx, ny = 18, 22
    job = make_job(_job({"x": {"min": -6.0, "max": 6.0, "points": nx}, "y": {"min": -7.0, "max": 7.0, "points": ny},
                         "boundary": "box"},
                        [{"kind": "harmonic", "omega": [1.0, 1.3]},
                         {"kind": "step", "height": 1e12, "position": 1.5, "axis": "y"}]))
    energies, states = stationary_states(job, 4)
    x, y = _coordinates(-6.0, 6.0, nx, "box"), _coordinates(-7.0, 7.0, ny, "box")
    xx, yy = np.meshgrid(x, y, indexing="ij")
    inside = (yy < 1.5).reshape(-1)
    h = (np.kron(_dense_kinetic(-6.0, 6.0, nx, "box", 1.0), np.eye(ny))
         + np.kron(np.eye(nx), _dense_kinetic(-7.0, 7.0, ny, "box", 1.0))
         + np.diag(0.5 * (xx**2 + 1.3**2 * yy**2).reshape(-1)))
    reference = scipy.linalg.eigh(h[np.ix_(inside, inside)], eigvals_only=True, subset_by_index=[0, 3])
    np.testing.assert_allclose(energies, reference, rtol=1e-12)
    assert np.all(states.reshape(4, -1)[:, ~inside] == 0.0)


def test_separable_2d_levels_through_the_iterative_path():
    """A separable V(x, y) = Vx(x) + Vy(y) has the levels E_i + E_j of the two 1D
    problems (separation of variables; from memory).  The 1D levels come from
    scipy.linalg.eigh of the 1D Fourier-grid Hamiltonians built here; the 2D
    grid (64 x 72 points) is beyond the dense limit, so LOBPCG does it."""
    from wavesweep import eigen

    mass, omega = 1.0, 1.1
    nx, ny = 64, 72
    assert nx * ny > eigen.DENSE_MAX_POINTS
    job = make_job(_job({"x": {"min": -9.0, "max": 9.0, "points": nx}, "y": {"min": -10.0, "max": 10.0, "points": ny}},
                        [{"kind": "harmonic", "omega": [omega, 0.0]},
                         {"kind": "double_well", "height": 1.5, "separation": 3.0, "axis": "y"}], mass=mass))
    count = 8
    energies, states = stationary_states(job, count)
    x = _coordinates(-9.0, 9.0, nx, "periodic")
    y = _coordinates(-10.0, 10.0, ny, "periodic")
    ex = scipy.linalg.eigh(_dense_kinetic(-9.0, 9.0, nx, "periodic", mass) + np.diag(0.5 * mass * omega**2 * x**2),
                           eigvals_only=True)[:count]
    ey = scipy.linalg.eigh(_dense_kinetic(-10.0, 10.0, ny, "periodic", mass)
                           + np.diag(1.5 * ((y / 1.5) ** 2 - 1.0) ** 2), eigvals_only=True)[:count]  # V = h ((y/a)^2 - 1)^2
    reference = np.sort([a + b for a, b in itertools.product(ex, ey)])[:count]
    np.testing.assert_allclose(energies, reference, rtol=1e-9, atol=1e-10)
    dv = (18.0 / nx) * (20.0 / ny)
    gram = states.reshape(count, -1) @ states.reshape(count, -1).T * dv
    np.testing.assert_allclose(gram, np.eye(count), atol=1e-8)


# -- a released cloud's trap on a wide grid -----------------------------------------------
def _rb87_trap(grid, omega):
    """A Rb-87 atom (86.909 u) in a harmonic trap of angular frequency
    ``omega`` ("100 Hz": 2 pi x 100 rad/s) on ``grid`` (um)."""
    return make_job({"units": {"length": "um", "time": "ms", "mass": "u"}, "particle": {"mass": 86.909},
                     "grid": grid, "potential": [{"kind": "harmonic", "omega": omega}],
                     "packet": {"kind": "gaussian", "center": 0.0, "width": 1.0},
                     "evolve": {"dt": 0.01, "duration": 0.1}})


@pytest.mark.parametrize("points", [4095, 16383])
def test_a_released_clouds_trap_ground_state_on_a_wide_grid(points):
    """The 100 Hz trap's ground state (sigma0 = 0.76 um) on a grid of
    +-836 um, sized for the cloud's expansion after release: E0 = hbar w / 2
    (Griffiths sec. 2.3; from memory) with hbar and the hartree from CODATA
    (scipy.constants), to 1e-10 relative, and psi0 = (2 pi s^2)^(-1/4)
    exp(-x^2 / (4 s^2)), s^2 = hbar / (2 m w) (the same section), to 1e-6
    of its peak (what LOBPCG's tolerance allows: a residual of 1e-9 T_max
    over the gap hbar w, 6e-7 on 16383 points; measured 4e-10).  Of 4095 points 443 lie below the walls (the dense path on
    them), of 16383 points 7083 (LOBPCG); the iterative solver stalled on
    both at a residual of 3e-5 of its scale and failed its check."""
    import scipy.constants as sc

    job = _rb87_trap({"x": {"min": -836.0, "max": 836.0, "points": points}, "boundary": "box"}, "100 Hz")
    energies, states = stationary_states(job, 1)
    omega = 2.0 * math.pi * 100.0
    hartree = sc.physical_constants["Hartree energy"][0]
    np.testing.assert_allclose(energies[0], sc.hbar * omega / 2.0 / hartree, rtol=1e-10)
    bohr_um = sc.physical_constants["Bohr radius"][0] * 1e6
    s2 = sc.hbar / (2.0 * 86.909 * sc.atomic_mass * omega) / (bohr_um * 1e-6) ** 2          # bohr^2
    x = _coordinates(-836.0, 836.0, points, "box") / bohr_um                                  # bohr
    exact = (2.0 * math.pi * s2) ** -0.25 * np.exp(-x**2 / (4.0 * s2))
    np.testing.assert_allclose(states[0], exact, rtol=0.0, atol=1e-6 * exact.max())


def test_an_anisotropic_trap_on_a_wide_2d_grid():
    """A 100 x 140 Hz trap's ground state on 31 x 511 points of 0.45 um
    (11121 below the walls: LOBPCG): E0 = hbar (w_x + w_y) / 2 (separation
    of variables, Griffiths sec. 2.3; from memory; CODATA via
    scipy.constants) to 1e-10 relative; the iterative solver failed here
    before."""
    import scipy.constants as sc

    dx = 0.45
    job = _rb87_trap({"x": {"min": -16 * dx, "max": 16 * dx, "points": 31},
                      "y": {"min": -256 * dx, "max": 256 * dx, "points": 511}, "boundary": "box"},
                     ["100 Hz", "140 Hz"])
    energies, _ = stationary_states(job, 1)
    hartree = sc.physical_constants["Hartree energy"][0]
    np.testing.assert_allclose(energies[0], sc.hbar * 2.0 * math.pi * (100.0 + 140.0) / 2.0 / hartree, rtol=1e-10)


@pytest.mark.parametrize("boundary", ["periodic", "box"])
def test_coarse_to_fine_interpolation_is_exact_for_band_limited_states(boundary):
    """The cascade starts LOBPCG from the coarse grid's states interpolated
    spectrally: a function inside the coarse grid's band, here cos and sin of
    2 pi x / L and its Nyquist mode cos(pi N_c x / L) (periodic), or sin(n pi
    (x - min) / L) for n <= N_c (box), comes out as its values on the fine
    grid (the wrong Nyquist split or DST scaling would not)."""
    from wavesweep.eigen import _coarser, _resample

    lo, hi = -3.0, 5.0
    length = hi - lo
    fine = Grid((Axis("x", lo, hi, 64 if boundary == "periodic" else 63, boundary),))
    coarse = _coarser(fine)
    xc, xf = coarse.axes[0].coordinates, fine.axes[0].coordinates
    nc = coarse.axes[0].points
    if boundary == "periodic":
        funcs = [lambda x: np.cos(2 * np.pi * (x - lo) / length), lambda x: np.sin(2 * np.pi * (x - lo) / length),
                 lambda x: np.cos(np.pi * nc * (x - lo) / length)]
    else:
        funcs = [lambda x, n=n: np.sin(n * np.pi * (x - lo) / length) for n in (1, 7, nc)]
    out = _resample(np.stack([f(xc) for f in funcs], axis=1), coarse, fine)
    np.testing.assert_allclose(out, np.stack([f(xf) for f in funcs], axis=1), atol=1e-12)


def test_time_dependent_terms_enter_at_t0():
    """A field -q E x switched on before t = 0 (constant envelope) shifts every
    oscillator level by -q^2 E^2 / (2 m w^2) (completing the square; e.g.
    Griffiths problem 2.49 / Sakurai sec. 2.3, from memory); a sin^2 pulse
    is zero at t = 0 and shifts nothing."""
    q, field, mass, omega = -1.0, 0.1, 1.3, 0.9
    table = _job(HO_GRID, [{"kind": "harmonic", "omega": omega},
                           {"kind": "field", "amplitude": field, "omega": 0.0, "envelope": "constant"}], mass=mass,
                 packet={"kind": "gaussian", "center": 0.0, "width": 1.0})
    table["particle"]["charge"] = q
    energies, _ = stationary_states(make_job(table), 3)
    n = np.arange(3)
    np.testing.assert_allclose(energies, (n + 0.5) * omega - q**2 * field**2 / (2 * mass * omega**2), rtol=1e-10)
    table["potential"][1].update(envelope="sin2", duration=10.0)
    energies, _ = stationary_states(make_job(table), 3)
    np.testing.assert_allclose(energies, (n + 0.5) * omega, rtol=1e-10)


@pytest.mark.parametrize("count, words", [(0, "at least 1"), (129, "at most 128")])
def test_count_out_of_range(count, words):
    job = make_job(_job({"x": {"min": -12.0, "max": 12.0, "points": 128}}, [{"kind": "harmonic", "omega": 1.0}]))
    with pytest.raises(JobError, match=words) as info:
        stationary_states(job, count)
    assert info.value.field == "count"


# -- eigenstate packets ----------------------------------------------------------------
HO_GRID = {"x": {"min": -12.0, "max": 12.0, "points": 128}}


def test_superposition_of_eigenstates_has_the_textbook_dipole():
    """(phi_0 + phi_1)/sqrt 2 has <x> = +/- <0|x|1> = sqrt(hbar / 2 m w)
    (Griffiths eq. 2.69-2.70; from memory); the sign convention (phi_1
    positive on its left lobe) makes it negative."""
    mass, omega = 1.4, 0.9
    setup = setup_of(_job(HO_GRID, [{"kind": "harmonic", "omega": omega}], mass=mass,
                          packet={"kind": "superposition",
                                  "packets": [{"kind": "eigenstate", "n": 0}, {"kind": "eigenstate", "n": 1}]}))
    x = _coordinates(-12.0, 12.0, 128, "periodic")
    dens = np.abs(setup.psi0) ** 2
    assert np.sum(dens) * 24 / 128 == pytest.approx(1.0, abs=1e-12)
    assert np.sum(dens * x) * 24 / 128 == pytest.approx(-math.sqrt(1.0 / (2 * mass * omega)), rel=1e-9)


def test_boost_adds_its_momentum():
    """<e^{ipx} phi|p|e^{ipx} phi> = p + <phi|p|phi> = p for a real phi
    (from memory); <p> computed here by FFT, not by the observer."""
    setup = setup_of(_job(HO_GRID, [{"kind": "harmonic", "omega": 1.0}],
                          packet={"kind": "eigenstate", "n": 1, "momentum": 0.8}))
    psi = setup.psi0
    k = 2 * np.pi * np.fft.fftfreq(128, 24 / 128)
    c = np.fft.fft(psi)
    assert np.sum(k * np.abs(c) ** 2) / np.sum(np.abs(c) ** 2) == pytest.approx(0.8, abs=1e-10)


def test_own_trap_differs_from_the_job_potential():
    """The ground state of a trap of frequency w' = 2w, released into w: it has
    <x^2> = 1/(2 w') and <p^2> = w'/2 (m = hbar = 1), so in the trap w
    <H> = w'/4 + w^2/(4 w') (Griffiths sec. 2.3; from memory)."""
    w, w_prep = 1.0, 2.0
    setup = setup_of(_job(HO_GRID, [{"kind": "harmonic", "omega": w}],
                          packet={"kind": "eigenstate", "n": 0,
                                  "potential": [{"kind": "harmonic", "omega": w_prep}]}))
    h = setup.hamiltonian
    psi = setup.psi0
    energy = float(np.real(np.vdot(psi, h.apply_static(psi)))) * 24 / 128
    assert energy == pytest.approx(w_prep / 4 + w**2 / (4 * w_prep), rel=1e-10)


@pytest.mark.parametrize("packet, field, words", [
    ({"kind": "eigenstate", "n": 1}, "packet.n", "degenerate"),         # isotropic 2D: levels 1, 2 equal
    ({"kind": "eigenstate", "n": 0, "momentum": [40.0, 0.0]}, "packet.momentum", "points"),
    ({"kind": "eigenstate", "n": 4000}, "packet.n", "only 1024 states"),
    ({"kind": "eigenstate", "potential": [{"kind": "harmonc"}]}, "packet.potential.0.kind", "harmonic"),
])
def test_bad_eigenstate_packets(packet, field, words):
    table = _job({"x": {"min": -8.0, "max": 8.0, "points": 32}, "y": {"min": -8.0, "max": 8.0, "points": 32}},
                 [{"kind": "harmonic", "omega": 1.0}], packet=packet)
    with pytest.raises(JobError, match=words) as info:
        setup_of(table)
    assert info.value.field == field


def test_states_file_round_trip(tmp_path):
    """write_states -> [packet] kind = "file", state = i gives back state i
    (the file is in nm: coordinates convert through length_to_bohr)."""
    table = _job({"x": {"min": -0.6, "max": 0.6, "points": 64}}, [{"kind": "harmonic", "omega": 1.0}],
                 units={"length": "nm", "energy": "hartree"})
    setup = setup_of(table)
    energies, states = stationary_states(setup, 3)
    path = write_states(tmp_path / "states.nc", setup, energies, states)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["states.nc"]   # no temporary left
    with xr.open_dataset(path) as ds:
        assert ds["psi_real"].dims == ("state", "x")
        assert ds["x"].attrs["units"] == "nm" and ds["energy"].attrs["units"] == "hartree"
        np.testing.assert_allclose(ds["energy"].values, energies, rtol=1e-14)
    back = setup_of(dict(copy.deepcopy(table), packet={"kind": "file", "path": str(path), "state": 2}))
    np.testing.assert_allclose(back.psi0.real, states[2], atol=1e-12)
    with pytest.raises(JobError, match="holds 3 states") as info:
        setup_of(dict(copy.deepcopy(table), packet={"kind": "file", "path": str(path)}))
    assert info.value.field == "packet.state"


# -- the autocorrelation spectrum of a known signal -------------------------------------------
def _synthetic_result(tmp_path, table, levels, weights):
    """A result file whose autocorrelation is the closed form sum_n w_n
    exp(-i E_n t / hbar), E_n in the job's energy unit, sampled every
    record.every up to evolve.duration; the job (its packet) only sets the
    band the analysis searches."""
    job = make_job(table)
    u = job.units
    every, duration = table["record"]["every"], table["evolve"]["duration"]
    t = np.arange(round(duration / every) + 1) * every
    c = sum(w * np.exp(-1j * (e * u.factor("energy")) * (t * u.factor("time"))) for e, w in zip(levels, weights))
    ds = xr.Dataset({"autocorrelation_real": ("time", c.real), "autocorrelation_imag": ("time", c.imag)},
                    coords={"time": t},
                    attrs={"job": job.to_toml(), "run_id": job.run_id, "wavesweep_version": "test",
                           "time_to_atomic": u.factor("time"), "energy_to_hartree": u.factor("energy"),
                           "units_energy": u.unit_label("energy"), "units_time": u.unit_label("time")})
    path = tmp_path / "synthetic.nc"
    ds.to_netcdf(path)
    return path


def _displaced_packet(every, duration, dt=None):
    """m = w = 1: a coherent state with |alpha|^2 = 1.125, <H> = 1.625 hartree."""
    return _job(HO_GRID, [{"kind": "harmonic", "omega": 1.0}],
                packet={"kind": "gaussian", "center": 1.5, "width": math.sqrt(0.5)},
                record={"every": every}, evolve={"dt": dt or every, "duration": duration})


def test_autocorrelation_of_a_sum_of_exponentials(tmp_path):
    """C(t) = sum_n w_n exp(-i E_n t): the windowed transform peaks at E_n
    with heights w_n (Feit, Fleck & Steiger 1982); levels 0.9 apart, T = 60,
    so tau = 10 and the Gaussian lines (sigma = 0.1) barely touch: vertex
    and height within 1e-9."""
    levels = [0.41, 1.31, 2.21, 3.4, 4.75]
    weights = [0.3, 0.35, 0.2, 0.1, 0.05]
    path = _synthetic_result(tmp_path, _displaced_packet(0.1, 60.0), levels, weights)
    found = autocorrelation_levels(path)
    np.testing.assert_allclose(found.energies, levels, atol=1e-9)
    np.testing.assert_allclose(found.weights, weights, atol=1e-9)
    np.testing.assert_allclose(found.line_width_ratio, 1.0, atol=1e-6)
    assert not found.blended.any()
    assert found.energy_units == "hartree"
    np.testing.assert_allclose(autocorrelation_levels(path, count=2).energies, levels[:2], atol=1e-9)


def test_close_levels_are_flagged(tmp_path):
    """Two equal lines 3 hbar/tau apart (tau = T/6 = 10): each vertex is pulled
    by about exp(u - u^2/2) / 2u = 4% of the spacing (u = 3; the overlap of two
    Gaussians, derived in the module notes), and the fitted lines are wider
    than the window's: flagged as blended."""
    levels = [1.0, 1.3]
    found = autocorrelation_levels(_synthetic_result(tmp_path, _displaced_packet(0.1, 60.0), levels, [0.5, 0.5]))
    assert found.blended.all()
    shift = np.abs(found.energies - levels) / 0.3
    assert np.all((shift > 0.02) & (shift < 0.08))


def test_autocorrelation_in_job_units(tmp_path):
    """The same analysis in nm / meV (time hbar/meV) for an electron in GaAs
    (m = 0.067 m_e) in a 10 meV trap: levels come back in meV; oscillator
    length sqrt(hbar^2 / (m hbar w)) = 10.7 nm (hbar^2 / 2 m_e = 0.0381 eV nm^2,
    from memory)."""
    table = _job({"x": {"min": -100.0, "max": 100.0, "points": 128}}, [{"kind": "harmonic", "omega": 10.0}],
                 mass=0.067, packet={"kind": "gaussian", "center": 15.0, "width": 7.5},
                 units={"length": "nm", "energy": "meV"},
                 record={"every": 0.05}, evolve={"dt": 0.05, "duration": 6.0})
    levels, weights = [5.0, 15.0, 25.0], [0.4, 0.4, 0.2]
    found = autocorrelation_levels(_synthetic_result(tmp_path, table, levels, weights))
    assert found.energy_units == "meV"
    np.testing.assert_allclose(found.energies, levels, rtol=1e-9)
    np.testing.assert_allclose(found.weights, weights, atol=1e-9)


def test_autocorrelation_aliasing_is_refused(tmp_path):
    """Samples every 2 time units alias energies by 2 pi / 2 = 3.1 hartree,
    less than the band of the displaced packet (<H> +/- 6 Delta H): refused
    with the record.every that would do."""
    path = _synthetic_result(tmp_path, _displaced_packet(2.0, 200.0, dt=0.1), [0.5, 1.5], [0.5, 0.5])
    with pytest.raises(JobError, match=r"use record.every <= .* e.g. 0.[0-9]") as info:
        autocorrelation_levels(path)
    assert info.value.field == "record.every"


# -- where psi(0)'s levels lie: Lanczos quadrature and its tail bounds ----------------------------
def _known_measure(size=300, seed=7):
    """A real symmetric matrix with its eigen-decomposition from
    scipy.linalg.eigh, and a vector whose weights |<n|psi>|^2 fall off as a
    Gaussian in energy (tails far below 1e-8 at the ends of the spectrum)."""
    rng = np.random.default_rng(seed)
    a = rng.standard_normal((size, size))
    a = (a + a.T) / 2.0
    energies, vectors = scipy.linalg.eigh(a)
    mid, spread = np.median(energies), 0.05 * np.ptp(energies)
    amplitudes = np.exp(-0.25 * ((energies - mid) / spread) ** 2) * rng.choice([-1.0, 1.0], size)
    psi = vectors @ amplitudes
    weights = (vectors.T @ psi) ** 2 / (psi @ psi)
    return a, energies, weights, psi


@pytest.mark.parametrize("threshold", [1e-3, 1e-6, 1e-9])
def test_lanczos_band_bounds_the_weight_outside(threshold):
    """Every level of weight >= threshold lies strictly inside the band: the
    weight at or below lo and at or above hi is below the threshold
    (Chebyshev-Markov-Stieltjes inequalities of the Gauss quadrature; the
    weights from scipy.linalg.eigh), and the band is no wider than needed
    (the tightest band, from the eigh weights, plus 0.4 of the measure's spread;
    measured 0.3-0.4 after 80 steps, 0.1-0.4 after 160)."""
    from wavesweep.eigen import lanczos_quadrature, quadrature_band

    a, energies, weights, psi = _known_measure()
    nodes, node_weights, exhausted = lanczos_quadrature(lambda x: a @ x, psi, 80, np.ptp(energies))
    assert not exhausted and node_weights.sum() == pytest.approx(1.0, abs=1e-12)
    lo, hi = quadrature_band(nodes, node_weights, threshold)
    assert weights[energies <= lo].sum() < threshold and weights[energies >= hi].sum() < threshold
    tightest_lo = energies[np.nonzero(np.cumsum(weights) < threshold)[0][-1]]
    tightest_hi = energies[np.nonzero(np.cumsum(weights[::-1])[::-1] < threshold)[0][0]]
    spread = 0.05 * np.ptp(energies)
    assert tightest_lo - 0.4 * spread < lo <= tightest_lo and tightest_hi <= hi < tightest_hi + 0.4 * spread


def test_lanczos_of_an_eigenvector_is_exhausted():
    """psi an eigenvector (scipy.linalg.eigh): the Krylov space is psi alone,
    one node at its eigenvalue with weight 1."""
    from wavesweep.eigen import lanczos_quadrature

    a, energies, _, _ = _known_measure(size=60)
    _, vectors = scipy.linalg.eigh(a)
    nodes, weights, exhausted = lanczos_quadrature(lambda x: a @ x, vectors[:, 17], 30, np.ptp(energies))
    assert exhausted and nodes.shape == (1,)
    assert nodes[0] == pytest.approx(energies[17], abs=1e-12) and weights[0] == pytest.approx(1.0)


def test_band_of_a_quenched_oscillator_holds_its_weak_levels():
    """The ground state of a trap 2w released into w (m = hbar = 1): a squeezed
    vacuum in the levels of w with |c_2k|^2 = (2k)! / (2^k k!)^2 tanh(r)^2k /
    cosh r, e^(2r) = 2 (sudden quench of an oscillator; e.g. Gerry & Knight,
    Introductory Quantum Optics, sec. 7.1; from memory).  The band at 1e-5
    holds levels up to n = 8 (E = 8.5, weight 3.9e-5) that <H> +/- 6 Delta H
    (<H> = 0.625, Delta H = 0.53: up to 3.8) cut off, and ends below level 12
    (weight 4.0e-7), far below the grid's largest energy."""
    from wavesweep.eigen import energy_band

    setup = setup_of(_job(HO_GRID, [{"kind": "harmonic", "omega": 1.0}],
                          packet={"kind": "eigenstate", "n": 0,
                                  "potential": [{"kind": "harmonic", "omega": 2.0}]}))
    lo, hi = energy_band(setup.hamiltonian, setup.psi0, 1e-5, resolution=0.05)
    r = 0.5 * math.log(2.0)
    weight = [math.factorial(2 * k) / (2**k * math.factorial(k)) ** 2 * math.tanh(r) ** (2 * k) / math.cosh(r)
              for k in range(8)]
    assert weight[4] == pytest.approx(3.93e-5, rel=1e-3) and weight[6] == pytest.approx(4.0e-7, rel=1e-2)
    assert lo < 0.5 and 8.5 < hi < 12.5
    assert hi < 0.1 * float(setup.hamiltonian.kinetic.max())


# -- truncation, side lobes and noise ----------------------------------------------------------
def test_truncation_floor_bounds_the_cut_record():
    """One line of weight 1 at E0 recorded to T with a window tau = T/3
    (w(T) = e^-4.5): the windowed sum over |t_j| <= T differs from the
    untruncated one, which is sum_m tau/sqrt(2 pi) exp(-(E - E0 + 2 pi m /
    dt)^2 tau^2 / 2) by Poisson summation (from memory), by no more than
    truncation_floor at any E, and by more than a third of it at the line."""
    from wavesweep.analysis.spectra import truncation_floor

    dt, duration, e0 = 0.1, 30.0, 1.3
    tau = duration / 3.0
    period = 2 * np.pi / dt
    t = np.arange(-round(duration / dt), round(duration / dt) + 1) * dt
    energies = e0 + np.linspace(-3.0, 3.0, 601)
    cut = (dt / (2 * np.pi)) * np.real(np.exp(1j * np.outer(energies - e0, t)) @ np.exp(-0.5 * (t / tau) ** 2))
    full = sum(tau / math.sqrt(2 * np.pi) * np.exp(-0.5 * ((energies - e0 + m * period) * tau) ** 2)
               for m in (-1, 0, 1))
    error = np.abs(cut - full) / (tau / math.sqrt(2 * np.pi))          # as a weight
    bound = truncation_floor(energies, [e0], [1.0], duration, tau, period)
    assert np.all(error <= bound)
    assert error[300] > bound[300] / 3


def test_side_lobes_and_noise_are_not_levels(tmp_path):
    """Four lines (weights 0.7 ... 1e-4) analysed with windows whose ends are
    not negligible: tau = 11 ... 13 of T = 60 (w(T) = 3e-7 ... 3e-5), where
    the cut record's ripples made local maxima of S, side lobes narrower than
    a line (width ratio 0.6; before this check: 9, 54 and 6 'levels' at
    min_weight 1e-8); all four lines, and nothing else, are found.  A window
    tau = T/2 (w(T) = 0.14) buries the 1e-4 line under the ripple of the
    others (the truncation floor is ~5e-3 there): not reported, while the
    three strong lines remain."""
    levels = [0.5, 1.5, 2.5, 3.5]
    weights = [0.7, 0.25, 0.05, 1e-4]
    path = _synthetic_result(tmp_path, _displaced_packet(0.1, 60.0), levels, weights)
    for tau in (11.0, 12.0, 13.0):
        found = autocorrelation_levels(path, min_weight=1e-8, window=tau)
        np.testing.assert_allclose(found.energies, levels, atol=2e-4)
        np.testing.assert_allclose(found.weights, weights, rtol=3e-3)
        # a sum of lines is never narrower than one; the cut record's ripple distorts the weak
        # line by about floor / weight (measured 4e-6 at tau = 13)
        assert np.all(found.line_width_ratio >= 1.0 - 1e-4)
    found = autocorrelation_levels(path, min_weight=1e-8, window=30.0)
    np.testing.assert_allclose(found.energies, levels[:3], atol=1e-3)
    np.testing.assert_allclose(found.weights, weights[:3], rtol=0.06)


def test_degenerate_groups():
    """Chains of neighbours within 1e-8 of max(|E|, span): the 2D isotropic
    oscillator's (n + 1)-fold levels E = (n + 1) hbar w (e.g. Sakurai
    problem 2.x; from memory) from the dense path, and a tunnelling pair
    split by 5e-3 of its energy that is not degenerate."""
    from wavesweep.eigen import degenerate_groups

    job = make_job(_job({"x": {"min": -6.0, "max": 6.0, "points": 24}, "y": {"min": -6.0, "max": 6.0, "points": 24}},
                        [{"kind": "harmonic", "omega": 1.0}]))
    energies, _ = stationary_states(job, 10)
    np.testing.assert_allclose(energies, [1, 2, 2, 3, 3, 3, 4, 4, 4, 4], rtol=1e-8)
    assert degenerate_groups(energies) == [(1, 2), (3, 5), (6, 9)]
    assert degenerate_groups([1.509, 1.514, 4.06]) == []
    assert degenerate_groups([0.5]) == []


# -- error estimates (levels) ------------------------------------------------------------
def _morse_levels(n, depth, stiffness, mass):
    """Morse, Phys. Rev. 34, 57 (1929) (from memory): hbar w (n + 1/2) -
    [hbar w (n + 1/2)]^2 / 4D with w = a sqrt(2 D / m)."""
    w = stiffness * math.sqrt(2 * depth / mass)
    return w * (n + 0.5) - (w * (n + 0.5)) ** 2 / (4 * depth)


def _hydrogenic(n, charge):
    """Bohr levels -Z^2 / (2 n^2) hartree, infinite nuclear mass (Griffiths
    eq. 4.70 with Z e^2; from memory)."""
    return -(charge**2) / (2.0 * n**2)


n4 = np.arange(4)
ERROR_CASES = {
    # (grid, potential, count, closed form, what should give more digits)
    "oscillator, periodic, coarse": ({"x": {"min": -12.0, "max": 12.0, "points": 36}},
                                     [{"kind": "harmonic", "omega": 1.0}], n4 + 0.5, "grid.x.points"),
    "oscillator, box, coarse": ({"x": {"min": -12.0, "max": 12.0, "points": 36}, "boundary": "box"},
                                [{"kind": "harmonic", "omega": 1.0}], n4 + 0.5, "grid.x.points"),
    "oscillator, periodic, short": ({"x": {"min": -4.0, "max": 4.0, "points": 128}},
                                    [{"kind": "harmonic", "omega": 1.0}], n4 + 0.5, "grid.x.m"),
    "oscillator, box, short": ({"x": {"min": -4.0, "max": 4.0, "points": 128}, "boundary": "box"},
                               [{"kind": "harmonic", "omega": 1.0}], n4 + 0.5, "grid.x.m"),
    "Morse, 256 points": ({"x": {"min": -20.0, "max": 20.0, "points": 256}},
                          [{"kind": "morse", "depth": 10.0, "stiffness": 1.0}], _morse_levels(n4, 10.0, 1.0, 1.0),
                          "grid.x.points"),
    "hydrogen p, 999 points": ({"r": {"max": 80.0, "points": 999}, "l": 1}, [{"kind": "coulomb"}],
                               _hydrogenic(n4 + 2, 1.0), "grid.r.max"),     # 5p reaches r = 80
    "He+ s, 999 points": ({"r": {"max": 40.0, "points": 999}, "l": 0}, [{"kind": "coulomb", "charge": 2.0}],
                          _hydrogenic(n4[:3] + 1, 2.0), "grid.r.points"),
}


@pytest.mark.parametrize("case", list(ERROR_CASES))
def test_level_errors_bound_the_true_error(case):
    """Each level's estimated error bounds its distance from the closed form
    and is not more than 100 times it (where that distance is above
    rounding, 1e-11 of the levels' scale); ``refine`` names the setting that
    limits the worst level: the point count when resolution does (a coarse
    grid; the radial -Z/r cusp), the grid's end when the states reach it (a
    well on a short grid, 5p at 80 bohr), and a note says by how much when
    its relative error exceeds 1e-6."""
    from wavesweep.analysis.spectra import level_errors
    from wavesweep.setup import Model

    grid, potential, exact, refine = ERROR_CASES[case]
    model = Model(make_job(_job(grid, potential)))
    energies, states = stationary_states(model, len(exact))
    found = level_errors(model, energies, states)
    true = np.abs(found.energies - exact)
    assert np.all(true <= found.errors), (true, found.errors)
    above = true > 1e-11 * max(1.0, float(np.max(np.abs(exact))))
    assert np.all(found.errors[above] <= 100 * true[above]), (true, found.errors)
    assert found.refine.startswith(refine)
    relative = found.errors / np.abs(found.energies)
    if np.max(relative) > 1e-6:
        assert found.advice and f"set {found.refine} to" in found.advice
    else:
        assert found.advice is None
    np.testing.assert_array_equal(found.grid_energies, energies)


def test_walls_of_a_box_are_physics_not_an_edge_error():
    """A particle in a box (closed form E_n = n^2 pi^2 / 2 m L^2, Griffiths
    sec. 2.2; tests/analytic.py) is exact on the sine grid: the estimates sit
    at rounding and the walls, which the states reach, add nothing."""
    from wavesweep.analysis.spectra import level_errors
    from wavesweep.setup import Model

    mass, lo, hi = 0.7, -3.0, 5.0
    model = Model(make_job(_job({"x": {"min": lo, "max": hi, "points": 127}, "boundary": "box"}, [{"kind": "free"}],
                                mass=mass)))
    energies, states = stationary_states(model, 6)
    found = level_errors(model, energies, states)
    true = np.abs(found.energies - an.box_energy(np.arange(1, 7), hi - lo, mass))
    assert np.all(true <= found.errors) and np.all(found.errors < 1e-11)
    assert np.all(found.edge_errors == 0.0) and found.refine == "grid.x.points" and found.advice is None


def test_a_box_wall_behind_an_absorber_is_open_space_not_physics():
    """The same box with a CAP on its x+ face: the job says space is open
    there, so its levels above V at that face are continuum states the box
    discretises.  Moving the wall out by L (to 2L) moves them to E_n / 4
    (closed form E_n = n^2 pi^2 / 2 m L^2, Griffiths sec. 2.2): the edge
    estimate (the Hadamard wall formula, as at r_max) covers that, and the
    advice says these are no bound levels.  A bound state in a well inside
    the same open box keeps its tiny estimate."""
    from wavesweep.analysis.spectra import level_errors
    from wavesweep.setup import Model

    mass, lo, hi = 0.7, -3.0, 5.0
    open_box = {"kind": "cap", "thickness": 1.0, "strength": 1.0, "faces": ["x+"]}
    model = Model(make_job(_job({"x": {"min": lo, "max": hi, "points": 127}, "boundary": "box"}, [{"kind": "free"}],
                                mass=mass, absorber=open_box)))
    energies, states = stationary_states(model, 3)
    found = level_errors(model, energies, states)
    exact = an.box_energy(np.arange(1, 4), hi - lo, mass)
    np.testing.assert_allclose(found.grid_energies, exact, rtol=1e-10)
    assert np.all(found.errors >= 0.75 * exact)           # the wall moved by L: E_n -> E_n / 4
    assert found.refine == "grid.x.max" and "continuum state" in found.advice
    # a well deep inside the same open box: its low levels decay long before the wall
    model = Model(make_job(_job({"x": {"min": -12.0, "max": 12.0, "points": 255}, "boundary": "box"},
                                [{"kind": "harmonic", "omega": 1.0}], absorber=open_box)))
    energies, states = stationary_states(model, 3)
    found = level_errors(model, energies, states)
    assert np.all(found.edge_errors < 1e-12) and found.advice is None


def test_stationary_states_never_build_the_packet():
    """A job whose packet could not start a run (centred on the grid's edge)
    still has its levels: (n + 1/2) hbar w (Griffiths sec. 2.3; from memory)."""
    job = make_job(_job(HO_GRID, [{"kind": "harmonic", "omega": 1.0}],
                        packet={"kind": "gaussian", "center": 11.99, "width": 2.0}))
    energies, _ = stationary_states(job, 3)
    np.testing.assert_allclose(energies, [0.5, 1.5, 2.5], rtol=1e-10)


def test_a_period_that_cuts_a_well_is_an_edge_a_lattice_period_is_not():
    """A harmonic well on a periodic grid of +/- 4 bohr: the levels above V
    at the seam (8 hartree) are held by the period, and their estimates
    still bound the distance from (n + 1/2) hbar w (Griffiths sec. 2.3; from
    memory) with refine = grid.x.max.  A lattice of period 2 on 8 bohr:
    the period is the physics, so no level gets an edge error."""
    from wavesweep.analysis.spectra import level_errors
    from wavesweep.setup import Model

    model = Model(make_job(_job({"x": {"min": -4.0, "max": 4.0, "points": 64}}, [{"kind": "harmonic", "omega": 1.0}])))
    energies, states = stationary_states(model, 12)
    found = level_errors(model, energies, states)
    assert np.all(np.abs(found.energies - (np.arange(12) + 0.5)) <= found.errors)
    assert found.refine == "grid.x.max" and "grid.x.max" in found.advice
    model = Model(make_job(_job({"x": {"min": 0.0, "max": 8.0, "points": 64}},
                                [{"kind": "lattice", "depth": 3.0, "spacing": 2.0}])))
    energies, states = stationary_states(model, 12)
    found = level_errors(model, energies, states)
    assert np.all(found.edge_errors == 0.0) and np.all(found.errors < 1e-12) and found.refine == "grid.x.points"
