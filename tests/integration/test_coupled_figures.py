"""Figures of coupled surfaces, as a user reads them (issue 16, item 3;
the trial's P15): a study's branching per surface, probability axes set by
the values that matter, one style per coupled pair, small couplings made
visible in the 1D movie, the adiabatic populations in `plot`, and a study
summary titled by its own job.

Sources: what is drawn is checked against the files it is drawn from (the
run's ``population_adiabatic``, ``coupling_potential``; the summary's
per-surface variables); the adiabatic populations of a run sum to its
diabatic ones (the local eigenvectors are orthonormal, so the change of
basis keeps |psi|^2 summed over the states: unitarity, e.g. Horn & Johnson,
Matrix Analysis, ch. 2; from memory).  Grey-scale readability: two lines
are told apart without colour when their dash pattern, width or marker
differ (what is checked).
"""
from __future__ import annotations

import copy
import itertools
import tomllib

import numpy as np
import pytest
import xarray as xr

from wavesweep.job import job_from_dict
from wavesweep.run import Simulation
from wavesweep.setup import resolve_job
from wavesweep.studies.collect import collect
from wavesweep.studies.queue import Queue
from wavesweep.study import expand_study
from wavesweep.viz import summary
from wavesweep.viz.movie import MovieOptions, coupling_factor, painter_for
from wavesweep.viz.scene import FrameReader, read_scene

# Three surfaces on a line, every pair coupled (three |V_ab| of different sizes, each far below
# the surfaces' span of 0.4 hartree), the adiabatic populations recorded; small and short.
THREE = {
    "title": "three coupled surfaces",
    "particle": {"mass": 1.0},
    "grid": {"x": {"min": -20.0, "max": 20.0, "points": 128}},
    "surface": [{"name": "A", "potential": [{"kind": "expression", "expression": "0.01 * x"}]},
                {"name": "B", "potential": [{"kind": "expression", "expression": "-0.01 * x"}]},
                {"name": "C", "potential": [{"kind": "expression", "expression": "0.1 + 0 * x"}]}],
    "coupling": [{"surfaces": ["A", "B"], "potential": [{"kind": "expression", "expression": "0.002 + 0 * x"}]},
                 {"surfaces": ["B", "C"],
                  "potential": [{"kind": "expression", "expression": "0.003 * exp(-(x / 5)**2)"}]},
                 {"surfaces": ["A", "C"], "potential": [{"kind": "expression", "expression": "0.001 + 0 * x"}]}],
    "packet": {"kind": "gaussian", "center": -3.0, "width": 2.0, "momentum": 1.0, "surface": "A"},
    "evolve": {"dt": 0.05, "duration": 2.0, "scheme": "strang"},
    "record": {"every": 0.2, "snapshot_every": 1.0, "adiabatic": True},
}
PAIRS = ("A and B", "A and C", "B and C")        # as the result orders them


@pytest.fixture(scope="module")
def three(tmp_path_factory):
    job = resolve_job(job_from_dict(copy.deepcopy(THREE)))
    return Simulation(job).run(tmp_path_factory.mktemp("three"), progress=False)


def _grey_style(line):
    """What tells a line apart without colour: dash pattern, width, marker."""
    return (str(line.get_linestyle()), str(line.get_dashes() if hasattr(line, "get_dashes") else ""),
            round(float(line.get_linewidth()), 3), str(line.get_marker()))


def _dash_pattern(line):
    return (line._unscaled_dash_pattern, round(float(line.get_linewidth()), 3), str(line.get_marker()))


# -- a run: couplings and adiabatic populations --------------------------------------------
def test_each_coupled_pair_has_its_own_style_in_plot(three):
    fig = summary.run_figure(three, (900, 700), 50)
    apot = next(ax for ax in fig.axes if ax.get_title(loc="left") == "potential of each surface and the coupling")
    legend = [t.get_text() for t in apot.get_legend().get_texts()]
    lines = {line.get_label(): line for ax in fig.axes for line in ax.get_lines()}
    couplings = [lines[f"|V| coupling {pair} (right scale)"] for pair in PAIRS]
    assert all(f"|V| coupling {pair} (right scale)" in legend for pair in PAIRS)   # the legend names the pair
    with xr.open_dataset(three) as ds:
        for line, pair in zip(couplings, PAIRS):
            values = ds.coupling_potential.sel(pair=pair.replace(" and ", ",")).values
            np.testing.assert_array_equal(line.get_ydata(), np.abs(values))
    # apart in grey-scale: each pair's dash pattern, width and marker differ from the others'
    assert len({_dash_pattern(line) for line in couplings}) == 3
    assert len({(line.get_color(), _dash_pattern(line)) for line in couplings}) == 3


def test_plot_draws_the_adiabatic_populations(three):
    fig = summary.run_figure(three, (900, 700), 50)
    apop = next(ax for ax in fig.axes if ax.get_title(loc="left") == "population of each surface")
    lines = {line.get_label(): line for line in apop.get_lines()}
    legend = [t.get_text() for t in apop.get_legend().get_texts()]
    with xr.open_dataset(three) as ds:
        adiabatic = ds.population_adiabatic.transpose("time", "state").values
        norm = ds.norm.transpose("time", "surface").values
    assert adiabatic.shape[1] == 3
    for k in range(3):
        assert f"adiabatic state {k}" in legend
        np.testing.assert_array_equal(lines[f"adiabatic state {k}"].get_ydata(), adiabatic[:, k])
    # a change of basis by orthonormal vectors: the states' populations sum to the surfaces'
    np.testing.assert_allclose(adiabatic.sum(axis=1), norm.sum(axis=1), rtol=0, atol=1e-12)
    assert float(adiabatic[:, 1:].max()) > 1e-3            # the packet is not on one adiabatic state
    # apart from the diabatic populations and from each other, without colour
    diabatic = [lines[f"on {s}"] for s in "ABC"]
    states = [lines[f"adiabatic state {k}"] for k in range(3)]
    assert not {_dash_pattern(line) for line in diabatic} & {_dash_pattern(line) for line in states}
    assert len({_dash_pattern(line) for line in states}) == 3


def test_the_1d_movie_scales_small_couplings_and_says_by_how_much(three):
    scene = read_scene(three)
    painter = painter_for(scene, MovieOptions(size=(480, 270)))
    with FrameReader(scene.path) as reader:
        painter.prepare(reader, list(range(scene.n_snapshots)))
    vax = painter.fig.axes[1]
    lines = {line.get_label(): line for line in vax.get_lines()}
    with xr.open_dataset(three) as ds:
        potential = ds.potential.transpose("surface", "x").values
        coupling = np.abs(ds.coupling_potential.sel(pair=[p.replace(" and ", ",") for p in PAIRS]).values)
    span = float(np.ptp(potential))                         # 0.4 hartree; the couplings at most 0.003
    factor = painter.coupling_factor
    assert factor == 50                                     # 1, 2, 5 x 10^k: the largest within half the span
    texts = [t.get_text() for t in painter.legend.get_texts()]
    drawn = []
    for pair, values in zip(PAIRS, coupling):
        label = f"|V| coupling {pair} (×50)"
        assert label in texts                               # the factor stated in the legend
        np.testing.assert_allclose(lines[label].get_ydata(), values * 50, rtol=1e-15)
        drawn.append(lines[label])
    # now readable on the potential axis: the largest reaches between a fifth and a half of the span
    assert 0.2 * span < float(coupling.max()) * factor <= 0.5 * span
    low, high = vax.get_ylim()
    assert float(coupling.max()) * factor / (high - low) > 0.15
    assert len({_dash_pattern(line) for line in drawn}) == 3


def test_coupling_factor():
    # the trial's case: 0.03 eV beside surfaces spanning 8 eV -> x 100 (3 eV on the axis)
    assert coupling_factor(8.0, 0.03) == 100
    assert coupling_factor(8.0, 2.0) == 1                   # a fifth of the span or more: as it is
    assert coupling_factor(3.0, 0.2) == 5
    assert coupling_factor(0.0, 0.2) == 1 and coupling_factor(3.0, 0.0) == 1
    for span, largest in itertools.product((0.4, 3.0, 8.0, 1e4), (1e-9, 1e-4, 0.0123, 0.3)):
        f = coupling_factor(span, largest)
        assert f == 1 or 0.2 * span < largest * f <= 0.5 * span * (1 + 1e-12), (span, largest, f)


# -- a study: the branching per surface --------------------------------------------------
def _coupled_summary(path, two_keys: bool):
    """A study summary of coupled surfaces A and B as `collect` writes one:
    the packet ends absorbed at x+ on A or B (0.98 / 0.02 at the first
    coupling, 0.31 / 0.69 at the last), with 1e-28-sized round-off at x-."""
    coupling = np.array([0.01, 0.02, 0.05])
    on_a = np.array([0.98, 0.6, 0.31])
    spread = np.array([1.0, 0.99]) if two_keys else np.array([1.0])
    beyond_a = on_a[:, None] * spread[None, :]                     # (coupling, mass)
    shares = np.stack([beyond_a, 1 - beyond_a], axis=-1)           # (coupling, mass, surface)
    roundoff = 1e-28 * (1 + np.arange(shares.size).reshape(shares.shape))
    absorbed = np.stack([roundoff, shares], axis=-1)               # (coupling, mass, surface, boundary)
    dims = ["coupling", "mass"]
    ds = xr.Dataset(
        {"final_absorbed": (dims + ["surface", "boundary"], absorbed, {"units": "1"}),
         "transmitted_beyond": (dims + ["surface", "detector"], shares[..., None], {"units": "1"}),
         "final_norm": (dims + ["surface"], np.full(shares.shape, 1e-9), {"units": "1"}),
         "arrival_probability": (dims + ["surface", "detector"], shares[..., None], {"units": "1"}),
         "arrival_mean": (dims + ["surface", "detector"], 100 + 10 * shares[..., None], {"units": "fs"})},
        coords={"coupling": ("coupling", coupling, {"units": "eV", "sweep_key": "coupling.0.potential.0.height"}),
                "mass": ("mass", np.array([1.0, 2.0])[:len(spread)], {"units": "u", "sweep_key": "particle.mass"}),
                "surface": ["A", "B"], "boundary": ["x-", "x+"], "detector": ["right"],
                "time": ("time", np.array([0.0, 1.0]), {"units": "fs"})},
        attrs={"study": "branching", "title": "study branching: two coupled curves",
               "sweep_dimensions": "coupling mass" if two_keys else "coupling"})
    if not two_keys:
        ds = ds.isel(mass=0, drop=True)
    ds.to_netcdf(path)
    return ds


def _figure(monkeypatch, path, tmp_path):
    figures = []
    monkeypatch.setattr(summary, "_save", lambda fig, out: figures.append(fig) or out)
    summary.plot_study(path, tmp_path / "study.png")
    return figures[0]


def test_a_two_key_coupled_study_draws_the_branching_per_surface(tmp_path, monkeypatch):
    ds = _coupled_summary(tmp_path / "summary.nc", two_keys=True)
    fig = _figure(monkeypatch, tmp_path / "summary.nc", tmp_path)
    rows = {ax.get_title(loc="left").split("   (values below")[0]: ax for ax in fig.axes}
    for surface in ("A", "B"):
        absorbed = rows[f"absorbed at the end (transmission / reflection), on surface {surface}"]
        beyond = rows[f"beyond each detector at the end, on surface {surface}"]
        lines = {line.get_label(): line for line in absorbed.get_lines()}
        for mass in (1.0, 2.0):
            for face in ("x-", "x+"):
                np.testing.assert_array_equal(
                    lines[f"absorbed at {face}, particle.mass (u) = {mass:g}"].get_ydata(),
                    ds.final_absorbed.sel(surface=surface, boundary=face, mass=mass).values)
        lines = {line.get_label(): line for line in beyond.get_lines()}
        for mass in (1.0, 2.0):
            np.testing.assert_array_equal(lines[f"detector right, particle.mass (u) = {mass:g}"].get_ydata(),
                                          ds.transmitted_beyond.sel(surface=surface, detector="right",
                                                                    mass=mass).values)
    # the rows of one quantity share their scale, so A's 0.98 and B's 0.02 read off one axis
    a = rows["absorbed at the end (transmission / reflection), on surface A"]
    b = rows["absorbed at the end (transmission / reflection), on surface B"]
    assert a.get_ylim() == b.get_ylim() and a.get_yscale() == b.get_yscale() == "log"
    low, high = a.get_ylim()
    assert 1e-3 < low <= 0.02 and 0.98 <= high < 2              # not 1e-28..1: round-off sets nothing
    # the mean arrival time: one row, over what crossed on any surface
    assert "mean arrival time (all surfaces: the mean over what crossed on any)" in rows


def test_a_one_key_coupled_study_has_a_readable_log_axis(tmp_path, monkeypatch):
    _coupled_summary(tmp_path / "summary.nc", two_keys=False)
    fig = _figure(monkeypatch, tmp_path / "summary.nc", tmp_path)
    absorbed = next(ax for ax in fig.axes if ax.get_title(loc="left").startswith("absorbed at the end"))
    assert len(absorbed.get_lines()) == 4                      # (face, surface)
    assert absorbed.get_yscale() == "log"
    low, high = absorbed.get_ylim()
    assert 1e-3 < low <= 0.02 and 0.98 <= high < 2
    beyond = next(ax for ax in fig.axes if ax.get_title(loc="left").startswith("beyond each detector"))
    assert beyond.get_yscale() == "log" and beyond.get_ylim()[0] > 1e-3   # nothing ignored: 0.02..0.98


def test_a_coupled_study_mapped_per_surface_on_one_colour_scale(tmp_path, monkeypatch):
    """More than 8 values of the second parameter: a map per surface, of the
    face that took the probability (not the first face's round-off)."""
    coupling, mass = np.array([0.01, 0.03, 0.05]), np.linspace(1.0, 10.0, 10)
    on_a = (0.98 - 8 * (coupling[:, None] - 0.01)) * np.ones_like(mass)[None, :]
    shares = np.stack([on_a, 1 - on_a], axis=-1)
    ds = xr.Dataset({"final_absorbed": (["coupling", "mass", "surface", "boundary"],
                                        np.stack([1e-29 * shares, shares], axis=-1))},
                    coords={"coupling": coupling, "mass": mass, "surface": ["A", "B"], "boundary": ["x-", "x+"],
                            "time": ("time", [0.0, 1.0], {"units": "fs"})},
                    attrs={"study": "s", "sweep_dimensions": "coupling mass"})
    ds.to_netcdf(tmp_path / "summary.nc")
    fig = _figure(monkeypatch, tmp_path / "summary.nc", tmp_path)
    meshes = {ax.get_title(loc="left").rsplit(" ", 1)[1]: ax.collections[0] for ax in fig.axes
              if "on surface" in ax.get_title(loc="left")}
    for surface in ("A", "B"):
        np.testing.assert_array_equal(np.asarray(meshes[surface].get_array()).ravel(),
                                      ds.final_absorbed.sel(surface=surface, boundary="x+").T.values.ravel())
        assert meshes[surface].get_clim() == (pytest.approx(0.02), pytest.approx(0.98))   # both surfaces'


def test_probability_scale():
    # round-off below 1e-12 of the largest neither chooses the scale nor sets the limits, which leave
    # 5 % of the decades spanned by the rest on either side (as matplotlib's own margins)
    log, (low, high) = summary.probability_scale([0.98, 0.02, 0.31, 0.69, 1e-28, 3e-29])
    margin = (0.98 / 0.02) ** 0.05
    assert log and low == pytest.approx(0.02 / margin) and high == pytest.approx(0.98 * margin)
    assert summary.probability_scale([0.98, 0.31, 0.69, 1e-28]) == (False, None)   # a span of 3: linear
    assert summary.probability_scale([1.0, 1e-3, 1e-6]) == (True, None)           # nothing left out
    log, (low, high) = summary.probability_scale([1.0, 0.0, 1e-3, np.nan])
    assert log and low == pytest.approx(1e-3 / 1e3 ** 0.05)
    assert summary.probability_scale([0.0, 0.0]) == (False, None)
    assert summary.probability_scale([np.nan]) == (False, None)


# -- collect: the study's own title ---------------------------------------------------------
FREE = {
    "grid": {"x": {"min": -30.0, "max": 30.0, "points": 128}, "boundary": "periodic"},
    "packet": {"kind": "gaussian", "center": -5.0, "width": 2.0, "momentum": 1.0},
    "evolve": {"dt": 0.05, "duration": 0.5, "scheme": "strang"},
    "record": {"every": 0.25, "snapshot_every": 0.5},
    "sweep": {"packet.momentum": [1.0, 1.5]},
}


def test_a_summary_of_reused_runs_carries_its_own_studys_title(tmp_path):
    queue = Queue(tmp_path)
    queue.submit(expand_study({**copy.deepcopy(FREE), "title": "first scan"}, name="first"))
    while (claim := queue.claim("w")) is not None:
        job = resolve_job(job_from_dict(tomllib.loads(claim["job_toml"])))
        Simulation(job).run(path=claim["result"], progress=False)
        queue.complete(claim["study"], claim["run_id"], "w", 1.0)
    # the same physics under another title: its runs are the first study's results, reused
    counts = queue.submit(expand_study({**copy.deepcopy(FREE), "title": "second scan"}, name="second"))
    assert counts["reused"] == 2
    queue.close()
    with xr.open_dataset(collect(tmp_path, "second")) as ds:
        assert ds.attrs["title"] == "study second: second scan"
    with xr.open_dataset(collect(tmp_path, "first")) as ds:
        assert ds.attrs["title"] == "study first: first scan"
