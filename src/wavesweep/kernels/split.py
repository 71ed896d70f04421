"""Elementwise kernels of the split-operator step (numba, cached on disk).

All take 3D arrays (see :func:`as3d`) and work in place on ``psi``.
"""
from __future__ import annotations

import numba
import numpy as np

__all__ = ["as3d", "multiply_inplace", "kick_separable", "kick_general", "abs2_weighted_sum",
           "real_matvec"]


def as3d(a: np.ndarray) -> np.ndarray:
    """A view of a 1D/2D/3D array as 3D with *leading* length-1 axes; no copy.

    Leading, so that the kernels' innermost loop runs over the last (longest,
    contiguous) axis: with trailing padding a 1D grid became (N, 1, 1) and
    every element paid a loop of length one (measured 4x slower than numpy).
    """
    if a.ndim == 3:
        return a
    return a.reshape((1,) * (3 - a.ndim) + a.shape)


@numba.njit(cache=True, parallel=True, fastmath=False)
def multiply_inplace(psi, factor):
    """psi *= factor (same 3D shape, both C-contiguous)."""
    n0, n1, n2 = psi.shape
    for ij in numba.prange(n0 * n1):
        i, j = ij // n1, ij % n1
        for k in range(n2):
            psi[i, j, k] *= factor[i, j, k]


@numba.njit(cache=True, parallel=True, fastmath=False)
def kick_separable(psi, factor, phase0, phase1, phase2):
    """psi *= factor * exp(-i (phase0[i] + phase1[j] + phase2[k])).

    A time-dependent potential that is a sum of one-axis functions (a field
    along an axis) enters through three 1D phase arrays, so no full-grid
    array is built per step.
    """
    n0, n1, n2 = psi.shape
    for ij in numba.prange(n0 * n1):
        i, j = ij // n1, ij % n1
        p = phase0[i] + phase1[j]
        for k in range(n2):
            ph = p + phase2[k]
            psi[i, j, k] *= factor[i, j, k] * (np.cos(ph) - 1j * np.sin(ph))


@numba.njit(cache=True, parallel=True, fastmath=False)
def kick_general(psi, factor, v, scale):
    """psi *= factor * exp(-i scale v) for a full-grid real array v."""
    n0, n1, n2 = psi.shape
    for ij in numba.prange(n0 * n1):
        i, j = ij // n1, ij % n1
        for k in range(n2):
            ph = scale * v[i, j, k]
            psi[i, j, k] *= factor[i, j, k] * (np.cos(ph) - 1j * np.sin(ph))


@numba.njit(cache=True, parallel=False, fastmath=False)
def abs2_weighted_sum(psi, w):
    """sum |psi|^2 w over 3D arrays of the same shape (psi may be a strided slab)."""
    n0, n1, n2 = psi.shape
    total = 0.0
    for i in range(n0):
        for j in range(n1):
            for k in range(n2):
                z = psi[i, j, k]
                total += (z.real * z.real + z.imag * z.imag) * w[i, j, k]
    return total


@numba.njit(cache=True, parallel=True, fastmath=False)
def real_matvec(q, x, out):
    """out = q @ x for a real C-contiguous (n, n) matrix q and a complex vector x
    (the dense kinetic step of a radial grid; rows in parallel, no BLAS threads)."""
    n = q.shape[0]
    for i in numba.prange(n):
        re = 0.0
        im = 0.0
        for j in range(n):
            re += q[i, j] * x[j].real
            im += q[i, j] * x[j].imag
        out[i] = re + 1j * im
