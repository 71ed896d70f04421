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
"""
from __future__ import annotations

from typing import ClassVar

import numpy as np

from ..kernels import abs2_weighted_sum, as3d, kick_general, kick_separable, multiply_inplace
from .base import Propagator
from .coefficients import STRANG, SUZUKI4, YOSHIDA4

__all__ = ["SplitOperator", "Strang", "Order4", "Order4Suzuki"]


class SplitOperator(Propagator):
    """Symmetric composition of Strang sub-steps with weights ``weights``."""

    weights: ClassVar[tuple[float, ...]] = STRANG
    in_place_transform: ClassVar[bool] = True  # psi may live in the transform's buffer

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        h = self.hamiltonian
        self._kick_cache: dict[float, np.ndarray] = {}
        self._loss_cache: dict[float, list] = {}
        self._kinetic_cache: dict[float, np.ndarray] = {}
        w = np.asarray(self.weights) * self.dt
        # The distinct kick lengths: ends (w0/2), inside a step, across steps.
        for tau in set(np.round(np.concatenate([w / 2, (w[:-1] + w[1:]) / 2, [w[0]]]), 15)):
            self._kick(float(tau))
        for tau in set(np.round(w, 15)):
            self._kinetic(float(tau))
        self._dynamic_axes = None
        if h.time_dependent:
            self._prepare_dynamic()

    # -- precomputed factors --------------------------------------------------
    def _kick(self, tau: float) -> np.ndarray:
        key = round(tau, 15)
        k = self._kick_cache.get(key)
        if k is None:
            h = self.hamiltonian
            arg = -1j * h.static_potential * tau
            if self.absorber is not None and self.absorber.active:
                arg = arg - self.absorber.rate * tau
                self._loss_cache[key] = [as3d(np.ascontiguousarray(lw))
                                         for lw in self.absorber.loss_weights(tau)]
            k = as3d(np.ascontiguousarray(np.exp(arg), dtype=self.dtype))
            self._kick_cache[key] = k
        return k

    def _kinetic(self, tau: float) -> np.ndarray:
        key = round(tau, 15)
        k = self._kinetic_cache.get(key)
        if k is None:
            k = as3d(np.ascontiguousarray(np.exp(-1j * self.hamiltonian.kinetic * tau), dtype=self.dtype))
            self._kinetic_cache[key] = k
        return k

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
    def _apply_kick(self, psi3, pieces):
        """Kick by the sum of (tau_j, t_j) pieces: static part of total length
        sum(tau_j); dynamic part integrated as sum_j tau_j V_dyn(t_j)."""
        tau = float(sum(p[0] for p in pieces))
        key = round(tau, 15)
        factor = self._kick(tau)
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
            phases[axis] += sum(tj * f(t) for tj, t in pieces) * g
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
        transform = self.transform
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
                self._apply_kick(psi3, pending)
                pending = [(tau / 2, tm)]
                phi = transform.forward(psi)
                phi3 = as3d(phi)
                multiply_inplace(phi3, self._kinetic(tau))
                psi = transform.backward(phi)
                psi3 = as3d(psi)
        self._apply_kick(psi3, pending)
        return psi


def _slab3(slab):
    return tuple(slab) + (slice(None),) * (3 - len(slab))


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

