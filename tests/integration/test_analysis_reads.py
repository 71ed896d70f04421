"""Analysis reads result datasets only, and what collect reads does not grow
with the grid (issue: collect cost 313 ms per run at 8192 points, arrivals
needed ~15 GB at 131 072 points).

Nothing is timed.  Instead: every array of the grid's size in a result
(density snapshots, final psi, the record's marginals, psi0, V, the grid's
coordinates) is overwritten with NaN, and collect's per-run analysis must
give the same numbers from the poisoned file as from the original -- it
cannot have read any of them.  The run's recorded per-detector values are
checked against the same numbers computed from the file's arrays (what
analysis does for a file written before the run recorded them), and the
classical estimate's factored sums against the direct double sum over
(position, momentum) pairs of its definition, with its memory bounded.
"""
from __future__ import annotations

import copy
import math
import shutil
import tracemalloc

import netCDF4
import numpy as np
import pytest
import xarray as xr

from conftest import make_job
from wavesweep.analysis.arrivals import CURVE_BLOCK, arrival_times, classical_free_flight
from wavesweep.analysis.recorded import run_record
from wavesweep.analysis.transmission import transmission_totals
from wavesweep.errors import JobError
from wavesweep.io.record import DETECTOR_VALUES
from wavesweep.io.results import grid_dimensions
from wavesweep.run import Simulation
from wavesweep.studies.collect import _read_result

# A packet through a smooth barrier, one detector before it, one beyond, one inside the x+ layer;
# 50 snapshots (every second sample).
JOB = {
    "title": "analysis reads",
    "grid": {"x": {"min": -60.0, "max": 60.0, "points": 512}, "boundary": "periodic"},
    "potential": [{"kind": "barrier", "height": 1.0, "width": 2.0, "smoothing": 1.0}],
    "packet": {"kind": "gaussian", "center": -20.0, "width": 3.0, "momentum": 2.0},
    "evolve": {"dt": 0.02, "duration": 20.0, "scheme": "strang"},
    "absorber": {"kind": "cap", "thickness": 15.0},
    "record": {"every": 0.2, "snapshot_every": 0.4},
    "detector": [{"name": "before", "x": -8.0}, {"name": "after", "x": 8.0}, {"name": "layer", "x": 52.0}],
}
STATS = ("probability", "mean", "std", "median", "q10", "q90", "most_probable", "backflow",
         "classical_probability", "classical_mean", "still_to_come")


@pytest.fixture(scope="module")
def result(tmp_path_factory):
    return Simulation(make_job(copy.deepcopy(JOB))).run(tmp_path_factory.mktemp("reads"), progress=False)


def _poisoned(path, folder):
    """A copy of the result with every variable that has a grid or snapshot
    dimension overwritten with NaN (the grid's coordinates included)."""
    out = folder / "poisoned.nc"
    shutil.copy(path, out)
    with xr.open_dataset(path) as ds:
        big = grid_dimensions(ds)
        names = [n for n, v in ds.variables.items() if big.intersection(v.dims) and v.dtype.kind == "f"]
    with netCDF4.Dataset(out, "a") as nc:
        for name in names:
            nc[name][...] = np.full(nc[name].shape, np.nan)
    return out, names


def _same(a, b):
    return a == b or (isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b))


def test_collect_reads_no_array_of_the_grids_size(result, tmp_path):
    """collect's per-run reading (arrival statistics, transmission beyond
    each detector, the books) gives the same numbers from a file whose
    every grid-sized array is NaN: it reads none of them, so its cost does
    not grow with the grid (before: the snapshots were read to verify them,
    the marginals for the classical estimate, psi for what is still to come)."""
    poisoned, names = _poisoned(result, tmp_path)
    assert {"density", "psi_real", "initial_momentum_marginal_x", "initial_psi_real", "x"} <= set(names)
    clean, dirty = _read_result(result), _read_result(poisoned)
    assert not dirty.analysis_note, dirty.analysis_note
    assert set(dirty.arrivals) == {"before", "after", "layer"}
    for name in dirty.arrivals:
        for key in STATS:
            assert _same(clean.arrivals[name][key], dirty.arrivals[name][key]), (name, key)
        assert _same(clean.beyond[name], dirty.beyond[name]), name
    assert math.isfinite(dirty.arrivals["after"]["classical_mean"])
    assert math.isfinite(dirty.beyond["after"]) and dirty.arrivals["after"]["still_to_come"] >= 0
    # the analysis functions collect calls, on their own
    stats = arrival_times(poisoned, warnings=False, curves=False, verify="used")
    assert _same(stats["after"].stats["mean"], clean.arrivals["after"]["mean"])


def test_recorded_detector_values_are_what_analysis_computes_from_the_arrays(result):
    """A file without the recorded values (written before the run kept them)
    gets them from its arrays: the final probabilities identically (the run
    calls the same function on the psi it stores), the classical probability
    and mean to rounding (the same sums over the marginals in atomic units
    rather than read back from job units)."""
    with xr.open_dataset(result) as ds:
        full = ds.load()
    # classical_acceleration is written only where gravity acts (this run has none)
    always = set(DETECTOR_VALUES) - {"classical_acceleration"}
    assert always <= set(full.variables) and "classical_acceleration" not in full.variables
    older = full.drop_vars(sorted(always))
    new, old = arrival_times(full), arrival_times(older)
    for name in new:
        for key in STATS:
            a, b = new[name].stats[key], old[name].stats[key]
            if key.startswith("classical"):
                assert a == pytest.approx(b, rel=1e-13, abs=0), (name, key)
            else:
                assert _same(a, b), (name, key)
        np.testing.assert_allclose(new[name].classical_density, old[name].classical_density, rtol=0, atol=0)
    totals_new = transmission_totals(full, run_record(full))
    totals_old = transmission_totals(older, run_record(older))
    assert totals_new == totals_old


def _direct_classical(x, rho, k, w, mass, x_d):
    """The estimate's probability and mean as the direct double sum over
    (position, momentum) pairs of its definition (module notes of
    analysis/arrivals.py): weight rho(x) w(k) on the pairs moving towards
    the detector, each arriving at m (x_d - x) / k."""
    x0 = np.sum(rho * x)
    keep = (rho > 1e-12 * rho.max()) & ((x - x_d) * (x0 - x_d) > 0)
    d = (x_d - x[keep])[:, None]
    weight = rho[keep][:, None] * w[None, :] * (k[None, :] * d > 0)
    prob = weight.sum()
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(weight > 0, mass * d / k[None, :], 0.0)
    return prob, np.sum(weight * t) / prob


def test_classical_estimate_factored_sums_and_bounded_memory():
    """The factored probability and mean equal the direct double sum (to
    rounding); the curve's temporaries stay within a few CURVE_BLOCKs
    whatever the grid: 4096 positions on the packet's side against 65536
    momenta, whose pair arrays took 2 GiB each (tracemalloc sees numpy's
    allocations)."""
    x = np.linspace(-200.0, 200.0, 16384, endpoint=False)
    rho = np.exp(-0.5 * ((x + 100.0) / 20.0) ** 2)
    rho /= rho.sum()
    k = np.sort(2 * np.pi * np.fft.fftfreq(4 * x.size, x[1] - x[0]))
    w = np.exp(-0.5 * ((k - 1.5) / 0.025) ** 2)
    w /= w.sum()
    small = slice(None, None, 16)
    p_ref, mean_ref = _direct_classical(x[::4], rho[::4] / rho[::4].sum(), k[small], w[small] / w[small].sum(),
                                        1.0, 50.0)
    _, p, mean = classical_free_flight(x[::4], rho[::4] / rho[::4].sum(), k[small], w[small] / w[small].sum(),
                                       1.0, 50.0, np.array([100.0]), curve=False)
    assert p == pytest.approx(p_ref, rel=1e-13) and mean == pytest.approx(mean_ref, rel=1e-13)
    times = np.linspace(0.0, 200.0, 400)
    tracemalloc.start()
    try:
        curve, p, mean = classical_free_flight(x, rho, k, w, 1.0, 50.0, times)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 8 * 8 * CURVE_BLOCK, f"peak {peak / 2**20:.0f} MiB"
    # the curve integrates to the probability moving towards the detector (it all arrives by t = 200)
    assert np.trapezoid(curve, times) == pytest.approx(p, rel=1e-3)


# -- momentum spectra (issue 17: `collect` carries the spectra per run) ----------------------
# A free Gaussian (tests/integration/test_spectrum.py's FREE) with three detectors: 'd' well
# beyond the packet, 'edge' 3.5 sigma ahead of it (psi0 beyond it is ~5 % of its peak, so the
# spectrum's b(k, 0) matters), 'back' 2.5 sigma behind it (its spectrum is refused: NaN).
SPECTRUM_JOB = {
    "title": "spectra without the grid",
    "grid": {"x": {"min": -64.0, "max": 40.0, "points": 640}, "boundary": "periodic"},
    "packet": {"kind": "gaussian", "center": -16.0, "width": 4.0, "momentum": 2.0},
    "evolve": {"dt": 0.01, "duration": 40.0, "scheme": "strang"},
    "absorber": {"kind": "cap", "thickness": 12.0},
    "record": {"every": 0.1, "snapshot_every": 20.0},
    "detector": [{"name": "d", "x": 10.0}, {"name": "edge", "x": -2.0}, {"name": "back", "x": -6.0}],
}
SPECTRUM_KEYS = ("momentum", "probability_density", "energy", "energy_density")


@pytest.fixture(scope="module")
def spectrum_result(tmp_path_factory):
    return Simulation(make_job(copy.deepcopy(SPECTRUM_JOB))).run(tmp_path_factory.mktemp("spectra"),
                                                                 progress=False)


def _close(a, b, rtol=1e-12):
    a, b = np.asarray(a, float), np.asarray(b, float)
    assert a.shape == b.shape
    assert np.max(np.abs(a - b)) <= rtol * np.max(np.abs(b))


def test_collect_carries_each_detectors_spectrum_without_the_grid(spectrum_result, tmp_path):
    """collect's per-run spectra are `wavesweep spectrum`'s for each
    detector, to 1e-12, read from a file whose every grid-sized array is
    NaN (psi0 and the final psi included): b(k, 0) comes from the recorded
    part of psi0 beyond the detector, the band check from the recorded
    V_min.  A detector whose spectrum `spectrum` refuses is left out (NaN
    in the summary), not refused."""
    from wavesweep.analysis.surface_flux import spectrum

    poisoned, names = _poisoned(spectrum_result, tmp_path)
    assert {"initial_psi_real", "psi_real", "potential"} <= set(names)
    with xr.open_dataset(spectrum_result) as ds:
        first = int(ds["initial_beyond_first"].values[1])
        assert first > 0 and np.isfinite(ds["initial_beyond_real"].values[1]).sum() > 10   # 'edge'
    dirty = _read_result(poisoned)
    assert not dirty.analysis_note, dirty.analysis_note
    assert set(dirty.spectra) == {"d", "edge"}
    for name in ("d", "edge"):
        reference = spectrum(spectrum_result, detector=name)["detectors"][0]
        for key in SPECTRUM_KEYS:
            _close(dirty.spectra[name][key], reference[key])
        assert dirty.spectra[name]["total"] == pytest.approx(reference["total"], rel=1e-12)
    with pytest.raises(JobError, match="record.every"):
        spectrum(spectrum_result, detector="back")


def test_the_spectrum_from_the_record_is_the_one_from_psi0(spectrum_result):
    """A file without the recorded pieces (written before the run kept
    them) gets the spectrum from psi0 and V on the grid, as before: the same
    numbers to 1e-12 (what the record drops of psi0 is below 1e-15 of its
    peak)."""
    from wavesweep.analysis.surface_flux import spectrum

    with xr.open_dataset(spectrum_result) as ds:
        full = ds.load()
    older = full.drop_vars(["initial_beyond_first", "initial_beyond_real", "initial_beyond_imag",
                            "potential_min", *DETECTOR_VALUES.keys() & set(full.variables)])
    for name in ("d", "edge"):
        new = spectrum(full, detector=name)["detectors"][0]
        old = spectrum(older, detector=name)["detectors"][0]
        for key in SPECTRUM_KEYS:
            _close(new[key], old[key])
        assert new["total"] == pytest.approx(old["total"], rel=1e-12)
        assert new["still_to_come"] == pytest.approx(old["still_to_come"], rel=1e-12)
