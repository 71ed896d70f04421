"""Accuracy pilot: ``wavesweep check JOB --tolerance TOL``.

The pilot measures how far a run's main outputs are from their converged
values by running the job again with other settings and comparing
(Richardson extrapolation: L. F. Richardson, Phil. Trans. R. Soc. A 210,
307 (1911); as a grid-convergence error estimate, P. J. Roache,
Verification and Validation in Computational Science and Engineering,
Hermosa (1998), ch. 5).  An output Q computed with grid spacing h and time
step tau behaves as

    Q(h, tau) = Q* + a h^p + b tau^q        (asymptotic range)

so a run with one setting changed by a known ratio gives that setting's
share of the error of the base run:

* **dx**, one run per axis with ``points`` scaled by ``DX_RATIO`` (1.5, the
  physical extent kept): E_dx = (Q(h) - Q(h / r)) / (1 - r^-p).  The order
  p is *assumed*, ``DX_ORDER`` = 2: a sharp (cell-averaged) edge of V
  converges as dx^2 (measured: rectangular barrier, tests/integration/
  test_scattering.py; a double barrier about as dx^2.5), smooth potentials
  spectrally, i.e. faster; the lower order gives the larger error for the
  same difference, so the estimate is conservative for both (and exact in
  kind for ``crank_nicolson``, whose 3-point Laplacian is second order).
* **dt**, one run with ``evolve.dt`` multiplied by s (coarser, s about 2, so
  the measure costs half a run; finer when ``record.every`` is a single
  step): E_dt = (Q(s tau) - Q(tau)) / (s^q - 1), with the scheme's known
  order q (Strang 2, the fourth-order compositions 4; Chebyshev is exact in
  time and needs no dt run).  Outside the asymptotic range a coarser step
  errs by more than q predicts, so this errs towards a warning too.

Each share is multiplied by a factor of safety of 1.25, the one Roache
gives for his grid convergence index where the order is known (P. J.
Roache, J. Fluids Eng. 116, 405 (1994); from memory): the next term of the
expansion (tau^4 beside Strang's tau^2) makes the two-run estimate fall
short by about a percent (measured: 0.5 % for a packet at a Gaussian
barrier at dt = 0.5 hbar/E_h).  Each output's estimated error is the
sum of the magnitudes of its shares;
the setting with the largest share dominates it, and the point counts and
time step that reach the tolerance follow from the same orders.  Pilot runs
keep the job's physics, absorber (its tuned strength is fixed first) and
``record.every`` (the sampling of fluxes is part of every run's output);
they record two density snapshots and no final state, into a temporary
folder.

On coupled surfaces (``[[surface]]``) the same runs measure each surface's
outputs (:func:`_coupled_outputs`): its probability at the end (left +
absorbed), absorbed per face, the net probability across each detector,
the adiabatic populations (record.adiabatic) and the final energy.

Tolerance: probabilities (absorbed per face, beyond a detector) are judged
absolutely, they lie in [0, 1]; times (arrival mean and spread per
detector) and the final energy relative to their value (the energy relative
to the larger of |<H>| at the start and at the end).

Cost: base run 1x, a run per axis with 1.5 times the points, a dt run at
about half the steps: 3x the steps x points of the run in 1D, 4.5x in 2D,
6x in 3D.  Measured (2 shared cores, warm kernels): the pilot of the 1D
kestrel diode took 2.1x the wall time of its run at 2560 points, 2.6x at
8192 and 3.1x at 16384 (the run itself writes more snapshots; a finer grid
costs N log N).
"""
from __future__ import annotations

import copy
import math
import tempfile
import time as _time
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import scipy.fft

from .adequacy import Finding
from .adequacy import human_seconds as _human
from .adequacy import trial_costs
from .analysis.arrivals import arrival_times
from .analysis.recorded import run_record
from .analysis.transmission import transmission_totals
from .errors import JobError, RunFailed
from .job import Job, job_from_dict
from .job.document import job_number
from .run import Simulation
from .setup import CoupledSetup, Setup, resolve_job

__all__ = ["PilotPlan", "PilotRun", "plan_pilot", "run_pilot", "validate_tolerance", "DX_RATIO", "DX_ORDER"]

DX_RATIO = 1.5          # points of a dx run / points of the run, per axis
DX_ORDER = 2.0          # assumed order in dx (conservative, see the module notes)
DT_COARSE = 2.0         # the dt run's step / the run's step, aimed at (whole samples)
SAFETY = 1.25           # factor of safety on each share (Roache 1994, see the module notes)
# The energy of less than this much probability left on the grid is not judged:
# it is an average over a remnant (the absorbed rest carries the physics).
FINAL_NORM_MIN = 1e-3
# An estimated error above this (absolute for probabilities, else relative)
# means runs outside the asymptotic range (e.g. a sharp V with a step whose
# kinetic phase wraps: measured on the kestrel diode with sharp edges at 4096
# points, an estimate of 6 % for an arrival mean about 45 % off): order of magnitude only.
FAR_FROM_CONVERGED = 0.1
# Below this arriving probability a detector's times are not judged
# (the arrivals analysis gives none: analysis.arrivals.NOTHING_ARRIVED).
ARRIVED_MIN = 1e-9


@dataclass
class PilotRun:
    """One run of the pilot: ``setting`` is the job field it varies ("" for
    the base run), ``overrides`` the dotted keys it sets (job units),
    ``ratio`` h_run / h_base (dx runs: < 1) or tau_run / tau_base, ``cost``
    its steps x points relative to the base run."""

    label: str
    setting: str
    overrides: dict
    ratio: float
    cost: float
    steps: int
    points: int


@dataclass
class PilotPlan:
    """The runs of a pilot and what they cost (``cost``: steps x points as a
    multiple of the run's; ``seconds``: from a short timing of the run's
    steps, None if not timed)."""

    job: Job
    tolerance: float
    runs: list
    dx_order: float
    dt_order: int | None
    seconds_per_step: float | None = None
    seconds_per_sample: float = 0.0
    sample_steps: int = 1
    notes: list = field(default_factory=list)

    @property
    def cost(self) -> float:
        return sum(r.cost for r in self.runs)

    @property
    def seconds(self) -> float | None:
        if self.seconds_per_step is None:
            return None
        base = self.runs[0]
        samples = base.steps / self.sample_steps     # record.every is the same in every run
        return sum((self.seconds_per_step * r.steps + self.seconds_per_sample * samples)
                   * r.points / base.points for r in self.runs)

    def text(self) -> str:
        parts = ", ".join(f"{r.label} {r.cost:.2g}x" for r in self.runs)
        about = f"; about {_human(self.seconds)}" if self.seconds is not None else ""
        notes = "".join(f"; {n}" for n in self.notes)
        return (f"pilot: {len(self.runs)} runs, {self.cost:.2g}x the run's steps x points "
                f"({parts}){about}{notes}")


def validate_tolerance(tolerance) -> float:
    """TOL as a float; JobError("--tolerance") unless 0 < TOL < 1."""
    try:
        tol = float(tolerance)
    except (TypeError, ValueError):
        raise JobError("--tolerance", f"must be a number such as 0.01, got {tolerance!r}") from None
    if not (0.0 < tol < 1.0) or not math.isfinite(tol):
        raise JobError("--tolerance", f"must lie between 0 and 1 (probabilities absolutely, times and "
                                      f"energies relative), got {tolerance!r}")
    return tol


def _base_table(job: Job) -> dict:
    """The resolved job (CAP strength tuned once, then fixed for every pilot
    run) with light recording: snapshots at the start and the end only (the
    last gives what lies beyond each detector), no final state."""
    table = tomllib.loads(resolve_job(job).to_toml())
    table.pop("sweep", None)
    rec = table.setdefault("record", {})
    rec["snapshot_every"] = table["evolve"]["duration"]
    rec["stride"] = 1
    rec["final_state"] = False
    rec.pop("snapshot_psi", None)
    return table


def _fast_points(n: int, boundary: str) -> int:
    """The smallest count >= n whose transform is fast (scipy.fft.next_fast_len:
    N for the FFT, N + 1 for the sine transform, DST-I, which works on N + 1)."""
    if boundary == "periodic":
        return int(scipy.fft.next_fast_len(n))
    return int(scipy.fft.next_fast_len(n + 1)) - 1


def _cells(ax_points: int, boundary: str) -> int:
    """Cells of an axis: L / dx (N periodic, N + 1 box)."""
    return ax_points if boundary == "periodic" else ax_points + 1


def _dt_run_steps(sample_steps: int) -> int:
    """Steps per sample of the dt run: about DT_COARSE times fewer (whole
    steps per record.every, which stays), or twice as many when the run
    records every step."""
    lo, hi = sample_steps / 2.5, sample_steps / 1.4
    candidates = [m for m in range(max(1, math.ceil(lo)), math.floor(hi) + 1)]
    if not candidates:
        return 2 * sample_steps
    target = sample_steps / DT_COARSE
    return min(candidates, key=lambda m: (abs(m - target), -m))


def _setup_of(table: dict):
    """The set-up of a pilot's job table: one surface's, or the coupled
    surfaces' (:class:`~wavesweep.setup.CoupledSetup`)."""
    job = job_from_dict(table)
    return (CoupledSetup if job.table.get("surface") else Setup)(job)


def plan_pilot(job: Job, tolerance: float, timing_seconds: float = 0.3) -> PilotPlan:
    """The runs the pilot will do and their cost, relative to the run.

    ``timing_seconds`` > 0 times the run's steps briefly (after a first step
    that compiles the kernels) for the estimate in seconds."""
    tol = validate_tolerance(tolerance)
    setup = _setup_of(_base_table(job))
    u = setup.units
    grid = setup.grid
    steps0, points0 = setup.total_steps, grid.size
    runs = [PilotRun("base", "", {}, 1.0, 1.0, steps0, points0)]
    for ax in grid.axes:
        n_fine = _fast_points(math.ceil(DX_RATIO * _cells(ax.points, ax.boundary))
                              - _cells(0, ax.boundary), ax.boundary)
        ratio = _cells(ax.points, ax.boundary) / _cells(n_fine, ax.boundary)   # h_run / h_base
        points = points0 // ax.points * n_fine
        runs.append(PilotRun(f"grid.{ax.name}.points {n_fine}", f"grid.{ax.name}.points",
                             {f"grid.{ax.name}.points": n_fine}, ratio, points / points0, steps0, points))
    order = setup.scheme.order or None
    notes = []
    if order is None:
        notes.append(f"scheme {setup.scheme.name!r} is exact in time: no dt run")
    else:
        m = _dt_run_steps(setup.sample_steps)
        every = setup.sample_steps * setup.dt
        dt_run = job_number(u.to_job(every / m, "time"))
        ratio = setup.sample_steps / m
        steps = setup.total_steps // setup.sample_steps * m
        runs.append(PilotRun(f"evolve.dt {dt_run:g}", "evolve.dt", {"evolve.dt": dt_run}, ratio,
                             steps / steps0, steps, points0))
    if "sweep" in job.table:
        notes.append("a study: the pilot runs its base job, not the sweep's points")
    per_step, per_sample = _time_steps(setup, timing_seconds) if timing_seconds > 0 else (None, 0.0)
    return PilotPlan(job, tol, runs, DX_ORDER, order, per_step, per_sample, setup.sample_steps, notes)


def _time_steps(setup: Setup, seconds: float) -> tuple[float, float]:
    """Wall seconds per step and per sample of the run (check's trial, on
    one surface or several)."""
    per_step, per_sample, _ = trial_costs(setup, seconds)
    return per_step, per_sample


# -- the outputs of one run ----------------------------------------------------------
@dataclass
class _Output:
    name: str        # "absorbed at x+", "beyond 'after'", ...
    kind: str        # "probability", "time", "energy"
    value: float     # job units
    units: str
    scale: float = 1.0   # divides the error before it is compared with TOL (1: absolute)
    judged: bool = True  # False: reported as not judged (see FINAL_NORM_MIN, ARRIVED_MIN)


def _read_outputs(path: Path, setup: Setup) -> dict:
    """The run's main outputs from its result file, by the analysis
    functions users call: absorbed probability per face, probability beyond
    each detector and arrival mean and spread per detector, final energy."""
    import xarray as xr   # lazy: only the pilot's runs are read back

    out = {}
    with xr.open_dataset(path) as ds:
        ds.load()
        if "surface" in ds.dims:
            return _coupled_outputs(ds)
        totals = transmission_totals(ds, run_record(ds))   # the run's record, as analysis reads it
        for face, value in totals["absorbed"].items():
            out[f"absorbed {face}"] = _Output(f"absorbed at {face}", "probability", value, "")
        for name, d in totals["detectors"].items():
            out[f"beyond {name}"] = _Output(f"beyond detector {name!r}", "probability", d["beyond"], "")
        if totals["detectors"]:
            time_label = str(ds.attrs.get("units_time", ""))
            for name, dist in arrival_times(ds, classical=False, warnings=False).items():
                s = dist.stats
                arrived = s.get("forward", s["probability"])
                for key, what in (("mean", "arrival mean"), ("std", "arrival spread")):
                    v = s[key] if arrived > ARRIVED_MIN else math.nan
                    out[f"{key} {name}"] = _Output(f"{what} at {name!r}", "time", float(v), time_label,
                                                   judged=bool(arrived > ARRIVED_MIN))
        norm = np.asarray(ds["norm"].values, float)
        energy = np.asarray(ds["energy"].values, float)
        e_label = str(ds.attrs.get("units_energy", ""))
        # judged by the base run's norm only: a pilot run just below the floor still gives its value
        value = float(energy[-1])
        out["energy"] = _Output("final energy", "energy", value, e_label,
                                scale=max(abs(float(energy[0])), abs(value)),
                                judged=bool(norm[-1] >= FINAL_NORM_MIN))
    for o in out.values():
        if o.kind == "time":
            o.scale = abs(o.value) if math.isfinite(o.value) else math.nan
    return out


def _coupled_outputs(ds) -> dict:
    """The main outputs of a run on coupled surfaces, per surface: its
    probability at the end (left on the grid + absorbed), absorbed per
    face, the net probability that crossed each detector (the flux
    integrated over the run, trapezoid rule, + along the detector's axis),
    each adiabatic state's population at the end (record.adiabatic), and
    the final energy (of all surfaces)."""
    out = {}
    names = [str(s) for s in ds["surface"].values]
    t = np.asarray(ds["time"].values, float)
    norm = np.asarray(ds["norm"].values, float)                      # (time, surface)
    faces = [str(b) for b in ds["boundary"].values] if "boundary" in ds.coords else []
    absorbed = np.asarray(ds["absorbed"].values, float) if faces else np.zeros((t.size, len(names), 0))
    detectors = [str(d) for d in ds["detector"].values] if "detector" in ds.coords else []
    for s, name in enumerate(names):
        out[f"population {name}"] = _Output(f"on surface {name} at the end (left + absorbed)", "probability",
                                            float(norm[-1, s] + absorbed[-1, s].sum()), "")
        for f, face in enumerate(faces):
            out[f"absorbed {name} {face}"] = _Output(f"absorbed on surface {name} at {face}", "probability",
                                                     float(absorbed[-1, s, f]), "")
        for j, det in enumerate(detectors):
            crossed = float(np.trapezoid(np.asarray(ds["flux"].values, float)[:, s, j], t))
            out[f"crossed {name} {det}"] = _Output(f"net probability across detector {det!r} on surface {name}",
                                                   "probability", crossed, "")
    if "population_adiabatic" in ds:
        for k, p in enumerate(np.asarray(ds["population_adiabatic"].values, float)[-1]):
            out[f"adiabatic {k}"] = _Output(f"adiabatic state {k} at the end", "probability", float(p), "")
    if "energy" in ds:
        energy = np.asarray(ds["energy"].values, float)
        value = float(energy[-1])
        out["energy"] = _Output("final energy", "energy", value, str(ds.attrs.get("units_energy", "")),
                                scale=max(abs(float(energy[0])), abs(value)),
                                judged=bool(norm[-1].sum() >= FINAL_NORM_MIN))
    return out


def _run_once(table: dict, overrides: dict, folder: Path, bars: bool) -> tuple[dict, Setup]:
    """One pilot run: the job with ``overrides`` into ``folder``; its outputs."""
    job = job_from_dict(copy.deepcopy(table), [(k, v) for k, v in overrides.items()])
    sim = Simulation(job)
    path = sim.run(path=folder / f"pilot-{len(list(folder.iterdir()))}.nc", progress=bars)
    try:
        return _read_outputs(path, sim.setup), sim.setup
    finally:
        path.unlink(missing_ok=True)


def run_pilot(job: Job, tolerance: float, progress=None, plan: PilotPlan | None = None,
              bars: bool = False) -> list:
    """Run the pilot and return its findings (topic "accuracy"): one per
    output (ok within ``tolerance``, else warn with ``field`` the dominant
    setting) and a summary with the cost.  ``progress(message)`` is called
    with a line per pilot run; ``bars`` shows each run's progress bar."""
    plan = plan or plan_pilot(job, tolerance, timing_seconds=0.0)
    tol = plan.tolerance
    say = progress or (lambda message: None)
    table = _base_table(job)
    results, skipped = [], []
    wall0 = _time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="wavesweep-pilot-") as tmp:
        folder = Path(tmp)
        for i, run in enumerate(plan.runs, 1):
            where = f"pilot run {i}/{len(plan.runs)}"
            say(f"{where}: {run.label} ({run.steps} steps x {run.points} points)")
            t0 = _time.perf_counter()
            try:
                try:
                    outputs, setup = _run_once(table, run.overrides, folder, bars)
                except RunFailed as e:
                    if not (run.setting == "evolve.dt" and run.ratio > 1):
                        raise
                    # the coarser step broke the books: measure with a finer one instead
                    run = plan.runs[i - 1] = _finer_dt_run(plan)
                    say(f"{where}: the coarser step failed ({e.reason}); {run.label} instead")
                    outputs, setup = _run_once(table, run.overrides, folder, bars)
            except (RunFailed, JobError) as e:
                if i == 1:      # the job itself: its own error, as `run` would give it
                    raise
                # e.g. a packet read from a file on the run's grid: that setting goes unmeasured
                reason = e.reason if isinstance(e, RunFailed) else f"{e.field}: {e.message}"
                skipped.append((run, reason))
                say(f"{where}: not measured ({reason})")
                continue
            results.append((run, outputs))
            if i == 1:
                base_setup = setup
            say(f"{where}: done in {_human(_time.perf_counter() - t0)}")
    wall = _time.perf_counter() - wall0
    return _findings(plan, results, base_setup, tol, wall, skipped)


def _finer_dt_run(plan: PilotPlan) -> PilotRun:
    """The dt run at half the step (record.every stays a whole number of steps)."""
    base = plan.runs[0]
    setup = _setup_of(_base_table(plan.job))
    m = 2 * setup.sample_steps
    dt_run = job_number(setup.units.to_job(setup.sample_steps * setup.dt / m, "time"))
    steps = setup.total_steps * 2
    return PilotRun(f"evolve.dt {dt_run:g}", "evolve.dt", {"evolve.dt": dt_run}, 0.5,
                    steps / base.steps, steps, base.points)


# -- the judgement ----------------------------------------------------------------------
def _share_targets(errors: dict, tol: float) -> dict:
    """The error each setting may keep so that their sum is ``tol``: settings
    already below an equal share keep theirs, the others split the rest."""
    targets = dict(errors)
    large = dict(errors)
    while large:
        budget = tol - sum(e for k, e in targets.items() if k not in large)
        share = budget / len(large)
        small = {k for k, e in large.items() if e <= share}
        if not small:
            for k in large:
                targets[k] = share
            break
        for k in small:
            large.pop(k)
    return targets


def _findings(plan: PilotPlan, results, base_setup: Setup, tol: float, wall: float, skipped=()) -> list:
    u = base_setup.units
    grid = base_setup.grid
    T = u.unit_label("time")
    dt0 = base_setup.dt
    base = results[0][1]
    p, q = plan.dx_order, plan.dt_order
    findings = []
    need_points = {ax.name: ax.points for ax in grid.axes}
    need_dt = dt0
    for key, out in base.items():
        if not (out.judged and math.isfinite(out.value)):
            continue
        shares, missing = {}, []
        for run, outputs in results[1:]:
            other = outputs.get(key)
            if other is None or not math.isfinite(other.value):
                missing.append(run.setting)
                continue
            diff = out.value - other.value
            if run.setting == "evolve.dt":
                err = -diff / (run.ratio**q - 1.0)          # Q(s tau) - Q(tau) over s^q - 1
            else:
                err = diff / (1.0 - run.ratio**p)           # Q(h) - Q(h/r) over 1 - r^-p
            shares[run.setting] = SAFETY * abs(err)
        absolute = out.kind == "probability" or not out.scale > 0   # a zero scale: absolute
        scale = 1.0 if absolute else out.scale
        if missing:
            # e.g. something arrived at a detector in the run but nothing in the run with
            # another setting: the output hangs on that setting more than any estimate says
            findings.append(Finding("accuracy", "warn",
                f"{out.name}: {_fmt(out)} in the run, none in the pilot run with another "
                f"{' and '.join(missing)}: its error cannot be estimated; it depends on {missing[0]}",
                {"output": out.name, "kind": out.kind, "value": out.value, "units": out.units,
                 "tolerance": tol, "dominant": missing[0]}, field=missing[0]))
            continue
        measured = {k: e / scale for k, e in shares.items()}      # in units of TOL
        total = sum(measured.values())
        dominant = max(measured, key=measured.get) if measured else ""
        targets = _share_targets(measured, tol)
        points, dt_needed = {}, dt0
        for setting, e in measured.items():
            if setting == "evolve.dt":
                if e > targets[setting] > 0:
                    dt_needed = dt0 * (targets[setting] / e) ** (1.0 / q)
            else:
                name = setting.split(".")[1]
                ax = grid.axis(name)
                cells = _cells(ax.points, ax.boundary)
                n = ax.points
                if e > targets[setting] > 0:
                    want = math.ceil(cells * (e / targets[setting]) ** (1.0 / p)) - _cells(0, ax.boundary)
                    n = _fast_points(max(want, ax.points), ax.boundary)
                points[name] = n
                need_points[name] = max(need_points[name], n)
        dt_job = _whole_sample_dt(base_setup, dt_needed)
        if dt_needed < dt0:
            need_dt = min(need_dt, dt_needed)
        ok = total <= tol
        what = "absolute" if absolute else "relative"
        parts = ", ".join(f"{_short(k)} {v * scale:.2g}" for k, v in measured.items())
        message = (f"{out.name}: {_fmt(out)}, estimated error {total * scale:.2g} {out.units}".rstrip()
                   + ("" if absolute else f" ({total:.2g} relative)")
                   + f" ({parts}); tolerance {tol:g} {what}")
        if not ok:
            fixes = [f"grid.{a}.points >= {n}" for a, n in points.items() if n > grid.axis(a).points]
            if dt_needed < dt0:
                fixes.append(f"evolve.dt <= {dt_job:g} {T}")
            message += f": {dominant} dominates; use " + " and ".join(fixes)
            if total > FAR_FROM_CONVERGED:
                message += ("; an error this large is outside the range where the error follows a "
                            "power of dx and dt: the estimate gives its order of magnitude only; "
                            "change the settings and check again")
        values = {"output": out.name, "kind": out.kind, "value": out.value, "units": out.units,
                  "tolerance": tol, "tolerance_kind": what, "error": total * scale,
                  "error_measure": total, "errors": {k: v * scale for k, v in measured.items()},
                  "dominant": dominant, "points_needed": points, "dt_needed": dt_job,
                  "asymptotic": bool(total <= FAR_FROM_CONVERGED)}
        findings.append(Finding("accuracy", "ok" if ok else "warn", message, values,
                                field="" if ok else dominant))
    for key, out in base.items():
        if not (out.judged and math.isfinite(out.value)):
            why = (f"less than {FINAL_NORM_MIN:g} of the probability is left on the grid"
                   if out.kind == "energy" else "nothing arrived there in the run")
            findings.append(Finding("accuracy", "ok", f"{out.name}: not judged ({why})",
                                    {"output": out.name, "kind": out.kind, "judged": False}))
    findings.append(_summary(plan, results, base_setup, wall, need_points, need_dt, skipped))
    return findings


def _whole_sample_dt(setup: Setup, dt_au: float) -> float:
    """The largest step <= dt_au (atomic units) that divides record.every, in job units."""
    every = setup.sample_steps * setup.dt
    m = max(1, math.ceil(every / dt_au - 1e-9))
    return job_number(setup.units.to_job(every / m, "time"))


def _summary(plan, results, setup, wall, need_points, need_dt, skipped=()) -> Finding:
    u = setup.units
    T = u.unit_label("time")
    runs = [r for r, _ in results]
    cost = sum(r.cost for r in runs)
    q = plan.dt_order
    dt_note = (f"dt order {q} ({setup.scheme.name}, known)" if q
               else f"no dt error ({setup.scheme.name} is exact in time)")
    settings = [f"grid.{a}.points = {n}" for a, n in need_points.items() if n > setup.grid.axis(a).points]
    if need_dt < setup.dt:
        settings.append(f"evolve.dt = {_whole_sample_dt(setup, need_dt):g} {T}")
    reach = ("; every output reaches the tolerance with " + ", ".join(settings)) if settings else ""
    notes = "".join(f"; {n}" for n in plan.notes if "exact in time" not in n)
    if skipped:
        notes += "; not measured, so their share of the errors is unknown: " + "; ".join(
            f"{run.setting} ({run.label}: {reason})" for run, reason in skipped)
    return Finding("accuracy", "warn" if skipped else "ok",
        f"pilot of {len(runs)} runs ({', '.join(r.label for r in runs)}): {cost:.2g}x the run's steps x "
        f"points, {_human(wall)}; dx order {plan.dx_order:g} assumed (conservative), {dt_note}"
        + reach + notes,
        {"runs": [{"label": r.label, "setting": r.setting, "overrides": r.overrides, "ratio": r.ratio,
                   "cost": r.cost} for r in runs],
         "cost": cost, "seconds": wall, "tolerance": plan.tolerance, "dx_order": plan.dx_order,
         "dx_order_kind": "assumed", "dt_order": q, "points_needed": need_points,
         "dt_needed": _whole_sample_dt(setup, need_dt),
         "not_measured": [run.setting for run, _ in skipped]},
        field=skipped[0][0].setting if skipped else "")


def _short(setting: str) -> str:
    return "dt" if setting == "evolve.dt" else f"d{setting.split('.')[1]}"


def _fmt(out: _Output) -> str:
    return f"{out.value:.6g} {out.units}".rstrip()
