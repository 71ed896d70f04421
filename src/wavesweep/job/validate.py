"""Job files: TOML -> a validated job.

:func:`load_job` reads a file (or :func:`job_from_dict` a dict), applies
``--set`` overrides, checks every table against its schema and returns a
:class:`Job`: the resolved table in the job's units with every default filled
in (``Job.to_toml()`` is a complete job file that reproduces the run) and the
unit set.  Physical objects are built from it by :mod:`wavesweep.setup`
(which also tunes what the physics chooses: :func:`wavesweep.setup.resolve_job`).

Every problem is a :class:`~wavesweep.errors.JobError` naming the field;
independent problems are all reported at once, in the order of the job file
(:class:`~wavesweep.errors.JobErrors`).
"""
from __future__ import annotations

import difflib
import math
import os
import stat
import tomllib
from pathlib import Path

from ..absorbers.layers import face_names
from ..errors import ErrorCollector, JobError, combine_errors
from ..grid import BOUNDARIES, FRAMES, Axis, Grid
from ..io.paths import file_kind
from ..potentials import DEFAULT_POTENTIAL, REGISTRY, PotentialContext, make_term, term_class
from ..schema import MAX_INT, Field, check_unknown, unknown_keys, validate_table
from ..states import DEFAULT_PACKET, PACKET_SCHEMAS, PACKETS
from ..units import UnitSet
from .document import Job, grid_axes, job_number
from .dotted import apply_overrides, file_position, parse_override
from .schemas import (ABSORBER, AXIS, COUPLING, DETECTOR, DETECTOR_POSITION, EVOLVE, PARTICLE, RECORD, SURFACE,
                      TOP_LEVEL,
                      interaction_schema)
from .sweep import apply_sweep_overrides, refuse_swept_overrides

__all__ = ["load_job", "read_job_file", "job_from_dict", "grid_object"]

# -- loading ---------------------------------------------------------------------
# First bytes of files that are data, not text: netCDF classic (1), 64-bit
# offset (2) and 64-bit data (5) formats, and HDF5 (netCDF-4 files are HDF5).
DATA_FILE_MAGIC = (b"CDF\x01", b"CDF\x02", b"CDF\x05", b"\x89HDF")


def read_job_file(path) -> dict:
    """The raw table of a job file (TOML), with one-line errors."""
    path = Path(path)
    try:
        # a FIFO or a device (/dev/zero) would block or never end: only regular files are read
        mode = os.stat(path).st_mode
        if stat.S_ISDIR(mode):
            raise JobError("", f"{str(path)!r} is a folder, not a job file")
        if not stat.S_ISREG(mode):
            raise JobError("", f"{str(path)!r} is {file_kind(mode)}, not a regular file; give a job file on disk")
        data = path.read_bytes()
    except (FileNotFoundError, NotADirectoryError):
        raise JobError("", f"job file {str(path)!r} not found") from None
    except OSError as e:
        raise JobError("", f"cannot read job file {str(path)!r}: {e.strerror}") from None
    if data.startswith(DATA_FILE_MAGIC):
        raise JobError("", f"{path.name} is a netCDF/HDF5 data file (a result or a states file), not a "
                           "job file; read a result with `wavesweep plot`, `arrivals`, `transmission` or "
                           "`movie`, or give the job's TOML (a result keeps it in its `job` attribute)")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as e:
        raise JobError("", f"{path.name} is not UTF-8 text (byte {e.start}); TOML files are UTF-8") from None
    text = text.replace("\r\n", "\n").replace("\r", "\n")   # newlines as read_text reads them
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise JobError("", f"{path.name} is not valid TOML: {e}") from None


def load_job(path, overrides=(), sweep: bool = True) -> Job:
    """Read and validate a job file; ``overrides`` are ``"key=value"`` strings.
    A ``[sweep]`` table is validated and kept; expand it with
    :func:`wavesweep.study.load_study`.  An override of a key the
    sweep sweeps is a JobError (the sweep would decide its value).
    ``sweep=False``: the job as written outside its ``[sweep]`` (dropped, so
    an override of a swept key sets it; an override of the sweep is a
    JobError, as it would be lost)."""
    raw = read_job_file(path)
    if not sweep:
        for item in overrides:
            key = (parse_override(item) if isinstance(item, str) else item)[0]
            if key == "sweep" or key.startswith("sweep."):
                raise JobError(f"--set {key}", "the job is used without its [sweep] here; set the swept "
                                               "field itself, e.g. --set packet.energy=40")
        raw.pop("sweep", None)
        return job_from_dict(raw, overrides, source=Path(path))
    raw, overrides = apply_sweep_overrides(raw, overrides)
    refuse_swept_overrides(raw, overrides, Path(path))
    return job_from_dict(raw, overrides, source=Path(path))


def _huge_integers(value, field: str):
    """A JobError for each integer anywhere in the job (a table, a list, a
    sweep's values, an expression's parameters) beyond 64 bits: TOML reads
    10**400 as a Python integer, which no float holds (an OverflowError
    wherever it was first converted)."""
    if isinstance(value, dict):
        for key, item in value.items():
            yield from _huge_integers(item, f"{field}.{key}" if field else str(key))
    elif isinstance(value, list):
        for i, item in enumerate(value):
            yield from _huge_integers(item, f"{field}.{i}")
    elif isinstance(value, int) and not isinstance(value, bool) and abs(value) > MAX_INT:
        yield JobError(field, f"an integer of {len(str(abs(value)))} digits, beyond 64 bits (at most {MAX_INT:.3g}); "
                              "give a number (e.g. 1e30) or check it")


def job_from_dict(raw: dict, overrides=(), source: Path | None = None) -> Job:
    """Validate a job given as a dict (as parsed from TOML).

    Every independent error is collected and they are raised together, in
    the order of the job file (:class:`~wavesweep.errors.JobErrors`; a lone
    error is raised as itself).  Checks that need another part of the job
    run only when that part is valid, so that no error is a consequence of
    another: an axis's min and max for the detectors and absorber layers on
    it, the whole grid and the particle for each potential's own checks,
    ``evolve.dt`` and ``evolve.duration`` for the record's sampling, valid
    ``[units]`` for any comparison between values.
    """
    raw = apply_overrides(raw, overrides)
    huge = combine_errors(list(_huge_integers(raw, "")))
    if huge is not None:    # first: every later conversion of them would overflow
        raise huge
    found = ErrorCollector()
    suggested = set()   # a misspelled table is reported once, not also as missing
    for error, near in unknown_keys(raw, TOP_LEVEL, ""):
        found.add(error)
        suggested.add(near)
    units = None
    with found.check():
        if not isinstance(raw.get("units", {}), dict):
            raise JobError("units", f"must be a table such as {{ length = 'nm', energy = 'meV' }}, "
                                    f"got {raw['units']!r}")
        units = UnitSet.from_table(raw.get("units"))
    # with bad [units] each value is still checked on its own (type, sign,
    # a unit of the right kind); comparisons between values wait for the units
    u = units or UnitSet()
    out: dict = {}
    with found.check():
        title = raw.get("title", source.stem if source else "untitled")
        if not isinstance(title, str):
            raise JobError("title", f"must be a string, got {title!r}")
        out["title"] = title
    if units is not None:
        out["units"] = units.as_table()
    with found.check():
        out["particle"] = validate_table(raw.get("particle", {}), PARTICLE, "particle", u)
    if "grid" in raw or "grid" not in suggested:
        with found.check():
            out["grid"] = _grid(raw.get("grid"), u, compare=units is not None)
    if "grid" in out:
        ndim = len(grid_axes(out["grid"]))
    else:   # the axes the user wrote, for per-axis lists; none: not checked
        ndim = len(grid_axes(raw["grid"])) if isinstance(raw.get("grid"), dict) else 0
        ndim = ndim or None
    base = source.parent if source else Path.cwd()
    potentials = _potentials(raw.get("potential"), u, ndim, base, found)
    if potentials is not None and None not in potentials:
        out["potential"] = potentials
    if "packet" in raw or "packet" not in suggested:
        with found.check():
            out["packet"] = _packet(raw.get("packet"), u, ndim, base, "packet")
    if "evolve" in raw or "evolve" not in suggested:
        with found.check():
            out["evolve"] = validate_table(_need(raw, "evolve"), EVOLVE, "evolve", u)
    # what the later tables are compared with, from the parts that are valid
    # (an axis with a bad point count still has its extent)
    layout = raw["grid"] if isinstance(raw.get("grid"), dict) else {}
    extents = _extents(layout, u) if units is not None else None
    timing = _valid_part(raw.get("evolve"), EVOLVE, ("dt", "duration"), "evolve", u) \
        if units is not None else None
    with found.check():
        out["absorber"] = _absorber(raw.get("absorber", {}), u, layout, extents, ndim)
    # in a free-falling frame detectors stay in the lab: the grid may reach them only later (a
    # frame the grid table gives, even a wrong one, spares the detectors a consequential error)
    frame = (out["grid"].get("frame", "lab") if "grid" in out
             else layout.get("frame", "lab") if isinstance(layout, dict) else "lab")
    with found.check():
        out["record"] = _record(raw.get("record", {}), u, timing, layout)
    axes = grid_axes(out["grid"] if "grid" in out else layout)
    if axes or "grid" in out:   # without any axis the position keys cannot be told
        with found.check():
            out["detector"] = _detectors(raw.get("detector", []), u, extents if frame == "lab" else None, axes)
    if "surface" in raw or "coupling" in raw:   # absent: nothing added, the job (and its run id) as before
        with found.check():
            out["surface"], out["coupling"] = _surfaces(raw.get("surface"), raw.get("coupling"), u, ndim,
                                                        base, found)
            _packet_surfaces(out.get("packet"), [t["name"] for t in out["surface"]], "packet")
    elif isinstance(out.get("packet"), dict):
        _packet_surfaces(out["packet"], None, "packet", found)
    if isinstance(out.get("record"), dict) and out["record"].get("adiabatic") and not raw.get("surface"):
        found.add(JobError("record.adiabatic", "adiabatic populations need coupled surfaces ([[surface]] tables); "
                                               "remove record.adiabatic or add the surfaces"))
    if "interaction" in raw:   # absent: nothing added, the job (and its run id) as before
        with found.check():
            out["interaction"] = _interaction(raw["interaction"], u, ndim, "r" in layout)
    if "sweep" in raw:
        with found.check():
            if not isinstance(raw["sweep"], dict):
                raise JobError("sweep", "must be a table")
            out["sweep"] = raw["sweep"]
    if units is not None and "grid" in out and "particle" in out:
        # each potential's own checks (parameter combinations, the grid it
        # needs, the particle's charge): they need the grid and the particle
        _check_terms(out, potentials or [], u, found)
    found.raise_if_any(order=lambda e: file_position(raw, e.field))
    return Job(out, units, source, raw=raw)


def _valid_part(raw, schema: dict, keys, prefix: str, units) -> dict | None:
    """``keys`` of table ``raw`` validated (defaults filled), or None if any
    of them is bad or missing (their errors are the table's own to report)."""
    if not isinstance(raw, dict):
        return None
    try:
        return validate_table({k: raw[k] for k in keys if k in raw}, {k: schema[k] for k in keys},
                              prefix, units)
    except JobError:
        return None


def _extents(layout: dict, units: UnitSet) -> dict:
    """``axis -> (min, max)`` in bohr, for the axes of a raw [grid] table
    whose min and max are valid and in order (radial: min = 0)."""
    radial = "r" in layout
    out = {}
    for name in grid_axes(layout):
        table = layout[name]
        if radial and isinstance(table, dict):
            table = {**table, "min": 0.0}
        ax = _valid_part(table, AXIS, ("min", "max"), f"grid.{name}", units)
        if ax is None or ax.get("min") is None:
            continue
        lo = units.to_atomic(ax["min"], "length")
        hi = units.to_atomic(ax["max"], "length")
        if hi > lo:
            out[name] = (lo, hi, ax["min"], ax["max"])
    return out


def _check_terms(out: dict, potentials: list, units: UnitSet, found: ErrorCollector) -> None:
    """Build each valid potential term once, so that its ``validate()`` runs
    at load time (the job's own and those of an eigenstate packet's trap)."""
    try:
        grid = grid_object(out["grid"], units)
        mass = units.to_atomic(out["particle"]["mass"], "mass", "particle.mass")
        charge = out["particle"].get("charge")
        charge = None if charge is None else units.to_atomic(charge, "charge", "particle.charge")
    except JobError:   # reported already by the table checks
        return
    groups = [("potential", potentials)]
    groups += _packet_traps(out.get("packet"), "packet")
    groups += [(f"surface.{i}.potential", t["potential"]) for i, t in enumerate(out.get("surface", []))]
    groups += [(f"coupling.{i}.potential", t["potential"]) for i, t in enumerate(out.get("coupling", []))]
    for prefix, tables in groups:
        for i, table in enumerate(tables):
            if table is None:
                continue
            with found.check():
                # a packet's own trap is where it was prepared: in the lab
                frame = out["grid"].get("frame", "lab") if not prefix.startswith("packet") else "lab"
                make_term(table, PotentialContext(grid, mass, charge, units, f"{prefix}.{i}", frame))


def _packet_traps(packet, name) -> list[tuple[str, list]]:
    """(prefix, potential tables) of every eigenstate packet's own trap."""
    if not isinstance(packet, dict):
        return []
    out = []
    kind = PACKETS.get(packet.get("kind")) if isinstance(packet.get("kind"), str) else None
    if kind is None:
        return out
    if kind.trap and packet.get(kind.trap):
        out.append((f"{name}.{kind.trap}", packet[kind.trap]))
    if kind.nested:
        for j, p in enumerate(packet.get(kind.nested) or []):
            out += _packet_traps(p, f"{name}.{kind.nested}.{j}")
    return out


def grid_object(grid: dict, units: UnitSet) -> Grid:
    """The :class:`~wavesweep.grid.Grid` (atomic units) of a validated [grid] table."""
    axes = []
    for name in grid_axes(grid):
        a = grid[name]
        axes.append(Axis(name, units.to_atomic(a["min"], "length"), units.to_atomic(a["max"], "length"),
                         int(a["points"]), a.get("boundary") or grid["boundary"]))
    return Grid(tuple(axes), radial="r" in grid, angular_momentum=int(grid.get("l", 0)))


def _need(raw, key):
    if key not in raw:
        raise JobError(key, f"missing [{key}] table")
    return raw[key]


def _grid(raw, units, compare: bool = True) -> dict:
    """The [grid] table checked; every axis on its own.  ``compare=False``
    (the units are wrong) skips comparing values with each other."""
    if raw is None:
        raise JobError("grid", "missing [grid] table; e.g. x = { min = -100, max = 100, points = 1024 }")
    if not isinstance(raw, dict):
        raise JobError("grid", "must be a table")
    found = ErrorCollector()
    with found.check():
        check_unknown(raw, ("x", "y", "z", "r", "boundary", "l", "frame"), "grid")
    axes = grid_axes(raw)
    if not axes:
        found.add(JobError("grid.x", "missing; give at least one axis, "
                                     "e.g. x = { min = -100, max = 100, points = 1024 }"))
        found.raise_if_any()
    if "r" in axes and len(axes) > 1:
        found.add(JobError("grid.r", "a radial grid has only r; remove the Cartesian axes"))
        found.raise_if_any()
    cart = [a for a in ("x", "y", "z") if a in raw]
    if cart and cart != ["x", "y", "z"][: len(cart)]:
        found.add(JobError(f"grid.{cart[-1]}", "Cartesian axes are x, then y, then z"))
    radial = "r" in axes
    boundary = raw.get("boundary", "box" if radial else "periodic")
    out = {}
    with found.check():
        if not isinstance(boundary, str) or boundary not in BOUNDARIES:
            raise JobError("grid.boundary", f"{boundary!r} is not one of {', '.join(map(repr, BOUNDARIES))}")
        if radial and boundary != "box":
            raise JobError("grid.boundary", "a radial grid has u(0) = 0: it is always 'box'")
    for name in axes:
        with found.check():
            out[name] = _axis(raw[name], name, radial, units, compare)
    out["boundary"] = boundary
    with found.check():
        l_value = raw.get("l", 0)
        if isinstance(l_value, bool) or not isinstance(l_value, int) or l_value < 0:
            raise JobError("grid.l", f"angular momentum must be an integer >= 0, got {l_value!r}")
        if l_value and not radial:
            raise JobError("grid.l", "angular momentum l applies to a radial grid (grid.r)")
        if radial:
            out["l"] = l_value
    with found.check():
        frame = raw.get("frame", "lab")
        if not isinstance(frame, str) or frame not in FRAMES:
            raise JobError("grid.frame", f"{frame!r} is not one of {', '.join(map(repr, FRAMES))}")
        if frame != "lab":   # absent when 'lab': a job without it keeps its text and run id
            if radial:
                raise JobError("grid.frame", "a radial grid has no direction to fall along; use a "
                                             "Cartesian grid (x, y, z) for frame = 'free_fall'")
            out["frame"] = frame
    found.raise_if_any()
    return out


def _axis(raw, name, radial, units, compare) -> dict:
    """One axis table: its keys, then (if they are valid) their relations."""
    ax = validate_table(raw, AXIS, f"grid.{name}", units)
    found = ErrorCollector()
    if radial:
        if ax.get("min") not in (None, 0, 0.0):
            found.add(JobError("grid.r.min", "a radial grid starts at r = 0; remove min"))
        ax["min"] = 0.0
        if ax.get("boundary", "box") != "box":
            found.add(JobError(f"grid.{name}.boundary", "a radial axis is always 'box'"))
    elif ax.get("min") is None:
        found.add(JobError(f"grid.{name}.min", "missing; the lower end of the axis"))
    if ax["points"] < 4:
        found.add(JobError(f"grid.{name}.points", f"must be at least 4, got {ax['points']}"))
    if compare and ax.get("min") is not None:
        lo = units.to_atomic(ax["min"], "length", f"grid.{name}.min")
        hi = units.to_atomic(ax["max"], "length", f"grid.{name}.max")
        if not hi > lo:
            found.add(JobError(f"grid.{name}.max", f"must be larger than min ({ax['min']!r})"))
    found.raise_if_any()
    return ax


def _potentials(raw, units, ndim, base, found: ErrorCollector | None = None,
                prefix: str = "potential") -> list | None:
    """The [[potential]] tables checked, each on its own.  With ``found``,
    errors are recorded there and a table with errors is None in the list
    (None for the whole list if it is not a list of tables); without, they
    are raised."""
    own = found is None
    if own:
        found = ErrorCollector()
    out = None
    with found.check():
        out = _potential_tables(raw, units, ndim, base, prefix, found)
    if own:
        found.raise_if_any()
    return out


def _potential_tables(raw, units, ndim, base, prefix, found: ErrorCollector) -> list:
    if raw is None:
        return [{"kind": DEFAULT_POTENTIAL}]
    if isinstance(raw, dict):
        raw = [raw]
    if not isinstance(raw, list) or not all(isinstance(t, dict) for t in raw):
        raise JobError(prefix, f"must be [[{prefix}]] tables")
    out = []
    for i, table in enumerate(raw):
        name = f"{prefix}.{i}"
        out.append(None)
        with found.check():
            if "kind" not in table:
                raise JobError(f"{name}.kind", f"missing; known kinds: {', '.join(sorted(REGISTRY))}")
            cls = term_class(table["kind"], f"{name}.kind")
            schema = {"kind": Field("str"), **cls.parameters}
            t = validate_table(table, schema, name, units, ndim)
            if "path" in t:
                t["path"] = str((base / t["path"]).resolve())
            out[-1] = t
    return out


def _surfaces(raw_surfaces, raw_couplings, units, ndim, base, found: ErrorCollector) -> tuple[list, list]:
    """The [[surface]] and [[coupling]] tables: names unique, each coupling
    between two different named surfaces and each pair coupled once; their
    potential lists checked as [[potential]] tables."""
    if raw_surfaces is None:
        raise JobError("surface", "[[coupling]] needs [[surface]] tables to couple; e.g. "
                                  "[[surface]] name = 'A' potential = [{ kind = 'step', ... }]")
    if isinstance(raw_surfaces, dict):
        raw_surfaces = [raw_surfaces]
    if not isinstance(raw_surfaces, list) or not all(isinstance(t, dict) for t in raw_surfaces):
        raise JobError("surface", "must be [[surface]] tables")
    surfaces, names = [], []
    for i, table in enumerate(raw_surfaces):
        field = f"surface.{i}"
        with found.check():
            t = validate_table(table, SURFACE, field, units)
            name = t["name"]
            if not name or not name.strip():
                raise JobError(f"{field}.name", "must not be empty")
            if name in names:
                raise JobError(f"{field}.name", f"{name!r} is used twice")
            names.append(name)
            t["potential"] = (_potentials(t["potential"], units, ndim, base, found, f"{field}.potential")
                              if t.get("potential") else [])
            surfaces.append(t)
    couplings, pairs = [], set()
    raw_couplings = [raw_couplings] if isinstance(raw_couplings, dict) else (raw_couplings or [])
    if not isinstance(raw_couplings, list) or not all(isinstance(t, dict) for t in raw_couplings):
        raise JobError("coupling", "must be [[coupling]] tables")
    for i, table in enumerate(raw_couplings):
        field = f"coupling.{i}"
        with found.check():
            t = validate_table(table, COUPLING, field, units)
            pair = t["surfaces"]
            if len(pair) != 2 or not all(isinstance(n, str) for n in pair):
                raise JobError(f"{field}.surfaces", f"give two surface names, e.g. [\"A\", \"B\"]; got {pair!r}")
            for n in pair:
                if n not in names:
                    near = difflib.get_close_matches(n, names, n=1)
                    hint = f"did you mean {near[0]!r}? " if near else ""
                    raise JobError(f"{field}.surfaces", f"no surface {n!r}; {hint}the surfaces are "
                                                        f"{', '.join(map(repr, names))}")
            if pair[0] == pair[1]:
                raise JobError(f"{field}.surfaces", f"couples {pair[0]!r} with itself: a surface's own potential "
                                                    "goes in its [[surface]] table")
            key = frozenset(pair)
            if key in pairs:
                raise JobError(f"{field}.surfaces", f"{pair[0]!r} and {pair[1]!r} are coupled twice; sum the "
                                                    "potentials in one [[coupling]] table")
            pairs.add(key)
            t["potential"] = _potentials(t["potential"], units, ndim, base, found, f"{field}.potential")
            couplings.append(t)
    return surfaces, couplings


def _packet_surfaces(packet, names, name, found: ErrorCollector | None = None) -> None:
    """``surface`` of the packet (or of each member of a superposition):
    required and one of ``names`` when the job has surfaces (not of a
    kind whose state may hold every surface's part, a state file: the
    set-up reads the file and asks for it then), on the packet or on
    every member but not both; refused without surfaces (``names`` None)."""
    if not isinstance(packet, dict):
        return
    own = found is None
    if own:
        found = ErrorCollector()
    kind = PACKETS.get(packet.get("kind"))
    members = packet.get(kind.nested) if kind is not None and kind.nested else None
    with found.check():
        value = packet.get("surface")
        if names is None:
            if value is not None:
                raise JobError(f"{name}.surface", "the job has no [[surface]] tables: remove it, or add the surfaces")
        elif members and value is None and all(isinstance(m, dict) and m.get("surface") is not None
                                               for m in members):
            pass   # each member says its own surface
        elif members and value is not None and any(isinstance(m, dict) and m.get("surface") is not None
                                                   for m in members):
            raise JobError(f"{name}.surface", f"give the surface per member or on the packet, not both: remove "
                                              f"{name}.surface, or the members' surface keys")
        elif value is None and kind is not None and kind.own_surfaces:
            pass   # a state file may hold every surface's part: the set-up reads it and asks if not
        elif value is None:
            raise JobError(f"{name}.surface", f"which surface the packet starts on: one of "
                                              f"{', '.join(map(repr, names))}")
        elif value not in names:
            raise JobError(f"{name}.surface", f"no surface {value!r}; the surfaces are {', '.join(map(repr, names))}")
    if members:
        for j, member in enumerate(members):
            if isinstance(member, dict) and (member.get("surface") is not None or names is None):
                _packet_surfaces(member, names, f"{name}.{kind.nested}.{j}", found)
    if own:
        found.raise_if_any()


def _packet(raw, units, ndim, base, name) -> dict:
    if raw is None:
        raise JobError(name, f"missing [{name}] table; e.g. kind = 'gaussian', center, width, momentum")
    if not isinstance(raw, dict):
        raise JobError(name, "must be a table")
    kind = raw.get("kind", DEFAULT_PACKET)
    if not isinstance(kind, str):
        raise JobError(f"{name}.kind", f"must be a string, one of {', '.join(PACKET_SCHEMAS)}; got {kind!r}")
    if kind not in PACKET_SCHEMAS:
        near = difflib.get_close_matches(str(kind), PACKET_SCHEMAS, n=1)
        hint = f"did you mean {near[0]!r}? " if near else ""
        raise JobError(f"{name}.kind", f"unknown packet kind {kind!r}; {hint}known: {', '.join(PACKET_SCHEMAS)}")
    cls = PACKETS[kind]
    found = ErrorCollector()
    # combinations of keys need only their presence: checked even when a value is bad
    for key, message in cls.key_conflicts(raw, ndim):
        found.add(JobError(f"{name}.{key}", message))
    t = None
    with found.check():
        # `surface` (issue 16) belongs to any kind: checked against the job's [[surface]] tables
        t = validate_table({k: v for k, v in raw.items() if k != "surface"}, PACKET_SCHEMAS[kind], name, units, ndim)
        t["kind"] = kind
        if "surface" in raw:
            if not isinstance(raw["surface"], str):
                raise JobError(f"{name}.surface", f"must be a surface's name, got {raw['surface']!r}")
            t["surface"] = raw["surface"]
    if t is not None and cls.nested:
        parts = []
        for j, p in enumerate(t[cls.nested]):
            with found.check():
                parts.append(_packet(p, units, ndim, base, f"{name}.{cls.nested}.{j}"))
        t[cls.nested] = parts
    if t is not None and t.get("path") is not None:
        t["path"] = str((base / t["path"]).resolve())
    if t is not None and cls.trap and t.get(cls.trap) is not None:
        # the same checks as the job's [[potential]] tables, named under this packet
        t[cls.trap] = (_potentials(t[cls.trap], units, ndim, base, found, f"{name}.{cls.trap}")
                       if t[cls.trap] else [])
    found.raise_if_any()
    return t


def _absorber(raw, units, layout, extents, ndim) -> dict:
    """The [absorber] table; faces are checked against the axes of the raw
    [grid] table ``layout``, and the layers' fit against ``extents`` (see
    :func:`_extents`; None: not checked)."""
    found = ErrorCollector()
    allowed = _face_names_of(layout) if grid_axes(layout) else None
    per_face = None
    if isinstance(raw, dict) and isinstance(raw.get("strength"), dict):
        # strength = { "x-" = 0.5, "x+" = 2.0 }: one CAP strength per face
        raw = dict(raw)
        per_face = raw.pop("strength")
        for face, value in per_face.items():
            with found.check():
                if allowed is not None and face not in allowed:
                    raise JobError(f"absorber.strength.{face}",
                                   f"not a face of this grid; faces: {', '.join(allowed)}")
                v = units.to_atomic(value, "energy", f"absorber.strength.{face}")
                if v < 0:
                    raise JobError(f"absorber.strength.{face}", f"must not be negative, got {value!r}")
    t = None
    with found.check():
        t = validate_table(raw, ABSORBER, "absorber", units, ndim)
    if t is None:
        found.raise_if_any()
    if per_face is not None:
        t["strength"] = per_face
    if t["kind"] == "none":
        found.raise_if_any()
        return {"kind": "none"}
    if t.get("thickness") is None:
        found.add(JobError("absorber.thickness", f"required for kind = {t['kind']!r}"))
    elif extents is not None:
        with found.check():
            _absorber_fits(t, units, extents, grid_axes(layout))
    if allowed is not None and t.get("faces") is not None:
        for f in t["faces"]:
            if f not in allowed:
                found.add(JobError("absorber.faces", f"{f!r} is not a face of this grid; "
                                                     f"faces: {', '.join(allowed)}"))
    found.raise_if_any()
    if t["kind"] == "mask":
        t.pop("strength", None)
        t.pop("power", None)
    else:
        t.pop("mask_exponent", None)
    return t


def _absorber_fits(t, units, extents, axes) -> None:
    """The layers fit on the axes they cover (those with a valid extent)."""
    th = units.to_atomic(t["thickness"], "length", "absorber.thickness")
    covered = {f[:-1] for f in t["faces"]} if t.get("faces") is not None else None
    for name in axes:
        if covered is not None and name not in covered:
            continue              # no layer on this axis: nothing to fit
        if name not in extents:
            continue              # its min or max is wrong: said already
        lo, hi, min_text, max_text = extents[name]
        both = covered is None or {f"{name}-", f"{name}+"} <= set(t["faces"])
        if name == "r":   # one layer only, at r_max
            if th >= hi:
                raise JobError("absorber.thickness", f"the layer is thicker than the radial grid "
                                                     f"(r max = {max_text!r}); make it thinner")
            continue
        if (2 if both else 1) * th >= hi - lo:
            raise JobError("absorber.thickness", f"{'two layers do' if both else 'the layer does'} not fit on the {name} axis "
                                                 f"(from {min_text!r} to {max_text!r}); "
                                                 "make them thinner or the grid longer")


def _interaction(raw, units, ndim, radial: bool) -> dict:
    """The [interaction] table: N and either the coupling g (energy x
    length^d) or the scattering length with the confinement its
    dimension needs (2D: axial_omega, 1D: transverse_omega)."""
    if not isinstance(raw, dict):
        raise JobError("interaction", "must be a table such as { kind = 'contact', atoms = 1e4, "
                                      "scattering_length = '5.3 nm' }")
    if radial:
        raise JobError("interaction", "a contact interaction needs a Cartesian grid (x, y, z): a radial grid "
                                      "holds u = r R(r); remove [interaction] or use grid.x, y, z")
    found = ErrorCollector()
    given = {k for k in ("coupling", "scattering_length") if k in raw}
    if len(given) == 2:
        found.add(JobError("interaction.scattering_length", "give either coupling or scattering_length, "
                                                            "not both; remove one"))
    elif not given:
        found.add(JobError("interaction.coupling", "missing; give coupling = g (energy x length^d) or "
                                                   "scattering_length = a"))
    confinement = {2: "axial_omega", 1: "transverse_omega"}
    if given == {"scattering_length"} and ndim in confinement and confinement[ndim] not in raw:
        what = "the trap along the frozen axis, a_z = sqrt(hbar / (m omega_z))" if ndim == 2 else \
            "the transverse trap, g = 2 hbar omega_perp a"
        found.add(JobError(f"interaction.{confinement[ndim]}",
                           f"required with scattering_length on a {ndim}D grid: the angular frequency of {what} "
                           "(radians per job time unit); add it, or give coupling = g"))
    for key in ("axial_omega", "transverse_omega"):
        if key in raw and ndim is not None and (confinement.get(ndim) != key or "scattering_length" not in raw):
            where = "2D" if key == "axial_omega" else "1D"
            found.add(JobError(f"interaction.{key}", f"used only with scattering_length on a {where} grid; "
                                                     "remove it"))
    schema, later = interaction_schema(ndim), ()
    if ndim is None:   # the grid is wrong: the coupling's unit (energy x length^d) waits for it
        schema, later = {k: f for k, f in schema.items() if k != "coupling"}, ("coupling",)
    t = None
    with found.check():
        t = validate_table(raw, schema, "interaction", units, ndim, extra_ok=later)
    found.raise_if_any()
    return t


def _face_names_of(grid) -> list[str]:
    class _G:  # the face names depend only on axis names and radial-ness
        radial = "r" in grid
        axes = [type("A", (), {"name": n}) for n in grid_axes(grid)]
    return face_names(_G)


# Steps of one run at the most: step counts are int64 in results and
# checkpoints, and 2^53 is where float times stop telling steps apart.
MAX_STEPS = 2**53


def _steps(value, dt, field, units) -> int:
    ratio = value / dt
    if not ratio <= MAX_STEPS:   # also inf and nan
        tf = units.factor("time")
        raise JobError(field, f"{value / tf:g} is {ratio:.3g} time steps of dt = {dt / tf:g}, more than "
                              f"{MAX_STEPS:.3g}; shorten it or lengthen evolve.dt")
    n = round(ratio)
    if n < 1 or abs(n * dt - value) > 1e-9 * max(abs(value), dt):
        tf = units.factor("time")
        raise JobError(field, f"must be a whole number of time steps (dt = {dt / tf:g}), "
                              f"got {value / tf:g}; use {_nearest_multiples(value / tf, dt / tf)}")
    return n


def _nearest_multiples(value: float, unit: float) -> str:
    """The whole multiples of ``unit`` (at least one) on either side of
    ``value``, as a fix in a message: ``"40 or 50"``, or one value when
    both are the same (``"40"``: a value below one unit)."""
    lo = max(1, math.floor(value / unit)) * unit
    hi = max(1, math.ceil(value / unit)) * unit
    a, b = f"{job_number(lo):g}", f"{job_number(hi):g}"
    return a if a == b else f"{a} or {b}"


def _divisor_near(total: int, target: int, tries: int = 100_000) -> int | None:
    """The largest divisor of ``total`` at most ``target``, searched over
    ``tries`` candidates below it (a prime count of 1e13 steps would
    otherwise take 1e10 trial divisions); None when none is that close."""
    for k in range(target, max(0, target - tries), -1):
        if total % k == 0:
            return k
    return None


def _record(raw, units, evolve, layout=None) -> dict:
    """The [record] table; its sampling on whole time steps is checked (and
    the defaults derived) only when ``evolve`` (valid ``dt`` and
    ``duration``, in valid units) is given."""
    t = validate_table(raw, RECORD, "record", units)
    if t.get("adiabatic") is False:   # the default said: the same job (text and run id) as without it
        del t["adiabatic"]
    if t.get("column") is not None:
        axes = grid_axes(layout) if isinstance(layout, dict) else []
        if "r" in axes or len(axes) < 2:
            raise JobError("record.column", "a column density needs a 2D or 3D Cartesian grid; remove "
                                            "record.column")
        if t["column"] not in axes:
            raise JobError("record.column", f"no axis {t['column']!r}; the grid has {', '.join(axes)}")
    if evolve is None:
        return t
    dt = units.to_atomic(evolve["dt"], "time", "evolve.dt")
    duration = units.to_atomic(evolve["duration"], "time", "evolve.duration")
    if duration < dt:
        raise JobError("evolve.duration", "is shorter than one time step")
    total = _steps(duration, dt, "evolve.duration", units)
    if t.get("every") is None:
        # default: about 1000 samples (at least), on whole steps that divide
        # the duration, so that the last sample falls at the end (a default
        # that did not divide it was refused as if the user had given it)
        k = _divisor_near(total, max(1, total // 1000))
        if k is None:
            raise JobError("record.every", f"no whole number of steps near {total // 1000} divides the "
                                           f"run's {total} steps; give record.every")
        t["every"] = job_number(k * dt / units.factor("time"))
    every = units.to_atomic(t["every"], "time", "record.every")
    k = _steps(every, dt, "record.every", units)
    if t.get("snapshot_every") is None:
        t["snapshot_every"] = job_number(max(1, (total // k) // 100) * k * dt / units.factor("time"))
    snap = units.to_atomic(t["snapshot_every"], "time", "record.snapshot_every")
    m = _steps(snap, dt, "record.snapshot_every", units)
    tf = units.factor("time")
    if m % k:
        raise JobError("record.snapshot_every", f"must be a multiple of record.every ({t['every']!r}), got "
                                                f"{snap / tf:g}; use {_nearest_multiples(snap / tf, k * dt / tf)}")
    if total % k:
        raise JobError("evolve.duration", f"must be a multiple of record.every ({t['every']!r}) "
                                          f"so that the last sample is at the end, got {duration / tf:g}; use "
                                          f"{_nearest_multiples(duration / tf, k * dt / tf)}")
    return t


def _detectors(raw, units, extents, axes) -> list[dict]:
    """The [[detector]] tables, each on its own, with a position key for
    each of ``axes``; positions are compared with the axis extents
    (:func:`_extents`; None: not compared)."""
    if isinstance(raw, dict):
        raw = [raw]
    if not isinstance(raw, list) or not all(isinstance(t, dict) for t in raw):
        raise JobError("detector", "must be [[detector]] tables")
    found = ErrorCollector()
    out, names = [], set()
    screen_axis = None   # the axis every resolved detector lies across (one for now)
    spectrum_axis = None   # likewise for the detectors that record what a spectrum needs
    for i, table in enumerate(raw):
        field = f"detector.{i}"
        schema = {**DETECTOR, **{a: DETECTOR_POSITION for a in axes}}
        with found.check():
            t = validate_table(table, schema, field, units)
            where = [a for a in axes if t.get(a) is not None]
            if len(where) != 1:
                raise JobError(field, f"give exactly one position, one of {', '.join(axes)} = ...")
            a = where[0]
            t["name"] = t.get("name") or f"{a}={t[a]}"
            if t["name"] in names:
                raise JobError(f"{field}.name", f"{t['name']!r} is used twice")
            names.add(t["name"])
            if t.get("resolved") is False:   # the default said: the same job (text and run id) as without it
                del t["resolved"]
            if t.get("resolved"):
                if len(axes) < 2 or "r" in axes:
                    raise JobError(f"{field}.resolved", "a resolved screen is a line (2D) or plane (3D); a point "
                                                        "has no profile: remove resolved")
                if screen_axis is not None and a != screen_axis:
                    raise JobError(f"{field}.resolved", f"resolved screens across different axes are not "
                                                        f"supported yet; keep them all across {screen_axis} "
                                                        f"or remove resolved")
                screen_axis = a
            if t.get("spectrum") is not None and (len(axes) < 2 or "r" in axes):
                if "r" in axes and t["spectrum"]:
                    raise JobError(f"{field}.spectrum", "a radial grid gives no surface-flux spectrum; use a "
                                                        "cartesian grid or remove spectrum")
                del t["spectrum"]   # 1D detectors always record psi and dpsi/dx: the same job (and run id)
            elif t.get("spectrum") is False:
                del t["spectrum"]
            elif t.get("spectrum"):
                if spectrum_axis is not None and a != spectrum_axis:
                    raise JobError(f"{field}.spectrum", f"spectrum detectors across different axes are not "
                                                        f"supported yet; keep them all across {spectrum_axis} "
                                                        f"or remove spectrum")
                spectrum_axis = a
            if extents is not None and a in extents:
                lo, hi, min_text, max_text = extents[a]
                pos = units.to_atomic(t[a], "length", f"{field}.{a}")
                if pos == lo or pos == hi:   # (on the edge: "outside [min, max]" would contradict itself)
                    raise JobError(f"{field}.{a}", f"{t[a]!r} is on the grid's edge: a detector lies strictly "
                                                   f"between {min_text!r} and {max_text!r} (a box's walls hold "
                                                   "psi = 0; a periodic grid's two ends are one point); move it inside")
                if not lo < pos < hi:
                    raise JobError(f"{field}.{a}", f"{t[a]!r} lies outside the grid [{min_text!r}, {max_text!r}]")
            out.append(t)
    found.raise_if_any()
    return out
