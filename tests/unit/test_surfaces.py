"""Coupled surfaces' numerics (issue 16): the local matrix exponential,
Landau-Zener, zero coupling against single-surface runs, and the books.

Sources: exp(-i V tau) against scipy.linalg.expm (a general-purpose
reference); the Landau-Zener probability of a diabatic passage,
P = exp(-2 pi V12^2 / (hbar v |F1 - F2|)) (Landau 1932; Zener 1932; from
memory), in its regime: a fast packet narrow in energy, measured far
from the crossing (the diabatic populations oscillate there by about
(V12 / (dF x))^2, 0.2 % at the end here).
"""
from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg

from wavesweep.absorbers.layers import Absorber
from wavesweep.fft import make_transform
from wavesweep.grid import Axis, Grid
from wavesweep.hamiltonian import Hamiltonian
from wavesweep.propagators import scheme_class
from wavesweep.surfaces import CoupledSplitOperator, coupled_weights, SurfaceHamiltonian, local_exponential


class _Term:
    """A static term V(x) = f(x) (duck-types a potential term)."""

    time_dependent = False
    uniform_force = False

    def __init__(self, f):
        self.f = f

    def static(self, mesh):
        return self.f(next(iter(mesh.values())))   # the grid's one axis (x, or r on a radial grid)


def _gaussian(x, x0, sigma, p0):
    return (2 * np.pi * sigma**2) ** -0.25 * np.exp(-(x - x0) ** 2 / (4 * sigma**2) + 1j * p0 * (x - x0))


@pytest.mark.parametrize("size", [2, 3])
def test_the_local_exponential_is_expm_at_every_point(size):
    rng = np.random.default_rng(size)
    v = rng.normal(size=(size, size, 7))
    v = 0.5 * (v + v.transpose(1, 0, 2))
    v[..., 3] = 0.0                       # V = 0: the identity
    v[0, 1, 4] = v[1, 0, 4] = 0.0         # degenerate diagonal, no coupling (r = 0 in closed form)
    v[1, 1, 4] = v[0, 0, 4]
    u = local_exponential(v, 0.7)
    for n in range(v.shape[-1]):
        np.testing.assert_allclose(u[..., n], scipy.linalg.expm(-0.7j * v[..., n]), rtol=0, atol=1e-13)


@pytest.mark.parametrize("sigma, points, half", [(5.0, 1024, 150.0), (10.0, 2048, 200.0)])
def test_landau_zener_in_its_regime(sigma, points, half):
    """Diabatic surfaces +-dF x / 2 crossing at x = 0 with constant coupling
    V12; the packet starts on surface A far left, fast and narrow in
    energy; after the crossing its population on A is the Landau-Zener
    probability, v the velocity at the crossing (energy conservation)."""
    d_f, v12, p0, mass = 0.05, 0.2, 5.0, 1.0
    grid = Grid((Axis("x", -half, half, points, "periodic"),))
    h = SurfaceHamiltonian(grid, mass, ["A", "B"], [[_Term(lambda x: d_f / 2 * x)], [_Term(lambda x: -d_f / 2 * x)]],
                           {(0, 1): [_Term(lambda x: v12 + 0 * x)]})
    x = grid.axes[0].coordinates
    x0 = -0.6 * half
    psi = np.zeros((2, points), complex)
    psi[0] = _gaussian(x, x0, sigma, p0)
    velocity = math.sqrt(2 * (p0**2 / (2 * mass) + d_f / 2 * x0) / mass)
    prop = CoupledSplitOperator(h, 0.02, coupled_weights("order4"))
    psi = prop.step(psi, int(2 * abs(x0) / velocity / 0.02))
    stayed = float(np.sum(np.abs(psi[0]) ** 2)) * grid.cell_volume
    lz = math.exp(-2 * math.pi * v12**2 / (velocity * d_f))
    assert 0.2 < lz < 0.5                            # neither limit: the formula is tested, not 0 or 1
    # measured: 1.8e-3 at sigma = 5, 9.7e-4 at 10 (the energy spread and the finite end both shrink)
    assert abs(stayed / lz - 1) < (2.5e-3 if sigma == 5.0 else 1.2e-3)


def test_zero_coupling_is_two_single_surface_runs():
    """Uncoupled surfaces evolve as separate single-surface runs (the
    registered Strang propagator), to rounding."""
    grid = Grid((Axis("x", -40.0, 40.0, 256, "periodic"),))
    x = grid.axes[0].coordinates
    wells = [lambda x: 0.02 * x**2, lambda x: 0.3 * np.exp(-(x - 3.0) ** 2)]
    h = SurfaceHamiltonian(grid, 1.0, ["A", "B"], [[_Term(wells[0])], [_Term(wells[1])]], {})
    psi = np.stack([_gaussian(x, -5.0, 1.5, 1.0), _gaussian(x, -10.0, 2.0, 2.0)]) / math.sqrt(2)
    coupled = CoupledSplitOperator(h, 0.01, coupled_weights("strang")).step(psi, 400)
    for s, well in enumerate(wells):
        single = Hamiltonian(grid, 1.0, [], static_potential=well(x))
        transform = make_transform(grid, "scipy", np.complex128)
        prop = scheme_class("strang")(single, 0.01, transform, Absorber(grid, "none"))
        alone = prop.step(prop.load(psi[s]), 400)
        np.testing.assert_allclose(coupled[s], alone, rtol=0, atol=1e-12)


def test_norm_and_absorbed_sum_to_one_per_surface_and_face():
    """A CAP at both faces; a coupled packet leaving both ways: what is on
    the grid plus what each face took from each surface is 1 to 1e-10."""
    grid = Grid((Axis("x", -60.0, 60.0, 512, "periodic"),))
    x = grid.axes[0].coordinates
    h = SurfaceHamiltonian(grid, 1.0, ["A", "B"], [[_Term(lambda x: 0 * x)], [_Term(lambda x: 0.1 + 0 * x)]],
                           {(0, 1): [_Term(lambda x: 0.2 * np.exp(-x**2 / 4))]},
                           absorber_rate=None)
    cap = Absorber(grid, "cap", 15.0, None, strength=2.0, power=2.0)
    both_ways = _gaussian(x, -3.0, 2.0, -1.5) + _gaussian(x, 3.0, 2.0, 1.5)
    psi = np.stack([both_ways / math.sqrt(float(np.sum(np.abs(both_ways) ** 2)) * grid.cell_volume),
                    np.zeros_like(x, complex)])
    prop = CoupledSplitOperator(h, 0.02, coupled_weights("order4"), absorber=cap)
    psi = prop.step(psi, 3000)
    on_grid = float(np.sum(np.abs(psi) ** 2)) * grid.cell_volume
    assert prop.absorbed.shape == (2, 2) and prop.absorbed.min() > 1e-3   # both faces took from both surfaces
    assert on_grid < 0.05
    assert abs(on_grid + prop.absorbed.sum() - 1.0) < 1e-10


def test_landau_zener_is_approached_as_the_packet_narrows_in_energy():
    """The same crossing met at the same velocity (start at x0 = -150) by
    packets ever narrower in energy (sigma_x = 2.5, 5, 10 bohr: energy
    spreads p0 / (2 sigma) = 1, 0.5, 0.25 hartree around 12.5): the
    population left on A, measured when the packet is about 200 bohr past
    the crossing, approaches the Landau-Zener probability at the mean
    velocity (Landau 1932; Zener 1932).  Measured: relative errors 1.9e-3,
    2.8e-4, 3.2e-5.  The floor is the diabatic populations' oscillation
    about their limit at a finite distance, of order (V12 / (dF x))^2 =
    4e-4 at x = 200 (from memory; see the module docstring), which the
    widest packet averages over."""
    d_f, v12, p0, mass, x0, dt = 0.05, 0.2, 5.0, 1.0, -150.0, 0.02
    grid = Grid((Axis("x", -400.0, 400.0, 8192, "periodic"),))
    h = SurfaceHamiltonian(grid, mass, ["A", "B"], [[_Term(lambda x: d_f / 2 * x)], [_Term(lambda x: -d_f / 2 * x)]],
                           {(0, 1): [_Term(lambda x: v12 + 0 * x)]})
    x = grid.axes[0].coordinates
    velocity = math.sqrt(2 * (p0**2 / (2 * mass) + d_f / 2 * x0) / mass)
    lz = math.exp(-2 * math.pi * v12**2 / (velocity * d_f))
    errors = []
    for sigma in (2.5, 5.0, 10.0):
        psi = np.zeros((2, x.size), complex)
        psi[0] = _gaussian(x, x0, sigma, p0)
        prop = CoupledSplitOperator(h, dt, coupled_weights("order4"))
        psi = prop.step(psi, round(90.0 / dt))
        stayed = float(np.sum(np.abs(psi[0]) ** 2)) * grid.cell_volume
        errors.append(abs(stayed / lz - 1))
    assert errors[0] > errors[1] > errors[2]
    assert errors[0] < 2.5e-3 and errors[1] < 5e-4 and errors[2] < 2e-4
