"""Several coupled potential-energy surfaces: one packet psi_s(r), s = 1..S,
under H = T (x) 1 + V(r, t), V an S x S real symmetric matrix at every
point (atomic units throughout).

The diagonal V_ss is the sum of the surface's own terms and the job's
shared [[potential]] terms; the off-diagonal V_ab = V_ba the sum of the
[[coupling]] terms of that pair (zero for an uncoupled pair).

Propagation (:class:`CoupledSplitOperator`) composes Strang sub-steps as
the single-surface split-operator does (Feit, Fleck & Steiger 1982;
Yoshida's and Suzuki's fourth-order compositions), with the kick
exp(-i V(r) tau) the exponential of the local S x S matrix
(:func:`local_exponential`): for two surfaces in closed form,
V = v0 1 + vz sz + vx sx, exp(-i V tau) = exp(-i v0 tau) [cos(r tau) 1 -
i sin(r tau) (vz sz + vx sx) / r], r = sqrt(vz^2 + vx^2); for more, from
the eigen-decomposition of each point's matrix.  The kinetic step is the
single surface's on every surface.  An absorber's rate W(r) is the same
on every surface and commutes with the local matrix, so it multiplies the
kicks at the step's ends, booked per surface and face.  A static V's kick
matrices are made once per kick length.
"""
from __future__ import annotations

import functools

import numpy as np

from .hamiltonian import Hamiltonian
from .propagators import scheme_class
from .propagators.coefficients import STRANG

__all__ = ["SurfaceHamiltonian", "local_exponential", "CoupledSplitOperator", "coupled_weights"]

# The split-operator compositions a coupled run can use: each registered
# split-operator scheme's own weights (read from the registry, by name)
def coupled_weights(scheme: str) -> tuple:
    """The composition weights of a registered split-operator ``scheme``."""
    cls = scheme_class(scheme)
    weights = getattr(cls, "weights", None)
    if weights is None:
        raise ValueError(f"{scheme!r} is no split-operator scheme: coupled surfaces need one")
    return tuple(weights)


def _terms_at(grid, mass, terms, t: float | None) -> np.ndarray:
    """Sum of ``terms`` on the grid (hartree, full shape): the static ones,
    plus the time-dependent ones at ``t`` (None: left out)."""
    mesh = grid.mesh()
    v = np.zeros(grid.shape)
    for term in terms:   # the terms' own sum: a radial grid's centrifugal term is the diagonal's, once
        if not term.time_dependent:
            v = v + np.broadcast_to(np.asarray(term.static(mesh), float), grid.shape)
    if t is not None:
        for term in terms:
            if term.time_dependent:
                v = v + np.broadcast_to(np.asarray(term.at_time(mesh, t), float), grid.shape)
    return v


class SurfaceHamiltonian:
    """H = T (x) 1 + V(r, t) on S surfaces (see the module notes).

    ``surface_terms``: per surface, its potential terms (shared ones
    included); ``couplings``: ``{(a, b): terms}`` with a < b surface
    indices; ``absorber_rate``: W (hartree, the grid's shape) or None.
    The centrifugal term of a radial grid is on every diagonal."""

    def __init__(self, grid, mass: float, names, surface_terms, couplings, absorber_rate=None):
        self.grid = grid
        self.mass = float(mass)
        self.names = list(names)
        self.surface_terms = [list(t) for t in surface_terms]
        self.couplings = {tuple(sorted(k)): list(v) for k, v in couplings.items()}
        self.absorber_rate = absorber_rate
        every = [term for terms in self.surface_terms for term in terms]
        every += [term for terms in self.couplings.values() for term in terms]
        self.time_dependent = any(term.time_dependent for term in every)
        self._static = self.matrix(None)

    @property
    def size(self) -> int:
        return len(self.names)

    @functools.cached_property
    def kinetic_operator(self) -> Hamiltonian:
        """T alone, one surface's (its apply_kinetic takes a leading surface axis)."""
        return Hamiltonian(self.grid, self.mass, [], static_potential=np.zeros(self.grid.shape))

    def matrix(self, t: float | None = 0.0) -> np.ndarray:
        """V(r, t) as (S, S, *grid) float64 (hartree); ``t`` None: the static part only."""
        if t is None and getattr(self, "_static", None) is not None:
            return self._static
        grid, s = self.grid, self.size
        out = np.zeros((s, s) + grid.shape)
        for a, terms in enumerate(self.surface_terms):
            out[a, a] = _terms_at(grid, self.mass, terms, t)
            if grid.radial:
                out[a, a] += grid.centrifugal_potential(self.mass)
        for (a, b), terms in self.couplings.items():
            out[a, b] = out[b, a] = _terms_at(grid, self.mass, terms, t)
        return out

    def apply(self, psi: np.ndarray, t: float = 0.0) -> np.ndarray:
        """(T + V(t)) psi for psi of shape (S, *grid): T by the grid's
        transform on each surface (:meth:`Hamiltonian.apply_kinetic`'s rule:
        FFT periodic, DST-I box), V as the local matrix."""
        out = self.kinetic_operator.apply_kinetic(psi)
        v = self.matrix(t) if self.time_dependent else self._static
        return out + np.einsum("ab...,b...->a...", v, psi)


def local_exponential(v: np.ndarray, tau: float) -> np.ndarray:
    """exp(-i V tau) at every point of V (S, S, *grid), real symmetric:
    complex (S, S, *grid).  Two surfaces in closed form (module notes);
    more from numpy.linalg.eigh of each point's matrix."""
    s = v.shape[0]
    if s == 1:
        return np.exp(-1j * tau * v)
    if s == 2:
        v0 = 0.5 * (v[0, 0] + v[1, 1])
        vz = 0.5 * (v[0, 0] - v[1, 1])
        vx = v[0, 1]
        r = np.hypot(vz, vx)
        phase = np.exp(-1j * tau * v0)
        c = np.cos(r * tau)
        # sin(r tau) / r, with its limit tau where r = 0
        sinc = np.where(r > 0, np.sin(r * tau) / np.where(r > 0, r, 1.0), tau)
        out = np.empty((2, 2) + v.shape[2:], complex)
        out[0, 0] = phase * (c - 1j * sinc * vz)
        out[1, 1] = phase * (c + 1j * sinc * vz)
        out[0, 1] = out[1, 0] = phase * (-1j * sinc * vx)
        return out
    flat = np.moveaxis(v.reshape(s, s, -1), -1, 0)           # (N, S, S)
    lam, q = np.linalg.eigh(flat)
    u = np.einsum("nij,nj,nkj->nik", q, np.exp(-1j * tau * lam), q)
    return np.moveaxis(u, 0, -1).reshape((s, s) + v.shape[2:])


def _apply_local(u: np.ndarray, psi: np.ndarray) -> np.ndarray:
    """psi_a <- sum_b u_ab psi_b at every point."""
    if u.shape[0] == 2:   # the common case without einsum's overhead
        a, b = psi[0], psi[1]
        return np.stack([u[0, 0] * a + u[0, 1] * b, u[1, 0] * a + u[1, 1] * b])
    return np.einsum("ab...,b...->a...", u, psi)


class CoupledSplitOperator:
    """Split-operator steps of psi (S, *grid) under a
    :class:`SurfaceHamiltonian` (module notes).

    ``weights``: the composition (:func:`coupled_weights`); ``absorber``:
    an :class:`~wavesweep.absorbers.layers.Absorber` or None.
    ``absorbed`` (S, faces) is the probability each face has taken from
    each surface; ``t`` the current time (atomic units)."""

    def __init__(self, hamiltonian: SurfaceHamiltonian, dt: float, weights=STRANG, absorber=None,
                 t0: float = 0.0):
        self.h = hamiltonian
        self.grid = hamiltonian.grid
        self.dt = float(dt)
        self.weights = tuple(weights)
        self.t0 = float(t0)
        self.steps_done = 0
        self.absorber = absorber if absorber is not None and absorber.active else None
        n_faces = len(self.absorber.layers) if self.absorber is not None else 0
        self.absorbed = np.zeros((hamiltonian.size, n_faces))
        self._kick_cache: dict = {}
        self._kinetic_cache: dict = {}
        self._dv = self.grid.cell_volume

    @property
    def t(self) -> float:
        return self.t0 + self.steps_done * self.dt

    def load(self, psi: np.ndarray) -> np.ndarray:
        """A complex128 copy of psi (S, *grid) to step from."""
        return np.array(psi, dtype=np.complex128, copy=True)

    # -- pieces ------------------------------------------------------------------
    def _kinetic(self, psi, tau):
        """exp(-i T tau) on every surface (the grid's transform along its axes)."""
        key = round(tau, 15)
        factor = self._kinetic_cache.get(key)
        if factor is None:
            t_k = self.grid.kinetic_energy(self.h.mass)
            factor = self._kinetic_cache[key] = np.exp(-1j * tau * t_k)
        return self.h.kinetic_operator.apply_kinetic(psi, factor=factor)

    def _kick_matrix(self, tau, absorb, t_mid):
        """exp(-i V tau) times the absorber's exp(-W absorb); V at ``t_mid``
        (a static V's matrices are kept per (tau, absorb))."""
        static = not self.h.time_dependent
        key = (round(tau, 15), round(absorb, 15))
        if static and key in self._kick_cache:
            return self._kick_cache[key]
        u = local_exponential(self.h.matrix(None if static else t_mid), tau)
        if self.absorber is not None and absorb > 0:
            u = u * np.exp(-self.absorber.rate * absorb)
        if static:
            self._kick_cache[key] = u
        return u

    def _book(self, psi, absorb):
        """Add to ``absorbed`` what a kick with absorber length ``absorb``
        removes, per surface and face (from |psi|^2 before it)."""
        if self.absorber is None or absorb <= 0:
            return
        weights = self.absorber.loss_weights(absorb)
        dens = psi.real ** 2 + psi.imag ** 2
        for n, (layer, w) in enumerate(zip(self.absorber.layers, weights)):
            slab = (slice(None),) + layer.slab
            self.absorbed[:, n] += (dens[slab] * w).reshape(self.h.size, -1).sum(axis=1) * self._dv

    def _kick(self, psi, tau, absorb, t_mid):
        self._book(psi, absorb)
        return _apply_local(self._kick_matrix(tau, absorb, t_mid), psi)

    # -- the step ----------------------------------------------------------------
    def step(self, psi: np.ndarray, nsteps: int = 1) -> np.ndarray:
        """Advance psi (S, *grid) by ``nsteps`` steps: per step, the
        composition of Strang sub-steps K(w_j/2) F(w_j) K(w_j/2), with the
        absorber in the kicks at the step's two ends (half each).  A
        time-dependent V is taken at each sub-step's middle."""
        psi = np.asarray(psi, complex)
        taus = [w * self.dt for w in self.weights]
        starts = np.concatenate([[0.0], np.cumsum(taus)[:-1]])
        for n in range(int(nsteps)):
            t_step = self.t0 + (self.steps_done + n) * self.dt
            for j, tau in enumerate(taus):
                mid = t_step + starts[j] + tau / 2
                psi = self._kick(psi, tau / 2, self.dt / 2 if j == 0 else 0.0, mid)
                psi = self._kinetic(psi, tau)
                psi = self._kick(psi, tau / 2, self.dt / 2 if j == len(taus) - 1 else 0.0, mid)
        self.steps_done += int(nsteps)
        return psi
