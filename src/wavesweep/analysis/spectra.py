"""Energy levels: stationary states of a job's Hamiltonian, and the levels
contained in a run's autocorrelation function.

Error estimates (:func:`level_errors`)
    Resolution: the same Hamiltonian (its terms evaluated on each grid) on
    grids with 0.8 and 0.64 times the points per axis.  Differences that
    grow towards the coarser grid give the observed order p and the error
    1.25 |E1 - E0| / (h1^p - 1) of the job's level (Richardson's estimate;
    Aitken's for the geometric or faster convergence of smooth potentials,
    whose levels alternate in sign, so magnitudes count).  Grids 0.8 apart
    keep that near the truth when convergence is faster than geometric.
    Where the convergence is algebraic (order <= 8, one sign: a cusp, a kink
    or a step of V; the radial -Z/r cusp gives dr^2 for l = 0, dr^3 for
    l = 1) the levels are Richardson-extrapolated from five grids (0.8^k, k
    = 0..4) in powers q..q+3 of dx, with 1.25 times the distance to the
    four-grid fit as the error bar, and reported when that bar is the
    smaller.  Measured, hydrogen on 3999 radial points (80 bohr): 1s, 2s,
    3s within 4e-9, 2e-9, 1.3e-9 relative (error bars 1.6e-8, 1e-8, 1.1e-8;
    the grid's own eigenvalues are off by 2.6e-4 ... 8.7e-5); the extra
    solves cost 0.5 s, against 2 s for the job's grid.
    Edge: a state that decays into an edge of the grid is shifted by it;
    the shift comes from the state's value next to the edge (see
    :func:`_edge_errors`), and its face names the setting (``grid.x.max``)
    when it dominates.
    Rounding: a few eps ||H|| plus r^2 / gap of the states' residuals.

Autocorrelation levels (:func:`autocorrelation_levels`)
    C(t) = <psi(0)|psi(t)> = sum_n |c_n|^2 exp(-i E_n t / hbar) of a run
    whose Hamiltonian does not depend on time; the windowed Fourier
    transform

        S(E) = (1 / 2 pi hbar) sum_j dt w(t_j) C(t_j) exp(i E t_j / hbar),

    over t_j = -T..T with C(-t) = conj C(t), peaks at the stationary energies
    E_n with heights |c_n|^2 (Feit, Fleck & Steiger, J. Comput. Phys. 47,
    412 (1982)).  With the Gaussian window w(t) = exp(-t^2 / 2 tau^2) every
    level is the Gaussian line |c_n|^2 tau / sqrt(2 pi) exp(-(E - E_n)^2
    tau^2 / 2 hbar^2), so ln S is a parabola around an isolated peak and its
    vertex, from three values of S, is E_n to rounding; the weight follows
    from the height.  tau = T/6 by default (the window is 1.5e-8 at the end
    of the record): lines have a standard deviation hbar/tau, and two lines
    u hbar/tau apart shift each other's vertex by about exp(u - u^2/2) / 2u
    of their spacing (measured on two equal lines: 2.3e-3 at u = 4, 8e-4 at
    4.3, 6e-5 at 5, 3e-8 at 6.5), and widen the fitted line by 4-5 times
    that (``line_width_ratio``; :attr:`AutocorrelationLevels.blended` flags
    more than :data:`BLENDED_WIDTH`).

    Samples dt apart alias every energy by 2 pi hbar / dt, so every level of
    weight >= min_weight must lie in one period.  Where they lie comes from
    the Gauss quadrature of psi(0)'s energy distribution that 20 to 240
    Lanczos steps give, whose Chebyshev-Markov-Stieltjes inequalities bound
    the weight beyond each node (:func:`energy_band`).  <H> +/- 6 Delta H
    was used before and is not enough: a sudden quench from a trap of 2w
    into w has |c_4|^2 = 4.4e-3 at 7.3 Delta H above <H> (it was missed),
    and a Gaussian packet in a double well (tests/integration/test_levels.py)
    has levels of weight 1e-6 at 34 Delta H, which aliased into the band as
    lines that are not levels.  That band is the one searched, and a
    sampling that aliases it is refused.

    A peak is a level only if its fitted line is no narrower than the
    window's and it rises above the truncation floor.  ln S of a sum of
    window lines with positive weights is -(E tau)^2 / 2 plus a log-sum-exp
    of functions linear in E, which is convex, so its second difference over
    any three evenly spaced points is never below the window's: a fitted
    width ratio below 1 (beyond :data:`NARROW_WIDTH`), on the scan's points
    or on the refined ones, is a side lobe or noise.  (Next to a close level
    ln S is no parabola over +/- hbar/tau and the refined vertex runs off
    towards the neighbour; the scan's vertex is kept then.)  Cutting the
    record at T adds at most w(T) tau^2 / T / pi to S next to a line, and
    that falls off as 1 / distance (:func:`truncation_floor`); with the
    default window (w(T) = 1.5e-8) it is 2e-9 of a line of unit weight, with
    a window tau = T / 2 (w(T) = 0.14) 5e-2.  Peaks below twice what the
    other lines put there are dropped.
"""
from __future__ import annotations

import copy
import math
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import scipy.fft
import scipy.linalg

from .._version import __version__
from ..eigen import (DEGENERATE_TOL, ITERATIVE_TOL, MAX_ITERATIONS, WINDOW_RATIO, block_size, check_residuals,
                     coarse_hamiltonian, coupled_eigenpairs, coupled_walls, eigenpairs, lobpcg_from,
                     recorded_energy_band, surface_weights, walled_potential)
from ..absorbers.layers import face_names
from ..errors import JobError, RunFailed
from ..grid import Axis, Grid
from ..imaginary_time import DEFAULT_TOLERANCE, ground_state
from ..io.paths import output_file
from ..io.record import LANCZOS_MAX_POINTS
from ..io.atomic import atomic_output
from ..io.results import open_result, result_units
from ..job import Job, job_from_dict, load_job
from ..setup import Model
from .recorded import run_record

__all__ = ["stationary_states", "condensate_ground_state", "level_errors", "LevelErrors", "write_states", "check_states_path",
           "coupled_stationary_states", "coupled_level_errors", "autocorrelation_levels", "AutocorrelationLevels", "truncation_floor"]

# -- stationary states -----------------------------------------------------------------
def stationary_states(setup_or_job, count: int, method: str = "auto", field: str = "count"):
    """The ``count`` lowest stationary states of a job.

    ``setup_or_job`` is a :class:`~wavesweep.run.Model` (or
    Setup), a :class:`~wavesweep.job.Job` or the path of a job file; the
    packet plays no part (a job or a path gets a Model, which never builds it).  Returns
    ``(energies_hartree, states)``: energies (hartree, ascending) and real
    states of shape ``(count, *grid.shape)`` in bohr^(-ndim/2), normalised on
    the grid.  See the module notes for the Hamiltonian (time-dependent
    terms at t = 0, no absorber) and the methods (``method``: ``"auto"``,
    ``"dense"`` or ``"iterative"``).  ``field`` names ``count`` in errors."""
    setup = _as_setup(setup_or_job)
    return eigenpairs(setup.hamiltonian, count, t=0.0, method=method, field=field)


def condensate_ground_state(setup_or_job, tolerance: float = DEFAULT_TOLERANCE):
    """The Gross-Pitaevskii ground state of a job with an [interaction]
    (its Hamiltonian at t = 0 without the absorber, g N included) by
    imaginary time (:func:`wavesweep.imaginary_time.ground_state`):
    ``(chemical_potential_hartree, energy_per_atom_hartree, psi)``, mu to
    ``tolerance`` (relative)."""
    setup = _as_setup(setup_or_job)
    # levels has no tolerance key of its own: a relaxation that cannot settle names the table
    psi, mu, energy, _ = ground_state(setup.hamiltonian, tolerance, field="interaction",
                                      tolerance_field="interaction")
    return mu, energy, psi


def _as_setup(obj):
    """A :class:`~wavesweep.run.Model` (a Setup is one) of a job: a
    job or a job file gets a Model, which never builds the packet."""

    if isinstance(obj, Model):
        return obj
    if isinstance(obj, (str, os.PathLike)):
        obj = load_job(obj)
    if isinstance(obj, Job):
        return Model(obj)
    raise TypeError(f"expected a Model, a Setup, a Job or a job file path, got {type(obj).__name__}")


# -- error estimates ---------------------------------------------------------------------
# Comparison grids have this many times the job's points along every axis, and
# their powers: 0.8, 0.64, ... (the three-grid study uses 0.8 and 0.64).  Grids
# close together keep the geometric-sequence estimate near the truth when the
# convergence is faster than geometric (spectral convergence of smooth
# problems): halving, an N = 32 harmonic well's ground level (true error
# 1e-7) was estimated at 4e-3 from its 16- and 8-point grids.
GRID_RATIO = 0.8
# Safety factor on estimates from an observed order (Roache's grid
# convergence index uses 1.25 for three-grid studies with the observed order;
# P. J. Roache, J. Fluids Eng. 116, 405 (1994); from memory).
SAFETY = 1.25
# The edge estimate is an asymptotic formula (see _edge_errors): a factor 2.
EDGE_SAFETY = 2.0
# Observed orders up to this are algebraic convergence (a cusp, a kink or a
# step of V: Richardson extrapolation applies); above it convergence is
# spectral and the grid's own eigenvalue is kept.
ALGEBRAIC_ORDER = 8.0
# Grids in the Richardson fit (the job's and RICHARDSON_GRIDS - 1 comparison
# grids): powers p, p+1, ..., p+3 of dx, p the observed order.
RICHARDSON_GRIDS = 5
# Comparison grids up to this size are diagonalised densely; larger ones by
# LOBPCG from the job's states (measured: 1638 radial points, dense 0.5 s,
# from the states 0.1 s).
COMPARISON_DENSE_POINTS = 512
# Eigenvalue rounding, in eps times the operator's scale (T_max + E - V_min).
# Measured: dense eigh and polished LOBPCG agree to 0.2 eps scale on 4000
# radial points (hydrogen, scale 1.2e4 hartree, differences <= 6e-13).
ROUNDING = 2.0
# LOBPCG's residual for comparison grids and for polishing an iterative
# answer, relative to the scale: r^2 / gap then lies below the rounding
# (measured: 0.1 s from the states on 4000 radial points).
POLISH_TOL = 1e-12
# A level whose estimated relative error exceeds this gets a note on stderr,
# and the note names the setting that would give ADVICE_TARGET.
NOTE_RELATIVE = 1e-6
ADVICE_TARGET = 1e-8


@dataclass(frozen=True)
class LevelErrors:
    """Levels of a job's grid with their estimated errors (hartree).

    ``energies``: the best estimate of each level of the job's Hamiltonian
    (the grid's eigenvalue, or its Richardson extrapolation dx -> 0 where
    ``extrapolated``); ``errors``: the estimated absolute error of
    ``energies`` (resolution plus edge); ``grid_energies``: the eigenvalues
    of the job's grid (those of the states); ``resolution_errors`` and
    ``edge_errors`` the two parts; ``orders``: the observed order of
    convergence in dx (NaN where none was seen); ``refine``: the dotted job
    field that gives more digits; ``advice``: one line when some level's
    relative error exceeds :data:`NOTE_RELATIVE`, else None."""

    energies: np.ndarray
    errors: np.ndarray
    grid_energies: np.ndarray
    resolution_errors: np.ndarray
    edge_errors: np.ndarray
    extrapolated: np.ndarray
    orders: np.ndarray
    refine: str
    advice: str | None


def level_errors(model, energies_hartree, states, method: str = "auto") -> LevelErrors:
    """Error estimates of the lowest levels of a job's grid (see the module
    notes, "Error estimates").

    ``model``: the :class:`~wavesweep.run.Model` (or Setup) the
    levels belong to; ``energies_hartree`` and ``states`` as
    :func:`stationary_states` returns them for it.  The same Hamiltonian
    (terms evaluated anew) is solved on grids with 0.8 and 0.64 times the
    points per axis (:data:`GRID_RATIO`); where the levels converge
    algebraically, on two more for a Richardson extrapolation."""
    h = model.hamiltonian
    grid = h.grid
    e0 = np.asarray(energies_hartree, float)
    count = e0.size
    v, keep = walled_potential(h, 0.0)
    floor, unresolved = _rounding_floor(h, v, keep, e0, states)
    ladder = [(1.0, e0)]
    tol = [ITERATIVE_TOL]

    def rung(k):
        while len(ladder) <= k:
            found = _comparison_levels(model, GRID_RATIO ** len(ladder), count, states, method, tol[0])
            if found is None:
                return None
            ladder.append(found)
        return ladder[k]

    def three_grid():
        rungs = [rung(1), rung(2)]
        resolution, orders = np.full(count, np.nan), np.full(count, np.nan)
        if None not in rungs:
            (h1, e1), (h2, e2) = rungs
            for n in range(count):
                resolution[n], orders[n] = _three_grid_error(ladder[0][1][n], e1[n], e2[n], h1, h2, floor[n])
        return resolution, orders

    resolution, orders = three_grid()
    best = e0.copy()
    extrapolated = np.zeros(count, bool)
    algebraic = np.isfinite(orders) & (orders > 0) & (orders <= ALGEBRAIC_ORDER) & (resolution > 1e3 * floor)
    if algebraic.any():
        # Richardson's weights amplify every eigenvalue's error (by ~70 for five grids 0.8
        # apart): iterative answers are polished to POLISH_TOL first (0.1 s on 4000 radial points)
        if unresolved:
            e0, polished = _iterative_from(h, count, states, grid)
            floor, _ = _rounding_floor(h, v, keep, e0, polished)
            best = e0.copy()
        del ladder[:]
        ladder.append((1.0, e0))
        tol[0] = POLISH_TOL
        resolution, orders = three_grid()
        algebraic &= np.isfinite(orders) & (orders > 0) & (orders <= ALGEBRAIC_ORDER)
        if all(rung(k) is not None for k in range(1, RICHARDSON_GRIDS)):
            spacings = np.array([ladder[k][0] for k in range(RICHARDSON_GRIDS)])
            table = np.array([ladder[k][1] for k in range(RICHARDSON_GRIDS)])
            for n in np.flatnonzero(algebraic):
                value, error = _richardson(spacings, table[:, n], orders[n], floor[n])
                if error < resolution[n]:
                    best[n], resolution[n], extrapolated[n] = value, error, True
    edge, faces = _edge_errors(model, model.hamiltonian.real_potential(0.0), e0, states)
    errors = resolution + edge
    refine, advice = _advice(model, best, errors, resolution, edge, faces, orders, extrapolated, states)
    return LevelErrors(energies=best, errors=errors, grid_energies=e0, resolution_errors=resolution,
                       edge_errors=edge, extrapolated=extrapolated, orders=np.abs(orders), refine=refine,
                       advice=advice)


def _rounding_floor(h, v, keep, energies, states):
    """``(floor, unresolved)``: what the eigensolver itself leaves in each
    eigenvalue (hartree), ROUNDING eps ||H|| (dense eigh is backward
    stable; ||H|| off the walls, up to T_max + max |V|) plus r^2 / gap for the residual r of the state (the Rayleigh
    quotient's error, e.g. Parlett, The Symmetric Eigenvalue Problem, ch.
    11; from memory); ``unresolved``: the r^2 / gap part exceeds the
    rounding (an iterative answer to ITERATIVE_TOL)."""
    # ||H|| on the points off the walls: T_max plus the largest |V| there
    scale = float(h.kinetic.max()) + float(np.max(np.abs(v if keep is None else v[keep])))
    unit = states * math.sqrt(h.grid.cell_volume)      # unit Euclidean norm
    residual = h.apply_static(unit, potential=v) - energies.reshape((-1,) + (1,) * h.grid.ndim) * unit
    if keep is not None:
        residual *= keep
    r = np.sqrt(np.sum(residual**2, axis=tuple(range(1, unit.ndim))))
    gaps = np.full(energies.size, scale)
    tol = DEGENERATE_TOL * max(float(np.max(np.abs(energies))), float(energies[-1] - energies[0]), 1e-300)
    for n in range(energies.size):
        others = np.abs(np.delete(energies, n) - energies[n])
        others = others[others > tol]
        if others.size:
            gaps[n] = float(others.min())
    rounding = ROUNDING * np.finfo(float).eps * scale
    return rounding + r**2 / gaps, bool(np.any(r**2 / gaps > rounding))


def _scaled_grid(grid: Grid, factor: float) -> Grid | None:
    """``grid`` with ``factor`` times the points along every axis of more
    than 8 (same ends; box axes keep their walls), or None."""
    axes, changed = [], False
    for a in grid.axes:
        n = a.points
        if n > 8:
            n = max(8, round(n * factor)) if a.boundary == "periodic" else max(8, round((n + 1) * factor) - 1)
            changed |= n != a.points
        axes.append(Axis(a.name, a.min, a.max, n, a.boundary))
    if not changed:
        return None
    return Grid(tuple(axes), grid.radial, grid.angular_momentum)


def _comparison_levels(model, factor, count, states, method, tol=ITERATIVE_TOL):
    """``(dx ratio, energies)`` of the job's Hamiltonian on the grid with
    ``factor`` times the points (the terms evaluated on that grid), or None
    when there is no such grid or its solve fails; levels beyond what that
    grid holds are NaN.  Iterative solves start from the job's states,
    truncated to the smaller grid's modes."""

    grid = model.hamiltonian.grid
    coarse = _scaled_grid(grid, factor)
    if coarse is None:
        return None
    try:
        hc = Model(model.job, grid=coarse).hamiltonian
    except JobError:   # a term refuses that grid (a point on a singularity): V sampled from the job's grid
        hc = coarse_hamiltonian(model.hamiltonian, model.hamiltonian.real_potential(0.0), coarse)
    ratios = [c.dx / a.dx for a, c in zip(grid.axes, coarse.axes) if c.points != a.points]
    spacing = float(np.exp(np.mean(np.log(ratios))))
    _, keep = walled_potential(hc, 0.0)
    held = min(count, coarse.size if keep is None else int(keep.sum()))
    try:
        if method == "dense" or coarse.size <= COMPARISON_DENSE_POINTS:
            energies, _ = eigenpairs(hc, held, t=0.0, method="dense")
        else:
            try:
                energies, _ = _iterative_from(hc, held, states[:held], grid, tol)
            except RunFailed:
                energies, _ = eigenpairs(hc, held, t=0.0, method=method)
    except (JobError, RunFailed):
        return None
    return spacing, np.concatenate([energies, np.full(count - held, np.nan)])


def _iterative_from(hc, count, states, fine, tol=POLISH_TOL):
    """The ``count`` lowest eigenpairs of ``hc`` (energies in hartree,
    states normalised on the grid, signs not fixed) by LOBPCG to ``tol``,
    started from ``states`` (on ``fine``) truncated to ``hc.grid``'s modes,
    plus buffer vectors; the residuals are checked as for any answer."""
    v, keep = walled_potential(hc, 0.0)
    if keep is not None and count > int(keep.sum()):
        raise JobError("--count", "the comparison grid holds fewer levels")
    m = block_size(count)
    x0 = _truncate(np.asarray(states, float).reshape(len(states), -1).T, fine, hc.grid)[:, :count]
    rng = np.random.default_rng(1982)
    x0 = np.concatenate([x0, rng.standard_normal((hc.grid.size, m - x0.shape[1]))], axis=1)
    x0 = x0 + 1e-8 * np.linalg.norm(x0, axis=0) / math.sqrt(hc.grid.size) * rng.standard_normal(x0.shape)
    energies, x = lobpcg_from(hc, v, keep, x0, count, tol=tol, maxiter=MAX_ITERATIONS)
    energies = np.asarray(energies[:count], float)
    states = x[:, :count].T.reshape((count,) + hc.grid.shape)
    check_residuals(hc, v, keep, energies, states, "iterative")
    return energies, states / math.sqrt(hc.grid.cell_volume)


def _truncate(vectors, fine: Grid, coarse: Grid) -> np.ndarray:
    """Columns of states on ``fine`` -> their lowest modes on ``coarse``
    (fewer points per axis): start vectors, so a plain truncation will do."""
    m = vectors.shape[1]
    a = vectors.T.reshape((m,) + fine.shape)
    for i, (af, ac) in enumerate(zip(fine.axes, coarse.axes)):
        axis, nf, nc = i + 1, af.points, ac.points
        if nc == nf:
            continue
        if af.boundary == "periodic":
            c = scipy.fft.fft(a, axis=axis)
            low = np.concatenate([np.arange((nc + 1) // 2), np.arange(nf - nc // 2, nf)])
            a = scipy.fft.ifft(np.take(c, low, axis=axis), axis=axis).real
        else:
            c = scipy.fft.dst(a, type=1, axis=axis, norm="ortho")
            a = scipy.fft.idst(np.take(c, np.arange(nc), axis=axis), type=1, axis=axis, norm="ortho")
    return a.reshape(m, -1).T


def _order_ratio(p, h1, h2):
    """(E2 - E1) / (E1 - E0) for E_k = E + C h_k^p (h_0 = 1)."""
    return (h2**p - h1**p) / (h1**p - 1.0)


def _three_grid_error(e0, e1, e2, h1, h2, floor):
    """``(error, order)``: the error of ``e0`` (grid spacing 1) from the
    levels ``e1``, ``e2`` on grids with spacings ``h1``, ``h2`` (> 1).
    Differences that grow towards the coarser grids are a convergent
    sequence |E_k - E| = C h_k^p: the observed order p follows from their
    ratio and the error is SAFETY |E1 - E0| / (h1^p - 1) (Richardson's; for
    a geometric sequence Aitken's, which it becomes for large p).  The
    Fourier-grid levels of smooth potentials converge faster than
    geometrically and often alternate in sign (measured: a harmonic well's
    levels on 48, 38 and 31 points), and the differences' magnitudes are
    then what counts.  Differences at the solver's rounding: the rounding.
    Anything else is not yet convergent: the larger difference (no order).
    The order is returned negative when the differences change sign (no
    Richardson extrapolation then)."""
    d1, d2 = e1 - e0, e2 - e1
    if not (math.isfinite(d1) and math.isfinite(d2)):   # beyond what a comparison grid holds
        return math.nan, math.nan
    noise = 4.0 * floor
    if abs(d1) <= noise and abs(d2) <= noise:
        return floor, math.nan
    if d1 == 0.0 or abs(d2 / d1) <= 1.0 or abs(d2) <= noise:
        return SAFETY * max(abs(d1), abs(d2)) + floor, math.nan
    rho = abs(d2 / d1)
    sign = 1.0 if d2 / d1 > 0 else -1.0
    lo, hi = 1e-3, 60.0
    if _order_ratio(hi, h1, h2) <= rho:
        p = hi
    else:
        for _ in range(100):
            mid = 0.5 * (lo + hi)
            lo, hi = (mid, hi) if _order_ratio(mid, h1, h2) < rho else (lo, mid)
        p = 0.5 * (lo + hi)
    return SAFETY * abs(d1) / (h1**p - 1.0) + floor, sign * p


def _richardson(spacings, energies, order, floor):
    """``(value, error)``: the limit dx -> 0 of ``energies`` on grids of
    relative spacings ``spacings`` (the job's first, 1), fitted exactly by
    E + sum_j c_j h^(q + j), j = 0..len - 2, q the observed ``order``
    rounded to a whole number when within 0.3 of one (cusps and kinks give
    whole orders: measured 2.0 for l = 0 and 3.0 for l = 1 Coulomb states
    on the radial grid); the error is SAFETY times its difference from the
    fit with one grid and one power fewer, plus the rounding ``floor``
    carried through the fit's weights (Richardson, Phil. Trans. R. Soc. A
    210, 307 (1911); e.g. Sidi, Practical Extrapolation Methods (2003),
    ch. 1; from memory)."""
    q = round(order) if abs(order - round(order)) <= 0.3 else order

    def limit(k):
        h = np.asarray(spacings[:k], float)
        a = np.column_stack([np.ones(k)] + [h ** (q + j) for j in range(k - 1)])
        weights = np.linalg.solve(a.T, np.eye(k)[0])     # E = weights . energies
        return float(weights @ energies[:k]), float(np.sum(np.abs(weights)))

    value, amplification = limit(len(spacings))
    fewer, _ = limit(len(spacings) - 1)
    return value, SAFETY * abs(value - fewer) + amplification * floor


def _open_faces(model) -> set[str]:
    """The faces where the job has an absorbing layer: open space there, so
    the wall the grid ends in behind the layer stands for nothing physical
    (``levels`` solves without the absorber)."""
    table = model.job.table.get("absorber") or {}
    if table.get("kind", "none") == "none":
        return set()
    return set(table.get("faces") or face_names(model.grid))


def _edge_errors(model, v, energies, states):
    """``(errors, faces)``: per level the estimated shift (hartree) its
    state takes from the grid's edges, and per level a dict face ->
    (shift, decay constant kappa in bohr^-1, or None).

    A state that decays into the edge (V > E there, kappa = sqrt(2 m (V -
    E)) / hbar) is cut off by a wall: with psi ~ A sinh(kappa (a - x)) next
    to the wall at a, the wall raises the level by hbar^2 kappa A^2 / 4m
    per unit of face (the hard-wall or double-well formula E = E0 +/-
    (hbar^2/m) psi0(a) psi0'(a) with psi0 = A/2 e^(-kappa (x - a)); Landau &
    Lifshitz, Quantum Mechanics, sec. 50, problem 3; from memory), A from
    the last grid point (kappa at least pi / L: a decay length beyond the
    box is the box's).  On a periodic axis the state meets its images at
    the seam s: with psi = a e^(-kappa (x - s)) + b e^(kappa (x - s)) there
    (a, b from the seam's two neighbours), the two tails are each shifted
    by the same formula, hbar^2 kappa (a^2 + b^2) / m in all (a state even
    or odd about the seam alike).  Where the state does not decay
    (E > V at the edge), a box axis's wall and a periodic axis's period are
    the job's physics (a particle in a box, a ring, a lattice), unless the
    job puts an absorbing layer at that face (open space there: the state is
    a continuum state the box discretises, and the wall's Hadamard estimate
    below, as at r_max, applies), or V has
    a kink at the seam (second difference above 4 times the largest
    elsewhere: a well cut by the period), where the estimate is the flux
    density (hbar^2 / 2m) (psi'^2 + k^2 psi^2) at the seam over the period
    L; r_max of a radial grid never is: there the level is a box level, and moving the wall from
    a by da moves it by -(hbar^2 / 2m) psi'(a)^2 da (the Hadamard formula
    for a Dirichlet wall; e.g. Garabedian, Partial Differential Equations,
    ch. 15; from memory): the estimate is that for da = L, psi'(a) from the
    last grid point.  All times EDGE_SAFETY."""
    grid, mass = model.grid, model.mass
    v = np.asarray(v, float)
    opened = _open_faces(model)
    errors = np.zeros(len(energies))
    faces = [dict() for _ in energies]
    for i, ax in enumerate(grid.axes):
        face_area = float(np.prod([a.dx for j, a in enumerate(grid.axes) if j != i]))
        periodic = ax.boundary == "periodic"
        sides = [(f"{ax.name}+", ax.points - 1)] if (periodic or grid.radial) else \
            [(f"{ax.name}-", 0), (f"{ax.name}+", ax.points - 1)]
        if periodic:   # V's second difference at the seam against the largest elsewhere
            second = np.roll(v, -1, axis=i) - 2.0 * v + np.roll(v, 1, axis=i)
            seam = np.abs(np.take(second, 0, axis=i))
            inside = np.max(np.abs(np.take(second, np.arange(1, ax.points), axis=i)), axis=i) if ax.points > 1 \
                else np.zeros_like(seam)
            kinked = seam > 4.0 * inside + 1e-12 * (1.0 + np.abs(np.take(v, 0, axis=i)))
        for face, index in sides:
            v_face = np.take(v, 0 if periodic else index, axis=i)
            for n, (e, psi) in enumerate(zip(energies, states)):
                psi_face = np.take(psi, 0 if periodic else index, axis=i)
                forbidden = v_face > e
                # a decay length beyond the box is the box's: kappa >= pi / L
                kappa = np.maximum(np.sqrt(np.maximum(2.0 * mass * (v_face - e), 0.0)), math.pi / ax.length)
                if periodic:
                    # the two tails a e^(-kappa s) + b e^(kappa s) through the seam's neighbours
                    before, after = np.take(psi, -1, axis=i), np.take(psi, 1 % ax.points, axis=i)
                    step = np.minimum(kappa * ax.dx, 300.0)   # beyond, the tails are nothing anyway
                    grow, fall = np.exp(step), np.exp(-step)
                    det = 2.0 * np.sinh(2.0 * step)
                    a, b = (before * grow - after * fall) / det, (after * grow - before * fall) / det
                    shift = np.where(forbidden, kappa * (a**2 + b**2) / mass, 0.0)
                    # above V at a seam where V has a kink (a well cut by the period, not a lattice),
                    # the period confines the state: the flux density there over the period
                    slope = (after - before) / (2.0 * ax.dx)
                    wave2 = np.maximum(2.0 * mass * (e - v_face), 0.0)
                    allowed = (slope**2 + wave2 * psi_face**2) / (2.0 * mass) * ax.length
                    shift = np.where(forbidden | ~kinked, shift, allowed)
                else:
                    amplitude2 = psi_face**2 / np.sinh(np.minimum(kappa * ax.dx, 300.0)) ** 2
                    shift = np.where(forbidden, kappa * amplitude2 / (4.0 * mass), 0.0)
                    if grid.radial or face in opened:   # the wall moved out by L: dE/da = -(hbar^2 / 2m) psi'(a)^2
                        allowed = (psi_face / ax.dx) ** 2 / (2.0 * mass) * ax.length
                        shift = np.where(forbidden, shift, allowed)
                total = EDGE_SAFETY * float(np.sum(shift)) * face_area
                if total > 0:
                    mean_kappa = float(np.sum(kappa * shift) / np.sum(shift)) if np.any(forbidden & (shift > 0)) \
                        else None
                    faces[n][face] = (total, mean_kappa)
                    errors[n] += total
    return errors, faces


def _smooth_count(n: int, box: bool) -> int:
    """The smallest point count >= n whose transform size (n, or n + 1 for
    the sine transform) has no prime factor above 7 (fast FFT sizes)."""
    n = max(int(n), 2)
    while True:
        m = n + 1 if box else n
        for p in (2, 3, 5, 7):
            while m % p == 0:
                m //= p
        if m == 1:
            return n
        n += 1


def _advice(model, best, errors, resolution, edge, faces, orders, extrapolated, states):
    """``(refine, advice)``: the job field that gives the worst level more
    digits, and a line for stderr naming it and a value for ADVICE_TARGET
    when that level's relative error (to max(|E|, the levels' span))
    exceeds NOTE_RELATIVE.  A level without an estimate is the worst."""
    grid = model.hamiltonian.grid
    units = model.units
    lf, length = units.factor("length"), units.unit_label("length")
    scale = np.maximum(np.abs(best), float(best[-1] - best[0]) if best.size > 1 else 0.0)
    relative = np.where(np.isfinite(errors), errors / np.maximum(scale, 1e-300), np.inf)
    worst = int(np.argmax(relative))
    rel = float(relative[worst])
    if not np.isfinite(rel):
        ax = max(grid.axes, key=lambda a: a.dx)
        return f"grid.{ax.name}.points", (f"level {worst}: no error estimate (the grids with 0.8 and 0.64 times "
                                          f"the points hold too few levels or points); ask for fewer levels or "
                                          f"use more points")
    if edge[worst] > (resolution[worst] if np.isfinite(resolution[worst]) else 0.0):
        face, (_, kappa) = max(faces[worst].items(), key=lambda item: item[1][0])
        name, side = face[:-1], face[-1]
        ax = grid.axis(name)
        refine = f"grid.{name}.{'max' if side == '+' else 'min'}"
        if rel <= NOTE_RELATIVE:
            return refine, None
        if kappa:
            move = math.log(rel / ADVICE_TARGET) / (2.0 * kappa)
            to = (ax.max + move) if side == "+" else (ax.min - move)
            what = f"about {to / lf:.4g} {length} (the state decays as exp(-{kappa * lf:.3g} x/{length}) there)"
        elif face in _open_faces(model):   # no bound level: a continuum state the box discretises
            return refine, (f"level {worst} reaches the {face} edge, where the job absorbs (open space), with "
                            f"its energy above V there: it is a continuum state the box discretises, and its "
                            f"energy moves with the wall (estimated relative error {rel:.1e}), not a bound level")
        else:
            to = ax.max + ax.length if side == "+" else ax.min - ax.length
            what = f"at least {to / lf:.4g} {length} (the state does not decay before the edge)"
        return refine, (f"level {worst}: estimated relative error {rel:.1e}, from the {face} edge of the grid; "
                        f"set {refine} to {what} for {ADVICE_TARGET:g}, keeping the spacing")
    # resolution: the axis where the state has the most weight near the grid's largest k
    if grid.ndim == 1:
        index = 0
    else:
        tails = []
        for i, ax in enumerate(grid.axes):
            c = (scipy.fft.fft(states[worst], axis=i) if ax.boundary == "periodic"
                 else scipy.fft.dst(states[worst], type=1, axis=i))
            k = np.abs(ax.wavenumbers)
            top = np.take(np.abs(c) ** 2, np.flatnonzero(k >= 0.75 * k.max()), axis=i)
            tails.append(float(np.sum(top)) / max(float(np.sum(np.abs(c) ** 2)), 1e-300))
        index = int(np.argmax(tails))
    ax = grid.axes[index]
    refine = f"grid.{ax.name}.points"
    if rel <= NOTE_RELATIVE:
        return refine, None
    box = ax.boundary != "periodic"
    order = abs(float(orders[worst]))
    if not np.isfinite(order):
        target = 2 * ax.points
        how = "the levels are not yet converging steadily"
        return refine, (f"level {worst}: estimated relative error {rel:.1e} ({how}); set {refine} to at least "
                        f"{_smooth_count(target, box)}")
    if extrapolated[worst]:
        q = round(order) if abs(order - round(order)) <= 0.3 else order
        # the error bar (two extrapolants' difference) falls as dx^(q + 3) asymptotically; one order
        # less, as measured for hydrogen from 999 to 2624 points (order 4.6), keeps the advice honest
        effective = q + RICHARDSON_GRIDS - 3
        how = f"Richardson-extrapolated from {RICHARDSON_GRIDS} grids; observed order {order:.2g} in d{ax.name}"
    else:
        effective = order
        how = f"observed order {order:.2g} in d{ax.name}" if order <= ALGEBRAIC_ORDER else "spectral convergence"
    factor = (rel / ADVICE_TARGET) ** (1.0 / effective)
    n = (ax.points + 1) * factor - 1 if box else ax.points * factor
    return refine, (f"level {worst}: estimated relative error {rel:.1e} ({how}); set {refine} to about "
                    f"{_smooth_count(math.ceil(n), box)} for {ADVICE_TARGET:g}")


# -- coupled surfaces --------------------------------------------------------------------
def coupled_stationary_states(setup_or_job, count: int, method: str = "auto", field: str = "count"):
    """The ``count`` lowest stationary states of a job with coupled surfaces
    ([[surface]], [[coupling]]): ``(energies_hartree, states)``, states of
    shape ``(count, S, *grid.shape)`` (bohr^(-ndim/2)), normalised over all
    surfaces; the full matrix Hamiltonian T (x) 1 + V at t = 0, no absorber
    (:func:`wavesweep.eigen.coupled_eigenpairs`).  Each state's weight on
    each surface: :func:`wavesweep.eigen.surface_weights`."""
    setup = _as_setup(setup_or_job)
    if not setup.coupled:
        raise JobError("surface", "the job has one surface (no [[surface]] tables): use stationary_states")
    return coupled_eigenpairs(setup.surface_hamiltonian, count, t=0.0, method=method, field=field)


def coupled_level_errors(model, energies_hartree, states, method: str = "auto") -> LevelErrors:
    """Resolution error estimates of a coupled job's levels: the same
    surfaces and couplings (terms evaluated anew) on grids with 0.8 and 0.64
    times the points per axis, and the three-grid estimate of
    :func:`_three_grid_error` (module notes, "Error estimates").  Neither
    the Richardson extrapolation is made for coupled surfaces yet; the edge
    estimate (:func:`_edge_errors`) is made surface by surface, each
    surface's part of a state against its own V_ss at the face."""
    h = model.surface_hamiltonian
    e0 = np.asarray(energies_hartree, float)
    count = e0.size
    v, keep = coupled_walls(h, 0.0)
    # what the eigensolver leaves in each level (as _rounding_floor): ROUNDING eps ||H|| (||H|| off
    # the walls) plus r^2 / gap of the state's residual r (an iterative answer's)
    scale = float(h.kinetic_operator.kinetic.max()) + float(np.max(np.abs(v if keep is None else
                                                                           v[:, :, keep.any(axis=0)])))
    unit = np.asarray(states, float) * math.sqrt(model.grid.cell_volume)
    residual = np.stack([h.apply(u) for u in unit]) - e0.reshape((-1,) + (1,) * (unit.ndim - 1)) * unit
    if keep is not None:
        residual *= keep
    r2 = np.sum(residual**2, axis=tuple(range(1, unit.ndim)))
    gaps = np.full(count, scale)
    for n in range(count):
        others = np.abs(np.delete(e0, n) - e0[n])
        others = others[others > DEGENERATE_TOL * max(float(np.max(np.abs(e0))), 1e-300)]
        if others.size:
            gaps[n] = float(others.min())
    floor = ROUNDING * np.finfo(float).eps * scale + r2 / gaps
    rungs = []
    for factor in (GRID_RATIO, GRID_RATIO**2):
        coarse = _scaled_grid(model.grid, factor)
        if coarse is None:
            rungs.append(None)
            continue
        ratios = [c.dx / a.dx for a, c in zip(model.grid.axes, coarse.axes) if c.points != a.points]
        try:
            hc = Model(model.job, grid=coarse).surface_hamiltonian
            _, keep_c = coupled_walls(hc, 0.0)
            held = min(count, hc.size * coarse.size if keep_c is None else int(keep_c.sum()))
            energies, _ = coupled_eigenpairs(hc, held, t=0.0, method=method)
        except (JobError, RunFailed):
            rungs.append(None)
            continue
        rungs.append((float(np.exp(np.mean(np.log(ratios)))),
                      np.concatenate([energies, np.full(count - held, np.nan)])))
    resolution, orders = np.full(count, np.nan), np.full(count, np.nan)
    if None not in rungs:
        (h1, e1), (h2, e2) = rungs
        for n in range(count):
            resolution[n], orders[n] = _three_grid_error(e0[n], e1[n], e2[n], h1, h2, floor[n])
    # the edges, surface by surface: each surface's part of a state against its own V_ss at the face
    # (where the couplings have died out, the surfaces are the channels the edge estimate reads)
    static = np.array(h.matrix(0.0), float)
    edge, faces = np.zeros(count), [dict() for _ in range(count)]
    for a in range(static.shape[0]):
        part, where = _edge_errors(model, static[a, a], e0, states[:, a])
        edge += part
        for n, found in enumerate(where):
            for face, (shift, kappa) in found.items():
                before = faces[n].get(face)
                # a part that does not decay there (kappa None) is what the face's advice must read
                faces[n][face] = (shift + (before[0] if before else 0.0),
                                  kappa if before is None else
                                  (None if kappa is None or before[1] is None else max(kappa, before[1])))
    errors = resolution + edge
    weights = surface_weights(states, model.grid.cell_volume)
    # the advice reads one array per level: the state on the surface it weighs most on
    dominant = np.stack([states[n, int(np.argmax(weights[n]))] for n in range(count)])
    refine, advice = _advice(model, e0, errors, resolution, edge, faces, orders, np.zeros(count, bool), dominant)
    return LevelErrors(energies=e0.copy(), errors=errors, grid_energies=e0, resolution_errors=resolution,
                       edge_errors=edge, extrapolated=np.zeros(count, bool), orders=np.abs(orders),
                       refine=refine, advice=advice)


def check_states_path(path, field: str = "--states", overwrite: bool = True) -> Path:
    """Refuse, before any work, a states file that cannot be written: not a
    ``.nc`` name, a folder or other non-file in its place, an existing file
    without ``overwrite`` (the CLI's ``--overwrite``), a parent that is a
    file, a folder that cannot be written (probed by creating a file there),
    or the nearest existing parent of a folder still to be made not
    writable (:func:`wavesweep.io.paths.output_file`)."""

    return output_file(path, field, (".nc",), overwrite=overwrite, make_folders=True, kind="states file")


def write_states(path, setup, energies_hartree, states, errors: LevelErrors | None = None) -> Path:
    """Write stationary states as netCDF (job units): coordinates of the
    grid, ``energy(state)`` (the grid's eigenvalues, those of the states),
    ``psi_real``/``psi_imag(state, ...)``, and with ``errors``
    (:func:`level_errors`) ``energy_estimate(state)`` and
    ``energy_error(state)``.  ``setup`` is a Model or a Setup.  The file is
    written under a temporary name in the same folder and renamed into place
    (a reader never sees a partial file).  A ``[packet] kind = "file"`` with
    ``state = i`` reads one state back.  States of coupled surfaces
    (``(state, S, *grid)``, :func:`coupled_stationary_states`) have a
    ``surface`` dimension (coordinate: the names) before the grid's, the
    ``weight(state, surface)`` on each, and ``potential(surface, ...)``, each
    surface's V_ss; a single-surface packet does not read them."""

    import xarray as xr   # lazy: only writing a states file needs it (0.35 s to import)

    path = Path(path)
    u, grid = setup.units, setup.grid
    lf, ef = u.factor("length"), u.factor("energy")
    length = u.unit_label("length")
    coupled = bool(getattr(setup, "coupled", False))
    dims = ("state",) + (("surface",) if coupled else ()) + grid.names
    long_names = {"x": "position x", "y": "position y", "z": "position z", "r": "radius r"}
    coords = {a.name: (a.name, a.coordinates / lf, {"units": length, "long_name": long_names[a.name]})
              for a in grid.axes}
    coords["state"] = ("state", np.arange(len(energies_hartree)),
                       {"units": "1", "long_name": "index of the state in energy order (0: ground)"})
    if coupled:
        coords["surface"] = ("surface", np.array(setup.surfaces, dtype=object),
                             {"long_name": "potential-energy surface ([[surface]] name)"})
    if coupled:   # each surface's own V_ss
        v = setup.surface_hamiltonian.matrix(0.0)
        potential = (("surface",) + grid.names, np.stack([v[a, a] for a in range(v.shape[0])]) / ef,
                     {"units": u.unit_label("energy"), "long_name": "each surface's own potential V_ss at t = 0"})
    else:
        potential = (grid.names, setup.hamiltonian.real_potential(0.0) / ef,
                     {"units": u.unit_label("energy"), "long_name": "real potential at t = 0 the states belong to"})
    psi = np.asarray(states, float) * lf ** (grid.ndim / 2)
    psi_units = f"{length}-{grid.ndim / 2:g}"
    job = setup.job
    if job.needs_tuning:
        # a CAP still to be tuned to the packet (a Model never builds it): the states do not
        # depend on the absorber, so the job is recorded without one
        job = job_from_dict({**copy.deepcopy(job.table), "absorber": {"kind": "none"}})
    job_text, run_id = job.to_toml(), job.run_id
    ds = xr.Dataset(
        {"energy": ("state", np.asarray(energies_hartree, float) / ef,
                    {"units": u.unit_label("energy"), "long_name": "energy of the stationary state"}),
         "psi_real": (dims, psi, {"units": psi_units, "long_name": "real part of the stationary state"}),
         "psi_imag": (dims, np.zeros_like(psi), {"units": psi_units,
                                                 "long_name": "imaginary part of the stationary state"}),
         "potential": potential},
        coords=coords,
        attrs={"title": job.title, "job": job_text, "run_id": run_id,
               "wavesweep_version": __version__, "content": "stationary states",
               "units_length": length, "units_energy": u.unit_label("energy"),
               "units_time": u.unit_label("time"), "units_mass": u.unit_label("mass"),
               "length_to_bohr": float(lf), "energy_to_hartree": float(ef),
               "time_to_atomic": float(u.factor("time")),
               "grid_kind": "radial" if grid.radial else "cartesian",
               "angular_momentum": int(grid.angular_momentum), "Conventions": "CF-1.8"})
    if coupled:
        ds["weight"] = (("state", "surface"), surface_weights(states, grid.cell_volume),
                        {"units": "1", "long_name": "weight of the state on the surface, sum |psi_s|^2 dV"})
    if errors is not None:
        ds["energy_estimate"] = ("state", np.asarray(errors.energies, float) / ef,
                                 {"units": u.unit_label("energy"),
                                  "long_name": "best estimate of the level (Richardson dx -> 0 where extrapolated)"})
        ds["energy_error"] = ("state", np.asarray(errors.errors, float) / ef,
                              {"units": u.unit_label("energy"),
                               "long_name": "estimated absolute error of energy_estimate",
                               "refine": errors.refine})
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        with atomic_output(path, ".part", unique=False) as tmp:
            ds.to_netcdf(tmp, engine="netcdf4")
    except OSError as e:
        raise JobError("--states", f"cannot write {str(path)!r}: {e.strerror or e}; choose another path") from None
    return path


# -- autocorrelation levels -------------------------------------------------------------
@dataclass(frozen=True)
class AutocorrelationLevels:
    """Levels found in a run's autocorrelation (energies in ``energy_units``).

    ``weights`` are |c_n|^2; ``line_width_ratio`` is each fitted line's width
    over the window's (1 for an isolated undamped level; larger: unresolved
    neighbours or decay); ``resolution`` is the lines' standard deviation
    hbar/tau and ``band`` the energy window searched, both in ``energy_units``."""

    energies: np.ndarray
    weights: np.ndarray
    energy_units: str
    resolution: float
    band: tuple[float, float]
    line_width_ratio: np.ndarray

    @property
    def blended(self) -> np.ndarray:
        """Lines wider than the window's by more than :data:`BLENDED_WIDTH`:
        a neighbour within about 4.3 hbar/tau (vertex off by > ~1e-3 of the
        spacing) or decay (an absorber)."""
        return np.asarray(self.line_width_ratio) > BLENDED_WIDTH

    def as_dict(self) -> dict:
        return {"energies": [float(e) for e in self.energies], "weights": [float(w) for w in self.weights],
                "energy_units": self.energy_units}


# A fitted line this much wider than the window's is blended (see the notes).
BLENDED_WIDTH = 1.005
# A fitted line narrower than the window's by more than this is no line: at
# any peak of a sum of window lines with positive weights the fitted width is
# at least the window's (see the notes); what is narrower is a side lobe of
# the record's truncation or noise.  The slack covers rounding and the
# truncation's own distortion of true lines (measured: isolated lines fit
# 1 +/- 1e-6 at tau = T/6, a weak line 1 - 4e-6 at tau = T/4.6).
NARROW_WIDTH = 0.98
def truncation_floor(at, line_energies, line_weights, duration, tau, period, rest=None):
    """A bound, as a weight, on what cutting the windowed record at t = T
    adds to the spectrum at the energies ``at`` (hartree): from the lines
    ``line_energies`` with ``line_weights``, and the weight ``rest`` (by
    default what the lines leave of the norm) counted at distance 0.  With
    |C| <= 1 and a line at distance d (taken modulo the sampling's period),
    |sum_{t_j > T} dt w(t_j) exp(i d t_j)| <= w(T) min(tau^2 / T, pi / |d|):
    the Gaussian's tail integral (Mills' ratio, e.g. Abramowitz & Stegun
    7.1.13; from memory) and summation by parts (|2 sin(d dt / 2) / dt| >=
    2 |d| / pi within the period).  S takes 1 / pi of it; divided by
    tau / sqrt(2 pi), the height of a line of unit weight."""
    at = np.atleast_1d(np.asarray(at, float))
    w_end = math.exp(-0.5 * (duration / tau) ** 2)
    near = tau**2 / duration
    if rest is None:
        rest = max(1.0 - float(np.sum(line_weights)), 0.0)
    total = np.full(at.shape, rest * near)
    for e_n, w_n in zip(np.atleast_1d(line_energies), np.atleast_1d(line_weights)):
        d = np.abs((at - e_n + 0.5 * period) % period - 0.5 * period)
        total += w_n * np.minimum(near, math.pi / np.maximum(d, 1e-300))
    return total * w_end / math.pi * math.sqrt(2.0 * math.pi) / tau


def autocorrelation_levels(result, count: int | None = None, min_weight: float = 1e-6,
                           window=None, field: str = "RUN.nc") -> AutocorrelationLevels:
    """Energies and weights of the stationary states in a run's psi(0), from
    its recorded autocorrelation (see the module notes).

    ``result``: a result file path or an open xarray dataset.  ``count``:
    the lowest ``count`` levels found (default: all with weight >=
    ``min_weight``).  ``window``: tau of the Gaussian window in the job's
    time unit (default T/6).  Bad input (not a result of this tool, no
    autocorrelation, samples too far apart for the state's energy band) is a
    :class:`~wavesweep.errors.JobError` naming ``field`` or the job field to
    change."""

    if count is not None and (isinstance(count, bool) or not isinstance(count, (int, np.integer)) or count < 1):
        raise JobError("--count", f"must be a whole number of at least 1, got {count!r}")
    if not 0.0 < float(min_weight) < 1.0:
        raise JobError("--min-weight", f"must lie between 0 and 1 (a probability |c_n|^2), got {min_weight!r}")
    ds = open_result(result, ("time", "autocorrelation_real", "autocorrelation_imag"), field)
    try:
        return _levels_from_dataset(ds, count, min_weight, window, field)
    finally:
        if ds is not result:
            ds.close()


def _levels_from_dataset(ds, count, min_weight, window, field) -> AutocorrelationLevels:

    u = result_units(ds)
    tf, ef, e_units, t_units = u["time"], u["energy"], u["energy_label"], u["time_label"]
    times = np.asarray(ds["time"].values, float) * tf
    c = np.asarray(ds["autocorrelation_real"].values, float) + 1j * np.asarray(ds["autocorrelation_imag"].values, float)
    if times.size < 16 or not np.all(np.isfinite(c)):
        raise JobError("record.every", f"the run has {times.size} finite autocorrelation samples; "
                                       "record at least 16 (a longer run or a smaller record.every)")
    step = (times[-1] - times[0]) / (times.size - 1)
    if abs(times[0]) > 1e-9 * step or np.max(np.abs(np.diff(times) - step)) > 1e-6 * step:
        raise JobError(field, "the samples do not start at t = 0 with an even spacing")
    duration = times[-1]
    tau = duration / WINDOW_RATIO if window is None else float(window) * tf
    if not (0 < tau <= duration):
        raise JobError("--window", f"must be positive and at most the run's duration "
                                   f"({duration / tf:g} {t_units})")

    # what the run wrote for analysis: never a set-up rebuilt from the job attribute
    record = run_record(ds, field, lanczos=True)
    if record.time_dependent:
        raise JobError("potential", "the run's Hamiltonian depends on time, so its autocorrelation has "
                                    "no stationary lines; use wavesweep levels JOB.toml for H at t = 0")
    if record.lanczos is None:
        raise JobError(field, f"the run did not record the energy band of psi(0) (its grid has "
                              f"{record.grid.size} points; runs record it up to {LANCZOS_MAX_POINTS}); "
                              "use wavesweep levels JOB.toml for the levels of H")
    # the band psi(0) holds every level of weight >= min_weight in (Lanczos quadrature, recorded by the run)
    period = 2.0 * math.pi / step  # hbar = 1
    margin = 6.0 / tau   # where a line has fallen to exp(-18)
    e_lo, e_hi = recorded_energy_band(record.lanczos, min_weight, 1.0 / tau,
                                      width=(1.0 - 1e-9) * period - 2.0 * margin)
    need = (e_hi - e_lo) + 2.0 * margin
    if need >= period:
        dt = record.dt
        best = 2.0 * math.pi / need
        suggestion = math.floor(best / dt * (1 - 1e-9)) * dt
        if suggestion >= dt:
            fix = f"use record.every <= {best / tf:.4g} {t_units}, e.g. {suggestion / tf:.6g}"
        else:
            fix = (f"that needs samples every {best / tf:.4g} {t_units}, less than evolve.dt; "
                   "reduce evolve.dt and use record.every = evolve.dt")
        raise JobError("record.every", f"samples every {step / tf:g} {t_units} resolve a band of "
                                       f"2 pi hbar / dt = {period / ef:.4g} {e_units}, but the levels of "
                                       f"weight >= {min_weight:g} in psi(0) span {e_lo / ef:.4g}..{e_hi / ef:.4g} "
                                       f"{e_units}, {need / ef:.4g} {e_units} with the line width; "
                                       f"{fix} (or a larger --min-weight)")

    weights_t = np.exp(-0.5 * (times / tau) ** 2)
    # S(E) = (dt / 2 pi) [w0 C0 + 2 Re sum_{j>0} w_j C_j exp(i E t_j)]: C(-t) = conj C(t)
    half_weights = weights_t * c * step / (2.0 * math.pi)
    half_weights[0] *= 0.5

    def spectrum(energies):
        energies = np.atleast_1d(np.asarray(energies, float))
        out = np.empty(energies.size)
        for s in range(0, energies.size, 512):   # bounded memory: 512 x samples
            e = energies[s:s + 512]
            out[s:s + 512] = 2.0 * np.real(np.exp(1j * np.outer(e, times)) @ half_weights)
        return out

    # scan on a grid of spacing <= hbar / (4 tau) by FFT, refine by direct evaluation
    spacing = 1.0 / (4.0 * tau)
    n_fft = 1 << max(int(math.ceil(math.log2(max(period / spacing, 2 * times.size)))), 4)
    lo = e_lo - margin
    f = np.zeros(n_fft, complex)
    f[: times.size] = half_weights * np.exp(1j * lo * times)
    scan = 2.0 * np.real(np.fft.ifft(f) * n_fft)   # sum_j f_j exp(+2 pi i k j / n)
    e_scan = lo + period * np.arange(n_fft) / n_fft
    inside = e_scan <= e_hi + margin
    e_scan, scan = e_scan[inside], scan[inside]
    line_height = tau / math.sqrt(2.0 * math.pi)       # S at a line of unit weight
    # rounding of the sums: eps times the sum of the magnitudes, as a weight
    rounding = 64 * np.finfo(float).eps * 2.0 * float(np.sum(np.abs(half_weights))) / line_height
    floor = min_weight * line_height
    candidates = []
    for k in range(1, scan.size - 1):
        if not (scan[k] > floor and scan[k] > scan[k - 1] and scan[k] >= scan[k + 1]):
            continue
        if scan[k - 1] <= 0 or scan[k + 1] <= 0:
            continue
        e_scanned, log_scanned, curvature = _vertex(e_scan[k - 1:k + 2], scan[k - 1:k + 2])
        if _width_ratio(curvature, tau) < NARROW_WIDTH:
            continue   # narrower than any sum of lines: a side lobe or noise (module notes)
        # once more with three direct values centred on the estimate
        probe = e_scanned + np.array([-1.0, 0.0, 1.0]) / tau
        values = spectrum(probe)
        if np.any(values <= 0):
            continue
        e_peak, log_height, curvature = _vertex(probe, values)
        width_ratio = _width_ratio(curvature, tau)
        if width_ratio < NARROW_WIDTH:
            continue
        if abs(e_peak - e_scanned) > 0.5 / tau:
            # ln S is no parabola over +/- hbar/tau, as next to a close level: the scan's vertex
            # is the hump's (measured: a pair 2.2 hbar/tau apart pulled it 0.6 hbar/tau inward)
            e_peak, log_height = e_scanned, log_scanned
        weight = math.exp(log_height) / line_height
        if weight < min_weight or not (lo <= e_peak <= e_hi + margin):
            continue
        candidates.append((e_peak, weight, width_ratio))
    # a line is no narrower than the window's, and rises above what the record's truncation
    # (of the other lines and of the weight not found) and rounding can put there
    lines = [p for p in candidates if p[2] >= NARROW_WIDTH]
    found = []
    if lines:
        energies_c = np.array([p[0] for p in lines])
        weights_c = np.array([p[1] for p in lines])
        rest = max(1.0 - float(weights_c.sum()), 0.0)
        for i, (e_peak, weight, width_ratio) in enumerate(lines):
            others = np.arange(len(lines)) != i
            noise = truncation_floor(e_peak, energies_c[others], weights_c[others], duration, tau, period,
                                     rest=rest)[0] + rounding
            if weight > 2.0 * noise:
                found.append((e_peak, weight, width_ratio))
    found.sort()
    if count is not None:
        found = found[:count]
    e = np.array([p[0] for p in found]) / ef
    return AutocorrelationLevels(energies=e, weights=np.array([p[1] for p in found]),
                                 energy_units=e_units, resolution=(1.0 / tau) / ef,
                                 band=(e_lo / ef, e_hi / ef),
                                 line_width_ratio=np.array([p[2] for p in found]))


def _width_ratio(curvature, tau):
    """Width of a fitted line (ln S = curvature (E - E_n)^2 + ...) over the
    window's, hbar / tau."""
    return math.sqrt(tau**2 / max(-2.0 * curvature, 1e-300))


def _vertex(x, y):
    """Vertex of the parabola through (x_i, ln y_i), i = 0, 1, 2 (x evenly
    spaced): (position, ln height, second-derivative / 2)."""
    h = x[1] - x[0]
    l0, l1, l2 = np.log(y)
    a = (l0 - 2.0 * l1 + l2) / (2.0 * h * h)       # ln y = a (x - x1)^2 + b (x - x1) + l1
    b = (l2 - l0) / (2.0 * h)
    if a >= 0:
        return float(x[1]), float(l1), float(a)
    d = -b / (2.0 * a)
    return float(x[1] + d), float(l1 - b * b / (4.0 * a)), float(a)
