"""Shared test fixtures: small job tables and a helper to run jobs in-process."""
from __future__ import annotations

import copy

import pytest

from wavesweep.job import job_from_dict
from wavesweep.run import Simulation
from wavesweep.setup import Setup, resolve_job

FREE_1D = {
    "title": "free packet",
    "grid": {"x": {"min": -60.0, "max": 60.0, "points": 512}, "boundary": "periodic"},
    "packet": {"kind": "gaussian", "center": -20.0, "width": 2.0, "momentum": 1.0},
    "evolve": {"dt": 0.02, "duration": 4.0, "scheme": "strang"},
    "record": {"every": 0.2, "snapshot_every": 1.0},
}


@pytest.fixture
def free_job():
    return copy.deepcopy(FREE_1D)


def make_job(table, overrides=()):
    """The complete job of a table (a CAP left open is tuned: resolve_job)."""
    return resolve_job(job_from_dict(copy.deepcopy(table), overrides))


def run_table(table, outdir, overrides=(), **kw):
    """Run a job table in-process and return the opened xarray dataset."""
    import xarray as xr

    sim = Simulation(make_job(table, overrides), **kw)
    path = sim.run(outdir, progress=False)
    return xr.load_dataset(path)


def setup_of(table, overrides=()):
    return Setup(make_job(table, overrides))
