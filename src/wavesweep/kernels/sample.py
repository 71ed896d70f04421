"""A sample's sums over the rows of a 1D periodic grid (numba), for
:class:`wavesweep.observables.Observer`.

:func:`sample_rows` is one pass over psi (its density sums, psi copied
into the observer's own buffer), FFTW's forward transform of the copy
(called by address, as the steps call it: :mod:`wavesweep.kernels.steps`)
and one pass over the coefficients (the kinetic and momentum sums and the
detectors' interpolation products), a member at a time while its row is
in cache.  Through numpy, pyFFTW and BLAS calls a 4096-point sample cost
two FFT pairs; this costs 1.2.  Where no row plans can be made (another
thread, scipy's FFT) the same two passes run on either side of the
transform's own call (:func:`psi_sums`, :func:`phi_sums`), so a run's
numbers do not depend on where it ran.
"""
from __future__ import annotations

import numba
import numpy as np

from .split import REDUCTION_FLAGS, abs2
from .steps import execute_address

__all__ = ["sample_rows", "psi_sums", "phi_sums"]


@numba.njit(cache=True, nogil=True, fastmath=set(REDUCTION_FLAGS))
def _copy_sums(row, out, x, v, row0, has_psi0):
    """out[:] = row; (sum d, sum d x, sum d x^2, sum d V, and with
    ``has_psi0`` Re and Im of sum conj(row0) row), d = |row|^2, promoted
    to float64 (see abs2).  (The test of has_psi0 is hoisted out of the
    loop by the compiler: as fast as two loops without it.)"""
    s0 = 0.0
    s1 = 0.0
    s2 = 0.0
    s3 = 0.0
    s4 = 0.0
    s5 = 0.0
    for j in range(row.size):
        z = row[j]
        out[j] = z
        zr, zi = np.float64(z.real), np.float64(z.imag)
        d = zr * zr + zi * zi
        xj = x[j]
        s0 += d
        s1 += d * xj
        s2 += d * xj * xj
        s3 += d * v[j]
        if has_psi0:
            c = row0[j]
            cr, ci = np.float64(c.real), np.float64(c.imag)
            s4 += cr * zr + ci * zi
            s5 += cr * zi - ci * zr
    return s0, s1, s2, s3, s4, s5


@numba.njit(cache=True, nogil=True, fastmath=set(REDUCTION_FLAGS))
def _spectrum(out, kinetic, wavenumber):
    t0 = 0.0
    t1 = 0.0
    for j in range(out.size):
        d = abs2(out[j])
        t0 += d * kinetic[j]
        t1 += d * wavenumber[j]
    return t0, t1


@numba.njit(cache=True, nogil=True, fastmath=set(REDUCTION_FLAGS))
def _value_and_slope(r, out, wavenumber):
    """(sum_j r[j] out[j], sum_j i k_j r[j] out[j]) in complex128, k =
    ``wavenumber``: a detector's interpolated psi and dpsi/dx from its
    value row alone (the derivative row is i k times the value row but at
    the Nyquist mode, which ``wavenumber`` leaves out and the caller adds)."""
    ar = 0.0
    ai = 0.0
    dr = 0.0
    di = 0.0
    for j in range(out.size):
        a = r[j]
        z = out[j]
        zr, zi = np.float64(z.real), np.float64(z.imag)
        pr = a.real * zr - a.imag * zi
        pi = a.real * zi + a.imag * zr
        k = wavenumber[j]
        ar += pr
        ai += pi
        dr -= k * pi
        di += k * pr
    return complex(ar, ai), complex(dr, di)


def psi_sums(psi, scratch, x, v, psi0, has_psi0, sums):
    """The first half of :func:`sample_rows` for every row: psi copied into
    ``scratch`` and ``sums[b, :6]`` (a transform other than FFTW's row
    plans then runs between this and :func:`phi_sums`)."""
    per_member = psi0.shape[0] > 1
    for b in range(psi.shape[0]):
        _psi_row(psi[b], scratch[b], x, v, psi0[b if per_member else 0], has_psi0, sums[b])


def phi_sums(phi, kinetic, wavenumber, rows, nyquist, nyquist_slope, flux_scale, sums, both, flux):
    """The second half of :func:`sample_rows` for every row of the
    coefficients ``phi``: ``sums[b, 6:]``, ``both[b]`` and ``flux[b]``."""
    for b in range(phi.shape[0]):
        _phi_row(phi[b], kinetic, wavenumber, rows, nyquist, nyquist_slope, flux_scale, sums[b], both[b], flux[b])


@numba.njit(cache=True, nogil=True)
def _psi_row(row, out, x, v, row0, has_psi0, sums):
    s0, s1, s2, s3, s4, s5 = _copy_sums(row, out, x, v, row0, has_psi0)
    sums[0] = s0
    sums[1] = s1
    sums[2] = s2
    sums[3] = s3
    sums[4] = s4
    sums[5] = s5


@numba.njit(cache=True, nogil=True)
def _phi_row(out, kinetic, wavenumber, rows, nyquist, nyquist_slope, flux_scale, sums, both, flux):
    sums[6], sums[7] = _spectrum(out, kinetic, wavenumber)
    m = rows.shape[0]
    for i in range(m):
        a, d = _value_and_slope(rows[i], out, wavenumber)
        if nyquist >= 0:   # the Nyquist mode's own derivative row entry
            d += nyquist_slope[i] * np.complex128(out[nyquist])
        both[i] = a
        both[m + i] = d
        flux[i] = (a.conjugate() * d).imag * flux_scale


def sample_rows(psi, scratch, execute, forward, x, v, psi0, has_psi0, kinetic, wavenumber, rows,
                nyquist, nyquist_slope, flux_scale, sums, both, flux):
    """The sums of one sample of every row of ``psi`` (members, n) of a 1D
    periodic grid, psi untouched, in float64 whatever psi's precision:

    * ``sums[b, :6]``: sums of |psi|^2, |psi|^2 x, |psi|^2 x^2, |psi|^2 V and
      Re/Im conj(psi0) psi (:data:`~wavesweep.kernels.observe.DENSITY_SUMS`;
      ``x`` (n,) the coordinates, ``v`` (n,) the potential; ``psi0`` one
      row shared or one per member, read only with ``has_psi0``);
    * ``sums[b, 6:]``: sums of T |phi|^2 and k |phi|^2 over the coefficients
      phi of FFTW's unnormalised forward transform (``kinetic``,
      ``wavenumber``: (n,), in FFT order);
    * ``both[b, :m]``, ``both[b, m:]``: psi and dpsi/dx at the m detectors,
      sum_j rows[i, j] phi[j] and sum_j i k_j rows[i, j] phi[j] in
      complex128 (``rows`` the detectors' value rows of spectral
      interpolation, k = ``wavenumber``), plus ``nyquist_slope[i]``
      phi[nyquist] when the even grid's Nyquist mode ``nyquist`` >= 0
      (its derivative row entry, which i k times the value row is not);
    * ``flux[b, i]``: Im(conj(psi) dpsi/dx) at detector i, times ``flux_scale``.

    psi's rows are copied into ``scratch`` (same shape, dtype and row
    alignment as the ``forward`` plan's) and transformed there, a row at a
    time while it is in cache.  No cell volume, no Parseval factor: the
    caller's.  The sums are reassociated (vectorised) as the observer's
    other reductions are; a member's numbers depend on no other member,
    and are those of :func:`psi_sums` and :func:`phi_sums` around the same
    transform."""
    per_member = psi0.shape[0] > 1
    for b in range(psi.shape[0]):
        out = scratch[b]
        _psi_row(psi[b], out, x, v, psi0[b if per_member else 0], has_psi0, sums[b])
        p = out.ctypes.data
        execute_address(execute, forward, p, p)
        _phi_row(out, kinetic, wavenumber, rows, nyquist, nyquist_slope, flux_scale, sums[b], both[b], flux[b])


sample_rows = numba.njit(cache=True, nogil=True)(sample_rows)
psi_sums = numba.njit(cache=True, nogil=True)(psi_sums)
phi_sums = numba.njit(cache=True, nogil=True)(phi_sums)
