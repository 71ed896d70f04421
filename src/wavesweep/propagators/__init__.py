"""Propagators by name (or class): one interface, see :mod:`.base`.

:data:`SCHEMES` is the one list of them: a class decorated with
:func:`register_scheme` in its own module is a scheme once that module is
imported below (one line each; the order of the imports is the order
``wavesweep keys`` lists them in)."""
from __future__ import annotations

from ..errors import JobError
from .base import SCHEMES, Propagator, register_scheme
# the split-operator schemes first: SCHEMES lists them in the order of these imports
from .split_operator import Order4, Order4Suzuki, SplitOperator, Strang
from .chebyshev import Chebyshev
from .crank_nicolson import CrankNicolson

# The scheme of a job that names none (validated against SCHEMES like any other).
DEFAULT_SCHEME = Strang.name


def scheme_class(scheme) -> type[Propagator]:
    """The class of a scheme, from its name (or the class itself)."""
    if isinstance(scheme, type) and issubclass(scheme, Propagator):
        return scheme
    try:
        return SCHEMES[scheme]
    except (KeyError, TypeError):
        raise JobError("evolve.scheme", f"unknown scheme {scheme!r}; choose from "
                                        f"{', '.join(SCHEMES)}") from None


__all__ = ["Propagator", "SplitOperator", "Strang", "Order4", "Order4Suzuki", "Chebyshev",
           "CrankNicolson", "SCHEMES", "DEFAULT_SCHEME", "scheme_class", "register_scheme"]
