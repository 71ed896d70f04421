"""``wavesweep check``: the adequacy report of a job or a study.

This module only assembles reports; the criteria live in
:mod:`wavesweep.adequacy` (shared with ``run``, ``submit`` and the
analysis commands).  A job's report: the unit set in use, memory from the
grid's shape (before anything is allocated: a job that cannot fit stops
there), every criterion of :func:`wavesweep.adequacy.assess` (momentum over
the run, margins, phase per step, time aliasing, resolution of V, transform
sizes, detectors, absorbers per face, disk) and a timed trial.  A study's
report judges every sweep point and names the points that fail.
"""
from __future__ import annotations

from .adequacy import (Finding, Report, assess, coupled_findings, memory_finding, remember_run_warnings,
                       run_time_finding, splitting_warning)
from .errors import JobError, combine_errors
from .job import Job
from .job.reference import default_findings
from .propagators import SCHEMES
from .propagators.split_operator import RADIAL_DENSE_MAX
from .setup import CoupledSetup, Setup

__all__ = ["Finding", "Report", "check_job", "check_study", "preflight", "splitting_warning"]


def _units_finding(job: Job) -> Finding:
    u = job.units
    describe = getattr(u, "describe", None)
    atomic = {"length": "bohr", "time": "au", "energy": "hartree", "mass": "m_e"}
    inside = ", ".join(f"1 {u.unit_label(k)} = {u.factor(k):.6g} {atomic[k]}" for k in ("length", "time", "energy", "mass"))
    text = (describe() + f" ({inside})") if describe else inside
    factors = {f"{kind}_in_atomic_units": u.factor(kind) for kind in ("length", "time", "energy", "mass")}
    return Finding("units", "ok", text or "atomic units", {"units": u.as_table(), **factors})


def _scheme_findings(setup) -> list[Finding]:
    out = []
    terms = setup.scheme.expansion_terms(setup.hamiltonian, setup.dt)
    if terms is not None:
        out.append(Finding("time step", "ok", f"{setup.scheme.name}: {terms} terms per step",
                           {"terms": terms}))
    if setup.grid.radial and setup.scheme.in_place_transform:
        n = setup.grid.axes[0].points
        if n > RADIAL_DENSE_MAX:
            exact = " or ".join(f"scheme = {name!r}" for name, cls in SCHEMES.items() if cls.exact_in_time)
            out.append(Finding("time step", "warn",
                f"radial grid of {n} points (> {RADIAL_DENSE_MAX}): the singular radial terms are "
                "kicked, which converges slowly; use fewer points" + (f" or {exact}" if exact else ""),
                {"points": n}, field="grid.r.points"))
    return out


def _judged(job: Job):
    """The job's set-up and its criteria without a trial: :func:`assess`,
    or on coupled surfaces the few that hold there (:func:`coupled_findings`)."""
    if job.table.get("surface"):
        setup = CoupledSetup(job)
        return setup, coupled_findings(setup)
    setup = Setup(job)
    return setup, assess(setup)


def check_job(job: Job, trial_seconds: float = 1.0) -> Report:
    """Findings for a job: units, memory from shapes, then (when it fits)
    the set-up's criteria and a timed trial of ``trial_seconds`` (0: none)."""

    findings = [_units_finding(job), *default_findings(job)]
    mem = memory_finding(job)
    findings.append(mem)
    if mem.level == "error":      # building the set-up would allocate what does not fit
        return Report(job.title, findings)
    setup, found = _judged(job)
    findings += found
    if setup.coupled:   # no trial yet: the timed trial drives a single-surface propagator
        return Report(job.title, findings)
    findings += _scheme_findings(setup)
    if trial_seconds > 0:
        findings.append(run_time_finding(setup, trial_seconds))
    return Report(job.title, findings)


def _key(f: Finding) -> tuple:
    v = f.values or {}
    return (f.topic, f.field, v.get("face") or v.get("axis") or v.get("detector") or "")


RANK = {"ok": 0, "warn": 1, "error": 2}

# Within a level, the number that says how bad a finding is (larger: worse).
SEVERITY = {"time step": lambda v: max(v.get("run_phase", 0.0), v.get("potential_phase", 0.0)),
            "absorber": lambda v: v.get("worst_return", 0.0),
            "momentum": lambda v: v.get("run_reach", 0.0) / (v.get("k_max") or 1.0),
            "resolution": lambda v: v.get("unresolved_weight", 0.0),
            "margin": lambda v: -v.get("widths", 0.0),
            "splitting": lambda v: v.get("aliased_weight", 0.0),
            "memory": lambda v: v.get("estimate_bytes", 0.0),
            "disk": lambda v: v.get("bytes", 0.0)}


def _severity(f: Finding) -> float:
    rule = SEVERITY.get(f.topic)
    try:
        return float(rule(f.values or {})) if rule else 0.0
    except (TypeError, ValueError):
        return 0.0


def check_study(study, trial_seconds: float = 1.0, progress=None) -> Report:
    """Every sweep point judged; per criterion the worst point's finding,
    its message naming the points that fail (their swept values) and
    ``values["failing_points"]`` listing them.  The timed trial runs on the
    point with the most steps x points (the longest run)."""

    if len(study.runs) == 1:
        return check_job(study.runs[0].job, trial_seconds)
    first = study.runs[0].job
    merged: dict = {}
    order: list = []
    longest = None
    for n, spec in enumerate(study.runs):
        if progress:
            progress(n, len(study.runs))
        where = ", ".join(f"{k} = {v!r}" for k, v in spec.params.items())
        fs = [memory_finding(spec.job)]
        if fs[0].level != "error":
            try:
                setup, found = _judged(spec.job)
            except JobError as e:
                fs.append(Finding("set-up", "error", e.message, field=e.field))
            else:
                fs += found + ([] if setup.coupled else _scheme_findings(setup))
                cost = setup.total_steps * setup.grid.size
                if longest is None or cost > longest[0]:
                    longest = (cost, n)
        for f in fs:
            key = _key(f)
            if key not in merged:
                merged[key] = {"worst": f, "failing": []}
                order.append(key)
            entry = merged[key]
            if (RANK[f.level], _severity(f)) > (RANK[entry["worst"].level], _severity(entry["worst"])):
                entry["worst"] = f
            if f.level != "ok" and not any(p["point"] == n for p in entry["failing"]):
                entry["failing"].append({"point": n, "params": spec.params, "level": f.level,
                                         "where": where})
    findings = [_units_finding(first), *default_findings(first)]
    for key in order:
        entry = merged[key]
        f, failing = entry["worst"], entry["failing"]
        values = dict(f.values or {})
        if failing:
            names = "; ".join(p["where"] for p in failing[:6])
            more = f" and {len(failing) - 6} more" if len(failing) > 6 else ""
            msg = (f"{len(failing)} of {len(study.runs)} points ({names}{more}); worst: {f.message}")
            values["failing_points"] = [{"point": p["point"], "params": p["params"], "level": p["level"]}
                                        for p in failing]
        else:
            msg = f"all {len(study.runs)} points; e.g. {f.message}"
        findings.append(Finding(f.topic, f.level, msg, values, f.field))
    if trial_seconds > 0 and longest is not None and not study.runs[longest[1]].job.table.get("surface"):
        trial = run_time_finding(Setup(study.runs[longest[1]].job), trial_seconds)
        trial.message = f"longest run ({study.runs[longest[1]].params}): {trial.message}"
        findings.append(trial)
    return Report(first.title + f" ({len(study.runs)} runs)", findings)


def _judge_point(spec) -> list:
    """One job's (or study point's) findings for :func:`preflight`."""
    job = getattr(spec, "job", spec)
    fs = [memory_finding(job)]
    if fs[0].level != "error":
        try:
            setup, found = _judged(job)
            remember_run_warnings(setup, found)   # the run records them without judging again
            fs += found
        except JobError as e:   # this point cannot be set up: say which, judge the others
            # (no --force makes a set-up that cannot be built run)
            fs.append(Finding("set-up", "error", e.message, {"forceable": False}, field=e.field))
    return fs


def preflight(jobs, force: bool = False) -> list[str]:
    """What ``run`` and ``submit`` ask before computing: every job's
    criteria (no trial).  Error-level findings raise one JobError naming
    the field (and, in a study, the points) unless ``force``; warnings are
    returned as one line each, once per criterion."""

    warnings: dict = {}
    errors: dict = {}
    # (one point after the other: judged in threads, two points' set-ups parsed their expressions at
    # once, which CPython 3.11's parser does not survive; with the compiled classical trajectories a
    # point costs ~20 ms)
    for spec in jobs:
        fs = _judge_point(spec)
        params = getattr(spec, "params", {})
        where = ", ".join(f"{k} = {v!r}" for k, v in params.items())
        for f in fs:
            bucket = errors if f.level == "error" else warnings if f.level == "warn" else None
            if bucket is None:
                continue
            entry = bucket.setdefault(_key(f), [f, []])
            if where and where not in entry[1]:
                entry[1].append(where)
    # every error at once, one line each; --force passes over the criteria, never over a set-up that fails
    refused = [(f, points) for f, points in errors.values() if not force or not f.values.get("forceable", True)]
    if refused:
        found = []
        for f, points in refused:
            at = (f" (at {len(points)} sweep point{'s' if len(points) > 1 else ''}, e.g. {points[0]})"
                  if points else "")
            hint = "; --force runs it anyway" if f.values.get("forceable", True) else ""
            found.append(JobError(f.field or f.topic, f"{f.message}{at}{hint}"))
        raise combine_errors(found)
    out = []
    for f, points in list(errors.values()) + list(warnings.values()):
        at = f" [at {len(points)} sweep point{'s' if len(points) > 1 else ''}, e.g. {points[0]}]" if points else ""
        out.append(f"{f.field or f.topic}: {f.message}{at}")
    return out
