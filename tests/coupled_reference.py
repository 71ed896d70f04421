"""Outside references for several coupled potential-energy surfaces (issue 16).

Plain numpy/scipy functions that know nothing about wavesweep, so the tests
compare the code against these and not against itself:

- ``landau_zener_probability``: the Landau-Zener formula for a linear crossing.
- ``coupled_channel_transmission``: a time-independent coupled-channel
  calculation of the state-resolved transmission and reflection of a 1D
  scattering problem on S coupled diabatic surfaces (log-derivative
  propagation with exact constant-potential sectors).
- ``avoided_crossing_model``: two diabatic surfaces with an avoided crossing
  that a wave-packet run on a modest grid and the coupled-channel reference
  both handle in seconds.

Units: any consistent set; ``hbar`` defaults to 1 (atomic units).  The sources
are named beside each function; "from memory" means recalled without the
paper at hand.
"""
from __future__ import annotations

from typing import NamedTuple

import numpy as np

__all__ = ["landau_zener_probability", "coupled_channel_transmission", "CoupledChannelResult",
           "richardson_transmission", "avoided_crossing_model"]


# -- Landau-Zener ------------------------------------------------------------------
def landau_zener_probability(coupling, velocity, slope_difference, hbar=1.0):
    """Landau-Zener probability of a diabatic passage through a linear crossing.

    Two diabatic curves V1(x) = F1 x and V2(x) = F2 x cross at x = 0 and are
    coupled by a constant off-diagonal element V12 = ``coupling``; a particle
    crosses at constant ``velocity`` v.  Then

        P = exp(-2 pi V12^2 / (hbar v |F1 - F2|))

    (L. Landau, Phys. Z. Sowjetunion 2, 46 (1932); C. Zener, Proc. R. Soc.
    Lond. A 137, 696 (1932)) is the probability to REMAIN ON THE SAME DIABATIC
    STATE after the single passage, i.e. to JUMP between the adiabatic states
    (the lower adiabatic curve turns into the other diabatic one after the
    crossing).  1 - P is the probability to change diabatic state (to follow
    the adiabatic curve).  Exact for t from -inf to +inf in the two-state model
    with a classical trajectory x = v t; for a wave packet it holds when the
    packet is fast (kinetic energy far above the coupling) and narrow in
    energy (v well defined).

    Parameters: ``coupling`` V12 (energy), ``velocity`` v (length/time, its
    magnitude is used), ``slope_difference`` F1 - F2 (energy/length, its
    magnitude is used).  Arrays broadcast.
    """
    coupling = np.asarray(coupling, float)
    rate = hbar * np.abs(np.asarray(velocity, float)) * np.abs(np.asarray(slope_difference, float))
    return np.exp(-2.0 * np.pi * coupling**2 / rate)


# -- coupled-channel scattering ------------------------------------------------------
class CoupledChannelResult(NamedTuple):
    """State-resolved scattering of a wave incident in one channel, per energy.

    Arrays have shape (energies, S).  ``transmission[e, s]`` and
    ``reflection[e, s]`` are flux-normalised probabilities into channel s on the
    far / the incident side (zero for a channel closed there); their sum over s
    is 1 (flux conservation).  The amplitudes are those of flux-normalised
    plane waves k^(-1/2) exp(+-i k x) with the phase referred to x = 0 of the
    coordinate the wave travels along (for ``side="right"`` that is -x).
    ``open_far`` / ``open_near`` say which channels are open on each side.
    """
    energies: np.ndarray
    transmission: np.ndarray
    reflection: np.ndarray
    transmission_amplitude: np.ndarray
    reflection_amplitude: np.ndarray
    open_far: np.ndarray
    open_near: np.ndarray


def _sector_log_derivative(lam, h):
    """y1, y2 of a sector of width h with psi'' = lam psi (lam real, per channel).

    For the exact solutions of one channel in [a, b]:
        psi'(a) = -y1 psi(a) + y2 psi(b),   psi'(b) = -y2 psi(a) + y1 psi(b),
    with y1 = kappa coth(kappa h), y2 = kappa / sinh(kappa h), kappa = sqrt(lam)
    (and the circular forms k cot(k h), k / sin(k h) for lam = -k^2 < 0).
    """
    z = lam * h * h
    s = np.sqrt(np.abs(z))
    small = np.abs(z) < 1e-6
    s_safe = np.where(small, 1.0, s)
    with np.errstate(over="ignore"):
        c1 = np.where(z > 0, s_safe / np.tanh(s_safe), s_safe / np.tan(s_safe))
        c2 = np.where(z > 0, s_safe / np.sinh(s_safe), s_safe / np.sin(s_safe))
    # series of s coth s and s / sinh s near z = 0 (both even in s)
    c1 = np.where(small, 1.0 + z / 3.0 - z * z / 45.0, c1)
    c2 = np.where(small, 1.0 - z / 6.0 + 7.0 * z * z / 360.0, c2)
    return c1 / h, c2 / h


def _matmul(A, B):
    """A @ B for matrices stored (S, S, n); explicit sums for small S."""
    S = A.shape[0]
    if S > 4:
        return np.einsum("ikn,kjn->ijn", A, B)
    return np.array([[sum(A[i, k] * B[k, j] for k in range(S)) for j in range(S)] for i in range(S)])


def _rotate(A, U):
    """U^T A U for A stored (S, S, n) and a real (S, S) matrix U."""
    S = A.shape[0]
    if S > 4:
        return np.einsum("ai,abn,bj->ijn", U, A, U)
    left = [[sum(U[a, i] * A[a, b] for a in range(S)) for b in range(S)] for i in range(S)]
    return np.array([[sum(left[i][b] * U[b, j] for b in range(S)) for j in range(S)] for i in range(S)])


def _inverse(A):
    """Inverse of each matrix stored (S, S, n); closed form for S <= 2."""
    S = A.shape[0]
    if S == 1:
        return 1.0 / A
    if S == 2:
        det = A[0, 0] * A[1, 1] - A[0, 1] * A[1, 0]
        return np.array([[A[1, 1], -A[0, 1]], [-A[1, 0], A[0, 0]]]) / det
    return np.linalg.inv(A.transpose(2, 0, 1)).transpose(1, 2, 0)


def _asymptotic_channels(levels, energies, scale):
    """Wavenumbers of the channels at one side: k (open) and kappa (closed), per energy."""
    excess = energies[:, None] - levels[None, :]            # (E, S)
    is_open = excess > 0.0
    wavenumber = np.sqrt(scale * np.abs(excess))             # k if open, kappa if closed
    return is_open, wavenumber


def coupled_channel_transmission(x, V, mass, energies, incident=0, side="left", hbar=1.0):
    """Transmission and reflection per channel of a 1D coupled-channel problem.

    Solves the S coupled time-independent equations

        -hbar^2 / (2 m) psi''(x) + V(x) psi(x) = E psi(x)

    for a wave incident in channel ``incident`` from the ``side`` ("left":
    travelling towards +x; "right": towards -x) at each total energy E.

    ``x``: uniform grid (N points).  ``V``: array (S, S, N), the real symmetric
    diabatic potential matrix at the grid points (energy units).  The potential
    is read as piecewise constant, V[:, :, j] on the cell [x_j - h/2, x_j + h/2]
    (h the spacing), and as V[:, :, 0] / V[:, :, -1] beyond the ends; its
    off-diagonal elements must vanish at both ends, so the diagonal there gives
    the asymptotic channel energies.  ``energies``: total energies (scalar or
    1D); the incident channel must be open.  ``mass`` in the mass unit that
    goes with ``hbar``.

    Method: log-derivative propagation (B. R. Johnson, J. Comput. Phys. 13,
    445 (1973)) with the exact propagator of a constant-potential sector in the
    basis that diagonalises the sector's potential matrix (the sector / R-matrix
    idea of J. C. Light and R. B. Walker, J. Chem. Phys. 65, 4272 (1976); the
    two-point "y1..y4" sector form as in D. E. Manolopoulos, J. Chem. Phys. 85,
    6425 (1986); all from memory).  The S independent solutions that are
    outgoing (open) or decaying (closed channels) beyond the far end are
    carried from the far end to the near end as their log-derivative matrix
    Y = psi' psi^-1, which stays bounded where closed channels grow, together
    with the map psi(near) -> psi(far) (each sector's factor is contracting in
    closed channels).  At the near end psi' = Y psi is matched to the incoming
    wave plus reflected (open) and decaying (closed) waves.  For the stored
    piecewise-constant potential this is exact up to rounding (a rectangular
    barrier on grid cells gives the textbook transmission to ~1e-13); for a
    smooth potential sampled on the grid the error is O(h^2), so sample the
    model on a grid fine enough (see the unit tests for measured errors).

    Returns a ``CoupledChannelResult`` (arrays of shape (len(energies), S)).
    """
    x = np.asarray(x, float)
    V = np.asarray(V, float)
    if V.ndim != 3 or V.shape[0] != V.shape[1] or V.shape[2] != x.size:
        raise ValueError(f"V must have shape (S, S, len(x)) = (S, S, {x.size}); got {V.shape}")
    if x.size < 2:
        raise ValueError("x needs at least two points")
    h = x[1] - x[0]
    if h <= 0.0 or not np.allclose(np.diff(x), h, rtol=1e-9, atol=0.0):
        raise ValueError("x must be uniform and increasing")
    if not np.allclose(V, np.swapaxes(V, 0, 1), rtol=0.0, atol=1e-14 * max(np.abs(V).max(), 1e-300)):
        raise ValueError("V must be symmetric in its first two indices")
    if side not in ("left", "right"):
        raise ValueError(f"side must be 'left' or 'right'; got {side!r}")
    if side == "right":
        # a wave from the right is a wave from the left on the mirrored line
        x, V = -x[::-1], V[:, :, ::-1]
    S = V.shape[0]
    if not 0 <= incident < S:
        raise ValueError(f"incident must be a channel index in 0..{S - 1}; got {incident}")
    scale_v = max(np.abs(V).max(), 1e-300)
    off = ~np.eye(S, dtype=bool)
    for end, name in ((0, "first"), (-1, "last")):
        if np.abs(V[:, :, end][off]).max(initial=0.0) > 1e-10 * scale_v:
            raise ValueError(f"the off-diagonal elements of V must vanish at the {name} grid point "
                             "(asymptotic channels are the diabatic states); extend the grid")
    energies = np.atleast_1d(np.asarray(energies, float))
    scale = 2.0 * mass / hbar**2

    near_open, k_near = _asymptotic_channels(np.diag(V[:, :, 0]).copy(), energies, scale)
    far_open, k_far = _asymptotic_channels(np.diag(V[:, :, -1]).copy(), energies, scale)
    if not near_open[:, incident].all():
        bad = energies[~near_open[:, incident]]
        raise ValueError(f"incident channel {incident} is closed at E = {bad[0]!r} "
                         f"(its asymptotic energy is {V[incident, incident, 0]!r})")
    x_near = 0.5 * (x[0] + x[1])       # first jump of the piecewise-constant potential
    x_far = 0.5 * (x[-2] + x[-1])      # last jump

    # log-derivative of the outgoing (open) / decaying (closed) waves at the far end;
    # matrices are stored (S, S, energies) so that the small products below run
    # element-wise over all energies at once (much faster than batched matmul for S ~ 2)
    idx = np.arange(S)
    Y = np.zeros((S, S, energies.size), complex)
    Y[idx, idx] = np.where(far_open, 1j * k_far, -k_far).T
    P = np.zeros_like(Y)                                      # psi(near) -> psi(far)
    P[idx, idx] = 1.0

    inner = np.moveaxis(V[:, :, 1:-1], -1, 0)                # sectors between the jumps
    levels, vectors = np.linalg.eigh(inner)
    max_kh = np.sqrt(scale * np.maximum(energies.max() - levels.min(), 0.0)) * h
    if max_kh > 1.0:
        raise ValueError(f"the grid is too coarse for these energies: k h reaches {max_kh:.3g}; "
                         "sample V on a finer grid (k h < 1, much less for accuracy)")
    y1_all, y2_all = _sector_log_derivative(scale * (levels[:, :, None] - energies[None, None, :]), h)
    for j in range(inner.shape[0] - 1, -1, -1):
        U = vectors[j]
        y1, y2 = y1_all[j], y2_all[j]                         # (S, energies)
        A = -_rotate(Y, U)                                    # y1 - U^T Y U, sector basis
        A[idx, idx] += y1
        G = _inverse(A) * y2[None, :, :]                      # psi(b) = G psi(a), sector basis
        Ya = y2[:, None, :] * G
        Ya[idx, idx] -= y1
        Y = _rotate(Ya, U.T)
        Y = 0.5 * (Y + Y.transpose(1, 0, 2))                  # symmetric in exact arithmetic
        P = _matmul(P, _rotate(G, U.T))

    # near end: psi = f (incoming, incident channel) + sum_s beta_s g_s, psi' = Y psi
    k_inc = k_near[:, incident]
    f = np.exp(1j * k_inc * x_near) / np.sqrt(k_inc)
    df = 1j * k_inc * f
    safe_k = np.where(near_open, k_near, 1.0)
    g = np.where(near_open, np.exp(-1j * safe_k * x_near) / np.sqrt(safe_k), 1.0)
    dg = np.where(near_open, -1j * k_near * g, k_near)       # closed: exp(kappa (x - x_near))
    Yt = Y.transpose(2, 0, 1)                                 # (energies, S, S) for solve
    M = -Yt * g[:, None, :]
    M[:, idx, idx] += dg
    rhs = Yt[:, :, incident] * f[:, None]
    rhs[:, incident] -= df
    beta = np.linalg.solve(M, rhs[..., None])[..., 0]
    psi_near = beta * g
    psi_near[:, incident] += f
    psi_far = np.einsum("ije,ej->ei", P, psi_near)

    safe_kf = np.where(far_open, k_far, 1.0)
    t = np.where(far_open, psi_far * np.sqrt(safe_kf) * np.exp(-1j * safe_kf * x_far), 0.0)
    r = np.where(near_open, beta, 0.0)
    return CoupledChannelResult(energies, np.abs(t) ** 2, np.abs(r) ** 2, t, r, far_open, near_open)


def richardson_transmission(potential, x_min, x_max, points, mass, energies, incident=0, side="left",
                            hbar=1.0):
    """T and R of a smooth potential, Richardson-extrapolated to zero spacing.

    ``potential(x)`` returns the (S, S, len(x)) diabatic matrix of a smooth
    model.  ``coupled_channel_transmission`` is run on ``points`` and on
    2 points - 1 (half the spacing) over [x_min, x_max]; its error for a
    smooth potential is c h^2 + O(h^4) (the sampled piecewise-constant
    potential is symmetric about each grid point), so (4 T(h/2) - T(h)) / 3 is
    O(h^4) (L. F. Richardson, Phil. Trans. R. Soc. A 210, 307 (1911)).

    Returns (transmission, reflection, error_estimate), arrays (energies, S);
    error_estimate = max(|T_ext - T(h/2)|, |R_ext - R(h/2)|) per energy and
    channel bounds the error of the plain h/2 run, so it is a generous bound
    for the extrapolated one.
    """
    runs = []
    for n in (points, 2 * points - 1):
        x = np.linspace(x_min, x_max, n)
        runs.append(coupled_channel_transmission(x, potential(x), mass, energies, incident, side, hbar))
    coarse, fine = runs
    transmission = (4.0 * fine.transmission - coarse.transmission) / 3.0
    reflection = (4.0 * fine.reflection - coarse.reflection) / 3.0
    error = np.maximum(np.abs(transmission - fine.transmission), np.abs(reflection - fine.reflection))
    return transmission, reflection, error

# -- a model avoided crossing for the wave-packet check -------------------------------
def avoided_crossing_model(x, slope_energy=0.01, step_length=1.0, coupling=0.005, coupling_width=1.0):
    """Two crossing diabatic steps with a localized coupling, atomic units.

        V11(x) = +A tanh(x / L),   V22(x) = -A tanh(x / L),   V12(x) = C exp(-x^2 / w^2)

    (A = ``slope_energy``, L = ``step_length``, C = ``coupling``, w =
    ``coupling_width``; hartree and bohr).  The diabatic curves cross at x = 0
    with slopes +-A / L; the adiabatic curves are split by 2 C there.  Returns
    (x, V) with V of shape (2, 2, len(x)).

    Why these numbers (meant for a light atom, mass ~ 2000 m_e):
    - asymptotics flat within the grid: tanh reaches +-1 as 2 exp(-2|x|/L), so
      on |x| >= 12 bohr the curves are within A * 1e-10 of their limits -- a
      grid reaching +-12 or beyond reads them as constant to ~1e-12 hartree;
    - coupling localized: exp(-x^2/w^2) is below 1e-60 beyond |x| = 12, so the
      asymptotic states are the diabatic ones (the reference needs zero
      off-diagonals at the grid ends);
    - both channels open on both sides for total energies above +A = 0.01
      hartree; a packet incident on surface 1 from the left (asymptote -A)
      with momentum 10-14 bohr^-1 (kinetic 0.025-0.049 hartree, total
      0.015-0.039 hartree) is covered, and the Landau-Zener estimate
      exp(-2 pi C^2 / (v 2A/L)) ~ 0.2-0.3 there (v = p / m): the population
      splits between the surfaces, T per final surface is a sharp test;
    - a modest grid suffices: k up to ~ 16 bohr^-1 needs dx <= 0.1 bohr for the
      split-operator packet (k_max = pi / dx ~ 31), e.g. 512 points on
      [-25.6, 25.6].  The reference samples the same functions finer: on
      [-12, 12] with dx = 0.02 bohr (1201 points) T per surface is within
      ~6e-5 of the converged value (O(h^2)), and ``richardson_transmission``
      from 1201 and 2401 points is converged to ~1e-9 (measured; 200 energies
      in ~0.6 s).
    """
    x = np.asarray(x, float)
    step = np.tanh(x / step_length)
    V = np.empty((2, 2, x.size))
    V[0, 0] = slope_energy * step
    V[1, 1] = -slope_energy * step
    V[0, 1] = V[1, 0] = coupling * np.exp(-(x / coupling_width) ** 2)
    return x, V
