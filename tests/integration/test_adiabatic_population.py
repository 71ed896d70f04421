"""`record.adiabatic`: the probability on each adiabatic state of coupled
surfaces, population_adiabatic(time, state) (issue 16, item 3).

Sources: the adiabatic states as numpy.linalg.eigh of the local potential
matrix, point by point (a general-purpose reference, written here with a
plain loop); unitarity of the local basis (sum over states = norm); the
adiabatic theorem (Born & Fock 1928: a slow packet on one adiabatic state
of a strongly coupled pair stays on it, up to (v d12 / gap)^2, d12 the
nonadiabatic coupling; from memory); the Landau-Zener probability of a
diabatic passage, P = exp(-2 pi V12^2 / (hbar v |F1 - F2|)) (Landau 1932;
Zener 1932; from memory; tests/coupled_reference.py), which after the
crossing leaves 1 - P on the adiabatic state the packet started on.
"""
from __future__ import annotations

import copy
import math

import numpy as np
import pytest
import xarray as xr

from coupled_reference import landau_zener_probability
from test_checkpoint import assert_same_result, stop_after
from test_coupled_setup import D_F, LZ_JOB, P0, V12
from wavesweep.errors import JobError, JobErrors, RunInterrupted
from wavesweep.io.checkpoint import CheckpointPolicy
from wavesweep.job import job_from_dict
from wavesweep.run import Simulation
from wavesweep.setup import CoupledSetup, resolve_job
from wavesweep.surfaces import adiabatic_populations, local_eigenvectors


def _job(table):
    return resolve_job(job_from_dict(copy.deepcopy(table)))


def _with_adiabatic(table):
    return {**copy.deepcopy(table), "record": {**table["record"], "adiabatic": True}}


def _eigh_populations(v, psi, dv):
    """The reference: numpy.linalg.eigh at each point in a plain loop, the
    state's amplitude q_k^dagger psi there, |.|^2 summed with dV."""
    s = v.shape[0]
    flat_v = v.reshape(s, s, -1)
    flat_psi = psi.reshape(s, -1)
    out = np.zeros(s)
    for n in range(flat_v.shape[2]):
        _, q = np.linalg.eigh(flat_v[:, :, n])
        out += np.abs(q.conj().T @ flat_psi[:, n]) ** 2
    return out * dv


# three surfaces, each pair coupled by a Gaussian, one coupling that changes in time
THREE = {
    "title": "three",
    "grid": {"x": {"min": -30.0, "max": 30.0, "points": 256}},
    "surface": [{"name": "A", "potential": [{"kind": "expression", "expression": "0.002 * x**2"}]},
                {"name": "B", "potential": [{"kind": "expression", "expression": "0.3 - 0.01 * x"}]},
                {"name": "C", "potential": [{"kind": "expression", "expression": "0.2 + 0.01 * x"}]}],
    "coupling": [{"surfaces": ["A", "B"], "potential": [{"kind": "gaussian", "height": 0.05, "width": 4.0}]},
                 {"surfaces": ["B", "C"], "potential": [{"kind": "gaussian", "height": -0.03, "width": 6.0,
                                                         "center": 3.0}]},
                 {"surfaces": ["A", "C"], "potential": [{"kind": "expression",
                                                         "expression": "0.02 * cos(0.5 * t) * exp(-x**2 / 50)"}]}],
    "packet": {"kind": "superposition", "amplitudes": [1.0, 0.7],
               "packets": [{"kind": "gaussian", "center": -8.0, "width": 3.0, "momentum": 1.0, "surface": "A"},
                           {"kind": "gaussian", "center": 4.0, "width": 2.0, "momentum": -0.5, "surface": "C"}]},
    "evolve": {"dt": 0.05, "duration": 2.0, "scheme": "strang"},
    "record": {"every": 0.5, "snapshot_every": 2.0, "adiabatic": True},
}


@pytest.mark.parametrize("surfaces", [2, 3])
def test_populations_against_eigh_point_by_point(surfaces):
    """Two surfaces (the closed form) and three (eigh, a time-dependent
    coupling: the basis at the sample's time), against the loop reference."""
    table = copy.deepcopy(THREE)
    if surfaces == 2:
        table["surface"] = table["surface"][:2]
        table["coupling"] = table["coupling"][:1]
        table["packet"]["packets"][1]["surface"] = "B"
    s = CoupledSetup(job_from_dict(table))
    assert s.adiabatic and s.hamiltonian.time_dependent == (surfaces == 3)
    prop, observer = s.make_propagator(), s.make_observer()
    psi = prop.step(prop.load(s.psi0), 17)
    values = s.measure(observer, psi, prop.t)
    dv = s.grid.cell_volume
    reference = _eigh_populations(s.hamiltonian.matrix(prop.t), psi, dv)
    np.testing.assert_allclose(values["population_adiabatic"], reference, rtol=0, atol=1e-12)
    assert values["population_adiabatic"].sum() == pytest.approx(values["norm"].sum(), abs=1e-12)
    # a time-dependent V: the basis is that of the sample's time, not the static part's
    if surfaces == 3:
        static = _eigh_populations(s.hamiltonian.matrix(None), psi, dv)
        assert np.abs(static - reference).max() > 1e-6


def test_the_local_basis_diagonalises_v_with_its_phases_fixed():
    """Every point: V U = U diag(E), U unitary, E ascending and equal to
    eigh's, each state's largest component real and positive (the
    convention the file's comment states); a real V gives a real basis, a
    Hermitian one (complex coupling) a complex basis, both the closed form
    (two surfaces) and eigh (three)."""
    rng = np.random.default_rng(7)
    for complex_coupling in (False, True):
        for s in (2, 3):
            v = rng.normal(size=(s, s, 40)) + (1j * rng.normal(size=(s, s, 40)) if complex_coupling else 0)
            v = 0.5 * (v + np.conj(np.swapaxes(v, 0, 1)))
            energies, u = local_eigenvectors(v)
            assert np.iscomplexobj(u) == complex_coupling
            for n in range(v.shape[2]):
                np.testing.assert_allclose(energies[:, n], np.linalg.eigvalsh(v[:, :, n]), rtol=0, atol=1e-13)
                np.testing.assert_allclose(v[:, :, n] @ u[:, :, n], u[:, :, n] * energies[:, n], rtol=0, atol=1e-13)
                np.testing.assert_allclose(u[:, :, n].conj().T @ u[:, :, n], np.eye(s), rtol=0, atol=1e-13)
                big = u[np.argmax(np.abs(u[:, :, n]), axis=0), np.arange(s), n]
                assert np.all(big.real > 0) and np.all(np.abs(big.imag) < 1e-15)
    # no coupling: the diabatic states, the lower surface as state 0; an exact crossing: the first surface
    v = np.zeros((2, 2, 3))
    v[0, 0] = [1.0, 0.0, -1.0]
    energies, u = local_eigenvectors(v)
    np.testing.assert_array_equal(np.abs(u[:, 0]), [[0, 1, 1], [1, 0, 0]])
    np.testing.assert_array_equal(energies, [[0, 0, -1], [1, 0, 0]])


def test_sum_over_states_is_the_norm_with_an_absorber(tmp_path):
    """Absorbing layers take probability from both surfaces: at every sample
    the states' populations sum to the norm on the grid (1e-12); a run
    stopped at a checkpoint and resumed writes the same file."""
    table = _with_adiabatic({**copy.deepcopy(LZ_JOB), "grid": {"x": {"min": -60.0, "max": 60.0, "points": 512}},
                             "packet": {"kind": "gaussian", "center": -10.0, "width": 4.0, "momentum": 3.0,
                                        "surface": "A"},
                             "evolve": {"dt": 0.02, "duration": 24.0, "scheme": "strang"},
                             "record": {"every": 0.4, "snapshot_every": 24.0},
                             "absorber": {"kind": "cap", "thickness": 15.0, "strength": 1.0}})
    path = Simulation(_job(table)).run(tmp_path, progress=False)
    with xr.open_dataset(path) as ds:
        pop = ds["population_adiabatic"]
        assert pop.dims == ("time", "state") and list(ds["state"].values) == [0, 1]
        assert ds["state"].attrs["units"] == "1" and "ascending" in ds["state"].attrs["long_name"]
        assert pop.attrs["units"] == "1" and "real and positive" in pop.attrs["comment"]
        np.testing.assert_allclose(pop.sum("state"), ds["norm"].sum("surface"), rtol=0, atol=1e-12)
        assert float(ds["norm"].sum("surface")[-1]) < 0.7     # the layers took a good part
    policy = CheckpointPolicy(tmp_path / "run.ckpt", every_seconds=1e9)
    out = tmp_path / "resumed" / "result.nc"
    with pytest.raises(RunInterrupted):
        Simulation(_job(table)).run(path=out, progress=False, checkpoint=policy, should_stop=stop_after(9))
    Simulation(_job(table)).run(path=out, progress=False, checkpoint=policy)
    assert_same_result(path, out)


def test_landau_zener_leaves_one_minus_p_on_the_initial_adiabatic_state(tmp_path):
    """The crossing of test_coupled_runs: the packet starts on A where A is
    the lower surface (adiabatic state 0, up to the small mixing there);
    after the crossing A is the upper one, so the diabatic share left on A,
    P_LZ, is the adiabatic state 1's, and state 0 keeps 1 - P_LZ (the same
    tolerance as the diabatic check, 1.2e-3 relative)."""
    table = _with_adiabatic({**copy.deepcopy(LZ_JOB), "record": {**LZ_JOB["record"], "snapshot_every": 48.0}})
    path = Simulation(_job(table)).run(tmp_path, progress=False)
    velocity = math.sqrt(2 * (P0**2 / 2 + D_F / 2 * -120.0))
    lz = landau_zener_probability(V12, velocity, D_F)
    with xr.open_dataset(path) as ds:
        pop = ds["population_adiabatic"].values
        norm = ds["norm"].values
    # at the start the packet is on A, mixed with B by about (V12 / (F x0))^2 there
    mixing = (V12 / (D_F * 120.0)) ** 2
    assert pop[0, 0] == pytest.approx(1.0, abs=2 * mixing) and pop[0, 0] < 1.0
    assert abs(pop[-1, 0] / (1 - lz) - 1) < 1.2e-3
    assert abs(pop[-1, 1] / lz - 1) < 1.2e-3
    # the diabatic populations swap roles: A keeps P_LZ
    assert abs(norm[-1, 0] / lz - 1) < 1.2e-3


def test_adiabatic_limit_keeps_a_slow_packet_on_its_state(tmp_path):
    """A coupling (1 hartree) above the packet's kinetic energy (0.5) and the
    diabatic gap it sees (at most 1): a packet started on the lower
    adiabatic state stays there (the adiabatic theorem: the admixture is
    about (v d12 / gap)^2 ~ 4e-5 with d12 <= F / (4 V12) = 0.0125, v ~ 1,
    gap 2), while its diabatic composition changes from 72 % on A to
    about 30 % (28 % at x = 20)."""
    coupling = 1.0
    table = _with_adiabatic({**copy.deepcopy(LZ_JOB), "grid": {"x": {"min": -60.0, "max": 60.0, "points": 512}},
                             "coupling": [{"surfaces": ["A", "B"], "potential": [
                                 {"kind": "expression", "expression": f"{coupling} + 0 * x"}]}],
                             "packet": {"kind": "gaussian", "center": -20.0, "width": 4.0, "momentum": 1.0,
                                        "surface": "A"},
                             "evolve": {"dt": 0.05, "duration": 40.0, "scheme": "strang"},
                             "record": {"every": 0.5, "snapshot_every": 40.0}})
    sim = Simulation(_job(table))
    s = sim.setup
    # the packet put on the lower adiabatic state: psi_a = U_a0(x) g(x)
    u = s.adiabatic_basis(0.0)
    gaussian = s.psi0.sum(axis=0)
    s.psi0 = u[:, 0] * gaussian
    path = sim.run(tmp_path, progress=False)
    with xr.open_dataset(path) as ds:
        pop = ds["population_adiabatic"].values
        on_a = ds["norm"].sel(surface="A").values
        x_mean = (ds["x_mean"] * ds["norm"]).sum("surface").values
    assert pop[0, 0] == pytest.approx(1.0, abs=1e-12)
    assert np.max(1.0 - pop[:, 0]) < 1e-3
    assert on_a[0] == pytest.approx(0.72, abs=0.01) and on_a[-1] < 0.35
    assert x_mean[-1] > 15.0          # it went through the region where the states change


def test_record_adiabatic_needs_surfaces_and_false_is_the_default():
    single = {"title": "one", "grid": {"x": {"min": -20.0, "max": 20.0, "points": 64}},
              "packet": {"kind": "gaussian", "center": 0.0, "width": 2.0},
              "evolve": {"dt": 0.1, "duration": 1.0}, "record": {"every": 0.5, "adiabatic": True}}
    with pytest.raises((JobError, JobErrors)) as e:
        job_from_dict(single)
    errors = getattr(e.value, "errors", [e.value])
    assert [err.field for err in errors] == ["record.adiabatic"]
    assert "[[surface]]" in errors[0].message and len(str(errors[0]).splitlines()) == 1
    # false: the same job (text and run id) as without the key
    without = copy.deepcopy(LZ_JOB)
    said_false = {**copy.deepcopy(LZ_JOB), "record": {**LZ_JOB["record"], "adiabatic": False}}
    assert _job(said_false).run_id == _job(without).run_id
    assert _job(said_false).to_toml() == _job(without).to_toml()
    assert _job(_with_adiabatic(LZ_JOB)).run_id != _job(without).run_id
    assert "adiabatic" not in _job(without).to_toml()
    # a coupled run without it has no adiabatic populations
    s = CoupledSetup(_job(without))
    assert not s.adiabatic
    assert "population_adiabatic" not in s.measure(s.make_observer(), s.psi0, 0.0)


def test_populations_do_not_depend_on_the_phases():
    """Flip the sign (or a complex phase) of each state: the same populations."""
    rng = np.random.default_rng(3)
    v = rng.normal(size=(3, 3, 30))
    v = 0.5 * (v + np.swapaxes(v, 0, 1))
    psi = rng.normal(size=(3, 30)) + 1j * rng.normal(size=(3, 30))
    _, u = local_eigenvectors(v)
    phased = u * np.exp(1j * rng.uniform(0, 2 * np.pi, size=(1, 3, 30)))
    np.testing.assert_allclose(adiabatic_populations(phased, psi, 0.1), adiabatic_populations(u, psi, 0.1),
                               rtol=0, atol=1e-13)
    np.testing.assert_allclose(adiabatic_populations(u, psi, 0.1), _eigh_populations(v, psi, 0.1),
                               rtol=0, atol=1e-12)
