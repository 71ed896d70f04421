"""Eigenpairs of a grid Hamiltonian, the degeneracy rule, and Lanczos
bounds of a state's energy distribution: the numerics that stationary
states (eigenstate packets, ``levels``) and the run's analysis record share.

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

    Points far above the potential's minimum are walls
    (:func:`walled_potential`): psi = 0 there, so the problem's size is the
    number of points below them.  Up to :data:`DENSE_MAX_POINTS` such points
    the dense matrix on them is diagonalised (``scipy.linalg.eigh`` with
    ``subset_by_index``), however large the grid: a narrow trap on a wide
    grid (a released cloud's 100 Hz trap on 4095 points of 0.41 um keeps
    443 points; 8191 points keep 1771, 0.04 s and 0.7 s) is a small problem.
    Larger ones use LOBPCG (Knyazev, SIAM J. Sci. Comput. 23, 517 (2001);
    ``scipy.sparse.linalg.lobpcg``) on the FFT-applied operator, with a
    preconditioner built from (T + s)^-1 in transform space and the
    potential's excess over the wanted energies (see :func:`lobpcg_from`),
    started from the states of a grid with half the points per axis and the
    same walls (the same method, down to a problem small enough to
    diagonalise densely), spectrally interpolated: a cascade.  Measured for
    10 levels of 2D harmonic wells (one thread on a shared 2-core machine):
    Lanczos (``eigsh``, which="SA") took 0.4 s at 128^2 and 5 s at 256^2
    but skipped one member of a degenerate pair on the 256^2 isotropic
    well, which a block method cannot; Chebyshev-filtered subspace
    iteration took 1.1 s and 8.5 s, LOBPCG from random vectors 2.6 s and
    9 s, the cascade 0.9-1.0 s and 3.3-3.8 s (dense eigh: 1.1 s at 48^2,
    6.5 s at 64^2).  Lanczos needed 118 s for hydrogen on 4096 radial
    points, the cascade 1.2 s.  The trap's ground state on 16383 points
    (7083 below the walls) took the cascade 0.7 s, on 255 x 1023 points
    4 s.  Every result is checked by its residual ||H psi - E psi||.

    States are real, normalised on the grid (sum psi^2 dV = 1, in
    bohr^(-ndim/2)), with a deterministic sign: positive at the first grid
    point (row-major order) where |psi| reaches half its maximum.  Within a
    degenerate level any orthonormal basis is an answer; which one is
    returned is not defined.

Degeneracy (:func:`degenerate_groups`)
    One rule, used by eigenstate packets (a degenerate level has no unique
    state and is refused) and by ``levels`` (which marks degenerate levels).

Energy bands (:func:`energy_band`, :func:`lanczos_recurrence`)
    What Lanczos quadratures of psi's energy distribution bound: see
    :func:`energy_band`; the autocorrelation analysis that uses them is
    :mod:`wavesweep.analysis.spectra`.
"""
from __future__ import annotations

import math
import warnings

import numpy as np
import scipy.fft
import scipy.linalg

from .errors import JobError, RunFailed
from .fft import default_threads
from .grid import Axis, Grid
from .hamiltonian import Hamiltonian

__all__ = ["eigenpairs", "coupled_eigenpairs", "coupled_walls", "surface_weights", "walled_potential", "degenerate_groups", "energy_band", "recorded_energy_band",
           "lanczos_recurrence", "lanczos_quadrature", "quadrature_band", "band_window", "ground_energy",
           "DENSE_MAX_POINTS", "DEGENERATE_TOL"]

# Largest problem diagonalised densely: points below the walls (8 bytes x
# size^2: 34 MB).  Measured (one thread): dense eigh with a subset took
# 0.09 s at 1024 points, 1.1 s at 2304 and 6.5 s at 4096; the cascade
# 0.07-0.2 s at 4096.
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
        # the walls leave psi = 0 there: the problem's size is the points below them
        points = grid.size if keep is None else int(keep.sum())
        method = "dense" if points <= DENSE_MAX_POINTS else "iterative"
    if method == "dense":
        energies, vectors = _dense(hamiltonian, count, v, keep)
    elif method == "iterative":
        energies, vectors = _cascade(hamiltonian, v, keep, count, block_size(count), top=True)
        energies, vectors = energies[:count], vectors[:, :count]
    else:
        raise ValueError(f"method must be 'auto', 'dense' or 'iterative', got {method!r}")
    states = vectors.T.reshape((count,) + grid.shape)
    check_residuals(hamiltonian, v, keep, energies, states, method)
    return np.asarray(energies, float), _signed_states(states, grid.cell_volume)


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


def _signed_states(states, cell_volume: float):
    """Unit-norm columns normalised on the grid (sum psi^2 dV = 1, bohr^(-ndim/2))
    with the deterministic sign: positive at the first point (row-major)
    where |psi| reaches half its maximum.  One rule for one surface and several."""
    states = states / math.sqrt(cell_volume)
    for s in states:
        flat = s.reshape(-1)
        big = np.abs(flat)
        first = int(np.argmax(big >= 0.5 * big.max()))
        if flat[first] < 0:
            s *= -1.0
    return states


def _dense(h, count, v, keep=None):
    points = h.grid.size if keep is None else int(keep.sum())
    if points > 8 * DENSE_MAX_POINTS:
        raise ValueError(f"a dense matrix of {points} points needs "
                         f"{8 * points**2 / 1e9:.1f} GB; use method='iterative'")
    if keep is None:
        matrix = h.static_matrix(potential=v)
        return scipy.linalg.eigh(matrix, subset_by_index=[0, count - 1], overwrite_a=True)
    energies, sub = scipy.linalg.eigh(_walled_matrix(h, v, keep), subset_by_index=[0, count - 1],
                                      overwrite_a=True)
    vectors = np.zeros((h.grid.size, count))
    vectors[np.flatnonzero(keep.reshape(-1))] = sub
    return energies, vectors


def _walled_matrix(h, v, keep):
    """The rows and columns of ``h.static_matrix(potential=v)`` at the
    points where ``keep`` is True (row-major order), built without the full
    matrix: the Kronecker sum of the axes' kinetic matrices sampled at the
    kept points' coordinates, plus V on the diagonal; size^2 of the kept
    points only (a narrow well on a wide grid, the trap of a released cloud
    on 4095 points, keeps 443)."""
    grid = h.grid
    where = np.nonzero(keep)                 # coordinates of the kept points along each axis
    matrix = np.zeros((where[0].size,) * 2)
    for i in range(grid.ndim):
        part = _axis_kinetic(h, i, where[i])
        if grid.ndim > 1:                    # T_i couples points that share every other coordinate
            others = [w for j, w in enumerate(where) if j != i]
            line = np.ravel_multi_index(others, [a.points for j, a in enumerate(grid.axes) if j != i])
            part = np.where(line[:, None] == line[None, :], part, 0.0)
        matrix += part
    matrix[np.diag_indices(matrix.shape[0])] += np.asarray(v)[keep]
    return matrix


def _axis_kinetic(h, i, index):
    """The kinetic matrix of axis ``i`` alone (hartree), rows and columns at
    the coordinates ``index`` along it: the stretch of the axis they span,
    from the axis's transform of unit vectors (256 at a time), symmetrised."""
    axis = h.grid.axes[i]
    line = h
    if h.grid.ndim > 1:
        line = Hamiltonian(Grid((axis,)), h.mass, [], static_potential=np.zeros(axis.points))
    lo, hi = int(index.min()), int(index.max()) + 1
    stretch = np.empty((hi - lo, hi - lo))
    for start in range(lo, hi, 256):
        stop = min(start + 256, hi)
        units = np.zeros((stop - start, axis.points))
        units[np.arange(stop - start), np.arange(start, stop)] = 1.0
        stretch[start - lo:stop - lo] = line.apply_kinetic(units)[:, lo:hi]
    stretch = 0.5 * (stretch + stretch.T)    # symmetric to rounding; exactly, for eigh
    return stretch[np.ix_(index - lo, index - lo)]


def block_size(count: int) -> int:
    """Count plus buffer vectors: the last wanted ones converge at the rate
    set by the gap to the first state outside the block."""
    return count + max(4, math.ceil(count / 4))


def _energy_scale(h, v, e_top: float) -> float:
    """The energy scale of the operator on the wanted states (hartree)."""
    return float(h.kinetic.max()) + max(float(e_top) - float(v.min()), 0.0) + 1e-300


def check_residuals(h, v, keep, energies, states, method):
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


def coarse_hamiltonian(h, v, coarse: Grid) -> Hamiltonian:
    """H on ``coarse`` with the fine grid's V sampled linearly: the
    potential terms are not evaluated again (a file potential belongs to
    its grid).  The coarse grid adds its own centrifugal term."""
    from scipy.interpolate import RegularGridInterpolator  # lazy: only the iterative cascade

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
    if inside <= DENSE_MAX_POINTS:
        return _dense(h, min(m, inside), v, keep)
    coarse = _coarser(grid)
    rng = np.random.default_rng(1982)   # a fixed seed: the same answer every time
    hc = None
    if coarse is not None:
        hc = coarse_hamiltonian(h, v, coarse)
        vc, keep_c = hc.static_potential, None
        if keep is not None:
            # the same walls on the coarse grid: where the sampled V reaches the cap (without
            # them, a released cloud's trap on 4095 points made the 2047-point grid a dense
            # problem of 2047 points instead of 221)
            ceiling = float(v.max())
            keep_c = vc < ceiling
            vc = np.minimum(vc, ceiling)
        if (coarse.size if keep_c is None else int(keep_c.sum())) < 4 * m:
            hc = None
    if hc is not None:
        _, xc = _cascade(hc, vc, keep_c, count, m)
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
    return lobpcg_from(h, v, keep, x0, count, tol=ITERATIVE_TOL if top else COARSE_TOL,
                   maxiter=MAX_ITERATIONS if top else 100)


def lobpcg_from(h, v, keep, x0, count, tol, maxiter):
    """``(energies, vectors)``: LOBPCG on T + ``v`` (walls where ``keep`` is
    False) from the columns ``x0``, until the ``count`` lowest residuals are
    below ``tol`` times the energy scale, or stall, or ``maxiter``."""
    from scipy.sparse.linalg import LinearOperator, lobpcg  # lazy: only grids beyond the dense limit

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

    # Preconditioner: an approximate inverse of T + w + s, w = max(V - E, 0)
    # the potential's excess over E, the largest Rayleigh quotient of the
    # wanted start vectors, and s their largest kinetic energy <T> (Teter,
    # Payne & Allan, Phys. Rev. B 40, 12255 (1989) scale their kinetic
    # preconditioner by <T> the same way; measured: s = 0.5 (<T> of hydrogen
    # 1s) took 10 iterations on 4096 radial points, s = 50 (E - V_min) 93):
    #     M = D (T + s)^-1 D + (1 - D^2) / (w + t + s),   D^2 = s / (s + w),
    # t the mean of T over the transform grid (the diagonal of T on the
    # grid).  Where w << s, M is (T + s)^-1; where w >> s, the kinetic term
    # is damped by s / w and the diagonal one gives about 1 / (w + t).  For a
    # wave of kinetic energy T where the excess is w, M (T + w + s) stays
    # bounded however large w is (0.6 ... 2.4 for t = 23 s, 0.04 ... 3 for
    # t = 1e4 s; 0 <= T <= 3 t), where (T + s)^-1 alone is off by (w + s) / s:
    # up to 7000 under the walls (100 T_max above V_min) of the 100 Hz Rb-87
    # trap's ground state on 4095 points (+-836 um).  Measured there with
    # (T + s)^-1: LOBPCG's residual fell from 1.3e-3 to 5e-7 of the scale in
    # 390 iterations, and the chunks below stalled at 3e-5 (each restart
    # drops the search directions, and scipy returns the iterate of least
    # mean residual over the block, here the chunk's start).  With M: at
    # most 20 iterations to 1e-9 on 4095, 8191 and 16383 points and on
    # 255 x 1023, and 20 instead of 240 for the separable 2D test well.
    kinetic = np.sum(block(x0) * h.apply_kinetic(block(x0), workers=workers), axis=tuple(range(1, grid.ndim + 1)))
    t_max = float(h.kinetic.max())
    shift = max(float(np.max(kinetic[:count])), 1e-6 * t_max)
    inverse = 1.0 / (h.kinetic + shift)
    rayleigh = np.sum(x0 * apply_h(x0), axis=0)
    e_top = float(np.sort(rayleigh)[count - 1])
    excess = np.maximum(v - e_top, 0.0).reshape(-1, 1)
    outer = np.sqrt(shift / (shift + excess)) * inside
    diagonal = excess / ((shift + excess) * (excess + float(np.mean(h.kinetic)) + shift)) * inside

    def apply_m(x):
        x = columns(x)
        y = h.apply_kinetic(block(x * outer), inverse, workers=workers)
        return y.reshape(y.shape[0], size).T * outer + diagonal * x

    a_op = LinearOperator((size, size), matvec=apply_h, matmat=apply_h, dtype=float)
    m_op = LinearOperator((size, size), matvec=apply_m, matmat=apply_m, dtype=float)
    scale = _energy_scale(h, v, e_top)
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


# -- coupled surfaces ---------------------------------------------------------------------
def coupled_eigenpairs(hamiltonian, count: int, t: float | None = 0.0, method: str = "auto",
                       field: str = "count"):
    """The ``count`` lowest eigenpairs of H = T (x) 1 + V(r, t) on S coupled
    surfaces (a :class:`~wavesweep.surfaces.SurfaceHamiltonian`; atomic
    units): ``(energies_hartree, states)``, energies ascending and real
    states of shape ``(count, S, *grid.shape)`` in bohr^(-ndim/2), normalised
    over all surfaces (sum_s sum_r psi_s^2 dV = 1), with the sign rule of
    :func:`eigenpairs` applied to the whole (S, *grid) array.

    The matrix is S N x S N for N grid points: the blocks T + diag(V_ss) on
    the diagonal, diag(V_ab) off it (the Fourier-grid Hamiltonian of each
    surface, coupled point by point).  Walls as for one surface
    (:func:`coupled_walls`), per surface.  Up to :data:`DENSE_MAX_POINTS`
    (surface, point) pairs below the walls, dense ``scipy.linalg.eigh`` with
    ``subset_by_index``; beyond, LOBPCG on the operator (:func:`lobpcg_from`
    with the same preconditioner on each surface), started from the lowest
    states of each surface alone (each by the single-surface cascade, to a
    loose tolerance), the lowest of them in energy taken.  ``t`` as in
    :func:`eigenpairs`.  Every answer's residual is checked."""
    grid, surfaces = hamiltonian.grid, hamiltonian.size
    total = surfaces * grid.size
    if isinstance(count, bool) or not isinstance(count, (int, np.integer)):
        raise JobError(field, f"must be a whole number of states, got {count!r}")
    if count < 1:
        raise JobError(field, f"must be at least 1, got {count}")
    if count > total:
        raise JobError(field, f"{surfaces} surfaces of {grid.size} grid points hold at most {total} states; "
                              f"got {count}")
    count = int(count)
    v, keep = coupled_walls(hamiltonian, t)
    points = total if keep is None else int(keep.sum())
    if keep is not None and count > points:
        raise JobError(field, f"only {points} (surface, point) pairs lie below the potentials' walls, so at most "
                              f"{points} states; got {count}")
    if method == "auto":
        method = "dense" if points <= DENSE_MAX_POINTS else "iterative"
    problem = _CoupledOperator(hamiltonian, v)
    diagonal = problem.diagonal
    if method == "dense":
        energies, vectors = _coupled_dense(hamiltonian, count, v, keep)
    elif method == "iterative":
        m = block_size(count)
        x0 = _coupled_start(hamiltonian, v, keep, m)
        energies, vectors = lobpcg_from(problem, diagonal, keep, x0, count, tol=ITERATIVE_TOL,
                                        maxiter=MAX_ITERATIONS)
        energies, vectors = energies[:count], vectors[:, :count]
    else:
        raise ValueError(f"method must be 'auto', 'dense' or 'iterative', got {method!r}")
    states = vectors.T.reshape((count, surfaces) + grid.shape)
    check_residuals(problem, diagonal, keep, energies, states, method)
    return np.asarray(energies, float), _signed_states(states, grid.cell_volume)


def surface_weights(states, cell_volume: float) -> np.ndarray:
    """Each state's weight on each surface, sum_r |psi_s(r)|^2 dV:
    ``(count, S)`` for states ``(count, S, *grid)`` (bohr^(-ndim/2)) on cells
    of ``cell_volume`` (bohr^ndim); a normalised state's weights sum to 1."""
    states = np.asarray(states)
    axes = tuple(range(2, states.ndim))
    return np.sum(np.abs(states) ** 2, axis=axes) * float(cell_volume)


def coupled_walls(h, t: float | None = 0.0):
    """``(v, keep)``: V(r, t) as (S, S, *grid) (hartree) with each diagonal
    capped at the ceiling, and the mask (S, *grid) of the (surface, point)
    pairs below it, or None when all are.  The ceiling is
    :func:`walled_potential`'s, WALL_HEIGHT T_max above the lowest local
    level, bounded below by Gershgorin's circles (V_ss - sum_b |V_sb|).  At
    a wall psi_s = 0, and the couplings to it drop out: the V_ss -> infinity
    limit."""
    v = np.array(h.matrix(t), float)
    s = v.shape[0]
    diagonal = np.stack([v[a, a] for a in range(s)])
    radius = np.sum(np.abs(v), axis=1) - np.abs(diagonal)
    ceiling = float(np.min(diagonal - radius)) + WALL_HEIGHT * float(h.kinetic_operator.kinetic.max())
    if not float(diagonal.max()) > ceiling:
        return v, None
    for a in range(s):
        v[a, a] = np.minimum(v[a, a], ceiling)
    return v, diagonal <= ceiling


class _CoupledGrid:
    """The shape of a coupled problem's vectors, (S, *grid), for the solvers
    written for one grid (:func:`lobpcg_from`, :func:`check_residuals`)."""

    def __init__(self, grid, surfaces: int):
        self.shape = (surfaces,) + tuple(grid.shape)
        self.size = surfaces * grid.size
        self.ndim = grid.ndim + 1


class _CoupledOperator:
    """T (x) 1 + V on (S, *grid) arrays, with the single-surface operator's
    interface that :func:`lobpcg_from` and :func:`check_residuals` use:
    ``apply_static(psi, potential=diagonal)`` applies V with its diagonal
    replaced by ``diagonal`` (S, *grid) when given (the walls' cap);
    ``kinetic`` is T(k) of one surface (the same on every one)."""

    def __init__(self, hamiltonian, v):
        self.kinetic_operator = hamiltonian.kinetic_operator
        self.grid = _CoupledGrid(hamiltonian.grid, hamiltonian.size)
        self.v = v
        self.diagonal = np.stack([v[a, a] for a in range(v.shape[0])])

    @property
    def kinetic(self):
        return self.kinetic_operator.kinetic

    def apply_kinetic(self, psi, factor=None, workers=None):
        return self.kinetic_operator.apply_kinetic(psi, factor, workers=workers)

    def apply_static(self, psi, t=None, workers=None, potential=None):
        out = self.kinetic_operator.apply_kinetic(psi, workers=workers)
        out += _local(self.v, psi)
        if potential is not None:   # the diagonal as given instead of v's
            out += (np.asarray(potential) - self.diagonal) * psi
        return out


def _local(v, psi):
    """sum_b V_ab psi_b at every point, for psi (..., S, *grid)."""
    s = v.shape[0]
    lead = psi.ndim - v.ndim + 1
    psi_m = psi.reshape((-1, s) + psi.shape[lead + 1:])
    out = np.einsum("ab...,mb...->ma...", v, psi_m)
    return out.reshape(psi.shape)


def _coupled_dense(h, count, v, keep):
    """Dense eigh of the coupled matrix on the (surface, point) pairs below
    the walls: per surface the walled single-surface block
    (:func:`_walled_matrix`), and V_ab on the diagonal of block (a, b) where
    both pairs are kept.  Returns columns of length S N (zeros at walls)."""
    grid, surfaces = h.grid, h.size
    mask = np.ones((surfaces,) + grid.shape, bool) if keep is None else keep
    index = [np.flatnonzero(mask[a].reshape(-1)) for a in range(surfaces)]
    offsets = np.concatenate([[0], np.cumsum([i.size for i in index])]).astype(int)
    points = int(offsets[-1])
    if points > 8 * DENSE_MAX_POINTS:
        raise ValueError(f"a dense matrix of {points} (surface, point) pairs needs "
                         f"{8 * points**2 / 1e9:.1f} GB; use method='iterative'")
    matrix = np.zeros((points, points))
    kinetic = h.kinetic_operator
    for a in range(surfaces):
        if index[a].size:
            matrix[offsets[a]:offsets[a + 1], offsets[a]:offsets[a + 1]] = _walled_matrix(kinetic, v[a, a], mask[a])
    for a in range(surfaces):
        for b in range(a + 1, surfaces):
            common, ia, ib = np.intersect1d(index[a], index[b], assume_unique=True, return_indices=True)
            coupling = v[a, b].reshape(-1)[common]
            matrix[offsets[a] + ia, offsets[b] + ib] = coupling
            matrix[offsets[b] + ib, offsets[a] + ia] = coupling
    energies, sub = scipy.linalg.eigh(matrix, subset_by_index=[0, count - 1], overwrite_a=True)
    vectors = np.zeros((surfaces * grid.size, count))
    for a in range(surfaces):
        vectors[a * grid.size + index[a]] = sub[offsets[a]:offsets[a + 1]]
    return energies, vectors


def _coupled_start(h, v, keep, m):
    """``m`` start columns (length S N) for LOBPCG on the coupled operator:
    the lowest states of each surface alone (T + V_ss with its walls, the
    single-surface cascade to COARSE_TOL), the ``m`` lowest in energy of
    them all, each on its own surface, slightly perturbed (as the cascade
    does: nearly parallel start vectors break LOBPCG's orthonormalisation)."""
    grid, surfaces = h.grid, h.size
    found = []
    for a in range(surfaces):
        ka = None if keep is None else keep[a]
        inside = grid.size if ka is None else int(ka.sum())
        if inside == 0:
            continue
        ha = Hamiltonian(grid, h.mass, [], static_potential=v[a, a])
        energies, vectors = _cascade(ha, v[a, a], None if ka is None or ka.all() else ka, min(m, inside),
                                     min(m, inside))
        for e, x in zip(energies, vectors.T):
            found.append((float(e), a, x))
    found.sort(key=lambda item: item[0])
    x0 = np.zeros((surfaces * grid.size, m))
    for j, (_, a, x) in enumerate(found[:m]):
        x0[a * grid.size:(a + 1) * grid.size, j] = x
    rng = np.random.default_rng(1982)
    x0[:, len(found[:m]):] = rng.standard_normal((x0.shape[0], m - len(found[:m])))
    return x0 + 1e-8 * np.linalg.norm(x0, axis=0) / math.sqrt(x0.shape[0]) * rng.standard_normal(x0.shape)


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


# Window: tau = T / WINDOW_RATIO, so that w(T) = exp(-18) = 1.5e-8.
WINDOW_RATIO = 6.0

# Lanczos steps for the energy distribution of psi(0) (at most), in chunks
# of BAND_CHUNK until the band fits the sampling's period (energy_band).
BAND_STEPS = 240
BAND_CHUNK = 20


class _Lanczos:
    """Lanczos recurrence of a Hermitian ``apply`` from psi, extended on
    demand; keeps three vectors and the tridiagonal matrix.  With
    ``potential`` (real, psi's shape), ``apply`` is H's kinetic part alone
    and the step's vector work, V q included, runs in one compiled kernel
    (:func:`wavesweep.kernels.lanczos.lanczos_update`)."""

    def __init__(self, apply, psi, scale, potential=None):
        self.apply, self.shape, self.scale = apply, np.shape(psi), scale
        self.potential = None if potential is None else np.ascontiguousarray(
            np.broadcast_to(potential, np.shape(psi)), dtype=float).reshape(-1)
        q = np.array(psi, dtype=complex).reshape(-1)
        self.q, self.q_prev = q / np.linalg.norm(q), None
        self.alphas, self.betas, self.exhausted = [], [], False

    @classmethod
    def of_hamiltonian(cls, h, potential, psi, scale):
        """The recurrence of T + ``potential`` (:meth:`Hamiltonian.apply_kinetic`)."""
        return cls(h.apply_kinetic, psi, scale, potential=potential)

    def extend(self, steps):
        if self.potential is not None:
            from .kernels.lanczos import lanczos_update   # lazy: numba loads only where a recurrence runs
        for _ in range(int(steps)):
            if self.exhausted:
                return
            q = self.q
            w = np.asarray(self.apply(q.reshape(self.shape)), complex).reshape(-1)
            if self.potential is not None:
                a, c_real, beta = lanczos_update(w, q, q if self.q_prev is None else self.q_prev, self.potential,
                                                 self.betas[-1] if self.betas else 0.0, self.q_prev is not None)
            else:
                if self.q_prev is not None:
                    w -= self.betas[-1] * self.q_prev
                a = float(np.vdot(q, w).real)
                w -= a * q
                c = np.vdot(q, w)          # a second pass against q keeps the local orthogonality
                w -= c * q
                c_real, beta = float(c.real), float(np.linalg.norm(w))
            self.alphas.append(a + c_real)
            if not beta > 1e-13 * self.scale:
                self.exhausted = True
                return
            self.betas.append(beta)
            w /= beta
            self.q_prev, self.q = q, w

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
    lanczos = _Lanczos.of_hamiltonian(h, v, psi, hi - lo + 1e-300)
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

    return _band(_Lanczos.of_hamiltonian(h, v, psi, scale), spectrum_lo, spectrum_hi, threshold, resolution, width,
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
