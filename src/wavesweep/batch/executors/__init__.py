"""Executors drain the queue: by name (or class) from :data:`EXECUTORS`."""
from .base import Executor, WorkerSettings, execute_claim, thread_environment
from .local import LocalExecutor

EXECUTORS = {LocalExecutor.name: LocalExecutor}

__all__ = ["Executor", "WorkerSettings", "execute_claim", "thread_environment", "LocalExecutor",
           "EXECUTORS"]
