"""Ground states of the Gross-Pitaevskii equation by imaginary time,
atomic units throughout.

The normalised gradient flow (Bao & Du, SIAM J. Sci. Comput. 25, 1674
(2004)) relaxes psi towards the lowest stationary state of

    H[psi] = T + V + g N |psi|^2,   sum |psi|^2 dV = 1,

by steps of exp(-tau H) followed by renormalisation to norm 1, split
symmetrically (Strang) into

* half a step of the potential part: the pointwise flow
  dpsi/dt = -(V - mu_n + g N |psi|^2) psi solved exactly (a Bernoulli
  equation in rho = |psi|^2:
  rho(t) = rho0 exp(-2 W t) / (1 + g N rho0 (1 - exp(-2 W t)) / W), W = V - mu_n),
  so each sub-step is the exact flow of its part and the composition is
  symmetric; mu_n, the current chemical potential, keeps the norm near 1
  within the step so that the density the nonlinear term sees is that of a
  normalised state;
* a full step of exp(-tau T) in the grid's transform space (FFT along
  periodic axes, DST-I along box axes);
* the other half step of the potential part, then renormalisation.

The fixed point of a step of size tau differs from the ground state by
O(tau^2) (the splitting error).  The relaxation is therefore run at step
sizes tau, tau/2, tau/4, ... (each started from the previous result); at
each size it stops when the remaining change of mu, extrapolated from the
geometric decay of its changes over windows of steps, is below a tenth of
the tolerance.  Two successive fixed points are combined by Richardson
extrapolation, psi_R = (4 psi(tau/2) - psi(tau)) / 3 (renormalised), which
cancels the tau^2 term; the result is accepted when mu(psi_R) of two
successive pairs agrees to the tolerance (relative).  mu is the
Gross-Pitaevskii chemical potential <T> + <V> + g N sum |psi|^4 dV of the
state (Pitaevskii & Stringari, Bose-Einstein Condensation, ch. 5).

The starting guess is the one of lowest Gross-Pitaevskii energy among the
linear ground state of the trap (eigen.eigenpairs), Gaussians centred on
it with a range of widths, and for g > 0 the Thomas-Fermi profile
rho = max(mu_TF - V, 0) / (g N) (its mu_TF fixing the norm).
"""
from __future__ import annotations

import math

import numpy as np

from .eigen import eigenpairs
from .errors import JobError

__all__ = ["ground_state", "chemical_potential", "gp_energy", "DEFAULT_TOLERANCE", "MAX_STEPS"]

DEFAULT_TOLERANCE = 1e-10
# the bound on imaginary-time steps over all step sizes before refusing
MAX_STEPS = 400_000
# halvings of the imaginary step before refusing
MAX_HALVINGS = 14
# steps between two readings of mu
WINDOW = 25


def _norm(psi, dv):
    return math.sqrt(float(np.sum(np.abs(psi) ** 2)) * dv)


def chemical_potential(hamiltonian, psi, potential) -> float:
    """mu = <T> + <V> + g N sum |psi|^4 dV (hartree) of a normalised real psi."""
    dv = hamiltonian.grid.cell_volume
    rho = psi * psi
    linear = float(np.sum(psi * hamiltonian.apply_static(psi, potential=potential))) * dv
    return linear + hamiltonian.contact * float(np.sum(rho * rho)) * dv


def gp_energy(hamiltonian, psi, potential) -> float:
    """E = <T> + <V> + (g N / 2) sum |psi|^4 dV (hartree) of a normalised real psi."""
    dv = hamiltonian.grid.cell_volume
    rho = psi * psi
    linear = float(np.sum(psi * hamiltonian.apply_static(psi, potential=potential))) * dv
    return linear + 0.5 * hamiltonian.contact * float(np.sum(rho * rho)) * dv


def _potential_flow_factors(w, t):
    """exp(-w t) and (1 - exp(-2 w t)) / w (its limit 2 t where w = 0): the
    pointwise flow of dpsi/dt = -(w + g N |psi|^2) psi over time t is
    psi exp(-w t) / sqrt(1 + g N |psi|^2 (1 - exp(-2 w t)) / w)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        growth = np.where(np.abs(w * t) > 1e-12, -np.expm1(-2.0 * w * t) / w, 2.0 * t)
    return np.exp(-w * t), growth


class _Stepper:
    """One step psi -> N[P(tau/2) exp(-tau T) P(tau/2) psi] (module notes)."""

    def __init__(self, hamiltonian, potential):
        self.h = hamiltonian
        self.v = potential
        self.dv = hamiltonian.grid.cell_volume
        self.gn = hamiltonian.contact
        self._key = None

    def prepare(self, tau, mu):
        if self._key != (tau, mu):
            self.kinetic_factor = np.exp(-tau * self.h.kinetic) if self._key is None or self._key[0] != tau \
                else self.kinetic_factor
            self.decay, self.growth = _potential_flow_factors(self.v - mu, 0.5 * tau)
            self._key = (tau, mu)

    def _potential(self, psi):
        if self.gn == 0.0:
            return psi * self.decay
        denominator = 1.0 + self.gn * (psi * psi) * self.growth
        if np.any(denominator <= 0.0):   # the focusing flow's finite-time blow-up: the step is too long
            return None
        return psi * self.decay / np.sqrt(denominator)

    def step(self, psi):
        psi = self._potential(psi)
        if psi is None:
            return None
        psi = self.h.apply_kinetic(psi, factor=self.kinetic_factor)
        psi = self._potential(psi)
        if psi is None:
            return None
        n = _norm(psi, self.dv)
        if not np.isfinite(n) or n <= 0:
            return None
        return psi / n


def _richardson(states):
    """The fixed points at tau, tau/2, tau/4 combined so that error terms in
    tau^2 and tau^3 cancel: first (4 f(tau/2) - f(tau)) / 3 per pair, then
    (8 R(tau/2) - R(tau)) / 7."""
    coarse = (4.0 * states[1] - states[0]) / 3.0
    fine = (4.0 * states[2] - states[1]) / 3.0
    return (8.0 * fine - coarse) / 7.0


def _guess(hamiltonian, potential, field):
    """The candidate start of lowest GP energy (see the module notes)."""
    grid = hamiltonian.grid
    dv = grid.cell_volume
    _, states = eigenpairs(hamiltonian, 1, t=0.0, field=field)
    linear = np.asarray(states[0], float)
    linear = linear / _norm(linear, dv)
    if float(np.sum(linear)) < 0:
        linear = -linear
    candidates = [linear]
    rho = linear * linear
    centres, widths = [], []
    for i in range(grid.ndim):
        c = grid.coordinate(i)
        mean = float(np.sum(rho * c)) * dv
        centres.append(mean)
        widths.append(math.sqrt(max(float(np.sum(rho * (c - mean) ** 2)) * dv, 0.0)))
    for scale in 2.0 ** (np.arange(-32, 5) / 4.0):
        g = np.ones(grid.shape)
        for i, ax in enumerate(grid.axes):
            s = max(scale * widths[i], ax.dx)
            g = g * np.exp(-((grid.coordinate(i) - centres[i]) ** 2) / (4 * s * s))
        if grid.radial:
            g = g * grid.coordinate(0)
        if np.isfinite(_norm(g, dv)) and _norm(g, dv) > 0:
            candidates.append(g / _norm(g, dv))
    gn = hamiltonian.contact
    if gn > 0:
        lo, hi = float(potential.min()), float(potential.min()) + 1.0
        def mass(mu):
            return float(np.sum(np.maximum(mu - potential, 0.0))) * dv / gn
        while mass(hi) < 1.0 and hi - lo < 1e12:
            hi = lo + 2 * (hi - lo)
        for _ in range(200):
            mid = 0.5 * (lo + hi)
            lo, hi = (mid, hi) if mass(mid) < 1.0 else (lo, mid)
        tf = np.sqrt(np.maximum(hi - potential, 0.0) / gn)
        if _norm(tf, dv) > 0:
            candidates.append(tf / _norm(tf, dv))
    energies = [gp_energy(hamiltonian, c, potential) for c in candidates]
    return candidates[int(np.argmin(energies))]


def _relax(stepper, psi, tau, mu, tolerance, budget, hamiltonian):
    """Steps of size tau until mu settles (see the module notes); returns
    (psi, mu, steps used, how it ended: "settled", "budget" or "blow-up")."""
    used = 0
    changes = []
    while used < budget:
        previous = mu
        stepper.prepare(tau, mu)
        for _ in range(WINDOW):   # mu, the shift of the potential part, read once a window
            stepped = stepper.step(psi)
            if stepped is None:
                return psi, mu, used, "blow-up"
            psi = stepped
        mu = chemical_potential(hamiltonian, psi, stepper.v)
        used += WINDOW
        changes.append(abs(mu - previous))
        scale = max(abs(mu), 1e-300)
        if changes[-1] <= 0.1 * ROUNDING_FLOOR * scale:
            # mu no longer moves but by its last bits: at a fixed point met exactly, the changes
            # alternate by one ulp, their ratio is 1, and the geometric estimate below never settles
            return psi, mu, used, "settled"
        if len(changes) >= 3:
            d1, d2 = changes[-2], changes[-1]
            ratio = d2 / d1 if d1 > 0 else 0.0
            remaining = d2 * ratio / (1 - ratio) if ratio < 0.95 else math.inf
            if d2 <= 0.1 * tolerance * scale and remaining <= 0.1 * tolerance * scale:
                return psi, mu, used, "settled"
    return psi, mu, used, "budget"


# mu is a sum over the grid in double precision: relative changes below this are rounding
# (measured: extrapolations at 1e-12 agree; a request of 1e-15 ran 4e5 steps, then refused).
ROUNDING_FLOOR = 1e-13


def ground_state(hamiltonian, tolerance: float = DEFAULT_TOLERANCE, field: str = "packet",
                 potential=None, guess=None, max_steps: int = MAX_STEPS, tolerance_field: str | None = None):
    """The ground state of the Gross-Pitaevskii Hamiltonian ``hamiltonian``
    (its linear part at t = 0, its ``contact`` g N) by imaginary time (see
    the module notes): ``(psi, mu_hartree, energy_hartree, info)``, psi real
    and normalised on the grid, mu converged to ``tolerance`` (relative),
    ``info`` the step sizes and steps taken.  A relaxation that does not
    settle within ``max_steps`` steps (all sizes together) or :data:`MAX_HALVINGS` halvings
    is refused (``JobError`` on ``tolerance_field``, by default ``field.tolerance``)."""
    tolerance_field = tolerance_field or f"{field}.tolerance"
    if not (0.0 < tolerance < 1.0):
        raise JobError(f"{field}.tolerance", f"must lie between 0 and 1 (relative), got {tolerance!r}")
    if tolerance < ROUNDING_FLOOR:
        # below double precision's reach mu can never settle: refused before 4e5 steps are spent
        raise JobError(f"{field}.tolerance", f"{tolerance:g} is below what double precision resolves in mu "
                                             f"(about {ROUNDING_FLOOR:g} relative); ask for {ROUNDING_FLOOR:g} or more")
    v = np.ascontiguousarray(np.broadcast_to(hamiltonian.real_potential(0.0) if potential is None
                                             else potential, hamiltonian.grid.shape), dtype=float)
    stepper = _Stepper(hamiltonian, v)
    psi = _guess(hamiltonian, v, field) if guess is None else np.asarray(guess, float)
    psi = psi / _norm(psi, stepper.dv)
    mu = chemical_potential(hamiltonian, psi, v)
    # the first step: half the inverse energy scale of the guess
    rho = psi * psi
    dv = stepper.dv
    kinetic = float(np.sum(psi * hamiltonian.apply_kinetic(psi))) * dv
    spread = float(np.sum(rho * np.abs(v - float(np.sum(rho * v)) * dv))) * dv
    interaction = abs(hamiltonian.contact) * float(np.sum(rho * rho)) * dv
    tau = 0.5 / max(kinetic + spread + interaction, 1e-300)
    budget = max_steps
    fixed = []          # (tau, psi, mu) of each step size's fixed point
    extrapolated = []   # mu of each Richardson pair
    for _ in range(MAX_HALVINGS + 1):
        start = psi
        psi, mu, used, ended = _relax(stepper, psi, tau, mu, tolerance, budget, hamiltonian)
        budget -= used
        if ended == "blow-up" and not fixed:   # the focusing flow outran the first step: a shorter one
            psi, mu = start, chemical_potential(hamiltonian, start, v)
            tau *= 0.5
            continue
        if ended != "settled":
            break
        fixed.append((tau, psi, mu))
        if len(fixed) >= 3:
            combined = _richardson([f[1] for f in fixed[-3:]])
            combined = combined / _norm(combined, dv)
            mu_r = chemical_potential(hamiltonian, combined, v)
            extrapolated.append(mu_r)
            if len(extrapolated) >= 2 and abs(mu_r - extrapolated[-2]) <= tolerance * abs(mu_r):
                info = {"steps": max_steps - budget, "tau": [f[0] for f in fixed],
                        "mu": [f[2] for f in fixed], "mu_extrapolated": extrapolated}
                return combined, mu_r, gp_energy(hamiltonian, combined, v), info
        tau *= 0.5
    raise JobError(tolerance_field, f"the imaginary-time relaxation did not reach mu to {tolerance:g} "
                                    f"(relative) within {max_steps} steps; ask for a looser tolerance "
                                    "or a finer grid")
