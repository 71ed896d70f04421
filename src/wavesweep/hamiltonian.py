"""The Hamiltonian of a run: kinetic energy on the transform grid, the static
potential, time-dependent terms and the absorbing rate, all in atomic units.

H(t) = T + V0(r) + sum_i f_i(t) g_i(r) + V_general(r, t) - i W(r)

``V0`` includes the centrifugal term l(l+1)/(2 m r^2) on a radial grid.
"""
from __future__ import annotations

import numpy as np

__all__ = ["Hamiltonian"]


class Hamiltonian:
    """Parameters: grid, mass (m_e), list of potential terms, absorber rate
    W (hartree, full grid shape, or None)."""

    def __init__(self, grid, mass: float, terms, absorber_rate=None):
        self.grid = grid
        self.mass = float(mass)
        self.terms = list(terms)
        mesh = grid.mesh()
        v0 = np.zeros(grid.shape)
        self.separable = []   # (g array, f callable)
        self.general = []     # terms evaluated in full per step
        for term in self.terms:
            if not term.time_dependent:
                v0 = v0 + term.static(mesh)
                continue
            sep = term.separable()
            if sep is not None:
                g, f = sep
                self.separable.append((np.asarray(g(mesh), float), f))
            else:
                self.general.append(term)
        v0 = v0 + grid.centrifugal_potential(self.mass)
        self.static_potential = np.ascontiguousarray(np.broadcast_to(v0, grid.shape), dtype=float)
        self.kinetic = grid.kinetic_energy(self.mass)
        self.absorber_rate = absorber_rate
        self._mesh = mesh

    @property
    def time_dependent(self) -> bool:
        return bool(self.separable or self.general)

    def dynamic_potential(self, t: float):
        """V(t) - V0 (hartree), broadcastable to the grid, or None when static."""
        if not self.time_dependent:
            return None
        v = 0.0
        for g, f in self.separable:
            v = v + f(t) * g
        for term in self.general:
            v = v + term.at_time(self._mesh, t)
        return v

    def potential(self, t: float = 0.0) -> np.ndarray:
        """Real potential V(r, t) on the grid (hartree)."""
        dyn = self.dynamic_potential(t)
        return self.static_potential if dyn is None else self.static_potential + dyn

    def spectral_range(self, t: float = 0.0) -> tuple[float, float]:
        """Bounds (hartree) of the real spectrum of the discretised H: V min/max
        plus 0..T_max (used to scale Chebyshev expansions)."""
        v = self.potential(t)
        return float(v.min()) + float(self.kinetic.min()), float(v.max()) + float(self.kinetic.max())

