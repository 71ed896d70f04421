"""Reading a run's result file back for analysis.

``open_result`` refuses, with a one-line :class:`JobError`, anything that is
not a regular file (a FIFO, a device, a folder), not a result of this tool
(no ``run_id``/``job`` attributes), cannot be read as netCDF, or lacks a
variable the analysis needs.  What analysis needs of the run's set-up
(grid, initial packet, absorber, adequacy warnings) the run wrote into the
file: :func:`wavesweep.analysis.recorded.run_record` reads it; no set-up is rebuilt
from the ``job`` attribute.
"""
from __future__ import annotations

import inspect
import os

import numpy as np
import xarray as xr

from ..errors import JobError
from .paths import input_file

__all__ = ["open_result", "coupled_refusal", "source_name", "result_units", "verify_readable", "grid_dimensions", "WITHOUT_INDEXES"]

# xarray reads every dimension coordinate when it opens a file, to index it: the grid's axes and
# the padded wave numbers among them, an O(grid) read.  A reader that looks nothing up by label
# (collect; analysis selects by position) opens without them where xarray allows it (2025.x on).
WITHOUT_INDEXES = ({"create_default_indexes": False}
                   if "create_default_indexes" in inspect.signature(xr.open_dataset).parameters else {})

REQUIRED_ATTRS = ("run_id", "job", "wavesweep_version")


def open_result(path, require: tuple[str, ...] = (), field: str = "RUN.nc", verify: str = "file",
                surfaces: bool = False) -> xr.Dataset:
    """The result at ``path`` as a lazily loaded dataset (close it, or use it
    in a ``with`` block).  ``require``: variables that must be present;
    ``field`` names the argument in error messages.  ``verify``: ``"file"``
    reads every variable of up to VERIFY_MAX_ELEMENTS elements (a damaged
    block anywhere is refused now); ``"used"`` only those without a grid or
    snapshot dimension (:func:`grid_dimensions`): a caller that reads no
    grid-sized array (``collect``) then pays nothing that grows with the
    grid, and a damaged grid-sized array fails when (if ever) it is read.
    ``surfaces``: whether the caller reads a result of coupled surfaces (a
    ``surface`` dimension); without it such a result is refused, one line."""
    if isinstance(path, xr.Dataset):
        ds = path
    else:
        path = input_file(path, field, "file")   # a FIFO, a device or a folder: refused, never opened
        try:
            ds = xr.open_dataset(path, engine="netcdf4")
        except AttributeError as e:   # netCDF4's error for an attribute HDF5 cannot read
            raise JobError(field, f"{_name(path)}: its attributes cannot be read, the file is damaged "
                                  f"({' '.join(str(e).split())}); run the job again") from None
        except RuntimeError as e:   # netCDF4's HDF error: an index coordinate read at opening failed
            where = _unreadable_variable(path)
            raise JobError(field, f"{_name(path)}: {f'variable {where!r} ' if where else ''}cannot be "
                                  f"read, the file is damaged ({' '.join(str(e).split())}); "
                                  "run the job again") from None
        except (OSError, ValueError) as e:
            raise JobError(field, f"{str(path)!r} is not a readable netCDF file "
                                  f"({' '.join(str(e).split())})") from None
    missing = [a for a in REQUIRED_ATTRS if a not in ds.attrs]
    if missing:
        ds.close()
        raise JobError(field, f"{_name(path)} is not a result of wavesweep (no {', '.join(missing)} "
                              "attribute); give a file written by `wavesweep run` or `work`")
    if "surface" in ds.dims and not surfaces:
        ds.close()
        raise JobError(field, coupled_refusal(path))
    absent = [v for v in require if v not in ds.variables]
    if absent:
        ds.close()
        raise JobError(field, f"{_name(path)} has no {', '.join(absent)} variable; "
                              "it was written without it (re-run the job with this version)")
    try:
        verify_readable(ds, path, field, skip_dims=grid_dimensions(ds) if verify == "used" else ())
    except JobError:
        ds.close()
        raise
    return ds


# Variables up to this many elements are read (checksums verified) when a
# result is opened; larger ones (density frames) are streamed and checked by
# their readers.
VERIFY_MAX_ELEMENTS = 2**22
# netCDF's default fill values (NC_FILL_DOUBLE, NC_FILL_FLOAT in netCDF-C's netcdf.h; by
# itemsize): what a block absent from a variable's chunk index reads as.  The writer fills
# every block (variables that may stay unwritten declare NaN as their fill value).
NETCDF_DEFAULT_FILL = {8: np.float64(9.9692099683868690e36), 4: np.float32(9.9692099683868690e36)}
# Rounding allowed around [0, 1] for probabilities (norm, absorbed).
PROBABILITY_SLACK = 1e-6


def grid_dimensions(ds: xr.Dataset) -> set[str]:
    """The dimensions that grow with the grid or the snapshots: the grid's
    axes (the snapshot grid, ``<axis>_full``, the padded ``k_<axis>``) and
    ``snapshot_time``."""
    axes = str(ds.attrs.get("grid_axes", "")).split() or \
        [str(d) for d in (ds["potential"].dims if "potential" in ds.variables else ())]
    return {"snapshot_time", *axes, *(f"{n}_full" for n in axes), *(f"k_{n}" for n in axes)}


def verify_readable(ds: xr.Dataset, path, field: str = "RUN.nc", skip_dims=()) -> None:
    """Read every variable of up to VERIFY_MAX_ELEMENTS elements: a block
    whose HDF5 checksum (results are written with Fletcher-32) or
    compression fails is one line naming the file and the variable; and
    ``norm`` and ``absorbed`` must be probabilities (in [0, 1] to rounding):
    a file without checksums can still be caught holding nonsense there."""
    skip_dims = set(skip_dims)
    for name, var in ds.variables.items():
        if var.size > VERIFY_MAX_ELEMENTS or skip_dims.intersection(var.dims):
            continue
        try:
            values = var.values
        except (RuntimeError, OSError, ValueError) as e:
            raise JobError(field, f"{_name(path)}: variable {name!r} cannot be read, the file is damaged "
                                  f"({' '.join(str(e).split())}); run the job again") from None
        if values.dtype.kind == "f" and values.size and np.any(values == NETCDF_DEFAULT_FILL[values.dtype.itemsize]):
            # a chunk missing from a damaged index reads as the default fill value, without an error
            raise JobError(field, f"{_name(path)}: variable {name!r} has blocks that read as never written, "
                                  "the file is damaged; run the job again")
        if name in ("norm", "absorbed") and values.size:
            lo, hi = float(values.min()), float(values.max())
            if not (-PROBABILITY_SLACK <= lo and hi <= 1 + PROBABILITY_SLACK):
                raise JobError(field, f"{_name(path)}: variable {name!r} holds {hi if hi > 1 else lo:.6g}, "
                                      "which is not a probability: the file is damaged; run the job again")


def _unreadable_variable(path) -> str | None:
    """The first variable of the file at ``path`` whose data cannot be read
    (coordinates first: xarray reads those when it opens a file)."""
    import netCDF4   # lazy: read only to diagnose a damaged file (xarray loads its own engine)

    try:
        with netCDF4.Dataset(path) as nc:
            names = sorted(nc.variables, key=lambda n: n not in nc.dimensions)
            for name in names:
                var = nc.variables[name]
                if var.size > VERIFY_MAX_ELEMENTS:
                    continue
                try:
                    var[...]
                except (RuntimeError, OSError, ValueError):
                    return name
    except (RuntimeError, OSError, ValueError):
        return None
    return None


def result_units(ds: xr.Dataset) -> dict:
    """Factors from job units to atomic units and labels, from the attributes."""
    a = ds.attrs
    return {
        "length": float(a.get("length_to_bohr", 1.0)),
        "energy": float(a.get("energy_to_hartree", 1.0)),
        "time": float(a.get("time_to_atomic", 1.0)),
        "mass": float(a.get("mass_to_electron_mass", 1.0)),
        "length_label": str(a.get("units_length", "bohr")),
        "energy_label": str(a.get("units_energy", "hartree")),
        "time_label": str(a.get("units_time", "hbar/E_h")),
    }


def source_name(ds: xr.Dataset) -> str:
    """The file a dataset was read from, quoted, for messages ("the dataset"
    for one made in memory)."""
    source = ds.encoding.get("source") if isinstance(ds, xr.Dataset) else None
    return repr(os.fspath(source)) if source else "the dataset"


def coupled_refusal(path) -> str:
    """The one line that refuses a result of coupled surfaces to a command that does not analyse them yet."""
    return (f"{_name(path)} is a result of coupled surfaces (a 'surface' dimension), which this command "
            "does not analyse yet; read it with xarray (xr.open_dataset); the per-surface commands come next")


def _name(path) -> str:
    return repr(os.fspath(path)) if not isinstance(path, xr.Dataset) else "the dataset"
