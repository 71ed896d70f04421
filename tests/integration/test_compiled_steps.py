"""1D Strang steps in one compiled loop (kernels.steps, FFTW called by address).

Reference: the same propagator stepping through its Python calls
(``_step_static`` with pyFFTW's plans), which the propagation tests check
against closed forms (free Gaussian, harmonic coherent state) and
scipy.linalg.expm.  The compiled loop does the same arithmetic per point
with FFTW's plans of one row, so the two agree to rounding (1e-13 here);
the absorbed books too, kick by kick.
"""
from __future__ import annotations

import copy

import numpy as np
import pytest

from conftest import make_job
from wavesweep.propagators import split_operator
from wavesweep.setup import Setup

pytest.importorskip("pyfftw")

DEVICE = {   # a made-up 1D device: a barrier, CAP layers at both ends
    "grid": {"x": {"min": -80.0, "max": 80.0, "points": 1024}},
    "potential": [{"kind": "barrier", "height": 0.4, "width": 1.5}],
    "packet": {"center": -25.0, "width": 4.0, "momentum": 1.1},
    "absorber": {"kind": "cap", "thickness": 15.0, "strength": 0.05, "power": 2.0},
    "evolve": {"dt": 0.05, "duration": 60.0, "fft": "pyfftw", "threads": 1},
}


def stepped(setup, compiled: bool, calls=(7, 1, 1800, 2)):
    prop = setup.make_propagator()
    if not compiled:
        prop._rows = None
    psi = prop.load(setup.psi0)
    for n in calls:   # several calls: each opens with a half kick and closes with one
        psi = prop.step(psi, n)
    return np.array(psi), np.array(prop.absorbed)


def test_one_run_steps_as_through_the_calls():
    setup = Setup(make_job(DEVICE))
    assert setup.make_propagator()._rows is not None   # the compiled loop is taken here
    psi_c, books_c = stepped(setup, True)
    psi_p, books_p = stepped(setup, False)
    assert books_p.sum() > 1e-3   # the layers took something: their books are compared
    np.testing.assert_allclose(psi_c, psi_p, rtol=0, atol=1e-13)
    np.testing.assert_allclose(books_c, books_p, rtol=1e-12, atol=1e-16)


@pytest.mark.parametrize("points", [1024, 1023])   # an odd row: the rows' alignments differ (FFTW_UNALIGNED)
def test_a_batch_with_absorbers_of_their_own_steps_as_through_the_calls(points):
    jobs = []
    for p, w in ((0.9, 0.03), (1.1, 0.05), (1.4, 0.08)):
        t = copy.deepcopy(DEVICE)
        t["grid"]["x"]["points"] = points
        t["packet"]["momentum"] = p
        t["absorber"]["strength"] = w
        jobs.append(make_job(t))
    setups = [Setup(j) for j in jobs]
    one = setups[0]
    results = []
    for compiled in (True, False):
        # as a batch's lane builds it (wavesweep.batched._Lane)
        prop = one.scheme(one.hamiltonian, one.dt, one.propagator_transform(members=len(jobs), threads=1),
                          [s.absorber for s in setups], one.dtype, members=len(jobs))
        if not compiled:
            prop._rows = None
        else:
            assert prop._rows is not None
        psi = prop.load(np.stack([s.psi0 for s in setups]))
        for n in (5, 1800):
            psi = prop.step(psi, n)
        results.append((np.array(psi), np.array(prop.absorbed)))
    (psi_c, books_c), (psi_p, books_p) = results
    assert (books_p.sum(axis=1) > 1e-3).all()
    np.testing.assert_allclose(psi_c, psi_p, rtol=0, atol=1e-13)
    np.testing.assert_allclose(books_c, books_p, rtol=1e-12, atol=1e-16)


@pytest.mark.parametrize("members", [None, 3])
def test_single_precision_keeps_its_norm_as_through_the_calls(members):
    """Single precision: every eighth kick measured and rescaled to the
    norm the books say psi should have (SplitOperator._renormalised), in
    the loop as through the calls; over several calls, so that the count
    of kicks carries from one to the next."""
    table = copy.deepcopy(DEVICE)
    table["evolve"]["precision"] = "single"
    jobs = []
    for p, w in ((0.9, 0.03), (1.1, 0.05), (1.4, 0.08))[:members or 1]:
        t = copy.deepcopy(table)
        t["packet"]["momentum"], t["absorber"]["strength"] = p, w
        jobs.append(make_job(t))
    setups = [Setup(j) for j in jobs]
    one = setups[0]
    results = []
    for compiled in (True, False):
        if members is None:
            prop = one.make_propagator()
        else:
            prop = one.scheme(one.hamiltonian, one.dt, one.propagator_transform(members=members, threads=1),
                              [s.absorber for s in setups], one.dtype, members=members)
        assert (prop._rows is not None) == compiled or not compiled
        if not compiled:
            prop._rows = None
        psi = prop.load(one.psi0 if members is None else np.stack([s.psi0 for s in setups]))
        for n in (3, 1, 900, 5, 900):
            psi = prop.step(psi, n)
        results.append((np.array(psi), np.array(prop.absorbed), np.array(prop._scale), prop._kick_count))
    (psi_c, books_c, scale_c, count_c), (psi_p, books_p, scale_p, count_p) = results
    assert count_c == count_p and books_p.sum() > 1e-3
    np.testing.assert_allclose(scale_c, scale_p, rtol=1e-12)
    np.testing.assert_allclose(psi_c, psi_p, rtol=0, atol=2e-7)
    np.testing.assert_allclose(books_c, books_p, rtol=1e-6, atol=1e-12)
    # the norm kept: what is on the grid and what the layers took add to 1 (single precision's 1e-5)
    norm = (np.abs(psi_c.reshape(len(jobs), -1)) ** 2).sum(axis=1) * one.grid.cell_volume
    np.testing.assert_allclose(norm + books_c.reshape(len(jobs), -1).sum(axis=1), 1.0, atol=1e-5)


def test_a_whole_kick_as_the_half_kick_squared(monkeypatch):
    """Above SQUARED_ARRAY_MAX points the kick between steps is the half
    kick's array squared in the kernel (here with the limit lowered)."""
    monkeypatch.setattr(split_operator, "SQUARED_ARRAY_MAX", 512)
    setup = Setup(make_job(DEVICE))
    prop = setup.make_propagator()
    assert prop._rows is not None and prop._rows[2]   # the whole kick: the half kick's array squared
    psi_c, books_c = stepped(setup, True)
    psi_p, books_p = stepped(setup, False)
    np.testing.assert_allclose(psi_c, psi_p, rtol=0, atol=1e-13)
    np.testing.assert_allclose(books_c, books_p, rtol=1e-12, atol=1e-16)


def test_what_the_loop_cannot_take_goes_through_the_calls():
    for change in ({"evolve": {**DEVICE["evolve"], "scheme": "order4"}},
                   {"evolve": {**DEVICE["evolve"], "fft": "scipy"}},
                   {"grid": {"x": {**DEVICE["grid"]["x"], "boundary": "box"}}}):
        table = {**copy.deepcopy(DEVICE), **change}
        assert Setup(make_job(table)).make_propagator()._rows is None, change


def test_a_free_packet_takes_the_loop_and_spreads_as_the_closed_form():
    """No potential and no absorber: the kicks multiply by one.  Reference:
    the free Gaussian's closed form, |psi(x, t)|^2 with sigma(t)^2 =
    sigma0^2 (1 + (t / (2 m sigma0^2))^2) and centre x0 + p0 t / m
    (any quantum mechanics text, e.g. Griffiths sec. 2.4; from memory)."""
    table = {"grid": {"x": {"min": -100.0, "max": 100.0, "points": 2048}},
             "packet": {"center": -10.0, "width": 2.0, "momentum": 1.0},
             "evolve": {"dt": 0.05, "duration": 20.0, "fft": "pyfftw", "threads": 1}}
    setup = Setup(make_job(table))
    prop = setup.make_propagator()
    assert prop._rows is not None
    psi = np.array(prop.step(prop.load(setup.psi0), 400))
    t = 20.0
    x = setup.grid.axes[0].coordinates
    dens = np.abs(psi) ** 2
    sigma_x = np.sqrt(np.sum(dens * (x - np.sum(dens * x) / np.sum(dens)) ** 2) / np.sum(dens))
    x_mean = np.sum(dens * x) / np.sum(dens)
    assert abs(x_mean - (-10.0 + t)) < 1e-9
    sigma0 = float(np.sqrt(np.sum(np.abs(setup.psi0) ** 2 * (x + 10.0) ** 2) / np.sum(np.abs(setup.psi0) ** 2)))
    expected = sigma0 * np.sqrt(1.0 + (t / (2.0 * sigma0 ** 2)) ** 2)
    assert abs(sigma_x - expected) < 1e-9 * expected


def test_plans_are_made_only_by_the_main_thread():
    """FFTW's planner is not thread-safe and pyFFTW's lock is out of reach:
    another thread gets no row plans (its runs take the plain calls)."""
    import threading

    import pyfftw

    from wavesweep.fftw_rows import row_plans
    buf = pyfftw.empty_aligned((2, 512), np.complex128)
    assert row_plans(buf) is not None
    got = []
    worker = threading.Thread(target=lambda: got.append(row_plans(buf)))
    worker.start()
    worker.join()
    assert got == [None]
