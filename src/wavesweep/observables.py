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
  time-energy Fourier transform gives energy-resolved transmission;
* autocorrelation <psi(0)|psi(t)>.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft

__all__ = ["Detector", "Observer", "spectral_derivative"]


@dataclass(frozen=True)
class Detector:
    """A point (1D), line (2D) or plane (3D) at ``position`` (bohr) across ``axis``."""

    name: str
    axis: int
    position: float


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


class Observer:
    """Computes the recorded observables of one run."""

    def __init__(self, grid, mass: float, transform, detectors=(), psi0=None):
        self.grid = grid
        self.mass = mass
        self.transform = transform
        self.detectors = list(detectors)
        self.psi0_conj = None if psi0 is None else np.conj(psi0).astype(np.complex128)
        self.records_amplitude = grid.ndim == 1
        self.dv = grid.cell_volume
        self.x = grid.coordinate(0)
        self.kinetic = grid.kinetic_energy(mass)
        self._rows = []
        for d in self.detectors:
            value, deriv = grid.axes[d.axis].interpolation_rows(d.position)
            others = [i for i in range(grid.ndim) if i != d.axis]
            par = float(np.prod([grid.axes[i].parseval_factor() for i in others]))
            dv_other = float(np.prod([grid.axes[i].dx for i in others]))
            self._rows.append((value, deriv, par * dv_other))

    def measure(self, psi: np.ndarray, potential: np.ndarray) -> dict:
        """All scalar observables of ``psi`` given the real potential (hartree)."""
        psi = np.asarray(psi, dtype=np.complex128)
        dens = psi.real**2 + psi.imag**2
        dv = self.dv
        norm = float(dens.sum()) * dv
        safe = norm if norm > 0 else np.nan
        xm = float(np.sum(dens * self.x)) * dv / safe
        x2 = float(np.sum(dens * (self.x - xm) ** 2)) * dv / safe
        dpsi = spectral_derivative(psi, self.grid.axes[0], 0)
        p_mean = float(np.sum(np.conj(psi) * dpsi).imag) * dv / safe
        phi = self.transform.forward(psi.copy())
        phi_dens = phi.real**2 + phi.imag**2
        kin = float(np.sum(self.kinetic * phi_dens)) * self.grid.parseval_factor * dv
        pot = float(np.sum(potential * dens)) * dv
        out = {
            "norm": norm,
            "x_mean": xm,
            "x_std": float(np.sqrt(max(x2, 0.0))),
            "p_mean": p_mean,
            "energy": (kin + pot) / safe,
        }
        at = [self._at_detector(phi, d, row) for d, row in zip(self.detectors, self._rows)]
        out["flux"] = np.array([f for f, _ in at], dtype=float)
        if self.records_amplitude:
            out["detector_psi"] = np.array([a for _, a in at], dtype=complex)
        if self.psi0_conj is not None:
            c = complex(np.sum(self.psi0_conj * psi)) * dv
            out["autocorrelation_real"], out["autocorrelation_imag"] = c.real, c.imag
        return out

    def _at_detector(self, phi, det, row) -> tuple[float, complex]:
        """(flux, psi at the detector); the amplitude only means psi(x_d) in 1D."""
        value, deriv, weight = row
        a = np.tensordot(value, phi, axes=([0], [det.axis]))
        b = np.tensordot(deriv, phi, axes=([0], [det.axis]))
        flux = float(np.sum(np.conj(a) * b).imag) * weight / self.mass
        return flux, complex(a) if a.ndim == 0 else complex("nan")
