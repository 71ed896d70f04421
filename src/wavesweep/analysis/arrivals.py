"""Arrival-time distributions at detectors.

Flux definition (the standard one for a detector outside any absorber): the
arrival-time density is the probability current through the detector,
Pi(t) = J(x_d, t) / P with P = int J dt the probability that crossed
(e.g. Muga & Leavens, Phys. Rep. 338, 353 (2000), sec. 4; Leavens 1998).
J is oriented from the initial packet towards the detector.  Where J < 0
probability flows back (backflow); it is kept in Pi and its weight,
int max(-J, 0) dt, is reported apart.  When the backflow exceeds 1 % of the
forward flux (a detector in front of a scatterer sees the incident wave and
then the reflected one) the net flux is no probability density: the times
are then those of the forward flux max(J, 0) ("positive flux"), the
probability stays the net crossing.

Absorption-rate definition (a detector placed inside an absorbing layer):
Pi(t) = dA_f/dt / P, A_f the probability the face's layer has removed by
time t, P its total; the layer is the detector (e.g. Muga, Palao, Navarro
& Egusquiza, Phys. Rep. 395, 357 (2004), on absorbing detector models).

Classical estimate: free flight of the ensemble whose positions follow
|psi0(x)|^2 and momenta |phi(p)|^2 independently (the Wigner function of a
minimum-uncertainty Gaussian), each member arriving at t = m (x_d - x) / p.
For a free Gaussian it coincides with the quantum flux (free motion moves
the Wigner function classically), so beside the quantum curve it shows what
the potential and interference change.

Moments need a window containing the whole peak: the statistics are over
the run's samples, and a run that ended while the flux was still large is
flagged with an estimate of the probability still to come.  Integrals use
the trapezoidal rule on the (uniform) samples.
"""
from __future__ import annotations

import json
import math
import tomllib
from dataclasses import dataclass, field

import numpy as np

from ..errors import JobError
from ..io.record import classical_share, layer_edge, layer_holding, packet_side_positions, side_probability
from ..io.results import open_result, result_units, source_name
from ..potentials import REGISTRY
from .recorded import as_record
from .recorded import run_record as read_record

__all__ = ["ArrivalDistribution", "arrival_statistics", "arrival_times", "classical_free_flight",
           "coupled_setup", "COUPLED_NOTE", "pattern_statistics", "screen_pattern"]

# The run is "truncated" when the last |density| exceeds this fraction of the
# peak, or when more than TRUNCATED_TO_COME of probability may still arrive.
TRUNCATED_TAIL = 1e-3
TRUNCATED_TO_COME = 1e-4
# Above this backflow (relative to the forward flux) the times are taken from
# the forward flux alone (our choice; 1 % keeps the backflow of a free
# packet, ~1e-4 at most for Gaussians, in the standard definition).
BACKFLOW_SWITCH = 1e-2
# Elements (times x positions) of one block of the classical curve: bounds its temporaries
# (~8 MB each) whatever the grid and the number of samples.
CURVE_BLOCK = 2**20
# Below this forward probability nothing arrived: no statistics are given.
NOTHING_ARRIVED = 1e-9


@dataclass
class ArrivalDistribution:
    """One detector's arrival-time distribution, in the job's time units.

    ``density`` is J (or dA/dt) in probability per time unit, not yet divided
    by ``stats["probability"]``; ``classical_density`` is the free-flight
    estimate on the same times, per time unit, normalised to the classical
    probability of moving towards the detector."""

    detector: str
    definition: str                  # "flux", "positive flux" or "absorption"
    time: np.ndarray
    density: np.ndarray
    classical_density: np.ndarray
    stats: dict
    time_units: str
    warnings: list = field(default_factory=list)
    surface: str | None = None       # on coupled surfaces: the surface whose flux this is
    pattern: dict | None = None      # a resolved detector: what arrived where (:func:`screen_pattern`)

    def as_dict(self) -> dict:
        out = {"definition": self.definition, **self.stats}
        if self.pattern is not None:
            out["pattern"] = self.pattern
        return out


def pattern_statistics(time, screen_flux, sign: float = 1.0) -> tuple[np.ndarray, np.ndarray]:
    """What arrived where on a resolved screen, from its flux density
    ``screen_flux`` (time first, then the transverse axes; per unit length
    (area) per time unit): the probability per unit length (area) that
    crossed, P(y) = int J(y, t) dt, and the mean arrival time per position,
    int t J(y, t) dt / P(y) (the flux definition of this module, position
    by position), both by the trapezoidal rule over the samples, oriented
    by ``sign`` (+1: J counts positive).  The mean is NaN where P(y) is not
    above NOTHING_ARRIVED times the pattern's peak."""
    return _pattern_from_sums(*_trapezoid_sums(time, screen_flux, sign))


def _trapezoid_sums(time, flux, sign: float) -> tuple[np.ndarray, np.ndarray]:
    """int J dt and int t J dt (trapezoidal rule, time on the first axis)."""
    t = np.asarray(time, float)
    f = np.asarray(flux, float) * sign
    w = np.zeros_like(t)   # the trapezoid's weights, for uneven samples too
    w[:-1] += 0.5 * np.diff(t)
    w[1:] += 0.5 * np.diff(t)
    return np.tensordot(w, f, axes=1), np.tensordot(w * t, f, axes=1)


def _pattern_from_sums(prob, first) -> tuple[np.ndarray, np.ndarray]:
    peak = float(np.max(np.abs(prob))) if prob.size else 0.0
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(prob > NOTHING_ARRIVED * peak, first / np.where(prob != 0, prob, 1.0), math.nan)
    return prob, mean


def screen_pattern(ds, screen: int, sign: float) -> dict:
    """The ``pattern`` of the ``screen``-th resolved detector of a result
    (``arrivals --json``): its transverse axis (``axis``, 2D) or axes
    (``axes``, 3D), the positions (the snapshot grid's), ``probability``
    per unit length (area) and ``mean_arrival`` per position, in the job's
    units (``units``), by :func:`pattern_statistics`.  Reads the screen's
    flux a block of samples at a time (no temporary of all samples times
    the screen)."""
    var = ds["screen_flux"]
    across = [d for d in var.dims if d not in ("time", "screen")]
    t = np.asarray(ds["time"].values, float)
    block = max(2, CURVE_BLOCK // max(1, int(np.prod([ds.sizes[d] for d in across]))))
    prob = np.zeros([ds.sizes[d] for d in across])
    first = np.zeros_like(prob)
    for i0 in range(0, max(1, t.size - 1), block - 1):   # consecutive blocks share their edge sample
        i1 = min(t.size, i0 + block)
        p, m = _trapezoid_sums(t[i0:i1], var[i0:i1, screen].values, sign)
        prob += p
        first += m
    prob, mean = _pattern_from_sums(prob, first)
    length = ds[across[0]].attrs.get("units", "")
    out = {"position": [np.asarray(ds[d].values, float).tolist() for d in across],
           "probability": prob.tolist(), "mean_arrival": mean.tolist(),
           "units": {"position": length, "probability": f"{length}-{len(across)}",
                     "mean_arrival": ds["time"].attrs.get("units", "")}}
    if len(across) == 1:
        return {"axis": across[0], **out, "position": out["position"][0]}
    return {"axes": across, **out}


def _trapezoid(y, t) -> float:
    return float(np.trapezoid(y, t)) if len(t) > 1 else 0.0


def _first_crossing(cum, t, level) -> float:
    """First time the cumulative curve reaches ``level`` (linear between samples)."""
    above = np.nonzero(cum >= level)[0]
    if above.size == 0:
        return math.nan
    i = int(above[0])
    if i == 0:
        return float(t[0])
    c0, c1 = cum[i - 1], cum[i]
    return float(t[i - 1] + (level - c0) / (c1 - c0) * (t[i] - t[i - 1]))


# A probability that crossed a detector may exceed 1 by the quadrature error
# of the sampled flux (trapezoid rule over record.every), never by more.
ARRIVED_SLACK = 1e-3


def arrival_statistics(time, density) -> dict:
    """Statistics of an arrival-time density sampled at ``time``.

    Returns probability P = int rho dt, mean and standard deviation of rho/P,
    median and 10/90 % quantiles (first times the cumulative int_0^t rho / P
    reaches 0.5, 0.1, 0.9), the most probable time (maximum of rho, refined
    by a parabola through the three samples around it) and ``backflow``,
    int max(-rho, 0) dt.  All times in the units of ``time``."""
    t = np.asarray(time, float)
    rho = np.asarray(density, float)
    p = _trapezoid(rho, t)
    nan = math.nan
    out = {"probability": p, "mean": nan, "std": nan, "median": nan, "q10": nan, "q90": nan,
           "most_probable": nan, "backflow": _trapezoid(np.maximum(-rho, 0.0), t)}
    if not len(t) or not p > 0:
        return out
    mean = _trapezoid(t * rho, t) / p
    var = _trapezoid((t - mean) ** 2 * rho, t) / p
    cum = np.concatenate([[0.0], np.cumsum(0.5 * (rho[1:] + rho[:-1]) * np.diff(t))]) / p
    i = int(np.argmax(rho))
    t_peak = float(t[i])
    if 0 < i < len(t) - 1:
        a, b, c = rho[i - 1], rho[i], rho[i + 1]
        den = a - 2 * b + c
        if den < 0:
            t_peak += 0.5 * (a - c) / den * (t[i + 1] - t[i])
    out.update(mean=mean, std=math.sqrt(max(var, 0.0)), median=_first_crossing(cum, t, 0.5),
               q10=_first_crossing(cum, t, 0.1), q90=_first_crossing(cum, t, 0.9),
               most_probable=float(t_peak))
    return out


def classical_free_flight(x_axis, rho, k, w, mass: float, x_detector: float,
                          time_atomic: np.ndarray, curve: bool = True,
                          acceleration: float = 0.0) -> tuple[np.ndarray, float, float]:
    """Classical free-flight arrival estimate from psi(t=0), atomic units;
    with a constant ``acceleration`` along the axis (gravity), the same
    ensemble falling (see below).

    The ensemble draws positions from |psi0|^2 and momenta from |phi(p)|^2
    (both marginals along ``axis``) independently -- the Wigner function of
    a minimum-uncertainty Gaussian, exactly; an approximation for other
    states -- and each member arrives at t = m (x_d - x) / p if it moves
    towards the detector.  So Pi_cl(t) = int dx rho(x) w(p(x, t)) m |x_d - x| / t^2
    with p(x, t) = m (x_d - x) / t, and the mean is <m (x_d - x) / p>.

    The marginals are the run's record (:func:`wavesweep.marginals.free_space_marginals`):
    ``rho`` on the axis's coordinates ``x_axis``, ``w`` on the ascending wave
    numbers ``k`` (a zero-padded transform: a fine p grid), each summing to 1.

    The positions kept all lie on the packet's side of the detector, so the
    towards-moving momenta are one half-line and the probability and the
    mean factor into a sum over positions times one over momenta (O(grid),
    :func:`classical_share`); the curve is a sum over positions per time,
    in blocks of CURVE_BLOCK elements (``curve=False``: zeros, not computed).

    Accelerated: a member at (x, v = p/m) first reaches the detector at the
    smaller positive root of x + v t + a t^2/2 = x_d, so at time t it
    started with v(x, t) = d / t - a t / 2 and Pi_cl(t) = int dx rho(x)
    m w(m v) (v + a t) s / t over the first crossings ((v + a t) s > 0, s
    the sign of d: moving away from the packet's side), the Jacobian of
    t -> v at fixed x; the probability and mean sum every pair
    (:func:`~wavesweep.io.record.classical_share`).  For a Gaussian in a
    uniform force the Wigner function moves classically (exact for a
    potential at most quadratic), so the estimate is the quantum first
    arrival up to backflow.

    Returns (density on ``time_atomic`` per atomic time unit, probability of
    arriving, mean arrival time of that part)."""
    x_axis, rho = np.asarray(x_axis, float), np.asarray(rho, float)
    k, w = np.asarray(k, float), np.asarray(w, float)
    dk = k[1] - k[0]
    x, rho, distance = packet_side_positions(x_axis, rho, x_detector)
    t = np.asarray(time_atomic, float)
    prob, mean = classical_share(rho, distance, k, w, mass, acceleration)
    out = np.zeros_like(t)
    if prob <= 0 or not curve:
        return out, prob, mean
    if acceleration:
        pos = np.nonzero(t > 0)[0]
        rows = max(1, CURVE_BLOCK // max(len(distance), 1))
        density_k = w / dk
        side = np.sign(distance)[None, :]
        for i0 in range(0, len(pos), rows):
            tt = t[pos[i0:i0 + rows]][:, None]
            v = distance[None, :] / tt - 0.5 * acceleration * tt
            arriving = (v + acceleration * tt) * side          # > 0: a first crossing
            dens_p = np.interp(mass * v, k, density_k, left=0.0, right=0.0)
            out[pos[i0:i0 + rows]] = (dens_p * rho[None, :] * mass * np.maximum(arriving, 0.0)).sum(axis=1) / tt[:, 0]
        return out, prob, mean
    # Pi_cl(t) = sum_x rho(x) w(m d / t) / dk * m |d| / t^2: (times x positions) in blocks of at
    # most CURVE_BLOCK elements, so the memory stays bounded whatever the grid and the record
    pos = np.nonzero(t > 0)[0]
    rows = max(1, CURVE_BLOCK // max(len(distance), 1))
    density_k = w / dk
    for i0 in range(0, len(pos), rows):
        tt = t[pos[i0:i0 + rows]]
        p_of = mass * distance[None, :] / tt[:, None]  # (times, positions)
        dens_p = np.interp(p_of, k, density_k, left=0.0, right=0.0)
        out[pos[i0:i0 + rows]] = (dens_p * rho[None, :] * mass * np.abs(distance)[None, :]).sum(axis=1) / tt**2
    return out, prob, mean


def _final_density(ds):
    """(density or psi, dims, is_psi) at the end of the run, in job units, or
    None: the final state if recorded, else a last snapshot at the final time."""
    t_end = float(ds.time.values[-1])
    if "psi_real" in ds:
        psi = np.asarray(ds.psi_real.values) + 1j * np.asarray(ds.psi_imag.values)
        return psi, ds.psi_real.dims, True
    if ds.sizes.get("snapshot_time", 0) and \
            abs(float(ds.snapshot_time.values[-1]) - t_end) <= 1e-9 * max(1.0, abs(t_end)):
        return np.asarray(ds.density.isel(snapshot_time=-1).values, float), ds.density.dims[1:], False
    return None


def upstream_probability(ds, setup, axis: int, x_det: float, side: float,
                          towards: bool = False) -> float | None:
    """Probability on the grid on the ``side`` (+1: above) of the detector at
    the end of the run (|psi|^2 dV is the same in job units); with
    ``towards``, only the part whose momentum points at the detector (from
    the final state's transform; the reflected part running away does not
    count).  None when the run kept neither final state nor a last snapshot.
    Reads the final state (or the last snapshot only): O(grid)."""
    found = _final_density(ds)
    if found is None:
        return None
    values, dims, is_psi = found
    coords = [np.asarray(ds[d].values, float) for d in dims]
    units = result_units(ds)
    p_frame = 0.0
    if "frame_offset" in ds.variables:   # a falling grid: lab position = coordinate + offset at the end
        final = np.atleast_1d(np.asarray(ds["frame_offset"][-1].values, float))
        coords = [c + final[i] for i, c in enumerate(coords)]
        if towards and is_psi:
            # the lab psi carries exp(i m u x), u the grid's velocity at the end (the quadratic
            # through the last three samples: exact under a constant force), beyond its k_max in general
            p_frame = float(setup.mass) * _final_frame_velocity(ds, axis) * units["length"] / units["time"]
            values = values * np.exp(-1j * p_frame * units["length"] * coords[axis]).reshape(
                [-1 if i == axis else 1 for i in range(values.ndim)])
    return side_probability(values, coords, units["length"], axis, x_det, side, towards, is_psi,
                            momentum_offset=p_frame)


def _final_frame_velocity(ds, axis: int) -> float:
    """The falling grid's velocity along ``axis`` at the last sample (job
    length per job time): the derivative of the quadratic through the last
    three (time, frame_offset) samples (0 with fewer)."""
    offset = np.asarray(ds["frame_offset"].values, float)
    offset = offset if offset.ndim == 1 else offset[:, axis]
    t = np.asarray(ds["time"].values, float)
    if len(t) < 3:
        return 0.0
    (t0, t1, t2), (x0, x1, x2) = t[-3:], offset[-3:]
    # d/dt of the Lagrange quadratic at t2
    return float(x0 * (t2 - t1) / ((t0 - t1) * (t0 - t2)) + x1 * (t2 - t0) / ((t1 - t0) * (t1 - t2))
                 + x2 * (2 * t2 - t0 - t1) / ((t2 - t0) * (t2 - t1)))


def recorded_or(record, name: str, j: int, compute):
    """Detector ``j``'s value ``name`` as the run recorded it, else ``compute()``."""
    value = record.detector_value(name, j) if hasattr(record, "detector_value") else None
    return value if value is not None else compute()


def arrival_times(result, detector: str | None = None, classical: bool = True, warnings: bool = True,
                  curves: bool = True, verify: str = "file", surfaces: bool = False) -> dict:
    """Arrival-time distributions of a run's detectors (``detector``: only
    that one), from a result file path or an open dataset.  ``classical =
    False`` leaves out the classical estimate (its curve is zeros, its
    probability and mean NaN): the accuracy pilot needs only the quantum
    statistics, and the estimate costs more than they do.  ``warnings =
    False`` leaves out the adequacy findings of the run's set-up (judged
    once, at run time, and read from the file), for callers that judge it
    themselves or only tabulate.  ``curves = False`` gives the statistics
    only (the classical curve is zeros; its probability and mean stay):
    with a record that holds the detectors' values (:mod:`wavesweep.io.record`),
    nothing of the grid's size is then read.  ``verify``: as
    :func:`~wavesweep.io.results.open_result` (``"used"``: only the
    variables without a grid dimension are checked when opened).

    ``surfaces = True`` reads a result of coupled surfaces too: it gives
    ``{detector: {surface: ArrivalDistribution}}`` (:func:`_surface_arrivals`);
    a result of one surface is then read as without it."""
    ds = open_result(result, require=("flux", "time"), verify=verify, surfaces=surfaces)
    try:
        if "surface" in ds.dims:
            return _surface_arrivals(ds, detector)
        return _arrivals(ds, detector, classical, warnings, curves)
    finally:
        if ds is not result:   # close only what was opened here
            ds.close()


def _detector_names(ds, detector: str | None) -> list[str]:
    """The run's detector names, refused in one line when it has none or
    lacks the one asked for (``--detector``)."""
    names = [str(d) for d in ds["detector"].values] if "detector" in ds.coords else []
    if not names:
        raise JobError("RUN.nc", f"{source_name(ds)}: the run recorded no detector flux; add a [[detector]] table "
                                 "to the job and run it again")
    if detector is not None and detector not in names:
        raise JobError("--detector", f"no detector {detector!r} in the run; it has {', '.join(names)}")
    return names


def _arrivals(ds, detector, classical=True, warnings=True, curves=True):
    names = _detector_names(ds, detector)
    uc = result_units(ds)
    # what the run wrote for analysis: never a set-up rebuilt from the job attribute
    setup = read_record(ds)
    # the adequacy criteria of the run's set-up (momentum over the run,
    # absorbers at what arrives, resolution, time step and splitting), judged
    # at run time: ``warnings=False`` skips them where a caller judges the set-up itself
    said = recorded_warnings(setup) if warnings else []
    t = np.asarray(ds["time"].values, float)
    if len(t) < 3:
        raise JobError("RUN.nc", f"{source_name(ds)}: the run holds {len(t)} samples; arrival times need at least 3")
    flux = np.asarray(ds["flux"].values, float)
    forced = _uniform_forces(ds)
    falling = "frame_offset" in ds.variables
    screens = [str(n) for n in ds["screen"].values] if "screen" in ds.variables else []
    out = {}
    for j, name in enumerate(names):
        if detector is not None and name != detector:
            continue
        det = setup.detectors[j]
        # on a falling grid a lab detector crosses the layers: its flux is always the lab current
        face = None if falling else layer_holding(setup, det.axis, det.position)
        notes = list(said)
        if face is not None:
            if "absorbed" not in ds or face not in [str(b) for b in ds["boundary"].values]:
                raise JobError("RUN.nc", f"{source_name(ds)}: detector {name!r} lies in the {face} absorber but the run "
                                         "recorded no absorbed probability there")
            # by position: a dataset opened without indexes (collect's) has no label lookup
            column = [str(b) for b in ds["boundary"].values].index(face)
            a = np.asarray(ds["absorbed"][:, column].values, float)
            rho = np.gradient(a, t)
            definition = "absorption"
            notes.append(f"detector {name!r} lies in the {face} absorbing layer: the layer is the "
                            "detector, and its times are those of absorption anywhere in the layer "
                            "(the detector's position inside it does not enter)")
        x0_side = detector_side(setup, j)
        if face is None:
            # oriented from the packet towards the detector: arrivals count positive
            rho = flux[:, j] * -x0_side
            definition = "flux"
        stats, definition = _oriented_statistics(ds, t, rho, definition, f"detector {name!r}", notes)
        forward = stats["forward"]
        if classical:
            cl = np.zeros_like(t)
            recorded = [setup.detector_value(f"classical_arrival_{v}", j) for v in ("probability", "mean")]
            accel = setup.detector_value("classical_acceleration", j) or 0.0
            if curves or recorded[0] is None:
                rho0, k0, w0 = setup.marginals[det.axis]
                cl, cl_prob, cl_mean = classical_free_flight(setup.grid.axes[det.axis].coordinates, rho0, k0, w0,
                                                             setup.mass, det.position, t * uc["time"], curves,
                                                             acceleration=accel)
            if recorded[0] is not None:   # the run's own numbers (the same sums, over its arrays)
                cl_prob = recorded[0]
                cl_mean = recorded[1] if recorded[1] is not None else math.nan
        else:
            cl, cl_prob, cl_mean = np.zeros_like(t), math.nan, math.nan
        stats["classical_probability"] = cl_prob
        stats["classical_mean"] = cl_mean / uc["time"] if math.isfinite(cl_mean) else math.nan
        peak = float(np.max(np.abs(rho))) if len(rho) else 0.0
        tail = abs(float(rho[-1])) / peak if peak > 0 else 0.0
        # what may still arrive: before the detector (for a layer, before
        # the layer's inner edge), moving towards it
        edge = det.position if face is None else layer_edge(setup, face)
        to_come = recorded_or(setup, "final_probability_to_come", j,
                               lambda: upstream_probability(ds, setup, det.axis, edge, x0_side, towards=True))
        stats["still_to_come"] = to_come if to_come is not None else math.nan
        stats["truncated"] = bool(tail > TRUNCATED_TAIL or (to_come or 0.0) > TRUNCATED_TO_COME)
        if stats["truncated"]:
            more = (f"{to_come:.3g} of probability is still on the grid before it, moving towards it"
                    if to_come is not None else "the final state was not recorded to say how much more")
            notes.append(f"detector {name!r}: the run ended before the flux died out (last value "
                            f"{tail:.1%} of the peak; {more}); the distribution is truncated: "
                            "extend evolve.duration")
        if not forward > NOTHING_ARRIVED:
            # nothing arrived: statistics of rounding noise would only mislead
            for key in ("mean", "std", "median", "q10", "q90", "most_probable"):
                stats[key] = math.nan
            stats["truncated"] = bool((to_come or 0.0) > TRUNCATED_TO_COME)
            notes[:] = [w for w in notes if "ended before" not in w]
            notes.append(f"detector {name!r}: nothing arrived during the run (forward probability "
                            f"{forward:.1e}); no times are given" + (
                                f"; {to_come:.3g} is still on its way" if stats["truncated"] else ""))
        if not cl_prob > NOTHING_ARRIVED:
            stats["classical_mean"] = math.nan
        # the classical estimate is a reference unless a force it leaves out acts along the path (a
        # constant uniform force, gravity, is in it: the run recorded its acceleration)
        falls = setup.detector_value("classical_acceleration", j) is not None
        stats["classical_is_reference"] = bool(classical and (not forced or falls))
        if classical and falls:   # job units, as the run recorded it
            stats["classical_acceleration"] = setup.detector_value("classical_acceleration", j) \
                / (uc["length"] / uc["time"] ** 2)
        if classical and forced and not falls:
            notes.append(f"detector {name!r}: classical_mean is the free-flight estimate, and this run's "
                         f"{' and '.join(forced)} acts all along the path: it is no reference here")
        pattern = None
        if curves and "screen_flux" in ds.variables and name in screens:
            # what arrived where, oriented as the total flux (from the packet towards the detector)
            pattern = screen_pattern(ds, screens.index(name), -x0_side)
        out[name] = ArrivalDistribution(name, definition, t, rho, cl * uc["time"], stats,
                                        uc["time_label"], notes, pattern=pattern)
    return out


# What a coupled result's arrival statistics leave out, said once.
COUPLED_NOTE = ("coupled surfaces: the classical estimate and the probability still to come are not "
                "given (NaN): the free-flight ensemble and the record they need are those of one surface")


def coupled_setup(ds):
    """The set-up of a run on coupled surfaces, rebuilt from the job text its
    result stores (``job`` attribute): the absorber's layers, the initial
    state and the grid in atomic units, which a coupled run does not record
    for analysis.  A JobError names what cannot be rebuilt."""
    # lazy: only a coupled result needs its set-up rebuilt (a single-surface one is read as recorded)
    from ..job import job_from_dict
    from ..setup import CoupledSetup
    try:
        table = tomllib.loads(str(ds.attrs.get("job", "")))
    except tomllib.TOMLDecodeError as e:
        raise JobError("RUN.nc", f"{source_name(ds)}: its job text cannot be read ({e}); run the job again") from None
    return CoupledSetup(job_from_dict(table))


def _initial_center(ds, axis_name: str) -> float:
    """Mean position along ``axis_name`` at the first sample (job units) over
    every surface, each weighted by its norm (an empty surface's mean is NaN)."""
    norm = np.asarray(ds["norm"].values[0], float)
    mean = np.asarray(ds[f"{axis_name}_mean"].values[0], float)
    held = norm > 0
    return float(np.sum(norm[held] * mean[held]) / np.sum(norm[held]))


def _surface_arrivals(ds, detector=None) -> dict:
    """Arrival-time statistics per detector and surface of a run on coupled
    surfaces: the flux definition (or the absorption rate for a detector in
    an absorbing layer) on each surface's own flux J_s(x_d, t), oriented from
    the packet's start (its mean position over every surface) towards the
    detector; the backflow switch and the "nothing arrived" rule as for one
    surface.  Sum_s P_s is the probability that crossed the detector on any
    surface.  The classical estimate and the probability still to come are
    NaN (COUPLED_NOTE); a run still arriving at its end is flagged from the
    flux's tail alone.  Returns {detector: {surface: ArrivalDistribution}}."""
    names = _detector_names(ds, detector)
    surfaces = [str(s) for s in ds["surface"].values]
    uc = result_units(ds)
    t = np.asarray(ds["time"].values, float)
    if len(t) < 3:
        raise JobError("RUN.nc", f"{source_name(ds)}: the run holds {len(t)} samples; arrival times need at least 3")
    flux = np.asarray(ds["flux"].values, float)          # (time, surface, detector)
    faces = [str(b) for b in ds["boundary"].values] if "boundary" in ds.coords else []
    # the absorbing layers are in the job only: the set-up is rebuilt when there are any
    setup = coupled_setup(ds) if str(ds.attrs.get("absorber", "none")) != "none" else None
    said = stored_warnings(ds)
    said = [WARNINGS_UNAVAILABLE] if said is None else said
    out = {}
    for j, name in enumerate(names):
        if detector is not None and name != detector:
            continue
        axis_name = str(ds["detector_axis"].values[j])
        x_det = float(ds["detector_x"].values[j])
        side = 1.0 if _initial_center(ds, axis_name) > x_det else -1.0
        face = None
        if setup is not None:
            face = layer_holding(setup, setup.grid.axis_index(axis_name), x_det * uc["length"])
        per_surface = {}
        coupled_there = _coupling_at(ds, axis_name, x_det)
        for s, surface in enumerate(surfaces):
            label = f"detector {name!r} on surface {surface!r}"
            notes = [COUPLED_NOTE] + said + [
                f"detector {name!r}: surfaces {pair} are still coupled there (|V_ab| / |V_aa - V_bb| = {r:.2g}): "
                f"what crosses keeps changing surface beyond it, so the split between them is uncertain by "
                f"about {r * r:.1g}; move the detector to where the coupling has died out"
                for pair, r in coupled_there]
            if face is not None:
                if face not in faces:
                    raise JobError("RUN.nc", f"{source_name(ds)}: detector {name!r} lies in the {face} absorber but "
                                             "the run recorded no absorbed probability there")
                rho = np.gradient(np.asarray(ds["absorbed"][:, s, faces.index(face)].values, float), t)
                definition = "absorption"
                notes.append(f"detector {name!r} lies in the {face} absorbing layer: the layer is the detector, "
                             "and its times are those of absorption anywhere in the layer on each surface")
            else:
                rho = flux[:, s, j] * -side
                definition = "flux"
            stats, definition = _oriented_statistics(ds, t, rho, definition, label, notes)
            forward = stats["forward"]
            stats["classical_probability"] = math.nan
            stats["classical_mean"] = math.nan
            stats["still_to_come"] = math.nan
            peak = float(np.max(np.abs(rho))) if len(rho) else 0.0
            tail = abs(float(rho[-1])) / peak if peak > 0 else 0.0
            stats["truncated"] = bool(tail > TRUNCATED_TAIL)
            if stats["truncated"]:
                notes.append(f"{label}: the run ended before the flux died out (last value {tail:.1%} of the "
                             "peak); the distribution is truncated: extend evolve.duration")
            if not forward > NOTHING_ARRIVED:
                for key in ("mean", "std", "median", "q10", "q90", "most_probable"):
                    stats[key] = math.nan
                stats["truncated"] = False
                notes = [n for n in notes if "ended before" not in n]
            stats["classical_is_reference"] = False
            per_surface[surface] = ArrivalDistribution(name, definition, t, rho, np.zeros_like(t), stats,
                                                       uc["time_label"], notes, surface=surface)
        out[name] = per_surface
    return out


# Couplings at a detector above this share of the surfaces' gap are said
# (the populations then still mix by about its square; common practice: a
# diabatic split is read where the coupling has died out).
COUPLING_AT_DETECTOR = 1e-3


def _coupling_at(ds, axis_name: str, x_det: float) -> list[tuple[str, float]]:
    """For a 1D coupled result: each pair whose static coupling at the
    detector exceeds COUPLING_AT_DETECTOR of the gap between its two
    diagonal potentials there, with that ratio (job units throughout)."""
    if "coupling_potential" not in ds.variables or ds["potential"].dims != ("surface", axis_name):
        return []
    x = np.asarray(ds[axis_name].values, float)
    surfaces = [str(v) for v in ds["surface"].values]
    diag = {n: float(np.interp(x_det, x, np.asarray(ds["potential"].sel(surface=n).values, float)))
            for n in surfaces}
    out = []
    for k, pair in enumerate(str(p) for p in ds["pair"].values):
        a, b = pair.split(",")
        v_ab = abs(float(np.interp(x_det, x, np.asarray(ds["coupling_potential"][k].values, float))))
        gap = abs(diag[a] - diag[b])
        ratio = v_ab / gap if gap > 0 else (math.inf if v_ab > 0 else 0.0)
        if ratio > COUPLING_AT_DETECTOR:
            out.append((pair, ratio))
    return out


def _oriented_statistics(ds, t, rho, definition: str, label: str, notes: list) -> tuple[dict, str]:
    """The statistics of one arrival density ``rho`` (oriented: arrivals
    positive) and its definition: refused when it carries more probability
    than any state can (a damaged file); where the flux changes sign (a
    detector before a scatterer sees the incident wave, then the reflected
    one) the signed density is no probability density, so the times are
    those of the forward crossings (``definition`` becomes "positive
    flux", a note says so).  One place for one surface and for several."""
    stats = arrival_statistics(t, rho)
    if not abs(stats["probability"]) <= 1 + ARRIVED_SLACK:   # NaN too
        raise JobError("RUN.nc", f"{source_name(ds)}: {label}: the recorded flux carries {stats['probability']:.6g} "
                                 "of probability across it, which no state can: the file is damaged; "
                                 "run the job again")
    forward = _trapezoid(np.maximum(rho, 0.0), t)
    stats["forward"] = forward
    # (below NOTHING_ARRIVED nothing arrived: its rounding-level back and forth is no backflow to report)
    if definition == "flux" and forward > NOTHING_ARRIVED and stats["backflow"] > BACKFLOW_SWITCH * forward:
        first = arrival_statistics(t, np.maximum(rho, 0.0))
        stats.update({k: first[k] for k in ("mean", "std", "median", "q10", "q90", "most_probable")})
        definition = "positive flux"
        notes.append(f"{label}: {stats['backflow']:.3g} of probability flows back across it against "
                     f"{forward:.3g} forward; the times are those of the forward flux, the probability "
                     "is the net crossing")
    return stats, definition


def _uniform_forces(ds) -> list[str]:
    """Kinds of the run's potential terms that push the packet all along its
    path (:attr:`~wavesweep.potentials.PotentialTerm.uniform_force`), read
    from the job text the result stores."""
    try:
        table = tomllib.loads(str(ds.attrs.get("job", "")))
    except tomllib.TOMLDecodeError:
        return []
    kinds = [t.get("kind") for t in table.get("potential", []) if isinstance(t, dict)]
    return sorted({k for k in kinds if k in REGISTRY and REGISTRY[k].uniform_force})


# Said in place of the adequacy warnings of a file that does not hold them.
WARNINGS_UNAVAILABLE = ("the run's set-up: its adequacy findings are unavailable (the file does not hold "
                        "them); `wavesweep check` on its job judges them")


def stored_warnings(ds) -> list[str] | None:
    """The adequacy warnings a run of coupled surfaces judged at run time
    (its ``adequacy_warnings`` attribute, JSON), or None for a file written
    before coupled runs stored them."""
    raw = ds.attrs.get("adequacy_warnings")
    return None if raw is None else [str(w) for w in json.loads(str(raw))]


def recorded_warnings(record) -> list[str]:
    """The run's adequacy warnings as its file holds them, or one line saying
    they are unavailable (a file that does not say)."""
    if record.warnings is None:
        return [WARNINGS_UNAVAILABLE]
    return list(record.warnings)


def detector_side(record, j: int) -> float:
    """+1 when the initial packet lies above detector ``j`` on its axis,
    else -1: from the recorded mean position where the file holds it."""
    det = record.detectors[j]
    x0 = recorded_or(record, "detector_initial_mean", j, lambda: as_record(record).packet_center(det.axis))
    return 1.0 if x0 > det.position else -1.0


def packet_side(setup, axis: int, x_det: float) -> float:
    """+1 when the initial packet lies above the detector on its axis, else -1
    (``setup``: the run's record, :class:`wavesweep.io.record.RecordedRun`)."""
    x0 = as_record(setup).packet_center(axis)
    return 1.0 if x0 > x_det else -1.0
