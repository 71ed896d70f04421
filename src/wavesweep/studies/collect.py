"""One dataset per study: the runs' results side by side, parameters as dimensions.

:func:`collect` reads ``ROOT/STUDY/study.json`` (the manifest written on
submit, possibly the union of several submissions) and the finished runs'
results ``ROOT/STUDY/RUN_ID.nc``, and writes ``ROOT/STUDY/summary.nc``.

Layout of ``summary.nc``
------------------------
* ``grid`` mode: each swept job field is a dimension, named by the last part
  of its dotted key (``potential.0.height`` -> ``height``; when two keys end
  alike, or the name is taken or starts with a digit, more parts are used:
  ``packet_width``, ``potential_0_width``).  Numeric values are sorted (so
  line plots against them are lines); other values keep their order.  The
  coordinate carries ``sweep_key`` (the dotted key), ``units`` (the job's
  unit of that field) and ``long_name``.
* ``zip`` mode: one dimension ``run`` (the manifest's order) with every swept
  field a coordinate along it.

Variables, with ``P`` the parameter dimensions (or ``run``):

=================  ==========================  ==========================================
``norm``           P, time                     probability on the grid
``absorbed``       P, time, boundary           probability removed at each face, cumulative
``flux``           P, time, detector           probability current through each detector
``final_norm``     P                           norm at the run's own last sample
``final_absorbed`` P, boundary                 absorbed at the run's own last sample
``final_time``     P                           time of the run's last sample
``wall_seconds``   P                           wall-clock time of the run
``run_id``         P                           id of the result found ("" if none)
``expected_run_id`` P                          id the manifest plans there ("" if none)
``has_result``     P                           1 where a result was found, else 0
=================  ==========================  ==========================================

Momentum spectra (1D single-surface runs that recorded dpsi/dx at their
detectors; :func:`wavesweep.analysis.surface_flux.detector_spectra`, the
numbers of ``wavesweep spectrum``): ``spectrum_momentum``,
``spectrum_probability_density``, ``spectrum_energy`` and
``spectrum_energy_density`` on (P, detector, spectrum_point), each run on
its own momenta (NaN-padded; ``spectrum_point`` rather than ``momentum``,
which a sweep of packet.momentum takes), and ``spectrum_total`` (P,
detector); NaN for a detector or run without one, absent when no run has one.

A point without a result (queued, running, failed, or never planned in a
union of submissions that does not fill the grid) is NaN everywhere, with
``run_id = ""`` and ``has_result = 0``.

Coupled surfaces (runs with ``[[surface]]`` tables): a ``surface`` dimension
(coordinate: the names) follows ``time`` in ``norm``, ``absorbed`` and
``flux`` and leads ``boundary``/``detector`` in ``final_norm``,
``final_absorbed``, ``transmitted_beyond`` and the ``arrival_*`` statistics
(each surface's own, as ``wavesweep arrivals``/``transmission`` give them),
as in a run's result; ``population_adiabatic`` (P, time, state) is there
when a run recorded it (``record.adiabatic``; NaN for runs that did not).
All runs of a study share the surface names, in order (a study that mixes
surface sets, or one surface and several, is refused naming ``surface``).

Time alignment: ``time`` is the union of all runs' sample times (times closer
than 1e-9 of the largest time are one sample, so rounding in ``n * dt`` does not
split a sample in two).  A run has NaN at the times it did not sample, e.g.
after its end when the duration is swept; ``final_*`` hold each run's own last
sample.  The ``boundary`` and ``detector`` coordinates are likewise unions.

Everything is in the job's units (the runs of a study must share one unit set);
every coordinate and variable has ``units`` and ``long_name`` (CF-1.8).
The file is written under a temporary name, fsync'ed and renamed into place.
"""
from __future__ import annotations

import datetime as _dt
import errno
import json
import sqlite3
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import xarray as xr

from .._version import __version__
from ..analysis.arrivals import arrival_times, coupled_setup
from ..analysis.recorded import run_record
from ..analysis.surface_flux import detector_spectra
from ..analysis.transmission import coupled_totals, transmission_totals
from ..errors import JobError
from ..io.atomic import atomic_output
from ..io.results import WITHOUT_INDEXES
from ..job.dotted import get_dotted
from ..job.schemas import ABSORBER, AXIS, EVOLVE, PARTICLE, RECORD
from ..potentials import term_class
from ..schema import Field
from ..states import DEFAULT_PACKET, PACKET_SCHEMAS, PACKETS
from ..surfaces import PHASE_CONVENTION
from ..units import KINDS, UnitSet
from .layout import MANIFEST_NAME, SUMMARY_NAME, StudyLayout
from .queue import Queue

__all__ = ["collect", "collect_study", "missing_points", "SUMMARY_NAME", "MANIFEST_NAME"]

# per run and detector, the momentum spectrum of what left (wavesweep spectrum), each run on its own
# momentum grid: name -> key of the spectrum's entry
SPECTRUM_VARIABLES = {"spectrum_momentum": "momentum", "spectrum_probability_density": "probability_density",
                      "spectrum_energy": "energy", "spectrum_energy_density": "energy_density",
                      "spectrum_total": "total"}
UNIT_ATTRS = ("units_length", "units_energy", "units_time", "units_mass")
TIME_MERGE = 1e-9          # relative to the largest |time|: samples this close are one
_BASE_KINDS = {"length", "energy", "time", "mass"}
_RESERVED = {"time", "boundary", "detector", "detector_x", "run", "norm", "absorbed", "flux",
             "surface", "state", "population_adiabatic", "spectrum_point", *SPECTRUM_VARIABLES,
             "final_norm", "final_absorbed", "final_time", "wall_seconds", "run_id",
             "expected_run_id", "has_result", "transmitted_beyond",
             *(f"arrival_{k}" for k in ("probability", "mean", "std", "median", "q10", "q90",
                                        "most_probable", "backflow", "classical_mean",
                                        "still_to_come"))}


@dataclass
class _Result:
    """What collect takes from one run's result file (job units)."""

    run_id: str
    time: np.ndarray
    norm: np.ndarray
    absorbed: dict          # face -> array over time
    flux: dict              # detector -> array over time
    detector_x: dict        # detector -> position
    wall_seconds: float
    unit_attrs: dict
    var_units: dict         # "time", "flux" -> units attribute
    job: dict = field(default_factory=dict)
    arrivals: dict = field(default_factory=dict)    # detector -> arrival statistics (job units)
    beyond: dict = field(default_factory=dict)      # detector -> probability beyond it at the end
    analysis_note: str = ""
    # coupled surfaces: their names; norm, absorbed, flux, arrivals and beyond then carry a trailing
    # surface axis (norm (time, surface), absorbed[face] (time, surface), arrivals[det][stat] (surface,))
    surfaces: list | None = None
    population_adiabatic: np.ndarray | None = None   # (time, state), record.adiabatic
    spectra: dict = field(default_factory=dict)      # detector -> spectrum entry (1D single surface)


@dataclass
class _Param:
    key: str                # dotted job path
    name: str = ""          # coordinate / dimension name
    units: str = "1"
    description: str = ""
    kind: str | None = None
    values: list = field(default_factory=list)


# -- entry point -------------------------------------------------------------------
def collect(root, study: str) -> Path:
    """Collect the finished runs of ``study`` under ``root`` into
    ``ROOT/STUDY/summary.nc`` and return its path.

    Raises :class:`~wavesweep.errors.JobError` when the study was never
    submitted (the message lists the submitted ones) or none of its runs has
    a result yet.  :func:`collect_study` also says which points are missing.
    """
    return collect_study(root, study)["path"]


def collect_study(root, study: str) -> dict:
    """:func:`collect`, returning ``{"path", "found", "expected", "missing"}``:
    ``missing`` lists the planned runs without a result, each
    ``{"run_id", "params"}`` (swept key -> value, job units), in the
    manifest's order (:func:`missing_points` says them in one line)."""
    root = Path(root)
    # the summary goes under ROOT: it must be a folder that is there
    if root.exists() and not root.is_dir():
        raise JobError("--root", f"{str(root)!r} is a file, not a queue folder; give the folder the "
                                 "study was submitted to (wavesweep collect STUDY --root FOLDER)")
    if not root.exists():
        raise JobError("--root", f"no such study {study!r}: there is no queue folder {str(root)!r} "
                                 "(submitted studies: none); give the folder the study was submitted "
                                 "to (wavesweep collect STUDY --root FOLDER)")
    layout = StudyLayout(root)
    folder = _study_folder(layout, study)
    problem = _output_error(layout.summary(study))   # before the work, not after it
    if problem is not None:
        raise problem
    manifest = _read_manifest(layout.manifest(study))
    mode = manifest["mode"]
    runs = manifest["runs"]
    notes: list[str] = []

    results = {}
    for run in runs:
        path = layout.result(study, run["run_id"])
        if path.is_file():
            try:
                result = _read_result(path)
            except Exception as e:   # a foreign or damaged file is a missing run, not a crash
                notes.append(f"{path.name} is unreadable ({type(e).__name__}: {e}); counted as missing")
                continue
            if result.run_id != run["run_id"]:
                notes.append(f"{path.name} says it is run {result.run_id}")
            results[run["run_id"]] = result
            if result.analysis_note:
                notes.append(result.analysis_note)
    if not results:
        raise JobError("", f"study {study!r} has no finished run yet: none of its {len(runs)} runs "
                           f"has a result in {str(folder)!r}; run `wavesweep work --root {root}` "
                           "and see `wavesweep status`")
    first = next(iter(results.values()))
    _check_one_unit_set(study, results)
    _check_one_surface_set(study, results)
    units = UnitSet.from_table(first.job.get("units"))

    params = _params(manifest, runs, first, units)
    for p in params:   # a key that a submission did not sweep: its value is in the run's job
        for run in runs:
            if p.key not in run["params"] and run["run_id"] in results:
                value = get_dotted(results[run["run_id"]].job, p.key)
                if value is not None:
                    run["params"][p.key] = value
    _name_params(params)

    times = _time_union([r.time for r in results.values()])
    faces = _union([list(r.absorbed) for r in results.values()])
    detectors = _union([list(r.flux) for r in results.values()])

    if mode == "grid":
        shape, where = _grid_cells(params, manifest["axes"], runs, results, units, notes)
        pdims = [p.name for p in params]
    else:
        shape, where = (len(runs),), {(i,): run for i, run in enumerate(runs)}
        pdims = ["run"]
        for p in params:
            p.values = [_convert(p, run["params"][p.key], units) if p.key in run["params"] else None
                        for run in runs]

    data = _fill(shape, where, results, times, faces, detectors, first.surfaces)
    ds = _dataset(data, params, pdims, mode, times, faces, detectors, results, first)
    found = sum(1 for run in where.values() if run["run_id"] in results)
    missing = [run["run_id"] for run in runs if run["run_id"] not in results]
    title = _study_title(layout, study, runs, results, first)
    ds.attrs = _global_attrs(manifest, study, first, title, found, len(runs), missing, params, notes)
    path = _write(ds, layout.summary(study))
    return {"path": path, "found": len(results), "expected": len(runs),
            "missing": [{"run_id": run["run_id"], "params": dict(run.get("params") or {})}
                        for run in runs if run["run_id"] not in results]}


# How many missing points a message names before "and N more".
POINTS_NAMED = 5


def missing_points(out: dict, named: int = POINTS_NAMED) -> str | None:
    """One line naming the points of :func:`collect_study`'s result that
    have no result file: their swept values and run ids, the first
    ``named`` of them and how many more (None when nothing is missing)."""
    missing = out["missing"]
    if not missing:
        return None

    def point(run):
        values = ", ".join(f"{k} = {v!r}" for k, v in run["params"].items())
        return f"{values} (run {run['run_id']})" if values else f"run {run['run_id']}"

    listed = "; ".join(point(run) for run in missing[:named])
    more = f"; and {len(missing) - named} more" if len(missing) > named else ""
    return (f"{len(missing)} of {out['expected']} points have no result and are NaN in the summary "
            f"(runs_missing lists them all): {listed}{more}; `wavesweep status` says why "
            "(queued, running or failed), `wavesweep work` runs them")


# -- the study on disk -----------------------------------------------------------------
def _study_folder(layout: StudyLayout, study: str) -> Path:
    if not isinstance(study, str) or not study or Path(study).name != study or study in (".", ".."):
        raise JobError("study", f"{study!r} is not a study name (a folder name under the root, "
                                "e.g. 'barrier-scan')")
    root = layout.root
    if not layout.manifest(study).is_file():
        names = layout.studies()
        where = f"in {str(root)!r}" if root.is_dir() else f"(the root {str(root)!r} does not exist)"
        raise JobError("", f"no such study {study!r} {where}; submitted studies: "
                           f"{', '.join(names) if names else 'none'}")
    return layout.study_dir(study)


def _read_manifest(path: Path) -> dict:
    bad = f"{str(path)!r} is not a study manifest"
    try:
        m = json.loads(path.read_text())
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as e:
        raise JobError("", f"{bad}: {e}") from None
    if not isinstance(m, dict) or not isinstance(m.get("runs"), list):
        raise JobError("", f"{bad}: it has no list of runs")
    mode = m.get("mode", "grid")
    if mode not in ("grid", "zip"):
        raise JobError("", f"{bad}: mode {mode!r} is not 'grid' or 'zip'")
    axes = m.get("axes") or {}
    if not isinstance(axes, dict):
        raise JobError("", f"{bad}: axes must be a table of dotted keys")
    runs, seen = [], set()
    for i, run in enumerate(m["runs"]):
        if not isinstance(run, dict) or not isinstance(run.get("run_id"), str) or not run["run_id"]:
            raise JobError("", f"{bad}: run {i} has no run_id")
        if run["run_id"] in seen:      # the same physics submitted twice
            continue
        seen.add(run["run_id"])
        runs.append({"run_id": run["run_id"], "params": dict(run.get("params") or {})})
    return {**m, "mode": mode, "axes": axes, "runs": runs}


def _read_result(path: Path) -> _Result:
    # without indexes: reading the grid's coordinates to index them would grow with the grid
    with xr.open_dataset(path, engine="netcdf4", **WITHOUT_INDEXES) as ds:
        time = np.asarray(ds["time"].values, float)
        faces = [str(b) for b in ds["boundary"].values] if "boundary" in ds.coords else []
        dets = [str(d) for d in ds["detector"].values] if "detector" in ds.coords else []
        # coupled surfaces: absorbed (time, surface, boundary), flux (time, surface, detector)
        absorbed = ds["absorbed"].values if faces else np.zeros((len(time), 0))
        flux = ds["flux"].values if dets else np.zeros((len(time), 0))
        surfaces = [str(v) for v in ds["surface"].values] if "surface" in ds.dims else None
        det_x = ds["detector_x"].values if dets and "detector_x" in ds else [np.nan] * len(dets)
        attrs = dict(ds.attrs)
        result = _Result(
            run_id=str(attrs.get("run_id", path.stem)),
            time=time,
            norm=np.asarray(ds["norm"].values, float),
            absorbed={f: np.asarray(absorbed[..., i], float) for i, f in enumerate(faces)},
            flux={d: np.asarray(flux[..., i], float) for i, d in enumerate(dets)},
            detector_x={d: float(det_x[i]) for i, d in enumerate(dets)},
            wall_seconds=float(attrs.get("wall_seconds", np.nan)),
            unit_attrs={k: str(attrs[k]) for k in UNIT_ATTRS if k in attrs},
            var_units={"time": ds["time"].attrs.get("units", ""),
                       "flux": ds["flux"].attrs.get("units", "")},
            job=tomllib.loads(attrs["job"]) if "job" in attrs else {},
            surfaces=surfaces,
            population_adiabatic=(np.asarray(ds["population_adiabatic"].values, float)
                                  if "population_adiabatic" in ds.variables else None),
        )
        if len(result.time) == 0:
            raise ValueError("it holds no samples")
        if dets and len(result.time) >= 3:
            _analyse(ds, result)
    return result


def _analyse(ds, result: _Result) -> None:
    """Arrival statistics and transmission beyond each detector, as
    ``wavesweep arrivals`` / ``transmission`` give them for the run (on
    coupled surfaces per surface: arrays over the surfaces)."""

    try:
        if result.surfaces is not None:
            _analyse_surfaces(ds, result)
            return
        # the figures only (check judges the set-ups): statistics without curves, from the
        # variables without a grid dimension and the record (no array of the grid's size is read
        # where the run recorded its detectors' values, so the cost does not grow with the grid)
        dists = arrival_times(ds, warnings=False, curves=False, verify="used")
        totals = transmission_totals(ds, run_record(ds))   # what the run wrote, never its job rebuilt
    except JobError as e:     # e.g. a file potential that has moved: the books stay, stats are NaN
        result.analysis_note = f"run {result.run_id}: no arrival statistics ({e})"
        return
    result.arrivals = {name: d.stats for name, d in dists.items()}
    result.beyond = {name: d["beyond"] for name, d in totals["detectors"].items()}
    if "detector_dpsi_real" in ds.variables or "spectrum_detector" in ds.variables:
        try:     # what `wavesweep spectrum` gives, without its warnings (the run's own check judges those)
            spectra = detector_spectra(ds)   # its default points, so the numbers are `spectrum --json`'s
        except JobError:   # a run that gives no spectrum (a falling grid, V(t) not a field): NaN
            spectra = {}
        result.spectra = {name: entry for name, entry in spectra.items() if entry is not None}


def _analyse_surfaces(ds, result: _Result) -> None:
    """:func:`_analyse` on coupled surfaces: each statistic and what lies
    beyond each detector as an array over the surfaces (the arrivals and
    transmission of coupled surfaces; their set-up is rebuilt from the job
    text the result stores, and the final psi is read)."""
    names = result.surfaces
    dists = arrival_times(ds, warnings=False, curves=False, verify="used", surfaces=True)
    totals = coupled_totals(ds, coupled_setup(ds))
    result.arrivals = {det: {k: np.array([per[s].stats[k] for s in names], float) for k in ARRIVAL_STATS}
                       for det, per in dists.items()}
    result.beyond = {det: np.array([d["surfaces"][s]["beyond"] for s in names], float)
                     for det, d in totals["detectors"].items()}


def _check_one_unit_set(study, results) -> None:
    sets = {}
    for r in results.values():
        sets.setdefault(tuple(sorted(r.unit_attrs.items())), r.run_id)
    if len(sets) > 1:
        shown = "; ".join(f"{rid}: " + ", ".join(f"{k[6:]}={v}" for k, v in key)
                          for key, rid in sets.items())
        raise JobError("units", f"the runs of study {study!r} use different unit sets ({shown}); "
                                "their numbers cannot share one dataset")


def _check_one_surface_set(study, results) -> None:
    """The runs of a study share one set of surfaces (names, in order), or all have one surface."""
    sets = {}
    for r in results.values():
        sets.setdefault(tuple(r.surfaces) if r.surfaces is not None else None, r.run_id)
    if len(sets) > 1:
        shown = "; ".join(f"{rid}: " + (", ".join(key) if key is not None else "one surface")
                          for key, rid in sets.items())
        raise JobError("surface", f"the runs of study {study!r} have different surfaces ({shown}); their "
                                  "per-surface values cannot share one surface dimension: give every run "
                                  "the same [[surface]] names, or collect them as separate studies")


# -- the swept parameters -----------------------------------------------------------------
def _params(manifest, runs, first: _Result, units: UnitSet) -> list[_Param]:
    keys = list(manifest["axes"])
    for run in runs:
        keys += [k for k in run["params"] if k not in keys]
    out = []
    for key in keys:
        f = _field_of(first.job, key)
        p = _Param(key)
        if f is None:
            p.description = f"swept job field {key} (its unit is not known to wavesweep)"
        else:
            p.kind = f.kind
            p.description = f.doc
            if f.kind in KINDS and f.kind != "dimensionless":
                attr = f"units_{f.kind}"
                p.units = (first.unit_attrs.get(attr) if f.kind in _BASE_KINDS else None) \
                    or units.unit_label(f.kind)
        out.append(p)
    return out


def _field_of(job: dict, key: str) -> Field | None:
    """The schema field a dotted job key points at (None if unknown)."""
    parts = key.split(".")
    try:
        top, rest = parts[0], parts[1:]
        if top in ("title", "units"):
            return Field("str", doc="job title" if top == "title" else f"unit of {rest[0]}")
        if top in ("particle", "evolve", "record", "absorber"):
            return {"particle": PARTICLE, "evolve": EVOLVE, "record": RECORD,
                    "absorber": ABSORBER}[top].get(rest[0])
        if top == "grid":
            if rest[0] in ("x", "y", "z", "r"):
                return AXIS.get(rest[1])
            return {"boundary": Field("str", doc="grid boundary"),
                    "l": Field("int", doc="angular momentum quantum number")}.get(rest[0])
        if top == "potential":
            table = job["potential"][int(rest[0])]
            if rest[1] == "kind":
                return Field("str", doc="potential kind")
            return term_class(table["kind"], key).parameters.get(rest[1])
        if top == "packet":
            table = job["packet"]
            kind = PACKETS[table.get("kind", DEFAULT_PACKET)]
            while kind.nested is not None and rest[0] == kind.nested:   # a member of a superposition
                table, rest = table[kind.nested][int(rest[1])], rest[2:]
                kind = PACKETS[table.get("kind", DEFAULT_PACKET)]
            return PACKET_SCHEMAS[kind.kind].get(rest[0])
        if top == "detector":
            if rest[1] in ("x", "y", "z", "r"):
                return Field("length", doc=f"detector position {rest[1]}")
            return Field("str", doc="detector name")
    except (KeyError, IndexError, ValueError, TypeError, JobError):
        return None
    return None


def _convert(p: _Param, value, units: UnitSet):
    """A swept value as a coordinate value: a quantity in the job's unit (a
    string like "3 nm" is converted), a plain scalar as is, a list as text."""
    if isinstance(value, str) and p.kind in KINDS:
        return units.to_atomic(value, p.kind, p.key) / units.factor(p.kind)
    if isinstance(value, (list, dict)):
        return json.dumps(value)
    return value


def _name_params(params: list[_Param]) -> None:
    """Short unique names: the last key part, more parts on a clash."""
    depth = {p.key: 1 for p in params}

    def name(p):
        parts = p.key.split(".")
        return "_".join(parts[-depth[p.key]:])

    for _ in range(64):
        names = {p.key: name(p) for p in params}
        counts = {}
        for n in names.values():
            counts[n] = counts.get(n, 0) + 1
        bad = [p for p in params
               if (counts[names[p.key]] > 1 or names[p.key] in _RESERVED or names[p.key][0].isdigit())
               and depth[p.key] < len(p.key.split("."))]
        if not bad:
            break
        for p in bad:
            depth[p.key] += 1
    taken = set()
    for p in params:
        n = name(p).replace("-", "_")
        while n in taken or n in _RESERVED or n[0].isdigit():
            n = f"param_{n}"
        taken.add(n)
        p.name = n


def _coord_values(values: list) -> list:
    uniq = []
    for v in values:
        if not any(_same(v, u) for u in uniq):
            uniq.append(v)
    if all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in uniq):
        uniq.sort()
    return uniq


def _same(a, b) -> bool:
    return type(a) is type(b) and a == b or (
        isinstance(a, (int, float)) and isinstance(b, (int, float))
        and not isinstance(a, bool) and not isinstance(b, bool) and float(a) == float(b))


def _grid_cells(params, axes, runs, results, units, notes):
    """Coordinate values of each parameter and the grid cell of each run."""
    placed = []
    for run in runs:
        if all(p.key in run["params"] for p in params):
            placed.append((run, [_convert(p, run["params"][p.key], units) for p in params]))
        else:
            lacking = [p.key for p in params if p.key not in run["params"]]
            notes.append(f"run {run['run_id']} names no value for {', '.join(lacking)} and has no "
                         "result to read it from; left out")
    # an axis value without a run still gets its place (a NaN slice)
    values = {p.key: [] for p in params}
    for p in params:
        for v in axes.get(p.key, []):
            values[p.key].append(_convert(p, v, units))
    for _, point in placed:
        for p, v in zip(params, point):
            values[p.key].append(v)
    for p in params:
        p.values = _coord_values(values[p.key])
    where: dict = {}
    for run, point in placed:
        cell = tuple(next(i for i, u in enumerate(p.values) if _same(v, u))
                     for p, v in zip(params, point))
        old = where.get(cell)
        if old is not None and (old["run_id"] in results and run["run_id"] not in results):
            continue       # the point already has a result; keep it
        if old is not None:
            notes.append(f"runs {old['run_id']} and {run['run_id']} share the sweep point "
                         f"{dict(zip([p.key for p in params], point))}; kept {run['run_id']}")
        where[cell] = run
    return tuple(len(p.values) for p in params), where


# -- assembling ---------------------------------------------------------------------
def _union(lists) -> list:
    out = []
    for names in lists:
        out += [n for n in names if n not in out]
    return out


def _time_union(arrays) -> np.ndarray:
    t = np.sort(np.concatenate(arrays))
    tol = TIME_MERGE * max(float(np.max(np.abs(t))), 0.0)
    keep = np.concatenate([[True], np.diff(t) > tol])
    return t[keep]


def _time_index(union: np.ndarray, t: np.ndarray) -> np.ndarray:
    i = np.clip(np.searchsorted(union, t), 1, max(len(union) - 1, 1))
    if len(union) == 1:
        return np.zeros(len(t), int)
    left = np.abs(t - union[i - 1]) <= np.abs(union[i] - t)
    return np.where(left, i - 1, i)


def _fill(shape, where, results, times, faces, detectors, surfaces=None) -> dict:
    """The study's arrays; on coupled surfaces (``surfaces`` their names) the
    per-surface values carry a surface axis after time (before boundary and
    detector, as in a run's result), and ``population_adiabatic`` (time,
    state) is there when a run recorded it."""
    nt, nb, nd = len(times), len(faces), len(detectors)
    per = (len(surfaces),) if surfaces else ()
    nan = np.nan
    d = {
        "norm": np.full(shape + (nt,) + per, nan),
        "absorbed": np.full(shape + (nt,) + per + (nb,), nan),
        "flux": np.full(shape + (nt,) + per + (nd,), nan),
        "final_norm": np.full(shape + per, nan),
        "final_absorbed": np.full(shape + per + (nb,), nan),
        "final_time": np.full(shape, nan),
        "wall_seconds": np.full(shape, nan),
        "run_id": np.full(shape, "", dtype=object),
        "expected_run_id": np.full(shape, "", dtype=object),
        "has_result": np.zeros(shape, np.int8),
        "transmitted_beyond": np.full(shape + per + (nd,), nan),
        **{f"arrival_{k}": np.full(shape + per + (nd,), nan) for k in ARRIVAL_STATS},
    }
    if surfaces and any(r.population_adiabatic is not None for r in results.values()):
        d["population_adiabatic"] = np.full(shape + (nt, len(surfaces)), nan)
    points = max((len(e["momentum"]) for r in results.values() for e in r.spectra.values()), default=0)
    if points:   # each run's spectrum on its own momenta, NaN-padded (`spectrum`'s default points: 401 in 1D,
        # 201 on a line or plane)
        for name in SPECTRUM_VARIABLES:
            d[name] = np.full(shape + (nd,) + (() if name == "spectrum_total" else (points,)), nan)
    for cell, run in where.items():
        d["expected_run_id"][cell] = run["run_id"]
        r = results.get(run["run_id"])
        if r is None:
            continue
        it = _time_index(times, r.time)
        d["norm"][cell][it] = r.norm
        for j, face in enumerate(faces):
            if face in r.absorbed:
                d["absorbed"][cell][it, ..., j] = r.absorbed[face]
                d["final_absorbed"][cell][..., j] = r.absorbed[face][-1]
        for j, det in enumerate(detectors):
            if det in r.flux:
                d["flux"][cell][it, ..., j] = r.flux[det]
            if det in r.arrivals:
                for k in ARRIVAL_STATS:
                    d[f"arrival_{k}"][cell][..., j] = r.arrivals[det][k]
                d["transmitted_beyond"][cell][..., j] = r.beyond.get(det, nan)
            if det in r.spectra:
                for name, key in SPECTRUM_VARIABLES.items():
                    if name == "spectrum_total":
                        d[name][cell][j] = float(r.spectra[det][key])
                    else:
                        values = np.asarray(r.spectra[det][key], float)
                        d[name][cell][j, :len(values)] = values
        if r.population_adiabatic is not None and "population_adiabatic" in d:
            d["population_adiabatic"][cell][it] = r.population_adiabatic
        d["final_norm"][cell] = r.norm[-1]
        d["final_time"][cell] = r.time[-1]
        d["wall_seconds"][cell] = r.wall_seconds
        d["run_id"][cell] = r.run_id
        d["has_result"][cell] = 1
    return d


_META = {
    "norm": ("1", "probability on the grid"),
    "absorbed": ("1", "probability removed at the face, cumulative"),
    "flux": (None, "probability current through the detector"),
    "final_norm": ("1", "probability on the grid at the run's last sample"),
    "final_absorbed": ("1", "probability removed at the face by the run's last sample"),
    "final_time": (None, "time of the run's last sample"),
    "wall_seconds": ("s", "wall-clock time of the run"),
    "run_id": ("1", "id of the run whose result is here (empty: no result)"),
    "expected_run_id": ("1", "id of the run the study manifest plans here (empty: none)"),
    "has_result": ("1", "whether a result was found for this point"),
    "transmitted_beyond": ("1", "probability beyond the detector at the end (on the grid + absorbed "
                                "by the face beyond it)"),
    "arrival_probability": ("1", "probability that crossed the detector (int J dt)"),
    "arrival_mean": (None, "mean arrival time at the detector"),
    "arrival_std": (None, "standard deviation of the arrival time"),
    "arrival_median": (None, "median arrival time"),
    "arrival_q10": (None, "10 % quantile of the arrival time"),
    "arrival_q90": (None, "90 % quantile of the arrival time"),
    "arrival_most_probable": (None, "most probable arrival time"),
    "arrival_backflow": ("1", "probability carried back across the detector (negative flux)"),
    "arrival_classical_mean": (None, "classical estimate of the mean arrival time (free flight, or under "
                                     "the run's constant uniform force)"),
    "arrival_still_to_come": ("1", "probability before the detector at the end, moving towards it "
                                   "(what may still arrive)"),
    "spectrum_momentum": (None, "kinetic momentum at the run's end along the detector's axis (the run's own "
                                "momenta, NaN-padded)"),
    "spectrum_probability_density": (None, "probability per unit momentum of what crossed the detector by the "
                                           "run's end (surface-flux method)"),
    "spectrum_energy": (None, "kinetic energy at the run's end of spectrum_momentum"),
    "spectrum_energy_density": (None, "probability per unit kinetic energy of what crossed the detector"),
    "spectrum_total": ("1", "probability that crossed the detector outwards, integral of the spectrum"),
    "population_adiabatic": ("1", "probability on the adiabatic state (local eigenvectors of the potential "
                                  "matrix, ascending energy)"),
}
ARRIVAL_STATS = ("probability", "mean", "std", "median", "q10", "q90", "most_probable", "backflow",
                 "classical_mean", "still_to_come")


def _dataset(data, params, pdims, mode, times, faces, detectors, results, first) -> xr.Dataset:
    units = UnitSet.from_table(first.job.get("units"))
    tunit = first.var_units["time"] or first.unit_attrs.get("units_time", "")
    funit = first.var_units["flux"] or f"{tunit}-1"
    per = ["surface"] if first.surfaces else []   # coupled surfaces: after time, as in a run's result
    dims = {
        "norm": pdims + ["time"] + per, "absorbed": pdims + ["time"] + per + ["boundary"],
        "flux": pdims + ["time"] + per + ["detector"], "final_norm": pdims + per,
        "final_absorbed": pdims + per + ["boundary"], "transmitted_beyond": pdims + per + ["detector"],
        "population_adiabatic": pdims + ["time", "state"],
        **{name: pdims + ["detector", "spectrum_point"] for name in SPECTRUM_VARIABLES},
        "spectrum_total": pdims + ["detector"],
        **{f"arrival_{k}": pdims + per + ["detector"] for k in ARRIVAL_STATS},
    }
    ds = xr.Dataset()
    spectrum = next((e for r in results.values() for e in r.spectra.values()), None)
    spectrum_units = {}
    if spectrum is not None:
        mu, eu = spectrum["momentum_units"], spectrum["energy_units"]
        spectrum_units = {"spectrum_momentum": mu, "spectrum_probability_density": f"1/({mu})",
                          "spectrum_energy": eu, "spectrum_energy_density": f"1/({eu})"}
    for name, values in data.items():
        unit, long = _META[name]
        unit = {"flux": funit, "final_time": tunit, **spectrum_units}.get(name, unit if unit is not None else tunit)
        if values.dtype == object:
            values = values.astype(str)
        if per and name in ("norm", "absorbed", "flux", "final_norm", "final_absorbed", "transmitted_beyond") \
                or per and name.startswith("arrival_"):
            long += ", per surface"
        attrs = {"units": unit, "long_name": long}
        if name == "has_result":
            attrs.update(flag_values=np.array([0, 1], np.int8), flag_meanings="missing found")
        if name == "population_adiabatic":
            attrs["comment"] = PHASE_CONVENTION
        ds[name] = xr.DataArray(values, dims=dims.get(name, pdims), attrs=attrs)
    coords = {
        "time": ("time", times, {"units": tunit, "long_name":
                                 "time of the scalar samples (union over the runs)"}),
        "boundary": ("boundary", np.array(faces, dtype=str),
                     {"units": "1", "long_name": "absorbing face"}),
        "detector": ("detector", np.array(detectors, dtype=str),
                     {"units": "1", "long_name": "detector name"}),
    }
    if first.surfaces:
        coords["surface"] = ("surface", np.array(first.surfaces, dtype=str),
                             {"units": "1", "long_name": "potential-energy surface (electronic state)"})
    if "population_adiabatic" in data:
        coords["state"] = ("state", np.arange(len(first.surfaces)),
                           {"units": "1", "long_name": "adiabatic state, in ascending order of the local "
                                                       "potential matrix's eigenvalue"})
    positions = {}
    for r in results.values():
        for det, x in r.detector_x.items():
            positions.setdefault(det, set()).add(x)
    if all(len(v) == 1 for v in positions.values()):
        coords["detector_x"] = ("detector", np.array([next(iter(positions[d])) for d in detectors], float),
                                {"units": first.unit_attrs.get("units_length", units.unit_label("length")),
                                 "long_name": "detector position along its axis"})
    if mode == "zip":
        coords["run"] = ("run", np.arange(data["has_result"].shape[0]),
                         {"units": "1", "long_name": "index of the run in the study manifest"})
    for p in params:
        long = f"{p.description} ({p.key})" if p.kind is not None and p.description else p.key
        attrs = {"units": p.units, "long_name": long, "sweep_key": p.key}
        if p.kind is None:
            attrs["comment"] = p.description
        if mode == "grid":
            coords[p.name] = (p.name, _array(p.values), attrs)
        else:
            coords[p.name] = ("run", _array(p.values), attrs)
    return ds.assign_coords({k: xr.Variable(*v) for k, v in coords.items()})


def _array(values) -> np.ndarray:
    if all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in values if v is not None):
        return np.array([np.nan if v is None else v for v in values],
                        float if any(isinstance(v, float) or v is None for v in values) else int)
    return np.array(["" if v is None else str(v) for v in values], dtype=str)


def _study_title(layout: StudyLayout, study: str, runs, results, first) -> str:
    """The title of the study's own job.  A run's result file carries the
    title of the study that computed it, which for a run reused from
    another study (the same physics under another title) is that study's;
    the queue keeps each study's own resolved job per run, so the title is
    read from there, from the study's first run with a result.  Without a
    readable queue (a study folder copied elsewhere): the result's title."""
    fallback = first.job.get("title", "")
    if not layout.queue_db.is_file():
        return fallback
    run_id = next((run["run_id"] for run in runs if run["run_id"] in results), None)
    queue = None
    try:
        queue = Queue(layout.root)
        row = queue.run(study, run_id)
        job = tomllib.loads(row["job_toml"]) if row is not None else None
    except (JobError, OSError, sqlite3.Error, tomllib.TOMLDecodeError):
        return fallback            # a damaged queue loses the title, never the summary
    finally:
        if queue is not None:
            queue.close()
    title = job.get("title") if job is not None else None
    return title if isinstance(title, str) else fallback


def _global_attrs(manifest, study, first, title, found, expected, missing, params, notes) -> dict:
    attrs = {
        "title": f"study {study}: {title}".rstrip(": "),
        "study": study,
        "sweep_mode": manifest["mode"],
        "sweep_keys": " ".join(p.key for p in params),
        "sweep_dimensions": " ".join(p.name for p in params) if manifest["mode"] == "grid" else "run",
        "runs_found": int(found),
        "runs_expected": int(expected),
        "runs_missing": " ".join(missing),
        **first.unit_attrs,
        "time_alignment": ("time is the union of the runs' sample times (samples closer than "
                           f"{TIME_MERGE:g} of the largest time are one); a run is NaN at times it "
                           "did not sample; final_* hold each run's own last sample"),
        "missing_values": "a point without a result is NaN in every variable, run_id empty, has_result 0",
        "Conventions": "CF-1.8",
        "wavesweep_version": __version__,
        "history": f"{_dt.datetime.now(_dt.timezone.utc).isoformat(timespec='seconds')} "
                   f"wavesweep collect {study}",
    }
    if manifest.get("source"):
        attrs["source"] = str(manifest["source"])
    if notes:
        attrs["collect_notes"] = "; ".join(notes)
    return attrs


def _output_error(path: Path, error: OSError | None = None) -> JobError | None:
    """The one-line JobError for a summary that cannot be written at
    ``path`` because of what the user chose (a folder or other non-file in
    its place, a folder without write permission, a read-only filesystem);
    None when nothing is in the way, or ``error`` is the environment's
    failure (a full disk stays an OSError)."""
    where = str(path)
    if path.is_dir():
        return JobError(where, "is a folder, so the study's summary cannot be written there; move or "
                               "remove that folder (its contents are not the summary) and collect again")
    if path.exists() and not path.is_file():
        return JobError(where, "is not a regular file; move or remove it and collect again")
    if error is None:
        return None
    code = getattr(error, "errno", None)
    if code in (errno.EACCES, errno.EPERM, errno.EROFS):
        why = "read-only filesystem" if code == errno.EROFS else "no permission"
        return JobError("--root", f"cannot write {where!r} ({why}); make {str(path.parent)!r} writable "
                                  "and collect again (the previous summary, if any, is unchanged)")
    if code in (errno.EISDIR, errno.ENOTDIR, errno.EEXIST):   # something else took the name
        return JobError(where, f"cannot be written ({error.strerror or error}); move what is in the way "
                               "and collect again (the previous summary, if any, is unchanged)")
    return None    # a full disk, an I/O error: the environment failed, not the input (exit 1)


def _write(ds: xr.Dataset, path: Path) -> Path:
    """Write under a temporary name, fsync, rename into place (a reader never
    sees a half-written file, and a failed write leaves the old summary).
    A path that cannot be written is a JobError naming it and the fix."""
    problem = _output_error(path)
    if problem is not None:
        raise problem
    try:
        with atomic_output(path, ".part") as tmp:
            ds.to_netcdf(tmp, engine="netcdf4", format="NETCDF4")
    except OSError as e:
        problem = _output_error(path, e)
        if problem is not None:
            raise problem from None
        raise
    return path
