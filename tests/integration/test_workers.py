"""The overnight queue end to end: worker processes, kill -9, failures, --until.

Real processes through the real CLI (`python -m wavesweep work`), so that
signals, leases and the SQLite locking are exercised as at night.  The
commands around it (submit, status, retry) start no process of their own:
they call the CLI's ``main`` in this process (tests/inprocess.py), which is
what ``python -m wavesweep`` runs, without an interpreter start each.
"""
from __future__ import annotations

import copy
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import tomli_w
from inprocess import run_main

from wavesweep.studies.queue import Queue

TINY = {
    "title": "worker test",
    "grid": {"x": {"min": -40.0, "max": 40.0, "points": 128}},
    "packet": {"kind": "gaussian", "center": -5.0, "width": 2.0, "momentum": 1.0},
    "evolve": {"dt": 0.05, "duration": 2.0},
    "record": {"every": 0.5, "snapshot_every": 1.0},
}


def write(tmp_path, table, name="study.toml") -> Path:
    p = tmp_path / name
    p.write_text(tomli_w.dumps(table))
    return p


def cli(*args, env=None, timeout=240, **kw):
    """``wavesweep ARGS`` in a real process (``work``: it starts workers)."""
    full_env = {**os.environ, "WAVESWEEP_THREADS": "1", **(env or {})}
    return subprocess.run([sys.executable, "-m", "wavesweep", *map(str, args)], capture_output=True,
                          text=True, timeout=timeout, env=full_env, **kw)


def wavesweep(*args):
    """``wavesweep ARGS`` called in this process (a command that starts no process)."""
    return run_main(*args, cwd=os.getcwd(), env={"WAVESWEEP_THREADS": "1"})


def long_study(tmp_path, name, points, dt, duration):
    """Submit a one-run study that steps for several seconds; returns ROOT."""
    table = copy.deepcopy(TINY)
    table["grid"]["x"]["points"] = points
    table["evolve"].update(dt=dt, duration=duration)
    table["record"].update(every=0.1, snapshot_every=0.5)
    root = tmp_path / "root"
    assert wavesweep("submit", write(tmp_path, table, f"{name}.toml"), "--root", root).returncode == 0
    return root, table


def start_work(root, *extra, **popen):
    env = {**os.environ, "WAVESWEEP_THREADS": "1"}
    return subprocess.Popen([sys.executable, "-m", "wavesweep", "work", "--root", str(root), *extra],
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, **popen)


def states(root):
    return json.loads(wavesweep("status", "--root", root, "--json").stdout)


def test_four_workers_run_each_of_40_runs_exactly_once(tmp_path):
    table = copy.deepcopy(TINY)
    table["sweep"] = {"packet.width": {"start": 1.5, "stop": 2.5, "num": 40}}
    root = tmp_path / "root"
    sub = wavesweep("submit", write(tmp_path, table), "--root", root)
    assert sub.returncode == 0, sub.stderr
    w = cli("work", "--root", root, "--workers", 4)
    assert w.returncode == 0, w.stderr
    st = states(root)
    assert st["studies"]["study"]["done"] == 40
    runs = Queue(root).runs("study")
    # executions, not only states: each run was claimed and executed once
    assert sorted(r["executions"] for r in runs) == [1] * 40
    logs = [(root / "study" / f"{r['run_id']}.log").read_text() for r in runs]
    assert all(log.count("attempt") == 1 for log in logs)
    assert len({r["run_id"] for r in runs}) == 40


def test_a_diverging_run_fails_with_its_reason_and_the_others_finish(tmp_path):
    table = copy.deepcopy(TINY)
    # the third point's potential turns into NaN half-way through the run
    table["potential"] = [{"kind": "expression", "expression": "where(t > b, log(0.0 - a), 0.0 * x)",
                           "params": {"a": 1.0, "b": 1.0}}]
    table["sweep"] = {"potential.0.params.b": [100.0, 200.0, 1.0, 300.0]}
    root = tmp_path / "root"
    assert wavesweep("submit", write(tmp_path, table), "--root", root).returncode == 0
    assert cli("work", "--root", root, "--workers", 2).returncode == 0
    st = states(root)
    assert st["studies"]["study"] == {"queued": 0, "running": 0, "done": 3, "failed": 1, "cancelled": 0}
    (bad,) = [r for r in st["runs"] if r["state"] == "failed"]
    assert "not finite" in bad["reason"] and "\n" not in bad["reason"]
    log = (root / "study" / f"{bad['run_id']}.log").read_text()
    assert "failed" in log
    assert not (root / "study" / f"{bad['run_id']}.nc").exists()


def test_until_in_the_past_claims_nothing(tmp_path):
    table = copy.deepcopy(TINY)
    table["sweep"] = {"packet.width": [1.5, 2.0]}
    root = tmp_path / "root"
    assert wavesweep("submit", write(tmp_path, table), "--root", root).returncode == 0
    w = cli("work", "--root", root, "--until", "2020-01-01T00:00")
    assert w.returncode == 0
    assert "nothing claimed" in w.stderr
    assert states(root)["studies"]["study"]["queued"] == 2
    assert all(r["executions"] == 0 for r in Queue(root).runs("study"))


def test_an_invalid_sweep_point_queues_nothing(tmp_path):
    table = copy.deepcopy(TINY)
    table["sweep"] = {"packet.width": [1.5, -2.0, 2.5]}       # one impossible width
    root = tmp_path / "root"
    sub = wavesweep("submit", write(tmp_path, table), "--root", root)
    assert sub.returncode == 2
    lines = sub.stderr.strip().splitlines()
    assert len(lines) == 1 and "packet.width" in lines[0] and "Traceback" not in sub.stderr
    assert not (root / "queue.sqlite").exists() or Queue(root).runs() == []


def test_sigterm_checkpoints_and_requeues_then_work_finishes(tmp_path):
    root, _ = long_study(tmp_path, "term", 8192, 0.0005, 20.0)     # 40000 steps
    proc = start_work(root, text=True)
    deadline = time.time() + 120
    while time.time() < deadline and Queue(root).runs("term")[0]["state"] != "running":
        time.sleep(0.1)
    time.sleep(0.5)
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 0, err
    (run,) = Queue(root).runs("term")
    assert run["state"] == "queued" and run["executions"] == 1
    again = cli("work", "--root", root)
    assert again.returncode == 0, again.stderr
    (run,) = Queue(root).runs("term")
    assert run["state"] == "done" and run["executions"] == 2


def test_status_finds_a_missing_result_and_retry_runs_it_again(tmp_path):
    table = copy.deepcopy(TINY)
    table["sweep"] = {"packet.width": [1.5, 2.0]}
    root = tmp_path / "root"
    assert wavesweep("submit", write(tmp_path, table), "--root", root).returncode == 0
    assert cli("work", "--root", root).returncode == 0
    victim = Queue(root).runs("study")[0]["run_id"]
    (root / "study" / f"{victim}.nc").unlink()
    st = states(root)
    assert st["studies"]["study"]["failed"] == 1
    (bad,) = [r for r in st["runs"] if r["state"] == "failed"]
    assert bad["run_id"] == victim and "missing" in bad["reason"]
    assert wavesweep("retry", "--root", root).returncode == 0
    assert cli("work", "--root", root).returncode == 0
    assert states(root)["studies"]["study"]["done"] == 2
    assert (root / "study" / f"{victim}.nc").exists()
