"""Checkpoint and resume (io/checkpoint.py, Simulation.run with a policy).

The reference for every check is the same job run without interruption in
the same code: a resumed run continues from psi, the step count and the
absorbed probability at a sample boundary, so it must reproduce that run's
dataset (to 1e-12; in practice bit for bit), with the same sample and
snapshot times (no frame lost or written twice) and the same attributes
except ``wall_seconds``.  Jobs are tiny (tens of samples, 256 points or
64 x 48) except the kill -9 one, which runs in a child process for a few
seconds.
"""
from __future__ import annotations

import copy
import json
import logging
import os
import signal
import subprocess
import sys
import textwrap
import time

import netCDF4
import numpy as np
import pytest
import xarray as xr

from wavesweep.errors import JobError, RunFailed, RunInterrupted
from wavesweep.io import checkpoint as ckmod
from wavesweep.io.checkpoint import CheckpointMismatch, CheckpointPolicy, ResultExists
from wavesweep.io.recorder import ResultWriter
from wavesweep.job import job_from_dict
from wavesweep.run import Simulation
from wavesweep.setup import resolve_job

JOB_1D = {
    "title": "checkpoint 1D",
    "grid": {"x": {"min": -40.0, "max": 40.0, "points": 256}, "boundary": "periodic"},
    "potential": [{"kind": "barrier", "height": 0.5, "width": 1.0, "center": 0.0}],
    "packet": {"kind": "gaussian", "center": -10.0, "width": 2.0, "momentum": 1.5},
    "evolve": {"dt": 0.05, "duration": 6.0, "scheme": "strang"},
    "absorber": {"kind": "cap", "thickness": 8.0},
    "record": {"every": 0.2, "snapshot_every": 0.6},   # a snapshot every third sample
    "detector": [{"name": "before", "x": -5.0}, {"name": "after", "x": 10.0}],
}

JOB_2D = {
    "title": "checkpoint 2D",
    "grid": {"x": {"min": -20.0, "max": 20.0, "points": 64}, "y": {"min": -16.0, "max": 16.0, "points": 48}},
    "potential": [{"kind": "barrier", "height": 0.5, "width": 1.0, "center": 0.0}],
    "packet": {"center": [-5.0, 0.0], "width": [1.5, 1.5], "momentum": [1.5, 0.3]},
    "evolve": {"dt": 0.05, "duration": 2.0},
    "absorber": {"kind": "cap", "thickness": 4.0},
    "record": {"every": 0.1, "snapshot_every": 0.2, "stride": 2},
    "detector": [{"name": "right", "x": 5.0}, {"name": "side", "y": 4.0}],
}

NEVER = 1e9   # every_seconds: only should_stop checkpoints


def job(table, **evolve):
    t = copy.deepcopy(table)
    t["evolve"].update(evolve)
    return resolve_job(job_from_dict(t))


def run(table, path, **kw):
    kw.setdefault("progress", False)
    return Simulation(job(table, **kw.pop("evolve", {}))).run(path=path, **kw)


def stop_after(k):
    """should_stop that turns True at its k-th call (one call per sample)."""
    calls = [0]

    def should_stop():
        calls[0] += 1
        return calls[0] >= k
    return should_stop


def checkpoint_files(folder, policy):
    return sorted(p.name for p in folder.iterdir() if p.name.startswith(policy.path.name)
                  or p.name.startswith(f".{policy.path.name}"))


def assert_same_result(ref_path, path):
    a, b = xr.load_dataset(ref_path), xr.load_dataset(path)
    assert set(a.data_vars) == set(b.data_vars)
    assert dict(a.sizes) == dict(b.sizes)
    for name in ("time", "snapshot_time"):
        np.testing.assert_array_equal(b[name].values, a[name].values)
        assert np.all(np.diff(b[name].values) > 0), f"{name} repeats or goes back"
    for name in a.data_vars:
        x, y = a[name].values, b[name].values
        if x.dtype.kind in "fc":
            np.testing.assert_allclose(y, x, rtol=0, atol=1e-12, err_msg=name)
        else:
            np.testing.assert_array_equal(y, x, err_msg=name)
    strip = lambda attrs: {k: v for k, v in attrs.items() if k != "wall_seconds"}  # noqa: E731
    assert strip(b.attrs) == strip(a.attrs)
    assert b.attrs["wall_seconds"] > 0


# (1) interrupted twice, resumed twice --------------------------------------
@pytest.mark.parametrize("table, scheme, stops", [
    (JOB_1D, "strang", (3, 7)),          # at a snapshot, then between snapshots
    (JOB_1D, "order4", (5, 4)),
    (JOB_1D, "crank_nicolson", (1, 20)),
    (JOB_2D, "strang", (2, 3)),
    (JOB_2D, "order4", (1, 16)),
    # single precision: its norm keeping (the measured kicks' count, scale and reference) goes into the
    # checkpoint, so the resumed run takes the uninterrupted run's kicks (before, its norm moved by 2.4e-6)
    (JOB_1D, "strang/single", (3, 7)),
    (JOB_2D, "strang/single", (2, 3)),
], ids=["1d-strang", "1d-order4", "1d-cn", "2d-strang", "2d-order4", "1d-strang-single", "2d-strang-single"])
def test_interrupted_twice_then_resumed_equals_uninterrupted_run(tmp_path, table, scheme, stops):
    scheme, _, precision = scheme.partition("/")
    ev = {"scheme": scheme, **({"precision": precision} if precision else {})}
    ref = run(table, tmp_path / "ref.nc", evolve=ev)
    sample_steps = round(table["record"]["every"] / table["evolve"]["dt"])
    policy = CheckpointPolicy(tmp_path / "run.ckpt", every_seconds=NEVER)
    out = tmp_path / "out" / "result.nc"
    reached = 0
    for k in stops:
        with pytest.raises(RunInterrupted) as info:
            run(table, out, evolve=ev, checkpoint=policy, should_stop=stop_after(k))
        reached += k * sample_steps
        assert info.value.step == reached
        assert info.value.checkpoint == policy.path and policy.path.exists()
        assert not out.exists() and not (out.parent / f".{out.name}.part").exists()
        # one state and the one result copy it names
        assert checkpoint_files(tmp_path, policy) == ["run.ckpt", f"run.ckpt.result-{stops.index(k) + 1:06d}.nc"]
        with netCDF4.Dataset(tmp_path / checkpoint_files(tmp_path, policy)[1]) as ds:
            assert len(ds.dimensions["time"]) == reached // sample_steps + 1
    assert run(table, out, evolve=ev, checkpoint=policy) == out
    assert checkpoint_files(tmp_path, policy) == []      # deleted on completion
    assert sorted(p.name for p in out.parent.iterdir()) == ["result.nc"]
    assert_same_result(ref, out)


def test_timed_checkpoints_leave_the_result_unchanged(tmp_path):
    """every_seconds = 0: a checkpoint (close, copy, reopen for append) after
    every sample; the result is the same as a run without any."""
    ref = run(JOB_2D, tmp_path / "ref.nc")
    policy = CheckpointPolicy(tmp_path / "c.ckpt", every_seconds=0.0)
    saves = []
    orig = ckmod.CheckpointStore.save

    def counting(self, *a, **kw):
        saves.append(1)
        return orig(self, *a, **kw)
    ckmod.CheckpointStore.save = counting
    try:
        out = run(JOB_2D, tmp_path / "out.nc", checkpoint=policy)
    finally:
        ckmod.CheckpointStore.save = orig
    assert len(saves) == 19    # 20 samples after the start, none after the last
    assert checkpoint_files(tmp_path, policy) == []
    assert_same_result(ref, out)


# (2) kill -9 in a child process -------------------------------------------
CHILD = textwrap.dedent("""
    import json, sys, time
    from wavesweep.io.checkpoint import CheckpointPolicy
    from wavesweep.job import job_from_dict
    from wavesweep.run import Simulation
    table = json.loads(sys.argv[1])
    # a slow job: 10 ms of pretend work per sample on top of the stepping
    Simulation(job_from_dict(table)).run(path=sys.argv[2], progress=False,
        checkpoint=CheckpointPolicy(sys.argv[3], every_seconds=0.2),
        on_sample=lambda step, total, rate: time.sleep(0.01))
""")


def test_kill_minus_9_then_resume_equals_uninterrupted_run(tmp_path):
    table = copy.deepcopy(JOB_1D)
    table["grid"]["x"]["points"] = 1024
    table["evolve"].update(duration=80.0, scheme="order4")   # 400 samples: ~4 s with the sleeps
    table["record"].update(every=0.2, snapshot_every=0.4)
    out, ckpt = tmp_path / "out" / "result.nc", tmp_path / "out" / "run.ckpt"
    child = subprocess.Popen([sys.executable, "-c", CHILD, json.dumps(table), str(out), str(ckpt)],
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        deadline = time.monotonic() + 60
        while not ckpt.exists():
            assert child.poll() is None, child.stderr.read().decode()
            assert time.monotonic() < deadline, "no checkpoint within 60 s"
            time.sleep(0.02)
        time.sleep(1.5)   # several more checkpoints and appends
        assert child.poll() is None, "the child finished before it could be killed: make its job longer"
        child.send_signal(signal.SIGKILL)
        child.wait(30)
    finally:
        if child.poll() is None:
            child.kill()
            child.wait()
    assert child.returncode == -signal.SIGKILL
    assert not out.exists()
    with np.load(ckpt) as z:
        meta = json.loads(str(z["meta"][()]))
    assert 0 < meta["steps"] < 1600
    # the child's .part may be torn; resuming starts from the checkpoint's copy
    assert run(table, out, checkpoint=CheckpointPolicy(ckpt, every_seconds=NEVER)) == out
    ref = run(table, tmp_path / "ref.nc")
    assert_same_result(ref, out)
    assert xr.load_dataset(out).attrs["wall_seconds"] >= meta["wall_seconds"]
    assert sorted(p.name for p in out.parent.iterdir()) == ["result.nc"]


def test_crash_inside_a_checkpoint_resumes_from_the_previous_one(tmp_path, monkeypatch, caplog):
    """Killed after the third result copy is in place but before the state
    naming it is committed: the second state and its copy are still there
    and still agree."""
    policy = CheckpointPolicy(tmp_path / "c.ckpt", every_seconds=0.0)
    real_rename = ckmod.atomic_rename
    renames = []

    def crash_on_third_state(tmp, final, *a, **kw):
        if final == policy.path:
            renames.append(final)
            if len(renames) == 3:
                raise KeyboardInterrupt("simulated kill during the state's rename")
        return real_rename(tmp, final, *a, **kw)
    monkeypatch.setattr(ckmod, "atomic_rename", crash_on_third_state)
    out = tmp_path / "out.nc"
    with pytest.raises(KeyboardInterrupt):
        run(JOB_1D, out, checkpoint=policy)
    monkeypatch.setattr(ckmod, "atomic_rename", real_rename)
    assert "c.ckpt.result-000003.nc" in checkpoint_files(tmp_path, policy)
    with np.load(policy.path) as z:
        meta = json.loads(str(z["meta"][()]))
    assert meta["generation"] == 2 and meta["steps"] == 2 * 4
    with caplog.at_level(logging.INFO, logger="wavesweep"):
        run(JOB_1D, out, checkpoint=CheckpointPolicy(policy.path, every_seconds=NEVER))
    assert any("resuming" in r.getMessage() and "at step 8 " in r.getMessage() for r in caplog.records)
    assert checkpoint_files(tmp_path, policy) == []
    assert_same_result(run(JOB_1D, tmp_path / "ref.nc"), out)


# (3) a checkpoint of another job ------------------------------------------
def test_checkpoint_of_another_job_is_refused(tmp_path):
    policy = CheckpointPolicy(tmp_path / "shared.ckpt", every_seconds=NEVER)
    out = tmp_path / "a.nc"
    with pytest.raises(RunInterrupted):
        run(JOB_1D, out, checkpoint=policy, should_stop=stop_after(4))
    before = {name: (tmp_path / name).read_bytes() for name in checkpoint_files(tmp_path, policy)}
    other = copy.deepcopy(JOB_1D)
    other["potential"][0]["height"] = 0.7
    with pytest.raises(CheckpointMismatch) as info:
        run(other, tmp_path / "b.nc", checkpoint=policy)
    assert isinstance(info.value, JobError)           # the CLI's one-line exit 2
    msg = str(info.value)
    assert job(JOB_1D).run_id in msg and job(other).run_id in msg and "shared.ckpt" in msg
    assert "\n" not in msg
    assert {name: (tmp_path / name).read_bytes() for name in checkpoint_files(tmp_path, policy)} == before
    assert not (tmp_path / "b.nc").exists() and not (tmp_path / ".b.nc.part").exists()
    # the rightful owner still resumes from it
    run(JOB_1D, out, checkpoint=policy)
    assert_same_result(run(JOB_1D, tmp_path / "ref.nc"), out)


# (4) a damaged checkpoint: warning, clean restart ------------------------
def _truncate(p):
    p.write_bytes(p.read_bytes()[: p.stat().st_size // 2])


def _garbage(p):
    p.write_bytes(os.urandom(3000))


def _flip_psi_byte(p):
    b = bytearray(p.read_bytes())
    i = b.index(b"psi.npy") + 400        # inside psi's data (local header, npy header, data)
    b[i] ^= 0x5A
    p.write_bytes(bytes(b))


def _empty(p):
    p.write_bytes(b"")


@pytest.mark.parametrize("damage, which", [
    (_truncate, "state"), (_garbage, "state"), (_flip_psi_byte, "state"), (_empty, "state"),
    (_truncate, "copy"), (_garbage, "copy"), (lambda p: p.unlink(), "copy"),
], ids=["truncated-state", "garbage-state", "flipped-psi", "empty-state",
        "truncated-copy", "garbage-copy", "missing-copy"])
def test_damaged_checkpoint_restarts_from_scratch(tmp_path, caplog, monkeypatch, damage, which):
    policy = CheckpointPolicy(tmp_path / "c.ckpt", every_seconds=NEVER)
    out = tmp_path / "out.nc"
    with pytest.raises(RunInterrupted):
        run(JOB_1D, out, checkpoint=policy, should_stop=stop_after(6))
    target = policy.path if which == "state" else tmp_path / "c.ckpt.result-000001.nc"
    damage(target)
    restarts = []
    orig_resume = ResultWriter.resume.__func__
    monkeypatch.setattr(ResultWriter, "resume", classmethod(
        lambda cls, *a, **kw: restarts.append(a) or orig_resume(cls, *a, **kw)))
    with caplog.at_level(logging.WARNING, logger="wavesweep"):
        assert run(JOB_1D, out, checkpoint=policy) == out
    # from scratch: the writer started a new file, not one from a copy
    assert restarts == []
    warnings = [r for r in caplog.records if r.levelno == logging.WARNING]
    assert len(warnings) == 1 and "from scratch" in warnings[0].getMessage()
    assert "c.ckpt" in warnings[0].getMessage()
    assert checkpoint_files(tmp_path, policy) == []
    assert_same_result(run(JOB_1D, tmp_path / "ref.nc"), out)


# a finished result is never overwritten -----------------------------------
def test_finished_result_is_never_overwritten_with_a_policy(tmp_path):
    policy = CheckpointPolicy(tmp_path / "c.ckpt", every_seconds=NEVER)
    out = run(JOB_1D, tmp_path / "out.nc", checkpoint=policy)
    content, mtime = out.read_bytes(), out.stat().st_mtime_ns
    with pytest.raises(ResultExists) as info:
        run(JOB_1D, out, checkpoint=policy)
    assert isinstance(info.value, FileExistsError) and "out.nc" in str(info.value)
    assert out.read_bytes() == content and out.stat().st_mtime_ns == mtime
    assert not (tmp_path / ".out.nc.part").exists()
    # a checkpoint left behind by a kill after the rename is stale: removed
    with pytest.raises(RunInterrupted):
        run(JOB_1D, tmp_path / "other.nc", checkpoint=policy, should_stop=stop_after(2))
    with pytest.raises(ResultExists):
        run(JOB_1D, out, checkpoint=policy)
    assert checkpoint_files(tmp_path, policy) == []
    # without a policy (plain `wavesweep run`) a rerun replaces its own file
    run(JOB_1D, out)
    assert out.stat().st_mtime_ns != mtime


def test_result_finished_by_another_worker_meanwhile_is_kept(tmp_path, monkeypatch):
    """The final rename of a checkpointed run never replaces a file that
    appeared while it ran (hard link, not rename over)."""
    out = tmp_path / "out.nc"
    policy = CheckpointPolicy(tmp_path / "c.ckpt", every_seconds=NEVER)

    def other_worker_finishes(step, total, rate):
        if step == total:
            out.write_bytes(b"the other worker's result")
    with pytest.raises(ResultExists):
        run(JOB_1D, out, checkpoint=policy, on_sample=other_worker_finishes)
    assert out.read_bytes() == b"the other worker's result"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.nc"]


def test_should_stop_without_a_policy_stops_and_leaves_nothing(tmp_path):
    out = tmp_path / "out.nc"
    with pytest.raises(RunInterrupted) as info:
        run(JOB_1D, out, should_stop=stop_after(3))
    assert info.value.checkpoint is None and info.value.step == 12
    assert list(tmp_path.iterdir()) == []


def test_failed_run_discards_its_checkpoint(tmp_path, monkeypatch):
    """A numerical failure is final: nothing is left to resume from."""
    policy = CheckpointPolicy(tmp_path / "c.ckpt", every_seconds=0.0)
    calls = [0]
    orig = Simulation._health

    def fail_at_fifth(self, values, absorbed, t_au, step):
        calls[0] += 1
        if calls[0] == 5:
            raise RunFailed("simulated blow-up", step)
        return orig(self, values, absorbed, t_au, step)
    monkeypatch.setattr(Simulation, "_health", fail_at_fifth)
    with pytest.raises(RunFailed):
        run(JOB_1D, tmp_path / "out.nc", checkpoint=policy)
    assert list(tmp_path.iterdir()) == []


def test_policy_validates_its_interval(tmp_path):
    with pytest.raises(ValueError, match="every_seconds"):
        CheckpointPolicy(tmp_path / "c", every_seconds=-1.0)
    assert CheckpointPolicy(str(tmp_path / "c")).path == tmp_path / "c"


def test_neighbouring_checkpoints_are_left_alone(tmp_path):
    """Clean-up removes only this checkpoint's files, not those of a run
    whose checkpoint name merely starts the same."""
    mine = CheckpointPolicy(tmp_path / "run.ckpt", every_seconds=NEVER)
    other = CheckpointPolicy(tmp_path / "run.ckpt2", every_seconds=NEVER)
    other_table = copy.deepcopy(JOB_1D)
    other_table["packet"]["momentum"] = 1.2
    with pytest.raises(RunInterrupted):
        run(other_table, tmp_path / "other.nc", checkpoint=other, should_stop=stop_after(2))
    theirs = sorted(p.name for p in tmp_path.iterdir())
    assert theirs == ["run.ckpt2", "run.ckpt2.result-000001.nc"]
    with pytest.raises(RunInterrupted):
        run(JOB_1D, tmp_path / "mine.nc", checkpoint=mine, should_stop=stop_after(2))
    run(JOB_1D, tmp_path / "mine.nc", checkpoint=mine)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["mine.nc", *theirs]
    run(other_table, tmp_path / "other.nc", checkpoint=other)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["mine.nc", "other.nc"]
