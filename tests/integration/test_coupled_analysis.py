"""`arrivals` and `transmission` on a result of coupled surfaces (issue 16,
item 3): per surface and detector, read from the run's file.

Sources: conservation of probability across a detector (the continuity
equation: what crossed it is what lies beyond it at the end, summed over
the surfaces always, per surface where the coupling has vanished there);
the single-surface time-energy method per final surface
(wavesweep.analysis.transmission.surface_transmission, itself checked in
test_surface_transmission.py) applied to the file's own arrays; and the
independent coupled-channel reference of tests/coupled_reference.py
(Johnson's log-derivative propagation, J. Comput. Phys. 13, 445 (1973),
Richardson-extrapolated) for T per final surface of the avoided crossing.
"""
from __future__ import annotations

import copy
import json

import numpy as np
import pytest
import xarray as xr

import coupled_reference as cr
from test_coupled_setup import LZ_JOB, V12
from wavesweep.analysis.arrivals import arrival_times
from wavesweep.analysis.transmission import incident_wave_numbers, surface_transmission, transmission
from wavesweep.cli import main
from wavesweep.errors import JobError
from wavesweep.job import job_from_dict
from wavesweep.run import Simulation
from wavesweep.setup import CoupledSetup, resolve_job

# The Landau-Zener crossing of test_coupled_setup with its coupling confined near the crossing
# (exp(-(x/10)^2): 1e-11 of V12 at the detector, so each surface's probability is conserved
# beyond it; with a coupling there, the two populated surfaces exchange ~ V12(x_d) / |V_A - V_B|
# of probability: measured 1e-4 with exp(-(x/20)^2)), run until the whole packet has passed the detector at x = 50 bohr, on a grid long
# enough that the part on B (accelerated down its slope) does not come round it.
CROSSING_JOB = {
    **copy.deepcopy(LZ_JOB),
    "grid": {"x": {"min": -200.0, "max": 312.0, "points": 2560}},
    "coupling": [{"surfaces": ["A", "B"],
                  "potential": [{"kind": "expression", "expression": f"{V12} * exp(-(x / 10)**2)"}]}],
    "evolve": {"dt": 0.02, "duration": 64.0, "scheme": "order4"},
    "record": {"every": 0.32, "snapshot_every": 64.0},
    "detector": [{"name": "after", "x": 50.0}, {"name": "behind", "x": -170.0}],
}

# The avoided crossing of tests/coupled_reference.py as a job (mass 2000, bohr, hartree), the
# packet and detector of test_surface_transmission.py: T per final surface from the run's file.
AVOIDED_JOB = {
    "title": "avoided crossing",
    "particle": {"mass": 2000.0},
    "grid": {"x": {"min": -51.2, "max": 51.2, "points": 1024}},
    "surface": [{"name": "A", "potential": [{"kind": "expression", "expression": "0.01 * tanh(x)"}]},
                {"name": "B", "potential": [{"kind": "expression", "expression": "-0.01 * tanh(x)"}]}],
    "coupling": [{"surfaces": ["A", "B"], "potential": [{"kind": "expression", "expression": "0.005 * exp(-x**2)"}]}],
    "packet": {"kind": "gaussian", "center": -15.0, "width": 1.0 / (2 * 0.66), "momentum": 13.0, "surface": "A"},
    "evolve": {"dt": 5.0, "duration": 12000.0, "scheme": "order4"},
    "record": {"every": 20.0, "snapshot_every": 12000.0},
    "detector": [{"name": "beyond", "x": 13.0}],
    # a tuned CAP takes what has passed the detector: on the periodic grid it would come round to the
    # detector again, which T(E)'s uncertainty counts as still to come (as on one surface)
    "absorber": {"kind": "cap", "thickness": 10.0},
}


def _run(table, tmp_path):
    return Simulation(resolve_job(job_from_dict(copy.deepcopy(table)))).run(tmp_path, progress=False)


@pytest.fixture(scope="module")
def crossing_run(tmp_path_factory):
    return _run(CROSSING_JOB, tmp_path_factory.mktemp("crossing"))


def test_arrivals_per_surface_add_up_to_what_crossed(crossing_run):
    """Each surface's arrival probability at a detector beyond the crossing
    is that surface's final population beyond it; summed over the surfaces
    it is what crossed in all (1 minus what is left before the detector).
    Measured: per surface within 2e-9 of the final populations."""
    dists = arrival_times(crossing_run, surfaces=True)
    after = dists["after"]
    assert set(after) == {"A", "B"} and all(d.definition == "flux" for d in after.values())
    totals = transmission(crossing_run)["totals"]
    with xr.open_dataset(crossing_run) as ds:
        final = ds["norm"].isel(time=-1)
        x = ds["x"].values
        psi = ds["psi_real"].values + 1j * ds["psi_imag"].values
    left = float(np.sum(np.abs(psi[:, x < 50.0]) ** 2) * (x[1] - x[0]))
    assert left < 1e-8                                   # the whole packet has passed the detector
    for s in ("A", "B"):
        p = after[s].stats["probability"]
        assert p == pytest.approx(float(final.sel(surface=s)), abs=1e-6)
        assert p == pytest.approx(totals["detectors"]["after"]["surfaces"][s]["beyond"], abs=1e-6)
        assert not after[s].stats["truncated"] and np.isfinite(after[s].stats["mean"])
        assert np.isnan(after[s].stats["classical_mean"]) and np.isnan(after[s].stats["still_to_come"])
    assert sum(d.stats["probability"] for d in after.values()) == pytest.approx(1.0 - left, abs=1e-6)
    # not a physics check (the coupling here is local, so Landau-Zener does not apply): only that both
    # surfaces carry probability, so the per-surface sums above are tested on two populated surfaces
    assert 0.1 < after["A"].stats["probability"] < 0.9
    # B starts below A beyond the crossing (V_B = -F x / 2): its part arrives sooner
    assert after["B"].stats["mean"] < after["A"].stats["mean"]
    # nothing reaches the detector behind the packet, on any surface
    assert all(np.isnan(d.stats["mean"]) for d in dists["behind"].values())


def test_arrivals_command_on_coupled_surfaces(crossing_run, tmp_path, capsys):
    """The CLI contract: one JSON object with the statistics per detector and
    surface, one table row per (detector, surface), a figure with one curve
    per surface."""
    assert main(["arrivals", str(crossing_run), "--json"]) == 0
    body = json.loads(capsys.readouterr().out)
    assert body["surfaces"] == ["A", "B"]
    assert set(body["detectors"]["after"]["surfaces"]) == {"A", "B"}
    assert body["detectors"]["after"]["surfaces"]["A"]["classical_mean"] is None
    figure = tmp_path / "arrivals.png"
    assert main(["arrivals", str(crossing_run), "--plot", str(figure)]) == 0
    out, err = capsys.readouterr()
    rows = [line for line in out.splitlines() if line.startswith(("after", "behind"))]
    assert len(rows) == 4 and figure.stat().st_size > 0
    assert "classical estimate" in err


def test_transmission_per_surface_from_the_run_file(tmp_path):
    """T_s(E) of `transmission` on a coupled run's file is surface_transmission
    on that file's psi_s(x_d, t) with the incident momentum density of the
    job's initial packet (to rounding), and within 1e-3 of the coupled-channel
    reference where the packet has weight (measured: 3.5e-5 on A, 1.7e-6 on
    B, as the in-memory propagation gives).  The totals: all of the packet
    crossed the detector, split between the surfaces."""
    path = _run(AVOIDED_JOB, tmp_path)
    out = transmission(path)
    er = out["energy_resolved"]
    assert "reason" not in er, er.get("reason")
    assert er["detector"] == "beyond" and er["incident_surface"] == "A"
    # flat, uncoupled at start and detector: what is said is only how far T_s(E) can be trusted (the
    # slowest energies, below 1 % of the peak weight's neighbourhood, still arriving: measured 3e-4, 8e-4)
    assert all(w.startswith(("surface A: the run ended", "surface B: the run ended")) for w in out["warnings"]), \
        out["warnings"]
    assert max(er["largest_uncertainty"].values()) < 1e-3
    setup = CoupledSetup(job_from_dict(copy.deepcopy(AVOIDED_JOB)))
    x = setup.grid.axes[0].coordinates
    with xr.open_dataset(path) as ds:
        t = ds["time"].values
        samples = (ds["detector_psi_real"].values[:, :, 0] + 1j * ds["detector_psi_imag"].values[:, :, 0]).T
    k, density = incident_wave_numbers(setup.psi0[0], x, +1)
    model = lambda x: cr.avoided_crossing_model(x)[1]   # noqa: E731 (as in test_surface_transmission)
    v_in = float(model(np.array([-15.0]))[0, 0, 0])
    v_final = np.diag(model(np.array([13.0]))[:, :, 0]).copy()
    energy, expected = surface_transmission(t, samples, k, density, 2000.0, v_in, v_final)
    np.testing.assert_allclose(er["energy"], energy, rtol=1e-12, atol=0)
    np.testing.assert_allclose(np.stack([er["T"]["A"], er["T"]["B"]]), expected, rtol=0, atol=1e-10)
    reference, _, error = cr.richardson_transmission(model, -12.0, 12.0, 1201, 2000.0, energy, incident=0)
    assert error.max() < 1e-5
    np.testing.assert_allclose(expected, reference.T, rtol=0, atol=1e-3)
    # the totals: everything crossed the detector (the reflection is ~1e-17), split between the
    # surfaces; less is beyond it at the end on each (the fast part has come round the periodic grid
    # to its other side, short of the detector)
    crossed = {s: d["crossed"] for s, d in out["totals"]["detectors"]["beyond"]["surfaces"].items()}
    assert sum(crossed.values()) == pytest.approx(1.0, abs=1e-6) and min(crossed.values()) > 0.05
    assert all(d["beyond"] <= d["crossed"] + 1e-9 for d in out["totals"]["detectors"]["beyond"]["surfaces"].values())


def test_transmission_command_on_coupled_surfaces(crossing_run, capsys):
    """The CLI contract on the crossing run: totals per surface, and no T(E)
    where the method's premises fail (linear surfaces are not flat where the
    packet starts), the reason instead."""
    assert main(["transmission", str(crossing_run), "--json"]) == 0
    captured = capsys.readouterr()
    body = json.loads(captured.out)
    assert body["surfaces"] == ["A", "B"] and body["T"] == {}
    assert "not flat" in body["reason"]
    assert set(body["totals"]["detectors"]["after"]["surfaces"]) == {"A", "B"}


def test_other_commands_still_refuse_a_coupled_result(crossing_run):
    """Only arrivals and transmission read coupled surfaces; the library's
    arrival_times without ``surfaces`` refuses them as before."""
    with pytest.raises(JobError) as e:
        arrival_times(crossing_run)
    assert "coupled surfaces" in e.value.message


def test_a_detector_in_an_absorbing_layer_times_the_absorption_on_each_surface(tmp_path):
    """A detector inside the x+ layer: each surface's times are those of its
    absorption there, and its probability is what the layer took from that
    surface by the end (the absorbed record itself, the layer's set-up
    rebuilt from the stored job)."""
    from test_coupled_runs import ABSORBED_JOB   # lazy: only this test runs the absorbing job

    table = {**copy.deepcopy(ABSORBED_JOB), "detector": [{"name": "layer", "x": 50.0}, {"name": "open", "x": 30.0}]}
    path = _run(table, tmp_path)
    dists = arrival_times(path, surfaces=True)
    with xr.open_dataset(path) as ds:
        taken = ds["absorbed"].sel(boundary="x+").isel(time=-1)
        for s in ("A", "B"):
            d = dists["layer"][s]
            assert d.definition == "absorption"
            assert d.stats["probability"] == pytest.approx(float(taken.sel(surface=s)), abs=1e-9)
            assert float(taken.sel(surface=s)) > 1e-3
            assert dists["open"][s].definition in ("flux", "positive flux")


def test_a_detector_where_the_surfaces_are_still_coupled_is_said(tmp_path):
    """With the Landau-Zener job's constant coupling V12 = 0.2 and the
    diabatic gap dF x = 5 at x = 100, the mixing ratio there is 0.04 (by
    hand): the per-surface split beyond it is uncertain by ~ its square."""
    import copy

    from test_coupled_setup import LZ_JOB
    from wavesweep.analysis.arrivals import arrival_times
    from wavesweep.job import job_from_dict
    from wavesweep.run import Simulation

    table = copy.deepcopy(LZ_JOB)
    table["detector"] = [{"name": "far", "x": 100.0}]
    table["evolve"]["duration"] = 4.8
    table["record"] = {"every": 0.48, "snapshot_every": 4.8}
    path = Simulation(job_from_dict(table)).run(tmp_path, progress=False)
    said = [w for w in arrival_times(path, surfaces=True)["far"]["A"].warnings if "still coupled" in w]
    assert len(said) == 1 and "= 0.04" in said[0]
