"""The fast coupled split-operator step (issue 16): its local-matrix kernel,
the fused kicks against their unfused product, the squared kick of large
grids, the per-kick path of a time-dependent V, and the radial matrix.

Sources: the kernel against numpy.einsum of matrices from
scipy.linalg.expm (general-purpose references); a spatially uniform
V(t) commutes with T, so psi_s(x, t) = c_s(t) phi(x, t) with i dc/dt =
V(t) c, integrated by scipy.integrate.solve_ivp (a general-purpose
reference); the radial Schroedinger equation's effective potential
l(l+1) hbar^2 / (2 m r^2) on each surface (textbook, from memory).
"""
from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.integrate
import scipy.linalg

from wavesweep import surfaces
from wavesweep.absorbers.layers import Absorber
from wavesweep.fft import make_transform
from wavesweep.grid import Axis, Grid
from wavesweep.kernels import KernelSet
from wavesweep.surfaces import CoupledSplitOperator, SurfaceHamiltonian, coupled_weights


class _Term:
    """V(x) = f(x), static; or f(x, t) with ``dynamic`` (duck-types a potential term)."""

    uniform_force = False

    def __init__(self, f, dynamic=False):
        self.f = f
        self.time_dependent = dynamic

    def static(self, mesh):
        return self.f(mesh["x"])

    def at_time(self, mesh, t):
        return self.f(mesh["x"], t)


def _gaussian(x, x0, sigma, p0):
    return (2 * np.pi * sigma**2) ** -0.25 * np.exp(-(x - x0) ** 2 / (4 * sigma**2) + 1j * p0 * (x - x0))


@pytest.mark.parametrize("threaded", [False, True])
@pytest.mark.parametrize("size", [2, 3])
@pytest.mark.parametrize("squared", [False, True])
@pytest.mark.parametrize("members", [1, 3])
def test_local_matrix_kernel_is_the_matrix_product(threaded, size, squared, members):
    """On a 2D grid (several rows: the threaded build splits them), one run
    (a batch of one) and a batch whose members share U."""
    rng = np.random.default_rng(10 * size + squared)
    shape = (5, 7)
    v = rng.normal(size=(size, size) + shape)
    v = 0.5 * (v + v.transpose(1, 0, 2, 3))
    u = np.empty((size, size) + shape, complex)
    for i in np.ndindex(shape):
        u[(slice(None), slice(None)) + i] = scipy.linalg.expm(-0.4j * v[(slice(None), slice(None)) + i])
    psi = rng.normal(size=(members, size) + shape) + 1j * rng.normal(size=(members, size) + shape)
    upper = np.triu_indices(size)
    pair = np.zeros((size, size), np.int64)
    pair[upper] = pair.T[upper] = np.arange(len(upper[0]))
    packed = np.ascontiguousarray(u[upper].reshape(-1, 1, *shape))
    out = psi.copy()
    KernelSet(threaded).local_matrix_members(out.reshape(members, size, 1, *shape), packed, pair, squared)
    expected = np.einsum("ab...,mb...->ma...", u, psi)
    if squared:
        expected = np.einsum("ab...,mb...->ma...", u, expected)
    np.testing.assert_allclose(out, expected, rtol=0, atol=1e-13)


def _avoided_crossing(dynamic=False):
    """Two surfaces coupled around x = 0, a packet leaving both ways on A
    that reaches the absorbing layers (8 bohr, from |x| = 12) within
    t = 3 (the CAP: :func:`_cap`)."""
    grid = Grid((Axis("x", -20.0, 20.0, 128, "periodic"),))
    couple = (lambda x, t: 0.2 * np.exp(-x**2 / 50)) if dynamic else (lambda x: 0.2 * np.exp(-x**2 / 50))
    h = SurfaceHamiltonian(grid, 1.0, ["A", "B"], [[_Term(lambda x: 0.02 * np.tanh(x))], [_Term(lambda x: 0.1 + 0 * x)]],
                           {(0, 1): [_Term(couple, dynamic)]})
    x = grid.axes[0].coordinates
    both_ways = _gaussian(x, -6.0, 2.0, -2.0) + _gaussian(x, 6.0, 2.0, 2.0)
    psi = np.stack([both_ways / math.sqrt(float(np.sum(np.abs(both_ways) ** 2)) * grid.cell_volume),
                    np.zeros_like(x, complex)])
    return grid, h, psi


def _cap(grid):
    return Absorber(grid, "cap", 8.0, None, strength=1.0, power=2.0)


def _unfused(h, dt, weights, absorber, psi, nsteps):
    """The composition kick by kick as written: K(tau/2) F(tau) K(tau/2) per
    sub-step, numpy throughout (scipy FFT, local_exponential, einsum)."""
    grid = h.grid
    t_k = grid.kinetic_energy(h.mass)
    v = h.matrix(None)
    decay = np.exp(-absorber.rate * dt / 2) if absorber is not None else 1.0
    taus = [w * dt for w in weights]
    for _ in range(nsteps):
        for j, tau in enumerate(taus):
            u = surfaces.local_exponential(v, tau / 2)
            if j == 0:
                psi = psi * decay
            psi = np.einsum("ab...,b...->a...", u, psi)
            psi = h.kinetic_operator.apply_kinetic(psi, factor=np.exp(-1j * tau * t_k))
            psi = np.einsum("ab...,b...->a...", u, psi)
            if j == len(taus) - 1:
                psi = psi * decay
    return psi


@pytest.mark.parametrize("scheme", ["strang", "order4"])
@pytest.mark.parametrize("squared_from", [surfaces.SQUARED_KICK_FROM_ELEMENTS, 1])
def test_fused_kicks_equal_the_unfused_composition(scheme, squared_from, monkeypatch):
    """Fused kicks (across sub-steps and steps, absorber folded in), in
    calls of several steps, and on a 'large' grid the doubled kick as the
    half applied twice: psi equals the kick-by-kick composition to
    rounding, and the books are what left the grid per surface."""
    monkeypatch.setattr(surfaces, "SQUARED_KICK_FROM_ELEMENTS", squared_from)
    grid, h, psi = _avoided_crossing()
    cap = _cap(grid)
    prop = CoupledSplitOperator(h, 0.02, coupled_weights(scheme), absorber=cap)
    fast = prop.load(psi)
    for n in (1, 7, 0, 142):
        fast = prop.step(fast, n)
    assert prop.steps_done == 150 and math.isclose(prop.t, 3.0)
    slow = _unfused(h, 0.02, coupled_weights(scheme), cap, psi, 150)
    np.testing.assert_allclose(fast, slow, rtol=0, atol=1e-12)
    lost = (np.sum(np.abs(psi) ** 2) - np.sum(np.abs(slow) ** 2, axis=1).sum()) * grid.cell_volume
    assert prop.absorbed.min() > 1e-5 and abs(prop.absorbed.sum() - lost) < 1e-12


def test_scipy_backend_steps_as_the_in_place_one():
    """A backend that does not transform in place (scipy) gives the same
    psi, and leaves the caller's array alone."""
    grid, h, psi = _avoided_crossing()
    planned = CoupledSplitOperator(h, 0.02, coupled_weights("strang"))
    plain = CoupledSplitOperator(h, 0.02, coupled_weights("strang"),
                                 transform=make_transform(grid, "scipy", np.complex128, members=2))
    before = psi.copy()
    out = plain.step(psi, 30)
    np.testing.assert_array_equal(psi, before)
    np.testing.assert_allclose(out, planned.step(planned.load(psi), 30), rtol=0, atol=1e-12)
    with pytest.raises(ValueError, match="members=2"):
        CoupledSplitOperator(h, 0.02, transform=make_transform(grid, "scipy", np.complex128))


def test_a_time_dependent_v_constant_in_time_steps_as_the_static_one():
    """The per-kick path of a time-dependent V (with the absorber at the
    step ends) against the fused static path for the same, constant V."""
    results = []
    for dynamic in (False, True):
        grid, h, psi = _avoided_crossing(dynamic=dynamic)
        cap = _cap(grid)
        prop = CoupledSplitOperator(h, 0.02, coupled_weights("order4"), absorber=cap)
        results.append((prop.step(prop.load(psi), 150).copy(), prop.absorbed.copy()))
    assert results[0][1].min() > 1e-5                       # both faces took from both surfaces
    np.testing.assert_allclose(results[1][0], results[0][0], rtol=0, atol=1e-12)
    np.testing.assert_allclose(results[1][1], results[0][1], rtol=0, atol=1e-13)


def test_a_uniform_driven_coupling_is_the_two_level_solution():
    """V(t) = [[0, W cos(w t)], [W cos(w t), D]] uniform in space commutes
    with T: the populations are |c_s(t)|^2 of i dc/dt = V(t) c
    (solve_ivp, rtol 1e-11), to the fourth-order scheme's error."""
    big_w, w, d = 0.5, 0.3, 0.2
    grid = Grid((Axis("x", -40.0, 40.0, 128, "periodic"),))
    drive = _Term(lambda x, t: big_w * math.cos(w * t) + 0 * x, dynamic=True)
    h = SurfaceHamiltonian(grid, 1.0, ["A", "B"], [[_Term(lambda x: 0 * x)], [_Term(lambda x: d + 0 * x)]],
                           {(0, 1): [drive]})
    x = grid.axes[0].coordinates
    psi = np.stack([_gaussian(x, 0.0, 2.0, 1.0), np.zeros_like(x, complex)])
    dt, steps = 0.02, 500
    prop = CoupledSplitOperator(h, dt, coupled_weights("order4"))
    psi = prop.step(prop.load(psi), steps)
    populations = np.sum(np.abs(psi) ** 2, axis=1) * grid.cell_volume

    def rhs(t, c):
        v = np.array([[0.0, big_w * math.cos(w * t)], [big_w * math.cos(w * t), d]])
        return -1j * v @ c

    c = scipy.integrate.solve_ivp(rhs, (0.0, dt * steps), np.array([1.0, 0.0], complex),
                                  method="DOP853", rtol=1e-11, atol=1e-12).y[:, -1]
    assert 0.1 < abs(c[1]) ** 2 < 0.9                       # a real transfer, not 0 or 1
    # measured 3.4e-11 (5.2e-10 at twice the step: fourth order); strang: 1.9e-6
    np.testing.assert_allclose(populations, np.abs(c) ** 2, rtol=0, atol=1e-9)


def test_a_radial_matrix_has_the_centrifugal_term_once_on_each_surface():
    grid = Grid((Axis("r", 0.0, 20.0, 63, "box"),), radial=True, angular_momentum=2)

    class _Radial(_Term):
        def static(self, mesh):
            return self.f(mesh["r"])

    h = SurfaceHamiltonian(grid, 1.5, ["A", "B"], [[_Radial(lambda r: -1 / r)], [_Radial(lambda r: 0 * r)]],
                           {(0, 1): [_Radial(lambda r: 0.1 * np.exp(-r))]})
    r = grid.axes[0].coordinates
    centrifugal = 2 * 3 / (2 * 1.5 * r**2)
    v = h.matrix(None)
    np.testing.assert_allclose(v[0, 0], -1 / r + centrifugal, rtol=1e-14)
    np.testing.assert_allclose(v[1, 1], centrifugal, rtol=1e-14)
    np.testing.assert_allclose(v[0, 1], 0.1 * np.exp(-r), rtol=1e-14)
