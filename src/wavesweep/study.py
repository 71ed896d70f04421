"""Studies: a job with a ``[sweep]`` table expands into runs, each the
complete (resolved) job of one sweep point, identified by its run id (the
content hash of the complete job: :attr:`wavesweep.job.Job.run_id`), so the
same physics always has the same id.  Every point is validated when the
study is expanded: every error is reported, once, with the sweep points it
occurs at (a JobError, or JobErrors for several), and nothing is queued.
The sweep's grammar is :mod:`wavesweep.job.sweep`."""
from __future__ import annotations

import itertools
from dataclasses import dataclass, field
from pathlib import Path

from .errors import JobError
from .job import Job, job_from_dict, read_job_file
from .job.sweep import apply_sweep_overrides, refuse_swept_overrides, sweep_axes, sweep_errors
from .setup import resolve_job

__all__ = ["RunSpec", "Study", "expand_study", "load_study"]


@dataclass
class RunSpec:
    """One run of a study: its resolved job and the swept values (job units)."""

    job: Job
    params: dict = field(default_factory=dict)     # dotted key -> value

    @property
    def run_id(self) -> str:
        return self.job.run_id


@dataclass
class Study:
    name: str
    runs: list
    axes: dict            # dotted key -> list of values (grid) or values per run (zip)
    mode: str
    source: Path | None = None

    def manifest(self) -> dict:
        """JSON-ready description: mode, swept axes and each run's id and
        values (written to ``ROOT/STUDY/study.json`` on submit; ``collect``
        reads it)."""
        return {
            "name": self.name,
            "mode": self.mode,
            "axes": {k: list(v) for k, v in self.axes.items()},
            "source": str(self.source) if self.source else None,
            "runs": [{"run_id": r.run_id, "params": r.params} for r in self.runs],
        }


def expand_study(raw: dict, source: Path | None = None, name: str | None = None,
                 overrides=()) -> Study:
    """All runs of a job table (``[sweep]`` optional: one run without it).
    Overrides of the sweep change it (:func:`apply_sweep_overrides`); an
    override of a swept key is a JobError (:func:`refuse_swept_overrides`)."""
    raw, overrides = apply_sweep_overrides(raw, overrides)
    refuse_swept_overrides(raw, overrides, source)
    sweep = raw.pop("sweep", None)
    study_name = name or (source.stem if source else "study")
    if sweep is None:
        job = resolve_job(job_from_dict(raw, overrides, source=source))
        return Study(study_name, [RunSpec(job, {})], {}, "grid", source)
    mode, axes = sweep_axes(sweep)
    keys = list(axes)
    points = (zip(*axes.values()) if mode == "zip" else itertools.product(*axes.values()))
    runs, seen = [], set()
    failed: dict[tuple[str, str], list[str]] = {}   # (field, message) -> the points it occurs at
    count = 0
    for values in points:
        count += 1
        point = dict(zip(keys, values))
        sets = list(overrides) + [(k, v) for k, v in point.items()]
        try:
            job = resolve_job(job_from_dict(raw, sets, source=source))
        except JobError as e:
            where = ", ".join(f"{k} = {v!r}" for k, v in point.items())
            for one in e.errors:
                failed.setdefault((one.field, one.message), []).append(where)
            continue
        if job.run_id in seen:   # two points giving the same physics run once
            continue
        seen.add(job.run_id)
        runs.append(RunSpec(job, point))
    if failed:
        raise sweep_errors(failed, count, raw)
    return Study(study_name, runs, axes, mode, source)


def load_study(path, overrides=(), name: str | None = None) -> Study:
    """Read a job file and expand its sweep (``--set`` overrides apply to
    every run; a swept key set with --set is a JobError naming it)."""
    path = Path(path)
    raw = read_job_file(path)
    # --set sweep.* changes the sweep itself (apply_sweep_overrides)
    return expand_study(raw, source=path, name=name, overrides=overrides)
