"""Units of chemists, times as the job writes them, and the fixes messages
suggest (issue 16, trial problem P14).

Sources: CODATA 2018 through scipy.constants (the Hartree energy, the
inverse meter-hartree relationship, h, c, N_A) and the SI definitions of
the thermochemical calorie (4.184 J exactly, scipy.constants.calorie) and
of the mole (N_A entities exactly): kcal/mol = 4184 J / N_A and
kJ/mol = 1000 J / N_A per particle, cm-1 = h c x 100 m^-1.
"""
from __future__ import annotations

import copy

import numpy as np
import pytest
import scipy.constants as sc

from conftest import run_table
from wavesweep.errors import JobError
from wavesweep.job import job_from_dict
from wavesweep.units import UnitSet, decimal_multiple, quantity_to_atomic, unit_factor

PC = sc.physical_constants
HARTREE_J = PC["Hartree energy"][0]


# -- chemists' units ------------------------------------------------------------------------
@pytest.mark.parametrize(("unit", "joules"), [
    ("kcal/mol", 1e3 * sc.calorie / sc.N_A),   # 4184 J / N_A (thermochemical calorie, SI mole)
    ("kJ/mol", 1e3 / sc.N_A),
    ("kcal mol-1", 1e3 * sc.calorie / sc.N_A),   # as a result's units attribute writes it
])
def test_molar_energies_are_per_particle(unit, joules):
    assert unit_factor(unit, "energy") == pytest.approx(joules / HARTREE_J, rel=1e-12)


@pytest.mark.parametrize("unit", ["cm-1", "1/cm", "cm^-1", "invcm"])
def test_a_wavenumber_is_h_c_over_lambda(unit):
    # CODATA's inverse meter-hartree relationship is h c x 1 m^-1 in hartree
    assert unit_factor(unit, "energy") == pytest.approx(PC["inverse meter-hartree relationship"][0] * 100.0,
                                                        rel=1e-12)
    assert unit_factor(unit, "energy") == pytest.approx(sc.h * sc.c * 100.0 / HARTREE_J, rel=1e-12)


def test_chemists_units_in_a_job():
    """[units] energy = "kcal/mol": the labels read back to the same
    factors; a string in cm-1 and an energy per length in kcal/mol/angstrom
    convert by the same factors."""
    u = UnitSet.from_table({"length": "angstrom", "energy": "kcal/mol", "mass": "Da"})
    for kind in ("energy", "energy_per_length", "electric_field"):
        assert unit_factor(u.unit_label(kind), kind) == pytest.approx(u.factor(kind), rel=1e-14), kind
    assert u.factor("time") == pytest.approx(1.0 / u.factor("energy"), rel=1e-14)   # hbar / energy
    assert "hbar/(kcal/mol)" in u.describe()   # the whole molar energy under hbar
    assert quantity_to_atomic("350 cm-1", "energy") == pytest.approx(
        350 * 100.0 * PC["inverse meter-hartree relationship"][0], rel=1e-12)
    assert quantity_to_atomic("2 kcal/mol/angstrom", "energy_per_length") == pytest.approx(
        2 * 4184.0 / sc.N_A / HARTREE_J * PC["Bohr radius"][0] / 1e-10, rel=1e-12)
    with pytest.raises(JobError, match="wavenumber"):   # an angular wavenumber is not the custom
        quantity_to_atomic("3 rad/cm", "energy", "potential.0.height")


# -- messages --------------------------------------------------------------------------------
JOB = {
    "title": "times",
    "units": {"length": "angstrom", "energy": "eV", "time": "fs", "mass": "Da"},
    "particle": {"mass": 1.0},
    "grid": {"x": {"min": -4.0, "max": 4.0, "points": 64}},
    "potential": [{"kind": "harmonic", "omega": 10.0}],
    "packet": {"kind": "gaussian", "center": 0.3, "width": 0.3},
    "evolve": {"dt": 0.025, "duration": 30.0},
    "record": {"every": 0.5, "snapshot_every": 2.0},
}


def _error(**patch):
    table = copy.deepcopy(JOB)
    for key, value in patch.items():
        table[key] = {**table[key], **value}
    with pytest.raises(JobError) as err:
        job_from_dict(table)
    return err.value


def test_a_no_unit_message_reads_as_english():
    table = copy.deepcopy(JOB)
    table["packet"]["center"] = "0.3"
    with pytest.raises(JobError) as err:
        job_from_dict(table)
    assert "with a length unit" in str(err.value)
    with pytest.raises(JobError) as err:
        quantity_to_atomic("3", "energy", "potential.0.height")
    assert "with an energy unit" in str(err.value)


def test_suggested_values_are_distinct_and_given():
    # record.every below one step: one value, not "use 40 or 40"
    err = _error(evolve={"dt": 40.0, "duration": 400.0}, record={"every": 10.0, "snapshot_every": 40.0})
    assert err.field == "record.every" and str(err).endswith("use 40")
    # snapshot_every not a multiple of record.every: the multiples either side
    err = _error(record={"snapshot_every": 2.25})
    assert err.field == "record.snapshot_every" and str(err).endswith("got 2.25; use 2 or 2.5")
    err = _error(evolve={"duration": 30.1})
    assert err.field == "evolve.duration" and str(err).endswith("got 30.1; use 30 or 30.5")


# -- times -----------------------------------------------------------------------------------
def test_decimal_multiples():
    assert 3 * 0.1 != 0.3 and decimal_multiple(3, 0.1) == 0.3   # the float product is 0.30000000000000004
    assert decimal_multiple(1200, 0.025) == 30.0 and decimal_multiple(7, 1e-3) == 0.007


def test_time_coordinates_are_the_written_multiples(tmp_path):
    """dt = 0.025 fs: sample i is at i x 0.5 fs exactly (30.0, not the
    30.000000000000004 of steps x dt in atomic units over the fs), so
    ds.sel(time=30.0) finds the last one."""
    ds = run_table(JOB, tmp_path)
    np.testing.assert_array_equal(ds.time.values, [decimal_multiple(i, 0.5) for i in range(61)])
    np.testing.assert_array_equal(ds.snapshot_time.values, [decimal_multiple(i, 2.0) for i in range(16)])
    assert float(ds.norm.sel(time=30.0)) == pytest.approx(1.0, abs=1e-12)
    assert float(ds.x_mean.sel(time=12.5)) == float(ds.x_mean[25])
