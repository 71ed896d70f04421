"""Adequacy findings: the shared vocabulary of ``check``, ``run``, ``submit``
and the analysis commands.

A :class:`Finding` is one judgement of a setting against the physics of the
run (``topic``, ``level`` ok|warn|error, the job ``field`` to change, a
one-line ``message`` with numbers in the job's units, and ``values`` for
scripts); a :class:`Report` is the list of them for one job or study.
"""
from __future__ import annotations

import copy
import dataclasses
import hashlib
import json
import math
import os
import re
import threading
import time as _time
import weakref
from dataclasses import dataclass, field

import numpy as np

from .absorbers.layers import face_names
from .absorbers.tuning import cap_profile, layer_scattering, return_probability
from .eigen import DENSE_MAX_POINTS
from .errors import JobError
from .fft import wisdom_path
from .hamiltonian import split_time_dependent
from .io.atomic import write_text_atomic
from .marginals import momentum_marginal
from .propagators import DEFAULT_SCHEME, scheme_class
from .propagators.split_operator import RADIAL_DENSE_MAX
from .states import PACKETS, central_momenta, momentum_spread

__all__ = ["Finding", "Report"]


@dataclass
class Finding:
    """One judgement: ``level`` is "ok", "warn" or "error"; ``field`` the
    dotted job key whose change fixes it (``"grid.x.points"``)."""

    topic: str
    level: str        # "ok", "warn", "error"
    message: str
    values: dict = field(default_factory=dict)
    field: str = ""   # the job field to change, for an error ("packet.center")


@dataclass
class Report:
    """The findings of one job; ``text()`` for people, ``as_dict()`` for
    ``check --json`` (``{title, findings: [{topic, level, field, message,
    values}]}``)."""

    title: str
    findings: list

    @property
    def errors(self):
        return [f for f in self.findings if f.level == "error"]

    def text(self) -> str:
        mark = {"ok": "  ok ", "warn": "WARN ", "error": "ERROR"}
        lines = [f"check: {self.title}"]
        lines += [f"{mark[f.level]} {f.topic:<10} {f.message}" for f in self.findings]
        n_w = sum(f.level == "warn" for f in self.findings)
        lines.append(f"{len(self.errors)} error(s), {n_w} warning(s)")
        return "\n".join(lines)

    def as_dict(self) -> dict:
        """Plain JSON-ready data (numpy numbers as Python ones, non-finite as None)."""
        return _plain({"title": self.title, "findings": [dict(f.__dict__) for f in self.findings]})


def _plain(obj):
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return float(obj) if math.isfinite(obj) else None
    return obj


# ---------------------------------------------------------------------------
# The initial state as a phase-space ensemble
# ---------------------------------------------------------------------------
# One-sided tail weights of a Gaussian beyond 6 and 3 standard deviations,
# (1/2) erfc(n / sqrt 2): what |p0| + 6 sigma_p and |p0| + 3 sigma_p leave
# out of a Gaussian packet's momenta, the quantiles a measured state's
# momenta are read at (closed form; 9.9e-10 and 1.3e-3).
TAIL_6 = 0.5 * math.erfc(6.0 / math.sqrt(2.0))
TAIL_3 = 0.5 * math.erfc(3.0 / math.sqrt(2.0))


def gaussian_parts(packet) -> list:
    """The Gaussian packets a packet table (atomic units) is made of
    (:meth:`~wavesweep.states.PacketKind.gaussian_parts` of its kind)."""
    return PACKETS[packet["kind"]].gaussian_parts(packet)


def all_gaussian(packet) -> bool:
    """Whether the packet is Gaussian parts only (its momenta are then known in closed form)."""
    return PACKETS[packet["kind"]].all_gaussian(packet)


def _upper_quantile(k, weight, tail):
    """The k above which ``tail`` of the weight lies, each bin's weight
    spread evenly over its width (k ascending, evenly spaced)."""
    dk = float(k[1] - k[0]) if k.size > 1 else 0.0
    above = np.concatenate([np.cumsum(weight[::-1])[::-1][1:], [0.0]])   # weight above bin j
    j = int(np.nonzero(above <= tail)[0][0])
    inside = (tail - above[j]) / weight[j] if weight[j] > 0 else 0.0
    return float(k[j] + 0.5 * dk - min(inside, 1.0) * dk)


def measured_momentum_reach(psi, grid, tail):
    """Per axis, the largest |p| (atomic units) of a state up to a one-sided
    ``tail`` of its momentum distribution on either side: for a Gaussian
    packet |p0| + n sigma_p with tail = (1/2) erfc(n / sqrt 2), to within
    the grid's dk."""
    out = []
    for i, ax in enumerate(grid.axes):
        k, w = momentum_marginal(psi, grid, i)
        hi = _upper_quantile(k, w, tail)
        lo = -_upper_quantile(-k[::-1], w[::-1], tail) if ax.boundary == "periodic" else 0.0
        out.append(max(abs(hi), abs(lo)))
    return out


@dataclass
class Moments:
    """Centre and spread of one Gaussian (or Gaussian-like) part, per axis,
    atomic units: x0, sigma_x, p0, sigma_p."""

    x0: np.ndarray
    sigma_x: np.ndarray
    p0: np.ndarray
    sigma_p: np.ndarray


def packet_moments(setup) -> list[Moments]:
    """Closed-form moments of each Gaussian part, or the measured moments of
    the actual initial state (eigenstates, files, mixed superpositions):
    <x>, std x from |psi0|^2 and <p>, std p from the momentum marginal."""

    grid = setup.grid
    ensemble = getattr(setup, "ensemble", None)
    if ensemble is not None:   # a coupled surface's view (:class:`SurfaceView`): its energy-shifted ensemble
        return list(ensemble)
    if all_gaussian(setup.packet):
        out = []
        for part in gaussian_parts(setup.packet):
            p0 = central_momenta(part, setup.mass, grid.ndim, "packet")
            w = np.asarray(part["width"], float)
            out.append(Moments(np.asarray(part["center"], float), w, np.asarray(p0, float),
                               np.array([momentum_spread(v) for v in w])))
        return out
    dens = np.abs(setup.psi0) ** 2
    dens = dens / dens.sum()
    x0, sx, p0, sp = [], [], [], []
    for i, ax in enumerate(grid.axes):
        other = tuple(j for j in range(grid.ndim) if j != i)
        line = np.sum(dens, axis=other) if other else dens
        x = ax.coordinates
        m = float(np.sum(line * x))
        x0.append(m)
        sx.append(math.sqrt(max(float(np.sum(line * (x - m) ** 2)), 0.0)) or ax.dx)
        k, w = momentum_marginal(setup.psi0, grid, i)
        # a box axis holds standing waves: +k and -k alike, mean 0; the spread
        # is read from the tail (the k beyond which TAIL_6 lies), so that
        # p0 +/- 6 sigma_p spans what the state holds to that tail
        mp = float(np.sum(w * k)) if ax.boundary == "periodic" else 0.0
        p0.append(mp)
        reach = measured_momentum_reach(setup.psi0, grid, TAIL_6)[i]
        sp.append(max(reach - abs(mp), 0.0) / 6.0 or 2 * math.pi / ax.length)
    return [Moments(np.array(x0), np.array(sx), np.array(p0), np.array(sp))]


def _stencil(mom: Moments, n_sigma: float, rng, n_random: int):
    """Starting points (positions, momenta), shapes (n, ndim): the centre, each
    axis at +/- 3 sigma_x combined with 0, +/- n_sigma sigma_p, and Wigner
    samples of the Gaussian (position and momentum independent)."""
    nd = mom.x0.size
    xs, ps = [], []
    for i in range(nd):
        for a in (-3.0, 0.0, 3.0):
            for b in (-n_sigma, 0.0, n_sigma):
                x = mom.x0.copy()
                p = mom.p0.copy()
                x[i] += a * mom.sigma_x[i]
                p[i] += b * mom.sigma_p[i]
                xs.append(x)
                ps.append(p)
    if n_random:
        xs.extend(mom.x0 + mom.sigma_x * rng.standard_normal((n_random, nd)))
        ps.extend(mom.p0 + mom.sigma_p * rng.standard_normal((n_random, nd)))
    return np.array(xs), np.array(ps)


# ---------------------------------------------------------------------------
# Classical trajectories under the job's V(r, t)
# ---------------------------------------------------------------------------
def interpolate_on_grid(values, grid, points) -> np.ndarray:
    """Multilinear interpolation of ``values`` (the grid's shape, or
    broadcastable to it: axes of length 1 are constant along them) at
    ``points`` (n, ndim), atomic units.  Periodic axes wrap; on box axes a
    point beyond the outermost grid point takes that point's value."""
    values = np.asarray(values, float)
    n = points.shape[0]
    idx, frac = [], []
    for i, ax in enumerate(grid.axes):
        if values.ndim <= i or values.shape[i] == 1:
            idx.append(None)
            frac.append(None)
            continue
        x0 = ax.coordinates[0]
        u = (points[:, i] - x0) / ax.dx
        if ax.boundary == "periodic":
            lo = np.floor(u)
            f = u - lo
            lo = lo.astype(np.int64) % ax.points
            hi = (lo + 1) % ax.points
        else:
            u = np.clip(u, 0.0, ax.points - 1.0)
            lo = np.minimum(np.floor(u).astype(np.int64), ax.points - 2)
            f = u - lo
            hi = lo + 1
        idx.append((lo, hi))
        frac.append(f)
    out = np.zeros(n)
    for corner in range(2 ** grid.ndim):
        weight = np.ones(n)
        index = []
        for i in range(grid.ndim):
            if idx[i] is None:
                index.append(np.zeros(n, np.int64))
                continue
            upper = (corner >> i) & 1
            index.append(idx[i][upper])
            weight = weight * (frac[i] if upper else 1.0 - frac[i])
        if values.ndim < grid.ndim:
            values = values.reshape(values.shape + (1,) * (grid.ndim - values.ndim))
        out += weight * values[tuple(index)]
    return out


class ForceField:
    """-grad V(r, t) at arbitrary points (hartree/bohr): the static V of the
    grid and the separable terms' g(r) interpolated multilinearly, gradients
    by central differences over one grid step; general V(r, t) terms
    evaluated at the points themselves (or, for a term that only works on
    the grid, on the grid at that time)."""

    def __init__(self, setup):
        self.grid = setup.grid
        self.v_static = setup.hamiltonian_static_potential()
        self.separable, self.general = split_time_dependent(setup.terms, self.grid.mesh())
        self.h = np.array([ax.dx for ax in self.grid.axes])
        # gradients on the grid, made once: one interpolation per axis and
        # step instead of two (kept to grids whose gradients fit in ~64 MiB)
        self.grad_static = None
        if self.grid.size * self.grid.ndim <= 2**23:
            self.grad_static = [_gradient(self.v_static, self.grid, i) for i in range(self.grid.ndim)]
        self.grad_separable = [([_gradient(g, self.grid, i) for i in range(self.grid.ndim)], f)
                               for g, f in self.separable]

    @property
    def time_dependent(self) -> bool:
        return bool(self.separable or self.general)

    def potential(self, points, t: float) -> np.ndarray:
        """V(points, t) in hartree."""
        v = interpolate_on_grid(self.v_static, self.grid, points)
        for g, f in self.separable:
            v = v + f(t) * interpolate_on_grid(g, self.grid, points)
        for term in self.general:
            mesh = {name: points[:, i] for i, name in enumerate(self.grid.names)}
            try:
                v = v + np.broadcast_to(term.at_time(mesh, t), v.shape)
            except Exception:   # a term that only evaluates on its grid
                v = v + interpolate_on_grid(term.at_time(self.grid.mesh(), t), self.grid, points)
        return v

    def force(self, points, t: float) -> np.ndarray:
        """-grad V (n, ndim), hartree/bohr."""
        out = np.zeros_like(points)
        for i in range(self.grid.ndim):
            if self.grad_static is not None:
                out[:, i] -= interpolate_on_grid(self.grad_static[i], self.grid, points)
            for grads, f in self.grad_separable:
                out[:, i] -= f(t) * interpolate_on_grid(grads[i], self.grid, points)
            if self.grad_static is None or self.general:
                step = np.zeros(self.grid.ndim)
                step[i] = self.h[i]
                rest = self._rest if self.grad_static is not None else self.potential
                out[:, i] -= (rest(points + step, t) - rest(points - step, t)) / (2 * self.h[i])
        return out

    def _rest(self, points, t):
        """The general V(r, t) terms alone (the others have gradients on the grid)."""
        v = np.zeros(points.shape[0])
        for term in self.general:
            mesh = {name: points[:, i] for i, name in enumerate(self.grid.names)}
            try:
                v = v + np.broadcast_to(term.at_time(mesh, t), v.shape)
            except (ArithmeticError, ValueError):
                raise
            except Exception:   # a term that only evaluates on its grid
                v = v + interpolate_on_grid(term.at_time(self.grid.mesh(), t), self.grid, points)
        return v


def _gradient(values, grid, i) -> np.ndarray:
    """d values / d x_i by central differences (periodic axes wrap; box axes
    one-sided at the ends); an axis of length 1 (constant along it) gives 0."""
    values = np.asarray(values, float)
    if values.ndim <= i or values.shape[i] == 1:
        return np.zeros((1,) * grid.ndim)
    ax = grid.axes[i]
    if ax.boundary == "periodic":
        return (np.roll(values, -1, axis=i) - np.roll(values, 1, axis=i)) / (2 * ax.dx)
    return np.gradient(values, ax.dx, axis=i)


@dataclass
class Reach:
    """What classical trajectories of the initial phase-space ensemble do
    over the run (atomic units).

    ``momentum`` per axis: the largest |p_i| over the run of any
    trajectory (the stencil reaches 6 sigma_p); ``centre``: that of the
    packet's centre (x0, p0); ``sampled``: per Wigner sample (equal
    weights) and axis, its largest |p_i|, so that the share of the state
    beyond a momentum can be estimated; ``arrivals[face]``: (slow end,
    largest) kinetic energy of the motion normal to the face with which
    trajectories enter its absorbing layer, the slow end the 5th percentile
    of the Wigner samples' (the slowest tail trajectory's if only tails
    arrived; absent: none arrived); ``visited``: per axis (lowest, highest)
    coordinate the trajectories reached outside the layers (bohr);
    ``edges_reached``: per axis, whether a trajectory reached a grid edge
    (wrapping round a periodic axis, or reflecting off a box wall);
    ``time_steps``: classical steps taken."""

    momentum: np.ndarray
    centre: np.ndarray
    sampled: np.ndarray
    arrivals: dict
    visited: list
    edges_reached: list
    time_steps: int


# Classical steps are limited to this many per run: 4000 velocity-Verlet
# steps of ~100 trajectories cost ~0.2 s; a uniform force is integrated
# exactly at any step, and a sharp feature is crossed in steps of at most
# half a grid step once the step limit allows (common practice: resolve
# the force's length scale).
MAX_CLASSICAL_STEPS = 4000


def classical_reach(setup, n_random: int = 96, seed: int = 1, compiled: bool = True) -> Reach | None:
    """Classical trajectories (velocity Verlet) of the initial state's
    phase-space ensemble under the job's V(r, t) over ``evolve.duration``:
    the momenta they reach and the energies with which they enter each
    absorbing layer.  A trajectory ends where it enters a layer; box walls
    reflect it, periodic axes without layers wrap it.  The ensemble of each
    Gaussian part is its Wigner function (Gaussian in x and p, exactly) at
    a stencil of +/- 3 sigma_x and +/- 3, 6 sigma_p plus random samples;
    other states use their measured moments.  None on a radial grid (the
    Coulomb singularity has no classical momentum bound).  A static V whose
    force tables fit (ForceField.grad_static) runs the compiled loop
    (``compiled=False``: this array version, the same steps)."""
    grid = setup.grid
    if grid.radial:
        return None
    force = ForceField(setup)
    rng = np.random.default_rng(seed)
    moms = packet_moments(setup)
    xs = [np.array([mo.x0 for mo in moms])]          # the centres first
    ps = [np.array([mo.p0 for mo in moms])]
    rnd = [np.zeros(len(moms), bool)]
    for mom in moms:
        x, p = _stencil(mom, 6.0, rng, 0)
        xs.append(x)
        ps.append(p)
        rnd.append(np.zeros(len(x), bool))
        xr = mom.x0 + mom.sigma_x * rng.standard_normal((max(1, n_random // len(moms)), mom.x0.size))
        pr = mom.p0 + mom.sigma_p * rng.standard_normal(xr.shape)
        xs.append(xr)
        ps.append(pr)
        rnd.append(np.ones(len(xr), bool))
    x, p, random = np.concatenate(xs), np.concatenate(ps), np.concatenate(rnd)
    m = setup.mass
    layers = _layer_bounds(setup)
    alive = ~_inside_layers(x, layers)
    peak = np.abs(p)                       # per trajectory, the largest |p_i| so far
    static = not force.time_dependent
    if static:   # energy is conserved: keep it so (a sharp wall's force spike would pump it)
        energy = np.sum(p**2, axis=1) / (2 * m) + force.potential(x, 0.0)
    arrivals: dict = {}
    duration = setup.duration
    dx_min = min(ax.dx for ax in grid.axes)
    omega = _fastest_carrier(setup)
    t, steps = 0.0, 0
    try:
        f = force.force(x, 0.0)
    except (ArithmeticError, ValueError):
        return None
    lo_seen, hi_seen = x.min(axis=0), x.max(axis=0)
    edges_reached = [False] * grid.ndim
    if compiled and static and force.grad_static is not None:   # the same loop compiled (kernels.classical)
        return _static_reach(setup, force, x, p, energy, random, layers, omega, lo_seen, hi_seen, f)
    while t < duration and alive.any() and steps < 4 * MAX_CLASSICAL_STEPS:
        v_max = float(np.abs(p[alive]).max()) / m if alive.any() else 0.0
        a_max = float(np.abs(f[alive]).max()) / m if alive.any() else 0.0
        # a time-dependent V is sampled at least MAX_CLASSICAL_STEPS times; a
        # static one only as the grid and the force require (a free packet
        # crossing a cell per step needs no more: 1000 steps cost 0.15 s of
        # every point a study submits)
        tau = duration / MAX_CLASSICAL_STEPS if not static else duration
        limit = dx_min / max(v_max, 1e-300)     # the force is linear between grid points
        if a_max > 0:
            limit = min(limit, math.sqrt(dx_min / a_max))
        if omega > 0:
            limit = min(limit, 2 * math.pi / omega / 32)
        tau = max(min(tau, limit), duration / (4 * MAX_CLASSICAL_STEPS))
        tau = min(tau, duration - t)
        p_half = p + 0.5 * tau * f
        x_new = x + tau * p_half / m
        for i, ax in enumerate(grid.axes):   # which edges the ensemble reaches
            crossing = alive & ((x_new[:, i] >= ax.max) | (x_new[:, i] < ax.min))
            edges_reached[i] = edges_reached[i] or bool(crossing.any())
        x_new, p_half = _walls(x_new, p_half, grid, layers)
        try:
            f_new = force.force(x_new, t + tau)
        except (ArithmeticError, ValueError):   # V(r, t) itself fails there (JobError included):
            break                               # the run will say so; judge what came before
        p_new = p_half + 0.5 * tau * f_new
        if static:
            allowed = np.maximum(energy - force.potential(x_new, 0.0), 0.0)
            kinetic = np.sum(p_new**2, axis=1) / (2 * m)
            scale = np.where(kinetic > allowed, np.sqrt(allowed / np.maximum(kinetic, 1e-300)), 1.0)
            p_new = p_new * scale[:, None]
        x = np.where(alive[:, None], x_new, x)
        p = np.where(alive[:, None], p_new, p)
        f = np.where(alive[:, None], f_new, f)
        t += tau
        steps += 1
        peak = np.where(alive[:, None], np.maximum(peak, np.abs(p)), peak)
        entered = alive & _inside_layers(x, layers)
        kept = alive & ~entered
        if kept.any():
            lo_seen = np.minimum(lo_seen, x[kept].min(axis=0))
            hi_seen = np.maximum(hi_seen, x[kept].max(axis=0))
        if entered.any():
            for face, (i, side, edge) in layers.items():
                hit = entered & ((x[:, i] > edge) if side == "+" else (x[:, i] < edge))
                if hit.any():
                    e = p[hit, i] ** 2 / (2 * m)
                    got = arrivals.setdefault(face, {"weighted": [], "hi": 0.0, "lo": math.inf})
                    got["hi"] = max(got["hi"], float(e.max()))
                    got["lo"] = min(got["lo"], float(e.min()))
                    got["weighted"].extend(e[random[hit]].tolist())
            alive &= ~entered
    sampled = peak[random]
    # the slow end from the Wigner samples (equal weights): its 5th percentile,
    # so that a grazing tail trajectory does not set it; the fast end from all
    # (only tail trajectories arrived: the slowest of them)
    arrivals = {face: (float(np.percentile(got["weighted"], 5)) if got["weighted"] else got["lo"], got["hi"])
                for face, got in arrivals.items()}
    return Reach(peak.max(axis=0), peak[0], sampled, arrivals, list(zip(lo_seen, hi_seen)), edges_reached,
                 steps)


def _static_reach(setup, force, x, p, energy, random, layers, omega, lo_seen, hi_seen, f) -> Reach:
    """:func:`classical_reach`'s loop for a static V, run by the compiled
    kernel (:func:`wavesweep.kernels.classical.static_reach`: the same
    steps and arithmetic, ~70 ms of numpy calls a run before)."""
    from .kernels.classical import static_reach   # lazy: numba loads with the first set-up that needs it
    grid, m, nd = setup.grid, setup.mass, setup.grid.ndim
    pad = (1,) * (3 - nd)

    def padded(a):
        return np.ascontiguousarray(np.broadcast_to(np.asarray(a, float), grid.shape).reshape(grid.shape + pad))

    grads = np.stack([padded(g) for g in force.grad_static])
    axes = grid.axes
    faces = list(layers.items())
    layer_axis = np.array([i for _, (i, _, _) in faces], np.int64)
    layer_side = np.array([1 if side == "+" else -1 for _, (_, side, _) in faces], np.int64)
    layer_edge = np.array([edge for _, (_, _, edge) in faces], float)
    x, p, f = (np.ascontiguousarray(a, dtype=float) for a in (x, p, f))
    alive = ~_inside_layers(x, layers)
    peak = np.abs(p)
    entry = np.zeros_like(p)
    entry_step = np.zeros(len(x), np.int64)
    hit = np.zeros(len(x), np.int64)
    lo_seen, hi_seen = np.array(lo_seen, float), np.array(hi_seen, float)
    edges = np.zeros(nd, np.bool_)
    steps = static_reach(
        x, p, np.ascontiguousarray(energy, dtype=float), float(m), padded(force.v_static)[None], grads,
        np.array([a.coordinates[0] for a in axes], float), np.array([a.dx for a in axes], float),
        np.array([a.points for a in axes], np.int64), np.array([a.boundary == "periodic" for a in axes]),
        np.array([a.min for a in axes], float), np.array([a.max for a in axes], float),
        np.array([a.length for a in axes], float), layer_axis, layer_side, layer_edge,
        float(setup.duration), float(min(a.dx for a in axes)), float(omega), float(4 * MAX_CLASSICAL_STEPS),
        4 * MAX_CLASSICAL_STEPS, alive, peak, f, entry, entry_step, hit, lo_seen, hi_seen, edges)
    found = []
    for n, (face, (i, _, _)) in enumerate(faces):
        took = (hit >> n) & 1 == 1
        if took.any():
            e = entry[took, i] ** 2 / (2 * m)
            weighted = e[random[took]]
            # as classical_reach: the slow end the Wigner samples' 5th percentile, else the slowest tail's
            found.append((int(entry_step[took].min()), n, face,
                          (float(np.percentile(weighted, 5)) if weighted.size else float(e.min()), float(e.max()))))
    # in the order the faces were first reached (the array loop's order), faces reached at one step in layer order
    arrivals = {face: window for _, _, face, window in sorted(found)}
    return Reach(peak.max(axis=0), peak[0], peak[random], arrivals, list(zip(lo_seen, hi_seen)),
                 [bool(b) for b in edges], int(steps))


def _fastest_carrier(setup) -> float:
    """The largest carrier angular frequency of the job's driving terms (a.u.), 0 if none."""
    out = 0.0
    for term in setup.terms:
        # a lab term seen from a falling grid varies only as the grid moves: no carrier of its own
        own = getattr(term, "inner", term)
        if own.time_dependent:
            out = max(out, float(own.p.get("omega") or 0.0))
    return out


def _layer_bounds(setup) -> dict:
    """face -> (axis, side, inner edge of its layer) in bohr."""
    table = setup.job.table.get("absorber") or {}
    if table.get("kind", "none") == "none":
        return {}
    th = setup.units.to_atomic(table["thickness"], "length")
    out = {}
    for face in table.get("faces") or face_names(setup.grid):
        i = setup.grid.axis_index(face[:-1])
        ax = setup.grid.axes[i]
        out[face] = (i, face[-1], ax.max - th if face[-1] == "+" else ax.min + th)
    return out


def _inside_layers(x, layers) -> np.ndarray:
    inside = np.zeros(x.shape[0], bool)
    for i, side, edge in layers.values():
        inside |= (x[:, i] > edge) if side == "+" else (x[:, i] < edge)
    return inside


def _walls(x, p, grid, layers):
    """Box axes reflect at their walls; periodic axes wrap (a layer, if any,
    ends the trajectory before)."""
    for i, ax in enumerate(grid.axes):
        if ax.boundary == "periodic":
            x[:, i] = ax.min + np.mod(x[:, i] - ax.min, ax.length)
        else:
            over = x[:, i] > ax.max
            under = x[:, i] < ax.min
            x[over, i] = 2 * ax.max - x[over, i]
            x[under, i] = 2 * ax.min - x[under, i]
            p[over | under, i] *= -1.0
    return x, p


# ---------------------------------------------------------------------------
# Electrons freed by a driving field: the simple-man model
# ---------------------------------------------------------------------------
def field_driven_momentum(setup, n_times: int | None = None) -> dict:
    """Per axis index, the largest |p| (a.u.) that an electron set free at
    rest at any time of the run reaches in the job's spatially uniform
    time-dependent forces alone: directly, |A(t) - A(t0)|, or after one
    elastic backscattering where it returns to its birth point at t_r,
    |A(t) - 2 A(t_r) + A(t0)|, with A(t) = int F dt (the simple-man model:
    Corkum, Phys. Rev. Lett. 71, 1994 (1993); backscattered electrons up to
    10 U_p: Paulus et al., J. Phys. B 27, L703 (1994)).  Only terms whose
    g(r) is linear along one axis (a uniform force) count; {} if none."""
    grid = setup.grid
    forces = {}
    for term in setup.terms:
        if not term.time_dependent or term.separable() is None:
            continue
        g_fun, f = term.separable()
        g = np.asarray(g_fun(grid.mesh()), float)
        for i, ax in enumerate(grid.axes):
            if g.ndim <= i or g.shape[i] == 1 or g.size != ax.points:
                continue
            slope = np.polyfit(ax.coordinates, g.reshape(-1), 1)[0]
            if np.allclose(g.reshape(-1), slope * ax.coordinates + (g.reshape(-1)[0] - slope * ax.coordinates[0]),
                           rtol=1e-9, atol=1e-12 * max(1.0, float(np.abs(g).max()))):
                forces.setdefault(i, []).append((-slope, f))
    if not forces:
        return {}
    if n_times is None:   # 64 samples per carrier period (4000 at least, 200000 at most)
        cycles = _fastest_carrier(setup) * setup.duration / (2 * math.pi)
        n_times = int(min(max(4000, 64 * cycles), 200_000))
    t = np.linspace(0.0, setup.duration, n_times)
    out = {}
    for i, parts in forces.items():
        F = sum(c * np.array([f(s) for s in t]) for c, f in parts)
        A = np.concatenate([[0.0], np.cumsum(0.5 * (F[1:] + F[:-1]) * np.diff(t))])   # momentum gained
        S = np.concatenate([[0.0], np.cumsum(0.5 * (A[1:] + A[:-1]) * np.diff(t))])   # its integral
        a_max_after = np.maximum.accumulate(A[::-1])[::-1]
        a_min_after = np.minimum.accumulate(A[::-1])[::-1]
        best = 0.0
        for j in range(0, n_times - 1, max(1, n_times // 400)):
            direct = max(abs(a_max_after[j] - A[j]), abs(a_min_after[j] - A[j]))
            best = max(best, direct)
            # excursion m x(t) = S(t) - S(t0) - A(t0)(t - t0); returns where it changes sign
            exc = S[j:] - S[j] - A[j] * (t[j:] - t[j])
            sign = np.sign(exc[1:])
            back = np.nonzero(sign[1:] * sign[:-1] < 0)[0] + 2 + j
            for r in back[:8]:
                c = 2 * A[r] - A[j]
                best = max(best, abs(a_max_after[r] - c), abs(a_min_after[r] - c))
        out[i] = best
    return out


# ---------------------------------------------------------------------------
# What the run does: momenta reached, energies arriving at each face
# ---------------------------------------------------------------------------
@dataclass
class Dynamics:
    """The physics of the whole run as adequacy criteria need it (atomic
    units): per axis the momentum reach of the initial state (``initial``)
    and over the run (``over_run``), each as {3: ..., 6: ...} (the 3 and
    6 sigma_p tiers); ``freed``: axis -> simple-man momentum of electrons a
    field can free from a bound state; ``windows``: face -> (e_lo, e_hi)
    kinetic energy normal to the face that arrives in its layer;
    ``nonseparable``: V couples the axes (scattering can turn momentum
    from one axis into another)."""

    initial: dict
    over_run: dict     # {6: per axis, largest |p_i| over the run; 3: the initial 3-sigma reach}
    reach: Reach | None
    freed: dict
    windows: dict
    nonseparable: bool
    bound: bool
    unreached: set = field(default_factory=set)   # faces nothing of the packet reaches in the run


def _initial_reach(setup) -> dict:
    """{6: [...], 3: [...]}: |p0| + n sigma_p per axis for Gaussian parts
    (largest over parts), else quantiles of the measured momentum
    distribution of psi0 (:func:`measured_momentum_reach`)."""
    if _moments_closed(setup):
        moms = packet_moments(setup)
        return {n: [max(abs(m.p0[i]) + n * m.sigma_p[i] for m in moms) for i in range(setup.grid.ndim)]
                for n in (6, 3)}
    return {6: measured_momentum_reach(setup.psi0, setup.grid, TAIL_6),
            3: measured_momentum_reach(setup.psi0, setup.grid, TAIL_3)}


def _moments_closed(setup) -> bool:
    """Whether the ensemble's moments stand for the state (Gaussian parts,
    or a coupled surface's view, :class:`SurfaceView`), rather than the
    measured momenta of psi0."""
    return getattr(setup, "ensemble", None) is not None or all_gaussian(setup.packet)


def _nonseparable(v) -> bool:
    """Whether V(x, y[, z]) is not a sum of one-axis functions (checked on
    the grid: V minus its one-axis sections through a point)."""
    if v.ndim < 2:
        return False
    rest = v - v.mean()
    for i in range(v.ndim):
        other = tuple(j for j in range(v.ndim) if j != i)
        rest = rest - (v.mean(axis=other, keepdims=True) - v.mean())
    scale = float(np.ptp(v)) or 1.0
    return float(np.abs(rest).max()) > 1e-9 * scale


# Dynamics of recent jobs in this process: `run` builds the set-up of a job
# up to three times (resolving its CAP, judging it, running it) and the
# trajectories cost ~0.3 s each time; they do not depend on the absorber's
# strength, which the first of them chooses.
_DYNAMICS_CACHE: dict = {}
_DYNAMICS_LOCK = threading.Lock()
# Per set-up object, without writing onto it (the set-up's class is a layer above).
_DYNAMICS_OF: weakref.WeakKeyDictionary = weakref.WeakKeyDictionary()
_DYNAMICS_CACHE_SIZE = 64


def _dynamics_key(setup) -> str | None:
    table = dict(setup.job.table)
    if isinstance(table.get("absorber"), dict):
        table["absorber"] = {k: v for k, v in table["absorber"].items() if k not in ("strength", "power")}
    table.pop("title", None)
    table.pop("sweep", None)
    try:
        return (json.dumps(table, sort_keys=True, default=str) + repr(setup.units.as_table())
                + getattr(setup, "curve_key", ""))   # a coupled surface's view: one per curve
    except (TypeError, ValueError):
        return None


def dynamics(setup) -> Dynamics:
    """:class:`Dynamics` of a set-up, computed once and kept on it (and for
    the same physics in this process)."""
    cached = _DYNAMICS_OF.get(setup)
    if cached is not None:
        return cached
    key = _dynamics_key(setup)
    if key is not None and key in _DYNAMICS_CACHE:
        _DYNAMICS_OF[setup] = _DYNAMICS_CACHE[key]
        return _DYNAMICS_OF[setup]
    grid, m = setup.grid, setup.mass
    v = setup.hamiltonian_static_potential()
    initial = _initial_reach(setup)
    reach = classical_reach(setup)
    over = {6: list(initial[6]), 3: list(initial[3])}
    if reach is not None:
        over[6] = [max(a, float(b)) for a, b in zip(over[6], reach.momentum)]
    moms = packet_moments(setup)
    dens = np.abs(setup.psi0) ** 2
    v_packet = float(np.sum(v * dens) / np.sum(dens))
    e_total = max(sum((abs(mo.p0[i]) + 6 * mo.sigma_p[i]) ** 2 for i in range(grid.ndim)) for mo in moms) / (2 * m)
    e_total += v_packet
    nonsep = _nonseparable(v)
    if nonsep and not grid.radial:   # scattering may turn all of it into one axis's motion
        p_all = math.sqrt(max(2 * m * (e_total - float(v.min())), 0.0))
        over[6] = [max(a, p_all) for a in over[6]]
    # bound: the packet's energy below V at every edge of the grid (a field frees electrons)
    edges = [float(np.take(v, [0, -1], axis=i).min()) for i in range(grid.ndim)]
    if _moments_closed(setup):
        e_mean = max(sum(mo.p0[i] ** 2 + mo.sigma_p[i] ** 2 for i in range(grid.ndim)) for mo in moms) / (2 * m)
    else:   # <T> of the actual state from its momentum marginals
        e_mean = 0.0
        for i in range(grid.ndim):
            k, w = momentum_marginal(setup.psi0, grid, i)
            e_mean += float(np.sum(w * k**2)) / (2 * m)
    bound = (not grid.radial) and e_mean + v_packet < min(edges)
    freed = field_driven_momentum(setup) if bound else {}
    for i, p in freed.items():
        over[6][i] = max(over[6][i], p)
    unreached: set = set()
    windows = _windows(setup, moms, reach, freed, nonsep, v, v_packet, e_total, unreached)
    e_mf = mean_field_energy(setup)
    if e_mf > 0:
        # the classical trajectories leave the interaction out: an expanding cloud turns up to
        # |g N| max|psi0|^2 per atom into motion, which the layers must take as well
        windows = {face: (lo, hi + e_mf) for face, (lo, hi) in windows.items()}
    out = Dynamics(initial, over, reach, freed, windows, nonsep, bound, unreached)
    _DYNAMICS_OF[setup] = out
    if key is not None:
        with _DYNAMICS_LOCK:   # a batch prepares its members' set-ups in threads (batched.BatchedRun)
            if len(_DYNAMICS_CACHE) >= _DYNAMICS_CACHE_SIZE:
                _DYNAMICS_CACHE.pop(next(iter(_DYNAMICS_CACHE)))
            _DYNAMICS_CACHE[key] = out
    return out


def _windows(setup, moms, reach, freed, nonsep, v, v_packet, e_total, unreached: set) -> dict:
    """face -> (e_lo, e_hi) in hartree: kinetic energy normal to the face
    that the absorber must take inside its layer.  The packet's momentum
    window (+/- 6 sigma_p) shifted by the potential drop to the layer (a
    packet running down a step arrives faster), widened by what the
    classical trajectories bring there, by energy conservation where V
    couples the axes (diffraction turns forward motion sideways), and by
    electrons a field frees; floored where the wavelength reaches the layer
    thickness (slower parts cannot be absorbed by any layer that thick).
    A face that no trajectory reaches and that the packet's momenta cannot
    reach in free flight within the run is added to ``unreached`` (its
    window stays the packet's own, for a tuning that costs little)."""
    table = setup.job.table.get("absorber") or {}
    if table.get("kind", "none") == "none":
        return {}
    th = setup.units.to_atomic(table["thickness"], "length")
    m = setup.mass
    out = {}
    for face, (i, side, edge) in _layer_bounds(setup).items():
        ax = setup.grid.axes[i]
        x = ax.coordinates
        inside = np.nonzero(x > edge if side == "+" else x < edge)[0]
        if inside.size == 0:
            continue
        v_layer = float(np.take(v, inside, axis=i).mean())
        drop = v_packet - v_layer
        lo_p = min(mo.p0[i] - 6 * mo.sigma_p[i] for mo in moms)
        hi_p = max(mo.p0[i] + 6 * mo.sigma_p[i] for mo in moms)
        pmax = max(abs(lo_p), abs(hi_p))
        pmin = 0.0 if lo_p <= 0 <= hi_p else min(abs(lo_p), abs(hi_p))
        e_lo = max(pmin**2 / (2 * m) + drop, 0.0)
        e_hi = pmax**2 / (2 * m) + drop
        if nonsep:    # diffraction can turn all of the packet's energy into this axis's motion
            e_hi = max(e_hi, e_total - v_layer)
        if i in freed:
            e_hi = max(e_hi, freed[i] ** 2 / (2 * m))
        # the packet's own window: what starts D away from the layer and gets
        # there within the run moves at least D / duration on average (free
        # flight; where the packet's momenta cannot make it at all, the
        # window is left as it is: nothing of it arrives, and tuning for
        # energies far above it costs minutes for nothing)
        near = min((mo.x0[i] + 3 * mo.sigma_x[i]) if side == "+" else (mo.x0[i] - 3 * mo.sigma_x[i])
                   for mo in moms)
        distance = (edge - near) if side == "+" else (near - edge)
        e_geo = (m * distance / setup.duration) ** 2 / (2 * m) if distance > 0 else 0.0
        if e_geo < e_hi:
            e_lo = max(e_lo, e_geo)
        # then what the trajectories bring there (forces slow or speed it up)
        arrived = reach is not None and face in reach.arrivals
        # the packet's own fastest motion towards the face, without the drop
        # (a fall to a layer the run never reaches gains nothing)
        e_own = max(pmax**2 / (2 * m), e_hi - drop if not nonsep and i not in freed else e_hi)
        if arrived:
            a_lo, a_hi = reach.arrivals[face]
            e_lo, e_hi = (e_lo if a_lo is None else min(e_lo, a_lo)), max(e_hi, a_hi)
        elif reach is not None and e_geo >= e_own:
            # no trajectory gets there, and not even the packet's fastest
            # momenta cover the distance in free flight: nothing arrives; its
            # own window (no drop) keeps the tuning cheap
            unreached.add(face)
            e_lo, e_hi = max(pmin**2 / (2 * m), 0.0), e_own
        elif e_geo >= e_hi:
            unreached.add(face)
        e_floor = (2 * math.pi / th) ** 2 / (2 * m)
        e_lo = max(e_lo, e_floor)
        e_hi = max(e_hi, 4 * e_lo)
        # the grid holds no kinetic energy above (pi/dx)^2 / 2m (the momentum
        # findings report what outruns it): a window beyond it (a barrier of
        # 1e30 hartree) would size the layer's transfer-matrix sub-grid by
        # momenta no step carries, terabytes for nothing
        e_grid = ax.k_max ** 2 / (2 * m)
        e_hi = min(e_hi, e_grid)
        out[face] = (min(e_lo, e_hi), e_hi)
    return out


# ---------------------------------------------------------------------------
# Findings
# ---------------------------------------------------------------------------
def representability(setup) -> None:
    """Raise JobError when the grid cannot represent the initial packet at
    all (|p0| + 3 sigma_p of a Gaussian part above the axis's largest k): the
    state itself would be wrong, before any step."""

    u = setup.units
    pf = u.factor("momentum")
    for part in gaussian_parts(setup.packet):
        p0 = central_momenta(part, setup.mass, setup.grid.ndim, "packet")
        for i, ax in enumerate(setup.grid.axes):
            sp = momentum_spread(part["width"][i])
            reach6, reach3 = abs(p0[i]) + 6 * sp, abs(p0[i]) + 3 * sp
            if reach3 > ax.k_max:
                raise JobError(f"grid.{ax.name}.points",
                               f"the grid resolves |p| up to {ax.k_max / pf:.4g} {u.unit_label('momentum')} but "
                               f"the packet reaches {reach3 / pf:.4g} (|p0| + 3 sigma); use "
                               f"{points_text(points_for(ax, reach6))} points")


# Point counts beyond this are said as "more than": no machine holds them,
# and a momentum of 1e308 must not overflow the count (int(inf)).
POINTS_SAYABLE = 10**15


def points_for(ax, p_reach: float) -> int:
    """The point count at which an axis resolves |p| <= p_reach (a.u.), same
    extent; at most POINTS_SAYABLE (see ``points_text``)."""
    n = ax.length * p_reach / math.pi + (1 if ax.boundary == "periodic" else 0)
    return math.ceil(n) if n < POINTS_SAYABLE else POINTS_SAYABLE


def points_text(n: int) -> str:
    """'at least N' for a message; 'more than 1e+15' (no machine's) at the cap."""
    return f"more than {POINTS_SAYABLE:.0e}" if n >= POINTS_SAYABLE else f"at least {n}"


# Share of the state (its Wigner samples) whose momentum may outrun the grid
# before the set-up is an error rather than a warning: past a tenth the bulk
# of every output is wrong.  Our own choice, not a published rule.
ERROR_SHARE = 0.1


def momentum_findings(setup, dyn: Dynamics) -> list[Finding]:
    """Per axis: the momenta the state reaches over the run (the initial
    packet's, or more where V(r, t) accelerates it: trajectories, fields,
    diffraction) against the largest k the axis resolves.  Beyond it the
    momentum wraps round the grid (a falling atom oscillates in place)."""
    u = setup.units
    pf, pu = u.factor("momentum"), u.unit_label("momentum")
    out = []
    for i, ax in enumerate(setup.grid.axes):
        kmax = ax.k_max
        r6 = dyn.over_run[6][i]
        i6 = dyn.initial[6][i]
        share, centre = 0.0, False
        if dyn.reach is not None:
            share = float(np.mean(dyn.reach.sampled[:, i] > kmax)) if dyn.reach.sampled.size else 0.0
            centre = bool(dyn.reach.centre[i] > kmax)
        # an error when the packet's centre, or more than a tenth of the state
        # (its Wigner samples), outruns the grid: the bulk of the result is then wrong
        level = "ok" if r6 <= kmax * (1 + 1e-9) else ("error" if centre or share > ERROR_SHARE else "warn")
        gained = r6 > i6 * 1.01 + 1e-12
        why = []
        if gained:
            if dyn.reach is not None and float(dyn.reach.momentum[i]) > i6 * 1.01:
                why.append("classical trajectories under V(r, t)")
            if i in dyn.freed:
                why.append("electrons the field frees (simple-man model)")
            if dyn.nonseparable:
                why.append("scattering between axes (energy conservation)")
        what = (f"over the run the state reaches {r6 / pf:.4g} ({', '.join(why)}; initially {i6 / pf:.4g}"
                + (f"; {share:.0%} of it beyond the range" if share > 0 else "")
                + ("; its centre too" if centre else "") + ")"
                if gained else f"the packet's |p0| + 6 sigma_p = {r6 / pf:.4g}")
        msg = (f"{ax.name}: grid resolves |p| <= {kmax / pf:.4g} {pu}; {what} ({r6 / kmax:.0%} of the range)")
        if level != "ok":
            msg += (f"; beyond it momentum wraps round the grid; use {points_text(points_for(ax, r6))} points "
                    f"(same extent) or a shorter duration")
            if getattr(setup, "frame", None) is not None and gained:
                # what a lab potential gives the packet against the falling grid: it does not fall with it
                msg += "; or grid.frame = 'lab' (held or deflected in the lab, the packet does not fall with the grid)"
        out.append(Finding("momentum", level, msg,
                           {"axis": ax.name, "k_max": kmax / pf, "packet_reach": i6 / pf,
                            "run_reach": r6 / pf, "share_beyond": share, "centre_beyond": centre,
                            "measured": not all_gaussian(setup.packet),
                            "points_needed": points_for(ax, r6)},
                           field=f"grid.{ax.name}.points"))
    return out


def _margin(setup, th, face, dist, w):
    """(layer thickness, margin in widths, level, "absorber"/"edge") of a
    packet centre ``dist`` from ``face``; 8 widths is common practice, 3 the
    least that keeps the tail (1e-3 of it and more) off the layer."""
    layer = th if any(lay.name == face for lay in setup.absorber.layers) else 0.0
    margin = (dist - layer) / w
    level = "ok" if margin >= 8 else ("warn" if margin > 3 else "error")
    return layer, margin, level, "absorber" if layer else "edge"


def _measured_margins(setup, th, L, lf) -> list:
    """Margins of a packet that is not Gaussian parts only: its measured
    centre <x> and spread (the standard deviation of |psi|^2, a Gaussian
    packet's width) along each axis, from Setup.psi0."""
    grid, out = setup.grid, []
    (moments,) = packet_moments(setup)     # <x> and the spread of |psi0|^2, measured
    for i, ax in enumerate(grid.axes):
        x0, w = float(moments.x0[i]), float(moments.sigma_x[i])
        edges = [(x0 - ax.min, f"{ax.name}-"), (ax.max - x0, f"{ax.name}+")]
        if grid.radial:
            edges = [(ax.max - x0, "r+")]   # u(r) vanishes at r = 0 by itself
        for dist, face in edges:
            layer, margin, level, what = _margin(setup, th, face, dist, w)
            out.append(Finding("margin", level,
                f"the state's centre (measured) is {margin:.1f} spreads from the {face} {what} "
                f"({(dist - layer) / lf:.4g} {L}, spread {w / lf:.4g} {L}; 8 is common practice)"
                + ("; enlarge the grid or move its trap inward" if level == "error" else ""),
                {"face": face, "widths": margin, "measured": True}, field=f"grid.{ax.name}"))
    return out


# Spectral weight of V (relative power) allowed in grid modes whose kinetic
# phase per step exceeds pi.  Calibrated on a 150 meV double barrier (0.067
# m_e, dx = 0.39 nm), transmission against a converged dt: sharp edges at
# dt = 1 fs (weight 6e-2) gave 5x too much; edges smoothed over 1 nm at dt = 1
# fs (2e-3) were 1.4 % off, at dt = 0.25 fs (2.5e-6) exact to 1e-5.  Our own
# measurement, not a published rule.
ALIASED_WEIGHT_MAX = 1e-5


def _aliasing_finding(setup, T, tf) -> Finding:
    """Split-operator time aliasing: a mode with T(k) dt > pi has a kinetic
    phase that wraps, so the kick's coupling through sharp features of V can
    put it in resonance with the packet and scatter probability into fast
    spurious waves.  Reports the potential's spectral weight in such modes
    and the time step that avoids them."""
    grid, mass, dt = setup.grid, setup.mass, setup.dt
    if setup.grid.radial:
        return Finding("splitting", "ok", "radial grid: the static H is propagated exactly")
    samples = lab_potential_samples(setup) if getattr(setup, "frame", None) is not None \
        else [setup.hamiltonian.static_potential]
    findings = [_aliasing_of(setup, v, T, tf) for v in samples]   # a falling grid: the worst time
    return max(findings, key=lambda f: f.values["aliased_weight"])


def _aliasing_of(setup, v, T, tf) -> Finding:
    """:func:`_aliasing_finding` of one potential ``v`` (hartree, the grid's shape)."""
    grid, mass, dt = setup.grid, setup.mass, setup.dt
    k_alias = math.sqrt(2 * mass * math.pi / dt)
    worst, k_needed = 0.0, 0.0
    span = float(np.ptp(v))
    for i, ax in enumerate(grid.axes):
        rest = _interior(setup, v, i)
        if float(np.abs(rest).max()) <= 1e-9 * span:
            # linear along this axis (gravity, a uniform force): what is left is
            # rounding, whose flat spectrum was read as 8 % aliased weight
            continue
        spec = np.abs(np.fft.fft(rest, axis=i)) ** 2
        other = tuple(j for j in range(grid.ndim) if j != i)
        power = spec.sum(axis=other) if other else spec
        k = np.abs(2 * np.pi * np.fft.fftfreq(ax.points, ax.dx))
        total = power.sum()
        if total <= 0:
            continue
        order = np.argsort(k)
        above = (total - np.cumsum(power[order])) / total     # weight above each k
        worst = max(worst, float(power[k > k_alias].sum() / total))
        ok = np.nonzero(above <= ALIASED_WEIGHT_MAX)[0]
        k_needed = max(k_needed, float(k[order][ok[0]]) if ok.size else ax.k_max)
    # below k_needed the potential's weight is harmless; no mode above it may wrap
    dt_limit = math.pi / grid.kinetic_max(mass)
    if k_needed > 0:
        dt_limit = max(dt_limit, min(2 * mass * math.pi / k_needed**2, dt_limit * 1e12))
    if worst <= ALIASED_WEIGHT_MAX:
        return Finding("splitting", "ok",
            f"potential's spectral weight in modes with kinetic phase > pi per step: {worst:.1e} "
            f"(limit {ALIASED_WEIGHT_MAX:.0e})", {"aliased_weight": worst}, field="evolve.dt")
    return Finding("splitting", "warn",
        f"{worst:.1e} of the potential's spectral weight lies in modes whose kinetic phase "
        f"exceeds pi per step: sharp features of V scatter the packet into fast spurious waves; "
        f"use dt <= {dt_limit / tf:.3g} {T}, smooth the potential, or use fewer points",
        {"aliased_weight": worst, "dt_limit": dt_limit / tf}, field="evolve.dt")


def splitting_warning(setup) -> str | None:
    """The time-aliasing warning for a split-operator run, or None.  Analysis
    repeats it: fluxes and amplitudes at a point suffer first (measured on a
    sharp 1 hartree barrier: at a weight of 1.6e-2 the flux through a
    detector beyond it summed to 0.130 where 0.168 crossed; at 0, to 3e-6)."""
    if not setup.scheme.in_place_transform:
        return None
    u = setup.units
    f = _aliasing_finding(setup, u.unit_label("time"), u.factor("time"))
    return f.message if f.level != "ok" else None


def _interior(setup, v, i) -> np.ndarray:
    """V along axis i with the ends made harmless for an FFT: the linear trend
    between the two ends removed (the periodic wrap of a step is not a feature
    the packet meets) and a cos^2 taper over the absorbing layers (or 5 % of the
    axis) where nothing is meant to propagate.  Review finding: without this a
    smooth step was flagged through the jump at the wrap."""
    ax = setup.grid.axes[i]
    n = ax.points
    shape = [1] * v.ndim
    shape[i] = n
    first = np.take(v, [0], axis=i)
    last = np.take(v, [n - 1], axis=i)
    s = np.linspace(0.0, 1.0, n).reshape(shape)
    d = v - (first + (last - first) * s)
    layer = 0.0
    if setup.absorber.active:
        layer = setup.absorber.thickness
    taper = max(layer, 0.05 * ax.length)
    x = ax.coordinates
    dist = np.minimum(x - ax.min, ax.max - x)
    window = np.where(dist >= taper, 1.0, np.sin(0.5 * np.pi * np.clip(dist / taper, 0, 1)) ** 2)
    return d * window.reshape(shape)


def margin_findings(setup) -> list[Finding]:
    """Distance of the packet's centre from edges and absorbers in units of
    its width (8 widths is common practice); measured for states that are
    not Gaussian parts only."""
    u = setup.units
    lf, L = u.factor("length"), u.unit_label("length")
    th = setup.absorber.thickness if setup.absorber.active else 0.0
    if not all_gaussian(setup.packet):
        return _measured_margins(setup, th, L, lf)
    out = []
    for part in gaussian_parts(setup.packet):
        for i, ax in enumerate(setup.grid.axes):
            x0, w = part["center"][i], part["width"][i]
            edges = [(x0 - ax.min, f"{ax.name}-"), (ax.max - x0, f"{ax.name}+")]
            if setup.grid.radial:
                edges = [(x0, "r = 0"), (ax.max - x0, "r+")]
            for dist, face in edges:
                layer, margin, level, what = _margin(setup, th, face, dist, w)
                out.append(Finding("margin", level,
                    f"packet centre is {margin:.1f} widths from the {face} {what} "
                    f"({(dist - layer) / lf:.4g} {L}; 8 widths is common practice)"
                    + ("; move the packet inward or narrow it" if level == "error" else ""),
                    {"face": face, "widths": margin}, field="packet.center"))
    return out


def time_step_finding(setup, dyn: Dynamics) -> Finding:
    """Phase per step E dt / hbar of the highest kinetic energy the state
    reaches over the run (<= 1 rad is common practice, above pi the
    kinetic phase wraps), and of V over the region the classical ensemble
    visits; V's range over the whole grid is reported too (a phase that
    wraps in a wall the packet never enters is harmless)."""
    u = setup.units
    tf, T = u.factor("time"), u.unit_label("time")
    dt = setup.dt
    e_run = sum(r**2 for r in dyn.over_run[6]) / (2 * setup.mass)
    samples = lab_potential_samples(setup)   # a falling grid: the lab terms where it passes
    v_span = max(float(v.max() - v.min()) for v in samples)
    v_seen = v_span
    box = None
    if dyn.reach is not None:
        box = tuple(slice(max(0, int(np.searchsorted(ax.coordinates, lo)) - 1),
                          int(np.searchsorted(ax.coordinates, hi)) + 1)
                    for ax, (lo, hi) in zip(setup.grid.axes, dyn.reach.visited))
        seen = [v[box] if v.ndim == setup.grid.ndim else v for v in samples]
        if all(part.size for part in seen):
            v_seen = max(float(part.max() - part.min()) for part in seen)
    # time-dependent terms f(t) g(r): their largest swing over the run, on the
    # grid and where the packet goes (a field's -q E x grows with |x|)
    separable, _ = split_time_dependent(setup.terms, setup.grid.mesh())
    if separable:
        cycles = _fastest_carrier(setup) * setup.duration / (2 * math.pi)   # 64 samples a period
        times = np.linspace(0.0, setup.duration, int(min(max(2001, 64 * cycles), 200_000)))
        for g, f in separable:
            f_max = max(abs(f(t)) for t in times)
            g_full = np.broadcast_to(g, setup.grid.shape)
            v_span += f_max * float(np.ptp(g_full))
            g_seen = g_full[box] if box is not None else g_full
            if g_seen.size:
                v_seen += f_max * float(np.ptp(g_seen))
    kin_phase, pot_phase = e_run * dt, v_seen * dt
    # a condensate's mean field g N |psi|^2 turns the phase too, most where
    # psi0 is densest (a focusing cloud grows denser: judged at the start)
    contact = float(getattr(setup, "contact", 0.0) or 0.0)
    e_mean_field = abs(contact) * float(np.max(np.abs(setup.psi0) ** 2)) if contact else 0.0
    field_phase = e_mean_field * dt
    phase = max(kin_phase, pot_phase, field_phase)
    level = "ok" if phase <= 1.0 else ("warn" if phase <= math.pi else "error")
    exact = setup.scheme.exact_in_time
    if setup.grid.radial and setup.scheme.in_place_transform and not separable:
        # a static radial H is stepped exactly in its dense eigenbasis (no splitting)
        exact = exact or (setup.grid.axes[0].points <= RADIAL_DENSE_MAX
                          and not any(t.time_dependent for t in setup.terms))
    if exact:   # a converged expansion of exp(-i H dt): no splitting, no phase to wrap
        level = "ok"
    if v_span * dt > 1e3 * math.pi and level == "ok":
        level = "warn"   # no wall needs a phase of thousands of turns per step: a unit is off
    msg = ("exact for a static H at any dt (chebyshev, or the radial eigenbasis): " if exact else "") + (
           f"phase per step: highest kinetic energy over the run {kin_phase:.3g} rad, potential over the "
           f"region the packet visits {pot_phase:.3g} rad (<= 1 is common practice; above pi it wraps), "
           f"over the whole grid {v_span * dt:.3g} rad (dt = {dt / tf:g} {T})")
    if contact:
        msg += f"; mean field g N max|psi0|^2 {field_phase:.3g} rad"
    if level != "ok":
        dt_ok = 1.0 / max(e_run, v_seen, e_mean_field, 1e-300)
        msg += f"; use dt <= {dt_ok / tf:.3g} {T}"
        if v_span * dt > 1e3 * math.pi:
            msg += "; a potential phase this large usually means an energy unit is not the one meant ([units])"
    e_packet = sum(r**2 for r in dyn.initial[6]) / (2 * setup.mass)
    return Finding("time step", level, msg,
                   {"packet_phase": e_packet * dt, "run_phase": kin_phase, "potential_phase": pot_phase,
                    "grid_phase":
                    setup.grid.kinetic_max(setup.mass) * dt, "grid_potential_phase": v_span * dt,
                    **({"mean_field_phase": field_phase} if contact else {})},
                   field="evolve.dt")


# Relative spectral power of V (trend removed, tapered at the layers) above
# half the largest wave number an axis resolves.  A sharp (cell-averaged)
# barrier edge leaves ~1e-3 there on a 1 um grid and its transmission
# converges only algebraically with dx (~dx^2.5; 3 % off at dx = 0.24 nm for
# a 150 meV double barrier); tanh edges smoothed over 1 nm at dx = 0.39 nm
# leave ~1e-12 and transmit to 9e-5 of the converged value (our own
# measurements, scripts in the issue notes; not a published rule).
UNRESOLVED_WEIGHT_MAX = 1e-6
# Power above kmax/2 over power above kmax/4: a sharp edge's spectrum falls
# as 1/q^2 (ratio ~ 0.5 on any grid); a resolved smooth edge's falls
# exponentially (tanh over 1 nm: 0.002 at dx = 0.39 nm).  Sharp edges stay
# unresolved on any grid, so the ratio, not the weight, tells them apart.
TAIL_RATIO_MIN = 0.2


def resolution_finding(setup) -> Finding | None:
    """Sharp features of V against dx: the share of V's spectral power in
    the upper half of each axis's wave numbers.  Fluxes, transmitted
    probabilities and levels then converge algebraically with dx instead
    of spectrally; ``check --tolerance`` measures how far."""
    if setup.grid.radial:
        return None
    if getattr(setup, "frame", None) is not None:   # the lab terms where the falling grid passes: the worst
        found = [f for f in (_resolution_of(setup, v) for v in lab_potential_samples(setup)) if f is not None]
        return max(found, key=lambda f: (f.level != "ok", f.values.get("unresolved_weight", 0.0)), default=None)
    return _resolution_of(setup, setup.hamiltonian_static_potential())


def _resolution_of(setup, v) -> Finding | None:
    """:func:`resolution_finding` of one potential ``v`` (hartree)."""
    if float(np.ptp(v)) == 0.0:
        return None
    worst, axis, ratios = 0.0, None, {}
    span = float(np.ptp(v))
    for i, ax in enumerate(setup.grid.axes):
        rest = _interior(setup, v, i)
        if float(np.abs(rest).max()) <= 1e-9 * span:   # linear along this axis (a uniform force)
            continue
        spec = np.abs(np.fft.fft(rest, axis=i)) ** 2
        other = tuple(j for j in range(setup.grid.ndim) if j != i)
        power = spec.sum(axis=other) if other else spec
        k = np.abs(2 * np.pi * np.fft.fftfreq(ax.points, ax.dx))
        total = float(power[k > 0].sum())
        if total <= 0:
            continue
        share = float(power[k > 0.5 * k.max()].sum()) / total
        quarter = float(power[k > 0.25 * k.max()].sum())
        slope = share * total / quarter if quarter > 0 else 0.0
        if share > UNRESOLVED_WEIGHT_MAX and slope > TAIL_RATIO_MIN and share > worst:
            worst, axis = share, ax
        ratios[ax.name] = (share, slope)
    if axis is None and not ratios:
        return Finding("resolution", "ok", "V is linear along every axis (a uniform force): nothing to resolve",
                       {"unresolved_weight": 0.0}, field=f"grid.{setup.grid.axes[0].name}.points")
    if axis is None:
        text = ", ".join(f"{n}: {a:.1e} (tail ratio {b:.2f})" for n, (a, b) in ratios.items())
        return Finding("resolution", "ok",
                       f"V's spectral power above half the resolved wave numbers {text}: its features are "
                       f"resolved (power falls off faster than a sharp edge's)",
                       {"unresolved_weight": max((a for a, _ in ratios.values()), default=0.0),
                        "ratios": ratios},
                       field=f"grid.{setup.grid.axes[0].name}.points")
    return Finding("resolution", "warn",
                   f"{axis.name}: V has features sharper than the grid resolves ({worst:.1e} of its spectral power "
                   f"above half the resolved wave numbers; limit {UNRESOLVED_WEIGHT_MAX:.0e}): transmission, fluxes "
                   f"and levels then converge only slowly with dx (percent-level errors are typical); give the "
                   f"edges a smoothing length of a few dx, or measure the error with check --tolerance",
                   {"unresolved_weight": worst, "axis": axis.name}, field=f"grid.{axis.name}.points")


def detector_findings(setup) -> list[Finding]:
    """A detector inside an absorbing layer sees a current already reduced by it."""
    u = setup.units
    lf, L = u.factor("length"), u.unit_label("length")
    th = setup.absorber.thickness if setup.absorber.active else 0.0
    if getattr(setup, "frame", None) is not None:
        return _falling_detector_findings(setup, th)
    out = []
    for n, det in enumerate(setup.detectors):
        ax = setup.grid.axes[det.axis]
        for layer in setup.absorber.layers:
            if layer.axis != det.axis:
                continue
            inner = ax.max - th if layer.name.endswith("+") else ax.min + th
            inside = det.position > inner if layer.name.endswith("+") else det.position < inner
            if inside:
                out.append(Finding("detector", "warn",
                    f"{det.name!r} at {ax.name} = {det.position / lf:.4g} {L} lies inside the {layer.name} "
                    f"absorber (which starts at {inner / lf:.4g} {L}): its flux is reduced by the "
                    f"absorption; move it out, or read the absorbed probability of {layer.name} instead",
                    {"detector": det.name, "face": layer.name}, field=f"detector.{n}.{ax.name}"))
    return out


# A lab detector on a falling grid: samples of the flux while the grid's
# interior holds it, at least (common practice: a bell-shaped arrival
# density sampled at a few points per width integrates to ~1e-10 by the
# trapezoidal rule; the window is several widths).
SAMPLES_PER_CROSSING = 40


# A falling grid's lab potential is judged at times the grid moves at most
# half its length apart (each lab feature then lies inside it at one of
# them), at most this many grid points in all.
FRAME_SAMPLE_POINTS = 2**24


def lab_potential_samples(setup) -> list[np.ndarray]:
    """On a falling grid: the Hamiltonian's real potential (the lab terms at
    the grid's lab positions) at times over the run the grid moves at most
    half its shortest extent apart, within :data:`FRAME_SAMPLE_POINTS`
    grid points in all; otherwise the one static potential.  What the
    time-step, aliasing and resolution criteria judge: on a falling grid
    the static potential is zero and every lab term moves across it."""
    if getattr(setup, "frame", None) is None or not setup.terms:
        return [setup.hamiltonian_static_potential()]
    fine = np.linspace(0.0, setup.duration, 4097)
    path = np.array([setup.frame.offset(t) for t in fine])
    travelled = np.concatenate([[0.0], np.cumsum(np.linalg.norm(np.diff(path, axis=0), axis=1))])
    step = 0.5 * min(ax.length for ax in setup.grid.axes)
    count = int(min(travelled[-1] / step, FRAME_SAMPLE_POINTS // setup.grid.size)) + 2
    times = np.interp(np.linspace(0.0, travelled[-1], count), travelled, fine) if travelled[-1] > 0 \
        else np.zeros(1)
    return [np.broadcast_to(setup.hamiltonian.potential(float(t)), setup.grid.shape) for t in times]


def _falling_detector_findings(setup, th: float) -> list[Finding]:
    """On a falling grid: where the grid goes (said, "ok"), and for each
    detector (fixed in the lab) when the grid's interior (inside the
    absorbing layers) holds it; one it never reaches records no flux at
    all (a warning)."""
    u = setup.units
    lf, L = u.factor("length"), u.unit_label("length")
    tf, T = u.factor("time"), u.unit_label("time")
    times = np.linspace(0.0, setup.duration, 4097)
    offsets = np.array([setup.frame.offset(t) for t in times])
    removed = sorted({term.kind for term in setup.lab_terms if term.uniform_force}) or ["none"]
    moved = ", ".join(f"{ax.name} by {offsets[-1, i] / lf:.6g} {L}" for i, ax in enumerate(setup.grid.axes))
    kept = sorted({term.kind for term in setup.terms})
    out = [Finding("frame", "ok",
                   f"the grid falls with the packet (uniform forces removed: {', '.join(removed)}); over the run "
                   f"it moves {moved}; " + (f"lab terms seen at lab positions: {', '.join(kept)}" if kept
                                            else "no other potential: the packet moves freely on the grid"),
                   {"final_offset": [float(v / lf) for v in offsets[-1]]})]
    for n, det in enumerate(setup.detectors):
        ax = setup.grid.axes[det.axis]
        faces = {layer.name for layer in setup.absorber.layers if layer.axis == det.axis}
        lo = ax.min + (th if f"{ax.name}-" in faces else 0.0)
        hi = ax.max - (th if f"{ax.name}+" in faces else 0.0)
        y = det.position - offsets[:, det.axis]
        inside = (y > lo) & (y < hi)
        where = f"{det.name!r} at {ax.name} = {det.position / lf:.6g} {L} (lab)"
        if np.any(inside):
            first, last = times[inside][0] / tf, times[inside][-1] / tf
            sample = setup.sample_steps * setup.dt / tf
            window = f"{where} is inside the falling grid's interior from t = {first:.4g} to {last:.4g} {T}"
            if last - first < SAMPLES_PER_CROSSING * sample:
                # everything that crosses it does so while the grid holds it: the flux must be sampled there
                out.append(Finding("detector", "warn",
                    f"{window}, only {(last - first) / sample:.3g} samples of record.every = {sample:.4g} {T}: "
                    f"the crossing's flux is sampled too coarsely (or missed); give record.every <= "
                    f"{(last - first) / SAMPLES_PER_CROSSING:.3g} {T}",
                    {"detector": det.name, "from": first, "to": last}, field="record.every"))
                continue
            out.append(Finding("detector", "ok", window, {"detector": det.name, "from": first, "to": last}))
            continue
        seen_lo, seen_hi = offsets[:, det.axis].min() + lo, offsets[:, det.axis].max() + hi
        out.append(Finding("detector", "warn",
            f"{where} is never inside the falling grid's interior: over the run it covers {ax.name} = "
            f"{seen_lo / lf:.4g} to {seen_hi / lf:.4g} {L}, so the detector records no flux; lengthen "
            "evolve.duration or move the detector",
            {"detector": det.name}, field=f"detector.{n}.{ax.name}"))
    return out


ABSORBER_TARGET = 1e-6   # worst return per face (numerics notes)


def absorber_findings(setup, dyn: Dynamics) -> list[Finding]:
    """Face by face, the absorber's worst return (box axis: reflection with
    the wall; periodic: reflection plus one-way transmission, which wraps
    round) over the energies that arrive there over the run
    (:attr:`Dynamics.windows`).  A figure above the target is never "ok"."""

    u = setup.units
    lf, L = u.factor("length"), u.unit_label("length")
    ef, E = u.factor("energy"), u.unit_label("energy")
    table = setup.job.table
    if not setup.absorber.active:
        out = []
        for i, ax in enumerate(setup.grid.axes):
            reached = True if dyn.reach is None else dyn.reach.edges_reached[i]
            counted = [d.name for d in setup.detectors if d.axis == i]
            if (ax.boundary == "box" or setup.grid.radial) and reached and counted:
                # what the wall sends back crosses the detectors again: their flux counts it twice (net)
                out.append(Finding("absorber", "warn",
                                   f"no absorber: on {ax.name} the packet reaches the walls within the run "
                                   "(classical trajectories of its phase-space ensemble) and what they reflect "
                                   f"crosses detector{'s' if len(counted) > 1 else ''} "
                                   f"{', '.join(repr(n) for n in counted)} again: transmitted probabilities and "
                                   "arrival times there are wrong; add [absorber] kind = 'cap' with a thickness "
                                   "(or a shorter evolve.duration, ending before the packet returns)",
                                   {"axis": ax.name, "edges_reached": reached, "detectors": counted},
                                   field="absorber.kind"))
            elif ax.boundary == "box" or setup.grid.radial:
                out.append(Finding("absorber", "ok", f"no absorber: on {ax.name} what reaches the walls "
                                   "reflects off them (a box)", {"axis": ax.name, "edges_reached": reached},
                                   field="absorber.kind"))
            elif reached:
                out.append(Finding("absorber", "warn",
                                   f"no absorber: on {ax.name} the packet reaches the edges within the run "
                                   "(classical trajectories of its phase-space ensemble) and wraps round the "
                                   "periodic grid; add [absorber] kind = 'cap' with a thickness, or a longer axis",
                                   {"axis": ax.name, "edges_reached": reached}, field="absorber.kind"))
            else:
                out.append(Finding("absorber", "ok",
                                   f"no absorber: on {ax.name} the packet's phase-space ensemble (to 3 sigma_x, "
                                   "6 sigma_p) stays off the edges over the run",
                                   {"axis": ax.name, "edges_reached": reached}, field="absorber.kind"))
        return out
    th = setup.absorber.thickness
    depth = np.linspace(0.0, th, 513)
    out = []
    for layer in setup.absorber.layers:
        i, face = layer.axis, layer.name
        ax = setup.grid.axes[i]
        e_lo, e_hi = dyn.windows[face]
        lam = 2 * math.pi / math.sqrt(2 * setup.mass * e_lo)
        energies = np.geomspace(e_lo, e_hi, 48)
        if setup.absorber.kind == "cap":
            raw = table["absorber"]["strength"]
            value = raw.get(face, 0.0) if isinstance(raw, dict) else (raw[i] if isinstance(raw, list) else raw)
            rate = cap_profile(depth, th, u.to_atomic(value, "energy"), table["absorber"]["power"])
        else:
            s = np.clip(depth / th, 0, 1 - 1e-9)
            rate = -np.log(np.cos(0.5 * np.pi * s) ** table["absorber"]["mask_exponent"]) / setup.dt
        if ax.boundary == "periodic":   # what crosses the layer once wraps round into the opposite one
            r, t = layer_scattering(depth, rate, setup.mass, energies)
            worst, what = float(np.max(r + t)), "reflection + one-way transmission"
        else:
            worst = float(np.max(return_probability(depth, rate, setup.mass, energies)))
            what = "return probability"
        floored = abs(lam - th) < 1e-9 * th
        if face in dyn.unreached:
            out.append(Finding("absorber", "ok",
                               f"{face}: nothing of the packet reaches this layer within the run (no classical "
                               f"trajectory; in free flight it would need more than the packet's momenta); "
                               f"worst {what} {worst:.2e} over {e_lo / ef:.4g}..{e_hi / ef:.4g} {E}",
                               {"face": face, "axis": ax.name, "worst_return": worst, "reached": False,
                                "e_min": e_lo / ef, "e_max": e_hi / ef}, field="absorber.thickness"))
            continue
        level = "ok" if worst <= ABSORBER_TARGET else "warn"
        msg = (f"{face}: thickness {th / lf:.4g} {L} vs longest wavelength {lam / lf:.4g} {L}; worst {what} "
               f"{worst:.2e} over {e_lo / ef:.4g}..{e_hi / ef:.4g} {E}, the energies that arrive there over the "
               f"run (target {ABSORBER_TARGET:.0e})")
        if floored:
            msg += "; slower parts, with wavelengths above the thickness, are not absorbed"
        if level != "ok":
            given = ((getattr(setup.job, "raw", None) or {}).get("absorber") or {}).get("strength")
            tuned = setup.absorber.kind == "cap" and given is None
            msg += ("; the tuned strength does no better at this thickness: make the layers thicker "
                    "(absorber.thickness)" if tuned else
                    "; make the layers thicker (absorber.thickness), or leave out absorber.strength to "
                    "have it tuned to these energies")
        out.append(Finding("absorber", level, msg,
                           {"face": face, "axis": ax.name, "worst_return": worst,
                            "e_min": e_lo / ef, "e_max": e_hi / ef}, field="absorber.thickness"))
    return out


def _largest_prime_factor(n: int) -> int:
    p, big = 2, 1
    while p * p <= n:
        while n % p == 0:
            big, n = p, n // p
        p += 1
    return max(big, n) if n > 1 else big


# FFTW and scipy.fft have fast codelets for the factors 2, 3, 5, 7, 11 and
# 13 (common practice, from memory); a larger prime factor goes through Rader's or
# Bluestein's algorithm, several times slower (measured here: a 1D box of
# 8192 points, whose sine transform works on 8193 = 3 x 2731, stepped
# 12-60x slower than 8191).
FAST_PRIME_MAX = 13
# Below this transform length a slow factor costs microseconds: not worth a warning.
SLOW_SIZE_MIN = 256


def transform_length(ax) -> int:
    """Length of the FFT behind an axis's transform: N on a periodic axis;
    N + 1 for the sine transform (DST-I) of a box or radial axis, which
    scipy and FFTW compute through a real transform of that length."""
    return ax.points if ax.boundary == "periodic" else ax.points + 1


def nearest_fast_points(ax) -> int:
    """The point count nearest to the axis's with a fast transform."""
    offset = 0 if ax.boundary == "periodic" else 1
    for d in range(0, ax.points):
        for n in (ax.points - d, ax.points + d):
            if n >= 4 and _largest_prime_factor(n + offset) <= FAST_PRIME_MAX:
                return n
    return ax.points


def size_findings(grid) -> list[Finding]:
    """Point counts whose transforms are slow (a prime factor above 7 in the
    transform's length) get a warning with the nearest fast count."""
    out = []
    for ax in grid.axes:
        n = transform_length(ax)
        big = _largest_prime_factor(n)
        if big <= FAST_PRIME_MAX or n < SLOW_SIZE_MIN:
            continue
        fast = nearest_fast_points(ax)
        what = "its FFT" if ax.boundary == "periodic" else "its sine transform (which works on points + 1)"
        out.append(Finding("size", "warn",
                           f"{ax.name}: {ax.points} points: {what} has length {n} with prime factor {big}, "
                           f"several times slower than a length with factors up to 13 only; use "
                           f"{fast} points", {"axis": ax.name, "points": ax.points, "prime_factor": big,
                                              "fast_points": fast}, field=f"grid.{ax.name}.points"))
    return out


# ---------------------------------------------------------------------------
# Memory and disk from shapes, before anything is allocated
# ---------------------------------------------------------------------------
def _job_points(table) -> list[int]:
    """Point counts of the job's axes (x, y, z or r), from the table alone."""
    return [int(table["grid"][a]["points"]) for a in ("x", "y", "z", "r") if a in table["grid"]]


def box_extension_bytes(table, psi_bytes: float) -> float:
    """The buffers of the sine transforms of box axes (pyFFTW: an odd
    extension of 2 (N + 1) points along the axis, one buffer for all box
    axes of a transform, :mod:`wavesweep.sine_transform`), for the run's
    two transforms (propagator and observer)."""
    grid = table["grid"]
    default = grid.get("boundary", "periodic")
    factors = [2.0 * (int(grid[a]["points"]) + 1) / int(grid[a]["points"]) for a in ("x", "y", "z")
               if a in grid and grid[a].get("boundary", default) == "box"]
    return 2 * max(factors, default=0.0) * psi_bytes


def memory_estimate(job) -> dict:
    """Bytes a run of ``job`` holds at its peak, from the grid's shape, the
    precision and the scheme alone (nothing is allocated): the scheme's own
    :meth:`~wavesweep.propagators.Propagator.peak_bytes`."""
    table = job.table
    size = int(np.prod(_job_points(table), dtype=np.float64)) if _job_points(table) else 0
    itemsize = 8 if table["evolve"].get("precision") == "single" else 16
    psi_bytes = float(size) * itemsize
    scheme = scheme_class(table["evolve"].get("scheme", DEFAULT_SCHEME))
    absorbing = (table.get("absorber") or {}).get("kind", "none") != "none"
    radial = int(table["grid"]["r"]["points"]) if "r" in table["grid"] else None
    estimate = scheme.peak_bytes(size, itemsize, absorbing, radial) + box_extension_bytes(table, psi_bytes)
    surfaces = len(table.get("surface") or ()) or 1   # coupled surfaces: psi and its buffers per surface
    return {"psi_bytes": psi_bytes * surfaces, "estimate_bytes": estimate * surfaces, "points": size}


def levels_memory_estimate(job, count: int) -> float:
    """Bytes ``levels`` holds for ``count`` states of ``job``, from shapes:
    dense eigh up to 2048 points (the matrix, its eigenvectors and eigh's
    work space: three N x N float64), else LOBPCG blocks (about eight
    vectors per state, float64) plus V and the kinetic factors, and the
    coarser grids of the error estimate (under a half more)."""
    size = float(np.prod(_job_points(job.table), dtype=np.float64))
    if size <= DENSE_MAX_POINTS:
        return 3 * 8.0 * size * size
    return 1.5 * (8.0 * size * 8 * (count + 2) + 8.0 * size * 4)


MAX_MEMORY_VARIABLE = "WAVESWEEP_MAX_MEMORY"
_SIZE_UNITS = {"": 1, "B": 1, "K": 2**10, "KB": 10**3, "KIB": 2**10, "M": 2**20, "MB": 10**6, "MIB": 2**20,
               "G": 2**30, "GB": 10**9, "GIB": 2**30, "T": 2**40, "TB": 10**12, "TIB": 2**40}


def memory_limit() -> tuple[float, str]:
    """(bytes, what they are) a run or ``levels`` may use: this machine's
    available memory, or ``WAVESWEEP_MAX_MEMORY`` (``64GiB``, ``500MB``,
    bytes) where it is set -- how to judge a job for the bigger machine it
    will run on, or to allow more than is free now."""
    text = os.environ.get(MAX_MEMORY_VARIABLE)
    if text is None or not text.strip():
        avail, total = available_memory()
        return avail, f"the {_bytes(avail)} available here (of {_bytes(total)})"

    m = re.fullmatch(r"\s*([0-9]*\.?[0-9]+(?:[eE][+-]?[0-9]+)?)\s*([A-Za-z]*)\s*", text)
    unit = m.group(2).upper() if m else None
    if m is None or unit not in _SIZE_UNITS or not 0 < float(m.group(1)) * _SIZE_UNITS[unit] < math.inf:
        raise JobError(MAX_MEMORY_VARIABLE, f"{text!r} is not a memory size; give e.g. 64GiB, 500MB or a "
                                            "number of bytes, or unset it to use the available memory")
    limit = float(m.group(1)) * _SIZE_UNITS[unit]
    return limit, f"the limit {MAX_MEMORY_VARIABLE}={text.strip()} ({_bytes(limit)})"


def _memory_advice() -> str:
    if os.environ.get(MAX_MEMORY_VARIABLE, "").strip():
        return f"use fewer points, or raise {MAX_MEMORY_VARIABLE}"
    return (f"use fewer points or a machine with more memory (set {MAX_MEMORY_VARIABLE}=SIZE, "
            "e.g. 64GiB, to judge for the machine that will run it)")


def memory_error(need: float, what: str, field: str):
    """A JobError when ``need`` bytes exceed :func:`memory_limit`, else None."""
    limit, said = memory_limit()
    if need <= limit:
        return None
    return JobError(field, f"{what} needs about {_bytes(need)}, more than {said}; {_memory_advice()}")


def physical_memory_error(need: float):
    """A JobError (naming the grid) when ``need`` bytes exceed this machine's
    physical memory: what cannot be built at all, even with --force (which
    accepts runs above the *available* memory), else None."""
    _, total = available_memory()
    if need <= total:
        return None
    return JobError("grid", f"the run needs about {_bytes(need)}, more than this machine's "
                            f"{_bytes(total)} of memory; use fewer points or a machine with more memory")


def available_memory() -> tuple[float, float]:
    """(available, total) bytes of this machine's memory (MemAvailable of
    /proc/meminfo where there is one, else the physical size for both)."""
    total = float(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES"))
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return float(line.split()[1]) * 1024.0, total
    except OSError:
        pass
    return total, total


def memory_finding(job) -> Finding:
    """The run's memory from shapes against :func:`memory_limit` (this
    machine's available memory unless ``WAVESWEEP_MAX_MEMORY`` says
    otherwise): an error above it (the run would be killed or swap for
    hours), a warning above 80 % of it."""
    est = memory_estimate(job)
    limit, said = memory_limit()
    need = est["estimate_bytes"]
    level = "ok" if need <= 0.8 * limit else ("warn" if need <= limit else "error")
    msg = f"psi {_bytes(est['psi_bytes'])}; run about {_bytes(need)} (against {said})"
    if level != "ok":
        msg += "; precision = 'single' halves it; " + _memory_advice()
    axes = [k for k in ("x", "y", "z", "r") if k in job.table["grid"]]
    return Finding("memory", level, msg, {**est, "available_bytes": limit},
                   field=f"grid.{axes[-1]}.points" if axes else "grid")


def _bytes(n: float) -> str:
    for unit, size in (("TiB", 2**40), ("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if n >= size:
            return f"{n / size:.3g} {unit}"
    return f"{n:.0f} B"


def disk_finding(setup) -> Finding:
    """Bytes of snapshots and samples before compression."""
    table = setup.job.table
    stride = table["record"]["stride"]
    frame = int(np.prod([math.ceil(a.points / stride) for a in setup.grid.axes])) * 4
    if table["record"].get("snapshot_psi"):
        frame *= 3                       # density, Re psi and Im psi
    n_snap = setup.total_steps // setup.snapshot_steps + 1
    n_samp = setup.total_steps // setup.sample_steps + 1
    surfaces = len(setup.surfaces) or 1   # coupled surfaces: a frame, samples and psi per surface
    frame *= surfaces
    disk = frame * n_snap + n_samp * 8 * (8 + surfaces * (len(setup.detectors) + len(setup.absorber.layers)))
    if table["record"].get("final_state", True):
        disk += setup.grid.size * 16 * surfaces     # the final psi, complex128
    return Finding("disk", "ok",
                   f"{n_snap} snapshots of {frame / 2**10:.0f} KiB, {n_samp} samples: at most "
                   f"{disk / 2**20:.1f} MiB before compression",
                   {"snapshots": n_snap, "samples": n_samp, "bytes": disk})


# ---------------------------------------------------------------------------
# Run time, measured
# ---------------------------------------------------------------------------
def trial_costs(setup, seconds: float = 1.0) -> tuple[float, float, int]:
    """(seconds per step, seconds per sample, trial steps) of the run, from a
    short trial after warm-up: the kernels compiled by a first step, and the
    observer's first measurement (which plans its transform, as a run does
    once) left out; a sample's cost is the median of five measurements.  On
    coupled surfaces a sample is the set-up's own ``measure`` (every
    surface, the couplings' energy)."""

    prop = setup.make_propagator()
    psi = prop.load(setup.psi0.astype(setup.dtype))
    psi = prop.step(psi, 1)
    chunk = max(1, min(setup.sample_steps, 50))
    n, t0 = 0, _time.perf_counter()
    while _time.perf_counter() - t0 < seconds and n < setup.total_steps:
        psi = prop.step(psi, chunk)
        n += chunk
    per_step = (_time.perf_counter() - t0) / max(n, 1)
    obs = setup.make_observer()
    if getattr(setup, "coupled", False):
        def measure():
            setup.measure(obs, psi, prop.t)
    else:
        v = setup.hamiltonian.potential(prop.t)

        def measure():
            obs.measure(psi, v, prop.t)
    measure()    # plans its transforms, as a run does once
    times = []
    for _ in range(5):
        t1 = _time.perf_counter()
        measure()
        times.append(_time.perf_counter() - t1)
    return per_step, float(np.median(times)), n


def run_time_finding(setup, seconds: float = 1.0) -> Finding:
    """The run's time: steps x per step + samples x per sample, from
    :func:`trial_costs` (the sample's cost was once taken from its first,
    planning call: an estimate of 37 s for a run of 1 s)."""
    per_step, per_sample, n = trial_costs(setup, seconds)
    n_samples = setup.total_steps // setup.sample_steps + 1
    total = per_step * setup.total_steps + per_sample * n_samples
    msg = (f"{per_step * 1e3:.3g} ms per step over {n} trial steps and {per_sample * 1e3:.3g} ms per "
           f"sample; {setup.total_steps} steps and {n_samples} samples: about {human_seconds(total)}")
    long = total > LONG_RUN_SECONDS
    if long:
        msg += ("; a run this long is best queued (wavesweep submit; work checkpoints it) -- "
                "check evolve.duration and evolve.dt")
    return Finding("run time", "warn" if long else "ok", msg,
                   {"seconds_per_step": per_step, "seconds_per_sample": per_sample,
                    "estimate_seconds": total})


# A run estimated above a week is told (a duration or dt off by a factor
# of 1000 looks like this); it still runs: long runs are legitimate.
LONG_RUN_SECONDS = 7 * 86400.0


def human_seconds(seconds: float) -> str:
    """A duration as people read it: 3.2 s, 41 s, 17 min, 2.5 h, 9.3 days, 2.1e+04 years."""
    if seconds < 90:
        return f"{seconds:.2g} s" if seconds < 10 else f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    if seconds < 3 * 86400:
        return f"{seconds / 3600:.1f} h"
    if seconds < 365.25 * 86400:
        return f"{seconds / 86400:.1f} days"
    return f"{seconds / (365.25 * 86400):.3g} years"


def assess(setup) -> list[Finding]:
    """Every criterion that needs no trial run, in report order: momentum
    over the run, margins, time step, time aliasing, resolution of V,
    sizes, detectors, absorbers, disk.  ``run`` and ``submit`` refuse
    error-level findings; ``check`` adds memory, the timed trial and, with
    a tolerance, the pilot."""
    dyn = dynamics(setup)
    out = momentum_findings(setup, dyn)
    out += margin_findings(setup)
    out.append(time_step_finding(setup, dyn))
    if setup.scheme.in_place_transform:
        u = setup.units
        out.append(_aliasing_finding(setup, u.unit_label("time"), u.factor("time")))
    res = resolution_finding(setup)
    if res is not None:
        out.append(res)
    out += size_findings(setup.grid)
    out += detector_findings(setup)
    out += screen_sampling_findings(setup, dyn)
    out += spectrum_sampling_findings(setup, dyn)
    out += absorber_findings(setup, dyn)
    out += mean_field_findings(setup, dyn)
    out.append(disk_finding(setup))
    return out


def screen_sampling_findings(setup, dyn) -> list[Finding]:
    """A resolved detector's time integral (screen_probability) is the
    trapezoidal rule over the samples: it needs samples that resolve the
    flux.  The flux at a point of the screen rises and falls while the
    packet passes, in about T = sigma_x / v_max (sigma_x the narrowest
    part's initial spread along the screen's normal, which only grows;
    v_max the fastest motion along it over the run, the 6 sigma_p reach):
    a warning when record.every exceeds T (common practice; for a Gaussian
    peak of width s the trapezoid with spacing h errs by about
    exp(-2 pi^2 s^2 / h^2), 3e-9 at h = s, by the Poisson summation formula)."""
    screens = [(n, d) for n, d in enumerate(setup.detectors) if getattr(d, "resolved", False)]
    if not screens:
        return []
    u = setup.units
    tf, T = u.factor("time"), u.unit_label("time")
    every = setup.sample_steps * setup.dt
    out = []
    for n, det in screens:
        v_max = dyn.over_run[6][det.axis] / setup.mass
        width = min(float(m.sigma_x[det.axis]) for m in packet_moments(setup))
        if v_max <= 0 or not width > 0:
            continue
        passing = width / v_max
        if every > passing:
            out.append(Finding("detector", "warn",
                f"{det.name!r} is resolved, and its pattern (screen_probability) integrates the samples by the "
                f"trapezoidal rule: record.every = {every / tf:.4g} {T} is longer than the time the packet "
                f"takes to pass a point of it (about {passing / tf:.4g} {T}: its spread "
                f"{width / u.factor('length'):.4g} {u.unit_label('length')} over its fastest speed); set "
                f"record.every to {passing / tf:.2g} {T} or less",
                {"detector": det.name, "every": every / tf, "passing_time": passing / tf}, field="record.every"))
    return out


def spectrum_sampling_findings(setup, dyn) -> list[Finding]:
    """A line's or plane's surface-flux spectrum (``spectrum = true``) is a
    time transform over the samples: each transverse row oscillates at its
    normal energy (:mod:`wavesweep.analysis.plane_spectrum`), so normal
    energies up to E_max (the packet's reach along the detectors' normal
    over the run, the 6 sigma_p reach, plus -min V for bound parts) alias
    unless record.every < pi hbar / E_max (the Poisson summation formula);
    the spectrum would be refused after the run, so it is said before it."""
    one_d = setup.grid.ndim == 1 and not setup.grid.radial and getattr(setup, "frame", None) is None
    lines = [d for d in setup.detectors if one_d or (getattr(d, "spectrum", False) and setup.grid.ndim > 1)]
    if not lines:
        return []
    u = setup.units
    tf, T = u.factor("time"), u.unit_label("time")
    every = setup.sample_steps * setup.dt
    reach = float(dyn.over_run[6][lines[0].axis]) ** 2 / (2 * setup.mass)   # one normal axis (validation)
    e_max = reach - min(float(np.min(setup.recorded_potential())), 0.0)
    if not e_max > 0 or every * e_max < math.pi:
        return []
    need = math.pi / e_max
    names = ", ".join(repr(d.name) for d in lines)
    values = {"every": every / tf, "every_needed": need / tf}
    aliases = (f"record.every = {every / tf:.4g} {T} aliases energies above "
               f"{math.pi / every / u.factor('energy'):.4g} {u.unit_label('energy')}, and the packet's normal "
               f"energy reaches {e_max / u.factor('energy'):.4g} {u.unit_label('energy')}")
    if one_d:   # every 1D detector records what a spectrum needs, asked for or not: said, not a warning
        return [Finding("detector", "ok", f"spectra (`wavesweep spectrum`): {aliases}, so they will be refused "
                                          f"for this run; for spectra set record.every to {need / tf:.2g} {T} or "
                                          "less (the run itself is not affected)", values, field="record.every")]
    return [Finding("detector", "warn",
                    f"{names} record{'s' if len(lines) == 1 else ''} a spectrum, a time transform over the samples: "
                    f"{aliases}; set record.every to {need / tf:.2g} {T} or less", values, field="record.every")]


# ---------------------------------------------------------------------------
# Coupled surfaces: the single-surface criteria per potential curve
# ---------------------------------------------------------------------------
class SurfaceView:
    """One potential curve of a coupled set-up (a
    :class:`~wavesweep.setup.CoupledSetup`) as the single-surface criteria
    read a set-up: a diabatic surface V_ss (its own terms, time dependence
    included) or an adiabatic curve (the k-th eigenvalue of the static
    potential matrix at each point), the packet's phase-space ensemble
    moved onto it.

    A hop between surfaces conserves the total energy: a part of the packet
    with centre x0 and momentum p on its own surface ``inc`` has, on the
    curve c, kinetic energy p^2/2m + V_inc(x0) - V_c(x0) there.  The
    ensemble (``ensemble``, one :class:`Moments` per Gaussian part, or the
    measured moments of each surface's share of psi0) keeps its positions
    and widths and takes momenta with that energy: per axis the fast end
    |p0| + 6 sigma_p (and the slow one |p0| - 6 sigma_p) go to
    sqrt(p^2 + 2 m dV), 0 where the curve is closed there; a packet whose
    6-sigma range holds p = 0 stays centred at rest.  In 2D/3D the whole of
    dV goes to each axis (an upper bound).  Trajectories on the curve then
    carry the energies the packet can have on it wherever it goes.  Where
    a coupling depends on time (a field driving the transition), the
    transition is vertical (the Franck-Condon principle: position and
    momentum kept, the field supplying the energy): the momenta are then
    kept at least (dV < 0 counts as 0)."""

    def __init__(self, setup, name: str, potential, terms, ensemble, diabatic: bool, holds_packet: bool):
        self.name = name
        self.diabatic = diabatic
        self.holds_packet = holds_packet   # a diabatic surface the packet starts on (else reached by a hop)
        self.curve_key = f"|curve {name}"
        self.grid, self.mass, self.units = setup.grid, setup.mass, setup.units
        self.dt, self.duration, self.total_steps = setup.dt, setup.duration, setup.total_steps
        self.sample_steps = setup.sample_steps
        self.scheme, self.detectors, self.packet = setup.scheme, setup.detectors, setup.packet
        self.terms = self.lab_terms = list(terms)
        self.frame, self.interaction, self.contact = None, None, 0.0
        self.ensemble = ensemble
        self.psi0 = np.sqrt(np.sum(np.abs(setup.psi0) ** 2, axis=0))   # where the packet is, on any surface
        self._potential = np.asarray(potential, float)
        self._setup = setup

    @property
    def absorber(self):
        return self._setup.absorber

    @property
    def job(self):   # the set-up's, its CAP tuned once the set-up is built
        return self._setup.job

    @property
    def label(self) -> str:
        return f"surface {self.name}" if self.diabatic else f"adiabatic curve {self.name}"

    def hamiltonian_static_potential(self) -> np.ndarray:
        return self._potential


@dataclass
class CoupledDynamics:
    """:class:`Dynamics` of each curve of a coupled set-up (``views``,
    ``each``, in the same order) and what they make together: ``windows``
    face -> (e_lo, e_hi), the union of the curves' windows that reach the
    face (of all of them where none does), ``drivers`` face -> (the curve
    setting e_lo, the one setting e_hi), ``unreached`` the faces no curve
    reaches."""

    views: list
    each: list
    windows: dict
    drivers: dict
    unreached: set

    def merged(self) -> Dynamics:
        """One :class:`Dynamics` for the criteria judged on the union
        (absorber windows), its other fields the first curve's."""
        first = self.each[0]
        return Dynamics(first.initial, first.over_run, first.reach, first.freed, self.windows,
                        first.nonseparable, first.bound, set(self.unreached))


def _surface_ensembles(setup) -> list:
    """(incident surface index, :class:`Moments`) of each part of a coupled
    packet: its Gaussian parts with the surface each names, or the measured
    moments of each surface's share of psi0."""
    names, packet = list(setup.surfaces), setup.packet
    if all_gaussian(packet):
        members = [packet] if packet.get("surface") is not None else packet["packets"]
        out = []
        for member in members:
            s = names.index(member["surface"])
            one = _PlainPacket(setup.grid, setup.mass, {k: v for k, v in member.items() if k != "surface"}, None)
            out += [(s, m) for m in packet_moments(one)]
        return out
    out = []
    for s, psi in enumerate(setup.psi0):
        if float(np.sum(np.abs(psi) ** 2)) * setup.grid.cell_volume > 1e-12:
            out += [(s, m) for m in packet_moments(_PlainPacket(setup.grid, setup.mass, packet, psi))]
    return out


@dataclass
class _PlainPacket:
    """What :func:`packet_moments` reads of a set-up: grid, mass, packet, psi0."""
    grid: object
    mass: float
    packet: dict
    psi0: object


def _moved_moments(mom: Moments, gain: float, mass: float) -> Moments:
    """``mom`` with its momenta given ``gain`` (hartree) more kinetic energy
    per axis (see :class:`SurfaceView`)."""
    p0, sp = np.empty_like(mom.p0), np.empty_like(mom.sigma_p)
    for i in range(mom.p0.size):
        a, w = abs(float(mom.p0[i])), float(mom.sigma_p[i])
        hi = math.sqrt(max((a + 6 * w) ** 2 + 2 * mass * gain, 0.0))
        if a <= 6 * w:   # the packet holds p = 0 along this axis: it goes either way
            p0[i], sp[i] = 0.0, hi / 6.0
        else:
            lo = math.sqrt(max((a - 6 * w) ** 2 + 2 * mass * gain, 0.0))
            p0[i], sp[i] = math.copysign(0.5 * (hi + lo), float(mom.p0[i])), (hi - lo) / 12.0
    return Moments(mom.x0.copy(), mom.sigma_x.copy(), p0, sp)


def reachable_surfaces(setup, start: set) -> set:
    """The surfaces (indices) the couplings of a coupled set-up connect, through
    any chain of pairs, to those in ``start`` (``start`` included)."""
    pairs = [pair for pair, terms in setup.coupling_terms.items() if terms]
    seen, grew = set(start), True
    while grew:
        grew = False
        for a, b in pairs:
            if (a in seen) != (b in seen):
                seen |= {a, b}
                grew = True
    return seen


_COUPLED_OF: weakref.WeakKeyDictionary = weakref.WeakKeyDictionary()


def coupled_dynamics(setup) -> CoupledDynamics:
    """The classical criteria's dynamics on every curve a coupled packet can
    be on (kept per set-up): each diabatic surface the couplings connect to
    the packet's and, where surfaces are coupled, each adiabatic curve of
    the static potential matrix (a time-dependent matrix: its static part;
    the diabatic surfaces carry their time dependence).  Each curve's
    :class:`Dynamics` is the single surface's (:func:`dynamics` on a
    :class:`SurfaceView`)."""
    cached = _COUPLED_OF.get(setup)
    if cached is not None:
        return cached
    h = setup.surface_hamiltonian
    v = h.matrix(None)
    n = len(setup.surfaces)
    parts = _surface_ensembles(setup)
    occupied = {s for s, _ in parts}
    curves = [(setup.surfaces[s], v[s, s], setup.surface_terms[s], True, s in occupied)
              for s in sorted(reachable_surfaces(setup, occupied))]
    if any(terms for terms in setup.coupling_terms.values()) and n > 1:
        eig = np.linalg.eigvalsh(np.moveaxis(v.reshape(n, n, -1), -1, 0))   # (points, S), ascending
        curves += [(str(k + 1), eig[:, k].reshape(setup.grid.shape), [], False, False) for k in range(n)]
    views, each = [], []
    # a field that couples the surfaces moves the packet vertically (Franck-Condon: x and p kept, the
    # photon's energy supplied): its momenta at least are kept on every curve
    driven = any(term.time_dependent for terms in setup.coupling_terms.values() for term in terms)
    for name, potential, terms, diabatic, holds in curves:
        ensemble = []
        for s, mom in parts:
            at = mom.x0[None, :]
            gain = float(interpolate_on_grid(v[s, s], setup.grid, at)[0]
                         - interpolate_on_grid(potential, setup.grid, at)[0])
            ensemble.append(_moved_moments(mom, max(gain, 0.0) if driven else gain, setup.mass))
        view = SurfaceView(setup, name, potential, terms, ensemble, diabatic, holds)
        views.append(view)
        each.append(dynamics(view))
    windows, drivers, unreached = {}, {}, set()
    for face in set().union(*(d.windows for d in each)):
        having = [(view, d) for view, d in zip(views, each) if face in d.windows]
        reached = [(view, d) for view, d in having if face not in d.unreached]
        if not reached:
            unreached.add(face)
        use = reached or having
        lo_view, lo_dyn = min(use, key=lambda vd: vd[1].windows[face][0])
        hi_view, hi_dyn = max(use, key=lambda vd: vd[1].windows[face][1])
        windows[face] = (lo_dyn.windows[face][0], hi_dyn.windows[face][1])
        drivers[face] = (lo_view.label, hi_view.label)
    out = CoupledDynamics(views, each, windows, drivers, unreached)
    _COUPLED_OF[setup] = out
    return out


def _driven_by(finding: Finding, view) -> Finding:
    """``finding`` (a single-surface criterion judged on ``view``) saying which curve drives it."""
    finding.message = f"{view.label}: {finding.message}"
    finding.values = {**finding.values, "surface": view.name, "diabatic": view.diabatic}
    return finding


def coupled_findings(setup) -> list[Finding]:
    """The criteria of a job on coupled surfaces (a
    :class:`~wavesweep.setup.CoupledSetup`): the single-surface criteria
    judged on every curve the packet can be on (:func:`coupled_dynamics`:
    each diabatic surface and each adiabatic curve, energy conserved by a
    hop) and the worst kept, each finding naming the curve that drives it:
    momentum reach over the run against k_max (per axis), the packet's
    margins, the phase per step, the resolution of every V_ss and V_ab
    (of the adiabatic curves with record.adiabatic, for its populations), sizes, detectors (inside a layer; reached by no
    curve's trajectories), the absorber per face over the union of the
    curves' windows, and disk.

    Phase per step (<= 1 rad is common practice; above pi it wraps): of the
    potential matrix, the range of the eigenvalues of V(r, t)
    (:func:`potential_eigen_range`: a time-dependent V at every step, or
    at least at every sample of the record) over the region the curves'
    trajectories visit (the whole
    grid's range is reported too); of the kinetic energy, the largest the
    curves' trajectories reach over the run."""
    u = setup.units
    tf, T = u.factor("time"), u.unit_label("time")
    dt, h = setup.dt, setup.hamiltonian
    cd = coupled_dynamics(setup)
    out = []
    rank = {"ok": 0, "warn": 1, "error": 2}
    for i in range(setup.grid.ndim):   # momentum: per axis, the worst curve (then the farthest-reaching)
        found = []
        for view, dyn in zip(cd.views, cd.each):
            f = _driven_by(momentum_findings(view, dyn)[i], view)
            if not view.holds_packet and f.level == "error":
                # how much of the packet a hop puts on this curve the classical criteria cannot tell: the
                # shares are of the ensemble moved onto it; a warning, not a refusal
                f.level = "warn"
                f.message += ("; shares are of the packet as if all of it moved onto this curve (a hop): how "
                              "much does is not judged here (the run measures each surface's momentum at the "
                              "grid's edge and says whether its numbers suffer)")
            found.append(f)
        out.append(max(found, key=lambda f: (rank[f.level], f.values["run_reach"] / f.values["k_max"])))
    start = copy.copy(cd.views[0])
    start.ensemble = None   # the margins: where the packet starts, measured if it is not Gaussian parts
    out += margin_findings(start)
    # the region the curves' trajectories visit (as one surface judges V there: a wall never entered
    # turns no phase that matters); the whole grid without trajectories
    reaches = [d.reach for d in cd.each if d.reach is not None]
    box = None
    if reaches:
        box = tuple(slice(max(0, int(np.searchsorted(ax.coordinates, min(r.visited[i][0] for r in reaches))) - 1),
                          int(np.searchsorted(ax.coordinates, max(r.visited[i][1] for r in reaches))) + 1)
                    for i, ax in enumerate(setup.grid.axes))
    lowest, highest, seen_lo, seen_hi = potential_eigen_range(setup, box)
    v_span = highest - lowest
    v_seen = seen_hi - seen_lo if seen_hi >= seen_lo else v_span
    e_runs = [sum(r**2 for r in d.over_run[6]) / (2 * setup.mass) for d in cd.each]
    k = int(np.argmax(e_runs))
    e_kin = e_runs[k]
    kin_phase, pot_phase = e_kin * dt, v_seen * dt
    phase = max(kin_phase, pot_phase)
    level = "ok" if phase <= 1.0 else ("warn" if phase <= math.pi else "error")
    exact = bool(getattr(setup.scheme, "exact_in_time", False)) and not h.time_dependent
    if exact:   # a converged expansion of exp(-i H dt) (chebyshev): no splitting, no phase to wrap
        level = "ok"
    if v_span * dt > 1e3 * math.pi and level == "ok":
        level = "warn"   # no wall needs a phase of thousands of turns per step: a unit is off
    msg = ("exact for a static H at any dt (chebyshev): " if exact else "") + (
           f"coupled surfaces, phase per step: highest kinetic energy over the run ({cd.views[k].label}) "
           f"{kin_phase:.3g} rad, eigenvalues of the potential matrix over the region the packet visits "
           f"{pot_phase:.3g} rad (<= 1 is common practice; above pi it wraps), over the whole grid "
           f"{v_span * dt:.3g} rad; the grid's highest kinetic energy "
           f"{setup.grid.kinetic_max(setup.mass) * dt:.3g} rad (dt = {dt / tf:g} {T})")
    if level != "ok" and not exact:
        msg += f"; use dt <= {1.0 / max(e_kin, v_seen, 1e-300) / tf:.3g} {T}"
    out.append(Finding("time step", level, msg,
                       {"run_phase": kin_phase, "potential_phase": pot_phase, "grid_potential_phase": v_span * dt,
                        "surface": cd.views[k].name, "grid_phase": setup.grid.kinetic_max(setup.mass) * dt},
                       field="evolve.dt"))
    out += _coupled_resolution(setup, cd)
    out += size_findings(setup.grid)
    out += detector_findings(cd.views[0])
    out += _detectors_reached(setup, cd)
    merged = cd.merged()
    if merged.reach is not None:   # a wall any curve's trajectories reach (without absorber: reflected)
        edges = [any(d.reach.edges_reached[i] for d in cd.each if d.reach is not None)
                 for i in range(setup.grid.ndim)]
        merged.reach = dataclasses.replace(merged.reach, edges_reached=edges)
    found = absorber_findings(cd.views[0], merged)
    for f in found:
        face = f.values.get("face")
        if face in cd.drivers:
            lo, hi = cd.drivers[face]
            f.message += (f"; window over the curves: its low end from {lo}, its high end from {hi}"
                          if lo != hi else f"; window from {hi}")
            f.values = {**f.values, "surface_low": lo, "surface_high": hi}
    out += found
    out.append(disk_finding(setup))
    return out


# Point-times the phase check evaluates a time-dependent potential matrix
# at (about 0.1 s of work), and times at most (each evaluates the terms: about
# 0.1 ms); beyond, the times thin out, to the record's samples at the most.
PHASE_POINT_TIMES = 4_000_000
PHASE_TIMES_MAX = 2000
# The whole grid's range (a report only; the region visited is judged) at this many times.
GRID_PHASE_TIMES = 33


def local_eigen_range(v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(lowest, highest) eigenvalue at each point of a real symmetric
    potential matrix ``v`` (S, S, *points): for two surfaces the closed
    form (V_aa + V_bb)/2 -/+ sqrt(((V_aa - V_bb)/2)^2 + V_ab^2), beyond
    numpy.linalg.eigvalsh per point."""
    if v.shape[0] == 1:
        return v[0, 0], v[0, 0]
    if v.shape[0] == 2:
        mean, half = 0.5 * (v[0, 0] + v[1, 1]), 0.5 * (v[0, 0] - v[1, 1])
        root = np.sqrt(half * half + v[0, 1] * v[0, 1])
        return mean - root, mean + root
    eig = np.linalg.eigvalsh(np.moveaxis(v, (0, 1), (-2, -1)))
    return eig[..., 0], eig[..., -1]


def potential_eigen_range(setup, box=None) -> tuple[float, float, float, float]:
    """(lowest, highest) eigenvalue of the potential matrix V(r, t) over the
    grid and over the region ``box`` (a tuple of slices; None: the grid),
    hartree, over the run.  A time-dependent V is evaluated over ``box`` at
    every step's start (a pulse shorter than the record's interval is not
    missed), or, where steps x points exceed :data:`PHASE_POINT_TIMES` or
    steps :data:`PHASE_TIMES_MAX`, at every few steps, at least at every
    sample of the record; the
    whole grid at :data:`GRID_PHASE_TIMES` times (reported, not judged).
    Only the time-dependent terms are evaluated per time, on the box's
    coordinates."""
    h = setup.hamiltonian
    static = h.matrix(None)
    lo, hi = local_eigen_range(static)
    lowest, highest = float(lo.min()), float(hi.max())
    box = box if box is not None else tuple(slice(None) for _ in setup.grid.axes)
    seen = (slice(None), slice(None)) + tuple(box)
    if not h.time_dependent:
        lo, hi = lo[box], hi[box]
        return (lowest, highest, *((float(lo.min()), float(hi.max())) if lo.size else (lowest, highest)))
    grid = setup.grid
    for t in np.linspace(0.0, setup.duration, GRID_PHASE_TIMES):
        lo, hi = local_eigen_range(h.matrix(float(t)))
        lowest, highest = min(lowest, float(lo.min())), max(highest, float(hi.max()))
    part = static[seen]
    if part[0, 0].size == 0:
        return lowest, highest, lowest, highest
    # the box's coordinates, broadcastable as the grid's mesh is
    mesh = {}
    for i, ax in enumerate(grid.axes):
        shape = [1] * grid.ndim
        coords = ax.coordinates[box[i]]
        shape[i] = coords.size
        mesh[ax.name] = coords.reshape(shape)
    moving = [(a, a, term) for a, terms in enumerate(h.surface_terms) for term in terms if term.time_dependent]
    moving += [(a, b, term) for (a, b), terms in h.couplings.items() for term in terms if term.time_dependent]
    factored = []
    for a, b, term in moving:   # f(t) g(r): g once, only the scalar f(t) per time
        sep = term.separable()
        if sep is not None:
            g, f = sep
            factored.append((a, b, term, np.broadcast_to(np.asarray(g(mesh), float), part.shape[2:]), f))
        else:
            factored.append((a, b, term, None, None))
    steps = int(setup.total_steps)
    stride = max(1, math.ceil((steps + 1) * part[0, 0].size / PHASE_POINT_TIMES),
                 math.ceil((steps + 1) / PHASE_TIMES_MAX))
    stride = min(stride, int(setup.sample_steps))   # the record's samples at least
    at = np.unique(np.append(np.arange(0, steps + 1, stride), steps)) * setup.dt
    seen_lo, seen_hi = math.inf, -math.inf
    for t in at:
        v = part.copy()
        for a, b, term, g, f in factored:
            value = g * float(f(float(t))) if g is not None else np.broadcast_to(
                np.asarray(term.at_time(mesh, float(t)), float), v.shape[2:])
            v[a, b] += value
            if a != b:
                v[b, a] += value
        lo, hi = local_eigen_range(v)
        seen_lo, seen_hi = min(seen_lo, float(lo.min())), max(seen_hi, float(hi.max()))
    return min(lowest, seen_lo), max(highest, seen_hi), seen_lo, seen_hi


def _coupled_resolution(setup, cd: CoupledDynamics) -> list[Finding]:
    """:func:`resolution_finding` of each V_ss and V_ab (static parts), the
    worst kept, naming it: the dynamics run on this diabatic matrix (the
    local exponential of V at each point, the kinetic step per surface), so
    its elements are what the grid must resolve.  The adiabatic curves
    (eigenvalues of V at each point) have a cusp where two of them meet (a
    conical intersection, an avoided crossing of small coupling): it costs
    the dynamics nothing, but ``record.adiabatic``'s populations are a
    quadrature of the local eigenvectors, which turn there within a few dx,
    so with record.adiabatic on, the curves' resolution is judged for those
    populations (a second finding, field ``record.adiabatic``)."""
    v = setup.hamiltonian.matrix(None)
    n = len(setup.surfaces)
    named = [(f"surface {setup.surfaces[a]}", v[a, a]) for a in range(n)]
    named += [(f"coupling {setup.surfaces[a]}-{setup.surfaces[b]}", v[a, b]) for a, b in sorted(setup.coupling_terms)]
    out = []
    worst = _worst_resolution(cd.views[0], named)
    if worst is not None:
        name, f = worst
        f.message = f"{name}: {f.message}" if f.level != "ok" else f"{f.message} (worst: {name})"
        f.values = {**f.values, "surface": name}
        out.append(f)
    curves = [(view.label, view.hamiltonian_static_potential()) for view in cd.views if not view.diabatic]
    if getattr(setup, "adiabatic", False) and curves:
        worst = _worst_resolution(cd.views[0], curves)
        if worst is not None and worst[1].level != "ok":
            name, f = worst
            axis = f.values.get("axis", setup.grid.axes[0].name)
            f.message = (f"{name}: {axis}: features sharper than the grid resolves "
                         f"({f.values.get('unresolved_weight', 0.0):.1e} of its spectral power above half the "
                         f"resolved wave numbers; limit {UNRESOLVED_WEIGHT_MAX:.0e}), where adiabatic curves meet: "
                         "the dynamics run on the diabatic matrix and do not suffer, but population_adiabatic "
                         "(record.adiabatic) sums eigenvectors that turn within a few dx there and converges "
                         f"only slowly with dx; for those populations use more points along {axis}, or leave "
                         "record.adiabatic out")
            f.values = {**f.values, "surface": name}
            f.field = "record.adiabatic"
            out.append(f)
    return out


def _worst_resolution(view, named) -> tuple | None:
    """(name, :func:`_resolution_of` finding) of the worst of ``named``
    (name, potential) pairs, or None where none has a finding."""
    worst = None
    for name, potential in named:
        f = _resolution_of(view, potential)
        if f is None:
            continue
        key = (f.level != "ok", f.values.get("unresolved_weight", 0.0))
        if worst is None or key > worst[0]:
            worst = (key, name, f)
    return None if worst is None else (worst[1], worst[2])


def _detectors_reached(setup, cd: CoupledDynamics) -> list[Finding]:
    """A detector that no curve's classical trajectories reach within the
    run (outside the layers) records nothing but what tunnels there: a
    warning naming it."""
    u = setup.units
    lf, L = u.factor("length"), u.unit_label("length")
    reaches = [d.reach for d in cd.each if d.reach is not None]
    if not reaches:
        return []
    out = []
    for n, det in enumerate(setup.detectors):
        lo = min(r.visited[det.axis][0] for r in reaches)
        hi = max(r.visited[det.axis][1] for r in reaches)
        if lo <= det.position <= hi:
            continue
        ax = setup.grid.axes[det.axis]
        out.append(Finding("detector", "warn",
            f"{det.name!r} at {ax.name} = {det.position / lf:.4g} {L}: no classical trajectory of the packet "
            f"reaches it within the run on any surface or adiabatic curve (they cover {ax.name} = "
            f"{lo / lf:.4g} to {hi / lf:.4g} {L}); it records only what tunnels there: move it, or lengthen "
            "evolve.duration", {"detector": det.name, "reached": False}, field=f"detector.{n}.{ax.name}"))
    return out


def mean_field_findings(setup, dyn: Dynamics) -> list[Finding]:
    """What the classical criteria above leave out for a Gross-Pitaevskii
    job: the mean-field energy per atom g N |psi|^2 (at most |g N|
    max|psi0|^2, hartree) can turn into kinetic energy when the cloud
    expands, so it can give momenta up to p = sqrt(2 m |g N| max|psi0|^2)
    that the momentum reach (classical trajectories of the linear
    Hamiltonian) does not contain.  Each axis whose k_max that p exceeds is
    a warning naming the setting (the absorbers' windows,
    :attr:`Dynamics.windows`, add that energy and their tuning with them);
    no interaction, no finding."""
    e_mf = mean_field_energy(setup)
    if e_mf == 0.0:
        return []
    u = setup.units
    ef, E = u.factor("energy"), u.unit_label("energy")
    p_mf = math.sqrt(2.0 * setup.mass * e_mf)
    out = []
    for ax in setup.grid.axes:
        if p_mf > ax.k_max:
            out.append(Finding("momentum", "warn",
                f"the mean-field energy {e_mf / ef:.4g} {E} per atom can become momentum up to "
                f"{p_mf / ax.k_max:.2f} times the grid's largest along {ax.name} as the cloud expands "
                "(the classical reach leaves the interaction out); use more points",
                {"mean_field_energy": e_mf / ef, "mean_field_momentum_ratio": p_mf / ax.k_max},
                field=f"grid.{ax.name}.points"))
    if not out:
        out.append(Finding("momentum", "ok",
            f"mean-field energy {e_mf / ef:.4g} {E} per atom: within the grid's momenta (the absorbers' "
            "windows include it)", {"mean_field_energy": e_mf / ef}))
    return out


def mean_field_energy(setup) -> float:
    """|g N| max|psi0|^2 (hartree): the most mean-field energy per atom an
    expanding condensate can turn into motion; 0 without an interaction."""
    g_n = float(getattr(setup, "contact", 0.0) or 0.0)
    return abs(g_n) * float(np.max(np.abs(setup.psi0) ** 2)) if g_n else 0.0


def run_warnings(setup) -> list[str]:
    """The set-up's warn and error findings as one line each
    (``"field: message"``): what analysis of a finished run repeats beside
    its numbers, so that a number from an inadequate run never comes alone.

    Judged once per physics: ``preflight`` (run, submit) stores them with
    :func:`remember_run_warnings` and a worker's run reads them back instead
    of integrating the trajectories again (0.6 s of a 20-step run).  A
    set-up on coupled surfaces: :func:`coupled_findings`."""
    key = _warnings_key(setup)
    hit = _read_warnings(key)
    if hit is not None:
        return hit
    lines = warning_lines(coupled_findings(setup) if getattr(setup, "coupled", False) else assess(setup))
    _write_warnings(key, lines)
    return lines


def warning_lines(findings) -> list[str]:
    """:func:`run_warnings`' lines of a list of findings (from :func:`assess`)."""
    return [f"the run's set-up: {f.field or f.topic}: {f.message}"
            for f in findings if f.level != "ok" and f.topic not in ("disk", "defaults")]


def remember_run_warnings(setup, findings) -> None:
    """Store the run warnings of ``findings`` (:func:`assess` of ``setup``)
    for the run of this physics, wherever it runs (same cache folder)."""
    _write_warnings(_warnings_key(setup), warning_lines(findings))


def _warnings_key(setup) -> str:
    """The run id (the physics) and this module's source: a change of a
    criterion never reuses old lines."""
    global _REVISION
    if _REVISION is None:
        with open(__file__, "rb") as f:
            _REVISION = hashlib.sha256(f.read()).hexdigest()[:16]
    return f"{setup.job.run_id}-{_REVISION}"


_REVISION = None


def _warnings_path(key: str) -> str:
    return os.path.join(os.path.dirname(wisdom_path()), "run-warnings", f"{key}.json")


def _read_warnings(key: str):
    try:
        with open(_warnings_path(key)) as f:
            lines = json.load(f)
    except (OSError, ValueError):
        return None
    if isinstance(lines, list) and all(isinstance(x, str) for x in lines):
        return lines
    return None     # a damaged entry: judge again


def _write_warnings(key: str, lines) -> None:
    path = _warnings_path(key)
    try:
        os.makedirs(os.path.dirname(path), exist_ok=True)
        write_text_atomic(path, json.dumps(list(lines)))
    except OSError:
        pass   # a read-only or full cache folder: the run judges them itself



# ---------------------------------------------------------------------------
# Measured during a run: momentum at the edge of the grid's range
# ---------------------------------------------------------------------------
# The band of each axis's wave numbers called "the edge": |k| > EDGE_FRACTION
# k_max.  A state that holds weight there has (or soon has) momentum beyond
# k_max, which wraps round the grid.  Our own choice, judged on the
# trial's cases (DEVELOPERS.md "Momentum at the edge").
EDGE_FRACTION = 0.9
# Weight (of the whole packet, on one surface, largest over the run) in the
# edge band above which a run says its numbers can be off.  Measured on the
# Wren demo (jobs/wren-photodissociation.toml) by grid points: 191: 0.24
# (dark yield 0.49 instead of 0.70), 255: 1.8e-3 (the dark population
# 4e-6 off), 319: 9e-10, 383: 4e-16, 511: 5e-19; the linear crossing of
# the trial (lz) at 1279 points: 0.43 (the flux on "slope" through its detector 1.6e-4
# instead of 0.48), at 2559: 9e-20.  The limit matches the absorbers'
# target (ABSORBER_TARGET); our own choice.
EDGE_WEIGHT_MAX = 1e-6
# The stored weights: two significant digits, and 0 below a millionth of the
# limit (there a batch member and the same run alone differ in round-off,
# and their files must be the same).
EDGE_WEIGHT_FLOOR = 1e-12


def stored_edge_weight(w: float) -> float:
    """An edge weight as the result file stores it (see EDGE_WEIGHT_FLOOR)."""
    return float(f"{w:.2g}") if w >= EDGE_WEIGHT_FLOOR else 0.0


def momentum_edge_weights(psi, grid, fraction: float = EDGE_FRACTION) -> np.ndarray:
    """(surfaces, axes): the probability (of the whole state, summed over
    the other axes) with |k| > ``fraction`` k_max along each axis, per
    surface of a coupled psi (S, *grid) (a single-surface psi: one row).
    The momentum marginal of :func:`wavesweep.marginals.momentum_marginal`
    (FFT on periodic axes, orthonormal DST-I on box ones, Parseval), scaled
    by the surface's norm."""
    psi = np.asarray(psi)
    rows = psi[None] if psi.ndim == grid.ndim else psi
    out = np.zeros((rows.shape[0], grid.ndim))
    for s, one in enumerate(rows):
        norm = float(np.sum(np.abs(one) ** 2)) * grid.cell_volume
        if norm <= 0.0:
            continue
        for i, ax in enumerate(grid.axes):
            k, w = momentum_marginal(one, grid, i)
            out[s, i] = norm * float(np.sum(w[np.abs(k) > fraction * ax.k_max]))
    return out


def edge_warning_lines(setup, worst: np.ndarray, names=None) -> list[str]:
    """One line per surface and axis whose largest edge weight over the run
    (``worst``, (surfaces, axes) from :func:`momentum_edge_weights`) exceeds
    :data:`EDGE_WEIGHT_MAX`: the run's numbers on it are wrong (momentum
    wrapped round the grid), with the fix."""
    out = []
    names = list(names) if names is not None else [None] * worst.shape[0]
    for s, row in enumerate(np.atleast_2d(worst)):
        for i, ax in enumerate(setup.grid.axes):
            w = float(row[i])
            if not w > EDGE_WEIGHT_MAX:
                continue
            on = f"on surface {names[s]} " if names[s] is not None else ""
            more = nearest_fast_points_of(ax, math.ceil(1.5 * ax.points))
            out.append(f"grid.{ax.name}.points: measured during the run: {w:.2g} of the packet {on}had momentum "
                       f"within {1 - EDGE_FRACTION:.0%} of the grid's largest along {ax.name} (|k| > "
                       f"{EDGE_FRACTION:g} k_max; limit {EDGE_WEIGHT_MAX:.0e}): what goes beyond k_max wraps round "
                       f"the grid, so this run's numbers can be wrong by up to about that share; use more points "
                       f"along {ax.name} (same extent), e.g. {more} instead of {ax.points}, and run again")
    return out


def nearest_fast_points_of(ax, n: int) -> int:
    """The smallest point count >= ``n`` whose transform length has no
    prime factor above FAST_PRIME_MAX (:func:`transform_length` rule)."""
    extra = transform_length(ax) - ax.points
    m = n
    while _largest_prime_factor(m + extra) > FAST_PRIME_MAX:
        m += 1
    return m
