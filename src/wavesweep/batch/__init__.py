"""Studies and their execution: sweep expansion, the run queue, executors."""
from .sweep import RunSpec, Study, expand_study, load_study, sweep_axes

__all__ = ["RunSpec", "Study", "expand_study", "load_study", "sweep_axes"]
