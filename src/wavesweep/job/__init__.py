"""The job: a TOML document validated against its schemas.

- :mod:`~wavesweep.job.document`: :class:`Job`, its TOML, canonical form and run id (pure);
- :mod:`~wavesweep.job.schemas`: the keys of each table;
- :mod:`~wavesweep.job.validate`: reading and validating job files (:func:`load_job`);
- :mod:`~wavesweep.job.dotted`: dotted keys and ``--set`` overrides;
- :mod:`~wavesweep.job.sweep`: the ``[sweep]`` table;
- :mod:`~wavesweep.job.reference`: the documentation of every key (``wavesweep keys``).

Nothing here builds physics: a job's values that the physics chooses (a
tuned CAP) are filled in above, by :func:`wavesweep.setup.resolve_job`.
"""
from .document import Job, grid_axes
from .dotted import apply_overrides, parse_override, set_dotted
from .validate import grid_object, job_from_dict, load_job, read_job_file

__all__ = ["Job", "grid_axes", "apply_overrides", "parse_override", "set_dotted", "grid_object",
           "job_from_dict", "load_job", "read_job_file"]
