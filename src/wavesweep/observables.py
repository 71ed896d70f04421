"""Observables of psi on a grid (atomic units), computed spectrally.

* norm = sum |psi|^2 dV (probability still on the grid);
* moments along the first axis, normalised by the norm:
  x_mean, x_std and p_mean = Im sum conj(psi) dpsi/dx dV / norm;
* energy <H> / norm = (<T> + <V>) / norm, <T> from the transform-space
  density (Parseval), V the real potential at the sample time;
* flux through each detector: J = (hbar/m) Im(conj(psi) dpsi/dx) at x_d,
  with psi and dpsi/dx at x_d by spectral interpolation along the detector's
  axis, integrated over the other axes (Parseval in transform space);
* on a 1D (or radial) grid, psi(x_d) at each detector, the amplitude whose
  time-energy Fourier transform gives energy-resolved transmission, and
  dpsi/dx there (both already computed for the flux), which with it gives
  the surface-flux momentum spectrum (:mod:`wavesweep.analysis.surface_flux`);
  on a 2D/3D detector with ``spectrum = true``, psi and dpsi/dn at every
  point of its line or plane (the flux pass's line transformed back along
  the transverse axes; :mod:`wavesweep.analysis.plane_spectrum`);
* autocorrelation <psi(0)|psi(t)>;
* with a condensate's contact interaction g N |psi|^2 (:mod:`wavesweep.interaction`),
  the energy is the Gross-Pitaevskii functional per atom,
  (<T> + <V> + (g N / 2) sum |psi|^4 dV) / norm, and the chemical potential
  (<T> + <V> + g N sum |psi|^4 dV) / norm is recorded beside it.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
import scipy.fft

from .kernels import view4

__all__ = ["Detector", "Observer", "Scalar", "SCALARS", "CHEMICAL_POTENTIAL", "recorded_scalars",
           "spectral_derivative", "mean_position_momentum"]


class Scalar(NamedTuple):
    """A scalar observable recorded at every sample: the result variable
    ``name`` (dimension ``time``), its quantity kind (a unit kind of the
    result's ``units`` table, such as ``"length"``; None for a pure number)
    and its ``long_name`` (``{axis}`` is the first grid axis' name).  The
    run converts it from atomic units by its kind and the result writer
    declares and writes it from this entry alone."""

    name: str
    kind: str | None
    long_name: str


# The scalars every run records, in the order of the result's variables;
# Observer.measure_members computes each (atomic units) under its name.
SCALARS: list[Scalar] = [
    Scalar("norm", None, "probability on the grid"),
    Scalar("x_mean", "length", "mean {axis} of the probability on the grid"),
    Scalar("x_std", "length", "standard deviation of {axis}"),
    Scalar("p_mean", "momentum", "mean momentum along {axis}"),
    Scalar("energy", "energy", "<H> of the probability on the grid, per unit norm"),
]

# Recorded only by runs with an [interaction] (a job without one keeps its variables).
CHEMICAL_POTENTIAL = Scalar("chemical_potential", "energy",
                            "chemical potential <T> + <V> + g N <|psi|^2>, per unit norm")


def recorded_scalars(interacting: bool = False) -> list[Scalar]:
    """The scalars a run records: :data:`SCALARS`, and the chemical
    potential when the run has a mean-field interaction."""
    return SCALARS + [CHEMICAL_POTENTIAL] if interacting else SCALARS


@dataclass(frozen=True)
class Detector:
    """A point (1D), line (2D) or plane (3D) at ``position`` (bohr) across
    ``axis``; ``resolved``: its flux density along the line or plane is
    recorded too (a screen); ``spectrum``: psi and its normal derivative
    along the line or plane are recorded too (the surface-flux spectrum's
    input; a 1D detector records them always)."""

    name: str
    axis: int
    position: float
    resolved: bool = False
    spectrum: bool = False


def spectral_derivative(psi: np.ndarray, ax, axis: int) -> np.ndarray:
    """d psi / d x along one grid axis, spectrally (periodic: FFT; box: the
    DST-I coefficients times k, back through a zero-padded DCT-I)."""
    k_shape = [1] * psi.ndim
    k_shape[axis] = ax.points
    k = ax.wavenumbers.reshape(k_shape)
    if ax.boundary == "periodic":
        c = scipy.fft.fft(psi, axis=axis)
        if ax.points % 2 == 0:  # the Nyquist mode has no well-defined derivative
            sl = [slice(None)] * psi.ndim
            sl[axis] = ax.points // 2
            c[tuple(sl)] = 0.0
        return scipy.fft.ifft(1j * k * c, axis=axis)
    n = ax.points
    c = scipy.fft.dst(psi, type=1, axis=axis, norm="ortho") * k
    pad = [(0, 0)] * psi.ndim
    pad[axis] = (1, 1)
    # psi'(x_j) = sqrt(2/(N+1)) sum_n c_n k_n cos(pi n j / (N+1)); the DCT-I of
    # length N+2 with zero ends gives 2 sum_n(...) cos(pi n j/(N+1)).
    d = scipy.fft.dct(np.pad(c, pad), type=1, axis=axis)
    sl = [slice(None)] * psi.ndim
    sl[axis] = slice(1, n + 1)
    return d[tuple(sl)] * (0.5 * np.sqrt(2.0 / (n + 1)))


def mean_position_momentum(psi, grid, axes=None) -> tuple[np.ndarray, np.ndarray, float]:
    """(<r_i>, <p_i>, norm) of psi on the grid (bohr, hbar/bohr, one per
    axis, each normalised by the norm; norm = sum |psi|^2 dV): positions
    from the marginals, momenta as Im sum conj(psi) dpsi/dx_i over sum
    |psi|^2 with the spectral derivative (:func:`spectral_derivative`).
    ``axes``: only those axes (the others are left 0)."""
    one = np.asarray(psi, np.complex128).reshape(grid.shape)
    dens = one.real ** 2 + one.imag ** 2
    norm_sum = float(dens.sum())
    pos, mom = np.zeros(grid.ndim), np.zeros(grid.ndim)
    if not norm_sum > 0:
        return pos, mom, 0.0
    for i, ax in enumerate(grid.axes):
        if axes is not None and i not in axes:
            continue
        other = tuple(j for j in range(grid.ndim) if j != i)
        line = dens.sum(axis=other) if other else dens
        pos[i] = float(line @ ax.coordinates) / norm_sum
        mom[i] = float(np.vdot(one, spectral_derivative(one, ax, i)).imag) / norm_sum
    return pos, mom, norm_sum * grid.cell_volume


def _flushed(psi0) -> np.ndarray:
    """A contiguous copy of ``psi0`` with its tiny parts set to zero: below
    sqrt of float64's smallest normal number (1.5e-154), or psi0's own
    smallest normal (1.2e-38 in single precision), whichever is larger.
    A packet's far tails reach such values, and the autocorrelation's
    products of two of them underflow to subnormal numbers, each of which
    costs the processor ~100 cycles: the pass over a 4096-point Gaussian
    took 4.2 us (18 us while psi0's own subnormal parts were kept) against
    1.2.  What they add to the sum is below 1e-150 of psi's scale, nothing
    a float64 sum of the overlap can hold."""
    out = np.array(psi0, copy=True, order="C")
    parts = out.view(out.real.dtype)
    floor = max(float(np.finfo(parts.dtype).tiny), math.sqrt(float(np.finfo(np.float64).tiny)))
    parts[np.abs(parts) < floor] = 0.0
    return out


class Observer:
    """Computes the recorded observables of one run, or of each member of a
    batch (``members`` states stacked along a leading axis).

    ``transform`` is the observer's own (never the propagator's, whose
    buffer holds psi), made for the same ``members``; ``psi0`` the initial
    state(s) for the autocorrelation.  One pass over psi gives the density
    moments, the potential energy and the autocorrelation; one transform
    and one pass over the coefficients give the kinetic energy and, on a
    periodic first axis, the mean momentum; each detector is one more pass
    (spectral interpolation along its axis).  The reductions sum in float64
    whatever the precision of psi; the detector products (BLAS) run in
    psi's precision (complex64 in single-precision runs).

    ``contact`` is g N (hartree bohr^d) of a mean-field interaction, or None
    for a linear run (no chemical potential; 0.0 records it, equal to the
    energy).  It costs one more pass over psi (sum |psi|^4).

    ``frame``: a falling grid (:class:`wavesweep.frame.FreeFallFrame`, one
    run, no batch).  psi is then phi on the grid's coordinates and every
    value is converted to the lab at the sample's time ``t``: x_mean +
    X(t), p_mean + m u(t), the energy (and chemical potential) + u . <p>
    + m u^2/2 - F . <r_lab> (the uniform forces' potential, which the
    frame removed from H), each detector's flux the lab current J_phi + u
    rho through its lab position (zero while the grid does not reach it)
    and its amplitude the lab psi there; ``frame_offset`` X(t) is added
    to the values.  Costs one pass and one spectral derivative per axis
    beyond the first more per sample (the mean position and momentum of
    every axis), and the detectors' interpolation rows, made per sample."""

    def __init__(self, grid, mass: float, transform, detectors=(), psi0=None, members=None,
                 contact: float | None = None, frame=None, stride: int = 1):
        from .kernels import observe_kernels_for   # lazy: numba kernels load on first use
        self.grid = grid
        self.mass = mass
        self.transform = transform
        self.members = members
        self.detectors = list(detectors)
        self.contact = None if contact is None else float(contact)
        self.frame = frame
        if frame is not None and members is not None:
            raise ValueError("a falling frame is one run's: its trajectory follows its own packet")
        self.records_amplitude = grid.ndim == 1
        # resolved detectors (screens): the flux density along them, every stride-th transverse point
        self.screens = [n for n, d in enumerate(self.detectors) if d.resolved]
        self.stride = int(stride)
        if self.screens and (frame is not None or grid.ndim < 2):
            raise ValueError("a resolved screen needs a line or plane of a grid in the lab")
        # 2D/3D detectors that record psi and dpsi/dn along them (the surface-flux spectrum's input)
        self.spectrum_lines = [n for n, d in enumerate(self.detectors) if d.spectrum and grid.ndim > 1]
        self._resolved_any = bool(self.screens or self.spectrum_lines)
        if self.spectrum_lines and frame is not None:
            raise ValueError("a spectrum's line or plane needs a grid in the lab")
        self.dv = grid.cell_volume
        self._nb = members or 1
        nd = grid.ndim
        self._view4 = lambda a: view4(a, nd)
        self._kernels = observe_kernels_for(grid.size * self._nb, getattr(transform, "threads", 1) or 1)
        self._psi0 = None if psi0 is None else self._view4(_flushed(psi0))
        pad = 3 - nd
        one_axis = [np.zeros(1)] * pad
        # x along the first grid axis, relative to its middle (the sums of x
        # and x^2 then lose no digits to a far-off origin)
        ax0 = grid.axes[0]
        self._x_origin = 0.5 * (float(ax0.coordinates[0]) + float(ax0.coordinates[-1]))
        self._x = one_axis + [ax0.coordinates - self._x_origin] + [np.zeros(a.points) for a in grid.axes[1:]]
        self._t = one_axis + [a.wavenumbers**2 / (2.0 * mass) for a in grid.axes]
        k0 = ax0.wavenumbers.astype(float).copy()
        self._momentum_from_spectrum = ax0.boundary == "periodic"
        if ax0.points % 2 == 0 and self._momentum_from_spectrum:
            k0[ax0.points // 2] = 0.0   # the Nyquist mode has no well-defined derivative
        self._k = one_axis + [k0] + [np.zeros(a.points) for a in grid.axes[1:]]
        # detectors grouped by axis, each group one matrix product (BLAS)
        # with the stacked value and derivative rows (in a falling frame the
        # detectors move across the grid: their rows are made per sample)
        self._groups = [] if frame is not None else self._detector_groups(
            [(n, d.position) for n, d in enumerate(self.detectors)])
        self._v_view = None      # (the potential array, its kernel view): see _potential_view
        self._parseval_dv = grid.parseval_factor * self.dv   # a property that costs 7 us: once
        self._rows_cast = {}     # the detectors' rows in psi's precision: see _rows_in
        self._box_derivative = None   # i kappa of a 1D box's odd extension: see _momentum_box
        self._row_sample = self._row_sampler()

    def _row_sampler(self):
        """The fixed arguments of the compiled sample of a 1D periodic
        Cartesian grid in the lab (:mod:`wavesweep.kernels.sample`: the
        density sums, the transform, the spectrum sums and the detectors'
        rows in two passes); None for other grids, which go through numpy,
        the transform's calls and BLAS.  ``plans``: FFTW's plans of one row
        of the observer's buffer when they can be made (pyFFTW, one thread,
        the main thread; :meth:`wavesweep.fft.PyFFTWTransform.row_plans`),
        and the whole sample is then one kernel call; otherwise the
        transform's own call runs between the two passes.  Solo runs and a
        batch's members, local and Dask workers take the same passes."""
        grid = self.grid
        if grid.ndim != 1 or getattr(grid, "radial", False) or self.frame is not None \
                or not self._momentum_from_spectrum or self._resolved_any:
            return None
        n, nb = grid.size, self._nb
        if self._groups:
            (_, idx, rows, weight), = self._groups   # one axis: one group, the detectors in their order
        else:
            idx, rows, weight = [], np.zeros((0, n), complex), 1.0
        if idx != list(range(len(self.detectors))):
            return None
        buffer = getattr(self.transform, "buffer", None)
        row_plans = getattr(self.transform, "row_plans", None)
        plans = row_plans() if row_plans is not None else None
        if buffer is not None and buffer.size == nb * n:
            scratch = buffer.reshape(nb, n)
            if not np.shares_memory(scratch, buffer):   # the transform's own rows, never a copy
                return None
            to_transform = buffer   # (the buffer itself: pyFFTW copies any other array into it)
        else:
            scratch, plans = np.empty((nb, n), self.transform.dtype), None
            to_transform = scratch.reshape(self.transform.shape)
        from .kernels import sample   # lazy: numba kernels load on first use
        psi0 = None if self._psi0 is None else np.ascontiguousarray(self._psi0.reshape(-1, n))
        # the value rows alone: a derivative row is i k times its value row (spectral derivative of the
        # same interpolant) but at an even grid's Nyquist mode, whose entry is passed on its own
        m = len(idx)
        wavenumber = np.ascontiguousarray(self._k[2], dtype=float)   # the Nyquist mode's zeroed
        nyquist = n // 2 if n % 2 == 0 else -1
        nyquist_slope = rows[m:, nyquist].astype(np.complex128) if nyquist >= 0 else np.zeros(m, np.complex128)
        return {"kernels": sample, "scratch": scratch, "to_transform": to_transform, "plans": plans, "x": np.ascontiguousarray(self._x[2]),
                "kinetic": np.ascontiguousarray(self._t[2], dtype=float),
                "wavenumber": wavenumber, "rows": np.ascontiguousarray(rows[:m], dtype=np.complex128),
                "nyquist": nyquist, "nyquist_slope": np.ascontiguousarray(nyquist_slope), "idx": idx, "weight": weight,
                "psi0": psi0 if psi0 is not None else np.zeros((1, n), scratch.dtype)}

    def _detector_groups(self, where) -> list:
        """``(view axis, detector indices, rows (2M, n), weight)`` per axis for
        the detectors ``where`` = [(index, grid coordinate), ...]."""
        grid, nd = self.grid, self.grid.ndim
        groups = []
        for axis in sorted({self.detectors[n].axis for n, _ in where}):
            idx = [n for n, _ in where if self.detectors[n].axis == axis]
            rows = [grid.axes[axis].interpolation_rows(y) for n, y in where if self.detectors[n].axis == axis]
            others = [i for i in range(nd) if i != axis]
            par = float(np.prod([grid.axes[i].parseval_factor() for i in others]))
            dv_other = float(np.prod([grid.axes[i].dx for i in others]))
            stacked = np.array([r[0] for r in rows] + [r[1] for r in rows], dtype=complex)
            groups.append((axis + 3 - nd + 1, idx, stacked, par * dv_other))
        return groups

    def measure(self, psi: np.ndarray, potential: np.ndarray, t: float | None = None) -> dict:
        """All scalar observables of ``psi`` (one run) given the real
        potential (hartree) at time ``t`` (atomic units; a falling frame
        needs it); see :meth:`measure_members` for a batch."""
        if self.members is not None:
            raise ValueError("this observer measures a batch: use measure_members")
        if self.frame is None:
            return self.measure_members(psi, potential)[0]
        if t is None:
            raise ValueError("a falling grid's values need the sample's time t to be put in the lab")
        return self._in_lab(self.measure_members(psi, potential, t)[0], psi, t)

    def measure_members(self, psi: np.ndarray, potential: np.ndarray, t: float | None = None) -> list[dict]:
        """The observables of every member (a list of dicts, in order)."""
        rows = self._row_sample
        if rows is not None and psi.dtype == rows["scratch"].dtype:   # 1D: one compiled pass
            return self._measure_rows(psi, potential)
        k, nb, dv = self._kernels, self._nb, self.dv
        psi4 = self._view4(np.ascontiguousarray(psi))
        v3 = self._potential_view(potential)
        dens = np.empty((nb, 6))
        psi0 = self._psi0 if self._psi0 is not None else psi4[:1]
        k.density_sums(psi4, *self._x, v3, psi0, self._psi0 is not None, dens)
        phi = self.transform.transform_of(psi)
        phi4 = self._view4(phi)
        spec = np.empty((nb, 2))
        k.spectrum_sums(phi4, *self._t, *self._k, spec)
        p_box = None if self._momentum_from_spectrum else self._momentum_box(psi4, phi4)
        scalars = self._member_scalars(dens, spec, self._quartic(psi4), p_box)
        flux = np.zeros((nb, len(self.detectors)))
        amp = np.full((nb, len(self.detectors)), complex("nan"))
        slope = np.full((nb, len(self.detectors)), complex("nan"))
        self._profiles, self._lines = {}, {}
        groups = self._groups
        if self.frame is not None:   # the lab detectors the falling grid covers now
            covered = [(n, self.frame.covered(self.grid, d.axis, d.position, t)) for n, d in enumerate(self.detectors)]
            groups = self._detector_groups([(n, y) for n, y in covered if y is not None])
            self._density_at = np.zeros(len(self.detectors))
            amp[:] = 0.0
            slope[:] = 0.0
        for group in groups:
            self._at_detectors(phi4, group, flux, amp, slope)
        out = []
        for b, r in enumerate(scalars):
            r["flux"] = flux[b].copy()
            if self.records_amplitude:
                r["detector_psi"] = amp[b].copy()
                r["detector_dpsi"] = slope[b].copy()
            if self.screens:
                r["screen_flux"] = np.stack([self._profiles[n][b] for n in self.screens])
            if self.spectrum_lines:
                r["spectrum_psi"] = np.stack([self._lines[n][0][b] for n in self.spectrum_lines])
                r["spectrum_dpsi"] = np.stack([self._lines[n][1][b] for n in self.spectrum_lines])
            out.append(r)
        return out

    def _measure_rows(self, psi, potential) -> list[dict]:
        """:meth:`measure_members` of a 1D periodic grid in the compiled
        pass (:meth:`_row_sampler`): the same values, per member, with a
        few array operations around the one kernel call (at 4096 points
        the numpy calls had cost as much as the pass itself)."""
        a = self._row_sample
        nb, n, m = self._nb, self.grid.size, len(a["idx"])
        psi2 = np.ascontiguousarray(psi).reshape(nb, n)
        v = self._potential_view(potential).reshape(n)
        sums = np.empty((nb, 8))             # the density sums, then the spectrum sums
        both = np.empty((nb, 2 * m), np.complex128)
        flux = np.empty((nb, m))
        plans, kernels, has_psi0, flux_scale = a["plans"], a["kernels"], self._psi0 is not None, a["weight"] / self.mass
        if plans is not None:
            kernels.sample_rows(psi2, a["scratch"], plans.execute, plans.forward, a["x"], v, a["psi0"], has_psi0,
                                a["kinetic"], a["wavenumber"], a["rows"], a["nyquist"], a["nyquist_slope"],
                                flux_scale, sums, both, flux)
        else:
            kernels.psi_sums(psi2, a["scratch"], a["x"], v, a["psi0"], has_psi0, sums)
            phi = self.transform.forward(a["to_transform"]).reshape(nb, n)
            kernels.phi_sums(phi, a["kinetic"], a["wavenumber"], a["rows"], a["nyquist"], a["nyquist_slope"],
                             flux_scale, sums, both, flux)
        scalars = self._member_scalars(sums[:, :6], sums[:, 6:], self._quartic(psi2), None)
        for b, r in enumerate(scalars):
            r["flux"] = flux[b]
            r["detector_psi"] = both[b, :m]
            r["detector_dpsi"] = both[b, m:]
        return scalars

    def _quartic(self, psi):
        """sum |psi|^4 dV per member (a list), for a mean-field interaction's
        energy; None for a linear run."""
        if self.contact is None:
            return None
        rho = psi.real.astype(float)**2 + psi.imag.astype(float)**2
        return ((rho * rho).reshape(self._nb, -1).sum(axis=1) * self.dv).tolist()

    def _member_scalars(self, dens, spec, quartic, p_box) -> list[dict]:
        """The scalars of every member (atomic units) from its density sums
        ``dens`` (members, 6) and spectrum sums ``spec`` (members, 2); per
        member in Python floats (numpy's calls on arrays of one element cost
        ~1 us each).  ``quartic``: sum |psi|^4 dV per member, or None;
        ``p_box``: a box axis' Im sum conj(psi) dpsi/dx per member, or None."""
        dv, par_dv = self.dv, self._parseval_dv
        scalars = []
        for b, (d, sp) in enumerate(zip(dens.tolist(), spec.tolist())):
            norm = d[0] * dv
            safe = norm if norm > 0 else math.nan
            x_rel = d[1] * dv / safe
            x2 = d[2] * dv / safe - x_rel * x_rel
            energy = (sp[0] * par_dv + d[3] * dv) / safe
            r = {"norm": norm, "x_mean": x_rel + self._x_origin, "x_std": math.sqrt(max(x2, 0.0))
                 if x2 == x2 else math.nan,
                 "p_mean": sp[1] * par_dv / safe if p_box is None else p_box[b] * dv / safe}
            if quartic is not None:
                mean_field = self.contact * quartic[b] / safe
                r["chemical_potential"] = energy + mean_field
                energy = energy + 0.5 * mean_field
            r["energy"] = energy
            if self._psi0 is not None:
                r["autocorrelation_real"] = d[4] * dv
                r["autocorrelation_imag"] = d[5] * dv
            scalars.append(r)
        return scalars

    def _in_lab(self, r: dict, psi, t: float) -> dict:
        """One run's values on a falling grid turned into the lab's (see the
        class notes), with ``frame_offset`` X(t) (bohr, per axis)."""
        frame, m = self.frame, self.mass
        x_off, u, force = frame.offset(t), frame.velocity(t), frame.force(t)
        # the first axis' means are measured already; the others cost a pass and a derivative each
        pos, mom, _ = mean_position_momentum(psi, self.grid, axes=range(1, self.grid.ndim))
        pos[0], mom[0] = r["x_mean"], r["p_mean"]
        shift = float(u @ mom + 0.5 * m * (u @ u) - force @ (pos + x_off))
        r["x_mean"] += float(x_off[0])
        r["p_mean"] += m * float(u[0])
        r["energy"] += shift
        if "chemical_potential" in r:
            r["chemical_potential"] += shift
        for n, det in enumerate(self.detectors):
            r["flux"][n] += u[det.axis] * self._density_at[n]
        if "detector_psi" in r:   # 1D: psi(x_d) = exp(i [m u x_d + theta]) phi(x_d - X)
            theta = frame.phase(t)
            for n, det in enumerate(self.detectors):
                turn = np.exp(1j * (m * u[0] * det.position + theta))
                if "detector_dpsi" in r:   # d/dx of the lab psi: the phase's slope m u times psi too
                    r["detector_dpsi"][n] = turn * (r["detector_dpsi"][n] + 1j * m * u[0] * r["detector_psi"][n])
                r["detector_psi"][n] *= turn
        r["frame_offset"] = np.array(x_off, float)
        return r

    def _screen_profile(self, a, d) -> np.ndarray:
        """The flux density J_n = (hbar/m) Im(conj(psi) dpsi/dn) along a
        resolved detector (atomic units: probability per bohr^(d-1) per
        atomic unit of time), per member and transverse point, every
        ``stride``-th point of each transverse axis: shape (members,
        *transverse), from psi and dpsi/dn along the detector
        (:meth:`_line_values`)."""
        cut = (slice(None),) + (slice(None, None, self.stride),) * (a.ndim - 1)
        return ((a.conj() * d).imag / self.mass)[cut]

    def _line_values(self, a, d, normal: int) -> tuple[np.ndarray, np.ndarray]:
        """psi and dpsi/dn (atomic units) at every grid point of a detector
        line or plane, shape (members, *transverse), complex128.

        ``a``, ``d``: psi and dpsi/dn on the detector (already interpolated
        along the normal axis ``normal``), still as transform coefficients of
        the transverse axes; each transverse axis is transformed back (a
        line's worth of work: the pass over psi is the total flux's own)."""
        grid = self.grid
        others = [i for i in range(grid.ndim) if i != normal]
        shape = (self._nb, *[grid.axes[i].points for i in others])
        a = a.reshape(shape).astype(np.complex128)
        d = d.reshape(shape).astype(np.complex128)
        for pos, i in enumerate(others, start=1):
            if grid.axes[i].boundary == "periodic":   # coefficients of an unnormalised FFT
                a = scipy.fft.ifft(a, axis=pos)
                d = scipy.fft.ifft(d, axis=pos)
            else:                                    # the orthonormal DST-I is its own inverse
                a = scipy.fft.dst(a, type=1, norm="ortho", axis=pos)
                d = scipy.fft.dst(d, type=1, norm="ortho", axis=pos)
        return a, d

    def _potential_view(self, potential) -> np.ndarray:
        """V (hartree) as the 3D view the kernels read; the static
        potential, passed as the same array every sample, is viewed once."""
        cached = self._v_view
        if cached is not None and cached[0] is potential:
            return cached[1]
        v3 = self._view4(np.ascontiguousarray(np.broadcast_to(potential, self.grid.shape), dtype=float))[0]
        self._v_view = (potential, v3)
        return v3

    def _momentum_box(self, psi4, phi4) -> list[float]:
        """Im sum conj(psi) dpsi/dx per member on a box first axis (no dV;
        the sine coefficients do not give <p> by Parseval).  On a 1D grid
        dpsi/dx comes from the sample's own sine coefficients ``phi4``: they
        are the odd extension's Fourier coefficients (c_k = i Y_k /
        (2(N+1))^(1/2), :mod:`wavesweep.sine_transform`), so one inverse FFT
        of i kappa Y gives the derivative of the extension, which is psi'
        on the box (172 us a sample at 4095 points before, through a DST
        and a zero-padded DCT; 2D and 3D still take that way)."""
        out = []
        ax = self.grid.axes[0]
        for b in range(self._nb):
            one = psi4[b].reshape(self.grid.shape).astype(np.complex128)
            if self.grid.ndim == 1:
                n = ax.points
                c = phi4[b].reshape(-1).astype(np.complex128)
                y = np.zeros(2 * (n + 1), complex)
                y[1:n + 1] = -1j * math.sqrt(2.0 * (n + 1)) * c
                y[n + 2:] = -y[n:0:-1]
                if self._box_derivative is None:   # i kappa of the extension's modes, made once
                    kappa = np.pi * np.fft.fftfreq(2 * (n + 1), 1.0 / (2 * (n + 1))) / ((n + 1) * ax.dx)
                    kappa[n + 1] = 0.0   # the Nyquist mode has no well-defined derivative (and carries nothing)
                    self._box_derivative = 1j * kappa
                y *= self._box_derivative
                dpsi = scipy.fft.ifft(y, overwrite_x=True)[1:n + 1]
            else:
                dpsi = spectral_derivative(one, ax, 0)
            out.append(float(np.vdot(one, dpsi).imag))
        return out

    def _rows_in(self, rows, dtype):
        """The interpolation rows in psi's precision, converted once per array."""
        if rows.dtype == dtype:
            return rows
        if self.frame is not None:   # a falling grid's rows are made anew each sample: nothing to keep
            return rows.astype(dtype)
        key = (id(rows), np.dtype(dtype))
        found = self._rows_cast.get(key)
        if found is None or found[0] is not rows:
            found = (rows, rows.astype(dtype))
            self._rows_cast[key] = found
        return found[1]

    def _at_detectors(self, phi4, group, flux, amp, slope):
        """Fill ``flux[b, n]``, ``amp[b, n]`` and ``slope[b, n]`` (psi and
        dpsi/dx at the detector; only meaningful in 1D) for the detectors of one axis: psi(x_d) and
        psi'(x_d) are the interpolation rows times the coefficients along
        that axis, a matrix product over the view's last two axes."""
        axis, idx, rows, weight = group
        m = len(idx)
        rows = self._rows_in(rows, phi4.dtype)
        if phi4.shape[:3] == (1, 1, 1) and self.frame is None and not self._resolved_any:
            # one 1D run: psi and dpsi/dx at every detector, the very product a batch's member makes
            # (its solo run then equals it to the last bit, in single precision too)
            both = (phi4 @ rows.T).reshape(-1)
            a, d = both[:m], both[m:]
            flux[0, idx] = (a.conj() * d).imag * (weight / self.mass)
            amp[0, idx] = a
            slope[0, idx] = d
            return
        if axis == 3:        # (.., n1, n2) @ (n2, 2M) -> (.., n1, 2M); a product per member (a batch's
            # members then sum as their solo runs do, to the last bit, in single precision too)
            both = (phi4 @ rows.T).transpose(3, 0, 1, 2)
        elif axis == 2:      # (2M, n1) @ (.., n1, n2) -> (.., 2M, n2)
            both = np.moveaxis(rows @ phi4, -2, 0)
        else:                # (2M, n0) @ (b, n0, n1 n2) -> (b, 2M, n1 n2)
            nb, n0 = phi4.shape[:2]
            both = np.moveaxis(rows @ phi4.reshape(nb, n0, -1), -2, 0)
        a, d = both[:m], both[m:]
        f = (a.conj() * d).imag.reshape(m, self._nb, -1).sum(axis=2).T * (weight / self.mass)
        flux[:, idx] = f
        for j, n in enumerate(idx):
            det = self.detectors[n]
            if det.resolved or (det.spectrum and self.grid.ndim > 1):
                line_psi, line_dpsi = self._line_values(a[j], d[j], axis - (3 - self.grid.ndim) - 1)
                if det.resolved:
                    self._profiles[n] = self._screen_profile(line_psi, line_dpsi)
                if det.spectrum and self.grid.ndim > 1:
                    self._lines[n] = (line_psi, line_dpsi)
        if self.frame is not None:   # the density there, for the lab current (one run)
            self._density_at[idx] = (a.real.astype(float) ** 2 + a.imag.astype(float) ** 2).reshape(m, -1).sum(axis=1) * weight
        if a[0, 0].size == 1:
            amp[:, idx] = a.reshape(m, self._nb).T
            slope[:, idx] = d.reshape(m, self._nb).T
