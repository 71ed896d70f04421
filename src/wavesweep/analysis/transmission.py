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
memory); it needs the whole transmitted amplitude inside the run (the flux
at the detector must have died out) and the incident packet entirely on the
other side of the scatterer at t = 0.  The samples are a trapezoidal sum,
which is exact up to aliasing: the band of energies the packet holds must be
narrower than 2 pi hbar / (sample spacing).
"""
from __future__ import annotations

import math

import numpy as np

from ..errors import JobError
from ..io.results import open_result, result_setup, result_units

__all__ = ["transmission", "energy_resolved_transmission", "transmission_totals"]

WEIGHT_FLOOR = 1e-2       # report T(E) where the incident weight is above 1 % of its peak
BAND_FLOOR = 1e-8         # the band that must not alias: weight above 1e-8 of the peak
AMPLITUDE_AT_START = 1e-6  # |psi(x_d, 0)|^2 / max |psi(x_d, t)|^2 allowed
NOTHING_CROSSED = 1e-9     # net probability through a detector below which nothing arrived


def transmission_totals(ds, setup) -> dict:
    """Per face: absorbed at the end.  Per detector: ``beyond`` (on the grid
    beyond it at the end + absorbed by the faces beyond it) and ``crossed``
    (int J dt), both probabilities; ``side`` is +1 when "beyond" is the +
    direction of the detector's axis (away from the initial packet)."""
    from .arrivals import _packet_side, _upstream_probability   # one room for the geometry

    faces = [str(b) for b in ds["boundary"].values] if "boundary" in ds.coords else []
    absorbed = {f: float(ds["absorbed"].sel(boundary=f).values[-1]) for f in faces} \
        if faces and ds.sizes.get("time", 0) else {f: 0.0 for f in faces}
    out = {"absorbed": absorbed, "final_norm": float(ds["norm"].values[-1]), "detectors": {}}
    names = [str(d) for d in ds["detector"].values] if "detector" in ds.coords else []
    t = np.asarray(ds["time"].values, float)
    for j, name in enumerate(names):
        det = setup.detectors[j]
        side = _packet_side(setup, det.axis, det.position)     # where the packet is
        axis_name = setup.grid.names[det.axis]
        far_face = f"{axis_name}{'-' if side > 0 else '+'}"
        on_grid = _upstream_probability(ds, setup, det.axis, det.position, -side)
        beyond = (on_grid if on_grid is not None else math.nan) + absorbed.get(far_face, 0.0)
        crossed = float(np.trapezoid(ds["flux"].values[:, j], t)) * (-side)
        out["detectors"][name] = {"beyond": beyond, "crossed": crossed, "far_face": far_face}
    return out


def energy_resolved_transmission(ds, setup, detector: str | None = None, points: int = 201) -> dict:
    """T(E) at a detector beyond the scatterer (see the module notes).

    Returns energies (job units), T, the incident weight |phi|^2 per energy
    normalised to its peak, and the detector used.  Without ``detector`` the
    detectors outside the absorbing layers are tried from the farthest along
    the packet's motion back, and the first that can give T(E) is used.
    Raises JobError when none can (multi-D, time-dependent potential, too
    coarse sampling, no amplitude recorded, the flux not died out)."""
    from .arrivals import _layer_holding

    if setup.grid.ndim != 1 or setup.grid.radial:
        raise JobError("RUN.nc", "energy-resolved transmission needs a 1D cartesian run "
                                 "(the totals are given for any run)")
    if setup.hamiltonian.time_dependent:
        raise JobError("RUN.nc", "energy-resolved transmission needs a static potential: with a "
                                 "time-dependent one, energy is not conserved")
    if "detector_psi_real" not in ds:
        raise JobError("RUN.nc", "the run did not record psi at its detectors "
                                 "(written by an older version); run the job again")
    names = [str(d) for d in ds["detector"].values]
    if not names:
        raise JobError("RUN.nc", "the run has no detector; add a [[detector]] beyond the scatterer")
    x = setup.grid.axes[0].coordinates
    # incident momentum density (continuous normalisation, int |phi|^2 dk = 1)
    # on a k grid 8 times finer than the grid's own (zero-padded FFT)
    dx = setup.grid.axes[0].dx
    pad = 8 * len(x)
    k_all = np.fft.fftshift(2 * math.pi * np.fft.fftfreq(pad, dx))
    w_all = np.fft.fftshift(np.abs(np.fft.fft(setup.psi0, n=pad)) ** 2) * dx**2 / (2 * math.pi)
    p_mean = float(np.sum(k_all * w_all) / np.sum(w_all))
    if detector is not None:
        if detector not in names:
            raise JobError("--detector", f"no detector {detector!r} in the run; it has {', '.join(names)}")
        j = names.index(detector)
        face = _layer_holding(setup, 0, setup.detectors[j].position)
        if face is not None:
            raise JobError("--detector", f"detector {detector!r} lies inside the {face} absorbing layer, "
                                         "where psi is no longer the transmitted wave; use one before it")
        return _at_detector(ds, setup, j, k_all, w_all, points)
    sign = 1.0 if p_mean >= 0 else -1.0
    order = sorted(range(len(names)), key=lambda i: -sign * setup.detectors[i].position)
    usable = [i for i in order if _layer_holding(setup, 0, setup.detectors[i].position) is None]
    if not usable:
        raise JobError("RUN.nc", "every detector lies inside an absorbing layer; T(E) needs one "
                                 "between the scatterer and the layer")
    first = None
    for i in usable:
        try:
            return _at_detector(ds, setup, i, k_all, w_all, points)
        except JobError as e:
            first = first or e
    raise first


def _at_detector(ds, setup, j, k_all, w_all, points) -> dict:
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
    if abs(amp[-1]) ** 2 > 1e-6 * peak:
        raise JobError("evolve.duration", f"psi at detector {name!r} has not died out by the end "
                                          f"(|psi|^2 at {abs(amp[-1]) ** 2 / peak:.1e} of its peak); "
                                          "extend evolve.duration")

    v_static = setup.hamiltonian.static_potential
    v_start = float(np.sum(v_static * dens0) / np.sum(dens0))
    v_det = float(np.interp(x_d, x, v_static))
    mass = setup.mass

    forward = k_all * direction > 0
    w_fwd = np.where(forward, w_all, 0.0)
    k_band = k_all[w_fwd > BAND_FLOOR * w_fwd.max()]
    e_band = v_start + k_band**2 / (2 * mass)
    dt_rec = float(np.median(np.diff(t)))
    width = float(e_band.max() - e_band.min())
    if width >= 2 * math.pi / dt_rec:
        need = 2 * math.pi / width / uc["time"]
        raise JobError("record.every", f"samples {dt_rec / uc['time']:g} {uc['time_label']} apart alias "
                                       f"the packet's band of {width / uc['energy']:.3g} {uc['energy_label']}; "
                                       f"use record.every < {need:.3g} {uc['time_label']}")
    k_rep = k_all[w_fwd > WEIGHT_FLOOR * w_fwd.max()]
    k = np.linspace(k_rep.min(), k_rep.max(), points)
    k = k[np.argsort(np.abs(k))]          # energies ascending whichever way the packet moves
    energy = v_start + k**2 / (2 * mass)
    phi = _momentum_amplitude(setup.psi0, x, k)
    v_in = np.abs(k) / mass
    kinetic_det = energy - v_det
    v_out = np.sqrt(np.maximum(2 * kinetic_det / mass, 0.0))
    wq = np.full(len(t), dt_rec)          # trapezoid weights
    wq[0] = wq[-1] = dt_rec / 2
    if not np.allclose(np.diff(t), dt_rec, rtol=1e-6, atol=0):
        wq = np.gradient(t)                 # uneven samples (a resumed run is still even)
    amp_e = (np.exp(1j * np.outer(energy, t)) @ (amp * wq)) / (2 * math.pi)
    T = 2 * math.pi * v_in * v_out * np.abs(amp_e) ** 2 / np.abs(phi) ** 2
    T[kinetic_det <= 0] = 0.0
    return {
        "detector": name,
        "energy": energy / uc["energy"],
        "T": T,
        "weight": np.abs(phi) ** 2 / w_fwd.max(),
        "energy_units": uc["energy_label"],
    }


def _momentum_amplitude(psi, x, k) -> np.ndarray:
    """phi(k) = (2 pi)^(-1/2) int psi(x) exp(-i k x) dx by the grid sum (exact
    for a band-limited psi on the grid), in blocks to bound the memory."""
    out = np.empty(len(k), complex)
    dx = x[1] - x[0]
    for i in range(0, len(k), 256):
        kk = k[i:i + 256]
        out[i:i + 256] = np.exp(-1j * np.outer(kk, x)) @ psi * dx / math.sqrt(2 * math.pi)
    return out


def transmission(result, detector: str | None = None) -> dict:
    """Totals and (where the run allows) T(E), from a result path or dataset.
    ``energy_resolved`` holds T(E) or the reason it is missing."""
    ds = open_result(result, require=("time", "norm", "flux"))
    try:
        from ..check import splitting_warning

        setup = result_setup(ds)
        out = {"totals": transmission_totals(ds, setup), "warnings": []}
        if (w := splitting_warning(setup)) is not None:
            out["warnings"].append(f"the run's time step: {w}")
        try:
            out["energy_resolved"] = energy_resolved_transmission(ds, setup, detector)
        except JobError as e:
            # the totals stand; a detector asked for by name makes its failure an error (the CLI
            # prints the totals first)
            out["energy_resolved"] = {"reason": f"{e.field}: {e.message}", "error": e,
                                      "requested": detector is not None}
        return out
    finally:
        if ds is not result:
            ds.close()
