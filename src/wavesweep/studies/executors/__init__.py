"""Executors drain the queue: by name (or class) from :data:`EXECUTORS`.

:data:`EXECUTORS` is the one list of them, read by ``work`` (its
``--executor`` choices and :func:`wavesweep.studies.api.work`).  An entry is
an :class:`Executor` class, or a function of no arguments that imports the
class and returns it: an executor whose module needs a heavy dependency
(the Dask one) is loaded only when a drain uses it (:func:`executor_class`).
Add one with :func:`register_executor`, one line below.
"""
from ...errors import JobError
from .base import Executor, WorkerSettings, claim_next, execute_batch, execute_claim, thread_environment
from .local import LocalExecutor


def _dask_executor():
    from .cluster import DaskExecutor   # lazy: the Dask executor (and dask.distributed) only when a drain uses it
    return DaskExecutor


# name -> Executor class, or a loader returning it (see the module's docstring).
EXECUTORS: dict = {}


def register_executor(name: str, entry) -> None:
    """Make an executor available by ``name``: ``entry`` is its class, or a
    function of no arguments returning it (imported on first use)."""
    EXECUTORS[name] = entry


register_executor(LocalExecutor.name, LocalExecutor)
register_executor("dask", _dask_executor)

# The executor of a drain that names none, and the one `work --dask ADDRESS` uses.
DEFAULT_EXECUTOR = LocalExecutor.name
CLUSTER_EXECUTOR = "dask"


def executor_class(name: str) -> type[Executor]:
    """The registered executor class of ``name`` (loaded now if its entry is
    a loader); a JobError on ``--executor`` naming the registered ones."""
    try:
        entry = EXECUTORS[name]
    except (KeyError, TypeError):
        raise JobError("--executor", f"unknown executor {name!r}; choose from {', '.join(EXECUTORS)}") from None
    cls = entry if isinstance(entry, type) else entry()
    if not (isinstance(cls, type) and issubclass(cls, Executor)):
        raise TypeError(f"executor {name!r} is registered as {entry!r}, which gives no Executor class")
    return cls


def __getattr__(name):
    if name == "DaskExecutor":   # lazy: imports the Dask executor only when asked for
        return executor_class(CLUSTER_EXECUTOR)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


__all__ = ["Executor", "WorkerSettings", "claim_next", "execute_batch", "execute_claim", "thread_environment",
           "LocalExecutor", "EXECUTORS", "DEFAULT_EXECUTOR", "CLUSTER_EXECUTOR", "register_executor",
           "executor_class"]
