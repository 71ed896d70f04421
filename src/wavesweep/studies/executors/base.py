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
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

from ...batched import BatchedRun, batch_group
from ...errors import DiskFull, JobError, RunFailed, RunInterrupted
from ...io.checkpoint import CheckpointPolicy, ResultExists
from ...io.atomic import atomic_rename
from ...io.diskspace import free_bytes, is_no_space
from ...job import job_from_dict
from ...run import Simulation

__all__ = ["Executor", "WorkerSettings", "execute_claim", "execute_batch", "claim_next",
           "thread_environment", "DISK_FULL"]

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


def _resumed(log_part: Path, step: int, total: int, checkpoint) -> None:
    _log(log_part, f"resumed from the checkpoint {str(checkpoint)!r} at step {step} of {total}")


def _disk_full_of(exc: BaseException, path) -> DiskFull | None:
    """``exc`` as a DiskFull when it is one or an ENOSPC / EDQUOT /
    SQLITE_FULL error that no writer translated (None otherwise)."""
    if isinstance(exc, DiskFull):
        return exc
    if not is_no_space(exc):
        return None
    where = Path(getattr(exc, "filename", None) or path)
    return DiskFull(where, free_bytes(where.parent), what="a file of the run", need="")


def _park(queue, claim, worker, full: DiskFull, log_part, done=None) -> str:
    """A run stopped by a full disk goes back to the queue, first in line,
    its attempt not counted (the disk, not the run, failed), with the
    reason; its last checkpoint is kept."""
    if done is not None:
        done.set()
    _log(log_part, f"stopped: {full.reason}; back to the queue, resuming from its last checkpoint")
    queue.release(claim["study"], claim["run_id"], worker, full.reason)
    return DISK_FULL


def execute_claim(queue, claim: dict, worker: str, settings: WorkerSettings,
                  stop_requested=lambda: False) -> str:
    """Run one claimed run to its end in the queue; returns the new state
    ("done", "failed", "queued", or :data:`DISK_FULL`: queued again, its
    attempt not counted, because the disk is full).  Never raises for a
    run's own failure; a queue that cannot record the end (its disk full
    even after its reserve was freed) raises DiskFull."""

    study, run_id = claim["study"], claim["run_id"]
    result = Path(claim["result"])
    log_part = result.with_name(f"{run_id}.log.part")
    log_final = Path(claim["log"])
    try:
        result.parent.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        full = _disk_full_of(e, result)
        if full is None:
            raise
        return _park(queue, claim, worker, full, log_part)
    _log(log_part, f"attempt {claim['attempt']} on {worker} (pid {os.getpid()})")

    progress = {"step": 0, "total": None, "rate": None}
    lost = threading.Event()
    done = threading.Event()

    def beat():
        while not done.wait(settings.heartbeat_seconds):
            try:
                held = queue.heartbeat(study, run_id, worker, progress["step"], progress["total"],
                                       progress["rate"])
            except Exception:   # a full disk or a busy database: the next beat tries again
                continue
            if not held:
                lost.set()   # requeued or cancelled elsewhere: stop at the next sample
                return

    def on_sample(step, total, rate):
        progress.update(step=step, total=total, rate=rate)

    def should_stop():
        past = settings.until is not None and time.time() >= settings.until
        return stop_requested() or past or lost.is_set()

    beater = threading.Thread(target=beat, name=f"heartbeat-{run_id}", daemon=True)
    beater.start()
    t0 = time.perf_counter()
    try:
        job = job_from_dict(tomllib.loads(claim["job_toml"]))
        if job.run_id != run_id:
            raise JobError("", f"the queued job text hashes to {job.run_id}, not {run_id}")
        sim = Simulation(job)
        sim.run(path=result, progress=False, on_sample=on_sample,
                checkpoint=CheckpointPolicy(Path(claim["checkpoint"]), settings.checkpoint_seconds),
                should_stop=should_stop,
                on_resume=lambda step, total: _resumed(log_part, step, total, claim["checkpoint"]))
    except DiskFull as e:
        return _park(queue, claim, worker, e, log_part, done)
    except RunInterrupted as e:
        done.set()
        if lost.is_set():
            _log(log_part, "stopped: the queue gave this run to another worker or cancelled it")
            return "lost"
        _log(log_part, f"interrupted at step {e.step}; checkpoint kept")
        queue.release(study, run_id, worker, f"interrupted at step {e.step}")
        return "queued"
    except FileExistsError as e:   # ResultExists: another attempt finished it; never overwritten
        done.set()
        if not isinstance(e, ResultExists):
            return _fail(queue, claim, worker, f"{e.strerror or e}", log_part, log_final, done)
        _log(log_part, "the result already exists; kept as it is")
        _finish_log(log_part, log_final)
        queue.complete(study, run_id, worker, time.perf_counter() - t0)
        return "done"
    except (RunFailed, JobError) as e:
        return _fail(queue, claim, worker, str(e) if isinstance(e, JobError) else e.reason,
                     log_part, log_final, done)
    except MemoryError:
        return _fail(queue, claim, worker, "out of memory", log_part, log_final, done)
    except Exception as e:
        full = _disk_full_of(e, result)
        if full is not None:
            return _park(queue, claim, worker, full, log_part, done)
        if isinstance(e, OSError):
            where = f" ({e.filename})" if e.filename else ""
            return _fail(queue, claim, worker, f"{e.strerror or e}{where}", log_part, log_final, done,
                         traceback.format_exc())
        # a bug: the run fails with its cause, the others go on
        return _fail(queue, claim, worker, f"{type(e).__name__}: {e}", log_part, log_final, done,
                     traceback.format_exc())
    done.set()
    wall = time.perf_counter() - t0
    _log(log_part, f"done in {wall:.1f} s")
    _finish_log(log_part, log_final)
    queue.complete(study, run_id, worker, wall)
    return "done"


def _fail(queue, claim, worker, reason, log_part, log_final, done=None, trace=None) -> str:
    if done is not None:
        done.set()
    reason = " ".join(str(reason).split())   # one line
    _log(log_part, f"failed: {reason}")
    if trace:
        with open(log_part, "a") as f:
            f.write(trace)
    _finish_log(log_part, log_final)
    queue.fail(claim["study"], claim["run_id"], worker, reason)
    return "failed"


def claim_next(queue, worker: str, settings: WorkerSettings) -> list[dict]:
    """The next claims of a worker: one run, or a batch of runs that can be
    stepped together (up to ``settings.batch``); empty when none is queued."""
    return queue.claim_batch(worker, max(1, settings.batch), batch_group, share=settings.share,
                             lease_seconds=settings.lease_seconds)


def execute_batch(queue, claims: list[dict], worker: str, settings: WorkerSettings,
                  stop_requested=lambda: False) -> list[str]:
    """Run claimed runs as one batch to their ends in the queue; returns
    their new states.  Each member keeps its own log, checkpoint and
    outcome, and ends in the queue as soon as it ends.  If the jobs cannot
    be batched after all (an error building one of them), the first runs on
    its own and the others go back to the queue (first in line, the attempt
    not counted), so that no claim waits unattended."""

    if len(claims) == 1:
        return [execute_claim(queue, claims[0], worker, settings, stop_requested)]
    n = len(claims)
    parts, finals, results = [], [], []
    try:
        for c in claims:
            Path(c["result"]).parent.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        full = _disk_full_of(e, c["result"])
        if full is None:
            raise
        return [_park(queue, c, worker, full, Path(c["result"]).with_name(f"{c['run_id']}.log.part"))
                for c in claims]
    for c in claims:
        result = Path(c["result"])
        part = result.with_name(f"{c['run_id']}.log.part")
        _log(part, f"attempt {c['attempt']} on {worker} (pid {os.getpid()}), in a batch of {n}")
        parts.append(part)
        finals.append(Path(c["log"]))
        results.append(result)
    progress = [{"step": 0, "total": None, "rate": None} for _ in claims]
    lost = [False] * n
    states: list = [None] * n
    done = threading.Event()

    def beat():   # from before the set-up: building 32 members can take a while
        while not done.wait(settings.heartbeat_seconds):
            for i, c in enumerate(claims):
                if states[i] is not None or lost[i]:
                    continue
                p = progress[i]
                try:
                    held = queue.heartbeat(c["study"], c["run_id"], worker, p["step"], p["total"], p["rate"])
                except Exception:   # a full disk or a busy database: the next beat tries again
                    continue
                if not held:
                    lost[i] = True

    beater = threading.Thread(target=beat, name=f"heartbeat-batch-{claims[0]['run_id']}", daemon=True)
    beater.start()
    t0 = time.perf_counter()

    def finish(i, outcome):
        """End member i in the queue the moment it ends."""
        c = claims[i]
        study, run_id = c["study"], c["run_id"]
        full = _disk_full_of(outcome, results[i]) if isinstance(outcome, BaseException) else None
        if full is not None:
            states[i] = _park(queue, c, worker, full, parts[i])
        elif isinstance(outcome, RunInterrupted):
            if lost[i]:
                _log(parts[i], "stopped: the queue gave this run to another worker or cancelled it")
                states[i] = "lost"
            else:
                _log(parts[i], f"interrupted at step {outcome.step}; checkpoint kept")
                queue.release(study, run_id, worker, f"interrupted at step {outcome.step}")
                states[i] = "queued"
        elif isinstance(outcome, ResultExists) or isinstance(outcome, Path):
            wall = time.perf_counter() - t0
            _log(parts[i], "the result already exists; kept as it is" if isinstance(outcome, ResultExists)
                 else f"done in {wall:.1f} s (batch of {n}; the batch's wall time)")
            _finish_log(parts[i], finals[i])
            queue.complete(study, run_id, worker, wall)
            states[i] = "done"
        else:
            states[i] = _fail(queue, c, worker, _reason(outcome), parts[i], finals[i], None,
                              None if isinstance(outcome, (RunFailed, JobError)) else
                              "".join(traceback.format_exception(outcome)))

    try:
        try:
            jobs = [job_from_dict(tomllib.loads(c["job_toml"])) for c in claims]
            if any(j.run_id != c["run_id"] for j, c in zip(jobs, claims)):
                raise JobError("", "a queued job text does not hash to its run id")
            batch = BatchedRun(jobs)
        except Exception:
            done.set()
            for i in range(1, n):
                _log(parts[i], "not batched after all: back to the queue")
                queue.release(claims[i]["study"], claims[i]["run_id"], worker, "not batched after all")
            return [execute_claim(queue, claims[0], worker, settings, stop_requested)] + ["queued"] * (n - 1)

        def on_sample(i, step, total, rate):
            progress[i].update(step=step, total=total, rate=rate)

        def should_stop(i):
            past = settings.until is not None and time.time() >= settings.until
            return stop_requested() or past or lost[i]

        def on_resume(i, step, total):
            _resumed(parts[i], step, total, claims[i]["checkpoint"])

        batch.run(results, on_sample=on_sample, should_stop=should_stop, on_end=finish,
                  checkpoints=[CheckpointPolicy(Path(c["checkpoint"]), settings.checkpoint_seconds)
                               for c in claims], on_resume=on_resume)
    finally:
        done.set()   # an interrupt: the leases run out and the runs are requeued
    return states


def _reason(outcome) -> str:
    """The one-line reason of a member's failure (as execute_claim words it)."""
    if isinstance(outcome, RunFailed):
        return outcome.reason
    if isinstance(outcome, JobError):
        return str(outcome)
    if isinstance(outcome, MemoryError):
        return "out of memory"
    if isinstance(outcome, OSError):
        return f"{outcome.strerror or outcome}" + (f" ({outcome.filename})" if outcome.filename else "")
    return f"{type(outcome).__name__}: {outcome}"
