"""What every executor shares: running one claimed run of the queue.

An executor drains the queue (:class:`wavesweep.studies.queue.Queue`) with some
pool of workers.  Whatever the pool, one claimed run is executed by
:func:`execute_claim`: it rebuilds the resolved job from the queue, runs it
with checkpoints, reports progress through heartbeats, and ends the run in
the queue as done, failed (with a one-line reason and the log), or released
back to queued when it was asked to stop.

Runs of one study that differ only in their packet are claimed together
(:func:`claim_next`) and stepped as one batch by :func:`execute_batch`
(:mod:`wavesweep.batched`); each still ends on its own in the queue.

However a run was executed (alone, in a batch, or as a Dask task against a
stand-in queue), its end is settled by one method, :meth:`ClaimedRun.settle`:
the rules of what is done, failed, requeued with which reason, and what
counts as an attempt live there and nowhere else.

To add an executor: subclass :class:`Executor`, implement ``drain()``, and
make each worker call :func:`claim_next` and :func:`execute_batch` (or
:func:`execute_claim` for one run) for what it claims.
"""
from __future__ import annotations

import os
import threading
import time
import tomllib
import traceback
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

from ...errors import DiskFull, JobError, RunFailed, RunInterrupted
from ...io.atomic import atomic_rename
from ...io.diskspace import free_bytes, is_no_space
from ..layout import StudyLayout

# The run's modules (job, run, batched: numpy, scipy, netCDF, numba) are
# imported where a run is claimed or built, not here: the process that only
# starts the workers (``work``'s parent) never needs them, and 0.3 s of its
# imports came before any worker was started.

__all__ = ["Executor", "WorkerSettings", "ClaimedRun", "execute_claim", "execute_batch", "claim_next",
           "failure_reason", "thread_environment", "DISK_FULL"]

# The state execute_claim / execute_batch return for a run stopped by a full
# disk: it is back in the queue (queued, its attempt not counted, the reason
# recorded) and the worker should claim nothing more.
DISK_FULL = "disk full"


@dataclass(frozen=True)
class WorkerSettings:
    """How workers behave (seconds of wall time)."""

    lease_seconds: float = 60.0        # a heartbeat older than this means the worker died
    heartbeat_seconds: float = 5.0
    checkpoint_seconds: float = 300.0
    max_attempts: int = 3
    until: float | None = None         # epoch seconds: claim nothing new after this
    batch: int = 32                    # most runs stepped together (1: never batch)
    share: int = 1                     # workers sharing the queue (a batch takes 1/share of a group)


class Executor:
    """Base class: ``drain()`` works the queue until it is empty, the
    deadline passes, or a stop is requested; returns a summary dict."""

    name = "base"

    def __init__(self, root, settings: WorkerSettings | None = None):
        self.root = Path(root)
        self.settings = settings or WorkerSettings()

    def drain(self) -> dict:
        raise NotImplementedError


def thread_environment(threads: int) -> dict:
    """Environment for a worker process that may use ``threads`` cores: FFT
    and numba threads follow it; BLAS stays single-threaded (numerics notes)."""
    return {
        "WAVESWEEP_THREADS": str(threads),
        "NUMBA_NUM_THREADS": str(threads),
        "OMP_NUM_THREADS": "1",
        "OPENBLAS_NUM_THREADS": "1",
        "MKL_NUM_THREADS": "1",
    }


def _log(path: Path, text: str) -> None:
    """Append a line to a run's log; best effort: a log that cannot be
    written (a full disk) never stops the run's end from being recorded
    in the queue, which holds the reason too."""
    try:
        with open(path, "a") as f:
            f.write(f"{datetime.now().isoformat(timespec='seconds')} {text}\n")
    except OSError:
        pass


def _finish_log(part: Path, final: Path) -> None:
    """The log of a finished (done or failed) run appears whole, by rename."""
    try:
        atomic_rename(part, final)
    except OSError:   # missing, or a full disk: the .part stays as it is
        pass


def _disk_full_of(exc: BaseException, path) -> DiskFull | None:
    """``exc`` as a DiskFull when it is one or an ENOSPC / EDQUOT /
    SQLITE_FULL error that no writer translated (None otherwise)."""
    if isinstance(exc, DiskFull):
        return exc
    if not is_no_space(exc):
        return None
    where = Path(getattr(exc, "filename", None) or path)
    return DiskFull(where, free_bytes(where.parent), what="a file of the run", need="")


def failure_reason(outcome: BaseException) -> str:
    """The one-line reason a run failed with ``outcome``, as the queue records it."""
    if isinstance(outcome, RunFailed):
        return outcome.reason
    if isinstance(outcome, JobError):
        return str(outcome)
    if isinstance(outcome, MemoryError):
        return "out of memory"
    if isinstance(outcome, OSError):
        return f"{outcome.strerror or outcome}" + (f" ({outcome.filename})" if outcome.filename else "")
    return f"{type(outcome).__name__}: {outcome}"


_reason = failure_reason   # the name the Dask driver imports


class ClaimedRun:
    """One run a worker has claimed, from the claim to its end in the queue:
    its log (``RUN_ID.log.part`` while it goes on), its progress for the
    heartbeats, and :meth:`settle`, the one place where the way a run ended
    becomes its new state in the queue -- for solo runs
    (:func:`execute_claim`), members of a batch (:func:`execute_batch`) and
    Dask tasks (which run :func:`execute_claim` against a stand-in queue).

    The rules :meth:`settle` applies:

    ==========================================  =====================================================
    how the run ended                           in the queue
    ==========================================  =====================================================
    finished (None, or its result's Path)       done, with its wall time; the log renamed whole
    ResultExists (another attempt finished it)  done; the finished result is kept, never overwritten
    a full disk (DiskFull, or ENOSPC / EDQUOT   released, first in line, its attempt not counted,
    / SQLITE_FULL anywhere in the chain)        the DiskFull reason recorded; state DISK_FULL: the
                                                worker claims nothing more; checkpoint kept
    RunInterrupted (asked to stop, --until)     released ("interrupted at step N"), attempt not
                                                counted; checkpoint kept
    RunInterrupted after the queue gave the     nothing recorded ("lost": the queue has moved on)
    run away (requeued or cancelled elsewhere)
    RunFailed, JobError, MemoryError            failed with its one-line reason; the log renamed
    any other exception (an OSError, a bug)     failed with its reason and the traceback in the log
    ==========================================  =====================================================

    A claim counts as an attempt in the queue (``attempts``) unless it is
    released; :meth:`release` is also how a claim goes back unrun.
    """

    def __init__(self, queue, claim: dict, worker: str):
        self.queue, self.claim, self.worker = queue, claim, worker
        self.study, self.run_id = claim["study"], claim["run_id"]
        self.result = Path(claim["result"])
        self.log_final = Path(claim["log"])
        self.log_part = StudyLayout.log_in_progress(self.log_final)
        self.progress = {"step": 0, "total": None, "rate": None}
        self.lost = False      # the queue gave the run to another worker, or cancelled it
        self.state = None      # its state in the queue once settled

    def log(self, text: str) -> None:
        _log(self.log_part, text)

    def checkpoint_policy(self, settings: WorkerSettings):
        from ...io.checkpoint import CheckpointPolicy   # lazy: a run's module (see the imports)
        return CheckpointPolicy(Path(self.claim["checkpoint"]), settings.checkpoint_seconds)

    def on_sample(self, step, total, rate) -> None:
        self.progress.update(step=step, total=total, rate=rate)

    def on_resume(self, step, total) -> None:
        self.log(f"resumed from the checkpoint {str(self.claim['checkpoint'])!r} at step {step} of {total}")

    def should_stop(self, settings: WorkerSettings, stop_requested) -> bool:
        past = settings.until is not None and time.time() >= settings.until
        return stop_requested() or past or self.lost

    def beat(self) -> None:
        """One heartbeat with the run's progress; a run the queue no longer
        gives this worker is marked lost (it stops at its next sample)."""
        p = self.progress
        try:
            held = self.queue.heartbeat(self.study, self.run_id, self.worker, p["step"], p["total"], p["rate"])
        except Exception:   # a full disk or a busy database: the next beat tries again
            return
        if not held:
            self.lost = True

    # -- the end -------------------------------------------------------------
    def settle(self, outcome, wall_seconds: float, batch_of: int = 1) -> str:
        """End the run in the queue by the rules above; returns its new
        state ("done", "failed", "queued", "lost" or :data:`DISK_FULL`)."""
        full = _disk_full_of(outcome, self.result) if isinstance(outcome, BaseException) else None
        if full is not None:
            return self.park(full)
        if isinstance(outcome, RunInterrupted):
            if self.lost:
                self.log("stopped: the queue gave this run to another worker or cancelled it")
                return self._ended("lost")
            self.log(f"interrupted at step {outcome.step}; checkpoint kept")
            return self.release(f"interrupted at step {outcome.step}")
        from ...io.checkpoint import ResultExists   # lazy: a run's module (see the imports)
        if outcome is None or isinstance(outcome, (Path, ResultExists)):
            if isinstance(outcome, ResultExists):
                self.log("the result already exists; kept as it is")
            elif batch_of > 1:
                self.log(f"done in {wall_seconds:.1f} s (batch of {batch_of}; the batch's wall time)")
            else:
                self.log(f"done in {wall_seconds:.1f} s")
            _finish_log(self.log_part, self.log_final)
            self.queue.complete(self.study, self.run_id, self.worker, wall_seconds)
            return self._ended("done")
        trace = None if isinstance(outcome, (RunFailed, JobError, MemoryError)) else \
            "".join(traceback.format_exception(outcome))
        return self.fail(failure_reason(outcome), trace)

    def park(self, full: DiskFull) -> str:
        """Stopped by a full disk: back to the queue, first in line, its
        attempt not counted (the disk, not the run, failed), with the
        reason; its last checkpoint is kept."""
        self.log(f"stopped: {full.reason}; back to the queue, resuming from its last checkpoint")
        self.queue.release(self.study, self.run_id, self.worker, full.reason)
        return self._ended(DISK_FULL)

    def release(self, reason: str) -> str:
        """Back to the queue (queued, first in line, the attempt not counted)."""
        self.queue.release(self.study, self.run_id, self.worker, reason)
        return self._ended("queued")

    def fail(self, reason: str, trace: str | None = None) -> str:
        reason = " ".join(str(reason).split())   # one line
        self.log(f"failed: {reason}")
        if trace:
            try:
                with open(self.log_part, "a") as f:
                    f.write(trace)
            except OSError:   # as _log: the queue holds the reason
                pass
        _finish_log(self.log_part, self.log_final)
        self.queue.fail(self.study, self.run_id, self.worker, reason)
        return self._ended("failed")

    def _ended(self, state: str) -> str:
        self.state = state
        return state


def _make_folders(runs: list[ClaimedRun]) -> list[str] | None:
    """Make the runs' study folders; None when done, else (a full disk)
    the runs parked (:meth:`ClaimedRun.park`); other errors propagate."""
    for run in runs:
        try:
            run.result.parent.mkdir(parents=True, exist_ok=True)
        except OSError as e:
            full = _disk_full_of(e, run.result)
            if full is None:
                raise
            return [r.park(full) for r in runs]
    return None


@contextmanager
def _heartbeats(runs: list[ClaimedRun], settings: WorkerSettings, name: str):
    """Heartbeats for the runs not yet settled nor lost, from a thread,
    for as long as the block runs."""
    done = threading.Event()

    def beat():
        while not done.wait(settings.heartbeat_seconds):
            for run in runs:
                if run.state is None and not run.lost:
                    run.beat()

    threading.Thread(target=beat, name=name, daemon=True).start()
    try:
        yield
    finally:
        done.set()   # an interrupt: the leases run out and the runs are requeued


def _queued_job(claim: dict):
    """The resolved job of a claim, checked against its run id."""
    from ...job import job_from_dict   # lazy: a run's module (see the imports)
    job = job_from_dict(tomllib.loads(claim["job_toml"]))
    if job.run_id != claim["run_id"]:
        raise JobError("", f"the queued job text hashes to {job.run_id}, not {claim['run_id']}")
    return job


def execute_claim(queue, claim: dict, worker: str, settings: WorkerSettings,
                  stop_requested=lambda: False) -> str:
    """Run one claimed run to its end in the queue; returns the new state
    ("done", "failed", "queued", "lost", or :data:`DISK_FULL`: queued again,
    its attempt not counted, because the disk is full).  Never raises for a
    run's own failure; a queue that cannot record the end (its disk full
    even after its reserve was freed) raises DiskFull."""
    from ...run import Simulation   # lazy: a run's module (see the imports)
    run = ClaimedRun(queue, claim, worker)
    parked = _make_folders([run])
    if parked is not None:
        return parked[0]
    run.log(f"attempt {claim['attempt']} on {worker} (pid {os.getpid()})")
    t0 = time.perf_counter()
    outcome = None
    with _heartbeats([run], settings, f"heartbeat-{run.run_id}"):
        try:
            Simulation(_queued_job(claim)).run(
                path=run.result, progress=False, on_sample=run.on_sample,
                checkpoint=run.checkpoint_policy(settings),
                should_stop=lambda: run.should_stop(settings, stop_requested), on_resume=run.on_resume)
        except Exception as e:   # the run's end, whatever it is, is settled below
            outcome = e
    return run.settle(outcome, time.perf_counter() - t0)


def claim_next(queue, worker: str, settings: WorkerSettings) -> list[dict]:
    """The next claims of a worker: one run, or a batch of runs that can be
    stepped together (up to ``settings.batch``); empty when none is queued."""
    from ...batched import batch_group   # lazy: a run's module (see the imports)
    return queue.claim_batch(worker, max(1, settings.batch), batch_group, share=settings.share,
                             lease_seconds=settings.lease_seconds)


def execute_batch(queue, claims: list[dict], worker: str, settings: WorkerSettings,
                  stop_requested=lambda: False) -> list[str]:
    """Run claimed runs as one batch to their ends in the queue; returns
    their new states.  Each member keeps its own log, checkpoint and
    outcome, and ends in the queue as soon as it ends
    (:meth:`ClaimedRun.settle`).  If the jobs cannot be batched after all
    (an error building one of them), the first runs on its own and the
    others go back to the queue (first in line, the attempt not counted),
    so that no claim waits unattended."""

    if len(claims) == 1:
        return [execute_claim(queue, claims[0], worker, settings, stop_requested)]
    from ...batched import BatchedRun   # lazy: a run's module (see the imports)
    n = len(claims)
    runs = [ClaimedRun(queue, c, worker) for c in claims]
    parked = _make_folders(runs)
    if parked is not None:
        return parked
    for run in runs:
        run.log(f"attempt {run.claim['attempt']} on {worker} (pid {os.getpid()}), in a batch of {n}")
    t0 = time.perf_counter()
    # heart-beating from before the set-up: building 32 members can take a while
    with _heartbeats(runs, settings, f"heartbeat-batch-{claims[0]['run_id']}"):
        try:
            batch = BatchedRun([_queued_job(c) for c in claims])
        except Exception:
            batch = None
        if batch is not None:
            batch.run([run.result for run in runs],
                      on_sample=lambda i, step, total, rate: runs[i].on_sample(step, total, rate),
                      should_stop=lambda i: runs[i].should_stop(settings, stop_requested),
                      on_end=lambda i, outcome: runs[i].settle(outcome, time.perf_counter() - t0, batch_of=n),
                      checkpoints=[run.checkpoint_policy(settings) for run in runs],
                      on_resume=lambda i, step, total: runs[i].on_resume(step, total))
    if batch is None:
        for run in runs[1:]:
            run.log("not batched after all: back to the queue")
            run.release("not batched after all")
        return [execute_claim(queue, claims[0], worker, settings, stop_requested)] + ["queued"] * (n - 1)
    return [run.state for run in runs]
