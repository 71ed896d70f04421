"""What a figure or movie needs to know about a run, read once from its
result file (job units): axes, potential, absorbing layers, detectors, units,
and a streaming reader for the snapshot frames.

A run in a falling frame (``[grid] frame = "free_fall"``) stores where its
grid was: lab position = grid coordinate + ``snapshot_frame_offset`` at each
snapshot.  The scene keeps those offsets per axis (:attr:`Scene.offsets`)
and draws in the lab: :meth:`Scene.lab_coords` gives a frame's lab
positions, :meth:`Scene.visited` the region the grid sweeps over the run.
Detectors and the recorded potential are fixed in the lab (the potential
is recorded at the grid's lab positions at t = 0, where the offset is zero
by construction); absorbing layers belong to the grid and move with it
(:meth:`Scene.layer_span`).

A run on coupled surfaces (a ``surface`` dimension) has a scene with
:attr:`Scene.surfaces` (the names, in the file's order), each surface's
static potential V_ss in :attr:`Scene.surface_potentials` and each coupled
pair's V_ab in :attr:`Scene.couplings`; :attr:`Scene.potential` is then
None, and a frame is (surface, *grid).

Frames are read one at a time with netCDF4 (each frame is one chunk on
disk), so memory does not depend on the number of snapshots.
"""
from __future__ import annotations

import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path

import netCDF4
import numpy as np

from ..errors import JobError
from ..io.results import open_result
from .style import pretty_unit

__all__ = ["Scene", "FrameReader", "read_scene"]

# a falling grid whose visited lab region exceeds this many grid extents
# along an axis is followed by a movie's view along it (a fixed view would
# show the packet as a sliver; 4 keeps the grid at least a quarter of the
# view, common practice for a readable figure rather than a derived number)
FOLLOW_SPAN = 4.0


@dataclass
class Layer:
    face: str          # "x-", "y+", ...
    axis: str
    start: float       # the layer spans [start, stop] along ``axis`` (job length units)
    stop: float


@dataclass
class Scene:
    path: Path
    title: str
    axes: list                       # axis names of the snapshots, e.g. ["x", "y"]
    coords: dict                     # name -> coordinates (job length units)
    radial: bool
    potential: np.ndarray | None     # static V on the snapshot grid (job energy units)
    layers: list = field(default_factory=list)
    detectors: list = field(default_factory=list)   # (name, axis name, position)
    units: dict = field(default_factory=dict)       # length, energy, time, density, flux labels
    n_snapshots: int = 0
    has_psi: bool = False
    # a column scene (column_scene): the frames are summed over this axis of the
    # stored snapshots, ``(name, index among the stored axes, spacing)``
    column: tuple | None = None
    # a falling grid: axis name -> lab offset of the grid at each snapshot
    # (job length units, snapshot_frame_offset); None for a grid fixed in the lab
    offsets: dict | None = None
    # coupled surfaces: their names (None for a run on one surface), name -> static V_ss on the
    # snapshot grid, and pair name ("A,B") -> static off-diagonal V_ab (job energy units)
    surfaces: list | None = None
    surface_potentials: dict | None = None
    couplings: dict | None = None
    # the resolved detectors' names (screens: drawn apart from the other detectors)
    screens: list = field(default_factory=list)

    @property
    def ndim(self) -> int:
        return len(self.axes)

    @property
    def cell(self) -> float:
        """The volume of one grid cell of a frame (job length units to the
        power ndim): a frame's sum times it is the probability it holds."""
        return float(np.prod([abs(float(c[1] - c[0])) if len(c) > 1 else 1.0 for c in self.coords.values()]))

    def offset(self, axis: str, i: int) -> float:
        """The lab offset of the grid along ``axis`` at snapshot ``i`` (0 in the lab frame)."""
        if self.offsets is None or axis not in self.offsets:
            return 0.0
        return float(self.offsets[axis][i])

    def moves(self, axis: str) -> bool:
        """Whether the grid moves along ``axis`` during the run."""
        return self.offsets is not None and axis in self.offsets and bool(np.any(self.offsets[axis] != 0))

    def lab_coords(self, axis: str, i: int) -> np.ndarray:
        """Lab positions of the snapshot coordinates along ``axis`` at
        snapshot ``i``: coordinate + snapshot_frame_offset (job length units)."""
        return self.coords[axis] + self.offset(axis, i)

    def visited(self, axis: str, indices=None) -> tuple[float, float]:
        """(lowest, highest) lab position of the snapshot coordinates along
        ``axis`` over the snapshots ``indices`` (default all)."""
        c = self.coords[axis]
        lo, hi = float(np.min(c)), float(np.max(c))
        if self.offsets is None or axis not in self.offsets:
            return lo, hi
        off = self.offsets[axis] if indices is None else self.offsets[axis][list(indices)]
        return lo + float(np.min(off)), hi + float(np.max(off))

    def layer_span(self, layer, i: int) -> tuple[float, float]:
        """Lab positions (start, stop) of an absorbing layer at snapshot ``i``:
        the layers belong to the grid and fall with it."""
        off = self.offset(layer.axis, i)
        return layer.start + off, layer.stop + off

    def axis_label(self, axis: str) -> str:
        """"x (nm)" for a lab grid; "lab x (nm)" for a falling one."""
        return f"{'lab ' if self.offsets is not None else ''}{axis} ({pretty_unit(self.units['length'])})"


def read_scene(path, field_name: str = "RUN.nc") -> Scene:
    """The scene of the result at ``path``; JobError when it is not a result."""
    ds = open_result(path, require=("density", "snapshot_time"), field=field_name, surfaces=True)
    try:
        axes = [d for d in ds["density"].dims if d not in ("snapshot_time", "surface")]
        coords = {a: np.asarray(ds[a].values, float) for a in axes}
        job = _absorber_and_grid(ds)
        pot = np.asarray(ds["potential"].values, float) if "potential" in ds else None
        surfaces = surface_potentials = couplings = None
        if "surface" in ds["density"].dims:
            surfaces = [str(v) for v in ds["surface"].values]
            if pot is not None:
                order = ds["potential"].transpose("surface", *axes).values
                surface_potentials = {name: np.asarray(v, float) for name, v in zip(surfaces, order)}
            pot = None
            couplings = {}
            if "coupling_potential" in ds and "pair" in ds["coupling_potential"].dims:
                values = ds["coupling_potential"].transpose("pair", *axes).values
                couplings = {str(p): np.asarray(v, float) for p, v in zip(ds["pair"].values, values)}
        dets = []
        if "detector" in ds.coords and ds.sizes.get("detector", 0):
            names = [str(v) for v in ds["detector"].values]
            xs = np.asarray(ds["detector_x"].values, float)
            ax_names = ([str(v) for v in ds["detector_axis"].values] if "detector_axis" in ds
                        else [axes[0]] * len(names))
            dets = list(zip(names, ax_names, xs))
        screens = [str(v) for v in ds["screen"].values] if "screen" in ds.variables else []
        units = {
            "length": ds.attrs.get("units_length", ""),
            "energy": ds.attrs.get("units_energy", ""),
            "time": ds.attrs.get("units_time", ""),
            "density": ds["density"].attrs.get("units", ""),
            "flux": ds["flux"].attrs.get("units", "") if "flux" in ds else "",
        }
        scene = Scene(Path(path), str(ds.attrs.get("title", "")), axes, coords,
                      ds.attrs.get("grid_kind") == "radial", pot, _layers(job, axes, coords), dets,
                      units, int(ds.sizes.get("snapshot_time", 0)), "psi_snapshot_real" in ds,
                      offsets=_snapshot_offsets(ds, axes), surfaces=surfaces,
                      surface_potentials=surface_potentials, couplings=couplings, screens=screens)
    finally:
        ds.close()
    if scene.n_snapshots == 0:
        raise JobError(field_name, f"{str(path)!r} holds no density snapshots; run the job with "
                                   "record.snapshot_every shorter than evolve.duration")
    return scene


def _snapshot_offsets(ds, axes) -> dict | None:
    """Axis name -> the grid's lab offset at each snapshot (job length
    units), from ``snapshot_frame_offset``: dims (snapshot_time) in 1D,
    (snapshot_time, axis) in 2D/3D; None for a run whose grid stays in the lab."""
    if "snapshot_frame_offset" not in ds:
        return None
    off = ds["snapshot_frame_offset"]
    if "axis" in off.dims:
        names = [str(v) for v in ds["axis"].values]
        values = np.asarray(off.transpose("snapshot_time", "axis").values, float)
        return {a: values[:, names.index(a)] for a in axes if a in names}
    return {axes[0]: np.asarray(off.values, float)}


def _absorber_and_grid(ds) -> dict:
    """The [absorber] and [grid] tables the layers need: from the run's
    record (:mod:`wavesweep.io.record`) where the file has one, else from the
    job text (a file of an older version)."""
    attrs = ds.attrs
    if "absorber_thickness" in attrs and "grid_axes" in attrs:
        faces = [str(b) for b in ds["boundary"].values] if "boundary" in ds.coords else []
        grid = {a: {"min": float(attrs[f"grid_{a}_min"]), "max": float(attrs[f"grid_{a}_max"])}
                for a in str(attrs["grid_axes"]).split()}
        return {"absorber": {"kind": str(attrs.get("absorber", "none")),
                             "thickness": float(attrs["absorber_thickness"]), "faces": faces},
                "grid": grid}
    try:
        return tomllib.loads(str(attrs["job"]))
    except tomllib.TOMLDecodeError:
        return {}


def _layers(job: dict, axes, coords) -> list[Layer]:
    """Absorbing layers from the resolved job (thickness in job units)."""
    ab = job.get("absorber") or {}
    if ab.get("kind", "none") == "none":
        return []
    th = float(ab.get("thickness", 0.0))
    grid = job.get("grid", {})
    faces = ab.get("faces") or [f"{a}{s}" for a in axes for s in "-+" if not (a == "r" and s == "-")]
    out = []
    for face in faces:
        a, side = face[:-1], face[-1]
        if a not in coords:
            continue
        lo = float(grid.get(a, {}).get("min", coords[a][0]))
        hi = float(grid.get(a, {}).get("max", coords[a][-1]))
        out.append(Layer(face, a, hi - th, hi) if side == "+" else Layer(face, a, lo, lo + th))
    return out


def column_scene(scene: Scene, axis: str) -> Scene:
    """What a camera looking along ``axis`` sees of a 2D or 3D run: the
    frames integrated over ``axis`` (the column density, probability per
    length^(ndim-1) in the job's units: the sum over the axis times its
    spacing), on the remaining axes, with the absorbers and detectors that
    lie across them.  The potential is left out (V differs along a column),
    each surface's and the couplings too."""
    if scene.ndim < 2 or scene.radial:
        raise JobError("--column", "a column density needs a 2D or 3D Cartesian run; this one is "
                                   f"{'radial' if scene.radial else '1D'}")
    if axis not in scene.axes:
        raise JobError("--column", f"no axis {axis!r}; the run has {', '.join(scene.axes)}")
    k = scene.axes.index(axis)
    c = scene.coords[axis]
    spacing = abs(float(c[1] - c[0])) if len(c) > 1 else 1.0
    rest = [a for a in scene.axes if a != axis]
    units = dict(scene.units)
    units["density"] = f"{units['length']}-{len(rest)}"
    offsets = None if scene.offsets is None else {a: o for a, o in scene.offsets.items() if a in rest}
    return replace(scene, axes=rest, coords={a: scene.coords[a] for a in rest}, potential=None, offsets=offsets,
                   surface_potentials=None, couplings=None,
                   layers=[layer for layer in scene.layers if layer.axis in rest],
                   detectors=[d for d in scene.detectors if d[1] in rest], units=units,
                   column=(axis, k, spacing))


class FrameReader:
    """Streams snapshot frames (float64) of one variable from a result file;
    ``column``: ``(name, axis index, spacing)`` sums each frame over that axis
    (:func:`column_scene`; the index counts the grid axes, after the
    ``surface`` axis of coupled surfaces)."""

    def __init__(self, path, variable: str = "density", column: tuple | None = None):
        self._column = column
        self._nc = netCDF4.Dataset(path, "r")
        self._nc.set_auto_mask(False)
        self._var = self._nc[variable]
        self.times = np.asarray(self._nc["snapshot_time"][:], float)

    def __len__(self) -> int:
        return len(self.times)

    def frame(self, i: int, variable: str | None = None) -> np.ndarray:
        var = self._var if variable is None else self._nc[variable]
        try:
            frame = np.asarray(var[i], dtype=np.float64)
            if self._column is not None:
                _, k, spacing = self._column
                lead = 1 if var.dimensions[1:2] == ("surface",) else 0   # a frame (surface, *grid) of coupled surfaces
                frame = frame.sum(axis=k + lead) * spacing
            return frame
        except (RuntimeError, OSError) as e:   # a block whose checksum or compression fails
            raise JobError("RUN.nc", f"{self._nc.filepath()!r}: variable {var.name!r} cannot be read at "
                                     f"snapshot {i}, the file is damaged ({' '.join(str(e).split())}); "
                                     "run the job again") from None

    def close(self) -> None:
        self._nc.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
