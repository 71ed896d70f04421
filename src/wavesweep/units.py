"""Units: the job's unit set, quantities with units, conversion to atomic units.

Internally wavesweep works in Hartree atomic units (hbar = m_e = e = 1,
4 pi eps0 = 1).  A job chooses a unit for length, energy, time and mass; every
number in the job file is read in those units, and every number written to a
result file is written in them.  A value may instead be a string carrying its
own unit, ``"3 nm"`` or ``"0.2 m_e*nm/fs"``.

All conversion factors are CODATA values taken from :mod:`scipy.constants`.

Each quantity has a *kind* (``"length"``, ``"energy"``, ...).  A kind fixes
the physical dimension (exponents of mass, length, time, charge) and how the
job's unit for it is built from the job's four base units.  The four base
units need not be mutually consistent in the ``E = M L^2 / T^2`` sense
(nm / meV / fs / m_e are not): each kind has its own job unit, and everything
is converted to atomic units on input, so the physics never sees the choice.
A unit left out of ``[units]`` is derived from the given ones where they
determine it, or refused (:meth:`UnitSet.from_table`): never silently atomic
beside units that are not.

Energies may be written in the units of the trade (:func:`unit_factor`):
temperatures ``K``, ``mK``, ``uK``, ``nK`` are energies k_B T; molar
energies ``kcal/mol`` and ``kJ/mol`` are per particle (``mol`` is the
count N_A); a wavenumber ``cm-1`` (``1/cm``, ``invcm``) is h c / lambda; a frequency
unit read where an energy is wanted is the energy of that frequency,
``Hz``, ``kHz``, ``MHz``, ``GHz``, ``THz`` (cycles per second) as h nu and
``rad/s`` (radians per time) as hbar omega, alone (``"2.5 kHz"``, ``[units]
energy = "kHz"``) or in a compound energy kind (``"kHz/um"`` for an energy
per length, ``"Hz um"`` for an energy times a length).  A bare inverse time
(``"1/s"``) says neither and is refused there.  A frequency field (``omega``)
keeps its own reading: ``"100 Hz"`` is 2 pi x 100 rad/s.
"""
from __future__ import annotations

import difflib
import functools
import math
import re
from dataclasses import dataclass, field
from decimal import Decimal

import scipy.constants as sc

from .errors import ErrorCollector, JobError

__all__ = ["UnitSet", "KINDS", "parse_unit", "unit_factor", "symbol_powers", "ATOMIC", "MECHANICAL",
           "CYCLE_SYMBOLS", "decimal_multiple"]

# --- atomic units in SI (CODATA via scipy.constants) -------------------------
_M_AU = sc.m_e                                   # kg
_L_AU = sc.physical_constants["Bohr radius"][0]  # m
_E_AU = sc.physical_constants["Hartree energy"][0]  # J
_T_AU = sc.hbar / _E_AU                          # s
_Q_AU = sc.e                                     # C

# Dimension vectors are (mass, length, time, charge) exponents.
Dims = tuple[int, int, int, int]
_DIM_NONE: Dims = (0, 0, 0, 0)


def _au_in_si(dims: Dims) -> float:
    m, l, t, q = dims
    return _M_AU**m * _L_AU**l * _T_AU**t * _Q_AU**q


def _unit(si_value: float, dims: Dims) -> tuple[float, Dims]:
    """(factor to atomic units, dims) for a unit whose SI value is given."""
    return si_value / _au_in_si(dims), dims


_MASS, _LEN, _TIME, _CHG = (1, 0, 0, 0), (0, 1, 0, 0), (0, 0, 1, 0), (0, 0, 0, 1)
_ENERGY: Dims = (1, 2, -2, 0)

# Unit symbols: name -> (factor to atomic units, dims).  Kept to symbols that a
# physicist writes without ambiguity; "e" is not a unit here (it is the
# charge-unit name "e_charge" / "qe") so that "1e-3 eV" cannot be misread.
UNITS: dict[str, tuple[float, Dims]] = {
    # atomic
    "bohr": (1.0, _LEN), "a0": (1.0, _LEN),
    "hartree": (1.0, _ENERGY), "Eh": (1.0, _ENERGY), "Ha": (1.0, _ENERGY),
    "au_time": (1.0, _TIME), "m_e": (1.0, _MASS), "me": (1.0, _MASS),
    "e_charge": (1.0, _CHG), "qe": (1.0, _CHG),
    # SI and prefixed
    "m": _unit(1.0, _LEN), "cm": _unit(1e-2, _LEN), "mm": _unit(1e-3, _LEN),
    "um": _unit(1e-6, _LEN), "µm": _unit(1e-6, _LEN), "micron": _unit(1e-6, _LEN),
    "nm": _unit(1e-9, _LEN), "pm": _unit(1e-12, _LEN),
    "angstrom": _unit(1e-10, _LEN), "Å": _unit(1e-10, _LEN), "A": _unit(1e-10, _LEN),
    "s": _unit(1.0, _TIME), "ms": _unit(1e-3, _TIME), "us": _unit(1e-6, _TIME),
    "µs": _unit(1e-6, _TIME), "ns": _unit(1e-9, _TIME), "ps": _unit(1e-12, _TIME),
    "fs": _unit(1e-15, _TIME), "as": _unit(1e-18, _TIME),
    "J": _unit(1.0, _ENERGY), "eV": _unit(sc.eV, _ENERGY), "meV": _unit(1e-3 * sc.eV, _ENERGY),
    "ueV": _unit(1e-6 * sc.eV, _ENERGY), "µeV": _unit(1e-6 * sc.eV, _ENERGY),
    "neV": _unit(1e-9 * sc.eV, _ENERGY), "keV": _unit(1e3 * sc.eV, _ENERGY),
    "kg": _unit(1.0, _MASS), "g": _unit(1e-3, _MASS),
    "u": _unit(sc.atomic_mass, _MASS), "Da": _unit(sc.atomic_mass, _MASS),
    "dalton": _unit(sc.atomic_mass, _MASS), "amu": _unit(sc.atomic_mass, _MASS),
    "C": _unit(1.0, _CHG),
    "rad": (1.0, _DIM_NONE),                         # "rad/s" for angular frequencies
    "V": _unit(1.0, (1, 2, -2, -1)),                 # volt = J / C
    "Hz": _unit(1.0, (0, 0, -1, 0)), "kHz": _unit(1e3, (0, 0, -1, 0)),
    "MHz": _unit(1e6, (0, 0, -1, 0)), "GHz": _unit(1e9, (0, 0, -1, 0)),
    "THz": _unit(1e12, (0, 0, -1, 0)),
    # as an energy: h x frequency (unit_factor); "rad/s" is hbar x angular frequency
    # energy equivalents that are conventional in spectroscopy / cold atoms
    "K": _unit(sc.k, _ENERGY),                      # k_B * 1 K
    "mK": _unit(1e-3 * sc.k, _ENERGY), "uK": _unit(1e-6 * sc.k, _ENERGY),
    "µK": _unit(1e-6 * sc.k, _ENERGY), "nK": _unit(1e-9 * sc.k, _ENERGY),
    "invcm": _unit(sc.h * sc.c * 100.0, _ENERGY),   # wavenumber, h c / 1 cm
    # chemists' molar energies, per particle: "kcal/mol" = 4184 J / N_A, "kJ/mol" = 1000 J / N_A
    # (the thermochemical calorie, 4.184 J; the mole a count of N_A, exact in the 2019 SI)
    "kcal": _unit(1e3 * sc.calorie, _ENERGY), "kJ": _unit(1e3, _ENERGY),
    "mol": (sc.N_A, _DIM_NONE),
}

# Frequency symbols that count cycles (1 Hz = 1 cycle per second) and the time
# unit each is the reciprocal of: an angular-frequency field multiplies them by
# 2 pi, an energy field reads them as h nu, and an energy unit given as one of
# them makes the time unit its period unit (kHz: ms).
CYCLE_SYMBOLS = {"Hz": "s", "kHz": "ms", "MHz": "us", "GHz": "ns", "THz": "ps"}
_FREQUENCY: Dims = (0, 0, -1, 0)
# a wavenumber 1/lambda read as an energy h c / lambda: h c in hartree bohr (the atomic
# energy unit as the table above builds it, M L^2 / T^2, so that "cm-1" is exactly "invcm")
_WAVENUMBER: Dims = (0, -1, 0, 0)
_HC_AU = sc.h * sc.c / (_au_in_si(_ENERGY) * _L_AU)


@dataclass(frozen=True)
class Kind:
    """A physical kind of quantity: its dimensions and its job unit.

    ``job_unit`` is a product of powers of the job's base units
    (``"length"``, ``"energy"``, ``"time"``, ``"mass"``, ``"charge"``).
    """

    name: str
    dims: Dims
    job_unit: tuple[tuple[str, int], ...]


def _k(name, dims, *parts):
    return name, Kind(name, dims, tuple(parts))


KINDS: dict[str, Kind] = dict([
    _k("dimensionless", _DIM_NONE),
    _k("length", _LEN, ("length", 1)),
    _k("energy", _ENERGY, ("energy", 1)),
    _k("time", _TIME, ("time", 1)),
    _k("mass", _MASS, ("mass", 1)),
    _k("charge", _CHG, ("charge", 1)),
    _k("momentum", (1, 1, -1, 0), ("mass", 1), ("length", 1), ("time", -1)),
    _k("velocity", (0, 1, -1, 0), ("length", 1), ("time", -1)),
    _k("acceleration", (0, 1, -2, 0), ("length", 1), ("time", -2)),   # gravity's g
    _k("wavenumber", (0, -1, 0, 0), ("length", -1)),
    _k("frequency", (0, 0, -1, 0), ("time", -1)),          # angular, rad per time
    _k("electric_field", (1, 1, -2, -1), ("energy", 1), ("charge", -1), ("length", -1)),
    _k("energy_per_length", (1, 1, -2, 0), ("energy", 1), ("length", -1)),
    _k("energy_length", (1, 3, -2, 0), ("energy", 1), ("length", 1)),
    # a contact coupling g in 2D and 3D (energy x length^d; in 1D energy_length)
    _k("energy_area", (1, 4, -2, 0), ("energy", 1), ("length", 2)),
    _k("energy_volume", (1, 5, -2, 0), ("energy", 1), ("length", 3)),
])

_DEFAULT_NAMES = {"length": "bohr", "energy": "hartree", "time": "au_time",
                  "mass": "m_e", "charge": "e_charge"}


# Powers of one unit symbol at the most: the kinds here need up to 4 (energy
# is mass length^2 time^-2, a field strength energy/length); 400 overflowed.
MAX_UNIT_POWER = 12

_TOKEN = re.compile(r"\s*(?:(?P<name>[A-Za-zµÅ_][A-Za-z0-9µÅ_]*)|(?P<pow>\*\*|\^)|(?P<op>[*/])|(?P<num>[+-]?\d+))")


def parse_unit(text: str, field: str = "unit") -> tuple[float, Dims]:
    """See :func:`_parse_unit`; strings are cached (a run converts its
    samples' units hundreds of times)."""
    if isinstance(text, str) and isinstance(field, str):
        return _parse_unit_cached(text, field)
    return _parse_unit(text, field)


@functools.lru_cache(maxsize=1024)
def _parse_unit_cached(text: str, field: str) -> tuple[float, Dims]:
    return _parse_unit(text, field)


def _parse_unit(text: str, field: str = "unit") -> tuple[float, Dims]:
    """Parse a unit expression such as ``"nm"``, ``"meV/nm"``, ``"m_e*nm/fs"``,
    ``"1/fs"``, ``"fs^-1"`` or ``"nm**2"`` into (factor to atomic units, dims).

    Grammar: factors separated by ``*`` or ``/`` (each ``/`` divides only the
    next factor); a factor is a unit symbol with an optional integer power,
    or the number 1.
    """
    factor, dims = 1.0, [0, 0, 0, 0]
    # each symbol once, powers added: "m**4/m**3" is m, not (1.9e10)**4 first
    for tok, power in _merge_powers(_symbol_powers(text, field)):
        f, d = UNITS[tok]
        try:
            factor *= f ** power
        except OverflowError:
            factor = math.inf
        for j in range(4):
            dims[j] += power * d[j]
    if not (math.isfinite(factor) and factor > 0.0):   # e.g. "m^9*km^9*Mm^9"
        raise JobError(field, f"unit {text!r} is too large or too small to compute with; "
                              "write the value in a unit near its size")
    return factor, tuple(dims)


def symbol_powers(text: str, field: str = "unit") -> list[tuple[str, int]]:
    """A unit expression as its symbols and their integer powers, in the
    order written (``"m_e*nm/fs^2"`` -> ``[("m_e", 1), ("nm", 1), ("fs", -2)]``);
    see :func:`parse_unit` for the grammar.  Cached, like :func:`parse_unit`."""
    if isinstance(text, str) and isinstance(field, str):
        return list(_symbol_powers_cached(text, field))
    return _symbol_powers(text, field)


@functools.lru_cache(maxsize=1024)
def _symbol_powers_cached(text: str, field: str) -> tuple:
    return tuple(_symbol_powers(text, field))


def _symbol_powers(text, field: str = "unit") -> list[tuple[str, int]]:
    bad = JobError(field, f"cannot read unit {text!r}; write e.g. 'nm', 'meV/nm', "
                          "'m_e*nm/fs' or 'fs^-1'")
    if not isinstance(text, str):
        raise bad
    tokens, pos = [], 0
    while pos < len(text):
        m = _TOKEN.match(text, pos)
        if not m or m.end() == pos:
            if text[pos:].strip() == "":
                break
            raise bad
        pos = m.end()
        tokens.append((m.lastgroup, m.group(m.lastgroup)))
    out = []
    sign, i, need_factor = 1, 0, True
    while i < len(tokens):
        kind, tok = tokens[i]
        if need_factor and kind == "num" and tok == "1":
            need_factor, i = False, i + 1
            continue
        if not need_factor and kind == "op":
            sign = -1 if tok == "/" else 1
            need_factor, i = True, i + 1
            continue
        if not need_factor and kind == "name":   # "m_e nm fs-1": a space multiplies (CF)
            sign, need_factor = 1, True
        if not (need_factor and kind == "name"):
            raise bad
        power = 1
        if tok not in UNITS:   # CF style with the power glued on: "m2", "s-1" is name + num
            m = re.fullmatch(r"(.*?)(\d+)", tok)
            if m and m.group(1) in UNITS:
                tok, power = m.group(1), int(m.group(2))
        if tok not in UNITS:
            near = difflib.get_close_matches(tok, UNITS, n=3)
            hint = f" (did you mean {', '.join(map(repr, near))}?)" if near else ""
            raise JobError(field, f"unknown unit {tok!r} in {text!r}{hint}; "
                                  f"known: {', '.join(sorted(UNITS))}")
        if i + 1 < len(tokens) and tokens[i + 1][0] == "pow":
            if i + 2 >= len(tokens) or tokens[i + 2][0] != "num":
                raise bad
            power = int(tokens[i + 2][1])
            i += 2
        elif i + 1 < len(tokens) and tokens[i + 1][0] == "num" and tokens[i + 1][1][0] in "+-":
            power = int(tokens[i + 1][1])   # "s-1", "nm-2" (CF units, as results write them)
            i += 1
        if abs(power) > MAX_UNIT_POWER:
            raise JobError(field, f"power {power} of {tok!r} in unit {text!r} is beyond "
                                  f"+-{MAX_UNIT_POWER}; no quantity here needs more (a density in "
                                  "3D is length^-3): write the unit with its plain power")
        out.append((tok, sign * power))
        need_factor, i = False, i + 1
    if need_factor:
        raise bad
    return out


def _merge_powers(parts) -> list[tuple[str, int]]:
    """Symbol powers with each symbol once (powers added; first place kept),
    zero powers dropped."""
    total: dict[str, int] = {}
    for sym, p in parts:
        total[sym] = total.get(sym, 0) + p
    return [(sym, p) for sym, p in total.items() if p != 0]


def _write_powers(parts, caret: bool = False) -> str:
    """Symbol powers as a unit string the parser reads back: CF style
    (``"m_e nm2 fs-2"``), or with ``^`` (``"m_e nm^2 fs^-2"``) when ``caret``
    or where a symbol ends in a digit (``a0^2``, not ``a02``)."""
    out = []
    for sym, p in parts:
        if p == 1:
            out.append(sym)
        elif caret or sym[-1].isdigit():
            out.append(f"{sym}^{p}")
        else:
            out.append(f"{sym}{p}")
    return " ".join(out) if out else "1"


_QUANTITY = re.compile(r"^\s*(?P<num>[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)\s*(?P<unit>.*?)\s*$")


# The four mechanical base units: energy = mass length^2 / time^2 relates them.
MECHANICAL = ("length", "energy", "time", "mass")


@dataclass(frozen=True)
class UnitSet:
    """The job's units: the name of each base unit and its factor to atomic units.

    :meth:`from_table` reads a ``[units]`` table.  No table (or an empty one):
    atomic units.  Otherwise a unit left out is derived from the given ones
    where they determine it, or the table is refused naming it, so that no
    unit is silently atomic beside units that are not:

    * ``mass`` left out is ``m_e`` (a stated default; ``particle.mass`` is
      then in electron masses);
    * ``time`` left out, ``energy`` given: time follows as hbar / energy
      (``hbar/meV`` = 0.658 ps), as the job-file contract says; an energy
      given as a frequency makes time the reciprocal of that frequency
      (``kHz``, h x 1 kHz: ``ms`` = h / energy; ``rad/s``, hbar x 1 rad/s:
      ``s`` = hbar / energy), written as a plain time unit;
    * ``energy`` left out, ``length`` and ``time`` given: energy follows as
      mass length^2 / time^2 (nm, fs and m_e: m_e nm^2 fs^-2 = 5.686 eV);
    * ``length`` left out, or ``energy`` and ``time`` both left out: refused
      (:class:`~wavesweep.errors.JobError` on ``units.length`` /
      ``units.energy``), unless every unit given is the atomic one.

    ``describe()`` says which units are given, derived or defaults.  The
    derived energy is written out as a unit string (``energy``), so the
    resolved job states it; the derived time is written as ``hbar/<energy>``
    in labels (a plain time unit when the energy is a frequency) and left
    out of the resolved table (it is derived again the same way).
    """

    length: str = "bohr"
    energy: str = "hartree"
    time: str = "au_time"
    mass: str = "m_e"
    charge: str = "e_charge"
    time_derived: bool = False
    energy_derived: bool = False
    given: tuple = field(default=(), compare=False)   # the keys the [units] table gave

    @classmethod
    def from_table(cls, table: dict | None, field: str = "units") -> "UnitSet":
        """The unit set of a ``[units]`` table (see the class docstring for
        the rules); every independent error is raised together."""
        table = dict(table or {})
        allowed = ("length", "energy", "time", "mass", "charge")
        found = ErrorCollector()
        for key in table:
            if key not in allowed:
                near = difflib.get_close_matches(key, allowed, n=1)
                hint = f" (did you mean {near[0]!r}?)" if near else ""
                found.add(JobError(f"{field}.{key}", f"unknown key{hint}; allowed: {', '.join(allowed)}"))
        names, factors = {}, {}
        for key in allowed:
            if key not in table:
                continue
            with found.check():
                name = table[key]
                if not isinstance(name, str):
                    raise JobError(f"{field}.{key}", f"must be a unit name as a string, got {name!r}")
                names[key], factors[key] = name, unit_factor(name, key, f"{field}.{key}")
        given = tuple(k for k in MECHANICAL if k in table)
        # a left-out unit that nothing derives would silently be atomic beside
        # units that are not; all given units atomic (valid ones: a bad one
        # is reported on its own) is a consistent atomic set
        atomic = all(math.isclose(factors[k], 1.0, rel_tol=1e-12) for k in given if k in names)
        if given and not atomic:
            found_units = ", ".join(f"{k} {table[k]!r}" for k in given)
            if "length" not in table:
                found.add(JobError(f"{field}.length",
                                   f"left out while [units] gives {found_units}: lengths would silently "
                                   "be bohr; add length = 'nm' (or another length unit; 'bohr' for "
                                   "atomic lengths)"))
            if "energy" not in table and "time" not in table:
                found.add(JobError(f"{field}.energy",
                                   f"left out, and with no time unit nothing determines it ([units] gives "
                                   f"{found_units}): energies would silently be hartree; add energy = "
                                   "'meV' (time then follows as hbar/meV) or time = 'fs' (energy then "
                                   "follows as mass length^2/time^2), or energy = 'hartree' for atomic "
                                   "energies"))
        found.raise_if_any(order=lambda e: list(table).index(e.field.split(".")[-1])
                           if e.field.split(".")[-1] in table else len(table))
        for key in allowed:
            names.setdefault(key, _DEFAULT_NAMES[key])
        time_derived = "time" not in table and "energy" in table
        energy_derived = "energy" not in table and "time" in table and "length" in table
        if time_derived:
            names["time"] = _period_unit(names["energy"]) or f"hbar/{_grouped(names['energy'])}"
        if energy_derived:
            # E = M L^2 / T^2, written as a unit string the parser reads back
            parts = [(s, p) for s, p in symbol_powers(names["mass"])]
            parts += [(s, 2 * p) for s, p in symbol_powers(names["length"])]
            parts += [(s, -2 * p) for s, p in symbol_powers(names["time"])]
            names["energy"] = _write_powers(_merge_powers(parts), caret=True)
        return cls(**names, time_derived=time_derived, energy_derived=energy_derived,
                   given=tuple(k for k in allowed if k in table))

    # -- factors -----------------------------------------------------------
    @property
    def _time_is_hbar_over_energy(self) -> bool:
        """Time derived as hbar / energy and named so (not a period unit)."""
        return self.time_derived and self.time.startswith("hbar/")

    def base_factor(self, base: str) -> float:
        """Atomic units per one job unit of a base quantity."""
        name = getattr(self, base)
        if base == "time" and self._time_is_hbar_over_energy:
            # hbar / E_unit in atomic units is 1 / (E_unit in hartree).
            return 1.0 / unit_factor(self.energy, "energy")
        return unit_factor(name, base)

    def factor(self, kind: str) -> float:
        """Atomic units per one job unit of quantity ``kind``."""
        f = 1.0
        for base, power in KINDS[kind].job_unit:
            f *= self.base_factor(base) ** power
        return f

    def unit_label(self, kind: str) -> str:
        """A CF-style unit string for ``kind`` in this unit set (``"nm-1"``;
        a derived energy is spelled out: ``"m_e nm2 fs-2"``)."""
        parts = []
        for base, power in KINDS[kind].job_unit:
            name = getattr(self, base)
            if base == "time" and self._time_is_hbar_over_energy:
                parts.append((f"(hbar/{_grouped(self.energy)})", power))
            else:
                parts += [(sym, p * power) for sym, p in symbol_powers(name)]
        return _write_powers(_merge_powers(parts))

    def density_label(self, ndim: int) -> str:
        name = self.length
        return f"{name}-{ndim}"

    # -- conversion --------------------------------------------------------
    def to_atomic(self, value, kind: str, field: str = "value") -> float:
        """A job value (number in job units, or a string with its own unit)
        converted to atomic units."""
        if isinstance(value, bool):
            raise JobError(field, f"must be a number, got {value!r}")
        if isinstance(value, (int, float)):
            out = float(value) * self.factor(kind)
        elif isinstance(value, str):
            out = quantity_to_atomic(value, kind, field)
        else:
            raise JobError(field, f"must be a number or a string with a unit such as '3 nm', got {value!r}")
        if not math.isfinite(out):
            raise JobError(field, f"must be finite, got {value!r}")
        return out

    def to_job(self, value_au, kind: str):
        """Atomic units -> numbers in the job's unit for ``kind``."""
        return value_au / self.factor(kind)

    def describe(self) -> str:
        """One line naming the unit of each base quantity, and whether it is
        given, derived (with its value in a familiar unit) or a default::

            units: length nm, energy m_e nm^2 fs^-2 (derived: mass length^2/time^2 = 5.686 eV),
            time fs, mass m_e (default)
        """
        if not any(k in self.given for k in MECHANICAL):
            charge = f", charge {self.charge}" if "charge" in self.given else ""
            return (f"units: atomic (length bohr, energy hartree, time au_time = "
                    f"{_familiar(_T_AU, 'time')}, mass m_e{charge}); no [units] table")
        items = []
        for base in MECHANICAL:
            name = getattr(self, base)
            if base == "time" and self._time_is_hbar_over_energy:
                au = self.base_factor("time")
                items.append(f"time {name} (derived: hbar/energy = {_familiar(au * _T_AU, 'time')})")
            elif base == "time" and self.time_derived:
                items.append(f"time {name} (derived: 1/frequency of the energy unit {self.energy})")
            elif base == "energy" and _is_frequency(name):
                au = self.base_factor("energy")
                reading = "hbar omega" if "rad" in dict(symbol_powers(name)) else "h nu"
                items.append(f"energy {name} ({reading} = {_familiar(au * _E_AU, 'energy')})")
            elif base == "energy" and self.energy_derived:
                au = self.base_factor("energy")
                items.append(f"energy {name} (derived: mass length^2/time^2 = "
                             f"{_familiar(au * _E_AU, 'energy')})")
            elif base not in self.given:
                items.append(f"{base} {name} (default)")
            else:
                items.append(f"{base} {name}")
        if "charge" in self.given:
            items.append(f"charge {self.charge}")
        return "units: " + ", ".join(items)

    def as_table(self) -> dict:
        out = {"length": self.length, "energy": self.energy, "mass": self.mass}
        if not self.time_derived:
            out["time"] = self.time
        if self.charge != _DEFAULT_NAMES["charge"]:
            out["charge"] = self.charge
        return out


ATOMIC = UnitSet()

# Familiar units a derived unit's size is quoted in (SI value of each).
_FAMILIAR = {
    "time": [("as", 1e-18), ("fs", 1e-15), ("ps", 1e-12), ("ns", 1e-9), ("us", 1e-6), ("ms", 1e-3),
             ("s", 1.0)],
    "energy": [("nK", 1e-9 * sc.k), ("uK", 1e-6 * sc.k), ("neV", 1e-9 * sc.eV), ("ueV", 1e-6 * sc.eV),
               ("meV", 1e-3 * sc.eV), ("eV", sc.eV), ("keV", 1e3 * sc.eV), ("MeV", 1e6 * sc.eV)],
}


def _grouped(unit: str) -> str:
    """A unit in parentheses where it is a compound (``"kcal/mol"`` ->
    ``"(kcal/mol)"``), so that ``hbar/`` before it divides by all of it."""
    return f"({unit})" if re.search(r"[/* ^]", unit.strip()) else unit


def _is_frequency(unit: str) -> bool:
    """Whether a (valid) unit is an inverse time: an energy written as a frequency."""
    return parse_unit(unit)[1] == _FREQUENCY


def _period_unit(energy_unit: str) -> str | None:
    """The time unit that is the reciprocal of an energy unit given as a
    frequency (``"kHz"`` -> ``"ms"``, ``"rad/s"`` -> ``"s"``, ``"rad/ms"`` ->
    ``"ms"``), a string the parser reads back; None for a true energy unit."""
    if not _is_frequency(energy_unit):
        return None
    parts = []
    for sym, p in _merge_powers(symbol_powers(energy_unit)):
        if sym in CYCLE_SYMBOLS:
            parts.append((CYCLE_SYMBOLS[sym], p))    # 1 / kHz^p = ms^p
        elif sym != "rad":
            parts.append((sym, -p))
    return _write_powers(_merge_powers(parts), caret=True)


def _familiar(si_value: float, base: str) -> str:
    """``si_value`` (J or s) in the largest familiar unit not above it,
    four significant digits (``"5.686 eV"``; energies below 1 neV as
    temperatures k_B T in nK or uK, as cold-atom work quotes them)."""
    choices = _FAMILIAR[base]
    name, size = choices[0]
    for n, v in choices:
        if si_value >= v * (1 - 1e-9):
            name, size = n, v
    return f"{si_value / size:.4g} {name}"


def _article(kind: str) -> str:
    name = kind.replace("_", " ")
    return f"an {name}" if name[0] in "aeiou" else f"a {name}"


def _energy_power(kind: str) -> int:
    """The power of the energy unit in ``kind``'s job unit (1 for energy,
    energy per length, ...; 0 for a length)."""
    return sum(p for base, p in KINDS[kind].job_unit if base == "energy")


def _energy_from_frequency(unit: str, field: str, what: str) -> float:
    """hbar omega per unit (``omega`` in atomic units) of a frequency unit
    read as an energy: 2 pi for cycles (``Hz``, ``kHz``, ...: E = h nu with
    h = 2 pi hbar, hbar = 1 in atomic units), 1 for radians (``rad/s``:
    E = hbar omega).  A unit that says neither (``1/s``) or both is refused."""
    powers = dict(_merge_powers(symbol_powers(unit, field)))
    cycles = sum(p for sym, p in powers.items() if sym in CYCLE_SYMBOLS)
    radians = powers.get("rad", 0)
    if cycles == 1 and radians == 0:
        return 2.0 * math.pi
    if radians == 1 and cycles == 0:
        return 1.0
    fix = "write Hz, kHz or MHz (cycles per second, read as h nu) or rad/s (read as hbar omega)"
    if cycles == 0 and radians == 0:
        raise JobError(field, f"{what} is a frequency in neither cycles nor radians, so as an energy "
                              f"it is ambiguous (h nu or hbar omega); {fix}")
    raise JobError(field, f"{what} mixes cycles and radians; as an energy {fix}")


def _kind_factor(unit: str, kind: str, field: str, what: str) -> float | None:
    """Atomic units per one ``unit`` read as a quantity of ``kind``, or None
    when the unit does not have the dimension of ``kind``.  ``what`` names
    the value in a message (``"'3 s-1'"``)."""
    factor, dims = parse_unit(unit, field)
    want = KINDS[kind].dims
    if dims == want:
        if kind == "frequency" and _CYCLES.search(unit):
            # angular-frequency fields (omega): "100 Hz" means 100 cycles per second
            factor *= 2.0 * math.pi
        return factor
    if _energy_power(kind) == 1:
        # an energy written as a frequency: the unit has the kind's dimension
        # with its energy E replaced by E / hbar (an inverse time)
        as_frequency = tuple(w - e + f for w, e, f in zip(want, _ENERGY, _FREQUENCY))
        if dims == as_frequency:
            return factor * _energy_from_frequency(unit, field, what)
        # an energy written as a spectroscopic wavenumber 1/lambda ("cm-1"): E = h c / lambda,
        # E replaced by E / (h c) (an inverse length); an angular one ("rad/cm") is not the custom
        as_wavenumber = tuple(w - e + f for w, e, f in zip(want, _ENERGY, _WAVENUMBER))
        if dims == as_wavenumber and "rad" not in dict(symbol_powers(unit, field)):
            return factor * _HC_AU
    return None


def _fix_hint(kind: str, dims: Dims) -> str:
    """How to write a value of ``kind`` whose unit had ``dims`` (a message's fix)."""
    if kind == "energy":
        return ("; write it in an energy unit such as 'meV' or 'kcal/mol' (per particle), a temperature "
                "('uK': k_B T), a wavenumber ('cm-1': h c / lambda) or a frequency ('kHz': h nu; 'rad/s': "
                "hbar omega)")
    if _energy_power(kind) == 1:
        return ("; its energy may be in an energy unit ('meV', 'kcal/mol'), a temperature ('uK': k_B T), "
                "a wavenumber ('cm-1') or a frequency ('kHz': h nu; 'rad/s': hbar omega)")
    if kind == "frequency" and dims == _ENERGY:
        return ("; an angular frequency is written in rad/s (or Hz, kHz, ..., multiplied by 2 pi), "
                "not as an energy")
    return ""


def unit_factor(unit: str, kind: str, field: str = "unit") -> float:
    """Atomic units per one ``unit`` of a quantity of ``kind``.

    The unit must have the dimension of ``kind``, with two readings of the
    trade: a frequency field (``kind = "frequency"``, angular) takes ``Hz``,
    ``kHz``, ... as cycles per second, x 2 pi; a kind holding one energy
    (energy, energy per length, energy x length, field) takes the energy as a
    frequency: ``Hz`` ... ``THz`` as h nu, ``rad/s`` as hbar omega (CODATA h =
    2 pi hbar, from :mod:`scipy.constants` through the atomic unit of time).
    Temperatures (``uK``) are energies k_B T already.  Anything else raises
    :class:`~wavesweep.errors.JobError` on ``field``.
    """
    factor = _kind_factor(unit, kind, field, repr(unit))
    if factor is None:
        raise JobError(field, f"{unit!r} is not a unit of {kind.replace('_', ' ')}"
                              f"{_fix_hint(kind, parse_unit(unit, field)[1])}")
    return factor


def quantity_to_atomic(text: str, kind: str, field: str = "value") -> float:
    """``"3 nm"`` -> 3 nm in bohr; the unit must have the dimension of
    ``kind`` (or be an energy of the trade, see :func:`unit_factor`):
    ``"2.5 kHz"`` as an energy is h x 2.5 kHz, as a frequency 2 pi x 2.5 kHz."""
    m = _QUANTITY.match(text)
    if not m:
        raise JobError(field, f"cannot read quantity {text!r}; write a number and a unit, e.g. '3 nm'")
    number = float(m.group("num"))
    unit = m.group("unit")
    want = KINDS[kind].dims
    if not unit:
        if want != _DIM_NONE:
            raise JobError(field, f"{text!r} has no unit; write it as a number, or with "
                                  f"{_article(kind)} unit")
        return number
    factor = _kind_factor(unit, kind, field, repr(text))
    if factor is None:
        raise JobError(field, f"{text!r} is not {_article(kind)}{_fix_hint(kind, parse_unit(unit, field)[1])}")
    return number * factor


_CYCLES = re.compile(r"(?<![A-Za-z])[kMGT]?Hz(?![A-Za-z])")


def decimal_multiple(count: int, step: float) -> float:
    """``count`` times ``step`` as the decimal numbers a job file writes
    them, rounded once to the nearest double: 60 x 0.5 is 30.0 and
    1200 x 0.025 is 30.0 (the float product is 30.000000000000004), so a
    time coordinate written this way is found by its written value
    (``ds.sel(time=30.0)``).  ``step`` is read as its shortest repr
    (parsed once per value: a run asks at every sample and frame)."""
    return float(_decimal_of(float(step)) * int(count))


@functools.lru_cache(maxsize=256)
def _decimal_of(step: float) -> Decimal:
    return Decimal(repr(step))

