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

from .split import REDUCTION_FLAGS, THREADED_MIN_ELEMENTS, _twins, abs2, row_indices

__all__ = ["ObserveKernels", "observe_kernels_for", "density_of", "DENSITY_SUMS", "SPECTRUM_SUMS"]

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
        b, i, j = row_indices(r, n0, n1)
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
            d = abs2(z)
            x = x_ij + x2[k]
            s0 += d
            s1 += d * x
            s2 += d * x * x
            s3 += d * v[i, j, k]
            if has_psi0:
                c = psi0[b0, i, j, k]
                cr, ci = np.float64(c.real), np.float64(c.imag)   # promoted: see abs2
                zr, zi = np.float64(z.real), np.float64(z.imag)
                s4 += cr * zr + ci * zi
                s5 += cr * zi - ci * zr
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
        b, i, j = row_indices(r, n0, n1)
        t_ij = t0[i] + t1[j]
        k_ij = k0[i] + k1[j]
        s0 = 0.0
        s1 = 0.0
        for k in range(n2):
            z = phi[b, i, j, k]
            d = abs2(z)
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


# Elements of the contiguous axis one task of contract() handles when it
# contracts along a middle axis (contiguous reads, enough tasks for threads).
CHUNK = 64


def contract(phi, axis, value, deriv, a, d):
    """Contract the transform coefficients with rows along view axis
    ``axis`` (1, 2 or 3), several detectors on that axis in one pass:
    a[m, b, p, q] = sum_n value[m, n] phi[..n..], d likewise with ``deriv``;
    (p, q) are the two other view axes in order."""
    nb, n0, n1, n2 = phi.shape
    nm = value.shape[0]
    if axis == 3:
        for r in numba.prange(nb * n0 * n1):
            b, i, j = row_indices(r, n0, n1)
            for m in range(nm):
                sa = 0j
                sd = 0j
                for k in range(n2):
                    z = phi[b, i, j, k]
                    sa += value[m, k] * z
                    sd += deriv[m, k] * z
                a[m, b, i, j] = sa
                d[m, b, i, j] = sd
    else:
        # along axis 1 or 2: tasks over (b, other axis, chunk of the last axis)
        n_other = n1 if axis == 1 else n0
        n_axis = n0 if axis == 1 else n1
        chunks = (n2 + CHUNK - 1) // CHUNK
        for r in numba.prange(nb * n_other * chunks):
            b = r // (n_other * chunks)
            o = (r // chunks) % n_other
            k0 = (r % chunks) * CHUNK
            k1 = min(k0 + CHUNK, n2)
            for m in range(nm):
                for k in range(k0, k1):
                    a[m, b, o, k] = 0j
                    d[m, b, o, k] = 0j
                for n in range(n_axis):
                    vn = value[m, n]
                    dn = deriv[m, n]
                    for k in range(k0, k1):
                        z = phi[b, n, o, k] if axis == 1 else phi[b, o, n, k]
                        a[m, b, o, k] += vn * z
                        d[m, b, o, k] += dn * z


@numba.njit(cache=True, parallel=True, fastmath=False, nogil=True)
def _density_into(psi, scale, out):
    for i in numba.prange(psi.size):
        z = psi[i]
        out[i] = (np.float64(z.real) * z.real + np.float64(z.imag) * z.imag) * scale


def density_of(psi: np.ndarray, scale: float = 1.0, dtype=np.float64) -> np.ndarray:
    """|psi|^2 times ``scale`` (summed in float64) as a new array of psi's
    shape and ``dtype``."""
    psi = np.ascontiguousarray(psi)
    out = np.empty(psi.shape, dtype=dtype)
    _density_into(psi.reshape(-1), float(scale), out.reshape(-1))
    return out


_KERNELS = {name: _twins(fn, REDUCTION_FLAGS) for name, fn in
            (("density_sums", density_sums), ("spectrum_sums", spectrum_sums), ("contract", contract))}


class ObserveKernels:
    """The observable reductions in one build (threaded or serial)."""

    def __init__(self, threaded: bool):
        self.threaded = bool(threaded)
        for name, (par, ser) in _KERNELS.items():
            setattr(self, name, par if self.threaded else ser)


def observe_kernels_for(elements: int, threads: int) -> ObserveKernels:
    return ObserveKernels(threads > 1 and elements >= THREADED_MIN_ELEMENTS)
