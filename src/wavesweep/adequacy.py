"""Adequacy findings: the shared vocabulary of ``check``, ``run``, ``submit``
and the analysis commands.

A :class:`Finding` is one judgement of a setting against the physics of the
run (``topic``, ``level`` ok|warn|error, the job ``field`` to change, a
one-line ``message`` with numbers in the job's units, and ``values`` for
scripts); a :class:`Report` is the list of them for one job or study.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

__all__ = ["Finding", "Report"]


@dataclass
class Finding:
    """One judgement: ``level`` is "ok", "warn" or "error"; ``field`` the
    dotted job key whose change fixes it (``"grid.x.points"``)."""

    topic: str
    level: str        # "ok", "warn", "error"
    message: str
    values: dict = field(default_factory=dict)
    field: str = ""   # the job field to change, for an error ("packet.center")


@dataclass
class Report:
    """The findings of one job; ``text()`` for people, ``as_dict()`` for
    ``check --json`` (``{title, findings: [{topic, level, field, message,
    values}]}``)."""

    title: str
    findings: list

    @property
    def errors(self):
        return [f for f in self.findings if f.level == "error"]

    def text(self) -> str:
        mark = {"ok": "  ok ", "warn": "WARN ", "error": "ERROR"}
        lines = [f"check: {self.title}"]
        lines += [f"{mark[f.level]} {f.topic:<10} {f.message}" for f in self.findings]
        n_w = sum(f.level == "warn" for f in self.findings)
        lines.append(f"{len(self.errors)} error(s), {n_w} warning(s)")
        return "\n".join(lines)

    def as_dict(self) -> dict:
        """Plain JSON-ready data (numpy numbers as Python ones, non-finite as None)."""
        return _plain({"title": self.title, "findings": [dict(f.__dict__) for f in self.findings]})


def _plain(obj):
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return float(obj) if math.isfinite(obj) else None
    return obj
