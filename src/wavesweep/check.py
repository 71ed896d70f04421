"""Adequacy report of a job before a long run: ``wavesweep check``.

Each item is a finding with numbers, in the job's units:

* momentum the grid resolves (pi/dx per axis) against the packet's reach
  |p0| + 6 sigma_p (numerics notes; margin of 6 sigma is common practice);
  a packet the grid cannot represent (|p0| + 3 sigma_p above pi/dx) is an
  error, raised by :func:`representability` for ``run`` as well;
* distance of the packet centre from edges and absorbers in units of its
  width (8 sigma_x of margin is common practice);
* packets that are not Gaussian parts only (eigenstates, files, mixed
  superpositions) are measured on the actual initial state instead: the
  momenta where the tails of its momentum distribution fall to those of a
  Gaussian beyond 6 and 3 sigma_p, its centre <x> and spread;
* time step: phase per step E dt / hbar of the packet's highest kinetic
  energy and of the grid's kinetic range;
* absorber: thickness against the longest wavelength it must absorb, and
  the computed worst return probability over the packet's energy window;
* memory, disk for the snapshots, and run time from a short timed trial.
"""
from __future__ import annotations

import math
import time as _time
import numpy as np

from .adequacy import Finding, Report
from .absorbers.tuning import cap_profile, layer_scattering, return_probability
from .errors import JobError
from .fft import make_transform
from .jobfile import Job
from .states import central_momenta, momentum_spread

__all__ = ["Finding", "Report", "check_job", "representability"]


def _gaussian_parts(packet):
    if packet["kind"] == "gaussian":
        return [packet]
    if packet["kind"] == "superposition":
        return [q for p in packet["packets"] for q in _gaussian_parts(p)]
    return []


def _all_gaussian(packet) -> bool:
    """Whether the packet is Gaussian parts only (its momenta are then known in closed form)."""
    if packet["kind"] == "gaussian":
        return True
    if packet["kind"] == "superposition":
        return all(_all_gaussian(p) for p in packet["packets"])
    return False


# One-sided tail weights of a Gaussian beyond 6 and 3 standard deviations,
# (1/2) erfc(n / sqrt 2): what |p0| + 6 sigma_p and |p0| + 3 sigma_p leave
# out of a Gaussian packet's momenta, the quantiles a measured state's
# momenta are read at (closed form; 9.9e-10 and 1.3e-3).
TAIL_6 = 0.5 * math.erfc(6.0 / math.sqrt(2.0))
TAIL_3 = 0.5 * math.erfc(3.0 / math.sqrt(2.0))


def _momentum_marginal(psi, grid, i):
    """(k, weight) along axis i of psi: |transform|^2 summed over the other
    axes (FFT on periodic axes, orthonormal DST-I on box and radial ones),
    k ascending, weights summing to 1."""
    import scipy.fft

    ax = grid.axes[i]
    c = (scipy.fft.fft(psi, axis=i) if ax.boundary == "periodic"
         else scipy.fft.dst(psi, type=1, axis=i, norm="ortho"))
    other = tuple(j for j in range(grid.ndim) if j != i)
    weight = np.sum(np.abs(c) ** 2, axis=other) if other else np.abs(c) ** 2
    k = ax.wavenumbers
    order = np.argsort(k)
    weight = weight[order]
    return k[order], weight / weight.sum()


def _upper_quantile(k, weight, tail):
    """The k above which ``tail`` of the weight lies, each bin's weight
    spread evenly over its width (k ascending, evenly spaced)."""
    dk = float(k[1] - k[0]) if k.size > 1 else 0.0
    above = np.concatenate([np.cumsum(weight[::-1])[::-1][1:], [0.0]])   # weight above bin j
    j = int(np.nonzero(above <= tail)[0][0])
    inside = (tail - above[j]) / weight[j] if weight[j] > 0 else 0.0
    return float(k[j] + 0.5 * dk - min(inside, 1.0) * dk)


def measured_momentum_reach(setup, tail):
    """Per axis, the largest |p| (atomic units) of the initial state up to a
    one-sided ``tail`` of its momentum distribution on either side: for a
    Gaussian packet |p0| + n sigma_p with tail = (1/2) erfc(n / sqrt 2), to
    within the grid's dk.  Measured from Setup.psi0 (any packet kind)."""
    out = []
    for i, ax in enumerate(setup.grid.axes):
        k, w = _momentum_marginal(setup.psi0, setup.grid, i)
        hi = _upper_quantile(k, w, tail)
        lo = -_upper_quantile(-k[::-1], w[::-1], tail) if ax.boundary == "periodic" else 0.0
        out.append(max(abs(hi), abs(lo)))
    return out


def packet_reach(setup):
    """Per axis (|p0| + 6 sigma_p, |p0| + 3 sigma_p) of the packet, atomic
    units, and whether they were measured: closed forms for Gaussian parts
    (the largest over parts), else the quantiles of the actual initial
    state's momentum distribution (:func:`measured_momentum_reach`)."""
    if _all_gaussian(setup.packet):
        reach6 = [0.0] * setup.grid.ndim
        reach3 = [0.0] * setup.grid.ndim
        for part in _gaussian_parts(setup.packet):
            p0 = central_momenta(part, setup.mass, setup.grid.ndim, "packet")
            for i in range(setup.grid.ndim):
                sp = momentum_spread(part["width"][i])
                reach6[i] = max(reach6[i], abs(p0[i]) + 6 * sp)
                reach3[i] = max(reach3[i], abs(p0[i]) + 3 * sp)
        return reach6, reach3, False
    return measured_momentum_reach(setup, TAIL_6), measured_momentum_reach(setup, TAIL_3), True


def _measured_momentum_findings(setup, findings):
    """The momentum finding of a packet that is not Gaussian parts only."""
    u = setup.units
    pf, pu = u.factor("momentum"), u.unit_label("momentum")
    reach6, reach3, _ = packet_reach(setup)
    for ax, r6, r3 in zip(setup.grid.axes, reach6, reach3):
        kmax = math.pi / ax.dx
        need = math.ceil(ax.length * r6 / math.pi) + 1
        level = "ok" if r6 < kmax else ("warn" if r3 < kmax else "error")
        findings.append(Finding(
            "momentum", level,
            f"{ax.name}: grid resolves |p| <= {kmax / pf:.4g} {pu}; the state's momenta (measured) reach "
            f"{r6 / pf:.4g} ({r6 / kmax:.0%} of the range; the |p0| + 6 sigma_p of a Gaussian)"
            + ("" if level == "ok" else f"; use >= {need} points"),
            {"axis": ax.name, "k_max": kmax / pf, "packet_reach": r6 / pf, "measured": True},
            field=f"grid.{ax.name}.points"))


def representability(setup, findings=None):
    """Momentum coverage per axis; raises JobError if the grid cannot
    represent the packet (|p0| + 3 sigma_p > pi/dx)."""
    u = setup.units
    pf = u.factor("momentum")
    for part in _gaussian_parts(setup.packet):
        p0 = central_momenta(part, setup.mass, setup.grid.ndim, "packet")
        for i, ax in enumerate(setup.grid.axes):
            sp = momentum_spread(part["width"][i])
            reach6, reach3 = abs(p0[i]) + 6 * sp, abs(p0[i]) + 3 * sp
            kmax = math.pi / ax.dx
            need = math.ceil(ax.length * reach6 / math.pi) + 1
            if reach3 > kmax:
                raise JobError(f"grid.{ax.name}.points",
                               f"the grid resolves |p| up to {kmax / pf:.4g} {u.unit_label('momentum')} but "
                               f"the packet reaches {reach3 / pf:.4g} (|p0| + 3 sigma); use at least "
                               f"{need} points")
            if findings is not None:
                level = "ok" if reach6 <= kmax else "warn"
                findings.append(Finding(
                    "momentum", level,
                    f"{ax.name}: grid resolves |p| <= {kmax / pf:.4g} {u.unit_label('momentum')}; packet "
                    f"|p0| + 6 sigma_p = {reach6 / pf:.4g} ({reach6 / kmax:.0%} of the range)"
                    + ("" if level == "ok" else f"; use >= {need} points"),
                    {"axis": ax.name, "k_max": kmax / pf, "packet_reach": reach6 / pf},
                    field=f"grid.{ax.name}.points"))


def check_job(job: Job, trial_seconds: float = 1.0) -> Report:
    """Findings for a job (builds the run's objects and times a short trial)."""
    from .simulation import Setup

    findings: list[Finding] = []
    setup = Setup(job)
    u = setup.units
    lf, tf, ef = u.factor("length"), u.factor("time"), u.factor("energy")
    L, T, E = u.unit_label("length"), u.unit_label("time"), u.unit_label("energy")
    # a packet of Gaussian parts has its momenta and margins in closed form; any other
    # (eigenstate, file, or mixed superposition) is measured on the actual initial state
    gaussian = _all_gaussian(setup.packet)
    representability(setup, findings if gaussian else None)
    if not gaussian:
        _measured_momentum_findings(setup, findings)
    table = job.table

    # distances from edges and absorbers
    th = u.to_atomic(table["absorber"]["thickness"], "length") if setup.absorber.active else 0.0
    for part in _gaussian_parts(setup.packet) if gaussian else ():
        for i, ax in enumerate(setup.grid.axes):
            x0, w = part["center"][i], part["width"][i]
            edges = [(x0 - ax.min, f"{ax.name}-"), (ax.max - x0, f"{ax.name}+")]
            if setup.grid.radial:
                edges = [(x0, "r = 0"), (ax.max - x0, "r+")]
            for dist, face in edges:
                layer, margin, level, what = _margin(setup, th, face, dist, w)
                findings.append(Finding("margin", level,
                    f"packet centre is {margin:.1f} widths from the {face} {what} "
                    f"({(dist - layer) / lf:.4g} {L}; 8 widths is common practice)"
                    + ("; move the packet inward or narrow it" if level == "error" else ""),
                    {"face": face, "widths": margin}, field="packet.center"))

    if not gaussian:
        findings.extend(_measured_margins(setup, th, L, lf))

    # time step
    dt = setup.dt
    e_pk = 0.0
    if gaussian:
        for part in _gaussian_parts(setup.packet):
            p0 = central_momenta(part, setup.mass, setup.grid.ndim, "packet")
            e_pk = max(e_pk, sum((abs(p) + 6 * momentum_spread(w)) ** 2 for p, w in zip(p0, part["width"]))
                       / (2 * setup.mass))
    else:   # the actual state's momenta, measured
        e_pk = sum(r**2 for r in packet_reach(setup)[0]) / (2 * setup.mass)
    t_max = setup.grid.kinetic_max(setup.mass)
    v = setup.hamiltonian.static_potential
    v_span = float(v.max() - v.min())
    phase = e_pk * dt
    level = "ok" if phase <= 1.0 else ("warn" if phase <= math.pi else "error")
    findings.append(Finding("time step", level,
        f"phase per step: packet's highest kinetic energy {phase:.3g} rad (<= 1 is common practice), "
        f"grid's kinetic range {t_max * dt:.3g} rad, potential range {v_span * dt:.3g} rad "
        f"(dt = {dt / tf:g} {T})",
        {"packet_phase": phase, "grid_phase": t_max * dt, "potential_phase": v_span * dt},
        field="evolve.dt"))
    if getattr(setup.scheme, "in_place_transform", False):
        findings.append(_aliasing_finding(setup, T, tf))
    if setup.scheme.name == "chebyshev":
        from .propagators.chebyshev import Chebyshev
        prop = Chebyshev(setup.hamiltonian, dt, make_transform(setup.grid, "scipy"), setup.absorber)
        findings.append(Finding("time step", "ok",
            f"chebyshev: {len(prop.coefficients)} terms per step", {"terms": len(prop.coefficients)}))

    # detectors: one inside an absorbing layer sees a current already reduced by it
    for n, det in enumerate(setup.detectors):
        ax = setup.grid.axes[det.axis]
        for layer in setup.absorber.layers:
            if layer.axis != det.axis:
                continue
            inner = ax.max - th if layer.name.endswith("+") else ax.min + th
            inside = det.position > inner if layer.name.endswith("+") else det.position < inner
            if inside:
                findings.append(Finding("detector", "warn",
                    f"{det.name!r} at {ax.name} = {det.position / lf:.4g} {L} lies inside the {layer.name} "
                    f"absorber (which starts at {inner / lf:.4g} {L}): its flux is reduced by the "
                    f"absorption; move it out, or read the absorbed probability of {layer.name} instead",
                    {"detector": det.name, "face": layer.name}, field=f"detector.{n}.{ax.name}"))

    # absorber, face by face, over the energies that arrive there
    if setup.absorber.active:
        depth = np.linspace(0.0, th, 513)
        for layer in setup.absorber.layers:
            i, face = layer.axis, layer.name
            ax = setup.grid.axes[i]
            e_lo, e_hi = setup.energy_window(i, face)
            lam = 2 * math.pi / math.sqrt(2 * setup.mass * e_lo)
            energies = np.geomspace(e_lo, e_hi, 48)
            if setup.absorber.kind == "cap":
                raw = table["absorber"]["strength"]
                value = raw.get(face, 0.0) if isinstance(raw, dict) else (raw[i] if isinstance(raw, list) else raw)
                rate = cap_profile(depth, th, u.to_atomic(value, "energy"), table["absorber"]["power"])
            else:
                s = np.clip(depth / th, 0, 1 - 1e-9)
                rate = -np.log(np.cos(0.5 * np.pi * s) ** table["absorber"]["mask_exponent"]) / dt
            periodic = ax.boundary == "periodic"
            if periodic:   # what crosses the layer once wraps round into the opposite one
                r, t = layer_scattering(depth, rate, setup.mass, energies)
                worst, what = float(np.max(r + t)), "reflection + one-way transmission"
            else:
                worst = float(np.max(return_probability(depth, rate, setup.mass, energies)))
                what = "return probability"
            plo, phi = setup.momentum_window()[i]
            drifting = not (plo <= 0 <= phi)
            floored = abs(lam - th) < 1e-9 * th
            # the absorber is a modelling choice, so this warns but never refuses;
            # along an axis the packet does not move, slow parts are expected to return
            level = "ok" if worst <= 1e-6 or (floored and not drifting) else "warn"
            note = ""
            if floored:
                note = ("; slower parts, with wavelengths above the thickness, are not absorbed"
                        + ("" if drifting else " (the packet does not move along this axis)"))
            findings.append(Finding("absorber", level,
                f"{face}: thickness {th / lf:.4g} {L} vs longest wavelength {lam / lf:.4g} {L}; "
                f"worst {what} {worst:.2e} over {e_lo / ef:.4g}..{e_hi / ef:.4g} {E} (target 1e-6)"
                + note,
                {"face": face, "axis": ax.name, "worst_return": worst,
                 "e_min": e_lo / ef, "e_max": e_hi / ef}, field="absorber.thickness"))
    else:
        findings.append(Finding("absorber", "ok" if setup.grid.axes[0].boundary == "box" else "warn",
                                "no absorber: probability reaching the edges "
                                + ("reflects off the walls" if setup.grid.axes[0].boundary == "box"
                                   else "wraps around the periodic grid")))

    # memory and disk
    itemsize = np.dtype(setup.dtype).itemsize
    psi_bytes = setup.grid.size * itemsize
    if getattr(setup.scheme, "in_place_transform", False):
        # psi0, psi, the observer's buffer, the kick factors (Strang: one,
        # its whole kick is the half kick squared), V and W in float64, half
        # a psi of transients (density frames, the final state); measured
        # 5.2x psi at 128^3 for Strang (scripts/bench)
        n_kicks = {"strang": 1, "order4": 2}.get(setup.scheme.name, 3)
        w_arrays = 1 if setup.absorber.active else 0
        estimate = psi_bytes * (3.5 + n_kicks) + setup.grid.size * 8 * (1 + w_arrays)
    else:
        estimate = psi_bytes * 7 + setup.grid.size * 8 * 3
    if setup.grid.radial:
        from .propagators.split_operator import RADIAL_DENSE_MAX
        n = setup.grid.axes[0].points
        if getattr(setup.scheme, "in_place_transform", False):
            if n <= RADIAL_DENSE_MAX:
                estimate += 16 * n * n   # the dense radial eigenbasis (two N x N matrices)
            else:
                findings.append(Finding("time step", "warn",
                    f"radial grid of {n} points (> {RADIAL_DENSE_MAX}): the singular radial terms are "
                    "kicked, which converges slowly; use fewer points or scheme = 'chebyshev'",
                    {"points": n}, field="grid.r.points"))
    findings.append(Finding("memory", "ok",
        f"psi {psi_bytes / 2**20:.1f} MiB; run about {estimate / 2**20:.0f} MiB",
        {"psi_bytes": psi_bytes, "estimate_bytes": estimate}))
    stride = table["record"]["stride"]
    frame = int(np.prod([math.ceil(a.points / stride) for a in setup.grid.axes])) * 4
    n_snap = setup.total_steps // setup.snapshot_steps + 1
    n_samp = setup.total_steps // setup.sample_steps + 1
    disk = frame * n_snap + n_samp * 8 * (8 + len(setup.detectors) + len(setup.absorber.layers))
    findings.append(Finding("disk", "ok",
        f"{n_snap} snapshots of {frame / 2**10:.0f} KiB, {n_samp} samples: at most "
        f"{disk / 2**20:.1f} MiB before compression",
        {"snapshots": n_snap, "samples": n_samp, "bytes": disk}))

    # timed trial
    findings.append(_trial(setup, trial_seconds))
    return Report(job.title, findings)


def _margin(setup, th, face, dist, w):
    """(layer thickness, margin in widths, level, "absorber"/"edge") of a
    packet centre ``dist`` from ``face``; 8 widths is common practice, 3 the
    least that keeps the tail (1e-3 of it and more) off the layer."""
    layer = th if any(lay.name == face for lay in setup.absorber.layers) else 0.0
    margin = (dist - layer) / w
    level = "ok" if margin >= 8 else ("warn" if margin > 3 else "error")
    return layer, margin, level, "absorber" if layer else "edge"


def _measured_margins(setup, th, L, lf) -> list:
    """Margins of a packet that is not Gaussian parts only: its measured
    centre <x> and spread (the standard deviation of |psi|^2, a Gaussian
    packet's width) along each axis, from Setup.psi0."""
    grid, out = setup.grid, []
    dens = np.abs(setup.psi0) ** 2
    dens = dens / dens.sum()
    for i, ax in enumerate(grid.axes):
        other = tuple(j for j in range(grid.ndim) if j != i)
        line = np.sum(dens, axis=other) if other else dens
        x = ax.coordinates
        x0 = float(np.sum(line * x))
        w = math.sqrt(max(float(np.sum(line * (x - x0) ** 2)), 0.0)) or ax.dx
        edges = [(x0 - ax.min, f"{ax.name}-"), (ax.max - x0, f"{ax.name}+")]
        if grid.radial:
            edges = [(ax.max - x0, "r+")]   # u(r) vanishes at r = 0 by itself
        for dist, face in edges:
            layer, margin, level, what = _margin(setup, th, face, dist, w)
            out.append(Finding("margin", level,
                f"the state's centre (measured) is {margin:.1f} spreads from the {face} {what} "
                f"({(dist - layer) / lf:.4g} {L}, spread {w / lf:.4g} {L}; 8 is common practice)"
                + ("; enlarge the grid or move its trap inward" if level == "error" else ""),
                {"face": face, "widths": margin, "measured": True}, field=f"grid.{ax.name}"))
    return out


# Spectral weight of V (relative power) allowed in grid modes whose kinetic
# phase per step exceeds pi.  Calibrated on a 150 meV double barrier (0.067
# m_e, dx = 0.39 nm), transmission against a converged dt: sharp edges at
# dt = 1 fs (weight 6e-2) gave 5x too much; edges smoothed over 1 nm at dt = 1
# fs (2e-3) were 1.4 % off, at dt = 0.25 fs (2.5e-6) exact to 1e-5.  Our own
# measurement, not a published rule.
ALIASED_WEIGHT_MAX = 1e-5


def _aliasing_finding(setup, T, tf) -> Finding:
    """Split-operator time aliasing: a mode with T(k) dt > pi has a kinetic
    phase that wraps, so the kick's coupling through sharp features of V can
    put it in resonance with the packet and scatter probability into fast
    spurious waves.  Reports the potential's spectral weight in such modes
    and the time step that avoids them."""
    grid, mass, dt = setup.grid, setup.mass, setup.dt
    v = setup.hamiltonian.static_potential
    if setup.grid.radial:
        return Finding("splitting", "ok", "radial grid: the static H is propagated exactly")
    k_alias = math.sqrt(2 * mass * math.pi / dt)
    worst, k_needed = 0.0, 0.0
    for i, ax in enumerate(grid.axes):
        spec = np.abs(np.fft.fft(_interior(setup, v, i), axis=i)) ** 2
        other = tuple(j for j in range(grid.ndim) if j != i)
        power = spec.sum(axis=other) if other else spec
        k = np.abs(2 * np.pi * np.fft.fftfreq(ax.points, ax.dx))
        total = power.sum()
        if total <= 0:
            continue
        order = np.argsort(k)
        above = (total - np.cumsum(power[order])) / total     # weight above each k
        worst = max(worst, float(power[k > k_alias].sum() / total))
        ok = np.nonzero(above <= ALIASED_WEIGHT_MAX)[0]
        k_needed = max(k_needed, float(k[order][ok[0]]) if ok.size else ax.k_max)
    # below k_needed the potential's weight is harmless; no mode above it may wrap
    dt_limit = math.pi / grid.kinetic_max(mass)
    if k_needed > 0:
        dt_limit = max(dt_limit, min(2 * mass * math.pi / k_needed**2, dt_limit * 1e12))
    if worst <= ALIASED_WEIGHT_MAX:
        return Finding("splitting", "ok",
            f"potential's spectral weight in modes with kinetic phase > pi per step: {worst:.1e} "
            f"(limit {ALIASED_WEIGHT_MAX:.0e})", {"aliased_weight": worst}, field="evolve.dt")
    return Finding("splitting", "warn",
        f"{worst:.1e} of the potential's spectral weight lies in modes whose kinetic phase "
        f"exceeds pi per step: sharp features of V scatter the packet into fast spurious waves; "
        f"use dt <= {dt_limit / tf:.3g} {T}, smooth the potential, or use fewer points",
        {"aliased_weight": worst, "dt_limit": dt_limit / tf}, field="evolve.dt")


def splitting_warning(setup) -> str | None:
    """The time-aliasing warning for a split-operator run, or None.  Analysis
    repeats it: fluxes and amplitudes at a point suffer first (measured on a
    sharp 1 hartree barrier: at a weight of 1.6e-2 the flux through a
    detector beyond it summed to 0.130 where 0.168 crossed; at 0, to 3e-6)."""
    if not getattr(setup.scheme, "in_place_transform", False):
        return None
    u = setup.units
    f = _aliasing_finding(setup, u.unit_label("time"), u.factor("time"))
    return f.message if f.level != "ok" else None


def _interior(setup, v, i) -> np.ndarray:
    """V along axis i with the ends made harmless for an FFT: the linear trend
    between the two ends removed (the periodic wrap of a step is not a feature
    the packet meets) and a cos^2 taper over the absorbing layers (or 5 % of the
    axis) where nothing is meant to propagate.  Review finding: without this a
    smooth step was flagged through the jump at the wrap."""
    ax = setup.grid.axes[i]
    n = ax.points
    shape = [1] * v.ndim
    shape[i] = n
    first = np.take(v, [0], axis=i)
    last = np.take(v, [n - 1], axis=i)
    s = np.linspace(0.0, 1.0, n).reshape(shape)
    d = v - (first + (last - first) * s)
    layer = 0.0
    if setup.absorber.active:
        layer = setup.absorber.thickness
    taper = max(layer, 0.05 * ax.length)
    x = ax.coordinates
    dist = np.minimum(x - ax.min, ax.max - x)
    window = np.where(dist >= taper, 1.0, np.sin(0.5 * np.pi * np.clip(dist / taper, 0, 1)) ** 2)
    return d * window.reshape(shape)


def _trial(setup, seconds) -> Finding:
    prop = setup.make_propagator()
    psi = setup.psi0.astype(setup.dtype)
    psi = prop.step(psi, 1)  # compiles the kernels and warms the caches
    n, t0 = 0, _time.perf_counter()
    while _time.perf_counter() - t0 < seconds and n < setup.total_steps:
        chunk = max(1, min(setup.sample_steps, 50))
        psi = prop.step(psi, chunk)
        n += chunk
    per_step = (_time.perf_counter() - t0) / max(n, 1)
    obs = setup.make_observer()
    t1 = _time.perf_counter()
    obs.measure(psi, setup.hamiltonian.potential(prop.t))
    per_sample = _time.perf_counter() - t1
    total = per_step * setup.total_steps + per_sample * (setup.total_steps // setup.sample_steps + 1)
    return Finding("run time", "ok",
        f"{per_step * 1e3:.3g} ms per step over {n} trial steps; {setup.total_steps} steps: "
        f"about {_human(total)}", {"seconds_per_step": per_step, "estimate_seconds": total})


def _human(seconds: float) -> str:
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"
