"""Closed forms shared by the tests (atomic units unless ``hbar`` is passed).

Every formula here comes from outside the project; the source is named beside
it.  "from memory" means recalled without the book at hand.  Each function
takes plain numbers / numpy arrays and knows nothing about wavesweep, so the
tests compare the code against these and not against itself.

Conventions: the free packet at t = 0 is

    psi(x, 0) = (2 pi s^2)^(-1/4) exp(-(x - x0)^2 / (4 s^2) + i p0 (x - x0) / hbar),

``s`` the standard deviation of |psi|^2 (the job-file ``width``).
"""
from __future__ import annotations

import numpy as np

__all__ = [
    "free_gaussian_psi", "free_gaussian_width", "free_gaussian_mean", "free_gaussian_density",
    "free_gaussian_current", "coherent_state_mean", "coherent_state_momentum",
    "coherent_state_width", "driven_oscillator_mean", "oscillator_energy_3d",
    "radial_oscillator_u", "box_energy", "box_eigenstate", "plane_wave_energy",
]


# -- free Gaussian packet -------------------------------------------------------
# closed form: free Gaussian spreading, e.g. Griffiths, Introduction to Quantum
# Mechanics (2nd ed.), problem 2.22, and Cohen-Tannoudji, Diu & Laloe,
# Quantum Mechanics vol. 1, complement G_I (from memory).  With
# tau = hbar t / (2 m s^2) and xi = x - x0 - p0 t / m:
#   psi(x, t) = (2 pi s^2)^(-1/4) (1 + i tau)^(-1/2)
#               exp(-xi^2 / (4 s^2 (1 + i tau)) + i p0 (x - x0 - p0 t / 2m) / hbar)
def _tau(t, sigma0, mass, hbar):
    return hbar * np.asarray(t, float) / (2.0 * mass * sigma0**2)


def free_gaussian_psi(x, t, x0, sigma0, p0, mass, hbar=1.0):
    """psi(x, t) of the free Gaussian packet (complex array over x)."""
    x = np.asarray(x, float)
    tau = _tau(t, sigma0, mass, hbar)
    xi = x - x0 - p0 * t / mass
    amp = (2.0 * np.pi * sigma0**2) ** -0.25 / np.sqrt(1.0 + 1j * tau)
    return amp * np.exp(-(xi**2) / (4.0 * sigma0**2 * (1.0 + 1j * tau))
                        + 1j * p0 * (x - x0 - 0.5 * p0 * t / mass) / hbar)


def free_gaussian_width(t, sigma0, mass, hbar=1.0):
    """Standard deviation of |psi|^2: sigma0 sqrt(1 + (hbar t / 2 m sigma0^2)^2)."""
    return sigma0 * np.sqrt(1.0 + _tau(t, sigma0, mass, hbar) ** 2)


def free_gaussian_mean(t, x0, p0, mass):
    """<x>(t) = x0 + p0 t / m (Ehrenfest, exact for a free particle)."""
    return x0 + p0 * np.asarray(t, float) / mass


def free_gaussian_density(x, t, x0, sigma0, p0, mass, hbar=1.0):
    """|psi(x, t)|^2: a normal density, mean x0 + p0 t/m, std free_gaussian_width."""
    s = free_gaussian_width(t, sigma0, mass, hbar)
    xi = np.asarray(x, float) - free_gaussian_mean(t, x0, p0, mass)
    return np.exp(-(xi**2) / (2.0 * s**2)) / np.sqrt(2.0 * np.pi * s**2)


def free_gaussian_current(x, t, x0, sigma0, p0, mass, hbar=1.0):
    """Probability current J = (hbar/m) Im(conj(psi) dpsi/dx) of the free packet.

    From the phase S of psi above: dS/dx = p0 + hbar xi tau / (2 s^2 (1 + tau^2)),
    so J = rho (p0 + hbar xi tau / (2 s^2 (1 + tau^2))) / m (the local velocity
    grows linearly across the spreading packet; e.g. Cohen-Tannoudji et al.,
    complement G_I, from memory; derived here from psi)."""
    tau = _tau(t, sigma0, mass, hbar)
    xi = np.asarray(x, float) - free_gaussian_mean(t, x0, p0, mass)
    rho = free_gaussian_density(x, t, x0, sigma0, p0, mass, hbar)
    return rho * (p0 + hbar * xi * tau / (2.0 * sigma0**2 * (1.0 + tau**2))) / mass


def plane_wave_energy(k, mass, hbar=1.0):
    """Energy of exp(i k x): hbar^2 k^2 / 2m (any QM textbook)."""
    return (hbar * k) ** 2 / (2.0 * mass)


# -- harmonic oscillator -----------------------------------------------------------
# closed form: a Gaussian of width sqrt(hbar / (2 m w)) in V = m w^2 x^2 / 2 is a
# coherent state; its centre follows the classical orbit and its width stays
# constant (e.g. Cohen-Tannoudji et al., complement G_V; Griffiths problem 3.35
# in the 2nd ed.; from memory).
def coherent_state_width(mass, omega, hbar=1.0):
    return np.sqrt(hbar / (2.0 * mass * omega))


def coherent_state_mean(t, x0, p0, mass, omega):
    """<x>(t) = x0 cos(w t) + p0 / (m w) sin(w t)."""
    t = np.asarray(t, float)
    return x0 * np.cos(omega * t) + p0 / (mass * omega) * np.sin(omega * t)


def coherent_state_momentum(t, x0, p0, mass, omega):
    """<p>(t) = p0 cos(w t) - m w x0 sin(w t)."""
    t = np.asarray(t, float)
    return p0 * np.cos(omega * t) - mass * omega * x0 * np.sin(omega * t)


def driven_oscillator_mean(times, x0, p0, mass, omega, charge, field, rtol=1e-11, atol=1e-13):
    """<x>(t) of a harmonic oscillator driven by a uniform field E(t).

    For V = m w^2 x^2 / 2 - q E(t) x Ehrenfest's theorem closes exactly (the
    force is linear in x), so <x> obeys the classical equation
    m x'' = -m w^2 x + q E(t) (e.g. Sakurai, Modern QM, sec. 2.4; from memory).
    Integrated here independently with scipy.integrate.solve_ivp (DOP853)."""
    from scipy.integrate import solve_ivp

    def rhs(t, y):
        x, p = y
        return [p / mass, -mass * omega**2 * x + charge * field(t)]

    times = np.asarray(times, float)
    sol = solve_ivp(rhs, (0.0, float(times[-1])), [x0, p0], method="DOP853", t_eval=times,
                    rtol=rtol, atol=atol)
    assert sol.success, sol.message
    return sol.y[0]


# -- 3D isotropic oscillator, radial form ---------------------------------------------
# closed form: the 3D isotropic oscillator has E = (2 n_r + l + 3/2) hbar w; the
# n_r = 0 radial function is u(r) = r R(r) proportional to r^(l+1) exp(-m w r^2 / 2 hbar)
# (e.g. Sakurai, Modern QM, problem 3.x / Griffiths problem 4.38; from memory).
def oscillator_energy_3d(l, omega, n_r=0, hbar=1.0):
    return (2 * n_r + l + 1.5) * hbar * omega


def radial_oscillator_u(r, l, mass, omega, hbar=1.0):
    """The (unnormalised) n_r = 0 radial function u(r) = r^(l+1) exp(-m w r^2 / 2 hbar)."""
    r = np.asarray(r, float)
    return r ** (l + 1) * np.exp(-mass * omega * r**2 / (2.0 * hbar))


# -- particle in a box ---------------------------------------------------------------
# closed form: infinite square well of length L, E_n = n^2 pi^2 hbar^2 / (2 m L^2),
# psi_n = sqrt(2/L) sin(n pi (x - a) / L) (Griffiths, sec. 2.2; from memory).
def box_energy(n, length, mass, hbar=1.0):
    return (n * np.pi * hbar) ** 2 / (2.0 * mass * length**2)


def box_eigenstate(x, n, a, length):
    return np.sqrt(2.0 / length) * np.sin(n * np.pi * (np.asarray(x, float) - a) / length)
