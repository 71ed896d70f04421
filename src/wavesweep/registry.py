"""Choices read from a registry when they are used, not when they are declared.

Propagators (:data:`wavesweep.propagators.SCHEMES`), potential kinds
(:data:`wavesweep.potentials.REGISTRY`), packet kinds
(:data:`wavesweep.states.PACKETS`), FFT backends (:data:`wavesweep.fft.BACKENDS`)
and executors (:data:`wavesweep.studies.executors.EXECUTORS`) are each listed
in one registry, a dict from name to class.  A schema's ``Field(choices=...)``
or an argparse option declared at import time would freeze a copy of the
names and refuse what is registered later; :class:`Names` reads the registry
each time it is asked instead.  Standard library only: the CLI builds its
parser with these before it loads anything else.
"""
from __future__ import annotations

__all__ = ["Names", "registrar"]


class Names:
    """The names of a registry as they are when asked: ``extra`` first (a
    choice that is not an entry, such as the FFT backend ``"auto"``), then
    the registry's keys in registration order.

    ``registry`` is a mapping, or a function of no arguments returning the
    names (so that the registry's module is imported only when a name is
    checked or listed).  Supports ``in``, iteration and ``len``: what
    :class:`~wavesweep.schema.Field` choices and argparse's ``choices`` use.
    """

    def __init__(self, registry, extra: tuple = ()):
        self._registry = registry
        self._extra = tuple(extra)

    def _names(self) -> tuple:
        names = self._registry() if callable(self._registry) else self._registry
        return (*self._extra, *(n for n in names if n not in self._extra))

    def __contains__(self, name) -> bool:
        return name in self._names()

    def __iter__(self):
        return iter(self._names())

    def __len__(self) -> int:
        return len(self._names())

    def __repr__(self) -> str:
        return f"Names({list(self._names())!r})"


def registrar(registry: dict, key: str, what: str):
    """The class decorator that registers a class in ``registry`` under its
    attribute ``key`` (``name`` of a scheme or backend, ``kind`` of a
    potential or packet), refusing a class that has none: the one way every
    registry is filled.  ``what`` names the entry in the decorator's
    docstring and its error."""
    def register(cls):
        name = getattr(cls, key, None)
        if not name:
            raise ValueError(f"{cls.__name__} has no {key} to register it as {what} by")
        registry[name] = cls
        return cls
    register.__doc__ = f"Class decorator: make a class {what}, by its ``{key}``."
    return register
