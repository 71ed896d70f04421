"""`movie` and `plot` on a result of coupled surfaces (issue 16, item 3):
each surface's density and potential curve, told apart by colour, line
style and width (readable in grey-scale) and named in a legend.

Sources: what is drawn is checked against the run's own file -- each
surface's population in the legend is the integral of its density
snapshot, which equals the file's ``norm`` of that surface at that time
(normalisation, |psi_s|^2 integrated over the grid; the density is stored
in single precision, hence 1e-6); the potential curves are the file's
``potential`` and ``coupling_potential``.  Movies are decoded with the
ffmpeg binary imageio-ffmpeg ships (as in test_movie.py).  Grey-scale
readability: Okabe & Ito (2008) blue and vermillion differ little in
lightness (relative luminance 0.15 and 0.22 by the sRGB / Rec. 709
weights, from memory), so the curves must differ in line style or width,
which is what is checked.
"""
from __future__ import annotations

import copy
import re

import numpy as np
import pytest
import xarray as xr

from test_coupled_setup import LZ_JOB
from wavesweep.cli import main
from wavesweep.errors import JobError
from wavesweep.job import job_from_dict
from wavesweep.run import Simulation
from wavesweep.setup import resolve_job
from wavesweep.viz.movie import MovieOptions, painter_for, render_frames, render_movie
from wavesweep.viz.scene import FrameReader, read_scene
from wavesweep.viz.summary import run_figure

imageio_ffmpeg = pytest.importorskip("imageio_ffmpeg")

# The linear crossing of test_coupled_setup on a small grid: a packet on A that reaches the
# crossing at x = 0 and moves population to B within the run; a CAP on both faces, one detector.
CROSSING_1D = {
    **copy.deepcopy(LZ_JOB),
    "grid": {"x": {"min": -60.0, "max": 60.0, "points": 512}},
    "packet": {"kind": "gaussian", "center": -10.0, "width": 4.0, "momentum": 3.0, "surface": "A"},
    "evolve": {"dt": 0.02, "duration": 4.0, "scheme": "strang"},
    "record": {"every": 0.4, "snapshot_every": 0.8},
    "absorber": {"kind": "cap", "thickness": 15.0, "strength": 1.0},
    "detector": [{"name": "right", "x": 30.0}],
}
# The same crossing on a plane (a confining y^2 on both surfaces), the coupling confined near x = 0.
CROSSING_2D = {
    "title": "plane crossing",
    "particle": {"mass": 1.0},
    "grid": {"x": {"min": -30.0, "max": 30.0, "points": 48}, "y": {"min": -20.0, "max": 20.0, "points": 24}},
    "surface": [{"name": "A", "potential": [{"kind": "expression", "expression": "0.05 * x + 0.002 * y**2"}]},
                {"name": "B", "potential": [{"kind": "expression", "expression": "-0.05 * x + 0.002 * y**2"}]}],
    "coupling": [{"surfaces": ["A", "B"],
                  "potential": [{"kind": "expression", "expression": "0.1 * exp(-(x / 5)**2)"}]}],
    "packet": {"kind": "gaussian", "center": [-6.0, 0.0], "width": [3.0, 3.0], "momentum": [2.0, 0.0],
               "surface": "A"},
    "evolve": {"dt": 0.05, "duration": 4.0, "scheme": "strang"},
    "record": {"every": 0.5, "snapshot_every": 1.0},
    "absorber": {"kind": "mask", "thickness": 5.0},
    "detector": [{"name": "line", "x": 10.0}],
}


def _run(table, folder):
    return Simulation(resolve_job(job_from_dict(copy.deepcopy(table)))).run(folder, progress=False)


@pytest.fixture(scope="module")
def line_result(tmp_path_factory):
    return _run(CROSSING_1D, tmp_path_factory.mktemp("coupled_line"))


@pytest.fixture(scope="module")
def plane_result(tmp_path_factory):
    return _run(CROSSING_2D, tmp_path_factory.mktemp("coupled_plane"))


def _frame_count(path) -> int:
    reader = imageio_ffmpeg.read_frames(str(path))
    next(reader)                       # the metadata
    return sum(1 for _ in reader)


def _prepared(path, **options):
    """The movie's painter for ``path`` with its first frame drawn."""
    scene = read_scene(path)
    painter = painter_for(scene, MovieOptions(size=(480, 270), **options))
    with FrameReader(scene.path) as reader:
        painter.prepare(reader, list(range(scene.n_snapshots)))
        last = scene.n_snapshots - 1
        painter.update(painter.frame_of(reader, last), float(reader.times[last]), last)
    return painter


def _styles(lines):
    return {(str(line.get_linestyle()), round(float(line.get_linewidth()), 3)) for line in lines}


def test_a_1d_coupled_movie_draws_each_surface_apart(line_result, tmp_path):
    out = tmp_path / "crossing.gif"
    info = render_movie(line_result, out, every=2, size=(320, 180), fps=5)
    assert info["frames"] == 3 and _frame_count(out) == 3          # snapshots 0, 2, 4 of 6

    painter = _prepared(line_result)
    with xr.open_dataset(line_result) as ds:
        surfaces = [str(s) for s in ds.surface.values]
        potential = ds.potential.transpose("surface", "x").values
        coupling = ds.coupling_potential.values[0]
        norm_last = ds.norm.sel(time=float(ds.snapshot_time[-1]), method="nearest").values
    assert surfaces == ["A", "B"]
    # one density curve per surface, apart in colour AND in line style / width
    density = painter.lines
    assert len(density) == 2
    assert len({line.get_color() for line in density}) == 2 and len(_styles(density)) == 2
    # one potential curve per surface on the right axis (thinner, the surface's line style), |V_ab| besides
    vax = painter.fig.axes[1]
    v_lines = {line.get_label(): line for line in vax.get_lines()}
    for j, s in enumerate(surfaces):
        np.testing.assert_array_equal(v_lines[f"V on {s}"].get_ydata(), potential[j])
        assert v_lines[f"V on {s}"].get_linestyle() == density[j].get_linestyle()
        assert v_lines[f"V on {s}"].get_linewidth() < density[j].get_linewidth()
    assert len(_styles([v_lines[f"V on {s}"] for s in surfaces])) == 2
    # |V_ab| = 0.2 beside surfaces spanning 3 hartree: drawn x 5, the factor in its label
    assert painter.coupling_factor == 5
    np.testing.assert_allclose(v_lines["|V| coupling A and B (×5)"].get_ydata(), 5 * np.abs(coupling), rtol=1e-15)
    # the legend names each surface, with its population in the frame: the density's integral,
    # which is the file's norm of that surface at that time
    texts = [t.get_text() for t in painter.legend.get_texts()]
    assert {"V on A", "V on B", "|V| coupling A and B (×5)"} <= set(texts)
    for j, s in enumerate(surfaces):
        entry = next(t for t in texts if t.startswith(f"density on {s}: P = "))
        assert float(entry.rsplit("=", 1)[1]) == pytest.approx(norm_last[j], abs=5e-4 + 1e-6)
    assert norm_last[1] > 0.05                                      # population did move to B


def test_a_coupled_movie_refuses_parts(line_result, tmp_path):
    with pytest.raises(JobError) as e:
        render_movie(line_result, tmp_path / "parts.gif", parts=True)
    assert e.value.field == "--parts" and not (tmp_path / "parts.gif").exists()


def test_a_2d_coupled_movie_has_one_panel_per_surface_on_one_colour_scale(plane_result, tmp_path):
    got = []
    info = render_frames(read_scene(plane_result), MovieOptions(size=(480, 270), every=2),
                         lambda rgb: got.append(rgb.copy()))
    assert info["frames"] == len(got) == 3                          # snapshots 0, 2, 4 of 5
    painter = _prepared(plane_result)
    assert len(painter.images) == 2 and painter.images[0].norm is painter.images[1].norm
    titles = [ax.get_title(loc="left") for ax in painter.fig.axes]
    assert "surface A" in titles and "surface B" in titles
    with xr.open_dataset(plane_result) as ds:
        norm_last = ds.norm.sel(time=float(ds.snapshot_time[-1]), method="nearest").values
    for j, text in enumerate(painter.populations):
        assert float(text.get_text().rsplit("=", 1)[1]) == pytest.approx(norm_last[j], abs=5e-4 + 1e-6)


def test_the_coupled_summary_figure(line_result, plane_result):
    fig = run_figure(line_result, (900, 700), 50)
    with xr.open_dataset(line_result) as ds:
        norm = ds.norm.transpose("time", "surface").values
        potential = ds.potential.transpose("surface", "x").values
        absorbed = ds.absorbed.sum(("surface", "boundary")).values
    by_title = {ax.get_title(loc="left"): ax for ax in fig.axes}
    assert {"surface A", "surface B"} <= set(by_title)               # one density map per surface
    # populations: one curve per surface, apart in style; the total, the absorbed and their sum
    pop = {line.get_label(): line for line in by_title["population of each surface"].get_lines()}
    np.testing.assert_array_equal(pop["on A"].get_ydata(), norm[:, 0])
    np.testing.assert_array_equal(pop["on B"].get_ydata(), norm[:, 1])
    assert len(_styles([pop["on A"], pop["on B"]])) == 2
    np.testing.assert_allclose(pop["sum"].get_ydata(), norm.sum(axis=1) + absorbed, rtol=0, atol=1e-15)
    np.testing.assert_allclose(pop["sum"].get_ydata(), 1.0, rtol=0, atol=1e-10)   # nothing lost
    legend = [t.get_text() for t in by_title["population of each surface"].get_legend().get_texts()]
    assert "on A" in legend and "on B" in legend
    # the potential of each surface, apart in style, the coupling on its own scale
    apot = by_title["potential of each surface and the coupling"]
    v = {line.get_label(): line for line in apot.get_lines()}
    np.testing.assert_array_equal(v["V on A"].get_ydata(), potential[0])
    np.testing.assert_array_equal(v["V on B"].get_ydata(), potential[1])
    assert len(_styles([v["V on A"], v["V on B"]])) == 2
    legend = [t.get_text() for t in apot.get_legend().get_texts()]
    assert {"V on A", "V on B", "|V| coupling A and B (right scale)"} <= set(legend)
    # a plane: the same panels, the density maps integrated over y
    fig = run_figure(plane_result, (900, 700), 50)
    assert {"surface A", "surface B"} <= {ax.get_title(loc="left") for ax in fig.axes}


def test_movie_and_plot_commands_on_a_coupled_result(line_result, tmp_path, capsys):
    assert main(["movie", str(line_result), "-o", str(tmp_path / "m.mp4"), "--size", "320x180",
                 "--every", "3"]) == 0
    assert re.search(r"m\.mp4: 2 frames", capsys.readouterr().out)
    assert _frame_count(tmp_path / "m.mp4") == 2
    assert main(["plot", str(line_result), "-o", str(tmp_path / "p.png"), "--size", "600x450"]) == 0
    import matplotlib.image   # lazy: as test_movie.py reads figures back
    assert matplotlib.image.imread(tmp_path / "p.png").shape[:2] == (450, 600)
