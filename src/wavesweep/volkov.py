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

__all__ = ["VolkovIntegrals", "uniform_force_along", "uniform_force_vector"]


def uniform_force_along(terms, axis: int = 0):
    """F(t) along ``axis`` (hartree/bohr) summed over the uniform-force
    terms that depend on time, or None when there are none.  A driving
    field's is q E(t) from its scalar E(t) (no array per call: it is asked
    for three times a step)."""
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


def uniform_force_vector(terms, ndim: int):
    """F(t) (hartree/bohr) as an array of its ``ndim`` components, summed
    over the uniform-force terms that depend on time, or None when there
    are none (the 2D/3D spectrum's Volkov waves)."""
    parts = [uniform_force_along(terms, axis) for axis in range(ndim)]
    if all(p is None for p in parts):
        return None
    return lambda t: np.array([0.0 if p is None else p(t) for p in parts])


# Where within a step its end values are taken (a fraction of the step: far below the error of RK4 on a
# smooth field, O(ONE_SIDED h |F'|), and above rounding of t)
ONE_SIDED = 1e-9


class VolkovIntegrals:
    """(P, alpha, S) of the module notes at any time, integrated from t = 0
    on steps of at most ``dt`` (atomic units); asked for an earlier time
    (a resumed run) it starts again from 0.  ``force`` returns a float
    (along the first axis: :func:`uniform_force_along`) or an array of
    ``ndim`` components (:func:`uniform_force_vector`); P and alpha are then
    vectors, S = int |P|^2 / 2m a scalar."""

    def __init__(self, force, mass: float, dt: float, ndim: int | None = None):
        self.force, self.mass, self.dt = force, float(mass), float(dt)
        self.ndim = ndim
        self._t, self._y = 0.0, self._zero()

    def _zero(self):
        return (0.0, 0.0, 0.0) if self.ndim is None else (np.zeros(self.ndim), np.zeros(self.ndim), 0.0)

    def at(self, t: float) -> tuple:
        """(P (atomic momentum), alpha (bohr), S (rad)) at ``t``."""
        if t < self._t - 1e-12 * max(1.0, abs(t)):
            self._t, self._y = 0.0, self._zero()
        span = t - self._t
        n = int(np.ceil(span / self.dt - 1e-9)) if span > 0 else 0
        p, alpha, phase = self._y
        force, m, t0 = self.force, self.mass, self._t
        sq = (lambda v: v * v) if self.ndim is None else (lambda v: float(v @ v))   # |P|^2
        h = span / n if n else 0.0
        inside = ONE_SIDED * h
        # RK4 in plain floats in 1D (numpy's small arrays would cost more than the step's arithmetic),
        # in arrays of the axes in 2D/3D.  The force at a step's ends is taken just inside the step (its
        # one-sided limits): an envelope that switches on or off at a step's boundary (a constant field
        # with a duration) is then integrated as the propagator sees it, by its values within each step
        # (at the step's end itself RK4 would count the next step's value: measured 1.7e-4 of P)
        for i in range(n):
            ti = t0 + i * h
            f_start, f_mid, f_end = force(ti + inside), force(ti + h / 2), force(ti + h - inside)
            p2 = p + h / 2 * f_start        # the P of the stages k2, k3, k4
            p3 = p + h / 2 * f_mid
            p4 = p + h * f_mid
            alpha = alpha + h / 6 * (p + 2 * p2 + 2 * p3 + p4) / m
            phase += h / 6 * (sq(p) + 2 * sq(p2) + 2 * sq(p3) + sq(p4)) / (2 * m)
            p = p + h / 6 * (f_start + 4 * f_mid + f_end)   # a new value: the stored vector is not changed
        self._t, self._y = t, (p, alpha, phase)
        return self._y

    def in_job_units(self, t: float, conv: dict) -> dict:
        """The recorded values at ``t`` in the job's units (``conv``: the
        run's converters from atomic units)."""
        p, alpha, phase = self.at(t)
        return {"field_momentum": p * conv["momentum"], "field_excursion": alpha * conv["length"],
                "field_phase": float(phase)}
