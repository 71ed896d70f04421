"""Transmission and reflection from a run.

Totals: the probability each absorbing face removed by the end of the run,
and per detector what lies beyond it at the end (on the grid beyond the
detector plus what the faces beyond it absorbed) together with the net
probability that crossed it (int J dt).

Energy-resolved T(E) from one packet (1D, static potential): the
time-energy Fourier transform of psi(x_d, t) at a detector beyond the
scatterer,

    psi~(E) = (1 / 2 pi hbar) int psi(x_d, t) exp(i E t / hbar) dt,

is the transmitted amplitude per energy.  Expanding the initial packet in
scattering states, psi(x_d, t) = int dk phi(k) t(k) exp(i k' x_d - i E t)
/ sqrt(2 pi), so psi~(E) = phi(k) t(k) exp(i k' x_d) / (sqrt(2 pi) hbar v),
with dE = hbar v dk; the transmission probability is

    T(E) = (v' / v) |t|^2 = 2 pi hbar^2 v v' |psi~(E)|^2 / |phi(k)|^2,

v and v' the speeds where the packet started and at the detector, phi the
momentum amplitude of psi(t=0) (continuous normalisation, int |phi|^2 dk =
1).  This is the flux-based energy analysis of e.g. Tannor, Introduction to
Quantum Mechanics: A Time-Dependent Perspective (2007), ch. 7 (from
memory); it needs the incident packet entirely on the other side of the
scatterer at t = 0.  The samples are a trapezoidal sum, which is exact up
to aliasing: the band of energies the packet holds must be narrower than
2 pi hbar / (sample spacing).

The method's core works on plain arrays (``transmission_from_samples``:
sample times, psi(x_d, t), the incident momentum density, the final
channel's potential V_f beyond the detector; a run's T(E) uses V_f =
V(x_d)).  On coupled surfaces (``surface_transmission``) it is applied per
final surface s, v' the speed on s beyond the detector, k_s(E) =
sqrt(2 m (E - V_s)) / hbar: T_s(E) = 2 pi hbar^2 v v_s |psi~_s(E)|^2 /
|phi(k)|^2, zero where s is closed (derived there).  Each T_s(E) comes
with the uncertainty below, by the same code (``still_to_come``): E is the
total energy, which a hop conserves, so what may still arrive on s is the
final state's probability per energy on every surface the couplings
connect to s, each part read with its own V_rr.

A run that ends before the whole transmitted amplitude has passed the
detector still gives T(E), with an uncertainty per energy.  The integral
misses its tail b(E) = int_{t_end}^inf psi(x_d, t) exp(i E t) dt / 2 pi,
and with T = c |a|^2 (c = 2 pi v v' / |phi|^2, a the recorded transform)
the full T = c |a + b|^2 differs from it by at most

    dT = 2 sqrt(T B) + B,        sqrt(B) = sqrt(c) |b| <= sqrt(B_cut) + sqrt(B_come),

the phase of b being unknown.  Two parts bound |b|, both from the run:

- the cut: the record stops while psi(x_d) is still psi_end, turning at
  the energy E_end then arriving (-hbar d arg psi / dt).  Continued as
  psi_end exp(-i E_end s - gamma s), gamma the decay rate of |psi| over the
  last samples, the tail integrates to |psi_end| / (2 pi |E - E_end + i gamma|),
  a leak into every energy (integration by parts, as for any truncated
  Fourier integral);
- what is still to come: the final state's probability that may yet cross
  the detector, per energy, U(E) (_still_to_come: moving towards it before
  it, either way where V still varies, coming back from beyond it).
  At most U(E) dE of probability arrives with energies in dE, against the
  incident |phi|^2 dk = |phi|^2 dE / (hbar v): B_come = U(E) hbar v / |phi|^2.
  Slow components come last, so U sits at low energies.

dT is an estimate, not a rigorous bound (the continuation of the tail is a
model, and the momentum of a part cut out of psi by smooth ramps is blurred
by about 1 / ramp length).  Measured against the same job run longer
(rectangular barrier, free packet, a smooth step down, and a double barrier
ringing at its resonance; runs ended when |psi(x_d)|^2 was 4e-2 .. 1e-8
of its peak), |T_short - T_long| stayed below 0.93 of dT_short + dT_long
at every energy of weight above 1 %.  What the absorbers send back sets
the floor: about 1e-5 (T of a run ended at |psi|^2 = 3e-10 of its peak
changes by 1.4e-5 when it goes on 30 hbar/E_h longer).

The method's premises, judged from the run (on one surface and per
final surface alike), each turned into T's error where it holds only
approximately and added to dT, and refused (no T(E), the reason instead)
where that error is above PREMISE_LIMIT, beyond which a first-order
estimate no longer bounds it:

- the packet starts where its surface is flat (_start_effect: the part
  d(x) of it where V differs by delta(x) from <V> has its energies
  mislabelled, dT / T = sum_x d(x) min(n_peak / n, 2 delta (|d ln n / dE|
  + 1 / W))) and, on coupled surfaces, uncoupled (the other surface
  mixed in by r, dT / T = 2 r).  A bound initial state fails it: its
  fragments' energies are a spectrum's business, not T(E)'s;
- beyond the detector the surfaces are uncoupled (a coupling mixes o's
  wave into s by r = sin theta of the local eigenvectors:
  dT_s = 2 r sqrt(T_s T_o v_s / v_o) + r^2 T_o v_s / v_o);
- nothing comes back across the detector (_came_back: what a wall without
  an absorber, or the grid's period, sends back; the fix is an absorber,
  so no duration is promised).
dT covers neither the discretisation (dt, grid), which ``check
--tolerance`` or a refined run measures, nor what these estimates miss:
where sum_s T_s exceeds 1 by more than its dT a warning says so.

``duration_needed`` (job time unit) is the run length that would bring dT
below UNCERTAINTY_TARGET wherever the weight is above WEIGHT_FLOOR.  dT,
led by 2 sqrt(T B), scales with the amplitude still arriving.  While the
packet disperses, the energy E(t) arriving falls with time and that
amplitude goes as sqrt(w(E_end)), w the incident weight: the run must last
until the energy of weight w(E_end) (target / dT_max)^2 arrives, at the
time the free-flight law t(E) = t0 + D / v'(E), fitted to the record's
peak and its end, gives.  A resonance instead rings at a fixed energy and
decays as exp(-gamma t): ln(dT_max / target) / gamma more.  (Measured:
asked for 107 hbar/E_h, a barrier run was then settled to 1.4e-4; the
double barrier asked for 14020 fs from 2000 fs and 14370 fs from 8150 fs,
and at 14030 fs it was settled to 1.3e-4.)  It is None, with the reason
(``unsettled_because``), where no run length is known to settle T: the
tail follows neither law (a suggestion not beyond the run's own length),
the premises' part of dT alone is above the target, or psi comes back.
"""
from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

from .flux_method import cut_tail, tail_decay, time_transform
from ..adequacy import reachable_surfaces, run_warnings
from ..errors import JobError
from ..io.results import open_result, result_units, source_name
from ..io.record import side_probability
from .arrivals import (coupled_setup, recorded_or, stored_warnings, detector_side, layer_edge, layer_holding, recorded_warnings,
                       upstream_probability)
from .recorded import as_record
from .recorded import run_record as read_record

__all__ = ["transmission", "energy_resolved_transmission", "transmission_totals", "truncation_warning",
           "UNCERTAINTY_TARGET", "PREMISE_LIMIT", "transmission_from_samples", "surface_transmission", "surface_spectra",
           "incident_wave_numbers",
           "SampledTransmission", "coupled_transmission", "came_round_warning"]

WEIGHT_FLOOR = 1e-2       # report T(E) where the incident weight is above 1 % of its peak
BAND_FLOOR = 1e-8         # the band that must not alias: weight above 1e-8 of the peak
AMPLITUDE_AT_START = 1e-6  # |psi(x_d, 0)|^2 / max |psi(x_d, t)|^2 allowed
NOTHING_CROSSED = 1e-9     # net probability through a detector below which nothing arrived
AMPLITUDE_AT_END = 1e-6    # |psi(x_d, t_end)|^2 / peak below which the record has died out
UNCERTAINTY_TARGET = 1e-4  # T(E) counts as settled when uncertain by less (duration_needed aims here)
RINGING = 0.3              # E(t) at the end falls slower than this x free flight: a resonance rings
# Elements (wave numbers x grid points) of one block of the momentum amplitude's direct sum:
# its complex temporaries stay ~16 MB whatever the grid (256 rows of a 131072-point grid took 1 GB).
AMPLITUDE_BLOCK = 2**20
VARIES = 1e-6              # V differs from its value at the start by more (x mean kinetic energy)
# On coupled surfaces: beyond the detector V_ss varies, or |V_ab| reaches, more than this x the mean
# kinetic energy: the surfaces are not the flat, uncoupled channels T_s(E) assumes (common practice).
FLAT_BEYOND = 1e-3
# A premise's first-order effect on T (relative or absolute) above this: the first-order estimate no
# longer bounds it (the linear crossing of the trial: a 1.4e-2 estimate against a sum of T_s 5.7e-2
# above 1), and no T(E) is given, only why (a choice: T's range is [0, 1]).
PREMISE_LIMIT = 1e-2
# psi flowing back across the detector after its main passage, above this fraction of what went
# forward: the far side sends it back (a wall, no absorber), which a longer run does not cure.
CAME_BACK = UNCERTAINTY_TARGET


def transmission_totals(ds, setup) -> dict:
    """Per face: absorbed at the end.  Per detector: ``beyond`` (on the grid
    beyond it at the end + absorbed by the faces beyond it) and ``crossed``
    (int J dt), both probabilities; ``side`` is +1 when "beyond" is the +
    direction of the detector's axis (away from the initial packet).
    ``setup``: the run's record (:func:`wavesweep.analysis.recorded.run_record`), or a
    Setup in memory."""

    setup = as_record(setup)

    faces = [str(b) for b in ds["boundary"].values] if "boundary" in ds.coords else []
    # by position: a dataset opened without indexes (collect's) has no label lookup
    absorbed = {f: float(ds["absorbed"][-1, i].values) for i, f in enumerate(faces)} \
        if faces and ds.sizes.get("time", 0) else {f: 0.0 for f in faces}
    out = {"absorbed": absorbed, "final_norm": float(ds["norm"].values[-1]), "detectors": {}}
    names = [str(d) for d in ds["detector"].values] if "detector" in ds.coords else []
    t = np.asarray(ds["time"].values, float)
    for j, name in enumerate(names):
        det = setup.detectors[j]
        side = detector_side(setup, j)     # where the packet is
        axis_name = setup.grid.names[det.axis]
        far_face = f"{axis_name}{'-' if side > 0 else '+'}"
        # as the run recorded it (1D, final state kept), else from the file's final state
        on_grid = recorded_or(setup, "final_probability_beyond", j,
                               lambda: upstream_probability(ds, setup, det.axis, det.position, -side))
        beyond = (on_grid if on_grid is not None else math.nan) + absorbed.get(far_face, 0.0)
        crossed = float(np.trapezoid(ds["flux"].values[:, j], t)) * (-side)
        out["detectors"][name] = {"beyond": beyond, "crossed": crossed, "far_face": far_face}
    return out


def energy_resolved_transmission(ds, setup, detector: str | None = None, points: int = 201) -> dict:
    """T(E) at a detector beyond the scatterer (see the module notes).

    Returns energies (job units), T, its uncertainty ``T_uncertainty`` (what
    had not passed the detector by the end), the incident weight |phi|^2 per
    energy normalised to its peak, the detector used, ``duration_needed``
    (job time unit; None when T is settled to UNCERTAINTY_TARGET wherever
    the weight is above WEIGHT_FLOOR), ``largest_uncertainty`` there and
    ``uncertain_span`` (the energies where it is above the target, or None).
    Without ``detector`` the detectors outside the absorbing layers are
    tried from the farthest along the packet's motion back: the first whose
    T(E) is settled is used, else the first that gives an estimate.
    Raises JobError when none can (multi-D, time-dependent potential, too
    coarse sampling, no amplitude recorded, the flux not died out in a run
    that kept no final state)."""

    setup = as_record(setup)
    if setup.grid.ndim != 1 or setup.grid.radial:
        raise JobError("RUN.nc", f"{source_name(ds)}: energy-resolved transmission needs a 1D cartesian run "
                                 "(the totals are given for any run)")
    if "frame_offset" in ds.variables:
        raise JobError("RUN.nc", f"{source_name(ds)}: the run's grid fell with the packet (grid.frame = 'free_fall'); "
                                 "energy-resolved transmission needs a grid fixed in the lab and free motion beyond "
                                 "the scatterer: use `wavesweep arrivals` for what crossed each lab detector, or run "
                                 "the job with grid.frame = 'lab'")
    if setup.time_dependent:
        raise JobError("RUN.nc", f"{source_name(ds)}: energy-resolved transmission needs a static potential: with a "
                                 "time-dependent one, energy is not conserved")
    if "detector_psi_real" not in ds:
        raise JobError("RUN.nc", f"{source_name(ds)}: the run did not record psi at its detectors "
                                 "(written by an older version); run the job again")
    names = [str(d) for d in ds["detector"].values]
    if not names:
        raise JobError("RUN.nc", f"{source_name(ds)}: the run has no detector; add a [[detector]] beyond the scatterer")
    k_all, w_all = _padded_momentum_density(setup.psi0, setup.grid.axes[0].dx)
    p_mean = float(np.sum(k_all * w_all) / np.sum(w_all))
    # judged first: a bound start has no direction to look for a detector in
    starts = {1.0 if p_mean >= 0 else -1.0: _single_start(setup, k_all, w_all, 1.0 if p_mean >= 0 else -1.0,
                                                          points, result_units(ds), refuse=True)}
    if detector is not None:
        j = _requested_detector(setup, names, detector)
        return _at_detector(ds, setup, j, k_all, w_all, points, starts)
    sign = 1.0 if p_mean >= 0 else -1.0
    order = sorted(range(len(names)), key=lambda i: -sign * setup.detectors[i].position)
    usable = [i for i in order if layer_holding(setup, 0, setup.detectors[i].position) is None]
    if not usable:
        raise JobError("RUN.nc", f"{source_name(ds)}: every detector lies inside an absorbing layer; T(E) needs one "
                                 "between the scatterer and the layer")
    first, estimate = None, None
    for i in usable:
        try:
            found = _at_detector(ds, setup, i, k_all, w_all, points, starts)
        except JobError as e:
            first = first or e
            continue
        if found["uncertain_span"] is None:
            return found
        estimate = estimate or found          # a nearer detector may have seen it all
    if estimate is not None:
        return estimate
    raise first


def _single_start(setup, k_all, w_all, direction, points, uc, refuse: bool = False):
    """One surface's start premise (:func:`_start_effect`) at the energies
    T(E) is given for: (relative error per energy, its largest where the
    weight is above WEIGHT_FLOOR, the reason T(E) is refused or None);
    with ``refuse``, that reason is raised as a JobError."""
    x = setup.grid.axes[0].coordinates
    dens0 = np.abs(setup.psi0) ** 2
    v_static = setup.static_potential
    w_fwd = np.where(k_all * direction > 0, w_all, 0.0)
    k = _wave_numbers_with_weight(k_all, w_fwd, points)
    density = np.abs(_momentum_amplitude(setup.psi0, x, k)) ** 2
    v_start = float(np.sum(v_static * dens0) / np.sum(dens0))
    energy = v_start + k**2 / (2 * setup.mass)
    rel, mean_delta, _ = _start_effect(dens0, v_static, energy, k, density, setup.mass)
    worst = float(np.max(rel[density / w_fwd.max() > WEIGHT_FLOOR], initial=0.0))
    refusal = None
    if worst > PREMISE_LIMIT:
        refusal = (f"the packet starts where V is not flat (it differs from its mean by "
                   f"{mean_delta / uc['energy']:.3g} {uc['energy_label']} on average across it, as for a bound "
                   f"initial state: T(E) off by up to {worst:.2g} relative); T(E) needs a free incident packet: "
                   "start it where V is flat")
        if refuse:
            raise JobError("packet.center", refusal)
    return rel, worst, refusal


def _requested_detector(setup, names, detector: str) -> int:
    """The index of ``--detector``: refused when the run has no such detector
    or it lies inside an absorbing layer (psi there is no longer the
    transmitted wave)."""
    if detector not in names:
        raise JobError("--detector", f"no detector {detector!r} in the run; it has {', '.join(names)}")
    j = names.index(detector)
    face = layer_holding(setup, 0, setup.detectors[j].position)
    if face is not None:
        raise JobError("--detector", f"detector {detector!r} lies inside the {face} absorbing layer, "
                                     "where psi is no longer the transmitted wave; use one before it")
    return j


def _at_detector(ds, setup, j, k_all, w_all, points, starts=None) -> dict:
    """T(E) at detector ``j``; ``starts``: the start premise already judged
    per direction (:func:`_single_start`, a grid x energies projection),
    reused rather than computed again."""
    uc = result_units(ds)
    name = str(ds["detector"].values[j])
    x = setup.grid.axes[0].coordinates
    dens0 = np.abs(setup.psi0) ** 2
    x0 = float(np.sum(dens0 * x) / np.sum(dens0))
    x_d = setup.detectors[j].position
    direction = 1.0 if x_d > x0 else -1.0
    p_mean = float(np.sum(k_all * w_all) / np.sum(w_all))
    if direction * p_mean <= 0:
        raise JobError("--detector", f"detector {name!r} lies behind the packet's start (it moves the "
                                     "other way); T(E) needs a detector beyond the scatterer on its path")

    t = np.asarray(ds["time"].values, float) * uc["time"]
    crossed = abs(float(np.trapezoid(ds["flux"].values[:, j], ds["time"].values)))
    if crossed < NOTHING_CROSSED:
        raise JobError("--detector", f"nothing reached detector {name!r} during the run "
                                     f"(net crossing {crossed:.1e}); place it beyond the scatterer, "
                                     "on the packet's path, or run longer")
    amp = (np.asarray(ds["detector_psi_real"].values[:, j], float)
           + 1j * np.asarray(ds["detector_psi_imag"].values[:, j], float)) / math.sqrt(uc["length"])
    peak = float(np.max(np.abs(amp) ** 2))
    if abs(amp[0]) ** 2 > AMPLITUDE_AT_START * peak:
        raise JobError("packet.center", f"the initial packet already overlaps detector {name!r}; "
                                        "start it farther from the detector")
    psi_end = _final_psi(ds, uc)
    end_ratio = abs(amp[-1]) ** 2 / peak
    if psi_end is None and end_ratio > AMPLITUDE_AT_END:
        # what is still to come cannot be told without the final state
        raise JobError("evolve.duration", f"psi at detector {name!r} has not died out by the end "
                                          f"(|psi|^2 at {end_ratio:.1e} of its peak) and the run kept no "
                                          "final state to tell what is still to come; extend "
                                          "evolve.duration or set record.final_state = true")

    v_static = setup.static_potential
    v_start = float(np.sum(v_static * dens0) / np.sum(dens0))
    v_det = float(np.interp(x_d, x, v_static))
    mass = setup.mass

    forward = k_all * direction > 0
    w_fwd = np.where(forward, w_all, 0.0)
    k_band = k_all[w_fwd > BAND_FLOOR * w_fwd.max()]
    e_band = v_start + k_band**2 / (2 * mass)
    dt_rec = _unaliased_spacing(t, e_band, uc)
    k = _wave_numbers_with_weight(k_all, w_fwd, points)
    phi = _momentum_amplitude(setup.psi0, x, k)
    # --- what had not passed the detector by the end (module notes) ---
    energy = v_start + k**2 / (2 * mass)
    if psi_end is not None:
        to_come = _still_to_come(psi_end, x, v_static, mass, x_d, direction, v_start, energy, k,
                                 _far_layer(setup, direction))
    else:                                   # died out (checked above): the cut bounds the rest
        to_come = np.zeros_like(energy)
    # the detector's side is the final channel: its potential there is V_f
    spectrum = transmission_from_samples(t, amp, k, np.abs(phi) ** 2, mass, v_start, v_det,
                                         still_to_come=to_come,
                                         band_center=0.5 * float(e_band.min() + e_band.max()))
    # the premises (module notes), as on coupled surfaces: a flat start, nothing sent back
    starts = {} if starts is None else starts
    if direction not in starts:
        starts[direction] = _single_start(setup, k_all, w_all, direction, points, uc)
    start_rel, worst_start, refusal = starts[direction]
    failed = [("packet.center", refusal)] if refusal is not None else []
    comes_back, refused = _sent_back(ds, np.asarray(ds["flux"].values, float)[:, j] * direction, psi_end,
                                     setup, x, x_d, direction, name)
    if refused:
        failed.append(("absorber.faces", comes_back))
    if failed:
        raise JobError(failed[0][0], "; ".join(m for _, m in failed))
    notes = [comes_back] if comes_back is not None else []
    if worst_start > UNCERTAINTY_TARGET:
        notes.append(f"the packet starts where V is not quite flat (T(E) off by up to {worst_start:.2g} "
                     "relative, in its +/-): start it where V is flat")
    return {"detector": name, "energy": spectrum.energy / uc["energy"], "T": spectrum.transmission,
            "energy_units": uc["energy_label"], "duration": float(t[-1] - t[0]) / uc["time"],
            "time_units": uc["time_label"], "premise_warnings": notes,
            **_settled(spectrum, t, amp, k_all, w_fwd, v_start, v_det, mass, uc,
                       premise=spectrum.transmission * start_rel, no_promise=comes_back)}


def _settled(spectrum, t, amp, k_all, w_fwd, v_start, v_det, mass, uc, premise=None,
             no_promise: str | None = None) -> dict:
    """How far T(E) into one final channel can be trusted (job units), from
    its :func:`transmission_from_samples` with ``still_to_come``: the
    uncertainty per energy ``T_uncertainty``, the incident ``weight``
    normalised to its peak, ``largest_uncertainty`` where the weight is
    above WEIGHT_FLOOR and where (``largest_at``), ``uncertain_span`` (the
    energies where it is above UNCERTAINTY_TARGET, or None),
    ``duration_needed`` (None when settled, and when no longer run is known
    to settle it: ``unsettled_because`` then says why) and ``peak_energy``.
    One surface's T(E) and each final surface's on coupled surfaces.

    ``premise``: T's uncertainty per energy from the method's premises
    holding only approximately (:func:`_start_effect`, :func:`_mixing_effect`),
    added to what had not passed the detector; a longer run does not shrink
    it, so where it alone is above the target no duration is promised.
    ``no_promise``: why no longer run settles T whatever the tail (psi
    comes back across the detector), or None."""
    energy, uncertainty = spectrum.energy, spectrum.uncertainty
    weight = spectrum.momentum_density / w_fwd.max()
    significant = weight > WEIGHT_FLOOR
    truncated = float(np.max(uncertainty[significant], initial=0.0))
    if premise is not None:
        T = spectrum.transmission
        open_channel = energy > v_det            # closed: T = 0 exactly, as the truncation's
        uncertainty = np.where(open_channel,
                               np.minimum(uncertainty + premise, np.maximum(T, np.abs(1 - T))), 0.0)
    largest = float(np.max(uncertainty[significant], initial=0.0))
    largest_at = float(energy[significant][np.argmax(uncertainty[significant])]) if significant.any() \
        else math.nan
    from_premise = float(np.max(premise[significant], initial=0.0)) if premise is not None else 0.0
    needed, span, because = None, None, None
    if largest > UNCERTAINTY_TARGET:
        over = energy[significant & (uncertainty > UNCERTAINTY_TARGET)] / uc["energy"]
        span = (float(over.min()), float(over.max()))
        span_run = float(t[-1] - t[0])
        if no_promise is not None:
            because = no_promise
        elif from_premise > UNCERTAINTY_TARGET:
            because = (f"{from_premise:.2g} of it comes from the method's premises holding only approximately "
                       "(see the warnings), which a longer run does not change")
        elif truncated > UNCERTAINTY_TARGET:
            needed = _duration_needed(t, amp, spectrum.arriving_energy, k_all, w_fwd, v_start, v_det, mass,
                                      truncated)
            if not needed > span_run * (1 + 1e-6):
                # the tail follows neither free flight nor a decay that a longer run would see out
                needed, because = None, ("the record's tail at the detector cannot be extrapolated (it follows "
                                         "neither free flight nor a steady decay)")
            else:
                needed /= uc["time"]
    return {"T_uncertainty": uncertainty, "weight": weight, "duration_needed": needed,
            "largest_uncertainty": largest, "largest_at": largest_at / uc["energy"], "uncertain_span": span,
            "peak_energy": float(energy[np.argmax(weight)]) / uc["energy"], "unsettled_because": because}


def _start_effect(dens0, v_incident, energy, wave_number, momentum_density, mass,
                  couplings=()) -> tuple[np.ndarray, float, float]:
    """T(E)'s relative error from a packet that does not start where its
    surface is flat and uncoupled (atomic units): (per energy, the mean
    |V - V_in| over the packet, r).

    The method counts the component of wave number k at E = V_in + k^2 / 2m,
    V_in = <V> over |psi0|^2, and divides by the incident weight per energy
    n(E) = |phi(k)|^2 m / |k|.  Where V varies across the packet, the part
    d(x) of the packet at x carries V(x) + k^2 / 2m, its energy label off by
    delta(x) = |V(x) - V_in|; that changes the weight divided by, and so T,
    by |d ln n / dE| delta to first order, and by at most n_peak / n(E)
    (all of it moved to the energy of the peak).  With 2 delta, and
    1 / (band width W) added to |d ln n / dE| for the spread itself (n
    changes where its slope vanishes too):

        dT / T = sum_x d(x) min(n_peak / n(E), 2 delta(x) (|d ln n / dE| + 1 / W)),

    so that a far tail of the packet on a barrier counts by its weight.
    Measured on the trial's tanh surface -0.02 tanh(x / 4) hartree with
    packets at x = -25, -30, -40 bohr (mass 2000, 0.06 hartree kinetic;
    mean delta 1.2e-7, 9.5e-9, 6.4e-11 hartree), against T = 1: the error
    (1.3e-4, 1.1e-5, 1.8e-7 at most) stayed below 0.46, 0.46 and 0.77 of
    the whole +/- (this plus what had not passed the detector: 3.0e-4,
    2.5e-5, 5.3e-7 at most) at every energy of weight above 1 %; without
    this term the stated +/- was 100 times below the error at -30 bohr.
    ``couplings``: (|V_ab|, V_aa - V_bb) over the grid for each surface b
    coupled to the incident a: the packet then starts a mixture, about
    r = <sin^2 theta>^(1/2) in amplitude of the other state, theta the
    local mixing angle (:func:`_mixing_angle`; |V_ab| / |V_aa - V_bb| where
    small), which changes T by up to 2 r relative."""
    d = np.asarray(dens0, float) / float(np.sum(dens0))
    v_in = float(np.sum(v_incident * d))
    delta = np.abs(np.asarray(v_incident, float) - v_in)
    held = d > 0
    mean_delta = float(np.sum(delta * d))
    weight = np.asarray(momentum_density, float) * mass / np.abs(wave_number)
    slope = np.abs(np.gradient(np.log(np.maximum(weight, 1e-300)), energy)) if len(energy) > 1 \
        else np.zeros_like(energy)
    band = float(np.ptp(energy)) or 1.0
    cap = weight.max() / np.maximum(weight, 1e-300)
    rel = np.zeros_like(energy)
    rows = max(1, AMPLITUDE_BLOCK // max(len(energy), 1))
    d_held, delta_held = d[held], delta[held]
    for i in range(0, len(d_held), rows):      # (grid points x energies) in blocks, as the amplitudes
        part = np.minimum(cap, 2 * np.outer(delta_held[i:i + rows], slope + 1 / band))
        rel += d_held[i:i + rows] @ part
    mixing = 0.0
    for coupling, gap in couplings:
        mixing = max(mixing, math.sqrt(float(np.sum(_mixing_angle(coupling, gap) ** 2 * d))))
    return rel + 2 * mixing, mean_delta, mixing


def _mixing_angle(coupling, gap) -> np.ndarray:
    """sin theta of the local eigenvectors of [[V_aa, V_ab], [V_ab*, V_bb]]
    (tan 2 theta = 2 |V_ab| / |V_aa - V_bb|): the amplitude of b in the
    eigenvector nearest a, |V_ab| / |V_aa - V_bb| where that is small and
    1 / sqrt 2 where the surfaces cross."""
    return np.sin(0.5 * np.arctan2(2 * np.abs(coupling), np.abs(gap)))


def _came_back(t, forward_flux) -> tuple[float, float]:
    """(back, forward): the probability that crossed a detector against the
    packet's motion and with it, int max(-J, 0) dt and int max(J, 0) dt
    summed over the surfaces; ``forward_flux`` (time, ...) is J oriented
    along the motion.  What crosses back after the main passage was sent
    back by the far side (a wall without an absorber, or a grid's period)."""
    j = np.asarray(forward_flux, float).reshape(len(t), -1)
    back = float(np.sum([np.trapezoid(np.maximum(-j[:, i], 0.0), t) for i in range(j.shape[1])]))
    forward = float(np.sum([np.trapezoid(np.maximum(j[:, i], 0.0), t) for i in range(j.shape[1])]))
    return back, forward


def _sent_back(ds, forward_flux, psi_end, setup, x, x_d, direction: int, name: str) -> tuple[str | None, bool]:
    """The premise that nothing comes back across detector ``name`` (at
    ``x_d``, the packet moving along ``direction``), one rule for one
    surface and coupled ones: ``(reason, refused)``, the reason (None when
    it holds, :func:`_comes_back_reason`) and whether what came back, or
    what is beyond the detector at the end with no absorber to take it
    (``psi_end`` (..., x): summed over any surfaces), is above
    PREMISE_LIMIT of what passed (T(E) is then refused, not warned about).
    ``forward_flux`` (time, ...): J oriented along the motion."""
    back, forward = _came_back(np.asarray(ds["time"].values, float), forward_flux)
    beyond_left = None
    far_face = "x+" if direction > 0 else "x-"
    if psi_end is not None and _far_layer(setup, direction) is None:
        beyond_left = float(np.sum(np.abs(psi_end[..., direction * (x - x_d) > 0]) ** 2)) * setup.grid.axes[0].dx
    reason = _comes_back_reason(name, back, forward, beyond_left, far_face) if forward > 0 else None
    return reason, reason is not None and max(back, beyond_left or 0.0) > PREMISE_LIMIT * forward


def _comes_back_reason(name, back, forward, beyond_left, far_face) -> str | None:
    """Why T(E) at detector ``name`` is spoiled by what the far side sends
    back (what came back, and what is beyond it at the end with no absorber
    to take it), or None."""
    parts = []
    if back > CAME_BACK * forward:
        parts.append(f"{back / forward:.2g} of what passed detector {name!r} came back across it")
    if beyond_left is not None and beyond_left > CAME_BACK * forward:
        parts.append(f"{beyond_left:.2g} is beyond it at the end with no absorber at {far_face} to take it")
    if not parts:
        return None
    return (" and ".join(parts) + f": the far side sends psi back (a wall or the grid's period), which a longer "
            f"run does not cure; add an absorbing layer at {far_face} ([absorber] faces)")


class SampledTransmission(NamedTuple):
    """T(E) from psi sampled at a detector (:func:`transmission_from_samples`).
    All arrays are per incident wave number, atomic units."""

    energy: np.ndarray           # E = V_in + hbar^2 k^2 / 2m (hartree), ascending when k is sorted by |k|
    transmission: np.ndarray     # T(E) into the final channel (0 where it is closed)
    energy_amplitude: np.ndarray  # psi~(E) = (1 / 2 pi hbar) int psi(x_d, t) exp(i E t / hbar) dt
    to_transmission: np.ndarray  # T = to_transmission |psi~(E)|^2 (2 pi hbar^2 v_in v_f / |phi|^2)
    momentum_density: np.ndarray | None = None   # |phi(k)|^2 as given
    uncertainty: np.ndarray | None = None        # dT(E): what had not passed by the end (with still_to_come)
    arriving_energy: np.ndarray | None = None    # E(t) arriving at the detector between samples (idem)


def transmission_from_samples(time, psi_detector, wave_number, momentum_density, mass,
                              incident_potential, final_potential, still_to_come=None,
                              band_center=None) -> SampledTransmission:
    """T(E) into one final channel from psi sampled at a detector beyond the
    scatterer (the module notes' method, on plain arrays; atomic units,
    hbar = 1).

    ``time``: the sample times; ``psi_detector``: psi(x_d, t) there
    (bohr^-1/2 in 1D), its trapezoidal sum standing for the time integral
    (uneven samples get np.gradient weights); ``wave_number``: the incident
    packet's wave numbers k (bohr^-1, signed: the direction it moves) where
    T is wanted; ``momentum_density``: |phi(k)|^2 there (continuous
    normalisation, int |phi|^2 dk = 1, phi of psi(t = 0) where the incident
    potential is ``incident_potential``); ``final_potential``: the final
    channel's potential energy V_f at and beyond the detector (hartree).

    E = V_in + k^2 / 2m; the wave arriving with energy E has k_f =
    sqrt(2 m (E - V_f)) there, speed v_f = k_f / m, and

        T(E) = 2 pi hbar^2 v_in v_f |psi~(E)|^2 / |phi(k)|^2,

    v_in = |k| / m; T = 0 where E <= V_f (the channel is closed: nothing
    crosses a detector far beyond the scatterer).  The samples must not
    alias the packet's band (spacing < 2 pi hbar / its width) and psi must
    have died out at the detector by the last one (see the module notes
    for what a truncated record misses).

    ``still_to_come``: the final state's probability per energy (per
    hartree, at the energies E) that may still cross the detector (zeros:
    none); given, the result carries T's ``uncertainty`` per energy from
    what had not passed by the end (the module notes: the cut record's
    tail continued from its last samples, and what is still to come; 0
    where the channel is closed) and the energy ``arriving_energy`` at the
    detector between samples (on the branch nearest ``band_center``,
    hartree; default the middle of the energies)."""
    t = np.asarray(time, float)
    amp = np.asarray(psi_detector, complex)
    k = np.asarray(wave_number, float)
    density = np.asarray(momentum_density, float)
    if t.ndim != 1 or amp.shape != t.shape or t.size < 2:
        raise ValueError(f"time and psi_detector must be 1D of the same length (>= 2); got shapes "
                         f"{t.shape} and {amp.shape}")
    if k.shape != density.shape:
        raise ValueError(f"wave_number and momentum_density must have the same shape; got {k.shape} "
                         f"and {density.shape}")
    energy = incident_potential + k**2 / (2 * mass)
    v_in = np.abs(k) / mass
    kinetic_final = energy - final_potential
    v_final = np.sqrt(np.maximum(2 * kinetic_final / mass, 0.0))
    dt_rec = float(np.median(np.diff(t)))
    # the field-free case of the surface-flux transform (one implementation: surface_flux.time_transform)
    amp_e = time_transform(t, amp, np.outer(energy, t))
    to_T = 2 * math.pi * v_in * v_final / density     # |amplitude per energy|^2 -> T
    T = to_T * np.abs(amp_e) ** 2
    T[~(kinetic_final > 0)] = 0.0
    if still_to_come is None:
        return SampledTransmission(energy, T, amp_e, to_T, density)
    e_center = 0.5 * float(energy.min() + energy.max()) if band_center is None else float(band_center)
    e_local = _local_energy(amp, dt_rec, e_center)
    tail_cut = to_T * _cut_tail(amp, t, energy, e_local[-1]) ** 2
    incident = density * mass / np.abs(k)       # |phi|^2 dk/dE, per hartree
    tail_come = np.asarray(still_to_come, float) / incident
    tail = np.sqrt(tail_cut) + np.sqrt(tail_come)          # |tail amplitude| in units of sqrt(T)
    uncertainty = 2 * np.sqrt(np.maximum(T, 0.0)) * tail + tail**2
    uncertainty = np.minimum(uncertainty, np.maximum(T, np.abs(1 - T)))   # T lies in [0, 1]
    uncertainty[~(kinetic_final > 0)] = 0.0
    return SampledTransmission(energy, T, amp_e, to_T, density, uncertainty, e_local)


def surface_transmission(time, psi_detector, wave_number, momentum_density, mass, incident_potential,
                         final_potentials) -> tuple[np.ndarray, np.ndarray]:
    """T_s(E) into each final surface s from one packet on coupled surfaces
    (1D; atomic units, hbar = 1): the single-surface method
    (:func:`transmission_from_samples`, module notes) per surface.

    ``psi_detector``: (S, samples), psi_s(x_d, t) at a detector beyond the
    scatterer, where the couplings vanish and each V_ss is flat (its
    asymptote ``final_potentials[s]``, hartree); ``time``,
    ``wave_number``, ``momentum_density`` and ``incident_potential`` are
    the incident surface's packet's, as in :func:`transmission_from_samples`
    (the packet starts on that surface only, entirely on the other side of
    the scatterer, where that surface is flat at V_in and uncoupled).
    Returns (energy (K,), T (S, K)); T_s = 0 where surface s is closed.

    Derivation.  Expand psi(t = 0) = int dk phi(k) Psi_k in the scattering
    states Psi_k of energy E = V_in + hbar^2 k^2 / 2m that come in on the
    incident surface as exp(i k x) / sqrt(2 pi).  Beyond the scatterer (no
    coupling, V_ss = V_s) the component of Psi_k on surface s is
    t_s(k) exp(i k_s x) / sqrt(2 pi), k_s(E) = sqrt(2 m (E - V_s)) / hbar,
    when E > V_s; below, it decays away from the scatterer and is nothing at
    a detector far from it.  So psi_s(x_d, t) = int dk phi t_s exp(i k_s x_d
    - i E t / hbar) / sqrt(2 pi), and with dE = hbar v_in dk

        psi~_s(E) = (1 / 2 pi hbar) int psi_s(x_d, t) exp(i E t / hbar) dt
                  = phi(k) t_s(k) exp(i k_s x_d) / (sqrt(2 pi) hbar v_in).

    The flux of t_s exp(i k_s x) against that of the incoming wave is
    T_s = (v_s / v_in) |t_s|^2, v_s = hbar k_s / m, hence

        T_s(E) = 2 pi hbar^2 v_in v_s |psi~_s(E)|^2 / |phi(k)|^2,

    the single-surface formula with the final speed taken on surface s.
    The channels are the diabatic surfaces because the couplings vanish at
    the detector.  Single-channel method: Tannor, Introduction to Quantum
    Mechanics: A Time-Dependent Perspective (2007), ch. 7 (from memory), as
    in the module notes; sum_s T_s + R = 1 for a real potential matrix."""
    psi = np.asarray(psi_detector, complex)
    v_final = np.atleast_1d(np.asarray(final_potentials, float))
    if psi.ndim != 2 or psi.shape[0] != v_final.size:
        raise ValueError(f"psi_detector must be (surfaces, samples) with one final potential per surface; "
                         f"got shape {psi.shape} and {v_final.size} potentials")
    runs = surface_spectra(time, psi, wave_number, momentum_density, mass, incident_potential, v_final)
    return runs[0].energy, np.stack([run.transmission for run in runs])


def surface_spectra(time, psi_detector, wave_number, momentum_density, mass, incident_potential,
                    final_potentials, still_to_come=None, band_center=None) -> list[SampledTransmission]:
    """:func:`transmission_from_samples` into each final surface s (the
    arguments as for :func:`surface_transmission`), with T_s's uncertainty
    where ``still_to_come`` (per hartree of the total energy E, what may
    still cross the detector on s, or reach s and then cross it) is
    given: (K,) the same for every surface, or (S, K) per final surface."""
    psi = np.asarray(psi_detector, complex)
    v_final = np.atleast_1d(np.asarray(final_potentials, float))
    if psi.ndim != 2 or psi.shape[0] != v_final.size:
        raise ValueError(f"psi_detector must be (surfaces, samples) with one final potential per surface; "
                         f"got shape {psi.shape} and {v_final.size} potentials")
    come = [None] * v_final.size if still_to_come is None else \
        np.broadcast_to(np.asarray(still_to_come, float), (v_final.size, np.size(wave_number)))
    return [transmission_from_samples(time, psi[s], wave_number, momentum_density, mass, incident_potential,
                                      v_final[s], come[s], band_center) for s in range(v_final.size)]


def incident_wave_numbers(psi0, x, direction, points: int = 201) -> tuple[np.ndarray, np.ndarray]:
    """The incident packet's wave numbers where energy-resolved T is given
    and its momentum density there, as :func:`energy_resolved_transmission`
    chooses them: ``points`` evenly spaced wave numbers (bohr^-1) moving in
    ``direction`` (+1 or -1) across the band where |phi|^2 is above
    WEIGHT_FLOOR of its peak, ordered by |k|; and |phi(k)|^2 (bohr, int
    |phi|^2 dk = 1) of ``psi0`` on the uniform grid ``x`` (1D, bohr)."""
    x = np.asarray(x, float)
    k_all, w_all = _padded_momentum_density(psi0, x[1] - x[0])
    w_fwd = np.where(k_all * direction > 0, w_all, 0.0)
    k = _wave_numbers_with_weight(k_all, w_fwd, points)
    return k, np.abs(_momentum_amplitude(psi0, x, k)) ** 2


def _padded_momentum_density(psi0, dx) -> tuple[np.ndarray, np.ndarray]:
    """Incident momentum density (continuous normalisation, int |phi|^2 dk
    = 1) on a k grid 8 times finer than the grid's own (zero-padded FFT):
    (k, |phi(k)|^2), k ascending."""
    pad = 8 * len(psi0)
    k_all = np.fft.fftshift(2 * math.pi * np.fft.fftfreq(pad, dx))
    w_all = np.fft.fftshift(np.abs(np.fft.fft(psi0, n=pad)) ** 2) * dx**2 / (2 * math.pi)
    return k_all, w_all


def _wave_numbers_with_weight(k_all, w_fwd, points) -> np.ndarray:
    """``points`` wave numbers evenly across those where the forward weight
    is above WEIGHT_FLOOR of its peak, energies ascending whichever way the
    packet moves."""
    k_rep = k_all[w_fwd > WEIGHT_FLOOR * w_fwd.max()]
    k = np.linspace(k_rep.min(), k_rep.max(), points)
    return k[np.argsort(np.abs(k))]


def _final_psi(ds, uc) -> np.ndarray | None:
    """psi at the end of the run (atomic units, 1D), or None if not kept."""
    if "psi_real" not in ds:
        return None
    return (np.asarray(ds["psi_real"].values, float)
            + 1j * np.asarray(ds["psi_imag"].values, float)) / math.sqrt(uc["length"])


def _local_energy(amp, dt, e_center) -> np.ndarray:
    """E(t) = -hbar d(arg psi)/dt at the detector, between samples (the
    energy arriving then), on the branch nearest the packet's band (the
    band is narrower than 2 pi / dt, checked before)."""
    turn = np.angle(amp[1:] * np.conj(amp[:-1]))
    e = -turn / dt
    return e + 2 * math.pi / dt * np.round((e_center - e) * dt / (2 * math.pi))


def _cut_tail(amp, t, energy, e_end) -> np.ndarray:
    """|int_{t_end}^inf psi(x_d, t) exp(i E t) dt| / (2 pi) for a tail that
    goes on as psi_end exp(-i E_end (t - t_end) - gamma (t - t_end)): the
    sharp end of the record leaks |psi_end| / (2 pi |E - E_end|) into every
    energy (:func:`flux_method.cut_tail`, the model the spectra use)."""
    return cut_tail(amp[-1], energy - e_end, tail_decay(amp, t)) / (2 * math.pi)


def _still_to_come(psi, x, v_static, mass, x_d, direction, v_inc, energy, k_inc,
                   far_layer) -> np.ndarray:
    """Probability per energy (per hartree) of the final state that may
    still cross the detector.  Smooth ramps split psi into three parts:

    - the run-up: before the detector and beyond the far side of where V
      differs from its value at the start (V flat there): counted moving
      towards the detector, E = V_start + k^2 / 2m;
    - the scattering zone, between that side and the detector: counted
      moving either way (the potential may still turn it round),
      E = V(x_d) + k^2 / 2m (what crosses the detector has that kinetic
      energy there);
    - past the detector and before the absorbing layer there (inner edge
      ``far_layer``, None without one): counted moving back towards it
      (what the layer or a structure further on has sent back),
      E = V(x_d) + k^2 / 2m.  Inside that layer the damping bends the
      outgoing wave into all momenta: it is not counted there.

    Each part's momentum density |c(k)|^2 (int |c|^2 dk = its probability)
    becomes a density in energy with dk/dE = m / |k|.  The layer behind
    the packet is counted like the rest: what it passes round a periodic
    grid or sends back is still to come."""
    upstream = direction * (x_d - x) > 0
    v_det = float(np.interp(x_d, x, v_static))
    k_rms = math.sqrt(float(np.mean(k_inc**2)))
    ramp = 4.0 / k_rms          # as in arrivals: shorter than a wavelength, 2 pi / k
    e_kin = float(np.mean(energy)) - v_inc
    varies = upstream & (np.abs(v_static - v_inc) > VARIES * abs(e_kin))
    before = 0.5 * (1 + np.tanh(direction * (x_d - x) / ramp))
    if varies.any():
        far = float(x[varies][np.argmin(direction * x[varies])])
        run_up = 0.5 * (1 + np.tanh(direction * (far - x) / ramp))
    else:
        run_up = np.ones_like(x)
    parts = ((before * run_up, v_inc, (direction,)),
             (before * (1 - run_up), v_det, (direction, -direction)),
             ((1 - before) * _short_of(x, far_layer, direction, ramp), v_det, (-direction,)))
    out = np.zeros_like(energy)
    for share, v_part, signs in parts:
        part = psi * share
        if not np.any(np.abs(part) > 0):
            continue
        kinetic = energy - v_part
        moving = kinetic > 0
        kk = np.sqrt(2 * mass * kinetic[moving])
        for sign in signs:
            out[moving] += np.abs(_momentum_amplitude(part, x, sign * kk)) ** 2 * mass / kk
    return out


def _short_of(x, edge, direction, ramp) -> np.ndarray:
    """1 before ``edge`` (going in ``direction``), 0 after, a tanh ramp between."""
    if edge is None:
        return np.ones_like(x)
    return 0.5 * (1 + np.tanh(direction * (edge - x) / ramp))


def _far_layer(setup, direction) -> float | None:
    """Inner edge of the absorbing layer the packet runs into (1D), or None."""

    face = "x+" if direction > 0 else "x-"
    ab = setup.absorber
    if not ab.active or face not in [layer.name for layer in ab.layers]:
        return None
    return layer_edge(setup, face)


def _duration_needed(t, amp, e_local, k_all, w_fwd, v_start, v_det, mass, largest) -> float:
    """Run length (atomic units, from the first sample) after which the
    uncertainty would be below UNCERTAINTY_TARGET (module notes).

    Two regimes, told apart by how fast the energy arriving at the end
    falls.  Dispersing (the slow parts come last): E(t) follows the
    free-flight law t(E) = t0 + D / v(E), v the speed at the detector,
    fitted to the record's peak and its end, and the run lasts until the
    energy of incident weight w(E_end) (target / largest)^2 arrives.
    Ringing (a resonance decays at a fixed energy, E(t) falling at less than
    RINGING of the free-flight rate): |psi(x_d)| decays as exp(-gamma t),
    measured over the last tenth of the record, and so does the
    uncertainty: ln(largest / target) / gamma more."""
    a = np.abs(amp)
    e_end = float(e_local[-1])
    span = float(t[-1] - t[0])

    def speed(e):
        return math.sqrt(max(2 * (e - v_det) / mass, 0.0))

    i_peak = int(np.argmax(a))
    t_peak, e_peak = float(t[i_peak]), float(e_local[max(i_peak - 1, 0)])
    v_end, v_peak = speed(e_end), speed(e_peak)
    dispersing = v_peak > v_end > 0 and t[-1] > t_peak
    if dispersing:
        distance = (t[-1] - t_peak) / (1 / v_end - 1 / v_peak)
        t0 = t[-1] - distance / v_end
        # dE/dt of free flight at the end against what the record shows
        m = max(2, len(t) // 10)
        falls = (e_local[-m] - e_local[-1]) / (t[-1] - t[-m])
        dispersing = falls > RINGING * mass * v_end**3 / distance
    if not dispersing:
        m = max(2, len(t) // 10)
        gamma = math.log(a[-m] / a[-1]) / (t[-1] - t[-m]) if a[-1] > 0 and a[-m] > a[-1] else 0.0
        if gamma <= 0:
            return 2.0 * span            # not decaying yet: at least twice as long
        return span + math.log(largest / UNCERTAINTY_TARGET) / gamma
    weight = w_fwd / w_fwd.max()
    fwd = w_fwd > 0
    kk, weight = np.abs(k_all[fwd]), weight[fwd]
    order = np.argsort(kk)
    kk, weight = kk[order], weight[order]
    k_end = math.sqrt(max(2 * mass * (e_end - v_start), 0.0))
    w_need = float(np.interp(k_end, kk, weight)) * (UNCERTAINTY_TARGET / largest) ** 2
    # the slowest momentum still carrying w_need, on the slow side of the peak
    slow = (kk <= kk[np.argmax(weight)]) & (weight >= w_need)
    k_slow = float(kk[slow].min()) if slow.any() else k_end
    v_slow = speed(v_start + k_slow**2 / (2 * mass))
    if not v_slow > 0:
        return 2.0 * span
    return max(float(t0 + distance / v_slow - t[0]), span)


def _unaliased_spacing(t, e_band, uc) -> float:
    """The samples' spacing (hartree^-1 hbar), refused in one line naming
    record.every when the packet's band of energies ``e_band`` (hartree) is
    as wide as 2 pi hbar / spacing: the trapezoid over the samples is exact
    only up to aliases 2 pi hbar / spacing apart (module notes)."""
    dt_rec = float(np.median(np.diff(t)))
    width = float(e_band.max() - e_band.min())
    if width >= 2 * math.pi / dt_rec:
        need = 2 * math.pi / width / uc["time"]
        raise JobError("record.every", f"samples {dt_rec / uc['time']:g} {uc['time_label']} apart alias "
                                       f"the packet's band of {width / uc['energy']:.3g} {uc['energy_label']}; "
                                       f"use record.every < {need:.3g} {uc['time_label']}")
    return dt_rec


def _momentum_amplitude(psi, x, k) -> np.ndarray:
    """phi(k) = (2 pi)^(-1/2) int psi(x) exp(-i k x) dx by the grid sum (exact
    for a band-limited psi on the grid), in blocks to bound the memory."""
    out = np.empty(len(k), complex)
    dx = x[1] - x[0]
    # (wave numbers x grid) per block: bounded; 256 rows up to 4096 points, as before
    rows = min(256, max(1, AMPLITUDE_BLOCK // len(x)))
    for i in range(0, len(k), rows):
        kk = k[i:i + rows]
        out[i:i + rows] = np.exp(-1j * np.outer(kk, x)) @ psi * dx / math.sqrt(2 * math.pi)
    return out


def truncation_warning(er: dict) -> str:
    """One line: where T(E) is uncertain and the duration that would settle
    it, or why no longer run is known to (``unsettled_because``)."""
    lo, hi = er["uncertain_span"]
    unit = er["energy_units"]
    if hi < er["peak_energy"]:
        where = f"below E = {hi:.4g} {unit}"
    elif lo > er["peak_energy"]:
        where = f"above E = {lo:.4g} {unit}"
    else:
        where = f"from E = {lo:.4g} to {hi:.4g} {unit}"
    said = (f"T(E) is uncertain by up to {er['largest_uncertainty']:.2g} (at E = {er['largest_at']:.4g} {unit}; "
            f"by more than {UNCERTAINTY_TARGET:g} {where})")
    if er.get("duration_needed") is None:
        return f"at detector {er['detector']!r} {said}; no run length is said to settle it: " \
               f"{er.get('unsettled_because') or 'its tail cannot be extrapolated'}"
    return (f"the run ended before all of the packet had passed detector {er['detector']!r}: {said}; "
            f"evolve.duration = {er['duration_needed']:.4g} {er['time_units']} would bring it below "
            f"{UNCERTAINTY_TARGET:g}")


def transmission(result, detector: str | None = None) -> dict:
    """Totals and (where the run allows) T(E), from a result path or dataset.
    ``energy_resolved`` holds T(E) with its uncertainty, or the reason it is
    missing; ``warnings`` says when the run was too short for T(E) to be
    settled to UNCERTAINTY_TARGET.  A result of coupled surfaces:
    :func:`coupled_transmission`."""

    ds = open_result(result, require=("time", "norm", "flux"), surfaces=True)
    try:
        if "surface" in ds.dims:
            return coupled_transmission(ds, detector)
        setup = read_record(ds)    # what the run wrote for analysis: never a set-up rebuilt from its job
        out = {"totals": transmission_totals(ds, setup), "warnings": [],
               "time_units": result_units(ds)["time_label"]}
        out["warnings"].extend(recorded_warnings(setup))
        try:
            er = out["energy_resolved"] = energy_resolved_transmission(ds, setup, detector)
            out["warnings"].extend(er.get("premise_warnings", []))
            if er["uncertain_span"] is not None:
                out["warnings"].append(truncation_warning(er))
        except JobError as e:
            # the totals stand; a detector asked for by name makes its failure an error (the CLI
            # prints the totals first)
            out["energy_resolved"] = {"reason": f"{e.field}: {e.message}", "error": e,
                                      "requested": detector is not None}
        return out
    finally:
        if ds is not result:
            ds.close()


def coupled_totals(ds, setup) -> dict:
    """Totals of a run on coupled surfaces (job units of length, probabilities):
    ``absorbed`` {surface: {face: at the end}}, ``final_norm`` {surface: on
    the grid at the end}, and per detector ``far_face`` and per surface
    ``beyond`` (on surface s beyond the detector at the end, from the final
    psi_s, plus what the far face absorbed on s; NaN without a final state)
    and ``crossed`` (int J_s dt, oriented away from the packet's start).
    ``setup``: the run's :class:`~wavesweep.setup.CoupledSetup`."""
    surfaces = [str(v) for v in ds["surface"].values]
    faces = [str(b) for b in ds["boundary"].values] if "boundary" in ds.coords else []
    uc = result_units(ds)
    n_time = ds.sizes.get("time", 0)
    absorbed = {s: {f: float(ds["absorbed"][-1, i, k].values) if n_time else 0.0 for k, f in enumerate(faces)}
                for i, s in enumerate(surfaces)}
    norm = np.asarray(ds["norm"].values[-1], float)
    out = {"absorbed": absorbed, "final_norm": {s: float(norm[i]) for i, s in enumerate(surfaces)}, "detectors": {}}
    psi = None
    if "psi_real" in ds:
        psi = np.asarray(ds["psi_real"].values, float) + 1j * np.asarray(ds["psi_imag"].values, float)
        coords = [np.asarray(ds[d].values, float) for d in ds["psi_real"].dims[1:]]
    t = np.asarray(ds["time"].values, float)
    flux = np.asarray(ds["flux"].values, float)
    dens0 = np.abs(setup.psi0) ** 2
    for j, name in enumerate(str(d) for d in ds["detector"].values):
        det = setup.detectors[j]
        center = float(np.sum(dens0 * setup.grid.coordinate(det.axis)) / np.sum(dens0))
        side = 1.0 if center > det.position else -1.0
        far_face = f"{setup.grid.names[det.axis]}{'-' if side > 0 else '+'}"
        per = {}
        for i, surface in enumerate(surfaces):
            on_grid = side_probability(psi[i], coords, uc["length"], det.axis, det.position, -side) \
                if psi is not None else math.nan
            per[surface] = {"beyond": on_grid + absorbed[surface].get(far_face, 0.0),
                            "crossed": float(np.trapezoid(flux[:, i, j], t)) * (-side)}
        out["detectors"][name] = {"far_face": far_face, "surfaces": per}
    return out


def coupled_energy_resolved(ds, setup, detector: str | None = None, points: int = 201) -> dict:
    """T_s(E) into each surface s from one packet on coupled surfaces (1D,
    static potential matrix, detector amplitudes recorded; the packet on one
    surface at the start): :func:`surface_spectra` on the file's
    psi_s(x_d, t), the incident momentum density of the set-up's psi0
    (:func:`incident_wave_numbers`), V_in = <V_in> over |psi0|^2 and V_s
    from ``potential(surface, x)`` at the detector.  Without ``detector``
    the farthest detector along the packet's motion outside the absorbing
    layers is used.  Energies in job units.  Each T_s(E) comes with the
    single surface's trust statement, by the same code
    (:func:`transmission_from_samples` with ``still_to_come``, then
    :func:`_settled`): ``T_uncertainty`` {surface: per energy},
    ``largest_uncertainty`` and ``uncertain_span`` per surface (where the
    weight is above WEIGHT_FLOOR), ``duration_needed`` (the longest any
    surface needs; None when all are settled to UNCERTAINTY_TARGET).  What
    may still cross the detector is the final state's on every surface
    (each with its own V_rr), summed over the surfaces the couplings
    connect to s: a part still on such a surface before the detector may
    yet move to s.  Without a final state, a
    record that has not died out is refused, as on one surface.
    ``warnings`` says, per surface, where T_s is uncertain and the duration
    that settles it, and when the surfaces are not flat and uncoupled
    beyond the detector or not flat where the packet starts (the method's
    premises)."""
    uc = result_units(ds)
    if setup.grid.ndim != 1 or setup.grid.radial:
        raise JobError("RUN.nc", f"{source_name(ds)}: energy-resolved transmission needs a 1D cartesian run "
                                 "(the totals are given for any run)")
    if setup.hamiltonian.time_dependent:
        raise JobError("RUN.nc", f"{source_name(ds)}: energy-resolved transmission needs a static potential matrix: "
                                 "with a time-dependent one, energy is not conserved")
    if "detector_psi_real" not in ds:
        raise JobError("RUN.nc", f"{source_name(ds)}: the run did not record psi at its detectors; run the job again")
    surfaces = [str(v) for v in ds["surface"].values]
    names = [str(d) for d in ds["detector"].values]
    if not names:
        raise JobError("RUN.nc", f"{source_name(ds)}: the run has no detector; add a [[detector]] beyond the scatterer")
    on = [i for i, s in enumerate(surfaces) if np.sum(np.abs(setup.psi0[i]) ** 2) > 1e-12]
    if len(on) != 1:
        raise JobError("packet.surface", "T(E) per final surface needs the packet on one surface at the start; "
                                         f"it starts on {', '.join(surfaces[i] for i in on)}")
    incident = on[0]
    psi0 = setup.psi0[incident]
    x = setup.grid.axes[0].coordinates
    dens0 = np.abs(psi0) ** 2
    x0 = float(np.sum(dens0 * x) / np.sum(dens0))
    k_all, w_all = _padded_momentum_density(psi0, setup.grid.axes[0].dx)
    moving = 1.0 if float(np.sum(k_all * w_all)) >= 0 else -1.0
    potential = np.asarray(ds["potential"].values, float) * uc["energy"]      # (surface, x), hartree
    v_in = float(np.sum(potential[incident] * dens0) / np.sum(dens0))
    unit, elabel = uc["energy"], uc["energy_label"]
    pairs = []                  # (a, b, V_ab over the grid, hartree)
    if "coupling_potential" in ds and ds.sizes.get("pair", 0):
        for p, values in zip(ds["pair"].values, np.asarray(ds["coupling_potential"].values, float)):
            a, b = (surfaces.index(n.strip()) for n in str(p).split(","))
            pairs.append((a, b, values * unit))
    # --- the method's premises (module notes): where they fail beyond PREMISE_LIMIT, no T(E) ---
    # 1. the packet starts where its surface is flat and uncoupled
    start_couplings = [(v, potential[incident] - potential[b if a == incident else a])
                       for a, b, v in pairs if incident in (a, b)]
    k, w = incident_wave_numbers(psi0, x, moving, points)
    w_fwd = np.where(k_all * moving > 0, w_all, 0.0)
    weighty = w / w_fwd.max() > WEIGHT_FLOOR
    start_rel, sigma_v, r_start = _start_effect(dens0, potential[incident], v_in + k**2 / (2 * setup.mass), k, w,
                                                setup.mass, start_couplings)
    worst_start = float(np.max(start_rel[weighty], initial=0.0))
    if worst_start > PREMISE_LIMIT:
        what = []
        # only what fails: each part on its own above the limit (both when neither is alone)
        from_v, from_mixing = worst_start - 2 * r_start, 2 * r_start
        if from_v > PREMISE_LIMIT or from_mixing <= PREMISE_LIMIT:
            what.append(f"V differs from its mean by {sigma_v / unit:.3g} {elabel} on average across it, as for a "
                        "bound initial state")
        if from_mixing > PREMISE_LIMIT or from_v <= PREMISE_LIMIT:
            what.append(f"the couplings mix in {r_start:.2g} of another surface there")
        # judged first: a bound start has no direction to look for a detector in
        raise JobError("packet.center",
                       f"the packet starts where surface {surfaces[incident]!r} is not flat and uncoupled "
                       f"({'; '.join(what)}: T(E) off by up to {worst_start:.2g} "
                       "relative); T(E) needs a free incident packet: start it where "
                       "its surface is flat and uncoupled")
    if detector is not None:
        j = _requested_detector(setup, names, detector)
    else:
        usable = [i for i in range(len(names)) if layer_holding(setup, 0, setup.detectors[i].position) is None
                  and moving * (setup.detectors[i].position - x0) > 0]
        if not usable:
            raise JobError("RUN.nc", f"{source_name(ds)}: no detector lies on the packet's path outside the absorbing "
                                     "layers; T(E) needs one beyond the scatterer")
        j = max(usable, key=lambda i: moving * setup.detectors[i].position)
    name, x_d = names[j], setup.detectors[j].position
    if moving * (x_d - x0) <= 0:
        raise JobError("--detector", f"detector {name!r} lies behind the packet's start (it moves the other way); "
                                     "T(E) needs a detector beyond the scatterer on its path")
    t = np.asarray(ds["time"].values, float) * uc["time"]
    amp = (np.asarray(ds["detector_psi_real"].values[:, :, j], float)
           + 1j * np.asarray(ds["detector_psi_imag"].values[:, :, j], float)).T / math.sqrt(uc["length"])
    peak = float(np.max(np.abs(amp) ** 2))
    if not peak > 0:
        raise JobError("--detector", f"nothing reached detector {name!r} during the run; place it beyond the "
                                     "scatterer, on the packet's path, or run longer")
    if np.max(np.abs(amp[:, 0]) ** 2) > AMPLITUDE_AT_START * peak:
        raise JobError("packet.center", f"the initial packet already overlaps detector {name!r}; "
                                        "start it farther from the detector")
    k_band = k_all[w_fwd > BAND_FLOOR * w_fwd.max()]
    e_band = v_in + k_band**2 / (2 * setup.mass)
    dt_rec = _unaliased_spacing(t, e_band, uc)
    v_final = np.array([float(np.interp(x_d, x, potential[s])) for s in range(len(surfaces))])
    end_ratio = float(np.max(np.abs(amp[:, -1]) ** 2)) / peak
    psi_end = _final_psi(ds, uc)
    if psi_end is None and end_ratio > AMPLITUDE_AT_END:
        # what is still to come cannot be told without the final state (as on one surface)
        raise JobError("evolve.duration", f"psi at detector {name!r} has not died out by the end "
                                          f"(|psi|^2 at {end_ratio:.1e} of its peak) and the run kept no "
                                          "final state to tell what is still to come; extend "
                                          "evolve.duration or set record.final_state = true")
    # what may still cross the detector, per hartree of the total energy E (conserved by a hop): each
    # surface's share of the final state with its own V_rr, summed over the surfaces the couplings
    # connect to s (an upper bound for s: what is on r may yet move to s before the detector)
    energy = v_in + k**2 / (2 * setup.mass)
    each = np.zeros((len(surfaces),) + energy.shape)
    if psi_end is not None:
        far_layer = _far_layer(setup, moving)
        for r in range(len(surfaces)):
            if np.any(np.abs(psi_end[r]) > 0):
                each[r] = _still_to_come(psi_end[r], x, potential[r], setup.mass, x_d, moving, v_in, energy, k,
                                         far_layer)
    to_come = np.array([each[sorted(reachable_surfaces(setup, {s}))].sum(axis=0) for s in range(len(surfaces))])
    spectra = surface_spectra(t, amp, k, w, setup.mass, v_in, v_final, still_to_come=to_come,
                              band_center=0.5 * float(e_band.min() + e_band.max()))
    energy = spectra[0].energy
    weighty = spectra[0].momentum_density / w_fwd.max() > WEIGHT_FLOOR
    # --- the method's premises (module notes): where they fail beyond PREMISE_LIMIT, no T(E) ---
    failed = []
    # 2. beyond the detector the surfaces are flat and uncoupled: what a coupling there mixes into s
    beyond = moving * (x - x_d) >= 0
    far = layer_edge(setup, "x+" if moving > 0 else "x-") if _far_layer(setup, moving) is not None else None
    if far is not None:
        beyond &= moving * (far - x) > 0
    transmitted = [spectra[i].transmission for i in range(len(surfaces))]
    speed = [np.sqrt(np.maximum(2 * (energy - v_final[i]) / setup.mass, 0.0)) for i in range(len(surfaces))]
    is_open = [bool(np.any((energy > v_final[i]) & weighty)) for i in range(len(surfaces))]
    mixed = [np.zeros_like(energy) for _ in surfaces]
    mixings = []
    for a, b, v_ab in pairs:
        if not beyond.any() or not (is_open[a] and is_open[b]):
            continue            # a closed surface carries nothing the detector counts
        ratio = float(np.max(_mixing_angle(v_ab[beyond], (potential[a] - potential[b])[beyond])))
        if ratio == 0:
            continue
        # an amplitude r (sin theta) of o's wave read on s with s's speed: dT_s = 2 r sqrt(T_s T_o v_s / v_o) + r^2 T_o v_s / v_o
        for s_, o_ in ((a, b), (b, a)):
            scale = np.divide(speed[s_], speed[o_], out=np.zeros_like(energy), where=speed[o_] > 0)
            cross = np.maximum(transmitted[o_], 0.0) * scale
            mixed[s_] += 2 * ratio * np.sqrt(np.maximum(transmitted[s_], 0.0) * cross) + ratio**2 * cross
        mixings.append((surfaces[a], surfaces[b], ratio))
    worst_mix = max((float(np.max(m[weighty], initial=0.0)) for m in mixed), default=0.0)
    if worst_mix > PREMISE_LIMIT:
        said = ", ".join(f"{sa} and {sb} mixed by {r:.2g} in amplitude" for sa, sb, r in mixings)
        failed.append((f"detector.{j}.x",
                       f"beyond detector {name!r} the surfaces are still coupled ({said}; T_s off by up to "
                       f"{worst_mix:.2g}); T(E) per surface needs them uncoupled there: put the detector where "
                       "the surfaces are flat and uncoupled"))
    # 3. nothing comes back across the detector (a far side without an absorber sends psi back)
    comes_back, refused = _sent_back(ds, np.asarray(ds["flux"].values, float)[:, :, j] * moving, psi_end,
                                     setup, x, x_d, moving, name)
    if refused:
        failed.append(("absorber.faces", comes_back))
    if failed:
        raise JobError(failed[0][0], "; ".join(m for _, m in failed))
    premise = [transmitted[i] * start_rel + mixed[i] for i in range(len(surfaces))]
    settled = {s: _settled(spectra[i], t, amp[i], k_all, w_fwd, v_in, v_final[i], setup.mass, uc,
                           premise=premise[i], no_promise=comes_back)
               for i, s in enumerate(surfaces)}
    warnings = []
    if comes_back is not None:
        warnings.append(comes_back)
    if worst_start > UNCERTAINTY_TARGET:
        warnings.append(f"the packet starts where surface {surfaces[incident]!r} is not quite flat and uncoupled "
                        f"(T(E) off by up to {worst_start:.2g} relative, in its +/-): start it where its surface "
                        "is flat and uncoupled")
    if worst_mix > UNCERTAINTY_TARGET:
        warnings.append(f"beyond detector {name!r} the surfaces are still weakly coupled (T_s off by up to "
                        f"{worst_mix:.2g}, in its +/-): put the detector where they are uncoupled")
    for s, found in settled.items():
        if found["uncertain_span"] is not None:
            warnings.append(f"surface {s}: " + truncation_warning({**found, "detector": name,
                                                                   "energy_units": elabel,
                                                                   "time_units": uc["time_label"]}))
    # an open surface whose V_ss still changes beyond the detector: its flux is read with the speed at
    # the detector, right only while nothing there turns the wave round (common practice: flag it)
    for i, s in enumerate(surfaces):
        if is_open[i] and beyond.any():
            change = float(np.ptp(potential[i, beyond]))
            kinetic = float(np.min(energy[weighty])) - v_final[i]
            if change > FLAT_BEYOND * kinetic:
                warnings.append(f"beyond detector {name!r} V_{s}{s} changes by {change / unit:.3g} {elabel}: T_{s}(E) "
                                "is read with the speed at the detector, right while nothing beyond turns the wave "
                                "round; place the detector where each V_ss is constant")
    # unitarity: the surfaces together cannot take more than came in
    total = np.sum(transmitted, axis=0)
    total_unc = np.sum([f["T_uncertainty"] for f in settled.values()], axis=0)
    excess = np.where(weighty, total - 1 - total_unc, -np.inf)
    if np.max(excess) > 0:
        i = int(np.argmax(excess))
        warnings.append(f"the T_s add up to 1 + {total[i] - 1:.2g} at E = {energy[i] / unit:.4g} {elabel}, above 1 "
                        f"by more than their +/- ({total_unc[i]:.2g}): something the +/- does not cover moves T "
                        "there (the discretisation, dt and grid, or a premise beyond its estimate); a refined run "
                        "or `wavesweep check --tolerance` tells which")
    needed = [f["duration_needed"] for f in settled.values() if f["duration_needed"] is not None]
    return {"energy": energy / unit, "T": {s: spectra[i].transmission for i, s in enumerate(surfaces)},
            "T_uncertainty": {s: f["T_uncertainty"] for s, f in settled.items()},
            "largest_uncertainty": {s: f["largest_uncertainty"] for s, f in settled.items()},
            "uncertain_span": {s: f["uncertain_span"] for s, f in settled.items()},
            # one number for all: none when a surface is unsettled and no run length settles it
            "duration_needed": max(needed) if needed and not any(
                f["uncertain_span"] is not None and f["duration_needed"] is None for f in settled.values()) else None,
            "duration": float(t[-1] - t[0]) / uc["time"], "time_units": uc["time_label"],
            "weight": w / w.max(), "detector": name, "incident_surface": surfaces[incident],
            "energy_units": elabel, "final_potentials": {s: v_final[i] / unit for i, s in enumerate(surfaces)},
            "warnings": warnings}


def coupled_transmission(ds, detector: str | None = None) -> dict:
    """:func:`transmission` of a run on coupled surfaces (an open dataset):
    ``totals`` (:func:`coupled_totals`), ``energy_resolved``
    (:func:`coupled_energy_resolved`, or the reason it is missing),
    ``surfaces``, ``warnings`` (the set-up's warnings,
    :func:`~wavesweep.adequacy.run_warnings`, then T(E)'s).  The set-up
    (grid, psi0, absorber) is rebuilt from the job text the result stores."""
    setup = coupled_setup(ds)
    out = {"surfaces": [str(v) for v in ds["surface"].values], "totals": coupled_totals(ds, setup),
           "warnings": [], "time_units": result_units(ds)["time_label"]}
    # the set-up's own findings (check's, per surface), judged at run time and stored in the file
    # (judged here for a file written before runs stored them)
    said = stored_warnings(ds)
    out["warnings"].extend(run_warnings(setup) if said is None else said)
    try:
        er = out["energy_resolved"] = coupled_energy_resolved(ds, setup, detector)
        out["warnings"].extend(er["warnings"])
    except JobError as e:
        out["energy_resolved"] = {"reason": f"{e.field}: {e.message}", "error": e, "requested": detector is not None}
    return out


def came_round_warning(ds, setup, j: int, name: str, side: float) -> str | None:
    """On a periodic normal axis without an absorbing layer beyond the
    detector, what crossed it can come round the grid and cross again (the
    spectrum then counts it twice): a warning where more crossed the
    detector (its net flux, outwards) than lies beyond it at the end plus
    everything the other faces absorbed (an upper bound on what left the
    region beyond through them); None otherwise or where the file does not
    say (no final state)."""
    det = setup.detectors[j]
    axis = setup.grid.axes[det.axis]
    far_face = f"{axis.name}{'+' if side > 0 else '-'}"
    if axis.boundary != "periodic" or any(layer.name == far_face for layer in setup.absorber.layers):
        return None
    totals = transmission_totals(ds, setup)
    entry = totals["detectors"].get(name)
    if entry is None or not math.isfinite(entry["beyond"]):
        return None
    crossed = entry["crossed"]
    beyond = entry["beyond"] + sum(v for f, v in totals["absorbed"].items() if f != entry["far_face"])
    if not (crossed - beyond > max(1e-6, 1e-3 * abs(crossed))):
        return None
    axis_name = axis.name
    return (f"detector {name!r}: {crossed - beyond:.3g} of what crossed it has left the grid beyond it other than "
            f"through an absorber (came round the periodic {axis_name} axis and crossed again?): the spectrum "
            f"counts it twice; add an absorber beyond the detector or lengthen the {axis_name} axis")
