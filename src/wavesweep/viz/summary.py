"""One-page figures: of a run (density map over position and time, the
probability books, detector fluxes, energy drift) and of a study (what was
transmitted, reflected and when it arrived, against the swept parameters).

Every axis is labelled with its unit; colours follow :mod:`.style`.

A run in a falling frame (``frame_offset`` in the result) is drawn in the
lab: each snapshot's row of the density map at its lab positions (grid
coordinate + ``snapshot_frame_offset``), so the map shows the fall itself;
detectors stay where they are in the lab, absorbing layers fall with the
grid, and the axes read "lab x (...)".  The x_mean, flux and energy
records of such a run are lab values already.  Where the fall is long
against the grid (its visited region more than ``FOLLOW_SPAN`` grid
extents, the band of the packet a sliver of the map) the grid's edges are
drawn over the map so its path stays visible; the movie follows the grid
instead (:mod:`.movie`).

A run on coupled surfaces (:func:`surfaces_figure`) shows each surface's
density map (one colour scale), the population of each surface with the
probability books, each surface's potential with the couplings |V_ab| on
their own scale, the flux per surface and detector, and the total energy's
drift; each surface keeps one colour, line style and width throughout.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import xarray as xr

from dataclasses import dataclass

from ..errors import JobError
from ..io.atomic import atomic_output
from ..io.paths import input_file, output_file
from ..io.results import open_result
from . import style
from .scene import FOLLOW_SPAN, FrameReader, column_scene, read_scene

__all__ = ["plot_result", "plot_run", "run_figure", "surfaces_figure", "plot_study", "density_map",
           "surface_density_maps", "DensityMap", "FIGURE_TYPES"]

FIGURE_TYPES = (".png", ".pdf", ".svg")
MAP_FLOOR = 1e-6            # the density map's log scale spans six decades below its peak


def _check_output(path, overwrite: bool = True) -> Path:
    """The figure's path, checked before anything is drawn (io.paths.output_file)."""
    return output_file(path, "-o", FIGURE_TYPES, overwrite=overwrite, kind="figure")


def _save(fig, path: Path) -> Path:
    try:   # the temporary name keeps the suffix: matplotlib reads the format from it
        with atomic_output(path, ".part" + path.suffix, unique=False) as tmp:
            fig.savefig(tmp, dpi=fig.dpi, format=path.suffix[1:].lower())
    except OSError as e:
        raise JobError("-o", f"cannot write {str(path)!r}: {e.strerror or e}") from None
    return path


def plot_result(path, output, size=(1200, 900), dpi: int = 100, overwrite: bool = True,
                column: str | None = None) -> Path:
    """A run's figure, or a study's when ``path`` is a ``summary.nc``; an
    existing ``output`` is replaced only with ``overwrite``; ``column``: the
    density panel shows what a camera looking along that axis sees
    (:func:`plot_run`)."""
    _check_output(output, overwrite)   # before the result is read
    if not (10 <= dpi <= 1000):
        raise JobError("--dpi", f"must lie between 10 and 1000, got {dpi}")
    input_file(path, "RUN.nc", "file")    # a FIFO, a device or a folder: refused, never opened
    try:
        with xr.open_dataset(path, engine="netcdf4") as ds:
            is_study = "study" in ds.attrs and "final_absorbed" in ds
    except (OSError, ValueError) as e:
        raise JobError("RUN.nc", f"{str(path)!r} is not a readable netCDF file ({' '.join(str(e).split())})") from None
    if is_study:
        if column is not None:
            raise JobError("--column", "a study's summary holds no densities; plot one of its runs")
        return plot_study(path, output, size, dpi)
    return plot_run(path, output, size, dpi, column=column)


# -- one run ---------------------------------------------------------------------------
@dataclass
class DensityMap:
    """What the density panel draws: ``times`` (n,) of the snapshots,
    ``positions`` of the first axis, (x,) on a lab grid or (n, x) lab
    positions of a falling grid (coordinate + snapshot_frame_offset), and
    ``density`` (n, x) integrated over the other axes (job units)."""
    times: np.ndarray
    positions: np.ndarray
    density: np.ndarray

    def lab_positions(self, i: int) -> np.ndarray:
        """Lab positions of snapshot ``i``'s row."""
        return self.positions[i] if self.positions.ndim == 2 else self.positions


def density_map(scene) -> DensityMap:
    """The density over position (the first axis) and time, integrated over
    the other axes, streamed frame by frame; a falling grid's rows at their
    lab positions."""
    axis = scene.axes[0]
    others = [scene.coords[a] for a in scene.axes[1:]]
    cell = float(np.prod([abs(c[1] - c[0]) for c in others])) if others else 1.0
    with FrameReader(scene.path, column=scene.column) as reader:
        rows = []
        for i in range(len(reader)):
            f = reader.frame(i)
            rows.append(f.sum(axis=tuple(range(1, f.ndim))) * cell if f.ndim > 1 else f)
        times = reader.times
    positions = scene.coords[axis]
    if scene.moves(axis):
        positions = np.array([scene.lab_coords(axis, i) for i in range(len(times))])
    return DensityMap(times, positions, np.array(rows))


def _density_panel(fig, amap, scene, T, L) -> None:
    """Position (the first axis) against time, log scale: the density
    integrated over the other axes (and the column's, for a column scene)."""
    from matplotlib.colors import LogNorm   # lazy: matplotlib loads with the first figure

    dmap = density_map(scene)
    times, x, dens = dmap.times, dmap.positions, dmap.density
    axis = scene.axes[0]
    falls = x.ndim == 2
    if falls:   # each row at its own lab positions: cells follow the grid's fall between snapshots
        times = np.broadcast_to(times[:, None], x.shape)
    peak = float(np.max(dens)) if dens.size else 0.0
    if peak > 0 and len(dmap.times) > 1:
        mesh = amap.pcolormesh(x, times, np.maximum(dens, peak * MAP_FLOOR * 0.1), shading="nearest",
                               cmap=style.DENSITY_CMAP, norm=LogNorm(vmin=peak * MAP_FLOOR, vmax=peak),
                               rasterized=True)
        bar = fig.colorbar(mesh, ax=amap, fraction=0.05, pad=0.02)
        integrated = scene.axes[1:] + ([scene.column[0]] if scene.column else [])
        what = "density" if not integrated else f"density integrated over {', '.join(integrated)}"
        unit = scene.units["density"] if scene.ndim == 1 else f"{scene.units['length']}-1"
        bar.set_label(f"{what} ({style.pretty_unit(unit)})")
    else:
        amap.plot(dmap.lab_positions(0), dens[0] if len(dens) else np.zeros_like(dmap.lab_positions(0)),
                  color=style.DENSITY)
        amap.text(0.5, 0.9, "one snapshot only", transform=amap.transAxes, ha="center")
    t = dmap.times
    for layer in scene.layers:
        if layer.axis == axis:
            if falls and len(t) > 1:   # the layers belong to the grid: they fall with it
                spans = np.array([scene.layer_span(layer, i) for i in range(len(t))])
                amap.fill_betweenx(t, spans[:, 0], spans[:, 1], color="white", alpha=0.15, lw=0)
            else:
                lo, hi = scene.layer_span(layer, 0)
                amap.axvspan(lo, hi, color="white", alpha=0.15, lw=0)
    for name, dax, pos in scene.detectors:
        if dax == axis:   # fixed in the lab
            amap.axvline(pos, color=style.DETECTOR, lw=0.8, ls="--")
    if falls:
        lo, hi = scene.visited(axis)
        extent = float(np.ptp(scene.coords[axis]))
        if hi - lo > FOLLOW_SPAN * extent:   # the packet's band is a sliver: mark the grid's path
            for edge in (x[:, 0], x[:, -1]):
                amap.plot(edge, t, color=style.ABSORBER, lw=0.6, ls=":")
        amap.set_xlim(min(lo, float(x.min())), max(hi, float(x.max())))
    amap.set_xlabel(scene.axis_label(axis))
    amap.set_ylabel(f"time ({T})")
    amap.set_title("probability density over " + ("lab " if scene.offsets is not None else "")
                   + "position and time (log scale)", loc="left")


def _column_image(fig, amap, scene) -> None:
    """A 3D run's column density along ``scene.column`` at its last
    snapshot: the image a camera looking along that axis records."""
    a, b = scene.axes
    with FrameReader(scene.path, column=scene.column) as reader:
        t = float(reader.times[-1])
        last = len(reader) - 1
        frame = reader.frame(last)
    # a falling grid: at its lab positions of that snapshot
    mesh = amap.pcolormesh(scene.lab_coords(a, last), scene.lab_coords(b, last), frame.T, shading="nearest",
                           cmap=style.DENSITY_CMAP, rasterized=True)
    bar = fig.colorbar(mesh, ax=amap, fraction=0.05, pad=0.02)
    bar.set_label(f"column density along {scene.column[0]} ({style.pretty_unit(scene.units['density'])})")
    for name, dax, pos in scene.detectors:
        (amap.axvline if dax == a else amap.axhline)(pos, color=style.DETECTOR, lw=0.8, ls="--")
    amap.set_xlabel(scene.axis_label(a))
    amap.set_ylabel(scene.axis_label(b))
    amap.set_aspect("equal")
    amap.set_title(f"seen along {scene.column[0]} at t = {t:.6g} {style.pretty_unit(scene.units['time'])}",
                   loc="left")


def plot_run(path, output, size=(1200, 900), dpi: int = 100, column: str | None = None) -> Path:
    """Four panels of one run, written to ``output`` (.png/.pdf/.svg).
    ``column``: the density panel shows the column density along that axis
    (:func:`~wavesweep.viz.scene.column_scene`): for a 2D run over the other
    axis and time, for a 3D run the camera's image at the last snapshot."""
    output = _check_output(output)
    fig = run_figure(path, size, dpi, column)
    with style.style():
        return _save(fig, output)


def run_figure(path, size=(1200, 900), dpi: int = 100, column: str | None = None):
    """The matplotlib Figure :func:`plot_run` writes (density panel first)."""
    scene = read_scene(path)
    if column is not None:
        if scene.surfaces is not None and scene.ndim == 3:
            raise JobError("--column", "a 3D run on coupled surfaces is summed over its other axes in the "
                                       "figure; see its column density with `wavesweep movie --column`")
        scene = column_scene(scene, column)
    ds = open_result(path, require=("time", "norm"), surfaces=True)
    try:
        ds = ds.load()
    finally:
        ds.close()
    if scene.surfaces is not None:
        return surfaces_figure(scene, ds, size, dpi)
    T, L = style.pretty_unit(scene.units["time"]), style.pretty_unit(scene.units["length"])
    t = ds.time.values
    with style.style():
        fig = style.figure(*size, dpi)
        screens = "screen_probability" in ds and ds.sizes.get("screen", 0) > 0
        if screens:   # resolved detectors: a third row, what arrived where on each screen
            grid = fig.add_gridspec(3, 2, height_ratios=[1.25, 1, 1])
            (amap, abooks), (aflux, aenergy) = [[fig.add_subplot(grid[r, c]) for c in range(2)] for r in range(2)]
            _screen_panels(fig, grid[2, :], ds, L)
        else:
            axes = fig.subplots(2, 2, gridspec_kw={"height_ratios": [1.25, 1]})
            (amap, abooks), (aflux, aenergy) = axes

        if scene.column is not None and scene.ndim == 2:
            _column_image(fig, amap, scene)
        else:
            _density_panel(fig, amap, scene, T, L)

        colors = style.line_colors()
        abooks.plot(t, ds.norm.values, color=colors[0], label="on the grid")
        if "absorbed" in ds and ds.sizes.get("boundary", 0):
            for j, face in enumerate(ds.boundary.values):
                abooks.plot(t, ds.absorbed.values[:, j], color=colors[(j + 1) % len(colors)],
                            label=f"absorbed at {face}")
            total = ds.norm.values + ds.absorbed.values.sum(axis=1)
            abooks.plot(t, total, color="black", lw=0.8, ls=":", label="sum")
        abooks.set_ylim(-0.03, 1.05)
        abooks.set_xlabel(f"time ({T})")
        abooks.set_ylabel("probability")
        abooks.set_title("where the probability is", loc="left")
        abooks.legend(frameon=False, loc="center right")

        if "flux" in ds and ds.sizes.get("detector", 0):
            for j, name in enumerate(ds.detector.values):
                aflux.plot(t, ds.flux.values[:, j], color=colors[j % len(colors)],
                           label=f"{style.plain(name)} ({float(ds.detector_x.values[j]):.4g} {L})")
            aflux.axhline(0, color="black", lw=0.5)
            aflux.legend(frameon=False)
            aflux.set_ylabel(f"probability current ({style.pretty_unit(ds.flux.attrs.get('units', ''))})")
        else:
            aflux.text(0.5, 0.5, "no detectors in this run", transform=aflux.transAxes,
                       ha="center", va="center", color="#777777")
        aflux.set_xlabel(f"time ({T})")
        aflux.set_title("flux through the detectors", loc="left")

        if "energy" in ds:
            e = ds.energy.values
            E = style.pretty_unit(ds.energy.attrs.get("units", ""))
            # <H> is per unit of what is on the grid: once the absorbers take
            # the fast parts it changes for that reason alone
            taken = (ds.absorbed.values.sum(axis=1) if "absorbed" in ds and ds.sizes.get("boundary", 0)
                     else np.zeros_like(t))
            clean = taken <= 1e-6
            aenergy.plot(t[clean], (e - e[0])[clean], color=colors[2], label="nothing absorbed yet")
            if not clean.all():
                aenergy.plot(t[~clean], (e - e[0])[~clean], color=colors[2], ls=":",
                             label="after absorption began (<H> of what remains)")
                aenergy.legend(frameon=False)
            aenergy.axhline(0, color="black", lw=0.5)
            aenergy.set_ylabel(f"<H>(t) - <H>(0) ({E})")
            aenergy.set_title(f"energy drift of what is on the grid (<H>(0) = {e[0]:.6g} {E})", loc="left")
        aenergy.set_xlabel(f"time ({T})")
        fig.suptitle(f"{style.plain(scene.title)}   [{ds.attrs.get('run_id', '')}, {ds.attrs.get('scheme', '')}, "
                     f"dt = {ds.attrs.get('dt', '')} {T}]", fontsize=10)
        fig.tight_layout()
        return fig


def _screen_panels(fig, cell, ds, L) -> None:
    """What arrived where: each resolved detector's screen_probability (the
    time integral of its flux density) against the transverse position (2D:
    one curve per screen; 3D: one map per screen)."""
    var = ds.screen_probability
    across = [d for d in var.dims if d != "screen"]
    unit = style.pretty_unit(var.attrs.get("units", ""))
    names = [str(n) for n in ds.screen.values]
    colors = style.line_colors()
    if len(across) == 1:
        ax = fig.add_subplot(cell)
        for i, name in enumerate(names):
            ax.plot(ds[across[0]].values, var.values[i], color=colors[i % len(colors)], label=style.plain(name))
        ax.axhline(0, color="black", lw=0.5)
        ax.legend(frameon=False)
        ax.set_xlabel(f"{across[0]} ({L})")
        ax.set_ylabel(f"probability per length ({unit})")
        ax.set_title("what arrived where: the time integral of the flux density along each screen", loc="left")
        return
    cells = cell.subgridspec(1, len(names))
    for i, name in enumerate(names):
        ax = fig.add_subplot(cells[0, i])
        mesh = ax.pcolormesh(ds[across[0]].values, ds[across[1]].values, var.values[i].T, shading="nearest",
                             cmap=style.DENSITY_CMAP, rasterized=True)
        bar = fig.colorbar(mesh, ax=ax, fraction=0.05, pad=0.02)
        bar.set_label(f"probability per area ({unit})")
        ax.set_xlabel(f"{across[0]} ({L})")
        ax.set_ylabel(f"{across[1]} ({L})")
        ax.set_title(f"what arrived where on {style.plain(name)}", loc="left")


# -- one run on coupled surfaces --------------------------------------------------------
# The books of a coupled run beside each surface's population (style.SURFACE_STYLES): in
# grey-scale told apart from the surfaces' lines and each other by line style and width.
TOTAL_STYLE = {"color": "#000000", "ls": (0, (6, 2)), "lw": 1.0}
ABSORBED_STYLE = {"color": "#777777", "ls": "-", "lw": 2.6, "alpha": 0.6}
SUM_STYLE = {"color": "#000000", "ls": ":", "lw": 0.8}
DETECTOR_MARKERS = ("", "o", "s", "^", "v", "D")


def surface_density_maps(scene) -> dict:
    """Surface name -> :class:`DensityMap` of a run on coupled surfaces: each
    surface's density over position (the first axis) and time, integrated
    over the other axes, read in one streaming pass over the snapshots."""
    axis = scene.axes[0]
    others = [scene.coords[a] for a in scene.axes[1:]]
    cell = float(np.prod([abs(c[1] - c[0]) for c in others])) if others else 1.0
    rows = {s: [] for s in scene.surfaces}
    with FrameReader(scene.path, column=scene.column) as reader:
        for i in range(len(reader)):
            for s, f in zip(scene.surfaces, reader.frame(i)):
                rows[s].append(f.sum(axis=tuple(range(1, f.ndim))) * cell if f.ndim > 1 else f)
        times = reader.times
    return {s: DensityMap(times, scene.coords[axis], np.array(r)) for s, r in rows.items()}


def surfaces_figure(scene, ds, size=(1200, 900), dpi: int = 100):
    """The summary figure of a run on coupled surfaces (``scene.surfaces``):
    along the top each surface's density over position and time (log scale,
    one colour scale for all); then each surface's population (and, when
    the run recorded ``population_adiabatic``, each adiabatic state's, thin
    grey lines with markers) with what is on the grid in all, what the absorbers took and their sum; each
    surface's potential along the first axis with the couplings |V_ab| on a
    right-hand scale; each surface's flux through the detectors; the drift
    of the total energy.  Each surface keeps one colour, line style and width
    throughout (:func:`style.surface_style`).  ``ds``: the loaded result."""
    from matplotlib.colors import LogNorm   # lazy: matplotlib loads with the first figure

    T, L = style.pretty_unit(scene.units["time"]), style.pretty_unit(scene.units["length"])
    E = style.pretty_unit(scene.units["energy"])
    t = ds.time.values
    surfaces = scene.surfaces
    axis = scene.axes[0]
    c = scene.coords[axis]
    half = abs(float(c[1] - c[0])) / 2 if len(c) > 1 else 0.5
    span = (float(c.min()) - half, float(c.max()) + half)     # the grid's cells along the first axis
    styles = {s: style.surface_style(j) for j, s in enumerate(surfaces)}
    with style.style():
        fig = style.figure(*size, dpi)
        fig.set_layout_engine("constrained")   # the maps' shared colour bar takes its room from them only
        grid = fig.add_gridspec(3, 2, height_ratios=[1.2, 1, 1])
        maps = [fig.add_subplot(cell) for cell in grid[0, :].subgridspec(1, len(surfaces))]
        apop, apot = fig.add_subplot(grid[1, 0]), fig.add_subplot(grid[1, 1])
        aflux, aenergy = fig.add_subplot(grid[2, 0]), fig.add_subplot(grid[2, 1])

        # -- each surface's density over position and time, one colour scale
        dmaps = surface_density_maps(scene)
        peak = max((float(np.max(m.density)) for m in dmaps.values() if m.density.size), default=0.0)
        integrated = scene.axes[1:] + ([scene.column[0]] if scene.column else [])
        mesh = None
        for j, (amap, s) in enumerate(zip(maps, surfaces)):
            m = dmaps[s]
            if peak > 0 and len(m.times) > 1:
                mesh = amap.pcolormesh(m.positions, m.times, np.maximum(m.density, peak * MAP_FLOOR * 0.1),
                                       shading="nearest", cmap=style.DENSITY_CMAP,
                                       norm=LogNorm(vmin=peak * MAP_FLOOR, vmax=peak), rasterized=True)
            else:
                amap.plot(m.positions, m.density[0] if len(m.density) else np.zeros_like(m.positions),
                          **styles[s])
                amap.text(0.5, 0.9, "one snapshot only", transform=amap.transAxes, ha="center")
            _mark_layers_and_detectors(amap, scene, axis, colour="white", alpha=0.15)
            amap.set_xlim(*span)
            amap.set_xlabel(scene.axis_label(axis))
            if j == 0:
                amap.set_ylabel(f"time ({T})")
            else:
                amap.tick_params(labelleft=False)
            amap.set_title(f"surface {style.plain(s)}", loc="left", color=styles[s]["color"], fontweight="bold")
            for spine in amap.spines.values():   # the map framed in its surface's colour and line style
                spine.set_visible(True)
                spine.set(**styles[s])
        if mesh is not None:
            bar = fig.colorbar(mesh, ax=maps, fraction=0.05, pad=0.02)
            what = "density" if not integrated else f"density integrated over {', '.join(integrated)}"
            unit = scene.units["density"] if scene.ndim == 1 else f"{scene.units['length']}-1"
            bar.set_label(f"{what} ({style.pretty_unit(unit)}), log scale")

        # -- populations and the books
        norm = ds.norm.transpose("time", "surface")
        for s in surfaces:
            apop.plot(t, norm.sel(surface=s).values, label=f"on {style.plain(s)}", **styles[s])
        if "population_adiabatic" in ds:   # record.adiabatic: on each local eigenstate, thin grey with markers
            adiabatic = ds.population_adiabatic.transpose("time", "state")
            for k, state in enumerate(adiabatic.state.values):
                apop.plot(t, adiabatic.values[:, k], label=f"adiabatic state {int(state)}",
                          **style.adiabatic_style(k))
        on_grid = norm.values.sum(axis=1)
        apop.plot(t, on_grid, label="on the grid, all surfaces", **TOTAL_STYLE)
        if "absorbed" in ds and ds.sizes.get("boundary", 0):
            taken = ds.absorbed.transpose("time", "surface", "boundary").values.sum(axis=(1, 2))
            apop.plot(t, taken, label="absorbed, all surfaces and faces", **ABSORBED_STYLE)
            apop.plot(t, on_grid + taken, label="sum", **SUM_STYLE)
        else:
            taken = np.zeros_like(t)
        apop.set_ylim(-0.03, 1.05)
        apop.set_xlabel(f"time ({T})")
        apop.set_ylabel("probability")
        apop.set_title("population of each surface", loc="left")
        apop.legend(frameon=False, loc="best", fontsize=7)

        # -- the potentials along the first axis, the couplings on their own scale
        _surface_potentials_panel(apot, scene, axis, styles, E)
        apot.set_xlim(*span)

        # -- flux through the detectors, per surface
        if "flux" in ds and ds.sizes.get("detector", 0):
            flux = ds.flux.transpose("time", "surface", "detector")
            for k, name in enumerate(ds.detector.values):
                marker = DETECTOR_MARKERS[k % len(DETECTOR_MARKERS)]
                for s in surfaces:
                    aflux.plot(t, flux.sel(surface=s).values[:, k], marker=marker or None, ms=3,
                               markevery=max(1, len(t) // 12), label=f"{style.plain(name)} "
                               f"({float(ds.detector_x.values[k]):.4g} {L}) on {style.plain(s)}", **styles[s])
            aflux.axhline(0, color="black", lw=0.5)
            aflux.legend(frameon=False, fontsize=7)
            aflux.set_ylabel(f"probability current ({style.pretty_unit(ds.flux.attrs.get('units', ''))})")
        else:
            aflux.text(0.5, 0.5, "no detectors in this run", transform=aflux.transAxes,
                       ha="center", va="center", color="#777777")
        aflux.set_xlabel(f"time ({T})")
        aflux.set_title("flux through the detectors on each surface", loc="left")

        # -- the total energy (couplings included), as for one surface
        if "energy" in ds:
            e = ds.energy.values
            clean = taken <= 1e-6
            colors = style.line_colors()
            aenergy.plot(t[clean], (e - e[0])[clean], color=colors[2], label="nothing absorbed yet")
            if not clean.all():
                aenergy.plot(t[~clean], (e - e[0])[~clean], color=colors[2], ls=":",
                             label="after absorption began (<H> of what remains)")
                aenergy.legend(frameon=False)
            aenergy.axhline(0, color="black", lw=0.5)
            aenergy.set_ylabel(f"<H>(t) - <H>(0) ({E})")
            aenergy.set_title(f"energy drift, all surfaces (<H>(0) = {e[0]:.6g} {E})", loc="left")
        aenergy.set_xlabel(f"time ({T})")
        fig.suptitle(f"{style.plain(scene.title)}   [{ds.attrs.get('run_id', '')}, {ds.attrs.get('scheme', '')}, "
                     f"dt = {ds.attrs.get('dt', '')} {T}; coupled surfaces "
                     f"{', '.join(style.plain(s) for s in surfaces)}]", fontsize=10)
        return fig


def _mark_layers_and_detectors(ax, scene, axis, colour, alpha) -> None:
    """Absorbing layers shaded and detectors marked along ``axis`` (a
    coupled run's grid stays in the lab)."""
    for layer in scene.layers:
        if layer.axis == axis:
            ax.axvspan(layer.start, layer.stop, color=colour, alpha=alpha, lw=0)
    for name, dax, pos in scene.detectors:
        if dax == axis:
            ax.axvline(pos, color=style.DETECTOR, lw=0.8, ls="--")


def _surface_potentials_panel(ax, scene, axis, styles, E) -> None:
    """Each surface's V_ss along ``axis`` in its style (beyond 1D the lowest
    value over the other axes: the valley floor a packet follows) and each
    pair's |V_ab| on a right-hand scale, in a style per pair
    (:func:`style.coupling_style`; beyond 1D its largest value over the
    other axes)."""
    x = scene.coords[axis]
    rest = tuple(range(1, scene.ndim))
    handles = []
    for s, v in (scene.surface_potentials or {}).items():
        handles += ax.plot(x, v.min(axis=rest) if rest else v, label=f"V on {style.plain(s)}", **styles[s])
    ax.set_xlabel(scene.axis_label(axis))
    ax.set_ylabel(f"V ({E})" + (f", lowest over {', '.join(scene.axes[1:])}" if rest else ""))
    _mark_layers_and_detectors(ax, scene, axis, colour=style.ABSORBER, alpha=0.3)
    if scene.couplings:
        colour = style.COUPLING[0]
        cax = ax.twinx()
        cax.spines["right"].set_visible(True)
        for k, (pair, v) in enumerate(scene.couplings.items()):   # each pair in a style of its own
            a, _, b = pair.partition(",")
            values = np.abs(v).max(axis=rest) if rest else np.abs(v)
            handles += cax.plot(x, values, **style.coupling_style(k),
                                label=f"|V| coupling {style.plain(a)} and {style.plain(b)} (right scale)")
        top = max(float(np.abs(v).max()) for v in scene.couplings.values())
        cax.set_ylim(0, 1.1 * top if top > 0 else 1.0)
        cax.set_ylabel(f"|V$_{{ab}}$| ({E})" + (f", largest over {', '.join(scene.axes[1:])}" if rest else ""),
                       color=colour)
        cax.tick_params(axis="y", colors=colour)
    if scene.surface_potentials is None and not scene.couplings:
        ax.text(0.5, 0.5, "potentials not drawn (a column density)", transform=ax.transAxes,
                ha="center", va="center", color="#777777")
    ax.set_title("potential of each surface and the coupling", loc="left")
    if handles:
        ax.legend(handles=handles, frameon=False, fontsize=7, loc="best")


# -- a study ---------------------------------------------------------------------------
_STUDY_PANELS = (
    ("final_absorbed", "boundary", "absorbed at the end (transmission / reflection)", "probability"),
    ("transmitted_beyond", "detector", "beyond each detector at the end", "probability"),
    ("arrival_mean", "detector", "mean arrival time", "time"),
)


def plot_study(path, output, size=(1200, 900), dpi: int = 100) -> Path:
    """Transmission, reflection and mean arrival time against the swept
    parameters: curves for one parameter, a family of curves for two (one
    per value of the second, up to 8; a colour map beyond).

    A study of coupled surfaces draws each surface apart: with one swept
    parameter a line per (member, surface), told apart by line style; with
    two, each probability panel becomes one row per surface (on one shared
    scale, so the branching between the surfaces reads off the rows), the
    mean arrival time one row over what crossed on any surface.  A
    probability panel takes a log scale when its values span more than a
    factor 30, judged on the values above ``ROUND_OFF`` times its largest
    only (:func:`probability_scale`)."""
    output = _check_output(output)
    with xr.open_dataset(path, engine="netcdf4") as ds:
        ds = ds.load()
    dims = [d for d in ds.attrs.get("sweep_dimensions", "").split() if d]
    if not dims:
        raise JobError("RUN.nc", f"{str(path)!r} names no swept parameter; it is not a study summary")
    if dims == ["run"]:                    # zip mode: the first parameter along the runs
        keys = [c for c in ds.coords if ds[c].dims == ("run",) and c != "run"]
        if keys:
            ds = ds.swap_dims({"run": keys[0]})
            dims = [keys[0]]
    panels = [p for p in _STUDY_PANELS if p[0] in ds and np.isfinite(ds[p[0]].values).any()]
    T = style.pretty_unit(ds.time.attrs.get("units", ""))
    surfaces = [str(v) for v in ds["surface"].values] if "surface" in ds.dims else None
    per_surface_rows = surfaces is not None and len(dims) > 1
    # each drawn row: (variable, its values, member dimension, title, kind, surface or None)
    rows = []
    totals = _over_all_surfaces(ds) if per_surface_rows else ds
    for var, member_dim, title, kind in panels:
        if per_surface_rows and kind == "probability" and "surface" in ds[var].dims:
            # families or maps of every surface on one axes would be unreadable: a row per surface
            rows += [(var, ds[var].sel(surface=s), member_dim, title, kind, s) for s in surfaces]
        else:
            rows.append((var, totals[var], member_dim, title, kind, None))
    unfinished = (float(np.nanmax(ds.final_norm.sum("surface").values if "surface" in ds.final_norm.dims
                                  else ds.final_norm.values)) if "final_norm" in ds else 0.0)
    with style.style():
        fig = style.figure(*size, dpi)
        axs = fig.subplots(len(rows), 1, squeeze=False)[:, 0]
        first_of = {}                      # variable -> its first row's axes (the rows share its scale)
        scales = []                        # (axes, values) of the probability panels drawn as curves
        for ax, (var, da, member_dim, title, kind, surface) in zip(axs, rows):
            members = [str(m) for m in ds[member_dim].values] if member_dim in da.dims else [None]
            quantity = "probability" if kind == "probability" else f"time ({T})"
            prefix = "absorbed at " if member_dim == "boundary" else "detector "
            limits = None
            if surface is not None and members[0] is not None and ds.sizes[dims[1]] > 8:
                # a map draws one member: the one holding the most probability on any surface (the
                # first face of a packet that all went the other way would map round-off only)
                peak = ds[var].max([d for d in ds[var].dims if d != member_dim], skipna=True)
                members.sort(key=lambda m: -float(np.nan_to_num(peak.sel({member_dim: m}), nan=-np.inf)))
            if surface is not None:        # one scale for the rows of all surfaces: the branching reads off
                whole = ds[var].sel({member_dim: members[0]}) if members[0] is not None else ds[var]
                limits = _finite_range(whole.values)
                if var in first_of:
                    ax.sharey(first_of[var])
            if not _draw_against(ax, da, member_dim, members, dims, ds, quantity, prefix, limits=limits):
                ax.set_ylabel(quantity)
                if kind == "probability" and var not in first_of:
                    scales.append((ax, (ds[var] if surface is not None else da).values))
                if var == "arrival_mean" and len(dims) == 1 and "arrival_q10" in ds and "surface" not in da.dims:
                    for j, m in enumerate(members):
                        ax.fill_between(ds[dims[0]].values, ds.arrival_q10.sel(detector=m).values,
                                        ds.arrival_q90.sel(detector=m).values,
                                        color=style.line_colors()[j % 7], alpha=0.15, lw=0)
                    ax.text(0.5, 0.97, "bands: 10-90 % of arrivals", transform=ax.transAxes,
                            ha="center", va="top", fontsize=7, color="#555555")
            first_of.setdefault(var, ax)
            if surface is not None:
                title += f", on surface {style.plain(surface)}"
            elif surfaces is not None:
                title += (" per surface (line style)" if "surface" in da.dims else
                          " (all surfaces" + (": their sum" if kind == "probability" else
                                              ": the mean over what crossed on any") + ")")
            ax.set_title(title, loc="left")
        for ax, values in scales:          # once every row sharing the scale holds its lines
            log, limits = probability_scale(values)
            if log:                        # transmission spans decades across a resonance
                ax.set_yscale("log")
                if limits is not None:
                    ax.set_ylim(*limits)
                    for row in ax.get_shared_y_axes().get_siblings(ax):   # the rows of all surfaces
                        row.set_title(row.get_title(loc="left") + f"   (values below {ROUND_OFF:.0e} of the "
                                      "largest, round-off, lie below the axis)", loc="left")
        title = style.plain(ds.attrs.get("title", ""))
        if unfinished > 1e-3:       # the books are not closed: the numbers are not final
            title += (f"\n(some runs ended with up to {unfinished:.3g} of probability still on the grid: "
                      "absorbed and arrival numbers are not final)")
        fig.suptitle(title, fontsize=10)
        fig.tight_layout()
        return _save(fig, output)


# A probability below this fraction of a panel's largest is round-off (1e-28 on a surface the
# packet never reached): it neither chooses the panel's scale nor sets its lower limit.
ROUND_OFF = 1e-12
LOG_SPAN = 30.0          # values spanning more than this factor are drawn on a log scale


def probability_scale(values) -> tuple[bool, tuple[float, float] | None]:
    """Whether a probability panel with ``values`` takes a log scale, and
    its (lower, upper) limits when values were left out (None: matplotlib's
    own).

    Judged on the finite values of at least ``ROUND_OFF`` times the largest:
    log when they are all positive and span more than ``LOG_SPAN``; the
    limits then leave the margin matplotlib leaves on a log axis (5 % of the
    decades spanned) around those values only, so round-off values (below
    the axis) do not squeeze 0.98 / 0.02 into the top decade of a 1e-28..1
    axis."""
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if not v.size or v.max() <= 0:
        return False, None
    kept = v[v >= ROUND_OFF * v.max()]
    low, high = float(kept.min()), float(kept.max())
    if high / low <= LOG_SPAN:
        return False, None
    if kept.size == v.size:
        return True, None
    margin = (high / low) ** 0.05
    return True, (low / margin, high * margin)


def _finite_range(values) -> tuple[float, float] | None:
    """(smallest, largest) of the finite ``values``; None if there are none."""
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    return (float(v.min()), float(v.max())) if v.size else None


def _over_all_surfaces(ds):
    """A coupled study's panels summed over the surfaces: probabilities
    added, the mean arrival time over what crossed on any surface (each
    surface's mean weighted by its arrival probability)."""
    out = ds.copy()
    for var in ("final_absorbed", "transmitted_beyond", "final_norm"):
        if var in ds and "surface" in ds[var].dims:
            out[var] = ds[var].sum("surface", min_count=1).assign_attrs(ds[var].attrs)
    if "arrival_mean" in ds and "surface" in ds["arrival_mean"].dims and "arrival_probability" in ds:
        p = ds["arrival_probability"].where(np.isfinite(ds["arrival_mean"]), 0.0)
        out["arrival_mean"] = ((ds["arrival_mean"].fillna(0.0) * p).sum("surface") / p.sum("surface")
                               ).assign_attrs(ds["arrival_mean"].attrs)
    return out


def _label(ds, dim) -> str:
    c = ds[dim]
    unit = style.pretty_unit(c.attrs.get("units", ""))
    return f"{c.attrs.get('sweep_key', dim)}" + (f" ({unit})" if unit and unit != "1" else "")


def _draw_against(ax, da, member_dim, members, dims, ds, quantity, prefix="", limits=None) -> bool:
    """Curves (False) or, for two parameters with many values, a map (True)
    whose colour scale spans ``limits`` (smallest, largest) when given (the
    rows of one quantity, one per surface, share it)."""
    colors = style.line_colors()
    styles = ("-", "--", ":", "-.")
    x = dims[0]
    if len(dims) == 1 and "surface" in da.dims:   # coupled surfaces: colour per member, style per surface
        for j, m in enumerate(members):
            for i, surface in enumerate(str(v) for v in da["surface"].values):
                y = (da.sel({member_dim: m}) if m is not None else da).sel(surface=surface)
                line = style.surface_style(i)
                ax.plot(ds[x].values, y.values, marker="os^vDx"[i % 6], ms=3.5, color=colors[j % len(colors)],
                        ls=line["ls"], lw=line["lw"],
                        label=(f"{prefix}{m} on {surface}" if m is not None else f"on {surface}"))
    elif len(dims) == 1:
        for j, m in enumerate(members):
            y = da.sel({member_dim: m}) if m is not None else da
            ax.plot(ds[x].values, y.values, marker="o", ms=3, color=colors[j % len(colors)],
                    label=f"{prefix}{m}" if m is not None else None)
    elif len(dims) == 2 and ds.sizes[dims[1]] <= 8:
        for j, m in enumerate(members):
            for k, v in enumerate(ds[dims[1]].values):
                y = (da.sel({member_dim: m}) if m is not None else da).sel({dims[1]: v})
                ax.plot(ds[x].values, y.values, marker="o", ms=3, color=colors[k % len(colors)],
                        ls=styles[j % len(styles)],
                        label=f"{prefix}{m}, {_label(ds, dims[1])} = {v:g}" if m else f"{_label(ds, dims[1])} = {v:g}")
    else:                                   # a map of the first member over the first two dims
        y = da.sel({member_dim: members[0]}) if members[0] is not None else da
        y = y.transpose(dims[1], dims[0], ...)
        vmin, vmax = limits if limits is not None else (None, None)
        mesh = ax.pcolormesh(ds[dims[0]].values, ds[dims[1]].values, y.values, shading="nearest",
                             cmap=style.DENSITY_CMAP, vmin=vmin, vmax=vmax)
        ax.figure.colorbar(mesh, ax=ax, label=f"{members[0] or ''} {quantity}".strip())
        ax.set_ylabel(_label(ds, dims[1]))
        ax.set_xlabel(_label(ds, x))
        return True
    ax.set_xlabel(_label(ds, x))
    if ax.get_legend_handles_labels()[0]:
        ax.legend(frameon=False, fontsize=7, ncol=2)
    return False
