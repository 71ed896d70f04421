"""Units: conversion factors against CODATA, quantity strings, unit errors,
and a job written in nm / meV / fs that must give the same physics as the
same job converted to atomic units by hand.

Reference values come from :mod:`scipy.constants` (CODATA).  Where possible
the test uses a *different* CODATA entry from the one ``wavesweep.units``
builds its factors from (``atomic unit of time`` instead of hbar / E_h,
``Hartree energy in eV`` instead of the joule value, ``electron mass in u``
instead of the dalton in kg), so that a slip in how the factors are combined
cannot cancel out.  Values written as literals are from memory.
"""
from __future__ import annotations

import copy
import math

import numpy as np
import pytest
import scipy.constants as sc

from conftest import make_job, run_table, setup_of
from wavesweep.errors import JobError
from wavesweep.units import UnitSet, parse_unit, quantity_to_atomic

PC = sc.physical_constants
# CODATA (scipy.constants): atomic units in SI
BOHR_M = PC["Bohr radius"][0]
AU_TIME_S = PC["atomic unit of time"][0]
HARTREE_EV = PC["Hartree energy in eV"][0]
ELECTRON_MASS_U = PC["electron mass in u"][0]

NM = 1e-9 / BOHR_M                 # bohr per nm
MEV = 1e-3 / HARTREE_EV            # hartree per meV
FS = 1e-15 / AU_TIME_S             # atomic time units per fs
DALTON = 1.0 / ELECTRON_MASS_U     # electron masses per dalton


# --- conversion factors ---------------------------------------------------------

def test_factors_match_codata():
    # CODATA via scipy.constants; see the module docstring for the entries
    nm_meV_fs = UnitSet.from_table({"length": "nm", "energy": "meV", "time": "fs", "mass": "Da"})
    assert nm_meV_fs.factor("length") == pytest.approx(NM, rel=1e-12)
    assert nm_meV_fs.factor("energy") == pytest.approx(MEV, rel=1e-12)
    assert nm_meV_fs.factor("time") == pytest.approx(FS, rel=1e-12)
    # "electron mass in u" and the dalton in kg agree to ~3e-12 in CODATA 2022
    assert nm_meV_fs.factor("mass") == pytest.approx(DALTON, rel=1e-10)


def test_factors_match_values_from_memory():
    # from memory (CODATA 2018 digits): 1 nm = 18.8972612 bohr,
    # 1 meV = 3.67493222e-5 hartree, 1 fs = 41.3413734 hbar/E_h,
    # 1 Da = 1822.888486 m_e
    assert parse_unit("nm")[0] == pytest.approx(18.8972612, rel=1e-8)
    assert parse_unit("meV")[0] == pytest.approx(3.67493222e-5, rel=1e-8)
    assert parse_unit("fs")[0] == pytest.approx(41.3413734, rel=1e-8)
    assert parse_unit("Da")[0] == pytest.approx(1822.888486, rel=1e-9)


def test_bohr_and_hartree_from_fundamental_constants():
    # textbook definitions (e.g. Bransden & Joachain, Physics of Atoms and
    # Molecules, appendix on atomic units; from memory):
    #   a0 = hbar / (m_e c alpha),  E_h = alpha^2 m_e c^2
    a0 = sc.hbar / (sc.m_e * sc.c * sc.alpha)
    e_h = sc.alpha**2 * sc.m_e * sc.c**2
    assert parse_unit("angstrom")[0] == pytest.approx(1e-10 / a0, rel=1e-10)
    assert parse_unit("eV")[0] == pytest.approx(sc.eV / e_h, rel=1e-10)
    # wavenumber energy h c (1/cm), kelvin k_B: CODATA conversion entries
    assert parse_unit("invcm")[0] == pytest.approx(
        PC["inverse meter-hartree relationship"][0] * 100.0, rel=1e-10)
    assert parse_unit("K")[0] == pytest.approx(PC["kelvin-hartree relationship"][0], rel=1e-10)


def test_derived_time_unit_is_hbar_over_energy_unit():
    # design.md: with no time unit the time unit is hbar / (energy unit);
    # hbar / 1 meV in seconds from CODATA
    u = UnitSet.from_table({"length": "nm", "energy": "meV"})
    hbar_over_mev_s = sc.hbar / (1e-3 * sc.eV)
    assert u.factor("time") == pytest.approx(hbar_over_mev_s / AU_TIME_S, rel=1e-12)
    # and it is not silently the femtosecond: hbar = 6.582119569e-16 eV s
    # (from memory), so hbar / meV = 658.2 fs
    assert hbar_over_mev_s / 1e-15 == pytest.approx(658.2119569, rel=1e-9)
    assert u.factor("time") == pytest.approx(658.2119569 * FS, rel=1e-9)


def test_compound_units():
    # momentum m_e nm / fs and an inverse time written two ways
    assert parse_unit("m_e*nm/fs")[0] == pytest.approx(NM / FS, rel=1e-12)
    assert parse_unit("1/fs")[0] == pytest.approx(1.0 / FS, rel=1e-12)
    assert parse_unit("fs^-1")[0] == pytest.approx(1.0 / FS, rel=1e-12)
    assert parse_unit("nm**2")[0] == pytest.approx(NM**2, rel=1e-12)
    # meV/nm: an energy per length; V/nm: a field (volt = J/C)
    assert parse_unit("meV/nm")[0] == pytest.approx(MEV / NM, rel=1e-12)
    field_au = PC["atomic unit of electric field"][0]   # V/m
    assert parse_unit("V/nm")[0] == pytest.approx(1e9 / field_au, rel=1e-10)


def test_momentum_kind_in_job_units():
    # the job unit of momentum is mass * length / time (design.md)
    u = UnitSet.from_table({"length": "nm", "energy": "meV", "time": "fs", "mass": "m_e"})
    assert u.factor("momentum") == pytest.approx(NM / FS, rel=1e-12)
    assert u.factor("frequency") == pytest.approx(1.0 / FS, rel=1e-12)
    assert u.factor("electric_field") == pytest.approx(MEV / NM, rel=1e-12)


# --- quantity strings -----------------------------------------------------------

@pytest.mark.parametrize(("text", "kind", "expected"), [
    ("3 nm", "length", 3 * NM),
    ("0.5 meV", "energy", 0.5 * MEV),
    ("1e-3 eV", "energy", 1.0 * MEV),
    ("2.5fs", "time", 2.5 * FS),
    ("-150 nm", "length", -150 * NM),
    ("0.2 m_e*nm/fs", "momentum", 0.2 * NM / FS),
    ("12 Da", "mass", 12 * DALTON),
])
def test_quantity_strings(text, kind, expected):
    assert quantity_to_atomic(text, kind) == pytest.approx(expected, rel=1e-10)


BASE_NM = {
    "units": {"length": "nm", "energy": "meV", "time": "fs"},
    "particle": {"mass": 0.067},
    "grid": {"x": {"min": -100.0, "max": 100.0, "points": 512}},
    "potential": [{"kind": "barrier", "height": 150.0, "width": 2.0}],
    "packet": {"kind": "gaussian", "center": -40.0, "width": 6.0, "energy": 60.0},
    "evolve": {"dt": 0.5, "duration": 5.0},
}


def test_strings_with_units_equal_the_numbers():
    plain = setup_of(BASE_NM)
    table = copy.deepcopy(BASE_NM)
    table["potential"][0]["height"] = "0.15 eV"
    table["potential"][0]["width"] = "20 angstrom"
    table["packet"]["center"] = "-400 angstrom"
    table["packet"]["width"] = "6 nm"
    table["packet"]["energy"] = "60 meV"
    table["evolve"]["dt"] = "500 as"
    strings = setup_of(table)
    assert strings.packet["center"][0] == pytest.approx(plain.packet["center"][0], rel=1e-12)
    assert strings.packet["width"][0] == pytest.approx(plain.packet["width"][0], rel=1e-12)
    assert strings.packet["energy"] == pytest.approx(plain.packet["energy"], rel=1e-12)
    assert strings.dt == pytest.approx(plain.dt, rel=1e-12)
    np.testing.assert_allclose(strings.hamiltonian.static_potential,
                               plain.hamiltonian.static_potential, rtol=1e-12)
    # and both are the hand-converted values (CODATA)
    assert plain.packet["center"][0] == pytest.approx(-40 * NM, rel=1e-12)
    assert plain.dt == pytest.approx(0.5 * FS, rel=1e-12)
    assert plain.mass == pytest.approx(0.067, rel=1e-15)
    assert plain.hamiltonian.static_potential.max() == pytest.approx(150 * MEV, rel=1e-12)


def test_strings_with_units_in_an_atomic_job():
    table = {
        "grid": {"x": {"min": "-10 nm", "max": "10 nm", "points": 256}},
        "potential": [{"kind": "step", "height": "0.5 meV", "position": "1 nm"}],
        "packet": {"kind": "gaussian", "center": "-3 nm", "width": "0.5 nm", "momentum": 0.0},
        "evolve": {"dt": "1 fs", "duration": "10 fs"},
        "particle": {"mass": "1 Da"},
    }
    s = setup_of(table)
    ax = s.grid.axes[0]
    assert (ax.min, ax.max) == (pytest.approx(-10 * NM, rel=1e-12), pytest.approx(10 * NM, rel=1e-12))
    assert s.packet["center"][0] == pytest.approx(-3 * NM, rel=1e-12)
    assert s.dt == pytest.approx(FS, rel=1e-12)
    assert s.mass == pytest.approx(DALTON, rel=1e-10)
    v = s.hamiltonian.static_potential
    x = ax.coordinates
    # the step at 1 nm, its edge cell-averaged over dx = 20 nm / 256: the
    # height and position arrive in atomic units
    cell = np.clip((x + ax.dx / 2 - NM) / ax.dx, 0.0, 1.0)
    np.testing.assert_allclose(v, 0.5 * MEV * cell, rtol=1e-12, atol=1e-12 * MEV)
    assert v.sum() * ax.dx == pytest.approx(0.5 * MEV * (x[-1] + ax.dx / 2 - NM), rel=1e-10)


# --- errors name the field --------------------------------------------------------

@pytest.mark.parametrize(("where", "value", "field"), [
    (("units", "length"), "meV", "units.length"),          # an energy unit for length
    (("units", "energy"), "parsec", "units.energy"),       # unknown unit
    (("units", "time"), 3, "units.time"),                  # not a string
    (("packet", "center"), "3 meV", "packet.center"),      # wrong dimension
    (("packet", "width"), "3 nmm", "packet.width"),        # typo
    (("potential", 0, "height"), "2 nm", "potential.0.height"),
    (("evolve", "dt"), "1 nm", "evolve.dt"),
    (("particle", "mass"), "3 fs", "particle.mass"),
    (("packet", "energy"), "60", "packet.energy"),         # no unit on a dimensioned value
    (("grid", "x", "max"), "100 nm/", "grid.x.max"),       # unreadable unit
])
def test_bad_units_name_the_field(where, value, field):
    table = copy.deepcopy(BASE_NM)
    node = table
    for key in where[:-1]:
        node = node[key]
    node[where[-1]] = value
    with pytest.raises(JobError) as info:
        setup_of(table)
    assert info.value.field == field, str(info.value)


def test_unknown_units_key_suggests_the_closest():
    table = copy.deepcopy(BASE_NM)
    table["units"] = {"lenght": "nm", "energy": "meV"}
    with pytest.raises(JobError) as info:
        make_job(table)
    assert info.value.field == "units.lenght"
    assert "'length'" in str(info.value)


def test_unknown_unit_suggests_the_closest():
    with pytest.raises(JobError) as info:
        quantity_to_atomic("3 nmm", "length", "grid.x.min")
    assert info.value.field == "grid.x.min"
    assert "'nm'" in str(info.value)


def test_per_axis_error_names_the_element():
    table = copy.deepcopy(BASE_NM)
    table["grid"]["y"] = {"min": -20.0, "max": 20.0, "points": 64}
    table["packet"] = {"kind": "gaussian", "center": [-40.0, "2 meV"], "width": [6.0, 3.0],
                       "momentum": [0.0, 0.0]}
    with pytest.raises(JobError) as info:
        make_job(table)
    assert info.value.field == "packet.center.1"


# --- same physics in nm / meV / fs and in atomic units -----------------------------

NM_JOB = {
    "units": {"length": "nm", "energy": "meV", "time": "fs"},
    "particle": {"mass": 0.067},
    "grid": {"x": {"min": -150.0, "max": 150.0, "points": 1024}},
    "potential": [{"kind": "double_barrier", "height": 150.0, "width": 2.0, "gap": 4.0},
                  {"kind": "harmonic", "omega": 0.002}],
    "packet": {"kind": "gaussian", "center": -50.0, "width": 6.0, "energy": 60.0},
    "evolve": {"dt": 0.5, "duration": 100.0},
    "absorber": {"kind": "cap", "thickness": 30.0, "strength": 20.0},
    "record": {"every": 5.0, "snapshot_every": 50.0},
    "detector": [{"name": "after", "x": 20.0}],
}


def _scaled(value, factor):
    """A strength as written in a job: a number, or one per face."""
    if isinstance(value, dict):
        return {k: v * factor for k, v in value.items()}
    return value * factor


def _by_hand_in_atomic_units(job):
    """The nm / meV / fs job converted with CODATA factors, no [units] table."""
    au = copy.deepcopy(job)
    del au["units"]
    for key in ("min", "max"):
        au["grid"]["x"][key] *= NM
    pot = au["potential"]
    pot[0].update(height=pot[0]["height"] * MEV, width=pot[0]["width"] * NM, gap=pot[0]["gap"] * NM)
    pot[1]["omega"] /= FS
    pk = au["packet"]
    pk.update(center=pk["center"] * NM, width=pk["width"] * NM, energy=pk["energy"] * MEV)
    au["evolve"].update(dt=au["evolve"]["dt"] * FS, duration=au["evolve"]["duration"] * FS)
    au["absorber"].update(thickness=au["absorber"]["thickness"] * NM,
                          strength=_scaled(au["absorber"]["strength"], MEV))
    au["record"].update(every=au["record"]["every"] * FS,
                        snapshot_every=au["record"]["snapshot_every"] * FS)
    au["detector"][0]["x"] *= NM
    return au


def test_job_units_give_the_same_physics(tmp_path):
    nm = run_table(NM_JOB, tmp_path / "nm")
    au = run_table(_by_hand_in_atomic_units(NM_JOB), tmp_path / "au")
    # the run did something: the packet moved and hit the barriers
    assert nm.x_mean.values[-1] - nm.x_mean.values[0] > 20.0
    np.testing.assert_allclose(nm.time.values * FS, au.time.values, rtol=1e-12)
    np.testing.assert_allclose(nm.x.values * NM, au.x.values, rtol=1e-12)
    x_nm, x_au = nm.x_mean.values * NM, au.x_mean.values
    assert np.max(np.abs(x_nm - x_au)) <= 1e-10 * np.max(np.abs(x_au))
    np.testing.assert_allclose(nm.x_std.values * NM, au.x_std.values, rtol=1e-10)
    np.testing.assert_allclose(nm.norm.values, au.norm.values, rtol=1e-10)
    np.testing.assert_allclose(nm.energy.values * MEV, au.energy.values, rtol=1e-10)
    # momentum in m_e nm/fs, flux per fs
    np.testing.assert_allclose(nm.p_mean.values * NM / FS, au.p_mean.values, rtol=1e-9, atol=1e-12)
    flux_nm, flux_au = nm.flux.values[:, 0] / FS, au.flux.values[:, 0]
    assert np.max(np.abs(flux_nm - flux_au)) <= 1e-10 * np.max(np.abs(flux_au))
    # the result says which units it is in
    assert nm.x.attrs["units"] == "nm" and nm.time.attrs["units"] == "fs"
    assert nm.attrs["length_to_bohr"] == pytest.approx(NM, rel=1e-12)


# --- a left-out unit: derived where the others determine it, else refused (issue 12) ---

# CODATA (scipy.constants): m_e nm^2 / fs^2 in joule and in hartree; by hand
# from memory: 9.109e-31 kg x 1e-18 m^2 / 1e-30 s^2 = 9.109e-19 J = 5.686 eV.
M_E_NM2_PER_FS2_J = sc.m_e * (1e-9) ** 2 / (1e-15) ** 2
HARTREE_J = PC["Hartree energy"][0]


def test_left_out_energy_is_mass_length2_over_time2():
    """length, time and mass given, energy left out: energies were silently
    hartree (issue 12); now E = M L^2 / T^2, against CODATA."""
    u = UnitSet.from_table({"length": "nm", "time": "fs", "mass": "m_e"})
    assert u.energy_derived
    assert u.factor("energy") == pytest.approx(M_E_NM2_PER_FS2_J / HARTREE_J, rel=1e-12)
    assert M_E_NM2_PER_FS2_J / sc.eV == pytest.approx(5.686, rel=1e-3)    # from memory
    # the other kinds follow: a force in energy / length is M L / T^2
    assert u.factor("energy_per_length") == pytest.approx(
        sc.m_e * 1e-9 / (1e-15) ** 2 / (HARTREE_J / BOHR_M), rel=1e-12)
    # a cold-atom set (um, ms, Da): 1 Da um^2/ms^2 = 1.6605e-33 J
    cold = UnitSet.from_table({"length": "um", "time": "ms", "mass": "Da"})
    assert cold.factor("energy") == pytest.approx(sc.atomic_mass * 1e-12 / 1e-6 / HARTREE_J, rel=1e-12)
    # the mass left out as well: m_e, the stated default
    assert UnitSet.from_table({"length": "nm", "time": "fs"}).factor("energy") == pytest.approx(
        u.factor("energy"), rel=1e-12)


def test_derived_energy_is_written_as_a_unit_the_parser_reads_back():
    """The derived energy is a unit string (resolved job, result attributes),
    and every kind's label converts back to the same factor."""
    u = UnitSet.from_table({"length": "nm", "time": "fs", "mass": "Da"})
    assert u.as_table()["energy"] == "Da nm^2 fs^-2"
    assert UnitSet.from_table(u.as_table()).factor("energy") == pytest.approx(u.factor("energy"), rel=1e-14)
    assert u.unit_label("energy") == "Da nm2 fs-2"
    for kind in ("length", "energy", "time", "mass", "momentum", "velocity", "wavenumber",
                 "frequency", "energy_per_length", "energy_length", "electric_field"):
        assert parse_unit(u.unit_label(kind))[0] == pytest.approx(u.factor(kind), rel=1e-12), kind
    assert u.unit_label("energy_per_length") == "Da nm fs-2"      # powers of one symbol combined


@pytest.mark.parametrize(("table", "fields"), [
    ({"length": "nm"}, ["units.energy"]),                 # energies would be hartree beside nm
    ({"energy": "eV"}, ["units.length"]),                 # lengths would be bohr beside eV
    ({"time": "fs"}, ["units.length"]),                   # energy follows once a length is given
    ({"mass": "amu"}, ["units.length", "units.energy"]),  # two independent gaps: both said at once
    ({"mass": "amu", "time": "fs", "energy": "meV"}, ["units.length"]),
])
def test_a_left_out_unit_nothing_determines_is_refused(table, fields):
    with pytest.raises(JobError) as info:
        UnitSet.from_table(table)
    assert [e.field for e in info.value.errors] == fields, str(info.value)
    for e in info.value.errors:
        assert "silently" in e.message and "add " in e.message and "\n" not in e.message


@pytest.mark.parametrize("table", [None, {}, {"length": "bohr"}, {"mass": "m_e"},
                                   {"energy": "hartree", "charge": "e_charge"},
                                   {"length": "nm", "energy": "meV"},           # time = hbar/meV
                                   {"length": "nm", "energy": "meV", "time": "fs"}])
def test_atomic_or_determined_sets_are_accepted(table):
    UnitSet.from_table(table)


def test_describe_names_given_derived_and_default_units():
    assert UnitSet.from_table({"length": "nm", "time": "fs"}).describe() == (
        "units: length nm, energy m_e nm^2 fs^-2 (derived: mass length^2/time^2 = 5.686 eV), "
        "time fs, mass m_e (default)")
    # hbar/meV = 0.6582 ps (CODATA: hbar / 1 meV = 6.582e-13 s)
    hbar_mev_fs = sc.hbar / (1e-3 * sc.eV) / 1e-15
    assert f"{hbar_mev_fs:.4g} fs" == "658.2 fs"
    assert UnitSet.from_table({"length": "nm", "energy": "meV"}).describe() == (
        "units: length nm, energy meV, time hbar/meV (derived: hbar/energy = 658.2 fs), mass m_e (default)")
    assert "no [units] table" in UnitSet.from_table(None).describe()
    assert "(derived" not in UnitSet.from_table({"length": "nm", "energy": "meV", "time": "fs",
                                                 "mass": "Da"}).describe()


def test_a_job_with_energy_left_out_runs_in_the_derived_unit(tmp_path):
    """A free Gaussian packet in nm / fs / m_e: the result's energy, read in
    the unit its attribute names, is <H> = p0^2/2m + hbar^2/(8 m sigma^2)
    (sigma the standard deviation of |psi|^2; closed form of a Gaussian,
    from memory), in joule with CODATA factors."""
    table = {
        "units": {"length": "nm", "time": "fs", "mass": "m_e"},
        "grid": {"x": {"min": -60.0, "max": 60.0, "points": 512}},
        "packet": {"kind": "gaussian", "center": 0.0, "width": 3.0, "momentum": 0.5},
        "evolve": {"dt": 0.5, "duration": 5.0},
        "record": {"every": 2.5, "snapshot_every": 5.0},
    }
    job = make_job(table)
    assert job.table["units"]["energy"] == "m_e nm^2 fs^-2"     # written in the resolved job
    ds = run_table(table, tmp_path)
    p0_si = 0.5 * sc.m_e * 1e-9 / 1e-15
    sigma_si = 3.0e-9
    expected_j = p0_si**2 / (2 * sc.m_e) + sc.hbar**2 / (8 * sc.m_e * sigma_si**2)
    unit = ds["energy"].attrs["units"]
    assert unit == "m_e nm2 fs-2"
    energy_j = float(ds["energy"].values[0]) * parse_unit(unit)[0] * HARTREE_J
    assert energy_j == pytest.approx(expected_j, rel=1e-6)
    # by hand: 1/2 m_e (5e5 m/s)^2 = 0.7107 eV plus 1.06 meV of spread; the
    # number in the file, 0.125, read as hartree would have been 3.4 eV
    assert expected_j / sc.eV == pytest.approx(0.7118, rel=1e-3)


# --- units of the trade: energies as h nu, hbar omega and k_B T (issue 15) -----------------

# CODATA (scipy.constants): E_h / h in Hz and E_h / k_B in K, entries other than
# the hbar / E_h that units.py builds h nu from
HARTREE_HZ = PC["hartree-hertz relationship"][0]          # 1 E_h = h x 6.58e15 Hz
KELVIN_HARTREE = PC["kelvin-hartree relationship"][0]     # k_B x 1 K in E_h
HZ_TO_HARTREE = 1.0 / HARTREE_HZ


@pytest.mark.parametrize(("text", "hertz"), [("1 Hz", 1.0), ("1 kHz", 1e3), ("2.5 kHz", 2.5e3),
                                             ("1 MHz", 1e6), ("1 GHz", 1e9), ("-3 kHz", -3e3)])
def test_an_energy_in_hertz_is_h_nu(text, hertz):
    """E = h nu, against CODATA's hartree-hertz relationship."""
    assert quantity_to_atomic(text, "energy") == pytest.approx(hertz * HZ_TO_HARTREE, rel=1e-12)


def test_an_energy_in_rad_per_s_is_hbar_omega():
    """E = hbar omega: 1 rad/s is 1/(2 pi) of h x 1 Hz; and hbar x 1 rad/s in
    hartree is the atomic unit of time in seconds (hbar / E_h, CODATA)."""
    assert quantity_to_atomic("1 rad/s", "energy") == pytest.approx(HZ_TO_HARTREE / (2 * math.pi), rel=1e-12)
    assert quantity_to_atomic("1 rad/s", "energy") == pytest.approx(AU_TIME_S, rel=1e-12)
    assert quantity_to_atomic("2 rad/ms", "energy") == pytest.approx(2e3 * AU_TIME_S, rel=1e-12)


@pytest.mark.parametrize(("text", "kelvin"), [("1 K", 1.0), ("1 mK", 1e-3), ("1 uK", 1e-6),
                                              ("1 µK", 1e-6), ("250 nK", 250e-9)])
def test_an_energy_in_kelvin_is_k_b_t(text, kelvin):
    """E = k_B T, against CODATA's kelvin-hartree relationship."""
    assert quantity_to_atomic(text, "energy") == pytest.approx(kelvin * KELVIN_HARTREE, rel=1e-12)


def test_energy_kinds_take_the_energy_as_a_frequency():
    """h nu in compound energy kinds: a force 'kHz/um' (energy per length)
    and a 1D coupling 'Hz um' (energy x length), CODATA factors."""
    um = 1e-6 / BOHR_M
    assert quantity_to_atomic("2 kHz/um", "energy_per_length") == pytest.approx(
        2e3 * HZ_TO_HARTREE / um, rel=1e-12)
    assert quantity_to_atomic("3 Hz*um", "energy_length") == pytest.approx(3 * HZ_TO_HARTREE * um, rel=1e-12)
    assert quantity_to_atomic("1 uK/um", "energy_per_length") == pytest.approx(
        1e-6 * KELVIN_HARTREE / um, rel=1e-12)


def test_a_frequency_field_keeps_its_reading():
    """omega given '100 Hz' is 2 pi x 100 rad/s as before (cycles x 2 pi),
    '100 rad/s' and '0.1 rad/ms' are 100 rad/s; in atomic units rad per
    hbar/E_h (CODATA atomic unit of time)."""
    two_pi_100 = 2 * math.pi * 100 * AU_TIME_S
    assert quantity_to_atomic("100 Hz", "frequency") == pytest.approx(two_pi_100, rel=1e-12)
    assert quantity_to_atomic("0.1 kHz", "frequency") == pytest.approx(two_pi_100, rel=1e-12)
    assert quantity_to_atomic("100 rad/s", "frequency") == pytest.approx(100 * AU_TIME_S, rel=1e-12)
    assert quantity_to_atomic("0.1 rad/ms", "frequency") == pytest.approx(100 * AU_TIME_S, rel=1e-12)
    assert quantity_to_atomic("100 s-1", "frequency") == pytest.approx(100 * AU_TIME_S, rel=1e-12)


def test_a_khz_unit_set():
    """[units] energy = "kHz": energies are h x kHz (CODATA), time left out
    follows as the reciprocal, ms (= h / energy unit); the labels read back
    to the same factors."""
    u = UnitSet.from_table({"length": "um", "energy": "kHz", "mass": "Da"})
    assert u.factor("energy") == pytest.approx(1e3 * HZ_TO_HARTREE, rel=1e-12)
    assert u.time == "ms" and u.time_derived
    assert u.factor("time") == pytest.approx(1e-3 / AU_TIME_S, rel=1e-12)
    # h / (h x 1 kHz) = 1 ms: the phase E t / hbar of 1 kHz over 1 ms is 2 pi
    assert u.factor("energy") * u.factor("time") == pytest.approx(2 * math.pi, rel=1e-12)
    assert u.unit_label("energy") == "kHz" and u.unit_label("time") == "ms"
    assert u.unit_label("energy_per_length") == "kHz um-1"
    assert u.as_table() == {"length": "um", "energy": "kHz", "mass": "Da"}   # time derived again
    from wavesweep.units import unit_factor
    for kind in ("energy", "time", "frequency", "energy_per_length", "energy_length", "electric_field"):
        assert unit_factor(u.unit_label(kind), kind) == pytest.approx(u.factor(kind), rel=1e-12), kind
    # h x 1 kHz = 47.99 nK x k_B (CODATA ratio h / k_B = 4.799e-11 K s)
    assert "energy kHz (h nu = 47.99 nK)" in u.describe()
    assert "time ms (derived" in u.describe()
    # hbar omega units: time follows as s; given units are kept
    w = UnitSet.from_table({"length": "um", "energy": "rad/s", "mass": "Da"})
    assert w.factor("energy") == pytest.approx(AU_TIME_S, rel=1e-12) and w.time == "s"
    assert w.factor("time") == pytest.approx(1.0 / AU_TIME_S, rel=1e-12)
    assert UnitSet.from_table({"length": "um", "energy": "MHz", "time": "ms"}).time == "ms"
    # a temperature unit keeps time = hbar / energy
    t = UnitSet.from_table({"length": "um", "energy": "uK", "mass": "Da"})
    assert t.time == "hbar/uK"
    assert t.factor("time") == pytest.approx(1.0 / (1e-6 * KELVIN_HARTREE), rel=1e-12)


@pytest.mark.parametrize(("text", "kind", "pieces"), [
    ("100 s-1", "energy", ("ambiguous", "Hz", "rad/s")),           # nu or omega: not said
    ("100 1/s", "energy", ("ambiguous",)),
    ("2 kHz*rad", "energy", ("mixes",)),
    ("2 kHz/um", "energy", ("not an energy", "'kHz'", "'uK'")),   # an energy per length
    ("3 uK", "frequency", ("not a frequency", "rad/s")),          # an energy for omega
    ("3 kHz", "length", ("not a length",)),
    ("3 s-1/um", "energy_per_length", ("ambiguous",)),
])
def test_units_of_the_trade_wrong_for_the_field(text, kind, pieces):
    with pytest.raises(JobError) as info:
        quantity_to_atomic(text, kind, "potential.0.height")
    assert info.value.field == "potential.0.height"
    for piece in pieces:
        assert piece in str(info.value), str(info.value)
    assert "\n" not in str(info.value)


@pytest.mark.parametrize(("energy", "pieces"), [("1/s", ("ambiguous",)), ("um", ("not a unit of energy", "kHz")),
                                                ("Hz*rad", ("mixes",))])
def test_a_units_table_with_a_frequency_energy_it_cannot_read(energy, pieces):
    with pytest.raises(JobError) as info:
        UnitSet.from_table({"length": "um", "energy": energy})
    assert info.value.field == "units.energy"
    for piece in pieces:
        assert piece in str(info.value), str(info.value)


# Rb-87, 86.909180531 u (atomic mass, from memory), in a 100 Hz trap
RB87_DA = 86.909180531
M_RB_KG = RB87_DA * sc.atomic_mass
OMEGA_TRAP = 2 * math.pi * 100.0                                   # rad/s
A_HO_UM = math.sqrt(sc.hbar / (M_RB_KG * OMEGA_TRAP)) / 1e-6      # oscillator length, 1.08 um

KHZ_TRAP = {
    "units": {"length": "um", "energy": "kHz", "mass": "Da"},     # time: ms
    "particle": {"mass": RB87_DA},
    "grid": {"x": {"min": -16.0, "max": 16.0, "points": 128}},
    "potential": [{"kind": "harmonic", "omega": "100 Hz"}],
    "packet": {"kind": "gaussian", "center": 2.0, "width": A_HO_UM / math.sqrt(2)},
    "evolve": {"dt": 0.02, "duration": 2.0, "scheme": "chebyshev"},
    "record": {"every": 0.5, "snapshot_every": 2.0},
}


def test_a_harmonic_trap_given_in_hertz_is_unchanged():
    """omega = "100 Hz" in a kHz / ms job is the trap of 2 pi x 100 rad/s,
    V = m omega^2 x^2 / 2 (the harmonic kind's formula), as the number
    2 pi x 0.1 rad/ms gives it; V in kHz against SI by hand (CODATA)."""
    s = setup_of(KHZ_TRAP)
    table = copy.deepcopy(KHZ_TRAP)
    table["potential"][0]["omega"] = 2 * math.pi * 0.1          # rad per job time unit, ms
    np.testing.assert_allclose(setup_of(table).hamiltonian.static_potential, s.hamiltonian.static_potential,
                               rtol=1e-12)
    x_m = s.grid.axes[0].coordinates * BOHR_M
    v_khz = 0.5 * M_RB_KG * OMEGA_TRAP**2 * x_m**2 / (sc.h * 1e3)
    np.testing.assert_allclose(s.hamiltonian.static_potential / s.units.factor("energy"), v_khz,
                               rtol=1e-9, atol=1e-12 * v_khz.max())


def test_energy_fields_given_as_frequencies_and_temperatures():
    """A barrier height "2.5 kHz" is h x 2.5 kHz, "120 nK" is k_B x 120 nK,
    in an atomic-units job and in a kHz job alike; a CAP strength in kHz."""
    table = copy.deepcopy(KHZ_TRAP)
    table["potential"] = [{"kind": "barrier", "height": "2.5 kHz", "width": 1.0}]
    assert setup_of(table).hamiltonian.static_potential.max() == pytest.approx(2.5e3 * HZ_TO_HARTREE, rel=1e-12)
    table["potential"][0]["height"] = 2.5                         # a number: the job's kHz
    assert setup_of(table).hamiltonian.static_potential.max() == pytest.approx(2.5e3 * HZ_TO_HARTREE, rel=1e-12)
    table["potential"][0]["height"] = "120 nK"
    assert setup_of(table).hamiltonian.static_potential.max() == pytest.approx(120e-9 * KELVIN_HARTREE,
                                                                               rel=1e-12)
    table["evolve"]["scheme"] = "strang"                          # a CAP: not chebyshev
    table["absorber"] = {"kind": "cap", "thickness": 4.0, "strength": "0.5 kHz", "power": 2}
    assert make_job(table).table["absorber"]["strength"] == "0.5 kHz"
    rate_khz = setup_of(table).absorber.rate
    table["absorber"]["strength"] = 0.5                           # the job's kHz
    np.testing.assert_allclose(setup_of(table).absorber.rate, rate_khz, rtol=1e-12)
    # the same profile as a strength of 0.5 meV, scaled by h x 500 Hz / 0.5 meV (CODATA)
    table["absorber"]["strength"] = "0.5 meV"
    rate_mev = setup_of(table).absorber.rate
    assert rate_khz.max() > 0
    np.testing.assert_allclose(rate_khz, rate_mev * (sc.h * 500.0) / (0.5e-3 * sc.eV), rtol=1e-12)
    atomic = {"grid": {"x": {"min": -20.0, "max": 20.0, "points": 64}},
              "potential": [{"kind": "barrier", "height": "2.5 kHz", "width": 1.0}],
              "packet": {"kind": "gaussian", "center": -5.0, "width": 1.0},
              "evolve": {"dt": 0.1, "duration": 1.0}}
    assert setup_of(atomic).hamiltonian.static_potential.max() == pytest.approx(2.5e3 * HZ_TO_HARTREE,
                                                                                rel=1e-12)


def test_a_khz_job_writes_its_energies_in_khz(tmp_path, capsys):
    """A displaced ground state (a coherent state) of a 100 Hz Rb-87 trap in
    um / kHz / Da: the result's energy, labelled kHz, is
    hbar omega / 2 + m omega^2 x0^2 / 2 (textbook coherent-state energy, from
    memory) in h x kHz, computed in SI with CODATA; times are in ms; and
    `levels --json` gives (n + 1/2) x 0.1 kHz labelled kHz."""
    ds = run_table(KHZ_TRAP, tmp_path)
    assert ds["energy"].attrs["units"] == "kHz" and ds.attrs["units_energy"] == "kHz"
    assert ds["time"].attrs["units"] == "ms" and ds.attrs["units_time"] == "ms"
    assert ds.attrs["energy_to_hartree"] == pytest.approx(1e3 * HZ_TO_HARTREE, rel=1e-12)
    x0_m = 2.0e-6
    expected_j = sc.hbar * OMEGA_TRAP / 2 + 0.5 * M_RB_KG * OMEGA_TRAP**2 * x0_m**2
    np.testing.assert_allclose(ds["energy"].values, expected_j / (sc.h * 1e3), rtol=1e-8)
    # by hand: hbar omega = h x 100 Hz = 0.1 kHz, so 0.05 kHz of zero-point
    # energy plus (x0 / a_ho)^2 x 0.05 kHz = (2 / 1.078)^2 x 0.05 = 0.172 kHz
    assert expected_j / (sc.h * 1e3) == pytest.approx(0.222, abs=0.001)
    # the packet oscillates with the 10 ms period: at 2 ms, x0 cos(2 pi / 5)
    np.testing.assert_allclose(ds["x_mean"].values[-1], 2.0 * math.cos(2 * math.pi * 0.2), rtol=1e-8)

    import tomli_w
    from wavesweep.cli import main
    job = tmp_path / "trap.toml"
    job.write_text(tomli_w.dumps(KHZ_TRAP))
    assert main(["levels", str(job), "--count", "3", "--json"]) == 0
    import json
    body = json.loads(capsys.readouterr().out)
    assert body["energy_units"] == "kHz"
    np.testing.assert_allclose(body["energies"], [0.05, 0.15, 0.25], rtol=1e-8)


# A Rb-87 atom at a thin barrier in um / kHz / Da (time: ms).  Grid step
# 0.125 um; the barrier's edges fall midway between grid points (centre dx/2),
# so 4 cells span exactly its 0.5 um width.
KHZ_BARRIER = {
    "units": {"length": "um", "energy": "kHz", "mass": "Da"},
    "particle": {"mass": RB87_DA},
    "grid": {"x": {"min": -60.0, "max": 60.0, "points": 960}},
    "potential": [{"kind": "barrier", "height": "1.2 kHz", "width": 0.5, "center": 0.0625}],
    "packet": {"kind": "gaussian", "center": -20.0, "width": 3.0, "energy": "1 kHz"},
    "evolve": {"dt": 0.01, "duration": 25.0},
    "absorber": {"kind": "cap", "thickness": 10.0, "strength": 0.2, "power": 2},
    "record": {"every": 0.05, "snapshot_every": 25.0},
    "detector": [{"name": "after", "x": 10.0}],
}


def _barrier_transmission_si(energy_j, height_j, width_m, mass_kg):
    """Rectangular-barrier T(E) (Griffiths, Introduction to Quantum Mechanics,
    2nd ed., problem 2.33; from memory), in SI with CODATA hbar."""
    if energy_j < height_j:
        kappa = math.sqrt(2 * mass_kg * (height_j - energy_j)) / sc.hbar
        return 1.0 / (1.0 + height_j**2 * math.sinh(kappa * width_m) ** 2 / (4 * energy_j * (height_j - energy_j)))
    q = math.sqrt(2 * mass_kg * (energy_j - height_j)) / sc.hbar
    return 1.0 / (1.0 + height_j**2 * math.sin(q * width_m) ** 2 / (4 * energy_j * (energy_j - height_j)))


def test_transmission_and_arrivals_of_a_khz_job(tmp_path):
    """`transmission` gives T(E) with E in kHz and `arrivals` times in ms: the
    same numbers as the job converted to atomic units by hand (CODATA h,
    Bohr radius, dalton), and T(E) near the textbook rectangular barrier's
    (sharp edges converge slowly with dx: 1.4e-2 measured at this grid, 9e-3
    at half the step; a slip of 2 pi in the energies would move T by ~0.3)."""
    from wavesweep.analysis.arrivals import arrival_times
    from wavesweep.analysis.transmission import transmission

    um, khz = 1e-6 / BOHR_M, 1e3 * HZ_TO_HARTREE
    ms = 1e-3 / AU_TIME_S
    mass = RB87_DA * PC["atomic mass constant"][0] / sc.m_e
    by_hand = copy.deepcopy(KHZ_BARRIER)
    del by_hand["units"]
    by_hand["particle"]["mass"] = mass
    by_hand["grid"]["x"].update(min=-60.0 * um, max=60.0 * um)
    by_hand["potential"][0].update(height=1.2 * khz, width=0.5 * um, center=0.0625 * um)
    by_hand["packet"].update(center=-20.0 * um, width=3.0 * um, energy=khz)
    by_hand["evolve"].update(dt=0.01 * ms, duration=25.0 * ms)
    by_hand["absorber"].update(thickness=10.0 * um, strength=0.2 * khz)
    by_hand["record"].update(every=0.05 * ms, snapshot_every=25.0 * ms)
    by_hand["detector"][0]["x"] = 10.0 * um

    run_table(KHZ_BARRIER, tmp_path / "khz")
    run_table(by_hand, tmp_path / "au")
    (path_khz,), (path_au,) = (tmp_path / "khz").glob("*.nc"), (tmp_path / "au").glob("*.nc")
    t_khz, t_au = (transmission(p)["energy_resolved"] for p in (path_khz, path_au))
    assert t_khz["energy_units"] == "kHz"
    np.testing.assert_allclose(np.asarray(t_khz["energy"]) * khz, t_au["energy"], rtol=1e-9)
    np.testing.assert_allclose(t_khz["T"], t_au["T"], rtol=1e-7, atol=1e-9)
    a_khz, a_au = arrival_times(path_khz)["after"], arrival_times(path_au)["after"]
    assert a_khz.time_units == "ms"
    assert a_khz.stats["mean"] * ms == pytest.approx(a_au.stats["mean"], rel=1e-9)
    assert a_khz.stats["std"] * ms == pytest.approx(a_au.stats["std"], rel=1e-8)
    # against the textbook T(E), where the packet carries weight
    energy, weight = np.asarray(t_khz["energy"]), np.asarray(t_khz["weight"])
    textbook = [_barrier_transmission_si(e * 1e3 * sc.h, 1.2e3 * sc.h, 0.5e-6, RB87_DA * sc.atomic_mass)
                for e in energy]
    carried = weight > 0.1
    assert carried.sum() > 20
    np.testing.assert_allclose(np.asarray(t_khz["T"])[carried], np.asarray(textbook)[carried], atol=0.02)
