"""`levels` on coupled surfaces (issue 16, item 4): the full matrix
Hamiltonian T (x) 1 + V, V_ab on the diagonal of each off-diagonal block,
and each level's weight on each surface, sum_r |psi_s|^2 dV.

Sources: the harmonic oscillator's levels (n + 1/2) hbar omega (any
textbook; e.g. Griffiths eq. 2.61, from memory), shifted by a constant
potential; for two identical surfaces with a constant coupling c, the
rotation to (A +/- B) / sqrt(2) decouples H into T + V +/- c, so the levels
are E_n - c and E_n + c with weight 1/2 on each surface (a closed form);
otherwise scipy.linalg.eigh of the full matrix, built here from each
surface's dense single-surface Hamiltonian (``Hamiltonian.static_matrix``)
and the coupling evaluated here from its formula (a general-purpose
reference computation).
"""
from __future__ import annotations

import copy
import json
import math

import numpy as np
import pytest
import scipy.linalg
import xarray as xr

from conftest import make_job
from test_cli import assert_bad_input, wavesweep, write_job
from wavesweep.analysis.spectra import (coupled_level_errors, coupled_stationary_states, stationary_states)
from wavesweep.eigen import coupled_eigenpairs, surface_weights
from wavesweep.errors import JobError
from wavesweep.setup import Model

OMEGA = 0.2          # hartree (m = 1): both wells
OFFSET = 0.05        # hartree: surface B's constant offset
SHIFT = 2.0          # bohr: surface B's centre
WELL_A = [{"kind": "harmonic", "omega": OMEGA}]
WELL_B = [{"kind": "harmonic", "omega": OMEGA, "center": SHIFT}, {"kind": "expression", "expression": "0.05"}]


def coupled(surface_a, surface_b, coupling=None, points=256):
    """A job on x in [-20, 20] bohr (box) with surfaces A and B and, if
    given, the coupling's potential list between them."""
    table = {"title": "two coupled wells",
             "grid": {"x": {"min": -20.0, "max": 20.0, "points": points, "boundary": "box"}},
             "surface": [{"name": "A", "potential": surface_a}, {"name": "B", "potential": surface_b}],
             "packet": {"kind": "gaussian", "center": 0.0, "width": 2.0, "surface": "A"},
             "evolve": {"dt": 0.1, "duration": 1.0}}
    if coupling is not None:
        table["coupling"] = [{"surfaces": ["A", "B"], "potential": coupling}]
    return table


def single(potential, points=256):
    """The same grid with one surface: ``potential`` as [[potential]]."""
    table = coupled([], [], points=points)
    del table["surface"], table["packet"]["surface"]
    table["potential"] = potential
    return table


def test_zero_coupling_gives_each_surfaces_own_levels():
    """Uncoupled surfaces: the levels are the union of each surface's own
    (the single-surface `levels` of that surface alone, to 1e-12; the
    closed form (n + 1/2) hbar omega, + OFFSET on B, to 1e-10), and every
    state lies on one surface only (weights 1 and 0 to 1e-12)."""
    count = 8
    energies, states = coupled_stationary_states(make_job(coupled(WELL_A, WELL_B)), count)
    alone_a, _ = stationary_states(make_job(single(WELL_A)), count)
    alone_b, _ = stationary_states(make_job(single(WELL_B)), count)
    union = np.sort(np.concatenate([alone_a, alone_b]))[:count]
    np.testing.assert_allclose(energies, union, rtol=0, atol=1e-12)
    n = np.arange(count)
    closed = np.sort(np.concatenate([(n + 0.5) * OMEGA, (n + 0.5) * OMEGA + OFFSET]))[:count]
    np.testing.assert_allclose(energies, closed, rtol=0, atol=1e-10)
    weights = surface_weights(states, Model(make_job(coupled(WELL_A, WELL_B))).grid.cell_volume)
    on_a = np.isin(np.round(energies, 8), np.round(alone_a, 8))   # which surface each level is A's
    np.testing.assert_allclose(weights[:, 0], on_a.astype(float), rtol=0, atol=1e-12)
    np.testing.assert_allclose(weights.sum(axis=1), 1.0, rtol=0, atol=1e-12)


def test_identical_surfaces_with_a_constant_coupling_split_by_twice_the_coupling():
    """Two copies of one well coupled by a constant c: E_n -/+ c, each state
    half on each surface (module notes: the rotation to (A +/- B)/sqrt 2);
    c = 0.013 keeps every level apart from the others."""
    c = 0.013
    job = make_job(coupled(WELL_A, WELL_A, [{"kind": "expression", "expression": "0.013"}]))
    energies, states = coupled_stationary_states(job, 8)
    n = np.arange(4)
    closed = np.sort(np.concatenate([(n + 0.5) * OMEGA - c, (n + 0.5) * OMEGA + c]))
    np.testing.assert_allclose(energies, closed, rtol=0, atol=1e-10)
    weights = surface_weights(states, Model(job).grid.cell_volume)
    np.testing.assert_allclose(weights, 0.5, rtol=0, atol=1e-12)
    # for c > 0 the lower of each pair is antisymmetric (psi_A = -psi_B), the upper symmetric
    for k, state in enumerate(states):
        sign = 1.0 if k % 2 == 0 else -1.0
        np.testing.assert_allclose(state[0] + sign * state[1], 0.0, rtol=0, atol=1e-10)


def full_matrix(table, coupling_of_x):
    """The S N x S N matrix built here: each surface's dense single-surface
    Hamiltonian (Hamiltonian.static_matrix of a job with that surface's
    potential alone), and coupling_of_x(x) on the diagonal of the
    off-diagonal blocks."""
    a = Model(make_job(single(table["surface"][0]["potential"], table["grid"]["x"]["points"])))
    b = Model(make_job(single(table["surface"][1]["potential"], table["grid"]["x"]["points"])))
    x = a.grid.axes[0].coordinates
    n = x.size
    matrix = np.zeros((2 * n, 2 * n))
    matrix[:n, :n] = a.hamiltonian.static_matrix()
    matrix[n:, n:] = b.hamiltonian.static_matrix()
    matrix[np.arange(n), n + np.arange(n)] = matrix[n + np.arange(n), np.arange(n)] = coupling_of_x(x)
    return matrix, a.grid.cell_volume


@pytest.mark.parametrize("method", ["dense", "iterative"])
def test_a_general_coupling_against_the_full_matrix(method):
    """Displaced, offset wells coupled by a Gaussian V_AB = h exp(-x^2 / 2 w^2):
    the levels against scipy.linalg.eigh of the full matrix built here (to
    1e-10 hartree), the states' weights against the eigenvectors' (1e-9),
    on the dense path and on the iterative one (LOBPCG from each surface's
    own states)."""
    height, width = 0.03, 3.0
    table = coupled(WELL_A, WELL_B, [{"kind": "gaussian", "height": height, "width": width}])
    matrix, dv = full_matrix(table, lambda x: height * np.exp(-x**2 / (2 * width**2)))
    count = 8
    reference, vectors = scipy.linalg.eigh(matrix, subset_by_index=[0, count - 1])
    n = matrix.shape[0] // 2
    reference_weights = np.stack([np.sum(vectors[:n] ** 2, axis=0), np.sum(vectors[n:] ** 2, axis=0)], axis=1)
    model = Model(make_job(table))
    energies, states = coupled_eigenpairs(model.surface_hamiltonian, count, method=method)
    np.testing.assert_allclose(energies, reference, rtol=0, atol=1e-10)
    weights = surface_weights(states, dv)
    np.testing.assert_allclose(weights, reference_weights, rtol=0, atol=1e-9)
    assert np.all((weights > 0.002) & (weights < 0.998))   # the coupling mixes every level
    # the states themselves, up to sign
    flat = states.reshape(count, -1) * math.sqrt(dv)
    overlap = np.abs(np.sum(flat.T * vectors, axis=0))
    np.testing.assert_allclose(overlap, 1.0, rtol=0, atol=1e-9)


def test_coupled_error_estimates_bound_the_distance_to_a_finer_grid():
    """The three-grid estimates of a coarse grid's levels (28 points, dx =
    1.4 bohr) bound their distance to the levels of a 256-point grid
    (converged to rounding for these smooth wells).  Measured: the
    estimates are 1.2 to 15 times the distance."""
    table = coupled(WELL_A, WELL_B, [{"kind": "gaussian", "height": 0.03, "width": 3.0}], points=28)
    model = Model(make_job(table))
    energies, states = coupled_stationary_states(model, 6)
    estimate = coupled_level_errors(model, energies, states)
    fine, _ = coupled_stationary_states(make_job(coupled(WELL_A, WELL_B, table["coupling"][0]["potential"],
                                                         points=256)), 6)
    distance = np.abs(energies - fine)
    assert np.all(distance <= estimate.errors), (distance, estimate.errors)
    assert np.all(estimate.errors < 1e-6) and np.all(distance > 1e-11)   # a grid not yet converged


def test_walls_on_one_surface():
    """A step of 1e6 hartree on B beyond x = 6 bohr is a wall there
    (eigen.coupled_walls): the levels equal those of the matrix without
    B's points beyond it (psi_B = 0 there: the V -> infinity limit), to 1e-10."""
    step = [{"kind": "step", "position": 6.0, "height": 1e6}]
    coupling = [{"kind": "gaussian", "height": 0.03, "width": 3.0}]
    table = coupled(WELL_A, WELL_B + step, coupling, points=128)
    model = Model(make_job(table))
    energies, states = coupled_eigenpairs(model.surface_hamiltonian, 6)
    matrix, _ = full_matrix(coupled(WELL_A, WELL_B + step, coupling, points=128),
                            lambda x: 0.03 * np.exp(-x**2 / (2 * 9.0)))
    x = model.grid.axes[0].coordinates
    v_b = model.surface_hamiltonian.matrix(0.0)[1, 1]
    keep = np.concatenate([np.ones(x.size, bool), v_b < 1e3])
    reference = scipy.linalg.eigvalsh(matrix[np.ix_(keep, keep)], subset_by_index=[0, 5])
    assert 0 < (~keep).sum() < x.size   # some of B's points are walls
    np.testing.assert_allclose(energies, reference, rtol=0, atol=1e-10)
    assert np.all(states[:, 1][:, ~keep[x.size:]] == 0.0)


def test_count_beyond_the_surfaces_points_is_refused():
    model = Model(make_job(coupled(WELL_A, WELL_B, points=16)))
    with pytest.raises(JobError) as err:
        coupled_eigenpairs(model.surface_hamiltonian, 33, field="--count")
    assert err.value.field == "--count" and "32" in str(err.value)
    energies, _ = coupled_eigenpairs(model.surface_hamiltonian, 32)   # all of them
    assert energies.size == 32


# -- the command line ---------------------------------------------------------------------
def test_levels_command_on_coupled_surfaces(tmp_path):
    """JSON: energies plus `surfaces` and `surface_weights` (one object per
    level, surface name -> weight); the table has a column per surface; the
    states file has a `surface` dimension and each state's weights."""
    table = coupled(WELL_A, WELL_A, [{"kind": "expression", "expression": "0.013"}], points=128)
    job = write_job(tmp_path, table)
    proc = wavesweep("levels", job, "--count", "4", "--json", "--states", "states.nc", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    body = json.loads(proc.stdout)
    assert set(body) == {"energies", "energy_units", "energy_errors", "refine", "extrapolated", "surfaces",
                         "surface_weights"}
    assert body["surfaces"] == ["A", "B"]
    np.testing.assert_allclose(body["energies"], [0.1 - 0.013, 0.1 + 0.013, 0.3 - 0.013, 0.3 + 0.013],
                               atol=1e-10)
    assert [sorted(w) for w in body["surface_weights"]] == [["A", "B"]] * 4
    np.testing.assert_allclose([[w["A"], w["B"]] for w in body["surface_weights"]], 0.5, atol=1e-12)
    with xr.open_dataset(tmp_path / "states.nc") as ds:
        assert ds.psi_real.dims == ("state", "surface", "x") and list(ds.surface.values) == ["A", "B"]
        np.testing.assert_allclose(ds.weight.values, 0.5, atol=1e-12)
    text = wavesweep("levels", job, "--count", "2", cwd=tmp_path)
    assert text.returncode == 0, text.stderr
    head, *rows = text.stdout.splitlines()
    assert "on A" in head and "on B" in head and len(rows) == 2
    assert rows[0].split()[-2:] == ["0.500000", "0.500000"]


def test_levels_bad_input_on_coupled_surfaces(tmp_path):
    """Exit 2 and one line naming the field: more levels than the surfaces'
    points (2 x 16), a count of 0, a condensate's [interaction] (no mean
    field on coupled surfaces)."""
    job = write_job(tmp_path, coupled(WELL_A, WELL_B, points=16))
    assert_bad_input(wavesweep("levels", job, "--count", "33", cwd=tmp_path), "--count", "32")
    assert_bad_input(wavesweep("levels", job, "--count", "0", cwd=tmp_path), "--count")
    with_interaction = copy.deepcopy(coupled(WELL_A, WELL_B, points=16))
    with_interaction["interaction"] = {"coupling": 0.1, "atoms": 100}
    assert_bad_input(wavesweep("levels", write_job(tmp_path, with_interaction, "gp.toml"), "--count", "2",
                               cwd=tmp_path), "interaction", "remove [interaction]")


def test_two_dimensional_surfaces_iterative_against_dense():
    """2D anisotropic wells (no degenerate level) coupled by a Gaussian on
    24 x 24 points: LOBPCG on the coupled operator gives dense eigh's
    levels to 1e-10 hartree and its states' weights to 1e-8."""
    table = coupled([{"kind": "harmonic", "omega": [0.2, 0.27]}],
                    [{"kind": "harmonic", "omega": [0.2, 0.27], "center": [2.0, 0.0]},
                     {"kind": "expression", "expression": "0.05"}],
                    [{"kind": "gaussian", "height": 0.03, "width": 3.0}])
    table["grid"] = {"x": {"min": -10.0, "max": 10.0, "points": 24},
                     "y": {"min": -10.0, "max": 10.0, "points": 24}, "boundary": "box"}
    table["packet"]["center"] = [0.0, 0.0]
    model = Model(make_job(table))
    dense, dense_states = coupled_eigenpairs(model.surface_hamiltonian, 6, method="dense")
    iterative, iterative_states = coupled_eigenpairs(model.surface_hamiltonian, 6, method="iterative")
    np.testing.assert_allclose(iterative, dense, rtol=0, atol=1e-10)
    dv = model.grid.cell_volume
    np.testing.assert_allclose(surface_weights(iterative_states, dv), surface_weights(dense_states, dv),
                               rtol=0, atol=1e-8)


def test_degenerate_levels_of_uncoupled_copies(tmp_path):
    """Two identical uncoupled surfaces: every level is doubly degenerate
    (the degeneracy rule of one surface marks it), the states of a level are
    any basis of it, and their weights on each surface sum to 1 over the
    level (the trace of the level's projector on that surface: one state
    per surface); a note on stderr says the weights are per level only."""
    table = coupled(WELL_A, WELL_A, points=64)
    job = write_job(tmp_path, table)
    proc = wavesweep("levels", job, "--count", "4", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    rows = proc.stdout.splitlines()[1:]
    assert [r.split()[-1] for r in rows] == ["0-1", "0-1", "2-3", "2-3"]
    assert "summed over the level" in proc.stderr
    energies, states = coupled_stationary_states(make_job(table), 4)
    np.testing.assert_allclose(energies, [0.1, 0.1, 0.3, 0.3], rtol=0, atol=1e-10)
    weights = surface_weights(states, Model(make_job(table)).grid.cell_volume)
    np.testing.assert_allclose(weights[0::2] + weights[1::2], 1.0, rtol=0, atol=1e-12)


def test_continuum_states_of_an_open_face_are_said_surface_by_surface():
    """Surface A a well 1 hartree up (its levels far above), B flat at 0 in
    a box whose x+ face the job absorbs (open space): B's low levels are
    the box's, E_n = n^2 pi^2 / 2 m L^2 (Griffiths sec. 2.2), continuum
    states whose energies move with the wall; moving it out by L takes them
    to E_n / 4.  The edge estimate, made on each surface against its own
    V_ss, covers that, and the advice says they are no bound levels."""
    table = coupled([{"kind": "harmonic", "omega": 1.0}, {"kind": "expression", "expression": "1.0"}],
                    [{"kind": "free"}])
    table["absorber"] = {"kind": "cap", "thickness": 2.0, "strength": 1.0, "faces": ["x+"]}
    model = Model(make_job(table))
    energies, states = coupled_stationary_states(model, 3)
    np.testing.assert_allclose(energies, (np.arange(1, 4) * math.pi / 40.0) ** 2 / 2, rtol=1e-9)
    estimate = coupled_level_errors(model, energies, states)
    assert np.all(estimate.errors >= 0.75 * energies)
    assert estimate.refine == "grid.x.max" and "continuum state" in estimate.advice
