"""The SQLite run queue: submission, claims under concurrency, leases,
retry/cancel, status and the verification of result files."""
from __future__ import annotations

import copy
import multiprocessing
import os
import pickle
import sqlite3
import threading
import tomllib
from pathlib import Path

import netCDF4
import pytest

from wavesweep.studies.queue import STATES, Queue
from wavesweep.study import expand_study
from wavesweep.errors import JobError
from wavesweep.job import job_from_dict

FREE_1D = {   # as tests/conftest.py FREE_1D
    "title": "free packet",
    "grid": {"x": {"min": -60.0, "max": 60.0, "points": 512}, "boundary": "periodic"},
    "packet": {"kind": "gaussian", "center": -20.0, "width": 2.0, "momentum": 1.0},
    "evolve": {"dt": 0.02, "duration": 4.0, "scheme": "strang"},
    "record": {"every": 0.2, "snapshot_every": 1.0},
}


def study(name, momenta, widths=None):
    raw = copy.deepcopy(FREE_1D)
    raw["sweep"] = {"packet.momentum": list(momenta)}
    if widths is not None:
        raw["sweep"]["packet.width"] = list(widths)
    return expand_study(raw, name=name)


class Clock:
    def __init__(self, t=1_800_000_000.0):
        self.t = t

    def __call__(self):
        return self.t


def write_result(path, run_id):
    """A minimal stand-in for a result file: netCDF4 with the run_id attribute."""
    with netCDF4.Dataset(path, "w") as ds:
        ds.setncattr("run_id", run_id)
        ds.createDimension("time", 1)
        ds.createVariable("norm", "f8", ("time",))[:] = [1.0]


def finish(q, worker="w", write=True):
    """Claim one run, write its result file, complete it; returns the claim."""
    c = q.claim(worker)
    if write:
        write_result(c["result"], c["run_id"])
    q.complete(c["study"], c["run_id"], worker, 1.5)
    return c


def by_id(q, study=None):
    return {r["run_id"]: r for r in q.runs(study)}


# --------------------------------------------------------------- submission
def test_submit_twice_adds_nothing_the_second_time(tmp_path):
    q = Queue(tmp_path / "root")
    st = study("scan", [0.5, 1.0, 1.5])
    assert q.submit(st) == {"added": 3, "existing": 0, "reused": 0}
    assert q.submit(st) == {"added": 0, "existing": 3, "reused": 0}
    runs = q.runs()
    assert sorted(r["run_id"] for r in runs) == sorted(r.run_id for r in st.runs)
    assert {r["state"] for r in runs} == {"queued"}
    assert (tmp_path / "root" / "queue.sqlite").exists()
    import json
    manifest = json.loads((tmp_path / "root" / "scan" / "study.json").read_text())
    assert [r["run_id"] for r in manifest["runs"]] == [r.run_id for r in st.runs]
    assert manifest["axes"] == {"packet.momentum": [0.5, 1.0, 1.5]}


def test_changed_sweep_value_adds_only_the_new_run(tmp_path):
    import json
    q = Queue(tmp_path)
    first = study("scan", [0.5, 1.0, 1.5])
    q.submit(first)
    held = q.claim("w1")                  # a run in progress must not be disturbed
    second = study("scan", [0.5, 1.0, 2.0])
    assert q.submit(second) == {"added": 1, "existing": 2, "reused": 0}
    runs = by_id(q)
    assert len(runs) == 4
    new_id = (set(r.run_id for r in second.runs) - set(r.run_id for r in first.runs)).pop()
    assert runs[new_id]["state"] == "queued" and runs[new_id]["params"] == {"packet.momentum": 2.0}
    assert runs[held["run_id"]]["state"] == "running" and runs[held["run_id"]]["executions"] == 1
    manifest = json.loads((tmp_path / "scan" / "study.json").read_text())
    assert {r["run_id"] for r in manifest["runs"]} == set(runs)      # union of submissions
    assert manifest["axes"]["packet.momentum"] == [0.5, 1.0, 1.5, 2.0]
    assert manifest["submissions"] == 2
    assert q.manifest("scan") == manifest


def test_done_run_is_reused_by_another_study(tmp_path):
    q = Queue(tmp_path)
    q.submit(study("a", [0.5, 1.0]))
    done = [finish(q), finish(q)]
    ids = [c["run_id"] for c in done]
    (tmp_path / "a" / f"{ids[1]}.nc").unlink()     # a done run without its file is not reused
    out = q.submit(study("b", [0.5, 1.0, 1.5]))
    assert out == {"added": 2, "existing": 0, "reused": 1}
    b = by_id(q, "b")
    shared = b[ids[0]]
    assert shared["state"] == "done" and shared["executions"] == 0 and shared["reused_from"] == "a"
    copy_path = tmp_path / "b" / f"{ids[0]}.nc"
    assert shared["result"] == str(copy_path)
    assert copy_path.read_bytes() == (tmp_path / "a" / f"{ids[0]}.nc").read_bytes()
    assert b[ids[1]]["state"] == "queued"
    st = q.status()
    assert st["studies"]["b"] == {"queued": 2, "running": 0, "done": 1, "failed": 0, "cancelled": 0}
    # the shared file survives verification in both studies; a is failed for the deleted file
    assert st["studies"]["a"]["done"] == 1 and st["studies"]["a"]["failed"] == 1


def test_study_name_must_be_a_folder_name(tmp_path):
    q = Queue(tmp_path)
    st = study("ok", [1.0])
    for bad in ("", " ", "../up", "a/b", ".hidden", "queue.sqlite"):
        st.name = bad
        with pytest.raises(JobError, match="study"):
            q.submit(st)
    assert q.runs() == []


# ------------------------------------------------------------------- claims
def test_claim_returns_the_run_and_its_paths(tmp_path):
    q = Queue(tmp_path)
    st = study("scan", [0.5, 1.0])
    q.submit(st)
    c = q.claim("w1")
    first = st.runs[0]
    assert c["study"] == "scan" and c["run_id"] == first.run_id     # submission order
    assert c["params"] == {"packet.momentum": 0.5}
    assert c["attempt"] == 1 and c["execution"] == 1
    assert c["result"] == str(tmp_path / "scan" / f"{first.run_id}.nc")
    assert c["log"] == str(tmp_path / "scan" / f"{first.run_id}.log")
    assert c["checkpoint"] == str(tmp_path / "scan" / f"{first.run_id}.ckpt")
    assert job_from_dict(tomllib.loads(c["job_toml"])).run_id == first.run_id
    run = q.run("scan", first.run_id)
    assert run["state"] == "running" and run["worker"] == "w1" and run["heartbeat"] is not None
    assert q.claim("w2")["run_id"] == st.runs[1].run_id
    assert q.claim("w3") is None
    assert [h["new"] for h in q.history("scan", first.run_id)] == ["queued", "running"]


def _drain(root, name, barrier, results):
    q = Queue(root)
    barrier.wait(timeout=120)
    claimed = []
    while (c := q.claim(name)) is not None:
        claimed.append((c["study"], c["run_id"]))
        q.complete(c["study"], c["run_id"], name, 0.0)
    results.put((name, claimed))


def test_claim_is_atomic_across_processes(tmp_path):
    q = Queue(tmp_path)
    q.submit(study("big", [0.1 * (i + 1) for i in range(40)]))
    ctx = multiprocessing.get_context("spawn")
    barrier, results = ctx.Barrier(4), ctx.Queue()
    procs = [ctx.Process(target=_drain, args=(str(tmp_path), f"w{i}", barrier, results))
             for i in range(4)]
    for p in procs:
        p.start()
    got = dict(results.get(timeout=120) for _ in procs)
    for p in procs:
        p.join(timeout=60)
        assert p.exitcode == 0
    claims = [c for per in got.values() for c in per]
    assert len(claims) == 40 and len(set(claims)) == 40
    runs = by_id(q)
    assert {r["state"] for r in runs.values()} == {"done"}
    assert {r["executions"] for r in runs.values()} == {1}
    for name, per in got.items():       # the database agrees with each worker
        assert {runs[rid]["worker"] for _, rid in per} <= {name}


def _claim_one(q, results):
    results.put(q.claim("forked")["run_id"])


def test_a_queue_reconnects_in_another_thread_process_and_after_pickling(tmp_path):
    q = Queue(tmp_path)
    q.submit(study("s", [1.0, 2.0]))
    ctx = multiprocessing.get_context("fork")      # the parent's open connection is inherited
    results = ctx.Queue()
    child = ctx.Process(target=_claim_one, args=(q, results))
    child.start()
    forked = results.get(timeout=60)
    child.join(timeout=60)
    assert child.exitcode == 0 and q.run("s", forked)["worker"] == "forked"
    c = q.claim("w")
    assert c["run_id"] != forked
    out = []
    t = threading.Thread(target=lambda: out.append(q.heartbeat("s", c["run_id"], "w", 5, 10, 2.0)))
    t.start()
    t.join()
    assert out == [True]
    q2 = pickle.loads(pickle.dumps(q))
    assert q2.run("s", c["run_id"])["step"] == 5


# ------------------------------------------------------- leases and workers
def test_stale_runs_are_requeued_then_failed_after_max_attempts(tmp_path):
    clock = Clock()
    q = Queue(tmp_path, clock=clock)
    q.submit(study("s", [1.0]))
    for attempt in (1, 2, 3):
        c = q.claim(f"w{attempt}")
        assert c["attempt"] == attempt
        clock.t += 30
        assert q.requeue_stale(60) == {"requeued": 0, "failed": 0, "runs": []}
        assert q.heartbeat("s", c["run_id"], f"w{attempt}")
        clock.t += 61
        out = q.requeue_stale(60, max_attempts=3)
        assert not q.heartbeat("s", c["run_id"], f"w{attempt}")   # no longer this worker's
        assert not q.complete("s", c["run_id"], f"w{attempt}", 1.0)
    assert out["failed"] == 1 and out["requeued"] == 0
    run = q.run("s", c["run_id"])
    assert run["state"] == "failed" and run["executions"] == 3
    assert run["reason"].startswith("worker died 3 times (last heartbeat at ")
    assert "from w3" in run["reason"]
    assert q.claim("w4") is None
    assert [h["new"] for h in q.history("s", c["run_id"])] == \
        ["queued", "running", "queued", "running", "queued", "running", "failed"]


def test_requeue_keeps_progress_and_names_the_worker(tmp_path):
    clock = Clock()
    q = Queue(tmp_path, clock=clock)
    q.submit(study("s", [1.0]))
    c = q.claim("w1")
    q.heartbeat("s", c["run_id"], "w1", step=40, total=200, rate=10.0)
    clock.t += 100
    assert q.requeue_stale(60)["requeued"] == 1
    run = q.run("s", c["run_id"])
    assert run["state"] == "queued" and run["worker"] is None and run["step"] == 40
    assert "w1" in run["reason"] and "attempt 1 of 3" in run["reason"]
    with pytest.raises(ValueError, match="max_attempts"):
        q.requeue_stale(60, max_attempts=0)


def test_heartbeat_reports_progress_and_eta(tmp_path):
    clock = Clock()
    q = Queue(tmp_path, clock=clock)
    q.submit(study("s", [1.0, 2.0]))
    c = q.claim("w1")
    assert q.heartbeat("s", c["run_id"], "w1", step=100, total=1000, rate=50.0)
    assert not q.heartbeat("s", c["run_id"], "intruder", step=999)
    run = q.status(verify=False)["runs"][0]
    assert (run["step"], run["total"], run["rate"]) == (100, 1000, 50.0)
    assert run["eta_seconds"] == pytest.approx(900 / 50.0)
    clock.t += 3.0          # the worker went on since it reported
    assert q.status(verify=False)["runs"][0]["eta_seconds"] == pytest.approx(15.0)
    assert q.heartbeat("s", c["run_id"], "w1")        # None keeps the last progress
    assert q.run("s", c["run_id"])["step"] == 100
    assert q.status(verify=False)["runs"][1]["eta_seconds"] is None   # queued: no estimate
    assert q.complete("s", c["run_id"], "w1", 20.0)
    assert not q.heartbeat("s", c["run_id"], "w1")
    run = q.run("s", c["run_id"])
    assert run["state"] == "done" and run["step"] == 1000 and run["wall_seconds"] == 20.0
    assert run["eta_seconds"] is None


def test_execution_fences_a_reused_worker_name(tmp_path):
    q = Queue(tmp_path)
    q.submit(study("s", [1.0]))
    old = q.claim("host:1")
    q.release("s", old["run_id"], "host:1", "interrupted at step 3")
    new = q.claim("host:1")
    assert new["execution"] == old["execution"] + 1
    assert not q.heartbeat("s", new["run_id"], "host:1", execution=old["execution"])
    assert q.heartbeat("s", new["run_id"], "host:1", execution=new["execution"])


def test_release_requeues_without_spending_an_attempt(tmp_path):
    clock = Clock()
    q = Queue(tmp_path, clock=clock)
    q.submit(study("s", [1.0]))
    for _ in range(5):      # interrupted every night: never failed for it
        c = q.claim("w")
        assert c["attempt"] == 1
        assert q.release("s", c["run_id"], "w", "interrupted\nat step 7")
    run = q.run("s", c["run_id"])
    assert run["state"] == "queued" and run["attempts"] == 0 and run["executions"] == 5
    assert run["reason"] == "interrupted at step 7"
    assert not q.release("s", c["run_id"], "w", "again")    # not running: nothing to release
    c = q.claim("w")
    assert q.run("s", c["run_id"])["reason"] is None
    clock.t += 1000
    q.requeue_stale(60, max_attempts=1)
    assert q.run("s", c["run_id"])["reason"].startswith("worker died 1 time (")


def test_fail_keeps_a_one_line_reason(tmp_path):
    q = Queue(tmp_path)
    q.submit(study("s", [1.0]))
    c = q.claim("w")
    assert not q.fail("s", c["run_id"], "other", "not mine")
    assert q.fail("s", c["run_id"], "w", "norm grew to 1.7\n  at step 12\n" + "x" * 2000)
    run = q.run("s", c["run_id"])
    assert run["state"] == "failed"
    assert run["reason"].startswith("norm grew to 1.7 at step 12 x")
    assert "\n" not in run["reason"] and len(run["reason"]) <= 500


# ------------------------------------------------------------ retry, cancel
def test_retry_requeues_failed_runs_and_the_named_ones(tmp_path):
    q = Queue(tmp_path)
    q.submit(study("s", [0.5, 1.0, 1.5, 2.0]))
    ok = finish(q)
    bad = q.claim("w")
    q.fail("s", bad["run_id"], "w", "blew up")
    cancelled = q.runs()[3]["run_id"]
    q.cancel([cancelled])
    queued = q.runs()[2]["run_id"]
    assert q.retry() == 1                       # only the failed one
    run = q.run("s", bad["run_id"])
    assert run["state"] == "queued" and run["attempts"] == 0 and run["reason"] is None
    assert q.run("s", cancelled)["state"] == "cancelled"
    assert q.run("s", ok["run_id"])["state"] == "done"
    assert q.retry([ok["run_id"], cancelled, queued]) == 2    # done and cancelled; queued stays
    assert q.run("s", ok["run_id"])["state"] == "queued"
    assert q.run("s", cancelled)["state"] == "queued"
    with pytest.raises(JobError, match="'feedfacecafe' not in the queue"):
        q.retry(["feedfacecafe", queued])
    with pytest.raises(JobError, match="in study 'other'"):
        q.retry([queued], study="other")


def test_retry_without_ids_requeues_done_runs_whose_result_is_gone(tmp_path):
    q = Queue(tmp_path)
    q.submit(study("s", [0.5, 1.0]))
    kept, lost = finish(q), finish(q)
    (tmp_path / "s" / f"{lost['run_id']}.nc").unlink()
    assert q.retry() == 1
    assert q.run("s", lost["run_id"])["state"] == "queued"
    assert q.run("s", kept["run_id"])["state"] == "done"


def test_retry_and_cancel_can_be_limited_to_a_study(tmp_path):
    q = Queue(tmp_path)
    q.submit(study("a", [0.5, 1.0]))
    q.submit(study("b", [1.5, 2.0]))
    assert q.cancel(study="b") == 2
    counts = q.status(verify=False)["studies"]
    assert counts["a"]["queued"] == 2 and counts["b"]["cancelled"] == 2
    assert q.retry(study="a") == 0
    assert q.retry([r["run_id"] for r in q.runs("b")], study="b") == 2
    assert q.status(verify=False)["studies"]["b"]["queued"] == 2


def test_cancel_stops_queued_runs_and_named_running_ones(tmp_path):
    q = Queue(tmp_path)
    q.submit(study("s", [0.5, 1.0, 1.5]))
    running = q.claim("w")
    assert q.cancel() == 2                      # queued only
    assert q.run("s", running["run_id"])["state"] == "running"
    assert q.claim("w2") is None
    assert q.cancel([running["run_id"]]) == 1   # named: its worker is told to stop
    assert not q.heartbeat("s", running["run_id"], "w")
    assert not q.complete("s", running["run_id"], "w", 1.0)
    run = q.run("s", running["run_id"])
    assert run["state"] == "cancelled" and "while running on w" in run["reason"]
    assert q.cancel() == 0
    with pytest.raises(JobError, match="not in the queue"):
        q.cancel(["0123456789ab"])


# ---------------------------------------------------------- status, verify
def test_status_counts_every_state_per_study(tmp_path):
    q = Queue(tmp_path)
    q.submit(study("a", [0.5, 1.0, 1.5, 2.0, 2.5]))
    q.submit(study("b", [3.0]))
    finish(q)
    c = q.claim("w")
    q.fail(c["study"], c["run_id"], "w", "nan")
    q.claim("w")
    q.cancel([q.runs("a")[3]["run_id"]])
    st = q.status()
    assert st["studies"] == {
        "a": {"queued": 1, "running": 1, "done": 1, "failed": 1, "cancelled": 1},
        "b": {"queued": 1, "running": 0, "done": 0, "failed": 0, "cancelled": 0}}
    assert len(st["runs"]) == 6
    assert set(st["runs"][0]) >= {"study", "run_id", "state", "attempts", "executions", "step",
                                  "total", "rate", "eta_seconds", "reason", "result", "params"}
    failed = [r for r in st["runs"] if r["state"] == "failed"]
    assert [r["reason"] for r in failed] == ["nan"]
    assert sum(st["studies"]["a"].values()) == 5 and set(st["studies"]["a"]) == set(STATES)


def test_verify_fails_missing_and_corrupt_results_and_retry_requeues_them(tmp_path):
    q = Queue(tmp_path)
    q.submit(study("s", [0.5, 1.0, 1.5, 2.0]))
    good, missing, corrupt, wrong = (finish(q) for _ in range(4))
    assert q.status()["studies"]["s"]["done"] == 4           # all readable
    (tmp_path / "s" / f"{missing['run_id']}.nc").unlink()
    (tmp_path / "s" / f"{corrupt['run_id']}.nc").write_bytes(b"\x89HDF\r\n\x1a\n" + b"garbage" * 50)
    write_result(tmp_path / "s" / f"{wrong['run_id']}.nc", good["run_id"])   # another run's file
    st = q.status()
    assert st["studies"]["s"] == {"queued": 0, "running": 0, "done": 1, "failed": 3, "cancelled": 0}
    runs = {r["run_id"]: r for r in st["runs"]}
    assert runs[good["run_id"]]["state"] == "done"
    assert runs[missing["run_id"]]["reason"] == "result file missing"
    assert runs[corrupt["run_id"]]["reason"].startswith("result file unreadable: ")
    assert runs[wrong["run_id"]]["reason"] == (
        f"result file unreadable: it holds run {good['run_id']!r}, not {wrong['run_id']!r}")
    assert all("\n" not in r["reason"] for r in runs.values() if r["reason"])
    assert q.status(verify=False)["studies"]["s"]["failed"] == 3      # it was written down
    assert q.retry() == 3
    assert q.status()["studies"]["s"] == {"queued": 3, "running": 0, "done": 1, "failed": 0,
                                          "cancelled": 0}


def test_verify_reopens_a_result_only_when_it_changed(tmp_path, monkeypatch):
    import wavesweep.studies.queue as queue_module

    q = Queue(tmp_path)
    q.submit(study("s", [1.0]))
    c = finish(q)
    opened = []
    real = queue_module.check_result
    monkeypatch.setattr(queue_module, "check_result", lambda p, r: opened.append(p) or real(p, r))
    q.status()
    q.status()
    assert len(opened) == 1
    (tmp_path / "s" / f"{c['run_id']}.nc").write_bytes(b"not netCDF at all")
    assert q.status()["studies"]["s"]["failed"] == 1
    assert len(opened) == 2


# -------------------------------------------------------------- persistence
def test_a_fresh_queue_on_the_same_root_sees_everything(tmp_path):
    clock = Clock()
    q = Queue(tmp_path, clock=clock)
    q.submit(study("a", [0.5, 1.0, 1.5]))
    finish(q)
    c = q.claim("w")
    q.heartbeat("a", c["run_id"], "w", step=3, total=9, rate=1.5)
    before = q.status()
    q.close()
    again = Queue(tmp_path, clock=clock)
    assert again.status() == before
    assert again.manifest("a") == q.manifest("a")
    assert again.submit(study("a", [0.5, 1.0, 1.5])) == {"added": 0, "existing": 3, "reused": 0}
    assert again.heartbeat("a", c["run_id"], "w")     # the lease carries over
    raw = sqlite3.connect(tmp_path / "queue.sqlite")
    assert raw.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert raw.execute("PRAGMA user_version").fetchone()[0] == 1
    raw.close()


# ------------------------------------------------- roots that cannot be used
def _assert_root_error(info, *pieces):
    e = info.value
    assert e.field == "--root", str(e)
    assert "\n" not in str(e)
    for piece in pieces:
        assert piece in str(e), str(e)


@pytest.mark.parametrize("where", ["a-file", "a-file/sub", "proc"])
def test_a_root_that_cannot_be_created_is_a_root_error(tmp_path, where):
    """A file where the folder should be, a folder under a file, a folder
    the kernel refuses (/proc): JobError("--root") naming the path."""
    (tmp_path / "a-file").write_text("not a folder\n")
    if where == "proc":
        if not os.path.isdir("/proc/self"):
            pytest.skip("no /proc here")
        root = Path("/proc/wavesweep-no-such-queue")
    else:
        root = tmp_path / where
    with pytest.raises(JobError) as info:
        Queue(root)
    _assert_root_error(info, str(root), "--root")
    assert (tmp_path / "a-file").read_text() == "not a folder\n"


@pytest.mark.parametrize("what", ["folder", "garbage"])
def test_a_queue_file_that_is_not_a_queue_is_a_root_error(tmp_path, what):
    db = tmp_path / "queue.sqlite"
    if what == "folder":
        db.mkdir()
    else:
        db.write_bytes(b"this is not an SQLite database, just some bytes\n" * 20)
    before = db.read_bytes() if what == "garbage" else None
    with pytest.raises(JobError) as info:
        Queue(tmp_path)
    _assert_root_error(info, str(db))
    if before is not None:
        assert db.read_bytes() == before          # never "repaired" or overwritten


@pytest.fixture
def read_only(monkeypatch):
    """Every new connection refuses writes as a read-only database does
    (SQLite's query_only: SQLITE_READONLY on the first write)."""
    original = Queue._connect

    def connect(self):
        conn = original(self)
        conn.execute("PRAGMA query_only=ON")
        return conn

    def switch(on=True):
        if on:
            monkeypatch.setattr(Queue, "_connect", connect)
        else:
            monkeypatch.setattr(Queue, "_connect", original)
    return switch


def test_a_read_only_queue_refuses_changes_and_keeps_everything(tmp_path, read_only):
    q = Queue(tmp_path)
    q.submit(study("a", [0.5, 1.0, 1.5]))
    finish(q)
    failed = q.claim("w")
    q.fail("a", failed["run_id"], "w", "norm grew")
    before = q.status()                        # done, failed, queued
    manifest = (tmp_path / "a" / "study.json").read_bytes()
    q.close()

    read_only(True)
    ro = Queue(tmp_path)                       # opening and reading still work
    assert ro.runs() == before["runs"]
    changes = {"check_writable": lambda: ro.check_writable(),
               "submit more": lambda: ro.submit(study("a", [0.5, 1.0, 2.0])),
               "submit reusing": lambda: ro.submit(study("b", [0.5])),   # a's result, linked
               "retry": lambda: ro.retry(),
               "cancel": lambda: ro.cancel(),
               "claim": lambda: ro.claim("w2")}
    for name, change in changes.items():
        with pytest.raises(JobError) as info:
            change()
        _assert_root_error(info, "read-only", str(tmp_path))
    ro.close()

    read_only(False)
    again = Queue(tmp_path)
    assert again.status() == before            # nothing changed, nothing lost
    assert (tmp_path / "a" / "study.json").read_bytes() == manifest
    assert list((tmp_path / "b").glob("*.nc")) == []     # the link made for b was taken back


def test_check_writable_needs_the_study_folders_too(tmp_path):
    q = Queue(tmp_path)
    q.submit(study("a", [0.5]))
    q.check_writable(["a"])                    # a writable queue: no error, nothing made
    assert sorted(p.name for p in (tmp_path / "a").iterdir()) == ["study.json"]
    (tmp_path / "b").write_text("a file where the study folder b should be\n")
    with pytest.raises(JobError) as info:
        q.check_writable(["a", "b"])
    _assert_root_error(info, str(tmp_path / "b"))


def test_drain_summary_counts_what_one_drains_workers_did(tmp_path):
    clock = Clock()
    q = Queue(tmp_path, clock=clock)
    q.submit(study("a", [0.5, 1.0, 1.5, 2.0, 2.5]))
    q.submit(study("b", [3.0]))
    earlier = q.claim("host:1:0")              # before the mark: a dead worker's run
    mark = q.last_event()
    assert mark > 0
    c = q.claim("host:7:0")
    q.complete(c["study"], c["run_id"], "host:7:0", 1.0)
    c = q.claim("host:7:1")
    q.fail(c["study"], c["run_id"], "host:7:1", "norm grew")
    c = q.claim("host:7:0")
    q.release(c["study"], c["run_id"], "host:7:0", "interrupted at step 3")
    other = q.claim("host:70:0")               # another drain's worker, same prefix digits
    q.complete(other["study"], other["run_id"], "host:70:0", 1.0)
    clock.t += 1000
    q.requeue_stale(60)                        # the earlier claim: requeued, not this drain's worker
    assert q.drain_summary(mark, worker_prefix="host:7:") == {
        "done": 1, "failed": 1, "requeued": 1, "disk_full": 0, "disk_full_reason": None, "shared": 0,
        "studies": ["a"]}
    everyone = q.drain_summary(mark)
    assert (everyone["done"], everyone["failed"], everyone["requeued"]) == (2, 1, 1)
    assert q.drain_summary(q.last_event()) == {"done": 0, "failed": 0, "requeued": 0, "disk_full": 0,
                                               "disk_full_reason": None, "shared": 0, "studies": []}
    assert earlier["run_id"] in {r["run_id"] for r in q.runs() if r["state"] == "queued"}
