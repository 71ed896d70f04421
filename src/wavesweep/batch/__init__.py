"""Studies and their execution: sweep expansion, the run queue, executors, collect."""
from .queue import Queue
from .sweep import RunSpec, Study, expand_study, load_study, sweep_axes

__all__ = ["RunSpec", "Study", "expand_study", "load_study", "sweep_axes", "Queue", "collect"]


def __getattr__(name):
    if name == "collect":   # needs xarray (0.35 s to import): loaded when asked for
        from .collect import collect
        return collect
    raise AttributeError(f"module 'wavesweep.batch' has no attribute {name!r}")
