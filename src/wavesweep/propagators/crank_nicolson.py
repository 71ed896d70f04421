"""Crank-Nicolson finite differences in 1D (cross-check of the spectral methods).

(1 + i H dt/2) psi(t + dt) = (1 - i H dt/2) psi(t), with the 3-point
Laplacian (Dirichlet walls for a box axis, cyclic for a periodic one) and
H = -(1/2m) d2/dx2 + V(t_mid) - i W.  Crank & Nicolson, Proc. Camb. Phil.
Soc. 43, 50 (1947); second order in dx and dt, unconditionally stable.

The matrix is factored once (scipy.sparse.linalg.splu) for a static H and
rebuilt per step for a time-dependent one.  The probability lost in a step is
exactly norm_before - norm_after; it is booked to the faces in proportion to
their instantaneous loss rates sum(W_face |psi|^2).
"""
from __future__ import annotations

import numpy as np

from ..errors import JobError
from .base import Propagator, other_schemes, register_scheme

__all__ = ["CrankNicolson"]


@register_scheme
class CrankNicolson(Propagator):
    name = "crank_nicolson"
    order = 2
    summary = "Crank-Nicolson (1D only): second order, unitary, a sparse solve per step"

    @classmethod
    def check_supported(cls, hamiltonian, absorber, grid):
        if getattr(hamiltonian, "contact", 0.0):
            raise JobError("evolve.scheme", f"{cls.name!r} is linear and cannot step the [interaction] "
                                            f"(g N |psi|^2); use {other_schemes(cls, hamiltonian, absorber, grid)}")
        if grid.ndim != 1:
            raise JobError("evolve.scheme", f"{cls.name!r} is 1D only; in 2D/3D use "
                                            f"{other_schemes(cls, hamiltonian, absorber, grid)}")

    def __init__(self, *args, **kwargs):
        import scipy.sparse as sp   # lazy: scipy.sparse and its LU (0.06 s) load with the first run
        from scipy.sparse.linalg import splu   # lazy: as above
        self._sparse, self._splu = sp, splu   # bound once: _factor runs every step when H(t)
        super().__init__(*args, **kwargs)
        ax = self.grid.axes[0]
        n, dx, m = ax.points, ax.dx, self.hamiltonian.mass
        main = np.full(n, 1.0 / (m * dx * dx))
        off = np.full(n - 1, -0.5 / (m * dx * dx))
        lap = sp.diags([off, main, off], [-1, 0, 1], format="lil")
        if ax.boundary == "periodic":
            lap[0, n - 1] = lap[n - 1, 0] = -0.5 / (m * dx * dx)
        self._t_matrix = lap.tocsc()
        self._w = None
        if self.absorber is not None and self.absorber.active:
            self._w = self.absorber.rate.reshape(-1)
            self._face_w = []
            for layer in self.absorber.layers:
                wf = np.zeros(n)
                wf[layer.slab] = np.asarray(layer.rate).reshape(-1)
                self._face_w.append(wf)
        self._lu = None
        if not self.hamiltonian.time_dependent:
            self._lu, self._rhs = self._factor(self.hamiltonian.static_potential.reshape(-1))

    def _factor(self, v):
        diag = v.astype(complex)
        if self._w is not None:
            diag = diag - 1j * self._w
        sp = self._sparse
        h = self._t_matrix + sp.diags(diag, 0, format="csc")
        eye = sp.identity(h.shape[0], format="csc", dtype=complex)
        a = (eye + 0.5j * self.dt * h).tocsc()
        b = (eye - 0.5j * self.dt * h).tocsr()
        return self._splu(a), b

    def _step_impl(self, psi, nsteps):
        psi = np.asarray(psi, dtype=np.complex128).reshape(-1)
        dx = self.grid.cell_volume
        for s in range(nsteps):
            if self._lu is None:
                tm = self.t + (s + 0.5) * self.dt
                lu, rhs = self._factor(self.hamiltonian.potential(tm).reshape(-1))
            else:
                lu, rhs = self._lu, self._rhs
            before = np.abs(psi) ** 2
            new = lu.solve(rhs @ psi)
            if self._w is not None:
                after = np.abs(new) ** 2
                lost = (before.sum() - after.sum()) * dx
                rates = np.array([np.sum(wf * (before + after)) for wf in self._face_w])
                if rates.sum() > 0:
                    self.absorbed += lost * rates / rates.sum()
            psi = new
        return psi.reshape(self.grid.shape).astype(self.dtype, copy=False)
