"""Streaming netCDF writer for one run's result dataset.

Density snapshots (float32, uncompressed: see FRAME_COMPRESSION) and scalar
samples are buffered and written a chunk at a time (blocks of rows along
``snapshot_time`` and ``time``, bounded in bytes, so memory does not grow with
the duration); every variable is defined before any is written (one switch
out of netCDF's define mode).  The file is written under a temporary name in the
output folder, flushed, fsync'ed and renamed into place when complete (an
HDF5 file cut off mid-write can be unreadable, so a reader never sees one).

For checkpoints (:mod:`wavesweep.io.checkpoint`) the writer can close its
partial file, copy it away (fsync'ed, renamed into place) and reopen it for
append (:meth:`ResultWriter.save_copy`), and a resumed run starts a writer
from such a copy at the recorded position (:meth:`ResultWriter.resume`).

All values are written in the job's units; every coordinate and variable has
``units`` and ``long_name`` attributes (CF conventions).

A write that fails for lack of room (ENOSPC / EDQUOT, or netCDF4's opaque
"NetCDF: HDF error" on a folder found full, :mod:`wavesweep.io.diskspace`)
raises :class:`~wavesweep.errors.DiskFull` naming the file, the bytes free
and the bytes the rest of the file needs from its shapes; the caller's
:meth:`ResultWriter.abort` then removes the partial file.
"""
from __future__ import annotations

import errno
import os
import shutil
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from ..errors import DiskFull, JobError
from ..observables import SCALARS
from .atomic import atomic_output, atomic_rename, temporary_path
from .diskspace import NO_SPACE, disk_full_from, out_of_space
from .record import DETECTOR_VALUES, FINAL_DETECTOR_VALUES

__all__ = ["ResultWriter", "copy_file"]


def copy_file(src: Path, dst: Path) -> None:
    """Copy ``src`` to ``dst`` in the kernel (``copy_file_range``: a
    reflink on filesystems that have them), else with ``shutil``."""
    try:
        with open(src, "rb") as fin, open(dst, "wb") as fout:
            n = os.fstat(fin.fileno()).st_size
            done = 0
            while done < n:
                k = os.copy_file_range(fin.fileno(), fout.fileno(), n - done)
                if k == 0:
                    break
                done += k
            if done == n:
                return
    except (OSError, AttributeError):
        pass
    shutil.copyfile(src, dst)



def _size(path) -> int:
    try:
        return os.stat(path).st_size
    except OSError:
        return 0


def _without_potential(layout: dict) -> dict:
    """The layout without its large arrays (written once, not kept for the whole run)."""
    return {k: v for k, v in layout.items() if k not in ("potential", "coupling_potential", "record")}


# the scalars a coupled run records per surface (the rest, the energy, is the total)
PER_SURFACE = ("norm", "x_mean", "x_std", "p_mean")

# Chunks along the unlimited time dimensions: samples in blocks of up to
# SERIES_CHUNK_ROWS rows and SERIES_CHUNK_BYTES, snapshots (buffered and written
# a block at a time) up to SNAPSHOT_CHUNK_FRAMES frames and SNAPSHOT_CHUNK_BYTES
# before compression: a block is one HDF5 call and one checksum (one zlib stream
# where a variable is compressed) instead of one per row, and a frame read back
# costs at most a quarter MiB read (measured: a 4096-point frame cost 210-300 us
# written alone, ~100 us in blocks of 8 or more, most of it zlib, then dropped:
# FRAME_COMPRESSION).  A frame larger than the cap is a chunk of its own and is
# written as it comes, as before.
SERIES_CHUNK_ROWS = 1024
SERIES_CHUNK_BYTES = 1 << 18
# Samples are buffered up to ResultWriter.block rows or this many bytes (see _sample_block).
SAMPLE_BUFFER_BYTES = 16 << 20
SNAPSHOT_CHUNK_FRAMES = 64
SNAPSHOT_CHUNK_BYTES = 1 << 18
# Snapshot frames are stored uncompressed (Fletcher-32 still guards every chunk): a
# split-operator density is never exactly zero (FFT round-off puts ~1e-34 in every
# point), so its float32 mantissas are noise; zlib level 4 with shuffle shrank 16 KB
# frames of a 1D run only 1.33x and cost ~300 us a frame (55 MB/s), 0.6 FFT pairs
# a step at a frame every 20 steps of a 4096-point run (whole run 153 -> 124 ms, the
# file 1.94 -> 2.46 MB).  The final psi likewise (zlib 4 shrank it 1.03x, at ~1.3 ms
# for a 4096-point psi: 7 % of a small run's fixed cost).
FRAME_COMPRESSION: dict = {}


class ResultWriter:
    """Writes the result of one run.

    Parameters
    ----------
    path : final file path
    layout : dict with keys
        ``axes``: list of (name, coords_job_units, long_name);
        ``stride``: snapshot decimation; ``units``: dict of unit labels by kind
        (length, time, energy, momentum, density, flux);
        ``detectors``: list of (name, axis_name, position_job_units);
        ``faces``: list of absorbing face names (the result's ``boundary`` coordinate); ``potential``: static V (job units,
        full grid); ``autocorrelation``: bool; ``final_state``: bool;
        ``detector_amplitude``: bool, psi at each detector per sample (1D);
        ``screens``: None, or ``{"names": [...], "normal": axis name,
        "transverse": [axis names]}``: the resolved detectors, a ``screen``
        dimension, ``screen_flux(time, screen, *transverse)`` (the samples'
        ``screen_flux``, on the snapshot grid's transverse coordinates) and
        ``screen_probability(screen, *transverse)``, its time integral,
        written at :meth:`close`;
        ``spectra``: None, or the same for the 2D/3D detectors recording a
        spectrum's input: a ``spectrum_detector`` dimension and
        ``spectrum_psi_*``/``spectrum_dpsi_*(time, spectrum_detector,
        *transverse)`` on the full grid's transverse coordinates (the
        samples' ``spectrum_psi``/``spectrum_dpsi``), and from ``record``
        psi0 beyond each (``spectrum_initial_beyond_*``);
        ``volkov``: bool, ``field_momentum``, ``field_excursion`` ((time,) in
        1D, (time, axis) in 2D/3D) and ``field_phase`` per sample;
        ``snapshot_psi``: bool, psi (float32 parts) with each snapshot;
        ``surfaces``: None, or the names of coupled surfaces: a ``surface``
        dimension (coordinate: the names) leads the grid axes of ``density``,
        ``potential`` (each surface's V_ss) and psi and follows ``time`` in
        ``norm``, ``x_mean``, ``x_std``, ``p_mean``, ``flux``,
        ``detector_psi_*`` and ``absorbed`` (``energy`` is the total);
        ``coupling_potential``: ``{"A,B": V_AB}`` (job units, full grid),
        each coupled pair's static off-diagonal element;
        ``adiabatic``: None, or ``{"states": S, "comment": text}``: a
        ``state`` dimension (coordinate 0..S-1) and ``population_adiabatic``
        (time, state), the samples' ``population_adiabatic`` values
        (record.adiabatic), ``comment`` its phase convention;
        ``expected``: optional ``{"samples": n, "snapshots": m}``, the run's
        totals, so that a full disk can be told how much the file still needs.
        ``record``: what analysis needs of the set-up
        (:func:`wavesweep.setup.analysis_record`; its ``attrs`` go into
        ``attrs``), written once.
    attrs : global attributes written at open (the job text, units, ...).
    """

    block = SERIES_CHUNK_ROWS  # samples buffered before a write, at most (see _sample_block)

    def __init__(self, path, layout: dict, attrs: dict):
        self.path = Path(path)
        self.tmp = temporary_path(self.path, ".part", unique=False)
        self.layout = _without_potential(layout)   # written once; not kept for the whole run
        self._buf: list[dict] = []
        self._snaps: list[tuple] = []
        self._n_time = 0
        self._n_snap = 0
        self._pending: list[tuple] = []
        self.ds = self._open("w")
        try:
            potential = np.asarray(layout["potential"])
            with self._room(potential.size * potential.itemsize):
                self._define(layout, attrs)
                self._write_pending()
        except Exception:
            self.abort()
            raise

    @classmethod
    def resume(cls, path, layout: dict, source, n_time: int, n_snap: int,
               attrs: dict | None = None) -> "ResultWriter":
        """A writer continuing from ``source``, a copy of the partial file
        taken at a checkpoint that held ``n_time`` samples and ``n_snap``
        snapshots: the copy becomes the temporary file again, opened for
        append at that position (later writes overwrite anything beyond).
        ``attrs`` (the global attributes of the job that continues it)
        are written again."""
        self = cls.__new__(cls)
        self.path = Path(path)
        self.tmp = temporary_path(self.path, ".part", unique=False)
        self.layout = _without_potential(layout)
        self._buf = []
        self._snaps = []
        self._pending = []
        self._n_time = int(n_time)
        self._n_snap = int(n_snap)
        try:
            with self._room(_size(source)):
                copy_file(Path(source), self.tmp)
        except DiskFull:
            self.tmp.unlink(missing_ok=True)
            raise
        except OSError as e:
            self.tmp.unlink(missing_ok=True)
            raise JobError("--output", f"cannot write {str(self.tmp.parent)!r}: "
                                       f"{e.strerror or e}; choose another folder with -o") from None
        self.ds = self._open("a")
        chunking = self.ds["density"].chunking()   # the copy's: an older file's frames are chunks of one
        self.frames_per_block = 1 if chunking == "contiguous" else int(chunking[0])
        if attrs and "dpsi_units" in attrs and "dpsi_units" not in self.ds.ncattrs():
            self._dpsi_to_job_units(n_time)
        if attrs:
            self.ds.setncatts({k: v for k, v in attrs.items() if v is not None})
        return self

    def _dpsi_to_job_units(self, n_time: int) -> None:
        """A checkpoint's copy written before the ``dpsi_units`` attribute
        (:data:`~wavesweep.io.record.DPSI_UNITS_VERSION`): its first
        ``n_time`` rows of dpsi times (length unit / bohr)^2, as the samples
        the resumed run writes, so the file holds one unit throughout (in
        blocks of rows: a spectrum plane is MiBs a sample)."""
        ncattrs = self.ds.ncattrs()
        factor = float(self.ds.getncattr("length_to_bohr")) ** 2 if "length_to_bohr" in ncattrs else 1.0
        if factor == 1.0 or not n_time:
            return
        for name in ("detector_dpsi_real", "detector_dpsi_imag", "spectrum_dpsi_real", "spectrum_dpsi_imag"):
            if name in self.ds.variables:
                var = self.ds[name]
                rows = max(1, SAMPLE_BUFFER_BYTES // max(1, 8 * int(np.prod(var.shape[1:]))))
                for i0 in range(0, n_time, rows):
                    i1 = min(n_time, i0 + rows)
                    var[i0:i1] = np.asarray(var[i0:i1]) * factor

    def _open(self, mode: str):
        import netCDF4  # lazy: netCDF4/HDF5 load with the first result file, not with the module
        try:
            if mode == "w":
                return netCDF4.Dataset(self.tmp, "w", format="NETCDF4")
            return netCDF4.Dataset(self.tmp, mode)
        except OSError as e:  # permissions, a folder that vanished: the input's; a full disk is not
            # HDF5 may say EACCES when it cannot create a file on a full disk: in a folder the
            # permissions let us write, that is judged by the room there (a probe), not believed
            opaque = e.errno == errno.EACCES and os.access(self.tmp.parent, os.W_OK)
            if e.errno in NO_SPACE or (opaque and out_of_space(RuntimeError(str(e)), self.tmp.parent,
                                                                self._remaining_bytes() or 0)):
                raise disk_full_from(e, self.path, 0, more_bytes=self._remaining_bytes()) from None
            raise JobError("--output", f"cannot write {str(self.tmp.parent)!r}: "
                                       f"{e.strerror or e}; choose another folder with -o") from None

    # -- room on the disk ----------------------------------------------------
    def _n_surfaces(self) -> int:
        return len(self.layout.get("surfaces") or ()) or 1

    def _frame_bytes(self) -> int:
        lay = self.layout
        s = lay["stride"]
        frame = 4 * int(np.prod([len(np.asarray(a[1])[::s]) for a in lay["axes"]])) * self._n_surfaces()
        return frame * (3 if lay.get("snapshot_psi") else 1)

    def _row_bytes(self) -> int:
        lay = self.layout
        per_detector = 3 if lay.get("detector_amplitude") else 1
        return 8 * (1 + self._n_surfaces() * (len(lay.get("scalars", SCALARS)) + per_detector * len(lay["detectors"])
                                              + len(lay["faces"])) + 2 + len(lay.get("frame_axes") or ())
                    + (lay["adiabatic"]["states"] if lay.get("adiabatic") else 0)) + self._screen_row_bytes() \
            + self._spectrum_row_bytes()

    def _screen_points(self) -> list[int]:
        """The transverse points of the screens' profiles (the snapshot grid's)."""
        lay = self.layout
        return [len(np.asarray(a[1])[::lay["stride"]]) for a in lay["axes"]
                if a[0] in lay["screens"]["transverse"]]

    def _screen_row_bytes(self) -> int:
        screens = self.layout.get("screens")
        return 0 if not screens else 8 * len(screens["names"]) * int(np.prod(self._screen_points()))

    def _remaining_bytes(self) -> int | None:
        """Bytes of data the file still needs from its shapes (before
        compression): the snapshots and samples not yet written (those
        still buffered count), and the final state; None when the layout
        does not give the run's totals."""
        expected = self.layout.get("expected")
        if not expected:
            return None
        n_time, n_snap = self._n_time, self._n_snap   # written: a buffered block still needs its room
        rest = max(0, int(expected["snapshots"]) - n_snap) * self._frame_bytes()
        rest += max(0, int(expected["samples"]) - n_time) * self._row_bytes()
        if self.layout.get("final_state", True):
            rest += 16 * int(np.prod([len(np.asarray(a[1])) for a in self.layout["axes"]])) * self._n_surfaces()
        return rest

    @contextmanager
    def _room(self, need_bytes: int, target=None, what: str = "the result", **words):
        """Turn a write failure for lack of room into DiskFull (a write of
        about ``need_bytes`` into ``target``, default the result)."""
        try:
            yield
        except (DiskFull, JobError):
            raise
        except (OSError, RuntimeError) as e:
            rest = self._remaining_bytes() if target is None else None
            full = disk_full_from(e, target or self.path, int(need_bytes), what=what,
                                  more_bytes=max(int(need_bytes), rest or 0), **words)
            if full is None:
                raise
            raise full from e

    @property
    def position(self) -> tuple[int, int]:
        """(scalar samples, snapshots) written or buffered so far."""
        return self._n_time + len(self._buf), self._n_snap + len(self._snaps)

    # -- chunk shapes ----------------------------------------------------------
    def _expected(self, what: str) -> int | None:
        expected = self.layout.get("expected")
        return int(expected[what]) if expected and expected.get(what) else None

    def _rows_per_chunk(self, row_bytes: int, what: str, cap_rows: int, cap_bytes: int) -> int:
        """Rows (samples or snapshots) per chunk along an unlimited time
        dimension: as many as ``cap_bytes`` hold (at most ``cap_rows``), no
        more than the run will write (a short run's chunks stay small)."""
        rows = min(cap_rows, max(1, cap_bytes // max(1, row_bytes)))
        total = self._expected(what)
        return max(1, min(rows, total)) if total else rows

    def _series_chunks(self, dims, itemsize: int) -> list[int]:
        """Chunk shape of a variable along ``time`` or ``snapshot_time``:
        a block of rows, each whole (a dimension of length 0 counts 1)."""
        rest = [max(1, len(self.ds.dimensions[d])) for d in dims[1:]]
        what = "samples" if dims[0] == "time" else "snapshots"
        cap = SERIES_CHUNK_BYTES if what == "samples" else SNAPSHOT_CHUNK_BYTES
        rows = self._rows_per_chunk(itemsize * int(np.prod(rest)), what,
                                    SERIES_CHUNK_ROWS if what == "samples" else SNAPSHOT_CHUNK_FRAMES, cap)
        return [rows, *rest]

    # -- layout ------------------------------------------------------------
    def _define(self, lay, attrs):
        ds, u, s = self.ds, lay["units"], lay["stride"]
        ds.setncatts({k: v for k, v in attrs.items() if v is not None})
        ds.Conventions = "CF-1.8"
        full_shape = []
        for name, coords, long in lay["axes"]:
            c = np.asarray(coords)[::s]
            ds.createDimension(name, len(c))
            v = self._var(name, "f8", (name,))
            self._put(v, c)
            v.units, v.long_name, v.axis = u["length"], long, name.upper() if name in "xyz" else "X"
            full_shape.append(len(coords))
        names = [a[0] for a in lay["axes"]]
        surfaces = lay.get("surfaces")
        lead = ("surface",) if surfaces else ()   # before the grid axes
        if surfaces:
            ds.createDimension("surface", len(surfaces))
            v = self._var("surface", str, ("surface",))
            v.long_name, v.units = "potential-energy surface (electronic state)", "1"
            for i, name in enumerate(surfaces):
                self._put(v, name, i)
        ds.createDimension("time", None)
        ds.createDimension("snapshot_time", None)
        self._coord("time", "time", u["time"], "time of the scalar samples")
        self._coord("snapshot_time", "snapshot_time", u["time"], "time of the density snapshots")
        ndet, nb = len(lay["detectors"]), len(lay["faces"])
        ds.createDimension("detector", ndet if ndet else None)
        ds.createDimension("boundary", nb if nb else None)
        d = self._var("detector", str, ("detector",))
        d.long_name, d.units = "detector name", "1"
        for i, det in enumerate(lay["detectors"]):
            self._put(d, det[0], i)
        dx = self._var("detector_x", "f8", ("detector",))
        dx.units, dx.long_name = u["length"], "detector position along its axis"
        da = self._var("detector_axis", str, ("detector",))
        da.units, da.long_name = "1", "axis the detector is perpendicular to"
        if ndet:
            self._put(dx, np.array([det[2] for det in lay["detectors"]], float))
        for i, det in enumerate(lay["detectors"]):
            self._put(da, det[1], i)
        b = self._var("boundary", str, ("boundary",))
        b.long_name, b.units = "absorbing face", "1"
        for i, face in enumerate(lay["faces"]):
            self._put(b, face, i)
        frame = ([len(surfaces)] if surfaces else []) + [len(np.asarray(a[1])[::s]) for a in lay["axes"]]
        self.frames_per_block = self._rows_per_chunk(4 * int(np.prod(frame)), "snapshots",
                                                     SNAPSHOT_CHUNK_FRAMES, SNAPSHOT_CHUNK_BYTES)
        chunks = [self.frames_per_block, *frame]
        dens = self._var("density", "f4", ("snapshot_time", *lead, *names), chunksizes=chunks, **FRAME_COMPRESSION)
        dens.units = u["density"]
        dens.long_name = "probability density |psi|^2" + (" on each surface" if surfaces else "")
        if lay.get("column") is not None:
            k = lay["column"][0]
            rest = tuple(n for j, n in enumerate(names) if j != k)
            col = self._var("column_density", "f4", ("snapshot_time", *rest),
                            chunksizes=[c for j, c in enumerate(chunks) if j != k + 1], **FRAME_COMPRESSION)
            col.units = f"{u['length']}-{len(rest)}"
            col.long_name = f"probability density integrated along {names[k]} (column density)"
        if lay.get("snapshot_psi"):
            for part in ("real", "imag"):
                v = self._var(f"psi_snapshot_{part}", "f4", ("snapshot_time", *names), chunksizes=chunks,
                              **FRAME_COMPRESSION)
                v.units = f"{u['length']}-{len(names) / 2:g}"
                v.long_name = f"{part} part of psi at the snapshot"
        pot = self._var("potential", "f8", (*lead, *names), zlib=True, complevel=4)
        pot.units = u["energy"]
        pot.long_name = "static part of the potential V" + (" on each surface (diagonal V_ss)" if surfaces else "")
        cut = tuple(slice(None, None, s) for _ in names)
        self._put(pot, np.asarray(lay["potential"])[(slice(None),) * len(lead) + cut])
        if lay.get("coupling_potential"):
            pairs = list(lay["coupling_potential"])
            ds.createDimension("pair", len(pairs))
            v = self._var("pair", str, ("pair",))
            v.long_name, v.units = "coupled surfaces, their names separated by a comma", "1"
            for i, pair in enumerate(pairs):
                self._put(v, pair, i)
            v = self._var("coupling_potential", "f8", ("pair", *names), zlib=True, complevel=4)
            v.units = u["energy"]
            v.long_name = "static off-diagonal element V_ab of each coupled pair (pair, grid axes)"
            self._put(v, np.stack([np.asarray(lay["coupling_potential"][p])[cut] for p in pairs]))
        for scalar in lay.get("scalars", SCALARS):   # declared with the observables
            each = bool(surfaces) and scalar.name in PER_SURFACE
            v = self._var(scalar.name, "f8", ("time", "surface") if each else ("time",))
            v.units = u[scalar.kind] if scalar.kind else "1"
            v.long_name = scalar.long_name.format(axis=names[0]) + (", per surface" if each else "")
            if surfaces and scalar.name == "energy":
                v.long_name = "<H> of all surfaces (couplings included), per unit total norm"
        if lay.get("adiabatic"):
            self._define_adiabatic(int(lay["adiabatic"]["states"]), str(lay["adiabatic"]["comment"]))
        f = self._var("flux", "f8", ("time", *lead, "detector"))
        f.units, f.long_name = u["flux"], "probability current through the detector"
        f.coordinates = "detector_x detector_axis"  # CF: auxiliary coordinates of `detector`
        if lay.get("detector_amplitude") and ndet:
            for part in ("real", "imag"):
                v = self._var(f"detector_psi_{part}", "f8", ("time", *lead, "detector"))
                v.units = f"{u['length']}-0.5"
                v.long_name = f"{part} part of psi at the detector"
                v.coordinates = "detector_x detector_axis"
        if lay.get("detector_amplitude") and ndet and not surfaces:
            for part in ("real", "imag"):   # for the surface-flux spectrum (analysis.surface_flux)
                v = self._var(f"detector_dpsi_{part}", "f8", ("time", *lead, "detector"))
                v.units = f"{u['length']}-1.5"
                v.long_name = f"{part} part of dpsi/dx at the detector"
                v.coordinates = "detector_x detector_axis"
        if lay.get("volkov"):   # a driving (uniform) force: see wavesweep.volkov
            each_axis = self._axis_dimension(names) if len(names) > 1 else ()   # 2D/3D: per axis
            for name, unit, long, dims in (("field_momentum", u["momentum"], "momentum the uniform forces gave, "
                                            "int_0^t F dt (-q A(t))", ("time", *each_axis)),
                                           ("field_excursion", u["length"], "classical excursion int_0^t "
                                            "field_momentum / m dt", ("time", *each_axis)),
                                           ("field_phase", "1", "ponderomotive phase int_0^t |field_momentum|^2 "
                                            "/ 2m dt (per hbar)", ("time",))):
                v = self._var(name, "f8", dims)
                v.units, v.long_name = unit, long
        if lay.get("spectra"):
            self._define_spectra(lay["spectra"], u, names, lay["axes"], s, lay.get("record"))
        if lay.get("screens"):
            self._define_screens(lay["screens"], u, len(names))
        if lay.get("frame_axes"):   # a falling grid: lab position = grid coordinate + frame_offset
            self._define_frame_offset(lay["frame_axes"], u)
        a = self._var("absorbed", "f8", ("time", *lead, "boundary"))
        a.units, a.long_name = "1", "probability removed at the face, cumulative"
        if lay.get("autocorrelation", True):
            for part in ("real", "imag"):
                v = self._var(f"autocorrelation_{part}", "f8", ("time",))
                v.units, v.long_name = "1", f"{part} part of <psi(0)|psi(t)>"
        # the full grid: the snapshot axes, or (decimated snapshots) axes of their own
        state_dims = names if s == 1 else [f"{n}_full" for n in names]
        if s != 1 and (lay.get("final_state", True) or lay.get("record") is not None):
            for (name, coords, long), n in zip(lay["axes"], state_dims):
                self._full_axis(n, coords, long, u)
        if lay.get("record") is not None:
            self._define_record(lay["record"], state_dims, u)
        if lay.get("final_state", True):
            for part in ("real", "imag"):
                v = self._var(f"psi_{part}", "f8", (*lead, *state_dims), **FRAME_COMPRESSION)
                v.units = f"{u['length']}-{len(names) / 2:g}"
                v.long_name = f"{part} part of the final wave function"

    def _define_screens(self, screens: dict, u: dict, ndim: int):
        """``screen`` (the resolved detectors' names), ``screen_flux`` and
        ``screen_probability`` on the transverse snapshot axes."""
        ds = self.ds
        self._name_dimension("screen", screens["names"], "resolved detector (screen) name")
        across = tuple(screens["transverse"])
        per_area = f"{u['length']}-{ndim - 1}"
        v = self._var("screen_flux", "f8", ("time", "screen", *across), zlib=True, complevel=4,
                      chunksizes=self._per_detector_chunks(self._screen_points()))
        v.units = f"{per_area} {u['time']}-1"
        v.long_name = (f"probability current density through the screen (across {screens['normal']}), "
                       f"per unit {'length' if ndim == 2 else 'area'} of the screen")
        v = self._var("screen_probability", "f8", ("screen", *across), fill_value=np.nan)
        v.units = per_area
        v.long_name = (f"time integral of screen_flux over the run: probability per unit "
                       f"{'length' if ndim == 2 else 'area'} of the screen that crossed it (net)")
        v.comment = ("trapezoid rule over the samples (record.every); accurate when the samples resolve the "
                     "flux and the flux is small at the run's start and end")

    def _screen_integral(self) -> None:
        """screen_probability from the file's screen_flux samples (all of
        them, also a resumed run's earlier ones), a block of samples at a
        time: the trapezoid rule, as ``arrivals`` integrates the total flux."""
        ds = self.ds
        t = np.asarray(ds["time"][:self._n_time], float)   # a resumed run's rows beyond it are overwritten
        total = np.zeros(ds["screen_probability"].shape)
        if t.size > 1:
            block = max(2, 2 ** 22 // max(1, total.size))
            for i0 in range(0, t.size - 1, block - 1):
                i1 = min(t.size, i0 + block)
                f = np.asarray(ds["screen_flux"][i0:i1], float)
                dt = np.diff(t[i0:i1]).reshape(-1, *([1] * total.ndim))
                total += (0.5 * (f[1:] + f[:-1]) * dt).sum(axis=0)
        ds["screen_probability"][:] = total

    def _define_adiabatic(self, n_states: int, comment: str):
        """``state`` (0..S-1, ascending local energy) and ``population_adiabatic``
        (time, state); ``comment``: how the states' phases are fixed."""
        self.ds.createDimension("state", n_states)
        v = self._var("state", "i4", ("state",))
        self._put(v, np.arange(n_states))
        v.long_name = "adiabatic state, in ascending order of the local potential matrix's eigenvalue"
        v.units = "1"
        v = self._var("population_adiabatic", "f8", ("time", "state"))
        v.units = "1"
        v.long_name = "probability on the adiabatic state, sum_r |sum_a U_ak(r)^* psi_a(r)|^2 dV"
        v.comment = comment

    def _full_axis(self, dim: str, coords, long: str, u: dict) -> None:
        """A full-grid axis ``dim`` (under decimated snapshots: ``<axis>_full``), made once."""
        if dim in self.ds.dimensions:
            return
        self.ds.createDimension(dim, len(coords))
        v = self._var(dim, "f8", (dim,))
        self._put(v, coords)
        v.units, v.long_name = u["length"], f"{long} (full grid)"

    def _name_dimension(self, dim: str, names, long_name: str) -> None:
        """A dimension ``dim`` whose coordinate holds ``names`` (strings), made once."""
        if dim in self.ds.dimensions:
            return
        self.ds.createDimension(dim, len(names))
        v = self._var(dim, str, (dim,))
        v.long_name, v.units = long_name, "1"
        for i, name in enumerate(names):
            self._put(v, name, i)

    def _axis_dimension(self, axes) -> tuple[str]:
        """The ``axis`` dimension (the grid axes' names), made once."""
        self._name_dimension("axis", axes, "grid axis")
        return ("axis",)

    def _define_spectra(self, spectra: dict, u: dict, names, axes, stride: int, record: dict | None):
        """``spectrum_detector`` (the names of the 2D/3D detectors recording
        a spectrum's input) and ``spectrum_psi``/``spectrum_dpsi`` (real and
        imaginary parts) on the full grid's transverse axes (no stride: a
        decimated line would alias its transverse momenta)."""
        ds = self.ds
        self._name_dimension("spectrum_detector", spectra["names"],
                             "name of a detector recording psi and dpsi/dn along it")
        across = []
        for name, coords, long in axes:
            if name not in spectra["transverse"]:
                continue
            dim = name if stride == 1 else f"{name}_full"
            self._full_axis(dim, coords, long, u)
            across.append(dim)
        d = len(names)
        for part in ("real", "imag"):
            for var, power, what in (("spectrum_psi", d / 2, "psi"),
                                     ("spectrum_dpsi", d / 2 + 1, f"dpsi/d{spectra['normal']}")):
                v = self._var(f"{var}_{part}", "f8", ("time", "spectrum_detector", *across),
                              chunksizes=self._per_detector_chunks([len(ds.dimensions[a]) for a in across]))
                v.units = f"{u['length']}-{power:g}"
                v.long_name = f"{part} part of {what} on the detector's {'line' if d == 2 else 'plane'}"
        slabs = (record or {}).get("spectrum_initial_beyond")
        if slabs is not None:   # psi0 beyond each line or plane (the spectrum's b(k, 0)), NaN-padded
            ds.createDimension("spectrum_beyond_point", max(1, *(len(v) for _, v in slabs)))
            v = self._var("spectrum_initial_beyond_first", "i8", ("spectrum_detector",))
            self._put(v, np.array([first for first, _ in slabs], np.int64))
            v.units, v.long_name = "1", (f"grid index along {spectra['normal']} of the first point of "
                                         "spectrum_initial_beyond_real/imag")
            v = self._var("spectrum_initial_beyond_points", "i8", ("spectrum_detector",))
            self._put(v, np.array([len(values) for _, values in slabs], np.int64))
            v.units, v.long_name = "1", f"points along {spectra['normal']} of spectrum_initial_beyond_real/imag"
            n = len(ds.dimensions["spectrum_beyond_point"])
            for part in ("real", "imag"):
                v = self._var(f"spectrum_initial_beyond_{part}", "f8",
                              ("spectrum_detector", "spectrum_beyond_point", *across))
                padded = np.zeros((len(slabs), n, *(len(ds.dimensions[a]) for a in across)))
                for j, (_, values) in enumerate(slabs):
                    padded[j, :len(values)] = getattr(values, part)
                self._put(v, padded)
                v.units = f"{u['length']}-{d / 2:g}"
                v.long_name = (f"{part} part of the initial wave function beyond the detector (away from the "
                               f"packet), {spectra['normal']} first, where above 1e-15 of its peak")

    def _spectrum_row_bytes(self) -> int:
        spectra = self.layout.get("spectra")
        if not spectra:
            return 0
        points = int(np.prod([len(a[1]) for a in self.layout["axes"] if a[0] in spectra["transverse"]]))
        return 32 * len(spectra["names"]) * points

    def _define_frame_offset(self, axes, u):
        """``frame_offset`` (time) in 1D, (time, axis) in 2D/3D, and
        ``snapshot_frame_offset`` on the snapshots' times likewise."""
        extra = self._axis_dimension(axes) if len(axes) > 1 else ()
        for name, dim, when in (("frame_offset", "time", "sample"),
                                ("snapshot_frame_offset", "snapshot_time", "snapshot")):
            v = self._var(name, "f8", (dim,) + extra)
            v.units = u["length"]
            v.long_name = (f"lab position of the falling grid's zero at each {when}: lab position = "
                           "grid coordinate + frame_offset")

    def _define_record(self, rec, full_dims, u):
        """What analysis reads instead of rebuilding the set-up
        (:mod:`wavesweep.io.record`): the initial packet's marginals, psi0 and
        V on the full grid (1D), the Lanczos recurrence of psi0."""
        ds = self.ds
        for dim, (name, (rho, k, w)) in zip(full_dims, rec["marginals"].items()):
            v = self._var(f"initial_position_marginal_{name}", "f8", (dim,))
            self._put(v, rho)
            v.units, v.long_name = "1", f"initial |psi|^2 summed over the other axes, per point along {name}"
            ds.createDimension(f"k_{name}", len(k))
            v = self._var(f"k_{name}", "f8", (f"k_{name}",))
            self._put(v, k)
            v.units, v.long_name = f"{u['length']}-1", f"wave number along {name} (transform padded 4x)"
            v = self._var(f"initial_momentum_marginal_{name}", "f8", (f"k_{name}",))
            self._put(v, w)
            v.units, v.long_name = "1", f"initial momentum distribution along {name}, per wave number sample"
        if rec.get("initial_psi") is not None:
            for part, values in (("real", rec["initial_psi"].real), ("imag", rec["initial_psi"].imag)):
                v = self._var(f"initial_psi_{part}", "f8", tuple(full_dims))
                self._put(v, values)
                v.units = f"{u['length']}-0.5"
                v.long_name = f"{part} part of the initial wave function"
            if tuple(full_dims) != tuple(self.ds["potential"].dimensions):
                v = self._var("potential_full", "f8", tuple(full_dims))
                self._put(v, rec["potential_full"])
                v.units, v.long_name = u["energy"], "static part of the potential V (full grid)"
        # per detector: the few numbers analysis would otherwise take from grid-sized arrays
        if len(ds.dimensions["detector"]) and rec.get("detectors") is not None:
            names = list(rec["detectors"]) + (list(FINAL_DETECTOR_VALUES) if rec.get("final_values") else [])
            for name in names:
                kind, long = DETECTOR_VALUES[name]
                v = self._var(name, "f8", ("detector",), fill_value=np.nan)
                v.units, v.long_name = u.get(kind, "1"), long
                v.coordinates = "detector_x detector_axis"
                if name in rec["detectors"]:
                    self._put(v, rec["detectors"][name])
        if rec.get("potential_min") is not None:
            v = self._var("potential_min", "f8", ())
            self._put(v, rec["potential_min"], ...)
            v.units, v.long_name = u["energy"], "minimum of the static potential on the grid"
        if len(ds.dimensions["detector"]) and rec.get("initial_beyond") is not None:
            # psi0 beyond each detector (the spectrum's b(k, 0)), NaN-padded to the longest
            parts = rec["initial_beyond"]
            ds.createDimension("initial_beyond_point", max(1, *(len(v) for _, v in parts)))   # 0 would be unlimited
            v = self._var("initial_beyond_first", "i8", ("detector",))
            self._put(v, np.array([first for first, _ in parts], np.int64))
            v.units, v.long_name = "1", "grid index of the first point of initial_beyond_real/imag"
            for part in ("real", "imag"):
                v = self._var(f"initial_beyond_{part}", "f8", ("detector", "initial_beyond_point"),
                              fill_value=np.nan)
                padded = np.full((len(parts), len(ds.dimensions["initial_beyond_point"])), np.nan)
                for j, (_, values) in enumerate(parts):
                    padded[j, :len(values)] = getattr(values, part)
                self._put(v, padded)
                v.units = f"{u['length']}-0.5"
                v.long_name = (f"{part} part of the initial wave function beyond the detector (away from the "
                               "packet), where above 1e-15 of its peak; NaN past its end")
        if rec.get("lanczos") is not None:
            alphas, betas = rec["lanczos"][:2]
            factor = rec["energy_factor"]
            ds.createDimension("lanczos_step", len(alphas))
            v = self._var("lanczos_alpha", "f8", ("lanczos_step",))
            self._put(v, np.asarray(alphas) / factor)
            v.units, v.long_name = u["energy"], "diagonal of the Lanczos matrix of H from psi0"
            v = self._var("lanczos_beta", "f8", ("lanczos_step",))
            b = np.full(len(alphas), np.nan)
            b[:len(betas)] = np.asarray(betas) / factor
            self._put(v, b)
            v.units, v.long_name = u["energy"], "off-diagonal of the Lanczos matrix (NaN past the last)"

    def _var(self, name, dtype, dims, **kw):
        """A variable; numeric ones carry HDF5 Fletcher-32 checksums, so that
        a damaged block is an error when read, never a silently wrong number.
        Along ``time`` or ``snapshot_time`` it is chunked in blocks of rows
        (:meth:`_series_chunks`): one chunk per sample made the final write of
        200 samples cost ~145 us a sample (a chunk, its checksum and its
        index entry each)."""
        if dtype is not str:
            kw.setdefault("fletcher32", True)
            if dims and dims[0] in ("time", "snapshot_time") and "chunksizes" not in kw:
                kw["chunksizes"] = self._series_chunks(dims, np.dtype(dtype).itemsize)
        return self.ds.createVariable(name, dtype, dims, **kw)

    def _per_detector_chunks(self, profile) -> list[int]:
        """Chunks of a profile per sample and detector (time, detector,
        *profile): blocks of samples of one detector's whole profile."""
        rows = self._rows_per_chunk(8 * int(np.prod(profile)), "samples", SERIES_CHUNK_ROWS, SERIES_CHUNK_BYTES)
        return [rows, 1, *profile]

    def _put(self, var, value, index=slice(None)) -> None:
        """Write ``value`` into ``var[index]`` once every variable is
        defined (:meth:`_write_pending`): netCDF-4 leaves define mode on
        each write, creating the HDF5 datasets defined so far, so writes
        between definitions cost a mode switch each (measured: 30 variables
        written as defined 10 ms, defined first and then written 5 ms)."""
        self._pending.append((var, index, value))

    def _write_pending(self) -> None:
        pending, self._pending = self._pending, []
        for var, index, value in pending:
            var[index] = value

    def _coord(self, name, dim, unit, long):
        v = self._var(name, "f8", (dim,))
        v.units, v.long_name = unit, long

    # -- appending -----------------------------------------------------------
    def add_sample(self, time: float, values: dict) -> None:
        """One scalar sample (job units), buffered."""
        self._buf.append({"time": time, **values})
        if len(self._buf) >= self._sample_block():
            self._flush_samples()

    def _sample_block(self) -> int:
        """Samples buffered before a write: :attr:`block` (each write costs
        ~100 us of netCDF calls per variable), fewer when a sample's rows
        are large (a 3D spectrum plane of 256^2 points is 2 MiB a sample):
        the buffer holds at most SAMPLE_BUFFER_BYTES."""
        rows = self.__dict__.get("_block_rows")
        if rows is None:
            rows = self._block_rows = max(1, min(self.block, SAMPLE_BUFFER_BYTES // max(1, self._row_bytes())))
        return rows

    def add_snapshot(self, time: float, density: np.ndarray, psi: np.ndarray | None = None,
                     frame_offset=None) -> None:
        """One density frame (job units, full grid; decimated here), psi
        (job units) when the layout stores it, and a falling grid's offset
        (job length unit, per axis).  Frames are buffered (as float32
        copies) and written a chunk at a time (:attr:`frames_per_block`)."""
        s = self.layout["stride"]
        lead = 1 if self.layout.get("surfaces") else 0   # the surface axis is never decimated
        cut = (slice(None),) * lead + tuple(slice(None, None, s) for _ in range(density.ndim - lead))
        column = offset = real = imag = None
        if self.layout.get("column") is not None:   # on the full grid, then decimated like the density
            k, spacing = self.layout["column"]
            column = np.array((density.sum(axis=k, dtype=np.float64) * spacing)[cut[:-1]], np.float32)
        if frame_offset is not None and "snapshot_frame_offset" in self.ds.variables:
            offset = np.asarray(frame_offset, float)
            offset = float(offset[0]) if offset.size == 1 else offset.copy()
        if psi is not None and "psi_snapshot_real" in self.ds.variables:
            real, imag = np.array(psi.real[cut], np.float32), np.array(psi.imag[cut], np.float32)
        # copies: the caller's arrays may change before the block is written
        self._snaps.append((float(time), np.array(density[cut], np.float32), column, offset, real, imag))
        if len(self._snaps) >= self.frames_per_block:
            self._flush_snapshots()

    def _flush_snapshots(self) -> None:
        """The buffered frames, one write per variable."""
        if not self._snaps:
            return
        i0, n = self._n_snap, len(self._snaps)
        ds, frames = self.ds, self._snaps
        with self._room(n * self._frame_bytes()):
            ds["snapshot_time"][i0:i0 + n] = np.array([f[0] for f in frames])
            ds["density"][i0:i0 + n] = np.stack([f[1] for f in frames])
            if frames[0][2] is not None:
                ds["column_density"][i0:i0 + n] = np.stack([f[2] for f in frames])
            if frames[0][3] is not None:
                ds["snapshot_frame_offset"][i0:i0 + n] = np.array([f[3] for f in frames])
            if frames[0][4] is not None:
                ds["psi_snapshot_real"][i0:i0 + n] = np.stack([f[4] for f in frames])
                ds["psi_snapshot_imag"][i0:i0 + n] = np.stack([f[5] for f in frames])
        self._n_snap += n
        self._snaps.clear()

    def flush(self) -> None:
        """Write the buffered samples and snapshots (before a checkpoint's
        copy and at close)."""
        self._flush_snapshots()
        self._flush_samples()

    def _flush_samples(self) -> None:
        if self._buf:
            with self._room(len(self._buf) * self._row_bytes()):
                self._flush()

    def _flush(self) -> None:
        i0, n = self._n_time, len(self._buf)
        ds = self.ds
        ds["time"][i0:i0 + n] = np.array([b["time"] for b in self._buf])
        for key in [s.name for s in self.layout.get("scalars", SCALARS)] + ["autocorrelation_real",
                                                                           "autocorrelation_imag"]:
            if key in ds.variables and key in self._buf[0]:
                ds[key][i0:i0 + n] = np.array([b[key] for b in self._buf])
        if "population_adiabatic" in ds.variables:
            ds["population_adiabatic"][i0:i0 + n, :] = np.array([b["population_adiabatic"] for b in self._buf])
        if len(self.layout["detectors"]):
            ds["flux"][i0:i0 + n, ...] = np.array([b["flux"] for b in self._buf])
            if "detector_psi_real" in ds.variables:
                amp = np.array([b["detector_psi"] for b in self._buf])
                ds["detector_psi_real"][i0:i0 + n, ...] = amp.real
                ds["detector_psi_imag"][i0:i0 + n, ...] = amp.imag
            if "detector_dpsi_real" in ds.variables and "detector_dpsi" in self._buf[0]:
                slope = np.array([b["detector_dpsi"] for b in self._buf])
                ds["detector_dpsi_real"][i0:i0 + n, ...] = slope.real
                ds["detector_dpsi_imag"][i0:i0 + n, ...] = slope.imag
        for key in ("field_momentum", "field_excursion", "field_phase"):
            if key in ds.variables and key in self._buf[0]:
                ds[key][i0:i0 + n] = np.array([b[key] for b in self._buf])
        if "screen_flux" in ds.variables:
            ds["screen_flux"][i0:i0 + n, ...] = np.array([b["screen_flux"] for b in self._buf])
        for key in ("spectrum_psi", "spectrum_dpsi"):
            if f"{key}_real" in ds.variables:
                values = np.array([b[key] for b in self._buf])
                ds[f"{key}_real"][i0:i0 + n, ...] = values.real
                ds[f"{key}_imag"][i0:i0 + n, ...] = values.imag
        if len(self.layout["faces"]):
            ds["absorbed"][i0:i0 + n, ...] = np.array([b["absorbed"] for b in self._buf])
        if "frame_offset" in ds.variables and "frame_offset" in self._buf[0]:
            offset = np.array([b["frame_offset"] for b in self._buf])
            ds["frame_offset"][i0:i0 + n] = offset[:, 0] if offset.shape[1] == 1 else offset
        self._n_time += n
        self._buf.clear()
        ds.sync()

    def set_final_state(self, psi: np.ndarray, scale: float = 1.0) -> None:
        """psi times ``scale`` (to job units), written part by part, a large
        grid an eighth at a time (no temporary of the grid's size)."""
        if "psi_real" in self.ds.variables:
            # an eighth of a large grid at a time; a small one (up to 1 MiB a part) in one write
            rows = psi.shape[0] if 8 * psi.size <= 1 << 20 else max(1, psi.shape[0] // 8)
            with self._room(16 * psi.size):
                for part, name in ((psi.real, "psi_real"), (psi.imag, "psi_imag")):
                    for i in range(0, psi.shape[0], rows):
                        self.ds[name][i:i + rows] = np.multiply(part[i:i + rows], scale, dtype=np.float64)

    def set_detector_values(self, values: dict) -> None:
        """The detectors' final values of the record (name -> one number per
        detector, job units), where the file defined them."""
        for name, v in values.items():
            if name in self.ds.variables:
                self.ds[name][:] = np.asarray(v, float)

    def save_copy(self, dest: Path, tmp: Path | None = None, reopen: bool = True) -> int:
        """Flush the sample buffer, close the file and copy it to ``dest``
        (written as ``tmp``, fsync'ed and renamed: ``dest`` is complete or
        absent); reopen for append unless ``reopen`` is False.  Returns the
        size of the copy in bytes."""
        self.flush()
        with self._room(0):
            self.ds.close()
        try:
            with self._room(_size(self.tmp), target=dest, what="the checkpoint's copy of the result",
                            need="it needs about", basis="the partial result's size"):
                # a torn copy is never left behind
                with atomic_output(dest, ".tmp", unique=False, temporary=tmp) as part:
                    copy_file(self.tmp, part)
                    size = part.stat().st_size
        finally:
            if reopen:
                self.ds = self._open("a")
        return size

    def close(self, attrs: dict | None = None, replace: bool = True) -> Path:
        """Write the closing attributes, close and move into place.  With
        ``replace=False`` an existing final file is left alone and
        :class:`FileExistsError` raised (the temporary file stays, for
        :meth:`abort`)."""
        self.flush()
        with self._room(0):
            if "screen_probability" in self.ds.variables:
                self._screen_integral()
            if attrs:
                self.ds.setncatts({k: v for k, v in attrs.items() if v is not None})
            self.ds.close()
        atomic_rename(self.tmp, self.path, replace=replace)
        return self.path

    def abort(self) -> None:
        """Close and delete the temporary file (nothing partial is left)."""
        try:
            self.ds.close()
        except Exception:
            pass
        try:
            self.tmp.unlink()
        except FileNotFoundError:
            pass
