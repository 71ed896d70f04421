"""Studies and their execution: the run queue and the layout of a study
folder, the executors that drain the queue, and ``collect``.  (A study's
runs come from :mod:`wavesweep.study`.)"""
from .queue import Queue

__all__ = ["Queue", "collect"]


def __getattr__(name):
    if name == "collect":   # lazy: needs xarray (0.35 s to import)
        from .collect import collect
        return collect
    raise AttributeError(f"module 'wavesweep.studies' has no attribute {name!r}")
