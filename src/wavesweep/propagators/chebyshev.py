"""Chebyshev expansion of exp(-i H dt) for a time-independent H.

H is scaled into [-1, 1] with its spectral range (V min/max plus 0..T_max,
widened slightly), H_n = (H - E_mid) / E_half, and

    exp(-i H dt) = exp(-i E_mid dt) sum_n (2 - delta_n0) (-i)^n J_n(E_half dt) T_n(H_n),

truncated once |J_n| falls below machine precision (Tal-Ezer & Kosloff,
J. Chem. Phys. 81, 3967 (1984)).  Exact to rounding for any dt, so it is
the reference method; the cost per step grows like E_half dt.

A mask absorber is applied once per step; a CAP makes H non-Hermitian and
is refused (its spectrum leaves the real interval the expansion needs).
"""
from __future__ import annotations

import numpy as np
from scipy.special import jv

from ..errors import JobError
from .base import Propagator, other_schemes, register_scheme

__all__ = ["Chebyshev", "chebyshev_expansion", "chebyshev_series"]


def chebyshev_series(scaled_h, psi, coefficients):
    """sum_n c_n T_n(H') psi by the three-term recurrence T_n+1 = 2 H' T_n -
    T_n-1 (Tal-Ezer & Kosloff, J. Chem. Phys. 81, 3967 (1984)), ``scaled_h``
    applying H' (the spectrum mapped into [-1, 1]); one state or a stack of
    coupled surfaces alike."""
    c = coefficients
    prev = psi
    cur = scaled_h(psi)
    out = c[0] * prev + c[1] * cur
    for a in c[2:]:
        nxt = 2.0 * scaled_h(cur) - prev
        out += a * nxt
        prev, cur = cur, nxt
    return out


def chebyshev_expansion(hamiltonian, dt: float):
    """(E_mid, E_half, coefficients) of exp(-i H dt) for any ``hamiltonian``
    with ``spectral_range()`` (one surface's, or coupled surfaces'
    :class:`~wavesweep.surfaces.SurfaceHamiltonian`): the spectral range's
    centre and half width (hartree, padded by 1e-3 of the width) and the
    expansion's coefficients 2 (-i)^n J_n(E_half dt) exp(-i E_mid dt) (the
    first without the 2), cut where they fall below 1e-17 of the largest
    (Tal-Ezer and Kosloff, J. Chem. Phys. 81, 3967 (1984))."""
    lo, hi = hamiltonian.spectral_range()
    pad = 1e-3 * (hi - lo) + 1e-12
    lo, hi = lo - pad, hi + pad
    e_mid = 0.5 * (hi + lo)
    e_half = 0.5 * (hi - lo)
    alpha = e_half * dt
    n = np.arange(int(alpha + 40 + 10 * alpha ** (1 / 3)) + 1)
    coeff = jv(n, alpha) * (-1j) ** n
    coeff[1:] *= 2.0
    big = np.nonzero(np.abs(coeff) > 1e-17 * max(1.0, np.abs(coeff).max()))[0]
    return e_mid, e_half, coeff[: big[-1] + 1] * np.exp(-1j * e_mid * dt)


@register_scheme
class Chebyshev(Propagator):
    name = "chebyshev"
    order = 0  # spectrally exact in time (no power-law error)
    summary = "Chebyshev expansion of exp(-i H dt): time-independent H, no CAP; exact in time"
    exact_in_time = True

    @classmethod
    def check_supported(cls, hamiltonian, absorber, grid):
        if getattr(hamiltonian, "contact", 0.0):
            raise JobError("evolve.scheme", f"{cls.name!r} is linear and cannot step the [interaction] "
                                            f"(g N |psi|^2); use {other_schemes(cls, hamiltonian, absorber, grid)}")
        if hamiltonian.time_dependent:
            raise JobError("evolve.scheme", f"{cls.name!r} needs a time-independent Hamiltonian; this job has "
                                            "a time-dependent potential: use "
                                            f"{other_schemes(cls, hamiltonian, absorber, grid)}")
        if absorber is not None and absorber.active and absorber.kind == "cap":
            raise JobError("absorber.kind", f"{cls.name!r} cannot use a CAP (non-Hermitian H); use "
                                            "absorber.kind = 'mask' or another scheme: "
                                            f"{other_schemes(cls, hamiltonian, absorber, grid)}")

    @staticmethod
    def _expansion(hamiltonian, dt):
        return chebyshev_expansion(hamiltonian, dt)

    @classmethod
    def expansion_terms(cls, hamiltonian, dt):
        return len(cls._expansion(hamiltonian, float(dt))[2])

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self.e_mid, self.e_half, self.coefficients = self._expansion(self.hamiltonian, self.dt)
        self._v = self.hamiltonian.static_potential
        self._mask = None
        absorber = self.absorber
        if absorber is not None and absorber.active:
            self._mask = np.exp(-absorber.rate * self.dt)
            self._loss = absorber.loss_weights(self.dt)

    def _scaled_h(self, phi):
        """H_n phi = (H phi - E_mid phi) / E_half."""
        tk = self.transform.forward(phi.copy())
        tk *= self.hamiltonian.kinetic
        hphi = self.transform.backward(tk)
        hphi += (self._v - self.e_mid) * phi
        hphi /= self.e_half
        return hphi

    def _step_impl(self, psi, nsteps):
        psi = np.asarray(psi, dtype=np.complex128)
        for _ in range(nsteps):
            psi = chebyshev_series(self._scaled_h, psi, self.coefficients)
            if self._mask is not None:
                dens = np.abs(psi) ** 2
                dv = self.grid.cell_volume
                for n, (layer, lw) in enumerate(zip(self.absorber.layers, self._loss)):
                    self.absorbed[n] += float(np.sum(dens[layer.slab] * lw)) * dv
                psi *= self._mask
        return psi.astype(self.dtype, copy=False)
