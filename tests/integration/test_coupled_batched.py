"""Batched runs on coupled surfaces (issue 16, item 2): runs of one study
whose jobs differ only in [packet] (its ``surface`` included) step
together, psi (members, surfaces, *grid), and each member's file is the
one its solo run writes.

Reference: the solo run of each member's job (the coupled split-operator,
itself checked against Landau-Zener and the matrix Hamiltonian in
test_coupled_setup.py and test_coupled_step.py); the bound is 1e-12 on
every variable of the file, the per-surface ones included.
"""
from __future__ import annotations

import copy
import json

import numpy as np
import pytest
import xarray as xr

from test_batched import assert_batched_like_solo, assert_same_file
from test_coupled_runs import ABSORBED_JOB
from wavesweep.batched import BatchedRun, batch_group, batch_key
from wavesweep.job import job_from_dict
from wavesweep.run import Simulation
from wavesweep.setup import CoupledSetup, resolve_job
from wavesweep.surfaces import CoupledSplitOperator, SurfaceHamiltonian

# ABSORBED_JOB: a packet on crossing lines A, B (constant coupling) running into a CAP of given strength
PACKETS = [{"kind": "gaussian", "center": -10.0, "width": 4.0, "momentum": 3.0, "surface": "A"},
           {"kind": "gaussian", "center": -12.0, "width": 3.0, "momentum": 3.5, "surface": "B"},
           {"kind": "superposition", "amplitudes": [1.0, 0.5],
            "packets": [{"kind": "gaussian", "center": -10.0, "width": 4.0, "momentum": 2.5, "surface": "A"},
                        {"kind": "gaussian", "center": 5.0, "width": 3.0, "momentum": -2.0, "surface": "B"}]}]


def _jobs(table, packets):
    out = []
    for packet in packets:
        t = copy.deepcopy(table)
        t["packet"] = copy.deepcopy(packet)
        out.append(resolve_job(job_from_dict(t)))
    return out


@pytest.mark.parametrize("threads", [None, 2])
def test_coupled_members_write_the_files_of_solo_runs(tmp_path, threads):
    """Three members differing in the packet and the surface it starts on
    (one a superposition over both); with two cores for them (threads = 2)
    they step in two lanes of their own."""
    table = copy.deepcopy(ABSORBED_JOB)
    if threads:
        table["evolve"]["threads"] = threads
    jobs = _jobs(table, PACKETS)
    run = BatchedRun(jobs)
    assert run.lane_count(len(jobs)) == (2 if threads else 1)
    solo = [Simulation(j).run(tmp_path / "solo", progress=False) for j in jobs]
    out = run.run([tmp_path / "batch" / p.name for p in solo])
    assert all(not isinstance(o, BaseException) for o in out), out
    for a, b in zip(solo, out):
        assert_same_file(a, b, 1e-12)
    with xr.open_dataset(out[0]) as ds:
        assert ds["absorbed"].dims == ("time", "surface", "boundary")
        assert float(ds["absorbed"][-1].sum()) > 1e-2 and float(ds["norm"][-1].sel(surface="B")) > 1e-3


@pytest.mark.parametrize("dynamic", [False, True])
def test_three_surfaces_and_a_pulsed_coupling_step_as_solo(dynamic):
    """Three surfaces (the kick from each point's eigenvectors, the general
    loop of the members' kernel), a mask on both faces, and, ``dynamic``, a
    coupling switched on in time (the kick made per sub-step): the batch's
    psi and books against each member stepped alone, to 1e-12."""
    from wavesweep.absorbers.layers import Absorber   # lazy: only this test builds an absorber by hand
    from wavesweep.grid import Axis, Grid
    from wavesweep.potentials import PotentialContext, make_term
    from wavesweep.propagators.coefficients import YOSHIDA4
    from wavesweep.states import build_state

    grid = Grid((Axis("x", -30.0, 30.0, 256, "periodic"),))
    ctx = PotentialContext(grid, 1.0, None, job_from_dict(copy.deepcopy(ABSORBED_JOB)).units, "potential.0", "lab")

    def term(expression):
        return make_term({"kind": "expression", "expression": expression}, ctx)
    coupling = "0.05 * exp(-x**2 / 20)" + (" * sin(0.7 * t)" if dynamic else "")
    h = SurfaceHamiltonian(grid, 1.0, ["A", "B", "C"], [[term("0.02 * x")], [term("-0.02 * x")], [term("0.1 + 0 * x")]],
                           {(0, 1): [term(coupling)], (1, 2): [term("0.1 * exp(-(x - 6)**2 / 10)")]})
    assert h.time_dependent == dynamic
    absorber = Absorber(grid, "mask", 6.0, None, dt=0.05, mask_exponent=0.125)
    starts = []
    for k, (x0, p0) in enumerate(((-8.0, 4.0), (0.0, -4.0), (6.0, 3.0))):
        psi = np.zeros((3, 256), complex)
        psi[k] = build_state({"kind": "gaussian", "center": [x0], "width": [2.0], "momentum": [p0]}, grid, 1.0)
        starts.append(psi)
    solo = []
    for psi0 in starts:
        prop = CoupledSplitOperator(h, 0.05, YOSHIDA4, absorber)
        solo.append((prop.step(prop.load(psi0), 160).copy(), prop.absorbed.copy()))
    batch = CoupledSplitOperator(h, 0.05, YOSHIDA4, absorber, members=3)
    psi = batch.load(np.stack(starts))
    for n in (70, 90):   # two calls, as a run's samples: the kicks across the calls' ends
        psi = batch.step(psi, n)
    for j, (psi_alone, absorbed_alone) in enumerate(solo):
        np.testing.assert_allclose(psi[j], psi_alone, rtol=0, atol=1e-12)
        np.testing.assert_allclose(batch.absorbed[j], absorbed_alone, rtol=0, atol=1e-12)
        moved = sum(float(np.sum(np.abs(psi_alone[k]) ** 2)) for k in range(3) if k != j) * grid.cell_volume
        assert absorbed_alone.sum() > 1e-4 and moved > 1e-4   # the books and the couplings were at work


def test_coupled_batch_keys():
    """Coupled jobs differing only in [packet] (its surface too) share a key;
    a coupling, a surface's potential or the absorber's layers tell them
    apart (its strength does not: test_a_tuned_cap_sweep_batches); a
    scheme other than a split-operator is never batched."""
    table = copy.deepcopy(ABSORBED_JOB)
    jobs = _jobs(table, PACKETS)
    key = batch_key(jobs[0].table)
    assert key is not None and {batch_key(j.table) for j in jobs} == {key}
    for path, value in ((("coupling", 0, "potential", 0, "expression"), "0.3 + 0 * x"),
                        (("surface", 1, "potential", 0, "expression"), "-0.02 * x"),
                        (("absorber", "thickness"), 12.0)):
        t = copy.deepcopy(table)
        node = t
        for p in path[:-1]:
            node = node[p]
        node[path[-1]] = value
        assert batch_key(_jobs(t, PACKETS[:1])[0].table) != key, path
    # two surfaces of 512 points: the batch's bound counts both
    assert batch_group(jobs[0].to_toml()) == (key, 64)
    big = copy.deepcopy(table)
    big["grid"]["x"]["points"] = 1 << 17
    assert batch_group(_jobs(big, PACKETS[:1])[0].to_toml())[1] == 8   # 2^21 elements / (2 x 2^17)
    cheb = copy.deepcopy(table)
    cheb["evolve"]["scheme"] = "chebyshev"
    cheb["absorber"] = {"kind": "none"}
    assert batch_key(job_from_dict(cheb).table) is None


def test_a_study_of_coupled_runs_drains_in_batches(tmp_path):
    """Through the local queue: the runs of a sweep over the packet's
    momentum and surface go in one batch, each result its solo run's."""
    import tomli_w

    from wavesweep.studies.api import submit, work
    table = {**copy.deepcopy(ABSORBED_JOB), "evolve": {**ABSORBED_JOB["evolve"], "duration": 4.0},
             "record": {"every": 0.4, "snapshot_every": 2.0},
             "sweep": {"packet.momentum": [2.5, 3.0], "packet.surface": ["A", "B"]}}
    path = tmp_path / "study.toml"
    path.write_text(tomli_w.dumps(table))
    submit(path, tmp_path / "root")
    summary = work(tmp_path / "root", workers=1)
    assert summary["done"] == 4
    assert_batched_like_solo(tmp_path / "root", 4, tmp_path / "solo", 1e-12)


def test_an_interrupted_coupled_member_resumes_later_and_matches(tmp_path):
    """A member stopped with a checkpoint (psi (surfaces, *grid), absorbed
    (surfaces, faces)) resumes in a later batch and ends as its solo run."""
    from wavesweep.errors import RunInterrupted
    from wavesweep.io.checkpoint import CheckpointPolicy, ResultExists
    table = {**copy.deepcopy(ABSORBED_JOB), "evolve": {**ABSORBED_JOB["evolve"], "duration": 16.0}}
    jobs = _jobs(table, PACKETS)
    policies = [CheckpointPolicy(tmp_path / f"ck{i}", every_seconds=3600.0) for i in range(3)]
    paths = [tmp_path / "batch" / f"{i}.nc" for i in range(3)]
    asked = []

    def stop_second(i):
        asked.append(i)
        return i == 1 and asked.count(1) == 20     # at the 20th sample, after the packets reached the CAP
    first = BatchedRun(jobs).run(paths, checkpoints=policies, should_stop=stop_second)
    assert isinstance(first[1], RunInterrupted) and first[1].checkpoint is not None
    second = BatchedRun(jobs).run(paths, checkpoints=policies)
    assert isinstance(second[0], ResultExists) and second[1] == paths[1]
    solo = Simulation(jobs[1]).run(tmp_path / "solo", progress=False)
    assert_same_file(solo, paths[1], 1e-12)


def test_a_tuned_cap_sweep_batches_and_writes_the_files_of_solo_runs(tmp_path):
    """A sweep over the packet alone with a CAP tuned to each packet (no
    ``strength``: resolve_job tunes it to the energies that arrive): the
    members get strengths of their own, yet share one key and step as one
    batch, each file its solo run's to 1e-12 (absorbed per surface and face
    included).  Before the members' own decays, the strengths were part of
    the coupled key and these runs never batched."""
    table = copy.deepcopy(ABSORBED_JOB)
    del table["absorber"]["strength"]
    jobs = _jobs(table, PACKETS)
    strengths = [json.dumps(j.table["absorber"]["strength"], sort_keys=True) for j in jobs]
    assert len(set(strengths)) == len(jobs), strengths   # every member tuned to its own packet
    assert len({batch_key(j.table) for j in jobs}) == 1
    solo = [Simulation(j).run(tmp_path / "solo", progress=False) for j in jobs]
    out = BatchedRun(jobs).run([tmp_path / "batch" / p.name for p in solo])
    assert all(not isinstance(o, BaseException) for o in out), out
    for a, b in zip(solo, out):
        assert_same_file(a, b, 1e-12)
    with xr.open_dataset(out[1]) as ds:   # the CAP was at work on both surfaces and both faces
        assert float(ds["absorbed"][-1].sum()) > 1e-2 and float(ds["absorbed"][-1].sel(surface="B").sum()) > 1e-3


@pytest.mark.parametrize("dynamic", [False, True])
def test_members_own_caps_on_a_square_grid_step_as_solo(dynamic):
    """Per-member CAPs of one geometry on all four faces of a 2D grid (the
    corners two faces share must decay once), a static or a pulsed
    coupling (the kick made per sub-step), the fourth-order composition:
    the batch's psi and books against each member stepped alone with its
    own absorber (the absorber then in the kick's matrix), to 1e-12."""
    from wavesweep.absorbers.layers import Absorber   # lazy: only these tests build absorbers by hand
    from wavesweep.grid import Axis, Grid
    from wavesweep.potentials import PotentialContext, make_term
    from wavesweep.propagators.coefficients import YOSHIDA4
    from wavesweep.states import build_state

    grid = Grid((Axis("x", -12.0, 12.0, 48, "periodic"), Axis("y", -12.0, 12.0, 40, "periodic")))
    ctx = PotentialContext(grid, 1.0, None, job_from_dict(copy.deepcopy(ABSORBED_JOB)).units, "potential.0", "lab")

    def term(expression):
        return make_term({"kind": "expression", "expression": expression}, ctx)
    coupling = "0.4 * exp(-(x**2 + y**2) / 8)" + (" * cos(0.9 * t)" if dynamic else "")
    h = SurfaceHamiltonian(grid, 1.0, ["A", "B"], [[term("0.05 * x")], [term("-0.05 * x + 0.02 * y")]],
                           {(0, 1): [term(coupling)]})
    assert h.time_dependent == dynamic
    strengths = (0.5, {"x-": 2.0, "x+": 0.3, "y-": 1.0, "y+": 4.0}, 1.5)
    absorbers = [Absorber(grid, "cap", 4.0, None, strength, power=2.0 + k) for k, strength in enumerate(strengths)]
    starts = []
    for k, (center, momentum) in enumerate((((-4.0, 0.0), (3.0, 2.0)), ((2.0, 3.0), (-2.0, 3.0)),
                                            ((0.0, -3.0), (2.5, -2.5)))):
        psi = np.zeros((2, 48, 40), complex)
        psi[k % 2] = build_state({"kind": "gaussian", "center": list(center), "width": [1.0, 1.0],
                                  "momentum": list(momentum)}, grid, 1.0)
        starts.append(psi)
    dt = 0.05
    solo = []
    for psi0, absorber in zip(starts, absorbers):
        prop = CoupledSplitOperator(h, dt, YOSHIDA4, absorber)
        solo.append((prop.step(prop.load(psi0), 100).copy(), prop.absorbed.copy()))
    batch = CoupledSplitOperator(h, dt, YOSHIDA4, absorbers, members=3)
    psi = batch.load(np.stack(starts))
    for n in (45, 55):   # two calls, as a run's samples: the kicks across the calls' ends
        psi = batch.step(psi, n)
    for j, (psi_alone, absorbed_alone) in enumerate(solo):
        np.testing.assert_allclose(psi[j], psi_alone, rtol=0, atol=1e-12)
        np.testing.assert_allclose(batch.absorbed[j], absorbed_alone, rtol=0, atol=1e-12)
        assert (absorbed_alone.sum(axis=0) > 1e-4).sum() >= 3 and (absorbed_alone.sum(axis=1) > 1e-4).all()   # several faces, both surfaces
    assert not np.allclose(solo[0][1], solo[2][1], atol=1e-6)   # the strengths made a difference
