"""Runs that differ only in their initial state, stepped together.

The runs of an energy or position sweep share grid, potential, time step
and recording; only the packet differs (and, when the CAP is tuned to each
packet's energies, the absorber's strength).  :class:`BatchedRun` stacks
their states along a leading member axis and advances them with one
propagator (the transform runs along the grid axes only, the kicks and
observables are one pass over all members), while every member keeps its
own books: its own result file, checkpoints, health checks and outcome.
A member's file is the one a solo run of its job writes (to rounding).

Runs on coupled surfaces ([[surface]]) batch the same way when their jobs
differ only in [packet] (its ``surface`` included): psi of shape
(members, surfaces, *grid) under one
:class:`~wavesweep.surfaces.CoupledSplitOperator` with ``members``, whose
kinetic step is one transform of all members' surfaces and whose kicks are
one kernel call over all members; each member is measured by its own
set-up (:meth:`~wavesweep.setup.CoupledSetup.measure`).  As on one
surface, the CAP's strength and exponent are left out of the key, so the
runs of a packet sweep with a CAP tuned to each packet's energies batch
too: the absorber (-i W times the identity on the surfaces) commutes with
the potential matrix, so the kicks' matrices are shared and each member's
own decay exp(-W_m tau) multiplies its rows on the layers' slabs, booked
per member, surface and face as its solo run books them.

Batching pays on small grids, where the per-step Python and per-call
overheads of a solo run cost more than its transforms, and where one run
is too small to use more than one core (threads start paying from
``THREADED_MIN_ELEMENTS`` elements, counted over all members).
"""
from __future__ import annotations

import copy
import hashlib
import json
import tomllib
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np

from .errors import RunFailed, RunInterrupted
from .fft import THREADS_MIN_POINTS, default_threads
from .io.checkpoint import ResultExists
from .observables import Observer
from .propagators import scheme_class
from .run import Simulation, norm_keeping_of, take_up_norm_keeping, progress_bar
from .setup import blas_on_one_thread, set_kernel_threads

__all__ = ["BatchedRun", "batch_key", "batch_group", "members_for", "BATCH_MAX_ELEMENTS", "BATCH_MAX_MEMBERS"]

# A batch holds at most this many complex numbers over all members (32 MiB
# of psi in double precision) and at most this many members: beyond, one
# run already keeps the cores busy and a batch only costs memory.
BATCH_MAX_ELEMENTS = 1 << 21
BATCH_MAX_MEMBERS = 64


def batch_key(table: dict) -> str | None:
    """Jobs (resolved tables) with the same key can be stepped as one batch:
    everything but the packet, the title, and the CAP's strength and
    exponent must agree (one surface or coupled ones: see the module
    notes).  None for jobs that are never batched: a scheme that
    cannot step a batch (on coupled surfaces: any but a split-operator
    scheme), a falling grid, or a grid too large for two members."""
    try:
        scheme = scheme_class(table["evolve"]["scheme"])
    except Exception:
        return None
    if not getattr(scheme, "batched", False):
        return None
    coupled = bool(table.get("surface"))
    if coupled and getattr(scheme, "weights", None) is None:
        return None   # coupled surfaces step a batch with the coupled split-operator only
    if table.get("grid", {}).get("frame", "lab") != "lab":
        return None   # a falling grid follows its own packet: every member would need its own frame
    points = _state_elements(table)
    if 2 * points > BATCH_MAX_ELEMENTS:
        return None
    rest = copy.deepcopy({k: v for k, v in table.items() if k not in ("packet", "title")})
    absorber = rest.get("absorber")
    if isinstance(absorber, dict):
        absorber.pop("strength", None)
        absorber.pop("power", None)
    text = json.dumps(rest, sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:20]


def batch_group(job_toml: str) -> tuple[str, int] | None:
    """(batch key, most members) of a queued job's text, or None (for
    :meth:`wavesweep.studies.queue.Queue.claim_batch`)."""
    try:
        table = tomllib.loads(job_toml)
    except (tomllib.TOMLDecodeError, TypeError):
        return None
    key = batch_key(table)
    if key is None:
        return None
    return key, members_for(_state_elements(table))


def _state_elements(table: dict) -> int:
    """Complex numbers of one run's state: grid points, times the surfaces of a coupled job."""
    points = 1
    for name in ("x", "y", "z", "r"):
        axis = table.get("grid", {}).get(name)
        if isinstance(axis, dict):
            points *= int(axis.get("points", 0))
    return points * max(1, len(table.get("surface") or ()))


def members_for(grid_points: int, limit: int = BATCH_MAX_MEMBERS) -> int:
    """How many members of a grid of ``grid_points`` fit one batch."""
    return max(1, min(limit, BATCH_MAX_MEMBERS, BATCH_MAX_ELEMENTS // max(grid_points, 1)))


class BatchedRun:
    """Several jobs of one :func:`batch_key`, run as one batch.

    >>> outcomes = BatchedRun(jobs).run(paths)          # doctest: +SKIP

    ``run`` returns one outcome per job, in order: the result's path, or
    the exception that ended that member (:class:`RunFailed`,
    :class:`RunInterrupted` with its checkpoint, :class:`ResultExists`);
    one member's end never stops the others."""

    def __init__(self, jobs, fft: str | None = None, threads: int | None = None):
        jobs = list(jobs)
        if not jobs:
            raise ValueError("a batch needs at least one job")
        keys = {batch_key(j.table) for j in jobs}
        if None in keys or len(keys) != 1:
            raise ValueError("these jobs cannot share a batch: they differ in more than their packets "
                             "(or their scheme cannot step a batch)")
        self.jobs = jobs
        self.sims = [Simulation(j, fft, threads) for j in jobs]
        self.fft, self.threads = fft, threads

    @blas_on_one_thread
    def run(self, paths, progress: bool = False, on_sample=None, checkpoints=None, should_stop=None,
            on_end=None, on_resume=None) -> list:
        """Propagate every member and write its result to ``paths[i]``.

        ``checkpoints`` (one :class:`~wavesweep.io.checkpoint.CheckpointPolicy`
        or None per member) make members crash-safe as in
        :meth:`Simulation.run`; members resuming from different steps are
        stepped in groups, one group after the other.  ``on_sample(i, step,
        total, rate)`` follows every sample of member ``i``;
        ``should_stop(i)`` is asked after every sample before the last, and
        True ends that member with a checkpoint (:class:`RunInterrupted`);
        ``on_end(i, outcome)`` is called as soon as member ``i`` ends;
        ``on_resume(i, step, total)`` when member ``i`` continues from a
        checkpoint, before its first step.

        An error that is not a member's own (a full disk, memory, a bug)
        ends the members of the group it struck, with that exception as
        their outcome; members already finished keep their results and
        other groups still run.  Only an interrupt (KeyboardInterrupt)
        propagates, after every unfinished member's partial file is gone."""
        n = len(self.sims)
        paths = [Path(p) for p in paths]
        checkpoints = list(checkpoints) if checkpoints is not None else [None] * n
        if len(paths) != n or len(checkpoints) != n:
            raise ValueError(f"{n} jobs need {n} paths and {n} checkpoint policies")
        outcomes: list = [None] * n
        books = {}

        def end(i, outcome):
            outcomes[i] = outcome
            if on_end is not None:
                on_end(i, outcome)

        self._prepare_members()
        try:
            for i, (sim, path, policy) in enumerate(zip(self.sims, paths, checkpoints)):
                try:
                    book = sim.begin(path, policy)
                except Exception as e:   # this member's folder, checkpoint, ...: its own outcome
                    end(i, e)
                    continue
                if book is None:
                    end(i, ResultExists(path))
                else:
                    books[i] = book
                    if not book.fresh and on_resume is not None:
                        on_resume(i, int(book.steps), int(sim.setup.total_steps))
            groups: dict[int, list[int]] = {}
            for i, book in books.items():
                groups.setdefault(int(book.steps), []).append(i)
            for steps in sorted(groups):
                members = groups[steps]
                try:
                    self._run_group(members, books, outcomes, progress, on_sample, should_stop, end)
                except Exception as e:
                    for i in members:
                        if outcomes[i] is None:
                            self.sims[i].abort(books[i], e)
                            end(i, e)
        except BaseException as e:
            for i, book in books.items():
                if outcomes[i] is None:
                    self.sims[i].abort(book, e)
            raise
        return outcomes

    def _prepare_members(self) -> None:
        """The members' analysis records (:meth:`Simulation.prepare`) made in
        threads, one per core: numerics that release the GIL in large part
        (the classical trajectories' kernel, FFTs), ~40 ms a member of a
        sharp-barrier sweep, which the files' serial set-up (HDF5 is not
        thread-safe) then finds made.  A member whose record fails is left
        to begin(), which says why as its own outcome."""
        cores = self.sims[0].setup.threads or default_threads()
        if len(self.sims) < 2 or cores < 2:
            return

        def prepare(sim):
            try:
                sim.prepare()
            except Exception:   # noqa: BLE001 -- begin() makes it again and ends this member with the reason
                pass
        with ThreadPoolExecutor(min(cores, len(self.sims))) as pool:
            list(pool.map(prepare, self.sims))

    def lane_count(self, members: int) -> int:
        """Lanes for a group of ``members``: one per core (``evolve.threads``
        or ``WAVESWEEP_THREADS`` or all cores) when one member's grid is too
        small for threaded transforms, else one."""
        s0 = self.sims[0].setup
        cores = s0.threads or default_threads()
        if s0.grid.radial:   # the dense radial step is a threaded kernel of its own
            return 1
        return max(1, min(members, cores)) if s0.grid.size < THREADS_MIN_POINTS else 1

    def _lanes(self, sims, group_books):
        """The group split into lanes, one per core when one member's
        transform is too small for threads: each lane is a batch of its
        own (propagator, observer, psi), stepped in a thread of its own
        (the transforms and kernels release the GIL)."""
        s0 = sims[0].setup
        nb = len(sims)
        n_lanes = self.lane_count(nb)
        bounds = np.linspace(0, nb, n_lanes + 1).round().astype(int)
        lanes = []
        for lo, hi in zip(bounds[:-1], bounds[1:]):
            if hi > lo:
                lanes.append((_CoupledLane if sims[0].coupled else _Lane)(list(range(lo, hi)), [sims[k] for k in range(lo, hi)],
                                   [group_books[k] for k in range(lo, hi)],
                                   threads=1 if n_lanes > 1 else s0.threads))
        return lanes

    def _run_group(self, members, books, outcomes, progress, on_sample, should_stop, on_end):
        sims = [self.sims[i] for i in members]
        s0 = sims[0].setup
        nb = len(members)
        group_books = [books[i] for i in members]
        lanes = self._lanes(sims, group_books)
        where = {k: (lane, j) for lane in lanes for j, k in enumerate(lane.positions)}
        active = set(range(nb))
        done = start = int(group_books[0].steps)
        total = s0.total_steps
        t_now = lanes[0].prop.t
        bar = progress_bar(total, progress, f"batch of {nb}")
        pool = ThreadPoolExecutor(len(lanes)) if len(lanes) > 1 else None

        def each(fn):
            return list(pool.map(fn, lanes)) if pool is not None else [fn(lane) for lane in lanes]

        def end(k, outcome):
            active.discard(k)
            on_end(members[k], outcome)

        def record():
            for lane, values in zip(lanes, each(lambda lane: lane.measure())):
                for j, k in enumerate(lane.positions):
                    if k not in active:
                        continue
                    psi_k, absorbed_k = lane.psi[j], lane.prop.absorbed[j]
                    try:
                        if done == start and group_books[k].fresh:
                            sims[k].observe(group_books[k], values[j], t_now, absorbed_k)
                            sims[k].write_snapshot(group_books[k].writer, 0.0, psi_k)
                        else:
                            sims[k].record_sample(group_books[k], values[j], t_now, absorbed_k, psi_k, done)
                    except RunFailed as e:
                        sims[k].abort(group_books[k], e)
                        end(k, e)

        try:
            if group_books[0].fresh:
                record()
            while done < total and active:
                step = min(s0.sample_steps, total - done)
                each(lambda lane: lane.step(step))
                done += step
                t_now = lanes[0].prop.t
                record()
                if bar is not None:
                    bar.update(step)
                for k in sorted(active):
                    if on_sample is not None:
                        on_sample(members[k], done, total, group_books[k].rate(done - start))
                if done >= total:
                    break
                for k in sorted(active):
                    book = group_books[k]
                    lane, j = where[k]
                    if should_stop is not None and should_stop(members[k]):
                        saved = sims[k].save_checkpoint(book, done, lane.prop.absorbed[j], lane.psi[j],
                                                    reopen=False, norm_keeping=norm_keeping_of(lane.prop, j)) \
                            if book.store is not None else None
                        stopped = RunInterrupted(saved, done)
                        sims[k].abort(book, stopped)   # the partial file goes; the checkpoint stays
                        end(k, stopped)
                    elif book.checkpoint_due():
                        sims[k].save_checkpoint(book, done, lane.prop.absorbed[j], lane.psi[j],
                                                norm_keeping=norm_keeping_of(lane.prop, j))
            for k in sorted(active):
                lane, j = where[k]
                try:
                    end(k, sims[k].finish(group_books[k], lane.psi[j], int(lane.prop.steps_done)))
                except (ResultExists, RunFailed) as e:   # a full disk is this member's end, not the group's
                    sims[k].abort(group_books[k], e)
                    end(k, e)
        finally:
            if pool is not None:
                pool.shutdown()
            if bar is not None:
                bar.close()


class _Lane:
    """Members of a batch stepped by one propagator and measured by one
    observer (positions: their places in the group)."""

    def __init__(self, positions, sims, books, threads=None):
        s0 = sims[0].setup
        nb = len(sims)
        self.positions = positions
        transform = s0.propagator_transform(members=nb, threads=threads)
        set_kernel_threads(transform.threads)
        self.prop = s0.scheme(s0.hamiltonian, s0.dt, transform, [s.setup.absorber for s in sims], s0.dtype,
                              members=nb)
        self.observer = Observer(s0.grid, s0.mass, s0.observer_transform(members=nb, threads=transform.threads),
                                 s0.detectors, np.stack([s.setup.psi0 for s in sims]), members=nb,
                                 contact=s0.contact if s0.interaction is not None else None,
                                 stride=int(s0.job.table["record"]["stride"]))
        self.psi = self.prop.load(np.stack([b.psi for b in books]))
        for b in books:
            b.psi = None
        self.prop.steps_done = books[0].steps
        self.prop.absorbed[:] = np.stack([b.absorbed for b in books])
        take_up_norm_keeping(self.prop, [b.norm_keeping for b in books])
        self.potential = s0.hamiltonian.potential

    def step(self, n: int) -> None:
        self.psi = self.prop.step(self.psi, n)

    def measure(self) -> list[dict]:
        return self.observer.measure_members(self.psi, self.potential(self.prop.t))


class _CoupledLane:
    """Members of a batch on coupled surfaces: psi (members, surfaces,
    *grid) stepped by one :class:`~wavesweep.surfaces.CoupledSplitOperator`
    with ``members`` and each member's own absorber (their CAP strengths
    may differ); each member measured by its own set-up and observer, as
    its solo run measures it."""

    def __init__(self, positions, sims, books, threads=None):
        s0 = sims[0].setup
        nb = len(sims)
        self.positions = positions
        self.prop = s0.make_propagator(members=nb, threads=threads, absorbers=[s.setup.absorber for s in sims])
        set_kernel_threads(self.prop.transform.threads)
        self.setups = [s.setup for s in sims]
        self.observers = [s.setup.make_observer() for s in sims]
        self.psi = self.prop.load(np.stack([b.psi for b in books]))
        for b in books:
            b.psi = None
        self.prop.steps_done = books[0].steps
        self.prop.absorbed[:] = np.stack([b.absorbed for b in books])

    def step(self, n: int) -> None:
        self.psi = self.prop.step(self.psi, n)

    def measure(self) -> list[dict]:
        t = self.prop.t
        return [setup.measure(observer, self.psi[j], t)
                for j, (setup, observer) in enumerate(zip(self.setups, self.observers))]
