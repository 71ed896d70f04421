"""Studies and their execution: sweep expansion, the run queue, executors, collect."""
from .collect import collect
from .queue import Queue
from .sweep import RunSpec, Study, expand_study, load_study, sweep_axes

__all__ = ["RunSpec", "Study", "expand_study", "load_study", "sweep_axes", "Queue", "collect"]
