"""Outside references for momentum and energy spectra of what leaves (issue 17).

Plain numpy/scipy functions that know nothing about wavesweep, so the tests
compare the code against these and not against itself:

- ``transfer_matrix_transmission``: the transmission probability T(k) of a
  piecewise-constant 1D potential by transfer matrices (R. Tsu and L. Esaki,
  Appl. Phys. Lett. 22, 562 (1973); from memory).
- ``rectangular_barrier_transmission``: the textbook closed form for one
  rectangular barrier (e.g. Griffiths, Introduction to Quantum Mechanics,
  2nd ed., problem 2.33; from memory), which checks the transfer matrices.
- ``gaussian_momentum_density``: |phi(p)|^2 of the Gaussian packet of
  tests/analytic.py (the Fourier transform of a Gaussian; any textbook).
- ``plane_wave_spectrum``: the part of a state beyond a point projected on
  plane waves, |(2 pi hbar)^(-1/2) int_{x > x_d} exp(-i p x / hbar) psi(x) dx|^2,
  by direct quadrature (numpy); where the potential beyond x_d is zero and
  no field acts, plane waves are the asymptotic states, so this is the
  momentum distribution of what left through x_d.

Units: any consistent set; ``hbar`` defaults to 1 (atomic units).
"""
from __future__ import annotations

import numpy as np

__all__ = ["transfer_matrix_transmission", "rectangular_barrier_transmission",
           "gaussian_momentum_density", "plane_wave_spectrum"]


def transfer_matrix_transmission(momentum, edges, heights, mass, hbar=1.0):
    """T(p) of a particle of momentum p > 0 incident from the left on the
    piecewise-constant potential V = heights[j] on (edges[j], edges[j+1])
    and 0 outside [edges[0], edges[-1]] (len(edges) = len(heights) + 1).

    Transfer matrices (Tsu & Esaki 1973; from memory): in each region
    psi = A exp(i q x) + B exp(-i q x) with q = sqrt(2 m (E - V)) / hbar
    (imaginary under a barrier); continuity of psi and psi' at each edge
    carries (A, B) from left to right; with no wave coming from the right,
    T = |A_out / A_in|^2 (the same q outside on both sides).  Vectorised
    over ``momentum``."""
    p = np.atleast_1d(np.asarray(momentum, float))
    energy = p**2 / (2.0 * mass)
    levels = np.concatenate([[0.0], np.asarray(heights, float), [0.0]])
    q = np.sqrt((2.0 * mass * (energy[:, None] - levels[None, :])).astype(complex)) / hbar   # (k, regions)
    q = np.where(np.abs(q) == 0, 1e-300, q)       # E exactly at a level: the limit exists, avoid 0/0
    # M maps (A, B) of region j+1 to region j at edge x: matching psi, psi'
    total = np.broadcast_to(np.eye(2, dtype=complex), (p.size, 2, 2)).copy()
    for j, x in enumerate(np.asarray(edges, float)):
        ql, qr = q[:, j], q[:, j + 1]
        el, er = np.exp(1j * ql * x), np.exp(1j * qr * x)
        left = np.stack([np.stack([el, 1 / el], -1), np.stack([1j * ql * el, -1j * ql / el], -1)], -2)
        right = np.stack([np.stack([er, 1 / er], -1), np.stack([1j * qr * er, -1j * qr / er], -1)], -2)
        total = total @ np.linalg.solve(left, right)
    # (A_in, B_in) = total (A_out, 0): A_out / A_in = 1 / total[0, 0]
    return np.abs(1.0 / total[:, 0, 0]) ** 2


def rectangular_barrier_transmission(energy, height, width, mass, hbar=1.0):
    """T(E) of one rectangular barrier (closed form, from memory):
    E < V0: 1 / (1 + V0^2 sinh^2(kappa a) / (4 E (V0 - E))),
    E > V0: 1 / (1 + V0^2 sin^2(q a) / (4 E (E - V0)))."""
    e = np.asarray(energy, float)
    below = e < height
    kappa = np.sqrt(2 * mass * np.abs(height - e)) / hbar
    s2 = np.where(below, np.sinh(kappa * width) ** 2, np.sin(kappa * width) ** 2)
    return 1.0 / (1.0 + height**2 * s2 / (4 * e * np.abs(height - e)))


def gaussian_momentum_density(momentum, p0, sigma_x, hbar=1.0):
    """|phi(p)|^2 of the Gaussian of tests/analytic.py with position
    standard deviation sigma_x: a normal density of mean p0 and standard
    deviation hbar / (2 sigma_x) (per unit momentum)."""
    s = hbar / (2.0 * sigma_x)
    return np.exp(-((np.asarray(momentum, float) - p0) ** 2) / (2 * s**2)) / (np.sqrt(2 * np.pi) * s)


def plane_wave_spectrum(psi, x, x_d, momentum, side="right", hbar=1.0):
    """|(2 pi hbar)^(-1/2) sum_{x beyond x_d} exp(-i p x / hbar) psi(x) dx|^2
    per unit momentum: the momentum distribution of the part of ``psi``
    (on the uniform points ``x``) beyond ``x_d`` ("right": x > x_d;
    "left": x < x_d), by the rectangle rule (exact to rounding for a
    band-limited psi sampled finely enough, as on a Fourier grid)."""
    x = np.asarray(x, float)
    dx = x[1] - x[0]
    part = np.where(x > x_d if side == "right" else x < x_d, psi, 0.0)
    p = np.asarray(momentum, float)
    amplitude = np.exp(-1j * np.outer(p, x) / hbar) @ part * dx / np.sqrt(2 * np.pi * hbar)
    return np.abs(amplitude) ** 2
