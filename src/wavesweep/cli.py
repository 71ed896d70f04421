"""Command line: parses arguments and calls the library (nothing else).

Exit status: 0 success, 2 bad input (one line on stderr), 1 otherwise.
"""
from __future__ import annotations

import argparse
import json
import math
import os
import sys

from ._version import __version__
from .errors import JobError, RunFailed
from .registry import Names

EXIT_OK, EXIT_FAIL, EXIT_INPUT = 0, 1, 2
# Bad input prints one line per error; a job with more prints this many, then a count.
MAX_ERROR_LINES = 20


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # one line, exit 2, as for every bad input
        self.exit(EXIT_INPUT, f"wavesweep: {message} (see {self.prog} --help)\n")


# -- numeric flags -------------------------------------------------------------------
# Every numeric flag is read by one of these (argparse ``type=``): a value that
# is not a finite number in the flag's range is bad input, one line naming the
# flag and the range (argparse prefixes "argument --flag:"), exit 2, before
# anything is read or computed.
def _number_type(convert, low=None, high=None, low_open=False, high_open=False, what="a number"):
    """An argparse type: ``convert(text)`` (int or float), finite, and in
    ``[low, high]`` (an open end with ``low_open`` / ``high_open``)."""
    bounds = []
    if low is not None and high is not None and low_open and high_open:
        bounds.append(f"between {low:g} and {high:g} (exclusive)")
    elif low is not None:
        bounds.append(f"above {low:g}" if low_open else f"at least {low:g}")
    if high is not None and not (low is not None and low_open and high_open):
        bounds.append(f"below {high:g}" if high_open else f"at most {high:g}")
    need = f"{what}, {' and '.join(bounds)}" if bounds else f"{what}, finite"

    def parse(text):
        try:
            value = convert(text)
        except (TypeError, ValueError, OverflowError):
            raise argparse.ArgumentTypeError(f"must be {need}; got {text!r}") from None
        outside = (not math.isfinite(value)
                   or (low is not None and (value <= low if low_open else value < low))
                   or (high is not None and (value >= high if high_open else value > high)))
        if outside:
            raise argparse.ArgumentTypeError(f"must be {need}; got {text!r}")
        return value

    parse.__name__ = convert.__name__   # argparse names the type in its own messages
    return parse


def positive_float(high, what="a number"):
    """A finite float above 0 and at most ``high``."""
    return _number_type(float, 0.0, high, low_open=True, what=what)


def float_range(low, high, what="a number"):
    """A finite float in ``[low, high]``."""
    return _number_type(float, low, high, what=what)


def fraction(what="a fraction"):
    """A finite float strictly between 0 and 1."""
    return _number_type(float, 0.0, 1.0, low_open=True, high_open=True, what=what)


def int_range(low, high, what="an integer"):
    """An integer in ``[low, high]`` (digits only: no fraction, no exponent)."""
    return _number_type(int, low, high, what=what)


def pixel_size(text):
    """``WIDTHxHEIGHT`` in pixels, each within what a frame or figure can be
    (16x16 .. 7680x4320), as ``(width, height)``."""
    try:
        width, height = (int(v) for v in str(text).lower().split("x"))
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be WIDTHxHEIGHT in pixels such as 960x540; got {text!r}") from None
    if not (16 <= width <= 7680 and 16 <= height <= 4320):
        raise argparse.ArgumentTypeError(f"must lie within 16x16 .. 7680x4320 pixels; got {text!r}")
    return width, height


# The ranges: wide enough for any real use, narrow enough that a slip (a sign,
# a unit, a missing decimal point) is caught before anything runs.
WEEK_SECONDS = 7 * 24 * 3600.0
FLAG_TYPES = {
    "--trial-seconds": float_range(0.0, 3600.0, "a number of seconds (0: no trial)"),
    "--tolerance": fraction("a tolerance"),
    "--workers": int_range(1, 1024, "a number of worker processes"),
    "--checkpoint-minutes": positive_float(WEEK_SECONDS / 60.0, "a number of minutes"),
    "--lease-seconds": positive_float(WEEK_SECONDS, "a number of seconds"),
    "--max-attempts": int_range(1, 1000, "a number of attempts"),
    "--batch": int_range(1, 1024, "a number of runs per batch"),
    "--every": int_range(1, 10**9, "a whole number of snapshots"),
    "--fps": float_range(0.1, 1000.0, "a number of frames per second"),
    "--size": pixel_size,
    "--dpi": int_range(10, 1000, "a number of dots per inch"),
    "--floor": fraction("a fraction of the peak density"),
    "--count": int_range(1, 100_000, "a number of levels"),
    "--min-weight": fraction("a weight |c_n|^2"),
}


# -- names from registries ---------------------------------------------------------
# Choices that are registered names are read from their registry when argparse
# checks or lists them (registry.Names), so a registered one is accepted; the
# registry's module loads then, not with every command.
def _fft_backends():
    from .fft import backend_choices   # lazy: numpy and scipy.fft, only when --fft is given or listed
    return backend_choices()


def _executors():
    from .studies.executors import EXECUTORS   # lazy: the queue's modules, only when --executor is used
    return EXECUTORS


def _parser() -> argparse.ArgumentParser:
    p = _Parser(prog="wavesweep", description="Wave-packet simulations on grids, studies and analysis.")
    p.add_argument("--version", action="store_true", help="print the version and exit")
    sub = p.add_subparsers(dest="command", parser_class=_Parser)

    r = sub.add_parser("run", help="run a job now; one result file per run")
    r.add_argument("job", help="job file (TOML)")
    r.add_argument("-o", "--output", required=True, help="output folder")
    r.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                   help="override a job field, e.g. --set packet.width=15 (repeatable)")
    r.add_argument("--quiet", action="store_true", help="no progress bar")
    r.add_argument("--fft", default=None, choices=Names(_fft_backends),
                   help="FFT backend (default: evolve.fft of the job; `wavesweep keys evolve` lists them)")
    r.add_argument("--force", action="store_true",
                   help="run even when `wavesweep check` finds errors (they are printed as warnings)")

    c = sub.add_parser("check", help="is the grid and time step adequate? memory, disk, time")
    c.add_argument("job")
    c.add_argument("--set", action="append", default=[], metavar="KEY=VALUE")
    c.add_argument("--json", action="store_true", help="print the findings as JSON")
    c.add_argument("--trial-seconds", type=FLAG_TYPES["--trial-seconds"], default=1.0, help="length of the timed trial")
    c.add_argument("--tolerance", type=FLAG_TYPES["--tolerance"], default=None, metavar="TOL",
                   help="also run a pilot that measures the error of the run's outputs (the job run "
                        "again with 1.5x the points per axis and with another dt; about 3x the run "
                        "in 1D, printed before it starts) and names the setting that misses TOL: "
                        "probabilities (absorbed per face, beyond each detector) absolutely, arrival "
                        "mean and spread relative to their value, the final energy relative to the "
                        "larger of |<H>| at the start and the end")

    root_help = "queue folder (default: $WAVESWEEP_ROOT or ./wavesweep-runs)"
    sb = sub.add_parser("submit", help="queue every run of a study (idempotent)")
    sb.add_argument("job")
    sb.add_argument("--root", default=None, help=root_help)
    sb.add_argument("--study", default=None, help="study name (default: the job file's name)")
    sb.add_argument("--set", action="append", default=[], metavar="KEY=VALUE")
    sb.add_argument("--force", action="store_true",
                    help="queue even when `wavesweep check` finds errors at some sweep points")

    w = sub.add_parser("work", help="run queued runs with worker processes")
    w.add_argument("--root", default=None, help=root_help)
    w.add_argument("--workers", type=FLAG_TYPES["--workers"], default=1, help="worker processes (they share the cores)")
    w.add_argument("--until", default=None, metavar="HH:MM",
                   help="claim nothing new after this time (HH:MM: the next one; or a date-time)")
    w.add_argument("--checkpoint-minutes", type=FLAG_TYPES["--checkpoint-minutes"], default=5.0, help="wall time between checkpoints")
    w.add_argument("--lease-seconds", type=FLAG_TYPES["--lease-seconds"], default=60.0,
                   help="a run whose worker has not reported for this long is requeued")
    w.add_argument("--max-attempts", type=FLAG_TYPES["--max-attempts"], default=3, help="attempts before a run is failed")
    w.add_argument("--executor", default=None, choices=Names(_executors), metavar="NAME",
                   help="the executor that drains the queue: one of %(choices)s (default: worker "
                        "processes on this machine; --dask ADDRESS for a Dask cluster)")
    w.add_argument("--dask", default=None, metavar="ADDRESS",
                   help="run on the Dask cluster whose scheduler is at ADDRESS (tcp://host:8786), or "
                        "local:N for N local worker processes")
    w.add_argument("--batch", type=FLAG_TYPES["--batch"], default=32, metavar="N",
                   help="step up to N runs that differ only in their packet together (1: one at a time)")

    st = sub.add_parser("status", help="counts by state, progress of running runs")
    st.add_argument("--root", default=None, help=root_help)
    st.add_argument("--json", action="store_true", help="print one JSON object")

    for name, what in (("retry", "requeue failed runs (or the named ones)"),
                       ("cancel", "cancel queued runs (or the named ones)")):
        q = sub.add_parser(name, help=what)
        q.add_argument("run_ids", nargs="*", metavar="RUN_ID")
        q.add_argument("--root", default=None, help=root_help)
        q.add_argument("--study", default=None, help="only this study")

    co = sub.add_parser("collect", help="one dataset of a study: parameters as dimensions")
    co.add_argument("study")
    co.add_argument("--root", default=None, help=root_help)

    ar = sub.add_parser("arrivals", help="arrival-time distributions at the detectors of a run")
    ar.add_argument("result", metavar="RUN.nc")
    ar.add_argument("--detector", default=None, help="only this detector")
    ar.add_argument("--json", action="store_true", help="print one JSON object")
    ar.add_argument("--plot", default=None, metavar="FILE", help="draw the distributions (.png/.pdf/.svg)")
    ar.add_argument("--overwrite", action="store_true", help="replace FILE if it exists (without it an existing file is refused)")

    tr = sub.add_parser("transmission", help="transmission and reflection of a run, and T(E)",
                        description="Totals per face and detector, and T(E) with its +/- per energy.  The +/- "
                                    "covers what had not passed the detector by the end and the method's "
                                    "premises (a packet starting where its surface is flat and uncoupled, "
                                    "flat uncoupled surfaces beyond the detector, nothing sent back), not the "
                                    "discretisation (dt, grid): `wavesweep check JOB --tolerance` or a refined "
                                    "run measures that.  Where a premise fails, no T(E) is given, only why.")
    tr.add_argument("result", metavar="RUN.nc")
    tr.add_argument("--detector", default=None, help="detector beyond the scatterer for T(E)")
    tr.add_argument("--json", action="store_true", help="print one JSON object")

    sp = sub.add_parser("spectrum", help="momentum and energy spectra of what left through each detector",
                        description="The surface-flux method (Tao & Scrinzi 2012): the momentum distribution of "
                                    "what crossed each detector outwards by the end of the run, with a driving "
                                    "field (Volkov phases) or without: through a point in 1D, through a line "
                                    "or plane in 2D/3D when its [[detector]] says spectrum = true (transverse "
                                    "momenta resolved).  Each carries how far it holds (cut_uncertainty, "
                                    "total_uncertainty); slow parts still arriving at the end are a warning "
                                    "with the probability still to come.")
    sp.add_argument("result", metavar="RUN.nc")
    sp.add_argument("--detector", default=None, help="only this detector")
    sp.add_argument("--json", action="store_true", help="print one JSON object")
    sp.add_argument("--plot", default=None, metavar="FILE", help="draw the spectra (.png/.pdf/.svg)")
    sp.add_argument("--overwrite", action="store_true", help="replace FILE if it exists (without it an existing file is refused)")

    mv = sub.add_parser("movie", help="a movie of the probability density of a run (.mp4 or .gif); "
                                      "each surface's, on coupled surfaces")
    mv.add_argument("result", metavar="RUN.nc")
    mv.add_argument("-o", "--output", required=True, metavar="FILE", help="FILE.mp4 (H.264) or FILE.gif")
    mv.add_argument("--every", type=FLAG_TYPES["--every"], default=1, metavar="K", help="use every K-th snapshot")
    mv.add_argument("--fps", type=FLAG_TYPES["--fps"], default=20.0, help="frames per second")
    mv.add_argument("--dpi", type=FLAG_TYPES["--dpi"], default=100, help="dots per inch (text and line sizes)")
    mv.add_argument("--size", type=FLAG_TYPES["--size"], default="960x540", metavar="WxH", help="frame size in pixels")
    mv.add_argument("--scale", default="linear", choices=("linear", "log"), help="density scale")
    mv.add_argument("--floor", type=FLAG_TYPES["--floor"], default=1e-6, help="log scale: lowest density / peak")
    mv.add_argument("--parts", action="store_true", help="1D: Re psi, Im psi and |psi| "
                                                         "(needs record.snapshot_psi = true)")
    mv.add_argument("--projection", default=None, metavar="AXIS", help="3D: integrate over AXIS (default z)")
    mv.add_argument("--slice", default=None, metavar="AXIS=VALUE", help="3D: the plane AXIS = VALUE instead")
    mv.add_argument("--column", default=None, metavar="AXIS",
                    help="2D/3D: the column density along AXIS (what a camera looking along it sees)")
    mv.add_argument("--overwrite", action="store_true", help="replace FILE if it exists (without it an existing file is refused)")

    pl = sub.add_parser("plot", help="a summary figure of a run (each surface's, on coupled surfaces), "
                                     "or of a study's summary.nc")
    pl.add_argument("result", metavar="RUN.nc")
    pl.add_argument("-o", "--output", required=True, metavar="FILE", help="FILE.png, .pdf or .svg")
    pl.add_argument("--size", type=FLAG_TYPES["--size"], default="1200x900", metavar="WxH", help="figure size in pixels")
    pl.add_argument("--dpi", type=FLAG_TYPES["--dpi"], default=100, help="dots per inch")
    pl.add_argument("--column", default=None, metavar="AXIS",
                    help="2D/3D: show the column density along AXIS (what a camera looking along it sees)")
    pl.add_argument("--overwrite", action="store_true", help="replace FILE if it exists (without it an existing file is refused)")

    lv = sub.add_parser("levels", help="lowest stationary energies of a job, or the levels in a run")
    lv.add_argument("job", nargs="?", default=None, metavar="JOB.toml", help="job file (not with --from)")
    lv.add_argument("--count", type=FLAG_TYPES["--count"], default=None, metavar="K",
                    help="how many levels (required with JOB.toml; with --from the K lowest found)")
    lv.add_argument("--json", action="store_true", help="print one JSON object")
    lv.add_argument("--set", action="append", default=[], metavar="KEY=VALUE", help="override a job field")
    lv.add_argument("--states", default=None, metavar="FILE.nc",
                    help="write the states (netCDF; [packet] kind = 'file' with state = i reads one)")
    lv.add_argument("--overwrite", action="store_true", help="replace the --states file if it exists "
                                                             "(without it an existing file is refused)")
    lv.add_argument("--from", dest="from_run", default=None, metavar="RUN.nc",
                    help="the levels in a run's autocorrelation instead (no JOB.toml)")
    lv.add_argument("--min-weight", type=FLAG_TYPES["--min-weight"], default=1e-6, metavar="W",
                    help="with --from: smallest weight |c_n|^2 reported")

    ks = sub.add_parser("keys", help="the job-file keys: units, defaults, allowed values, formulas of V(r, t)")
    ks.add_argument("topic", nargs="?", default=None, metavar="TOPIC",
                    help="a table (grid, evolve, packet, units, ...) or a potential or packet kind "
                         "(barrier, field, eigenstate, ...); none: every table and the kinds")
    ks.add_argument("--json", action="store_true", help="print one JSON object")
    return p


def main(argv=None) -> int:
    """Run one command; returns the exit status (also for argument errors
    and ``--help``, which argparse reports by raising SystemExit)."""
    try:
        args = _parser().parse_args(argv)
    except SystemExit as e:    # the message is printed: one line for bad arguments
        return e.code if isinstance(e.code, int) else EXIT_INPUT
    if args.version:
        print(__version__)
        return EXIT_OK
    if not args.command:
        _parser().print_help()
        return EXIT_INPUT
    try:
        status = _COMMANDS[args.command](args)
        # what is still buffered goes out here, where a reader that has gone
        # (`| head -1`) is a BrokenPipeError handled below, and not at the
        # interpreter's exit ("Exception ignored ... BrokenPipeError", status 120)
        sys.stdout.flush()
        return status
    except JobError as e:
        lines = e.lines()    # one per independent error, in the order of the job file
        for line in lines[:MAX_ERROR_LINES]:
            print(f"wavesweep {args.command}: {_one_line(line)}", file=sys.stderr)
        if len(lines) > MAX_ERROR_LINES:
            print(f"wavesweep {args.command}: ... and {len(lines) - MAX_ERROR_LINES} more errors",
                  file=sys.stderr)
        return EXIT_INPUT
    except RunFailed as e:
        print(f"wavesweep {args.command}: run failed: {_one_line(e.reason)}", file=sys.stderr)
        return EXIT_FAIL
    except BrokenPipeError:   # the reader (head, less) closed early: what it read is what it wanted
        try:
            os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        except OSError:
            pass
        return EXIT_OK
    except KeyboardInterrupt:
        print(f"wavesweep {args.command}: interrupted", file=sys.stderr)
        return 130
    except MemoryError:
        print(f"wavesweep {args.command}: out of memory; use fewer grid points "
              "(wavesweep check estimates the memory a job needs)", file=sys.stderr)
        return EXIT_FAIL
    except Exception as e:  # a bug or an environment failure: one line, exit 1
        if os.environ.get("WAVESWEEP_DEBUG"):
            raise
        print(f"wavesweep {args.command}: internal error: {type(e).__name__}: {_one_line(e)} "
              "(set WAVESWEEP_DEBUG=1 to see the traceback)", file=sys.stderr)
        return EXIT_FAIL


def _one_line(message) -> str:
    """The contract promises a one-line cause on stderr."""
    return " ".join(str(message).split())


def _run(args) -> int:
    # lazy: each command loads only what it needs (every command's start-up)
    from .study import load_study
    from .run import Simulation

    # lazy: each command loads only what it needs (every command's start-up)
    from .check import preflight
    from .io.paths import output_folder

    output_folder(args.output, "--output")   # a file in its place or an unwritable folder: before any work
    study = load_study(args.job, args.set)   # validates every run before any starts
    _warn("run", preflight(study.runs, force=args.force))   # judges every run before any starts
    n = len(study.runs)
    for i, spec in enumerate(study.runs, 1):
        if n > 1 and not args.quiet:
            where = ", ".join(f"{k} = {v!r}" for k, v in spec.params.items())
            print(f"run {i}/{n}: {where}", file=sys.stderr)
        path = Simulation(spec.job, fft=args.fft).run(args.output, progress=not args.quiet)
        print(path, flush=True)
    return EXIT_OK


def _run_cost(job) -> float:
    """Steps x grid points of a job, from its table (no set-up built)."""
    # lazy: each command loads only what it needs (every command's start-up)
    from .adequacy import memory_estimate
    ev = job.table["evolve"]
    steps = job.units.to_atomic(ev["duration"], "time") / job.units.to_atomic(ev["dt"], "time")
    return steps * memory_estimate(job)["points"]


def _check(args) -> int:
    # lazy: each command loads only what it needs (every command's start-up)
    from .study import load_study
    from .check import check_study

    if args.tolerance is not None:
        # lazy: each command loads only what it needs (every command's start-up)
        from .pilot import plan_pilot, run_pilot, validate_tolerance
        validate_tolerance(args.tolerance)      # before anything is computed
    study = load_study(args.job, args.set)
    progress = None
    if len(study.runs) > 1 and not args.json and sys.stderr.isatty():   # a log keeps no \r counter
        def progress(n, total):
            print(f"\rcheck: point {n + 1}/{total}", end="", file=sys.stderr, flush=True)
    report = check_study(study, trial_seconds=args.trial_seconds, progress=progress)
    if progress:
        print(file=sys.stderr)
    if args.tolerance is not None and report.errors:
        print("wavesweep check: no accuracy pilot: the job has errors", file=sys.stderr)
    elif args.tolerance is not None:
        # a study's pilot measures the point that runs longest (steps x points)
        spec = max(study.runs, key=lambda r: _run_cost(r.job))
        if len(study.runs) > 1:
            where = ", ".join(f"{k} = {v!r}" for k, v in spec.params.items())
            print(f"wavesweep check: accuracy pilot on the longest point ({where})", file=sys.stderr)
        plan = plan_pilot(spec.job, args.tolerance)
        print(f"wavesweep check: {plan.text()}", file=sys.stderr, flush=True)
        say = (lambda line: print(f"wavesweep check: {line}", file=sys.stderr, flush=True))
        report.findings.extend(run_pilot(spec.job, args.tolerance, progress=say, plan=plan,
                                         bars=sys.stderr.isatty()))
    if args.json:
        print(json.dumps(report.as_dict()))
    else:
        print(report.text())
    if report.errors:
        first = report.errors[0]
        print(f"wavesweep check: {first.field or first.topic}: {_one_line(first.message)}", file=sys.stderr)
        return EXIT_INPUT
    return EXIT_OK


def _submit(args) -> int:
    # lazy: each command loads only what it needs (every command's start-up)
    from .studies.api import default_root, submit

    out = submit(args.job, args.root, args.study, args.set, force=args.force)
    _warn("submit", out.get("warnings", []))
    print(f"{out['study']}: {out['runs']} runs; added {out['added']}, already queued or done "
          f"{out['existing']}, reused from other studies {out['reused']} "
          f"(root {default_root(args.root)})")
    return EXIT_OK


def _work(args) -> int:
    # lazy: each command loads only what it needs (every command's start-up)
    from .studies.api import format_work, until_deadline, work
    from .errors import DiskFull

    deadline, note = until_deadline(args.until)
    if note:
        _warn("work", [note])
    try:
        out = work(args.root, args.workers, deadline, checkpoint_seconds=60.0 * args.checkpoint_minutes,
                   lease_seconds=args.lease_seconds, max_attempts=args.max_attempts, batch=args.batch,
                   executor=args.executor, dask=args.dask)
    except DiskFull as e:   # before any claim: nothing ran
        print(f"wavesweep work: {_one_line(e.reason)}; nothing claimed", file=sys.stderr)
        return EXIT_FAIL
    if out.get("until_passed"):
        print(f"wavesweep work: --until {args.until} has passed; nothing claimed", file=sys.stderr)
    elif out.get("stopped"):
        print("wavesweep work: stopped; running runs were checkpointed and requeued", file=sys.stderr)
    if out.get("disk_full_reason"):
        print(f"wavesweep work: {_one_line(out['disk_full_reason'])}", file=sys.stderr)
    print(format_work(out), flush=True)    # the drain's summary: counts and where the results are
    # a drain cut short by its environment (a full disk, a dead worker) is not a success
    return EXIT_OK if out.get("ok", True) else EXIT_FAIL


def _status(args) -> int:
    # lazy: each command loads only what it needs (every command's start-up)
    from .studies.api import format_status, status

    st = status(args.root)
    print(json.dumps(st) if args.json else format_status(st))
    return EXIT_OK


def _retry_or_cancel(args) -> int:
    # lazy: each command loads only what it needs (every command's start-up)
    from .studies.api import existing_queue

    queue = existing_queue(args.root)
    op = queue.retry if args.command == "retry" else queue.cancel
    n = op(run_ids=args.run_ids or None, study=args.study)
    print(f"{'requeued' if args.command == 'retry' else 'cancelled'} {n} run(s)")
    return EXIT_OK


def _collect(args) -> int:
    # lazy: each command loads only what it needs (every command's start-up)
    from .studies.api import default_root
    from .studies.collect import collect_study, missing_points

    out = collect_study(default_root(args.root), args.study)
    print(out["path"])
    _warn("collect", [missing_points(out)] if out["missing"] else [])
    return EXIT_OK


def _finite(x):
    """JSON has no NaN: missing numbers become null."""
    if isinstance(x, dict):
        return {k: _finite(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_finite(v) for v in x]
    if hasattr(x, "tolist"):
        return _finite(x.tolist())
    if isinstance(x, float) and x != x:
        return None
    return x


def _warn(command, warnings) -> None:
    for w in dict.fromkeys(warnings):          # once each, in order
        print(f"wavesweep {command}: warning: {_one_line(w)}", file=sys.stderr)


def _run_title(path) -> str:
    """'<job title> (run <id>)' from a result's attributes, else the file name."""
    # lazy: each command loads only what it needs (every command's start-up)
    import xarray as xr
    try:
        with xr.open_dataset(path) as ds:
            return f"{ds.attrs.get('title', '')} (run {ds.attrs.get('run_id', '?')})".strip()
    except (OSError, ValueError):
        return os.path.basename(path)


ARRIVAL_KEYS = ("probability", "mean", "std", "median", "q10", "q90", "most_probable", "backflow",
                "classical_mean")


def _arrivals(args) -> int:
    # lazy: each command loads only what it needs (every command's start-up)
    from .analysis.arrivals import arrival_times
    from .io.paths import output_file
    from .viz.arrivals import FIGURE_TYPES

    if args.plot:   # before the distributions are computed
        output_file(args.plot, "--plot", FIGURE_TYPES, overwrite=args.overwrite, kind="figure")
    dists = arrival_times(args.result, args.detector, surfaces=True)
    if isinstance(next(iter(dists.values())), dict):   # coupled surfaces: {detector: {surface: ...}}
        return _surface_arrivals(args, dists)
    units = next(iter(dists.values())).time_units
    if args.plot:
        # lazy: each command loads only what it needs (every command's start-up)
        from .viz.arrivals import plot_arrivals
        plot_arrivals(dists, args.plot, title=_run_title(args.result), overwrite=args.overwrite)
    if args.json:
        print(json.dumps(_finite({"detectors": {n: d.as_dict() for n, d in dists.items()},
                                  "time_units": units})))
    else:
        print(f"{'detector':<12}{'definition':<15}" + "".join(f"{k:>15}" for k in ARRIVAL_KEYS) + "  note")
        for n, d in dists.items():
            note = ("nothing arrived" if d.stats["mean"] != d.stats["mean"] else
                    "truncated: run longer" if d.stats.get("truncated") else "")
            print(f"{n:<12}{d.definition:<15}" + "".join(f"{d.stats[k]:>15.6g}" for k in ARRIVAL_KEYS)
                  + f"  {note}")
        print(f"times in {units}; probability and backflow dimensionless; nan: not defined")
        screens = [n for n, d in dists.items() if d.pattern is not None]
        if screens:   # resolved detectors: what arrived where is an array, for --json and `plot`
            print(f"resolved: {', '.join(screens)}; the pattern (probability per position and mean arrival) "
                  "is in --json and `wavesweep plot`")
        if args.plot:
            print(f"figure: {args.plot}")
    _warn("arrivals", [w for d in dists.values() for w in d.warnings])
    return EXIT_OK


def _surface_arrivals(args, dists) -> int:
    """``arrivals`` on coupled surfaces: one row per (detector, surface)."""
    first = next(iter(next(iter(dists.values())).values()))
    units = first.time_units
    if args.plot:
        # lazy: each command loads only what it needs (every command's start-up)
        from .viz.arrivals import plot_surface_arrivals
        plot_surface_arrivals(dists, args.plot, title=_run_title(args.result), overwrite=args.overwrite)
    if args.json:
        print(json.dumps(_finite({"detectors": {n: {"surfaces": {s: d.as_dict() for s, d in per.items()}}
                                                for n, per in dists.items()},
                                  "surfaces": list(next(iter(dists.values()))), "time_units": units})))
    else:
        keys = ARRIVAL_KEYS[:-1]     # no classical estimate on coupled surfaces
        print(f"{'detector':<12}{'surface':<10}{'definition':<15}" + "".join(f"{k:>15}" for k in keys) + "  note")
        for n, per in dists.items():
            for surface, d in per.items():
                note = ("nothing arrived" if d.stats["mean"] != d.stats["mean"] else
                        "truncated: run longer" if d.stats.get("truncated") else "")
                print(f"{n:<12}{surface:<10}{d.definition:<15}" + "".join(f"{d.stats[k]:>15.6g}" for k in keys)
                      + f"  {note}")
        print(f"times in {units}; probability and backflow dimensionless; nan: not defined")
        if args.plot:
            print(f"figure: {args.plot}")
    _warn("arrivals", [w for per in dists.values() for d in per.values() for w in d.warnings])
    return EXIT_OK


# what the +/- of a T(E) table covers, in its header line
TRUST_NOTE = "+/-: what had not passed it and the premises, not dt or the grid (check --tolerance)"


def _transmission(args) -> int:
    # lazy: each command loads only what it needs (every command's start-up)
    from .analysis.transmission import transmission

    out = transmission(args.result, args.detector)
    if "surfaces" in out:             # coupled surfaces
        return _surface_transmission(args, out)
    er, tot = out["energy_resolved"], out["totals"]
    if args.json:
        body = {"energy": er.get("energy", []), "T": er.get("T", []),
                "T_uncertainty": er.get("T_uncertainty", []),
                "energy_units": er.get("energy_units"), "weight": er.get("weight", []),
                "detector": er.get("detector"), "duration_needed": er.get("duration_needed"),
                "time_units": out["time_units"], "totals": tot}
        if "reason" in er:
            body["reason"] = er["reason"]
        print(json.dumps(_finite(body)))
    else:
        for face, a in tot["absorbed"].items():
            print(f"absorbed at {face:<4} {a:.6g}")
        for name, d in tot["detectors"].items():
            print(f"beyond detector {name!r} (on the grid + absorbed at {d['far_face']}): {d['beyond']:.6g}; "
                  f"crossed it (flux): {d['crossed']:.6g}")
        print(f"still on the grid: {tot['final_norm']:.6g}")
        if "T" in er:
            print(f"\nT(E) at detector {er['detector']!r} ({TRUST_NOTE}):")
            print(f"{'E (' + er['energy_units'] + ')':>14}{'T':>12}{'+/-':>10}{'weight':>10}")
            step = max(1, len(er["energy"]) // 20)
            rows = zip(er["energy"], er["T"], er["T_uncertainty"], er["weight"])
            for e, t, dt, w in list(rows)[::step]:
                print(f"{e:14.6g}{t:12.6f}{dt:10.1e}{w:10.3f}")
        elif "reason" in er:
            print(f"\nno T(E): {er['reason']}")
    if "reason" in er and not er.get("requested") and args.json:    # the text says it on stdout
        out["warnings"].append(f"no energy-resolved T: {er['reason']}")
    _warn("transmission", out["warnings"])
    if er.get("requested"):          # the totals are out; the detector asked for could not give T(E)
        raise er["error"]
    return EXIT_OK


def _spectrum(args) -> int:
    # lazy: each command loads only what it needs (every command's start-up)
    import numpy as np
    from .analysis.surface_flux import spectrum
    from .io.paths import output_file
    from .viz.arrivals import FIGURE_TYPES

    if args.plot:   # before the spectra are computed
        output_file(args.plot, "--plot", FIGURE_TYPES, overwrite=args.overwrite, kind="figure")
    out = spectrum(args.result, args.detector)
    if args.plot:
        # lazy: as above
        from .viz.spectrum import plot_spectrum
        plot_spectrum(out, args.plot, title=_run_title(args.result), overwrite=args.overwrite)
    if args.json:
        print(json.dumps(_finite(out)))
    else:
        for d in out["detectors"]:
            come = "" if d["still_to_come"] is None else f"; still to come {d['still_to_come']:.3g}"
            density = np.asarray(d["probability_density"])
            at = np.unravel_index(int(np.argmax(density)), density.shape)
            where = [f"{d['momentum'][at[0]]:.4g}"] + [f"{d['momentum_' + a][i]:.4g}"   # normal, transverse
                                                      for a, i in zip(d.get("transverse_axes", []), at[1:])]
            names = [d.get("axis", "")] + d.get("transverse_axes", [])
            label = "p" if len(where) == 1 else "(" + ", ".join(f"p_{n}" for n in names) + ")"
            value = where[0] if len(where) == 1 else "(" + ", ".join(where) + ")"
            e_peak = d["energy"][int(np.nanargmax(d["energy_density"]))]
            print(f"detector {d['detector']!r} (leaving to {d['side']}): total {d['total']:.6g} ± "
                  f"{d['total_uncertainty']:.1g}{come}; "
                  f"peak at {label} = {value} {d['momentum_units']}; energy peak {e_peak:.4g} "
                  f"{d['energy_units']}; density good to {max(d['cut_uncertainty'], 1e-16):.0e} of its "
                  f"peak as far as the record's end goes (see any warnings)")
        if args.plot:
            print(f"figure: {args.plot}")
    _warn("spectrum", out["warnings"])
    return EXIT_OK


def _surface_transmission(args, out) -> int:
    """``transmission`` on coupled surfaces: totals per surface and face, T(E) per final surface."""
    er, tot, surfaces = out["energy_resolved"], out["totals"], out["surfaces"]
    if args.json:
        body = {"surfaces": surfaces, "energy": er.get("energy", []), "T": er.get("T", {}),
                "T_uncertainty": er.get("T_uncertainty", {}), "duration_needed": er.get("duration_needed"),
                "largest_uncertainty": er.get("largest_uncertainty", {}),
                "weight": er.get("weight", []), "energy_units": er.get("energy_units"),
                "detector": er.get("detector"), "incident_surface": er.get("incident_surface"),
                "final_potentials": er.get("final_potentials"), "time_units": out["time_units"], "totals": tot}
        if "reason" in er:
            body["reason"] = er["reason"]
        print(json.dumps(_finite(body)))
    else:
        for surface in surfaces:
            for face, a in tot["absorbed"][surface].items():
                print(f"absorbed on {surface} at {face:<4} {a:.6g}")
        for name, d in tot["detectors"].items():
            for surface, v in d["surfaces"].items():
                print(f"beyond detector {name!r} on {surface} (on the grid + absorbed at {d['far_face']}): "
                      f"{v['beyond']:.6g}; crossed it (flux): {v['crossed']:.6g}")
        for surface in surfaces:
            print(f"still on the grid on {surface}: {tot['final_norm'][surface]:.6g}")
        if "T" in er:
            print(f"\nT(E) per final surface at detector {er['detector']!r} (packet on {er['incident_surface']}; "
                  f"{TRUST_NOTE}):")
            print(f"{'E (' + er['energy_units'] + ')':>14}"
                  + "".join(f"{'T ' + s:>12}{'+/-':>10}" for s in surfaces) + f"{'weight':>10}")
            step = max(1, len(er["energy"]) // 20)
            for i in range(0, len(er["energy"]), step):
                print(f"{er['energy'][i]:14.6g}"
                      + "".join(f"{er['T'][s][i]:12.6f}{er['T_uncertainty'][s][i]:10.1e}" for s in surfaces)
                      + f"{er['weight'][i]:10.3f}")
        elif "reason" in er:
            print(f"\nno T(E): {er['reason']}")
    if "reason" in er and not er.get("requested") and args.json:    # the text says it on stdout
        out["warnings"].append(f"no energy-resolved T: {er['reason']}")
    _warn("transmission", out["warnings"])
    if er.get("requested"):
        raise er["error"]
    return EXIT_OK


def _movie(args) -> int:
    # lazy: each command loads only what it needs (every command's start-up)
    from .viz.movie import MovieOptions, render_movie

    cut = None
    if args.slice:
        axis, _, value = args.slice.partition("=")
        try:
            cut = (axis.strip(), float(value))
        except ValueError:
            cut = None
        if cut is None or not math.isfinite(cut[1]):
            raise JobError("--slice", f"expected AXIS=VALUE with a finite VALUE, such as z=0.0, "
                                      f"got {args.slice!r}")
    opt = MovieOptions(every=args.every, fps=args.fps, dpi=args.dpi, size=args.size,
                       scale=args.scale, floor=args.floor, parts=args.parts,
                       projection=args.projection, slice=cut, column=args.column)
    out = render_movie(args.result, args.output, opt, overwrite=args.overwrite)
    print(f"{out['path']}: {out['frames']} frames, {out['frames'] / out['fps']:.1f} s at {out['fps']:g} "
          f"frames/s (made in {out['seconds']:.1f} s)")
    return EXIT_OK


def _plot(args) -> int:
    # lazy: each command loads only what it needs (every command's start-up)
    from .viz.summary import plot_result

    print(plot_result(args.result, args.output, args.size, args.dpi, overwrite=args.overwrite, column=args.column))
    return EXIT_OK


def _levels(args) -> int:
    # lazy: each command loads only what it needs (every command's start-up)
    from .eigen import DEGENERATE_TOL, degenerate_groups, surface_weights
    from .analysis.spectra import (autocorrelation_levels, check_states_path, condensate_ground_state,
                                   coupled_level_errors, coupled_stationary_states, level_errors,
                                   stationary_states, write_states)

    member = {}   # level -> the degenerate level it belongs to (job files only)
    errors = estimate = condensate = None
    surfaces = on_surface = None   # coupled jobs: the surface names, each level's weight on each (count, S)
    if args.from_run is not None:
        if args.job is not None:
            raise JobError("--from", "give either JOB.toml or --from RUN.nc, not both")
        for flag, given in (("--states", args.states is not None), ("--set", bool(args.set)),
                            ("--overwrite", args.overwrite)):
            if given:
                raise JobError(flag, "applies to JOB.toml; --from reads the levels of a finished run")
        found = autocorrelation_levels(args.from_run, args.count, min_weight=args.min_weight, field="--from")
        energies, weights, units = found.energies, found.weights, found.energy_units
        notes = []
        if args.count is not None and len(energies) < args.count:
            notes.append(f"found {len(energies)} levels with weight >= {args.min_weight:g}, not {args.count}")
        broad = [f"{e:.6g}" for e, blended in zip(energies, found.blended) if blended]
        if broad:
            notes.append(f"the lines at {', '.join(broad)} {units} are wider than the window's: a level "
                         "nearby or decay shifts them; a longer run resolves them")
    else:
        if args.job is None:
            raise JobError("JOB.toml", "give a job file, or --from RUN.nc for the levels of a run")
        if args.count is None:
            raise JobError("--count", "required with a job file: how many levels, e.g. --count 10")
        # lazy: each command loads only what it needs (every command's start-up)
        from .job import load_job
        from .setup import Model

        if args.states:   # before the solve: a path that cannot be written (or is taken) costs nothing
            check_states_path(args.states, overwrite=args.overwrite)
        # lazy: each command loads only what it needs (every command's start-up)
        from .job import read_job_file
        swept = [k for k in (read_job_file(args.job).get("sweep") or {}) if k != "mode"]
        job = load_job(args.job, args.set, sweep=False)   # the levels of one job: the sweep plays no part
        # lazy: each command loads only what it needs (every command's start-up)
        from .adequacy import levels_memory_estimate, memory_error
        axes = [a for a in ("x", "y", "z", "r") if a in job.table["grid"]]
        too_big = memory_error(levels_memory_estimate(job, args.count + 1), f"{args.count} levels of this grid",
                               f"grid.{axes[-1]}.points")
        if too_big is not None:   # judged from shapes, before anything is allocated
            raise too_big
        model = Model(job)   # the packet plays no part in the levels
        if model.coupled and model.interaction is not None:
            raise JobError("interaction", "levels on coupled surfaces do not take a mean field g N |psi|^2; "
                                          "remove [interaction] for the levels of T + V")
        # coupled surfaces: the full matrix Hamiltonian, states (count, S, *grid)
        solve = coupled_stationary_states if model.coupled else stationary_states
        energies_au = states = None
        if args.count >= 1:
            try:   # one level more, to tell whether the last one asked for is degenerate with the next
                energies_au, states = solve(model, args.count + 1, field="--count")
            except JobError:   # the grid holds no more states
                pass
        if energies_au is None:   # the count's own answer, or its own message
            energies_au, states = solve(model, args.count, field="--count")
        for a, b in degenerate_groups(energies_au):
            label = f"levels {a}-{b}" + (" (or more)" if b >= args.count else "")
            member.update((n, label) for n in range(a, min(b + 1, args.count)))
        energies_au, states = energies_au[:args.count], states[:args.count]
        if model.coupled:
            surfaces = model.surfaces
            on_surface = surface_weights(states, model.grid.cell_volume)
            estimate = coupled_level_errors(model, energies_au, states)
        else:
            estimate = level_errors(model, energies_au, states)
        units = model.units.unit_label("energy")
        ef = model.units.factor("energy")
        energies, errors, weights = estimate.energies / ef, estimate.errors / ef, None
        notes = [f"{estimate.refine}: {estimate.advice}"] if estimate.advice else []
        if model.interaction is not None:   # the condensate's ground state: mu and E per atom
            mu, energy, _ = condensate_ground_state(model)
            condensate = (mu / ef, energy / ef)
            notes.insert(0, "the levels are those of T + V without the mean field g N |psi|^2; the chemical "
                            "potential and energy are the condensate ground state's (imaginary time)")
        if surfaces is not None and member:
            notes.append("the states of a degenerate level are any orthonormal basis of it: their weights on "
                         "the surfaces are not defined one by one, only summed over the level")
        if swept:
            notes.insert(0, f"sweep: the levels are those of the job without its [sweep] ({', '.join(swept)} "
                            "as written outside it, or as --set); --set them for a point of the sweep")
    # the levels first: a states file that fails to write loses nothing computed
    if args.json:
        body = {"energies": [float(e) for e in energies], "energy_units": units}
        if weights is not None:
            body["weights"] = [float(w) for w in weights]
        if errors is not None:
            body["energy_errors"] = [float(d) if math.isfinite(d) else None for d in errors]
            body["refine"] = estimate.refine
            body["extrapolated"] = [bool(x) for x in estimate.extrapolated]
        if condensate is not None:
            body["chemical_potential"], body["energy"] = condensate
        if surfaces is not None:
            body["surfaces"] = list(surfaces)
            body["surface_weights"] = [{name: float(w) for name, w in zip(surfaces, row)} for row in on_surface]
        print(json.dumps(body))
    else:
        head = f"{'level':>5}  {'energy (' + units + ')':>22}"
        head += f"  {'error':>9}" if errors is not None else ""
        head += f"  {'weight':>12}" if weights is not None else ""
        head += "".join(f"  {'on ' + name:>12}" for name in surfaces) if surfaces is not None else ""
        print(head + (f"  degenerate (within {DEGENERATE_TOL:g} relative)" if member else ""))
        for n, e in enumerate(energies):   # in energy order, 0 the lowest
            row = f"{n:>5}  {e:>22.12g}"
            row += f"  {errors[n]:>9.2g}" if errors is not None else ""
            row += f"  {weights[n]:>12.6g}" if weights is not None else ""
            row += "".join(f"  {w:>12.6f}" for w in on_surface[n]) if surfaces is not None else ""
            print((row + f"  {member[n]}") if n in member else row)
        if condensate is not None:
            print(f"ground state with the interaction: chemical potential {condensate[0]:.12g} {units}, "
                  f"energy per atom {condensate[1]:.12g} {units}")
    if args.from_run is None and args.states:
        sys.stdout.flush()
        write_states(args.states, model, estimate.grid_energies, states,   # JobError: exit 2, one line
                     errors=estimate)
        if not args.json:
            print(f"states: {args.states}")
    _warn("levels", notes)
    return EXIT_OK


def _keys(args) -> int:
    # lazy: each command loads only what it needs (every command's start-up)
    from .job.reference import reference, render_text

    ref = reference(args.topic)
    print(json.dumps(ref) if args.json else render_text(ref), end="" if not args.json else "\n")
    return EXIT_OK


_COMMANDS = {"keys": _keys, "run": _run, "check": _check, "submit": _submit, "work": _work, "status": _status,
             "retry": _retry_or_cancel, "cancel": _retry_or_cancel, "collect": _collect,
             "arrivals": _arrivals, "transmission": _transmission, "spectrum": _spectrum, "movie": _movie, "plot": _plot,
             "levels": _levels}

if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
