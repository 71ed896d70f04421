"""Checkpoints: everything a run needs to continue after a stop or a crash.

A run with a :class:`CheckpointPolicy` saves its state at sample boundaries
(psi at a true time) every ``every_seconds`` of wall time, and when asked to
stop.  A worker may be killed at any moment, so a checkpoint is two files
committed in an order that is always consistent:

``PATH.result-NNNNNN.nc``
    a copy of the partial result file (``.NAME.part``) as of the checkpoint,
    generation ``NNNNNN``: the writer flushes its sample buffer and closes
    the file, the copy is written under a temporary name, fsync'ed and
    renamed into place, and the writer reopens the ``.part`` for append.  An
    HDF5 file cut off mid-append can be unreadable, so a resumed run never
    continues the ``.part`` it finds: it starts from this copy.
``PATH``
    the state (an ``.npz`` archive; zip CRC-32 on every member, so a torn or
    flipped file is detected): psi, steps done, probability absorbed per
    face, the recorder position (samples and snapshots written), accumulated
    wall seconds, the run_id, and the name and size of its result copy.  It
    is written under a temporary name, fsync'ed and renamed over the old
    state (then the folder is fsync'ed): that rename is the commit point.
    Older result copies are deleted after it.

Killed before the state's rename, the previous state still names the
previous copy, which is still there; killed after it, the new pair is
complete.  A save that fails (a full disk: :class:`~wavesweep.errors.DiskFull`)
removes what it had written and leaves the previous checkpoint as it was.  Temporary files and copies no state names are removed by the next
run.
"""
from __future__ import annotations

import glob
import json
import logging
import math
import os
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import JobError
from .diskspace import disk_full_from
from .atomic import atomic_rename, fsync_folder, temporary_path

__all__ = ["CheckpointPolicy", "CheckpointState", "CheckpointStore", "CheckpointCorrupt",
           "CheckpointMismatch", "ResultExists", "result_complete"]

log = logging.getLogger(__name__)

FORMAT = 1  # version of the state file's layout


@dataclass(frozen=True)
class CheckpointPolicy:
    """Where a run keeps its checkpoint and how often it takes one.

    ``path`` is the state file (its result copies sit beside it, named
    ``PATH.result-NNNNNN.nc``); ``every_seconds`` is the wall time between
    checkpoints (0 = at every sample).  A checkpoint is also taken when the
    run's ``should_stop()`` turns True."""

    path: Path
    every_seconds: float = 300.0

    def __post_init__(self):
        object.__setattr__(self, "path", Path(self.path))
        if not (isinstance(self.every_seconds, (int, float)) and math.isfinite(self.every_seconds)
                and self.every_seconds >= 0):
            raise ValueError(f"CheckpointPolicy.every_seconds must be a finite number >= 0, "
                             f"not {self.every_seconds!r}")


class CheckpointCorrupt(Exception):
    """A checkpoint that cannot be used (torn, truncated, inconsistent);
    the run starts again from scratch."""


class CheckpointMismatch(JobError):
    """The checkpoint at the policy's path belongs to another job."""

    def __init__(self, path: Path, found: str, expected: str):
        self.path, self.found, self.expected = Path(path), found, expected
        super().__init__("checkpoint", f"{str(path)!r} is a checkpoint of run {found}, not of this "
                                       f"job (run {expected}); refusing to resume from it: give each "
                                       "run its own checkpoint path, or delete that file")


class ResultExists(FileExistsError):
    """The final result of a checkpointed run is already there: a finished
    result is never overwritten."""

    def __init__(self, path: Path):
        self.path = Path(path)
        super().__init__(f"{str(path)!r} already holds a finished result; a checkpointed run never "
                         "overwrites one (delete the file to run again)")


def result_complete(path: Path) -> bool:
    """True if a finished result is at ``path``.  A result reaches its final
    name only by a rename once it is complete (:class:`ResultWriter` writes
    under a temporary name), so the name existing is the mark of a finished
    run.  The file is deliberately not opened to judge it: a transient
    failure to open it (file locking on a network filesystem, say) must not
    make a finished result look replaceable."""
    return os.path.lexists(path)


@dataclass
class CheckpointState:
    """What a checkpoint holds (atomic units inside, like the propagator)."""

    run_id: str
    steps: int                 # propagator steps done
    absorbed: np.ndarray       # probability removed per face (float64)
    n_time: int                # scalar samples in the result copy
    n_snap: int                # density snapshots in the result copy
    wall_seconds: float        # wall time spent so far, over all sessions
    psi: np.ndarray
    generation: int = 0
    result_copy: Path | None = None
    extra: dict = field(default_factory=dict)


class CheckpointStore:
    """Saves, loads and removes the checkpoint of one run."""

    def __init__(self, policy: CheckpointPolicy):
        self.policy = policy
        self.path = policy.path
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self.generation = 0
        self.costs: list[float] = []   # seconds per checkpoint taken, for reports

    # -- names -------------------------------------------------------------
    def copy_path(self, generation: int) -> Path:
        return self.path.with_name(f"{self.path.name}.result-{generation:06d}.nc")

    def _tmp(self, target: Path) -> Path:
        return temporary_path(target, ".tmp", unique=False)   # found by name: _leftovers

    def _leftovers(self, keep: Path | None = None) -> list[Path]:
        """Result copies and temporary files of this checkpoint except ``keep``."""
        folder, name = self.path.parent, self.path.name
        found = list(folder.glob(f"{_glob_escape(name)}.result-*.nc"))
        found += list(folder.glob(f".{_glob_escape(name)}.result-*.nc.tmp"))
        found += [p for p in [self._tmp(self.path)] if p.exists()]
        return [p for p in found if keep is None or p != keep]

    # -- saving ------------------------------------------------------------
    def save(self, state: CheckpointState, writer, reopen: bool = True) -> Path:
        """Commit a checkpoint: the writer's partial file is copied (then
        reopened for append unless ``reopen`` is False), then the state is
        written and renamed into place; older copies are deleted."""
        t0 = time.perf_counter()
        gen = self.generation + 1
        copy = self.copy_path(gen)
        size = writer.save_copy(copy, self._tmp(copy), reopen=reopen)
        meta = {
            **state.extra,
            "format": FORMAT,
            "run_id": state.run_id,
            "steps": int(state.steps),
            "n_time": int(state.n_time),
            "n_snap": int(state.n_snap),
            "wall_seconds": float(state.wall_seconds),
            "generation": gen,
            "result_copy": copy.name,
            "result_size": int(size),
            "saved_at": time.time(),
        }
        tmp = self._tmp(self.path)
        try:
            with open(tmp, "wb") as f:
                np.savez(f, meta=np.array(json.dumps(meta)), psi=np.ascontiguousarray(state.psi),
                         absorbed=np.asarray(state.absorbed, dtype=np.float64))
                f.flush()
                os.fsync(f.fileno())
        except BaseException as e:
            # the previous state and its copy stay committed; this attempt leaves nothing
            _unlink(tmp)
            _unlink(copy)
            full = disk_full_from(e, self.path, int(np.asarray(state.psi).nbytes), what="the checkpoint",
                                  need="it needs about", basis="the size of psi") \
                if isinstance(e, OSError) else None
            if full is not None:
                raise full from e
            raise
        atomic_rename(tmp, self.path)     # the commit point
        self.generation = gen
        for old in self._leftovers(keep=copy):
            _unlink(old)
        cost = time.perf_counter() - t0
        self.costs.append(cost)
        log.debug("checkpoint %s at step %d (%d bytes of result) in %.1f ms",
                  self.path, state.steps, size, cost * 1e3)
        return self.path

    # -- loading -----------------------------------------------------------
    def load(self, run_id: str) -> CheckpointState | None:
        """The committed checkpoint, or None if there is none (stale
        temporary files and copies are removed then).  Raises
        :class:`CheckpointMismatch` for a checkpoint of another run and
        :class:`CheckpointCorrupt` for one that cannot be used."""
        if not self.path.exists():
            for old in self._leftovers():
                _unlink(old)
            return None
        try:
            with np.load(self.path, allow_pickle=False) as z:
                meta = json.loads(str(z["meta"][()]))
                if not isinstance(meta, dict):
                    raise ValueError("the metadata is not a table")
                if meta.get("run_id") != run_id and isinstance(meta.get("run_id"), str):
                    raise CheckpointMismatch(self.path, meta["run_id"], run_id)
                if meta.get("format") != FORMAT:
                    raise ValueError(f"unknown checkpoint format {meta.get('format')!r}")
                psi = np.array(z["psi"])
                absorbed = np.array(z["absorbed"], dtype=np.float64)
            state = CheckpointState(
                run_id=meta["run_id"], steps=int(meta["steps"]), absorbed=absorbed,
                n_time=int(meta["n_time"]), n_snap=int(meta["n_snap"]),
                wall_seconds=float(meta["wall_seconds"]), psi=psi,
                generation=int(meta["generation"]),
                result_copy=self.path.with_name(str(meta["result_copy"])),
                extra={k: v for k, v in meta.items() if k not in _META_KEYS})
            size = int(meta["result_size"])
        except CheckpointMismatch:
            raise
        except Exception as e:  # torn zip, bad CRC, truncated member, missing key, bad JSON
            raise CheckpointCorrupt(f"cannot read {str(self.path)!r}: {type(e).__name__}: {e}") from None
        if Path(state.result_copy).parent != self.path.parent or "/" in str(meta["result_copy"]):
            raise CheckpointCorrupt(f"{str(self.path)!r} names a result copy outside its folder")
        if not np.all(np.isfinite(psi)) or not np.all(np.isfinite(absorbed)):
            raise CheckpointCorrupt(f"{str(self.path)!r} holds non-finite values")
        if not (math.isfinite(state.wall_seconds) and state.wall_seconds >= 0
                and state.steps >= 0 and state.n_time >= 0 and state.n_snap >= 0):
            raise CheckpointCorrupt(f"{str(self.path)!r} holds impossible counters")
        self._check_copy(state, size)
        self.generation = state.generation
        for old in self._leftovers(keep=state.result_copy):
            _unlink(old)
        return state

    def _check_copy(self, state: CheckpointState, size: int) -> None:
        copy = state.result_copy
        try:
            actual = copy.stat().st_size
        except OSError:
            raise CheckpointCorrupt(f"the result copy {str(copy)!r} of the checkpoint is missing") from None
        if actual != size:
            raise CheckpointCorrupt(f"the result copy {str(copy)!r} has {actual} bytes, the checkpoint "
                                    f"recorded {size}")
        import netCDF4   # lazy: netCDF4/HDF5 load with the first checkpoint read
        try:
            with netCDF4.Dataset(copy, "r") as ds:
                rid = getattr(ds, "run_id", None)
                n_time, n_snap = len(ds.dimensions["time"]), len(ds.dimensions["snapshot_time"])
        except (OSError, KeyError) as e:
            raise CheckpointCorrupt(f"the result copy {str(copy)!r} is unreadable: {e}") from None
        if rid != state.run_id:
            raise CheckpointCorrupt(f"the result copy {str(copy)!r} is of run {rid}, not {state.run_id}")
        if n_time < state.n_time or n_snap < state.n_snap:
            raise CheckpointCorrupt(f"the result copy {str(copy)!r} holds {n_time} samples and {n_snap} "
                                    f"snapshots, fewer than the checkpoint's {state.n_time} and {state.n_snap}")

    # -- removing ----------------------------------------------------------
    def discard(self) -> None:
        """Delete the state, its result copies and temporary files."""
        removed = _unlink(self.path)
        for p in self._leftovers():
            removed = _unlink(p) or removed
        if removed:
            fsync_folder(self.path.parent)
        self.generation = 0


_META_KEYS = {"format", "run_id", "steps", "n_time", "n_snap", "wall_seconds", "generation",
              "result_copy", "result_size", "saved_at"}


def _unlink(p: Path) -> bool:
    try:
        Path(p).unlink()
        return True
    except FileNotFoundError:
        return False


def _glob_escape(name: str) -> str:
    return glob.escape(name)
