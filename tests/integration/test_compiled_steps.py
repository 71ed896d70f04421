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


# -- a sample in one compiled pass (kernels.sample.sample_rows) ----------------------------------------

SAMPLED = {   # a made-up 1D device with two detectors and a well: every recorded value is non-trivial
    "grid": {"x": {"min": -60.0, "max": 60.0, "points": 1024}},
    "potential": [{"kind": "harmonic", "omega": 0.02}],
    "packet": {"center": -8.0, "width": 2.5, "momentum": 0.8},
    "detector": [{"name": "right", "x": 6.5}, {"name": "left", "x": -20.25}],
    "evolve": {"dt": 0.05, "duration": 10.0, "fft": "pyfftw", "threads": 1},
}


def _values(observer, psi, potential, compiled):
    saved = observer._row_sample
    if not compiled:
        observer._row_sample = None
    try:
        return observer.measure_members(psi, potential)
    finally:
        observer._row_sample = saved


@pytest.mark.parametrize("precision", ["double", "single"])
@pytest.mark.parametrize("members", [None, 3])
def test_a_sample_in_one_pass_equals_the_calls(precision, members):
    """The compiled sample against the observer's calls (numpy kernels,
    pyFFTW's transform, BLAS products), which the observable tests check
    against closed forms: the same values to rounding.  In single
    precision the calls take the detectors' products in complex64 and the
    pass in complex128: they then agree to float32 rounding."""
    tables = []
    for p in (0.8, 1.0, 1.3)[: members or 1]:
        t = copy.deepcopy(SAMPLED)
        t["evolve"]["precision"] = precision
        t["packet"]["momentum"] = p
        tables.append(t)
    setups = [Setup(make_job(t)) for t in tables]
    one = setups[0]
    if members is None:
        observer, prop = one.make_observer(), one.make_propagator()
        psi = prop.step(prop.load(one.psi0), 120)
    else:
        from wavesweep.observables import Observer
        observer = Observer(one.grid, one.mass, one.observer_transform(members=members, threads=1), one.detectors,
                            np.stack([s.psi0 for s in setups]), members=members)
        prop = one.scheme(one.hamiltonian, one.dt, one.propagator_transform(members=members, threads=1),
                          [s.absorber for s in setups], one.dtype, members=members)
        psi = prop.step(prop.load(np.stack([s.psi0 for s in setups])), 120)
    assert observer._row_sample is not None   # the pass is taken here
    v = one.hamiltonian.static_potential
    fast, calls = _values(observer, psi, v, True), _values(observer, psi, v, False)
    assert len(fast) == len(calls) == (members or 1)
    scalar_tol, amplitude_tol = (1e-12, 1e-13) if precision == "double" else (1e-6, 2e-6)
    for f, c in zip(fast, calls):
        assert set(f) == set(c)
        for key in ("norm", "x_mean", "x_std", "p_mean", "energy", "autocorrelation_real", "autocorrelation_imag"):
            assert f[key] == pytest.approx(c[key], rel=scalar_tol, abs=scalar_tol), key
        scale = np.abs(c["detector_psi"]).max()
        assert scale > 1e-3   # the packet reaches the detectors: their values are compared
        for key in ("detector_psi", "detector_dpsi", "flux"):
            np.testing.assert_allclose(f[key], c[key], rtol=0, atol=amplitude_tol * max(scale, 1.0), err_msg=key)


def test_a_batch_member_samples_as_its_solo_run_to_the_last_bit():
    """A member's values depend on no other member's: a batch of two
    measures each as its own observer does (bit for bit, the property the
    batch's result files rely on)."""
    tables = [copy.deepcopy(SAMPLED) for _ in range(2)]
    tables[1]["packet"]["momentum"] = 1.2
    setups = [Setup(make_job(t)) for t in tables]
    one = setups[0]
    from wavesweep.observables import Observer
    batch = Observer(one.grid, one.mass, one.observer_transform(members=2, threads=1), one.detectors,
                     np.stack([s.psi0 for s in setups]), members=2)
    psi = np.stack([s.psi0 * np.exp(0.3j) for s in setups])
    v = one.hamiltonian.static_potential
    together = batch.measure_members(psi, v)
    for b, s in enumerate(setups):
        solo = s.make_observer()
        assert solo._row_sample is not None and batch._row_sample is not None
        alone = solo.measure(psi[b].copy(), v)
        for key, value in alone.items():
            np.testing.assert_array_equal(np.asarray(together[b][key]), np.asarray(value), err_msg=key)


def test_a_free_packet_sampled_in_one_pass_as_the_closed_form():
    """The recorded moments of a free Gaussian through the compiled
    sample.  Reference: the spreading Gaussian (any quantum mechanics
    text, e.g. Griffiths sec. 2.4; from memory): <x> = x0 + p0 t / m,
    sigma(t) = sigma0 (1 + (t / (2 m sigma0^2))^2)^(1/2), <p> = p0 and
    <H> = p0^2 / (2 m) + 1 / (8 m sigma0^2) (hbar = 1), sigma0 the
    position spread of |psi|^2 at t = 0."""
    table = {"grid": {"x": {"min": -100.0, "max": 100.0, "points": 2048}},
             "packet": {"center": -10.0, "width": 2.0, "momentum": 1.0},
             "detector": [{"name": "far", "x": 40.0}],
             "evolve": {"dt": 0.05, "duration": 20.0, "fft": "pyfftw", "threads": 1}}
    setup = Setup(make_job(table))
    observer, prop = setup.make_observer(), setup.make_propagator()
    assert observer._row_sample is not None
    x = setup.grid.axes[0].coordinates
    d0 = np.abs(setup.psi0) ** 2
    sigma0 = float(np.sqrt(np.sum(d0 * (x + 10.0) ** 2) / np.sum(d0)))
    psi = prop.load(setup.psi0)
    for t, steps in ((0.0, 0), (5.0, 100), (20.0, 300)):   # dt 0.05
        if steps:
            psi = prop.step(psi, steps)
        r = observer.measure(psi, setup.hamiltonian.static_potential)
        assert r["norm"] == pytest.approx(1.0, abs=1e-12)
        assert r["x_mean"] == pytest.approx(-10.0 + t, abs=1e-9)
        assert r["x_std"] == pytest.approx(sigma0 * np.sqrt(1.0 + (t / (2.0 * sigma0 ** 2)) ** 2), rel=1e-9)
        assert r["p_mean"] == pytest.approx(1.0, abs=1e-12)
        assert r["energy"] == pytest.approx(0.5 + 1.0 / (8.0 * sigma0 ** 2), rel=1e-12)


@pytest.mark.parametrize("where", ["thread", "scipy"])
def test_a_sample_without_row_plans_takes_the_same_passes(where):
    """Off the main thread (a Dask worker's task) or through scipy's FFT no
    row plans are made: the same two passes then run on either side of the
    transform's own call.  Against the one-call sample of the main thread:
    equal to the last bit through pyFFTW (FFTW's plan of the same problem),
    to rounding through scipy's FFT (another library's transform)."""
    import threading
    job = make_job(SAMPLED)
    setup = Setup(job)
    prop = setup.make_propagator()
    psi = np.array(prop.step(prop.load(setup.psi0), 150))
    v = setup.hamiltonian.static_potential
    main = setup.make_observer()
    assert main._row_sample["plans"] is not None
    want = main.measure(psi.copy(), v)
    if where == "thread":
        made = []
        worker = threading.Thread(target=lambda: made.append(setup.make_observer()))
        worker.start()
        worker.join()
        other = made[0]
    else:
        table = copy.deepcopy(SAMPLED)
        table["evolve"]["fft"] = "scipy"
        other = Setup(make_job(table)).make_observer()
    assert other._row_sample is not None and other._row_sample["plans"] is None
    got = other.measure(psi.copy(), v)
    for key, value in want.items():
        if where == "thread":
            np.testing.assert_array_equal(np.asarray(got[key]), np.asarray(value), err_msg=key)
        else:
            np.testing.assert_allclose(np.asarray(got[key]), np.asarray(value), rtol=1e-12, atol=1e-15, err_msg=key)
