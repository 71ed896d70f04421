"""Coupled surfaces from a job file (issue 16, in progress): the set-up a
run will use, propagated in memory.

Sources: the Landau-Zener probability of a diabatic passage,
P = exp(-2 pi V12^2 / (hbar v |F1 - F2|)) (Landau 1932; Zener 1932; from
memory; tests/coupled_reference.py); zero coupling against the
single-surface set-up of each surface alone (the registered Strang
propagator); the energy of a coupled state against the expectation of the
full matrix Hamiltonian built here with numpy (T by FFT on each surface).
"""
from __future__ import annotations

import copy
import math

import numpy as np
import pytest

from coupled_reference import landau_zener_probability
from wavesweep.errors import JobError
from wavesweep.job import job_from_dict
from wavesweep.setup import CoupledSetup, Setup

D_F, V12, P0 = 0.05, 0.2, 5.0
LZ_JOB = {
    "title": "crossing",
    "particle": {"mass": 1.0},
    "grid": {"x": {"min": -200.0, "max": 200.0, "points": 2048}},
    "surface": [{"name": "A", "potential": [{"kind": "expression", "expression": f"{D_F / 2} * x"}]},
                {"name": "B", "potential": [{"kind": "expression", "expression": f"{-D_F / 2} * x"}]}],
    "coupling": [{"surfaces": ["A", "B"], "potential": [{"kind": "expression", "expression": f"{V12} + 0 * x"}]}],
    "packet": {"kind": "gaussian", "center": -120.0, "width": 10.0, "momentum": P0, "surface": "A"},
    "evolve": {"dt": 0.02, "duration": 48.0, "scheme": "order4"},
    "record": {"every": 0.48, "snapshot_every": 48.0},
}


def test_landau_zener_from_a_job_file():
    s = CoupledSetup(job_from_dict(copy.deepcopy(LZ_JOB)))
    assert s.psi0.shape == (2, 2048) and s.surfaces == ["A", "B"]
    prop, observer = s.make_propagator(), s.make_observer()
    start = s.measure(observer, s.psi0, 0.0)
    assert start["norm"] == pytest.approx([1.0, 0.0], abs=1e-12)
    psi = prop.step(prop.load(s.psi0), s.total_steps)
    end = s.measure(observer, psi, prop.t)
    velocity = math.sqrt(2 * (P0**2 / 2 + D_F / 2 * -120.0))
    lz = landau_zener_probability(V12, velocity, D_F)
    assert abs(end["norm"][0] / lz - 1) < 1.2e-3
    assert end["norm"].sum() == pytest.approx(1.0, abs=1e-10)
    # the total energy <T + V> (couplings included) is conserved; at the start it is p0^2/2 + V_A(x0)
    assert start["energy"] == pytest.approx(P0**2 / 2 + 0.5 / (4 * 10.0**2) + D_F / 2 * -120.0, rel=1e-9)
    assert end["energy"] == pytest.approx(start["energy"], rel=1e-6)


def test_zero_coupling_is_each_surface_alone():
    """Two surfaces, no [[coupling]], a superposition with a member on each:
    each surface's state is its single-surface job's, to rounding."""
    table = copy.deepcopy(LZ_JOB)
    table["grid"]["x"]["points"] = 512
    table["coupling"] = []
    table["evolve"] = {"dt": 0.02, "duration": 4.0, "scheme": "strang"}
    table["record"] = {"every": 0.4, "snapshot_every": 4.0}
    members = [{"kind": "gaussian", "center": -20.0, "width": 3.0, "momentum": 2.0, "surface": "A"},
               {"kind": "gaussian", "center": 15.0, "width": 4.0, "momentum": -1.0, "surface": "B"}]
    table["packet"] = {"kind": "superposition", "packets": members, "amplitudes": [1.0, 1.0]}
    s = CoupledSetup(job_from_dict(table))
    prop = s.make_propagator()
    psi = prop.step(prop.load(s.psi0), s.total_steps)
    for k, member in enumerate(members):
        alone = {key: v for key, v in table.items() if key not in ("surface", "coupling")}
        alone["potential"] = table["surface"][k]["potential"]
        alone["packet"] = {key: v for key, v in member.items() if key != "surface"}
        one = Setup(job_from_dict(alone))
        p1 = one.make_propagator()
        ref = p1.step(p1.load(one.psi0), one.total_steps) / math.sqrt(2)   # the superposition's weight
        np.testing.assert_allclose(psi[k], ref, rtol=0, atol=1e-12)


def test_coupled_jobs_say_what_is_not_there_yet():
    job = job_from_dict(copy.deepcopy(LZ_JOB))
    with pytest.raises(JobError) as e:
        Setup(job)                       # a run on coupled surfaces: refused, never run on one surface
    assert e.value.field == "surface"
    for patch, field in (({"evolve": {**LZ_JOB["evolve"], "precision": "single"}}, "evolve.precision"),
                         ({"evolve": {**LZ_JOB["evolve"], "scheme": "crank_nicolson"}}, "evolve.scheme")):
        with pytest.raises(JobError) as e:
            CoupledSetup(job_from_dict({**copy.deepcopy(LZ_JOB), **patch}))
        assert e.value.field == field
