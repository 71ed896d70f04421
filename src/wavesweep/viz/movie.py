"""Movies of the probability density, one frame per selected snapshot.

Frames are streamed: each snapshot is read from the netCDF file, drawn by
updating the artists of one figure (the static parts -- axes, potential,
absorbing layers, detectors, colour bar -- are rendered once and restored
as a background, then only the moving artists are drawn: matplotlib's
blitting), and piped as raw RGB to the ffmpeg binary that the imageio-ffmpeg
package ships (H.264 in MP4, or GIF with a palette per frame).  Memory is
independent of the number of frames.  The file is written under a temporary
name and renamed into place when complete.

1D and radial: the density (radial: the radial probability density |u(r)|^2)
against position, the static potential on its own axis, absorbing layers
shaded, detectors marked, the time in a corner; ``parts`` draws Re psi,
Im psi and +-|psi| instead (needs ``record.snapshot_psi = true``).
2D: the density as an image on one colour scale for all frames (linear or
logarithmic), potential contours over it, equal aspect.  3D: the projection
(integral along an axis) or a slice, drawn as in 2D.

Coupled surfaces (a ``surface`` dimension): in 1D one axes with each
surface's density (thick) and its potential V_ss (thin, right axis) in the
surface's colour, line style and width (``style.SURFACE_STYLES``, apart
in grey-scale print too), each coupled pair's |V_ab| on the potential
axis in a grey style of its own (``style.COUPLING_STYLES``), multiplied by
a factor stated in its legend entry when it is below a fifth of the
surfaces' span (0.03 eV beside 8 eV: x 100), and a legend naming each curve with each surface's probability in
the frame (the frame's integral) updated every frame; in 2D (and 3D through
a projection or slice) one panel per surface side by side on one colour
scale, each with its own potential's contours and its probability.

A run in a falling frame (``frame_offset`` in the result) is drawn in the
lab: each frame at its lab positions (grid coordinate + the snapshot's
``snapshot_frame_offset``), axes labelled "lab x (...)", detectors and the
potential fixed where they are in the lab, absorbing layers moving with
the grid, the grid's offset printed beside the time.  The view spans the
whole region the grid visits over the movie, so the packet is seen
falling, unless along some axis that region is longer than
``FOLLOW_SPAN`` grid extents (a 10 cm fall of a 100 um grid is a thousand
of them, where the packet would shrink to a line): along such an axis the
view follows the grid, a window of the grid's own extent at its lab
position in each frame (the tick labels are lab positions; the frame is
then drawn whole, not blitted, since the axes move).
"""
from __future__ import annotations

import os
import subprocess
import time
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from ..errors import JobError
from ..io.atomic import atomic_rename, temporary_path
from ..io.paths import output_file
from . import style
from .scene import FOLLOW_SPAN, FrameReader, Scene, column_scene, read_scene

__all__ = ["MovieOptions", "render_movie", "VideoWriter", "parse_size"]

FORMATS = (".mp4", ".gif")


@dataclass
class MovieOptions:
    """``every``: use every K-th snapshot; ``fps``: frames per second;
    ``dpi``; ``size``: (width, height) pixels; ``scale``: "linear" or "log"
    (2D/3D); ``floor``: lowest density of the log scale relative to the
    largest; ``parts``: Re/Im psi (1D); ``projection``: axis to integrate
    over (3D, default the last); ``slice``: (axis, value) instead;
    ``column``: the column density along that axis, what a camera looking
    along it sees (2D: a curve over the other axis; 3D: an image, as
    ``projection``)."""

    every: int = 1
    fps: float = 20.0
    dpi: int = 100
    size: tuple[int, int] = (960, 540)
    scale: str = "linear"
    floor: float = 1e-6
    parts: bool = False
    projection: str | None = None
    slice: tuple[str, float] | None = None
    column: str | None = None


def parse_size(text: str) -> tuple[int, int]:
    """"WIDTHxHEIGHT" in pixels (even numbers: H.264 needs them)."""
    try:
        w, h = (int(v) for v in text.lower().split("x"))
    except ValueError:
        raise JobError("--size", f"expected WIDTHxHEIGHT in pixels such as 960x540, got {text!r}") from None
    if not (16 <= w <= 7680 and 16 <= h <= 4320):
        raise JobError("--size", f"{w}x{h} is outside 16x16 .. 7680x4320 pixels")
    return w - w % 2, h - h % 2


# -- the video file --------------------------------------------------------------
class VideoWriter:
    """Raw RGB frames in, an MP4 (H.264) or GIF file out, through ffmpeg."""

    def __init__(self, path, size: tuple[int, int], fps: float):
        self.path = Path(path)
        self.size = size
        suffix = self.path.suffix.lower()
        if suffix not in FORMATS:
            raise JobError("-o", f"unknown movie type {self.path.suffix or '(none)'!r}; "
                                 f"use one of {', '.join(FORMATS)}")
        folder = self.path.parent if str(self.path.parent) else Path(".")
        if not folder.is_dir() or not os.access(folder, os.W_OK):
            raise JobError("-o", f"cannot write into {str(folder)!r}: no such folder or no permission")
        self.tmp = temporary_path(self.path, ".part" + suffix, unique=False)   # ffmpeg reads the format from it
        ffmpeg = _ffmpeg()
        w, h = size
        cmd = [ffmpeg, "-y", "-loglevel", "error", "-f", "rawvideo", "-pix_fmt", "rgb24",
               "-s", f"{w}x{h}", "-r", f"{fps:g}", "-i", "-"]
        if suffix == ".mp4":
            cmd += ["-c:v", "libx264", "-pix_fmt", "yuv420p", "-preset", "fast", "-crf", "20",
                    "-movflags", "+faststart", "-f", "mp4"]
        else:   # one palette per frame keeps the stream flowing (no whole-movie palette pass)
            cmd += ["-filter_complex", "split[a][b];[a]palettegen=stats_mode=single[p];"
                                       "[b][p]paletteuse=new=1", "-loop", "0", "-f", "gif"]
        self.proc = subprocess.Popen(cmd + [str(self.tmp)], stdin=subprocess.PIPE,
                                     stderr=subprocess.PIPE)
        self.frames = 0

    def write(self, rgb: np.ndarray) -> None:
        if rgb.shape != (self.size[1], self.size[0], 3):
            raise ValueError(f"frame of shape {rgb.shape}, expected {(self.size[1], self.size[0], 3)}")
        try:
            self.proc.stdin.write(np.ascontiguousarray(rgb, dtype=np.uint8).tobytes())
        except BrokenPipeError:
            self._fail()
        self.frames += 1

    def close(self) -> Path:
        self.proc.stdin.close()
        if self.proc.wait() != 0:
            self._fail()
        atomic_rename(self.tmp, self.path)
        return self.path

    def abort(self) -> None:
        try:
            self.proc.stdin.close()
        except OSError:
            pass
        self.proc.kill()
        self.proc.wait()
        self.tmp.unlink(missing_ok=True)

    def _fail(self):
        err = self.proc.stderr.read().decode(errors="replace").strip().splitlines()
        self.abort()
        raise JobError("-o", f"ffmpeg could not write {str(self.path)!r}: {err[-1] if err else 'unknown error'}")


def _ffmpeg() -> str:
    try:
        import imageio_ffmpeg   # lazy: optional (the video extra), needed only to encode
    except ImportError:
        raise JobError("movie", "needs the imageio-ffmpeg package: pip install 'wavesweep[video]'") from None
    return imageio_ffmpeg.get_ffmpeg_exe()


# -- painters -------------------------------------------------------------------------
class Painter:
    """Draws one run's frames into one figure; subclasses know the geometry.

    ``prepare(reader, indices)`` may make a first pass over the frames (the
    colour or y scale is fixed over the movie); ``update(frame, t, i)`` sets
    the moving artists for snapshot ``i`` and returns them.  ``redraw``: the
    axes move from frame to frame (a view following a falling grid), so each
    frame is drawn whole instead of over a fixed background.  ``limits``:
    axis name -> the (lab) view limits of the current frame."""

    def __init__(self, scene: Scene, options: MovieOptions):
        self.scene = scene
        self.opt = options
        with style.style():
            self.fig = style.figure(*options.size, options.dpi)
        self.animated = []
        self.following: list[str] = []
        self.redraw = False
        self.limits: dict = {}
        self._pad: dict = {}
        self._moving_layers = []     # (patch, label or None, layer, "v" or "h")

    def _plan_view(self, axes, indices, pad: dict) -> None:
        """The view along each drawn axis: the grid (lab runs, as always),
        the lab region a falling grid visits over ``indices`` (each padded by
        ``pad[axis]``), or, when that region exceeds ``FOLLOW_SPAN`` grid
        extents, a window following the grid (``self.following``)."""
        sc = self.scene
        self._pad = dict(pad)
        for a in axes:
            c = sc.coords[a]
            extent = float(np.max(c) - np.min(c)) + 2 * pad[a]
            lo, hi = sc.visited(a, indices)
            if sc.moves(a) and (hi - lo) + 2 * pad[a] > FOLLOW_SPAN * extent:
                self.following.append(a)
            self.limits[a] = (lo - pad[a], hi + pad[a])
        self.redraw = bool(self.following)
        if self.following and indices:
            self._follow(indices[0])

    def _follow(self, i: int) -> None:
        """The view limits of snapshot ``i`` along the followed axes: the grid's lab extent."""
        for a in self.following:
            lo, hi = self.scene.visited(a, [i])
            self.limits[a] = (lo - self._pad[a], hi + self._pad[a])

    def _move_layers(self, i: int) -> None:
        """Absorbing layers of a falling grid at snapshot ``i`` (they fall with it)."""
        for patch, label, layer, orient in self._moving_layers:
            lo, hi = self.scene.layer_span(layer, i)
            if orient == "v":
                patch.set_x(lo)
                patch.set_width(hi - lo)
            else:
                patch.set_y(lo)
                patch.set_height(hi - lo)
            if label is not None:
                label.set_x((lo + hi) / 2)

    def _view_note(self) -> str:
        """A title's note on a view that follows the grid."""
        if not self.following:
            return ""
        return f"  (view follows the falling grid along {', '.join(self.following)})"

    def frame_of(self, reader, i):
        return reader.frame(i)

    def prepare(self, reader, indices) -> None:
        raise NotImplementedError

    def update(self, frame, t) -> list:
        raise NotImplementedError

    def _time_text(self, ax, corner: bool = False):
        """The time in the axes' top left corner, or with ``corner`` in the
        figure's bottom left one (a 2D falling grid's view may leave the
        axes too narrow for the grid's offset)."""
        where = (dict(x=0.01, y=0.01, transform=self.fig.transFigure, va="bottom") if corner
                 else dict(x=0.015, y=0.97, transform=ax.transAxes, va="top"))
        txt = ax.text(s="", ha="left", fontsize=10,
                      bbox=dict(boxstyle="round,pad=0.25", fc="white", ec="none", alpha=0.8), **where)
        self.animated.append(txt)
        return txt

    def _time_label(self, t, i: int = 0) -> str:
        """The time, and for a falling grid its lab offset at snapshot ``i``."""
        text = f"t = {t:.6g} {style.pretty_unit(self.scene.units['time'])}"
        sc = self.scene
        moving = [a for a in sc.axes if sc.moves(a)]
        if moving:
            L = style.pretty_unit(sc.units["length"])
            text += "\ngrid offset " + ", ".join(f"{a} = {sc.offset(a, i):+.6g} {L}" for a in moving)
        return text


class Painter1D(Painter):
    def prepare(self, reader, indices):
        sc, opt = self.scene, self.opt
        name = sc.axes[0]
        self.name = name
        self.x = sc.lab_coords(name, indices[0] if indices else 0)
        self._plan_view([name], indices, {name: 0.0})
        L = style.pretty_unit(sc.units["length"])
        if opt.parts and not sc.has_psi:
            raise JobError("--parts", "the run stored no psi with its snapshots; run it with "
                                      "record.snapshot_psi = true")
        with style.style():
            ax = self.fig.add_subplot(111)
            self.fig.subplots_adjust(left=0.09, right=0.9 if self._has_potential() else 0.97,
                                     bottom=0.13, top=0.93)
            top = 0.0
            for i in indices:                      # one streaming pass: a fixed y scale
                top = max(top, float(np.nanmax(np.abs(self._values(reader, i)[0]))))
            top = top * 1.08 if top > 0 else 1.0
            self.fill = None
            if opt.parts:
                ax.set_ylim(-top, top)
                ax.set_ylabel(f"psi ({L}$^{{-1/2}}$)")
                self.lines = [ax.plot(self.x, np.zeros_like(self.x), color=c, lw=w, label=l,
                                      animated=True)[0]
                              for c, w, l in ((style.DENSITY, 2.2, "|psi|"), (style.DENSITY, 2.2, None),
                                              (style.REAL, 1.0, "Re psi"), (style.IMAG, 1.0, "Im psi"))]
                ax.legend(loc="lower right", frameon=False)
            else:
                _density_axis(ax, sc, opt, top)
                self.lines = [ax.plot(self.x, np.zeros_like(self.x), color=style.DENSITY, lw=1.6,
                                      animated=True)[0]]
                self._floor = ax.get_ylim()[0]
                self.fill = ax.fill_between(self.x, self._floor, self._floor, color=style.DENSITY,
                                            alpha=0.25, lw=0, animated=True)
            self.ax = ax
            ax.set_xlim(*self.limits[name])
            ax.set_xlabel(sc.axis_label(name))
            self._mark_layers_and_detectors(ax, name)
            if self._has_potential():
                v = sc.potential
                span = float(np.ptp(v))
                vax = ax.twinx()
                vax.spines["right"].set_visible(True)
                # fixed in the lab: recorded at the grid's lab positions at t = 0 (offset zero)
                vax.plot(sc.coords[name], v, color=style.POTENTIAL, lw=1.0, alpha=0.9)
                # V's minimum on the zero line of the left axis, its maximum below the top
                below = 1.15 * span if opt.parts else 0.0
                vax.set_ylim(float(v.min()) - below, float(v.min()) + 1.15 * span)
                vax.set_ylabel(f"V ({style.pretty_unit(sc.units['energy'])})", color=style.POTENTIAL)
                vax.tick_params(axis="y", colors=style.POTENTIAL)
            ax.set_title(style.plain(sc.title) + (f"  (integrated over {sc.column[0]})" if sc.column else "")
                         + self._view_note(), loc="left")
            self.text = self._time_text(ax)
        self.animated[:0] = ([p for p, _, _, _ in self._moving_layers] + self.lines
                             + ([self.fill] if self.fill is not None else [])
                             + [lab for _, lab, _, _ in self._moving_layers])

    def _mark_layers_and_detectors(self, ax, name: str) -> None:
        """The absorbing layers shaded (falling with a falling grid) and the
        detectors along ``name`` marked (fixed in the lab)."""
        sc = self.scene
        falling = sc.offsets is not None
        for layer in sc.layers:
            moves = sc.moves(layer.axis)
            patch = ax.axvspan(layer.start, layer.stop, color=style.ABSORBER, alpha=0.45, lw=0,
                               animated=moves)
            label = ax.text((layer.start + layer.stop) / 2, 0.015, "absorber", transform=ax.get_xaxis_transform(),
                            ha="center", va="bottom", fontsize=7, color="#555555", animated=moves,
                            clip_on=falling)
            if moves:   # the layers belong to the grid: they fall with it
                self._moving_layers.append((patch, label, layer, "v"))
        for dname, dax, pos in sc.detectors:
            if dax == name:   # detectors are fixed in the lab
                ax.axvline(pos, color=style.DETECTOR, lw=0.9, ls="--")
                ax.text(pos, 0.985, f" {style.plain(dname)}", transform=ax.get_xaxis_transform(),
                        ha="left", va="top", fontsize=7, color=style.DETECTOR, clip_on=falling)

    def _has_potential(self) -> bool:
        v = self.scene.potential
        return v is not None and v.ndim == 1 and float(np.ptp(v)) > 0

    def _values(self, reader, i):
        if self.opt.parts:
            re = reader.frame(i, "psi_snapshot_real")
            im = reader.frame(i, "psi_snapshot_imag")
            return np.hypot(re, im), re, im
        return (reader.frame(i),)

    def frame_of(self, reader, i):
        return self._values(reader, i)

    def update(self, frame, t, i: int = 0):
        if self.scene.offsets is not None:   # a falling grid: this snapshot's lab positions
            self.x = self.scene.lab_coords(self.name, i)
            self._move_layers(i)
            if self.following:
                self._follow(i)
                self.ax.set_xlim(*self.limits[self.name])
        if self.opt.parts:
            mod, re, im = frame
            for line, y in zip(self.lines, (mod, -mod, re, im)):
                line.set_data(self.x, y)
        else:
            y = np.maximum(frame[0], self._floor)
            self.lines[0].set_data(self.x, y)
            verts = np.concatenate([np.column_stack([self.x, y]),
                                    [[self.x[-1], self._floor], [self.x[0], self._floor]]])
            self.fill.set_verts([verts])
        self.text.set_text(self._time_label(t, i))
        return self.animated


class Painter2D(Painter):
    """2D grids, and 3D grids through a projection or a slice."""

    def prepare(self, reader, indices):
        from matplotlib.colors import LogNorm, Normalize   # lazy: matplotlib loads with the first frame

        sc, opt = self.scene, self.opt
        self._plane(sc)
        vmax = 0.0
        for i in indices:
            vmax = max(vmax, float(np.max(self.reduce(reader.frame(i)))))
        vmax = vmax if vmax > 0 else 1.0
        norm = (LogNorm(vmin=vmax * opt.floor, vmax=vmax) if opt.scale == "log"
                else Normalize(vmin=0.0, vmax=vmax))
        a, b = self.plane
        xa, xb = sc.coords[a], sc.coords[b]
        da, db = (xa[1] - xa[0]) / 2, (xb[1] - xb[0]) / 2
        self._half = (da, db)
        from mpl_toolkits.axes_grid1 import make_axes_locatable   # lazy: matplotlib, as above

        first = indices[0] if indices else 0
        oa, ob = sc.offset(a, first), sc.offset(b, first)
        extent = (xa[0] - da + oa, xa[-1] + da + oa, xb[0] - db + ob, xb[-1] + db + ob)
        self._plan_view([a, b], indices, {a: abs(da), b: abs(db)})
        overlays = []      # drawn over the image each frame (the image is drawn after the background)
        with style.style():
            ax = self.fig.add_subplot(111)
            self.image = ax.imshow(np.zeros((len(xb), len(xa))), origin="lower", norm=norm,
                                   cmap=style.DENSITY_CMAP, aspect="equal", interpolation="nearest",
                                   extent=extent, animated=True)
            self.ax = ax
            ax.set_xlim(*self.limits[a])
            ax.set_ylim(*self.limits[b])
            cax = make_axes_locatable(ax).append_axes("right", size="3%", pad=0.12)
            bar = self.fig.colorbar(self.image, cax=cax)
            bar.set_label(self.density_label + (" (log scale)" if opt.scale == "log" else ""))
            v = self._plane_potential()
            if v is not None and float(np.ptp(v)) > 0:
                levels = np.linspace(float(v.min()), float(v.max()), 7)[1:-1]
                # fixed in the lab: recorded at the grid's lab positions at t = 0 (offset zero)
                overlays.append(ax.contour(xa, xb, v.T, levels=levels, colors="white",
                                           linewidths=0.7, alpha=0.85))
            overlays += self._layer_and_detector_marks(ax)
            for o in overlays:
                o.set_animated(True)
            ax.set_xlabel(sc.axis_label(a))
            ax.set_ylabel(sc.axis_label(b))
            ax.set_title(style.plain(sc.title) + self.subtitle + self._view_note(), loc="left")
            self.fig.subplots_adjust(left=0.08, right=0.9, bottom=0.11, top=0.92)
            self.text = self._time_text(ax, corner=any(sc.moves(n) for n in sc.axes))
        self.animated[:0] = [self.image, *overlays]

    def _layer_and_detector_marks(self, ax) -> list:
        """The absorbing layers and the detectors across the drawn plane, as
        artists drawn over the image each frame."""
        sc = self.scene
        a, b = self.plane
        marks = []
        for layer in sc.layers:
            span = ax.axvspan if layer.axis == a else (ax.axhspan if layer.axis == b else None)
            if span is not None:
                marks.append(span(layer.start, layer.stop, color="white", alpha=0.18, lw=0))
                if sc.moves(layer.axis):   # the layers belong to the grid: they fall with it
                    self._moving_layers.append((marks[-1], None, layer, "v" if layer.axis == a else "h"))
        for dname, dax, pos in sc.detectors:
            # a resolved detector (a screen) is a solid, heavier line, named as a screen
            line = dict(lw=2.2, ls="-") if dname in sc.screens else dict(lw=1.0, ls="--")
            label = f"{style.plain(dname)} (screen)" if dname in sc.screens else style.plain(dname)
            if dax == a:
                marks.append(ax.axvline(pos, color=style.DETECTOR, **line))
                marks.append(ax.text(pos, 0.985, f" {label}", transform=ax.get_xaxis_transform(),
                                     ha="left", va="top", fontsize=7, color=style.DETECTOR,
                                     clip_on=sc.offsets is not None))
            elif dax == b:
                marks.append(ax.axhline(pos, color=style.DETECTOR, **line))
                marks.append(ax.text(0.005, pos, f"{label} ", transform=ax.get_yaxis_transform(),
                                     ha="left", va="bottom", fontsize=7, color=style.DETECTOR,
                                     clip_on=sc.offsets is not None))
        return marks

    def _plane(self, sc):
        if sc.ndim == 2:
            self.plane, self.reduce = tuple(sc.axes), (lambda f: f)
            self.density_label = f"probability density ({style.pretty_unit(sc.units['density'])})"
            self.subtitle = ""
            self._cut = None
            return
        opt = self.opt
        if opt.slice is not None:
            axis, value = opt.slice
            if axis not in sc.axes:
                raise JobError("--slice", f"no axis {axis!r}; the run has {', '.join(sc.axes)}")
            k = sc.axes.index(axis)
            c = sc.coords[axis]
            half = abs(c[1] - c[0]) / 2
            if not (min(c) - half <= value <= max(c) + half):
                raise JobError("--slice", f"{axis} = {value:g} lies outside the grid "
                                          f"[{c.min():g}, {c.max():g}] {sc.units['length']}")
            j = int(np.argmin(np.abs(c - value)))
            self.reduce = lambda f: np.take(f, j, axis=k)
            self._cut = ("slice", k, j)
            self.density_label = f"probability density ({style.pretty_unit(sc.units['density'])})"
            # a falling grid is sliced at a grid coordinate: the slice falls with the grid
            self.subtitle = (f"  (slice {axis} = {sc.coords[axis][j]:.4g} {sc.units['length']}"
                             + (" of the falling grid)" if sc.moves(axis) else ")"))
        else:
            axis = opt.projection or sc.axes[-1]
            if axis not in sc.axes:
                raise JobError("--projection", f"no axis {axis!r}; the run has {', '.join(sc.axes)}")
            k = sc.axes.index(axis)
            d = abs(float(sc.coords[axis][1] - sc.coords[axis][0]))
            self.reduce = lambda f: f.sum(axis=k) * d
            self._cut = ("projection", k, None)
            self.density_label = f"integrated over {axis} ({style.pretty_unit(sc.units['length'])}$^{{-2}}$)"
            self.subtitle = f"  (integrated over {axis})"
        self.plane = tuple(n for n in sc.axes if n != axis)

    def _plane_potential(self):
        return self._cut_potential(self.scene.potential)

    def _cut_potential(self, v):
        """A potential on the grid, on the drawn plane: itself in 2D, a 3D
        one sliced as the density is or averaged along the projection."""
        if v is None or self._cut is None:
            return v
        kind, k, j = self._cut
        return np.take(v, j, axis=k) if kind == "slice" else v.mean(axis=k)

    def update(self, frame, t, i: int = 0):
        sc = self.scene
        if sc.offsets is not None:   # a falling grid: this snapshot's lab positions
            a, b = self.plane
            xa, xb = sc.lab_coords(a, i), sc.lab_coords(b, i)
            da, db = self._half
            self.image.set_extent((xa[0] - da, xa[-1] + da, xb[0] - db, xb[-1] + db))
            self._move_layers(i)
            if self.following:
                self._follow(i)
                self.ax.set_xlim(*self.limits[a])
                self.ax.set_ylim(*self.limits[b])
        self.image.set_data(self.reduce(frame).T)
        self.text.set_text(self._time_label(t, i))
        return self.animated


# -- coupled surfaces -------------------------------------------------------------
def surface_density_label(surface: str, population: float | None = None) -> str:
    """A coupled movie's legend entry of a surface's density, with the
    probability on that surface when known."""
    return f"density on {style.plain(surface)}" + ("" if population is None else f": P = {population:.3f}")


def coupling_label(pair: str) -> str:
    """The legend entry of the pair "A,B"'s coupling: the off-diagonal element's modulus."""
    a, _, b = pair.partition(",")
    return f"|V| coupling {style.plain(a)} and {style.plain(b)}"


def coupling_factor(span: float, largest: float) -> float:
    """The factor a 1D coupled movie draws the couplings |V_ab| by on the
    potential axis: 1 when the largest, ``largest``, is at least a fifth of
    the surfaces' potential span ``span`` (same units), else the largest of
    1, 2, 5 times a power of ten that keeps it within half the span (a
    coupling of 0.03 eV beside surfaces spanning 8 eV is drawn x 100,
    reaching 3 eV)."""
    if not (largest > 0 and span > 0) or largest >= 0.2 * span:
        return 1.0
    target = 0.5 * span / largest
    decade = 10.0 ** np.floor(np.log10(target))
    return float(max(m * decade for m in (1, 2, 5) if m * decade <= target * (1 + 1e-12)))


class SurfacesPainter1D(Painter1D):
    """Coupled surfaces on a line, on one axes: each surface's density (left
    axis; thick) and its static potential V_ss (right axis; thin) in the
    surface's colour, line style and width (:data:`style.SURFACE_STYLES`:
    the surfaces stay apart in grey-scale print), each coupled pair's
    |V_ab| on the potential axis in a grey style of its own, scaled by a
    factor its label states when it is small beside the surfaces' span
    (:func:`coupling_factor`).  The legend
    names each curve and gives each surface's probability in the frame (the
    frame's integral), updated every frame."""

    def prepare(self, reader, indices):
        sc, opt = self.scene, self.opt
        name = sc.axes[0]
        self.name = name
        self.x = sc.lab_coords(name, indices[0] if indices else 0)
        self._plan_view([name], indices, {name: 0.0})
        curves = self._potential_curves()
        with style.style():
            ax = self.fig.add_subplot(111)
            self.fig.subplots_adjust(left=0.09, right=0.9 if curves else 0.97, bottom=0.13, top=0.93)
            top = 0.0
            for i in indices:                      # one streaming pass: a fixed y scale for every surface
                top = max(top, float(np.nanmax(reader.frame(i))))
            top = top * 1.08 if top > 0 else 1.0
            _density_axis(ax, sc, opt, top)
            self._floor = ax.get_ylim()[0]
            self.fill = None
            # the widest label the legend will hold sizes its box: the populations fit in every frame
            self.lines = [ax.plot(self.x, np.zeros_like(self.x), animated=True,
                                  label=surface_density_label(s, 0.0), **style.surface_style(j))[0]
                          for j, s in enumerate(sc.surfaces)]
            self.ax = ax
            ax.set_xlim(*self.limits[name])
            ax.set_xlabel(sc.axis_label(name))
            self._mark_layers_and_detectors(ax, name)
            handles = list(self.lines)
            if curves:
                vax = ax.twinx()
                vax.spines["right"].set_visible(True)
                for text, v, kw in curves:
                    handles += vax.plot(sc.coords[name], v, label=text, alpha=0.9, **kw)
                values = np.concatenate([v for _, v, _ in curves])
                low, span = float(values.min()), float(np.ptp(values))
                vax.set_ylim(low, low + 1.15 * span)
                vax.set_ylabel(f"V ({style.pretty_unit(sc.units['energy'])})", color=style.POTENTIAL)
                vax.tick_params(axis="y", colors=style.POTENTIAL)
            # surface by surface (its density, then its potential), the couplings last; below the
            # detectors' names along the top; redrawn each frame (the populations)
            n = len(self.lines)
            order = [k for j in range(n) for k in (j, n + j) if k < len(handles)] + list(range(2 * n, len(handles)))
            self._legend_row = {j: order.index(j) for j in range(n)}
            self.legend = ax.legend(handles=[handles[k] for k in order], loc="upper right",
                                    bbox_to_anchor=(1.0, 0.93), frameon=True, framealpha=0.8,
                                    edgecolor="none", fontsize=7)
            self.legend.set_animated(True)
            ax.set_title(style.plain(sc.title) + (f"  (integrated over {sc.column[0]})" if sc.column else "")
                         + "  (coupled surfaces: thick lines density, thin lines potential)", loc="left")
            self.text = self._time_text(ax)
        self.animated[:0] = self.lines + [self.legend]

    def _potential_curves(self) -> list:
        """(label, values, line keywords) of each surface's V_ss (its
        style, thinner than its density) and each pair's |V_ab| (a grey
        style per pair, :func:`style.coupling_style`), the couplings scaled
        by :func:`coupling_factor` (stated in their label) so that a small
        one stands out against the surfaces' span; empty when they are all
        one constant (nothing to read off a flat line)."""
        sc = self.scene
        curves = []
        for j, s in enumerate(sc.surfaces):
            v = (sc.surface_potentials or {}).get(s)
            if v is not None and v.ndim == 1:
                kw = style.surface_style(j)
                curves.append((f"V on {style.plain(s)}", v, {**kw, "lw": 0.55 * kw["lw"]}))
        couplings = {pair: np.abs(v) for pair, v in (sc.couplings or {}).items() if v.ndim == 1}
        span = float(np.ptp(np.concatenate([v for _, v, _ in curves]))) if curves else 0.0
        self.coupling_factor = coupling_factor(span, max((float(v.max()) for v in couplings.values()),
                                                         default=0.0))
        for k, (pair, v) in enumerate(couplings.items()):
            text = coupling_label(pair) + (f" (×{self.coupling_factor:g})" if self.coupling_factor != 1 else "")
            curves.append((text, v * self.coupling_factor, style.coupling_style(k)))
        if not curves or float(np.ptp(np.concatenate([v for _, v, _ in curves]))) == 0:
            return []
        return curves

    def frame_of(self, reader, i):
        return reader.frame(i)

    def update(self, frame, t, i: int = 0):
        cell = self.scene.cell
        texts = self.legend.get_texts()
        for j, (line, s) in enumerate(zip(self.lines, self.scene.surfaces)):
            line.set_data(self.x, np.maximum(frame[j], self._floor))
            texts[self._legend_row[j]].set_text(surface_density_label(s, float(frame[j].sum()) * cell))
        self.text.set_text(self._time_label(t, i))
        return self.animated


class SurfacesPainter2D(Painter2D):
    """Coupled surfaces on a plane (2D, or 3D through a projection or a
    slice): one panel per surface side by side, all on one colour scale,
    each with its own potential's contours, the absorbers and detectors,
    and its probability in the frame in the panel's corner."""

    def prepare(self, reader, indices):
        from matplotlib.colors import LogNorm, Normalize   # lazy: matplotlib loads with the first frame

        sc, opt = self.scene, self.opt
        self._plane(sc)
        vmax = 0.0
        for i in indices:
            frame = reader.frame(i)
            vmax = max(vmax, max(float(np.max(self.reduce(f))) for f in frame))
        vmax = vmax if vmax > 0 else 1.0
        norm = (LogNorm(vmin=vmax * opt.floor, vmax=vmax) if opt.scale == "log"
                else Normalize(vmin=0.0, vmax=vmax))
        a, b = self.plane
        xa, xb = sc.coords[a], sc.coords[b]
        da, db = (xa[1] - xa[0]) / 2, (xb[1] - xb[0]) / 2
        extent = (xa[0] - da, xa[-1] + da, xb[0] - db, xb[-1] + db)
        self._plan_view([a, b], indices, {a: abs(da), b: abs(db)})
        n = len(sc.surfaces)
        overlays, self.images, self.populations = [], [], []
        with style.style():
            axes = self.fig.subplots(1, n, squeeze=False)[0]
            self.fig.subplots_adjust(left=0.07, right=0.88, bottom=0.12, top=0.86, wspace=0.12)
            for j, (ax, s) in enumerate(zip(axes, sc.surfaces)):
                image = ax.imshow(np.zeros((len(xb), len(xa))), origin="lower", norm=norm,
                                  cmap=style.DENSITY_CMAP, aspect="equal", interpolation="nearest",
                                  extent=extent, animated=True)
                self.images.append(image)
                ax.set_xlim(*self.limits[a])
                ax.set_ylim(*self.limits[b])
                v = self._cut_potential((sc.surface_potentials or {}).get(s))
                if v is not None and float(np.ptp(v)) > 0:
                    levels = np.linspace(float(v.min()), float(v.max()), 7)[1:-1]
                    overlays.append(ax.contour(xa, xb, v.T, levels=levels, colors="white",
                                               linewidths=0.7, alpha=0.85))
                self.ax = ax
                overlays += self._layer_and_detector_marks(ax)
                ax.set_xlabel(sc.axis_label(a))
                if j == 0:
                    ax.set_ylabel(sc.axis_label(b))
                else:
                    ax.tick_params(labelleft=False)
                colour = style.surface_style(j)["color"]
                ax.set_title(f"surface {style.plain(s)}", loc="left", color=colour, fontweight="bold")
                for spine in ax.spines.values():   # the panel framed in its surface's colour and line style
                    spine.set_visible(True)
                    spine.set(**style.surface_style(j))
                self.populations.append(ax.text(0.02, 0.97, "", transform=ax.transAxes, ha="left", va="top",
                                                fontsize=9, bbox=dict(boxstyle="round,pad=0.25", fc="white",
                                                                      ec="none", alpha=0.8)))
            for o in overlays:
                o.set_animated(True)
            cax = self.fig.add_axes((0.9, 0.12, 0.015, 0.74))
            bar = self.fig.colorbar(self.images[0], cax=cax)
            bar.set_label(self.density_label + (" (log scale)" if opt.scale == "log" else ""))
            self.fig.suptitle(style.plain(sc.title) + self.subtitle + "  (coupled surfaces, one colour scale; "
                              "white lines: each surface's potential)", x=0.07, ha="left", fontsize=9)
            self.text = self._time_text(axes[0], corner=True)
        self.animated[:0] = [*self.images, *overlays, *self.populations]

    def update(self, frame, t, i: int = 0):
        cell = self.scene.cell
        for image, text, s, f in zip(self.images, self.populations, self.scene.surfaces, frame):
            image.set_data(self.reduce(f).T)
            text.set_text(f"P({style.plain(s)}) = {float(f.sum()) * cell:.3f}")
        self.text.set_text(self._time_label(t, i))
        return self.animated


def painter_for(scene: Scene, options: MovieOptions) -> Painter:
    if options.scale not in ("linear", "log"):
        raise JobError("--scale", f"unknown scale {options.scale!r}; use linear or log")
    if options.scale == "log" and not (0 < options.floor < 1):
        raise JobError("--floor", f"must lie between 0 and 1 (a fraction of the peak), got {options.floor:g}")
    if not (10 <= options.dpi <= 1000):
        raise JobError("--dpi", f"must lie between 10 and 1000, got {options.dpi}")
    coupled = scene.surfaces is not None
    if coupled and options.parts:
        raise JobError("--parts", "real and imaginary parts are not drawn for coupled surfaces (their "
                                  "snapshots hold no psi); draw the densities without --parts")
    if scene.ndim == 1:
        if options.projection or options.slice:
            raise JobError("--slice" if options.slice else "--projection",
                           "a 1D run has nothing to project or slice")
        return (SurfacesPainter1D if coupled else Painter1D)(scene, options)
    if options.parts:
        raise JobError("--parts", "real and imaginary parts are drawn for 1D runs only")
    if scene.ndim == 2 and (options.projection or options.slice):
        raise JobError("--slice" if options.slice else "--projection",
                       "a 2D run is drawn whole; --projection and --slice are for 3D")
    return (SurfacesPainter2D if coupled else Painter2D)(scene, options)


def _with_column(scene: Scene, options: MovieOptions) -> tuple[Scene, MovieOptions]:
    """``--column AXIS``: a 3D run's column density is its projection along
    AXIS (an image); a 2D run's is a curve over the other axis."""
    if options.column is None:
        return scene, options
    if options.projection or options.slice:
        raise JobError("--column", "give one of --column, --projection and --slice")
    if options.parts:
        raise JobError("--parts", "real and imaginary parts are drawn for 1D runs only, not for a column")
    if scene.ndim == 3:
        if options.column not in scene.axes:
            raise JobError("--column", f"no axis {options.column!r}; the run has {', '.join(scene.axes)}")
        return scene, replace(options, projection=options.column, column=None)
    return column_scene(scene, options.column), replace(options, column=None)


# -- the loop ----------------------------------------------------------------------
def render_frames(scene: Scene, options: MovieOptions, sink, indices=None) -> dict:
    """Draw the selected frames of ``scene`` and hand each RGB array to
    ``sink(rgb)``; returns counts and timings."""
    if options.every < 1:
        raise JobError("--every", f"must be at least 1, got {options.every}")
    scene, options = _with_column(scene, options)
    indices = list(range(0, scene.n_snapshots, options.every)) if indices is None else list(indices)
    painter = painter_for(scene, options)
    with FrameReader(scene.path, column=scene.column) as reader:
        t0 = time.perf_counter()
        painter.prepare(reader, indices)
        canvas = painter.fig.canvas
        canvas.draw()                                   # everything but the animated artists
        background = canvas.copy_from_bbox(painter.fig.bbox)
        t1 = time.perf_counter()
        for i in indices:
            artists = painter.update(painter.frame_of(reader, i), float(reader.times[i]), i)
            if painter.redraw:        # the view moved with a falling grid: axes and ticks anew
                canvas.draw()
            else:
                canvas.restore_region(background)
            for a in artists:
                painter.fig.draw_artist(a)
            rgb = np.asarray(canvas.buffer_rgba())[:, :, :3]
            sink(rgb)
        t2 = time.perf_counter()
    return {"frames": len(indices), "prepare_seconds": t1 - t0, "render_seconds": t2 - t1}


def render_movie(result, output, options: MovieOptions | None = None, overwrite: bool = True, **kw) -> dict:
    """Write the movie of the result at ``result`` to ``output`` (.mp4 or
    .gif); keyword arguments are :class:`MovieOptions` fields; an existing
    ``output`` is replaced only with ``overwrite``.  Returns
    ``{"path", "frames", "seconds", "frames_per_second"}``."""
    options = options or MovieOptions(**kw)
    output_file(output, "-o", FORMATS, overwrite=overwrite, kind="movie")   # before the result is even read
    scene = read_scene(result)
    if options.fps <= 0:
        raise JobError("--fps", f"must be positive, got {options.fps}")
    options.size = (options.size[0] - options.size[0] % 2, options.size[1] - options.size[1] % 2)
    writer = VideoWriter(output, options.size, options.fps)
    t0 = time.perf_counter()
    try:
        info = render_frames(scene, options, writer.write)
        path = writer.close()
    except BaseException:
        writer.abort()
        raise
    seconds = time.perf_counter() - t0
    return {"path": path, "frames": info["frames"], "seconds": seconds, "fps": options.fps,
            "frames_per_second": info["frames"] / seconds if seconds > 0 else float("inf")}


def _density_axis(ax, sc, opt, top: float) -> None:
    """A 1D movie's density axis: linear from 0 or log down to ``opt.floor``
    of ``top``, labelled with what is drawn (|u(r)|^2 on a radial grid, a
    column density, or the probability density) in the result's units."""
    if opt.scale == "log":
        ax.set_yscale("log")
        ax.set_ylim(top * opt.floor, top)
    else:
        ax.set_ylim(0, top)
    label = ("radial probability density |u(r)|$^2$" if sc.radial
             else f"column density along {sc.column[0]}" if sc.column else "probability density")
    ax.set_ylabel(f"{label} ({style.pretty_unit(sc.units['density'])})")
