"""Momentum spectra of what leaves through a detector by the surface-flux
method (issue 17, items 2 and 3; 1D).

Atomic units (hbar = m_e = 1).  References from outside the project
(tests/spectrum_reference.py, itself tested): the Gaussian's momentum
density (its Fourier transform), T(k) of a rectangular barrier by transfer
matrices (Tsu & Esaki 1973), and the part of a final state beyond a
detector projected on plane waves (direct quadrature); the Volkov
integrals against their closed forms for a constant-envelope carrier
(elementary integrals of cos).
"""
from __future__ import annotations

import copy
import json
import math

import numpy as np
import pytest
import xarray as xr

from conftest import make_job
from spectrum_reference import gaussian_momentum_density, plane_wave_spectrum, transfer_matrix_transmission
from wavesweep.analysis.surface_flux import spectrum, time_transform
from wavesweep.cli import main
from wavesweep.errors import JobError
from wavesweep.run import Simulation
from wavesweep.volkov import VolkovIntegrals

P0, SIGMA = 2.0, 4.0
# the packet starts 6.5 sigma before the detector and 9 sigma from the x-
# layer: what lies beyond the detector at t = 0, or in the layer, is below
# 1e-9 (a sharp cut of a part that is not would make b(k, 0) the error)
FREE = {
    "title": "free packet through a detector",
    "grid": {"x": {"min": -64.0, "max": 40.0, "points": 640}, "boundary": "periodic"},
    "packet": {"kind": "gaussian", "center": -16.0, "width": SIGMA, "momentum": P0},
    "evolve": {"dt": 0.01, "duration": 40.0, "scheme": "strang"},
    "absorber": {"kind": "cap", "thickness": 12.0},
    "record": {"every": 0.1, "snapshot_every": 40.0},
    "detector": [{"name": "d", "x": 10.0}],
}


def _run(table, folder):
    return Simulation(make_job(copy.deepcopy(table))).run(folder, progress=False)


@pytest.fixture(scope="module")
def free_run(tmp_path_factory):
    return _run(FREE, tmp_path_factory.mktemp("free"))


def test_a_free_packet_arrives_with_its_initial_momentum_distribution(free_run):
    """Through a detector the whole packet passes by the end (p down to
    P0 - 5.7 sigma_p arrives within the run): the spectrum is |phi(p)|^2,
    to 1e-6 of its peak (measured 3.7e-7)."""
    out = spectrum(free_run)
    d = out["detectors"][0]
    reference = gaussian_momentum_density(d["momentum"], P0, SIGMA)
    assert d["side"] == "+" and np.all(np.asarray(d["momentum"]) >= 0)
    assert np.max(np.abs(d["probability_density"] - reference)) < 1e-6 * reference.max()
    assert d["total"] == pytest.approx(1.0, abs=1e-6)
    # per energy: dP/dE = dP/dp m / p, the same probability
    p = np.asarray(d["momentum"])
    assert np.asarray(d["energy"]) == pytest.approx(p**2 / 2)
    assert np.asarray(d["energy_density"])[1:] == pytest.approx(np.asarray(d["probability_density"])[1:] / p[1:])
    assert out["warnings"] == []


def test_the_cli_prints_the_spectrum_as_json(free_run, capsys):
    assert main(["spectrum", str(free_run), "--json"]) == 0
    body = json.loads(capsys.readouterr().out)
    d = body["detectors"][0]
    assert {"momentum", "probability_density", "energy", "energy_density", "total", "still_to_come"} <= set(d)
    assert d["momentum_units"] == "m_e bohr au_time-1" and d["energy_units"] == "hartree"


def test_a_record_too_coarse_for_the_band_is_refused_with_the_sampling_that_would_do(tmp_path):
    """The trapezoid over samples dt_s apart is exact up to aliasing while
    what arrives lies in a band narrower than 2 pi / dt_s (module notes);
    here dt_s = 4 resolves energies up to pi / 4, far below what the packet
    holds: the aliased spectrum is still up there, refused with the sampling
    that would do, pi / E_max, E_max where the packet's momentum density
    (its Fourier transform, gaussian_momentum_density) falls to 1e-8 of its
    peak (the band floor), to 5 %."""
    table = copy.deepcopy(FREE)
    table["record"] = {"every": 4.0, "snapshot_every": 40.0}
    path = _run(table, tmp_path)
    with pytest.raises(JobError) as e:
        spectrum(path)
    assert e.value.field == "record.every"
    sigma_p = 1.0 / (2 * SIGMA)
    e_max = (P0 + sigma_p * math.sqrt(2 * math.log(1e8))) ** 2 / 2
    said = float(e.value.message.split("use record.every < ")[1].split()[0])
    assert said == pytest.approx(math.pi / e_max, rel=0.05)


def test_the_time_transform_is_exact_up_to_aliasing():
    """sum_n w_n f(t_n) exp(i E t_n) dt / 2 pi against the closed form of a
    Gaussian pulse f = exp(-(t - t0)^2 / (2 s^2) - i E0 t): exp(-(E - E0)^2
    s^2 / 2) s exp(i (E - E0) t0) / sqrt(2 pi) (the Fourier transform of a
    Gaussian).  Its band (|E - E0| where it is above 1e-16: 8.6 / s) is
    narrower than 2 pi / dt: exact to rounding."""
    s, t0, e0 = 3.0, 30.0, 1.3
    t = np.arange(0.0, 60.0 + 1e-9, 0.5)
    f = np.exp(-((t - t0) ** 2) / (2 * s**2) - 1j * e0 * t)
    energy = np.linspace(0.5, 2.1, 17)
    got = time_transform(t, f, np.outer(energy, t))
    exact = np.exp(-((energy - e0) ** 2) * s**2 / 2) * s * np.exp(1j * (energy - e0) * t0) / math.sqrt(2 * math.pi)
    assert np.max(np.abs(got - exact)) < 1e-12


def test_the_volkov_integrals_match_their_closed_forms():
    """F = F0 cos(w t): P = F0 sin(w t) / w, alpha = F0 (1 - cos w t) / (m w^2),
    S = int P^2 / 2m = F0^2 / (2 m w^2) (t / 2 - sin(2 w t) / (4 w)); fourth-order
    Runge-Kutta on steps of 0.05: the error is O(h^4), up to 1.5e-9 rad here."""
    f0, w, m = 0.05, 0.8, 1.0
    vi = VolkovIntegrals(lambda t: f0 * math.cos(w * t), m, 0.05)
    for t in (3.0, 17.3, 40.0, 5.0):     # the last asks for an earlier time: integrated again from 0
        p, alpha, phase = vi.at(t)
        assert p == pytest.approx(f0 * math.sin(w * t) / w, abs=1e-10)
        assert alpha == pytest.approx(f0 * (1 - math.cos(w * t)) / (m * w**2), abs=1e-9)
        assert phase == pytest.approx(f0**2 / (2 * m * w**2) * (t / 2 - math.sin(2 * w * t) / (4 * w)), abs=1e-8)


# The barrier of test_scattering: V0 = 1 hartree, a = 2 bohr, centred at dx / 2
# on a grid of dx = 1/16 bohr (the discrete barrier then spans exactly the
# nominal width; see there).  dt = 0.004 keeps the split step's sidebands E +
# 2 pi / dt beyond the grid's largest energy (at dt = 0.005 they are on it and
# the spectrum is 3 % off, measured); what remains is the grid's O(dx^2) error
# of a sharp step, 6.7e-4 of the peak here (measured).
BARRIER_DX = 1.0 / 16.0


def _barrier_job():
    lo, hi = -96.0, 56.0
    return {
        "title": "rectangular barrier spectrum",
        "grid": {"x": {"min": lo, "max": hi, "points": int(round((hi - lo) / BARRIER_DX))}, "boundary": "periodic"},
        "potential": [{"kind": "barrier", "height": 1.0, "width": 2.0, "center": BARRIER_DX / 2}],
        "packet": {"kind": "gaussian", "center": -32.0, "width": SIGMA, "momentum": 1.2},
        "evolve": {"dt": 0.004, "duration": 90.0, "scheme": "strang"},
        "absorber": {"kind": "cap", "thickness": 30.0},
        "record": {"every": 0.1, "snapshot_every": 90.0},
        "detector": [{"name": "after", "x": 10.0}],
    }


@pytest.mark.slow
def test_the_transmitted_spectrum_of_a_rectangular_barrier_is_t_times_the_incident(tmp_path):
    path = _run(_barrier_job(), tmp_path)
    out = spectrum(path)
    d = out["detectors"][0]
    k = np.asarray(d["momentum"])
    edges = [BARRIER_DX / 2 - 1.0, BARRIER_DX / 2 + 1.0]
    reference = gaussian_momentum_density(k, 1.2, SIGMA) * transfer_matrix_transmission(k, edges, [1.0], 1.0)
    assert np.max(np.abs(d["probability_density"] - reference)) < 1e-3 * reference.max()
    assert out["warnings"] == []


# A 1D atom: soft Coulomb (softening^2 = 2, ground state -0.5 hartree, from memory) cut off
# smoothly from |x| = 25 bohr (a bare 1/|x| tail would shift the asymptotic
# energies), ionised by a 5-cycle sin^2 pulse of omega = 1 hartree through the
# `field` kind (A(T) = 0 at its end).  The detectors sit midway between grid
# points, where the reference's sharp cut is a midpoint rule.
ATOM = {
    "title": "1D atom in a pulse",
    "grid": {"x": {"min": -200.0, "max": 200.0, "points": 1000}, "boundary": "periodic"},
    "particle": {"charge": -1.0},
    "potential": [{"kind": "expression", "expression": "-0.5 * (1 - tanh((abs(x) - 25) / 3)) / sqrt(x**2 + 2)"},
                  {"kind": "field", "amplitude": 0.05, "omega": 1.0, "envelope": "sin2",
                   "duration": 10 * math.pi}],
    "packet": {"kind": "ground_state"},
    "evolve": {"dt": 0.05, "duration": 60.0, "scheme": "strang"},
    "absorber": {"kind": "cap", "thickness": 20.0},
    "record": {"every": 0.1, "snapshot_every": 60.0},
    "detector": [{"name": "right", "x": 40.2}, {"name": "left", "x": -40.2}],
}


@pytest.mark.slow
def test_a_driven_atom_spectrum_is_the_final_state_beyond_each_detector(tmp_path):
    """b(k, T) = <chi_k(T)| Theta |psi(T)> is what the method integrates: at
    the end of the pulse chi_k(T) is a plane wave, so the spectrum through
    each detector is the final state beyond it projected on plane waves, to
    2 % where the spectrum is above 1e-3 of its peak (measured: 1.2 %).  The
    reference integrates the final state Fourier-interpolated 8 times finer
    (exact for the grid's band-limited psi): on the grid's own points the
    sharp cut at x_d misses (k dx)^2 / 24 at large k.  The slow electrons
    still arriving are a warning with the fraction to come, not a refusal."""
    path = _run(ATOM, tmp_path)
    out = spectrum(path)
    with xr.open_dataset(path) as ds:
        psi = ds.psi_real.values + 1j * ds.psi_imag.values
        x = ds.x.values
        assert abs(float(ds.field_momentum[-1])) < 1e-6     # A(T) = 0
    n, fine = len(x), 8
    c = np.fft.fft(psi)
    padded = np.zeros(n * fine, complex)
    padded[:n // 2], padded[-n // 2:] = c[:n // 2], c[-n // 2:]
    psi_fine = np.fft.ifft(padded) * fine
    x_fine = x[0] + np.arange(n * fine) * (x[1] - x[0]) / fine
    assert [d["detector"] for d in out["detectors"]] == ["right", "left"]
    for d, x_d, side in zip(out["detectors"], (40.2, -40.2), ("right", "left")):
        k = np.asarray(d["momentum"])
        reference = plane_wave_spectrum(psi_fine, x_fine, x_d, k, side)
        shown = reference > 1e-3 * reference.max()
        assert np.all(np.sign(k[k != 0]) == (1 if side == "right" else -1))
        assert np.max(np.abs(d["probability_density"] - reference)[shown] / reference[shown]) < 0.02
        # the photoelectron line at E = omega - I_p = 0.5 hartree (I_p = 0.5 from memory, as above)
        assert d["energy"][int(np.argmax(d["probability_density"]))] == pytest.approx(0.5, abs=0.05)
        assert d["still_to_come"] > 0
    assert any("still arriving" in w and "right" in w for w in out["warnings"])


def test_t_of_e_goes_through_the_same_transform_unchanged():
    """Item 3: transmission_from_samples calls time_transform; its psi~(E)
    is the trapezoid sum written out, as it was before (to 1e-12)."""
    from wavesweep.analysis.transmission import transmission_from_samples
    t = np.arange(0.0, 80.0 + 1e-9, 0.25)
    amp = np.exp(-((t - 30.0) ** 2) / 50.0 - 1.1j * t) * (1 + 0.1 * np.sin(0.3 * t))
    k = np.linspace(1.2, 1.8, 31)
    got = transmission_from_samples(t, amp, k, np.exp(-((k - 1.5) ** 2) / 0.02), 1.0, 0.0, 0.0)
    weights = np.full(len(t), 0.25)
    weights[0] = weights[-1] = 0.125
    written_out = (np.exp(1j * np.outer(k**2 / 2, t)) @ (amp * weights)) / (2 * math.pi)
    assert np.max(np.abs(got.energy_amplitude - written_out)) <= 1e-12 * np.max(np.abs(written_out))


def test_the_plot_is_written_and_a_2d_run_without_its_line_is_refused_in_one_line(free_run, tmp_path, capsys):
    figure = tmp_path / "spectrum.png"
    assert main(["spectrum", str(free_run), "--plot", str(figure)]) == 0
    assert figure.stat().st_size > 0
    table = copy.deepcopy(FREE)
    table["grid"] = {"x": {"min": -16.0, "max": 16.0, "points": 32}, "y": {"min": -16.0, "max": 16.0, "points": 32},
                     "boundary": "periodic"}
    table["packet"] = {"kind": "gaussian", "center": [-3.0, 0.0], "width": [1.5, 1.5], "momentum": [1.0, 0.0]}
    table["absorber"] = {"kind": "none"}
    table["evolve"]["duration"] = 1.0
    table["record"] = {"every": 0.5, "snapshot_every": 1.0}
    table["detector"] = [{"name": "d", "x": 5.0}]
    path = _run(table, tmp_path / "2d")
    capsys.readouterr()
    assert main(["spectrum", str(path)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "spectrum = true" in err[0]   # a line records its psi only when asked


def test_a_record_cut_while_psi_arrives_is_not_taken_for_aliasing(tmp_path):
    """The same free packet stopped while it is still crossing (t = 13:
    its centre at the detector): a truncated time integral leaks into every
    energy as 1 / (E - E_end), which an alias does not; tapering the
    record's end smoothly tells them apart.  No refusal on record.every
    (its advice, finer samples, would not help: measured on a diode run it
    chased ever finer sampling); what is still to come is said instead."""
    table = copy.deepcopy(FREE)
    table["evolve"] = {**FREE["evolve"], "duration": 13.0}
    table["record"] = {"every": 0.1, "snapshot_every": 13.0}
    out = spectrum(_run(table, tmp_path))
    d = out["detectors"][0]
    assert 0.3 < d["total"] < 0.7 and d["still_to_come"] > 0.3
    assert any("still arriving" in w for w in out["warnings"])


def test_a_scatterer_beyond_the_detector_is_said(tmp_path):
    """A barrier beyond the detector (outwards): what crossed still meets a
    potential, so the surface flux (whose premise is the free Hamiltonian
    beyond the detector, Tao & Scrinzi 2012) is not the spectrum of what
    left; a warning says so and names the fix."""
    table = copy.deepcopy(FREE)
    table["potential"] = [{"kind": "barrier", "height": 1.0, "width": 1.0, "center": 20.0}]
    out = spectrum(_run(table, tmp_path))
    assert any("V beyond it" in w and "not the spectrum of what left" in w for w in out["warnings"])


def test_a_field_still_on_at_the_end_is_said_and_another_moving_term_is_refused(tmp_path):
    """The Volkov waves are the outgoing states only where the field alone
    acts (Tao & Scrinzi 2012): a run ended mid-pulse reports momenta at its
    end, not final ones (a warning), and a run with another term that moves
    in time (an oscillating barrier beside the field) has no surface-flux
    spectrum at all (refused in one line, not a silent number)."""
    pulse = {"kind": "field", "amplitude": 0.01, "omega": 1.0, "envelope": "sin2", "duration": 80.0}
    table = {**copy.deepcopy(FREE), "particle": {"charge": -1.0}, "potential": [pulse]}
    out = spectrum(_run(table, tmp_path / "mid"))      # the pulse lasts 80, the run 40
    assert any("field still acts at the end" in w for w in out["warnings"])
    table["potential"] = [{**pulse, "duration": 20.0},
                          {"kind": "expression", "expression": "0.1 * sin(t) * exp(-(x + 40)**2)"}]
    with pytest.raises(JobError) as e:
        spectrum(_run(table, tmp_path / "moving"))
    assert "expression" in e.value.message and "not a uniform field" in e.value.message


def test_a_constant_potential_beyond_the_detector_shifts_only_the_phase(tmp_path):
    """V = V0 everywhere the packet goes (a step far behind it, inside the
    absorbing layer): a constant only turns the phase, so the spectrum is
    still the Gaussian's |phi(p)|^2 (to 1e-6 of its peak; measured 3.6e-7),
    its energies the kinetic p^2 / 2m.  Without the outgoing waves' V0 t the
    0.3 hartree offset put the peak at (P0^2 + 2 V0)^(1/2)."""
    job = copy.deepcopy(FREE)
    job["potential"] = [{"kind": "step", "height": 0.3, "position": -62.0}]
    out = spectrum(_run(job, tmp_path))
    d = out["detectors"][0]
    reference = gaussian_momentum_density(d["momentum"], P0, SIGMA)
    assert np.max(np.abs(d["probability_density"] - reference)) < 1e-6 * reference.max()
    assert not [w for w in out["warnings"] if "V " in w]


STEP_DOWN = {
    "title": "a smooth step down",
    "grid": {"x": {"min": -96.0, "max": 160.0, "points": 1536}, "boundary": "periodic"},
    "potential": [{"kind": "step", "height": -1.5, "position": 0.0, "smoothing": 1.0}],
    "packet": {"kind": "gaussian", "center": -40.0, "width": SIGMA, "momentum": P0},
    "evolve": {"dt": 0.02, "duration": 60.0, "scheme": "strang"},
    "absorber": {"kind": "cap", "thickness": 12.0},
    "record": {"every": 0.1, "snapshot_every": 60.0},
    "detector": [{"name": "lead", "x": 20.0}],
}


def _step_down_reference(p2):
    """T(p1) |phi(p1)|^2 dp1/dp2 on the lower lead's momenta p2, p1 = (p2^2 -
    2 m 1.5)^(1/2), for V = -1.5 / (1 + exp(-x / alpha)), alpha = smoothing
    / 2: T = 1 - [sinh(pi alpha (p1 - p2)) / sinh(pi alpha (p1 + p2))]^2
    (Landau & Lifshitz, Quantum Mechanics, sec. 25, problem 2, from memory;
    hbar = m = 1)."""
    p1 = np.sqrt(np.maximum(p2**2 - 3.0, 1e-30))
    alpha = 0.5
    t = 1 - (np.sinh(math.pi * alpha * (p1 - p2)) / np.sinh(math.pi * alpha * (p1 + p2))) ** 2
    return t * gaussian_momentum_density(p1, P0, SIGMA) * p2 / p1


def test_a_smooth_step_down_maps_each_momentum_onto_the_lower_lead(tmp_path):
    """V_d = -1.5 hartree at the detector (a lower lead): each momentum p1
    arrives as (p1^2 + 3)^(1/2), with T(p1) of the closed form; to 1e-6 of
    the peak once all of it has passed (measured 7.4e-9, cut_uncertainty 6.8e-9)."""
    out = spectrum(_run(STEP_DOWN, tmp_path))
    d = out["detectors"][0]
    reference = _step_down_reference(np.asarray(d["momentum"]))
    assert np.max(np.abs(d["probability_density"] - reference)) < 1e-6 * reference.max()
    assert not out["warnings"]


def test_a_record_cut_while_psi_arrives_says_how_far_its_spectrum_holds(tmp_path):
    """The step's run cut at 42 au, while its slow tail still crosses: the
    spectrum is off the asymptotic one by 8.7e-4 of its peak (the
    transmitted packet's cut tail), and cut_uncertainty, the end value of
    the integrand continued at its own rate and decay, says so within a
    factor 3 (measured 9.3e-4; the first estimate, which took the
    integrand's rate as Phi_k' alone, said 2.7e-4)."""
    job = copy.deepcopy(STEP_DOWN)
    job["evolve"]["duration"] = 42.0
    job["record"]["snapshot_every"] = 42.0
    out = spectrum(_run(job, tmp_path))
    d = out["detectors"][0]
    reference = _step_down_reference(np.asarray(d["momentum"]))
    error = np.max(np.abs(d["probability_density"] - reference)) / reference.max()
    assert error > 1e-4
    assert error / 3 < d["cut_uncertainty"] < 3 * error


def test_check_says_when_a_1d_record_is_too_coarse_for_spectra():
    """Every 1D detector records what a spectrum needs: a record.every that
    aliases the packet's energies is said by `check` (a note, not a
    warning: the run itself is fine), with the spacing that would do."""
    from wavesweep.check import check_job
    job = copy.deepcopy(FREE)
    job["record"]["every"] = 2.0
    found = [f for f in check_job(make_job(job)).findings if f.message.startswith("spectra (")]
    assert found and found[0].level == "ok" and found[0].values["every_needed"] < 2.0
    assert not [f for f in check_job(make_job(copy.deepcopy(FREE))).findings if f.message.startswith("spectra (")]


def test_nothing_crossing_is_said_rather_than_shaped_into_a_peak(tmp_path):
    """A packet at rest in a deep well (it stays bound): nothing crosses the
    detector, which is said (before, rounding noise of 1e-11 came out as a
    spectrum with a peak, or as an "aliased" record)."""
    job = copy.deepcopy(FREE)
    job["potential"] = [{"kind": "harmonic", "omega": 0.5, "center": -16.0}]
    job["packet"] = {"kind": "gaussian", "center": -16.0, "width": 1.0, "momentum": 0.0}
    job["evolve"]["duration"] = 10.0
    job["record"]["snapshot_every"] = 10.0
    with pytest.raises(JobError) as e:
        spectrum(_run(job, tmp_path))
    assert "nothing crossed" in e.value.message


def test_a_detector_nothing_crossed_is_left_out_of_all_detectors_spectra(tmp_path):
    """A free packet in single precision with a second detector behind it:
    the rounding alone integrates to ~1e-9 there (double: ~1e-11), which
    had been shaped into a spectrum that aliased the band and refused the
    whole command.  Now that detector is said to have had nothing cross
    and left out; the other's spectrum is given (its total 1 within its
    own uncertainty); asked for by name it is still refused."""
    job = copy.deepcopy(FREE)
    job["evolve"]["precision"] = "single"
    job["detector"] = [{"name": "d", "x": 10.0}, {"name": "behind", "x": -40.0}]
    path = _run(job, tmp_path)
    out = spectrum(path)
    assert [d["detector"] for d in out["detectors"]] == ["d"]
    assert any("nothing crossed detector 'behind'" in w for w in out["warnings"])
    d = out["detectors"][0]
    assert abs(d["total"] - 1.0) <= max(3 * d["total_uncertainty"], 1e-3)
    with pytest.raises(JobError) as e:
        spectrum(path, detector="behind")
    assert "nothing crossed" in e.value.message


def test_a_bound_tail_is_not_still_to_come():
    """Still to come is what moves towards the detector less what moves
    away: a bound state's tail in flat V (real: exp(-|x|), |phi(k)| even in
    k) counts nothing, where counting one direction alone gave half of its
    weight there; a packet moving towards the detector counts whole."""
    from wavesweep.analysis.surface_flux import _still_to_come
    x = np.linspace(-40.0, 40.0, 801)[:-1]
    units = {"length": 1.0}
    flat = np.zeros_like(x)

    def to_come(psi):
        ds = xr.Dataset({"psi_real": ("x", psi.real), "psi_imag": ("x", psi.imag)})
        return _still_to_come(ds, units, x, flat, 20.0, 1.0, 1.0)

    bound = np.exp(-np.abs(x + 10.0)) / math.sqrt(1.0)          # normalised: int e^{-2|x|} dx = 1
    assert to_come(bound.astype(complex)) < 1e-12
    moving = np.exp(-((x + 10.0) ** 2) / 8 + 3j * x) / (4 * math.pi) ** 0.25   # sigma 2 (|psi|^2 sd), p = 3
    assert to_come(moving) == pytest.approx(1.0, abs=1e-9)


# the free packet's job with the length unit nm and every length given in bohr: the same physics,
# recorded in other units (L = 1 nm in bohr, CODATA through scipy.constants)
L_NM = 1e-9 / __import__("scipy.constants", fromlist=["physical_constants"]).physical_constants["Bohr radius"][0]


def _free_in_nm():
    t = copy.deepcopy(FREE)
    t["units"] = {"length": "nm", "energy": "hartree"}   # time then atomic (hbar/hartree), as in FREE
    t["grid"]["x"].update({"min": "-64.0 bohr", "max": "40.0 bohr"})
    t["packet"].update({"center": "-16.0 bohr", "width": f"{SIGMA} bohr"})
    del t["packet"]["momentum"]
    t["packet"]["energy"] = P0 ** 2 / 2   # hartree: the same packet, its momentum given by its energy
    t["absorber"]["thickness"] = "12.0 bohr"
    t["detector"][0]["x"] = "10.0 bohr"
    return t


def test_a_spectrum_does_not_depend_on_the_length_unit(free_run, tmp_path):
    """The same run recorded in nm: its spectrum's total, peak energy and
    density per energy are those of the run in bohr (a user trial found the
    nm file's total 4x too small: dpsi/dx was recorded off by (nm/bohr)^2).
    Reference: the bohr run, itself checked against |phi(p)|^2 above."""
    nm_path = _run(_free_in_nm(), tmp_path)
    bohr, nm = spectrum(free_run)["detectors"][0], spectrum(nm_path)["detectors"][0]
    assert bohr["total"] == pytest.approx(1.0, abs=1e-5)
    assert nm["total"] == pytest.approx(bohr["total"], rel=1e-9)
    def mean_momentum(d, unit):   # hbar/bohr; ``unit``: the result's momentum unit in hbar/bohr
        p, rho = np.asarray(d["momentum"]) * unit, np.asarray(d["probability_density"])
        return float(np.trapezoid(p * rho, p) / np.trapezoid(rho, p))
    # the nm run's momentum unit is m_e nm E_h / hbar = (1 nm in bohr) hbar/bohr
    assert mean_momentum(nm, L_NM) == pytest.approx(mean_momentum(bohr, 1.0), rel=1e-7)
    assert mean_momentum(bohr, 1.0) == pytest.approx(P0, rel=1e-4)
    with xr.open_dataset(nm_path) as ds:
        assert int(ds.attrs["dpsi_units"]) == 2
        # dpsi/dx in nm^-1.5 is the bohr run's value times (nm in bohr)^1.5
        with xr.open_dataset(free_run) as ref:
            np.testing.assert_allclose(ds["detector_dpsi_real"].values, ref["detector_dpsi_real"].values * L_NM**1.5,
                                       rtol=1e-9, atol=1e-12 * L_NM**1.5)


def test_a_file_written_before_dpsi_units_is_corrected_and_says_so(tmp_path):
    """A result written before the ``dpsi_units`` attribute holds dpsi/dx
    off by (length unit / bohr)^2 exactly; spectrum corrects it and says
    so, and a resumed run rescales the rows its checkpoint kept."""
    import netCDF4

    from wavesweep.io.recorder import ResultWriter
    good = _run(_free_in_nm(), tmp_path / "good")
    old = tmp_path / "old.nc"
    old.write_bytes(good.read_bytes())
    with netCDF4.Dataset(old, "a") as nc:   # as the older writer left it
        nc.delncattr("dpsi_units")
        for part in ("real", "imag"):
            nc[f"detector_dpsi_{part}"][:] = nc[f"detector_dpsi_{part}"][:] / L_NM**2
    want, got = spectrum(good), spectrum(old)
    assert got["detectors"][0]["total"] == pytest.approx(want["detectors"][0]["total"], rel=1e-9)
    assert any("older wavesweep" in w and "corrected" in w for w in got["warnings"])
    assert not any("older wavesweep" in w for w in want["warnings"])
    # a checkpoint's copy from before: the resumed file's kept rows in the new units
    sim = Simulation(make_job(_free_in_nm()))
    with netCDF4.Dataset(good) as nc:
        n_time, n_snap, expected = len(nc.dimensions["time"]), len(nc.dimensions["snapshot_time"]), \
            np.array(nc["detector_dpsi_real"][:])
    writer = ResultWriter.resume(tmp_path / "resumed.nc", sim._layout(), old, n_time, n_snap, attrs=sim._attrs())
    try:
        np.testing.assert_allclose(np.array(writer.ds["detector_dpsi_real"][:n_time]), expected, rtol=1e-12)
        assert int(writer.ds.getncattr("dpsi_units")) == 2
    finally:
        writer.abort()
