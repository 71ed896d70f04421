"""The propagator interface.

A propagator advances psi on a grid under a :class:`~wavesweep.hamiltonian.Hamiltonian`
by whole time steps ``dt`` (atomic units).  Subclasses implement:

1. ``name`` and ``order`` (class attributes);
2. ``_step_impl(psi, nsteps)`` returning psi advanced by ``nsteps`` steps from
   ``self.t``, adding the probability removed at each absorber face to
   ``self.absorbed`` (one float64 per face, in the order of
   ``absorber.layers``);
3. optionally ``check_supported(hamiltonian, absorber, grid)`` raising
   :class:`~wavesweep.errors.JobError` for a combination the method cannot do.

The public :meth:`Propagator.step` keeps the books (time, step count) so
that subclasses only compute.
"""
from __future__ import annotations

from typing import ClassVar

import numpy as np

__all__ = ["Propagator"]


class Propagator:
    name: ClassVar[str] = ""
    order: ClassVar[int] = 0

    def __init__(self, hamiltonian, dt: float, transform=None, absorber=None,
                 dtype=np.complex128, t0: float = 0.0):
        self.hamiltonian = hamiltonian
        self.grid = hamiltonian.grid
        self.dt = float(dt)
        self.transform = transform
        self.absorber = absorber
        self.dtype = np.dtype(dtype)
        self.t0 = float(t0)
        self.steps_done = 0
        n_faces = len(absorber.layers) if absorber is not None and absorber.active else 0
        self.absorbed = np.zeros(n_faces)
        self.check_supported(hamiltonian, absorber, self.grid)

    @classmethod
    def check_supported(cls, hamiltonian, absorber, grid) -> None:
        """Raise JobError if this method cannot propagate that problem."""

    @property
    def t(self) -> float:
        """Current time (atomic units); computed from the step count so that
        it does not drift by repeated addition."""
        return self.t0 + self.steps_done * self.dt

    def step(self, psi: np.ndarray, nsteps: int = 1) -> np.ndarray:
        """Advance ``psi`` by ``nsteps`` steps; returns the new psi (which may
        be the same array, updated in place)."""
        if nsteps <= 0:
            return psi
        psi = self._step_impl(psi, int(nsteps))
        self.steps_done += int(nsteps)
        return psi

    def _step_impl(self, psi, nsteps):
        raise NotImplementedError

    def apply_hamiltonian(self, psi: np.ndarray, t: float | None = None) -> np.ndarray:
        """H psi (Hermitian part) with the spectral kinetic energy."""
        h = self.hamiltonian
        tk = self.transform.forward(np.array(psi, dtype=np.complex128, copy=True))
        tk *= h.kinetic
        out = self.transform.backward(tk)
        out += h.potential(self.t if t is None else t) * psi
        return out
