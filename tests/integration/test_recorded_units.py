"""Every recorded number is in the units its variable declares.

The same physics run twice, once with the length unit bohr and once with
nm (every length of the job given in bohr, so the two runs are one
computation): each variable of the nm file is the bohr file's times
(1 nm in bohr)^-q, q the power of nm in its ``units`` attribute (CF
convention: the file's own declaration).  Reference: the nm/bohr ratio
from CODATA (scipy.constants); invariance of the physics under a change
of units.  A user trial found dpsi/dx recorded off by (nm/bohr)^2, which
this check catches for every variable at once, including ones added later.
"""
from __future__ import annotations

import copy
import re

import numpy as np
import pytest
import scipy.constants as sc
import xarray as xr

from conftest import make_job
from wavesweep.run import Simulation

L_NM = 1e-9 / sc.physical_constants["Bohr radius"][0]   # 1 nm in bohr

LINE_1D = {
    "title": "units audit, 1D",
    "units": {"length": "bohr", "energy": "hartree"},
    "grid": {"x": {"min": "-64.0 bohr", "max": "40.0 bohr", "points": 320}, "boundary": "periodic"},
    "potential": [{"kind": "gaussian", "height": 0.3, "width": "2.0 bohr", "center": "0.0 bohr"}],
    "packet": {"kind": "gaussian", "center": "-16.0 bohr", "width": "4.0 bohr", "energy": 1.5},
    "evolve": {"dt": 0.02, "duration": 12.0},
    "absorber": {"kind": "cap", "thickness": "12.0 bohr"},
    "record": {"every": 0.2, "snapshot_every": 4.0, "snapshot_psi": True},
    "detector": [{"name": "d", "x": "10.0 bohr"}, {"name": "back", "x": "-30.0 bohr"}],
}

PLANE_2D = {
    "title": "units audit, 2D",
    "units": {"length": "bohr", "energy": "hartree"},
    "grid": {"x": {"min": "-30.0 bohr", "max": "40.0 bohr", "points": 128},
             "y": {"min": "-20.0 bohr", "max": "20.0 bohr", "points": 48}, "boundary": "periodic"},
    "packet": {"kind": "gaussian", "center": ["-10.0 bohr", "1.0 bohr"], "width": ["2.0 bohr", "2.0 bohr"],
               "momentum": ["2.8 m_e bohr/au_time", "0.0 m_e bohr/au_time"]},
    "evolve": {"dt": 0.02, "duration": 6.0},
    "absorber": {"kind": "cap", "thickness": "8.0 bohr"},
    "record": {"every": 0.1, "snapshot_every": 3.0},
    "detector": [{"name": "line", "x": "5.0 bohr", "spectrum": True, "resolved": True}],
}


def _nm_power(units: str) -> float:
    """The power of nm in a units string ("nm-1.5", "m_e nm (hbar/hartree)-1": 1; none: 0)."""
    found = re.findall(r"\bnm(-?\d+(?:\.\d+)?)?\b", units)
    return float(sum(float(p) if p else 1.0 for p in found))


def _both(table, tmp_path):
    bohr = Simulation(make_job(copy.deepcopy(table))).run(tmp_path / "bohr", progress=False)
    nm_table = copy.deepcopy(table)
    nm_table["units"]["length"] = "nm"
    nm = Simulation(make_job(nm_table)).run(tmp_path / "nm", progress=False)
    return bohr, nm


@pytest.mark.parametrize("table", [LINE_1D, PLANE_2D], ids=["1d", "2d-line"])
def test_every_variable_is_in_the_units_it_declares(table, tmp_path):
    bohr_path, nm_path = _both(table, tmp_path)
    checked = []
    with xr.open_dataset(bohr_path) as bohr, xr.open_dataset(nm_path) as nm:
        assert set(nm.variables) == set(bohr.variables)
        for name in nm.variables:
            a, b = np.asarray(nm[name].values), np.asarray(bohr[name].values)
            if a.dtype.kind not in "fc" or a.shape != b.shape:
                continue
            scale = np.nanmax(np.abs(b)) if b.size else 0.0
            if not scale > 0:
                continue
            q = _nm_power(str(nm[name].attrs.get("units", "1")))
            want = b * L_NM ** (-q)
            # float32 frames hold 1.2e-7; what FFT rounding puts near zero is compared absolutely
            rtol = 2e-6 if a.dtype == np.float32 else 1e-9
            np.testing.assert_allclose(a, want, rtol=rtol, atol=1e-9 * np.nanmax(np.abs(want)),
                                       err_msg=f"{name} ({nm[name].attrs.get('units')})")
            checked.append(name)
    # the variables this audit exists for are among those checked
    expected = {"detector_dpsi_real", "psi_real", "x_mean", "p_mean", "flux", "density"} if "y" not in table["grid"] \
        else {"spectrum_dpsi_real", "spectrum_psi_real", "screen_flux", "flux", "density"}
    assert expected <= set(checked), expected - set(checked)
