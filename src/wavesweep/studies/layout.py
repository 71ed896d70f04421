"""The layout of a queue folder (ROOT): where every file of the queue, of a
study and of a run lives.  The one place these paths are spelled; the queue,
the executors, ``collect`` and the study commands ask :class:`StudyLayout`.

::

    ROOT/
        queue.sqlite             the queue (wavesweep.studies.queue)
        .disk-reserve            room held back to record runs' ends on a full disk
        STUDY/
            study.json           the manifest: the union of every submission
            summary.nc           written by `collect`
            RUN_ID.nc            a run's result (appears whole, by rename)
            RUN_ID.log           a finished run's log (appears whole, by rename)
            RUN_ID.log.part      the log of a run still going (or stopped, to resume)
            RUN_ID.ckpt          its checkpoint (result copies beside it:
                                 RUN_ID.ckpt.result-NNNNNN.nc, wavesweep.io.checkpoint)

Temporary files of atomic writes (:mod:`wavesweep.io.atomic`) are hidden
names beside their targets.
"""
from __future__ import annotations

from pathlib import Path

from ..errors import JobError

__all__ = ["StudyLayout", "DB_NAME", "RESERVE_NAME", "MANIFEST_NAME", "SUMMARY_NAME"]

DB_NAME = "queue.sqlite"
RESERVE_NAME = ".disk-reserve"
MANIFEST_NAME = "study.json"
SUMMARY_NAME = "summary.nc"
RESULT_SUFFIX = ".nc"
LOG_SUFFIX = ".log"
LOG_IN_PROGRESS_SUFFIX = ".part"
CHECKPOINT_SUFFIX = ".ckpt"
STUDY_NAME_CHARS = 200     # a folder name well below the usual 255-byte limit


class StudyLayout:
    """The paths under the queue folder ``root`` (nothing is created or
    checked on disk; :meth:`check_study_name` says which names a study may
    have)."""

    def __init__(self, root):
        self.root = Path(root)

    def __repr__(self) -> str:
        return f"StudyLayout({str(self.root)!r})"

    # -- ROOT --------------------------------------------------------------
    @property
    def queue_db(self) -> Path:
        """``ROOT/queue.sqlite``: the queue's database."""
        return self.root / DB_NAME

    @property
    def reserve(self) -> Path:
        """``ROOT/.disk-reserve``: bytes held back so that a full disk can
        still be recorded in the queue."""
        return self.root / RESERVE_NAME

    def studies(self) -> list[str]:
        """Names of the study folders that hold a manifest, sorted (none
        when ROOT is not a folder)."""
        if not self.root.is_dir():
            return []
        return sorted(p.name for p in self.root.iterdir() if (p / MANIFEST_NAME).is_file())

    @staticmethod
    def check_study_name(name) -> str:
        """``name`` if it can name a study folder of ROOT: not empty, no
        path separator, not hidden, not the queue's own file, at most
        :data:`STUDY_NAME_CHARS` characters; a ``JobError("study", ...)``
        with an example otherwise."""
        if not isinstance(name, str) or not name.strip():
            raise JobError("study", f"a study needs a non-empty name, got {name!r}")
        bad = [c for c in ("/", "\\", "\0") if c in name]
        if bad or name.startswith(".") or name.startswith(DB_NAME) or len(name) > STUDY_NAME_CHARS:
            raise JobError("study", f"{name!r} cannot name a folder of ROOT; use letters, digits, "
                                    "'-', '_' and inner dots (e.g. --study barrier-scan)")
        return name

    # -- a study -----------------------------------------------------------
    def study_dir(self, study: str) -> Path:
        """``ROOT/STUDY/``: the folder of a study's files."""
        return self.root / study

    def manifest(self, study: str) -> Path:
        """``ROOT/STUDY/study.json``: the union of every submission of the study."""
        return self.study_dir(study) / MANIFEST_NAME

    def summary(self, study: str) -> Path:
        """``ROOT/STUDY/summary.nc``: the study's runs side by side (``collect``)."""
        return self.study_dir(study) / SUMMARY_NAME

    # -- a run -------------------------------------------------------------
    def result(self, study: str, run_id: str) -> Path:
        """``ROOT/STUDY/RUN_ID.nc``: the run's result."""
        return self.study_dir(study) / f"{run_id}{RESULT_SUFFIX}"

    def log(self, study: str, run_id: str) -> Path:
        """``ROOT/STUDY/RUN_ID.log``: the log of a finished (done or failed) run."""
        return self.study_dir(study) / f"{run_id}{LOG_SUFFIX}"

    @staticmethod
    def log_in_progress(log) -> Path:
        """``RUN_ID.log.part`` beside the finished log ``log``: the log
        while the run goes on, renamed to ``log`` when it ends."""
        log = Path(log)
        return log.with_name(log.name + LOG_IN_PROGRESS_SUFFIX)

    def checkpoint(self, study: str, run_id: str) -> Path:
        """``ROOT/STUDY/RUN_ID.ckpt``: the run's checkpoint state."""
        return self.study_dir(study) / f"{run_id}{CHECKPOINT_SUFFIX}"
