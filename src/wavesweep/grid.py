"""Grids: coordinates, wave numbers and the kinetic-energy array.

All values are in atomic units (bohr, bohr^-1, hartree).

Conventions (shared with the numerics notes):

* ``periodic`` axis: ``x_j = min + j dx``, ``j = 0..N-1``, ``dx = (max - min)/N``
  (``max`` is the periodic image of ``min``); wave numbers
  ``k = 2 pi fftfreq(N, dx)``; transform: complex FFT.
* ``box`` axis: hard walls at ``min`` and ``max`` where psi = 0; the ``N``
  interior points ``x_j = min + j dx``, ``j = 1..N``, ``dx = (max - min)/(N+1)``;
  wave numbers ``k_n = n pi / L``, ``n = 1..N``; transform: DST-I.
* radial grid: ``u(r) = r R(r)`` on a box axis ``r`` in ``(0, r_max)`` with
  u(0) = u(r_max) = 0 and the centrifugal term ``l(l+1)/(2 m r^2)`` in V.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

__all__ = ["Axis", "Grid", "BOUNDARIES", "FRAMES"]

BOUNDARIES = ("periodic", "box")
# grid.frame: the grid stays in the lab, or falls with the packet (wavesweep.frame)
FRAMES = ("lab", "free_fall")


@dataclass(frozen=True)
class Axis:
    """One grid axis in atomic units (bohr)."""

    name: str
    min: float
    max: float
    points: int
    boundary: str = "periodic"

    @property
    def length(self) -> float:
        return self.max - self.min

    @property
    def dx(self) -> float:
        if self.boundary == "periodic":
            return self.length / self.points
        return self.length / (self.points + 1)

    @property
    def coordinates(self) -> np.ndarray:
        if self.boundary == "periodic":
            return self.min + self.dx * np.arange(self.points)
        return self.min + self.dx * np.arange(1, self.points + 1)

    @property
    def wavenumbers(self) -> np.ndarray:
        """Wave numbers (bohr^-1) in the order of the axis transform's output."""
        if self.boundary == "periodic":
            return 2.0 * np.pi * np.fft.fftfreq(self.points, self.dx)
        return np.pi * np.arange(1, self.points + 1) / self.length

    @property
    def k_max(self) -> float:
        """Largest |k| the axis represents (pi/dx for periodic; N pi/L for box)."""
        return float(np.max(np.abs(self.wavenumbers)))

    def interpolation_rows(self, x: float) -> tuple[np.ndarray, np.ndarray]:
        """Rows (value, derivative) that map this axis's transform coefficients
        to psi(x) and dpsi/dx at an arbitrary point ``x`` (spectral
        interpolation).  Periodic: coefficients from an unnormalised FFT,
        psi(x) = (1/N) sum_k c_k exp(i k (x - min)); the Nyquist mode of an even
        N is split into equal +/- halves, cos(k_N (x - min)), and the derivative
        row is the derivative of that same interpolant, -k_N sin(k_N (x - min))
        (zero on the grid points, as in the spectral derivative, but not between
        them: value and derivative must come from one function, or the current
        of a state with Nyquist content is wrong off the grid points).
        Box: coefficients from the orthonormal DST-I,
        psi(x) = sqrt(2/(N+1)) sum_n c_n sin(k_n (x - min))."""
        k = self.wavenumbers
        s = x - self.min
        if self.boundary == "periodic":
            n = self.points
            value = np.exp(1j * k * s) / n
            deriv = 1j * k * value
            if n % 2 == 0:
                ny = n // 2
                value[ny] = np.cos(k[ny] * s) / n
                deriv[ny] = -k[ny] * np.sin(k[ny] * s) / n
            return value, deriv
        norm = np.sqrt(2.0 / (self.points + 1))
        return norm * np.sin(k * s) + 0j, norm * k * np.cos(k * s) + 0j

    def parseval_factor(self) -> float:
        """sum_j |psi_j|^2 = factor * sum_k |c_k|^2 for this axis's transform."""
        return 1.0 / self.points if self.boundary == "periodic" else 1.0


@dataclass(frozen=True)
class Grid:
    """A Cartesian grid of 1-3 axes, or a radial grid (one axis ``r``, ``l``)."""

    axes: tuple[Axis, ...]
    radial: bool = False
    angular_momentum: int = 0
    _cache: dict = field(default_factory=dict, repr=False, compare=False, hash=False)

    def __post_init__(self):
        if self.radial and (len(self.axes) != 1 or self.axes[0].boundary != "box"):
            raise ValueError("a radial grid has one box axis r")

    @property
    def ndim(self) -> int:
        return len(self.axes)

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(a.points for a in self.axes)

    @property
    def size(self) -> int:
        # a product of the axes' points (math.prod: np.prod cost ~10 us, and the observer asks at every sample)
        return math.prod(a.points for a in self.axes)

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(a.name for a in self.axes)

    @property
    def cell_volume(self) -> float:
        """dx dy dz (bohr^ndim): the quadrature weight of every point."""
        return float(np.prod([a.dx for a in self.axes]))

    def axis(self, name: str) -> Axis:
        for a in self.axes:
            if a.name == name:
                return a
        raise KeyError(name)

    def axis_index(self, name: str) -> int:
        return self.names.index(name)

    def coordinate(self, i: int) -> np.ndarray:
        """Coordinate of axis ``i`` shaped to broadcast against the grid."""
        shape = [1] * self.ndim
        shape[i] = self.axes[i].points
        return self.axes[i].coordinates.reshape(shape)

    def mesh(self) -> dict[str, np.ndarray]:
        """Broadcastable coordinate arrays by axis name (not materialised)."""
        return {a.name: self.coordinate(i) for i, a in enumerate(self.axes)}

    def kinetic_energy(self, mass: float) -> np.ndarray:
        """T(k) = hbar^2 |k|^2 / 2m (hartree) on the transform grid, full shape."""
        key = ("T", mass)
        if key not in self._cache:
            t = np.zeros(self.shape)
            for i, a in enumerate(self.axes):
                shape = [1] * self.ndim
                shape[i] = a.points
                t = t + (a.wavenumbers**2 / (2.0 * mass)).reshape(shape)
            self._cache[key] = t
        return self._cache[key]

    def centrifugal_potential(self, mass: float) -> np.ndarray:
        """l(l+1) hbar^2 / (2 m r^2) (hartree) on a radial grid; zeros otherwise."""
        if not (self.radial and self.angular_momentum):
            return np.zeros(self.shape)
        r = self.axes[0].coordinates
        l = self.angular_momentum
        return l * (l + 1) / (2.0 * mass * r**2)

    def kinetic_max(self, mass: float) -> float:
        return sum(a.k_max**2 for a in self.axes) / (2.0 * mass)

    @property
    def parseval_factor(self) -> float:
        return float(np.prod([a.parseval_factor() for a in self.axes]))

    @property
    def transform_kinds(self) -> tuple[str, ...]:
        return tuple("fft" if a.boundary == "periodic" else "dst1" for a in self.axes)
