"""Split-operator propagators (Fourier / sine-transform kinetic step).

One Strang sub-step of length tau is
    exp(-i V(t_m) tau/2) exp(-i T tau) exp(-i V(t_m) tau/2),
with V evaluated at the sub-step's middle t_m (exponential midpoint rule, so a
time-dependent V keeps second order, and the sub-step is time-symmetric so
that compositions reach fourth order; Yoshida 1990).  The absorber enters the
kicks as exp(-W tau/2).  Feit, Fleck & Steiger, J. Comput. Phys. 47, 412
(1982) for the split-operator Fourier method.

Consecutive half-kicks commute (both are diagonal in position) and are fused
into one kick, so ``step(psi, n)`` costs n transform pairs per sub-step
weight and one more kick than sub-steps; they are split only at the ends of
each call, where psi sits at a true time for recording.

Radial grids: the static radial Hamiltonian T + V_l + V0 (centrifugal term
l(l+1)/(2 m r^2) and e.g. -Z/r) is singular at r = 0 and stiff on a fine
grid, and kicking with it ruins the splitting: measured against the exact
propagator of the same grid, the Strang error for the l = 1 oscillator
ground state stayed near 1e-2 and did not fall with dt, and for -Z/r it
converged erratically.  So on a radial grid of up to ``RADIAL_DENSE_MAX``
points the "kinetic" step is exp(-i (T + V_l + V0) tau), exact, from a dense
eigendecomposition in the sine basis (made once, O(N^3); a step costs two
real N x N products instead of a DST pair, and the two matrices take
16 N^2 bytes); only the absorber and time-dependent terms are kicked.
Larger radial grids fall back to kicking everything (``wavesweep check``
warns about it).
"""
from __future__ import annotations

from typing import ClassVar

import numpy as np
import scipy.linalg

from ..kernels import abs2_weighted_sum, as3d, kick_general, kick_separable, multiply_inplace, real_matvec
from .base import Propagator
from .coefficients import STRANG, SUZUKI4, YOSHIDA4

# Largest radial grid whose static Hamiltonian is diagonalised densely (two
# N x N float64 matrices: 268 MB at 4096).
RADIAL_DENSE_MAX = 4096

__all__ = ["SplitOperator", "Strang", "Order4", "Order4Suzuki"]


class SplitOperator(Propagator):
    """Symmetric composition of Strang sub-steps with weights ``weights``."""

    weights: ClassVar[tuple[float, ...]] = STRANG
    in_place_transform: ClassVar[bool] = True  # psi may live in the transform's buffer

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        h = self.hamiltonian
        self._kick_potential = h.static_potential
        self._radial_basis = None
        if self.grid.radial and self.grid.axes[0].points <= RADIAL_DENSE_MAX:
            self._setup_radial()
        self._kick_cache: dict[float, np.ndarray] = {}
        self._loss_cache: dict[float, list] = {}
        self._kinetic_cache: dict[float, np.ndarray] = {}
        w = np.asarray(self.weights) * self.dt
        # The distinct kicks (potential length, absorber length): the call's
        # ends, inside a step (no absorber), across steps.
        self._kick(w[0] / 2, self.dt / 2)
        self._kick(w[-1] / 2, self.dt / 2)
        self._kick((w[-1] + w[0]) / 2, self.dt)
        for j in range(1, len(w)):
            self._kick((w[j - 1] + w[j]) / 2, 0.0)
        for tau in set(np.round(w, 15)):
            self._kinetic(float(tau))
        self._dynamic_axes = None
        if h.time_dependent:
            self._prepare_dynamic()

    # -- precomputed factors --------------------------------------------------
    def _kick(self, tau: float, absorb: float) -> np.ndarray:
        """exp(-i V0 tau - W absorb) on the grid.  The absorber is applied once
        per whole step (half at each end), outside the composition: the
        fourth-order schemes have negative sub-steps, and a kick of negative
        length would multiply the layer by exp(+|tau| W) (measured: norm 1e263
        with a mask and order4).  For Strang this is the same as kicking with
        V - iW."""
        key = (round(tau, 15), round(absorb, 15))
        k = self._kick_cache.get(key)
        if k is None:
            arg = -1j * self._kick_potential * tau
            if self.absorber is not None and self.absorber.active and absorb > 0:
                arg = arg - self.absorber.rate * absorb
                self._loss_cache[key] = [as3d(np.ascontiguousarray(lw))
                                         for lw in self.absorber.loss_weights(absorb)]
            k = as3d(np.ascontiguousarray(np.exp(arg), dtype=self.dtype))
            self._kick_cache[key] = k
        return k

    def _kinetic(self, tau: float) -> np.ndarray:
        key = round(tau, 15)
        k = self._kinetic_cache.get(key)
        if k is None:
            energies = self.hamiltonian.kinetic if self._radial_basis is None else self._radial_basis[2]
            k = as3d(np.ascontiguousarray(np.exp(-1j * energies * tau), dtype=self.dtype))
            self._kinetic_cache[key] = k
        return k

    def _setup_radial(self):
        """T + V_l + V0 = Q diag(lambda) Q^T on a radial grid (see the module notes)."""
        h = self.hamiltonian
        # T + V0 in the sine basis; V0 includes the centrifugal term, and the
        # time-dependent terms stay out (they are kicked)
        lam, q = scipy.linalg.eigh(h.static_matrix())
        # float64 even in single precision: a float32 basis is not orthogonal
        # enough (measured norm drift +2e-4 per 1e4 steps)
        self._radial_basis = (np.ascontiguousarray(q), np.ascontiguousarray(q.T), lam)
        self._kick_potential = np.zeros_like(h.static_potential)

    def _free_step(self, psi, tau):
        """exp(-i K tau) psi with K the kinetic step's operator."""
        if self._radial_basis is None:
            phi = self.transform.forward(psi)
            multiply_inplace(as3d(phi), self._kinetic(tau))
            return self.transform.backward(phi)
        q, qt, _ = self._radial_basis
        n = q.shape[0]
        c = np.empty(n, self.dtype)
        real_matvec(qt, psi.reshape(n), c)
        c *= self._kinetic(tau).reshape(n)
        out = np.empty(n, self.dtype)
        real_matvec(q, c, out)
        return out.reshape(self.grid.shape)

    def _prepare_dynamic(self):
        """Split time-dependent terms into one-axis parts (phases per axis)
        and the rest (evaluated on the full grid)."""
        h, grid = self.hamiltonian, self.grid
        self._axis_terms = []   # (axis, g_1d, f)
        self._full_terms = list(h.general)
        for g, f in h.separable:
            g = np.asarray(g)
            axes = [i for i in range(g.ndim) if g.shape[i] > 1]
            if g.ndim == grid.ndim and len(axes) == 1:
                self._axis_terms.append((axes[0], g.reshape(-1).astype(float), f))
            else:
                class _Wrapped:
                    def __init__(self, g, f):
                        self.g, self.f = g, f

                    def at_time(self, mesh, t):
                        return self.f(t) * self.g
                self._full_terms.append(_Wrapped(g, f))
        self._zero_phase = [np.zeros(n) for n in as3d(np.empty(grid.shape, bool)).shape]

    # -- the kicks ------------------------------------------------------------
    def _apply_kick(self, psi3, pieces, absorb):
        """Kick by the sum of (tau_j, t_j) pieces: static part of total length
        sum(tau_j); dynamic part integrated as sum_j tau_j V_dyn(t_j); the
        absorber over ``absorb``."""
        tau = float(sum(p[0] for p in pieces))
        key = (round(tau, 15), round(absorb, 15))
        factor = self._kick(tau, absorb)
        losses = self._loss_cache.get(key)
        if losses is not None:
            dv = self.grid.cell_volume
            for n, (layer, lw) in enumerate(zip(self.absorber.layers, losses)):
                self.absorbed[n] += abs2_weighted_sum(psi3[_slab3(layer.slab)], lw) * dv
        if not self.hamiltonian.time_dependent:
            multiply_inplace(psi3, factor)
            return
        phases = [z.copy() for z in self._zero_phase]
        for axis, g, f in self._axis_terms:
            # as3d pads leading axes, so grid axis a is view axis a + (3 - ndim)
            phases[axis + 3 - self.grid.ndim] += sum(tj * f(t) for tj, t in pieces) * g
        if self._full_terms:
            mesh = self.grid.mesh()
            v = 0.0
            for tj, t in pieces:
                for term in self._full_terms:
                    v = v + tj * term.at_time(mesh, t)
            v = as3d(np.ascontiguousarray(np.broadcast_to(v, self.grid.shape), dtype=float))
            kick_general(psi3, factor, v, 1.0)
            if any(np.any(p) for p in phases):
                multiply_inplace(psi3, as3d(np.ascontiguousarray(
                    np.exp(-1j * (phases[0][:, None, None] + phases[1][None, :, None]
                                  + phases[2][None, None, :])), dtype=self.dtype)))
            return
        kick_separable(psi3, factor, phases[0], phases[1], phases[2])

    # -- the step -------------------------------------------------------------
    def _step_impl(self, psi, nsteps):
        psi = np.ascontiguousarray(psi, dtype=self.dtype)
        w = self.weights
        taus = [wi * self.dt for wi in w]
        t = self.t
        # Sub-step starts within one step (cumulative weights).
        starts = np.concatenate([[0.0], np.cumsum(taus)[:-1]])
        mids = [s + tau / 2 for s, tau in zip(starts, taus)]
        psi3 = as3d(psi)
        pending = [(taus[0] / 2, t + mids[0])]
        for n in range(nsteps):
            t_step = t + n * self.dt
            for j, tau in enumerate(taus):
                tm = t_step + mids[j]
                if n or j:
                    pending.append((tau / 2, tm))
                absorb = (self.dt / 2 if n == 0 else self.dt) if j == 0 else 0.0
                self._apply_kick(psi3, pending, absorb)
                pending = [(tau / 2, tm)]
                psi = self._free_step(psi, tau)
                psi3 = as3d(psi)
        self._apply_kick(psi3, pending, self.dt / 2)
        return psi


def _slab3(slab):
    """A grid slab index as an index of the as3d view (leading padding)."""
    return (slice(None),) * (3 - len(slab)) + tuple(slab)


class Strang(SplitOperator):
    """Second-order Strang splitting (Strang, SIAM J. Numer. Anal. 5, 506 (1968))."""

    name = "strang"
    order = 2
    weights = STRANG


class Order4(SplitOperator):
    """Fourth order: Yoshida's triple jump of Strang sub-steps (3 FFT pairs)."""

    name = "order4"
    order = 4
    weights = YOSHIDA4


class Order4Suzuki(SplitOperator):
    """Fourth order: Suzuki's five-stage composition (5 FFT pairs, smaller error)."""

    name = "order4_suzuki"
    order = 4
    weights = SUZUKI4

