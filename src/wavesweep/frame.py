"""The free-falling frame: a grid that follows the classical trajectory of
the packet's centre under the job's uniform forces (atomic units).

A uniform force F(t) (gravity, a length-gauge driving field) enters H as
-F(t) . r.  With X(t) the classical trajectory, m X'' = F(t), X(0) = 0,
X'(0) = u0 (the initial packet's mean velocity), and u = X', the
accelerated-frame gauge transformation

    psi(r, t) = exp(i [m u(t) . r + theta(t)] / hbar) phi(r - X(t), t),
    theta(t) = -int_0^t m u(s)^2 / 2 ds,

turns  i hbar psi_t = [p^2/2m + V_rest(r, t) - F(t) . r] psi  into

    i hbar phi_t = [p^2/2m + V_rest(y + X(t), t)] phi,   y = r - X(t),

exactly: the terms linear in r cancel because m u' = F, and theta takes the
rest (Rosen & Zener's transformation; e.g. Cohen-Tannoudji, Diu & Laloe,
Quantum Mechanics, complement on the uniform field).  The grid's coordinate
is y, so a lab position is y + X(t) (``frame_offset``).  A packet falling a
metre costs no more than one at rest: phi keeps only the momentum spread of
the packet and what the rest of the potential gives it.

In the lab, the density is |phi(r - X)|^2 and the current is
J(r) = J_phi(r - X) + u(t) |phi(r - X)|^2; the mean momentum and energy
shift by m u and u . <p_phi> + m u^2/2 - F . <r>.  :class:`FrameView`
converts what the observer measures on the grid into those lab values.
"""
from __future__ import annotations

import math

import numpy as np

from .grid import FRAMES
from .potentials import PotentialTerm

__all__ = ["FRAMES", "FreeFallFrame", "LabTerm", "frame_terms"]


class FreeFallFrame:
    """The frame's trajectory: ``offset(t)`` X (bohr, one per grid axis),
    ``velocity(t)`` u = X' (bohr per atomic time unit), ``force(t)`` the
    summed uniform force F (hartree/bohr) and ``phase(t)`` theta/hbar (rad)
    of the gauge transformation, for ``0 <= t <= duration``.

    ``forces``: the uniform-force terms (each with
    :meth:`~wavesweep.potentials.PotentialTerm.force_at`); ``velocity0``
    u0 per axis.  Time-independent forces are integrated in closed form;
    time-dependent ones (a pulse) by an explicit Runge-Kutta method of
    order 8 (DOP853; Hairer, Norsett & Wanner, Solving ODEs I, 1993) at a
    relative tolerance of 1e-12, its dense output read at each kick."""

    def __init__(self, forces, mass: float, velocity0, ndim: int, duration: float):
        self.mass = float(mass)
        self.ndim = int(ndim)
        self.velocity0 = np.asarray(velocity0, float).reshape(self.ndim)
        self.duration = float(duration)
        self.terms = list(forces)
        self.constant = not any(term.time_dependent for term in self.terms)
        if self.constant:
            self._acceleration = self._force_sum(0.0) / self.mass
            self._dense = None
        else:
            self._acceleration = None
            self._dense = self._integrate()

    def _force_sum(self, t: float) -> np.ndarray:
        total = np.zeros(self.ndim)
        for term in self.terms:
            total += term.force_at(t)
        return total

    def _integrate(self):
        """X, u and theta/hbar as one ODE, dense output over the run."""
        from scipy.integrate import solve_ivp   # lazy: only a time-dependent uniform force needs it
        nd, m = self.ndim, self.mass

        def rhs(t, y):
            u = y[nd:2 * nd]
            return np.concatenate([u, self._force_sum(t) / m, [-0.5 * m * float(u @ u)]])

        # the step must see every carrier cycle and envelope ramp: at most a
        # fortieth of the shortest time scale of the terms
        scales = [self.duration]
        for term in self.terms:
            omega = float(term.p.get("omega") or 0.0)
            if omega > 0:
                scales.append(2 * math.pi / omega)
            for key in ("duration", "ramp", "fwhm"):
                if term.p.get(key):
                    scales.append(float(term.p[key]))
        y0 = np.concatenate([np.zeros(nd), self.velocity0, [0.0]])
        end = max(self.duration, 1e-300)
        sol = solve_ivp(rhs, (0.0, end), y0, method="DOP853", rtol=1e-12, atol=1e-15,
                        max_step=min(scales) / 40, dense_output=True)
        if not sol.success:   # cannot happen for a bounded force; say so if it does
            raise RuntimeError(f"the free-fall frame's trajectory could not be integrated: {sol.message}")
        return sol.sol

    def offset(self, t: float) -> np.ndarray:
        """X(t) (bohr, per axis): lab position = grid coordinate + X(t)."""
        if self._dense is None:
            return self.velocity0 * t + 0.5 * self._acceleration * t * t
        return np.asarray(self._dense(t)[:self.ndim], float)

    def velocity(self, t: float) -> np.ndarray:
        """u(t) = X'(t) (bohr per atomic time unit, per axis)."""
        if self._dense is None:
            return self.velocity0 + self._acceleration * t
        return np.asarray(self._dense(t)[self.ndim:2 * self.ndim], float)

    def force(self, t: float) -> np.ndarray:
        """F(t) (hartree/bohr, per axis): the uniform forces the frame removes."""
        return self._force_sum(t) if self._dense is not None else self._acceleration * self.mass

    def phase(self, t: float) -> float:
        """theta(t)/hbar = -int_0^t m u^2/2 ds (rad)."""
        if self._dense is None:
            u0, a = self.velocity0, self._acceleration
            return float(-0.5 * self.mass * (u0 @ u0 * t + u0 @ a * t * t + a @ a * t ** 3 / 3.0))
        return float(self._dense(t)[2 * self.ndim])

    def lab_phase(self, grid, t: float) -> np.ndarray:
        """exp(i [m u . r_lab + theta]) on the grid (broadcastable), r_lab =
        y + X(t): the factor that turns phi on the grid into the lab psi at
        the lab positions the grid points occupy."""
        u, x_off = self.velocity(t), self.offset(t)
        phase = self.phase(t)
        out = np.asarray(np.exp(1j * phase))
        for i, ax in enumerate(grid.axes):
            if u[i] == 0.0:
                continue
            shape = [1] * grid.ndim
            shape[i] = ax.points
            out = out * np.exp(1j * self.mass * u[i] * (ax.coordinates + x_off[i])).reshape(shape)
        return out

    def covered(self, grid, axis: int, lab_position: float, t: float) -> float | None:
        """The grid coordinate of a lab position along ``axis`` at time t,
        or None while the grid does not reach it (outside its walls, or
        beyond the last point of a periodic axis)."""
        ax = grid.axes[axis]
        y = lab_position - float(self.offset(t)[axis])
        return y if ax.min < y < ax.max else None


class LabTerm(PotentialTerm):
    """A potential term fixed in the lab, seen from the frame: V(y + X(t), t)
    on the grid's coordinates y (time-dependent on the grid even when the
    term is static in the lab; evaluated in full at every kick)."""

    time_dependent = True

    def __init__(self, term: PotentialTerm, frame: FreeFallFrame):
        self.inner = term
        self.frame = frame
        self.kind = term.kind
        self.p = term.p
        self.ctx = term.ctx

    def _shifted(self, mesh, t):
        x_off = self.frame.offset(t)
        return {name: mesh[name] + x_off[i] for i, name in enumerate(self.ctx.grid.names)}

    def at_time(self, mesh, t):
        return self.inner.at_time(self._shifted(mesh, t), t)

    def static(self, mesh):
        return self.at_time(mesh, 0.0)


def frame_terms(terms, frame: FreeFallFrame) -> list:
    """The terms the grid's Hamiltonian keeps in the frame: the uniform
    forces go (the frame removes them), the rest are seen at lab positions."""
    return [LabTerm(term, frame) for term in terms if not term.uniform_force]
