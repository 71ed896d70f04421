"""Propagators by name (or class): one interface, see :mod:`.base`."""
from __future__ import annotations

from ..errors import JobError
from .base import Propagator
from .chebyshev import Chebyshev
from .crank_nicolson import CrankNicolson
from .split_operator import Order4, Order4Suzuki, SplitOperator, Strang

SCHEMES: dict[str, type[Propagator]] = {
    cls.name: cls for cls in (Strang, Order4, Order4Suzuki, Chebyshev, CrankNicolson)
}


def propagator_class(scheme) -> type[Propagator]:
    """A propagator class from a scheme name or a Propagator subclass."""
    if isinstance(scheme, type) and issubclass(scheme, Propagator):
        return scheme
    try:
        return SCHEMES[scheme]
    except (KeyError, TypeError):
        raise JobError("evolve.scheme", f"unknown scheme {scheme!r}; choose from "
                                        f"{', '.join(SCHEMES)}") from None


__all__ = ["Propagator", "SplitOperator", "Strang", "Order4", "Order4Suzuki", "Chebyshev",
           "CrankNicolson", "SCHEMES", "propagator_class"]
