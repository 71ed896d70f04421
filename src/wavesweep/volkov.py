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
    terms that depend on time, or None when there are none.  A driving
    field's is q E(t) from its scalar E(t) (no array per call: it is asked
    for twice a step)."""
    moving = [term for term in terms if getattr(term, "uniform_force", False)
              and getattr(term, "time_dependent", False)]
    if not moving:
        return None
    parts = []
    for term in moving:
        if hasattr(term, "electric_field") and term.axis_of() == axis:
            parts.append((term.ctx.charge, term.electric_field))
        else:
            parts.append((1.0, lambda t, term=term: float(term.force_at(t)[axis])))
    if len(parts) == 1:
        q, field = parts[0]
        return lambda t: q * field(t)
    return lambda t: sum(q * field(t) for q, field in parts)


class VolkovIntegrals:
    """(P, alpha, S) of the module notes at any time, integrated from t = 0
    on steps of at most ``dt`` (atomic units); asked for an earlier time
    (a resumed run) it starts again from 0."""

    def __init__(self, force, mass: float, dt: float):
        self.force, self.mass, self.dt = force, float(mass), float(dt)
        self._t, self._y = 0.0, np.zeros(3)

    def at(self, t: float) -> np.ndarray:
        """(P (atomic momentum), alpha (bohr), S (rad)) at ``t``."""
        if t < self._t - 1e-12 * max(1.0, abs(t)):
            self._t, self._y = 0.0, np.zeros(3)
        span = t - self._t
        n = int(np.ceil(span / self.dt - 1e-9)) if span > 0 else 0
        p, alpha, phase = (float(v) for v in self._y)
        force, m, t0 = self.force, self.mass, self._t
        h = span / n if n else 0.0
        f_start = force(t0) if n else 0.0
        # RK4 in plain floats (the forces are scalars; numpy's small arrays would cost more than the
        # step's arithmetic); the force at a step's end is the next step's start: two evaluations a step
        for i in range(n):
            ti = t0 + i * h
            f_mid, f_end = force(ti + h / 2), force(ti + h)
            p2 = p + h / 2 * f_start        # the P of the stages k2, k3, k4
            p3 = p + h / 2 * f_mid
            p4 = p + h * f_mid
            alpha += h / 6 * (p + 2 * p2 + 2 * p3 + p4) / m
            phase += h / 6 * (p * p + 2 * p2 * p2 + 2 * p3 * p3 + p4 * p4) / (2 * m)
            p += h / 6 * (f_start + 4 * f_mid + f_end)
            f_start = f_end
        self._t, self._y = t, np.array([p, alpha, phase])
        return self._y.copy()

    def in_job_units(self, t: float, conv: dict) -> dict:
        """The recorded values at ``t`` in the job's units (``conv``: the
        run's converters from atomic units)."""
        p, alpha, phase = self.at(t)
        return {"field_momentum": p * conv["momentum"], "field_excursion": alpha * conv["length"],
                "field_phase": phase}
