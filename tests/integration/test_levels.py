"""Energy levels end to end: hydrogen on a radial grid in eV, the spectrum in a
run's autocorrelation against `levels`, eigenstate packets released into
their trap, and the `levels` command line (contract: design.md, "Command
line": one JSON object with --json; exit 2 and one line on bad input).
"""
from __future__ import annotations

import copy
import json
import math

import numpy as np
import pytest
import scipy.constants as sc
import xarray as xr

from conftest import make_job, run_table
from test_cli import assert_bad_input, cli, write_job
from wavesweep.analysis.spectra import autocorrelation_levels, stationary_states


def test_hydrogen_s_levels_in_ev():
    """l = 0 levels of -1/r: E_n = -R_inf h c / n^2 (Bohr levels, infinite
    nuclear mass as the Hamiltonian has; Griffiths eq. 4.70, from memory),
    R_inf h c from CODATA via scipy.constants; n = 1..4 to 1e-4 relative.
    The -1/r cusp makes the sine grid converge as dx^2 (measured: 1.1e-3 at
    dx = 0.039 bohr), so 8192 points, which the iterative path solves."""
    rydberg_ev = sc.physical_constants["Rydberg constant times hc in eV"][0]
    job = make_job({"units": {"energy": "eV"},
                    "grid": {"r": {"max": 80.0, "points": 8192}, "l": 0},
                    "potential": [{"kind": "coulomb"}],
                    "packet": {"kind": "gaussian", "center": 10.0, "width": 1.0},
                    "evolve": {"dt": 0.01, "duration": 0.1}})
    energies_hartree, _ = stationary_states(job, 4)
    energies_ev = energies_hartree / job.units.factor("energy")
    n = np.arange(1, 5)
    np.testing.assert_allclose(energies_ev, -rydberg_ev / n**2, rtol=1e-4)


# A displaced ground state of m = w = 1 (a coherent state, |alpha|^2 = x0^2 / 2)
WELL = {
    "title": "displaced packet",
    "grid": {"x": {"min": -12.0, "max": 12.0, "points": 128}},
    "potential": [{"kind": "harmonic", "omega": 1.0}],
    "packet": {"kind": "gaussian", "center": 1.5, "width": math.sqrt(0.5)},
    "evolve": {"dt": 0.1, "duration": 50.0, "scheme": "chebyshev"},
    "record": {"every": 0.1, "snapshot_every": 50.0},
}


@pytest.fixture(scope="module")
def well_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("well")
    ds = run_table(WELL, folder)
    return next(folder.glob("*.nc")), ds


def test_autocorrelation_finds_the_levels(well_run):
    """The levels in C(t) of the displaced packet are those `levels` finds
    (within 1e-3 hbar w; the Chebyshev propagator is exact, so much closer),
    and the weights are the coherent state's Poisson distribution
    |c_n|^2 = exp(-|a|^2) |a|^2n / n! (Glauber; e.g. Sakurai sec. 2.3
    problems, from memory)."""
    path, _ = well_run
    found = autocorrelation_levels(path)
    dense, _ = stationary_states(make_job(WELL), len(found.energies))
    np.testing.assert_allclose(found.energies, dense, atol=1e-3)
    a2 = 1.5**2 / 2
    n = np.arange(len(found.energies))
    poisson = np.exp(-a2) * a2**n / np.array([math.factorial(k) for k in n])
    np.testing.assert_allclose(found.weights, poisson, atol=1e-6)
    assert len(found.energies) >= 8   # every level with weight >= 1e-6 (n = 8: 2.4e-5)


def test_eigenstate_packet_is_stationary(tmp_path):
    """An eigenstate released into its own trap only turns its phase:
    |C(t)| = 1 (to 1e-8 with Strang at dt = 0.01: the splitting moves the
    eigenvector by O(dt^2))."""
    table = copy.deepcopy(WELL)
    table["packet"] = {"kind": "eigenstate", "n": 2}
    table["evolve"] = {"dt": 0.01, "duration": 10.0, "scheme": "strang"}
    table["record"] = {"every": 0.5, "snapshot_every": 10.0}
    ds = run_table(table, tmp_path)
    c = ds.autocorrelation_real.values + 1j * ds.autocorrelation_imag.values
    assert np.max(np.abs(np.abs(c) - 1.0)) <= 1e-8
    assert float(ds.energy[0]) == pytest.approx(2.5, abs=1e-10)   # (n + 1/2) hbar w


def test_boosted_eigenstate_oscillates_classically(tmp_path):
    """n = 1 boosted by p: <p>(0) = p, and in a harmonic well Ehrenfest's
    theorem is exact: <x>(t) = (p / m w) sin w t, <p>(t) = p cos w t
    (tests/analytic.py, coherent_state_*; the centroid obeys the classical
    equations for any state)."""
    import analytic as an

    p0 = 0.7
    table = copy.deepcopy(WELL)
    table["packet"] = {"kind": "eigenstate", "n": 1, "momentum": p0}
    table["evolve"] = {"dt": 0.1, "duration": 6.0, "scheme": "chebyshev"}
    table["record"] = {"every": 0.5, "snapshot_every": 6.0}
    ds = run_table(table, tmp_path)
    t = ds.time.values
    assert float(ds.p_mean[0]) == pytest.approx(p0, abs=1e-10)
    np.testing.assert_allclose(ds.p_mean.values, an.coherent_state_momentum(t, 0.0, p0, 1.0, 1.0), atol=1e-9)
    np.testing.assert_allclose(ds.x_mean.values, an.coherent_state_mean(t, 0.0, p0, 1.0, 1.0), atol=1e-9)


# -- the command line ---------------------------------------------------------------------
def test_levels_json_and_states(tmp_path):
    job = write_job(tmp_path, WELL)
    proc = cli("levels", job, "--count", "4", "--json", "--states", "states.nc", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    body = json.loads(proc.stdout)   # exactly one JSON object, nothing else on stdout
    assert set(body) == {"energies", "energy_units"} and body["energy_units"] == "hartree"
    np.testing.assert_allclose(body["energies"], [0.5, 1.5, 2.5, 3.5], rtol=1e-10)  # (n + 1/2) hbar w
    assert sorted(p.name for p in tmp_path.iterdir() if "states" in p.name) == ["states.nc"]
    with xr.open_dataset(tmp_path / "states.nc") as ds:
        assert ds.psi_real.dims == ("state", "x") and ds.sizes["state"] == 4
        for name in ("x", "energy", "psi_real"):
            assert ds[name].attrs["units"] and ds[name].attrs["long_name"]


def test_levels_from_a_run(tmp_path, well_run):
    path, _ = well_run
    proc = cli("levels", "--from", path, "--count", "3", "--json", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    body = json.loads(proc.stdout)
    assert set(body) == {"energies", "weights", "energy_units"}
    np.testing.assert_allclose(body["energies"], [0.5, 1.5, 2.5], atol=1e-3)
    table = cli("levels", "--from", path, "--count", "2", cwd=tmp_path)
    assert table.returncode == 0 and len(table.stdout.splitlines()) == 3   # header and two levels


def test_levels_bad_input(tmp_path, well_run):
    """Exit 2 and one line: count 0; a file that is not a result; a result
    without the autocorrelation; samples too sparse for the state's band."""
    job = write_job(tmp_path, WELL)
    assert_bad_input(cli("levels", job, "--count", "0", cwd=tmp_path), "--count", "at least 1")
    assert_bad_input(cli("levels", "--from", job, cwd=tmp_path), "--from", "netCDF")
    path, ds = well_run
    stripped = tmp_path / "no-autocorrelation.nc"
    ds.drop_vars(["autocorrelation_real", "autocorrelation_imag"]).to_netcdf(stripped)
    assert_bad_input(cli("levels", "--from", stripped, cwd=tmp_path), "--from", "autocorrelation_real")
    sparse = tmp_path / "sparse.nc"
    ds.isel(time=slice(None, None, 20)).to_netcdf(sparse)     # every 2.0: aliases by pi hartree
    assert_bad_input(cli("levels", "--from", sparse, cwd=tmp_path), "record.every", "use record.every <=")
