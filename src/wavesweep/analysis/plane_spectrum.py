"""Momentum spectra of what crossed a detector line (2D) or plane (3D), by
the time-dependent surface-flux method (L. Tao and A. Scrinzi, New J. Phys.
14, 013021 (2012)) with the transverse momenta resolved (atomic units).

Derivation.  With the normal axis n (the detector at x_n = x_d), the
transverse coordinates y and a uniform force F(t) (momentum transfer P(t),
excursion alpha(t), phase S(t) = int |P|^2 / 2m: :mod:`wavesweep.volkov`),
the length-gauge Volkov state of canonical momentum k = (k_n, k_y) is

    chi_k(r, t) = (2 pi)^(-d/2) exp(i (k + P) . r - i Phi_k(t)),
    Phi_k(t) = |k|^2 t / 2m + k . alpha(t) + S(t).

The 1D argument of :mod:`wavesweep.analysis.surface_flux` holds along n
([T, Theta] involves d/dn only) and leaves the integral over the line:

    d_t b = -side (i / 2m) int dy chi_k^*(x_d, y, t) [d_n psi + i (k_n + P_n) psi](x_d, y, t).

The y-dependence of chi_k^* is exp(-i (k_y + P_y(t)) . y), so the line
integral is the transverse Fourier transform of psi exp(-i P_y(t) . y) at
k_y, one FFT per sample on the full grid's transverse points (a periodic
transverse axis: exactly its plane waves; a box axis: plane waves over the
box, the outgoing states while psi stays clear of its walls):

    psi~(k_y, t) = (2 pi)^(-(d-1)/2) exp(i (|k_y|^2 t / 2m + k_y . alpha_y))
                   sum_y dy exp(-i (k_y + P_y) . y) psi(x_d, y, t),

and likewise for d_n psi.  For each transverse row k_y this is the 1D
amplitude (:func:`wavesweep.analysis.flux_method.surface_flux_amplitude`)
of the samples psi~, d_n psi~ with the normal phase k_n^2 t / 2m + k_n
alpha_n + S: one matrix product over the samples serves every row.  The
density |b(k)|^2 is per unit momentum^d; the momenta reported are the
kinetic ones at the end, p = k + P(T).

Energy.  The probability per unit energy E = |p|^2 / 2m is, summed over the
transverse rows (spacing dk_y per axis),

    g(E) = sum_rows dk_y |b(p_n(E), p_y)|^2 m / |p_n|,   p_n(E) = (2 m E - |p_y|^2)^(1/2),

with |b|^2 of each row a cubic spline along the normal momentum.

Sampling.  The time transform's aliasing argument is the 1D one for each
row: the transverse Volkov factor takes the transverse energy out of its
samples, which then oscillate at the normal energy (and the field's share
along the normal) only; that must stay below pi / dt_s (the samples'
spacing), or the record is refused with the record.every that would do.  The transverse rows are the grid's own, so
their spacing is 2 pi / L per axis (L the box length: Parseval holds on
them exactly) and their range the grid's.
"""
from __future__ import annotations

import math

import numpy as np
from scipy.interpolate import CubicSpline, PPoly

from ..errors import JobError
from ..io.record import layer_holding
from ..io.results import result_units, source_name
from .flux_method import (BAND_FLOOR, CUT_WARN, SPECTRUM_FLOOR, STILL_TO_COME_WARN, VARIES, alias_level,
                          cut_warning, dpsi_correction, end_taper, kept_range, momentum_label, premise_warnings,
                          refuse_if_nothing_crossed,
                          surface_flux_amplitude, trapezoid_weights)
from .transmission import came_round_warning

__all__ = ["plane_spectrum"]

ROW_FLOOR = 1e-14          # transverse rows whose time-integrated |psi~|^2 is below this fraction of the
                           # largest row's carry nothing the spectrum reports (and are not transformed)
COARSE_POINTS = 512        # normal momenta of the first pass (the band and the range kept)
# the share of what crosses a line inside absorbing layers of its transverse axes above this: a warning
# (what the layer damps is not in the spectrum; 1e-6, the method's own accuracy on a free packet)
LAYER_SHARE_WARN = 1e-6


def plane_spectrum(ds, setup, j: int, points: int = 201, details: bool = True) -> dict:
    """The spectrum through detector ``j`` (a line or plane that recorded
    ``spectrum_psi``/``spectrum_dpsi``) of an open result: per unit
    momentum^d on the normal momenta ``momentum`` and the transverse
    ``momentum_<axis>`` (job units, the kinetic momenta at the end), its
    marginal along the normal, the energy density and the total.
    ``details=False`` leaves out the warnings and ``still_to_come``."""
    uc = result_units(ds)
    p_unit = uc["mass"] * uc["length"] / uc["time"]
    names = [str(d) for d in ds["detector"].values]
    name = names[j]
    lines = [str(v) for v in ds["spectrum_detector"].values] if "spectrum_detector" in ds.variables else []
    if name not in lines:
        raise JobError("--detector", f"{source_name(ds)}: detector {name!r} did not record psi along its "
                                     f"{'line' if setup.grid.ndim == 2 else 'plane'}; add spectrum = true to "
                                     "its [[detector]] and run the job again")
    jj = lines.index(name)
    det = setup.detectors[j]
    grid, mass, d = setup.grid, setup.mass, setup.grid.ndim
    normal = det.axis
    others = [i for i in range(d) if i != normal]
    x_d = det.position
    x0 = setup.detector_value("detector_initial_mean", j)
    x0 = setup.packet_center(normal) if x0 is None else x0
    side = 1.0 if x_d >= x0 else -1.0
    refuse_if_nothing_crossed(ds, j, name)

    t = np.asarray(ds["time"].values, float) * uc["time"]
    across = ds["spectrum_psi_real"].dims[2:]
    y = [np.asarray(ds[a].values, float) * uc["length"] for a in across]
    p_t, alpha, s_t = _field(ds, uc, p_unit, len(t), d)
    # the transverse rows of each sample, in blocks of samples (no samples x plane temporary): a first
    # pass for each row's weight, a second keeping the rows that carry something
    line_rows = _LineRows(ds, jj, uc, d, t, y, p_t[:, others], alpha[:, others], mass)
    weight, crossing = line_rows.weights()
    rows = np.flatnonzero(weight > ROW_FLOOR * weight.max()) if weight.max() > 0 else np.array([], int)
    if not rows.size:
        raise JobError("--detector", f"nothing crossed detector {name!r} during the run")
    psi_rows, dpsi_rows = line_rows.kept(rows)
    k_rows = line_rows.k_rows
    dk_rows = float(np.prod([2 * math.pi / (len(c) * (c[1] - c[0])) for c in y]))
    dt_s = float(np.median(np.diff(t)))
    # the band: the transverse Volkov factor leaves each row oscillating at its normal energy only, so
    # the samples must resolve the normal energies (and the field's share along the normal)
    k_grid = math.pi / grid.axes[normal].dx
    k_top = min(math.sqrt(2 * mass * math.pi / dt_s), k_grid)
    # a constant V_d beyond the line: the outgoing waves' phase V_d t more (surface_flux's rule)
    v_d = setup.detector_value("detector_potential", j) or 0.0
    field = {"field_momentum": p_t[:, normal], "excursion": alpha[:, normal], "field_phase": s_t + v_d * t}
    p_end = p_t[-1]
    slab = (setup.spectrum_initial_beyond or {}).get(j)
    amplitude = lambda k, a=psi_rows, b=dpsi_rows, cut=False: surface_flux_amplitude(   # noqa: E731
        t, a, b, k, mass, x_d, side, **field, cut=cut,
        initial=None if slab is None else _beyond_projection(slab, grid.axes[normal].coordinates, y, k, rows))
    coarse = side * np.linspace(0.0, k_top, COARSE_POINTS + 1)[1:] - p_end[normal]
    marginal_c = (np.abs(amplitude(coarse)) ** 2).sum(axis=1)
    if not marginal_c.max() > 0:
        raise JobError("--detector", f"nothing crossed detector {name!r} outwards during the run")
    v_min = min(_potential_min(ds, setup, uc) - v_d, 0.0)   # bound parts, counted from V_d
    upper = coarse[-len(coarse) // 20:]
    taper = end_taper(t)[:, None]
    top = alias_level(marginal_c, lambda: (np.abs(amplitude(upper, psi_rows * taper, dpsi_rows * taper)) ** 2)
                      .sum(axis=1).max(), k_top < k_grid)
    if top > BAND_FLOOR or -v_min * dt_s >= math.pi:
        need = min(dt_s / 2, math.pi / _normal_reach(setup, normal, p_t, v_min)) / uc["time"]
        raise JobError("record.every", f"{source_name(ds)}: samples {dt_s / uc['time']:g} {uc['time_label']} "
                                       f"apart alias the band of energies arriving at detector {name!r}; use "
                                       f"record.every < {need:.3g} {uc['time_label']}")
    lo, hi = kept_range(coarse + p_end[normal], marginal_c, k_top / COARSE_POINTS, k_top)
    p_n = side * np.linspace(lo, hi, points)                      # kinetic normal momenta at the end
    b, cut = amplitude(p_n - p_end[normal], cut=True)
    dens = np.abs(b) ** 2                                         # (points, rows) per bohr^-d
    spread = 2 * np.abs(b) * cut + cut**2                          # what the cut record may move it by
    cut_uncertainty = float(np.max(spread) / dens.max())
    row_peak = dens.max(axis=0)
    shown = row_peak > SPECTRUM_FLOOR * row_peak.max()
    total = float(np.trapezoid(dens, np.abs(p_n), axis=0).sum() * dk_rows)
    marginal = dens.sum(axis=1) * dk_rows                         # per unit normal momentum
    p_rows = k_rows[rows] + p_end[others]                         # kinetic transverse momenta at the end
    energy, energy_density = _energy_density(p_n, p_rows, dens, dk_rows, mass, points, shown)

    # the transverse rows shown: the box of the grid's rows around those above the floor, in order
    box, axes_momenta = _row_box(k_rows, rows[shown], [len(c) for c in y], p_end[others])
    full = np.zeros((len(p_n), len(k_rows)))
    full[:, rows] = dens
    grid_shape = [len(c) for c in y]
    cube = full.reshape(len(p_n), *grid_shape)[(slice(None), *box)]
    out = {"detector": name, "side": "+" if side > 0 else "-", "axis": grid.names[normal],
           "transverse_axes": [grid.names[i] for i in others],
           "momentum": p_n / p_unit,
           **{f"momentum_{grid.names[i]}": m / p_unit for i, m in zip(others, axes_momenta)},
           "probability_density": cube * p_unit**d,
           "probability_density_normal": marginal * p_unit,
           "energy": energy / uc["energy"], "energy_density": energy_density * uc["energy"],
           "total": total, "total_uncertainty": float(np.trapezoid(spread, np.abs(p_n), axis=0).sum() * dk_rows),
           "still_to_come": None, "cut_uncertainty": cut_uncertainty,
           "momentum_units": momentum_label(ds, uc), "energy_units": uc["energy_label"],
           "warnings": []}
    if details:
        if line_rows.old_units_note is not None:
            out["warnings"].append(line_rows.old_units_note)
        if cut_uncertainty > CUT_WARN:
            out["warnings"].append(cut_warning(name, cut_uncertainty))
        out["warnings"] += _warnings(ds, setup, j, uc, name, normal, x_d, side, p_t, energy, energy_density, p_n,
                                     v_d)
        in_layers = _share_in_layers(setup, others, y, crossing)
        if in_layers > LAYER_SHARE_WARN:
            faces = ", ".join(grid.names[i] for i in others)
            out["warnings"].append(f"detector {name!r}: {in_layers:.2g} of what crosses it crosses inside the "
                                   f"absorbing layers across {faces}, where the absorber damps it: the spectrum "
                                   "misses it; widen the grid across the detector or thin absorber.thickness")
        came_round = came_round_warning(ds, setup, j, name, side)
        if came_round:
            out["warnings"].append(came_round)
        aside = _absorbed_across(ds, grid, normal)
        if aside > CUT_WARN * max(total, 1e-300):
            faces = ", ".join(grid.names[i] for i in others)
            out["warnings"].append(f"detector {name!r}: {aside:.3g} was absorbed at the faces across {faces} "
                                   f"(against {total:.3g} through the detector): what left that way without "
                                   "crossing it, the larger angles, is not in this spectrum; widen the grid "
                                   "across it or add spectrum lines on the other sides")
        out["still_to_come"] = _still_to_come(ds, setup, uc, normal, x_d, side, energy, energy_density)
        if out["still_to_come"] is not None and total > 0 and out["still_to_come"] > STILL_TO_COME_WARN * total:
            out["warnings"].append(f"the run ended while slow parts were still arriving at detector {name!r}: "
                                   f"{out['still_to_come']:.3g} more probability (against {total:.3g} that "
                                   "crossed) lies before it moving towards it; extend evolve.duration for the "
                                   "low momenta")
    return out


def _field(ds, uc, p_unit, n, d):
    """P (n, d), alpha (n, d) in atomic units and S (n,) of a driven run (zeros without a field)."""
    if "field_momentum" not in ds.variables:
        return np.zeros((n, d)), np.zeros((n, d)), np.zeros(n)
    p = np.asarray(ds["field_momentum"].values, float).reshape(n, d) * p_unit
    alpha = np.asarray(ds["field_excursion"].values, float).reshape(n, d) * uc["length"]
    return p, alpha, np.asarray(ds["field_phase"].values, float)


class _LineRows:
    """psi~ and d_n psi~ of the module notes, the transverse plane-wave
    components of a line's (plane's) samples with their transverse Volkov
    factors, read and transformed in blocks of samples; rows in the FFT's
    order (C order over the transverse axes), ``k_rows`` (R, d-1) bohr^-1."""

    BLOCK_VALUES = 2**21   # samples x transverse points per block (32 MiB of complex values)

    def __init__(self, ds, jj, uc, d, t, y, p_across, alpha_across, mass):
        self.ds, self.jj, self.t, self.y, self.mass = ds, jj, t, y, mass
        self.p_across, self.alpha_across = p_across, alpha_across
        self.scale_psi = uc["length"] ** (-d / 2)
        self.old_units, self.old_units_note = dpsi_correction(ds, uc)   # (a file written before dpsi_units)
        self.scale_dpsi = self.scale_psi * self.old_units / uc["length"]
        self.shape = tuple(len(c) for c in y)
        self.k_rows, self.origin = _transverse_basis(y)
        self.block = max(1, self.BLOCK_VALUES // max(1, int(np.prod(self.shape))))

    def _read(self, name, i0, i1, scale):
        ds, jj = self.ds, self.jj
        return (np.asarray(ds[f"{name}_real"][i0:i1, jj].values, float)
                + 1j * np.asarray(ds[f"{name}_imag"][i0:i1, jj].values, float)) * scale

    def _block(self, i0, i1, rows=None, crossing=None):
        """(psi~, d_n psi~) of samples i0:i1, (i1 - i0, R) or only ``rows``;
        ``crossing`` (transverse shape): |J_n| = |Im(conj(psi) d_n psi)| / m
        of the samples times their trapezoid weights is added to it."""
        n = i1 - i0
        shift = np.ones((n, *self.shape), complex)     # exp(-i P_y(t) . y) on the line
        for a, (c, p) in enumerate(zip(self.y, self.p_across[i0:i1].T)):
            view = [n] + [1] * len(self.shape)
            view[a + 1] = len(c)
            shift = shift * np.exp(-1j * np.outer(p, c)).reshape(view)
        k = self.k_rows if rows is None else self.k_rows[rows]
        volkov = np.exp(1j * (np.outer(self.t[i0:i1], np.sum(k**2, axis=1)) / (2 * self.mass)
                              + self.alpha_across[i0:i1] @ k.T))
        origin = self.origin if rows is None else self.origin[rows]
        axes = tuple(range(1, 1 + len(self.shape)))
        out, raw = [], []
        for name, scale in (("spectrum_psi", self.scale_psi), ("spectrum_dpsi", self.scale_dpsi)):
            values = self._read(name, i0, i1, scale)
            raw.append(values)
            g = np.fft.fftn(values * shift, axes=axes).reshape(n, -1)
            g = g if rows is None else g[:, rows]
            out.append(g * origin * volkov)
        if crossing is not None:
            w = self.weights_t[i0:i1].reshape([n] + [1] * len(self.shape))
            crossing += np.sum(np.abs((raw[0].conj() * raw[1]).imag) * w, axis=0) / self.mass
        return out

    def _spans(self):
        return [(i, min(i + self.block, len(self.t))) for i in range(0, len(self.t), self.block)]

    def weights(self) -> tuple[np.ndarray, np.ndarray]:
        """(sum over the samples of |psi~|^2 per row (R,), int |J_n| dt per
        transverse point (the line's shape))."""
        self.weights_t = trapezoid_weights(self.t)
        crossing = np.zeros(self.shape)
        total = sum(np.sum(np.abs(self._block(i0, i1, crossing=crossing)[0]) ** 2, axis=0)
                    for i0, i1 in self._spans())
        return total, crossing

    def kept(self, rows) -> tuple[np.ndarray, np.ndarray]:
        """(psi~, d_n psi~) of every sample on ``rows`` only, (N, len(rows)) each."""
        parts = [self._block(i0, i1, rows) for i0, i1 in self._spans()]
        return np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts])


def _normal_reach(setup, normal: int, p_t, v_min) -> float:
    """The largest normal energy arriving (hartree): the initial packet's
    momentum reach along the normal (where its momentum marginal is above
    BAND_FLOOR of its peak) plus the field's largest momentum transfer
    along it, less V's minimum (from V_d)."""
    _, k, w = setup.marginals[normal]
    top = float(np.max(np.abs(k[w > BAND_FLOOR * w.max()]))) if np.any(w > 0) else 0.0
    return (top + float(np.max(np.abs(p_t[:, normal])))) ** 2 / (2 * setup.mass) - v_min


def _absorbed_across(ds, grid, normal: int) -> float:
    """Probability absorbed by the end at the faces of the axes across the
    detector's normal (the run's books)."""
    if "boundary" not in ds.coords or not ds.sizes.get("time", 0):
        return 0.0
    across = {grid.names[i] for i in range(grid.ndim) if i != normal}
    return float(sum(float(ds["absorbed"][-1, i].values) for i, face in enumerate(ds["boundary"].values)
                     if str(face)[:-1] in across))


def _share_in_layers(setup, others, y, crossing) -> float:
    """The share of sum |J_n| dt over the line that lies on points inside an
    absorbing layer of a transverse axis (``crossing``: per transverse
    point, :meth:`_LineRows.weights`)."""
    total = float(crossing.sum())
    if not total > 0 or not setup.absorber.active:
        return 0.0
    inside = np.zeros(crossing.shape, bool)
    for a, (i, c) in enumerate(zip(others, y)):
        held = np.array([layer_holding(setup, i, float(v)) is not None for v in c])
        view = [1] * len(y)
        view[a] = len(c)
        inside |= held.reshape(view)
    return float(crossing[inside].sum()) / total


def _transverse_basis(y) -> tuple[np.ndarray, np.ndarray]:
    """(k_rows (R, d-1) bohr^-1, factor (R,)): the transverse wave numbers of
    the grid's points ``y`` (per axis, bohr) in the FFT's order, C order over
    the axes, and exp(-i k_y . y_0) dy / (2 pi)^((d-1)/2), which makes the
    FFT's sum over a line the plane-wave integral of the module notes."""
    mesh = np.meshgrid(*[2 * math.pi * np.fft.fftfreq(len(c), c[1] - c[0]) for c in y], indexing="ij")
    origin = (np.exp(-1j * sum(k * c[0] for k, c in zip(mesh, y)))
              * float(np.prod([c[1] - c[0] for c in y])) / (2 * math.pi) ** (len(y) / 2))
    return np.stack([m.ravel() for m in mesh], axis=1), origin.ravel()


def _beyond_projection(slab, x, y, k_n, rows) -> np.ndarray | None:
    """b(k, 0) = (2 pi)^(-d/2) sum_{r beyond} exp(-i k . r) psi0(r) dV on the
    normal momenta ``k_n`` and the transverse ``rows`` (K, R), from the part
    of psi0 beyond the line (``slab``: first normal index, values with the
    normal axis first); None when nothing is there."""
    first, values = slab
    if not len(values):
        return None
    xs = x[first:first + len(values)]
    dx = x[1] - x[0]
    axes = tuple(range(1, values.ndim))
    _, origin = _transverse_basis(y)
    across = (np.fft.fftn(values, axes=axes).reshape(len(values), -1) * origin)[:, rows]
    return np.exp(-1j * np.outer(k_n, xs)) @ across * dx / math.sqrt(2 * math.pi)


def _energy_density(p_n, p_rows, dens, dk_rows, mass, points, shown):
    """(E, g(E)) of the module notes (atomic units) on ``points`` energies
    spanning the cells of the ``shown`` rows (those above SPECTRUM_FLOOR of
    the peak), each row's |b|^2 a cubic spline in |p_n|."""
    q = np.abs(p_n)
    e_row = np.sum(p_rows**2, axis=1) / (2 * mass)
    e_lo = float(np.min(e_row[shown] + q[0] ** 2 / (2 * mass)))
    e_hi = float(np.max(e_row[shown] + q[-1] ** 2 / (2 * mass)))
    energy = np.linspace(e_lo, e_hi, points)
    d_e = energy[1] - energy[0] if points > 1 else 1.0
    near = q[1] - q[0] if len(q) > 1 else 0.0   # within a momentum step of a row's threshold: bin means
    g = np.zeros(points)
    spline = CubicSpline(q, dens, axis=0)     # every row at once; evaluated row by row below
    for r in range(len(e_row)):
        e_n = energy - e_row[r]
        ok = (e_n > 0)
        pn = np.sqrt(2 * mass * e_n[ok])
        inside = (pn >= q[0]) & (pn <= q[-1])
        values = np.zeros(len(pn))
        # the row's own piece of the spline (a cubic on each interval: h^4 against linear's h^2, which
        # was 2.5e-4 of the peak at 201 points)
        row = _row_spline(spline, r)
        values[inside] = np.maximum(row(pn[inside]), 0.0) * mass / pn[inside]
        low = inside & (pn < near)
        if low.any():
            # m / p_n diverges at the row's threshold (integrably): there the mean over the energy bin,
            # int |b|^2 dp_n over the bin / dE, from the spline's antiderivative (a point value was 1e296)
            lo = np.sqrt(2 * mass * np.maximum(e_n[ok][low] - d_e / 2, 0.0))
            hi = np.sqrt(2 * mass * (e_n[ok][low] + d_e / 2))
            area = PPoly(spline.c[:, :, r], spline.x).antiderivative()
            values[low] = np.maximum(area(np.clip(hi, q[0], q[-1])) - area(np.clip(lo, q[0], q[-1])), 0.0) / d_e
        g[ok] += values
    return energy, g * dk_rows


def _row_spline(spline, r):
    """Row ``r`` of a CubicSpline over (points, rows) as a 1D piecewise polynomial."""
    return PPoly(spline.c[:, :, r], spline.x, extrapolate=False)


def _row_box(k_rows, shown, shape, p_end_across):
    """The index box (an np.ix_ of one index array per transverse axis, in
    ascending momentum) around the ``shown`` rows (flat indices over the
    transverse axes, C order), and each axis' kinetic momenta in it."""
    idx = np.array(np.unravel_index(shown, shape)).T if shown.size else np.zeros((1, len(shape)), int)
    box, momenta = [], []
    for a, n in enumerate(shape):
        ascending = np.fft.fftshift(np.arange(n))            # FFT indices in ascending wave number
        position = np.argsort(ascending)[idx[:, a]]         # where each shown index sits in that order
        chosen = ascending[int(position.min()):int(position.max()) + 1]
        box.append(chosen)
        stride = int(np.prod(shape[a + 1:]))                # a row's flat index along axis a alone
        momenta.append(k_rows[chosen * stride, a] + p_end_across[a])
    return np.ix_(*box), momenta


def _potential_min(ds, setup, uc) -> float:
    if setup.potential_min is not None:
        return float(setup.potential_min)
    if "potential" in ds.variables:
        return float(np.nanmin(np.asarray(ds["potential"].values, float))) * uc["energy"]
    return 0.0


def _static_potential(ds, uc):
    """V on the snapshot grid (hartree) and its coordinates (bohr), or None."""
    if "potential" not in ds.variables:
        return None
    var = ds["potential"]
    return (np.asarray(var.values, float) * uc["energy"],
            [np.asarray(ds[a].values, float) * uc["length"] for a in var.dims])


def _mean_energy(energy, energy_density) -> float:
    total = float(np.trapezoid(energy_density, energy))
    return float(np.trapezoid(energy_density * energy, energy) / total) if total > 0 else 0.0


def _warnings(ds, setup, j, uc, name, normal, x_d, side, p_t, energy, energy_density, p_n, v_d) -> list[str]:
    """The premises' warnings (:func:`flux_method.premise_warnings`) with
    the spreads of V beyond and on the line or plane the run measured on
    the full grid (an older file: from its snapshot grid's V)."""
    v_beyond = setup.detector_value("potential_spread_beyond", j)
    v_at = setup.detector_value("potential_spread_on", j)
    vs = _static_potential(ds, uc) if v_beyond is None or v_at is None else None
    if vs is not None:
        v, coords = vs
        xn = coords[normal]
        beyond = side * (xn - x_d) > 0
        v_beyond = (float(np.max(np.abs(np.take(v, np.flatnonzero(beyond), axis=normal) - v_d)))
                    if beyond.any() else 0.0)
        v_at = float(np.max(np.abs(np.take(v, [int(np.argmin(np.abs(xn - x_d)))], axis=normal) - v_d)))
    pushed = np.abs(np.diff(p_t[-3:], axis=0)) if "field_momentum" in ds.variables else np.zeros(0)
    return premise_warnings(name, uc, float(pushed.max(initial=0.0)), float(np.max(np.abs(p_n))),
                            _mean_energy(energy, energy_density), v_beyond or 0.0, v_at or 0.0,
                            float(ds.attrs.get("dt", 0.0)) * uc["time"],
                            sum((math.pi / ax.dx) ** 2 for ax in setup.grid.axes) / (2 * setup.mass))


def _still_to_come(ds, setup, uc, normal, x_d, side, energy, energy_density) -> float | None:
    """The final state's probability before the line, where V is flat (on
    every transverse point) up to it, moving towards it along the normal,
    less what moves away (net; None without a final state): a lower
    estimate, as in 1D."""
    if "psi_real" not in ds.variables:
        return None
    d = setup.grid.ndim
    psi = (np.asarray(ds["psi_real"].values, float) + 1j * np.asarray(ds["psi_imag"].values, float)) \
        * uc["length"] ** (-d / 2)
    x = setup.grid.axes[normal].coordinates
    before = side * (x_d - x) > 0
    vs = _static_potential(ds, uc)
    inner = None
    if vs is not None:
        v, coords = vs
        xn = coords[normal]
        at = np.take(v, [int(np.argmin(np.abs(xn - x_d)))], axis=normal)
        others = tuple(i for i in range(d) if i != normal)
        varies_n = np.max(np.abs(v - at), axis=others) > VARIES * max(_mean_energy(energy, energy_density), 1e-300)
        cand = xn[varies_n & (side * (x_d - xn) > 0)]
        inner = float(cand[np.argmin(side * (x_d - cand))]) if cand.size else None
    region = before if inner is None else before & (side * (x - inner) > 0)
    view = [1] * d
    view[normal] = len(x)
    part = np.where(region.reshape(view), psi, 0.0)
    if not np.any(part):
        return 0.0
    dx = x[1] - x[0]
    phi = np.fft.fft(part, axis=normal)
    k = 2 * math.pi * np.fft.fftfreq(len(x), dx)
    toward = (side * k > 0).reshape(view)
    away = (side * k < 0).reshape(view)
    # Parseval along the normal: sum |psi|^2 dx = sum |fft|^2 dx / N; the other axes' cells as they are
    net = np.sum(np.abs(np.where(toward, phi, 0.0)) ** 2) - np.sum(np.abs(np.where(away, phi, 0.0)) ** 2)
    return max(float(net) * dx / len(x) * setup.grid.cell_volume / dx, 0.0)   # net: a bound tail counts nothing
