"""Every recorded number is in the units its variable declares.

The same physics run in atomic units and again with the length unit nm,
or the time unit fs (every quantity of the job given with its own unit,
so the runs are one computation): each variable of the other run is the
atomic run's times u^-q, u the unit in atomic units and q its power in the
variable's ``units`` attribute (CF convention: the file's own
declaration).  Reference: the units' sizes from CODATA
(scipy.constants); invariance of the physics under a change of units.  A
user trial found dpsi/dx recorded off by (nm/bohr)^2, which this check
catches for every variable at once, including ones added later.
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
T_FS = 1e-15 / sc.physical_constants["atomic unit of time"][0]   # 1 fs in atomic units of time
# the other run's [units] table, the unit's symbol in the labels, its size in atomic units
VARIANTS = {"nm": ({"length": "nm", "energy": "hartree"}, "nm", L_NM),
            "fs": ({"length": "bohr", "time": "fs"}, "fs", T_FS)}

LINE_1D = {
    "title": "units audit, 1D",
    "units": {"length": "bohr", "energy": "hartree"},
    "grid": {"x": {"min": "-64.0 bohr", "max": "40.0 bohr", "points": 320}, "boundary": "periodic"},
    "potential": [{"kind": "gaussian", "height": "0.3 hartree", "width": "2.0 bohr", "center": "0.0 bohr"}],
    "packet": {"kind": "gaussian", "center": "-16.0 bohr", "width": "4.0 bohr", "energy": "1.5 hartree"},
    "evolve": {"dt": "0.02 au_time", "duration": "12.0 au_time"},
    "absorber": {"kind": "cap", "thickness": "12.0 bohr"},
    "record": {"every": "0.2 au_time", "snapshot_every": "4.0 au_time", "snapshot_psi": True},
    "detector": [{"name": "d", "x": "10.0 bohr"}, {"name": "back", "x": "-30.0 bohr"}],
}

PLANE_2D = {
    "title": "units audit, 2D",
    "units": {"length": "bohr", "energy": "hartree"},
    "grid": {"x": {"min": "-30.0 bohr", "max": "40.0 bohr", "points": 128},
             "y": {"min": "-20.0 bohr", "max": "20.0 bohr", "points": 48}, "boundary": "periodic"},
    "packet": {"kind": "gaussian", "center": ["-10.0 bohr", "1.0 bohr"], "width": ["2.0 bohr", "2.0 bohr"],
               "momentum": ["2.8 m_e bohr/au_time", "0.0 m_e bohr/au_time"]},
    "evolve": {"dt": "0.02 au_time", "duration": "6.0 au_time"},
    "absorber": {"kind": "cap", "thickness": "8.0 bohr"},
    "record": {"every": "0.1 au_time", "snapshot_every": "3.0 au_time"},
    "detector": [{"name": "line", "x": "5.0 bohr", "spectrum": True, "resolved": True}],
}


def _power(units: str, symbol: str) -> float:
    """The power of ``symbol`` in a units label ("nm-1.5": -1.5; "m_e nm fs-1": nm 1, fs -1; none: 0)."""
    found = re.findall(rf"(?<![\w/]){symbol}(-?\d+(?:\.\d+)?)?(?![\w/])", units)
    return float(sum(float(p) if p else 1.0 for p in found))


def _both(table, variant, tmp_path):
    atomic = Simulation(make_job(copy.deepcopy(table))).run(tmp_path / "atomic", progress=False)
    other_table = copy.deepcopy(table)
    other_table["units"] = dict(VARIANTS[variant][0])
    other = Simulation(make_job(other_table)).run(tmp_path / variant, progress=False)
    return atomic, other


@pytest.mark.parametrize("table, variant", [(LINE_1D, "nm"), (LINE_1D, "fs"), (PLANE_2D, "nm")],
                         ids=["1d-nm", "1d-fs", "2d-line-nm"])
def test_every_variable_is_in_the_units_it_declares(table, variant, tmp_path):
    atomic_path, other_path = _both(table, variant, tmp_path)
    _, symbol, size = VARIANTS[variant]
    checked = []
    with xr.open_dataset(atomic_path) as atomic, xr.open_dataset(other_path) as other:
        assert set(other.variables) == set(atomic.variables)
        for name in other.variables:
            a, b = np.asarray(other[name].values), np.asarray(atomic[name].values)
            if a.dtype.kind not in "fc" or a.shape != b.shape:
                continue
            scale = np.nanmax(np.abs(b)) if b.size else 0.0
            if not scale > 0:
                continue
            label = str(other[name].attrs.get("units", "1"))
            want = b * size ** (-_power(label, symbol))
            # float32 frames hold 1.2e-7; what FFT rounding puts near zero is compared absolutely
            rtol = 2e-6 if a.dtype == np.float32 else 1e-9
            np.testing.assert_allclose(a, want, rtol=rtol, atol=1e-9 * np.nanmax(np.abs(want)),
                                       err_msg=f"{name} ({label})")
            checked.append(name)
    # the variables this audit exists for are among those checked
    expected = {"detector_dpsi_real", "psi_real", "x_mean", "p_mean", "flux", "density", "energy"} \
        if "y" not in table["grid"] else {"spectrum_dpsi_real", "spectrum_psi_real", "screen_flux", "flux", "density"}
    assert expected <= set(checked), expected - set(checked)


@pytest.mark.parametrize("command", ["arrivals", "transmission"])
def test_analysis_in_nm_gives_the_atomic_runs_numbers(command, tmp_path, capsys):
    """Times and energies are in the same units in both runs (the nm run
    keeps hartree and atomic time), and these commands give no lengths: every
    number of their JSON is the atomic run's (the same check, one level up,
    that the recorded variables pass above)."""
    import json

    from wavesweep.cli import main
    atomic_path, nm_path = _both(LINE_1D, "nm", tmp_path)
    outputs = []
    for path in (atomic_path, nm_path):
        assert main([command, str(path), "--json"]) == 0
        outputs.append(json.loads(capsys.readouterr().out))

    def numbers(node, at=""):
        if isinstance(node, dict):
            for k, v in node.items():
                yield from numbers(v, f"{at}.{k}")
        elif isinstance(node, list):
            for i, v in enumerate(node):
                yield from numbers(v, f"{at}[{i}]")
        elif isinstance(node, (int, float)) and not isinstance(node, bool):
            yield at, float(node)
    atomic, nm = dict(numbers(outputs[0])), dict(numbers(outputs[1]))
    assert atomic.keys() == nm.keys() and len(atomic) > 5
    for key, value in atomic.items():
        assert nm[key] == pytest.approx(value, rel=1e-7, abs=1e-12), key
