"""The run's record as analysis reads it (:mod:`wavesweep.io.record`): the
one the result holds, or, for a file written before results kept it, the
record of its set-up rebuilt from the job text it stores (bounded: see
:func:`wavesweep.setup.rebuilt_record`)."""
from __future__ import annotations

from ..io.record import RecordedRun, has_record, read_record

__all__ = ["run_record", "as_record"]


def run_record(ds, field: str = "RUN.nc", lanczos: bool = False) -> RecordedRun:
    """The record of an open result (atomic units); ``lanczos``: an older
    file's rebuilt record includes the recurrence of psi0, which only
    ``levels --from`` needs.  JobError(field) where it cannot be had."""
    if has_record(ds):
        return read_record(ds, field)
    # lazy: only files older than the record need the set-up layer (numba, the FFTs)
    from ..setup import rebuilt_record
    return rebuilt_record(ds, field, lanczos)


def as_record(obj) -> RecordedRun:
    """A RecordedRun as it is; a set-up (anything with ``recorded()``, e.g.
    :class:`wavesweep.setup.Setup`) recorded in memory."""
    return obj if isinstance(obj, RecordedRun) else obj.recorded()
