"""The ``[sweep]`` table of a job: its grammar, its values and its overrides
(:func:`wavesweep.study.expand_study` makes the runs).

::

    [sweep]
    mode = "grid"                                   # cartesian product (default), or "zip"
    "potential.0.height" = [100.0, 150.0, 200.0]    # a list of values
    "packet.energy" = { start = 40.0, stop = 200.0, num = 9 }              # evenly spaced
    "packet.width" = { start = 5.0, stop = 50.0, num = 4, spacing = "log" }  # geometric

Keys are dotted paths into any job field, array tables by index.  Each run
is the fully resolved job for one point; its id is the content hash of that
job's canonical form (:attr:`wavesweep.job.Job.run_id`), so the same
physics always has the same id.  Every point is validated when the study is
expanded: every error is reported, once, with the sweep points it occurs
at (a JobError, or JobErrors for several), and nothing is queued.

``--set`` overrides apply to every run, but not to a swept key (or a table
holding one, or a field inside one): the sweep would decide the value, so
such an override is a JobError (:func:`refuse_swept_overrides`).  An
override of the sweep itself changes the sweep (:func:`apply_sweep_overrides`):
``--set sweep.mode=zip``, ``--set 'sweep.packet.energy=[40.0, 80.0]'`` (the
axis's values, or a new axis), ``--set sweep.packet.energy.num=5`` (a key of
a range).
"""
from __future__ import annotations

import copy
import math
import os
from pathlib import Path

import numpy as np

from ..errors import ErrorCollector, JobError, combine_errors
from .dotted import canonical_path, file_position, parse_override

__all__ = ["sweep_axes", "refuse_swept_overrides", "apply_sweep_overrides", "sweep_errors", "max_runs",
           "MODES", "RANGE_KEYS"]

MODES = ("grid", "zip")
# Runs of one study at the most: each is validated and resolved on submit
# (milliseconds each), and a product of ranges must not be made first to be
# counted (1000 x 1000 x 1000 hung; a range of 1e9 values ran out of memory).
MAX_RUNS = 100_000
MAX_RUNS_VARIABLE = "WAVESWEEP_MAX_RUNS"


def max_runs() -> int:
    """The most runs a study may hold: :data:`MAX_RUNS`, or the environment
    variable ``WAVESWEEP_MAX_RUNS`` (a positive integer) where it is set,
    which is how a user who means a bigger study raises the limit."""
    text = os.environ.get(MAX_RUNS_VARIABLE)
    if text is None or not text.strip():
        return MAX_RUNS
    try:
        value = int(text.strip().replace("_", ""))
    except ValueError:
        value = 0
    if value < 1:
        raise JobError(MAX_RUNS_VARIABLE, f"must be a positive whole number of runs, got {text!r}; "
                                          f"unset it for the default {MAX_RUNS}")
    return value


def _limit_advice() -> str:
    return (f"split it into several studies, or raise the limit with {MAX_RUNS_VARIABLE}=N "
            "(each run is validated on submit, a few ms each)")
RANGE_KEYS = ("start", "stop", "num", "spacing")


def _values(key: str, spec) -> list:
    where = f"sweep.{key}"
    if isinstance(spec, list):
        if not spec:
            raise JobError(where, "needs at least one value")
        for i, v in enumerate(spec):   # before the value is written into every point's message
            if isinstance(v, int) and not isinstance(v, bool) and abs(v) > 2**63 - 1:
                raise JobError(f"{where}.{i}", f"an integer of {len(str(abs(v)))} digits, beyond 64 bits; "
                                               "give a number (e.g. 1e30) or check it")
        return list(spec)
    if isinstance(spec, dict):
        for k in spec:
            if k not in RANGE_KEYS:
                raise JobError(f"{where}.{k}", f"unknown key; a range has {', '.join(RANGE_KEYS)}")
        try:
            start, stop, num = spec["start"], spec["stop"], spec["num"]
        except KeyError as e:
            raise JobError(f"{where}.{e.args[0]}", "missing; a range is { start, stop, num }") from None
        bounds = {}
        for k, v in (("start", start), ("stop", stop)):
            if isinstance(v, bool) or not isinstance(v, (int, float)):
                raise JobError(f"{where}.{k}", f"must be a number, got {v!r}")
            try:   # an integer beyond int64 would make numpy's range an object array
                bounds[k] = float(v)
            except OverflowError:
                raise JobError(f"{where}.{k}", "an integer beyond the range of numbers "
                                               "(about 1.8e308); give a number") from None
            if not math.isfinite(bounds[k]):
                raise JobError(f"{where}.{k}", f"must be a finite number, got {v!r}")
        start, stop = bounds["start"], bounds["stop"]
        if isinstance(num, bool) or not isinstance(num, int) or num < 1:
            raise JobError(f"{where}.num", f"must be a positive integer, got {num!r}")
        limit = max_runs()
        if num > limit:   # before any array of that length exists
            raise JobError(f"{where}.num", f"{num} values; a study holds at most {limit} runs: "
                                           f"{_limit_advice()}")
        spacing = spec.get("spacing", "linear")
        if spacing == "linear":
            vals = np.linspace(start, stop, num)
        elif spacing == "log":
            if start <= 0 or stop <= 0:
                raise JobError(f"{where}.start", "a log-spaced range needs start and stop > 0")
            vals = np.geomspace(start, stop, num)
        else:
            raise JobError(f"{where}.spacing", f"{spacing!r} is not 'linear' or 'log'")
        # 12 significant digits: the same range always gives the same numbers
        return [float(f"{v:.12g}") for v in vals]
    raise JobError(where, f"must be a list of values or a range {{ start, stop, num }}, got {spec!r}")


def sweep_axes(sweep: dict) -> tuple[str, dict]:
    """(mode, {dotted key: values}) from a raw ``[sweep]`` table."""
    if not isinstance(sweep, dict):
        raise JobError("sweep", "must be a table")
    mode = sweep.get("mode", "grid")
    if mode not in MODES:
        raise JobError("sweep.mode", f"{mode!r} is not one of {', '.join(map(repr, MODES))}")
    found = ErrorCollector()
    axes = {}
    for k, v in sweep.items():
        if k != "mode":
            with found.check():
                axes[k] = _values(k, v)
    found.raise_if_any()
    if not axes:
        raise JobError("sweep", "names no field to sweep; add e.g. \"packet.energy\" = [40.0, 80.0]")
    if mode == "zip":
        lengths = {k: len(v) for k, v in axes.items()}
        if len(set(lengths.values())) > 1:
            raise JobError("sweep.mode", f"'zip' needs lists of one length, got {lengths}")
    else:   # the product's size from the lengths, before a run is made
        runs = math.prod(len(v) for v in axes.values())
        limit = max_runs()
        if runs > limit:
            sizes = " x ".join(str(len(v)) for v in axes.values())
            raise JobError("sweep", f"{sizes} = {runs} runs; a study holds at most {limit}: use "
                                    f"mode = 'zip', {_limit_advice()}")
    return mode, axes


def refuse_swept_overrides(raw: dict, overrides=(), source: Path | None = None) -> None:
    """A JobError naming ``--set KEY`` when an override targets a key the
    job's ``[sweep]`` table sweeps (or a table holding it, or a field inside
    it): every run takes that value from the sweep, so the override would be
    silently lost.  Overrides of other keys are fine (they apply to every
    run); a job without ``[sweep]`` accepts any override."""
    sweep = raw.get("sweep")
    if not isinstance(sweep, dict) or not overrides:
        return
    swept = {k: canonical_path(raw, k) for k in sweep if k != "mode" and isinstance(k, str)}
    where = f"[sweep] of {source.name}" if source else "[sweep]"
    for item in overrides:
        key = (parse_override(item) if isinstance(item, str) else item)[0]
        mine = canonical_path(raw, key)
        hits = [name for name, path in swept.items()
                if mine[:min(len(mine), len(path))] == path[:min(len(mine), len(path))]]
        if not hits:
            continue
        names = " and ".join(map(repr, hits))
        path = swept[hits[0]]
        if mine == path:
            what = (f"{key} is swept in {where}, so every run would take the sweep's values "
                    "and ignore the override")
        elif len(mine) < len(path):
            what = (f"{key} holds {names}, swept in {where}: the sweep would overwrite that "
                    "part of the override in every run")
        else:
            what = (f"{key} lies inside {names}, swept in {where}: the sweep would replace it, "
                    "override and all, in every run")
        raise JobError(f"--set {key}", f"{what}; remove {names} from [sweep] to run with {key} "
                                       f"fixed, or drop --set {key}")


def apply_sweep_overrides(raw: dict, overrides=()) -> tuple[dict, list]:
    """``(raw, rest)``: ``raw`` (a copy) with the overrides of the sweep
    applied to its ``[sweep]`` table, and the other overrides, in order.

    The sweep's keys hold dots (``"packet.energy"``), so ``sweep.KEY`` is not
    a path into nested tables: ``sweep`` replaces the whole table,
    ``sweep.mode`` the mode, ``sweep.KEY`` the values of the axis ``KEY``
    (or adds it), and ``sweep.KEY.PART`` one key of the range ``KEY``
    (``start``, ``stop``, ``num``, ``spacing``).  Without this the runs
    would carry a stray ``sweep`` table and the override would be lost."""
    raw = copy.deepcopy(raw)
    rest = []
    for item in overrides or ():
        key, value = parse_override(item) if isinstance(item, str) else item
        if key == "sweep":
            if not isinstance(value, dict):
                raise JobError("--set sweep", f"the sweep is a table such as {{ mode = 'zip', "
                                              f"\"packet.energy\" = [40.0, 80.0] }}, got {value!r}")
            raw["sweep"] = value
            continue
        if not key.startswith("sweep."):
            rest.append(item)
            continue
        sweep = raw.setdefault("sweep", {})
        if not isinstance(sweep, dict):
            raise JobError("sweep", "must be a table")
        inner = key[len("sweep."):]
        if inner == "mode" or inner in sweep:
            sweep[inner] = value
            continue
        ranges = [k for k in sweep if isinstance(sweep[k], dict) and inner.startswith(k + ".")]
        if ranges:
            axis = max(ranges, key=len)
            sweep[axis][inner[len(axis) + 1:]] = value
        else:
            sweep[inner] = value
    return raw, rest


# How many sweep points a message names before "and N more".
POINTS_NAMED = 3


def sweep_errors(failed: dict, count: int, raw: dict) -> JobError:
    """One error per distinct (field, message), in the order of the job
    file, saying which sweep points it occurs at (all of them: once, not
    once per point)."""
    errors = []
    for (field_name, message), wheres in failed.items():
        if len(wheres) == count and count > 1:
            where = f"in all {count} sweep points"
        elif len(wheres) == 1:
            where = f"in the sweep point {wheres[0]}"
        else:
            named = "; ".join(wheres[:POINTS_NAMED])
            more = f" and {len(wheres) - POINTS_NAMED} more" if len(wheres) > POINTS_NAMED else ""
            where = f"in {len(wheres)} of {count} sweep points: {named}{more}"
        errors.append(JobError(field_name, f"{message} ({where})"))
    errors.sort(key=lambda e: file_position(raw, e.field))
    return combine_errors(errors)
