"""Potentials from outside the library: user expressions and netCDF files."""
from __future__ import annotations

import numpy as np

from ..errors import JobError
from ..io.paths import input_file
from ..schema import Field
from ..units import _QUANTITY, CYCLE_SYMBOLS, KINDS, parse_unit, quantity_to_atomic, symbol_powers
from .base import PotentialTerm, register
from .expression import ALLOWED_FUNCTIONS, CONSTANTS, Expression


def _param_in_job_units(value, units, field: str) -> float:
    """An expression parameter in the job's units.  Numbers are taken as
    written; a string with a unit is converted to the job's unit of the same
    dimension."""
    if isinstance(value, bool) or not isinstance(value, (int, float, str)):
        raise JobError(field, f"must be a number or a quantity string, got {value!r}")
    if not isinstance(value, str):
        return float(value)
    m = _QUANTITY.match(value)
    if not m:
        raise JobError(field, f"cannot read quantity {value!r}; write e.g. '3 nm'")
    if not m.group("unit"):
        return float(m.group("num"))
    _, dims = parse_unit(m.group("unit"), field)
    if any(sym in CYCLE_SYMBOLS for sym, _ in symbol_powers(m.group("unit"), field)):
        # an energy h nu or an angular frequency 2 pi nu: a formula's parameter says not which
        raise JobError(field, f"{value!r} is in cycles per time, which a formula's parameter may mean as an "
                              "energy (h nu) or as an angular frequency (2 pi nu); give an angular frequency "
                              "in rad/s, or an energy in the job's energy unit (e.g. [units] energy = 'kHz' "
                              "and the number alone)")
    for kind in KINDS.values():
        if kind.dims == dims:
            return quantity_to_atomic(value, kind.name, field) / units.factor(kind.name)
    raise JobError(field, f"the unit of {value!r} is not one wavesweep converts for expressions; "
                          "give the number in the job's units")


@register
class ExpressionTerm(PotentialTerm):
    kind = "expression"
    summary = ("V from a formula in the job's units: coordinates x, y, z (or r), time t, "
               "parameters from `params`; numpy math functions and where(); never runs code")
    formula = ("V(r, t) = the expression, read in the job's units: x, y, z (or r) in its length "
               "unit, t in its time unit, the value in its energy unit; `params` numbers as "
               "written, strings with a unit ('20 angstrom') converted to the job's unit of that "
               "dimension.  Arithmetic (+ - * / ** % //), comparisons, the named constants "
               f"({', '.join(CONSTANTS)}) and the functions {', '.join(ALLOWED_FUNCTIONS)} "
               "(radians); V depends on time only if t appears; the text is never run as code")
    parameters = {
        "expression": Field("str", doc="formula for V in the job's energy unit"),
        "params": Field("table", None, doc="named numbers used in the formula"),
    }

    def validate(self):
        ctx = self.ctx
        params = {k: _param_in_job_units(v, ctx.units, f"{ctx.field}.params.{k}")
                  for k, v in (self.p.get("params") or {}).items()}
        self.expr = Expression(self.p["expression"], params, ctx.grid.names + ("t",),
                               field=f"{ctx.field}.expression")
        self._lf = ctx.units.factor("length")
        self._tf = ctx.units.factor("time")
        self._ef = ctx.units.factor("energy")

    @property
    def time_dependent(self):  # per instance: depends on whether t appears
        return self.expr.depends_on_time

    def at_time(self, mesh, t):
        values = {name: mesh[name] / self._lf for name in self.ctx.grid.names}
        values["t"] = t / self._tf
        v = np.asarray(self.expr.evaluate(**values), dtype=float) * self._ef
        if not np.all(np.isfinite(v)):
            raise JobError(f"{self.ctx.field}.expression",
                           f"{self.expr.text!r} is not finite everywhere on the grid (t = {values['t']:g})")
        return v

    def static(self, mesh):
        return self.at_time(mesh, 0.0)


@register
class FileTerm(PotentialTerm):
    kind = "file"
    summary = "V read from a netCDF variable, linearly interpolated onto the grid"
    formula = ("V(r) = `variable` of the netCDF file at `path` (dims named as the grid's axes), linearly "
               "interpolated onto the grid; its values in the variable's `units` attribute (else "
               "the job's energy unit), its coordinates in their `units` (else the job's length "
               "unit); the file's coordinates must cover the grid")
    parameters = {
        "path": Field("str", doc="netCDF file (relative to the job file's folder)"),
        "variable": Field("str", "potential", doc="name of the variable holding V"),
    }

    def validate(self):
        # a FIFO or a device named as the file would block or never end: refused here, at load time
        input_file(self.p["path"], f"{self.ctx.field}.path", "potential file")

    def static(self, mesh):
        import xarray as xr   # lazy: xarray (0.3 s with pandas), only for a potential read from a file
        from scipy.interpolate import RegularGridInterpolator   # lazy: as above

        f, grid, units = self.ctx.field, self.ctx.grid, self.ctx.units
        try:
            with xr.open_dataset(self.p["path"]) as ds:
                if self.p["variable"] not in ds:
                    raise JobError(f"{f}.variable", f"{self.p['variable']!r} is not in {self.p['path']!r}; "
                                   f"it has {', '.join(map(str, ds.data_vars))}")
                da = ds[self.p["variable"]].load()
        except JobError:  # a JobError is a ValueError: keep its own field
            raise
        except (OSError, ValueError) as e:
            raise JobError(f"{f}.path", f"cannot read {self.p['path']!r} as netCDF: {e}") from e
        if tuple(da.dims) != grid.names:
            raise JobError(f"{f}.variable", f"has dims {da.dims}, the grid has {grid.names}")
        factor = _units_factor(da.attrs.get("units"), "energy", units, f"{f}.variable")
        points = []
        for name in grid.names:
            c = da[name]
            lf = _units_factor(c.attrs.get("units"), "length", units, f"{f}.{name}")
            points.append(np.asarray(c.values, float) * lf)
        interp = RegularGridInterpolator(points, np.asarray(da.values, float) * factor,
                                         bounds_error=False, fill_value=None)
        for name, pts in zip(grid.names, points):
            ax = grid.axis(name)
            lo, hi = ax.coordinates.min(), ax.coordinates.max()
            if lo < pts.min() - 1e-9 * ax.dx or hi > pts.max() + 1e-9 * ax.dx:
                raise JobError(f"{f}.path", f"the file's {name} range does not cover the grid")
        full = np.meshgrid(*[grid.axis(n).coordinates for n in grid.names], indexing="ij")
        return interp(np.stack(full, axis=-1))


def _units_factor(label, kind, units, field) -> float:
    """Atomic units per file unit: the variable's `units` attribute if it has
    one, otherwise the job's unit."""
    if not label:
        return units.factor(kind)
    try:
        return quantity_to_atomic(f"1 {label}", kind, field)
    except JobError:
        raise JobError(field, f"units {label!r} in the file are not a {kind} unit") from None
