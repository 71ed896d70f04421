"""Executors drain the queue: by name (or class) from :data:`EXECUTORS`."""
from .base import Executor, WorkerSettings, claim_next, execute_batch, execute_claim, thread_environment
from .local import LocalExecutor

EXECUTORS = {LocalExecutor.name: LocalExecutor}


def __getattr__(name):
    if name == "DaskExecutor":   # lazy: imports dask only when asked for
        from .cluster import DaskExecutor
        return DaskExecutor
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")

__all__ = ["Executor", "WorkerSettings", "claim_next", "execute_batch", "execute_claim", "thread_environment", "LocalExecutor",
           "EXECUTORS"]
