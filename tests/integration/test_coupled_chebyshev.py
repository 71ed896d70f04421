"""The Chebyshev expansion on coupled surfaces (issue 16, item 2:
"Chebyshev for time-independent couplings if you can do it exactly;
refuse clearly otherwise").

Sources: scipy.linalg.expm of the full (S N) x (S N) matrix Hamiltonian
built here with numpy (T from the plane waves of a periodic axis, or the
sine basis of a box axis, on every surface; V_ab(x_j) on the diagonals of
the blocks), the mask applied after each step as the scheme documents;
the coupled split-operator of fourth order converging to it as dt -> 0
(its error falls by 2^4 per halving; Yoshida 1990); conservation of
norm plus absorbed over every surface and face.
"""
from __future__ import annotations

import copy
import math

import numpy as np
import pytest
import scipy.linalg
import tomli_w
import xarray as xr

from test_coupled_setup import LZ_JOB
from wavesweep.check import check_job
from wavesweep.cli import main
from wavesweep.errors import JobError
from wavesweep.job import job_from_dict
from wavesweep.run import Simulation
from wavesweep.setup import CoupledSetup

SMALL = {
    **copy.deepcopy(LZ_JOB),
    "grid": {"x": {"min": -20.0, "max": 20.0, "points": 64}},
    "surface": [{"name": "A", "potential": [{"kind": "expression", "expression": "0.002 * x**2"}]},
                {"name": "B", "potential": [{"kind": "expression", "expression": "0.3 - 0.01 * x"}]}],
    "coupling": [{"surfaces": ["A", "B"], "potential": [{"kind": "expression", "expression": "0.1 * exp(-x**2 / 8)"}]}],
    "packet": {"kind": "gaussian", "center": -3.0, "width": 2.0, "momentum": 1.0, "surface": "A"},
    "evolve": {"dt": 0.5, "duration": 5.0, "scheme": "chebyshev"},
    "record": {"every": 0.5, "snapshot_every": 5.0},
}


def _kinetic_matrix(axis, mass):
    """T on one axis in the grid's basis (numpy): plane waves exp(i k x_j)
    of a periodic axis, k = 2 pi fftfreq(N, dx); the sine basis
    sqrt(2/(N+1)) sin(pi j n/(N+1)) of a box axis, k_n = n pi / L."""
    n = axis.points
    if axis.boundary == "periodic":
        basis = np.exp(2j * np.pi * np.outer(np.arange(n), np.arange(n)) / n) / math.sqrt(n)   # column m: k_m
        kn = 2 * np.pi * np.fft.fftfreq(n, axis.dx)
    else:
        j = np.arange(1, n + 1)
        basis = math.sqrt(2 / (n + 1)) * np.sin(np.pi * np.outer(j, j) / (n + 1))
        kn = np.pi * j / axis.length
    return basis @ np.diag(kn**2 / (2 * mass)) @ basis.conj().T


def _matrix_hamiltonian(setup):
    n = setup.grid.size
    t = _kinetic_matrix(setup.grid.axes[0], setup.mass)
    v = setup.hamiltonian.matrix(None)
    s = v.shape[0]
    h = np.zeros((s * n, s * n), complex)
    for a in range(s):
        h[a * n:(a + 1) * n, a * n:(a + 1) * n] += t
        for b in range(s):
            h[a * n:(a + 1) * n, b * n:(b + 1) * n] += np.diag(v[a, b])
    return h


@pytest.mark.parametrize("case", ["periodic, two surfaces", "box, three surfaces, mask"])
def test_the_expansion_is_the_matrix_exponential(case):
    """psi(t) against scipy.linalg.expm(-i H dt) of the full matrix
    Hamiltonian, step by step (with the mask exp(-W dt) after each step on
    every surface), to 1e-10; the books of the mask close the norm."""
    table = copy.deepcopy(SMALL)
    if case.startswith("box"):
        table["grid"]["x"]["boundary"] = "box"
        table["surface"].append({"name": "C", "potential": [{"kind": "expression", "expression": "0.2 + 0 * x"}]})
        table["coupling"].append({"surfaces": ["B", "C"],
                                  "potential": [{"kind": "expression", "expression": "0.05 * cos(x / 4)"}]})
        table["packet"]["momentum"] = 2.5
        table["absorber"] = {"kind": "mask", "thickness": 5.0}
    s = CoupledSetup(job_from_dict(table))
    prop = s.make_propagator()
    assert type(prop).__name__ == "CoupledChebyshev"
    u = scipy.linalg.expm(-1j * _matrix_hamiltonian(s) * s.dt)
    if s.absorber.active:
        u = np.tile(np.exp(-s.absorber.rate * s.dt), len(s.surfaces))[:, None] * u
    psi, ref = prop.load(s.psi0), s.psi0.reshape(-1)
    for _ in range(s.total_steps // 2):
        psi = prop.step(psi, 2)
        ref = u @ (u @ ref)
        np.testing.assert_allclose(psi.reshape(-1), ref, rtol=0, atol=1e-10)
    norm = np.sum(np.abs(psi) ** 2, axis=1) * s.grid.cell_volume
    assert norm[1] > 1e-3                               # the coupling was at work
    if s.absorber.active:
        assert prop.absorbed.sum() > 1e-4 and prop.absorbed.shape == (3, 2)
    assert norm.sum() + prop.absorbed.sum() == pytest.approx(1.0, abs=1e-10)


def test_the_split_operator_converges_to_it():
    """order4 at dt, dt/2, dt/4 on the crossing (256 points, 4 time units):
    its distance to the Chebyshev state falls about 16-fold per halving."""
    table = copy.deepcopy(SMALL)
    table["grid"] = {"x": {"min": -30.0, "max": 30.0, "points": 256}}
    table["evolve"] = {"dt": 0.4, "duration": 4.0, "scheme": "chebyshev"}
    table["record"] = {"every": 0.4, "snapshot_every": 4.0}
    s = CoupledSetup(job_from_dict(table))
    prop = s.make_propagator()
    exact = prop.step(prop.load(s.psi0), s.total_steps)
    errors = []
    for dt in (0.1, 0.05, 0.025):
        table["evolve"] = {"dt": dt, "duration": 4.0, "scheme": "order4"}
        so = CoupledSetup(job_from_dict(table))
        p = so.make_propagator()
        errors.append(np.abs(p.step(p.load(so.psi0), so.total_steps) - exact).max())
    ratios = [errors[0] / errors[1], errors[1] / errors[2]]
    assert all(12 < r < 20 for r in ratios), (errors, ratios)
    assert errors[-1] < 1e-7


def test_a_chebyshev_run_writes_each_surface(tmp_path):
    """Through the run: the file's surfaces, and norm plus absorbed over
    every surface and face equal to 1 to 1e-10 at every sample.  ``check``
    does not hold dt against the expansion (4.4 rad of kinetic phase per
    step here: a split-operator run would be refused)."""
    table = copy.deepcopy(SMALL)
    table["packet"]["momentum"] = 2.5
    table["absorber"] = {"kind": "mask", "thickness": 5.0}
    step = next(f for f in check_job(job_from_dict(table), trial_seconds=0).findings if f.topic == "time step")
    assert step.level == "ok" and step.values["run_phase"] > math.pi and "exact" in step.message
    path = Simulation(job_from_dict(table)).run(tmp_path, progress=False)
    with xr.open_dataset(path) as ds:
        assert list(ds["surface"].values) == ["A", "B"]
        total = ds["norm"].sum("surface") + ds["absorbed"].sum(("surface", "boundary"))
        np.testing.assert_allclose(total, 1.0, rtol=0, atol=1e-10)
        assert float(ds["absorbed"][-1].sum()) > 1e-4 and float(ds["norm"][-1].sel(surface="B")) > 1e-3


@pytest.mark.parametrize("patch, field, words", [
    ({"coupling": [{"surfaces": ["A", "B"],
                    "potential": [{"kind": "expression", "expression": "0.1 * exp(-x**2 / 8) * cos(t)"}]}]},
     "evolve.scheme", "'strang'"),
    ({"absorber": {"kind": "cap", "thickness": 5.0, "strength": 1.0}}, "absorber.kind", "'mask'"),
    ({"evolve": {**SMALL["evolve"], "scheme": "crank_nicolson"}}, "evolve.scheme", "'chebyshev'"),
])
def test_what_the_expansion_cannot_do_is_refused(patch, field, words):
    """A V that changes in time and a CAP: one line naming the field and the fix."""
    with pytest.raises(JobError) as e:
        CoupledSetup(job_from_dict({**copy.deepcopy(SMALL), **copy.deepcopy(patch)}))
    assert e.value.field == field and words in e.value.message and "\n" not in e.value.message


def test_the_command_line_refuses_a_pulsed_coupling(tmp_path, capsys):
    table = copy.deepcopy(SMALL)
    table["coupling"][0]["potential"][0]["expression"] = "0.1 * exp(-x**2 / 8) * cos(t)"
    path = tmp_path / "pulsed.toml"
    path.write_text(tomli_w.dumps(table))
    assert main(["run", str(path), "-o", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "evolve.scheme" in err and "time-independent" in err, err
