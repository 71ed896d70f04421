"""The job as a document: a validated table in the job's units, its TOML,
its canonical form and its run id (a content hash).  Pure: nothing here
builds physics, and nothing changes a Job once it is made."""
from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass, field, replace
from pathlib import Path

import tomli_w

from ..units import UnitSet
from .schemas import ABSORBER, NOT_PHYSICS

__all__ = ["Job", "grid_axes", "job_number"]


def job_number(x: float) -> float:
    """A derived value as it would be written by hand in a job file (12
    significant digits: 0.05, not 0.05000000000000001), so that the same
    derivation always gives the same text and the same run id."""
    return float(f"{x:.12g}")


def grid_axes(grid: dict) -> list[str]:
    return [k for k in ("x", "y", "z", "r") if k in grid]


@dataclass(frozen=True)
class Job:
    """A validated job: ``table`` in the job's units with defaults filled in.

    A document: nothing here builds physics or changes the table.  Values
    the physics chooses (a tuned CAP) are filled in by
    :func:`wavesweep.setup.resolve_job`, which returns a new Job."""

    table: dict
    units: UnitSet
    source: Path | None = None
    # the table as written (after --set), to tell the keys the job gave from
    # the defaults filled in (wavesweep.job.reference.physics_defaults)
    raw: dict | None = field(default=None, repr=False, compare=False)

    @property
    def title(self) -> str:
        return self.table.get("title", "")

    @property
    def name(self) -> str:
        return self.source.stem if self.source else "job"

    @property
    def ndim(self) -> int:
        return len(grid_axes(self.table["grid"]))

    @property
    def needs_tuning(self) -> bool:
        """Whether values the physics must choose are still open (today a CAP
        without strength or exponent): :func:`wavesweep.setup.resolve_job`
        gives the complete job.  An open job has no run id and no TOML."""
        ab = self.table.get("absorber") or {}
        return ab.get("kind") == "cap" and (ab.get("strength") is None or ab.get("power") is None)

    def with_absorber(self, absorber: dict) -> "Job":
        """A new Job with ``absorber`` as its absorber table (this one unchanged)."""
        return replace(self, table={**self.table, "absorber": absorber})

    def _complete(self, what: str) -> None:
        if self.needs_tuning:
            raise ValueError(f"the job's CAP strength is still to be tuned: {what} of the complete job, "
                             "wavesweep.resolve_job(job), which tunes it")

    def to_toml(self) -> str:
        """The complete job as TOML; loading it gives back the same table."""
        self._complete("the TOML is that")
        table = dict(self.table)
        if isinstance(table.get("absorber"), dict):  # the tuned strength in its schema place
            ab = table["absorber"]
            table["absorber"] = {**{k: ab[k] for k in ABSORBER if k in ab},
                                 **{k: v for k, v in ab.items() if k not in ABSORBER}}
        return tomli_w.dumps(_toml_ready(table))

    def canonical(self) -> str:
        """Key-order-free JSON of the physics, for hashing: the title, the
        sweep and the keys in :data:`NOT_PHYSICS` are left out; numbers are
        compared as floats (1 and 1.0 are the same)."""
        self._complete("the canonical form is that")
        t = {k: v for k, v in self.table.items() if k not in ("title", "sweep")}
        for table, keys in NOT_PHYSICS.items():
            if isinstance(t.get(table), dict):
                t[table] = {k: v for k, v in t[table].items() if k not in keys}
        return json.dumps(_canonical_numbers(t), sort_keys=True, separators=(",", ":"))

    @property
    def run_id(self) -> str:
        """Content hash of the canonical job: same physics, same id."""
        return hashlib.sha256(self.canonical().encode()).hexdigest()[:12]


def _canonical_numbers(obj):
    if isinstance(obj, dict):
        return {k: _canonical_numbers(v) for k, v in obj.items()}
    if isinstance(obj, list):
        return [_canonical_numbers(v) for v in obj]
    if isinstance(obj, bool) or obj is None:
        return obj
    if isinstance(obj, (int, float)):
        return float(repr(float(obj))) if math.isfinite(obj) else str(obj)
    return obj


def _toml_ready(obj):
    if isinstance(obj, dict):
        return {k: _toml_ready(v) for k, v in obj.items() if v is not None}
    if isinstance(obj, list):
        return [_toml_ready(v) for v in obj]
    return obj
