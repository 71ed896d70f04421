"""Potential terms by name: the registry, the library, fields, expressions, files."""
from .base import REGISTRY, PotentialContext, PotentialTerm, make_term, register, term_class
from . import library, field, external  # noqa: F401  (register the kinds)

__all__ = ["REGISTRY", "PotentialContext", "PotentialTerm", "make_term", "register", "term_class"]
