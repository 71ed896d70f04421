"""Reductions of the recorded observables (numba, cached on disk).

Each is one pass over a 4D view ``(member, i, j, k)`` (see
:func:`~wavesweep.kernels.split.view4`) returning sums per member, in
float64 whatever the precision of psi.  Functions of position or wave
number that are sums of one-axis parts (x along one axis, T(k) of a
Cartesian grid) come as three 1D arrays, one per padded axis, so no
full-grid array is read for them.
"""
from __future__ import annotations

import numba
import numpy as np

from .split import _twins

__all__ = ["ObserveKernels", "observe_kernels_for", "DENSITY_SUMS", "SPECTRUM_SUMS"]

# Columns of density_sums' output.
DENSITY_SUMS = ("norm", "x", "x2", "potential", "overlap_real", "overlap_imag")
SPECTRUM_SUMS = ("kinetic", "momentum")


def density_sums(psi, x0, x1, x2, v, psi0, has_psi0, out):
    """Per member b: out[b] = sums of |psi|^2, |psi|^2 x, |psi|^2 x^2,
    |psi|^2 V, and Re/Im conj(psi0) psi, with x = x0[i] + x1[j] + x2[k]
    and V the full-grid 3D array ``v`` (no cell volume)."""
    nb, n0, n1, n2 = psi.shape
    per_member = psi0.shape[0] > 1
    rows = nb * n0 * n1
    part = np.zeros((rows, 6))
    for r in numba.prange(rows):
        b = r // (n0 * n1)
        ij = r % (n0 * n1)
        i = ij // n1
        j = ij % n1
        b0 = b if per_member else 0
        x_ij = x0[i] + x1[j]
        s0 = 0.0
        s1 = 0.0
        s2 = 0.0
        s3 = 0.0
        s4 = 0.0
        s5 = 0.0
        for k in range(n2):
            z = psi[b, i, j, k]
            d = z.real * z.real + z.imag * z.imag
            x = x_ij + x2[k]
            s0 += d
            s1 += d * x
            s2 += d * x * x
            s3 += d * v[i, j, k]
            if has_psi0:
                c = psi0[b0, i, j, k]
                s4 += c.real * z.real + c.imag * z.imag
                s5 += c.real * z.imag - c.imag * z.real
        part[r, 0] = s0
        part[r, 1] = s1
        part[r, 2] = s2
        part[r, 3] = s3
        part[r, 4] = s4
        part[r, 5] = s5
    for b in range(nb):
        for c in range(6):
            out[b, c] = 0.0
    for r in range(rows):
        for c in range(6):
            out[r // (n0 * n1), c] += part[r, c]


def spectrum_sums(phi, t0, t1, t2, k0, k1, k2, out):
    """Per member b: out[b] = sums of T |phi|^2 and k |phi|^2 over the
    transform grid, with T = t0[i] + t1[j] + t2[k] and k likewise."""
    nb, n0, n1, n2 = phi.shape
    rows = nb * n0 * n1
    part = np.zeros((rows, 2))
    for r in numba.prange(rows):
        ij = r % (n0 * n1)
        i = ij // n1
        j = ij % n1
        t_ij = t0[i] + t1[j]
        k_ij = k0[i] + k1[j]
        s0 = 0.0
        s1 = 0.0
        for k in range(n2):
            z = phi[r // (n0 * n1), i, j, k]
            d = z.real * z.real + z.imag * z.imag
            s0 += d * (t_ij + t2[k])
            s1 += d * (k_ij + k2[k])
        part[r, 0] = s0
        part[r, 1] = s1
    for b in range(nb):
        out[b, 0] = 0.0
        out[b, 1] = 0.0
    for r in range(rows):
        out[r // (n0 * n1), 0] += part[r, 0]
        out[r // (n0 * n1), 1] += part[r, 1]


def contract(phi, axis, value, deriv, a, d):
    """Contract the transform coefficients with two rows along view axis
    ``axis`` (1, 2 or 3): a[b, p, q] = sum_n value[n] phi[..n..], d likewise
    with ``deriv``; (p, q) are the two other grid view axes in order."""
    nb, n0, n1, n2 = phi.shape
    if axis == 3:
        for r in numba.prange(nb * n0 * n1):
            b = r // (n0 * n1)
            ij = r % (n0 * n1)
            i = ij // n1
            j = ij % n1
            sa = 0j
            sd = 0j
            for k in range(n2):
                z = phi[b, i, j, k]
                sa += value[k] * z
                sd += deriv[k] * z
            a[b, i, j] = sa
            d[b, i, j] = sd
    elif axis == 2:
        for r in numba.prange(nb * n0):
            b = r // n0
            i = r % n0
            for k in range(n2):
                a[b, i, k] = 0j
                d[b, i, k] = 0j
            for j in range(n1):
                vj = value[j]
                dj = deriv[j]
                for k in range(n2):
                    z = phi[b, i, j, k]
                    a[b, i, k] += vj * z
                    d[b, i, k] += dj * z
    else:
        for r in numba.prange(nb * n1):
            b = r // n1
            j = r % n1
            for k in range(n2):
                a[b, j, k] = 0j
                d[b, j, k] = 0j
            for i in range(n0):
                vi = value[i]
                di = deriv[i]
                for k in range(n2):
                    z = phi[b, i, j, k]
                    a[b, j, k] += vi * z
                    d[b, j, k] += di * z


_KERNELS = {name: _twins(fn) for name, fn in
            (("density_sums", density_sums), ("spectrum_sums", spectrum_sums), ("contract", contract))}


class ObserveKernels:
    """The observable reductions in one build (threaded or serial)."""

    def __init__(self, threaded: bool):
        self.threaded = bool(threaded)
        for name, (par, ser) in _KERNELS.items():
            setattr(self, name, par if self.threaded else ser)


def observe_kernels_for(elements: int, threads: int) -> ObserveKernels:
    from .split import THREADED_MIN_ELEMENTS
    return ObserveKernels(threads > 1 and elements >= THREADED_MIN_ELEMENTS)
