"""The spectrum references of tests/spectrum_reference.py checked against
closed forms before the code is checked against them.

Sources: the rectangular-barrier transmission (textbook closed form, from
memory); slicing a barrier leaves its transfer matrix unchanged; Parseval's theorem for the plane-wave projection (the
Fourier transform is unitary); the Gaussian's Fourier transform.
"""
from __future__ import annotations

import numpy as np

from analytic import free_gaussian_psi
from spectrum_reference import (gaussian_momentum_density, plane_wave_spectrum,
                                rectangular_barrier_transmission, transfer_matrix_transmission)


def test_transfer_matrices_give_the_rectangular_barrier():
    p = np.linspace(0.05, 3.0, 200)
    t = transfer_matrix_transmission(p, [-1.0, 1.0], [1.5], mass=1.0)
    ref = rectangular_barrier_transmission(p**2 / 2, 1.5, 2.0, 1.0)
    np.testing.assert_allclose(t, ref, rtol=1e-10)


def test_transfer_matrices_of_a_barrier_cut_in_slices_are_the_same():
    """The same barrier as three adjacent slices of the same height: the
    product of their matrices is the one barrier's."""
    p = np.linspace(0.1, 2.5, 50)
    one = transfer_matrix_transmission(p, [0.0, 3.0], [0.8], mass=2.0)
    three = transfer_matrix_transmission(p, [0.0, 0.5, 2.0, 3.0], [0.8, 0.8, 0.8], mass=2.0)
    np.testing.assert_allclose(three, one, rtol=1e-10)


def test_the_plane_wave_spectrum_of_a_whole_gaussian_is_its_momentum_density():
    x = np.linspace(-80, 80, 4096, endpoint=False)
    psi = free_gaussian_psi(x, 0.0, 10.0, 2.0, 1.5, 1.0)
    p = np.linspace(0.0, 3.0, 61)
    spectrum = plane_wave_spectrum(psi, x, -np.inf, p)
    np.testing.assert_allclose(spectrum, gaussian_momentum_density(p, 1.5, 2.0), rtol=0, atol=1e-12)
    # Parseval (discrete): on the grid's own momenta 2 pi n / L the spectrum of the part
    # beyond x_d sums to that part's norm, a sharp cut included
    x = np.linspace(-80, 80, 1024, endpoint=False)
    psi = free_gaussian_psi(x, 0.0, 10.0, 2.0, 1.5, 1.0)
    dx = x[1] - x[0]
    grid_p = 2 * np.pi * np.fft.fftfreq(x.size, dx)
    part = plane_wave_spectrum(psi, x, 10.0, grid_p)
    norm = np.sum(np.abs(psi[x > 10.0]) ** 2) * dx
    assert abs(np.sum(part) * (grid_p[1] - grid_p[0]) / norm - 1) < 1e-12
