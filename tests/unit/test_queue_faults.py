"""Faults of the environment, in-process (issue 13, items 4 and 5, and a
run id queued in two studies): a full disk simulated by making a write fail
with ENOSPC (or with netCDF4's opaque "NetCDF: HDF error" on a folder that
has no room), workers that died, and leases that lapsed.

The reference for every result is the same job run without interruption in
the same code (resumed runs repeat the same arithmetic: bit for bit).  The
real full filesystem (tmpfs) and real kill -9 are in
tests/integration/test_worker_faults.py.
"""
from __future__ import annotations

import copy
import errno
import os
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from wavesweep import cli
from wavesweep.studies import api
from wavesweep.studies.executors.base import DISK_FULL, WorkerSettings, execute_claim
from wavesweep.studies.queue import Queue
from wavesweep.study import expand_study
from wavesweep.errors import DiskFull, RunFailed, RunInterrupted
from wavesweep.io import diskspace
from wavesweep.io.checkpoint import CheckpointPolicy
from wavesweep.io.recorder import ResultWriter
from wavesweep.job import job_from_dict
from wavesweep.run import Simulation

TINY = {
    "title": "faults",
    "grid": {"x": {"min": -40.0, "max": 40.0, "points": 128}},
    "packet": {"kind": "gaussian", "center": -5.0, "width": 2.0, "momentum": 1.0},
    "evolve": {"dt": 0.05, "duration": 4.0},
    "record": {"every": 0.25, "snapshot_every": 0.5},
}
NEVER = 1e9


class Clock:
    def __init__(self, t=1_800_000_000.0):
        self.t = t

    def __call__(self):
        return self.t


def job(**packet):
    t = copy.deepcopy(TINY)
    t["packet"].update(packet)
    return job_from_dict(t)


def study(name, widths):
    raw = copy.deepcopy(TINY)
    raw["sweep"] = {"packet.width": list(widths)}
    return expand_study(raw, name=name)


def no_room_after(monkeypatch, frames, error=None):
    """Snapshot writes fail once ``frames`` have been written, as on a disk
    that filled: ENOSPC by default, or ``error``.  Returns a switch to
    give the room back."""
    state = {"full": True, "written": 0}
    original = ResultWriter.add_snapshot

    def add_snapshot(self, *a, **k):
        if state["full"] and state["written"] >= frames:
            with self._room(self._frame_bytes()):
                raise error or OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(self.tmp))
        state["written"] += 1
        return original(self, *a, **k)

    monkeypatch.setattr(ResultWriter, "add_snapshot", add_snapshot)
    return state


def same_result(a, b):
    one, two = xr.load_dataset(a), xr.load_dataset(b)
    assert set(one.data_vars) == set(two.data_vars)
    for name in one.data_vars:
        np.testing.assert_array_equal(one[name].values, two[name].values, err_msg=name)
    for name in ("time", "snapshot_time"):
        np.testing.assert_array_equal(one[name].values, two[name].values, err_msg=name)


def leftovers(folder):
    return sorted(p.name for p in Path(folder).iterdir() if p.name.startswith(".") or p.suffix == ".part")


# ------------------------------------------------------------------ disk full
def test_a_full_disk_mid_run_is_disk_full_with_the_room_and_leaves_no_partial_file(tmp_path, monkeypatch):
    no_room_after(monkeypatch, frames=3)
    sim = Simulation(job())
    with pytest.raises(DiskFull) as info:
        sim.run(tmp_path / "out", progress=False)
    full = info.value
    assert isinstance(full, RunFailed)          # a run's end, exit 1 in the CLI
    reason = full.reason
    assert reason.startswith("disk full: cannot write the result ") and "\n" not in reason
    assert str(sim.output_path(tmp_path / "out")) in reason
    assert " free there" in reason and full.free_bytes is not None
    # 9 snapshots of 128 float32 remain plus the final psi and samples (from the shapes)
    assert full.need_bytes >= 6 * 128 * 4 + 128 * 16
    assert list((tmp_path / "out").iterdir()) == []      # no .part, no result


def test_an_opaque_hdf_error_is_disk_full_only_when_the_folder_has_no_room(tmp_path, monkeypatch):
    no_room_after(monkeypatch, frames=2, error=RuntimeError("NetCDF: HDF error"))
    with pytest.raises(RuntimeError, match="NetCDF: HDF error") as info:   # room enough: said as it is
        Simulation(job()).run(tmp_path / "a", progress=False)
    assert not isinstance(info.value, DiskFull)
    monkeypatch.setattr(diskspace, "free_bytes", lambda folder: 0)        # the filesystem reports no room
    with pytest.raises(DiskFull, match=r"disk full: .* 0 B free there"):
        Simulation(job()).run(tmp_path / "b", progress=False)
    assert list((tmp_path / "b").iterdir()) == []


def test_a_quota_is_found_by_the_probe_when_statvfs_shows_room(tmp_path, monkeypatch):
    """EDQUOT is not visible in statvfs: the probe's reservation says it."""
    def fallocate(fd, offset, length):
        raise OSError(errno.EDQUOT, os.strerror(errno.EDQUOT))
    monkeypatch.setattr(os, "posix_fallocate", fallocate)
    assert diskspace.out_of_space(RuntimeError("NetCDF: HDF error"), tmp_path, 4096)
    assert not diskspace.out_of_space(PermissionError(errno.EACCES, "denied"), tmp_path, 4096)
    assert diskspace.is_no_space(OSError(errno.EDQUOT, "quota"))
    assert list(tmp_path.iterdir()) == []     # the probe leaves nothing


def test_direct_run_on_a_full_disk_is_one_line_and_exit_1(tmp_path, monkeypatch, capsys):
    no_room_after(monkeypatch, frames=1)
    path = tmp_path / "job.toml"
    import tomli_w
    path.write_text(tomli_w.dumps(TINY))
    code = cli.main(["run", str(path), "-o", str(tmp_path / "out"), "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 1          # the environment failed, not the input (exit 2 is for bad input)
    assert len(err) == 1 and err[0].startswith("wavesweep run: run failed: disk full: cannot write the result")
    assert list((tmp_path / "out").iterdir()) == []


def _interrupted_run(tmp_path):
    """(the uninterrupted result, the output path, the checkpoint policy, the
    RunInterrupted raised after two samples, the checkpoint folder's bytes)."""
    ref = Simulation(job()).run(path=tmp_path / "ref.nc", progress=False)
    out = tmp_path / "q" / "r.nc"
    policy = CheckpointPolicy(tmp_path / "q" / "r.ckpt", every_seconds=NEVER)
    stops = iter([False, False, True])
    with pytest.raises(RunInterrupted) as first:
        Simulation(job()).run(path=out, progress=False, checkpoint=policy, should_stop=lambda: next(stops))
    before = {p.name: p.read_bytes() for p in policy.path.parent.iterdir()}
    return ref, out, policy, first, before


def _resumes_from_the_kept_checkpoint(ref, out, policy, first, before):
    """The checkpoint folder holds exactly what it held (``before``), and the
    run resumes from it at the step it stopped and ends with ``ref``'s result."""
    assert {p.name: p.read_bytes() for p in policy.path.parent.iterdir()} == before
    steps = []
    Simulation(job()).run(path=out, progress=False, checkpoint=policy,
                          on_resume=lambda step, total: steps.append((step, total)))
    assert steps == [(first.value.step, Simulation(job()).setup.total_steps)]
    same_result(ref, out)


def test_a_checkpoint_that_does_not_fit_keeps_the_previous_one(tmp_path, monkeypatch):
    """Disk full while saving a checkpoint: the previous checkpoint stays
    whole, and resuming from it gives the uninterrupted result."""
    ref, out, policy, first, before = _interrupted_run(tmp_path)
    real_savez = np.savez

    def savez(f, **arrays):   # the state file does not fit
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(policy.path))
    monkeypatch.setattr(np, "savez", savez)
    with pytest.raises(DiskFull, match="disk full: cannot write the checkpoint"):
        Simulation(job()).run(path=out, progress=False, checkpoint=policy, should_stop=lambda: True)
    monkeypatch.setattr(np, "savez", real_savez)
    # no torn state, no orphan copy, no .part: the old pair as it was, and it resumes
    _resumes_from_the_kept_checkpoint(ref, out, policy, first, before)


# -------------------------------------------------------- under the queue
def test_a_run_stopped_by_a_full_disk_is_requeued_without_spending_an_attempt(tmp_path, monkeypatch):
    q = Queue(tmp_path / "root")
    q.submit(study("s", [2.0]))
    settings = WorkerSettings(checkpoint_seconds=0.0, heartbeat_seconds=60.0, lease_seconds=60.0)
    room = no_room_after(monkeypatch, frames=5)
    claim = q.claim("w1", lease_seconds=60)
    assert execute_claim(q, claim, "w1", settings) == DISK_FULL
    (run,) = q.runs("s")
    assert run["state"] == "queued" and run["attempts"] == 0 and run["executions"] == 1
    assert run["reason"].startswith("disk full: cannot write the result ")
    folder = tmp_path / "root" / "s"
    assert not (folder / f"{run['run_id']}.nc").exists()
    assert not [p for p in folder.iterdir() if p.name.startswith(".") and p.name.endswith(".part")]
    log = (folder / f"{run['run_id']}.log.part").read_text()
    assert "stopped: disk full" in log and "back to the queue" in log
    summary = q.drain_summary(0)
    assert summary["disk_full"] == 1 and summary["requeued"] == 1
    assert summary["disk_full_reason"].startswith("disk full")
    room["full"] = False
    claim = q.claim("w2", lease_seconds=60)
    assert claim["attempt"] == 1          # the full disk did not count
    assert execute_claim(q, claim, "w2", settings) == "done"
    log = (folder / f"{run['run_id']}.log").read_text()
    assert "resumed from the checkpoint" in log and " at step " in log
    ref = Simulation(job_from_dict(__import__("tomllib").loads(claim["job_toml"]))).run(
        path=tmp_path / "ref.nc", progress=False)
    same_result(ref, folder / f"{run['run_id']}.nc")


def test_work_refuses_to_start_on_a_disk_without_room_for_the_reserve(tmp_path, monkeypatch, capsys):
    q = Queue(tmp_path / "root")
    q.submit(study("s", [2.0]))
    monkeypatch.setattr(Queue, "keep_reserve", lambda self, nbytes=0: False)
    code = cli.main(["work", "--root", str(tmp_path / "root")])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 1 and len(err) == 1
    assert err[0].startswith("wavesweep work: disk full: cannot write the queue folder") and "nothing claimed" in err[0]
    assert q.runs()[0]["state"] == "queued" and q.runs()[0]["executions"] == 0


def test_the_reserve_is_freed_for_a_queue_record_that_found_the_disk_full(tmp_path, monkeypatch):
    q = Queue(tmp_path / "root")
    q.submit(study("s", [2.0]))
    assert q.keep_reserve() and q.reserve_path.stat().st_size >= 1 << 20
    claim = q.claim("w")
    real_write = Queue._write
    calls = {"n": 0}

    def full_once(self, durable=True):
        calls["n"] += 1
        if calls["n"] == 1:
            raise DiskFull(self.path, 0, what="the queue", need="")
        return real_write(self, durable)
    monkeypatch.setattr(Queue, "_write", full_once)
    assert q.release("s", claim["run_id"], "w", "disk full: test")
    assert not q.reserve_path.exists() and q.runs()[0]["state"] == "queued"


# ----------------------------------------------- dead workers, lapsed leases
def test_status_marks_a_lapsed_lease_and_says_the_next_work_requeues_it(tmp_path):
    clock = Clock()
    q = Queue(tmp_path, clock=clock)
    q.submit(study("s", [1.5, 2.0]))
    a = q.claim("host:1:0", lease_seconds=2)
    b = q.claim("host:1:1")                   # no lease recorded: the default, 60 s
    q.heartbeat("s", a["run_id"], "host:1:0", 40, 80, 100.0)
    q.heartbeat("s", b["run_id"], "host:1:1", 40, 80, 100.0)
    clock.t += 10                              # 10 s of silence: past 2 s, within 60 s
    runs = {r["run_id"]: r for r in q.status()["runs"]}
    lapsed, alive = runs[a["run_id"]], runs[b["run_id"]]
    assert lapsed["lease_lapsed"] and lapsed["lease_seconds"] == 2 and lapsed["silent_seconds"] == 10
    assert lapsed["eta_seconds"] is None       # was "eta 0m00s"
    assert not alive["lease_lapsed"] and alive["lease_seconds"] == 60
    text = api.format_status(q.status())
    (line,) = [x for x in text.splitlines() if a["run_id"] in x]
    assert "LEASE LAPSED" in line and "silent for 0m10s" in line and "next `wavesweep work` requeues it" in line
    (line,) = [x for x in text.splitlines() if b["run_id"] in x]
    assert "LEASE LAPSED" not in line and "eta" in line


def test_a_dead_workers_runs_are_requeued_at_once_and_counted(tmp_path):
    q = Queue(tmp_path)
    q.submit(study("s", [1.5, 2.0, 2.5]))
    held = [q.claim("host:9:0"), q.claim("host:9:0")]
    other = q.claim("host:9:1")
    out = q.requeue_worker("host:9:0", "was killed by SIGKILL", max_attempts=3)
    assert out["requeued"] == 2 and {r["run_id"] for r in out["runs"]} == {c["run_id"] for c in held}
    runs = {r["run_id"]: r for r in q.runs()}
    for c in held:
        assert runs[c["run_id"]]["state"] == "queued"
        assert runs[c["run_id"]]["reason"].startswith("requeued: worker host:9:0 was killed by SIGKILL")
        assert runs[c["run_id"]]["attempts"] == 1          # the death counts, as for a lapsed lease
    assert runs[other["run_id"]]["state"] == "running"     # another worker's run is left alone
    line = api.format_work({"done": 5, "failed": 0, "requeued": 2, "folders": ["/r/s"], "root": "/r",
                            "dead_workers": [{"worker": "host:9:0", "why": "was killed by SIGKILL", **out},
                                             {"worker": "host:9:2", "why": "was killed by SIGKILL",
                                              "requeued": 0, "failed": 0, "runs": []}]})
    assert "2 workers died (was killed by SIGKILL) holding 2 runs: 2 requeued" in line


def test_a_worker_dying_too_often_fails_the_run_with_the_count(tmp_path):
    q = Queue(tmp_path)
    q.submit(study("s", [1.5]))
    for attempt in (1, 2):
        q.claim(f"host:{attempt}:0")
        q.requeue_worker(f"host:{attempt}:0", "was killed by SIGKILL", max_attempts=2)
    (run,) = q.runs()
    assert run["state"] == "failed"
    assert run["reason"].startswith("worker died 2 times (last heartbeat at ")
    assert run["reason"].endswith("which was killed by SIGKILL)")


# ------------------------------------------------- one run id, two studies
def test_a_run_queued_in_two_studies_is_computed_once(tmp_path):
    """Before: both studies submitted before either ran queued the run
    twice and both were computed (claimed one after the other, or at once
    by two workers).  Now the twin waits while its run id is running and
    becomes done with the shared result."""
    q = Queue(tmp_path)
    q.submit(study("a", [1.5, 2.0]))
    q.submit(study("b", [2.0, 2.5]))           # 2.0 is in both
    shared_id = [r["run_id"] for r in q.runs("a") if r["params"]["packet.width"] == 2.0][0]
    settings = WorkerSettings(checkpoint_seconds=NEVER, heartbeat_seconds=60.0)
    claims = [q.claim("w1"), q.claim("w2"), q.claim("w3")]
    ids = [(c["study"], c["run_id"]) for c in claims if c is not None]
    # three runs are claimable at once, not four: b's twin waits for a's
    assert len(ids) == 3 and ("b", shared_id) not in ids and ("a", shared_id) in ids
    assert q.claim("w4") is None and q.blocked() == 1
    for c in claims:
        assert execute_claim(q, c, c["worker"], settings) == "done"
    runs = {(r["study"], r["run_id"]): r for r in q.runs()}
    twin = runs[("b", shared_id)]
    assert twin["state"] == "done" and twin["reused_from"] == "a" and twin["executions"] == 0
    assert os.path.samefile(tmp_path / "a" / f"{shared_id}.nc", tmp_path / "b" / f"{shared_id}.nc")
    assert sum(r["executions"] for r in runs.values()) == 3          # 4 runs, 3 computed
    assert q.blocked() == 0 and q.claim("w5") is None
    assert q.drain_summary(0)["shared"] == 1


def test_a_twin_whose_run_fails_is_computed_in_its_own_study(tmp_path):
    q = Queue(tmp_path)
    q.submit(study("a", [2.0]))
    q.submit(study("b", [2.0]))
    first = q.claim("w1")
    assert q.claim("w2") is None
    q.fail(first["study"], first["run_id"], "w1", "norm grew")
    second = q.claim("w2")
    assert second is not None and second["study"] == "b"


def test_a_dask_task_stopped_by_a_full_disk_comes_back_queued_with_its_reason(tmp_path, monkeypatch):
    """The Dask driver settles a task from what it returns: the same
    outcome handling gives it the reason and the stop-claiming mark."""
    pytest.importorskip("distributed")
    from wavesweep.studies.executors import cluster

    class Stub:
        def put(self, msg):
            pass

        def is_set(self):
            return False

    real = cluster._TaskBooks

    def books(topic, stop_name):      # no cluster: the books without their distributed queue and event
        b = real.__new__(real)
        b.progress, b.stop, b.end, b._checked, b._stopped = Stub(), Stub(), None, 0.0, False
        return b

    monkeypatch.setattr(cluster, "_TaskBooks", books)
    q = Queue(tmp_path / "root")
    q.submit(study("s", [2.0]))
    no_room_after(monkeypatch, frames=2)
    claim = q.claim("host:1:dask", lease_seconds=60)
    end = cluster._task(claim, WorkerSettings(checkpoint_seconds=NEVER, heartbeat_seconds=60.0), "t", "s")
    assert end["outcome"] == DISK_FULL and end["state"] == "queued"
    assert end["reason"].startswith("disk full: cannot write the result ")
    assert q.runs()[0]["state"] == "running"      # the driver, not the task, settles it


def test_a_full_disk_met_writing_a_block_of_buffered_frames_loses_nothing(tmp_path, monkeypatch):
    """Frames wait in the writer and reach the file a block at a time, so a
    full disk is met at the block's write: inside the next checkpoint (which
    flushes the block first) it is DiskFull, the previous checkpoint stays
    as it was, and resuming from it gives the uninterrupted result."""
    ref, out, policy, first, before = _interrupted_run(tmp_path)
    original = ResultWriter._flush_snapshots
    blocks = []

    def flush_snapshots(self):
        if self._snaps:
            blocks.append(len(self._snaps))
            with self._room(len(self._snaps) * self._frame_bytes()):
                raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(self.tmp))
        return original(self)
    monkeypatch.setattr(ResultWriter, "_flush_snapshots", flush_snapshots)
    stops = iter([False, False, False, True])
    with pytest.raises(DiskFull, match="disk full: cannot write the result"):
        Simulation(job()).run(path=out, progress=False, checkpoint=policy, should_stop=lambda: next(stops))
    assert blocks == [2]          # the two frames of four more samples, buffered until the checkpoint flushes them
    monkeypatch.setattr(ResultWriter, "_flush_snapshots", original)
    _resumes_from_the_kept_checkpoint(ref, out, policy, first, before)   # whole, no .part left
