"""Tests of the CAP return probability and strength tuning.

Atomic units throughout (hbar = m_e = 1; bohr, hartree).  Each check names
its outside source: a textbook closed form, an independent scipy computation,
or (for the tuning magnitudes) our own measurement / common practice.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.sparse as sparse
from scipy.integrate import simpson, solve_ivp
from scipy.sparse.linalg import spsolve

from wavesweep.absorbers import tuning
from wavesweep.absorbers.tuning import (cap_profile, layer_scattering, return_probability,
                                       tune_cap_strength)
from wavesweep.errors import JobError

WINDOW = (0.5, 2.0)          # hartree
WINDOW_ENERGIES = np.geomspace(*WINDOW, 64)


def _worst(thickness, strength, power=2.0, mass=1.0, energies=WINDOW_ENERGIES):
    depth = np.linspace(0.0, thickness, 257)
    rate = cap_profile(depth, thickness, strength, power)
    return float(return_probability(depth, rate, mass, energies).max())


@pytest.fixture(scope="module")
def tuned_20():
    return tune_cap_strength(20.0, 1.0, *WINDOW, power=2.0)


# --- independent references -------------------------------------------------

def _r_finite_difference(energy, strength, thickness, mass, n):
    """Reflection amplitude from the 3-point finite-difference stationary
    equation on [0, L] with psi(L) = 0, solved with scipy spsolve.

    The incident side enters through psi'(0) + i k psi(0) = 2 i k (from
    psi = e^{iks} + r e^{-iks}), imposed with a ghost node
    psi_{-1} = psi_1 - 2 h (2ik - ik psi_0); then r = psi_0 - 1.  W(0) = 0 for
    the power law, so the equation at s = 0 is the free one.
    """
    h = thickness / n
    s = h * np.arange(n)                     # psi_n = psi(L) = 0 is dropped
    k = math.sqrt(2.0 * mass * energy)
    w = strength * (s / thickness) ** 2
    t = 1.0 / (2.0 * mass * h * h)
    main = (2.0 * t - 1j * w - energy).astype(complex)
    upper = np.full(n - 1, -t, dtype=complex)
    lower = np.full(n - 1, -t, dtype=complex)
    main[0] += -t * 2.0 * h * 1j * k         # ghost node, psi_0 part
    upper[0] += -t                           # ghost node, psi_1 part
    rhs = np.zeros(n, dtype=complex)
    rhs[0] = -t * 2.0 * h * 2j * k          # ghost node, incident part
    a = sparse.diags([lower, main, upper], [-1, 0, 1], format="csc")
    return spsolve(a, rhs)[0] - 1.0


def _r_ode(energy, strength, thickness, mass):
    """Reflection amplitude by integrating psi'' = -2m(E + iW) psi from the
    wall (psi = 0, psi' = 1) back to s = 0 with scipy solve_ivp (DOP853)."""
    k = math.sqrt(2.0 * mass * energy)

    def rhs(s, y):
        w = strength * (s / thickness) ** 2
        return [y[1], -2.0 * mass * (energy + 1j * w) * y[0]]

    sol = solve_ivp(rhs, (thickness, 0.0), [0j, 1.0 + 0j], method="DOP853",
                    rtol=1e-12, atol=1e-14)
    psi, dpsi = sol.y[:, -1]
    z = dpsi / psi
    return (1j * k - z) / (1j * k + z)


# --- profile ----------------------------------------------------------------

def test_cap_profile_power_law():
    # Closed form of the definition W = S (s/L)^p.
    s = np.array([-1.0, 0.0, 5.0, 10.0, 20.0, 25.0])
    w = cap_profile(s, 20.0, 3.0, power=2.0)
    np.testing.assert_allclose(w, [0.0, 0.0, 3.0 / 16.0, 0.75, 3.0, 3.0], rtol=1e-15)


# --- return_probability -----------------------------------------------------

def test_zero_rate_reflects_everything():
    # Unitarity: with no absorption a hard wall reflects all flux, |r|^2 = 1.
    # Includes k L = 3 pi, where psi(0) = 0 and r = -1 (textbook box modes).
    depth = np.linspace(0.0, 10.0, 101)
    k_node = 3.0 * math.pi / 10.0
    energies = np.array([0.01, 0.5, 1.0, 3.7, 0.5 * k_node**2])
    r2 = return_probability(depth, np.zeros_like(depth), 1.0, energies)
    np.testing.assert_allclose(r2, 1.0, rtol=0.0, atol=1e-13)


@pytest.mark.parametrize("mass", [1.0, 3.0])
def test_step_into_uniform_cap_is_fresnel(mass):
    # Textbook matching at a potential step V = -i W0: psi and psi' continuous
    # give r = (k - q)/(k + q), k = sqrt(2mE), q = sqrt(2m(E + i W0)) on the
    # principal branch (Im q > 0, decaying into the layer).  The layer is
    # 100 bohr thick, so the round trip exp(-2 Im q L) < 1e-17 is negligible.
    w0, thickness = 0.5, 100.0
    depth = np.linspace(0.0, thickness, 101)
    energies = np.array([0.2, 1.0, 3.0])
    k = np.sqrt(2.0 * mass * energies)
    q = np.sqrt(2.0 * mass * (energies + 1j * w0))
    assert np.all(q.imag > 0.0) and np.all(np.exp(-2.0 * q.imag * thickness) < 1e-17)
    expected = np.abs((k - q) / (k + q)) ** 2
    got = return_probability(depth, np.full_like(depth, w0), mass, energies)
    np.testing.assert_allclose(got, expected, rtol=0.0, atol=1e-12)


@pytest.mark.parametrize("strength", [0.3, 1.1])
def test_matches_finite_difference_spsolve(strength):
    # Independent reference: finite-difference stationary problem solved with
    # scipy.sparse.linalg.spsolve at n and 2n nodes, Richardson-extrapolated
    # (error O(h^4), measured ~4e-11 here).
    thickness, mass = 20.0, 1.0
    depth = np.linspace(0.0, thickness, 201)
    rate = cap_profile(depth, thickness, strength)
    for energy in (0.5, 2.0):
        r1 = _r_finite_difference(energy, strength, thickness, mass, 8000)
        r2 = _r_finite_difference(energy, strength, thickness, mass, 16000)
        ref = abs((4.0 * r2 - r1) / 3.0) ** 2
        got = return_probability(depth, rate, mass, [energy])[0]
        assert abs(got - ref) < 1e-6


@pytest.mark.parametrize("strength", [0.3, 1.1])
def test_matches_solve_ivp(strength):
    # Independent reference: scipy.integrate.solve_ivp (DOP853, rtol 1e-12)
    # of the stationary ODE from the wall; agreement measured ~1e-13, which
    # backs the ~1e-10 absolute accuracy claim.
    thickness, mass = 20.0, 1.0
    depth = np.linspace(0.0, thickness, 201)
    rate = cap_profile(depth, thickness, strength)
    energies = np.array([0.5, 2.0])
    got = return_probability(depth, rate, mass, energies)
    ref = np.array([abs(_r_ode(e, strength, thickness, mass)) ** 2 for e in energies])
    np.testing.assert_allclose(got, ref, rtol=0.0, atol=1e-10)


def test_weak_smooth_cap_follows_round_trip_attenuation():
    # Semiclassical (WKB, textbook) limit: a weak, slowly varying CAP hardly
    # reflects, so |r|^2 ~ exp(-4 integral(W ds) / (hbar v)), v = sqrt(2E/m),
    # integral(W ds) = S L / 3 for power 2.  Corrections are O(W/E) in the
    # exponent; with W/E <= 0.01 the agreement is measured at 9e-5 relative.
    thickness, strength, energy, mass = 80.0, 0.01, 1.0, 1.0
    depth = np.linspace(0.0, thickness, 201)
    got = return_probability(depth, cap_profile(depth, thickness, strength), mass, [energy])[0]
    v = math.sqrt(2.0 * energy / mass)
    expected = math.exp(-4.0 * strength * thickness / 3.0 / v)
    assert got == pytest.approx(expected, rel=1e-3)


def test_absorbing_layer_never_returns_more_than_it_receives():
    # Continuity equation with V = -iW, W >= 0 (textbook): the layer only
    # removes flux, so 0 <= |r|^2 <= 1 for any non-negative profile.
    rng = np.random.default_rng(7)
    depth = np.linspace(0.0, 15.0, 61)
    rate = np.abs(np.cumsum(rng.normal(size=depth.size))) * 0.05
    r2 = return_probability(depth, rate, 1.0, np.geomspace(0.05, 5.0, 40))
    assert np.all(r2 >= 0.0) and np.all(r2 <= 1.0 + 1e-13)


def test_sub_grid_is_converged(monkeypatch):
    # Self-convergence (numerical analysis, not an outside value): refining
    # the sub-grid fourfold changes |r|^2 by far less than the 1e-10 target.
    depth = np.linspace(0.0, 20.0, 257)
    energies = np.geomspace(0.5, 2.0, 16)
    for strength in (0.1, 1.0, 100.0):
        rate = cap_profile(depth, 20.0, strength)
        coarse = return_probability(depth, rate, 1.0, energies)
        monkeypatch.setattr(tuning, "_CELL_PHASE", tuning._CELL_PHASE / 4.0)
        fine = return_probability(depth, rate, 1.0, energies)
        monkeypatch.undo()
        assert np.max(np.abs(coarse - fine)) < 1e-10


def test_vectorised_shape():
    depth = np.linspace(0.0, 10.0, 41)
    rate = cap_profile(depth, 10.0, 1.0)
    e = np.array([[0.5, 1.0], [1.5, 2.0]])
    out = return_probability(depth, rate, 1.0, e)
    assert out.shape == (2, 2)
    np.testing.assert_array_equal(out.ravel(), return_probability(depth, rate, 1.0, e.ravel()))


def test_bad_input_raises_job_error():
    depth = np.linspace(0.0, 10.0, 11)
    with pytest.raises(JobError):
        return_probability(depth, -np.ones_like(depth), 1.0, [1.0])
    with pytest.raises(JobError):
        return_probability(depth**2, np.ones_like(depth), 1.0, [1.0])
    with pytest.raises(JobError):
        return_probability(depth, np.ones_like(depth), 1.0, [0.0])
    with pytest.raises(JobError):
        tune_cap_strength(20.0, 1.0, 2.0, 0.5)


# --- tune_cap_strength ------------------------------------------------------

def test_tuned_strength_absorbs_the_window(tuned_20):
    # Own measurement: worst ~4.9e-7 at S ~ 1.12 hartree for a 20 bohr
    # quadratic layer (a few wavelengths deep), consistent with the common
    # practice that such layers return 1e-4 or less; the bound is 1e-4.
    strength, worst = tuned_20
    assert worst < 1e-4
    # The reported worst is the sampled maximum at that strength ...
    assert worst == pytest.approx(_worst(20.0, strength), rel=1e-12)
    # ... and the 64 geometric samples catch the maximum of a dense scan.
    assert _worst(20.0, strength, energies=np.geomspace(*WINDOW, 400)) < 1.5 * worst


def test_tuned_strength_beats_tenfold_detuning(tuned_20):
    # Defining property of the minimiser, and the physics of the bracket:
    # 10x weaker leaks through the round trip, 10x stronger reflects.
    strength, worst = tuned_20
    assert worst <= _worst(20.0, 10.0 * strength)
    assert worst <= _worst(20.0, 0.1 * strength)
    assert worst <= _worst(20.0, 1.5 * strength)
    assert worst <= _worst(20.0, strength / 1.5)


def test_thicker_layer_returns_less_at_tuned_strength(tuned_20):
    # Common practice: at fixed strength a thicker layer has a gentler
    # gradient and a longer path, so it returns less.
    strength, _ = tuned_20
    worst = [_worst(thickness, strength) for thickness in (10.0, 20.0, 40.0)]
    assert worst[0] > worst[1] > worst[2]


# --- layer_scattering (free space on both sides: periodic axes) -------------

def _rt_finite_difference(energy, rate_fn, thickness, mass, n):
    """Reflection and transmission amplitudes from the 3-point finite-difference
    stationary equation on [0, L] with outgoing-wave conditions on both sides,
    solved with scipy spsolve.

    Incident side as in _r_finite_difference (psi' + ik psi = 2ik at s = 0);
    far side psi' = ik psi at s = L (only psi = t e^{ik(s-L)} beyond), with the
    ghost node psi_{n+1} = psi_{n-1} + 2 h ik psi_n.  r = psi_0 - 1, t = psi_n.
    Needs W = 0 at both faces, so the boundary equations are the free ones.
    """
    h = thickness / n
    s = h * np.arange(n + 1)
    k = math.sqrt(2.0 * mass * energy)
    w = rate_fn(s)
    t = 1.0 / (2.0 * mass * h * h)
    main = (2.0 * t - 1j * w - energy).astype(complex)
    upper = np.full(n, -t, dtype=complex)
    lower = np.full(n, -t, dtype=complex)
    main[0] += -t * 2.0 * h * 1j * k          # ghost node at s = -h
    upper[0] += -t
    main[-1] += -t * 2.0 * h * 1j * k         # ghost node at s = L + h
    lower[-1] += -t
    rhs = np.zeros(n + 1, dtype=complex)
    rhs[0] = -t * 2.0 * h * 2j * k
    psi = spsolve(sparse.diags([lower, main, upper], [-1, 0, 1], format="csc"), rhs)
    return psi[0] - 1.0, psi[-1]


def _layer_ode(energy, rate_fn, thickness, mass, n_quad=20001):
    """(R, T, absorbed) by integrating psi'' = -2m(E + iW) psi with scipy
    solve_ivp (DOP853) from the far side, where psi = e^{ik(s-L)} exactly
    (psi(L) = 1, psi'(L) = ik), back to s = 0.  There psi = a e^{iks} +
    b e^{-iks} gives R = |b/a|^2, T = 1/|a|^2, and the continuity equation for
    V = -iW (textbook: d|psi|^2/dt = -div j - (2/hbar) W |psi|^2) gives the
    absorbed fraction (2/hbar) integral(W |psi|^2 ds) / (v |a|^2), v = k/m,
    from the dense solution by scipy simpson."""
    k = math.sqrt(2.0 * mass * energy)

    def rhs(s, y):
        return [y[1], -2.0 * mass * (energy + 1j * rate_fn(s)) * y[0]]

    sol = solve_ivp(rhs, (thickness, 0.0), [1.0 + 0j, 1j * k], method="DOP853",
                    rtol=1e-12, atol=1e-14, dense_output=True)
    psi0, dpsi0 = sol.y[:, -1]
    a = 0.5 * (psi0 + dpsi0 / (1j * k))
    b = 0.5 * (psi0 - dpsi0 / (1j * k))
    s = np.linspace(0.0, thickness, n_quad)
    dens = np.abs(sol.sol(s)[0]) ** 2
    absorbed = 2.0 * simpson(rate_fn(s) * dens, x=s) / ((k / mass) * abs(a) ** 2)
    return abs(b / a) ** 2, 1.0 / abs(a) ** 2, absorbed


def _slab(energies, w0, thickness, mass):
    """Textbook rectangular barrier (e.g. Griffiths, Introduction to QM,
    problem 2.33; Merzbacher ch. 6) continued to the complex potential -i W0:
    q = sqrt(2m(E + i W0)),
        t = 1 / (cos qL - i (q^2 + k^2)/(2kq) sin qL),
        r = i (q^2 - k^2)/(2kq) sin qL * t   (up to a phase)."""
    k = np.sqrt(2.0 * mass * energies)
    q = np.sqrt(2.0 * mass * (energies + 1j * w0))
    t = 1.0 / (np.cos(q * thickness) - 1j * (q * q + k * k) / (2.0 * k * q) * np.sin(q * thickness))
    r = 1j * (q * q - k * k) / (2.0 * k * q) * np.sin(q * thickness) * t
    return np.abs(r) ** 2, np.abs(t) ** 2


def _worst_periodic(thickness, strength, power=2.0, mass=1.0, energies=WINDOW_ENERGIES):
    depth = np.linspace(0.0, thickness, 257)
    refl, trans = layer_scattering(depth, cap_profile(depth, thickness, strength, power),
                                   mass, energies)
    return float((refl + trans).max())


def test_layer_zero_rate_is_transparent():
    # No layer (W = 0): free propagation, R = 0 and T = 1 (textbook).  R comes
    # out ~1e-32 (zero up to roundoff); T - 1 is roundoff accumulated in the
    # product of ~2e4 cells at L = 100, E = 50 (measured 6e-11, within the
    # module's 1e-10 target; <= 1e-12 for L <= 10).
    energies = np.array([0.01, 0.5, 1.0, 3.7, 50.0])
    for thickness in (1.0, 10.0, 100.0):
        depth = np.linspace(0.0, thickness, 101)
        refl, trans = layer_scattering(depth, np.zeros_like(depth), 1.0, energies)
        assert np.all(refl < 1e-28)
        np.testing.assert_allclose(trans, 1.0, rtol=0.0,
                                   atol=1e-10 if thickness > 10.0 else 2e-12)


@pytest.mark.parametrize("mass", [1.0, 3.0])
def test_layer_uniform_slab_is_rectangular_barrier(mass):
    # Closed form: rectangular barrier with complex potential (_slab).  The
    # Magnus step is exact for constant W; agreement measured 4e-17 absolute
    # in R, 1.3e-13 relative in T.
    w0, thickness = 0.3, 7.3
    depth = np.linspace(0.0, thickness, 11)
    energies = np.array([0.2, 1.0, 3.0])
    refl, trans = layer_scattering(depth, np.full_like(depth, w0), mass, energies)
    r_ref, t_ref = _slab(energies, w0, thickness, mass)
    assert np.all(t_ref > 1e-5)          # a genuinely partial transmission
    np.testing.assert_allclose(refl, r_ref, rtol=0.0, atol=1e-14)
    np.testing.assert_allclose(trans, t_ref, rtol=1e-11, atol=0.0)


def test_layer_opaque_slab_keeps_relative_accuracy():
    # Same closed form deep in the opaque regime (T ~ 1e-31 .. 1e-11): the
    # tree product divides out ~exp(50) and T comes from the tracked scale,
    # so it stays accurate *relative* to its size (measured 3e-13).
    w0, thickness, mass = 0.5, 60.0, 1.0
    depth = np.linspace(0.0, thickness, 61)
    energies = np.array([0.2, 1.0, 3.0])
    refl, trans = layer_scattering(depth, np.full_like(depth, w0), mass, energies)
    r_ref, t_ref = _slab(energies, w0, thickness, mass)
    assert np.all(t_ref < 1e-10) and np.all(t_ref > 1e-40)
    np.testing.assert_allclose(trans, t_ref, rtol=1e-11, atol=0.0)
    np.testing.assert_allclose(refl, r_ref, rtol=0.0, atol=1e-14)


@pytest.mark.parametrize("power", [None, 2.0, 3.0])
def test_layer_weak_rate_follows_beer_lambert(power):
    # Semiclassical (WKB) / Beer-Lambert: the amplitude decays at rate W/hbar
    # while moving at v = sqrt(2E/m), so T ~ exp(-2 integral(W ds) / (hbar v)),
    # integral = W0 L (uniform) or S L/(p+1) (power law).  Corrections are
    # O((W/E)^2): Im q = k (W/2E)(1 - (W/E)^2/8 + ...) in the exponent and
    # ~(W/4E)^2 Fresnel reflections at any step; with W/E <= 0.04 they stay
    # below 7e-4 relative (measured: 6.6e-4 uniform at E = 0.5, <= 1.7e-4 for
    # the ramps).  T is 0.09 .. 0.8 here, far from the no-layer value 1.
    thickness, strength, mass = 60.0, 0.02, 1.0
    depth = np.linspace(0.0, thickness, 241)
    if power is None:
        rate, integral = np.full_like(depth, strength), strength * thickness
    else:
        rate = cap_profile(depth, thickness, strength, power)
        integral = strength * thickness / (power + 1.0)
    energies = np.array([0.5, 1.0, 2.0, 4.0])
    v = np.sqrt(2.0 * energies / mass)
    refl, trans = layer_scattering(depth, rate, mass, energies)
    np.testing.assert_allclose(trans, np.exp(-2.0 * integral / v), rtol=1e-3)
    assert np.all(refl < 1e-4)


@pytest.mark.parametrize("power,strength", [(2.0, 0.3), (2.0, 2.1), (3.0, 4.0)])
def test_layer_matches_solve_ivp_and_balances_absorption(power, strength):
    # Independent reference: scipy solve_ivp (DOP853) from the far side
    # (_layer_ode), including the step W: S -> 0 at the back face.  R agrees
    # to 2e-14 absolute, T to 8e-10 relative (down to T ~ 1e-11; the limit
    # is solve_ivp's atol); and R + T + absorbed = 1 with the absorbed
    # fraction from the continuity equation on the solve_ivp wavefunction
    # (measured |defect| <= 5e-13).
    thickness, mass = 20.0, 1.0
    depth = np.linspace(0.0, thickness, 257)
    energies = np.array([0.5, 2.0])
    refl, trans = layer_scattering(depth, cap_profile(depth, thickness, strength, power),
                                   mass, energies)

    def rate_fn(s):
        return strength * (s / thickness) ** power

    for i, energy in enumerate(energies):
        r_ref, t_ref, absorbed = _layer_ode(energy, rate_fn, thickness, mass)
        assert abs(refl[i] - r_ref) < 1e-12
        assert trans[i] == pytest.approx(t_ref, rel=1e-8)
        assert abs(refl[i] + trans[i] + absorbed - 1.0) < 1e-11


def test_layer_matches_finite_difference_spsolve():
    # Independent reference: finite differences with outgoing-wave conditions
    # on both sides (_rt_finite_difference), n and 2n nodes, Richardson-
    # extrapolated.  A sin^2 bump vanishes at both faces, so the boundary
    # equations are free and the error is a clean O(h^2): unextrapolated T
    # is off by 1.6e-6 relative, extrapolated by 4e-10 (R: 4e-13 absolute).
    thickness, strength, mass = 20.0, 0.2, 1.0

    def rate_fn(s):
        return strength * np.sin(math.pi * s / thickness) ** 2

    depth = np.linspace(0.0, thickness, 257)
    for energy in (0.5, 2.0):
        r1, t1 = _rt_finite_difference(energy, rate_fn, thickness, mass, 8000)
        r2, t2 = _rt_finite_difference(energy, rate_fn, thickness, mass, 16000)
        r_ref = abs((4.0 * r2 - r1) / 3.0) ** 2
        t_ref = abs((4.0 * t2 - t1) / 3.0) ** 2
        refl, trans = layer_scattering(depth, rate_fn(depth), mass, [energy])
        assert 1e-4 < t_ref < 0.5          # partial transmission, not trivial
        assert abs(refl[0] - r_ref) < 1e-10
        assert trans[0] == pytest.approx(t_ref, rel=1e-8)


def test_layer_transmission_is_reciprocal():
    # Reciprocity in 1-D (textbook; holds for complex symmetric H = p^2/2m - iW):
    # t is the same from either side, although R is not (here the back face is
    # a step W: S -> 0, which reflects 0.05 .. 0.23 of a wave arriving from
    # the far side, >1e5 times the ramp's R).
    depth = np.linspace(0.0, 20.0, 257)
    rate = cap_profile(depth, 20.0, 2.1, 2.0)
    energies = np.geomspace(0.5, 2.0, 5)
    r_in, t_in = layer_scattering(depth, rate, 1.0, energies)
    r_back, t_back = layer_scattering(depth, rate[::-1].copy(), 1.0, energies)
    np.testing.assert_allclose(t_back, t_in, rtol=1e-12)
    assert np.all(r_back > 1e3 * r_in)


def test_layer_never_creates_probability():
    # Continuity equation with W >= 0: R + T <= 1, both >= 0.
    rng = np.random.default_rng(7)
    depth = np.linspace(0.0, 15.0, 61)
    rate = np.abs(np.cumsum(rng.normal(size=depth.size))) * 0.05
    refl, trans = layer_scattering(depth, rate, 1.0, np.geomspace(0.05, 5.0, 40))
    assert np.all(refl >= 0.0) and np.all(trans >= 0.0)
    assert np.all(refl + trans <= 1.0 + 1e-13)
    assert np.all(refl + trans < 0.5)    # and it does absorb (measured max 0.07)


def test_layer_sub_grid_is_converged(monkeypatch):
    # Self-convergence (numerical analysis): a fourfold finer sub-grid changes
    # R by < 1e-10 absolute and T by < 1e-8 relative, also for an opaque
    # layer (strength 100 hartree, T ~ 1e-86); measured 1e-13 and 2e-10.
    depth = np.linspace(0.0, 20.0, 257)
    energies = np.geomspace(0.5, 2.0, 8)
    for strength in (0.1, 1.0, 100.0):
        rate = cap_profile(depth, 20.0, strength)
        r_c, t_c = layer_scattering(depth, rate, 1.0, energies)
        monkeypatch.setattr(tuning, "_CELL_PHASE", tuning._CELL_PHASE / 4.0)
        r_f, t_f = layer_scattering(depth, rate, 1.0, energies)
        monkeypatch.undo()
        assert np.max(np.abs(r_c - r_f)) < 1e-10
        np.testing.assert_allclose(t_c, t_f, rtol=1e-8, atol=0.0)


def test_layer_vectorised_shape_and_bad_input():
    depth = np.linspace(0.0, 10.0, 41)
    rate = cap_profile(depth, 10.0, 1.0)
    e = np.array([[0.5, 1.0], [1.5, 2.0]])
    refl, trans = layer_scattering(depth, rate, 1.0, e)
    assert refl.shape == trans.shape == (2, 2)
    r_flat, t_flat = layer_scattering(depth, rate, 1.0, e.ravel())
    np.testing.assert_array_equal(refl.ravel(), r_flat)
    np.testing.assert_array_equal(trans.ravel(), t_flat)
    with pytest.raises(JobError):
        layer_scattering(depth, -rate - 1.0, 1.0, [1.0])
    with pytest.raises(JobError):
        layer_scattering(depth, rate, 0.0, [1.0])
    with pytest.raises(JobError):
        layer_scattering(depth, rate, 1.0, [-1.0])


# --- tune_cap_strength(periodic=True) ---------------------------------------

@pytest.fixture(scope="module")
def tuned_periodic_20():
    return {p: tune_cap_strength(20.0, 1.0, *WINDOW, power=p, periodic=True)
            for p in (2.0, 3.0)}


@pytest.fixture(scope="module")
def tuned_wall_20(tuned_20):
    return {2.0: tuned_20, 3.0: tune_cap_strength(20.0, 1.0, *WINDOW, power=3.0)}


# Own measurement (m = 1, L = 20 bohr, [0.5, 2] hartree, 64 samples): worst
# R + T = 1.716e-6 at S = 2.09 hartree (power 2) and 3.660e-8 at S = 4.03
# (power 3), vs. wall-model worst returns 4.89e-7 and 9.58e-9.  At the optimum
# R (peaks at E_min) balances T (peaks at E_max); T(E_max) agrees with the WKB
# estimate |2 sqrt(k q_L)/(k + q_L)|^2 exp(-2 integral(Im q ds)) to 5e-4.
# Bounds: +15 % / +25 % over the measurement, room for the minimiser's
# tolerance (xatol 1e-3 in log S) and sampling (a 400-point scan is within 1 %).
_PERIODIC_BOUND = {2.0: 2.0e-6, 3.0: 4.5e-8}


@pytest.mark.parametrize("power", [2.0, 3.0])
def test_periodic_tuning_absorbs_the_window(tuned_periodic_20, power):
    strength, worst = tuned_periodic_20[power]
    assert worst < _PERIODIC_BOUND[power]
    # The reported worst is the sampled max of R + T at that strength ...
    assert worst == pytest.approx(_worst_periodic(20.0, strength, power), rel=1e-12)
    # ... and the samples catch the maximum of a dense scan.
    dense = _worst_periodic(20.0, strength, power, energies=np.geomspace(*WINDOW, 400))
    assert dense < 1.05 * worst
    # Semiclassical check of T at the fastest energy, where W reaches ~2E so
    # the weak-rate Beer-Lambert form is off by 2x .. 10x: WKB with the exact
    # local q = sqrt(2m(E + iW)), psi ~ q^{-1/2} exp(i integral q), matched to
    # free space across the back-face step (t_step = 2q/(q + k)):
    #     T ~ |2 sqrt(k q_L) / (k + q_L)|^2 exp(-2 integral(Im q ds)).
    # Measured agreement 4.5e-4 (power 2) and 3e-4 (power 3).
    e = WINDOW[1]
    k = math.sqrt(2.0 * e)
    s = np.linspace(0.0, 20.0, 4001)
    q = np.sqrt(2.0 * (e + 1j * strength * (s / 20.0) ** power))
    t_wkb = abs(2.0 * np.sqrt(k * q[-1]) / (k + q[-1])) ** 2 * math.exp(-2.0 * simpson(q.imag, x=s))
    depth = np.linspace(0.0, 20.0, 257)
    _, trans = layer_scattering(depth, cap_profile(depth, 20.0, strength, power), 1.0, [e])
    assert trans[0] == pytest.approx(t_wkb, rel=2e-3)


@pytest.mark.parametrize("power", [2.0, 3.0])
def test_periodic_tuning_is_a_minimum(tuned_periodic_20, tuned_wall_20, power):
    # Defining property of the minimiser.  The wall-tuned strength is one of
    # the detuned points: on a periodic axis it lets ~1e-4 .. 1e-3 wrap round
    # (measured 6.7e-4 and 9.7e-5, 390x and 2700x the optimum), the problem
    # this mode fixes.
    strength, worst = tuned_periodic_20[power]
    for factor in (0.1, 1.0 / 1.5, 1.5, 10.0):
        assert worst <= _worst_periodic(20.0, factor * strength, power)
    wall_strength, _ = tuned_wall_20[power]
    assert _worst_periodic(20.0, wall_strength, power) > 100.0 * worst


@pytest.mark.parametrize("power", [2.0, 3.0])
def test_periodic_worst_exceeds_wall_worst(tuned_periodic_20, tuned_wall_20, power):
    # Multiple-scattering (Fabry-Perot) sum for the layer in front of a wall
    # (reflection -1): r_wall = r - t t' / (1 + r'), with t' = t (reciprocity)
    # and r' the layer's reflection from the far side.  Hence, at every energy,
    #     |r_wall|^2 <= (sqrt(R) + T / (1 - |r'|))^2 <= R + T
    # whenever 2 sqrt(R)/(1 - |r'|) + T/(1 - |r'|)^2 <= 1 (true for a tuned
    # layer: R, T ~ 1e-6, |r'| < 0.6).  So at the periodic optimum the wall
    # model returns less than R + T, and the wall optimum is lower still
    # (measured: 3.5x lower for power 2, 3.8x for power 3).
    strength, worst = tuned_periodic_20[power]
    _, wall_worst = tuned_wall_20[power]
    depth = np.linspace(0.0, 20.0, 257)
    rate = cap_profile(depth, 20.0, strength, power)
    refl, trans = layer_scattering(depth, rate, 1.0, WINDOW_ENERGIES)
    r_far, _ = layer_scattering(depth, rate[::-1].copy(), 1.0, WINDOW_ENERGIES)
    wall = return_probability(depth, rate, 1.0, WINDOW_ENERGIES)
    bound = (np.sqrt(refl) + trans / (1.0 - np.sqrt(r_far))) ** 2
    assert np.all(wall <= bound * (1.0 + 1e-9))
    assert np.all(bound <= refl + trans)
    assert wall_worst < worst / 2.0
