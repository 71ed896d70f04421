"""Declarative fields for job-file tables: types, units, defaults, checks.

A table's schema is a dict ``name -> Field``.  :func:`validate_table` checks a
raw TOML table against it and returns the table with defaults filled in (still
in the job's units, so it can be written back as a job file), and
:func:`to_atomic` converts a validated table to atomic units.  Every error is a
:class:`~wavesweep.errors.JobError` naming the dotted field; a table's
independent errors are raised together (:class:`~wavesweep.errors.JobErrors`).
"""
from __future__ import annotations

import difflib
import math
from dataclasses import dataclass
from typing import Any

from .errors import ErrorCollector, JobError
from .units import KINDS, UnitSet

__all__ = ["Field", "REQUIRED", "validate_table", "to_atomic", "check_unknown", "unknown_keys"]


class _Required:
    def __repr__(self):
        return "REQUIRED"


REQUIRED: Any = _Required()

# Value types that are not physical quantities.
_PLAIN = ("int", "str", "bool", "number", "table", "list")

# Integers beyond 64 bits overflow in numpy and C libraries; no count in a
# job comes near (grid points are judged by memory long before).
MAX_INT = 2**63 - 1
# Numbers in atomic units beyond this overflow when multiplied (the square
# of 1e200 is already inf): no physical value comes near (1 s is 4e16 au,
# 1 kg 1e30 au).
MAX_MAGNITUDE = 1e100


@dataclass(frozen=True)
class Field:
    """One key of a table.

    ``kind`` is a unit kind from :data:`wavesweep.units.KINDS` (the value is a
    quantity: a number in job units or a string with a unit), or one of
    ``int``, ``str``, ``bool``, ``number`` (dimensionless float), ``table``,
    ``list``.  ``per_axis`` accepts a scalar or a list with one value per grid
    axis.  ``positive`` / ``nonnegative`` bound numeric values (after
    conversion, for quantities); ``maximum`` bounds integers and plain numbers.  ``doc`` is the key's one-line description
    (``wavesweep keys`` prints it; every key has one).  ``physics`` marks a
    default that sets the physics (a centre, an edge width, a phase, the
    mass): when a job leaves such a key out, ``check`` prints the value used
    (:func:`wavesweep.job.reference.physics_defaults`), and the resolved job holds it.
    """

    kind: str
    default: Any = REQUIRED
    doc: str = ""
    choices: tuple | None = None
    per_axis: bool = False
    positive: bool = False
    nonnegative: bool = False
    physics: bool = False
    maximum: float | None = None

    @property
    def required(self) -> bool:
        return self.default is REQUIRED


def check_unknown(table: dict, allowed, prefix: str) -> None:
    """Raise for every key not in ``allowed`` (one error each), suggesting
    the closest allowed key."""
    found = ErrorCollector()
    for error, _ in unknown_keys(table, allowed, prefix):
        found.add(error)
    found.raise_if_any()


def unknown_keys(table: dict, allowed, prefix: str) -> list[tuple[JobError, str | None]]:
    """``(error, suggestion)`` for each key of ``table`` not in ``allowed``;
    ``suggestion`` is the closest allowed key, if one is close (a missing
    required key that was suggested is a misspelling, not a second error)."""
    allowed = list(allowed)
    out = []
    for key in table:
        if key not in allowed:
            near = difflib.get_close_matches(str(key), allowed, n=1, cutoff=0.5)
            hint = f"did you mean {near[0]!r}? " if near else ""
            where = "at the top level" if not prefix else f"in [{prefix}]"
            out.append((JobError(_join(prefix, key),
                                 f"unknown key; {hint}allowed {where}: {', '.join(allowed)}"),
                        near[0] if near else None))
    return out


def _join(prefix: str, key) -> str:
    return f"{prefix}.{key}" if prefix else str(key)


def _type_name(value) -> str:
    return {bool: "a boolean", int: "an integer", float: "a number", str: "a string",
            list: "a list", dict: "a table"}.get(type(value), type(value).__name__)


def _check_scalar(f: Field, value, name: str, units: UnitSet | None):
    k = f.kind
    if k == "bool":
        if not isinstance(value, bool):
            raise JobError(name, f"must be true or false, got {_type_name(value)} {value!r}")
        return value
    if k == "str":
        if not isinstance(value, str):
            raise JobError(name, f"must be a string, got {_type_name(value)} {value!r}")
        if f.choices is not None and value not in f.choices:
            near = difflib.get_close_matches(value, [str(c) for c in f.choices], n=1)
            hint = f" (did you mean {near[0]!r}?)" if near else ""
            raise JobError(name, f"{value!r} is not one of {', '.join(map(repr, f.choices))}{hint}")
        return value
    if k == "int":
        if isinstance(value, bool) or not isinstance(value, int):
            if isinstance(value, float) and value.is_integer():
                value = int(value)
            else:
                raise JobError(name, f"must be an integer, got {_type_name(value)} {value!r}")
        if f.positive and value <= 0:
            raise JobError(name, f"must be a positive integer, got {value}")
        if f.nonnegative and value < 0:
            raise JobError(name, f"must be zero or positive, got {value}")
        limit = MAX_INT if f.maximum is None else f.maximum
        if abs(value) > limit:
            raise JobError(name, f"must be at most {limit:g}, got {value:.6g}")
        return value
    if k == "table":
        if not isinstance(value, dict):
            raise JobError(name, f"must be a table, got {_type_name(value)} {value!r}")
        return value
    if k == "list":
        if not isinstance(value, list):
            raise JobError(name, f"must be a list, got {_type_name(value)} {value!r}")
        return value
    # numbers and quantities
    if k == "number":
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise JobError(name, f"must be a number, got {_type_name(value)} {value!r}")
        number = float(value)
    else:
        if isinstance(value, bool) or not isinstance(value, (int, float, str)):
            raise JobError(name, f"must be a {k.replace('_', ' ')} (a number in the job's "
                                 f"units or a string like '3 nm'), got {_type_name(value)} {value!r}")
        number = (units or UnitSet()).to_atomic(value, k, name)
    if not math.isfinite(number):
        raise JobError(name, f"must be finite, got {value!r}")
    if number != 0.0 and not (1.0 / MAX_MAGNITUDE <= abs(number) <= MAX_MAGNITUDE):
        raise JobError(name, f"{value!r} is {abs(number):.3g} in atomic units, outside "
                             f"{1 / MAX_MAGNITUDE:g}..{MAX_MAGNITUDE:g} (beyond it products of values "
                             "overflow); check the number and its unit")
    if f.maximum is not None and k == "number" and number > f.maximum:
        raise JobError(name, f"must be at most {f.maximum:g}, got {value!r}")
    if f.positive and number <= 0:
        raise JobError(name, f"must be positive, got {value!r}")
    if f.nonnegative and number < 0:
        raise JobError(name, f"must not be negative, got {value!r}")
    if f.choices is not None and value not in f.choices:
        raise JobError(name, f"{value!r} is not one of {', '.join(map(repr, f.choices))}")
    return value


def validate_table(table, schema: dict[str, Field], prefix: str, units: UnitSet | None = None,
                   ndim: int | None = 1, extra_ok: tuple = ()) -> dict:
    """Check ``table`` against ``schema``; return it with defaults filled in.

    Values stay in the job's units (strings with units are kept as written).
    Every key is checked on its own: all unknown, missing and bad keys are
    raised together (:class:`~wavesweep.errors.JobErrors`), in the order of
    the table, missing keys last.  A required key that is missing because it
    was misspelled is reported once, as the unknown key with its suggestion.
    ``ndim=None`` (the grid is not known) skips the check that per-axis lists
    have one value per axis.
    """
    if not isinstance(table, dict):
        raise JobError(prefix, f"must be a table, got {_type_name(table)} {table!r}")
    found = ErrorCollector()
    suggested = set()
    for error, near in unknown_keys(table, list(schema) + list(extra_ok), prefix):
        found.add(error)
        suggested.add(near)
    out, checked = {}, {}
    missing = []
    for key, f in schema.items():
        name = _join(prefix, key)
        if key not in table:
            if f.required:
                if key not in suggested:
                    what = f" ({f.doc})" if f.doc else ""
                    missing.append(JobError(name, f"missing; add {key} = ...{what}"))
            elif f.default is not None:
                out[key] = f.default
            continue
        with found.check():
            value = table[key]
            if f.per_axis and isinstance(value, list):
                if ndim is not None and len(value) != ndim:
                    raise JobError(name, f"needs one value per grid axis ({ndim}), got {len(value)}")
                per_value = ErrorCollector()
                values = []
                for i, v in enumerate(value):
                    with per_value.check():
                        values.append(_check_scalar(f, v, f"{name}.{i}", units))
                per_value.raise_if_any()
                checked[key] = values
            else:
                checked[key] = _check_scalar(f, value, name, units)
    for e in missing:
        found.add(e)
    # the table's order, as written (the schema's order is not the user's)
    order = {key: i for i, key in enumerate(table)}
    found.raise_if_any(order=lambda e: order.get(_last_key(e.field, prefix), len(order)))
    out.update(checked)
    out = {key: out[key] for key in schema if key in out}   # the schema's order, as before
    for key in extra_ok:
        if key in table:
            out[key] = table[key]
    return out


def _last_key(field: str, prefix: str) -> str:
    """The key of ``prefix``'s table that ``field`` names (``grid.x.min`` ->
    ``min`` for prefix ``grid.x``)."""
    rest = field[len(prefix) + 1:] if prefix and field.startswith(prefix + ".") else field
    return rest.split(".", 1)[0]


def to_atomic(table: dict, schema: dict[str, Field], units: UnitSet, prefix: str = "",
              ndim: int = 1) -> dict:
    """Validated table -> values in atomic units (per-axis fields become lists
    of length ``ndim``; plain values pass through)."""
    out = {}
    for key, value in table.items():
        f = schema.get(key)
        if f is None or f.kind in _PLAIN or value is None:
            out[key] = value
            continue
        name = _join(prefix, key)
        if f.kind == "number":
            conv = float
        else:
            conv = (lambda v, n: units.to_atomic(v, f.kind, n))
        if f.per_axis:
            vals = value if isinstance(value, list) else [value] * ndim
            out[key] = [float(v) if f.kind == "number" else conv(v, f"{name}.{i}")
                        for i, v in enumerate(vals)]
        else:
            out[key] = float(value) if f.kind == "number" else conv(value, name)
    return out


def kind_label(kind: str, units: UnitSet) -> str:
    """Unit label of a field kind in the job's units ('' for plain kinds)."""
    return units.unit_label(kind) if kind in KINDS and kind != "dimensionless" else ""
