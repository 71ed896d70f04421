"""Spectral transforms of a grid: a small backend registry.

A :class:`Transform` maps psi on the grid to its coefficients on the
wave-number grid of :class:`~wavesweep.grid.Grid` and back: a complex FFT
along periodic axes (unnormalised forward, 1/N on the way back, as
numpy/scipy do) and the orthonormal DST-I along box axes (its own inverse).
It is made once per run, so backends that plan (pyFFTW) plan once.

Backends register by name in :data:`BACKENDS`; ``make_transform(grid,
backend="auto")`` picks the best available.
"""
from __future__ import annotations

import os

import numpy as np
import scipy.fft

__all__ = ["Transform", "ScipyTransform", "BACKENDS", "make_transform", "register_backend"]


class Transform:
    """Interface: ``forward(a)`` and ``backward(c)`` may overwrite their input
    and return the result (possibly the same array)."""

    name = "base"

    def __init__(self, grid, dtype=np.complex128, threads: int | None = None):
        self.grid = grid
        self.dtype = np.dtype(dtype)
        self.threads = threads or default_threads()

    def forward(self, a: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def backward(self, c: np.ndarray) -> np.ndarray:
        raise NotImplementedError


class ScipyTransform(Transform):
    """scipy.fft with ``workers`` threads; DST-I with ``norm="ortho"``."""

    name = "scipy"

    def __init__(self, grid, dtype=np.complex128, threads=None):
        super().__init__(grid, dtype, threads)
        kinds = grid.transform_kinds
        self._fft_axes = tuple(i for i, k in enumerate(kinds) if k == "fft")
        self._dst_axes = tuple(i for i, k in enumerate(kinds) if k == "dst1")

    def forward(self, a):
        if self._fft_axes:
            a = scipy.fft.fftn(a, axes=self._fft_axes, overwrite_x=True, workers=self.threads)
        if self._dst_axes:
            a = scipy.fft.dstn(a, type=1, axes=self._dst_axes, norm="ortho",
                               overwrite_x=True, workers=self.threads)
        return a

    def backward(self, c):
        if self._dst_axes:
            c = scipy.fft.idstn(c, type=1, axes=self._dst_axes, norm="ortho",
                                overwrite_x=True, workers=self.threads)
        if self._fft_axes:
            c = scipy.fft.ifftn(c, axes=self._fft_axes, overwrite_x=True, workers=self.threads)
        return c


BACKENDS: dict[str, type[Transform]] = {"scipy": ScipyTransform}


def register_backend(cls: type[Transform]) -> type[Transform]:
    """Class decorator: make a Transform subclass available by its ``name``."""
    BACKENDS[cls.name] = cls
    return cls


def default_threads() -> int:
    """Threads for one run: ``WAVESWEEP_THREADS`` if set, else all cores."""
    env = os.environ.get("WAVESWEEP_THREADS")
    if env:
        return max(1, int(env))
    return os.cpu_count() or 1


def make_transform(grid, backend: str | type[Transform] = "auto", dtype=np.complex128,
                   threads: int | None = None) -> Transform:
    """A transform for ``grid`` from a backend name, a class, or ``"auto"``."""
    if isinstance(backend, type):
        return backend(grid, dtype, threads)
    if backend == "auto":
        backend = "pyfftw" if "pyfftw" in BACKENDS else "scipy"
    try:
        cls = BACKENDS[backend]
    except KeyError:
        raise ValueError(f"fft backend {backend!r} is not available; choose from "
                         f"{', '.join(sorted(BACKENDS))}") from None
    return cls(grid, dtype, threads)
