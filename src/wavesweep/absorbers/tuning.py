"""Return probability of a power-law complex absorbing potential, and its tuning.

An absorber at a grid face adds ``-i W(s)`` to the Hamiltonian over a layer of
thickness ``L`` (bohr); ``s`` in ``[0, L]`` is the depth into the layer measured
from its inner edge and

    W(s) = strength * (s / L)**power            (hartree).

The propagator multiplies psi by ``exp(-W dt)`` per time step ``dt``, so the
amplitude decays at rate ``W / hbar`` and the probability at ``2 W / hbar``.
Behind the layer sits a hard wall (psi = 0 at ``s = L``): on a periodic grid
the wave would wrap into the opposite absorber instead, and the wall is the
conservative stand-in for that.

The *return probability* ``|r(E)|^2`` is the fraction of an incident plane wave
of kinetic energy ``E`` that comes back out of the layer: reflection off the
gradient of ``W`` plus whatever survives the round trip to the wall and back.
It is computed from the stationary Schrodinger equation (atomic units,
``hbar = 1``, mass in electron masses)

    psi''(s) = -q(s)^2 psi(s),     q(s)^2 = 2 m (E + i W(s)),

(``V = -i W`` so ``E - V = E + i W``) with ``psi = exp(iks) + r exp(-iks)``,
``k = sqrt(2 m E)``, for ``s < 0`` and ``psi(L) = 0``.

Method
------
The layer is cut into cells; on each cell the 2x2 propagator of
``y = (psi, psi')`` is the exponential of the fourth-order Magnus generator
with two Gauss-Legendre nodes (Iserles & Norsett, Phil. Trans. R. Soc. A 357
(1999) 983; Blanes, Casas, Oteo & Ros, Phys. Rep. 470 (2009) 151, eq. for
``Omega^[4]``).  The generator is traceless, so its exponential has the closed
form ``cosh(mu) 1 + sinh(mu)/mu Omega`` with ``mu^2 = -det Omega``; for a
constant ``W`` on a cell this is the exact transfer matrix of the step.  The
cell matrices are multiplied by pairwise (tree) reduction, vectorised over
cells and energies.  The wall condition then gives ``r`` in closed form from
the total matrix ``M`` (mapping ``y(0)`` to ``y(L)``):

    M11 psi(0) + M12 psi'(0) = 0   =>   r = (M11 + i k M12) / (i k M12 - M11).

Periodic axes
-------------
On a periodic grid there is no wall: what crosses the x+ layer once wraps
round into the x- layer (where it is booked as absorbed at the wrong face, or
leaks back into the interior).  ``layer_scattering`` therefore treats the
layer with free space (``V = W = 0``) on *both* sides,
``psi = t exp(ik(s - L))`` for ``s > L``, and returns ``R = |r|^2`` and the
one-way transmission ``T = |t|^2``.  With ``y(0) = (1 + r, ik(1 - r))``,
``y(L) = t (1, ik)`` and ``det M = 1`` (traceless generators):

    r = -(ik M11 - M21 - k^2 M12 - ik M22) / D,
    t = 2ik / D,     D = ik M11 - M21 + k^2 M12 + ik M22.

``t`` needs the absolute size of ``M``, not only ratios of its entries, so the
tree product also returns the logarithm of the scale factors it divided out.
Note that a power-law layer ends on a step ``W: strength -> 0`` at ``s = L``;
the part of the wave it reflects comes back through the layer and is part of
``R`` (about ``T^2 |r_step|^2``, far below ``T`` for a useful layer).  For
the tuner, ``R + T`` is the figure of merit on a periodic axis: ``T`` is what
wraps round.
"""
from __future__ import annotations

import functools
import hashlib
import json
import math
import os
import threading

import numpy as np

from ..errors import JobError
from ..fft import wisdom_path
from ..io.atomic import write_text_atomic

__all__ = ["cap_profile", "layer_scattering", "return_probability", "tune_cap_strength", "cached_cap_strength"]

# Resolution criterion of the sub-grid: every cell satisfies
#     |q|_max * h <= _CELL_PHASE,   |q|_max = sqrt(2 m |E_max + i W_max|),
# i.e. at least 2 pi / 0.05 ~ 125 cells per shortest local wavelength
# (or decay length).  The fourth-order Magnus step is exact for constant W, its
# error comes from the variation of W inside a cell and falls as h^4 (measured:
# x16 per halving).  With this bound |r|^2 changes by < 2e-11 absolute (< 1e-13
# near tuned strengths) when the sub-grid is refined fourfold, for quadratic
# layers from 0.1 to 100 hartree (checked in the unit tests), which meets the
# 1e-10 target with margin; solve_ivp agrees to ~1e-13.
_CELL_PHASE = 0.05

# Cells * energies handled per batch: ~16 complex temporaries of this size
# (~1 MB each) stay cache-friendly; batches of 2**21 ran ~8x slower per item.
_CHUNK = 1 << 17

# Gauss-Legendre nodes on [0, 1] for the two-point Magnus step.
_GAUSS_1 = 0.5 - math.sqrt(3.0) / 6.0
_GAUSS_2 = 0.5 + math.sqrt(3.0) / 6.0
_COMMUTATOR = math.sqrt(3.0) / 12.0

# Samples of W(s) handed to return_probability by the tuner; the cubic spline
# through them reproduces power 2 and 3 profiles exactly and others to
# O((L/256)^4).
_PROFILE_SAMPLES = 257


def _positive(name: str, value: float) -> float:
    value = float(value)
    if not (math.isfinite(value) and value > 0.0):
        raise JobError(name, f"must be a finite number > 0, got {value!r}")
    return value


def cap_profile(depth, thickness, strength, power=2.0) -> np.ndarray:
    """Power-law CAP rate ``W(s) = strength * (s / thickness)**power``.

    Parameters
    ----------
    depth : array_like
        Depth ``s`` into the layer in bohr, 0 at the inner edge.  Values are
        clipped to ``[0, thickness]`` (no absorption in front of the layer, the
        full strength behind it).
    thickness : float
        Layer thickness ``L`` in bohr (> 0).
    strength : float
        ``W(L)`` in hartree (>= 0).
    power : float
        Exponent of the power law (> 0); 2 is the usual quadratic CAP.

    Returns
    -------
    numpy.ndarray
        ``W`` in hartree, same shape as ``depth``.
    """
    thickness = _positive("thickness", thickness)
    power = _positive("power", power)
    strength = float(strength)
    if not (math.isfinite(strength) and strength >= 0.0):
        raise JobError("strength", f"must be a finite number >= 0, got {strength!r}")
    x = np.clip(np.asarray(depth, dtype=float) / thickness, 0.0, 1.0)
    return strength * x**power


# Taylor coefficients of cosh(mu) = sum mu2^n/(2n)! and sinh(mu)/mu =
# sum mu2^n/(2n+1)!, n = 0..5, highest first for Horner.
_COSH_TAYLOR = tuple(1.0 / math.factorial(2 * n) for n in range(5, -1, -1))
_SINHC_TAYLOR = tuple(1.0 / math.factorial(2 * n + 1) for n in range(5, -1, -1))


def _cosh_sinhc(mu2: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """cosh(mu) and sinh(mu)/mu as functions of mu^2 (both are even in mu).

    The resolution criterion keeps |mu^2| ~ (|q| h)^2 <= 3e-3; below 1e-2 the
    Taylor series to mu^10 (mu^11 for sinhc) is exact to < 1e-19 relative and
    several times cheaper than complex sqrt/cosh/sinh; anything larger takes
    the transcendental path.
    """
    if float(np.max(np.abs(mu2))) <= 1e-2:
        ch = np.full_like(mu2, _COSH_TAYLOR[0])
        sh = np.full_like(mu2, _SINHC_TAYLOR[0])
        for c_ch, c_sh in zip(_COSH_TAYLOR[1:], _SINHC_TAYLOR[1:]):
            ch *= mu2
            ch += c_ch
            sh *= mu2
            sh += c_sh
        return ch, sh
    mu = np.sqrt(mu2)
    tiny = mu == 0
    safe = np.where(tiny, 1.0, mu)
    return np.cosh(mu), np.where(tiny, 1.0, np.sinh(safe) / safe)


def _tree_product(a, b, c, d, track_scale=False):
    """Ordered product M[N-1] @ ... @ M[0] of 2x2 matrices stored as entry
    arrays of shape (N, nE); returns four arrays of shape (nE,), and with
    ``track_scale`` also ``log_scale`` of shape (nE,) such that the true
    product is ``exp(log_scale)`` times the returned entries.

    Only the ratio of entries matters for r, so partial products are divided
    by their largest entry every few levels: the layer amplifies one solution
    by exp(integral Im q ds), which would otherwise overflow for strong CAPs.
    Every cell matrix has determinant 1, so entries never underflow.
    Each rescaled partial product enters the final product exactly once, so
    the logarithms of all scale factors applied sum to ``log_scale``.
    """
    level = 0
    log_scale = np.zeros(a.shape[1]) if track_scale else None
    while a.shape[0] > 1:
        if a.shape[0] % 2:
            # Identity at the far end keeps the order of the product intact.
            one = np.ones((1, a.shape[1]), dtype=a.dtype)
            zero = np.zeros_like(one)
            a = np.concatenate([a, one])
            b = np.concatenate([b, zero])
            c = np.concatenate([c, zero])
            d = np.concatenate([d, one])
        # Later cell (odd index) multiplies from the left.
        a1, b1, c1, d1 = a[0::2], b[0::2], c[0::2], d[0::2]
        a2, b2, c2, d2 = a[1::2], b[1::2], c[1::2], d[1::2]
        a = a2 * a1 + b2 * c1
        b = a2 * b1 + b2 * d1
        c = c2 * a1 + d2 * c1
        d = c2 * b1 + d2 * d1
        level += 1
        if level % 4 == 0:
            # A cell matrix has norm <= 1 + |q|^2 h + h; 16 of them, or 16
            # rescaled products (norm <= 2), stay far from overflow.
            scale = np.maximum(np.maximum(np.abs(a), np.abs(b)),
                               np.maximum(np.abs(c), np.abs(d)))
            a, b, c, d = a / scale, b / scale, c / scale, d / scale
            if track_scale:
                log_scale += np.log(scale).sum(axis=0)
    if track_scale:
        return a[0], b[0], c[0], d[0], log_scale
    return a[0], b[0], c[0], d[0]


def return_probability(depth, rate, mass, energies) -> np.ndarray:
    """|r(E)|^2 for a wave incident from s<0 (V=0 there) onto the absorbing layer
    with absorption rate profile `rate` (hartree, sampled on the uniform `depth`
    array from 0 to thickness) and a hard wall at depth[-1]. Vectorised over energies (hartree).

    Parameters
    ----------
    depth : array_like, shape (n,)
        Uniform, increasing depths in bohr; ``depth[0]`` is the inner edge of
        the layer (normally 0) and ``depth[-1]`` the wall.
    rate : array_like, shape (n,)
        ``W`` in hartree (>= 0) at ``depth``.  Between samples the profile is
        the not-a-knot cubic spline through them (exact for polynomials up to
        cubic, e.g. the power-2 and power-3 CAPs); with fewer than four
        samples it is linear.
    mass : float
        Particle mass in electron masses (> 0).
    energies : array_like
        Kinetic energies of the incident wave in hartree (> 0).

    Returns
    -------
    numpy.ndarray
        Return probability, same shape as ``energies``; 1 for ``W = 0``
        (total reflection at the wall) and in ``[0, 1]`` for ``W >= 0``.

    Notes
    -----
    Fourth-order Magnus transfer matrices on a sub-grid aligned with the
    samples (see the module docstring); the sub-grid keeps the phase
    ``|q| h`` per cell below ``_CELL_PHASE``, which converges ``|r|^2`` to
    ~1e-11 absolute or better.
    """
    e_in, e_flat, cells = _layer_cells(depth, rate, mass, energies)
    mass = cells[0]
    out = np.empty(e_flat.shape)
    for sl, e, (m11, m12, _, _) in _layer_matrices(cells, e_flat):
        ik = 1j * np.sqrt(2.0 * mass * e)
        num = m11 + ik * m12
        den = ik * m12 - m11
        out[sl] = (np.abs(num) / np.abs(den)) ** 2
    return out.reshape(e_in.shape)


def layer_scattering(depth, rate, mass, energies) -> tuple[np.ndarray, np.ndarray]:
    """(R, T): reflection and one-way transmission probabilities of the absorbing layer
    with free space (V = 0) on both sides, vectorised over energies (hartree).

    Parameters
    ----------
    depth, rate, mass, energies
        As for ``return_probability``, except that ``depth[-1]`` is the back
        face of the layer with free space (``W = 0``) behind it instead of a
        wall.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        ``R = |r|^2`` (back out of the inner face) and ``T = |t|^2`` (out of
        the back face, i.e. what wraps round on a periodic grid), both of the
        shape of ``energies``.  ``R = 0`` and ``T = 1`` for ``W = 0``;
        ``1 - R - T >= 0`` is the absorbed fraction.

    Notes
    -----
    Same transfer matrices and sub-grid as ``return_probability`` (see the
    module docstring for the formulas for ``r`` and ``t``).
    """
    e_in, e_flat, cells = _layer_cells(depth, rate, mass, energies)
    mass = cells[0]
    refl = np.empty(e_flat.shape)
    trans = np.empty(e_flat.shape)
    for sl, e, (m11, m12, m21, m22, log_scale) in _layer_matrices(
            cells, e_flat, track_scale=True):
        k = np.sqrt(2.0 * mass * e)
        ik = 1j * k
        a = ik * m11 - m21
        b = -(k * k) * m12 - ik * m22
        den = np.abs(a - b)
        refl[sl] = (np.abs(a + b) / den) ** 2
        # |t|^2 = (2k)^2 / (exp(log_scale) |D_scaled|)^2, in logs so that an
        # opaque layer underflows to 0 instead of overflowing to inf / inf.
        trans[sl] = np.exp(2.0 * (np.log(2.0 * k) - log_scale - np.log(den)))
    return refl.reshape(e_in.shape), trans.reshape(e_in.shape)


def _layer_cells(depth, rate, mass, energies):
    """Validate the inputs of ``return_probability`` / ``layer_scattering``
    and build the Magnus sub-grid.

    Returns ``(e_in, e_flat, (mass, h, w1, w2))``: the energies as given and
    flattened, the validated mass, the cell width and ``W`` at the two Gauss
    nodes of every cell (column vectors; ``None`` for them when no energies
    were given).
    """
    mass = _positive("mass", mass)
    depth = np.asarray(depth, dtype=float)
    rate = np.asarray(rate, dtype=float)
    if depth.ndim != 1 or depth.size < 2:
        raise JobError("depth", "must be a 1-D array of at least 2 depths")
    if rate.shape != depth.shape:
        raise JobError("rate", f"shape {rate.shape} differs from depth shape {depth.shape}")
    if not (np.all(np.isfinite(depth)) and np.all(np.isfinite(rate))):
        raise JobError("depth", "depth and rate must be finite")
    spacing = np.diff(depth)
    step = (depth[-1] - depth[0]) / (depth.size - 1)
    if not (step > 0.0 and np.allclose(spacing, step, rtol=1e-6, atol=0.0)):
        raise JobError("depth", "must be uniformly spaced and increasing")
    if np.any(rate < 0.0):
        raise JobError("rate", "must be >= 0 (a negative rate is gain, not absorption)")

    e_in = np.asarray(energies, dtype=float)
    e_flat = e_in.ravel()
    if e_flat.size == 0:
        return e_in, e_flat, (mass, None, None, None)
    if not (np.all(np.isfinite(e_flat)) and np.all(e_flat > 0.0)):
        raise JobError("energies", "must be finite and > 0 hartree")

    # Exactly uniform knots measured from the inner edge.
    x = step * np.arange(depth.size)
    if depth.size >= 4:
        from scipy.interpolate import CubicSpline  # lazy: scipy.interpolate costs 0.28 s to import
        profile = CubicSpline(x, rate, bc_type="not-a-knot")
    else:
        def profile(s, _x=x, _w=rate):
            return np.interp(s, _x, _w)

    # Largest local wave number over the layer and the energy window.  The
    # spline can overshoot between samples, so W_max also looks at the
    # interval midpoints, with a 10 % margin for the rest.
    mid = np.asarray(profile(x[:-1] + 0.5 * step), dtype=float)
    w_max = 1.1 * max(float(rate.max()), float(mid.max()))
    q_max = math.sqrt(2.0 * mass * abs(complex(float(e_flat.max()), w_max)))
    n_sub = max(1, math.ceil(step * q_max / _CELL_PHASE))
    h = step / n_sub
    left = (x[:-1, None] + h * np.arange(n_sub)[None, :]).ravel()
    w1 = np.asarray(profile(left + _GAUSS_1 * h), dtype=float)[:, None]
    w2 = np.asarray(profile(left + _GAUSS_2 * h), dtype=float)[:, None]
    # The spline can dip a hair below 0 next to a zero sample; clip so the
    # layer never adds probability.
    w1 = np.maximum(w1, 0.0)
    w2 = np.maximum(w2, 0.0)

    return e_in, e_flat, (mass, h, w1, w2)


def _layer_matrices(cells, e_flat, track_scale=False):
    """Total transfer matrix of the layer, chunk by chunk over energies.

    Yields ``(slice, e, entries)`` with ``e`` the energies of the chunk and
    ``entries`` the output of ``_tree_product`` (scaled ``M11, M12, M21,
    M22``, plus ``log_scale`` with ``track_scale``).
    """
    if e_flat.size == 0:
        return
    mass, h, w1, w2 = cells
    chunk = max(1, _CHUNK // w1.shape[0])
    for start in range(0, e_flat.size, chunk):
        e = e_flat[None, start:start + chunk]
        # y' = A y with A = [[0, 1], [g, 0]], g = -q^2 = -2m(E + iW), at the
        # two Gauss nodes; Omega = [[diag, h], [lower, -diag]] with
        # diag = h^2 sqrt(3)/12 (g1 - g2) from the commutator [A2, A1]
        # (energy-independent) and lower = h (g1 + g2) / 2.
        diag = (_COMMUTATOR * h * h * -2.0j * mass) * (w1 - w2)
        lower = (-mass * h) * (2.0 * e + 1j * (w1 + w2))
        mu2 = diag * diag + h * lower                # -det(Omega)
        ch, sh = _cosh_sinhc(mu2)
        shd = sh * diag
        entries = _tree_product(ch + shd, sh * h, sh * lower, ch - shd,
                                track_scale=track_scale)
        yield slice(start, start + chunk), e[0], entries


def _strength_bracket(thickness, mass, e_min, e_max, power, passes=2):
    """Wide bracket (hartree) for the optimal strength, from two estimates.

    Lower end: the semiclassical survival ``exp(-2 passes integral(W ds) /
    (hbar v))`` with ``integral(W ds) = S L/(p+1)`` equals 1/e at the fastest
    energy -- any weaker CAP returns (``passes = 2``, round trip to a wall) or
    transmits (``passes = 1``, periodic axis) more than a third of the wave
    even without reflection.
    Upper end: ``W`` reaches ``E_min`` within ``1/k_min`` of the inner edge,
    i.e. the CAP looks like a step of height ~E to the slowest wave, whose
    reflection |(k-q)/(k+q)|^2 ~ 5e-2 is far above any useful optimum.
    """
    v_max = math.sqrt(2.0 * e_max / mass)
    k_min = math.sqrt(2.0 * mass * e_min)
    s_lo = (power + 1.0) * v_max / (2.0 * passes * thickness)
    s_hi = e_min * (k_min * thickness) ** power
    # Thin layers (a wavelength or less) make the two estimates cross; keep a
    # bracket of at least three decades around the lower estimate then.
    s_hi = max(s_hi, 1e3 * s_lo)
    return s_lo, s_hi


def tune_cap_strength(thickness, mass, e_min, e_max, power=2.0, samples=64,
                      periodic=False) -> tuple[float, float]:
    """(strength in hartree, worst figure of merit over [e_min, e_max]) that
    minimises the worst figure of merit.

    The figure of merit is the return probability with a wall behind the
    layer (``periodic=False``, box axes) or ``R + T`` of the layer with free
    space behind it (``periodic=True``; ``T`` is what wraps round into the
    opposite layer).

    Parameters
    ----------
    thickness : float
        Layer thickness in bohr (> 0).
    mass : float
        Particle mass in electron masses (> 0).
    e_min, e_max : float
        Kinetic-energy window of the packet in hartree, ``0 < e_min <= e_max``.
    power : float
        Exponent of the power-law CAP (> 0).
    samples : int
        Number of energies, spread geometrically over the window with both
        ends included (low energies are the hardest to absorb, so they get
        the denser sampling).
    periodic : bool
        Tune for a periodic axis: minimise ``max_E (R + T)`` from
        ``layer_scattering`` instead of ``max_E |r|^2`` from
        ``return_probability``.

    Returns
    -------
    (float, float)
        Optimal ``strength`` (``W`` at the back face, hartree) and the worst
        return probability (or ``R + T``) over the sampled energies at that
        strength.

    Notes
    -----
    The objective (``max_E |r(E)|^2`` or ``max_E (R + T)``) is minimised over ``log(strength)``: a
    coarse scan of the physical bracket (see ``_strength_bracket``) picks the
    basin, then ``scipy.optimize.minimize_scalar(method="bounded")`` (Brent)
    refines it between the neighbouring scan points.  The scan guards against
    the ripples and shoulders the max over energies puts on the objective.
    """
    thickness = _positive("thickness", thickness)
    mass = _positive("mass", mass)
    e_min = _positive("e_min", e_min)
    e_max = _positive("e_max", e_max)
    power = _positive("power", power)
    if e_max < e_min:
        raise JobError("e_max", f"must be >= e_min ({e_min}), got {e_max}")
    samples = int(samples)
    if samples < 1:
        raise JobError("samples", f"must be >= 1, got {samples}")
    if e_max == e_min:
        energies = np.array([e_min])
    else:
        energies = np.geomspace(e_min, e_max, max(samples, 2))

    depth = np.linspace(0.0, thickness, _PROFILE_SAMPLES)
    shape = cap_profile(depth, thickness, 1.0, power)

    if periodic:
        def worst(log_strength: float) -> float:
            rate = math.exp(log_strength) * shape
            refl, trans = layer_scattering(depth, rate, mass, energies)
            return float((refl + trans).max())
    else:
        def worst(log_strength: float) -> float:
            rate = math.exp(log_strength) * shape
            return float(return_probability(depth, rate, mass, energies).max())

    s_lo, s_hi = _strength_bracket(thickness, mass, e_min, e_max, power,
                                   passes=1 if periodic else 2)
    # Scan upward in factors of 2 from the weak end.  Past the optimum the
    # gradient reflection grows steadily with strength, so the scan stops
    # once the objective has risen twice in a row to 100x its best value;
    # this skips the strong end of the bracket, which is also the expensive
    # end (the sub-grid follows the local wave number).
    n_grid = max(3, math.ceil(math.log2(s_hi / s_lo)) + 1)
    grid = np.linspace(math.log(s_lo), math.log(s_hi), n_grid)
    values: list[float] = []
    for g in grid:
        values.append(worst(g))
        best = int(np.argmin(values))
        if (len(values) - best >= 3 and values[-1] > values[-2] > values[-3]
                and values[-1] > 100.0 * values[best]):
            break
    i = int(np.argmin(values))
    lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, len(values) - 1)]
    from scipy.optimize import minimize_scalar   # lazy: scipy.optimize only when a layer is tuned
    res = minimize_scalar(worst, bounds=(lo, hi), method="bounded",
                          options={"xatol": 1e-3})
    if res.fun <= values[i]:
        return math.exp(res.x), float(res.fun)
    return math.exp(grid[i]), float(values[i])


class _TuningCache:
    """Tuned strengths on disk (``$WAVESWEEP_CACHE`` or the user cache
    folder, beside the FFTW wisdom), keyed by the tuning's arguments and by
    this module's source, so a change of the method never reuses old values.
    Written by temporary file and rename; concurrent writers may drop each
    other's entries, never corrupt the file."""

    def __init__(self):
        self.path = os.path.join(os.path.dirname(wisdom_path()), "cap-tuning.json")
        with open(__file__, "rb") as f:
            self.revision = hashlib.sha256(f.read()).hexdigest()[:16]
        self._entries = None
        self._lock = threading.Lock()

    def _load(self) -> dict:
        if self._entries is None:
            try:
                with open(self.path) as f:
                    data = json.load(f)
                entries = data.get(self.revision) if isinstance(data, dict) else None
                self._entries = entries if isinstance(entries, dict) else {}
            except (OSError, ValueError):
                self._entries = {}
        return self._entries

    def get(self, key: str):
        hit = self._load().get(key)
        try:
            return None if hit is None else (float(hit[0]), float(hit[1]))
        except (TypeError, ValueError, IndexError):
            return None   # a damaged entry: tune again

    def put(self, key: str, value) -> None:
        with self._lock:   # threads of one process (a batch's members) tune too: one writer at a time
            entries = self._load()
            entries[key] = [float(value[0]), float(value[1])]
            text = json.dumps({self.revision: entries})
        try:
            os.makedirs(os.path.dirname(self.path), exist_ok=True)
            write_text_atomic(self.path, text)
        except OSError:
            pass   # a read-only cache folder: tune again next time


_CACHE = None


def tuning_cache() -> _TuningCache:
    global _CACHE
    if _CACHE is None:
        _CACHE = _TuningCache()
    return _CACHE


@functools.lru_cache(maxsize=512)
def cached_cap_strength(thickness, mass, e_min, e_max, power, periodic=False) -> tuple[float, float]:
    """:func:`tune_cap_strength`, cached in memory and on disk
    (:func:`tuning_cache`): both faces of an axis, the runs of a study, and
    every run of the same job in a later process ask for the same layer (a
    tuning costs 0.3-0.5 s, most of a worker's start-up)."""
    key = repr((float(thickness), float(mass), float(e_min), float(e_max), float(power), bool(periodic)))
    cache = tuning_cache()
    hit = cache.get(key)
    if hit is not None:
        return hit
    out = tune_cap_strength(thickness, mass, e_min, e_max, power, periodic=periodic)
    cache.put(key, out)
    return out
