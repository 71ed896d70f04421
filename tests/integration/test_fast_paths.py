"""The fast paths (fused numba kernels, planned transforms, batches, single
precision) against the plain numpy references of tests/plain.py.

References: the plain Strang loop and the observables by their textbook
definitions (tests/plain.py); the tolerances are rounding (1e-10 and
tighter in double precision).
"""
from __future__ import annotations

import copy

import numpy as np
import pytest

from conftest import make_job
from plain import observables as plain_observables
from plain import strang as plain_strang
from wavesweep.fft import BACKENDS
from wavesweep.kernels import KernelSet
from wavesweep.setup import Setup

BOX_2D = {"x": {"min": -20.0, "max": 20.0, "points": 64},
          "y": {"min": -15.0, "max": 15.0, "points": 48, "boundary": "box"}}

CASES = {
    "1d-barrier-cap": {
        "grid": {"x": {"min": -60.0, "max": 60.0, "points": 512}},
        "potential": [{"kind": "barrier", "height": 0.3, "width": 2.0}],
        "packet": {"center": 38.0, "width": 3.0, "momentum": 1.2},
        "absorber": {"kind": "cap", "thickness": 12.0},
    },
    "1d-field-mask": {
        "grid": {"x": {"min": -40.0, "max": 40.0, "points": 256}},
        "potential": [{"kind": "gaussian", "height": 0.2, "width": 3.0},
                      {"kind": "field", "amplitude": 0.02, "omega": 0.3, "envelope": "constant"}],
        "packet": {"center": 26.0, "width": 1.5, "momentum": 0.5},
        "absorber": {"kind": "mask", "thickness": 8.0},
        "particle": {"charge": -1.0},
    },
    "2d-mixed-cap-faces": {
        "grid": {**BOX_2D, "boundary": "periodic"},
        "potential": [{"kind": "gaussian", "height": 0.4, "width": 2.0}],
        "packet": {"center": [6.0, 1.0], "width": [2.0, 2.0], "momentum": [1.0, 0.2]},
        "absorber": {"kind": "cap", "thickness": 6.0, "faces": ["x-", "x+"]},
    },
    "2d-expression-xy": {
        "grid": {"x": {"min": -20.0, "max": 20.0, "points": 64},
                 "y": {"min": -20.0, "max": 20.0, "points": 64}},
        "potential": [{"kind": "harmonic", "omega": 0.1},
                      {"kind": "expression", "expression": "0.002 * x * y * cos(0.5 * t)"}],
        "packet": {"center": [-2.0, 1.0], "width": [1.5, 1.5], "momentum": [0.3, 0.0]},
    },
    "2d-expression-x-and-field-y": {
        "grid": {"x": {"min": -20.0, "max": 20.0, "points": 64},
                 "y": {"min": -20.0, "max": 20.0, "points": 32}},
        "potential": [{"kind": "harmonic", "omega": 0.1},
                      {"kind": "expression", "expression": "0.01 * x * sin(t)"},
                      {"kind": "field", "amplitude": 0.01, "omega": 0.2, "axis": "y", "envelope": "constant"}],
        "packet": {"center": [-2.0, 1.0], "width": [1.5, 1.5], "momentum": [0.3, 0.0]},
        "particle": {"charge": -1.0},
    },
    "3d-harmonic-cap": {
        "grid": {a: {"min": -12.0, "max": 12.0, "points": 24} for a in "xyz"},
        "potential": [{"kind": "harmonic", "omega": 0.2}],
        "packet": {"center": [3.0, 0.0, 1.0], "width": [1.5, 1.5, 1.5], "momentum": [1.0, 0.0, 0.0]},
        "absorber": {"kind": "cap", "thickness": 4.0},
    },
}


def table_of(case, precision="double", dt=0.02, duration=1.0):
    t = copy.deepcopy(CASES[case])
    t["evolve"] = {"dt": dt, "duration": duration, "precision": precision}
    t["record"] = {"every": dt}
    return t


@pytest.mark.parametrize("backend", sorted(BACKENDS))
@pytest.mark.parametrize("case", sorted(CASES))
def test_strang_matches_the_plain_loop(case, backend):
    """50 steps in calls of 1, 7, 13 and 29 steps (the kicks are fused
    across steps and split at each call's ends) against the plain loop."""
    setup = Setup(make_job(table_of(case)), fft=backend)
    prop = setup.make_propagator()
    psi = setup.psi0.astype(setup.dtype)
    for n in (1, 7, 13, 29):
        psi = prop.step(psi, n)
    ref, books = plain_strang(setup, setup.psi0, 50)
    assert np.max(np.abs(psi - ref)) < 1e-10 * np.max(np.abs(ref))
    np.testing.assert_allclose(prop.absorbed, books, rtol=1e-9, atol=1e-15)
    if setup.absorber.active:
        assert books.sum() > 1e-6   # the layers did take something


@pytest.mark.parametrize("case", ["1d-barrier-cap", "2d-mixed-cap-faces", "2d-expression-xy"])
def test_threaded_and_serial_kernels_agree(case):
    """The two builds of every kernel give the same state (reductions may
    differ in the order of summation only)."""
    out = []
    for threaded in (False, True):
        setup = Setup(make_job(table_of(case)))
        prop = setup.make_propagator()
        prop._kernels = KernelSet(threaded)
        out.append((prop.step(setup.psi0.astype(setup.dtype), 20).copy(), prop.absorbed.copy()))
    np.testing.assert_array_equal(out[0][0], out[1][0])
    np.testing.assert_allclose(out[0][1], out[1][1], rtol=1e-13)


def _detectors_for(setup):
    from wavesweep.observables import Detector
    dets = [Detector("a", 0, 3.3), Detector("b", 0, -7.1)]
    if setup.grid.ndim > 1:
        dets.append(Detector("c", setup.grid.ndim - 1, 1.7))
    return dets


@pytest.mark.parametrize("backend", sorted(BACKENDS))
@pytest.mark.parametrize("case", sorted(CASES))
def test_observables_match_their_definitions(case, backend):
    """Fused reductions vs the definitions, on an evolved (complex, moving,
    partly absorbed) state, detectors along the first and last axis."""
    from wavesweep.fft import make_transform
    from wavesweep.observables import Observer
    setup = Setup(make_job(table_of(case)), fft=backend)
    psi, _ = plain_strang(setup, setup.psi0, 30)
    v = setup.hamiltonian.potential(0.3)
    dets = _detectors_for(setup)
    obs = Observer(setup.grid, setup.mass, make_transform(setup.grid, backend), dets, setup.psi0)
    got = obs.measure(psi, v)
    want = plain_observables(setup.grid, setup.mass, psi, v, dets, setup.psi0)
    assert set(got) == set(want)
    for name, value in want.items():
        np.testing.assert_allclose(got[name], value, rtol=1e-11, atol=1e-13, err_msg=name)


def test_observables_on_a_box_first_axis():
    """<p> on a box axis comes from the spectral derivative, not Parseval."""
    from wavesweep.fft import make_transform
    from wavesweep.observables import Detector, Observer
    table = table_of("1d-barrier-cap")
    table["grid"]["boundary"] = "box"
    table["absorber"] = {"kind": "none"}
    setup = Setup(make_job(table))
    psi, _ = plain_strang(setup, setup.psi0, 30)
    dets = [Detector("a", 0, 3.3)]
    got = Observer(setup.grid, setup.mass, make_transform(setup.grid), dets, setup.psi0).measure(psi, 0 * psi.real)
    want = plain_observables(setup.grid, setup.mass, psi, 0 * psi.real, dets, setup.psi0)
    for name, value in want.items():
        np.testing.assert_allclose(got[name], value, rtol=1e-11, atol=1e-13, err_msg=name)


def _member_tables(case, strengths=None):
    """Three runs of one case that differ in the packet (and, if given, in
    the CAP strength)."""
    tables = []
    for i, shift in enumerate((0.0, 1.5, -2.0)):
        t = table_of(case)
        p = t["packet"]
        p["momentum"] = (p["momentum"] + 0.1 * i if isinstance(p["momentum"], float)
                         else [p["momentum"][0] + 0.1 * i, *p["momentum"][1:]])
        p["center"] = (p["center"] + shift if isinstance(p["center"], float)
                       else [p["center"][0] + shift, *p["center"][1:]])
        if strengths is not None:
            t["absorber"]["strength"] = strengths[i]
            t["absorber"]["power"] = 2.0
        tables.append(t)
    return tables


@pytest.mark.parametrize(("case", "strengths"), [
    ("1d-barrier-cap", None), ("1d-barrier-cap", [0.05, 0.08, 0.05]),
    ("2d-mixed-cap-faces", None), ("1d-field-mask", None), ("2d-expression-xy", None)])
def test_a_batch_steps_like_its_members_alone(case, strengths):
    """Members stacked on a leading axis (one transform along the grid axes,
    per-member absorber strengths when they differ) equal solo runs."""
    from wavesweep.fft import make_transform
    from wavesweep.observables import Observer
    setups = [Setup(make_job(t)) for t in _member_tables(case, strengths)]
    s0 = setups[0]
    nb = len(setups)
    prop = s0.scheme(s0.hamiltonian, s0.dt, make_transform(s0.grid, s0.fft_backend, s0.dtype, members=nb),
                     [s.absorber for s in setups], s0.dtype, members=nb)
    psi = np.stack([s.psi0 for s in setups]).astype(s0.dtype)
    psi = prop.step(prop.step(psi, 9), 14)
    obs = Observer(s0.grid, s0.mass, make_transform(s0.grid, members=nb), _detectors_for(s0),
                   np.stack([s.psi0 for s in setups]), members=nb)
    batch = obs.measure_members(psi, s0.hamiltonian.potential(prop.t))
    for b, s in enumerate(setups):
        solo = s.make_propagator()
        one = solo.step(solo.step(s.psi0.astype(s.dtype), 9), 14)
        assert np.max(np.abs(psi[b] - one)) < 1e-12 * np.max(np.abs(one))
        np.testing.assert_allclose(prop.absorbed[b], solo.absorbed, rtol=1e-12, atol=1e-16)
        alone = Observer(s.grid, s.mass, make_transform(s.grid), _detectors_for(s), s.psi0).measure(
            one, s.hamiltonian.potential(solo.t))
        for name, value in alone.items():
            np.testing.assert_allclose(batch[b][name], value, rtol=1e-11, atol=1e-14, err_msg=name)


def test_a_batch_refuses_members_with_other_layers():
    from wavesweep.fft import make_transform
    tables = _member_tables("1d-barrier-cap")
    tables[1]["absorber"]["thickness"] = 8.0
    setups = [Setup(make_job(t)) for t in tables]
    s0 = setups[0]
    with pytest.raises(ValueError, match="one geometry"):
        s0.scheme(s0.hamiltonian, s0.dt, make_transform(s0.grid, members=3), [s.absorber for s in setups],
                  members=3)


@pytest.mark.parametrize("backend", sorted(BACKENDS))
def test_single_precision_keeps_the_norm(backend):
    """Issue target: norm drift below 1e-5 over 1000 steps in complex64 (a
    float32 FFT pair alone lost 1.6e-7 per step, -1.4e-4 over 1000 steps at
    512^2 before the renormalisation); and with an absorber, norm plus
    books stays 1, the books agreeing with double precision."""
    table = {"grid": {"x": {"min": -40.0, "max": 40.0, "points": 256},
                      "y": {"min": -40.0, "max": 40.0, "points": 256}},
             "potential": [{"kind": "harmonic", "omega": 0.05}],
             "packet": {"center": [-5.0, 0.0], "width": [2.0, 2.0], "momentum": [1.0, 0.0]},
             "evolve": {"dt": 0.02, "duration": 20.0, "precision": "single"}, "record": {"every": 0.2}}
    setup = Setup(make_job(table), fft=backend)
    psi = setup.make_propagator().step(setup.psi0.astype(np.complex64), 1000)
    assert psi.dtype == np.complex64
    norm = float(np.sum(np.abs(psi.astype(complex)) ** 2)) * setup.grid.cell_volume
    assert abs(norm - 1.0) < 1e-5

    table = table_of("1d-barrier-cap", "single", duration=60.0)
    books = {}
    for precision in ("single", "double"):
        table["evolve"]["precision"] = precision
        setup = Setup(make_job(table), fft=backend)
        prop = setup.make_propagator()
        psi = prop.step(setup.psi0.astype(setup.dtype), 3000)
        norm = float(np.sum(np.abs(psi.astype(complex)) ** 2)) * setup.grid.cell_volume
        assert abs(norm + prop.absorbed.sum() - 1.0) < 1e-5
        books[precision] = prop.absorbed.copy()
    assert books["double"].sum() > 0.5
    np.testing.assert_allclose(books["single"], books["double"], atol=1e-5)


@pytest.mark.skipif("pyfftw" not in BACKENDS, reason="pyFFTW not installed")
def test_fftw_wisdom_is_read_once_and_written_only_after_a_new_plan(tmp_path, monkeypatch):
    """A worker makes two transforms per run: the wisdom file is read once
    per process and written only when a plan was measured (not found in the
    wisdom), so a second transform of a grid writes nothing; a transform
    made from the file's wisdom computes what a measured one does."""
    from wavesweep import fft
    from wavesweep.grid import Axis, Grid

    monkeypatch.setenv("WAVESWEEP_CACHE", str(tmp_path))
    monkeypatch.setattr(fft, "_wisdom_read", False, raising=False)
    reads, writes = [], []
    load, save = fft._load_wisdom, fft.write_bytes_atomic
    monkeypatch.setattr(fft, "_load_wisdom", lambda p: (reads.append(1), load(p)))
    monkeypatch.setattr(fft, "write_bytes_atomic", lambda path, data: (writes.append(path), save(path, data)))
    # a size no other test plans (3^4 7: odd, so no box axis's odd extension, 2 (N + 1), is of it either),
    # so this process holds no wisdom of it
    grid = Grid((Axis("x", -10.0, 10.0, 567, "periodic"),))
    first = fft.make_transform(grid, "pyfftw")
    # the first read, and the merge with the file before the one write
    assert len(reads) == 2 and len(writes) == 1 and (tmp_path / "fftw-wisdom.pickle").exists()
    for _ in range(3):
        again = fft.make_transform(grid, "pyfftw")
    assert len(reads) == 2 and len(writes) == 1   # planned from the wisdom: nothing read, nothing new to keep
    psi = np.exp(-grid.axes[0].coordinates ** 2 + 1j * grid.axes[0].coordinates)
    np.testing.assert_array_equal(again.forward(psi.copy()).copy(), first.forward(psi.copy()))
    np.testing.assert_allclose(again.forward(psi.copy()), np.fft.fft(psi), atol=1e-12)


def test_a_run_steps_with_blas_on_one_thread_and_gives_the_threads_back(tmp_path):
    """OpenBLAS's idle threads spin ~0.1 s after a call and took the cores
    from the transforms' threads between samples (2D 1024^2: 10 steps
    after a sample 165 ms against 102).  A run's loop keeps BLAS on one
    thread; the process's own limit is back after the run (common
    practice for a multi-threaded program calling OpenBLAS, as its own
    usage notes advise)."""
    threadpoolctl = pytest.importorskip("threadpoolctl")
    from wavesweep.run import Simulation

    def blas_threads():
        return {lib["num_threads"] for lib in threadpoolctl.threadpool_info() if lib["user_api"] == "blas"}

    if not blas_threads():
        pytest.skip("no BLAS threadpoolctl can see")
    seen = []
    with threadpoolctl.threadpool_limits(2, user_api="blas"):
        before = blas_threads()
        Simulation(make_job(table_of("1d-barrier-cap", dt=0.05, duration=1.0))).run(tmp_path, progress=False,
                                                          on_sample=lambda *a: seen.append(blas_threads()))
        after = blas_threads()
    assert before == after == {2}
    assert seen and all(s == {1} for s in seen)
