"""One run: a job's set-up (:mod:`wavesweep.setup`) -> the stepping loop ->
a result file.

:class:`Simulation` runs the loop, records observables every
``record.every`` and density every ``record.snapshot_every``, and writes the
result through :class:`~wavesweep.io.recorder.ResultWriter`, with
checkpoints.  Its run-book methods (:meth:`Simulation.begin`,
:meth:`~Simulation.observe`, :meth:`~Simulation.record_sample`,
:meth:`~Simulation.write_snapshot`, :meth:`~Simulation.save_checkpoint`,
:meth:`~Simulation.finish`, :meth:`~Simulation.abort`) are the declared
protocol :class:`wavesweep.batched.BatchedRun` drives for each member of a
batch, so a solo run and a batched one write the same file.
"""
from __future__ import annotations

import json
import logging
import math
import os
import sys
import time as _time
from pathlib import Path

import numpy as np

from ._version import __version__
from .adequacy import edge_warning_lines, momentum_edge_weights, stored_edge_weight
from .errors import DiskFull, JobError, RunFailed, RunInterrupted
from .io.checkpoint import (CheckpointCorrupt, CheckpointMismatch, CheckpointState, CheckpointStore, ResultExists,
                            result_complete)
from .io.paths import file_kind
from .io.record import DPSI_UNITS_VERSION, record_checksum
from .io.recorder import ResultWriter
from .job import Job, job_from_dict, load_job
from .kernels import density_of
from .setup import (AXIS_LONG, CoupledSetup, Setup, analysis_record, blas_on_one_thread, coupled_attributes,
                    final_detector_values)
from .surfaces import PHASE_CONVENTION
from .units import decimal_multiple
from .volkov import VolkovIntegrals, uniform_force_along, uniform_force_vector

__all__ = ["Simulation", "RunBook", "run_job", "progress_bar"]

_log = logging.getLogger(__name__)


class Simulation:
    """Runs one job and writes its result dataset.

    >>> sim = Simulation(load_job("jobs/demo.toml"))     # doctest: +SKIP
    >>> path = sim.run("out/")                           # doctest: +SKIP
    """

    def __init__(self, job: Job, fft: str | None = None, threads: int | None = None):
        # coupled surfaces ([[surface]]): psi (surface, *grid), a result with a surface dimension
        self.coupled = bool(job.table.get("surface"))
        self.setup = (CoupledSetup if self.coupled else Setup)(job, fft, threads)
        self.job = self.setup.job     # the complete job (a tuned CAP written in)
        self._prepared = None         # the analysis record, when prepare() made it ahead of begin()

    def prepare(self) -> None:
        """Make what :meth:`begin` writes into a new run's file and needs
        no file for: the analysis record (the warnings judged for the run,
        its classical trajectories, its Lanczos recurrence).  Numerics only,
        so a batch makes its members' in threads (:class:`~wavesweep.batched.
        BatchedRun`: ~40 ms a member, which begin() made one after the
        other); begin() makes it itself when it was not prepared."""
        if not self.coupled and self._prepared is None:
            self._prepared = analysis_record(self.setup)

    def output_path(self, outdir) -> Path:
        """``OUTDIR/NAME-RUNID.nc``: runs of other physics (another --set, a
        sweep point) never overwrite each other; a rerun of the same physics
        replaces its own file."""
        return Path(outdir) / f"{self.job.name}-{self.job.run_id}.nc"

    @blas_on_one_thread
    def run(self, outdir=None, path=None, progress: bool = True, on_sample=None,
            checkpoint=None, should_stop=None, on_resume=None) -> Path:
        """Propagate and write the result; returns the file path.

        ``on_sample(step, total, rate)`` is called after every sample (for
        queue progress; ``rate`` is steps per second of this session).
        Raises :class:`RunFailed` on numerical failure (the partial file is
        removed).

        ``checkpoint``, a :class:`~wavesweep.io.checkpoint.CheckpointPolicy`,
        makes the run crash-safe: it resumes from the policy's checkpoint if
        there is one of this job (one of another job is refused with
        :class:`~wavesweep.io.checkpoint.CheckpointMismatch`; an unreadable
        one is discarded with a warning and the run starts from scratch),
        saves a checkpoint at a sample boundary every
        ``checkpoint.every_seconds`` of wall time, and deletes it when the run
        completes.  With a policy, an existing finished result at the output
        path is never overwritten
        (:class:`~wavesweep.io.checkpoint.ResultExists`).

        ``should_stop()`` is asked after every sample before the last; when
        it returns True the run saves a checkpoint (if it has a policy) and
        raises :class:`~wavesweep.errors.RunInterrupted` with the
        checkpoint's path (None without a policy) and the step reached.
        ``on_resume(step, total)`` is called when the run continues from a
        checkpoint, before its first step.

        A full disk (or quota) raises :class:`~wavesweep.errors.DiskFull`
        (a RunFailed): the partial file is removed, the last checkpoint kept."""
        s = self.setup
        path = Path(path) if path else self.output_path(outdir)
        book = self.begin(path, checkpoint)
        if book is None:
            raise ResultExists(path)
        bar = None
        try:   # from here on, anything that goes wrong removes the partial file
            if not book.fresh and on_resume is not None:
                on_resume(int(book.steps), int(s.total_steps))
            prop = s.make_propagator()
            observer = s.make_observer()
            psi, book.psi = prop.load(book.psi), None
            prop.steps_done = book.steps
            prop.absorbed[:] = book.absorbed
            take_up_norm_keeping(prop, [book.norm_keeping])
            done = start = int(prop.steps_done)
            bar = progress_bar(s.total_steps, progress, self.job.name)
            if bar is not None and done:
                bar.update(done)
            if book.fresh:
                self.observe(book, s.measure(observer, psi, prop.t), prop.t, prop.absorbed)
                self.write_snapshot(book.writer, 0.0, psi)
            while done < s.total_steps:
                n = min(s.sample_steps, s.total_steps - done)
                psi = prop.step(psi, n)
                done += n
                values = s.measure(observer, psi, prop.t)
                self.record_sample(book, values, prop.t, prop.absorbed, psi, done)
                if bar is not None:
                    bar.update(n)
                if on_sample is not None:
                    on_sample(done, s.total_steps, book.rate(done - start))
                if done >= s.total_steps:
                    break
                if should_stop is not None and should_stop():
                    saved = self.save_checkpoint(book, done, prop.absorbed, psi, reopen=False,
                                                 norm_keeping=norm_keeping_of(prop)) \
                        if book.store is not None else None
                    raise RunInterrupted(saved, done)
                if book.checkpoint_due():
                    self.save_checkpoint(book, done, prop.absorbed, psi, norm_keeping=norm_keeping_of(prop))
            out = self.finish(book, psi, int(prop.steps_done))
        except BaseException as e:
            self.abort(book, e)
            raise
        finally:
            if bar is not None:
                bar.close()
        self.psi = psi
        return out

    # -- one run's books (shared with batched runs) -----------------------------
    def begin(self, path: Path, checkpoint=None) -> "RunBook | None":
        """The run's writer, initial (or resumed) psi, steps and books; None
        when a checkpoint policy finds the finished result already there."""
        s = self.setup
        _check_writable(path.parent)
        if os.path.lexists(path) and not path.is_file():
            # found now, before the run is computed, not when its finished file is renamed into place
            raise JobError("--output", f"{str(path)!r}, where this run's result goes, is "
                                       f"{file_kind(os.stat(path).st_mode) if path.exists() else 'a broken link'}; "
                                       "move or remove it, or choose another folder with -o")
        store = resume = None
        if checkpoint is not None:
            store = CheckpointStore(checkpoint)
            if result_complete(path):
                self._discard_own_checkpoint(store)
                return None
            resume = self._load_checkpoint(store)
        if resume is None:
            if self.coupled:   # the analysis record is one surface's: a coupled file has the run's attributes,
                # its grid's and the adequacy warnings judged at run time, which its analysis repeats
                record = None
                attrs = {**self._attrs(), **coupled_attributes(s)}
            else:   # what analysis needs of the set-up, written once with the file (a resumed file has it)
                record, self._prepared = self._prepared or analysis_record(s), None
                attrs = {**self._attrs(), **record["attrs"]}
                attrs["analysis_record_crc32"] = record_checksum(attrs)   # attributes have no HDF5 checksum
            writer = ResultWriter(path, {**self._layout(), "record": record}, attrs)
            # psi0 itself: the propagator's load() copies it into its own array
            book = RunBook(path, writer, store, checkpoint, s.psi0, 0, np.zeros(self._absorbed_shape()), 0.0, True)
            if self.coupled:
                book.warnings = json.loads(attrs["adequacy_warnings"])
                book.edge = momentum_edge_weights(s.psi0, s.grid)
            return book
        writer = ResultWriter.resume(path, self._layout(), resume.result_copy, resume.n_time,
                                     resume.n_snap, attrs=self._attrs())
        book = RunBook(path, writer, store, checkpoint, np.array(resume.psi, dtype=s.dtype, copy=True),
                       int(resume.steps), np.asarray(resume.absorbed, float).copy(), resume.wall_seconds, False)
        book.norm_keeping = resume.extra.get("norm_keeping")
        if self.coupled:   # the sessions before: their warnings (in the file) and edge weights (in the checkpoint)
            book.warnings = json.loads(str(writer.ds.getncattr("adequacy_warnings")))
            book.edge = np.array(resume.extra.get("momentum_edge_weight")
                                 or momentum_edge_weights(book.psi, s.grid), float)
        return book

    def observe(self, book, values, t_au, absorbed) -> dict:
        """Write one sample (``values`` from the observer, atomic units)."""
        s = self.setup
        conv = book.conv or self._converters()
        book.conv = conv
        values["absorbed"] = np.array(absorbed, dtype=float, copy=True)
        row = dict(values)
        for scalar in s.scalars:   # each by its declared quantity kind
            if scalar.kind:   # a new value: on coupled surfaces an array the observer's values share
                row[scalar.name] = row[scalar.name] * conv[scalar.kind]
        row["flux"] = values["flux"] * conv["flux"]
        if "detector_psi" in values:
            row["detector_psi"] = values["detector_psi"] * conv["amplitude"]
        if "detector_dpsi" in values:   # |psi|^2 dx invariant: dpsi/dx scales as length^-3/2
            # (psi in job units is psi_au L^(1/2), L the job's length unit in bohr, and d/dx_job = L d/dx_au;
            # conv["length"] is 1/L)
            row["detector_dpsi"] = values["detector_dpsi"] * (conv["amplitude"] / conv["length"])
        if self._driving_force() is not None:   # the field's momentum transfer and Volkov phases here
            if book.volkov is None:
                book.volkov = VolkovIntegrals(self._driving_force(), s.mass, s.dt,
                                              None if s.grid.ndim == 1 else s.grid.ndim)
            row.update(book.volkov.in_job_units(t_au, conv))
        if "spectrum_psi" in values:   # 2D/3D lines or planes: psi scales as length^(-d/2), dpsi/dn one more
            amplitude = conv["amplitude"] ** s.grid.ndim
            row["spectrum_psi"] = values["spectrum_psi"] * amplitude
            row["spectrum_dpsi"] = values["spectrum_dpsi"] * (amplitude / conv["length"])
        if "screen_flux" in values:   # resolved detectors: probability per unit length^(d-1) per unit time
            row["screen_flux"] = values["screen_flux"] * (conv["flux"] * conv["length"] ** (1 - s.grid.ndim))
        if "frame_offset" in values:
            row["frame_offset"] = values["frame_offset"] * conv["length"]
        book.writer.add_sample(self.job_time(t_au), row)
        return values

    def job_time(self, t_au: float) -> float:
        """A sample's time ``t_au`` (atomic units, a whole number of steps)
        in job units as the job writes its times: the step count times
        evolve.dt (or the sample count times record.every) in job units,
        multiplied in decimal (:func:`~wavesweep.units.decimal_multiple`):
        1200 steps of 0.025 fs are 30.0 fs, not 30.000000000000004, so
        ``ds.sel(time=30.0)`` finds it.  A step or interval given as a
        string with its own unit has no written value in job units: then
        t_au over the unit, as before."""
        s = self.setup
        steps = round(t_au / s.dt)
        if abs(steps * s.dt - t_au) <= 1e-9 * max(abs(t_au), s.dt):
            dt, every = self.job.table["evolve"]["dt"], self.job.table["record"]["every"]
            if _plain_number(dt):
                return decimal_multiple(steps, dt)
            if _plain_number(every) and steps % s.sample_steps == 0:
                return decimal_multiple(steps // s.sample_steps, every)
        return t_au / self._factor("time")

    def record_sample(self, book, values, t_au, absorbed, psi, done) -> None:
        """The sample (and snapshot, when due) after ``done`` steps; raises
        RunFailed when the books say the state is broken."""
        s = self.setup
        values = self.observe(book, values, t_au, absorbed)
        self._health(values, absorbed, t_au, done)
        if self.coupled and (done % self._edge_steps() == 0 or done >= s.total_steps):
            # a hop can give a surface momenta beyond the grid's, which the set-up's criteria cannot weigh
            book.edge = np.maximum(book.edge, momentum_edge_weights(psi, s.grid))
        if done % s.snapshot_steps == 0:
            self.write_snapshot(book.writer, self.job_time(t_au), psi)

    def finish(self, book, psi, steps: int) -> Path:
        """Final state, run attributes, the file in place; the checkpoint gone."""
        s = self.setup
        if s.job.table["record"]["final_state"]:
            scale = s.units.factor("length") ** (s.grid.ndim / 2)
            psi = s.lab_state(psi, s.total_steps * s.dt)   # in a falling frame: the lab psi on the grid's lab positions
            book.writer.set_final_state(psi, scale)
            values = final_detector_values(s, psi, scale)   # what analysis would read psi for (1D)
            if values is not None:
                book.writer.set_detector_values(values)
        closing = {"steps": int(steps), "wall_seconds": float(book.wall())}
        if self.coupled:   # measured over the run: beside the set-up's warnings, which analysis repeats
            measured = edge_warning_lines(s, book.edge, s.surfaces)
            for line in measured:
                _log.warning("%s: %s", self.job.name, line)
            closing["momentum_edge_weight"] = json.dumps(
                {name: {ax.name: stored_edge_weight(w) for ax, w in zip(s.grid.axes, row)}
                 for name, row in zip(s.surfaces, book.edge)})
            closing["adequacy_warnings"] = json.dumps(
                [*book.warnings, *(f"the run, measured: {line}" for line in measured)])
        try:
            out = book.writer.close(closing, replace=book.store is None)
        except FileExistsError:   # another worker finished this run meanwhile
            raise ResultExists(book.path) from None
        if book.store is not None:
            book.store.discard()
        return out

    def abort(self, book, exc: BaseException) -> None:
        """The partial result goes; a failed or finished run keeps no
        checkpoint (a run stopped by a full disk keeps it: it resumes)."""
        book.writer.abort()
        if book.store is not None and isinstance(exc, (RunFailed, ResultExists)) \
                and not isinstance(exc, DiskFull):
            book.store.discard()   # a failed or finished run has nothing to resume

    def _expected_position(self, steps: int) -> tuple[int, int]:
        """(samples, snapshots) the loop has written after ``steps`` steps
        (a sample boundary before the end)."""
        s = self.setup
        k = steps // s.sample_steps
        # sample j is a snapshot when j * sample_steps is a multiple of snapshot_steps
        period = s.snapshot_steps // math.gcd(s.sample_steps, s.snapshot_steps)
        return k + 1, 1 + k // period

    def save_checkpoint(self, book, steps: int, absorbed, psi, reopen: bool = True, norm_keeping=None) -> Path:
        """A checkpoint of the run after ``steps`` steps; ``norm_keeping``:
        the propagator's state of single precision's norm keeping for this
        run (:meth:`~wavesweep.propagators.split_operator.SplitOperator.norm_keeping`)."""
        writer = book.writer
        n_time, n_snap = writer.position
        state = CheckpointState(run_id=self.job.run_id, steps=int(steps),
                                absorbed=np.array(absorbed, dtype=float, copy=True), n_time=n_time, n_snap=n_snap,
                                wall_seconds=float(book.wall()), psi=np.asarray(psi),
                                extra={"job_name": self.job.name, "total_steps": int(self.setup.total_steps),
                                       "scheme": self.setup.scheme.name,
                                       "wavesweep_version": __version__,
                                       **({"momentum_edge_weight": np.asarray(book.edge).tolist()}
                                          if self.coupled else {}),
                                       **({"norm_keeping": norm_keeping} if norm_keeping is not None else {})})
        out = book.store.save(state, writer, reopen=reopen)
        book.last_checkpoint = _time.perf_counter()
        return out

    def _load_checkpoint(self, store):
        """The checkpoint to resume from, or None (none there, or unusable:
        discarded with a warning, and the run starts from scratch)."""
        s = self.setup
        try:
            state = store.load(self.job.run_id)
            if state is None:
                return None
            shape = tuple(np.shape(s.psi0))   # the grid's; (surface, *grid) on coupled surfaces
            if state.psi.shape != shape or state.psi.dtype != np.dtype(s.dtype):
                raise CheckpointCorrupt(f"psi is {state.psi.dtype} {state.psi.shape}, the job needs "
                                        f"{np.dtype(s.dtype)} {shape}")
            if state.absorbed.shape != self._absorbed_shape():
                raise CheckpointCorrupt(f"{state.absorbed.size} absorbed values for the job's "
                                        f"{self._absorbed_shape()} (surfaces, faces)")
            if not (0 < state.steps < s.total_steps and state.steps % s.sample_steps == 0):
                raise CheckpointCorrupt(f"step {state.steps} is not a sample boundary inside the run")
            if (state.n_time, state.n_snap) != self._expected_position(state.steps):
                raise CheckpointCorrupt(f"{state.n_time} samples and {state.n_snap} snapshots do not "
                                        f"match step {state.steps}")
        except CheckpointCorrupt as e:
            _log.warning("unusable checkpoint %s (%s); starting %s from scratch", store.path, e, self.job.name)
            store.discard()
            return None
        _log.info("resuming %s from %s at step %d of %d", self.job.name, store.path, state.steps,
                  s.total_steps)
        return state

    def _discard_own_checkpoint(self, store) -> None:
        """A finished result is there: a checkpoint of this run left behind
        (a kill between the result's rename and the clean-up) is stale, and
        so is an unreadable one; a checkpoint of another run is left alone."""
        try:
            store.load(self.job.run_id)
        except CheckpointMismatch:
            return
        except CheckpointCorrupt:
            pass
        store.discard()

    # -- helpers ---------------------------------------------------------------
    def _edge_steps(self) -> int:
        """Steps between measurements of the momentum at the grid's edge on
        coupled surfaces: every sample, or every few samples so that the
        transforms cost a few percent of the stepping (at least
        EDGE_EVERY_STEPS steps apart; a hop's fast part crosses a grid in
        many more steps)."""
        n = self.setup.sample_steps
        return n * max(1, -(-EDGE_EVERY_STEPS // n))

    def _absorbed_shape(self) -> tuple:
        """The books' shape: (faces,), or (surfaces, faces) on coupled surfaces."""
        s = self.setup
        n_faces = len(s.absorber.layers) if s.absorber.active else 0
        return (len(s.surfaces), n_faces) if self.coupled else (n_faces,)

    def _converters(self):
        u = self.setup.units
        return {**{s.kind: 1 / u.factor(s.kind) for s in self.setup.scalars if s.kind},   # the recorded scalars' kinds
                "length": 1 / u.factor("length"), "energy": 1 / u.factor("energy"),
                "momentum": 1 / u.factor("momentum"), "flux": u.factor("time"),
                "amplitude": math.sqrt(u.factor("length"))}   # |psi|^2 dx is invariant

    def _health(self, values, absorbed, t_au, step):
        norm = values["norm"]   # a number, or one per surface
        # (a 1D books' sum in Python floats: the same sum, without numpy's ~2 us on a few elements)
        books = sum(absorbed.tolist()) if getattr(absorbed, "ndim", 0) == 1 else float(np.sum(absorbed))
        total = (norm if isinstance(norm, float) else float(np.sum(norm))) + books
        if math.isfinite(total) and abs(total - 1) <= 1e-6:   # the common case, decided without the rest
            return
        t = t_au / self.setup.units.factor("time")
        if not math.isfinite(total):
            raise RunFailed(f"psi became NaN/inf at t = {t:g} (step {step}); reduce evolve.dt "
                            "or check the potential for non-finite values", step, t)
        if self.setup.dtype == np.complex64:
            # split-operator steps renormalise single-precision rounding one
            # kick later (the error stays ~1e-7); the other schemes round
            # to float32 after each step, which drifts ~2e-8 per step
            renormalised = self.setup.scheme.renormalises_single
            tol = 1e-5 if renormalised else max(1e-3, 5e-8 * step)
            if abs(total - 1) > tol:
                raise RunFailed(f"single-precision rounding moved the total probability to {total:.6g} "
                                f"by t = {t:g} (step {step}); use evolve.precision = 'double'", step, t)
            return
        if total > 1 + 1e-6:
            raise RunFailed(f"norm grew to {total:.6g} at t = {t:g} (step {step}): the scheme is "
                            "unstable for this dt", step, t)
        if total < 1 - 1e-6:
            raise RunFailed(f"the total probability fell to {total:.6g} at t = {t:g} (step {step}) "
                            "although every absorbed part is booked: the scheme is unstable for "
                            "this dt", step, t)

    def write_snapshot(self, writer, t_job: float, psi) -> None:
        """A density frame, and psi itself when record.snapshot_psi asks for it."""
        s = self.setup
        amp = offset = None
        t_au = t_job * self._factor("time")
        if self.job.table["record"].get("snapshot_psi"):
            amp = np.asarray(s.lab_state(psi, t_au), np.complex128) * math.sqrt(s.units.factor("length")) ** s.grid.ndim
        if s.frame is not None:   # where the falling grid is at the snapshot
            offset = s.frame.offset(t_au) / s.units.factor("length")
        writer.add_snapshot(t_job, self._density(psi), amp, frame_offset=offset)

    def _density(self, psi) -> np.ndarray:
        """|psi|^2 in job units, float32 as the result file stores it (a
        quarter of the bytes of psi in double, no other temporary)."""
        return density_of(psi, self._factor("length") ** self.setup.grid.ndim, np.float32)

    def _factor(self, kind: str) -> float:
        """The job unit of ``kind`` in atomic units, looked up once per run
        (a look-up parses the unit: a few us, at every sample and frame)."""
        factors = self.__dict__.setdefault("_factors", {})
        if kind not in factors:
            factors[kind] = self.setup.units.factor(kind)
        return factors[kind]

    def _driving_force(self):
        """F(t) of a run in the lab under a time-dependent uniform force (the
        ``field`` kind), for the surface-flux spectrum's Volkov phases
        (:mod:`wavesweep.volkov`): along x in 1D, the vector of the axes in
        2D/3D when a detector records a spectrum; None otherwise.  Found
        once per run (it was asked at every sample)."""
        if "_force" not in self.__dict__:
            self._force = self._find_driving_force()
        return self._force

    def _find_driving_force(self):
        s = self.setup
        if self.coupled or s.frame is not None or s.grid.radial:
            return None
        if s.grid.ndim == 1:
            return uniform_force_along(s.terms)
        if not any(d.spectrum for d in s.detectors):
            return None
        return uniform_force_vector(s.terms, s.grid.ndim)

    def _layout(self) -> dict:
        s = self.setup
        lf = s.units.factor("length")
        axes = [(a.name, a.coordinates / lf, AXIS_LONG[a.name]) for a in s.grid.axes]
        return {
            "axes": axes,
            "stride": int(s.job.table["record"]["stride"]),
            "units": s.unit_labels(),
            "detectors": [(d.name, s.grid.names[d.axis], d.position / lf) for d in s.detectors],
            "faces": [layer.name for layer in s.absorber.layers],
            "potential": s.recorded_potential() / s.units.factor("energy"),
            # coupled surfaces: their names (the surface dimension) and each coupled pair's static V_ab
            "surfaces": list(s.surfaces) if self.coupled else None,
            # record.adiabatic: population_adiabatic(time, state), one state per surface
            "adiabatic": ({"states": len(s.surfaces), "comment": PHASE_CONVENTION}
                          if self.coupled and s.adiabatic else None),
            "coupling_potential": ({f"{s.surfaces[a]},{s.surfaces[b]}": v / s.units.factor("energy")
                                    for (a, b), v in s.recorded_couplings().items()} if self.coupled else None),
            # <psi(0)|psi(t)> of the lab: a falling grid holds phi, on positions that move
            "autocorrelation": s.frame is None and not self.coupled,   # coupled surfaces: not recorded yet
            "scalars": s.scalars,
            "detector_amplitude": s.grid.ndim == 1,
            "volkov": self._driving_force() is not None,   # field_momentum/excursion/phase per sample
            # resolved detectors: screen_flux(time, screen, *transverse axes), screen_probability
            "screens": _screens_layout(s),
            # 2D/3D spectrum detectors: spectrum_psi/dpsi(time, spectrum_detector, *full transverse axes)
            "spectra": _spectra_layout(s),
            "snapshot_psi": bool(s.job.table["record"].get("snapshot_psi")),
            # record.column: (axis index, its spacing in the job's length unit)
            "column": (None if s.job.table["record"].get("column") is None else
                       (s.grid.axis_index(s.job.table["record"]["column"]),
                        s.grid.axes[s.grid.axis_index(s.job.table["record"]["column"])].dx / lf)),
            "final_state": bool(s.job.table["record"]["final_state"]),
            # a falling grid: frame_offset per sample and snapshot (the axes' names; None in the lab)
            "frame_axes": None if s.frame is None else list(s.grid.names),
            # the run's totals, so that a full disk can say how much the file still needs
            "expected": {"samples": -(-s.total_steps // s.sample_steps) + 1,
                         "snapshots": s.total_steps // s.snapshot_steps + 1},
        }

    def _attrs(self) -> dict:
        s, job = self.setup, self.job
        u = s.units
        return {
            "title": job.title,
            "job": job.to_toml(),
            "run_id": job.run_id,
            "wavesweep_version": __version__,
            "scheme": s.scheme.name,
            "dt": float(u.to_job(s.dt, "time")),
            "steps": int(s.total_steps),
            "precision": job.table["evolve"]["precision"],
            "units_length": u.unit_label("length"),
            "units_energy": u.unit_label("energy"),
            "units_time": u.unit_label("time"),
            "units_mass": u.unit_label("mass"),
            "length_to_bohr": float(u.factor("length")),
            "energy_to_hartree": float(u.factor("energy")),
            "time_to_atomic": float(u.factor("time")),
            "mass_to_electron_mass": float(u.factor("mass")),
            "particle_mass": float(s.mass / u.factor("mass")),
            "grid_kind": "radial" if s.grid.radial else "cartesian",
            "angular_momentum": int(s.grid.angular_momentum),
            "absorber": s.absorber.kind,
            "frame": s.job.table["grid"].get("frame", "lab") if s.frame is not None else None,
            # dpsi/dx (dpsi/dn) at detectors in the job's length units; files without this attribute were
            # written with them off by (length unit / bohr)^2 (analysis.surface_flux.dpsi_correction)
            "dpsi_units": DPSI_UNITS_VERSION,
        }


# Coupled runs measure the momentum at the grid's edge at least this many steps apart
# (one transform per axis and surface against a step's two per surface: ~5 %).
EDGE_EVERY_STEPS = 10


def norm_keeping_of(prop, member: int = 0):
    """The propagator's norm-keeping state for a checkpoint (None where it keeps none)."""
    keeping = getattr(prop, "norm_keeping", None)
    return keeping(member) if keeping is not None else None


def take_up_norm_keeping(prop, states) -> None:
    resume = getattr(prop, "resume_norm_keeping", None)
    if resume is not None:
        resume(states)


class RunBook:
    """What one run carries through its loop: the writer, the checkpoint
    store and policy, psi and books to start from, and the wall clock; on
    coupled surfaces also the set-up's warnings (``warnings``) and the
    largest momentum-edge weight so far per surface and axis (``edge``,
    :func:`wavesweep.adequacy.momentum_edge_weights`)."""

    warnings: list = []
    edge = None
    volkov = None     # VolkovIntegrals of a driven 1D run, made at its first sample
    norm_keeping = None   # single precision's norm keeping from the checkpoint resumed (a dict), if any

    def __init__(self, path, writer, store, policy, psi, steps, absorbed, wall_before, fresh):
        self.path, self.writer, self.store, self.policy = path, writer, store, policy
        self.psi, self.steps, self.absorbed = psi, steps, absorbed
        self.wall_before, self.fresh = wall_before, fresh
        self.conv = None
        self.wall0 = self.last_checkpoint = _time.perf_counter()

    def wall(self) -> float:
        """Wall seconds of the run so far, over all its sessions."""
        return self.wall_before + _time.perf_counter() - self.wall0

    def rate(self, steps_this_session: int) -> float:
        elapsed = _time.perf_counter() - self.wall0
        return steps_this_session / elapsed if elapsed > 0 else 0.0

    def checkpoint_due(self) -> bool:
        return (self.store is not None
                and _time.perf_counter() - self.last_checkpoint >= self.policy.every_seconds)


def _screens_layout(setup) -> dict | None:
    """The resolved detectors' names and the transverse axes' names (the
    snapshot grid's, every record.stride-th point), or None without any."""
    screens = [d for d in setup.detectors if d.resolved]
    if not screens:
        return None
    normal = screens[0].axis   # validation keeps every resolved detector across one axis
    return {"names": [d.name for d in screens], "normal": setup.grid.names[normal],
            "transverse": [n for i, n in enumerate(setup.grid.names) if i != normal]}


def _spectra_layout(setup) -> dict | None:
    """The 2D/3D detectors that record psi and dpsi/dn along them, the
    normal axis' name and the transverse axes' names (full grid), or None."""
    lines = [d for d in setup.detectors if d.spectrum and setup.grid.ndim > 1]
    if not lines:
        return None
    normal = lines[0].axis   # validation keeps every spectrum detector across one axis
    return {"names": [d.name for d in lines], "normal": setup.grid.names[normal],
            "transverse": [n for i, n in enumerate(setup.grid.names) if i != normal]}


def _plain_number(value) -> bool:
    """Whether a job value is a number in job units (not a string with its own unit)."""
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _check_writable(folder: Path) -> None:
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise JobError("--output", f"cannot create {str(folder)!r}: {e.strerror}") from None
    if not os.access(folder, os.W_OK):
        raise JobError("--output", f"{str(folder)!r} is not writable; choose another folder with -o")


def progress_bar(total, enabled, name):
    if not enabled:
        return None
    from tqdm import tqdm  # lazy: only runs that show progress
    tty = sys.stderr.isatty()
    # on a terminal: live bar after 2 s; in a log file: a line every 30 s at most
    return tqdm(total=total, unit="step", desc=name, file=sys.stderr, delay=2.0,
                mininterval=0.5 if tty else 30.0, dynamic_ncols=tty, leave=False)


def run_job(job, outdir=".", overrides=(), progress=True, **kwargs) -> Path:
    """Run a job (a path, a dict or a :class:`Job`) and return the result path."""
    if not isinstance(job, Job):
        job = load_job(job, overrides) if isinstance(job, (str, Path)) else job_from_dict(job, overrides)
    return Simulation(job, **kwargs).run(outdir, progress=progress)
