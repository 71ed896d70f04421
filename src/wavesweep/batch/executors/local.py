"""Local executor: N worker processes on this machine share the cores.

Each worker is a separate process (spawned, so it starts with the thread
settings of :func:`thread_environment`: cores / N threads for FFTs and numba,
one for BLAS) that claims runs from the queue until none is left, the
deadline passes, or it is asked to stop.  SIGINT and SIGTERM, to the parent
or to a worker, mean: let each running run checkpoint at its next sample,
release it back to the queue, and exit cleanly.  A worker that dies (kill
-9, power cut) stops heart-beating; its run is requeued by the next
``work`` after the lease has expired.
"""
from __future__ import annotations

import multiprocessing as mp
import os
import signal
import socket
import time
from dataclasses import replace

from .base import Executor, WorkerSettings, claim_next, execute_batch, thread_environment

__all__ = ["LocalExecutor"]


def _worker_main(root: str, name: str, settings: WorkerSettings, stop) -> None:
    from ..queue import Queue

    def request_stop(signum, frame):
        stop.set()

    signal.signal(signal.SIGTERM, request_stop)
    signal.signal(signal.SIGINT, request_stop)
    queue = Queue(root)
    while not stop.is_set():
        if settings.until is not None and time.time() >= settings.until:
            break
        claims = claim_next(queue, name, settings)
        if not claims:
            break
        execute_batch(queue, claims, name, settings, stop.is_set)


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
        from ..queue import Queue

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

        try:
            for s in previous:
                signal.signal(s, request_stop)
            settings = replace(self.settings, share=self.workers)
            for i in range(self.workers):
                name = f"{host}:{os.getpid()}:{i}"
                p = ctx.Process(target=_worker_main, args=(str(self.root), name, settings, stop),
                                name=f"wavesweep-worker-{i}")
                p.start()
                procs.append(p)
            for p in procs:
                while p.is_alive():
                    p.join(timeout=0.5)
        finally:
            for s, h in previous.items():
                signal.signal(s, h)
            for k, v in saved.items():
                if v is None:
                    os.environ.pop(k, None)
                else:
                    os.environ[k] = v
        return {"workers": self.workers, "threads_per_worker": threads, "stale": stale,
                "stopped": stop.is_set(), "exit_codes": [p.exitcode for p in procs]}
