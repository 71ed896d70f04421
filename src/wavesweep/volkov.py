"""The uniform forces' momentum transfer and Volkov phases along the first
axis, integrated at run time for the surface-flux spectrum (atomic units).

A uniform force F(t) = q E(t) (the ``field`` potential kind, length gauge
V = -q E(t) x; gravity too) gives a free particle the momentum

    P(t) = int_0^t F dt' = -q A(t),        A(t) = -int_0^t E dt',

and the length-gauge Volkov state of canonical momentum k is

    chi_k(x, t) = (2 pi)^(-1/2) exp(i (k + P(t)) x - i Phi_k(t)),
    Phi_k(t) = int_0^t (k + P)^2 / 2m dt' = k^2 t / 2m + k alpha(t) + S(t),

with the classical excursion alpha(t) = int_0^t P / m dt' and the
ponderomotive phase S(t) = int_0^t P^2 / 2m dt'.  The run records P, alpha
and S at every sample (``field_momentum``, ``field_excursion``,
``field_phase``); :mod:`wavesweep.analysis.surface_flux` builds chi_k from
them.  They are integrated step by step with the classical fourth-order
Runge-Kutta rule on the propagator's own step (E(t) is smooth within a
step; the error is O(dt^4) against the propagator's O(dt^2)).
"""
from __future__ import annotations

import numpy as np

__all__ = ["VolkovIntegrals", "uniform_force_along"]


def uniform_force_along(terms, axis: int = 0):
    """F(t) along ``axis`` (hartree/bohr) summed over the uniform-force
    terms that depend on time, or None when there are none."""
    moving = [term for term in terms if getattr(term, "uniform_force", False)
              and getattr(term, "time_dependent", False)]
    if not moving:
        return None
    return lambda t: float(sum(term.force_at(t)[axis] for term in moving))


class VolkovIntegrals:
    """(P, alpha, S) of the module notes at any time, integrated from t = 0
    on steps of at most ``dt`` (atomic units); asked for an earlier time
    (a resumed run) it starts again from 0."""

    def __init__(self, force, mass: float, dt: float):
        self.force, self.mass, self.dt = force, float(mass), float(dt)
        self._t, self._y = 0.0, np.zeros(3)

    def _rate(self, t, y):
        p = y[0]
        return np.array([self.force(t), p / self.mass, p * p / (2 * self.mass)])

    def at(self, t: float) -> np.ndarray:
        """(P (hartree bohr^-1 atomic momentum), alpha (bohr), S (rad)) at ``t``."""
        if t < self._t - 1e-12 * max(1.0, abs(t)):
            self._t, self._y = 0.0, np.zeros(3)
        span = t - self._t
        n = int(np.ceil(span / self.dt - 1e-9)) if span > 0 else 0
        y, t0 = self._y, self._t
        for i in range(n):
            h = span / n
            ti = t0 + i * h
            k1 = self._rate(ti, y)
            k2 = self._rate(ti + h / 2, y + h / 2 * k1)
            k3 = self._rate(ti + h / 2, y + h / 2 * k2)
            k4 = self._rate(ti + h, y + h * k3)
            y = y + h / 6 * (k1 + 2 * k2 + 2 * k3 + k4)
        self._t, self._y = t, y
        return y.copy()

    def in_job_units(self, t: float, conv: dict) -> dict:
        """The recorded values at ``t`` in the job's units (``conv``: the
        run's converters from atomic units)."""
        p, alpha, phase = self.at(t)
        return {"field_momentum": p * conv["momentum"], "field_excursion": alpha * conv["length"],
                "field_phase": phase}
