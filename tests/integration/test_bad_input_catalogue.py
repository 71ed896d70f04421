"""A catalogue of bad inputs, as careless and hostile users give them.

The contract (design.md, "Command line"): bad input exits with status 2 and
one line on stderr naming the field (or argument, or file) and the fix; no
traceback; nothing already on disk is changed and no result or partial
file is left behind.  A warning line may come before the error (a set-up
finding printed by ``run``), nothing else.

Each case is one row: the class it belongs to (the classes of issue 13:
sizes, job fields, units, expressions, damaged files, flags, files that are
not regular files, outputs, the queue database, smaller ones), the command
line, the field the line must name and other pieces it must hold.  Cases
run in-process through ``wavesweep.cli.main`` (an interpreter start per
case would cost the suite minutes); the subprocess contract itself (exit
status of a real process, a real pipe) is tested in test_cli.py.

Place-holders in a command line: ``{job}`` the case's job file (TINY with
the case's patch), ``{result}`` a good result file of TINY, ``{damaged}``
the file the case's ``prepare`` made, ``{tmp}`` the case's folder.
"""
from __future__ import annotations

import copy
import hashlib
import math
import os
import shutil
from dataclasses import dataclass, field as dc_field
from pathlib import Path
from typing import Callable

import numpy as np
import pytest
from tables import merged
import tomli_w

from wavesweep.cli import main

# A 1D barrier job in atomic units (test_cli.py's TINY): 20 steps, adequate
# as it stands, so that every error below comes from the case's change.
TINY = {
    "title": "catalogue job",
    "grid": {"x": {"min": -40.0, "max": 40.0, "points": 128}, "boundary": "periodic"},
    "potential": [{"kind": "barrier", "height": 0.5, "width": 1.0, "center": 0.0, "smoothing": 1.5}],
    "packet": {"kind": "gaussian", "center": -10.0, "width": 2.0, "momentum": 1.0},
    "evolve": {"dt": 0.05, "duration": 1.0, "scheme": "strang"},
    "record": {"every": 0.1, "snapshot_every": 0.5},
    "detector": [{"name": "far", "x": 10.0}],
}


@dataclass
class Case:
    klass: str
    name: str
    argv: list
    field: str
    pieces: tuple = ()
    job: dict = dc_field(default_factory=dict)   # patch of TINY
    prepare: Callable | None = None              # prepare(folder, result) -> path for {damaged}
    job_text: str | None = None                  # the job file's text, verbatim (instead of a patch)
    env: dict = dc_field(default_factory=dict)   # environment variables of the case


CASES: list[Case] = []


def case(klass, name, argv, field, *pieces, job=None, prepare=None, job_text=None, env=None):
    CASES.append(Case(klass, name, list(argv), field, pieces, job or {}, prepare, job_text, env or {}))


RUN = ["run", "{job}", "-o", "{tmp}/out", "--quiet"]
CHECK = ["check", "{job}", "--trial-seconds", "0.01"]
SUBMIT = ["submit", "{job}", "--root", "{tmp}/root"]
LEVELS = ["levels", "{job}", "--count", "2"]
JOB_COMMANDS = {"run": RUN, "check": CHECK, "submit": SUBMIT, "levels": LEVELS}


def job_case(klass, name, patch, field, *pieces, commands=("run", "check")):
    """The same bad job through several commands that read jobs."""
    for command in commands:
        case(klass, f"{command}-{name}", JOB_COMMANDS[command], field, *pieces, job=patch)


# -- 1. sizes, judged from shapes before anything is allocated ---------------------
for command in ("run", "check", "submit", "levels"):
    case("sizes", f"{command}-points-1e20", JOB_COMMANDS[command], "grid.x.points",
         job={"grid": {"x": {"points": 10**20}}})
    case("sizes", f"{command}-points-2e9", JOB_COMMANDS[command], "grid", "memory",
         job={"grid": {"x": {"points": 2 * 10**9}}, "detector": None})
    case("sizes", f"{command}-3d-4096-cubed", JOB_COMMANDS[command], "grid", "memory",
         job={"grid": {"y": {"min": -40.0, "max": 40.0, "points": 4096},
                       "z": {"min": -40.0, "max": 40.0, "points": 4096}, "x": {"points": 4096}},
              "packet": {"center": [-10.0, 0.0, 0.0], "width": [2.0, 2.0, 2.0],
                         "momentum": [1.0, 0.0, 0.0]},
              "potential": None, "detector": None})
CAP = {"absorber": {"kind": "cap", "thickness": 8.0}}
for command in ("run", "check", "submit"):
    # the absorber's tuning builds the set-up while the study is read: judged first
    case("sizes", f"{command}-points-1e18-with-absorber-tuning", JOB_COMMANDS[command], "grid",
         "memory", job={**CAP, "grid": {"x": {"points": 10**18}}, "detector": None,
                        "sweep": {"potential.0.height": [0.4, 0.5]}})
    # momenta and extents no count of points holds: said, not overflowed
    case("sizes", f"{command}-momentum-1e90", JOB_COMMANDS[command], "grid.x.points", "more than",
         job={"packet": {"momentum": -1e90}})
    case("sizes", f"{command}-momentum-1e308", JOB_COMMANDS[command], "packet.momentum", "outside",
         job={"packet": {"momentum": -1e308}})
    case("sizes", f"{command}-sweep-1e9-values", JOB_COMMANDS[command], "sweep",
         job={"sweep": {"potential.0.height": {"start": 0.1, "stop": 1.0, "num": 10**9}}})
    case("sizes", f"{command}-sweep-1000-cubed", JOB_COMMANDS[command], "sweep",
         job={"sweep": {"potential.0.height": {"start": 0.1, "stop": 1.0, "num": 1000},
                        "potential.0.width": {"start": 0.5, "stop": 1.5, "num": 1000},
                        "packet.momentum": {"start": 0.5, "stop": 1.5, "num": 1000}}})


# steps beyond exact counting (a hang in the default sampling, an attribute
# netCDF cannot store); a prime step count has no default sampling near
# duration / 1000 (the search for one took 1e10 divisions)
job_case("sizes", "duration-1e30", {"evolve": {"duration": 1e30}, "record": None}, "evolve.duration",
         "time steps")
job_case("sizes", "prime-step-count", {"evolve": {"duration": 200000033 * 0.05}, "record": None},
         "record.every", "200000033")


# -- job fields: wrong types, non-finite numbers, out-of-range values ---------------
NAN, INF = float("nan"), float("inf")
POSITIVE = ["grid.x.points", "evolve.dt", "evolve.duration", "packet.width", "record.every",
            "record.snapshot_every", "record.stride", "particle.mass"]


def patch_at(dotted: str, value) -> dict:
    """{"a": {"b": value}} for "a.b" (lists by index are not used here)."""
    keys = dotted.split(".")
    out: dict = {keys[-1]: value}
    for key in reversed(keys[:-1]):
        out = {key: out}
    return out


for key in POSITIVE:
    short = key.replace(".", "-")
    job_case("fields", f"{short}-negative", patch_at(key, -2), key, commands=("run",))
    job_case("fields", f"{short}-text", patch_at(key, "plenty"), key, commands=("run",))
for key in ("evolve.dt", "evolve.duration", "packet.width", "packet.center", "packet.momentum",
            "grid.x.max", "particle.mass"):
    short = key.replace(".", "-")
    job_case("fields", f"{short}-nan", patch_at(key, NAN), key, "finite", commands=("run",))
    job_case("fields", f"{short}-inf", patch_at(key, INF), key, "finite", commands=("run",))
job_case("fields", "grid-min-above-max", {"grid": {"x": {"min": 50.0}}}, "grid.x")
job_case("fields", "points-float", {"grid": {"x": {"points": 128.5}}}, "grid.x.points", "integer")
job_case("fields", "points-bool", {"grid": {"x": {"points": True}}}, "grid.x.points")
job_case("fields", "dt-longer-than-duration", {"evolve": {"dt": 2.0}}, "evolve")
job_case("fields", "unknown-boundary", {"grid": {"boundary": "mirror"}}, "grid.boundary", "periodic")
job_case("fields", "unknown-potential-kind", {"potential": [{"kind": "volcano"}]},
         "potential.0.kind", "barrier")
job_case("fields", "potential-a-string", {"potential": "barrier"}, "potential")
job_case("fields", "packet-unknown-kind", {"packet": {"kind": "cloud"}}, "packet.kind", "gaussian")
job_case("fields", "absorber-without-thickness", {"absorber": {"kind": "cap"}},
         "absorber.thickness")
job_case("fields", "absorber-thicker-than-grid", {"absorber": {"kind": "cap", "thickness": 100.0}},
         "absorber.thickness")
job_case("fields", "absorber-unknown-face", {"absorber": {"kind": "cap", "thickness": 8.0,
                                                           "faces": ["x-", "w+"]}}, "absorber.faces")
job_case("fields", "detector-two-axes", {"detector": [{"name": "d", "x": 1.0, "y": 2.0}]}, "detector.0")
job_case("fields", "detector-names-repeat", {"detector": [{"name": "d", "x": 10.0},
                                                          {"name": "d", "x": 20.0}]}, "detector.1.name")
job_case("fields", "detector-resolved-in-1d", {"detector": [{"name": "far", "x": 10.0, "resolved": True}]},
         "detector.0.resolved", "line (2D) or plane (3D)")
job_case("fields", "precision-unknown", {"evolve": {"precision": "quad"}}, "evolve.precision", "double")
job_case("fields", "title-a-number", {"title": 12}, "title")
job_case("fields", "sweep-empty-list", {"sweep": {"potential.0.height": []}}, "sweep")
# integers beyond 64 bits anywhere (TOML reads them exactly; the first float()
# of them overflowed: exit 1)
for key in ("packet.width", "grid.x.points", "evolve.dt", "packet.center", "record.stride"):
    job_case("fields", f"{key.replace('.', '-')}-401-digits", patch_at(key, 10**400), key, "64 bits",
             commands=("run",))
job_case("fields", "expression-parameter-401-digits",
         {"potential": [{"kind": "expression", "expression": "a * x**2", "params": {"a": 10**400}}]},
         "potential.0.params.a", "64 bits", commands=("check",))
job_case("fields", "sweep-value-401-digits", {"sweep": {"packet.momentum": [1.0, 10**400]}},
         "sweep.packet.momentum.1", "64 bits", commands=("check", "submit"))
# an integer beyond any float in a range (numpy made an object array of 10**30)
job_case("fields", "sweep-range-start-1e400", {"sweep": {"potential.0.height": {
    "start": 10**400, "stop": 10**401, "num": 2}}}, "potential.0.height.start", "1.8e308")
job_case("fields", "sweep-unknown-key", {"sweep": {"potential.0.heigth": [0.1, 0.2]}},
         "potential.0.heigth", "'height'")
job_case("fields", "sweep-zip-lengths-differ", {"sweep": {"mode": "zip", "potential.0.height": [0.1, 0.2],
                                                          "packet.momentum": [1.0, 1.1, 1.2]}}, "sweep")
case("fields", "toml-duplicate-key", RUN, "job.toml", "TOML",
     job_text='title = "a"\ntitle = "b"\n')
job_case("fields", "evolve-missing", {"evolve": None}, "evolve", "missing")
# gravity: a uniform force is not periodic (its kick jumps at the wrap); a radial grid has no direction
job_case("fields", "gravity-along-a-periodic-axis", {"potential": [{"kind": "gravity"}]},
         "grid.x.boundary", "'box'", "potential.0")
job_case("fields", "gravity-unknown-axis", {"grid": {"boundary": "box"},
                                            "potential": [{"kind": "gravity", "axis": "z"}]},
         "potential.0.axis", "'z'", "x")
job_case("fields", "gravity-on-a-radial-grid",
         {"grid": {"x": None, "boundary": None, "r": {"max": 40.0, "points": 128}},
          "potential": [{"kind": "gravity"}], "packet": {"center": 15.0, "width": 1.5, "momentum": 0.0},
          "detector": None}, "potential.0.kind", "radial", commands=("run", "check", "levels"))
case("fields", "toml-binary", RUN, "job.toml", job_text="\x00\x01\x02 not toml")

# [interaction] (issue 15): the coupling given twice or not at all, the
# confinement a reduced dimension needs, and linear-only schemes
GAS = {"atoms": 1000, "scattering_length": 0.01, "transverse_omega": 0.1}
GRID_2D = {"grid": {"y": {"min": -40.0, "max": 40.0, "points": 16}}, "potential": None,
           "packet": {"center": [-10.0, 0.0], "width": [2.0, 2.0], "momentum": [1.0, 0.0]}}
job_case("fields", "interaction-coupling-and-scattering-length",
         {"interaction": {**GAS, "coupling": -0.001}}, "interaction.scattering_length", "not both")
job_case("fields", "interaction-without-coupling", {"interaction": {"atoms": 1000}},
         "interaction.coupling", "scattering_length")
job_case("fields", "interaction-1d-without-transverse-omega",
         {"interaction": {"atoms": 1000, "scattering_length": 0.01}}, "interaction.transverse_omega",
         "required")
job_case("fields", "interaction-2d-without-axial-omega",
         {**GRID_2D, "interaction": {"atoms": 1000, "scattering_length": 0.01}}, "interaction.axial_omega",
         "required")
for scheme in ("chebyshev", "crank_nicolson"):
    job_case("fields", f"interaction-with-{scheme}",
             {"interaction": GAS, "evolve": {"scheme": scheme}}, "evolve.scheme", "[interaction]", "strang")
# [packet] kind = "ground_state" (issue 15): a relative tolerance must lie in (0, 0.1];
# a Gaussian's keys are not its own
GROUND = {"kind": "ground_state", "center": None, "width": None, "momentum": None}
for name, value, piece in (("zero", 0.0, "positive"), ("negative", -1e-8, "positive"),
                           ("one", 1.0, "at most"), ("two", 2.0, "at most")):
    job_case("fields", f"ground-state-tolerance-{name}", {"packet": {**GROUND, "tolerance": value}},
             "packet.tolerance", piece)
job_case("fields", "ground-state-with-width", {"packet": {**GROUND, "width": 2.0}}, "packet.width")
job_case("fields", "ground-state-with-n", {"packet": {**GROUND, "n": 0}}, "packet.n")


# -- units ---------------------------------------------------------------------------
job_case("units", "unknown-length-unit", {"units": {"length": "parsec-ish"}}, "units.length")
job_case("units", "energy-unit-for-length", {"units": {"length": "eV"}}, "units.length")
job_case("units", "quantity-wrong-dimension", {"packet": {"width": "2 fs"}}, "packet.width", "length")
job_case("units", "quantity-unknown-unit", {"packet": {"width": "2 furlongs"}}, "packet.width")
job_case("units", "quantity-not-a-number", {"packet": {"width": "two nm"}}, "packet.width")
job_case("units", "mass-unit-for-time", {"units": {"time": "kg"}}, "units.time")
# units of the trade (issue 15): an energy as h nu (Hz) or hbar omega (rad/s), never a bare 1/s
job_case("units", "energy-in-bare-inverse-seconds",
         {"potential": [{"kind": "barrier", "height": "2 s-1", "width": 1.0}]},
         "potential.0.height", "ambiguous", "Hz", "rad/s")
job_case("units", "energy-mixing-cycles-and-radians",
         {"potential": [{"kind": "barrier", "height": "2 kHz*rad", "width": 1.0}]},
         "potential.0.height", "mixes")
job_case("units", "energy-per-length-for-an-energy",
         {"potential": [{"kind": "barrier", "height": "2 kHz/um", "width": 1.0}]},
         "potential.0.height", "not an energy", "'uK'")
job_case("units", "cap-strength-in-bare-inverse-seconds",
         {"absorber": {"kind": "cap", "thickness": 8.0, "strength": "3 1/s"}},
         "absorber.strength", "ambiguous")
job_case("units", "temperature-for-an-angular-frequency",
         {"potential": [{"kind": "harmonic", "omega": "2 uK"}]}, "potential.0.omega", "rad/s")
job_case("units", "units-energy-bare-inverse-seconds", {"units": {"length": "um", "energy": "1/s"}},
         "units.energy", "ambiguous")
job_case("units", "units-energy-a-length", {"units": {"length": "um", "energy": "um"}},
         "units.energy", "'kHz'")
job_case("units", "units-time-in-hertz", {"units": {"length": "um", "energy": "kHz", "time": "kHz"}},
         "units.time", "not a unit of time")
job_case("units", "gravity-acceleration-a-velocity",
         {"grid": {"boundary": "box"}, "potential": [{"kind": "gravity", "acceleration": "9.8 m/s"}]},
         "potential.0.acceleration", "not an acceleration")


# -- expressions: never run code, refuse what cannot be a potential -------------------
def expression(text, **extra):
    return {"potential": [{"kind": "expression", "expression": text, **extra}]}


EXPRESSION_CASES = [
    ("import", "__import__('os').system('touch PWNED')", "__import__"),
    ("dunder-attribute", "x.__class__", "__class__"),
    ("lambda", "(lambda: 1)()", "lambda"),
    ("comprehension", "[i for i in range(3)]", "potential.0.expression"),
    ("unknown-name", "0.5 * xx", "xx"),
    ("unknown-function", "open('job.toml')", "open"),
    ("syntax-error", "0.5 * (x", "potential.0.expression"),
    ("string-literal", "'abc'", "potential.0.expression"),
    ("huge-power", "x ** 10**10", "potential.0.expression"),
    ("not-finite-on-grid", "1 / x", "potential.0.expression"),
]
for name, text, piece in EXPRESSION_CASES:
    job_case("expressions", name, expression(text), "potential.0.expression", piece,
             commands=("run",))


# -- damaged result files -------------------------------------------------------------
def flipped_at(fraction, mask=0x40):
    def prepare(folder: Path, result: Path) -> Path:
        raw = bytearray(result.read_bytes())
        raw[int(len(raw) * fraction)] ^= mask
        out = folder / "damaged.nc"
        out.write_bytes(bytes(raw))
        return out
    return prepare


def flipped_in(variable):
    """One bit flipped inside ``variable``'s stored data (found by the bytes
    of four consecutive elements around its largest one, which no attribute
    holds), where the Fletcher-32 checksum must catch it."""
    def prepare(folder: Path, result: Path) -> Path:
        import netCDF4
        with netCDF4.Dataset(result) as nc:
            values = np.ravel(np.asarray(nc[variable][:]))
        at_max = int(np.argmax(np.abs(values)))
        start = max(0, min(at_max, values.size - 4))
        run = values[start:start + 4]
        raw = bytearray(result.read_bytes())
        little = "<" + values.dtype.str[1:]
        at = raw.find(run.astype(little).tobytes())
        if at > 0:
            at += (at_max - start) * values.dtype.itemsize
        else:   # stored in chunks of single elements: the value's last copy (data follow attributes)
            at = raw.rfind(values[at_max:at_max + 1].astype(little).tobytes())
        assert at > 0, f"{variable}'s bytes not found"
        raw[at + 2] ^= 0x10
        out = folder / "damaged.nc"
        out.write_bytes(bytes(raw))
        return out
    return prepare


def truncated(fraction):
    def prepare(folder: Path, result: Path) -> Path:
        raw = result.read_bytes()
        out = folder / "damaged.nc"
        out.write_bytes(raw[: int(len(raw) * fraction)])
        return out
    return prepare


def text_file(folder: Path, result: Path) -> Path:
    out = folder / "damaged.nc"
    out.write_text("this is not a result\n")
    return out


def empty_file(folder: Path, result: Path) -> Path:
    out = folder / "damaged.nc"
    out.write_bytes(b"")
    return out


def scaled(variable, factor):
    """A file without checksums (written by xarray) that holds a probability
    scaled by ``factor``: the checksum cannot catch it, the range check must."""
    def prepare(folder: Path, result: Path) -> Path:
        import xarray as xr
        with xr.open_dataset(result) as ds:
            bad = ds.load()
        bad[variable] = bad[variable] * factor
        out = folder / "damaged.nc"
        bad.to_netcdf(out)
        return out
    return prepare


READERS = {
    "arrivals": ["arrivals", "{damaged}"],
    "transmission": ["transmission", "{damaged}"],
    "plot": ["plot", "{damaged}", "-o", "{tmp}/figure.png"],
    "movie": ["movie", "{damaged}", "-o", "{tmp}/movie.gif"],
    "levels-from": ["levels", "--from", "{damaged}"],
}
# what each reader reads first (a flip elsewhere is caught when it reads that)
# (density is compressed: its bytes cannot be found by value; the flips at 90 %
# of the file land in its blocks)
READS = {"arrivals": "flux", "transmission": "norm", "plot": "norm", "movie": "x",
         "levels-from": "norm"}
DAMAGE = [("byte-at-90pct", flipped_at(0.9)),
          ("truncated-half", truncated(0.5)), ("text", text_file), ("empty", empty_file)]
for reader, argv in READERS.items():
    for name, prepare in DAMAGE:
        case("damaged", f"{reader}-{name}", argv, "damaged.nc", prepare=prepare)
    case("damaged", f"{reader}-bit-in-{READS[reader]}", argv, "damaged.nc", f"'{READS[reader]}'",
         prepare=flipped_in(READS[reader]))
for reader in ("arrivals", "transmission", "levels-from"):
    case("damaged", f"{reader}-norm-above-one", READERS[reader], "norm", prepare=scaled("norm", 3.0))
case("damaged", "arrivals-flux-scaled-up", READERS["arrivals"], "damaged.nc", "detector 'far'",
     prepare=scaled("flux", 1e20))


# -- numeric flags: finite and in range, read by one argparse type each --------------
WORK = ["work", "--root", "{tmp}/root"]
MOVIE = ["movie", "{result}", "-o", "{tmp}/m.gif"]
PLOT = ["plot", "{result}", "-o", "{tmp}/p.png"]
FLAGS = [
    (WORK, "--checkpoint-minutes", ["-5", "0", "inf", "nan"]),
    (WORK, "--lease-seconds", ["-1", "nan"]),
    (WORK, "--max-attempts", ["0", "2.5"]),
    (WORK, "--workers", ["0", "99999999999999999999999"]),
    (WORK, "--batch", ["0", "-3"]),
    (CHECK, "--trial-seconds", ["nan", "-1", "inf"]),
    (CHECK, "--tolerance", ["0", "1.5", "nan"]),
    (MOVIE, "--fps", ["nan", "0"]),
    (MOVIE, "--every", ["0"]),
    (MOVIE, "--dpi", ["5"]),
    (MOVIE, "--floor", ["0", "2"]),
    (MOVIE, "--size", ["0x0", "big"]),
    (PLOT, "--dpi", ["nan"]),
    (PLOT, "--size", ["99999x5"]),
    (LEVELS, "--count", ["0", "1e3"]),
    (["levels", "--from", "{result}"], "--min-weight", ["nan", "1"]),
]
for argv, flag, values in FLAGS:
    for value in values:
        case("flags", f"{argv[0]}{flag}={value}", [*argv, flag, value], flag)
case("flags", "unknown-command", ["frobnicate"], "frobnicate")
case("flags", "fft-unknown", [*RUN, "--fft", "fastest"], "--fft")
case("flags", "run-without-output", ["run", "{job}"], "-o/--output")

# -- --set: one value each, numbers that fit, the sweep changed or refused --------------
SETS = [
    ("multi-line", "packet.width=3\nevolve.dt=0.1", "--set packet.width", "more than one value"),
    ("toml-after-value", 'title="a"\n[grid]', "--set title", "more than one value"),
    ("unit-power-400", 'packet.width="3 m**400/m**399"', "packet.width", "power 400"),
    ("unit-power-13", 'packet.width="3 nm^13"', "packet.width", "power 13"),
    ("threads-huge", "evolve.threads=99999999999999999999999", "evolve.threads", "at most"),
    ("duration-1e308", "evolve.duration=1e308", "evolve.duration", "outside"),
    ("max-1e308", "grid.x.max=1e308", "grid.x.max", "outside"),
    ("mass-1e-308", "particle.mass=1e-308", "particle.mass", "outside"),
    ("duration-1e99", "evolve.duration=1e99", "evolve.duration", "time steps"),
    ("sweep-mode-unknown", "sweep.mode=diagonal", "sweep.mode", "'diagonal'"),
    ("sweep-mode-without-sweep", "sweep.mode=zip", "sweep", "no field"),
    ("without-equals", "packet.width", "--set", "key=value"),
    ("unknown-key", "evolve.dtt=0.1", "evolve.dtt", "'dt'"),
    ("index-out-of-range", "potential.5.height=1", "potential.5", "range"),
]
for name, text, field, piece in SETS:
    case("set", name, [*CHECK, "--set", text.replace("\\n", "\n")], field, piece)
case("set", "levels-sweep-mode", [*LEVELS, "--set", "sweep.mode=zip"], "--set sweep.mode", "[sweep]",
     job={"sweep": {"packet.momentum": [0.9, 1.1]}})


# -- limits, and the documented way to raise them --------------------------------------
case("sizes", "memory-limit-from-environment", [*RUN, "--set", "grid.x.points=100000"], "grid.x.points",
     "WAVESWEEP_MAX_MEMORY", env={"WAVESWEEP_MAX_MEMORY": "1MiB"})
case("sizes", "memory-limit-not-a-size", RUN, "WAVESWEEP_MAX_MEMORY", "not a memory size",
     env={"WAVESWEEP_MAX_MEMORY": "lots"})
case("sizes", "runs-limit-from-environment", SUBMIT, "sweep", "WAVESWEEP_MAX_RUNS",
     job={"sweep": {"packet.momentum": [0.9, 1.0, 1.1, 1.2], "packet.width": [1.8, 1.9, 2.0, 2.1]}},
     env={"WAVESWEEP_MAX_RUNS": "10"})


# -- the queue database: ours, or refused untouched ------------------------------------
def _root(folder: Path) -> Path:
    root = folder / "root"
    root.mkdir()
    return root


def foreign_sqlite(folder: Path, result: Path) -> Path:
    import sqlite3
    root = _root(folder)
    raw = sqlite3.connect(root / "queue.sqlite")
    raw.execute("CREATE TABLE notes (id INTEGER PRIMARY KEY, text TEXT)")
    raw.execute("INSERT INTO notes (text) VALUES ('keep me')")
    raw.commit()
    raw.close()
    return root


def not_sqlite(folder: Path, result: Path) -> Path:
    root = _root(folder)
    (root / "queue.sqlite").write_bytes(bytes(range(256)) * 40)
    return root


_DAMAGED_QUEUE: list[bytes] = []


def damaged_queue(folder: Path, result: Path) -> Path:
    """A queue of 400 runs whose middle page is overwritten (made once)."""
    import sqlite3
    from wavesweep.studies.queue import Queue
    from wavesweep.study import expand_study

    root = _root(folder)
    db = root / "queue.sqlite"
    if not _DAMAGED_QUEUE:
        q = Queue(folder / "donor")
        q.submit(expand_study(merged(TINY, {"sweep": {"packet.momentum": [0.5 + 0.001 * i for i in range(400)]}}),
                              name="s"))
        q.close()
        raw = sqlite3.connect(folder / "donor" / "queue.sqlite")
        raw.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        raw.close()
        data = bytearray((folder / "donor" / "queue.sqlite").read_bytes())
        shutil.rmtree(folder / "donor")
        page = int.from_bytes(data[16:18], "big")
        middle = (len(data) // page // 2) * page
        data[middle:middle + page] = bytes((37 * i + 11) % 256 for i in range(page))
        _DAMAGED_QUEUE.append(bytes(data))
    db.write_bytes(_DAMAGED_QUEUE[0])
    return root


QUEUE_COMMANDS = {
    "status": ["status", "--root", "{damaged}"],
    "retry": ["retry", "--root", "{damaged}"],
    "cancel": ["cancel", "--root", "{damaged}"],
    "submit": ["submit", "{job}", "--root", "{damaged}"],
    "work": ["work", "--root", "{damaged}"],
}   # (collect reads the study folders, not the database)
for command, argv in QUEUE_COMMANDS.items():
    case("queue", f"{command}-foreign-sqlite", argv, "--root", "another program's", prepare=foreign_sqlite)
    case("queue", f"{command}-not-sqlite", argv, "--root", "not an SQLite database", prepare=not_sqlite)
    case("queue", f"{command}-damaged", argv, "--root", "damaged", "submit", prepare=damaged_queue)


# -- files that are not regular files, as inputs: refused at once (a FIFO hung) -------
def fifo(folder: Path, result: Path) -> Path:
    path = folder / "pipe"
    os.mkfifo(path)
    return path


def folder_input(folder: Path, result: Path) -> Path:
    path = folder / "a-folder"
    path.mkdir()
    return path


SPECIAL = {"fifo": (fifo, "pipe", "FIFO"), "folder": (folder_input, "a-folder", "folder"),
           "dev-zero": (lambda folder, result: Path("/dev/zero"), "/dev/zero", "character device")}
JOB_READERS = {"run": ["run", "{damaged}", "-o", "{tmp}/out", "--quiet"], "check": ["check", "{damaged}"],
               "submit": ["submit", "{damaged}", "--root", "{tmp}/root"],
               "levels": ["levels", "{damaged}", "--count", "2"]}
for name, (prepare, shown, what) in SPECIAL.items():
    for command, argv in JOB_READERS.items():
        case("special", f"{command}-job-{name}", argv, shown, what, prepare=prepare)
    for reader, argv in READERS.items():
        case("special", f"{reader}-result-{name}", argv, shown, what, prepare=prepare)
case("special", "potential-file-fifo", CHECK, "potential.0.path", "FIFO", prepare=fifo,
     job={"potential": [{"kind": "file", "path": "pipe", "variable": "V"}]})
case("special", "state-file-fifo", CHECK, "packet.path", "FIFO", prepare=fifo,
     job={"packet": {"kind": "file", "path": "pipe", "center": None, "width": None, "momentum": None}})


# -- outputs: checked before any work, never replaced without --overwrite ---------------
def existing(name):
    def prepare(folder: Path, result: Path) -> Path:
        path = folder / name
        path.write_bytes(b"an earlier output\n")
        return path
    return prepare


def folder_named(name):
    def prepare(folder: Path, result: Path) -> Path:
        path = folder / name
        path.mkdir()
        return path
    return prepare


OUTPUTS = [
    ("plot-existing", ["plot", "{result}", "-o", "{damaged}"], "-o", "already exists", existing("p.png")),
    ("movie-existing", ["movie", "{result}", "-o", "{damaged}"], "-o", "already exists", existing("m.gif")),
    ("arrivals-plot-existing", ["arrivals", "{result}", "--plot", "{damaged}"], "--plot", "already exists",
     existing("a.png")),
    ("levels-states-existing", [*LEVELS, "--states", "{damaged}"], "--states", "already exists",
     existing("s.nc")),
    ("plot-folder", ["plot", "{result}", "-o", "{damaged}"], "-o", "folder", folder_named("p.png")),
    ("movie-folder", ["movie", "{result}", "-o", "{damaged}"], "-o", "folder", folder_named("m.gif")),
    ("levels-states-folder", [*LEVELS, "--states", "{damaged}"], "--states", "folder", folder_named("s.nc")),
    ("plot-parent-a-file", ["plot", "{result}", "-o", "{job}/x.png"], "-o", "not a folder", None),
    ("plot-device", ["plot", "{result}", "-o", "/dev/null"], "-o", "character device", None),
    ("movie-suffix", ["movie", "{result}", "-o", "{tmp}/m.avi"], "-o", "'.avi'", None),
    ("plot-suffix", ["plot", "{result}", "-o", "{tmp}/p.txt"], "-o", "figure type", None),
    ("levels-states-suffix", [*LEVELS, "--states", "{tmp}/s.txt"], "--states", "'.txt'", None),
    ("run-output-a-file", ["run", "{job}", "-o", "{job}", "--quiet"], "--output", "not a folder", None),
    ("levels-from-overwrite", ["levels", "--from", "{result}", "--overwrite"], "--overwrite", "", None),
]
for name, argv, field, piece, prepare in OUTPUTS:
    case("outputs", name, argv, field, piece, prepare=prepare)


# -- the harness ----------------------------------------------------------------------
@pytest.fixture(scope="module")
def good_result(tmp_path_factory):
    from wavesweep.job import job_from_dict
    from wavesweep.run import Simulation

    # long enough for `levels --from` (it needs 16 autocorrelation samples)
    table = merged(TINY, {"evolve": {"duration": 2.0}, "record": {"every": 0.05}})
    folder = tmp_path_factory.mktemp("good")
    return Simulation(job_from_dict(table)).run(folder, progress=False)


def _fingerprint(folder: Path) -> dict:
    out = {}
    for path in sorted(folder.rglob("*")):
        if path.is_file() and not path.is_symlink():
            out[str(path.relative_to(folder))] = hashlib.sha256(path.read_bytes()).hexdigest()
    return out


def _fill(argv, values) -> list[str]:
    return [str(a).format(**values) for a in argv]


@pytest.mark.parametrize("item", [pytest.param(c, id=f"{c.klass}-{c.name}") for c in CASES])
def test_bad_input(item: Case, tmp_path, good_result, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("WAVESWEEP_CACHE", str(tmp_path / ".cache"))
    monkeypatch.delenv("WAVESWEEP_DEBUG", raising=False)
    for key, value in item.env.items():
        monkeypatch.setenv(key, value)
    job = tmp_path / "job.toml"
    if item.job_text is not None:
        job.write_text(item.job_text)
    else:
        job.write_text(tomli_w.dumps(merged(TINY, item.job)))
    result = tmp_path / "result.nc"
    shutil.copy(good_result, result)
    damaged = item.prepare(tmp_path, result) if item.prepare else result
    # an earlier result in the output folder: a bad input must leave it alone
    (tmp_path / "out").mkdir()
    shutil.copy(good_result, tmp_path / "out" / "earlier.nc")
    before = _fingerprint(tmp_path)

    argv = _fill(item.argv, {"job": job, "result": result, "damaged": damaged, "tmp": tmp_path})
    try:
        code = main(argv)
    except SystemExit as exit_:            # argparse's own exit
        code = exit_.code
    out, err = capsys.readouterr()

    assert "Traceback" not in out + err, err
    assert code == 2, (code, err)
    lines = err.splitlines()
    assert 1 <= len(lines) <= 2, err
    if len(lines) == 2:
        assert "warning" in lines[0], err
    line = lines[-1]
    assert item.field in line, line
    for piece in item.pieces:
        assert piece in line, line
    assert "internal error" not in line, line
    # nothing already on disk changed, no result or partial file appeared
    after = _fingerprint(tmp_path)
    changed = [name for name, digest in before.items() if after.get(name) != digest]
    assert changed == [], changed
    new = [name for name in after if name not in before and not name.startswith(".cache")]
    assert [n for n in new if n.endswith((".nc", ".part", ".png", ".gif", ".mp4"))] == [], new
    assert not (tmp_path / "PWNED").exists()


def test_the_catalogue_covers_every_class():
    """Issue 13 asks for at least 120 bad inputs across its classes."""
    classes = {c.klass for c in CASES}
    assert len(CASES) >= 120, len(CASES)
    assert {"sizes", "fields", "units", "expressions", "damaged", "flags", "set", "queue", "special",
            "outputs"} <= classes
