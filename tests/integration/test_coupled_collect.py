"""`collect` on a study of coupled surfaces keeps the `surface` dimension
(issue 16, item 3), and `population_adiabatic` with its `state`.

Sources: each run's own result file (the summary holds its numbers
exactly, as for one surface in test_collect.py); conservation of
probability, norm on the grid plus what the absorber removed, summed over
the surfaces and faces, equals 1 (1e-10, the run's own books); the arrival
statistics of `wavesweep arrivals` on each run (what collect tabulates).
"""
from __future__ import annotations

import copy

import numpy as np
import pytest
import xarray as xr

from test_collect import submit_and_run
from test_coupled_runs import ABSORBED_JOB
from wavesweep.analysis.arrivals import arrival_times
from wavesweep.errors import JobError
from wavesweep.studies.collect import collect

MOMENTA = [2.5, 3.0]
STUDY = {**copy.deepcopy(ABSORBED_JOB),
         "evolve": {**ABSORBED_JOB["evolve"], "duration": 24.0},
         "record": {"every": 0.4, "snapshot_every": 24.0, "adiabatic": True},
         "sweep": {"packet.momentum": MOMENTA}}


@pytest.fixture(scope="module")
def coupled_study(tmp_path_factory):
    root = tmp_path_factory.mktemp("root")
    study = submit_and_run(STUDY, root, "coupled")
    with xr.open_dataset(collect(root, "coupled")) as ds:
        ds.load()
    return root, study, ds


def test_the_surface_dimension_is_kept(coupled_study):
    root, study, ds = coupled_study
    assert list(ds["surface"].values) == ["A", "B"] and ds["surface"].attrs["units"] == "1"
    assert list(ds["state"].values) == [0, 1] and ds["state"].attrs["units"] == "1"
    assert ds["norm"].dims == ("momentum", "time", "surface")
    assert ds["absorbed"].dims == ("momentum", "time", "surface", "boundary")
    assert ds["flux"].dims == ("momentum", "time", "surface", "detector")
    assert ds["final_norm"].dims == ("momentum", "surface")
    assert ds["final_absorbed"].dims == ("momentum", "surface", "boundary")
    assert ds["transmitted_beyond"].dims == ("momentum", "surface", "detector")
    assert ds["arrival_probability"].dims == ("momentum", "surface", "detector")
    assert ds["population_adiabatic"].dims == ("momentum", "time", "state")
    assert "real and positive" in ds["population_adiabatic"].attrs["comment"]
    for name in ds.variables:
        assert ds[name].attrs.get("units") and ds[name].attrs.get("long_name"), name
    # conservation, summed over the surfaces and faces, at every sample of every run
    total = ds["norm"].sum("surface") + ds["absorbed"].sum(("surface", "boundary"))
    np.testing.assert_allclose(total, 1.0, rtol=0, atol=1e-10)
    assert float(ds["absorbed"].sum(("surface", "boundary")).isel(time=-1).min()) > 0.1   # the layers took some
    np.testing.assert_allclose(ds["population_adiabatic"].sum("state"), ds["norm"].sum("surface"), rtol=0, atol=1e-12)


def test_values_are_each_runs_values_per_surface(coupled_study):
    root, study, ds = coupled_study
    for spec in study.runs:
        at = ds.sel(momentum=spec.params["packet.momentum"])
        path = root / "coupled" / f"{spec.run_id}.nc"
        with xr.open_dataset(path) as one:
            assert at["run_id"].item() == spec.run_id
            for name in ("norm", "absorbed", "flux", "population_adiabatic"):
                np.testing.assert_array_equal(at[name].values, one[name].values, err_msg=name)
            np.testing.assert_array_equal(at["final_norm"].values, one["norm"].values[-1])
            np.testing.assert_array_equal(at["final_absorbed"].values, one["absorbed"].values[-1])
        arrivals = arrival_times(path, surfaces=True)
        for surface in ("A", "B"):
            expected = arrivals["right"][surface].stats
            got = at.sel(surface=surface, detector="right")
            for key in ("probability", "mean", "backflow"):
                np.testing.assert_allclose(got[f"arrival_{key}"].item(), expected[key], rtol=0, atol=0,
                                           err_msg=f"{surface} {key}")
        # both surfaces carry probability across the detector, more for the faster packet
    crossed = ds["arrival_probability"].sel(detector="right").sum("surface")
    assert float(crossed.sel(momentum=3.0)) > float(crossed.sel(momentum=2.5)) > 0.1


def test_a_study_mixing_surface_sets_is_refused(tmp_path):
    """Two runs whose second surface has another name: one line naming `surface`."""
    table = {**copy.deepcopy(STUDY), "coupling": [], "evolve": {**STUDY["evolve"], "duration": 0.8},
             "record": {"every": 0.4, "snapshot_every": 0.8}, "sweep": {"surface.1.name": ["B", "C"]}}
    submit_and_run(table, tmp_path, "mixed")
    with pytest.raises(JobError) as e:
        collect(tmp_path, "mixed")
    assert e.value.field == "surface" and "A, B" in e.value.message and "A, C" in e.value.message
    assert len(str(e.value).splitlines()) == 1


def test_the_study_figure_draws_each_surface(coupled_study, tmp_path, monkeypatch):
    """`plot` on a coupled study's summary: one line per (detector,
    surface), told apart by line style, holding the summary's numbers; with
    two swept parameters (test_coupled_figures.py) a row per surface, the
    arrival mean over what crossed on any surface (each surface's mean
    weighted by its probability, checked here)."""
    from wavesweep.viz import summary
    root, study, ds = coupled_study
    figures = []
    monkeypatch.setattr(summary, "_save", lambda fig, path: figures.append(fig) or path)
    summary.plot_study(root / "coupled" / "summary.nc", tmp_path / "study.png")
    beyond = next(ax for ax in figures[0].axes if ax.get_title(loc="left").startswith("beyond each detector"))
    lines = {line.get_label(): line for line in beyond.get_lines()}
    assert set(lines) == {"detector right on A", "detector right on B"}
    assert lines["detector right on A"].get_linestyle() != lines["detector right on B"].get_linestyle()
    for surface in ("A", "B"):
        np.testing.assert_array_equal(lines[f"detector right on {surface}"].get_ydata(),
                                      ds["transmitted_beyond"].sel(detector="right", surface=surface).values)
    total = summary._over_all_surfaces(ds)
    np.testing.assert_allclose(total["transmitted_beyond"], ds["transmitted_beyond"].sum("surface"), rtol=1e-15)
    p, mean = ds["arrival_probability"], ds["arrival_mean"]
    expected = (p * mean).sum("surface") / p.sum("surface")
    np.testing.assert_allclose(total["arrival_mean"], expected, rtol=1e-12)
