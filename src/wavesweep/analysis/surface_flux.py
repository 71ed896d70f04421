"""Momentum spectra of what leaves through a detector, by the time-dependent
surface-flux method (L. Tao and A. Scrinzi, New J. Phys. 14, 013021 (2012)),
valid with a driving field (atomic units, hbar = 1, charge q): the 1D
method here, a line's or plane's (transverse momenta resolved) in
:mod:`wavesweep.analysis.plane_spectrum`, the time transform both use in
:mod:`wavesweep.analysis.flux_method`; :func:`spectrum` serves either.

Derivation.  Let a uniform force F(t) = q E(t) act (length gauge, V = -q E x;
the ``field`` potential kind), A(t) = -int_0^t E dt', P(t) = -q A(t) the
momentum it gave (:mod:`wavesweep.volkov`).  The length-gauge Volkov state of
canonical momentum k,

    chi_k(x, t) = (2 pi)^(-1/2) exp(i (k - q A) x - i Phi_k(t)),
    Phi_k(t) = int_0^t (k - q A)^2 / 2m dt' = k^2 t / 2m + k alpha(t) + S(t),

solves i d_t chi = [p^2 / 2m - q E x] chi (check: i d_t of the exponent gives
q A' x + (k - qA)^2 / 2m with A' = -E).  Beyond the detector x_d the
potential is that field alone, so chi_k are the outgoing states there and,
with Theta = Theta(x - x_d),

    b(k, t) = <chi_k(t)| Theta |psi(t)>,
    d_t b = i <chi_k| H_f Theta - Theta H |psi> = i <chi_k| [T, Theta] |psi>

(wherever Theta is not zero H is the field's own H_f, so H_f Theta - Theta H
= [T, Theta]; the field's -q E x commutes with Theta).  [T, Theta] psi = -(1/2m)
(delta' psi + 2 delta psi'), and an integration by parts with
d_x chi_k^* = -i (k - qA) chi_k^* gives

    d_t b = -(i / 2m) chi_k^*(x_d, t) [d_x psi + i (k - q A) psi](x_d, t),
    b(k) = b(k, 0) - (i / 2m) int_0^T dt chi_k^*(x_d, t) [d_x psi + i (k - qA) psi](x_d, t).

For the other side (Theta(x_d - x)) the sign of the integral flips.  b(k, 0)
is the initial state beyond the detector projected on plane waves (A(0) = 0).
|b(k)|^2 is the probability per unit canonical momentum k of what has crossed
the detector by T; after the pulse (A(T) = 0) k is the final momentum; the
momentum reported is the kinetic momentum at the end, p = k - q A(T).  The
kinetic energy is p^2 / 2m; per energy the density is |b|^2 m / |p|.  A
constant potential V_d beyond the detector (a biased lead) adds V_d t to
Phi_k: the outgoing states are then the Volkov waves of energy p^2 / 2m +
V_d, exactly (the run records V_d, ``detector_potential``); where V varies
beyond it, plane waves are not the outgoing states, and a warning says so.

Sampling.  The run records psi(x_d) and d_x psi(x_d) at every sample
(``detector_psi``, ``detector_dpsi``; both were already computed for the flux,
so recording them adds no work per step, only two numbers per detector and
sample) and P, alpha, S (driven runs).  The time integral is the trapezoidal
sum over the samples.  Beyond the detector psi(x_d, t) = int dk' c(k')
exp(-i Phi_k'(t)) ..., so the integrand for k oscillates at frequencies
Phi_k' - Phi_k; the sum over samples dt_s apart reproduces int exp(i w t) dt
exactly up to the aliases w + 2 pi n / dt_s, n != 0 (the Poisson summation
formula), which miss the spectrum when every |w| < 2 pi / dt_s.  Bound and
slow parts at the detector (energies from V_min up) are there too, so the
spectrum is computed up to the energy pi / dt_s only, and a record whose
spectrum is still above BAND_FLOOR of its peak at that energy (an aliased
one fills the range) is refused with the record.every that would do: per
sample, not per step, is then exact to rounding (the field-free case is
energy-resolved transmission's transform: :func:`time_transform` is the
one both call).  A record cut while parts still arrive leaves the
trapezoid's end error (Euler-Maclaurin), which :func:`_end_correction`
removes to leading order.  What the cut leaves out is estimated by the
integrand continued past the end as it was going (:func:`flux_method.cut_tail`)
and reported as ``cut_uncertainty``, relative to the density's peak.

Split-step sidebands.  The split-operator step is periodic in time: a
potential with sharp features couples E to E + 2 pi / dt, a wave the grid
carries where 2 pi / dt is below its largest energy; d_x psi weighs it by its
large k, so a warning names the dt that keeps it off the grid.
"""
from __future__ import annotations

import math

import numpy as np

from ..errors import JobError
from ..io.record import initial_beyond, layer_holding
from .flux_method import (BAND_FLOOR, CUT_WARN, STILL_TO_COME_WARN, VARIES, NothingCrossed, alias_level,
                          cut_warning, dpsi_correction, end_taper, kept_range, momentum_label, premise_warnings,
                          refuse_if_nothing_crossed, surface_flux_amplitude, time_transform, trapezoid_weights)
from .plane_spectrum import plane_spectrum
from .transmission import came_round_warning
from .recorded import run_record as read_record
from ..io.results import open_result, result_units, source_name

__all__ = ["time_transform", "trapezoid_weights", "surface_flux_amplitude", "momentum_spectrum", "spectrum",
           "detector_spectra",
           "BAND_FLOOR", "STILL_TO_COME_WARN"]



def _beyond_projection(first, values, x, k) -> np.ndarray:
    """b(k, 0) = (2 pi)^(-1/2) sum_{x beyond x_d} exp(-i k x) psi0 dx over
    the part of psi0 beyond the detector, ``values`` from grid index
    ``first`` (:func:`wavesweep.io.record.initial_beyond`)."""
    if not len(values):
        return np.zeros(len(k), complex)
    xs = x[first:first + len(values)]
    dx = x[1] - x[0]
    out = np.empty(len(k), complex)
    for i in range(0, len(k), 256):
        out[i:i + 256] = np.exp(-1j * np.outer(k[i:i + 256], xs)) @ values * dx / math.sqrt(2 * math.pi)
    return out


def _initial_band(psi0, x, mass) -> float:
    """The largest kinetic energy (hartree) in psi0 above BAND_FLOOR of its peak momentum density."""
    dens = np.abs(np.fft.fft(psi0)) ** 2
    k = 2 * math.pi * np.fft.fftfreq(len(x), x[1] - x[0])
    return float(np.max(k[dens > BAND_FLOOR * dens.max()] ** 2)) / (2 * mass)


def local_band(psi_detector, dpsi_detector, mass, highest: bool = False) -> float:
    """The spread (or with ``highest`` the largest) of the local kinetic
    energies (Im(psi'/psi))^2 / 2m at the detector (hartree) over the samples
    where |psi|^2 is above BAND_FLOOR of its peak."""
    psi = np.asarray(psi_detector, complex)
    dens = np.abs(psi) ** 2
    keep = dens > BAND_FLOOR * dens.max()
    k_loc = (np.asarray(dpsi_detector, complex)[keep] / psi[keep]).imag
    e_loc = k_loc**2 / (2 * mass)
    if not e_loc.size:
        return 0.0
    return float(e_loc.max()) if highest else float(e_loc.max() - e_loc.min())


def momentum_spectrum(ds, setup, j: int, points: int = 401, details: bool = True) -> dict:
    """The spectrum through detector ``j`` of an open result (atomic units
    inside, job units out); see :func:`spectrum`.  ``details=False`` leaves
    out the warnings and ``still_to_come`` (None), which read the grid's
    potential and the final psi: what is left reads no array of the grid's
    size where the run recorded ``potential_min``, the detector's initial
    mean and ``initial_beyond`` (``collect``'s per-run spectra)."""
    uc = result_units(ds)
    p_unit = uc["mass"] * uc["length"] / uc["time"]   # job momentum unit in atomic units
    name = str(ds["detector"].values[j])
    x = setup.grid.axes[0].coordinates
    x_d = setup.detectors[j].position
    x0 = setup.detector_value("detector_initial_mean", j)
    if x0 is None:   # an older file: from psi0
        dens0 = np.abs(setup.psi0) ** 2
        x0 = float(np.sum(dens0 * x) / np.sum(dens0))
    side = 1.0 if x_d >= x0 else -1.0
    refuse_if_nothing_crossed(ds, j, name)
    mass = setup.mass
    t = np.asarray(ds["time"].values, float) * uc["time"]
    amp_scale = 1 / math.sqrt(uc["length"])
    psi = (np.asarray(ds["detector_psi_real"].values[:, j], float)
           + 1j * np.asarray(ds["detector_psi_imag"].values[:, j], float)) * amp_scale
    old_units, old_units_note = dpsi_correction(ds, uc)   # (a file written before dpsi_units: see there)
    dpsi = (np.asarray(ds["detector_dpsi_real"].values[:, j], float)
            + 1j * np.asarray(ds["detector_dpsi_imag"].values[:, j], float)) * (amp_scale * old_units / uc["length"])
    field = {}
    if "field_momentum" in ds.variables:
        field = {"field_momentum": np.asarray(ds["field_momentum"].values, float) * p_unit,
                 "excursion": np.asarray(ds["field_excursion"].values, float) * uc["length"],
                 "field_phase": np.asarray(ds["field_phase"].values, float)}
    # a constant V_d beyond the detector (a biased lead): the outgoing waves' energies are p^2 / 2m + V_d,
    # their phase V_d t more (exact where V is flat beyond it; a warning says where it is not)
    v_d = setup.detector_value("detector_potential", j)
    v_d = float(np.interp(x_d, x, setup.static_potential)) if v_d is None else v_d
    if v_d != 0.0:
        field["field_phase"] = field.get("field_phase", 0.0) + v_d * t
    dt_s = float(np.median(np.diff(t)))
    # momenta: outward, up to the energy pi / dt_s (what lies between it and V_min + 2 pi / dt_s is where
    # the aliases of slow and bound parts fall) and what the grid holds
    k_grid = math.pi / setup.grid.axes[0].dx
    k_top = min(math.sqrt(2 * mass * math.pi / dt_s), k_grid)
    p_end = float(field["field_momentum"][-1]) if "field_momentum" in field else 0.0
    coarse = side * np.linspace(0.0, k_top, 2048)[1:] - p_end
    beyond = (setup.initial_beyond or {}).get(j)
    if beyond is None:   # an older file: from psi0
        beyond = initial_beyond(setup.psi0, x, x_d, side)
    b0 = lambda k: _beyond_projection(*beyond, x, k)   # noqa: E731
    dens_c = np.abs(surface_flux_amplitude(t, psi, dpsi, coarse, mass, x_d, side, initial=b0(coarse), **field)) ** 2
    if not np.any(dens_c > 0):
        raise JobError("--detector", f"nothing crossed detector {name!r} outwards during the run")
    # the band (module notes): an aliased spectrum fills the whole range it is computed on, so one still
    # above BAND_FLOOR of its peak at the top of a range the samples (not the grid) limit is refused; a
    # record cut while psi still arrives leaks into every energy too (a truncated Fourier integral falls
    # off only as 1 / (E - E_end)), but that leak fades when the record's end is tapered, an alias does not
    v_low = setup.potential_min if setup.potential_min is not None else float(np.min(setup.static_potential))
    v_min = min(v_low - v_d, 0.0)    # bound parts' energies, counted from the outgoing waves' V_d
    upper = coarse[-len(coarse) // 20:]
    taper = end_taper(t)
    top = alias_level(dens_c, lambda: (np.abs(surface_flux_amplitude(
        t, psi * taper, dpsi * taper, upper, mass, x_d, side, initial=b0(upper), **field)) ** 2).max(),
        k_top < k_grid)
    if top > BAND_FLOOR or -v_min * dt_s >= math.pi:
        if not details:
            raise JobError("record.every", f"{source_name(ds)}: samples {dt_s / uc['time']:g} "
                                           f"{uc['time_label']} apart alias the band of energies arriving at "
                                           f"detector {name!r}; see `wavesweep spectrum`")
        highest = max(local_band(psi, dpsi, mass, highest=True), _initial_band(setup.psi0, x, mass)) - v_min
        need = min(math.pi / highest, dt_s / 2) / uc["time"]
        raise JobError("record.every", f"{source_name(ds)}: samples {dt_s / uc['time']:g} {uc['time_label']} "
                                       f"apart alias the band of energies arriving at detector {name!r} (the "
                                       f"spectrum is still {top:.1e} of its peak at the "
                                       f"{k_top * k_top / (2 * mass) / uc['energy']:.3g} {uc['energy_label']} "
                                       f"they resolve); use record.every < {need:.3g} {uc['time_label']}")
    lo, hi = kept_range(coarse + p_end, dens_c, k_top / 2047, k_top)
    p_kin = side * np.linspace(lo, hi, points)
    k = p_kin - p_end
    b, cut = surface_flux_amplitude(t, psi, dpsi, k, mass, x_d, side, initial=b0(k), cut=True, **field)
    density = np.abs(b) ** 2                       # per bohr^-1
    spread = 2 * np.abs(b) * cut + cut**2          # what the cut record may move the density by
    cut_uncertainty = float(np.max(spread) / density.max())
    total = float(np.trapezoid(density, np.abs(p_kin)))
    energy = p_kin**2 / (2 * mass)
    q = np.abs(p_kin)
    energy_density = density * mass / np.where(q > 0, q, np.inf)
    if len(q) > 1 and q[0] == 0:
        # dP/dE = |b|^2 m / p diverges (integrably) at p = 0: there the mean over the energy bin up to the
        # half step h, |b(0)|^2 h / (h^2 / 2m) (a point value was 1e296)
        energy_density[0] = 4 * mass * density[0] / q[1]
    out = {"detector": name, "side": "+" if side > 0 else "-",
           "momentum": p_kin / p_unit, "probability_density": density * p_unit,
           "energy": energy / uc["energy"], "energy_density": energy_density * uc["energy"],
           "total": total, "total_uncertainty": float(np.trapezoid(spread, np.abs(p_kin))),
           "still_to_come": None, "cut_uncertainty": cut_uncertainty,
           "momentum_units": momentum_label(ds, uc), "energy_units": uc["energy_label"],
           "warnings": []}
    if not details:
        return out
    warnings = out["warnings"]
    if old_units_note is not None:
        warnings.append(old_units_note)
    if cut_uncertainty > CUT_WARN:
        warnings.append(cut_warning(name, cut_uncertainty))
    v_static = np.asarray(setup.static_potential, float)
    e_mean = float(np.trapezoid(density * energy, np.abs(p_kin)) / total) if total > 0 else 0.0
    beyond = (x > x_d) if side > 0 else (x < x_d)
    pushed = np.abs(np.diff(field["field_momentum"][-3:])) if "field_momentum" in field else np.zeros(0)
    warnings += premise_warnings(
        name, uc, float(pushed.max(initial=0.0)), float(np.max(np.abs(p_kin))), e_mean,
        float(np.max(np.abs(v_static[beyond] - v_d))) if np.any(beyond) else 0.0, 0.0,
        float(ds.attrs.get("dt", 0.0)) * uc["time"], (math.pi / setup.grid.axes[0].dx) ** 2 / (2 * mass))
    came_round = came_round_warning(ds, setup, j, name, side)
    if came_round:
        warnings.append(came_round)
    to_come = _still_to_come(ds, uc, x, v_static, x_d, side, e_mean)
    if to_come is not None and total > 0 and to_come > STILL_TO_COME_WARN * total:
        warnings.append(f"the run ended while slow parts were still arriving at detector {name!r}: "
                        f"{to_come:.3g} more probability (against {total:.3g} that crossed) lies before it "
                        "moving towards it; extend evolve.duration for the low momenta")
    out["still_to_come"] = to_come
    return out


def _still_to_come(ds, uc, x, v_static, x_d, side, e_mean) -> float | None:
    """The final state's probability before the detector, where V is flat up
    to it, moving towards it, less what moves away (net; None without a
    final state).  What is still
    inside the region where V varies (a bound part, a slow fragment being
    turned) is not counted: a lower estimate of what is to come."""
    if "psi_real" not in ds:
        return None
    psi = (np.asarray(ds["psi_real"].values, float) + 1j * np.asarray(ds["psi_imag"].values, float)) \
        / math.sqrt(uc["length"])
    before = side * (x_d - x) > 0
    v_d = float(np.interp(x_d, x, v_static))
    varies = before & (np.abs(v_static - v_d) > VARIES * max(e_mean, 1e-300))
    inner = float(x[varies][np.argmin(side * (x_d - x[varies]))]) if varies.any() else None
    region = before if inner is None else before & (side * (x - inner) > 0)
    part = np.where(region, psi, 0.0)
    if not np.any(part):
        return 0.0
    dx = x[1] - x[0]
    phi = np.fft.fft(part) * dx / math.sqrt(2 * math.pi)
    k = 2 * math.pi * np.fft.fftfreq(len(x), dx)
    dk = 2 * math.pi / (len(x) * dx)
    # net: what moves away is taken off, so a bound state's tail (real up to a phase, |phi(k)| even in k)
    # counts nothing (counted alone, half of it was "still to come" in a run where nothing could come)
    return max(float((np.sum(np.abs(phi[side * k > 0]) ** 2) - np.sum(np.abs(phi[side * k < 0]) ** 2)) * dk), 0.0)


def spectrum(result, detector: str | None = None, points: int | None = None) -> dict:
    """Momentum and energy spectra of what left through each detector of a
    run (or ``detector`` alone): ``{"detectors": [...], "warnings": [...]}``,
    each detector's entry with ``momentum`` (the normal component, job units),
    ``probability_density`` (per unit momentum), ``energy``, ``energy_density``
    (per unit energy), ``total`` and ``still_to_come`` (probability; None
    without a final state).  In 2D/3D (detectors with ``spectrum = true``)
    the entry also has ``momentum_<axis>`` for each transverse axis,
    ``probability_density`` on (normal, *transverse) per unit momentum^d and
    its marginal ``probability_density_normal``
    (:func:`wavesweep.analysis.plane_spectrum.plane_spectrum`).  ``points``:
    normal momenta and energies (default 401 in 1D, 201 on a line or
    plane).  JobError where the run cannot give one."""
    ds = open_result(result, require=("time", "flux"))
    try:
        setup, names = _spectrum_record(ds)
        if detector is not None:
            if detector not in names:
                raise JobError("--detector", f"no detector {detector!r} in the run; it has {', '.join(names)}")
            chosen = [names.index(detector)]
        else:
            chosen = _spectrum_detectors(ds, setup, names)
        out = {"detectors": [], "warnings": []}
        empty = []
        for j in chosen:
            try:
                found = _detector_spectrum(ds, setup, j, points)
            except NothingCrossed as e:   # all detectors asked for: this one is left out, and said so
                if detector is not None:
                    raise
                empty.append(e)
                continue
            out["warnings"].extend(w for w in found.pop("warnings") if w not in out["warnings"])
            out["detectors"].append(found)
        if empty and not out["detectors"]:
            raise empty[0]
        out["warnings"].extend(f"{e.message}; the other detectors' spectra are given" for e in empty)
        return out
    finally:
        if ds is not result:
            ds.close()


def _detector_spectrum(ds, setup, j: int, points: int | None, details: bool = True) -> dict:
    """One detector's spectrum: a point's (1D) or a line's or plane's."""
    if setup.grid.ndim == 1:
        return momentum_spectrum(ds, setup, j, points or 401, details)
    return plane_spectrum(ds, setup, j, points or 201, details)


def detector_spectra(ds, points: int | None = None) -> dict:
    """Each detector's spectrum of an open result as :func:`spectrum` gives
    it (the same numbers), without the warnings and ``still_to_come``:
    ``{name: entry or None}``, None for a detector :func:`spectrum` leaves
    out (inside an absorbing layer; in 2D/3D one without ``spectrum =
    true``) or refuses (aliased samples, nothing crossed).  On a line or
    plane ``probability_density`` is the marginal along the normal (per unit
    normal momentum), the shape the study's summary keeps.  Reads no array
    of the grid's size where the run recorded what the spectrum needs from
    psi0 (:mod:`wavesweep.io.record`); ``collect`` calls it.  JobError where
    the run gives no spectrum at all."""
    setup, names = _spectrum_record(ds)
    out = {name: None for name in names}
    for j in _spectrum_detectors(ds, setup, names):
        try:
            entry = _detector_spectrum(ds, setup, j, points, details=False)
        except JobError:
            continue
        if "probability_density_normal" in entry:
            entry = {**entry, "probability_density": entry["probability_density_normal"]}
        out[names[j]] = entry
    return out


def _spectrum_detectors(ds, setup, names) -> list:
    """The detectors a spectrum is given for by default: outside the
    absorbing layers, and in 2D/3D those that recorded their line or plane."""
    lines = ([str(v) for v in ds["spectrum_detector"].values]
             if setup.grid.ndim > 1 and "spectrum_detector" in ds.variables else None)
    return [j for j in range(len(names))
            if layer_holding(setup, setup.detectors[j].axis, setup.detectors[j].position) is None
            and (lines is None or names[j] in lines)]


def _moving_terms(ds) -> list[str]:
    """Kinds of the run's potential terms that change in time and are no
    uniform force (a field or gravity), from the job text the result
    stores; [] when it cannot be read (older files: the record's own
    check then stands)."""
    import tomllib   # lazy: only a run whose potential depends on time needs its job read
    # lazy: the job's terms are rebuilt only to see which move in time (the record does not say)
    from ..job import job_from_dict
    from ..setup import Model
    try:
        model = Model(job_from_dict(tomllib.loads(str(ds.attrs.get("job", "")))))
    except (tomllib.TOMLDecodeError, JobError):
        return []
    return [t.kind for t in model.terms if t.time_dependent and not t.uniform_force]


def _spectrum_record(ds):
    """(record, detector names) of a result that can give spectra; JobError naming why not."""
    setup = read_record(ds)
    if setup.grid.radial:
        raise JobError("RUN.nc", f"{source_name(ds)}: a radial run gives no surface-flux spectrum (its "
                                 "outgoing states are not plane waves); use a cartesian grid")
    if "frame_offset" in ds.variables:
        raise JobError("RUN.nc", f"{source_name(ds)}: the run's grid fell with the packet; the spectrum needs "
                                 "a grid fixed in the lab (grid.frame = 'lab')")
    if setup.grid.ndim == 1 and "detector_dpsi_real" not in ds:
        raise JobError("RUN.nc", f"{source_name(ds)}: the run did not record dpsi/dx at its detectors "
                                 "(written by an older version); run the job again")
    if setup.grid.ndim > 1 and "spectrum_detector" not in ds.variables:
        raise JobError("RUN.nc", f"{source_name(ds)}: no detector of the run recorded psi along its "
                                 f"{'line' if setup.grid.ndim == 2 else 'plane'}; add spectrum = true to the "
                                 "[[detector]] and run the job again")
    moving = _moving_terms(ds) if setup.time_dependent else []
    if moving:
        raise JobError("RUN.nc", f"{source_name(ds)}: the potential's {', '.join(moving)} term(s) change in "
                                 "time and are not a uniform field: beyond the detector the Volkov waves of "
                                 "the field are then not the outgoing states, so no surface-flux spectrum")
    if setup.time_dependent and "field_momentum" not in ds:
        raise JobError("RUN.nc", f"{source_name(ds)}: the potential depends on time but not through a "
                                 "uniform field; the surface-flux spectrum needs V beyond the detector to be "
                                 "a driving field at most")
    names = [str(d) for d in ds["detector"].values]
    if not names:
        raise JobError("RUN.nc", f"{source_name(ds)}: the run has no detector; add a [[detector]]")
    return setup, names
