"""The surface-flux method's shared pieces (atomic units), used by the
momentum spectra of a point (:mod:`wavesweep.analysis.surface_flux`) and of
a line or plane (:mod:`wavesweep.analysis.plane_spectrum`), and by
energy-resolved transmission: the time transform (the trapezoid over a
run's samples of f(t) exp(i phase(t)): phase = E t for T(E), Phi_k(t) for
the spectra), the amplitude b(k) with the trapezoid's end correction, the
tail model of a record cut early, the band a record's samples resolve (the
end taper tells a cut record from an aliased one), and the premises both
spectra judge alike, with their thresholds.  See
:mod:`wavesweep.analysis.surface_flux` for the derivation and the sampling
argument (Poisson summation)."""
from __future__ import annotations

import math

import numpy as np

from ..errors import JobError
from ..io.results import source_name

__all__ = ["time_transform", "trapezoid_weights", "surface_flux_amplitude", "end_taper", "tail_decay", "cut_tail", "cut_warning",
           "premise_warnings", "momentum_label", "alias_level", "dpsi_correction", "kept_range", "refuse_if_nothing_crossed", "NothingCrossed", "CUT_WARN", "STILL_TO_COME_WARN", "BAND_FLOOR",
           "SPECTRUM_FLOOR", "SCATTERER_BEYOND", "VARIES",
           "TRANSFORM_BLOCK"]

TRANSFORM_BLOCK = 2**21   # momenta x samples per block of the transform (32 MiB of complex phases)
# A cut record's bound on the density (relative to its peak) above this is a warning (common practice:
# the 1e-3 of still_to_come's warning)
CUT_WARN = 1e-3
STILL_TO_COME_WARN = 1e-3  # a fraction still to come above this (of what crossed) is a warning
BAND_FLOOR = 1e-8          # |psi(x_d)|^2 (the spectrum) above this fraction of its peak sets the band
SPECTRUM_FLOOR = 1e-6      # the momenta reported: where the density is above this fraction of its peak
# V beyond a detector (outwards) above this x the mean kinetic energy of what crossed: a scatterer lies
# beyond it, and the surface flux is not the spectrum of what left (common practice: 1 %).
SCATTERER_BEYOND = 1e-2
VARIES = 1e-3              # V counts as varying where it differs from V(x_d) by this fraction of <E_kin>


def trapezoid_weights(time) -> np.ndarray:
    """Trapezoid weights of the samples ``time`` (np.gradient's for uneven ones)."""
    t = np.asarray(time, float)
    dt_rec = float(np.median(np.diff(t)))
    wq = np.full(len(t), dt_rec)
    wq[0] = wq[-1] = dt_rec / 2
    if not np.allclose(np.diff(t), dt_rec, rtol=1e-6, atol=0):
        wq = np.gradient(t)                 # uneven samples (a resumed run is still even)
    return wq


def time_transform(time, samples, phase) -> np.ndarray:
    """(1 / 2 pi) int f(t) exp(i phase(t)) dt by the trapezoid over the
    samples: ``samples`` f(t_n) (N,) or (N, R) (R signals at once: one
    matrix product), ``phase`` (K, N) radians per output row; returns (K,)
    or (K, R).  Energy-resolved transmission's psi~(E) is the case phase =
    E t (``transmission_from_samples``); the surface-flux amplitude the case
    phase = Phi_k(t) (:func:`surface_flux_amplitude`)."""
    amp = np.asarray(samples, complex)
    w = trapezoid_weights(time)
    return (np.exp(1j * phase) @ (amp * (w if amp.ndim == 1 else w[:, None]))) / (2 * math.pi)


def end_taper(t) -> np.ndarray:
    """1 over the record, falling as cos^2 to 0 over its last tenth: a
    record's end made smooth, so that a cut's leak into far energies fades
    (an alias of the samples does not)."""
    t = np.asarray(t, float)
    start = t[0] + 0.9 * (t[-1] - t[0])
    ramp = np.clip((t - start) / max(t[-1] - start, 1e-300), 0.0, 1.0)
    return np.cos(0.5 * math.pi * ramp) ** 2


def surface_flux_amplitude(time, psi_detector, dpsi_detector, momentum, mass, x_detector, side=1.0,
                           field_momentum=None, excursion=None, field_phase=None, initial=None,
                           cut: bool = False):
    """b(k) of :mod:`wavesweep.analysis.surface_flux` (atomic units): the
    amplitude per unit canonical momentum ``momentum`` k (bohr^-1) of what
    crossed the detector at ``x_detector`` (bohr) towards ``side`` (+1: to
    larger x, -1: smaller) between the first and last of ``time``, from psi
    and dpsi/dx there (bohr^-1/2, bohr^-3/2; shape (N,), or (N, R) for R
    signals sharing the normal phase, the transverse rows of a line or
    plane: :mod:`wavesweep.analysis.plane_spectrum`).  ``field_momentum``
    P(t) = -q A(t), ``excursion`` alpha(t) = int P / m and ``field_phase``
    S(t) = int P^2 / 2m at the samples (None: no field); ``initial``: b(k,
    0) (None: 0).  Returns (K,) or (K, R); with ``cut`` (b, B), B the size
    of the part of b a record cut while psi is still at the detector misses
    (:func:`cut_tail`: the integrand h_k exp(i Phi_k) goes on at its end
    value, at the rate mismatch Phi_k' minus psi's own local frequency
    there, decaying as |psi| did over the last samples)."""
    t = np.asarray(time, float)
    k = np.asarray(momentum, float)
    rows = max(1, TRANSFORM_BLOCK // max(len(t), 1))
    if len(k) > rows:   # blocks of momenta: no (momenta x samples) temporary beyond TRANSFORM_BLOCK
        init = None if initial is None else np.asarray(initial, complex)
        parts = [surface_flux_amplitude(t, psi_detector, dpsi_detector, k[i:i + rows], mass, x_detector, side,
                                        field_momentum, excursion, field_phase,
                                        None if init is None else init[i:i + rows], cut)
                 for i in range(0, len(k), rows)]
        if cut:
            return np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts])
        return np.concatenate(parts)
    psi = np.asarray(psi_detector, complex)
    dpsi = np.asarray(dpsi_detector, complex)
    flat = psi.ndim == 1
    psi, dpsi = (psi[:, None], dpsi[:, None]) if flat else (psi, dpsi)
    zero = np.zeros_like(t)
    p_t = zero if field_momentum is None else np.asarray(field_momentum, float)
    alpha = zero if excursion is None else np.asarray(excursion, float)
    s_t = zero if field_phase is None else np.asarray(field_phase, float)
    # chi_k^*(x_d, t) = (2 pi)^(-1/2) exp(-i k x_d) exp(i (k^2 t / 2m + k alpha)) exp(i (S - P x_d))
    g = np.exp(1j * (s_t - p_t * x_detector))[:, None]
    phase = np.outer(k**2 / (2 * mass), t) + np.outer(k, alpha)
    slope_samples, value_samples = g * (dpsi + 1j * p_t[:, None] * psi), g * psi
    slope_part = time_transform(t, slope_samples, phase)
    value_part = time_transform(t, value_samples, phase)
    kc = k[:, None]
    # 2 pi from time_transform's 1 / 2 pi, (2 pi)^(-1/2) from chi
    integral = 2 * math.pi * (slope_part + 1j * kc * value_part)
    integral -= _end_correction(t, slope_samples, value_samples, k, p_t, alpha, mass)
    integral = integral * np.exp(-1j * kc * x_detector) / math.sqrt(2 * math.pi)
    b = -side * 1j / (2 * mass) * integral
    b = b[:, 0] if flat else b
    b = b if initial is None else b + initial
    if not cut:
        return b
    # the integrand's rate past the end: Phi_k' (its normal part; S, V_d t and the transverse factors sit in
    # the samples) plus the samples' own phase rate there
    rate = -np.angle(value_samples[-1] / np.where(value_samples[-2] != 0, value_samples[-2], 1.0)) / (t[-1] - t[-2])
    mismatch = kc**2 / (2 * mass) + kc * p_t[-1] / mass - rate[None, :]
    end = slope_samples[-1][None, :] + 1j * kc * value_samples[-1][None, :]
    bound = cut_tail(end, mismatch, tail_decay(value_samples, t)[None, :]) / (2 * mass * math.sqrt(2 * math.pi))
    return b, (bound[:, 0] if flat else bound)


def _end_correction(t, slope_samples, value_samples, k, p_t, alpha, mass) -> np.ndarray:
    """(K, R): the trapezoid's leading error on the record's window, (dt^2 / 12)
    (f'(t_N) - f'(t_0)) (Euler-Maclaurin; e.g. Abramowitz & Stegun 25.4.32,
    from memory), for f(t) = exp(i Phi_k(t)) h_k(t), h_k = slope + i k value:
    the record is cut while what is slow still arrives, and the sum is exact
    only for a whole band-limited signal.  f' = exp(i Phi_k) (i Phi_k' h_k +
    h_k') with S and P held in h_k (Phi_k' taken exactly), h_k' by second-order one-sided
    differences of the samples.  Zero for uneven samples (a correction
    the trapezoid's np.gradient weights do not define)."""
    rows = slope_samples.shape[1]
    if len(t) < 3:
        return np.zeros((len(k), rows), complex)
    dt = float(np.median(np.diff(t)))
    if not np.allclose(np.diff(t), dt, rtol=1e-6, atol=0):
        return np.zeros((len(k), rows), complex)
    k = k[:, None]
    def h(i):
        return slope_samples[i] + 1j * k * value_samples[i]

    rate_end = k**2 / (2 * mass) + k * p_t[-1] / mass     # d/dt (k^2 t / 2m + k alpha); S, P sit in h
    rate_start = k**2 / (2 * mass) + k * p_t[0] / mass
    dh_end = (3 * h(-1) - 4 * h(-2) + h(-3)) / (2 * dt)
    dh_start = -(3 * h(0) - 4 * h(1) + h(2)) / (2 * dt)
    f_end = np.exp(1j * (k**2 * t[-1] / (2 * mass) + k * alpha[-1])) * (1j * rate_end * h(-1) + dh_end)
    f_start = np.exp(1j * (k**2 * t[0] / (2 * mass) + k * alpha[0])) * (1j * rate_start * h(0) + dh_start)
    out = f_end - f_start
    return dt**2 / 12 * out


def tail_decay(amplitude, t) -> np.ndarray:
    """gamma, the decay rate of |amplitude| over the record's last 2 % of
    samples (at least 1 / the record's length: a tail that does not decay
    is counted as lasting as long as the record did), per column of
    ``amplitude`` (N,) or (N, R); the tail model of :func:`cut_tail`."""
    a = np.abs(np.asarray(amplitude))
    t = np.asarray(t, float)
    last = max(2, len(a) // 50)
    span = float(t[-1] - t[-last])
    floor = 1.0 / float(t[-1] - t[0])
    with np.errstate(divide="ignore", invalid="ignore"):
        gamma = np.log(a[-last] / a[-1]) / span if span > 0 else np.zeros(a.shape[1:])
    return np.maximum(np.where(np.isfinite(gamma), gamma, 0.0), floor)


def cut_tail(end_value, mismatch, gamma) -> np.ndarray:
    """|int_T^inf f(t) dt| for an integrand that goes on past the record's
    end T as f(T) exp(i mismatch (t - T) - gamma (t - T)): |f(T)| /
    (mismatch^2 + gamma^2)^(1/2).  A record cut while the signal still
    arrives misses this much of any time transform: energy-resolved
    transmission's (mismatch E - E_end) and the surface-flux amplitude's
    (:func:`surface_flux_amplitude` with ``cut=True``)."""
    return np.abs(end_value) / np.sqrt(np.asarray(mismatch) ** 2 + np.asarray(gamma) ** 2)


def cut_warning(name: str, cut_uncertainty: float) -> str:
    """The warning of a record cut while psi is still at detector ``name``."""
    return (f"detector {name!r}: the run ended while psi was still at it; the cut record leaves the density "
            f"uncertain by up to {cut_uncertainty:.1g} of its peak (cut_uncertainty); extend evolve.duration "
            "until what arrives has passed")


def premise_warnings(name: str, uc: dict, pushed: float, momentum_scale: float, e_mean: float,
                     v_beyond: float, v_at: float, step: float, e_grid: float) -> list[str]:
    """The method's premises, judged the same for a point, a line and a
    plane (atomic units in, the job's units in the text): the field done by
    the end (``pushed``: how much its momentum transfer still changed over
    the last samples, against ``momentum_scale``), V flat beyond the
    detector at its value V_d there (``v_beyond``, the largest |V - V_d|
    beyond, against the mean kinetic energy ``e_mean``: a scatterer), and
    along a line or plane (``v_at``, the largest |V - V_d| on it), and the
    split step's sidebands E + 2 pi / dt off the grid (``step`` dt against
    ``e_grid``, the largest energy the grid carries)."""
    out = []
    if pushed > 1e-6 * max(momentum_scale, 1e-300):
        out.append(f"detector {name!r}: the field still acts at the end of the run (its momentum "
                   "transfer still changes between the last samples): the momenta are those at the "
                   "run's end, not the final ones; extend evolve.duration past the pulse")
    if v_beyond > SCATTERER_BEYOND * max(e_mean, 1e-300):
        # beyond the detector H must be the free (Volkov) one; a scatterer there acts on what crossed after
        # it crossed, which the flux through the detector cannot know
        out.append(f"detector {name!r}: V beyond it (outwards) differs from its value at the detector by up "
                   f"to {v_beyond / uc['energy']:.3g} {uc['energy_label']}: what crosses it still meets a "
                   "potential, so this is not the spectrum of what left (not even its total); use a detector "
                   "beyond the scatterer, where V is flat")
    elif abs(v_at) > VARIES * max(e_mean, 1e-300):
        out.append(f"V varies along detector {name!r} by up to {v_at / uc['energy']:.3g} {uc['energy_label']}: "
                   "plane waves of one energy offset are not the outgoing states there and the energies are "
                   "off by about that much; place the detector where V is flat")
    if step > 0 and 2 * math.pi / step < e_grid:
        # the split step is periodic in time: a potential with sharp features couples E to E + 2 pi / dt,
        # a wave the grid can carry; d psi / dx weighs it by its large k (measured: 3 % off at dx = 1/16 with
        # a rectangular barrier and dt = 0.005, 7e-4 at dt = 0.004)
        out.append(f"evolve.dt lets the split step's sidebands (E + 2 pi hbar / dt) travel on the grid, "
                   f"which the surface flux counts; evolve.dt < {2 * math.pi / e_grid / uc['time']:.3g} "
                   f"{uc['time_label']} keeps them off it")
    return out


def momentum_label(ds, uc) -> str:
    """The job's momentum unit as the run labelled its own momenta (p_mean)."""
    if "p_mean" in ds.variables and "units" in ds["p_mean"].attrs:
        return str(ds["p_mean"].attrs["units"])
    return f"{ds.attrs.get('units_mass', 'm_e')} {uc['length_label']} {uc['time_label']}-1"


def alias_level(density, tapered_top, limited_by_samples: bool) -> float:
    """How high an aliased spectrum stands at the top of the range it was
    computed on, relative to its peak (0 where the grid, not the samples,
    limits the range).  ``density``: the spectrum on a coarse grid of
    momenta rising to the top of the band (K,); ``tapered_top()``: the same
    top twentieth computed from the record with its end tapered (a cut
    record's leak fades then, an alias does not), asked for only where the
    plain one is still up."""
    if not limited_by_samples:
        return 0.0
    peak = float(density.max())
    top = float(density[-len(density) // 20:].max())
    if top > BAND_FLOOR * peak:
        top = float(tapered_top())
    return top / peak


def kept_range(coarse_kinetic, density, step: float, k_top: float) -> tuple[float, float]:
    """(lo, hi): the |kinetic momenta| where the coarse spectrum is above
    SPECTRUM_FLOOR of its peak, widened by two coarse steps within [0, k_top]."""
    kept = np.abs(coarse_kinetic[density > SPECTRUM_FLOOR * density.max()])
    return max(float(kept.min()) - 2 * step, 0.0), min(float(kept.max()) + 2 * step, k_top)


# Less than this probability through a detector (the time integral of |J|) is nothing: its spectrum would be
# rounding noise shaped into a peak (a bound state's: total 7e-11 with an uncertainty of 1.5x its peak).  In
# single precision the rounding alone integrates to ~1e-9 (a free packet's detector behind it: 1.2e-9, where
# double precision's gave 2e-11), and its spectrum then filled the band so that the whole command was refused
# for aliasing, with advice to sample faster: so a single-precision run's floor is higher.
NOTHING_CROSSED = 1e-10
NOTHING_CROSSED_SINGLE = 1e-7


class NothingCrossed(JobError):
    """A detector nothing crossed: no spectrum there (a fact of the run, not
    bad input; a spectrum of all the detectors leaves it out and says so)."""


def refuse_if_nothing_crossed(ds, j: int, name: str) -> None:
    """NothingCrossed (a JobError) naming the detector when the run's flux through detector
    ``j`` integrates (in absolute value, over the record) to less than
    NOTHING_CROSSED (NOTHING_CROSSED_SINGLE for a single-precision run)."""
    flux = np.abs(np.asarray(ds["flux"].values, float)[:, j])
    t = np.asarray(ds["time"].values, float)
    gross = float(np.trapezoid(flux, t)) if len(t) > 1 else 0.0
    floor = NOTHING_CROSSED_SINGLE if ds.attrs.get("precision") == "single" else NOTHING_CROSSED
    if not gross > floor:
        raise NothingCrossed("--detector", f"nothing crossed detector {name!r} during the run (|J| integrates to "
                                           f"{gross:.1e}): no spectrum")


def dpsi_correction(ds, uc) -> tuple[float, str | None]:
    """``(factor, note)``: what takes a result's recorded dpsi/dx or dpsi/dn
    (``detector_dpsi_*``, ``spectrum_dpsi_*``) to the job's length units,
    and a note when that is not 1.  A file with the ``dpsi_units``
    attribute (:data:`~wavesweep.io.record.DPSI_UNITS_VERSION`) holds them
    so; one written before it (2026-12-05) multiplied by the length unit's
    size in bohr where it should have divided, so its dpsi is off by exactly
    (length unit / bohr)^2, which is 1 in bohr.  ``uc``: the result's units
    (:func:`~wavesweep.io.results.result_units`)."""
    if "dpsi_units" in ds.attrs:
        return 1.0, None
    factor = float(uc["length"]) ** 2
    if factor == 1.0:
        return 1.0, None
    return factor, (f"{source_name(ds)} was written by an older wavesweep whose recorded dpsi/dx was off by "
                    f"(1 {uc['length_label']} in bohr)^2 = {factor:.6g}; corrected here")
