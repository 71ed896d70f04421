"""Dask executor: the queue drains on a ``dask.distributed`` cluster.

The SQLite queue stays on the submitting machine and is the single source
of truth: this process (the driver) claims runs, submits each as a task,
keeps its lease alive with heartbeats, and settles it in the queue when its
task ends.  A task runs :func:`~.base.execute_claim` on a Dask worker
against a stand-in for the queue (:class:`_TaskBooks`): the result,
checkpoints and log are written to ROOT by the worker (a shared filesystem
on a real cluster) by write-then-rename, progress comes back through a
distributed Queue, and the run's end (done, failed with its reason,
interrupted) is the task's return value.

A worker process that dies mid-run makes the scheduler run the task again
elsewhere; the run resumes from its last checkpoint.  Ctrl-C, SIGTERM and
``--until`` set a distributed Event that running tasks poll at their
samples: they checkpoint and come back interrupted, and the driver puts
them back in the queue.  Each task uses one thread (a worker's threads are
its task slots), so tasks never oversubscribe a worker's cores.
"""
from __future__ import annotations

import os
import signal
import socket
import threading
import time
import uuid

from ...errors import JobError
from ..queue import Queue
from .base import DISK_FULL, Executor, WorkerSettings, _reason, execute_claim

__all__ = ["DaskExecutor", "connect"]

# Seconds to wait for a scheduler before giving up (an unreachable address).
CONNECT_SECONDS = 10.0
# Running tasks look at the stop event at most this often (it is a round trip).
STOP_POLL_SECONDS = 1.0


def connect(address: str, connect_seconds: float = CONNECT_SECONDS):
    """(client, cluster or None) for ``address``: ``local:N`` starts a
    LocalCluster of N worker processes on loopback (one thread each), any
    other address is a running scheduler.  A JobError on ``--dask`` when it
    cannot be reached or understood."""
    try:
        from distributed import Client, LocalCluster   # lazy: dask.distributed only on a cluster run
    except ImportError:
        raise JobError("--dask", "dask.distributed is not installed; pip install 'dask[distributed]'") from None
    if address.startswith("local:"):
        try:
            n = int(address.split(":", 1)[1])
            if n < 1:
                raise ValueError
        except ValueError:
            raise JobError("--dask", f"{address!r}: give local:N with N >= 1 worker processes") from None
        cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True, host="127.0.0.1",
                               dashboard_address=None, env={"WAVESWEEP_THREADS": "1", "OMP_NUM_THREADS": "1",
                                                            "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"})
        return Client(cluster), cluster
    try:
        return Client(address, timeout=connect_seconds), None
    except (OSError, TimeoutError, ValueError) as e:
        why = " ".join(str(e).split()) or type(e).__name__
        raise JobError("--dask", f"cannot reach a scheduler at {address!r} within {connect_seconds:g} s "
                                 f"({why[:160]}); start one (dask scheduler) or use local:N") from None


class _TaskBooks:
    """What :func:`execute_claim` sees as the queue inside a task: heartbeats
    become progress messages; the run's end is kept for the driver."""

    def __init__(self, topic: str, stop_name: str):
        from distributed import Event, Queue   # lazy: as above
        self.progress = Queue(topic)
        self.stop = Event(stop_name)
        self.end = None
        self._checked = 0.0
        self._stopped = False

    def heartbeat(self, study, run_id, worker, step=None, total=None, rate=None, execution=None):
        self.progress.put({"study": study, "run_id": run_id, "step": step, "total": total, "rate": rate})
        return True

    def stop_requested(self) -> bool:
        now = time.monotonic()
        if not self._stopped and now - self._checked >= STOP_POLL_SECONDS:
            self._checked = now
            self._stopped = bool(self.stop.is_set())
        return self._stopped

    def complete(self, study, run_id, worker, wall_seconds, execution=None):
        self.end = {"state": "done", "wall_seconds": float(wall_seconds)}
        return True

    def fail(self, study, run_id, worker, reason, execution=None):
        self.end = {"state": "failed", "reason": str(reason)}
        return True

    def release(self, study, run_id, worker, reason, execution=None):
        self.end = {"state": "queued", "reason": str(reason)}
        return True


def _task(claim: dict, settings: WorkerSettings, topic: str, stop_name: str) -> dict:
    """One claimed run on a Dask worker; returns how it ended."""
    os.environ["WAVESWEEP_THREADS"] = "1"   # a worker's threads are its task slots
    books = _TaskBooks(topic, stop_name)
    state = execute_claim(books, claim, claim["worker"], settings, books.stop_requested)
    return {**(books.end or {"state": state}), "outcome": state}


class DaskExecutor(Executor):
    """Drain the queue on the Dask cluster at ``address`` (or ``local:N``)."""

    name = "dask"

    def __init__(self, root, address: str = "local:1", settings: WorkerSettings | None = None, workers=None,
                 connect_seconds: float = CONNECT_SECONDS):
        super().__init__(root, settings)
        self.address = address
        self.connect_seconds = connect_seconds

    def drain(self) -> dict:
        from distributed import Queue as ProgressQueue   # lazy: as above
        from distributed import wait

        queue = Queue(self.root)
        client, cluster = connect(self.address, self.connect_seconds)   # before anything is claimed
        st = self.settings
        stale = queue.requeue_stale(st.lease_seconds, st.max_attempts)
        name = f"{socket.gethostname()}:{os.getpid()}:dask"
        tag = uuid.uuid4().hex[:12]
        topic, stop_name = f"wavesweep-progress-{tag}", f"wavesweep-stop-{tag}"
        from distributed import Event   # lazy: as above
        stop = Event(stop_name, client=client)
        updates = ProgressQueue(topic, client=client)
        pending: dict = {}
        progress: dict = {}
        stopping = {"yes": False}
        full = {"yes": False}      # a task stopped by a full disk: claim nothing more
        previous = {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM)}
        counts = {"claimed": 0}

        def request_stop(signum, frame):
            stopping["yes"] = True

        def claim_more():
            slots = max(1, sum(client.nthreads().values()))
            while not (stopping["yes"] or full["yes"]) and len(pending) < slots:
                if st.until is not None and time.time() >= st.until:
                    return
                claim = queue.claim(name, lease_seconds=st.lease_seconds)
                if claim is None:
                    return
                counts["claimed"] += 1
                key = f"wavesweep-{claim['study']}-{claim['run_id']}-{claim['execution']}"
                fut = client.submit(_task, claim, st, topic, stop_name, key=key, pure=False)
                pending[fut] = claim

        def settle(fut, claim):
            study, run_id = claim["study"], claim["run_id"]
            if fut.status == "finished":
                end = fut.result()
                state = end.get("state")
                if end.get("outcome") == DISK_FULL:
                    full["yes"] = True
                if state == "done":
                    queue.complete(study, run_id, name, end.get("wall_seconds", 0.0))
                elif state == "failed":
                    queue.fail(study, run_id, name, end.get("reason", "failed"))
                elif state == "queued":
                    queue.release(study, run_id, name, end.get("reason", "interrupted"))
            elif fut.status == "cancelled":
                queue.release(study, run_id, name, "stopped before it ran")
            else:
                queue.fail(study, run_id, name, f"on the Dask cluster: {_reason(fut.exception())}")

        handlers = threading.current_thread() is threading.main_thread()   # signals: main thread only
        try:
            if handlers:
                for s in previous:
                    signal.signal(s, request_stop)
            claim_more()
            told = False
            while pending:
                if stopping["yes"] and not told:
                    stop.set()          # running tasks checkpoint at their next sample
                    told = True
                    for fut in [f for f in pending if f.status == "pending"]:
                        fut.cancel()
                try:
                    done, _ = wait(list(pending), timeout=st.heartbeat_seconds, return_when="FIRST_COMPLETED")
                except TimeoutError:   # nothing ended within a heartbeat: beat and wait again
                    done = set()
                except Exception:      # cancelled futures (a Ctrl-C reaches local workers too)
                    done = {f for f in pending if f.status != "pending"}
                for msg in updates.get(batch=True):
                    progress[(msg["study"], msg["run_id"])] = msg
                for fut, claim in list(pending.items()):
                    if fut in done:
                        del pending[fut]
                        settle(fut, claim)
                    else:
                        p = progress.get((claim["study"], claim["run_id"]), {})
                        if not queue.heartbeat(claim["study"], claim["run_id"], name, p.get("step"),
                                               p.get("total"), p.get("rate")):
                            # cancelled or requeued elsewhere: forget it (a task already running
                            # finishes on its worker; its result never overwrites another's)
                            fut.cancel()
                            del pending[fut]
                claim_more()
        finally:
            if handlers:
                for s, h in previous.items():
                    signal.signal(s, h)
            for fut, claim in pending.items():   # an error in the driver: back to the queue
                queue.release(claim["study"], claim["run_id"], name, "the driver stopped")
            client.close()
            if cluster is not None:
                cluster.close()
        return {"executor": self.name, "address": self.address, "claimed": counts["claimed"], "stale": stale,
                "stopped": stopping["yes"], "disk_full_stop": full["yes"]}
