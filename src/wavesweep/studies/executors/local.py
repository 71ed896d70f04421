"""Local executor: N worker processes on this machine share the cores.

Each worker is a separate process (spawned, so it starts with the thread
settings of :func:`thread_environment`: cores / N threads for FFTs and numba,
one for BLAS) that claims runs from the queue until none is left, the
deadline passes, or it is asked to stop.  SIGINT and SIGTERM, to the parent
or to a worker, mean: let each running run checkpoint at its next sample,
release it back to the queue, and exit cleanly.

A full disk stops a run without counting it as an attempt (it goes back to
the queue with the reason, and resumes from its last checkpoint); its worker
prints one line and claims nothing more, and tells the other workers to
claim nothing more either (their running runs end as they can).

A worker that dies (kill -9, the out-of-memory killer) is seen by this
process: the runs it held go back to the queue at once (the death counts
as an attempt, as for a lapsed lease), and the summary counts the dead
workers.  If this process dies too (a power cut, kill -9 of the whole
process group), the runs stay running until their lease lapses; ``status``
marks them, and the next ``work`` requeues them.
"""
from __future__ import annotations

import multiprocessing as mp
import os
import signal
import socket
import sys
import time
from dataclasses import replace

from ...errors import DiskFull
from ..queue import Queue
from .base import DISK_FULL, Executor, WorkerSettings, claim_next, execute_batch, thread_environment

__all__ = ["LocalExecutor", "EXIT_DISK_FULL"]

# A worker's exit status when the disk was too full even to record its
# runs' ends in the queue (they stay running until their lease lapses).
EXIT_DISK_FULL = 3
# A worker with nothing to claim but runs waiting for their twin in another
# study (Queue.blocked) looks again this often (seconds).
WAIT_SECONDS = 0.5


def _worker_main(root: str, name: str, settings: WorkerSettings, stop, full) -> None:

    def request_stop(signum, frame):
        stop.set()

    signal.signal(signal.SIGTERM, request_stop)
    signal.signal(signal.SIGINT, request_stop)
    try:
        _work_loop(Queue(root), name, settings, stop, full)
    except DiskFull as e:    # even the queue's reserve could not record it
        full.set()
        print(f"wavesweep work: worker {name}: {e.reason}; its runs stay running until their lease "
              "lapses, then the next `work` requeues them", file=sys.stderr, flush=True)
        sys.exit(EXIT_DISK_FULL)
    except Exception as e:   # a bug or a broken queue: one line here, the traceback nowhere else
        print(f"wavesweep work: worker {name} stopped: {type(e).__name__}: {' '.join(str(e).split())}",
              file=sys.stderr, flush=True)
        sys.exit(1)


def _work_loop(queue, name, settings, stop, full) -> None:
    while not (stop.is_set() or full.is_set()):
        if settings.until is not None and time.time() >= settings.until:
            break
        claims = claim_next(queue, name, settings)
        if not claims:
            if queue.blocked():   # twins running elsewhere: their end settles these, or frees them
                queue.requeue_stale(settings.lease_seconds, settings.max_attempts)
                stop.wait(WAIT_SECONDS)
                continue
            break
        states = execute_batch(queue, claims, name, settings, stop.is_set)
        if DISK_FULL in states:
            full.set()
            parked = [c for c, s in zip(claims, states) if s == DISK_FULL]
            reason = (queue.run(parked[0]["study"], parked[0]["run_id"]) or {}).get("reason") or DISK_FULL
            print(f"wavesweep work: worker {name}: {reason}; {len(parked)} run(s) back in the queue "
                  "(no attempt counted); claiming no more", file=sys.stderr, flush=True)


class LocalExecutor(Executor):
    """Drain the queue with ``workers`` processes on this machine."""

    name = "local"

    def __init__(self, root, workers: int = 1, settings: WorkerSettings | None = None,
                 cores: int | None = None):
        super().__init__(root, settings)
        if workers < 1:
            raise ValueError("workers must be at least 1")
        self.workers = workers
        self.cores = cores or os.cpu_count() or 1

    def drain(self) -> dict:

        queue = Queue(self.root)
        stale = queue.requeue_stale(self.settings.lease_seconds, self.settings.max_attempts)
        if self.settings.until is not None and time.time() >= self.settings.until:
            return {"claimed": 0, "stale": stale, "until_passed": True}
        threads = max(1, self.cores // self.workers)
        ctx = mp.get_context("spawn")
        stop = ctx.Event()
        saved = {k: os.environ.get(k) for k in thread_environment(threads)}
        os.environ.update(thread_environment(threads))   # inherited by the spawned workers
        host = socket.gethostname()
        procs = []
        previous = {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM)}

        def request_stop(signum, frame):
            stop.set()
            for p in procs:   # SIGINT from a terminal reaches them too; SIGTERM may not
                if p.is_alive():
                    try:
                        os.kill(p.pid, signal.SIGTERM)
                    except ProcessLookupError:
                        pass

        full = ctx.Event()
        names = {}
        dead = []          # [{"worker", "why", "runs": [...]}] of workers that died
        try:
            for s in previous:
                signal.signal(s, request_stop)
            settings = replace(self.settings, share=self.workers)
            for i in range(self.workers):
                name = f"{host}:{os.getpid()}:{i}"
                p = ctx.Process(target=_worker_main, args=(str(self.root), name, settings, stop, full),
                                name=f"wavesweep-worker-{i}")
                p.start()
                procs.append(p)
                names[p] = name
            pending = list(procs)
            while pending:
                for p in list(pending):
                    p.join(timeout=0.5 / len(pending))
                    if p.is_alive():
                        continue
                    pending.remove(p)
                    if p.exitcode == 0:
                        continue
                    # its runs go back now: the living workers (or the next work) take them
                    died = p.exitcode != EXIT_DISK_FULL
                    why = _death(p.exitcode) if died else "stopped: disk full, and the queue could not record it"
                    try:
                        back = queue.requeue_worker(names[p], why, self.settings.max_attempts,
                                                    count_attempt=died)
                    except DiskFull:     # still no room: their leases lapse, the next work requeues
                        back = {"requeued": 0, "failed": 0, "runs": [], "unrecorded": True}
                    if died:
                        dead.append({"worker": names[p], "why": why, "exitcode": p.exitcode, **back})
        finally:
            for s, h in previous.items():
                signal.signal(s, h)
            for k, v in saved.items():
                if v is None:
                    os.environ.pop(k, None)
                else:
                    os.environ[k] = v
        return {"workers": self.workers, "threads_per_worker": threads, "stale": stale,
                "stopped": stop.is_set(), "exit_codes": [p.exitcode for p in procs],
                "dead_workers": dead, "disk_full_stop": full.is_set()}


def _death(exitcode: int | None) -> str:
    """How a worker process ended, in words ("was killed by SIGKILL")."""
    if exitcode is not None and exitcode < 0:
        try:
            return f"was killed by {signal.Signals(-exitcode).name}"
        except ValueError:
            return f"was killed by signal {-exitcode}"
    return f"exited with status {exitcode}"
