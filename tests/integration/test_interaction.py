"""The mean-field contact interaction (issue 15, item 4): the
Gross-Pitaevskii equation i dpsi/dt = [T + V + g N |psi|^2] psi stepped by
the time-splitting spectral method (Bao, Jaksch & Markowich 2003).

Sources of the numbers:
* the bright soliton of the focusing 1D equation (Zakharov & Shabat 1972):
  psi = sech(x / xi) / sqrt(2 xi), xi = 2 hbar^2 / (m |g| N),
  mu = -m g^2 N^2 / (8 hbar^2); its energy per atom E = mu / 3 (by hand:
  int sech^4 = 4/3 gives g N <|psi|^2> = -m g^2 N^2 / (6 hbar^2) and
  <T> = m g^2 N^2 / (24 hbar^2)); boosted by p it moves at p / m with
  mu + p^2 / 2m;
* the reduced-dimension couplings from the scattering length (Petrov,
  Holzmann & Shlyapnikov 2000 in 2D, Olshanii 1998 in 1D), evaluated in SI
  with scipy.constants;
* the orders of the schemes: the error of the nonlinear run against the
  same run at a 16x smaller step, which must fall as dt^2 (Strang) and dt^4
  (the symmetric compositions; Thalhammer 2012).
"""
from __future__ import annotations

import math

import netCDF4
import numpy as np
import pytest
import scipy.constants as sc
import xarray as xr

from tables import merged
from wavesweep.adequacy import dynamics, time_step_finding
from wavesweep.batched import BatchedRun
from wavesweep.job import job_from_dict
from wavesweep.run import Simulation
from wavesweep.setup import Model, Setup

HALF_LENGTH, POINTS = 60.0, 1024      # bohr; sech(x/2) is 1e-13 of its peak at the edges
G_N = -1.0                            # hartree bohr (m = 1): xi = 2 bohr, mu = -1/8 hartree
ATOMS = 1000
XI = 2.0 / abs(G_N)
MU = -G_N**2 / 8.0


def soliton_file(path, momentum=0.0):
    """The exact soliton (times exp(i p x)) on the test grid, as a state file."""
    x = -HALF_LENGTH + 2 * HALF_LENGTH / POINTS * np.arange(POINTS)
    psi = np.exp(1j * momentum * x) / np.cosh(x / XI) / math.sqrt(2 * XI)
    xr.Dataset({"psi_real": ("x", psi.real), "psi_imag": ("x", psi.imag)}, coords={"x": x}).to_netcdf(path)
    return x


def soliton_job(path, dt, duration, scheme="strang", **more):
    table = {"grid": {"x": {"min": -HALF_LENGTH, "max": HALF_LENGTH, "points": POINTS}},
             "packet": {"kind": "file", "path": str(path)},
             "interaction": {"atoms": ATOMS, "coupling": G_N / ATOMS},
             "evolve": {"dt": dt, "duration": duration, "scheme": scheme, "fft": "scipy"},
             "record": {"every": duration / 4, "snapshot_every": duration / 4}}
    return job_from_dict(merged(table, more))


def evolve(setup, steps):
    """psi after ``steps`` steps and the observables at the start and the end."""
    prop, obs = setup.make_propagator(), setup.make_observer()
    psi = prop.load(setup.psi0)
    first = obs.measure(psi, setup.hamiltonian.potential(0.0))
    psi = prop.step(psi, steps)
    return psi, first, obs.measure(psi, setup.hamiltonian.potential(prop.t))


def exact_density(x, shift):
    s = (x - shift + HALF_LENGTH) % (2 * HALF_LENGTH) - HALF_LENGTH
    return 1.0 / (2 * XI) / np.cosh(s / XI) ** 2


@pytest.mark.parametrize("scheme, dt", [("strang", 0.001), ("order4", 0.02)])
def test_bright_soliton_is_stationary_with_its_chemical_potential(tmp_path, scheme, dt):
    """Zakharov & Shabat: |psi| does not change, mu = -m g^2 N^2 / 8 hbar^2
    recorded to 1e-8 at every sample, E = mu / 3, and psi turns by
    exp(-i mu t); over 4 au_time (half of hbar / |mu|)."""
    x = soliton_file(tmp_path / "soliton.nc")
    path = Simulation(soliton_job(tmp_path / "soliton.nc", dt, 4.0, scheme)).run(tmp_path / "out", progress=False)
    with netCDF4.Dataset(path) as ds:
        mu = ds["chemical_potential"][:]
        energy, norm = ds["energy"][:], ds["norm"][:]
        density = ds["density"][-1]
        psi = ds["psi_real"][:] + 1j * ds["psi_imag"][:]
        assert ds["chemical_potential"].units == ds["energy"].units == "hartree"
    assert np.max(np.abs(mu / MU - 1)) < 1e-8
    assert np.max(np.abs(energy / (MU / 3) - 1)) < 1e-8
    assert np.max(np.abs(norm - 1)) < 1e-12
    rho = np.abs(psi) ** 2
    assert np.max(np.abs(rho - exact_density(x, 0.0))) < 1e-6 * rho.max()
    assert np.max(np.abs(density - exact_density(x, 0.0))) < 1e-6   # float32 snapshots
    turned = np.angle(np.vdot(exact_density(x, 0.0) ** 0.5, psi))
    assert abs(turned - (-MU * 4.0)) < 1e-6


def test_boosted_soliton_moves_at_p_over_m_without_changing_shape(tmp_path):
    """A soliton boosted by p = 1 m_e bohr/au_time moves p / m t = 4 bohr in
    4 au_time, keeps its sech^2 shape, and has mu + p^2 / 2m."""
    p = 1.0
    x = soliton_file(tmp_path / "moving.nc", momentum=p)
    setup = Setup(soliton_job(tmp_path / "moving.nc", 0.02, 4.0, "order4"))
    psi, first, last = evolve(setup, 200)
    assert abs(last["x_mean"] - p * 4.0) < 1e-8
    assert np.max(np.abs(np.abs(psi) ** 2 - exact_density(x, p * 4.0))) < 1e-6 * 0.25
    for values in (first, last):
        assert abs(values["chemical_potential"] / (MU + p**2 / 2) - 1) < 1e-8


def test_the_splitting_orders_hold_for_the_nonlinear_equation(tmp_path):
    """A repulsive cloud released off-centre in a harmonic trap (it breathes
    and sloshes): the error of the final psi against the same run at dt/16
    falls 4x per halved step for Strang and 16x for the fourth-order
    composition (Thalhammer 2012), the drift of the energy functional
    likewise, and the norm stays 1."""
    def run(scheme, dt):
        job = job_from_dict({
            "grid": {"x": {"min": -16.0, "max": 16.0, "points": 256}},
            "potential": [{"kind": "harmonic", "omega": 1.0, "center": 0.0}],
            "packet": {"kind": "gaussian", "center": 1.0, "width": 0.7},
            "interaction": {"atoms": 100, "coupling": 0.05},
            "evolve": {"dt": dt, "duration": 2.0, "scheme": scheme, "fft": "scipy"},
            "record": {"every": 2.0, "snapshot_every": 2.0}})
        setup = Setup(job)
        psi, first, last = evolve(setup, round(2.0 / dt))
        return psi, first, last, setup.grid.cell_volume

    ref, *_ = run("order4_suzuki", 0.025 / 16)
    ratios = {}
    for scheme, dts in (("strang", (0.02, 0.01)), ("order4", (0.05, 0.025))):
        errors, drifts = [], []
        for dt in dts:
            psi, first, last, dv = run(scheme, dt)
            errors.append(math.sqrt(np.sum(np.abs(psi - ref) ** 2) * dv))
            drifts.append(abs(last["energy"] / first["energy"] - 1))
            assert abs(last["norm"] - 1) < 1e-12
        ratios[scheme] = (errors[0] / errors[1], drifts[0] / drifts[1], errors, drifts)
    # measured: strang 4.00 and 4.00 (errors 1.0e-4, 2.5e-5; drifts 3.9e-5, 9.8e-6);
    # order4 14.6 and 15.5 (errors 3.0e-5, 2.0e-6; drifts 3.8e-6, 2.5e-7), nearing 16
    assert 3.6 < ratios["strang"][0] < 4.4 and 3.6 < ratios["strang"][1] < 4.4, ratios
    assert 13.0 < ratios["order4"][0] < 19.0 and 13.0 < ratios["order4"][1] < 19.0, ratios
    assert ratios["strang"][3][1] < 2e-5 and ratios["order4"][3][1] < 5e-7, ratios


def test_zero_coupling_is_the_linear_run_bit_for_bit(tmp_path):
    """g = 0 steps exactly as a job without [interaction]; the interacting
    file only adds chemical_potential (equal to the energy), the linear one
    records no new variable."""
    table = {"grid": {"x": {"min": -40.0, "max": 40.0, "points": 256}},
             "potential": [{"kind": "harmonic", "omega": 0.5}],
             "packet": {"kind": "gaussian", "center": -2.0, "width": 1.5, "momentum": 0.5},
             "evolve": {"dt": 0.05, "duration": 2.0, "scheme": "order4"},
             "record": {"every": 0.5, "snapshot_every": 1.0}}
    linear = Simulation(job_from_dict(table)).run(tmp_path / "linear", progress=False)
    zero = Simulation(job_from_dict({**table, "interaction": {"atoms": 1e4, "coupling": 0.0}})).run(
        tmp_path / "zero", progress=False)
    with netCDF4.Dataset(linear) as a, netCDF4.Dataset(zero) as b:
        assert "chemical_potential" not in a.variables
        assert set(b.variables) - set(a.variables) == {"chemical_potential"}
        for name in a.variables:
            if a[name].dtype != str:
                assert np.array_equal(a[name][:], b[name][:]), name
        assert np.array_equal(b["chemical_potential"][:], b["energy"][:])


@pytest.mark.parametrize("ndim", [1, 2, 3])
def test_scattering_length_conventions_against_si(ndim):
    """g from a in SI with scipy.constants: 3D 4 pi hbar^2 a / m; 2D
    sqrt(8 pi) hbar^2 a / (m a_z) with a_z = sqrt(hbar / (m omega_z)) (Petrov,
    Holzmann & Shlyapnikov 2000); 1D 2 hbar omega_perp a (Olshanii 1998).
    Rb-87 (m = 86.909 u, a = 5.31 nm, from memory) and a 2.5 kHz trap."""
    mass_kg = 86.909 * sc.atomic_mass
    a_m = 5.31e-9
    omega = 2 * math.pi * 2500.0
    axes = {"x": {"min": -10.0, "max": 10.0, "points": 16}, "y": {"min": -10.0, "max": 10.0, "points": 16},
            "z": {"min": -10.0, "max": 10.0, "points": 16}}
    gas = {"atoms": 1e5, "scattering_length": "5.31 nm"}
    if ndim == 2:
        gas["axial_omega"] = "2.5 kHz"
        g_si = math.sqrt(8 * math.pi) * sc.hbar**2 * a_m / (mass_kg * math.sqrt(sc.hbar / (mass_kg * omega)))
    elif ndim == 1:
        gas["transverse_omega"] = "2.5 kHz"
        g_si = 2 * sc.hbar * omega * a_m
    else:
        g_si = 4 * math.pi * sc.hbar**2 * a_m / mass_kg
    job = job_from_dict({
        "units": {"length": "um", "time": "ms", "mass": "Da"},
        "particle": {"mass": 86.909},
        "grid": {name: axes[name] for name in "xyz"[:ndim]},
        "packet": {"kind": "gaussian", "center": [0.0] * ndim, "width": [2.0] * ndim},
        "interaction": gas,
        "evolve": {"dt": 0.01, "duration": 0.1}})
    model = Model(job)
    hartree, bohr = sc.physical_constants["Hartree energy"][0], sc.physical_constants["Bohr radius"][0]
    g_au = g_si / (hartree * bohr**ndim)
    assert model.interaction.coupling == pytest.approx(g_au, rel=1e-12)
    assert model.contact == pytest.approx(1e5 * g_au, rel=1e-12)
    # the same g given directly, in SI units of energy x length^d, and in the job's units
    unit = {1: "J*m", 2: "J*m^2", 3: "J*m^3"}[ndim]
    direct = job_from_dict(merged(job.table, {"interaction": {"scattering_length": None, "axial_omega": None,
                                                              "transverse_omega": None,
                                                              "coupling": f"{g_si!r} {unit}"}}))
    assert Model(direct).interaction.coupling == pytest.approx(g_au, rel=1e-12)


def test_batched_members_step_as_their_solo_runs(tmp_path):
    """Members of a batch (packets at other momenta) each feel their own
    mean field: the batch gives each member's solo result."""
    table = {"grid": {"x": {"min": -30.0, "max": 30.0, "points": 256}},
             "potential": [{"kind": "harmonic", "omega": 0.5}],
             "packet": {"kind": "gaussian", "center": -1.0, "width": 1.0},
             "interaction": {"atoms": 100, "coupling": 0.02},
             "evolve": {"dt": 0.02, "duration": 1.0, "fft": "scipy"},
             "record": {"every": 0.2, "snapshot_every": 0.4}}
    jobs = [job_from_dict(merged(table, {"packet": {"momentum": p}})) for p in (0.0, 0.7)]
    solo = [Simulation(j).run(tmp_path / "solo", progress=False) for j in jobs]
    out = BatchedRun(jobs).run([tmp_path / "batch" / p.name for p in solo])
    for a, b in zip(solo, out):
        with netCDF4.Dataset(a) as da, netCDF4.Dataset(b) as db:
            for name in ("chemical_potential", "energy", "x_mean", "psi_real", "psi_imag"):
                assert np.allclose(da[name][:], db[name][:], rtol=0, atol=1e-12), name


def test_time_step_check_judges_the_mean_field_phase(tmp_path):
    """A dt fine for the kinetic and potential phases but not for
    g N max|psi|^2 dt (> 1 rad per step: common practice) is flagged, with
    the step that would do."""
    table = {"grid": {"x": {"min": -20.0, "max": 20.0, "points": 128}},
             "packet": {"kind": "gaussian", "center": 0.0, "width": 1.0},
             "interaction": {"atoms": 1000, "coupling": 0.05},
             "evolve": {"dt": 0.1, "duration": 1.0}}
    setup = Setup(job_from_dict(table))
    peak = 1 / math.sqrt(2 * math.pi)     # max |psi0|^2 of a unit-width Gaussian density
    finding = time_step_finding(setup, dynamics(setup))
    assert finding.values["mean_field_phase"] == pytest.approx(50 * peak * 0.1, rel=1e-3)
    assert finding.level == "warn" and "mean field" in finding.message and "dt <=" in finding.message
    calm = Setup(job_from_dict(merged(table, {"evolve": {"dt": 0.005, "duration": 1.0}})))
    assert time_step_finding(calm, dynamics(calm)).level == "ok"


def test_check_sees_the_momentum_and_energy_the_mean_field_can_release():
    """The classical criteria leave the interaction out; the mean-field
    energy per atom e = |g N| max|psi0|^2 can become momentum sqrt(2 m e) as
    the cloud expands (energy conservation of the GP functional, by hand).
    A grid whose k_max lies below that, or an absorber judged for lower
    energies, is a warning naming the setting, not silence."""
    from wavesweep.check import check_job

    base = {"grid": {"x": {"min": -20.0, "max": 20.0, "points": 128}, "boundary": "box"},
            "packet": {"center": 0.0, "width": 2.0}, "evolve": {"dt": 0.001, "duration": 0.05}}
    strong = job_from_dict({**base, "interaction": {"atoms": 1000, "coupling": 2.0}})
    found = [f for f in check_job(strong, trial_seconds=0).findings if "mean-field" in f.message]
    setup = Setup(strong)
    e = 2000.0 * float(np.max(np.abs(setup.psi0) ** 2))
    ratio = math.sqrt(2.0 * e) / setup.grid.axes[0].k_max
    assert ratio > 1.0
    assert [f.field for f in found if f.level == "warn"] == ["grid.x.points"]
    assert found[0].values["mean_field_momentum_ratio"] == pytest.approx(ratio, rel=1e-12)
    weak = job_from_dict({**base, "interaction": {"atoms": 10, "coupling": 0.01}})
    assert all(f.level == "ok" for f in check_job(weak, trial_seconds=0).findings if "mean-field" in f.message)


def test_the_absorbers_are_tuned_for_what_the_mean_field_releases():
    """The CAP's windows (and so its tuned strength) take the mean-field
    energy per atom |g N| max|psi0|^2 on top of the classical window of the
    linear Hamiltonian: an expanding cloud brings that much more energy to
    the layers (energy conservation of the GP functional, by hand)."""
    base = {"grid": {"x": {"min": -40.0, "max": 40.0, "points": 256}, "boundary": "box"},
            "packet": {"center": 0.0, "width": 2.0}, "evolve": {"dt": 0.005, "duration": 2.0},
            "absorber": {"kind": "cap", "thickness": 8.0}}
    linear = Setup(job_from_dict(base))
    cloud = Setup(job_from_dict({**base, "interaction": {"atoms": 100, "coupling": 0.5}}))
    e_mf = 50.0 * float(np.max(np.abs(cloud.psi0) ** 2))
    for face in ("x-", "x+"):
        lo, hi = linear.energy_window(0, face)
        assert cloud.energy_window(0, face) == pytest.approx((lo, hi + e_mf), rel=1e-12)
    assert cloud.job.table["absorber"]["strength"] != linear.job.table["absorber"]["strength"]
