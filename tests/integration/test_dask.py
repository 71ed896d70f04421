"""Draining the queue on a Dask cluster (LocalCluster on loopback).

Reference: the local executor's results of the same study (itself checked
against closed forms elsewhere) and an uninterrupted run of the same job.
"""
from __future__ import annotations

import copy
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
import tomli_w
import xarray as xr

distributed = pytest.importorskip("distributed")

from wavesweep.studies.api import submit, work  # noqa: E402
from wavesweep.studies.queue import Queue  # noqa: E402

STUDY = {
    "title": "dask study",
    "grid": {"x": {"min": -60.0, "max": 60.0, "points": 512}},
    "potential": [{"kind": "barrier", "height": 0.4, "width": 1.0}],
    "packet": {"center": -20.0, "width": 3.0, "momentum": 1.0},
    "absorber": {"kind": "cap", "thickness": 10.0},
    "evolve": {"dt": 0.05, "duration": 10.0},
    "record": {"every": 0.5},
    "detector": [{"name": "beyond", "x": 10.0}],
    "sweep": {"packet.momentum": {"start": 0.8, "stop": 1.4, "num": 12}},
}


def queued(tmp_path, table, name):
    path = tmp_path / f"{name}.toml"
    path.write_text(tomli_w.dumps(table))
    root = tmp_path / f"root-{name}"
    submit(path, root)
    return root


def results(root):
    """The result of every run that is done, by run id."""
    q = Queue(root)
    return {r["run_id"]: xr.load_dataset(q.result_path(r["study"], r["run_id"]))
            for r in q.runs() if r["state"] == "done"}


def assert_identical(a, b, rtol=1e-12):
    for name in a.data_vars:
        x, y = a[name].values, b[name].values
        if x.dtype.kind in "fc":
            scale = max(float(np.nanmax(np.abs(x))), 1.0 if name in ("norm", "absorbed") else 1e-300)
            assert np.nanmax(np.abs(x - y)) <= rtol * scale, name


def test_a_local_cluster_drains_a_study_like_the_local_executor(tmp_path):
    """Issue check: two worker processes on loopback drain 12 runs; every
    result equals the local executor's to 1e-12."""
    dask_root = queued(tmp_path, STUDY, "dask")
    local_root = queued(tmp_path, STUDY, "local")
    out = work(dask_root, dask="local:2")
    assert out["done"] == 12 and out["failed"] == 0
    work(local_root, workers=1, batch=1)
    got, want = results(dask_root), results(local_root)
    assert set(got) == set(want) and len(got) == 12
    for rid in want:
        assert_identical(want[rid], got[rid])
    assert {r["state"] for r in Queue(dask_root).runs()} == {"done"}


def test_an_unreachable_scheduler_is_one_line_and_claims_nothing(tmp_path):
    """Issue check: exit 2 within a bounded time, one line, nothing claimed."""
    root = queued(tmp_path, STUDY, "nowhere")
    t0 = time.perf_counter()
    run = subprocess.run([sys.executable, "-m", "wavesweep", "work", "--root", str(root),
                          "--dask", "tcp://127.0.0.1:9"], capture_output=True, text=True, timeout=120)
    assert time.perf_counter() - t0 < 60
    assert run.returncode == 2
    lines = run.stderr.strip().splitlines()
    assert len(lines) == 1 and "--dask" in lines[0] and "tcp://127.0.0.1:9" in lines[0]
    assert {r["state"] for r in Queue(root).runs()} == {"queued"}
    assert all(r["attempts"] == 0 for r in Queue(root).runs())


def test_a_killed_worker_s_run_resumes_and_ends_like_an_uninterrupted_one(tmp_path):
    """Issue check: one Dask worker process killed during a run; the study
    still ends with every run done, and the killed run's result equals the
    uninterrupted one (it resumed from its checkpoint)."""
    table = copy.deepcopy(STUDY)
    table["grid"]["x"].update({"min": -150.0, "max": 150.0, "points": 2048})
    table["evolve"] = {"dt": 0.005, "duration": 1500.0}     # ~3 s a run: time to kill it mid-way
    table["record"] = {"every": 10.0}
    table["sweep"] = {"packet.momentum": {"start": 0.9, "stop": 1.2, "num": 2}}
    root = queued(tmp_path, table, "killed")
    reference = queued(tmp_path, table, "reference")
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                       dashboard_address=None, env={"WAVESWEEP_THREADS": "1"})
    client = distributed.Client(cluster)
    try:
        box = {}
        drainer = threading.Thread(target=lambda: box.update(out=work(
            root, dask=cluster.scheduler_address, checkpoint_seconds=0.5, heartbeat_seconds=0.5)))
        drainer.start()
        q = Queue(root)
        victim = None
        deadline = time.time() + 120
        while time.time() < deadline and victim is None:   # a run a quarter done (checkpoints every 0.5 s)
            for r in q.runs():
                if r["state"] == "running" and r["total"] and (r["step"] or 0) > r["total"] // 4:
                    victim = r
                    break
            time.sleep(0.2)
        assert victim is not None, "no run got under way"
        address = next(a for a, keys in client.processing().items()
                       if any(victim["run_id"] in str(k) for k in keys))
        pid = client.run(os.getpid, workers=[address])[address]
        os.kill(pid, signal.SIGKILL)
        drainer.join(timeout=300)
        assert not drainer.is_alive()
    finally:
        client.close()
        cluster.close()
    runs = Queue(root).runs()
    assert {r["state"] for r in runs} == {"done"}
    # only the killed run is compared: its reference alone is computed (a run of ~3 s less)
    ref_queue = Queue(reference)
    ref_queue.cancel(run_ids=[r["run_id"] for r in ref_queue.runs() if r["run_id"] != victim["run_id"]])
    work(reference, workers=1, batch=1)
    got, want = results(root), results(reference)
    assert len(got) == 2 and set(want) == {victim["run_id"]}
    assert_identical(want[victim["run_id"]], got[victim["run_id"]])
    log = Path(Queue(root).log_path(victim["study"], victim["run_id"])).read_text()
    assert log.count("attempt") >= 2   # it ran again after the kill


def test_a_failing_run_keeps_its_reason_and_the_others_go_on(tmp_path):
    """One run's potential turns non-finite mid-run (log of a negative number
    once t > 2): it fails with its one-line reason; the others are done."""
    table = copy.deepcopy(STUDY)
    table["potential"] = [{"kind": "expression", "expression": "where(t > a, log(-1.0 - x * x), 0.0 * x)",
                           "params": {"a": 2.0}}]
    table["sweep"] = {"potential.0.params.a": [2.0, 100.0, 200.0]}
    root = queued(tmp_path, table, "failing")
    out = work(root, dask="local:2")
    runs = {r["params"]["potential.0.params.a"]: r for r in Queue(root).runs()}
    assert out["done"] == 2 and out["failed"] == 1
    assert runs[2.0]["state"] == "failed" and "not finite" in runs[2.0]["reason"]
    assert runs[100.0]["state"] == runs[200.0]["state"] == "done"


def test_ctrl_c_leaves_the_queue_consistent_and_the_runs_resume(tmp_path):
    """SIGINT to `work --dask local:2`: running runs checkpoint and go back to
    the queue (exit 0); a second drain finishes them."""
    table = copy.deepcopy(STUDY)
    table["grid"]["x"].update({"min": -150.0, "max": 150.0, "points": 2048})
    # ~9 s a run on an idle core: stopped once both have written a checkpoint
    # (they step: one every 1.2 s here), well before the end.  (Waiting for
    # their progress instead waited for a heartbeat, ~10 s in, by which time
    # a run whose set-up got faster had ended.)
    table["evolve"] = {"dt": 0.005, "duration": 4500.0}
    table["record"] = {"every": 10.0}
    table["sweep"] = {"packet.momentum": {"start": 0.9, "stop": 1.2, "num": 2}}
    root = queued(tmp_path, table, "interrupted")
    proc = subprocess.Popen([sys.executable, "-m", "wavesweep", "work", "--root", str(root), "--dask", "local:2",
                             "--checkpoint-minutes", "0.02"], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)
    q = Queue(root)
    deadline = time.time() + 120
    while time.time() < deadline and not all(q.checkpoint_path(r["study"], r["run_id"]).exists()
                                             for r in q.runs()):
        time.sleep(0.1)
    proc.send_signal(signal.SIGINT)
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 0, err
    assert {r["state"] for r in q.runs()} == {"queued"}
    assert all(r["attempts"] == 0 for r in q.runs())   # a stop does not count as an attempt
    assert work(root, dask="local:2")["done"] == 2
    assert {r["state"] for r in q.runs()} == {"done"}
