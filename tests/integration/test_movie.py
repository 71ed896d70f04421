"""Movies and summary figures, read back as pixels.

Movies are decoded with the ffmpeg binary that imageio-ffmpeg ships (the
same one that wrote them), figures with matplotlib.image.  The physics
check is qualitative and exact at once: a free packet with p0 > 0 moves to
larger x (Ehrenfest: <x>(t) = x0 + p0 t / m), so the column of the frame
where the filled density is tallest moves right from frame to frame.
"""
from __future__ import annotations

import copy
import json

import numpy as np
import pytest
import xarray as xr

from conftest import make_job
from wavesweep.cli import main
from wavesweep.run import Simulation
from wavesweep.errors import JobError
from wavesweep.viz.movie import MovieOptions, render_frames, render_movie
from wavesweep.viz.scene import read_scene

imageio_ffmpeg = pytest.importorskip("imageio_ffmpeg")

FREE = {
    "title": "free flight",
    "grid": {"x": {"min": -40.0, "max": 40.0, "points": 512}, "boundary": "periodic"},
    "potential": [{"kind": "gaussian", "height": 0.3, "width": 1.0, "center": 25.0}],
    "packet": {"kind": "gaussian", "center": -20.0, "width": 2.0, "momentum": 2.0},
    "evolve": {"dt": 0.02, "duration": 10.0},
    "absorber": {"kind": "cap", "thickness": 6.0},
    "record": {"every": 0.5, "snapshot_every": 0.5, "snapshot_psi": True},
    "detector": [{"name": "mid", "x": 0.0}],
}
PLANE = {
    "title": "2D packet",
    "grid": {"x": {"min": -20.0, "max": 20.0, "points": 96}, "y": {"min": -12.0, "max": 12.0, "points": 56},
             "boundary": "periodic"},
    "potential": [{"kind": "gaussian", "height": 0.5, "width": 1.5}],
    "packet": {"kind": "gaussian", "center": [-8.0, 0.0], "width": [2.0, 2.0], "momentum": [1.5, 0.0]},
    "evolve": {"dt": 0.05, "duration": 6.0},
    "record": {"every": 0.5, "snapshot_every": 1.0},
    "detector": [{"name": "line", "x": 5.0}],
}


def _run(table, folder):
    return Simulation(make_job(copy.deepcopy(table))).run(folder, progress=False)


@pytest.fixture(scope="module")
def free_result(tmp_path_factory):
    return _run(FREE, tmp_path_factory.mktemp("free"))


@pytest.fixture(scope="module")
def plane_result(tmp_path_factory):
    return _run(PLANE, tmp_path_factory.mktemp("plane"))


def _frames(path):
    reader = imageio_ffmpeg.read_frames(str(path))
    meta = next(reader)
    w, h = meta["size"]
    return meta, [np.frombuffer(f, np.uint8).reshape(h, w, 3) for f in reader]


def _packet_column(rgb):
    """The column where the most pixels carry the density's fill colour
    (light blue, #0072B2 at alpha 0.25 over white: about (191, 219, 236))."""
    r, g, b = (rgb[..., i].astype(int) for i in range(3))
    fill = (b > 200) & (r < 215) & (b - r > 25)
    return int(np.argmax(fill.sum(axis=0)))


def test_a_1d_movie_has_one_frame_per_selected_snapshot_and_the_packet_moves_right(free_result, tmp_path):
    out = tmp_path / "free.mp4"
    info = render_movie(free_result, out, every=2, size=(640, 360), fps=10)
    with xr.open_dataset(free_result) as ds:
        n_snap = ds.sizes["snapshot_time"]
    assert n_snap == 21
    expected = len(range(0, n_snap, 2))
    assert info["frames"] == expected
    meta, frames = _frames(out)
    assert len(frames) == expected
    assert meta["size"] == (640, 360)
    for f in frames:
        assert f.std() > 10          # not blank: axes, text and the packet
    columns = [_packet_column(f) for f in frames[:8]]   # before the packet reaches the bump
    assert all(b > a for a, b in zip(columns, columns[1:])), columns


def test_gif_movie(free_result, tmp_path):
    out = tmp_path / "free.gif"
    assert main(["movie", str(free_result), "-o", str(out), "--every", "5", "--size", "320x180"]) == 0
    _, frames = _frames(out)
    assert len(frames) == len(range(0, 21, 5))
    assert frames[0].shape == (180, 320, 3)


def test_parts_need_the_stored_psi_and_match_the_density(free_result, tmp_path):
    with xr.open_dataset(free_result) as ds:
        re, im, dens = ds.psi_snapshot_real.values, ds.psi_snapshot_imag.values, ds.density.values
    np.testing.assert_allclose(re.astype(float) ** 2 + im.astype(float) ** 2, dens, rtol=1e-5,
                               atol=1e-6 * dens.max())
    out = tmp_path / "parts.mp4"
    assert render_movie(free_result, out, parts=True, every=10, size=(480, 270))["frames"] == 3
    # a run without stored psi: one line, exit 2
    table = copy.deepcopy(FREE)
    del table["record"]["snapshot_psi"]
    table["evolve"]["duration"] = 1.0
    plain = _run(table, tmp_path)
    assert main(["movie", str(plain), "-o", str(tmp_path / "x.mp4"), "--parts"]) == 2


def test_snapshot_psi_absent_keeps_the_run_id():
    """Only a run that asks for it differs: the same physics keeps its id."""
    table = copy.deepcopy(FREE)
    del table["record"]["snapshot_psi"]
    asked = make_job(FREE).run_id
    default = make_job(table).run_id
    table["record"]["snapshot_psi"] = False
    assert make_job(table).run_id != asked
    assert default != asked


def test_a_2d_movie_on_one_colour_scale(plane_result, tmp_path):
    for scale in ("linear", "log"):
        out = tmp_path / f"plane-{scale}.mp4"
        assert main(["movie", str(plane_result), "-o", str(out), "--scale", scale, "--size", "640x360"]) == 0
        meta, frames = _frames(out)
        assert len(frames) == 7 and meta["size"] == (640, 360)
        assert all(f.std() > 10 for f in frames)
    # the scale is fixed across frames: the same density maps to the same colour,
    # so the image part differs from frame to frame only where the packet moved
    scene = read_scene(plane_result)
    got = []
    render_frames(scene, MovieOptions(size=(640, 360)), lambda rgb: got.append(rgb.copy()))
    assert len(got) == 7 and not np.array_equal(got[0], got[-1])


def test_a_2d_column_density_is_the_marginal_of_the_packet(plane_result, tmp_path):
    """--column y on a 2D run: each frame is the density integrated over y
    (sum times dy).  At t = 0 that is the x-marginal of the initial Gaussian,
    |psi|^2 = (2 pi w^2)^(-1/2) exp(-(x - x0)^2 / (2 w^2)) (the Gaussian's
    own normalisation; from memory), up to the grid's truncation of the
    y-tails, which is far below the tolerance; the movie draws it."""
    from wavesweep.viz.scene import FrameReader, column_scene

    scene = column_scene(read_scene(plane_result), "y")
    assert scene.axes == ["x"] and scene.potential is None
    assert scene.units["density"] == f"{scene.units['length']}-1"
    assert [d[1] for d in scene.detectors] == ["x"]      # the line x = 5 crosses the column
    x = scene.coords["x"]
    with FrameReader(scene.path, column=scene.column) as reader:
        first = reader.frame(0)
        last = reader.frame(len(reader) - 1)
    expected = np.exp(-(x + 8.0) ** 2 / (2 * 2.0**2)) / np.sqrt(2 * np.pi * 2.0**2)
    np.testing.assert_allclose(first, expected, rtol=0, atol=2e-6 * expected.max())   # float32 storage
    assert abs(np.sum(last) * (x[1] - x[0]) - 1.0) < 0.05    # the norm, less what the run absorbed
    out = tmp_path / "column.mp4"
    assert main(["movie", str(plane_result), "-o", str(out), "--column", "y", "--size", "640x360"]) == 0
    meta, frames = _frames(out)
    assert len(frames) == 7
    assert _packet_column(frames[-1]) > _packet_column(frames[0])   # the packet moves towards +x
    for bad in (["--column", "z"], ["--column", "y", "--parts"]):
        assert main(["movie", str(plane_result), "-o", str(tmp_path / "bad.mp4"), *bad]) == 2


def test_record_column_stores_the_column_density(tmp_path):
    """record.column = "y": the result holds column_density(snapshot_time,
    x), the density integrated along y on the full grid.  At t = 0 it is the
    x-marginal of the Gaussian packet (closed form, as in the test above);
    with stride 2 it is decimated like the density; a 1D grid or an unknown
    axis is one line naming record.column."""
    import xarray as xr

    table = copy.deepcopy(PLANE)
    table["record"] = {**table["record"], "column": "y", "stride": 2}
    path = _run(table, tmp_path)
    with xr.open_dataset(path) as ds:
        col = ds.column_density
        assert col.dims == ("snapshot_time", "x") and col.sizes["x"] == ds.sizes["x"] == 48
        assert col.attrs["units"] == f"{ds.x.attrs['units']}-1"
        x = ds.x.values
        expected = np.exp(-(x + 8.0) ** 2 / (2 * 2.0**2)) / np.sqrt(2 * np.pi * 2.0**2)
        np.testing.assert_allclose(col.values[0], expected, rtol=0, atol=2e-6 * expected.max())
        # every second x (stride 2) times twice dx: the norm of the last frame (no absorber)
        assert float(col.values[-1].sum()) * (x[1] - x[0]) == pytest.approx(1.0, abs=1e-4)
    for grid, column in ((FREE["grid"], "x"), (PLANE["grid"], "w")):
        bad = copy.deepcopy(PLANE)
        bad["grid"] = grid
        if grid is FREE["grid"]:
            bad["packet"] = FREE["packet"]
            bad.pop("detector")
        bad["record"] = {**bad["record"], "column": column}
        with pytest.raises(JobError, match="record.column"):
            make_job(bad)


def test_3d_projection_and_slice(tmp_path):
    table = {
        "title": "3D packet",
        "grid": {a: {"min": -10.0, "max": 10.0, "points": 32} for a in "xyz"} | {"boundary": "periodic"},
        "packet": {"kind": "gaussian", "center": [-1.0, 0.0, 0.0], "width": [1.2, 1.2, 1.2],
                   "momentum": [1.0, 0.0, 0.0]},
        "evolve": {"dt": 0.05, "duration": 1.0},
        "record": {"every": 0.5, "snapshot_every": 0.5},
    }
    path = _run(table, tmp_path)
    for extra in (["--projection", "y"], ["--slice", "z=0.0"], [], ["--column", "x"]):
        out = tmp_path / f"cube{len(extra)}{extra[-1][0] if extra else ''}.mp4"
        assert main(["movie", str(path), "-o", str(out), "--size", "480x270", *extra]) == 0
        assert len(_frames(out)[1]) == 3
    assert main(["movie", str(path), "-o", str(tmp_path / "bad.mp4"), "--slice", "w=1"]) == 2


def test_a_radial_movie(tmp_path):
    table = {
        "title": "radial packet",
        "grid": {"r": {"max": 30.0, "points": 256}, "l": 0},
        "potential": [{"kind": "harmonic", "omega": 0.2}],
        "packet": {"kind": "gaussian", "center": 10.0, "width": 1.5, "momentum": -0.5},
        "evolve": {"dt": 0.05, "duration": 2.0},
        "record": {"every": 0.5, "snapshot_every": 0.5},
    }
    path = _run(table, tmp_path)
    out = tmp_path / "radial.mp4"
    assert render_movie(path, out, size=(480, 270))["frames"] == 5
    assert len(_frames(out)[1]) == 5


@pytest.mark.parametrize("which", ["free", "plane"])
def test_plot_writes_a_png_of_the_requested_size(which, free_result, plane_result, tmp_path):
    import matplotlib.image
    path = free_result if which == "free" else plane_result
    out = tmp_path / f"{which}.png"
    assert main(["plot", str(path), "-o", str(out), "--size", "800x600"]) == 0
    img = matplotlib.image.imread(out)
    assert img.shape[:2] == (600, 800)
    assert img.std() > 0.05


def test_plot_column_of_a_2d_and_a_3d_run(plane_result, tmp_path):
    """plot --column: a 2D run's column density over the other axis and
    time, a 3D run's camera image; bad axes and a 1D run are one line."""
    import matplotlib.image
    out = tmp_path / "plane-column.png"
    assert main(["plot", str(plane_result), "-o", str(out), "--size", "800x600", "--column", "x"]) == 0
    assert matplotlib.image.imread(out).std() > 0.05
    cube = _run({"title": "3D packet", "grid": {a: {"min": -9.0, "max": 9.0, "points": 24} for a in "xyz"}
                 | {"boundary": "periodic"},
                 "packet": {"kind": "gaussian", "center": [-1.0, 0.0, 0.0], "width": [1.2, 1.0, 1.1]},
                 "evolve": {"dt": 0.05, "duration": 0.5}, "record": {"every": 0.25, "snapshot_every": 0.25}},
                tmp_path)
    out = tmp_path / "cube-column.png"
    assert main(["plot", str(cube), "-o", str(out), "--size", "800x600", "--column", "z"]) == 0
    assert matplotlib.image.imread(out).std() > 0.05
    free = tmp_path / "free-column.png"
    assert main(["plot", str(plane_result), "-o", str(free), "--column", "w"]) == 2


def test_plot_of_a_study_summary(tmp_path):
    import matplotlib.image
    from test_collect import TINY, submit_and_run
    from wavesweep.studies.collect import collect

    table = copy.deepcopy(TINY)
    table["sweep"] = {"packet.momentum": [0.8, 1.0, 1.2], "potential.0.height": [0.1, 0.3]}
    submit_and_run(table, tmp_path, "tiny-scan")
    summary = collect(tmp_path, "tiny-scan")
    out = tmp_path / "study.png"
    assert main(["plot", str(summary), "-o", str(out), "--size", "900x800"]) == 0
    img = matplotlib.image.imread(out)
    assert img.shape[:2] == (800, 900) and img.std() > 0.05


@pytest.mark.parametrize("case", ["no_snapshots", "extension", "unwritable", "plot_extension", "size"])
def test_bad_input_exits_2_with_one_line(case, free_result, tmp_path, capsys):
    if case == "no_snapshots":
        empty = tmp_path / "empty.nc"
        with xr.open_dataset(free_result) as ds:
            ds.isel(snapshot_time=slice(0, 0)).to_netcdf(empty)
        argv, word = ["movie", str(empty), "-o", str(tmp_path / "m.mp4")], "no density snapshots"
    elif case == "extension":
        argv, word = ["movie", str(free_result), "-o", str(tmp_path / "m.avi")], "unknown movie type"
    elif case == "unwritable":
        argv, word = ["movie", str(free_result), "-o", "/nonexistent/folder/m.mp4"], "cannot write"
    elif case == "plot_extension":
        argv, word = ["plot", str(free_result), "-o", str(tmp_path / "p.jpg")], "unknown figure type"
    else:
        argv, word = ["movie", str(free_result), "-o", str(tmp_path / "m.mp4"), "--size", "big"], "WIDTHxHEIGHT"
    capsys.readouterr()
    assert main(argv) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and word in err, err
    assert not list(tmp_path.glob("*.mp4")) and not list(tmp_path.glob(".*part*"))


def test_plot_refuses_a_nonsense_dpi(free_result, tmp_path, capsys):
    assert main(["plot", str(free_result), "-o", str(tmp_path / "p.png"), "--dpi", "-5"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "--dpi" in err
