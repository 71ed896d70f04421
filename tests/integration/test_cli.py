"""The command line: exit status, stdout, stderr, files.

Contract (design.md, "Command line"): exit 0 on success, 2 on bad input with
a one-line cause on stderr, 1 otherwise; ``--json`` prints one JSON object
on stdout and nothing else there.  For every bad input we also require: the
line names the field, no traceback anywhere, nothing on stdout for ``run``,
and no result or partial file left in the output folder.

Most cases call ``wavesweep.cli.main`` in this process (``wavesweep()``,
tests/inprocess.py): ``python -m wavesweep`` is ``sys.exit(main())``, so the
status, the text on the descriptors 1 and 2 and the files left are the same,
without an interpreter start per case.  Real processes (``cli()``) remain
where the process is the point: the module and the console script as entry
points (exit 0 with the same output and result; exit 2 with one line and no
traceback) and ``work``, which starts worker processes.

Jobs are tiny (128 points, 20 steps) so that a run takes well under a second.
"""
from __future__ import annotations

import copy
import json
import tomllib
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest
from inprocess import child_environment, run_main
from tables import merged
import tomli_w
import xarray as xr

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "jobs" / "kestrel-diode.toml"

# A 1D barrier job in atomic units: 20 steps of 0.05, samples every 2 steps.
# No absorber, so that a case costs no CAP tuning (tests that need one add it).
TINY = {
    "title": "tiny cli job",
    "grid": {"x": {"min": -40.0, "max": 40.0, "points": 128}, "boundary": "periodic"},
    # edges graded over 1.5 bohr (2.4 grid steps): an adequate set-up, so that
    # `run` has no warning to print beside what a test looks for
    "potential": [{"kind": "barrier", "height": 0.5, "width": 1.0, "center": 0.0, "smoothing": 1.5}],
    "packet": {"kind": "gaussian", "center": -10.0, "width": 2.0, "momentum": 1.0},
    "evolve": {"dt": 0.05, "duration": 1.0, "scheme": "strang"},
    "record": {"every": 0.1, "snapshot_every": 0.5},
    "detector": [{"name": "far", "x": 10.0}],
}
CAP = {"absorber": {"kind": "cap", "thickness": 8.0}}

TWO_D = {
    "grid": {"y": {"min": -16.0, "max": 16.0, "points": 32}},
    "packet": {"center": [-10.0, 0.0], "width": [2.0, 2.0], "momentum": [1.0, 0.0]},
}


def _env(tmp: Path) -> dict:
    env = dict(os.environ)
    env.pop("WAVESWEEP_DEBUG", None)  # tracebacks must not appear on their own
    env.update(WAVESWEEP_THREADS="1", NUMBA_NUM_THREADS="1", OMP_NUM_THREADS="1",
               WAVESWEEP_CACHE=str(tmp / "cache"))
    return env


def cli(*args, cwd: Path, exe=None) -> subprocess.CompletedProcess:
    """Run the command line in a fresh interpreter (``python -m wavesweep``)."""
    cmd = [str(exe)] if exe else [sys.executable, "-m", "wavesweep"]
    return subprocess.run(cmd + [str(a) for a in args], capture_output=True, text=True,
                          cwd=cwd, env=_env(cwd), timeout=120)


def wavesweep(*args, cwd: Path) -> subprocess.CompletedProcess:
    """The command line called in this process (tests/inprocess.py), with the
    environment ``cli()`` gives a real process."""
    return run_main(*args, cwd=cwd, env=child_environment(cwd / "cache"))


def write_job(folder: Path, table: dict, name: str = "job.toml") -> Path:
    path = folder / name
    path.write_text(tomli_w.dumps(table))
    return path


def leftovers(folder: Path) -> list[str]:
    """Result files and partial files in an output folder (hidden ones too)."""
    if not folder.exists():
        return []
    return sorted(p.name for p in folder.iterdir() if p.suffix == ".nc" or p.name.endswith(".part"))


def assert_bad_input(proc, field: str, *pieces: str, stdout_empty: bool = True) -> str:
    """Exit 2, exactly one line on stderr naming ``field``, no traceback."""
    assert "Traceback" not in proc.stdout + proc.stderr, proc.stderr
    assert proc.returncode == 2, (proc.returncode, proc.stderr)
    lines = proc.stderr.splitlines()
    assert len(lines) == 1, proc.stderr
    line = lines[0]
    assert field in line, line
    for piece in pieces:
        assert piece in line, line
    if stdout_empty:
        assert proc.stdout == "", proc.stdout
    return line


# -- bad input: one table per case -------------------------------------------------
# (id, job patch, extra CLI args, field named in the message, other pieces)
CASES = [
    ("unknown-key", {"packet": {"width": None, "widht": 3.0}}, [], "packet.widht", ["'width'"]),
    ("unknown-table", {"detectors": [{"x": 5.0}]}, [], "detectors", ["'detector'"]),
    ("missing-dt", {"evolve": {"dt": None}}, [], "evolve.dt", ["missing"]),
    ("points-string", {"grid": {"x": {"points": "many"}}}, [], "grid.x.points", ["integer"]),
    ("dt-list", {"evolve": {"dt": [1]}}, [], "evolve.dt", ["list"]),
    ("points-zero", {"grid": {"x": {"points": 0}}}, [], "grid.x.points", ["positive"]),
    ("points-negative", {"grid": {"x": {"points": -64}}}, [], "grid.x.points", ["positive"]),
    ("width-negative", {"packet": {"width": -2.0}}, [], "packet.width", ["positive"]),
    ("centre-outside", {"packet": {"center": -100.0}}, [], "packet.center", ["outside"]),
    ("centre-cut-by-edge", {"packet": {"center": -36.0}}, [], "packet.center", ["edge"]),
    ("expression-import", {"potential": [{"kind": "expression",
                                          "expression": "__import__('os').system('touch PWNED')"}]},
     [], "potential.0.expression", ["__import__"]),
    ("expression-attribute", {"potential": [{"kind": "expression", "expression": "x.real"}]},
     [], "potential.0.expression", ["x.real"]),
    ("detector-outside", {"detector": [{"name": "far", "x": 100.0}]}, [], "detector.0.x", ["outside"]),
    ("every-not-multiple-of-dt", {"record": {"every": 0.07}}, [], "record.every", ["0.05", "0.1"]),
    ("unknown-scheme", {"evolve": {"scheme": "leapfrog"}}, [], "evolve.scheme", ["strang"]),
    ("chebyshev-time-dependent", {"evolve": {"scheme": "chebyshev"},
                                  "potential": [{"kind": "expression", "expression": "0.01 * x * cos(t)"}]},
     [], "evolve.scheme", ["time"]),
    ("crank-nicolson-2d", merged(TWO_D, {"evolve": {"scheme": "crank_nicolson"}}),
     [], "evolve.scheme", ["1D"]),
    # p0 = 8 with dx = 0.625: the grid resolves |p| <= pi/dx = 5.03 only
    ("grid-too-coarse", {"packet": {"momentum": 8.0}}, [], "grid.x.points", ["use at least"]),
    ("set-unknown-key", {}, ["--set", "evolve.dtt=0.1"], "evolve.dtt", ["'dt'"]),
    ("set-index-out-of-range", {}, ["--set", "potential.5.height=1"], "potential.5", ["range"]),
    ("set-without-equals", {}, ["--set", "packet.width"], "--set", ["key=value"]),
]


# ``check`` reads jobs through the same loader as ``run``; it is asked about one
# case from each stage of validation (schema, --set, units and steps, physics
# of the packet, the scheme's limits, the expression parser).
CHECK_TOO = {"unknown-key", "points-negative", "centre-cut-by-edge", "expression-import",
             "every-not-multiple-of-dt", "chebyshev-time-dependent", "grid-too-coarse",
             "set-index-out-of-range"}
PARAMS = [pytest.param("run", *c[1:], id=f"run-{c[0]}") for c in CASES]
PARAMS += [pytest.param("check", *c[1:], id=f"check-{c[0]}") for c in CASES if c[0] in CHECK_TOO]


@pytest.mark.parametrize(("command", "patch", "extra", "field", "pieces"), PARAMS)
def test_bad_input_is_one_line_exit_2(tmp_path, command, patch, extra, field, pieces):
    job = write_job(tmp_path, merged(TINY, patch))
    out = tmp_path / "out"
    args = ["-o", out, "--quiet"] if command == "run" else ["--trial-seconds", "0.01"]
    proc = wavesweep(command, job, *args, *extra, cwd=tmp_path)
    assert_bad_input(proc, field, *pieces)
    assert leftovers(out) == []
    assert not (tmp_path / "PWNED").exists()  # the expression case ran nothing


@pytest.mark.parametrize("command", ["run", "check"])
def test_toml_syntax_error(tmp_path, command):
    job = tmp_path / "broken.toml"
    job.write_text('title = "unterminated\n[grid\n')
    args = ["-o", tmp_path / "out"] if command == "run" else []
    line = assert_bad_input(wavesweep(command, job, *args, cwd=tmp_path), "broken.toml", "TOML", "line 1")
    assert re.search(r"column \d+", line)
    assert leftovers(tmp_path / "out") == []


@pytest.mark.parametrize("command", ["run", "check"])
def test_missing_job_file(tmp_path, command):
    args = ["-o", tmp_path / "out"] if command == "run" else []
    assert_bad_input(wavesweep(command, "no-such-job.toml", *args, cwd=tmp_path), "no-such-job.toml", "not found")
    assert not (tmp_path / "out").exists()


def test_bad_input_through_the_real_process(tmp_path):
    """``python -m wavesweep`` itself (the cases above call its ``main`` in
    this process): exit 2, one line naming the field on stderr, no
    traceback, nothing on stdout, no file written."""
    job = write_job(tmp_path, merged(TINY, {"packet": {"width": None, "widht": 3.0}}))
    proc = cli("run", job, "-o", tmp_path / "out", "--quiet", cwd=tmp_path)
    assert_bad_input(proc, "packet.widht", "'width'")
    assert leftovers(tmp_path / "out") == []


@pytest.mark.parametrize(("args", "field"), [
    (["run", "JOB"], "-o/--output"),
    (["run", "JOB", "-o", "out", "--fft", "fastest"], "--fft"),
    (["check", "JOB", "--trial-seconds", "soon"], "--trial-seconds"),
    (["frobnicate"], "frobnicate"),
])
def test_bad_arguments_are_one_line_exit_2(tmp_path, capsys, args, field):
    """Argument errors (argparse) follow the same rule; in-process is enough."""
    from wavesweep.cli import main

    job = write_job(tmp_path, TINY)
    assert main([str(job) if a == "JOB" else a for a in args]) == 2   # returned, as for every error
    captured = capsys.readouterr()
    assert captured.out == ""
    assert len(captured.err.splitlines()) == 1 and field in captured.err, captured.err


def test_output_under_a_regular_file(tmp_path):
    """A folder that cannot be created (its parent is a file): exit 2, nothing written."""
    job = write_job(tmp_path, TINY)
    (tmp_path / "plain-file").write_text("not a folder\n")
    proc = wavesweep("run", job, "-o", tmp_path / "plain-file" / "out", "--quiet", cwd=tmp_path)
    assert_bad_input(proc, "--output", "plain-file")
    assert leftovers(tmp_path) == []


@pytest.mark.skipif(not hasattr(os, "geteuid") or os.geteuid() == 0,
                    reason="root writes through chmod 555; covered by test_output_under_a_regular_file")
def test_output_in_read_only_folder(tmp_path):
    job = write_job(tmp_path, TINY)
    locked = tmp_path / "locked"
    locked.mkdir()
    locked.chmod(0o555)
    try:
        for out in (locked, locked / "sub"):
            proc = wavesweep("run", job, "-o", out, "--quiet", cwd=tmp_path)
            assert_bad_input(proc, "--output", str(locked))
            assert leftovers(locked) == []
    finally:
        locked.chmod(0o755)


def test_failure_mid_run_leaves_no_file(tmp_path):
    """A potential that turns non-finite after a few steps stops the run with
    a one-line cause; the temporary file is removed, nothing is renamed."""
    job = write_job(tmp_path, merged(TINY, {"potential": [
        {"kind": "expression", "expression": "where(t > 0.15, log(-1.0 - x * x), 0.0)"}]}))
    out = tmp_path / "out"
    proc = wavesweep("run", job, "-o", out, "--quiet", cwd=tmp_path)
    assert_bad_input(proc, "potential.0.expression", "t = 0.")
    assert out.is_dir()  # the run had started writing
    assert leftovers(out) == []


# -- good runs ---------------------------------------------------------------------
def test_run_prints_the_result_path(tmp_path):
    job = write_job(tmp_path, TINY, "tiny.toml")
    out = tmp_path / "results"
    proc = wavesweep("run", job, "-o", out, "--quiet", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    assert proc.stderr == ""  # --quiet: no progress, no chatter
    (line,) = proc.stdout.splitlines()
    path = Path(line)
    assert path.parent == out and path.name.startswith("tiny-") and path.suffix == ".nc"
    assert leftovers(out) == [path.name]
    with xr.open_dataset(path) as ds:
        assert ds.attrs["title"] == "tiny cli job"
        assert ds.sizes["time"] == 11
        # NAME-RUNID.nc: other physics never overwrites this file
        assert path.name == f"tiny-{ds.attrs['run_id']}.nc"
    other = wavesweep("run", job, "-o", out, "--quiet", "--set", "packet.width=1.1", cwd=tmp_path)
    assert other.returncode == 0, other.stderr
    assert len(leftovers(out)) == 2


def test_run_executes_every_point_of_a_sweep(tmp_path):
    table = dict(TINY)
    table["sweep"] = {"packet.width": [1.0, 1.1, 1.2]}
    job = write_job(tmp_path, table, "swept.toml")
    out = tmp_path / "results"
    proc = wavesweep("run", job, "-o", out, "--quiet", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    paths = [Path(p) for p in proc.stdout.splitlines()]
    assert len(paths) == 3 and len(set(paths)) == 3
    widths = []
    for p in paths:
        with xr.open_dataset(p) as ds:
            widths.append(tomllib.loads(ds.attrs["job"])["packet"]["width"])
    assert widths == [1.0, 1.1, 1.2]


def test_module_and_console_script_agree(tmp_path):
    """``python -m wavesweep`` and the installed ``wavesweep`` script are the
    same program: same exit status, output line and results."""
    script = Path(sys.executable).with_name("wavesweep")
    if not script.exists():
        pytest.skip("console script not installed next to this interpreter")
    job = write_job(tmp_path, TINY, "tiny.toml")
    a = cli("run", job, "-o", tmp_path / "a", "--quiet", cwd=tmp_path)
    b = cli("run", job, "-o", tmp_path / "b", "--quiet", cwd=tmp_path, exe=script)
    assert (a.returncode, b.returncode) == (0, 0), (a.stderr, b.stderr)
    assert a.stdout.replace(str(tmp_path / "a"), "OUT") == b.stdout.replace(str(tmp_path / "b"), "OUT")
    da, db = (xr.load_dataset(Path(p.stdout.strip())) for p in (a, b))
    assert da.attrs["run_id"] == db.attrs["run_id"]
    for ds in (da, db):
        assert ds.attrs.pop("wall_seconds") >= 0
    xr.testing.assert_identical(da, db)


class _FakeBar:
    """Stands in for tqdm: records that a progress bar was made and used."""

    made: list = []

    def __init__(self, *args, **kwargs):
        self.kwargs, self.steps = kwargs, 0
        _FakeBar.made.append(self)

    def update(self, n=1):
        self.steps += n

    def close(self):
        pass


@pytest.mark.parametrize("quiet", [False, True])
def test_quiet_means_no_progress_bar(tmp_path, monkeypatch, capsys, quiet):
    """In-process, with tqdm replaced: without --quiet a bar is made, on
    stderr, and advanced to the last step; with --quiet none is made."""
    import tqdm

    from wavesweep.cli import main

    _FakeBar.made = []
    monkeypatch.setattr(tqdm, "tqdm", _FakeBar)
    job = write_job(tmp_path, TINY)
    args = ["run", str(job), "-o", str(tmp_path / "out")] + (["--quiet"] if quiet else [])
    assert main(args) == 0
    printed = Path(capsys.readouterr().out.strip())
    assert printed.parent == tmp_path / "out" and printed.name.startswith("job-")
    if quiet:
        assert _FakeBar.made == []
    else:
        (bar,) = _FakeBar.made
        assert bar.kwargs["file"] is sys.stderr
        assert bar.steps == bar.kwargs["total"] == 20


# -- check -------------------------------------------------------------------------
def test_check_demo_job_reports_numbers(tmp_path):
    proc = wavesweep("check", DEMO, "--trial-seconds", "0.05", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    assert "Traceback" not in proc.stderr
    lines = proc.stdout.strip().splitlines()
    findings = [ln for ln in lines if re.match(r"^\s*(ok|WARN|ERROR)\s", ln)]
    topics = {ln.split()[1] for ln in findings}
    assert {"momentum", "margin", "time", "absorber", "memory", "disk", "run"} <= topics, lines
    for line in findings:
        assert re.search(r"\d", line), f"a finding without a number: {line!r}"
    assert not any(ln.startswith("ERROR") for ln in findings)
    assert lines[-1].startswith("0 error(s)")


def _one_json_object(text: str) -> dict:
    obj, end = json.JSONDecoder().raw_decode(text.lstrip())
    assert text.lstrip()[end:].strip() == "", "more than one JSON value on stdout"
    assert isinstance(obj, dict)
    return obj


def test_check_json_demo_job(tmp_path):
    proc = wavesweep("check", DEMO, "--json", "--trial-seconds", "0.05", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    report = _one_json_object(proc.stdout)
    assert report["title"].startswith("Kestrel diode")
    levels = {f["level"] for f in report["findings"]}
    assert levels <= {"ok", "warn"}
    # every finding carries its numbers as data, not only in the text
    for f in report["findings"]:
        assert f["topic"] and f["message"]
        assert any(isinstance(v, (int, float)) for v in f["values"].values()), f
    run_time = next(f for f in report["findings"] if f["topic"] == "run time")
    assert run_time["values"]["seconds_per_step"] > 0


def test_check_json_with_an_error_finding(tmp_path):
    """A packet 2 widths from the absorber: check refuses (exit 2) with one
    line naming the field, and stdout still holds exactly one JSON object."""
    job = write_job(tmp_path, merged(TINY, {**CAP, "packet": {"center": -28.0}}))
    proc = wavesweep("check", job, "--json", "--trial-seconds", "0.01", cwd=tmp_path)
    assert proc.returncode == 2, proc.stderr
    line = assert_bad_input(proc, "packet.center", "widths", stdout_empty=False)
    assert "2.0 widths" in line
    report = _one_json_object(proc.stdout)
    errors = [f for f in report["findings"] if f["level"] == "error"]
    assert [f["field"] for f in errors] == ["packet.center"]
    assert errors[0]["values"]["widths"] == pytest.approx(2.0)


# -- all errors at once (issue 12) ----------------------------------------------------
FIVE_MISTAKES = """\
title = "five mistakes"
[particle]
mass = -1.0
[grid]
x = { min = -40.0, max = 40.0, points = 0 }
[[potential]]
kind = "barrier"
height = 0.5
widht = 1.0
center = 0.0
[packet]
center = -10.0
width = 2.0
momentum = 1.0
[evolve]
dt = 0.05
duration = 1.0
scheme = "leapfrog"
[record]
every = 0.07
"""


@pytest.mark.parametrize("command", ["run", "check"])
def test_five_mistakes_are_five_lines_in_file_order(tmp_path, command):
    """A job with five mistakes took five runs to fix (issue 12): now one run
    prints one line per mistake, ``wavesweep <command>: <field>: ...``, in
    the order of the job file, and exits 2 with nothing written."""
    job = tmp_path / "job.toml"
    job.write_text(FIVE_MISTAKES)
    args = ["-o", tmp_path / "out", "--quiet"] if command == "run" else []
    proc = wavesweep(command, job, *args, cwd=tmp_path)
    assert "Traceback" not in proc.stdout + proc.stderr, proc.stderr
    assert proc.returncode == 2, proc.stderr
    assert proc.stdout == ""
    lines = proc.stderr.splitlines()
    fields = ["particle.mass", "grid.x.points", "potential.0.widht", "evolve.scheme", "record.every"]
    assert len(lines) == 5, proc.stderr
    for line, field in zip(lines, fields):
        assert line.startswith(f"wavesweep {command}: {field}: "), line
    assert "'width'" in lines[2] and "0.05" in lines[4]
    assert leftovers(tmp_path / "out") == []


def test_many_errors_are_capped_with_a_count(tmp_path, capsys):
    """30 detectors outside the grid: 20 lines, then how many more (in-process)."""
    from wavesweep.cli import MAX_ERROR_LINES, main

    table = merged(TINY, {"detector": [{"name": f"d{i}", "x": 100.0 + i} for i in range(30)]})
    code = main(["check", str(write_job(tmp_path, table))])
    assert code == 2
    lines = capsys.readouterr().err.splitlines()
    assert len(lines) == MAX_ERROR_LINES + 1 == 21
    assert lines[0].startswith("wavesweep check: detector.0.x: 100.0 lies outside the grid")
    assert lines[-1] == "wavesweep check: ... and 10 more errors"


def test_a_detector_on_the_grids_edge_is_refused_without_contradicting_itself(tmp_path, capsys):
    """x = grid.x.min is inside [min, max]: the message says the detector
    must lie strictly between them (a user trial read '-40.0 lies outside
    the grid [-40.0, 40.0]'); one line, exit 2."""
    from wavesweep.cli import main

    for x in (-40.0, 40.0):
        code = main(["check", str(write_job(tmp_path, merged(TINY, {"detector": [{"name": "edge", "x": x}]})))])
        assert code == 2
        err = capsys.readouterr().err.splitlines()
        assert len(err) == 1 and err[0].startswith("wavesweep check: detector.0.x: ")
        assert "edge" in err[0] and "strictly between" in err[0] and "outside" not in err[0]


# -- --set and [sweep] -------------------------------------------------------------
SWEPT = merged(TINY, {"sweep": {"packet.width": [1.0, 1.1]}})


@pytest.mark.parametrize("command", ["run", "submit", "check"])
def test_set_of_a_swept_key_is_refused(tmp_path, command):
    """The sweep would decide packet.width in every run: the override would
    be lost, so it is bad input naming --set packet.width and both fixes."""
    job = write_job(tmp_path, SWEPT, "scan.toml")
    out, root = tmp_path / "out", tmp_path / "root"
    extra = {"run": ["-o", out, "--quiet"], "submit": ["--root", root],
             "check": ["--trial-seconds", "0.01"]}[command]
    proc = wavesweep(command, job, *extra, "--set", "packet.width=1e9", cwd=tmp_path)
    assert_bad_input(proc, "--set packet.width", "[sweep] of scan.toml",
                     "remove 'packet.width' from [sweep]", "drop --set packet.width")
    assert leftovers(out) == []
    assert not root.exists()


def test_set_of_a_key_not_swept_reaches_every_run(tmp_path):
    job = write_job(tmp_path, SWEPT, "scan.toml")
    out = tmp_path / "out"
    proc = wavesweep("run", job, "-o", out, "--quiet", "--set", "packet.center=-12.0", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    packets = []
    for line in proc.stdout.splitlines():
        with xr.open_dataset(line) as ds:
            packets.append(tomllib.loads(ds.attrs["job"])["packet"])
    assert [p["width"] for p in packets] == [1.0, 1.1]
    assert [p["center"] for p in packets] == [-12.0, -12.0]


# -- a study worked once for the tests below ----------------------------------------
# three points; the second one's potential turns non-finite at t = 0.5
DIVERGING = merged(TINY, {
    "potential": [{"kind": "expression", "expression": "where(t > b, log(0.0 - a), 0.0 * x)",
                   "params": {"a": 1.0, "b": 100.0}}],
    "sweep": {"potential.0.params.b": [100.0, 0.5, 200.0]},
})


@pytest.fixture(scope="module")
def worked(tmp_path_factory):
    """(folder, root, the first `work`'s process) of the study 'scan'."""
    folder = tmp_path_factory.mktemp("worked")
    root = folder / "root"
    job = write_job(folder, DIVERGING, "scan.toml")
    sub = wavesweep("submit", job, "--root", root, cwd=folder)
    assert sub.returncode == 0, sub.stderr
    first = cli("work", "--root", root, cwd=folder)      # worker processes: a real process
    assert first.returncode == 0, first.stderr
    return folder, root, first


def _copy_root(worked, tmp_path) -> Path:
    import shutil

    root = tmp_path / "root"
    shutil.copytree(worked[1], root)
    return root


def test_work_prints_one_line_summary(worked, tmp_path):
    folder, root, first = worked
    (line,) = first.stdout.splitlines()
    assert "2 done, 1 failed, 0 requeued" in line, line
    assert f"results in {root.resolve() / 'scan'}" in line, line
    assert "wavesweep status --root" in line
    assert "Traceback" not in first.stderr
    again = cli("work", "--root", _copy_root(worked, tmp_path), cwd=tmp_path)
    assert again.returncode == 0, again.stderr
    (line,) = again.stdout.splitlines()
    assert "0 done, 0 failed, 0 requeued" in line and "nothing ran" in line, line


def _unusable_root(tmp_path, kind) -> Path:
    (tmp_path / "plain-file").write_text("not a folder\n")
    if kind == "file":
        return tmp_path / "plain-file"
    if kind == "under-file":
        return tmp_path / "plain-file" / "root"
    if not os.path.isdir("/proc/self"):
        pytest.skip("no /proc here")
    return Path("/proc/wavesweep-no-such-root")


ROOT_COMMANDS = {"submit": ["submit", "JOB"], "work": ["work"], "status": ["status"],
                 "retry": ["retry"], "cancel": ["cancel"], "collect": ["collect", "scan"]}


@pytest.mark.parametrize("kind", ["file", "under-file", "proc"])
@pytest.mark.parametrize("command", list(ROOT_COMMANDS))
def test_a_root_that_cannot_be_used_is_bad_input(tmp_path, command, kind):
    if kind == "under-file" and command != "submit":
        pytest.skip("the other commands need an existing queue: covered by 'file'")
    root = _unusable_root(tmp_path, kind)
    job = write_job(tmp_path, TINY, "free.toml")
    args = [job if a == "JOB" else a for a in ROOT_COMMANDS[command]]
    proc = wavesweep(*args, "--root", root, cwd=tmp_path)
    assert_bad_input(proc, "--root", str(root))
    assert (tmp_path / "plain-file").read_text() == "not a folder\n"


@pytest.mark.skipif(not hasattr(os, "geteuid") or os.geteuid() == 0,
                    reason="root writes through chmod 555; the read-only queue is tested in "
                           "tests/unit/test_queue.py with SQLite's query_only")
def test_a_read_only_root_is_bad_input_and_keeps_the_queue(worked, tmp_path):
    root = _copy_root(worked, tmp_path)
    job = write_job(tmp_path, TINY, "free.toml")
    before = {p: p.read_bytes() for p in root.rglob("*") if p.is_file()}
    paths = [root, *[p for p in root.rglob("*")]]
    for p in paths:
        p.chmod(0o555 if p.is_dir() else 0o444)
    try:
        for args in (["submit", job], ["work"], ["retry", "--study", "scan"], ["collect", "scan"]):
            proc = wavesweep(*args, "--root", root, cwd=tmp_path)
            assert_bad_input(proc, "--root", str(root), stdout_empty=False)
    finally:
        for p in paths:
            p.chmod(0o755 if p.is_dir() else 0o644)
    assert {p: p.read_bytes() for p in root.rglob("*") if p.is_file() and "sqlite" not in p.name} == \
        {p: b for p, b in before.items() if "sqlite" not in p.name}


# -- collect's output ----------------------------------------------------------------
def test_collect_refuses_a_summary_path_that_is_a_folder(worked, tmp_path):
    root = _copy_root(worked, tmp_path)
    blocker = root / "scan" / "summary.nc"
    blocker.mkdir()
    (blocker / "notes.txt").write_text("mine\n")
    proc = wavesweep("collect", "scan", "--root", root, cwd=tmp_path)
    line = assert_bad_input(proc, str(blocker), "is a folder", "move or remove")
    assert (blocker / "notes.txt").read_text() == "mine\n"
    assert [p.name for p in (root / "scan").iterdir() if p.name.endswith(".part")] == []
    blocker.joinpath("notes.txt").unlink()
    blocker.rmdir()
    ok = wavesweep("collect", "scan", "--root", root, cwd=tmp_path)
    assert ok.returncode == 0, ok.stderr or line
    assert Path(ok.stdout.strip()) == blocker and blocker.is_file()


@pytest.mark.parametrize(("code", "status", "field"), [(30, 2, "--root"), (13, 2, "--root"),
                                                      (28, 1, "internal error")])
def test_a_failed_summary_write_keeps_the_previous_summary(worked, tmp_path, monkeypatch, capsys,
                                                           code, status, field):
    """In-process, with the netCDF write failing as a read-only filesystem
    (EROFS) or a refused permission (EACCES) would make it: bad input, exit 2,
    one line naming --root; a full disk (ENOSPC) is the environment's failure,
    exit 1.  Either way the previous summary stays byte for byte and no
    partial file is left."""
    from wavesweep.cli import main

    root = _copy_root(worked, tmp_path)
    assert main(["collect", "scan", "--root", str(root)]) == 0
    summary = root / "scan" / "summary.nc"
    previous = summary.read_bytes()
    capsys.readouterr()

    def refuse(self, path, *args, **kwargs):
        Path(path).write_bytes(b"half a file")          # as a write that stopped part-way
        raise OSError(code, os.strerror(code), str(path))

    monkeypatch.setattr(xr.Dataset, "to_netcdf", refuse)
    assert main(["collect", "scan", "--root", str(root)]) == status
    err = capsys.readouterr().err
    assert len(err.splitlines()) == 1 and field in err, err
    if status == 2:
        assert "unchanged" in err and str(root / "scan") in err, err
    assert summary.read_bytes() == previous
    assert [p.name for p in (root / "scan").iterdir() if p.name.endswith(".part")] == []


# -- files that are not job files, and states on another grid --------------------------
def _a_result(worked) -> Path:
    return sorted((worked[1] / "scan").glob("*.nc"))[0]


@pytest.mark.parametrize("command", ["run", "submit"])
def test_a_result_given_as_job_file_is_named_as_data(worked, tmp_path, command):
    result = _a_result(worked)
    out = tmp_path / "out"
    extra = ["-o", out, "--quiet"] if command == "run" else ["--root", tmp_path / "root"]
    proc = wavesweep(command, result, *extra, cwd=tmp_path)
    assert_bad_input(proc, result.name, "netCDF/HDF5 data file", "not a job file", "wavesweep plot",
                     "arrivals", "TOML")
    assert leftovers(out) == [] and not (tmp_path / "root").exists()


@pytest.mark.parametrize(("grid", "differ", "pieces"), [
    ({"points": 256}, "points", ["points = 128", "points = 256"]),
    ({"min": -50.0, "max": 50.0}, "x coordinates", ["min = -40.0, max = 40.0", "min = -50, max = 50"]),
])
def test_a_state_on_another_grid_says_what_to_do(worked, tmp_path, grid, differ, pieces):
    job = write_job(tmp_path, merged(TINY, {"grid": {"x": grid},
                                            "packet": {"kind": "file", "path": str(_a_result(worked)),
                                                       "center": None, "width": None,
                                                       "momentum": None}}))
    out = tmp_path / "out"
    proc = wavesweep("run", job, "-o", out, "--quiet", cwd=tmp_path)
    assert_bad_input(proc, "packet.path", f"its {differ} differ", *pieces,
                     "same axes, min, max, points", "[grid]", "wavesweep levels", "--states")
    assert leftovers(out) == []
