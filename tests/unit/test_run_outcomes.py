"""ClaimedRun.settle, the one place where the way a claimed run ended
becomes its state in the queue (solo runs, batch members and Dask tasks all
end through it): the table of rules in its docstring, checked against a
queue that records what it is told.
"""
from __future__ import annotations

import errno
import os

import pytest

from wavesweep.errors import DiskFull, JobError, RunFailed, RunInterrupted
from wavesweep.io.checkpoint import ResultExists
from wavesweep.studies.executors.base import DISK_FULL, ClaimedRun
from wavesweep.studies.layout import StudyLayout


class Books:
    """A queue that records the calls that end a run."""

    def __init__(self):
        self.calls = []

    def complete(self, study, run_id, worker, wall_seconds, execution=None):
        self.calls.append(("complete", wall_seconds))
        return True

    def fail(self, study, run_id, worker, reason, execution=None):
        self.calls.append(("fail", reason))
        return True

    def release(self, study, run_id, worker, reason, execution=None):
        self.calls.append(("release", reason))
        return True


@pytest.fixture
def run(tmp_path):
    lay = StudyLayout(tmp_path)
    lay.study_dir("s").mkdir()
    claim = {"study": "s", "run_id": "r1", "attempt": 1, "result": str(lay.result("s", "r1")),
             "log": str(lay.log("s", "r1")), "checkpoint": str(lay.checkpoint("s", "r1"))}
    r = ClaimedRun(Books(), claim, "w1")
    r.log("attempt 1")
    return r


def log_of(run) -> str:
    path = run.log_final if run.log_final.exists() else run.log_part
    return path.read_text()


def test_a_finished_run_is_done_with_its_wall_time_and_its_log_whole(run):
    assert run.settle(None, 2.5) == "done" == run.state
    assert run.queue.calls == [("complete", 2.5)]
    assert not run.log_part.exists() and "done in 2.5 s" in log_of(run)


def test_a_batch_member_says_the_batch_wall_time(run):
    assert run.settle(run.result, 4.0, batch_of=3) == "done"
    assert "(batch of 3; the batch's wall time)" in log_of(run)


def test_a_result_already_there_is_done_and_kept(run):
    assert run.settle(ResultExists(run.result), 1.0) == "done"
    assert run.queue.calls == [("complete", 1.0)]
    assert "the result already exists; kept as it is" in log_of(run)


def test_a_full_disk_goes_back_to_the_queue_with_its_reason(run):
    full = DiskFull(run.result, 0, 4096)
    assert run.settle(full, 1.0) == DISK_FULL
    assert run.queue.calls == [("release", full.reason)]
    assert run.log_part.exists() and not run.log_final.exists()     # resumes, log and all


def test_an_untranslated_enospc_anywhere_in_the_chain_is_a_full_disk(run):
    try:
        try:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(run.result))
        except OSError:
            raise RuntimeError("writing a sample failed")
    except RuntimeError as e:
        outcome = e
    assert run.settle(outcome, 1.0) == DISK_FULL
    (call, reason), = run.queue.calls
    assert call == "release" and reason.startswith("disk full: cannot write a file of the run ")


def test_an_interrupted_run_is_released_and_a_lost_one_left_alone(run, tmp_path):
    assert run.settle(RunInterrupted(step=12), 1.0) == "queued"
    assert run.queue.calls == [("release", "interrupted at step 12")]
    other = ClaimedRun(Books(), run.claim, "w1")
    other.lost = True
    assert other.settle(RunInterrupted(step=12), 1.0) == "lost"
    assert other.queue.calls == []


@pytest.mark.parametrize("outcome, reason, traced", [
    (RunFailed("norm grew by 3e-2"), "norm grew by 3e-2", False),
    (JobError("evolve.dt", "must be positive"), "evolve.dt: must be positive", False),
    (MemoryError(), "out of memory", False),
    (PermissionError(errno.EACCES, "Permission denied", "/x/r1.nc"), "Permission denied (/x/r1.nc)", True),
    (ZeroDivisionError("division by zero"), "ZeroDivisionError: division by zero", True),
])
def test_failures_keep_a_one_line_reason_and_a_bug_its_traceback(run, outcome, reason, traced):
    try:
        raise outcome     # as the run raised it: with its traceback
    except BaseException as e:
        outcome = e
    assert run.settle(outcome, 1.0) == "failed"
    assert run.queue.calls == [("fail", reason)]
    text = log_of(run)
    assert f"failed: {reason}" in text and ("Traceback" in text) == traced
    assert not run.log_part.exists()
