"""Energy levels: stationary states of a job's Hamiltonian, and the levels
contained in a run's autocorrelation function.

Stationary states (:func:`stationary_states`, :func:`eigenpairs`)
    The lowest eigenpairs of the real, time-independent part of the job's
    Hamiltonian on its grid: the spectral kinetic energy (FFT along periodic
    axes, DST-I along box and radial axes), the static potential, the
    centrifugal term on a radial grid, and the time-dependent terms frozen
    at t = 0 (the Hamiltonian the run starts with; a pulse that is off at
    t = 0 adds nothing).  The absorber is left out: its rate is not part of
    the Hermitian H.  This is the Fourier-grid Hamiltonian (Kosloff &
    Kosloff, J. Comput. Phys. 52, 35 (1983); Marston & Balint-Kurti,
    J. Chem. Phys. 91, 3571 (1989)), built and applied by
    :class:`~wavesweep.hamiltonian.Hamiltonian`.

    Up to :data:`DENSE_MAX_POINTS` grid points the dense matrix is
    diagonalised (``scipy.linalg.eigh`` with ``subset_by_index``).  Larger
    grids use LOBPCG (Knyazev, SIAM J. Sci. Comput. 23, 517 (2001);
    ``scipy.sparse.linalg.lobpcg``) on the FFT-applied operator, with the
    kinetic preconditioner (T + s)^-1 applied in transform space, started
    from the states of a grid with half the points per axis (the same
    method, down to a grid small enough to diagonalise densely), spectrally
    interpolated: a cascade.  Measured for 10 levels of 2D harmonic wells
    (one thread on a shared 2-core machine): Lanczos (``eigsh``,
    which="SA") took 0.4 s at 128^2 and 5 s at 256^2 but skipped one member
    of a degenerate pair on the 256^2 isotropic well, which a block method
    cannot; Chebyshev-filtered subspace iteration took 1.1 s and 8.5 s,
    LOBPCG from random vectors 2.6 s and 9 s, the cascade 0.9-1.0 s and
    3.3-3.8 s (dense eigh: 1.1 s at 48^2, 6.5 s at 64^2).  Lanczos needed
    118 s for hydrogen on 4096 radial points, the cascade 1.2 s.  Points far
    above the potential's minimum are walls (:func:`walled_potential`).
    Every result is checked by its residual ||H psi - E psi||.

    States are real, normalised on the grid (sum psi^2 dV = 1, in
    bohr^(-ndim/2)), with a deterministic sign: positive at the first grid
    point (row-major order) where |psi| reaches half its maximum.  Within a
    degenerate level any orthonormal basis is an answer; which one is
    returned is not defined.

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

import math
import os
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import scipy.fft
import scipy.linalg

from ..errors import JobError, RunFailed
from ..grid import Axis, Grid
from ..hamiltonian import Hamiltonian

__all__ = ["stationary_states", "eigenpairs", "level_errors", "LevelErrors", "write_states", "check_states_path", "degenerate_groups",
           "autocorrelation_levels", "AutocorrelationLevels", "energy_band", "lanczos_quadrature",
           "lanczos_recurrence", "recorded_energy_band",
           "quadrature_band", "truncation_floor", "walled_potential", "DENSE_MAX_POINTS"]

# Largest grid diagonalised densely (8 bytes x size^2: 34 MB).  Measured
# (one thread): dense eigh with a subset took 0.09 s at 1024 points, 1.1 s at
# 2304 and 6.5 s at 4096; the cascade 0.07-0.2 s at 4096.
DENSE_MAX_POINTS = 2048

# The residual ||H psi - E psi|| (psi of unit Euclidean norm) LOBPCG aims at
# and the largest accepted, relative to the operator's energy scale (T_max
# plus the wanted energies above V_min).  An eigenvalue is then within
# residual^2 / gap of the exact one (Rayleigh quotient; e.g. Parlett, The
# Symmetric Eigenvalue Problem, ch. 11; from memory).
ITERATIVE_TOL = 1e-9
ACCEPT_TOL = 1e-6
COARSE_TOL = 1e-5          # intermediate grids of the cascade only start the next one
# Points where the potential lies more than this many times the grid's
# largest kinetic energy above its minimum are walls for the eigensolvers
# (see walled_potential).
WALL_HEIGHT = 1e2
MAX_ITERATIONS = 500
LOBPCG_CHUNK = 20


# -- stationary states -----------------------------------------------------------------
def stationary_states(setup_or_job, count: int, method: str = "auto", field: str = "count"):
    """The ``count`` lowest stationary states of a job.

    ``setup_or_job`` is a :class:`~wavesweep.simulation.Model` (or
    Setup), a :class:`~wavesweep.jobfile.Job` or the path of a job file; the
    packet plays no part (a job or a path gets a Model, which never builds it).  Returns
    ``(energies_hartree, states)``: energies (hartree, ascending) and real
    states of shape ``(count, *grid.shape)`` in bohr^(-ndim/2), normalised on
    the grid.  See the module notes for the Hamiltonian (time-dependent
    terms at t = 0, no absorber) and the methods (``method``: ``"auto"``,
    ``"dense"`` or ``"iterative"``).  ``field`` names ``count`` in errors."""
    setup = _as_setup(setup_or_job)
    return eigenpairs(setup.hamiltonian, count, t=0.0, method=method, field=field)


def _as_setup(obj):
    """A :class:`~wavesweep.simulation.Model` (a Setup is one) of a job: a
    job or a job file gets a Model, which never builds the packet."""
    from ..jobfile import Job, load_job
    from ..simulation import Model

    if isinstance(obj, Model):
        return obj
    if isinstance(obj, (str, os.PathLike)):
        obj = load_job(obj)
    if isinstance(obj, Job):
        return Model(obj)
    raise TypeError(f"expected a Model, a Setup, a Job or a job file path, got {type(obj).__name__}")


def eigenpairs(hamiltonian: Hamiltonian, count: int, t: float | None = 0.0, method: str = "auto",
               field: str = "count"):
    """The ``count`` lowest eigenpairs of ``hamiltonian.apply_static(., t)``
    (atomic units): ``(energies_hartree, states)`` as in
    :func:`stationary_states`.  ``t=None`` leaves the time-dependent terms
    out; ``t`` includes them frozen at that time.  Points of the grid above
    :func:`walled_potential`'s ceiling are walls (psi = 0 there)."""
    grid = hamiltonian.grid
    if isinstance(count, bool) or not isinstance(count, (int, np.integer)):
        raise JobError(field, f"must be a whole number of states, got {count!r}")
    if count < 1:
        raise JobError(field, f"must be at least 1, got {count}")
    if count > grid.size:
        raise JobError(field, f"the grid has {grid.size} points, so at most {grid.size} states; "
                              f"got {count}")
    count = int(count)
    v, keep = walled_potential(hamiltonian, t)
    if keep is not None and count > int(keep.sum()):
        raise JobError(field, f"only {int(keep.sum())} grid points lie below the potential's walls, so at "
                              f"most {int(keep.sum())} states; got {count}")
    if method == "auto":
        method = "dense" if grid.size <= DENSE_MAX_POINTS else "iterative"
    if method == "dense":
        energies, vectors = _dense(hamiltonian, count, v, keep)
    elif method == "iterative":
        energies, vectors = _cascade(hamiltonian, v, keep, count, _block_size(count), top=True)
        energies, vectors = energies[:count], vectors[:, :count]
    else:
        raise ValueError(f"method must be 'auto', 'dense' or 'iterative', got {method!r}")
    states = vectors.T.reshape((count,) + grid.shape)
    _check_residuals(hamiltonian, v, keep, energies, states, method)
    states = states / math.sqrt(grid.cell_volume)
    for s in states:
        flat = s.reshape(-1)
        big = np.abs(flat)
        first = int(np.argmax(big >= 0.5 * big.max()))
        if flat[first] < 0:
            s *= -1.0
    return np.asarray(energies, float), states


def walled_potential(h, t: float | None = 0.0):
    """``(v, keep)``: the real potential at ``t`` (hartree, grid shape) and
    the mask of the points below V_min + WALL_HEIGHT T_max (T_max the grid's
    largest kinetic energy), or None when all are.  Points above are hard
    walls for the eigensolvers, psi = 0 there: the V -> infinity limit of
    the discrete problem.  The grid does not resolve a state's decay into
    such a potential (kappa dx > 10 pi), and eigensolvers lose accuracy in
    proportion to the largest matrix element (rounding of order eps ||H||).
    Measured: the capped wall of a Morse potential (2.4e17 depth) made dense
    eigh's residuals 13 hartree; capped at 1e2 ... 1e9 T_max instead, the
    levels were off by 1e-10 ... 1e-3, and a 1e12-hartree step by 1e-5 ...
    1e-7 at caps of 1e2 ... 1e4 T_max.  As walls: Morse levels within
    1.3e-10 of the closed form, the step's equal to the V -> infinity limit."""
    v = np.asarray(h.real_potential(t), float)
    ceiling = float(v.min()) + WALL_HEIGHT * float(h.kinetic.max())
    if not float(v.max()) > ceiling:
        return v, None
    return np.minimum(v, ceiling), v <= ceiling


def _dense(h, count, v, keep=None):
    if h.grid.size > 8 * DENSE_MAX_POINTS:
        raise ValueError(f"a dense matrix of {h.grid.size} points needs "
                         f"{8 * h.grid.size**2 / 1e9:.1f} GB; use method='iterative'")
    matrix = h.static_matrix(potential=v)
    if keep is None:
        return scipy.linalg.eigh(matrix, subset_by_index=[0, count - 1], overwrite_a=True)
    inside = np.flatnonzero(keep.reshape(-1))
    energies, sub = scipy.linalg.eigh(matrix[np.ix_(inside, inside)], subset_by_index=[0, count - 1],
                                      overwrite_a=True)
    vectors = np.zeros((h.grid.size, count))
    vectors[inside] = sub
    return energies, vectors


def _block_size(count: int) -> int:
    """Count plus buffer vectors: the last wanted ones converge at the rate
    set by the gap to the first state outside the block."""
    return count + max(4, math.ceil(count / 4))


def _energy_scale(h, v, e_top: float) -> float:
    """The energy scale of the operator on the wanted states (hartree)."""
    return float(h.kinetic.max()) + max(float(e_top) - float(v.min()), 0.0) + 1e-300


def _check_residuals(h, v, keep, energies, states, method):
    """||H psi - E psi|| of each state (unit Euclidean norm; off the walls),
    against the accepted tolerance: the last word on any method's answer."""
    residual = h.apply_static(states, potential=v) - energies.reshape((-1,) + (1,) * h.grid.ndim) * states
    if keep is not None:
        residual *= keep
    axes = tuple(range(1, states.ndim))
    worst = float(np.max(np.sqrt(np.sum(residual**2, axis=axes) / np.sum(states**2, axis=axes))))
    scale = _energy_scale(h, v, float(energies[-1]))
    if not np.isfinite(worst) or worst > ACCEPT_TOL * scale:
        raise RunFailed(f"the {method} eigensolver did not converge: residual {worst:.2e} hartree "
                        f"(accepted {ACCEPT_TOL * scale:.2e}); ask for fewer states or use fewer grid points")


class _SampledPotential:
    """A static potential given on a grid (duck-types a potential term)."""

    time_dependent = False

    def __init__(self, values):
        self.values = values

    def static(self, mesh):
        return self.values


def _coarser(grid: Grid) -> Grid | None:
    """The grid with about half the points along every axis longer than 8
    points (same ends; box axes keep their walls), or None."""
    axes, changed = [], False
    for a in grid.axes:
        n = a.points
        if n > 8:
            n = n // 2 if a.boundary == "periodic" else (n - 1) // 2
            changed = True
        axes.append(Axis(a.name, a.min, a.max, n, a.boundary))
    if not changed:
        return None
    return Grid(tuple(axes), grid.radial, grid.angular_momentum)


def _coarse_hamiltonian(h, v, coarse: Grid) -> Hamiltonian:
    """H on ``coarse`` with the fine grid's V sampled linearly: the
    potential terms are not evaluated again (a file potential belongs to
    its grid).  The coarse grid adds its own centrifugal term."""
    from scipy.interpolate import RegularGridInterpolator

    v = np.asarray(v - h.grid.centrifugal_potential(h.mass), float)
    interp = RegularGridInterpolator([a.coordinates for a in h.grid.axes], v, bounds_error=False,
                                     fill_value=None)
    points = np.stack(np.meshgrid(*[a.coordinates for a in coarse.axes], indexing="ij"), axis=-1)
    return Hamiltonian(coarse, h.mass, [_SampledPotential(interp(points))])


def _resample(vectors: np.ndarray, coarse: Grid, fine: Grid) -> np.ndarray:
    """Columns of states on ``coarse`` -> the same band-limited functions on
    ``fine`` (spectral interpolation: transform, zero-pad, transform back)."""
    m = vectors.shape[1]
    a = vectors.T.reshape((m,) + coarse.shape)
    for i, (ac, af) in enumerate(zip(coarse.axes, fine.axes)):
        axis, nc, nf = i + 1, ac.points, af.points
        if nc == nf:
            continue
        if af.boundary == "periodic":
            c = scipy.fft.fft(a, axis=axis)
            out = np.zeros(a.shape[:axis] + (nf,) + a.shape[axis + 1:], complex)

            def at(s):
                return (slice(None),) * axis + (s,)
            half = nc // 2
            keep = (nc + 1) // 2
            out[at(slice(0, keep))] = c[at(slice(0, keep))]
            out[at(slice(nf - half, nf))] = c[at(slice(nc - half, nc))]
            if nc % 2 == 0:   # the coarse Nyquist mode is cos: half at +k, half at -k
                out[at(nf - half)] = 0.5 * c[at(half)]
                out[at(half)] = 0.5 * c[at(half)]
            a = scipy.fft.ifft(out, axis=axis).real * (nf / nc)
        else:
            # same sine functions sin(n pi (x - min) / L); orthonormal DST-I scaling
            c = scipy.fft.dst(a, type=1, axis=axis, norm="ortho")
            pad = [(0, 0)] * a.ndim
            pad[axis] = (0, nf - nc)
            a = scipy.fft.idst(np.pad(c, pad), type=1, axis=axis, norm="ortho") * math.sqrt((nf + 1) / (nc + 1))
    return a.reshape(m, -1).T


def _cascade(h, v, keep, count, m, top=False):
    """About the ``m`` lowest eigenpairs (columns) of T + ``v`` (walls where
    ``keep`` is False), LOBPCG started from the next coarser grid's answer
    (dense at the bottom)."""
    grid = h.grid
    inside = grid.size if keep is None else int(keep.sum())
    if grid.size <= DENSE_MAX_POINTS and m <= inside:
        return _dense(h, m, v, keep)
    coarse = _coarser(grid)
    rng = np.random.default_rng(1982)   # a fixed seed: the same answer every time
    if coarse is not None and coarse.size >= 4 * m:
        hc = _coarse_hamiltonian(h, v, coarse)
        _, xc = _cascade(hc, hc.static_potential, None, count, m)
        x0 = _resample(xc, coarse, grid)
        # The interpolated states share one error shape (e.g. the cusp at
        # r = 0 that the coarse grid misses, with another amplitude in each),
        # so their preconditioned residuals are nearly parallel and lobpcg's
        # Cholesky orthonormalisation of them fails at the first iteration
        # (measured: hydrogen on 4096 radial points).  A perturbation of 1e-8
        # makes them independent and costs nothing in accuracy.
        x0 = x0 + 1e-8 * np.linalg.norm(x0, axis=0) / math.sqrt(grid.size) * rng.standard_normal(x0.shape)
    else:
        x0 = rng.standard_normal((grid.size, m))
    return _lobpcg(h, v, keep, x0, count, tol=ITERATIVE_TOL if top else COARSE_TOL,
                   maxiter=MAX_ITERATIONS if top else 100)


def _lobpcg(h, v, keep, x0, count, tol, maxiter):
    from scipy.sparse.linalg import LinearOperator, lobpcg

    from ..fft import default_threads

    grid = h.grid
    shape, size = grid.shape, grid.size
    workers = default_threads(size)
    # walls: operator and preconditioner map the vectors that vanish there
    # onto themselves, so the iterates never leave that subspace
    inside = 1.0 if keep is None else keep.reshape(-1, 1).astype(float)
    x0, _ = np.linalg.qr(x0 * inside)

    def columns(x):
        return np.asarray(x).reshape(size, -1)

    def block(x):
        x = columns(x)
        return x.T.reshape((x.shape[1],) + shape)

    def apply_h(x):
        y = h.apply_static(block(x), workers=workers, potential=v)
        return y.reshape(y.shape[0], size).T * inside

    # Preconditioner (T + s)^-1 in transform space, s the largest kinetic
    # energy <T> of the wanted start vectors (Teter, Payne & Allan, Phys. Rev.
    # B 40, 12255 (1989) scale theirs by <T> the same way).  Measured: s = 0.5
    # (<T> of hydrogen 1s) took 10 iterations on 4096 radial points, s = 50
    # (E - V_min) 93; on 2D harmonic wells s = <T> was within 1.5x of the best.
    kinetic = np.sum(block(x0) * h.apply_kinetic(block(x0), workers=workers), axis=tuple(range(1, grid.ndim + 1)))
    t_max = float(h.kinetic.max())
    shift = max(float(np.max(kinetic[:count])), 1e-6 * t_max)
    inverse = 1.0 / (h.kinetic + shift)

    def apply_m(x):
        y = h.apply_kinetic(block(columns(x) * inside), inverse, workers=workers)
        return y.reshape(y.shape[0], size).T * inside

    a_op = LinearOperator((size, size), matvec=apply_h, matmat=apply_h, dtype=float)
    m_op = LinearOperator((size, size), matvec=apply_m, matmat=apply_m, dtype=float)
    rayleigh = np.sum(x0 * apply_h(x0), axis=0)
    scale = _energy_scale(h, v, float(np.sort(rayleigh)[count - 1]))
    # scipy's lobpcg stops when every block vector has converged, and the
    # buffer vectors next to the block's edge converge slowly (measured: 233
    # iterations where the wanted ones needed far fewer), so it runs in
    # chunks, and the residuals of the wanted vectors decide.
    # It also stops when a chunk gains less than a factor 2 on a residual
    # that is already acceptable (measured: a 32^3 grid stalled near 7e-7 of
    # the scale, lobpcg restarting every 3 iterations).
    x, done, before = x0, 0, math.inf
    while True:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")   # "not reaching the requested tolerance": checked below
            energies, x = lobpcg(a_op, x, M=m_op, largest=False, tol=tol * scale, maxiter=LOBPCG_CHUNK)
        done += LOBPCG_CHUNK
        order = np.argsort(energies)
        energies, x = energies[order], x[:, order]
        worst = float(np.max(np.linalg.norm(apply_h(x[:, :count]) - x[:, :count] * energies[:count], axis=0)))
        stalled = worst <= ACCEPT_TOL * scale and worst > 0.5 * before
        if worst <= tol * scale or stalled or done >= maxiter:
            return energies, x
        before = worst


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

    ``model``: the :class:`~wavesweep.simulation.Model` (or Setup) the
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
    edge, faces = _edge_errors(model, v, e0, states)
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
    from ..simulation import Model

    grid = model.hamiltonian.grid
    coarse = _scaled_grid(grid, factor)
    if coarse is None:
        return None
    try:
        hc = Model(model.job, grid=coarse).hamiltonian
    except JobError:   # a term refuses that grid (a point on a singularity): V sampled from the job's grid
        hc = _coarse_hamiltonian(model.hamiltonian, model.hamiltonian.real_potential(0.0), coarse)
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
    m = _block_size(count)
    x0 = _truncate(np.asarray(states, float).reshape(len(states), -1).T, fine, hc.grid)[:, :count]
    rng = np.random.default_rng(1982)
    x0 = np.concatenate([x0, rng.standard_normal((hc.grid.size, m - x0.shape[1]))], axis=1)
    x0 = x0 + 1e-8 * np.linalg.norm(x0, axis=0) / math.sqrt(hc.grid.size) * rng.standard_normal(x0.shape)
    energies, x = _lobpcg(hc, v, keep, x0, count, tol=tol, maxiter=MAX_ITERATIONS)
    energies = np.asarray(energies[:count], float)
    states = x[:, :count].T.reshape((count,) + hc.grid.shape)
    _check_residuals(hc, v, keep, energies, states, "iterative")
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
    the job's physics (a particle in a box, a ring, a lattice), unless V has
    a kink at the seam (second difference above 4 times the largest
    elsewhere: a well cut by the period), where the estimate is the flux
    density (hbar^2 / 2m) (psi'^2 + k^2 psi^2) at the seam over the period
    L; r_max of a radial grid never is: there the level is a box level, and moving the wall from
    a by da moves it by -(hbar^2 / 2m) psi'(a)^2 da (the Hadamard formula
    for a Dirichlet wall; e.g. Garabedian, Partial Differential Equations,
    ch. 15; from memory): the estimate is that for da = L, psi'(a) from the
    last grid point.  All times EDGE_SAFETY."""
    h = model.hamiltonian
    grid, mass = h.grid, h.mass
    v = np.asarray(h.real_potential(0.0), float)
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
                    if grid.radial:   # the wall moved out by L: dE/da = -(hbar^2 / 2m) psi'(a)^2
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


# Levels closer than this, relative to the largest of |E| and the span of the
# levels, are degenerate: the tolerance eigenstate packets refuse a level by
# (states.py).  Measured on isotropic 2D harmonic wells (levels 1..4, dense
# and LOBPCG, 24^2 to 128^2 points): members of a degenerate level differ by
# 4e-16 ... 2e-11 of that (2e-11: the discretisation error of a 24^2 grid,
# which differs between E_3 + E_0 and E_2 + E_1 of the 1D levels).  A true
# splitting below it (the tunnelling pair of a very deep double well) is
# reported as degenerate too.
DEGENERATE_TOL = 1e-8


def degenerate_groups(energies, rel_tol: float = DEGENERATE_TOL) -> list[tuple[int, int]]:
    """``(first, last)`` index ranges (inclusive, two or more levels) of
    ``energies`` (ascending) whose neighbours lie within ``rel_tol`` times
    max(|E|, E_last - E_first) of each other."""
    e = np.asarray(energies, float)
    if e.size < 2:
        return []
    tol = rel_tol * max(float(np.max(np.abs(e))), float(e[-1] - e[0]), 1e-300)
    groups, first = [], 0
    for n in range(1, e.size + 1):
        if n == e.size or e[n] - e[n - 1] > tol:
            if n - 1 > first:
                groups.append((first, n - 1))
            first = n
    return groups


def check_states_path(path, field: str = "--states", overwrite: bool = True) -> Path:
    """Refuse, before any work, a states file that cannot be written: not a
    ``.nc`` name, a folder or other non-file in its place, an existing file
    without ``overwrite`` (the CLI's ``--overwrite``), a parent that is a
    file, a folder that cannot be written (probed by creating a file there),
    or the nearest existing parent of a folder still to be made not
    writable (:func:`wavesweep.io.paths.output_file`)."""
    from ..io.paths import output_file

    return output_file(path, field, (".nc",), overwrite=overwrite, make_folders=True, kind="states file")


def write_states(path, setup, energies_hartree, states, errors: LevelErrors | None = None) -> Path:
    """Write stationary states as netCDF (job units): coordinates of the
    grid, ``energy(state)`` (the grid's eigenvalues, those of the states),
    ``psi_real``/``psi_imag(state, ...)``, and with ``errors``
    (:func:`level_errors`) ``energy_estimate(state)`` and
    ``energy_error(state)``.  ``setup`` is a Model or a Setup.  The file is
    written under a temporary name in the same folder and renamed into place
    (a reader never sees a partial file).  A ``[packet] kind = "file"`` with
    ``state = i`` reads one state back."""
    import copy

    import xarray as xr

    from .. import __version__
    from ..io.recorder import atomic_rename
    from ..jobfile import job_from_dict

    path = Path(path)
    u, grid = setup.units, setup.grid
    lf, ef = u.factor("length"), u.factor("energy")
    length = u.unit_label("length")
    dims = ("state",) + grid.names
    long_names = {"x": "position x", "y": "position y", "z": "position z", "r": "radius r"}
    coords = {a.name: (a.name, a.coordinates / lf, {"units": length, "long_name": long_names[a.name]})
              for a in grid.axes}
    coords["state"] = ("state", np.arange(len(energies_hartree)),
                       {"units": "1", "long_name": "index of the state in energy order (0: ground)"})
    psi = np.asarray(states, float) * lf ** (grid.ndim / 2)
    psi_units = f"{length}-{grid.ndim / 2:g}"
    job = setup.job
    try:
        job_text, run_id = job.to_toml(), job.run_id
    except JobError:
        # resolving the job tunes a CAP absorber to the packet, which may not fit the grid: the
        # states do not depend on the absorber, so the job is recorded without one
        bare = job_from_dict({**copy.deepcopy(job.table), "absorber": {"kind": "none"}})
        job_text, run_id = bare.to_toml(), bare.run_id
    ds = xr.Dataset(
        {"energy": ("state", np.asarray(energies_hartree, float) / ef,
                    {"units": u.unit_label("energy"), "long_name": "energy of the stationary state"}),
         "psi_real": (dims, psi, {"units": psi_units, "long_name": "real part of the stationary state"}),
         "psi_imag": (dims, np.zeros_like(psi), {"units": psi_units,
                                                 "long_name": "imaginary part of the stationary state"}),
         "potential": (grid.names, setup.hamiltonian.real_potential(0.0) / ef,
                       {"units": u.unit_label("energy"),
                        "long_name": "real potential at t = 0 the states belong to"})},
        coords=coords,
        attrs={"title": job.title, "job": job_text, "run_id": run_id,
               "wavesweep_version": __version__, "content": "stationary states",
               "units_length": length, "units_energy": u.unit_label("energy"),
               "units_time": u.unit_label("time"), "units_mass": u.unit_label("mass"),
               "length_to_bohr": float(lf), "energy_to_hartree": float(ef),
               "time_to_atomic": float(u.factor("time")),
               "grid_kind": "radial" if grid.radial else "cartesian",
               "angular_momentum": int(grid.angular_momentum), "Conventions": "CF-1.8"})
    if errors is not None:
        ds["energy_estimate"] = ("state", np.asarray(errors.energies, float) / ef,
                                 {"units": u.unit_label("energy"),
                                  "long_name": "best estimate of the level (Richardson dx -> 0 where extrapolated)"})
        ds["energy_error"] = ("state", np.asarray(errors.errors, float) / ef,
                              {"units": u.unit_label("energy"),
                               "long_name": "estimated absolute error of energy_estimate",
                               "refine": errors.refine})
    tmp = path.with_name(f".{path.name}.part")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        ds.to_netcdf(tmp, engine="netcdf4")
        atomic_rename(tmp, path)
    except OSError as e:
        tmp.unlink(missing_ok=True)
        raise JobError("--states", f"cannot write {str(path)!r}: {e.strerror or e}; choose another path") from None
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
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


# Window: tau = T / WINDOW_RATIO, so that w(T) = exp(-18) = 1.5e-8.
WINDOW_RATIO = 6.0
# A fitted line this much wider than the window's is blended (see the notes).
BLENDED_WIDTH = 1.005
# A fitted line narrower than the window's by more than this is no line: at
# any peak of a sum of window lines with positive weights the fitted width is
# at least the window's (see the notes); what is narrower is a side lobe of
# the record's truncation or noise.  The slack covers rounding and the
# truncation's own distortion of true lines (measured: isolated lines fit
# 1 +/- 1e-6 at tau = T/6, a weak line 1 - 4e-6 at tau = T/4.6).
NARROW_WIDTH = 0.98
# Lanczos steps for the energy distribution of psi(0) (at most), in chunks
# of BAND_CHUNK until the band fits the sampling's period (energy_band).
BAND_STEPS = 240
BAND_CHUNK = 20


class _Lanczos:
    """Lanczos recurrence of a Hermitian ``apply`` from psi, extended on
    demand; keeps three vectors and the tridiagonal matrix."""

    def __init__(self, apply, psi, scale):
        self.apply, self.shape, self.scale = apply, np.shape(psi), scale
        q = np.array(psi, dtype=complex).reshape(-1)
        self.q, self.q_prev = q / np.linalg.norm(q), None
        self.alphas, self.betas, self.exhausted = [], [], False

    def extend(self, steps):
        for _ in range(int(steps)):
            if self.exhausted:
                return
            q = self.q
            w = np.asarray(self.apply(q.reshape(self.shape)), complex).reshape(-1)
            if self.q_prev is not None:
                w -= self.betas[-1] * self.q_prev
            a = float(np.vdot(q, w).real)
            w -= a * q
            c = np.vdot(q, w)          # a second pass against q keeps the local orthogonality
            w -= c * q
            self.alphas.append(a + float(c.real))
            beta = float(np.linalg.norm(w))
            if not beta > 1e-13 * self.scale:
                self.exhausted = True
                return
            self.betas.append(beta)
            self.q_prev, self.q = q, w / beta

    more = True    # steps can always be added (a recorded recurrence runs out)

    @property
    def steps(self):
        return len(self.alphas)

    def quadrature(self):
        k = len(self.alphas)
        nodes, vectors = scipy.linalg.eigh_tridiagonal(np.array(self.alphas), np.array(self.betas[:k - 1]))
        weights = vectors[0] ** 2
        return nodes, weights / weights.sum()


class _RecordedLanczos(_Lanczos):
    """A Lanczos recurrence written at run time (:func:`lanczos_recurrence`),
    replayed: ``extend`` reveals recorded steps, so every quadrature is the
    one the live recurrence gives after as many steps."""

    def __init__(self, alphas, betas, exhausted):
        self._alphas, self._betas = list(map(float, alphas)), list(map(float, betas))
        self._exhausted = bool(exhausted)
        self.alphas, self.betas, self.exhausted = [], [], False

    def extend(self, steps):
        n = min(len(self.alphas) + int(steps), len(self._alphas))
        self.alphas, self.betas = self._alphas[:n], self._betas[:n]
        self.exhausted = self._exhausted and n == len(self._alphas)

    @property
    def more(self):
        return len(self.alphas) < len(self._alphas)


# What a run records for `levels --from` is the band its defaults ask for (--min-weight, the window).
DEFAULT_MIN_WEIGHT = 1e-6


def band_window(duration: float, sample_step: float) -> tuple[float, float]:
    """``(resolution, width)`` (hartree) :func:`autocorrelation_levels`
    asks :func:`energy_band` for, with the default window tau = duration /
    WINDOW_RATIO, for samples ``sample_step`` apart (atomic units)."""
    tau = duration / WINDOW_RATIO
    period = 2.0 * math.pi / sample_step
    return 1.0 / tau, (1.0 - 1e-9) * period - 2.0 * (6.0 / tau)


def lanczos_recurrence(h, psi, threshold: float = DEFAULT_MIN_WEIGHT, resolution: float = 0.0,
                       width: float | None = None, max_steps: int = BAND_STEPS, ground: bool = True):
    """``(alphas, betas, exhausted, spectrum_min, spectrum_max, ground)``:
    the Lanczos steps of H (with the eigensolvers' walls,
    :func:`walled_potential`) from psi that :func:`energy_band` takes for
    these arguments, the bounds V_min + T_min, V_max + T_max of the spectrum
    and the ground level where it needed one (else None), in hartree.  A run
    writes them into its result for the arguments of ``levels --from``'s
    defaults (:func:`band_window`), and :func:`recorded_energy_band` gives
    psi's band from them as :func:`energy_band` does from H (``levels
    --from`` needs no H; other arguments may need steps not recorded, and
    then give a looser band).  ``max_steps`` caps the steps and
    ``ground=False`` leaves the ground level out (the band is then looser:
    a run bounds what it spends on this)."""
    v, _ = walled_potential(h, None)
    lo = float(v.min()) + float(h.kinetic.min())
    hi = float(v.max()) + float(h.kinetic.max())
    lanczos = _Lanczos(lambda x: h.apply_static(x, potential=v), psi, hi - lo + 1e-300)
    found = []

    def ground_level():
        found.append(ground_energy(h))
        return found[-1]
    _band(lanczos, lo, hi, threshold, resolution, width, ground=ground_level if ground else None,
          max_steps=max_steps)
    return (np.array(lanczos.alphas), np.array(lanczos.betas), lanczos.exhausted, lo, hi,
            found[-1] if found else None)


def lanczos_quadrature(apply, psi, steps: int, scale: float):
    """The Gauss quadrature of psi's spectral measure mu(E) = sum_n
    |<n|psi>|^2 delta(E - E_n) for the Hermitian operator ``apply``, from
    ``steps`` Lanczos steps started at psi: ``(nodes, weights, exhausted)``,
    nodes ascending, weights summing to 1.  ``exhausted``: the Krylov space
    became invariant (a residual below 1e-13 ``scale``), so the nodes and
    weights are the measure itself (an eigenstate gives one node of weight 1).
    The nodes are the eigenvalues of the Lanczos tridiagonal matrix and the
    weights the squared first components of its eigenvectors (Golub &
    Welsch, Math. Comp. 23, 221 (1969); from memory).  No
    reorthogonalisation: only three vectors are kept; in floating point the
    quadrature stays that of a measure with each level spread over a tiny
    interval (Greenbaum, Linear Algebra Appl. 113, 7 (1989); from memory),
    which is all :func:`quadrature_band` needs."""
    lanczos = _Lanczos(apply, psi, scale)
    lanczos.extend(steps)
    return (*lanczos.quadrature(), lanczos.exhausted)


def quadrature_band(nodes, weights, threshold: float):
    """``(lo, hi)`` such that the measure whose Gauss quadrature is (nodes,
    weights) puts less than ``threshold`` on E <= lo and less than
    ``threshold`` on E >= hi; either is None where the quadrature cannot
    tell (the outermost node alone carries ``threshold`` or more).  By the
    Chebyshev-Markov-Stieltjes inequalities, mu(E <= x_j) <= sum_{i<=j} w_i
    and mu(E >= x_j) <= sum_{i>=j} w_i for the Gauss nodes x_1 < ... < x_k
    (Szego, Orthogonal Polynomials, sec. 3.41; Golub & Meurant, Matrices,
    Moments and Quadrature with Applications, ch. 6; from memory): every
    level of weight >= threshold lies strictly between lo and hi."""
    nodes, weights = np.asarray(nodes, float), np.asarray(weights, float)
    below = np.nonzero(np.cumsum(weights) < threshold)[0]
    above = np.nonzero(np.cumsum(weights[::-1])[::-1] < threshold)[0]
    lo = float(nodes[below[-1]]) if below.size else None
    hi = float(nodes[above[0]]) if above.size else None
    return lo, hi


def energy_band(h, psi, threshold: float, resolution: float, width: float | None = None):
    """The energies (hartree) outside of which psi holds no level of weight
    >= ``threshold``: ``(lo, hi)``.  Lanczos quadratures of psi's energy
    distribution (:func:`lanczos_quadrature`, H with the eigensolvers'
    walls, :func:`walled_potential`) bound the tails
    (:func:`quadrature_band`).  Every quadrature gives valid bounds, so the
    tightest over chunks of :data:`BAND_CHUNK` steps is kept (widened by
    ``resolution``), until the band is at most ``width`` wide (all a caller
    needs), or, without ``width``, until a chunk moves no edge by more than
    ``resolution``; at most :data:`BAND_STEPS` steps.  Where the outermost
    node carries ``threshold`` or more (below, that is the rule: the lowest
    node is the ground level), the edge is the spectrum's own bound: the
    grid's largest V + T above; below V_min + T_min, or the ground level
    (one eigenpair) when the band would be too wide with V_min.  Measured:
    hydrogen's upper edge for a packet at r = 10 bohr (4096 radial points)
    stayed at 44 hartree for 40 steps and fell to 3.3 by 240, so the chunks
    go on while the band is too wide; 240 steps cost 0.3 s there and 3 s
    on 256^2 points (a loaded 2-core machine)."""
    v, _ = walled_potential(h, None)
    spectrum_lo = float(v.min()) + float(h.kinetic.min())
    spectrum_hi = float(v.max()) + float(h.kinetic.max())
    scale = spectrum_hi - spectrum_lo + 1e-300

    def apply(x):
        return h.apply_static(x, potential=v)

    return _band(_Lanczos(apply, psi, scale), spectrum_lo, spectrum_hi, threshold, resolution, width,
                 ground=lambda: ground_energy(h))


def recorded_energy_band(recorded, threshold: float, resolution: float, width: float | None = None):
    """:func:`energy_band` from a recurrence a run recorded,
    ``(alphas, betas, exhausted, spectrum_min, spectrum_max, ground)``
    (:func:`lanczos_recurrence`): the same band for the arguments it was
    recorded for.  Others may need more steps than were recorded (the band
    is then the one the recorded steps give, looser) or the ground level
    where none was recorded (the spectrum's bound V_min + T_min stays the
    lower edge: no Hamiltonian to diagonalise here)."""
    alphas, betas, exhausted, spectrum_lo, spectrum_hi, ground = recorded
    return _band(_RecordedLanczos(alphas, betas, exhausted), float(spectrum_lo), float(spectrum_hi),
                 threshold, resolution, width, ground=None if ground is None else (lambda: float(ground)))


def _band(lanczos, spectrum_lo, spectrum_hi, threshold, resolution, width, ground, max_steps=BAND_STEPS):
    def fits(lo_, hi_):
        return width is not None and hi_ - lo_ <= width

    lo, hi = -math.inf, math.inf
    while lanczos.steps < max_steps and not lanczos.exhausted and lanczos.more:
        lanczos.extend(BAND_CHUNK)
        nodes, weights = lanczos.quadrature()
        new_lo, new_hi = quadrature_band(nodes, weights, threshold)
        if lanczos.exhausted:   # the measure itself: its levels of weight >= threshold
            big = nodes[weights >= threshold]
            new_lo, new_hi = float(big.min()), float(big.max())
        # In floating point a converged node gets copies (Greenbaum's clusters) that share its
        # weight, so a copy just below (above) a level can be the edge: the bounds hold up to the
        # clusters' width, far below a line width (measured: 1e-13 on a quench, where the copy
        # of E = 8.5 hbar w was the edge at 1e-5).
        moved = False
        if new_lo is not None:
            moved |= new_lo - resolution > lo + resolution
            lo = max(lo, new_lo - resolution)
        if new_hi is not None:
            moved |= new_hi + resolution < hi - resolution
            hi = min(hi, new_hi + resolution)
        if math.isfinite(hi):
            if fits(lo if math.isfinite(lo) else spectrum_lo, hi):
                break
            if width is None and lanczos.steps > BAND_CHUNK and not moved:
                break
    if not math.isfinite(hi):
        hi = spectrum_hi
    if not math.isfinite(lo):
        lo = spectrum_lo
        if width is not None and not fits(lo, hi) and ground is not None:
            lo = ground() - resolution
    return max(lo, spectrum_lo), min(hi, spectrum_hi)


def ground_energy(h) -> float:
    """The lowest level of H (hartree): a lower bound of any state's energies."""
    energies, _ = eigenpairs(h, 1, t=None, field="--from")
    return float(energies[0])


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
    from ..io.results import open_result

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
    from ..io.results import result_units
    from ..record import LANCZOS_MAX_POINTS, read_record

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
    record = read_record(ds, field, lanczos=True)
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
