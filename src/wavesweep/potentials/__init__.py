"""Potential terms by name: the registry, the library, fields, expressions, files."""
from .base import REGISTRY, PotentialContext, PotentialTerm, make_term, register, term_class
from . import library, field, external  # noqa: F401  (register the kinds)

# A job without [[potential]] is a free particle.
DEFAULT_POTENTIAL = library.Free.kind

__all__ = ["REGISTRY", "DEFAULT_POTENTIAL", "PotentialContext", "PotentialTerm", "make_term", "register", "term_class"]
