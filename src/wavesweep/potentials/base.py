"""Potential terms: one small base class and a registry by name.

A term is built from its validated job table converted to atomic units and
evaluates V (hartree) on broadcastable coordinate arrays (bohr).  Static terms
implement :meth:`PotentialTerm.static`; time-dependent ones implement
:meth:`PotentialTerm.at_time`, and if they factor as ``f(t) g(r)`` they say so
with :meth:`separable` so the propagator evaluates ``g`` once and only the
scalar ``f(t)`` per step.

To add a kind: subclass, set ``kind``, ``summary``, ``formula`` (V(r, t) in
plain text with the parameter names as symbols) and ``parameters`` (a schema
of :class:`~wavesweep.schema.Field`, each with a ``doc``), implement
``static`` (or ``at_time``), and decorate with :func:`register`.
``wavesweep keys KIND`` prints the formula and the keys; a test fails for a
registered kind without them.
"""
from __future__ import annotations

import difflib
from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from ..errors import JobError
from ..registry import registrar
from ..schema import Field, to_atomic

__all__ = ["PotentialTerm", "PotentialContext", "REGISTRY", "register", "term_class", "make_term"]


@dataclass(frozen=True)
class PotentialContext:
    """What a term may need beyond its own parameters (atomic units)."""

    grid: object          # wavesweep.grid.Grid
    mass: float           # m_e
    charge: float | None  # e, None when the job gives none
    units: object         # wavesweep.units.UnitSet (for expressions in job units)
    field: str            # dotted job path of this term, for error messages
    frame: str = "lab"    # grid.frame: "free_fall" removes the uniform forces (wavesweep.frame)


class PotentialTerm:
    """Base class of a potential term.

    Subclasses define:

    1. ``kind``: the name used in job files; ``summary``: one line;
       ``formula``: V(r, t) in plain text, symbols named as the parameters
       (edges, gauge, what each length spans);
    2. ``parameters``: ``name -> Field`` with unit kinds, defaults, checks and
       a ``doc`` each (``physics=True`` on a default that sets the physics);
    3. ``static(mesh)`` returning V in hartree for time-independent terms, or
       ``at_time(mesh, t)`` with ``time_dependent = True``;
    4. optionally ``separable()`` -> ``(g(mesh) array, f(t) callable)``.

    ``self.p`` holds the parameters in atomic units, ``self.ctx`` the context.
    """

    kind: ClassVar[str] = ""
    parameters: ClassVar[dict[str, Field]] = {}
    time_dependent: ClassVar[bool] = False
    # a force that acts everywhere along the packet's path (gravity, a field):
    # a free-flight estimate of arrival times means nothing then, and analysis
    # says so; V = -F(t) . r exactly, so a free-falling frame removes it
    # (:mod:`wavesweep.frame`), and the term gives F by :meth:`force_at`
    uniform_force: ClassVar[bool] = False
    summary: ClassVar[str] = ""
    formula: ClassVar[str] = ""

    def __init__(self, params: dict, ctx: PotentialContext):
        self.p = params
        self.ctx = ctx
        self.validate()

    def validate(self) -> None:
        """Check parameter combinations; raise JobError naming the field
        (several independent ones together with
        :class:`~wavesweep.errors.ErrorCollector`).  Called when the term
        is built, which the job loader does once for every valid table
        (:func:`make_term`), so these errors come with the job's others."""

    def axis_of(self, name: str = "axis") -> int:
        """Index of the grid axis named by parameter ``name`` (default ``x``)."""
        axis = self.p.get(name) or self.ctx.grid.names[0]
        if axis not in self.ctx.grid.names:
            raise JobError(f"{self.ctx.field}.{name}",
                           f"{axis!r} is not an axis of this grid ({', '.join(self.ctx.grid.names)})")
        return self.ctx.grid.names.index(axis)

    def static(self, mesh: dict[str, np.ndarray]) -> np.ndarray:
        raise NotImplementedError

    def at_time(self, mesh: dict[str, np.ndarray], t: float) -> np.ndarray:
        return self.static(mesh)

    def separable(self):
        """``(g, f)`` with V(r, t) = f(t) g(r), or None."""
        return None

    def force_at(self, t: float) -> np.ndarray:
        """A :attr:`uniform_force` term's force F(t) = -grad V (hartree/bohr,
        one per grid axis), with V = -F(t) . r."""
        raise NotImplementedError(f"{type(self).__name__} is no uniform force")


REGISTRY: dict[str, type[PotentialTerm]] = {}


register = registrar(REGISTRY, "kind", "a potential kind of ``[[potential]]`` tables")


def term_class(kind, field: str) -> type[PotentialTerm]:
    """The term class for a kind name (or a PotentialTerm subclass)."""
    if isinstance(kind, type) and issubclass(kind, PotentialTerm):
        return kind
    try:
        return REGISTRY[kind]
    except (KeyError, TypeError):
        near = difflib.get_close_matches(str(kind), REGISTRY, n=1)
        hint = f"did you mean {near[0]!r}? " if near else ""
        raise JobError(field, f"unknown potential kind {kind!r}; {hint}"
                              f"known kinds: {', '.join(sorted(REGISTRY))}") from None


def make_term(table: dict, ctx: PotentialContext) -> PotentialTerm:
    """A term from its validated job table (job units; ``kind`` names the
    class) in the context ``ctx``: the parameters converted to atomic units,
    then the term built, which runs its :meth:`~PotentialTerm.validate`."""
    cls = term_class(table["kind"], f"{ctx.field}.kind")
    params = to_atomic({k: v for k, v in table.items() if k != "kind"}, cls.parameters,
                       ctx.units, ctx.field, ctx.grid.ndim)
    return cls(params, ctx)
