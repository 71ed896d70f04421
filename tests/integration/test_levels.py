"""Energy levels end to end: hydrogen on a radial grid in eV, the spectrum in a
run's autocorrelation against `levels`, eigenstate packets released into
their trap, and the `levels` command line (contract: design.md, "Command
line": one JSON object with --json; exit 2 and one line on bad input).
The command line is called in this process (``wavesweep()`` of test_cli.py:
the CLI's ``main``, as ``python -m wavesweep`` runs it); the entry point
itself is tested through a real process in test_cli.py.
"""
from __future__ import annotations

import copy
import json
import math

import numpy as np
import pytest
import scipy.constants as sc
import scipy.linalg
import xarray as xr

from conftest import make_job, run_table
from test_cli import assert_bad_input, wavesweep, write_job
from wavesweep.analysis.spectra import autocorrelation_levels, stationary_states
from wavesweep.errors import JobError
from wavesweep.setup import Setup


def test_hydrogen_s_levels_in_ev():
    """l = 0 levels of -1/r: E_n = -R_inf h c / n^2 (Bohr levels, infinite
    nuclear mass as the Hamiltonian has; Griffiths eq. 4.70, from memory),
    R_inf h c from CODATA via scipy.constants; n = 1..4 to 1e-4 relative.
    The -1/r cusp makes the sine grid converge as dx^2 (measured: 1.1e-3 at
    dx = 0.039 bohr), so 8192 points, which the iterative path solves."""
    rydberg_ev = sc.physical_constants["Rydberg constant times hc in eV"][0]
    job = make_job({"units": {"length": "bohr", "energy": "eV"},
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
    proc = wavesweep("levels", job, "--count", "4", "--json", "--states", "states.nc", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    body = json.loads(proc.stdout)   # exactly one JSON object, nothing else on stdout
    assert set(body) == {"energies", "energy_units", "energy_errors", "refine", "extrapolated"}
    assert body["energy_units"] == "hartree" and body["refine"] == "grid.x.points"
    np.testing.assert_allclose(body["energies"], [0.5, 1.5, 2.5, 3.5], rtol=1e-10)  # (n + 1/2) hbar w
    # every estimate bounds the true error, and this grid is converged to rounding
    assert len(body["energy_errors"]) == 4
    for e, err, exact in zip(body["energies"], body["energy_errors"], [0.5, 1.5, 2.5, 3.5]):
        assert abs(e - exact) <= err < 1e-11
    assert sorted(p.name for p in tmp_path.iterdir() if "states" in p.name) == ["states.nc"]
    with xr.open_dataset(tmp_path / "states.nc") as ds:
        assert ds.psi_real.dims == ("state", "x") and ds.sizes["state"] == 4
        for name in ("x", "energy", "psi_real"):
            assert ds[name].attrs["units"] and ds[name].attrs["long_name"]


def test_levels_from_a_run(tmp_path, well_run):
    path, _ = well_run
    proc = wavesweep("levels", "--from", path, "--count", "3", "--json", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    body = json.loads(proc.stdout)
    assert set(body) == {"energies", "weights", "energy_units"}
    np.testing.assert_allclose(body["energies"], [0.5, 1.5, 2.5], atol=1e-3)
    table = wavesweep("levels", "--from", path, "--count", "2", cwd=tmp_path)
    assert table.returncode == 0 and len(table.stdout.splitlines()) == 3   # header and two levels


def test_levels_bad_input(tmp_path, well_run):
    """Exit 2 and one line: count 0; a file that is not a result; a result
    without the autocorrelation; samples too sparse for the state's band."""
    job = write_job(tmp_path, WELL)
    assert_bad_input(wavesweep("levels", job, "--count", "0", cwd=tmp_path), "--count", "at least 1")
    assert_bad_input(wavesweep("levels", "--from", job, cwd=tmp_path), "--from", "netCDF")
    path, ds = well_run
    stripped = tmp_path / "no-autocorrelation.nc"
    ds.drop_vars(["autocorrelation_real", "autocorrelation_imag"]).to_netcdf(stripped)
    assert_bad_input(wavesweep("levels", "--from", stripped, cwd=tmp_path), "--from", "autocorrelation_real")
    sparse = tmp_path / "sparse.nc"
    ds.isel(time=slice(None, None, 20)).to_netcdf(sparse)     # every 2.0: aliases by pi hartree
    assert_bad_input(wavesweep("levels", "--from", sparse, cwd=tmp_path), "record.every", "use record.every <=")


# -- levels ignore the packet; error estimates ------------------------------------------------------
def test_levels_ignore_a_packet_at_the_grid_edge(tmp_path):
    """Issue 12: `levels` refused a job because the packet, which it does not
    use, reaches the grid edge.  The levels of the well are (n + 1/2) hbar w
    (Griffiths sec. 2.3; from memory) whatever the packet."""
    table = copy.deepcopy(WELL)
    table["packet"] = {"kind": "gaussian", "center": 11.9, "width": 1.0}
    proc = wavesweep("levels", write_job(tmp_path, table), "--count", "3", "--json", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    np.testing.assert_allclose(json.loads(proc.stdout)["energies"], [0.5, 1.5, 2.5], rtol=1e-10)


@pytest.mark.parametrize("packet, absorber", [
    ({"kind": "gaussian", "center": 0.0, "width": 1.0, "momentum": 50.0}, None),   # |p| beyond the grid's
    ({"kind": "file", "path": "nowhere.nc"}, None),                                # no such file
    ({"kind": "eigenstate", "n": 500}, None),                                      # more than the grid holds
    ({"kind": "gaussian", "center": 11.9, "width": 1.0},                           # a CAP tuned to the packet
     {"kind": "cap", "thickness": 3.0}),
])
def test_levels_never_build_the_packet(tmp_path, capsys, packet, absorber):
    """Packets that cannot start a run (each refused by `run`) leave `levels`
    and its states file alone: same levels, exit 0."""
    from wavesweep import cli as wavesweep_cli

    table = copy.deepcopy(WELL)
    table["packet"] = packet
    if absorber:
        table["absorber"] = absorber
    job = write_job(tmp_path, table)
    code = wavesweep_cli.main(["levels", str(job), "--count", "2", "--json", "--states", str(tmp_path / "s.nc")])
    out, err = capsys.readouterr()
    assert code == 0, err
    np.testing.assert_allclose(json.loads(out)["energies"], [0.5, 1.5], rtol=1e-10)
    with xr.open_dataset(tmp_path / "s.nc") as ds:
        np.testing.assert_allclose(ds.energy.values, [0.5, 1.5], rtol=1e-10)


def _hydrogen_s(points, r_max=80.0):
    return {"title": "hydrogen s levels",
            "grid": {"r": {"max": r_max, "points": points}, "l": 0},
            "potential": [{"kind": "coulomb"}],
            "packet": {"kind": "eigenstate", "n": 0},
            "evolve": {"dt": 0.01, "duration": 0.1}}


def test_hydrogen_s_levels_to_1e8_with_4000_points(tmp_path, capsys):
    """Issue 12: hydrogen s levels converged only as dr^2 (1s off by 2.6e-4
    on 3999 points, 80 bohr) and nothing said how many digits were right.
    Now 1s, 2s, 3s are within 1e-8 of E_n = -1 / (2 n^2) hartree (Bohr
    levels, infinite nuclear mass as the Hamiltonian has; Griffiths eq.
    4.70, from memory), and each estimated error bounds the true one
    without being more than 100 times it."""
    from wavesweep import cli as wavesweep_cli

    job = write_job(tmp_path, _hydrogen_s(3999))
    code = wavesweep_cli.main(["levels", str(job), "--count", "3", "--json"])
    out, err = capsys.readouterr()
    assert code == 0 and err == "", err
    body = json.loads(out)
    exact = -0.5 / np.arange(1, 4) ** 2
    true = np.abs(np.array(body["energies"]) - exact)
    assert np.all(true <= 1e-8 * np.abs(exact)), true / np.abs(exact)
    assert np.all(true <= body["energy_errors"]) and np.all(np.array(body["energy_errors"]) <= 100 * true)
    assert body["refine"] == "grid.r.points" and body["extrapolated"] == [True, True, True]
    # the text table has the same numbers, an error column among them
    code = wavesweep_cli.main(["levels", str(job), "--count", "3"])
    out, _ = capsys.readouterr()
    head, *rows = out.splitlines()
    assert head.split()[-1] == "error" and len(rows) == 3
    np.testing.assert_allclose([float(r.split()[2]) for r in rows], body["energy_errors"], rtol=0.05)


def test_a_coarse_radial_grid_says_which_setting_and_how_much(tmp_path, capsys):
    """On 499 points (40 bohr) the 1s level's estimated relative error is
    above 1e-6: one line on stderr names grid.r.points and a count; on that
    many points the estimate is within the 1e-8 it aimed at (to a factor 3)
    and still bounds the true error (Bohr levels as above)."""
    import re

    from wavesweep import cli as wavesweep_cli

    job = write_job(tmp_path, _hydrogen_s(499, r_max=40.0))
    code = wavesweep_cli.main(["levels", str(job), "--count", "2", "--json"])
    out, err = capsys.readouterr()
    assert code == 0 and err.count("\n") == 1 and "grid.r.points" in err
    first = json.loads(out)
    assert first["energy_errors"][0] > 1e-6 * 0.5
    points = int(re.search(r"set grid.r.points to about (\d+)", err).group(1))
    assert 499 < points <= 4000
    code = wavesweep_cli.main(["levels", str(job), "--count", "2", "--json", "--set", f"grid.r.points={points}"])
    out, err = capsys.readouterr()
    body = json.loads(out)
    exact = -0.5 / np.arange(1, 3) ** 2
    assert np.all(np.abs(np.array(body["energies"]) - exact) <= body["energy_errors"])
    assert np.all(np.array(body["energy_errors"]) <= 3e-8 * np.abs(exact))


# -- weak levels, aliasing, the states file, degeneracy ------------------------------------------
# A GaAs electron (0.067 m_e) in a 10 meV trap, prepared in the ground state of a 20 meV trap
QUENCH = {
    "title": "quenched trap",
    "units": {"length": "nm", "energy": "meV"},
    "particle": {"mass": 0.067},
    "grid": {"x": {"min": -120.0, "max": 120.0, "points": 128}},
    "potential": [{"kind": "harmonic", "omega": 10.0}],
    "packet": {"kind": "eigenstate", "n": 0, "potential": [{"kind": "harmonic", "omega": 20.0}]},
    "evolve": {"dt": 0.02, "duration": 6.0, "scheme": "chebyshev"},
    "record": {"every": 0.02, "snapshot_every": 6.0},
}


def test_weak_levels_of_a_quench_are_found(tmp_path):
    """The ground state of w0 = 2w released into w is a squeezed vacuum with
    e^(2r) = w0 / w: only even levels, |c_2k|^2 = (2k)! / (2^k k!)^2
    tanh(r)^2k / cosh(r) (sudden quench of an oscillator; e.g. Gerry &
    Knight, Introductory Quantum Optics, sec. 7.1; from memory), at E =
    (2k + 1/2) hbar w.  With --min-weight 1e-5 all five levels of weight >=
    1e-5 are found, 45 and 65 meV (4.4e-3, 4.0e-4) among them, which
    <H> +/- 6 Delta H (up to 38 meV) had left out; no odd level appears."""
    run_table(QUENCH, tmp_path)
    path = next(tmp_path.glob("*.nc"))
    proc = wavesweep("levels", "--from", path, "--min-weight", "1e-5", "--json", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    body = json.loads(proc.stdout)
    r = 0.5 * math.log(2.0)
    k = np.arange(5)
    closed = np.array([math.factorial(2 * j) / (2**j * math.factorial(j)) ** 2 for j in k]) \
        * math.tanh(r) ** (2 * k) / math.cosh(r)
    np.testing.assert_allclose(body["energies"], (2 * k + 0.5) * 10.0, rtol=1e-6)
    np.testing.assert_allclose(body["weights"], closed, rtol=1e-4)
    assert closed[-1] > 1e-5 > closed[-1] * math.tanh(r) ** 2 * 10 / 12     # the next one, 3.9e-6, is below


DOUBLE_WELL = {
    "title": "packet in a double well",
    "grid": {"x": {"min": -8.0, "max": 8.0, "points": 128}},
    "potential": [{"kind": "double_well", "height": 5.0, "separation": 4.0}],
    "packet": {"kind": "gaussian", "center": -2.0, "width": 0.5},
    "evolve": {"dt": 0.05, "duration": 60.0, "scheme": "chebyshev"},
    "record": {"every": 0.05, "snapshot_every": 60.0},
}


def test_no_aliased_lines_in_a_double_well(tmp_path):
    """A Gaussian packet in a quartic double well holds levels of weight
    1e-6 up to ~60 hartree, 34 Delta H above <H>.  Sampled every 0.1 (a
    period of 62.8 hartree) the levels above it alias into the band: before
    this check two lines at 0.7525 and 10.947 hartree (weights 7e-7 and
    2e-7, the aliases of E_27 and E_30) came out at --min-weight 1e-7, and
    <H> +/- 6 Delta H hid every level above 12.  Now that sampling is refused
    at 1e-6 with a record.every that would do; at 1e-4 (where it does) and
    on the 0.05 record at 1e-6, every line found is a level of the dense
    spectrum (scipy.linalg.eigh of the grid's H) with its weight |<n|psi>|^2,
    and every resolved level of weight >= 1e-6 is found."""
    run_table(DOUBLE_WELL, tmp_path)
    path = next(tmp_path.glob("*.nc"))
    setup = result_setup_of(path)
    energies, vectors = scipy.linalg.eigh(setup.hamiltonian.static_matrix())
    weights = np.abs(vectors.T @ setup.psi0.reshape(-1)) ** 2 * setup.grid.cell_volume

    def matches(found, atol):
        for e, w, blended in zip(found.energies, found.weights, found.blended):
            # a level, or a group closer than the line width (the tunnelling pair E_0, E_1: one
            # line at their weighted mean, as two Gaussians much closer than their width are)
            near = np.abs(energies - e) < 3 * found.resolution
            assert near.any(), e
            if not blended:
                assert abs(e - np.average(energies[near], weights=weights[near])) < atol, e
                assert w == pytest.approx(weights[near].sum(), rel=1e-3, abs=1e-8), e

    fine = autocorrelation_levels(path, min_weight=1e-6)
    matches(fine, atol=1e-5)
    alone = [n for n in range(len(energies)) if weights[n] >= 1.2e-6
             and np.all(np.abs(np.delete(energies, n) - energies[n]) > 6 * fine.resolution)]
    assert len(alone) >= 20
    for n in alone:
        assert np.min(np.abs(fine.energies - energies[n])) < 1e-5, energies[n]
    sparse = tmp_path / "sparse.nc"
    with xr.open_dataset(path) as ds:
        ds.isel(time=slice(None, None, 2)).to_netcdf(sparse)          # every 0.1
    with pytest.raises(JobError, match=r"record.every <= 0.0[5-9].*--min-weight") as info:
        autocorrelation_levels(sparse, min_weight=1e-6)
    assert info.value.field == "record.every"
    # levels beyond the period, each below 1e-4, still alias in and pull the lines a little
    # (measured: 1.3e-5 hartree at 25.3, 1e-4 of a line width)
    matches(autocorrelation_levels(sparse, min_weight=1e-4), atol=1e-4)


def result_setup_of(path):
    """The run's Setup, rebuilt here from the job the result keeps (the
    reference computation needs H; analysis itself never rebuilds it)."""
    import tomllib

    from wavesweep.job import job_from_dict

    with xr.open_dataset(path) as ds:
        return Setup(job_from_dict(tomllib.loads(ds.attrs["job"])))


def test_levels_are_printed_before_the_states_are_written(tmp_path, monkeypatch, capsys):
    """A states path that cannot be written is refused before the solve (exit
    2, one line, nothing on stdout): a folder that does not take files
    (/proc), or a folder given as the file.  If the write fails after the
    solve anyway (a full disk here, injected), the levels are already on
    stdout and the failure is one line with exit 2."""
    from wavesweep import cli as wavesweep_cli
    from wavesweep.analysis import spectra

    job = write_job(tmp_path, WELL)
    assert_bad_input(wavesweep("levels", job, "--count", "3", "--states", "/proc/s.nc", cwd=tmp_path), "--states",
                     "cannot write")
    assert_bad_input(wavesweep("levels", job, "--count", "3", "--states", tmp_path, cwd=tmp_path), "--states",
                     "is a folder")

    def full_disk(path, *args, **kwargs):
        raise JobError("--states", f"cannot write {str(path)!r}: No space left on device; choose another path")

    monkeypatch.setattr(spectra, "write_states", full_disk)
    for extra in ((), ("--json",)):
        code = wavesweep_cli.main(["levels", str(job), "--count", "3", "--states", str(tmp_path / "s.nc"), *extra])
        out, err = capsys.readouterr()
        assert code == 2 and err.count("\n") == 1 and "No space left" in err
        if extra:
            np.testing.assert_allclose(json.loads(out)["energies"], [0.5, 1.5, 2.5], rtol=1e-10)
        else:
            rows = out.splitlines()[1:]
            np.testing.assert_allclose([float(r.split()[1]) for r in rows], [0.5, 1.5, 2.5], rtol=1e-10)
    assert not list(tmp_path.glob("*s.nc*"))


def test_degenerate_levels_are_marked(tmp_path):
    """2D isotropic oscillator: E = (n + 1) hbar w, (n + 1)-fold (e.g.
    Sakurai sec. 2.3 problems; from memory).  Levels are numbered in energy
    order and the text output names the degenerate groups; the last one
    asked for (level 6, E = 4) shares its energy with levels beyond."""
    table = {"grid": {"x": {"min": -6.0, "max": 6.0, "points": 24}, "y": {"min": -6.0, "max": 6.0, "points": 24}},
             "potential": [{"kind": "harmonic", "omega": 1.0}],
             "packet": {"kind": "gaussian", "center": [0.0, 0.0], "width": [1.0, 1.0]},
             "evolve": {"dt": 0.01, "duration": 0.1}}
    proc = wavesweep("levels", write_job(tmp_path, table), "--count", "7", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    head, *rows = proc.stdout.splitlines()
    assert "degenerate" in head and "error" in head and len(rows) == 7
    cells = [r.split(None, 3) for r in rows]
    assert [int(c[0]) for c in cells] == list(range(7))
    np.testing.assert_allclose([float(c[1]) for c in cells], [1, 2, 2, 3, 3, 3, 4], rtol=1e-8)
    assert all(abs(float(c[1]) - e) <= float(c[2]) for c, e in zip(cells, [1, 2, 2, 3, 3, 3, 4]))
    assert [c[3] if len(c) > 3 else "" for c in cells] == ["", "levels 1-2", "levels 1-2", "levels 3-5",
                                                          "levels 3-5", "levels 3-5", "levels 6-7 (or more)"]


@pytest.mark.parametrize("points", [64, 65])
def test_the_compiled_lanczos_steps_against_the_dense_spectrum(points):
    """The Lanczos recurrence a run records (its vector work compiled:
    kernels.lanczos) against references outside it: the numpy form of the
    same three-term recurrence (Lanczos, J. Res. Natl. Bur. Stand. 45, 255
    (1950); the recurrence with one extra orthogonalisation against q, as
    before the kernel) to rounding over the first steps, and the dense
    Hamiltonian's eigenvalues (scipy.linalg.eigvalsh of
    Hamiltonian.static_matrix): once the Krylov space is the whole grid,
    the extreme Ritz values are the spectrum's ends (Golub & Van Loan,
    Matrix Computations, ch. 10; from memory)."""
    from wavesweep import eigen
    from wavesweep.job import job_from_dict
    from wavesweep.setup import Setup
    setup = Setup(job_from_dict({
        "grid": {"x": {"min": -10.0, "max": 10.0, "points": points}},
        "potential": [{"kind": "harmonic", "omega": 0.6}],
        "packet": {"center": 1.0, "width": 1.2, "momentum": 0.7},
        "evolve": {"dt": 0.01, "duration": 1.0}}))
    h = setup.hamiltonian
    v = h.static_potential
    compiled = eigen._Lanczos.of_hamiltonian(h, v, setup.psi0, 1.0)
    assert compiled.potential is not None
    plain = eigen._Lanczos(lambda x: h.apply_static(x, potential=v), setup.psi0, 1.0)
    compiled.extend(10)
    plain.extend(10)
    np.testing.assert_allclose(compiled.alphas, plain.alphas, rtol=1e-11)
    np.testing.assert_allclose(compiled.betas, plain.betas, rtol=1e-11)
    compiled.extend(3 * points)   # far past the grid's dimension: the ends converge (or the space is exhausted)
    ritz = scipy.linalg.eigvalsh_tridiagonal(np.array(compiled.alphas),
                                             np.array(compiled.betas[:len(compiled.alphas) - 1]))
    exact = scipy.linalg.eigvalsh(h.static_matrix(potential=v))
    assert ritz.min() == pytest.approx(exact.min(), rel=1e-9, abs=1e-9)
    assert ritz.max() == pytest.approx(exact.max(), rel=1e-9)
