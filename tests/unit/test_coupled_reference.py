"""Checks of the coupled-surface references (tests/coupled_reference.py) against
sources outside the project: closed forms of textbook quantum mechanics, the
symmetries of the scattering matrix, and independent scipy integrations of the
same equations.  The source is named beside each check; "from memory" means
recalled without the book at hand."""
from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp

import coupled_reference as cr


# -- closed forms and independent integrations used by the checks -------------------
def rectangular_barrier_amplitude(energy, height, width, mass, hbar=1.0):
    """Transmission amplitude t of a rectangular barrier of ``height`` on [0, width].

    psi = exp(i k x) + r exp(-i k x) on the left, t exp(i k x) on the right:
        t = exp(-i k a) / (cosh(kappa a) + i (kappa^2 - k^2) / (2 k kappa) sinh(kappa a)),
    k = sqrt(2 m E) / hbar, kappa = sqrt(2 m (V0 - E)) / hbar (imaginary above
    the top, where cosh and sinh turn into cos and sin); e.g. Griffiths,
    Introduction to Quantum Mechanics (2nd ed.), problem 2.33, and
    Cohen-Tannoudji, Diu & Laloe vol. 1, complement H_I (from memory).
    """
    k = np.sqrt(2.0 * mass * energy) / hbar
    kappa = np.sqrt(2.0 * mass * (height - energy) + 0j) / hbar
    return np.exp(-1j * k * width) / (np.cosh(kappa * width)
                                      + 1j * (kappa**2 - k**2) / (2.0 * k * kappa) * np.sinh(kappa * width))


def rectangular_barrier_transmission(energy, height, width, mass, hbar=1.0):
    """|t|^2 of a rectangular barrier, the form quoted in most texts (from memory):
    T = 1 / (1 + V0^2 sinh^2(kappa a) / (4 E (V0 - E))) below the top and
    T = 1 / (1 + V0^2 sin^2(q a) / (4 E (E - V0))) above it, q = sqrt(2 m (E - V0)) / hbar."""
    energy = np.asarray(energy, float)
    below = energy < height
    kappa = np.sqrt(2.0 * mass * np.abs(height - energy)) / hbar
    sin2 = np.where(below, np.sinh(kappa * width) ** 2, np.sin(kappa * width) ** 2)
    return 1.0 / (1.0 + height**2 * sin2 / (4.0 * energy * np.abs(height - energy)))


def shooting_reference(potential, x_min, x_max, mass, energy, incident=0, hbar=1.0):
    """T, R per channel by direct integration of the coupled second-order equations.

    The 2S^2 first-order system (psi, psi') of S independent solutions is
    integrated with scipy's DOP853 (Dormand-Prince 8(5,3); E. Hairer, S. P.
    Norsett and G. Wanner, Solving Ordinary Differential Equations I, 1993) at
    rtol 1e-12 from x_max (outgoing / decaying waves) to x_min, where the
    incoming plus reflected / decaying waves are matched.  Straightforward, but
    unstable for long closed-channel stretches: use it where kappa L is modest.
    ``potential(x)`` returns the (S, S) matrix at one point (constant beyond the ends).
    """
    scale = 2.0 * mass / hbar**2
    S = potential(x_min).shape[0]
    levels_l, levels_r = np.diag(potential(x_min)), np.diag(potential(x_max))

    def waves(levels, x, sign):
        excess = energy - levels
        k = np.sqrt(scale * np.abs(excess))
        value = np.where(excess > 0, np.exp(sign * 1j * k * x) / np.sqrt(k), 1.0)
        slope = np.where(excess > 0, sign * 1j * k * value, -sign * k * value)
        return excess > 0, k, value, slope

    open_r, _, out_r, dout_r = waves(levels_r, x_max, +1)          # closed: exp(-kappa (x - x_max))
    psi0 = np.diag(out_r).astype(complex)
    dpsi0 = np.diag(dout_r).astype(complex)

    def rhs(x, y):
        psi = y[: S * S].reshape(S, S)
        return np.concatenate([y[S * S:], (scale * (potential(x) - energy * np.eye(S)) @ psi).ravel()])

    sol = solve_ivp(rhs, (x_max, x_min), np.concatenate([psi0.ravel(), dpsi0.ravel()]),
                    method="DOP853", rtol=1e-12, atol=1e-14)
    psi = sol.y[: S * S, -1].reshape(S, S)
    dpsi = sol.y[S * S:, -1].reshape(S, S)
    open_l, k_l, back_l, dback_l = waves(levels_l, x_min, -1)     # closed: exp(+kappa (x - x_min))
    k_inc = k_l[incident]
    f = np.exp(1j * k_inc * x_min) / np.sqrt(k_inc)
    # psi c - g beta = f e_inc,  psi' c - g' beta = f' e_inc
    system = np.block([[psi, -np.diag(back_l)], [dpsi, -np.diag(dback_l)]])
    rhs_vec = np.zeros(2 * S, complex)
    rhs_vec[incident], rhs_vec[S + incident] = f, 1j * k_inc * f
    c_beta = np.linalg.solve(system, rhs_vec)
    return (np.where(open_r, np.abs(c_beta[:S]) ** 2, 0.0), np.where(open_l, np.abs(c_beta[S:]) ** 2, 0.0))


def two_barrier_grid(heights, offsets, half_width=1.0, x_max=5.0, points=1001):
    """Uncoupled diagonal potential: channel s is offsets[s] plus a barrier
    heights[s] on the cells of |x| <= half_width; returns (x, V, barrier width)."""
    x = np.linspace(-x_max, x_max, points)
    inside = np.abs(x) <= half_width + 1e-9
    width = inside.sum() * (x[1] - x[0])       # cells [x_j - h/2, x_j + h/2]
    V = np.zeros((len(heights), len(heights), x.size))
    for s, (height, offset) in enumerate(zip(heights, offsets)):
        V[s, s] = offset + height * inside
    return x, V, width


# -- Landau-Zener -----------------------------------------------------------------------
def test_landau_zener_formula_values():
    # the formula itself (Landau 1932; Zener 1932): exp(-2 pi V12^2 / (hbar v |dF|))
    assert cr.landau_zener_probability(0.0, 1.0, 1.0) == 1.0          # no coupling: stays diabatic
    assert cr.landau_zener_probability(0.1, 2.0, -0.5, hbar=2.0) == pytest.approx(
        np.exp(-2 * np.pi * 0.01 / (2.0 * 2.0 * 0.5)), rel=1e-15)
    # slow passage follows the adiabatic curve: the diabatic survival vanishes
    assert cr.landau_zener_probability(1.0, 1e-3, 1.0) < 1e-300


def test_landau_zener_against_two_state_integration():
    # Independent check: integrate i hbar c' = H(t) c for H = [[a t / 2, V12], [V12, -a t / 2]]
    # (a = v (F1 - F2), a classical trajectory through the crossing) with scipy's DOP853 from
    # t = -T to T, starting in the adiabatic state that is diabatic state 1 at -T (the lower
    # one) and reading the population of the adiabatic state that is diabatic state 1 at +T
    # (the upper one): in the adiabatic basis the finite-T error falls off as 1 / T^2
    # instead of the diabatic basis' oscillating V12 / (a T) (common practice).
    coupling, velocity, slope_difference = 0.5, 1.5, 1.4
    a = velocity * slope_difference
    p_formula = cr.landau_zener_probability(coupling, velocity, slope_difference)
    assert 0.2 < p_formula < 0.8                                     # a split, not a limit

    def hamiltonian(t):
        return np.array([[0.5 * a * t, coupling], [coupling, -0.5 * a * t]])

    t_end = 40.0
    start = np.linalg.eigh(hamiltonian(-t_end))[1][:, 0].astype(complex)
    sol = solve_ivp(lambda t, c: -1j * (hamiltonian(t) @ c), (-t_end, t_end), start, method="DOP853",
                    rtol=1e-10, atol=1e-12)
    upper = np.linalg.eigh(hamiltonian(t_end))[1][:, 1]
    assert np.abs(upper[0]) > 0.99                                   # upper at +T is diabatic 1
    assert np.abs(upper @ sol.y[:, -1]) ** 2 == pytest.approx(p_formula, abs=2e-5)


# -- coupled channels: zero coupling equals the single-channel closed form -------------
@pytest.mark.parametrize("incident", [0, 1])
def test_zero_coupling_is_two_rectangular_barriers(incident):
    mass = 1.0
    heights, offsets = (1.0, 0.6), (0.0, 0.3)
    x, V, width = two_barrier_grid(heights, offsets)
    energies = np.linspace(0.35, 2.5, 120)                            # below and above both tops
    result = cr.coupled_channel_transmission(x, V, mass, energies, incident=incident)
    kinetic = energies - offsets[incident]
    expected = rectangular_barrier_transmission(kinetic, heights[incident], width, mass)
    assert np.abs(result.transmission[:, incident] - expected).max() < 1e-8
    assert np.abs(result.transmission_amplitude[:, incident]
                  - rectangular_barrier_amplitude(kinetic, heights[incident], width, mass)).max() < 1e-8
    assert np.abs(result.reflection[:, incident] - (1.0 - expected)).max() < 1e-8
    other = 1 - incident
    assert np.all(result.transmission[:, other] == 0.0) and np.all(result.reflection[:, other] < 1e-28)


def test_rectangular_barrier_closed_forms_agree():
    # the two textbook forms (amplitude and |t|^2) describe the same barrier
    energies = np.linspace(0.05, 3.0, 50)
    energies = energies[np.abs(energies - 1.0) > 1e-3]
    t = rectangular_barrier_amplitude(energies, 1.0, 2.0, 1.0)
    assert np.allclose(np.abs(t) ** 2, rectangular_barrier_transmission(energies, 1.0, 2.0, 1.0),
                       rtol=1e-12, atol=0)


def test_incidence_from_the_right_sees_the_mirrored_barrier():
    x, V, width = two_barrier_grid((1.0, 0.6), (0.0, 0.3))
    V[1, 1, x > 2.0] += 0.1                                           # asymmetric: a step on the right
    energies = np.linspace(0.5, 2.0, 40) + 1e-3                      # not at the top (0/0 above)
    right = cr.coupled_channel_transmission(x, V, 1.0, energies, incident=0, side="right")
    expected = rectangular_barrier_transmission(energies, 1.0, width, 1.0)
    assert np.abs(right.transmission[:, 0] - expected).max() < 1e-8


# -- coupled channels: the constant-rotation case ------------------------------------------
def test_rotation_decoupled_barrier_pair():
    # V = [[V1, c], [c, V1]] with c nonzero only where the barrier is: the constant rotation
    # (|1> +- |2>) / sqrt(2) decouples it into barriers V0 + c0 and V0 - c0.  A wave in |1>
    # is (|+> + |->) / sqrt(2), so t_11 = (t_+ + t_-) / 2 and t_12 = (t_+ - t_-) / 2
    # (any QM text on two-level systems; the amplitudes from the closed form above).
    mass, height, c0 = 1.0, 1.0, 0.3
    x, V, width = two_barrier_grid((height, height), (0.0, 0.0))
    inside = V[0, 0] > 0
    V[0, 1, inside] = V[1, 0, inside] = c0
    energies = np.linspace(0.2, 3.0, 150)
    energies = energies[np.minimum(np.abs(energies - height - c0), np.abs(energies - height + c0)) > 1e-6]
    result = cr.coupled_channel_transmission(x, V, mass, energies, incident=0)
    t_plus = rectangular_barrier_amplitude(energies, height + c0, width, mass)
    t_minus = rectangular_barrier_amplitude(energies, height - c0, width, mass)
    assert np.abs(result.transmission[:, 0] - np.abs(t_plus + t_minus) ** 2 / 4).max() < 1e-8
    assert np.abs(result.transmission[:, 1] - np.abs(t_plus - t_minus) ** 2 / 4).max() < 1e-8
    assert np.abs(result.transmission_amplitude[:, 1] - (t_plus - t_minus) / 2).max() < 1e-8
    assert result.transmission[:, 1].max() > 0.05                       # the coupling matters here


# -- coupled channels: flux, microreversibility, closed channels ---------------------------
def strong_crossing(x):
    # adiabatic gap 2 C = 0.016 at the crossing against an asymptotic splitting of 0.04
    return cr.avoided_crossing_model(x, slope_energy=0.02, coupling=0.008, coupling_width=1.5)[1]


def test_flux_conservation_strong_avoided_crossing():
    # sum_s (T_s + R_s) = 1: unitarity of the S-matrix for a real symmetric potential
    x = np.linspace(-12.0, 12.0, 1201)
    energies = np.linspace(0.021, 0.08, 200)                           # open: E > 0.02 on both sides
    result = cr.coupled_channel_transmission(x, strong_crossing(x), 2000.0, energies)
    assert result.open_far.all() and result.open_near.all()
    total = result.transmission.sum(axis=1) + result.reflection.sum(axis=1)
    assert np.abs(total - 1.0).max() < 1e-10
    assert result.transmission[:, 0].min() > 0.05 and result.transmission[:, 1].min() > 0.5


def asymmetric_two_channel(x):
    # channel 2 steps up from 0.2 (left) to 0.7 (right); a bump on channel 1; local coupling
    V = np.zeros((2, 2, x.size))
    V[0, 0] = 0.4 * np.exp(-((x - 0.5) ** 2))
    V[1, 1] = 0.2 + 0.25 * (1.0 + np.tanh(2.0 * x)) - 0.6 * np.exp(-(x**2))
    V[0, 1] = V[1, 0] = 0.15 * np.exp(-((x + 0.3) ** 2) / 2.0)
    return V


@pytest.mark.parametrize("energies", [np.linspace(0.75, 1.5, 40),      # all four channels open
                                      np.linspace(0.25, 0.65, 40)])    # channel 2 closed on the right
def test_microreversibility(energies):
    # Time-reversal invariance of a real symmetric potential makes the flux-normalised
    # S-matrix symmetric: P(left a -> right b) = P(right b -> left a) and
    # P(left a -> left b) = P(left b -> left a) (e.g. Messiah, Quantum Mechanics vol. 2,
    # ch. XIX, or Taylor, Scattering Theory, ch. 6; from memory).
    x = np.linspace(-10.0, 10.0, 801)
    V = asymmetric_two_channel(x)
    mass = 1.0
    from_left = [cr.coupled_channel_transmission(x, V, mass, energies, incident=a) for a in (0, 1)]
    from_right = [cr.coupled_channel_transmission(x, V, mass, energies, incident=b, side="right")
                  for b in (0, 1) if (energies > V[b, b, -1]).all()]
    for b, right in enumerate(from_right):
        for a in (0, 1):
            assert np.abs(from_left[a].transmission[:, b] - right.transmission[:, a]).max() < 1e-8
    assert np.abs(from_left[0].reflection[:, 1] - from_left[1].reflection[:, 0]).max() < 1e-8
    for result in from_left + from_right:
        total = result.transmission.sum(axis=1) + result.reflection.sum(axis=1)
        assert np.abs(total - 1.0).max() < 1e-10
    assert from_left[0].reflection[:, 1].max() > 1e-3                   # the coupling matters here


def closed_channel_well(x):
    # channel 2 closed (asymptote 0.5) with a well that holds bound states: the coupling
    # to them gives Feshbach resonances in the open channel 1
    x = np.atleast_1d(x)
    V = np.zeros((2, 2, x.size))
    V[0, 0] = 0.3 * np.exp(-(x**2))
    V[1, 1] = 0.5 - 0.9 * np.exp(-(x**2) / 4.0)
    V[0, 1] = V[1, 0] = 0.1 * np.exp(-(x**2) / 2.0)
    return V


def test_closed_channel_against_direct_integration():
    # channel 2 closed on both sides; the log-derivative reference (Richardson-extrapolated on
    # a grid) against a plain DOP853 shooting integration of the continuous potential
    mass, energies = 1.0, np.array([0.08, 0.26, 0.41, 0.47])
    T, R, error = cr.richardson_transmission(closed_channel_well, -8.0, 8.0, 1601, mass, energies)
    assert np.all(T[:, 1] == 0.0) and np.all(R[:, 1] == 0.0)
    assert np.abs(T[:, 0] + R[:, 0] - 1.0).max() < 1e-10
    for i, energy in enumerate(energies):
        T_shoot, R_shoot = shooting_reference(lambda y: closed_channel_well(y)[:, :, 0], -8.0, 8.0, mass, energy)
        assert T[i, 0] == pytest.approx(T_shoot[0], abs=1e-8)
        assert R[i, 0] == pytest.approx(R_shoot[0], abs=1e-8)
    # the closed channel changes the answer: without coupling T differs
    uncoupled = lambda y: closed_channel_well(y) * np.eye(2)[:, :, None]
    T0, _, _ = cr.richardson_transmission(uncoupled, -8.0, 8.0, 1601, mass, energies)
    assert np.abs(T0[:, 0] - T[:, 0]).max() > 1e-2


def test_long_closed_channel_stays_stable():
    # a closed channel over kappa L ~ 100 (growth e^100 that a shooting method cannot carry):
    # the log-derivative propagation keeps T + R = 1 and agrees with a twice-longer grid
    # whose extra stretch is flat (the flat outside must not change anything)
    mass = 1.0
    energies = np.linspace(0.1, 0.45, 30)
    x = np.linspace(-40.0, 40.0, 2001)
    V = np.zeros((2, 2, x.size))
    V[1, 1] = 5.0
    V[0, 0] = 0.3 * np.exp(-((x / 5.0) ** 2))
    V[0, 1] = V[1, 0] = 0.5 * np.exp(-((x / 5.0) ** 2))
    result = cr.coupled_channel_transmission(x, V, mass, energies)
    assert np.all(np.isfinite(result.transmission))
    assert np.abs(result.transmission[:, 0] + result.reflection[:, 0] - 1.0).max() < 1e-10
    x2 = np.linspace(-60.0, 60.0, 3001)
    V2 = np.zeros((2, 2, x2.size))
    V2[1, 1] = 5.0
    V2[0, 0] = 0.3 * np.exp(-((x2 / 5.0) ** 2))
    V2[0, 1] = V2[1, 0] = 0.5 * np.exp(-((x2 / 5.0) ** 2))
    longer = cr.coupled_channel_transmission(x2, V2, mass, energies)
    assert np.abs(longer.transmission - result.transmission).max() < 1e-10


# -- the model of the wave-packet check ---------------------------------------------------------
def test_avoided_crossing_model_shape_and_asymptotics():
    x, V = cr.avoided_crossing_model(np.linspace(-12.0, 12.0, 1201))
    assert V.shape == (2, 2, x.size)
    assert np.array_equal(V[0, 1], V[1, 0])
    # flat within the grid: within 1e-11 hartree of +-A at the ends, coupling vanished
    assert abs(V[0, 0, 0] + 0.01) < 1e-11 and abs(V[0, 0, -1] - 0.01) < 1e-11
    assert abs(V[0, 1, 0]) < 1e-60
    # the adiabatic gap at the crossing is 2 C (eigenvalues of the 2x2 matrix)
    centre = np.argmin(np.abs(x))
    gap = np.diff(np.linalg.eigvalsh(V[:, :, centre]))[0]
    assert gap == pytest.approx(2 * 0.005, rel=1e-12)


def test_avoided_crossing_model_converges_on_the_packet_band():
    # the band of the suggested packet (momentum 10-14 bohr^-1 on surface 1 from the left):
    # the plain run at dx = 0.02 is within 1e-4 of the Richardson value, which is
    # converged (two Richardson pairs agree to 1e-8); the surfaces share the flux
    mass = 2000.0
    energies = np.linspace(10.0**2 / (2 * mass), 14.0**2 / (2 * mass), 200) - 0.01
    model = lambda y: cr.avoided_crossing_model(y)[1]
    T_a, _, _ = cr.richardson_transmission(model, -12.0, 12.0, 601, mass, energies)
    T_b, R_b, _ = cr.richardson_transmission(model, -12.0, 12.0, 1201, mass, energies)
    assert np.abs(T_a - T_b).max() < 1e-8
    x = np.linspace(-12.0, 12.0, 1201)
    plain = cr.coupled_channel_transmission(x, model(x), mass, energies)
    assert np.abs(plain.transmission - T_b).max() < 1e-4
    assert 0.05 < T_b[:, 0].min() and T_b[:, 0].max() < 0.5             # population splits
    assert R_b.max() < 1e-8                                              # reflection negligible


# -- bad input --------------------------------------------------------------------------------
def test_bad_input_is_refused_with_a_reason():
    x = np.linspace(-5.0, 5.0, 201)
    V = np.zeros((2, 2, x.size))
    V[0, 1] = V[1, 0] = 0.1                                               # coupled at the ends
    with pytest.raises(ValueError, match="off-diagonal"):
        cr.coupled_channel_transmission(x, V, 1.0, 1.0)
    V[0, 1] = V[1, 0] = 0.0
    V[1, 1] = 2.0
    with pytest.raises(ValueError, match="incident channel 1 is closed"):
        cr.coupled_channel_transmission(x, V, 1.0, 1.0, incident=1)
    with pytest.raises(ValueError, match="too coarse"):
        cr.coupled_channel_transmission(x, V, 1.0, 500.0)
    with pytest.raises(ValueError, match="shape"):
        cr.coupled_channel_transmission(x, V[:, :, :-1], 1.0, 1.0)


def three_channel(x):
    # three coupled surfaces, channel 3 closed on the right below E = 0.9
    V = np.zeros((3, 3, x.size))
    V[0, 0] = 0.3 * np.exp(-(x**2))
    V[1, 1] = 0.1 + 0.05 * np.tanh(x)
    V[2, 2] = 0.5 + 0.4 * np.tanh(2.0 * x) - 0.5 * np.exp(-(x**2))
    V[0, 1] = V[1, 0] = 0.1 * np.exp(-((x - 0.5) ** 2))
    V[1, 2] = V[2, 1] = 0.12 * np.exp(-(x**2))
    V[0, 2] = V[2, 0] = 0.08 * np.exp(-((x + 0.4) ** 2))
    return V


def test_three_channels_unitarity_and_reciprocity():
    # S = 3 runs the general (non-2x2) path: flux conservation and the symmetric S-matrix
    # (as in test_microreversibility), with channel 3 open on the left, closed on the right
    x = np.linspace(-10.0, 10.0, 401)
    V = three_channel(x)
    energies = np.linspace(0.3, 0.85, 30)
    left = [cr.coupled_channel_transmission(x, V, 1.0, energies, incident=a) for a in range(3)]
    right = [cr.coupled_channel_transmission(x, V, 1.0, energies, incident=b, side="right") for b in range(2)]
    assert np.all(left[0].open_near) and not np.any(left[0].open_far[:, 2])
    for result in left + right:
        assert np.abs(result.transmission.sum(axis=1) + result.reflection.sum(axis=1) - 1.0).max() < 1e-10
    for a in range(3):
        for b in range(2):
            assert np.abs(left[a].transmission[:, b] - right[b].transmission[:, a]).max() < 1e-8
        for b in range(3):
            assert np.abs(left[a].reflection[:, b] - left[b].reflection[:, a]).max() < 1e-8
    assert left[0].transmission[:, 1].max() > 1e-3 and left[0].reflection[:, 2].max() > 1e-4
