"""The job-file reference, generated from the schemas (``wavesweep keys``).

Every table of a job file, every potential kind and every packet kind is
described here from the declarations the validation itself uses: the
:class:`~wavesweep.schema.Field` schemas in :mod:`wavesweep.job`, the
``parameters`` and ``formula`` of each registered
:class:`~wavesweep.potentials.PotentialTerm`, :data:`wavesweep.states.PACKET_SCHEMAS`
and the unit tables of :mod:`wavesweep.units`.  A new key or kind appears
here without an edit, and a test fails for a key without a ``doc`` or a kind
without a ``formula``.

:func:`reference` returns JSON-ready data for a topic; :func:`render_text`
prints it.  :func:`physics_defaults` lists the keys that set the physics
(``Field(physics=True)``) which a job left out, with the value used, so that
``check`` can print them (the resolved job holds them too).
"""
from __future__ import annotations

import difflib
import textwrap
from typing import NamedTuple

from ..adequacy import Finding
from ..errors import JobError
from ..fft import BACKENDS
from ..potentials import REGISTRY
from ..potentials.library import EDGES
from ..propagators import SCHEMES
from ..schema import Field
from ..states import DEFAULT_PACKET, PACKET_SCHEMAS, PACKETS
from ..units import CYCLE_SYMBOLS, KINDS, UNITS, UnitSet
from .document import Job
from .schemas import (ABSORBER, AXIS, COUPLING, DETECTOR, DETECTOR_POSITION, EVOLVE, GRID, INTERACTION, PARTICLE,
                      PACKET_SURFACE, RECORD, SURFACE, TOP_LEVEL)
from .sweep import MODES

__all__ = ["reference", "render_text", "topics", "physics_defaults", "PhysicsDefault", "default_findings",
           "TABLE_DOCS", "UNIT_KEYS", "SWEEP", "SWEEP_RANGE"]

# What each top-level entry of a job file is for.
TABLE_DOCS = {
    "title": "the run's title, a string (default: the job file's name)",
    "units": "the units every number of the job is written in",
    "particle": "the particle's mass and charge",
    "grid": "the grid: axes x, y, z (or a radial r) and their boundary",
    "potential": "terms of V(r, t), summed, one table each; none: a free particle",
    "packet": "the initial state psi(r, 0)",
    "evolve": "time stepping: step, duration, propagator",
    "absorber": "absorbing layers at the grid's faces",
    "record": "what the result file keeps, and how often",
    "detector": "planes where the probability current is recorded, one table each",
    "sweep": "a study: job fields to vary, one run per point",
    "interaction": "the condensate's mean-field contact interaction (Gross-Pitaevskii); none: linear",
    "surface": "several potential-energy surfaces one packet moves on, one table each (none: one surface)",
    "coupling": "the off-diagonal potential between two surfaces, one table per coupled pair",
}

# [units] (read by UnitSet.from_table; the unit each base quantity is written in).
# The values are unit names (strings); the symbols of each are listed with the unit kinds.
UNIT_KEYS = {
    "length": Field("str", "bohr", doc="unit of lengths, e.g. 'nm', 'angstrom', 'um'"),
    "energy": Field("str", "hartree", doc="unit of energies, e.g. 'meV', 'eV', a molar energy per particle "
                                         "'kcal/mol' or 'kJ/mol', a wavenumber 'cm-1' (h c / lambda), a "
                                         "temperature 'uK' (k_B T), a frequency 'kHz' (h nu) or 'rad/s' "
                                         "(hbar omega)"),
    "time": Field("str", "au_time", doc="unit of times, e.g. 'fs', 'ps'"),
    "mass": Field("str", "m_e", doc="unit of masses, e.g. 'm_e', 'Da', 'kg'"),
    "charge": Field("str", "e_charge", doc="unit of charges: 'e_charge' (e) or 'C'"),
}
UNITS_NOTE = ("Without [units] every number is in Hartree atomic units.  A unit left out of "
              "[units] follows from the others where they determine it (time = hbar / energy "
              "unit when energy is given; for an energy given as a frequency, its reciprocal: "
              "ms for kHz, s for rad/s); `wavesweep check` prints the unit set in use.  Any "
              "quantity may instead be a string with its own unit, such as '3 nm' or "
              "'0.2 m_e*nm/fs'.")

SWEEP = {
    "mode": Field("str", "grid", choices=MODES,
                  doc="grid: every combination of the swept values; zip: the i-th values of "
                      "every key together (lists of one length)"),
    "<dotted key>": Field("list", None,
                          doc="a job field by its dotted path, e.g. \"potential.0.height\" or "
                              "\"packet.energy\" (quoted: the key holds dots): a list of values in "
                              "the job's units, or a range table { start, stop, num, spacing }"),
}
SWEEP_RANGE = {
    "start": Field("number", doc="first value, in the job's units of the swept key"),
    "stop": Field("number", doc="last value (included)"),
    "num": Field("int", positive=True, doc="number of values"),
    "spacing": Field("str", "linear", choices=("linear", "log"),
                     doc="linear: evenly spaced; log: geometric (start, stop > 0)"),
}

PHYSICS_MARK = "*"
LEGEND = (f"{PHYSICS_MARK} a default that sets the physics: `wavesweep check` prints it when "
          "the job leaves the key out, and the resolved job (in each result) holds it")


# -- key entries ----------------------------------------------------------------
def _plain(value):
    """A default as JSON/TOML would write it."""
    if isinstance(value, tuple):
        return list(value)
    return value


def _key(name: str, f: Field) -> dict:
    """One key as JSON-ready data."""
    choices = list(dict.fromkeys(f.choices)) if f.choices is not None else None   # 1 == 1.0
    bound = "> 0" if f.positive else ">= 0" if f.nonnegative else None
    return {
        "key": name,
        "kind": f.kind,
        "unit_kind": f.kind if f.kind in KINDS else None,
        "required": f.required,
        "default": None if f.required else _plain(f.default),
        "choices": choices,
        "bound": bound,
        "per_axis": f.per_axis,
        "physics": f.physics,
        "doc": f.doc,
    }


def _keys(schema: dict, skip=("kind",)) -> list[dict]:
    return [_key(name, f) for name, f in schema.items() if name not in skip]


def _job_unit(kind: str) -> str:
    """How a kind's job unit is built from [units], e.g. 'energy/(charge*length)'."""
    up = [b if p == 1 else f"{b}^{p}" for b, p in KINDS[kind].job_unit if p > 0]
    down = [b if p == -1 else f"{b}^{-p}" for b, p in KINDS[kind].job_unit if p < 0]
    text = "*".join(up) or "1"
    if down:
        text += "/" + (down[0] if len(down) == 1 else f"({'*'.join(down)})")
    return text


def unit_kind(kind: str) -> dict:
    """A quantity kind: how its job unit is built and the unit symbols of its
    dimension (compound units such as 'meV/nm' are built from the symbols)."""
    dims = KINDS[kind].dims
    symbols = [name for name, (_, d) in UNITS.items() if d == dims]
    out = {"kind": kind, "job_unit": _job_unit(kind) if KINDS[kind].job_unit else "1",
           "symbols": symbols}
    if kind == "frequency":
        out["note"] = ("angular frequency: a number is rad per job time unit; 'Hz', 'kHz', ... "
                       "mean cycles per second and are multiplied by 2 pi")
    elif any(base == "energy" and power == 1 for base, power in KINDS[kind].job_unit):
        # units.unit_factor: an energy of the trade, h nu or hbar omega (K, uK: k_B T, in symbols)
        out["energy_as_frequency"] = {"h_nu": list(CYCLE_SYMBOLS), "hbar_omega": ["rad/s"]}
        example = UnitSet.from_table({"length": "um", "energy": "kHz", "time": "ms"}).unit_label(kind)
        out["note"] = ("the energy may be a frequency: " + ", ".join(CYCLE_SYMBOLS)
                       + " read as h nu, rad/s as hbar omega (a bare 1/s is refused); K, mK, uK, "
                       f"nK are k_B T; e.g. '2 {example}'")
    return out


def _used_kinds(sections: list[dict]) -> list[str]:
    seen = {}
    for s in sections:
        for k in s["keys"]:
            if k["unit_kind"] and k["unit_kind"] != "dimensionless":
                seen[k["unit_kind"]] = None
    return list(seen)


# -- sections -------------------------------------------------------------------
def _section(topic, title, summary, keys, formula=None, notes=(), kinds=()):
    return {"topic": topic, "title": title, "summary": summary, "formula": formula,
            "keys": keys, "kinds": list(kinds), "notes": list(notes)}


def _potential_section(kind: str) -> dict:
    cls = REGISTRY[kind]
    notes = []
    if cls.time_dependent is True:
        notes.append("time-dependent")
    return _section(f"potential.{kind}", f'[[potential]] kind = "{kind}"', cls.summary,
                    _keys(cls.parameters), cls.formula, notes)


def _packet_section(kind: str) -> dict:
    return _section(f"packet.{kind}", f'[packet] kind = "{kind}"', "",
                    _keys(PACKET_SCHEMAS[kind]) + [_packet_surface_key(kind)], PACKETS[kind].formula)


def _packet_surface_key(kind: str | None = None) -> dict:
    """``surface``, which every packet kind takes on coupled surfaces, as
    the kind reads it (``None``: any kind)."""
    cls = PACKETS.get(kind)
    doc = PACKET_SURFACE.doc
    if cls is not None and cls.nested:
        doc = (f"coupled surfaces ([[surface]]) only: the surface every member starts on; or give each "
               f"member of {cls.nested} its own surface instead (not both)")
    elif cls is not None and cls.own_surfaces:
        doc = ("coupled surfaces ([[surface]]) only: the surface a state of one surface starts on; a "
               "state with a `surface` dimension (a coupled run's result, a coupled `levels --states` "
               "file) fills the job's surfaces of the same names and takes no surface")
    elif cls is None:
        doc += ("; a superposition gives it on the packet or on each member (not both); a file packet "
                "whose state has a `surface` dimension fills the surfaces of the same names without it")
    return _key("surface", Field(PACKET_SURFACE.kind, None, doc=doc))


def _kind_list(names, summaries) -> list[dict]:
    return [{"kind": n, "summary": s} for n, s in zip(names, summaries)]


def _table_sections(name: str) -> list[dict]:
    """The full sections of one top-level table."""
    doc = TABLE_DOCS[name]
    if name == "title":
        return [_section("title", "title", doc, [])]
    if name == "units":
        return [_section("units", "[units]", doc, _keys(UNIT_KEYS, skip=()), notes=[UNITS_NOTE])]
    if name == "particle":
        return [_section("particle", "[particle]", doc, _keys(PARTICLE))]
    if name == "grid":
        return [_section("grid", "[grid]", doc, _keys(GRID, skip=())),
                _section("grid.axis", "[grid] x, y, z, r = { ... }", "one axis of the grid",
                         _keys(AXIS))]
    if name == "potential":
        kinds = sorted(REGISTRY)
        return [_section("potential", "[[potential]]", doc, [],
                         kinds=_kind_list(kinds, [REGISTRY[k].summary for k in kinds]),
                         notes=["kind = one of the kinds above (wavesweep keys KIND: its formula "
                                "and keys)", EDGES])]
    if name == "packet":
        kinds = list(PACKET_SCHEMAS)
        return [_section("packet", "[packet]", doc, [_packet_surface_key()],
                         kinds=_kind_list(kinds, [PACKETS[k].formula for k in kinds]),
                         notes=[f"kind = one of the kinds above (default {DEFAULT_PACKET}; wavesweep keys "
                                "packet.KIND: its keys)"])]
    if name == "evolve":
        schemes = [f"scheme = {n!r}: {cls.summary}" for n, cls in SCHEMES.items()]
        backends = [f"fft = {n!r}: {cls.summary}" for n, cls in BACKENDS.items()]
        return [_section("evolve", "[evolve]", doc, _keys(EVOLVE), notes=schemes + backends)]
    if name == "absorber":
        return [_section("absorber", "[absorber]", doc, _keys(ABSORBER, skip=()),
                         notes=["strength may also be a table by face, e.g. "
                                "strength = { \"x-\" = 0.5, \"x+\" = 2.0 }; the tuned strength and "
                                "power are written into the resolved job"])]
    if name == "detector":
        keys = _keys(DETECTOR) + [_key("x | y | z | r", DETECTOR_POSITION)]
        return [_section("detector", "[[detector]]", doc, keys)]
    if name == "record":
        return [_section("record", "[record]", doc, _keys(RECORD))]
    if name == "sweep":
        return [_section("sweep", "[sweep]", doc, _keys(SWEEP, skip=())),
                _section("sweep.range", '[sweep] "KEY" = { ... }', "a range of values",
                         _keys(SWEEP_RANGE, skip=()))]
    if name == "interaction":
        return [_section("interaction", "[interaction]", doc, _keys(INTERACTION, skip=()),
                         "i hbar dpsi/dt = [T + V + g N |psi|^2] psi, sum |psi|^2 dV = 1",
                         ["coupling is in energy x length^d on a d-dimensional grid (energy x length in 1D, "
                          "x area in 2D, x volume in 3D)",
                          "energy is the Gross-Pitaevskii functional per atom, <T> + <V> + (g N / 2) "
                          "<|psi|^2>; the result also records chemical_potential, <T> + <V> + g N <|psi|^2>",
                          "split-operator schemes only (strang, order4, order4_suzuki): the others are linear"])]
    if name == "surface":
        return [_section("surface", "[[surface]]", doc, _keys(SURFACE, skip=()),
                         notes=["the packet names the surface it starts on: [packet] surface = NAME (or one "
                                "per member of a superposition, not both); a state file with a `surface` "
                                "dimension starts on every surface of the same name",
                                "schemes: the split-operator ones (strang, order4, order4_suzuki), and "
                                "chebyshev when no surface or coupling changes in time (no CAP); double "
                                "precision",
                                "the result has a `surface` dimension; arrivals, transmission, collect, movie "
                                "and plot read it per surface (levels --from not yet); levels of the job "
                                "diagonalises the full matrix Hamiltonian"])]
    if name == "coupling":
        return [_section("coupling", "[[coupling]]", doc, _keys(COUPLING, skip=()),
                         "H = T + V(r, t), V_ab = V_ba the coupling's potential, V_aa the surface's",
                         notes=["V is a real symmetric matrix at each point: no potential kind gives a "
                                "complex coupling"])]
    raise KeyError(name)


def topics() -> dict[str, list[str]]:
    """Every topic ``reference`` accepts -> the section topics it prints."""
    out = {name: [s["topic"] for s in _table_sections(name)] for name in TOP_LEVEL}
    out["axis"] = ["grid.axis"]
    for kind in REGISTRY:
        out[f"potential.{kind}"] = [f"potential.{kind}"]
    for kind in PACKET_SCHEMAS:
        out[f"packet.{kind}"] = [f"packet.{kind}"]
    # a bare kind name: the potential kind, the packet kind, or both (gaussian, file)
    for kind in list(REGISTRY) + list(PACKET_SCHEMAS):
        if kind not in out:
            out[kind] = [t for t in (f"potential.{kind}", f"packet.{kind}") if t in out]
    return out


def _sections_by_topic() -> dict[str, dict]:
    by = {}
    for name in TOP_LEVEL:
        for s in _table_sections(name):
            by[s["topic"]] = s
    for kind in REGISTRY:
        by[f"potential.{kind}"] = _potential_section(kind)
    for kind in PACKET_SCHEMAS:
        by[f"packet.{kind}"] = _packet_section(kind)
    return by


def reference(topic: str | None = None) -> dict:
    """The reference of one topic, JSON-ready: ``{"topic", "sections",
    "unit_kinds", "legend"}``.  No topic: every table with its keys, and the
    lists of potential and packet kinds.  A topic is a table name (``grid``,
    ``evolve``, ...), a potential or packet kind (``barrier``, ``field``,
    ``eigenstate``; ``potential.gaussian`` / ``packet.gaussian`` where a
    name is both), or ``axis``.  An unknown topic is a JobError naming the
    closest one."""
    by = _sections_by_topic()
    names = topics()
    if topic is None:
        sections = [s for name in TOP_LEVEL for s in _table_sections(name)]
    else:
        key = topic.strip().strip("[]").lower()
        if key not in names:
            near = difflib.get_close_matches(key, list(names), n=1, cutoff=0.5)
            hint = f"did you mean {near[0]!r}? " if near else ""
            tables = [n for n in names if "." not in n and n not in REGISTRY and n not in PACKET_SCHEMAS]
            kinds = [n for n in names if "." not in n and n not in tables]
            raise JobError("", f"unknown topic {topic!r}; {hint}topics: the tables {', '.join(tables)}; "
                               f"the kinds {', '.join(kinds)} (potential.NAME or packet.NAME where "
                               "both have one)")
        sections = [by[t] for t in names[key]]
    kinds = _used_kinds(sections)
    if topic is not None and names.get(topic.strip().strip("[]").lower()) == ["units"]:
        kinds = [k for k in KINDS if k != "dimensionless"]      # every kind a key can have
    return {"topic": topic, "sections": sections,
            "unit_kinds": {k: unit_kind(k) for k in kinds},
            "legend": LEGEND}


# -- text -----------------------------------------------------------------------
def _kind_text(k: dict) -> str:
    if k["choices"] is not None:
        text = "one of " + ", ".join(map(str, k["choices"]))
    else:
        text = {"str": "string", "int": "integer", "bool": "true/false", "number": "number",
                "table": "table", "list": "list"}.get(k["kind"], k["kind"].replace("_", " "))
    if k["bound"]:
        text += f" {k['bound']}"
    if k["per_axis"]:
        text += ", per axis"
    return text


def _default_text(k: dict) -> str:
    if k["required"]:
        return "required"
    if k["default"] is None:
        return "optional"
    value = k["default"]
    text = f'"{value}"' if isinstance(value, str) else str(value).lower() if isinstance(value, bool) \
        else repr(value)
    return f"default {text}" + (f" {PHYSICS_MARK}" if k["physics"] else "")


def render_text(ref: dict, width: int = 100) -> str:
    """The reference as text, ``width`` columns."""
    lines: list[str] = []
    wrap = textwrap.TextWrapper(width=width, initial_indent="    ", subsequent_indent="    ",
                                break_on_hyphens=False)
    for s in ref["sections"]:
        head = s["title"] + (f"  {s['summary']}" if s["summary"] else "")
        lines.extend(textwrap.wrap(head, width, subsequent_indent="    ", break_on_hyphens=False))
        for line in (s["formula"] or "").splitlines():
            # keep a line's own indent for the lines that wrap
            indent = " " * (4 + len(line) - len(line.lstrip()) + (2 if line.startswith("  ") else 0))
            lines.extend(textwrap.wrap(line, width, initial_indent="    ", subsequent_indent=indent,
                                       break_on_hyphens=False, drop_whitespace=True) or [""])
        name_w = max([len(k["key"]) for k in s["keys"]] + [len(k["kind"]) for k in s["kinds"]]
                     + [8]) + 2
        for k in s["kinds"]:
            lines.extend(textwrap.wrap(f"  {k['kind']:<{name_w}}{k['summary']}", width,
                                       subsequent_indent=" " * (2 + name_w), break_on_hyphens=False))
        for k in s["keys"]:
            lines.append(f"  {k['key']:<{name_w}}{_kind_text(k)}; {_default_text(k)}")
            if k["doc"]:
                lines.extend(textwrap.wrap(k["doc"], width, initial_indent=" " * (2 + name_w),
                                           subsequent_indent=" " * (2 + name_w), break_on_hyphens=False))
        for note in s["notes"]:
            lines.extend(wrap.wrap(note))
        lines.append("")
    if ref["unit_kinds"]:
        lines.extend(textwrap.wrap("Units: a number is in the job's unit of its kind (built from "
                                   "[units]); a string carries its own, e.g. '3 nm'.", width))
        for kind, u in ref["unit_kinds"].items():
            text = f"{kind.replace('_', ' ')}: [units] {u['job_unit']}"
            if u["symbols"]:
                text += "; symbols " + ", ".join(u["symbols"])
            if u.get("note"):
                text += f"; {u['note']}"
            lines.extend(wrap.wrap(text))
    if any(k.get("physics") for s in ref["sections"] for k in s["keys"]):
        lines.extend(textwrap.wrap(ref["legend"], width, break_on_hyphens=False))
    if ref["topic"] is None:
        lines.append("wavesweep keys TOPIC prints one table or kind in full (a potential kind: its "
                     "formula of V(r, t)); --json for scripts.")
    return "\n".join(lines).rstrip() + "\n"


# -- physics defaults -----------------------------------------------------------
class PhysicsDefault(NamedTuple):
    """A key that sets the physics, left out of the job and filled in."""

    field: str      # dotted job path, e.g. "potential.0.phase"
    value: str      # the value used, in the job's units, e.g. "0.0 nm"
    doc: str        # what the key is


def _value_text(value, f: Field, units) -> str:
    if isinstance(value, str):
        return f'"{value}"'
    if f.kind in KINDS and f.kind != "dimensionless" and not isinstance(value, str):
        return f"{value!r} {units.unit_label(f.kind)}"
    return repr(value)


def _missing(schema: dict, given, used, prefix: str, units, skip=()) -> list[PhysicsDefault]:
    if not isinstance(given, dict) or not isinstance(used, dict):
        return []
    out = []
    for key, f in schema.items():
        if f.physics and key not in given and key not in skip and used.get(key) is not None:
            out.append(PhysicsDefault(f"{prefix}.{key}", _value_text(used[key], f, units), f.doc))
    return out


def _as_list(raw):
    return [raw] if isinstance(raw, dict) else raw if isinstance(raw, list) else []


# Keys whose absence means a choice but which stay out of the resolved job
# (writing them would change the run id of every existing job): listed only.
def _potential_defaults(given, used, prefix, units, axes) -> list[PhysicsDefault]:
    out = []
    for i, (g, u) in enumerate(zip(_as_list(given), used or [])):
        cls = REGISTRY.get(u.get("kind"))
        if cls is None or not isinstance(g, dict):
            continue
        out += _missing(cls.parameters, g, u, f"{prefix}.{i}", units)
        # on a 2D/3D grid the direction a term acts along is a choice
        for key, position in (("axis", 0), ("across", 1)):
            if key in cls.parameters and key not in g and 1 < len(axes) and position < len(axes):
                out.append(PhysicsDefault(f"{prefix}.{i}.{key}", f'"{axes[position]}"',
                                          cls.parameters[key].doc))
    return out


def _packet_defaults(given, used, prefix, units, axes) -> list[PhysicsDefault]:
    if not isinstance(given, dict) or not isinstance(used, dict):
        return []
    kind = used.get("kind", DEFAULT_PACKET)
    cls = PACKETS.get(kind) if isinstance(kind, str) else None
    if cls is None:
        return []
    out = _missing(PACKET_SCHEMAS[kind], given, used, prefix, units, cls.ignored_keys(used))
    out += [PhysicsDefault(f"{prefix}.{key}", value, doc)
            for key, value, doc in cls.unstated_defaults(given, used, units)]
    if cls.nested:
        for j, (g, u) in enumerate(zip(_as_list(given.get(cls.nested)), used.get(cls.nested) or [])):
            out += _packet_defaults(g, u, f"{prefix}.{cls.nested}.{j}", units, axes)
    if cls.trap and used.get(cls.trap):
        out += _potential_defaults(given.get(cls.trap), used[cls.trap], f"{prefix}.{cls.trap}",
                                   units, axes)
    return out


def physics_defaults(job: Job, raw: dict | None = None) -> list[PhysicsDefault]:
    """The keys marked ``physics=True`` that ``raw`` (the job as written,
    after ``--set``; default ``job.raw``) leaves out, with the value the job
    uses in its units: ``[PhysicsDefault(field, value, doc), ...]``.  The
    resolved job (``Job.to_toml``) holds every such value, so a job loaded
    from it lists none of them.  Listed besides, though absent from the
    resolved job (writing them would change the run id of existing jobs):
    a Gaussian packet with neither momentum nor energy (at rest), a
    superposition's amplitudes and phases, and on a 2D/3D grid the axis a
    potential term acts along."""
    raw = job.raw if raw is None else raw
    if raw is None:
        return []
    t, units = job.table, job.units
    out = _missing(PARTICLE, raw.get("particle", {}), t.get("particle"), "particle", units)
    grid_raw = raw.get("grid") if isinstance(raw.get("grid"), dict) else {}
    axes = [a for a in ("x", "y", "z", "r") if a in t.get("grid", {})]
    every_axis_set = axes and all(isinstance(grid_raw.get(a), dict) and "boundary" in grid_raw[a]
                                  for a in axes)
    radial = "r" in axes     # always a box: its boundary is no choice
    out += _missing(GRID, grid_raw, t.get("grid"), "grid", units,
                    skip=("boundary",) if every_axis_set or radial else ())
    for a in axes:
        out += _missing(AXIS, grid_raw.get(a), t["grid"][a], f"grid.{a}", units)
    out += _potential_defaults(raw.get("potential"), t.get("potential"), "potential", units, axes)
    out += _packet_defaults(raw.get("packet"), t.get("packet"), "packet", units, axes)
    for name, schema in (("evolve", EVOLVE), ("absorber", ABSORBER), ("record", RECORD)):
        out += _missing(schema, raw.get(name, {}), t.get(name), name, units)
    for i, (g, u) in enumerate(zip(_as_list(raw.get("detector")), t.get("detector") or [])):
        out += _missing(DETECTOR, g, u, f"detector.{i}", units)
    return out


def default_findings(job: Job, raw: dict | None = None) -> list[Finding]:
    """:func:`physics_defaults` as ``check`` findings: one "ok" line per key
    (topic "defaults", ``field`` the key, ``values`` its value as text), so
    that every value the job did not choose itself is on the report."""
    return [Finding("defaults", "ok", f"{d.field} = {d.value} by default: {d.doc}; give it in the job "
                                      "to choose another", {"value": d.value, **_number_of(d.value)}, d.field)
            for d in physics_defaults(job, raw)]


def _number_of(text) -> dict:
    """``{"number": x}`` when a default's text starts with a number ("0.0 nm"), else {}."""
    try:
        return {"number": float(str(text).split()[0])}
    except (ValueError, IndexError):
        return {}
