"""Issue 13, items 7, 10 and 1 (its remainder): numeric flags, --set values
that are more than one value, numbers that overflow, overrides of the sweep,
--until that means tomorrow, collect naming the missing points, a closed
pipe, and the documented ways to raise the memory and study-size limits.

In-process through ``wavesweep.cli.main`` wherever the contract (exit
status, one line naming the field) can be seen there; a subprocess only for
the pipe, which needs a real one.
"""
from __future__ import annotations

import copy
import os
import subprocess
import sys
from datetime import datetime, timedelta
from pathlib import Path

import pytest
import scipy.constants as sc
import tomli_w

from wavesweep.studies.api import until_deadline
from wavesweep.studies.collect import missing_points
from wavesweep.studies.queue import Queue
from wavesweep.study import expand_study, load_study
from wavesweep.cli import _parser, main
from wavesweep.errors import JobError
from wavesweep.job import parse_override
from wavesweep.units import parse_unit, quantity_to_atomic

# A 1D barrier job in atomic units (as test_cli.TINY): 20 steps, no absorber.
TINY = {
    "title": "tiny flags job",
    "grid": {"x": {"min": -40.0, "max": 40.0, "points": 128}, "boundary": "periodic"},
    "potential": [{"kind": "barrier", "height": 0.5, "width": 1.0, "center": 0.0, "smoothing": 1.5}],
    "packet": {"kind": "gaussian", "center": -10.0, "width": 2.0, "momentum": 1.0},
    "evolve": {"dt": 0.05, "duration": 1.0, "scheme": "strang"},
    "record": {"every": 0.1, "snapshot_every": 0.5},
}


def write_job(folder: Path, table: dict, name: str = "job.toml") -> Path:
    path = folder / name
    path.write_text(tomli_w.dumps(table))
    return path


def bad_input(capsys, argv, field, *pieces) -> str:
    """Exit 2, nothing on stdout, one line on stderr naming ``field``."""
    assert main([str(a) for a in argv]) == 2
    out, err = capsys.readouterr()
    assert out == "", out
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert field in lines[0] and "Traceback" not in err, lines[0]
    for piece in pieces:
        assert piece in lines[0], lines[0]
    return lines[0]


# -- item 7: numeric flags ------------------------------------------------------------
# (arguments, the flag named); the paths need not exist: flags are read first
FLAGS = [
    (["work", "--checkpoint-minutes", "-5"], "--checkpoint-minutes"),
    (["work", "--checkpoint-minutes", "0"], "--checkpoint-minutes"),
    (["work", "--checkpoint-minutes", "inf"], "--checkpoint-minutes"),
    (["work", "--lease-seconds", "-1"], "--lease-seconds"),
    (["work", "--lease-seconds", "nan"], "--lease-seconds"),
    (["work", "--max-attempts", "0"], "--max-attempts"),
    (["work", "--max-attempts", "2.5"], "--max-attempts"),
    (["work", "--workers", "0"], "--workers"),
    (["work", "--workers", "99999999999999999999999"], "--workers"),
    (["work", "--batch", "0"], "--batch"),
    (["work", "--batch", "-3"], "--batch"),
    (["check", "JOB", "--trial-seconds", "nan"], "--trial-seconds"),
    (["check", "JOB", "--trial-seconds", "-1"], "--trial-seconds"),
    (["check", "JOB", "--trial-seconds", "inf"], "--trial-seconds"),
    (["check", "JOB", "--tolerance", "0"], "--tolerance"),
    (["check", "JOB", "--tolerance", "1.5"], "--tolerance"),
    (["check", "JOB", "--tolerance", "nan"], "--tolerance"),
    (["movie", "RUN.nc", "-o", "m.mp4", "--fps", "nan"], "--fps"),
    (["movie", "RUN.nc", "-o", "m.mp4", "--fps", "0"], "--fps"),
    (["movie", "RUN.nc", "-o", "m.mp4", "--every", "0"], "--every"),
    (["movie", "RUN.nc", "-o", "m.mp4", "--dpi", "5"], "--dpi"),
    (["movie", "RUN.nc", "-o", "m.mp4", "--scale", "log", "--floor", "0"], "--floor"),
    (["movie", "RUN.nc", "-o", "m.mp4", "--floor", "2"], "--floor"),
    (["movie", "RUN.nc", "-o", "m.mp4", "--size", "0x0"], "--size"),
    (["movie", "RUN.nc", "-o", "m.mp4", "--size", "big"], "--size"),
    (["plot", "RUN.nc", "-o", "p.png", "--dpi", "nan"], "--dpi"),
    (["plot", "RUN.nc", "-o", "p.png", "--size", "99999x5"], "--size"),
    (["levels", "JOB", "--count", "0"], "--count"),
    (["levels", "JOB", "--count", "1e3"], "--count"),
    (["levels", "--from", "RUN.nc", "--min-weight", "nan"], "--min-weight"),
    (["levels", "--from", "RUN.nc", "--min-weight", "1"], "--min-weight"),
]


@pytest.mark.parametrize(("argv", "flag"), FLAGS, ids=[" ".join(a[-2:]) for a, _ in FLAGS])
def test_a_numeric_flag_out_of_range_is_one_line_naming_it(tmp_path, capsys, argv, flag):
    argv = [str(tmp_path / a) if a in ("JOB", "RUN.nc") else a for a in argv]
    line = bad_input(capsys, argv, flag, "must")
    assert any(w in line for w in ("at least", "above", "between", "16x16", "WIDTHxHEIGHT")), line


def test_flags_at_their_bounds_are_taken():
    args = _parser().parse_args(["work", "--workers", "1024", "--batch", "1", "--max-attempts", "1",
                                 "--lease-seconds", "0.5", "--checkpoint-minutes", "0.005"])
    assert (args.workers, args.batch, args.max_attempts, args.lease_seconds) == (1024, 1, 1, 0.5)
    args = _parser().parse_args(["check", "J", "--trial-seconds", "0", "--tolerance", "1e-6"])
    assert args.trial_seconds == 0.0 and args.tolerance == 1e-6
    args = _parser().parse_args(["movie", "R", "-o", "m.gif", "--fps", "0.5", "--size", "16x16"])
    assert args.fps == 0.5 and args.size == (16, 16)
    assert _parser().parse_args(["plot", "R", "-o", "p.png"]).size == (1200, 900)   # the default, parsed


# -- item 10: --set with more than one value ---------------------------------------------
def test_a_multi_line_set_value_is_refused_not_truncated(tmp_path, capsys):
    job = write_job(tmp_path, TINY)
    bad_input(capsys, ["check", job, "--trial-seconds", "0", "--set", "packet.width=3\nevolve.dt=0.1"],
              "--set packet.width", "more than one value")
    bad_input(capsys, ["run", job, "-o", tmp_path / "out", "--set", 'title="a"\n[grid]'], "--set title")
    assert not (tmp_path / "out").exists()
    assert parse_override("sweep.x=[1,\n2]") == ("sweep.x", [1, 2])    # one value over two lines is one value
    assert parse_override("title=two words") == ("title", "two words")


# -- item 10: numbers that overflow ---------------------------------------------------------
OVERFLOWS = [
    ('packet.width="3 m**400/m**399"', "packet.width", "power 400"),
    ('packet.width="3 nm^13"', "packet.width", "power 13"),
    ("evolve.threads=99999999999999999999999", "evolve.threads", "at most"),
    ("grid.x.points=99999999999999999999999", "grid.x.points", "at most"),
    ("evolve.duration=1e308", "evolve.duration", "1e-100..1e+100"),
    ("evolve.duration=1e99", "evolve.duration", "time steps"),
    ("grid.x.max=1e308", "grid.x.max", "1e-100..1e+100"),
    ("packet.width=1e300", "packet.width", "1e-100..1e+100"),
    ("particle.mass=1e308", "particle.mass", "1e-100..1e+100"),
    ("particle.mass=1e-308", "particle.mass", "1e-100..1e+100"),
]


@pytest.mark.parametrize(("override", "field", "piece"), OVERFLOWS, ids=[o[0] for o in OVERFLOWS])
def test_a_value_that_would_overflow_is_bad_input_naming_the_field(tmp_path, capsys, override, field, piece):
    job = write_job(tmp_path, TINY)
    bad_input(capsys, ["check", job, "--trial-seconds", "0", "--set", override], field, piece)


def test_unit_powers_are_summed_per_symbol_before_the_factor():
    """m^4/m^3 is m: the factor equals m's (CODATA Bohr radius via
    scipy.constants), computed without (1.9e10)^4 on the way."""
    bohr = sc.physical_constants["Bohr radius"][0]
    factor, dims = parse_unit("m**4/m**3")
    assert dims == parse_unit("m")[1]
    assert factor == pytest.approx(1.0 / bohr, rel=1e-15)
    assert quantity_to_atomic("3 nm^2/nm", "length") == pytest.approx(3e-9 / bohr, rel=1e-15)


# -- item 10: --set into the sweep ----------------------------------------------------------
SCAN = {**copy.deepcopy(TINY), "sweep": {"packet.momentum": [0.8, 1.0],
                                         "potential.0.height": {"start": 0.4, "stop": 0.5, "num": 2}}}


def test_set_sweep_mode_zip_takes_effect(tmp_path):
    job = write_job(tmp_path, SCAN)
    assert len(load_study(job).runs) == 4
    zipped = load_study(job, ["sweep.mode=zip"])
    assert zipped.mode == "zip"
    assert [r.params for r in zipped.runs] == [{"packet.momentum": 0.8, "potential.0.height": 0.4},
                                               {"packet.momentum": 1.0, "potential.0.height": 0.5}]
    assert all("sweep" not in r.job.table for r in zipped.runs)   # no stray table in the runs


def test_set_sweep_axis_and_range_key_take_effect(tmp_path):
    job = write_job(tmp_path, SCAN)
    st = load_study(job, ["sweep.packet.momentum=[0.5, 0.7, 0.9]", "sweep.potential.0.height.num=3"])
    assert len(st.runs) == 9
    assert st.axes["packet.momentum"] == [0.5, 0.7, 0.9]
    assert st.axes["potential.0.height"] == [0.4, 0.45, 0.5]
    added = load_study(job, ["sweep.packet.width=[2.0, 3.0]"])
    assert len(added.runs) == 8 and added.axes["packet.width"] == [2.0, 3.0]


def test_set_sweep_that_cannot_apply_is_bad_input(tmp_path, capsys):
    job = write_job(tmp_path, SCAN)
    bad_input(capsys, ["check", job, "--trial-seconds", "0", "--set", "sweep.mode=diagonal"],
              "sweep.mode", "diagonal")
    bad_input(capsys, ["check", job, "--trial-seconds", "0", "--set", "sweep.packet.momentum=[0.5]",
                       "--set", "sweep.mode=zip"], "sweep.mode", "one length")
    plain = write_job(tmp_path, TINY, "plain.toml")
    bad_input(capsys, ["check", plain, "--trial-seconds", "0", "--set", "sweep.mode=zip"],
              "sweep", "names no field")


# -- item 10: --until that means tomorrow -----------------------------------------------------
def test_until_that_has_passed_today_says_it_means_tomorrow():
    now = datetime(2026, 12, 5, 2, 16, 30)
    epoch, note = until_deadline("01:00", now)
    assert epoch == datetime(2026, 12, 6, 1, 0).timestamp()
    assert "tomorrow" in note and "2026-12-06 01:00" in note and "22 h 43 min" in note
    assert until_deadline("03:00", now) == (datetime(2026, 12, 5, 3, 0).timestamp(), None)
    assert until_deadline("2026-12-05T01:00", now)[1] is None     # a date-time is taken as written


def test_work_until_a_passed_time_warns_on_one_line(tmp_path, capsys):
    now = datetime.now()
    if now.hour == 0 and now.minute < 3:
        pytest.skip("two minutes ago was yesterday")
    passed = (now - timedelta(minutes=2)).strftime("%H:%M")
    assert main(["work", "--root", str(tmp_path / "none"), "--until", passed]) == 2   # no queue there
    lines = capsys.readouterr().err.strip().splitlines()
    assert len(lines) == 2, lines
    assert lines[0].startswith("wavesweep work: warning: --until") and "tomorrow" in lines[0]
    assert "--root" in lines[1]


# -- item 10: collect names the missing points --------------------------------------------------
def test_collect_names_the_points_without_a_result(tmp_path, capsys):
    from test_collect import TINY as COLLECT_TINY, submit_and_run

    table = copy.deepcopy(COLLECT_TINY)
    table["sweep"] = {"packet.momentum": [0.8, 1.0], "potential.0.height": [0.1, 0.3]}
    st = submit_and_run(table, tmp_path, "scan", skip=(0, 3))
    assert main(["collect", "scan", "--root", str(tmp_path)]) == 0
    out, err = capsys.readouterr()
    assert out.strip().endswith("summary.nc")
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("wavesweep collect: warning: 2 of 4 points"), err
    for i in (0, 3):
        spec = st.runs[i]
        assert spec.run_id in lines[0]
        assert ", ".join(f"{k} = {v!r}" for k, v in spec.params.items()) in lines[0]
    assert st.runs[1].run_id not in lines[0]


def test_many_missing_points_are_named_compactly():
    out = {"expected": 400, "missing": [{"run_id": f"r{i:03d}", "params": {"packet.energy": float(i)}}
                                        for i in range(300)]}
    line = missing_points(out)
    assert line.startswith("300 of 400 points") and "and 295 more" in line
    assert "r004" in line and "r005" not in line and len(line) < 600


# -- item 10: a reader that has gone ---------------------------------------------------------
def test_status_into_a_closed_pipe_is_quiet_and_exits_0(tmp_path):
    """`wavesweep status | head -1` where the reader is gone before the
    output is flushed: no "Exception ignored ... BrokenPipeError", exit 0.
    The read end is closed before the process starts, so every write fails
    (PYTHONUNBUFFERED would hide the exit-time flush: it is removed)."""
    raw = copy.deepcopy(TINY)
    raw["sweep"] = {"packet.momentum": [0.8, 1.0, 1.2]}
    Queue(tmp_path / "root").submit(expand_study(raw, name="s"))
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONUNBUFFERED", "WAVESWEEP_DEBUG")}
    read_end, write_end = os.pipe()
    os.close(read_end)
    try:
        for args in (["status"], ["status", "--json"]):
            proc = subprocess.run([sys.executable, "-m", "wavesweep", *args, "--root", str(tmp_path / "root")],
                                  stdout=write_end, stderr=subprocess.PIPE, text=True, env=env, timeout=120)
            assert proc.returncode == 0, proc.stderr
            assert proc.stderr == "", proc.stderr
    finally:
        os.close(write_end)


# -- item 1: the documented ways to raise the limits ----------------------------------------
def test_the_study_size_limit_is_named_and_can_be_raised(tmp_path, monkeypatch):
    raw = copy.deepcopy(TINY)
    raw["sweep"] = {"packet.momentum": [0.8, 0.9, 1.0, 1.1], "packet.width": [2.0, 2.5, 3.0, 3.5]}
    monkeypatch.setenv("WAVESWEEP_MAX_RUNS", "10")
    with pytest.raises(JobError) as info:
        expand_study(raw)
    assert info.value.field == "sweep" and "4 x 4 = 16 runs" in info.value.message
    assert "WAVESWEEP_MAX_RUNS" in info.value.message
    monkeypatch.setenv("WAVESWEEP_MAX_RUNS", "16")
    assert len(expand_study(raw).runs) == 16
    monkeypatch.setenv("WAVESWEEP_MAX_RUNS", "many")
    with pytest.raises(JobError) as info:
        expand_study(raw)
    assert info.value.field == "WAVESWEEP_MAX_RUNS"
    monkeypatch.delenv("WAVESWEEP_MAX_RUNS")
    raw["sweep"] = {"packet.momentum": {"start": 0.5, "stop": 1.5, "num": 200_000}}
    with pytest.raises(JobError) as info:
        expand_study(raw)
    assert info.value.field == "sweep.packet.momentum.num" and "WAVESWEEP_MAX_RUNS" in info.value.message


def test_the_memory_limit_is_named_and_can_be_set(tmp_path, capsys, monkeypatch):
    from wavesweep.adequacy import memory_finding, memory_limit
    from wavesweep.job import job_from_dict

    job = write_job(tmp_path, TINY)
    monkeypatch.delenv("WAVESWEEP_MAX_MEMORY", raising=False)
    bad_input(capsys, ["levels", job, "--count", "3", "--set", "grid.x.points=1000000000"],
              "grid.x.points", "WAVESWEEP_MAX_MEMORY")
    monkeypatch.setenv("WAVESWEEP_MAX_MEMORY", "1MiB")
    assert memory_limit()[0] == 2**20
    bad_input(capsys, ["run", job, "-o", tmp_path / "out", "--set", "grid.x.points=100000"],
              "grid.x.points", "WAVESWEEP_MAX_MEMORY=1MiB")
    assert not (tmp_path / "out").exists()
    # 1e8 points: psi 1.6 GB, about 8 GB in all -- within a limit of 64 GiB on any machine
    big = copy.deepcopy(TINY)
    big["grid"]["x"]["points"] = 100_000_000
    monkeypatch.setenv("WAVESWEEP_MAX_MEMORY", "64GiB")
    assert memory_finding(job_from_dict(big)).level == "ok"
    monkeypatch.setenv("WAVESWEEP_MAX_MEMORY", "500MB")
    assert memory_limit()[0] == 500e6
    assert memory_finding(job_from_dict(big)).level == "error"
    monkeypatch.setenv("WAVESWEEP_MAX_MEMORY", "lots")
    bad_input(capsys, ["check", job, "--trial-seconds", "0"], "WAVESWEEP_MAX_MEMORY", "not a memory size")


def test_levels_of_a_study_file_say_the_sweep_plays_no_part(tmp_path, capsys):
    """levels solves one job: an override of the sweep would be lost (refused),
    a swept field may be set for the point wanted, and a study file's levels
    come with one warning line saying which fields the sweep would vary."""
    job = write_job(tmp_path, SCAN)
    bad_input(capsys, ["levels", job, "--count", "1", "--set", "sweep.mode=zip"], "--set sweep.mode")
    assert main(["levels", str(job), "--count", "1", "--set", "potential.0.height=0.4", "--json"]) == 0
    out, err = capsys.readouterr()
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "warning: sweep:" in lines[0] and "potential.0.height" in lines[0], err
    assert '"energies"' in out
