"""Executors drain the queue: by name (or class) from :data:`EXECUTORS`."""
from .base import Executor, WorkerSettings, claim_next, execute_batch, execute_claim, thread_environment
from .local import LocalExecutor

EXECUTORS = {LocalExecutor.name: LocalExecutor}

__all__ = ["Executor", "WorkerSettings", "claim_next", "execute_batch", "execute_claim", "thread_environment", "LocalExecutor",
           "EXECUTORS"]
