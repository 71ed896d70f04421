"""The propagator interface.

A propagator advances psi on a grid under a :class:`~wavesweep.hamiltonian.Hamiltonian`
by whole time steps ``dt`` (atomic units).  Subclasses implement:

1. ``name``, ``order`` and ``summary`` (class attributes; the name is the
   job's ``evolve.scheme``, the summary one line of ``wavesweep keys evolve``);
2. ``_step_impl(psi, nsteps)`` returning psi advanced by ``nsteps`` steps from
   ``self.t``, adding the probability removed at each absorber face to
   ``self.absorbed`` (one float64 per face, in the order of
   ``absorber.layers``);
3. optionally ``check_supported(hamiltonian, absorber, grid)`` raising
   :class:`~wavesweep.errors.JobError` for a combination the method cannot do;
4. optionally ``batched = True`` when ``_step_impl`` can advance a batch:
   ``members`` states of one grid stacked along a leading axis, each with
   its own absorber (same layer geometry, strengths may differ) and its own
   row of ``self.absorbed`` (shape ``(members, faces)``);
5. optionally ``in_place_transform = True`` when psi may live in a fast FFT
   backend's planned buffer (the set-up then gives it the job's backend;
   others get scipy.fft), ``renormalises_single = True`` when the method
   keeps a single-precision norm itself (the run then does not), and
   :meth:`peak_bytes` when its memory differs from the default estimate;
6. optionally ``exact_in_time = True`` for a converged expansion of
   exp(-i H dt) (no splitting error: ``check``'s time-step criterion does not
   judge the phase per step), with :meth:`expansion_terms` for ``check`` to
   report the expansion's length.

Everything the rest of the package reads of a propagator class is declared
here: ``name``, ``order``, ``summary``, ``batched``, ``in_place_transform``,
``renormalises_single``, ``exact_in_time``, :meth:`check_supported`,
:meth:`peak_bytes` and :meth:`expansion_terms`.

A propagator is known by its name once :func:`register_scheme` has seen its
class (a decorator); :data:`SCHEMES` is the one list of them, read by the
job's validation, ``wavesweep keys`` and ``check``.

The public :meth:`Propagator.step` keeps the books (time, step count) so
that subclasses only compute.
"""
from __future__ import annotations

import threading
from typing import ClassVar

import numpy as np

from ..errors import JobError
from ..registry import registrar

__all__ = ["Propagator", "SCHEMES", "register_scheme", "other_schemes"]


class Propagator:
    name: ClassVar[str] = ""
    order: ClassVar[int] = 0
    summary: ClassVar[str] = ""
    batched: ClassVar[bool] = False
    in_place_transform: ClassVar[bool] = False
    renormalises_single: ClassVar[bool] = False
    exact_in_time: ClassVar[bool] = False

    def __init__(self, hamiltonian, dt: float, transform=None, absorber=None,
                 dtype=np.complex128, t0: float = 0.0, members: int | None = None):
        self.hamiltonian = hamiltonian
        self.grid = hamiltonian.grid
        self.dt = float(dt)
        self.transform = transform
        self.dtype = np.dtype(dtype)
        self.t0 = float(t0)
        self.steps_done = 0
        self.members = None if members is None else int(members)
        if self.members is None:
            self.absorbers = [absorber]
        else:
            if not self.batched:
                raise ValueError(f"the {self.name} propagator cannot advance a batch of states")
            self.absorbers = (list(absorber) if isinstance(absorber, (list, tuple))
                              else [absorber] * self.members)
            if len(self.absorbers) != self.members:
                raise ValueError(f"{len(self.absorbers)} absorbers for {self.members} members")
        self.absorber = self.absorbers[0]
        first = self.absorber
        n_faces = len(first.layers) if first is not None and first.active else 0
        self.absorbed = np.zeros(n_faces if self.members is None else (self.members, n_faces))
        for a in self.absorbers:
            self.check_supported(hamiltonian, a, self.grid)

    @classmethod
    def check_supported(cls, hamiltonian, absorber, grid) -> None:
        """Raise JobError if this method cannot propagate that problem."""

    @classmethod
    def peak_bytes(cls, points: int, complex_bytes: int, absorbing: bool, radial_points: int | None = None) -> float:
        """Bytes a run with this method holds at its peak, from shapes alone
        (nothing is allocated): ``points`` grid points of ``complex_bytes``
        each (16 double, 8 single), an absorber's W where ``absorbing``, and
        ``radial_points`` on a radial grid.  The default, for methods that
        keep several states at once (Crank-Nicolson, Chebyshev): about seven
        arrays of psi and three of float64."""
        return float(points) * complex_bytes * 7 + float(points) * 8.0 * 3

    @classmethod
    def expansion_terms(cls, hamiltonian, dt: float) -> int | None:
        """Terms per step of a method that expands exp(-i H dt) in a series
        (``check`` reports it); None for any other method."""
        return None

    @property
    def t(self) -> float:
        """Current time (atomic units); computed from the step count so that
        it does not drift by repeated addition."""
        return self.t0 + self.steps_done * self.dt

    def load(self, psi: np.ndarray) -> np.ndarray:
        """A copy of ``psi`` (the propagator's dtype) to step from; ``psi``
        itself is never written to.  Backends with a working buffer put
        the copy there."""
        return np.array(psi, dtype=self.dtype, copy=True)

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


# name -> propagator class: the one list of schemes (register_scheme adds to it).
SCHEMES: dict[str, type[Propagator]] = {}


register_scheme = registrar(SCHEMES, "name", "a scheme of the job's ``evolve.scheme``")


_probing = threading.local()   # other_schemes is asking the schemes: their messages need no advice


def other_schemes(cls, hamiltonian, absorber, grid) -> str:
    """For a ``check_supported`` message: the registered schemes besides
    ``cls`` that can propagate this problem, as "'a' or 'b'" (read from
    :data:`SCHEMES`, so the advice names no scheme that is not there)."""
    if getattr(_probing, "active", False):
        return "another scheme"
    _probing.active = True
    try:
        names = []
        for name, other in SCHEMES.items():
            if other is cls:
                continue
            try:
                other.check_supported(hamiltonian, absorber, grid)
            except JobError:
                continue
            names.append(repr(name))
    finally:
        _probing.active = False
    return " or ".join(names) if names else "another scheme"
