"""A coupled job's packet: where its surfaces come from (issue 16, trial
problems P1 and P2).

P1: ``[packet] surface`` and the members' ``surface`` of a superposition
together are refused (before, the packet's silently won).  P2: a coupled
job starts from a coupled state file (``[packet] kind = "file"``: a
coupled run's result or a coupled ``levels --states`` file, which have a
``surface`` dimension), each part on the job's surface of its name.

Sources: a restart is the uninterrupted run (the propagator's group
property, exp(-i H t2) exp(-i H t1) = exp(-i H (t1 + t2)), to rounding);
a coupled level read back is an eigenvector of the full matrix Hamiltonian
built here (scipy.linalg.eigh of the S N x S N matrix,
test_coupled_levels.full_matrix) and so stationary: its populations stay
constant under an exact propagator (the Chebyshev expansion of a static H).
"""
from __future__ import annotations

import copy
import math

import numpy as np
import pytest
import scipy.linalg
import xarray as xr

from conftest import make_job
from test_cli import assert_bad_input, wavesweep, write_job
from test_coupled_levels import WELL_A, WELL_B, coupled, full_matrix, single
from wavesweep.analysis.spectra import coupled_stationary_states, stationary_states, write_states
from wavesweep.errors import JobError
from wavesweep.job import job_from_dict
from wavesweep.run import Simulation
from wavesweep.setup import CoupledSetup, Model, Setup, resolve_job

HEIGHT, WIDTH = 0.02, 3.0   # the Gaussian coupling between the wells (hartree, bohr)
COUPLING = [{"kind": "gaussian", "height": HEIGHT, "width": WIDTH}]


def wells(points=128, **evolve):
    """Two displaced, offset harmonic wells coupled by a Gaussian (box, no
    absorber: nothing leaves, so a restart's renormalisation is exact), a
    packet displaced on A."""
    table = coupled(WELL_A, WELL_B, COUPLING, points=points)
    table["packet"] = {"kind": "gaussian", "center": -3.0, "width": 1.5, "momentum": 0.5, "surface": "A"}
    table["evolve"] = {"dt": 0.05, "duration": 10.0, "scheme": "strang", **evolve}
    table["record"] = {"every": 1.0, "snapshot_every": 5.0}
    return table


# -- P1 -------------------------------------------------------------------------------------
SUPERPOSITION = {"kind": "superposition", "amplitudes": [1.0, 1.0],
                 "packets": [{"kind": "gaussian", "center": -2.0, "width": 1.5, "surface": "A"},
                             {"kind": "gaussian", "center": 2.0, "width": 1.5, "surface": "B"}]}


def test_packet_surface_and_the_members_surfaces_are_refused():
    table = wells()
    table["packet"] = copy.deepcopy(SUPERPOSITION)
    s = CoupledSetup(job_from_dict(copy.deepcopy(table)))   # per member: half on each surface
    np.testing.assert_allclose(np.sum(np.abs(s.psi0) ** 2, axis=1) * s.grid.cell_volume, [0.5, 0.5], atol=1e-6)
    table["packet"]["surface"] = "A"
    with pytest.raises(JobError) as err:
        job_from_dict(table)
    assert err.value.field == "packet.surface" and "not both" in str(err.value)
    # one member naming its surface is enough to make the two disagree
    del table["packet"]["packets"][0]["surface"]
    with pytest.raises(JobError, match="not both"):
        job_from_dict(table)
    # the packet's surface alone puts every member there
    del table["packet"]["packets"][1]["surface"]
    s = CoupledSetup(job_from_dict(table))
    np.testing.assert_allclose(np.sum(np.abs(s.psi0) ** 2, axis=1) * s.grid.cell_volume, [1.0, 0.0], atol=1e-12)


def test_both_surfaces_on_the_command_line_exit_2(tmp_path):
    table = wells()
    table["packet"] = copy.deepcopy(SUPERPOSITION)
    job = write_job(tmp_path, table)
    proc = wavesweep("run", job, "-o", "out", "--set", "packet.surface=A", cwd=tmp_path)
    assert_bad_input(proc, "packet.surface", "not both")
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())


# -- P2 -------------------------------------------------------------------------------------
def _propagated(setup):
    prop = setup.make_propagator()
    return prop.step(prop.load(setup.psi0), setup.total_steps)


def test_a_coupled_run_continues_from_its_result(tmp_path):
    """10 au, then 6 au more from the result's final psi: the uninterrupted
    16 au run to 1e-12, both surfaces holding weight."""
    first = resolve_job(job_from_dict(wells()))
    path = Simulation(first).run(tmp_path, progress=False)
    with xr.open_dataset(path) as ds:
        assert ds.psi_real.dims == ("surface", "x")
    table = wells(duration=6.0)
    table["packet"] = {"kind": "file", "path": str(path)}
    restarted = CoupledSetup(job_from_dict(table))
    assert restarted.psi0.shape == (2, 128)
    whole = CoupledSetup(job_from_dict(wells(duration=16.0)))
    psi = _propagated(whole)
    weights = np.sum(np.abs(psi) ** 2, axis=1) * whole.grid.cell_volume
    assert min(weights) > 1e-3   # the coupling has moved weight: a test of both surfaces
    np.testing.assert_allclose(_propagated(restarted), psi, rtol=0, atol=1e-12)


def test_surfaces_are_matched_by_name_not_by_order(tmp_path):
    """A job listing the same surfaces as B, A reads each part onto its own name."""
    path = Simulation(resolve_job(job_from_dict(wells(duration=2.0)))).run(tmp_path, progress=False)
    with xr.open_dataset(path) as ds:
        final = ds.psi_real.values + 1j * ds.psi_imag.values
    table = wells()
    table["surface"] = table["surface"][::-1]
    table["packet"] = {"kind": "file", "path": str(path)}
    s = CoupledSetup(job_from_dict(table))
    assert s.surfaces == ["B", "A"]
    norm = math.sqrt(float(np.sum(np.abs(final) ** 2)) * s.grid.cell_volume)
    np.testing.assert_allclose(s.psi0, final[::-1] / norm, rtol=0, atol=1e-14)


def test_a_coupled_level_of_levels_states_is_stationary(tmp_path):
    """Level 1 of the coupled wells written by `levels --states`, read with
    state = 1: an eigenvector of the full matrix Hamiltonian (eigh, to
    1e-9 in overlap) whose populations stay constant to 1e-10 under the
    Chebyshev expansion (exact for a static H)."""
    table = wells(points=96)
    model = Model(make_job(copy.deepcopy(table)))
    energies, states = coupled_stationary_states(model, 3)
    write_states(tmp_path / "states.nc", model, energies, states)
    table["packet"] = {"kind": "file", "path": str(tmp_path / "states.nc"), "state": 1}
    table["evolve"] = {"dt": 0.5, "duration": 20.0, "scheme": "chebyshev"}
    s = CoupledSetup(job_from_dict(table))
    matrix, dv = full_matrix(table, lambda x: HEIGHT * np.exp(-x**2 / (2 * WIDTH**2)))
    reference, vectors = scipy.linalg.eigh(matrix, subset_by_index=[0, 2])
    flat = s.psi0.reshape(-1) * math.sqrt(dv)
    assert abs(abs(np.vdot(vectors[:, 1], flat)) - 1.0) < 1e-9
    start = np.sum(np.abs(s.psi0) ** 2, axis=1) * dv
    assert min(start) > 0.01   # the level is spread over both surfaces
    psi = _propagated(s)
    end = np.sum(np.abs(psi) ** 2, axis=1) * dv
    np.testing.assert_allclose(end, start, rtol=0, atol=1e-10)
    assert s.total_steps == 40


def _coupled_states_file(tmp_path, table=None):
    table = table or wells(points=64)
    model = Model(make_job(copy.deepcopy(table)))
    energies, states = coupled_stationary_states(model, 2)
    return write_states(tmp_path / "states.nc", model, energies, states)


def test_what_a_coupled_state_file_refuses(tmp_path):
    """One line naming the field: the packet's surface beside a file of all
    surfaces (packet.surface); other surface names (packet.path); a job of
    one surface reading it (packet.path, and no false "another grid")."""
    path = _coupled_states_file(tmp_path)
    table = wells(points=64)
    table["packet"] = {"kind": "file", "path": str(path), "state": 0, "surface": "A"}
    with pytest.raises(JobError) as err:
        CoupledSetup(job_from_dict(table))
    assert err.value.field == "packet.surface" and "remove surface" in str(err.value)
    renamed = wells(points=64)
    renamed["surface"][1]["name"] = "C"
    renamed["coupling"][0]["surfaces"] = ["A", "C"]
    renamed["packet"] = {"kind": "file", "path": str(path), "state": 0}
    with pytest.raises(JobError) as err:
        CoupledSetup(job_from_dict(renamed))
    assert err.value.field == "packet.path" and "'A', 'B'" in str(err.value) and "'A', 'C'" in str(err.value)
    one = single(WELL_A, points=64)
    one["packet"] = {"kind": "file", "path": str(path), "state": 0}
    with pytest.raises(JobError) as err:
        Setup(job_from_dict(one))
    assert err.value.field == "packet.path" and "coupled surfaces" in str(err.value)
    assert "another grid" not in str(err.value)


def test_a_single_surface_state_goes_on_the_named_surface(tmp_path):
    """A state file of one surface (a single-surface `levels --states`)
    starts a coupled job on packet.surface; without it, one line asks which."""
    one = Model(make_job(single(WELL_A, points=64)))
    energies, states = stationary_states(one, 1)
    path = write_states(tmp_path / "one.nc", one, energies, states)
    table = wells(points=64)
    table["packet"] = {"kind": "file", "path": str(path), "surface": "B"}
    s = CoupledSetup(job_from_dict(copy.deepcopy(table)))
    np.testing.assert_allclose(s.psi0[0], 0.0, atol=0)
    np.testing.assert_allclose(np.abs(s.psi0[1]), np.abs(states[0]), rtol=0, atol=1e-12)
    del table["packet"]["surface"]
    with pytest.raises(JobError) as err:
        CoupledSetup(job_from_dict(table))
    assert err.value.field == "packet.surface" and "'A', 'B'" in str(err.value)


def test_a_coupled_result_restarts_on_the_command_line(tmp_path):
    """The contract: `wavesweep run` of a job whose packet is a coupled
    result file exits 0 (before: exit 2, "on another grid")."""
    table = wells(points=64, duration=1.0)
    table["record"] = {"every": 0.5, "snapshot_every": 1.0}
    first = write_job(tmp_path, table, "first.toml")
    assert wavesweep("run", first, "-o", "a", "--quiet", cwd=tmp_path).returncode == 0
    [result] = (tmp_path / "a").glob("*.nc")
    table["packet"] = {"kind": "file", "path": str(result)}
    proc = wavesweep("run", write_job(tmp_path, table, "again.toml"), "-o", "b", "--quiet", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    assert "another grid" not in proc.stderr


# -- P13: what `wavesweep keys` says of surfaces ------------------------------------------------
def test_the_keys_reference_says_what_coupled_jobs_do():
    """`keys packet` and every `keys packet.KIND` list `surface`; `keys
    surface` no longer says the analysis commands cannot read the results
    or that only split-operator schemes run; `keys coupling` says no kind
    gives a complex coupling."""
    from wavesweep.job.reference import reference
    from wavesweep.states import PACKETS

    def text(topic):
        return str(reference(topic))

    assert "surface" in [k["key"] for k in reference("packet")["sections"][0]["keys"]]
    for kind in PACKETS:
        assert "surface" in [k["key"] for k in reference(f"packet.{kind}")["sections"][0]["keys"]], kind
    assert "not both" in text("packet.superposition") and "`surface` dimension" in text("packet.file")
    surface = text("surface")
    assert "do not read" not in surface and "chebyshev" in surface
    assert "no potential kind gives a complex" in text("coupling")
