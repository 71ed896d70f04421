"""`plot` and `movie` of a run in a falling frame draw lab positions.

A grid with ``[grid] frame = "free_fall"`` follows the packet's classical
fall; its result stores ``snapshot_frame_offset`` (lab position = grid
coordinate + offset).  The checks read what the painters and the summary
figure actually draw (artists' data, image extents, axis limits), not
pixels: every frame sits at grid coordinate + snapshot_frame_offset, the
drawn density maximum follows the free-fall centre x(t) = -g t^2 / 2 of a
packet released at rest (textbook kinematics, uniform acceleration) to
within a grid step, and the axes cover the region the grid visits.

Jobs in cold-atom units (um, ms, Da) for Rb-87 (86.909 Da, from memory);
g = 9.80665 m s^-2 (standard gravity, the conventional value, CODATA's
scipy.constants.g) = 9.80665 um ms^-2.
"""
from __future__ import annotations

import copy

import numpy as np
import pytest
import xarray as xr
from scipy.constants import g as STANDARD_GRAVITY

from conftest import make_job
from wavesweep.cli import main
from wavesweep.run import Simulation
from wavesweep.viz import movie
from wavesweep.viz.movie import MovieOptions, painter_for, render_frames
from wavesweep.viz.scene import FrameReader, column_scene, read_scene
from wavesweep.viz.summary import density_map, run_figure

G_UM_PER_MS2 = STANDARD_GRAVITY * 1e6 / 1e6     # m s^-2 -> um ms^-2 (1e6 um per m, 1e6 ms^2 per s^2)

DROP_1D = {
    "title": "drop 1D",
    "units": {"length": "um", "time": "ms", "mass": "Da"},
    "particle": {"mass": 86.909},
    "grid": {"frame": "free_fall", "boundary": "box", "x": {"min": -20.0, "max": 20.0, "points": 64}},
    "potential": [{"kind": "gravity"}],
    "packet": {"kind": "gaussian", "center": 0.0, "width": 1.5},
    "evolve": {"dt": 0.02, "duration": 4.0},
    "absorber": {"kind": "cap", "thickness": 5.0},
    "record": {"every": 0.1, "snapshot_every": 0.5, "snapshot_psi": True},
    "detector": [{"name": "sheet", "x": -50.0}],
}
DROP_2D = {
    "title": "drop 2D",
    "units": {"length": "um", "time": "ms", "mass": "Da"},
    "particle": {"mass": 86.909},
    "grid": {"frame": "free_fall", "boundary": "box",
             "x": {"min": -16.0, "max": 16.0, "points": 32}, "y": {"min": -20.0, "max": 20.0, "points": 40}},
    "potential": [{"kind": "gravity", "axis": "y"}],
    "packet": {"kind": "gaussian", "center": [0.0, 0.0], "width": [1.5, 1.5]},
    "evolve": {"dt": 0.02, "duration": 4.0},
    "absorber": {"kind": "cap", "thickness": 5.0},
    "record": {"every": 0.1, "snapshot_every": 0.5},
    "detector": [{"name": "sheet", "y": -50.0}],
}


def _run(table, folder):
    return Simulation(make_job(copy.deepcopy(table))).run(folder, progress=False)


@pytest.fixture(scope="module")
def drop_1d(tmp_path_factory):
    return _run(DROP_1D, tmp_path_factory.mktemp("drop1d"))


@pytest.fixture(scope="module")
def drop_2d(tmp_path_factory):
    return _run(DROP_2D, tmp_path_factory.mktemp("drop2d"))


def _offsets(path, axis):
    """snapshot_frame_offset along ``axis``, read independently of the scene."""
    with xr.open_dataset(path) as ds:
        off = ds.snapshot_frame_offset
        if "axis" in off.dims:
            off = off.sel(axis=axis)
        return np.asarray(off.values, float), np.asarray(ds[axis].values, float), \
            np.asarray(ds.snapshot_time.values, float)


def _fall(t):
    return -0.5 * G_UM_PER_MS2 * t ** 2


def _drawn_1d(path, options, scene=None):
    """(x drawn, y drawn, x limits, x of every line) of every frame of a 1D painter."""
    scene = scene or read_scene(path)
    painter = painter_for(scene, options)
    out = []
    with FrameReader(scene.path, column=scene.column) as reader:
        indices = list(range(len(reader)))
        painter.prepare(reader, indices)
        for i in indices:
            painter.update(painter.frame_of(reader, i), float(reader.times[i]), i)
            line = painter.lines[0]
            out.append((np.asarray(line.get_xdata(), float), np.asarray(line.get_ydata(), float),
                        painter.ax.get_xlim(), [np.array(ln.get_xdata(), float) for ln in painter.lines]))
    return painter, out


def test_a_1d_movie_draws_each_frame_at_its_lab_positions_over_the_whole_fall(drop_1d):
    offsets, x, times = _offsets(drop_1d, "x")
    dx = x[1] - x[0]
    assert offsets[-1] == pytest.approx(_fall(times[-1]), rel=1e-9)   # the frame's own record
    painter, frames = _drawn_1d(drop_1d, MovieOptions(size=(320, 180)))
    assert not painter.following and not painter.redraw    # a 78 um fall of a 40 um grid: a fixed view
    lo, hi = (x + offsets.min()).min(), (x + offsets.max()).max()
    for i, (xd, yd, xlim, _) in enumerate(frames):
        np.testing.assert_allclose(xd, x + offsets[i], rtol=0, atol=1e-12)
        assert abs(xd[np.argmax(yd)] - _fall(times[i])) <= dx
        assert xlim[0] <= lo and xlim[1] >= hi                # the view spans the visited region
        assert xlim == frames[0][2]                            # and does not jump
    assert painter.ax.get_xlabel().startswith("lab x (")
    # the absorbing layers fall with the grid; the detector stays at its lab position
    (patch, _, layer, _) = painter._moving_layers[0]
    assert patch.get_x() == pytest.approx(layer.start + offsets[-1])
    assert any(np.allclose(line.get_xdata(), -50.0) for line in painter.ax.get_lines()
               if not line.get_animated())


def test_a_long_fall_is_followed_by_a_moving_window_labelled_in_lab_positions(drop_1d, monkeypatch):
    """Past FOLLOW_SPAN grid extents the view follows the grid: each frame's
    limits are the grid's lab extent then, and the offset is printed."""
    monkeypatch.setattr(movie, "FOLLOW_SPAN", 1.5)
    offsets, x, times = _offsets(drop_1d, "x")
    painter, frames = _drawn_1d(drop_1d, MovieOptions(size=(320, 180)))
    assert painter.following == ["x"] and painter.redraw
    for i, (xd, yd, xlim, _) in enumerate(frames):
        np.testing.assert_allclose(xd, x + offsets[i], rtol=0, atol=1e-12)
        np.testing.assert_allclose(xlim, (x[0] + offsets[i], x[-1] + offsets[i]), rtol=0, atol=1e-9)
        assert abs(xd[np.argmax(yd)] - _fall(times[i])) <= x[1] - x[0]
    assert f"{offsets[-1]:+.6g}" in painter.text.get_text()
    got = []   # the whole-frame redraw path writes every frame, and they differ (the ticks move)
    render_frames(read_scene(drop_1d), MovieOptions(size=(320, 180), every=4), lambda rgb: got.append(rgb.copy()))
    assert len(got) == 3 and not np.array_equal(got[0], got[-1])


def test_parts_of_a_falling_1d_run_are_drawn_at_lab_positions(drop_1d):
    offsets, x, _ = _offsets(drop_1d, "x")
    painter, frames = _drawn_1d(drop_1d, MovieOptions(size=(320, 180), parts=True))
    assert len(painter.lines) == 4
    for i, (_, _, _, lines) in enumerate(frames):
        for xd in lines:
            np.testing.assert_allclose(xd, x + offsets[i], rtol=0, atol=1e-12)


def test_a_2d_movie_draws_the_image_at_lab_positions(drop_2d):
    offx, x, times = _offsets(drop_2d, "x")
    offy, y, _ = _offsets(drop_2d, "y")
    assert np.all(offx == 0) and offy[-1] == pytest.approx(_fall(times[-1]), rel=1e-9)
    dx, dy = x[1] - x[0], y[1] - y[0]
    scene = read_scene(drop_2d)
    painter = painter_for(scene, MovieOptions(size=(320, 180)))
    with FrameReader(scene.path) as reader:
        indices = list(range(len(reader)))
        painter.prepare(reader, indices)
        assert not painter.redraw
        xlim, ylim = painter.ax.get_xlim(), painter.ax.get_ylim()
        assert ylim[0] <= y[0] + offy.min() and ylim[1] >= y[-1] + offy.max()
        assert xlim[0] <= x[0] and xlim[1] >= x[-1]
        for i in indices:
            painter.update(painter.frame_of(reader, i), float(reader.times[i]), i)
            extent = painter.image.get_extent()
            np.testing.assert_allclose(extent, (x[0] - dx / 2, x[-1] + dx / 2,
                                                y[0] - dy / 2 + offy[i], y[-1] + dy / 2 + offy[i]), atol=1e-9)
            image = np.asarray(painter.image.get_array())          # (y, x), origin lower
            jy, jx = np.unravel_index(np.argmax(image), image.shape)
            assert abs(x[jx] + offx[i]) <= dx
            assert abs(y[jy] + offy[i] - _fall(times[i])) <= dy
            assert (painter.ax.get_xlim(), painter.ax.get_ylim()) == (xlim, ylim)
    assert painter.ax.get_ylabel().startswith("lab y (")


def test_a_2d_column_falls_in_the_movie_and_the_summary(drop_2d, tmp_path):
    offy, y, times = _offsets(drop_2d, "y")
    scene = column_scene(read_scene(drop_2d), "x")
    painter, frames = _drawn_1d(drop_2d, MovieOptions(size=(320, 180)), scene=scene)
    for i, (yd, col, ylim, _) in enumerate(frames):
        np.testing.assert_allclose(yd, y + offy[i], rtol=0, atol=1e-12)
        assert abs(yd[np.argmax(col)] - _fall(times[i])) <= y[1] - y[0]
        assert ylim[0] <= y[0] + offy.min() and ylim[1] >= y[-1]
    # the summary's density panel: each row at its lab positions, the axis over the visited region
    dmap = density_map(scene)
    for i in range(len(times)):
        np.testing.assert_allclose(dmap.lab_positions(i), y + offy[i], rtol=0, atol=1e-12)
        assert abs(dmap.lab_positions(i)[np.argmax(dmap.density[i])] - _fall(times[i])) <= y[1] - y[0]
    amap = run_figure(drop_2d, (600, 450), 50, column="x").axes[0]
    lo, hi = amap.get_xlim()
    assert lo <= y[0] + offy.min() and hi >= y[-1]
    assert amap.get_xlabel().startswith("lab y (")
    assert main(["plot", str(drop_2d), "-o", str(tmp_path / "c.png"), "--column", "x"]) == 0


def test_the_1d_summary_map_follows_the_fall(drop_1d):
    offsets, x, times = _offsets(drop_1d, "x")
    dmap = density_map(read_scene(drop_1d))
    assert dmap.positions.shape == (len(times), len(x))
    np.testing.assert_allclose(dmap.positions, x[None, :] + offsets[:, None], rtol=0, atol=1e-12)
    peaks = dmap.positions[np.arange(len(times)), np.argmax(dmap.density, axis=1)]
    assert np.all(np.abs(peaks - _fall(times)) <= x[1] - x[0])
    fig = run_figure(drop_1d, (600, 450), 50)
    amap = fig.axes[0]
    mesh = amap.collections[0]
    corners = np.asarray(mesh.get_coordinates())[..., 0]      # the cells' x edges as drawn
    assert corners.min() <= x[0] + offsets.min() and corners.max() >= x[-1]
    lo, hi = amap.get_xlim()
    assert lo <= x[0] + offsets.min() and hi >= x[-1] + offsets.max()
    assert amap.get_xlabel().startswith("lab x (")


def test_a_lab_run_has_no_offsets_and_keeps_its_labels(tmp_path):
    table = copy.deepcopy(DROP_1D)
    table["grid"]["frame"] = "lab"
    del table["detector"]                     # a lab grid's detectors must lie on it
    table["evolve"]["duration"] = 0.5
    path = _run(table, tmp_path)
    scene = read_scene(path)
    assert scene.offsets is None and scene.axis_label("x") == "x (µm)"
    painter, frames = _drawn_1d(path, MovieOptions(size=(320, 180)))
    np.testing.assert_array_equal(frames[-1][0], scene.coords["x"])
    assert frames[-1][2] == (scene.coords["x"][0], scene.coords["x"][-1])
    assert "offset" not in painter.text.get_text()
