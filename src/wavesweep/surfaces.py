"""Several coupled potential-energy surfaces: one packet psi_s(r), s = 1..S,
under H = T (x) 1 + V(r, t), V an S x S real symmetric matrix at every
point (atomic units throughout).

The diagonal V_ss is the sum of the surface's own terms and the job's
shared [[potential]] terms; the off-diagonal V_ab = V_ba the sum of the
[[coupling]] terms of that pair (zero for an uncoupled pair).

Propagation (:class:`CoupledSplitOperator`) composes Strang sub-steps as
the single-surface split-operator does (Feit, Fleck & Steiger 1982;
Yoshida's and Suzuki's fourth-order compositions), with the kick
exp(-i V(r) tau) the exponential of the local S x S matrix
(:func:`local_exponential`): for two surfaces in closed form,
V = v0 1 + vz sz + vx sx, exp(-i V tau) = exp(-i v0 tau) [cos(r tau) 1 -
i sin(r tau) (vz sz + vx sx) / r], r = sqrt(vz^2 + vx^2); for more, from
the eigen-decomposition of each point's matrix.  The kinetic step is the
single surface's on every surface.  An absorber's rate W(r) is the same
on every surface and commutes with the local matrix, so it multiplies the
kicks at the step's ends, booked per surface and face.

Cost (a static V, the common case), as the single-surface split-operator
(:mod:`.propagators.split_operator`): the two half kicks that meet between
sub-steps and between steps are one kick exp(-i V (tau_j + tau_j+1) / 2),
exactly their product since V does not change, with the absorber's
exp(-W dt/2) of both step ends in the kick across steps (so a call of n
steps makes one kick per sub-step and one more); the matrices are made
once, their upper triangles packed (U is complex symmetric), and applied
in place by a numba kernel (``local_matrix_members``, a solo run a batch of one); the kinetic step of all
surfaces is one batched transform of the (S, *grid) array, in place in
the transform's buffer where the backend allows, with the kinetic phase
(the 1/N folded in) multiplied by the single surface's kernel.  Measured
(scripts/bench --surfaces, 4096 points): a two-surface Strang step costs
2.1-2.2 single-surface steps, the FFT pair of two members being two.  A
time-dependent V is exponentiated per sub-step (at its middle) with numpy
and applied by the same kernel.

A batch of M runs that differ only in their packets
(:mod:`wavesweep.batched`) is the same propagator with ``members`` = M:
psi (M, S, *grid), the kinetic step one transform of all M S rows, each
kick one kernel call over all members with the matrices made once.

:class:`CoupledChebyshev` expands exp(-i H dt) for a time-independent V
(``evolve.scheme = 'chebyshev'``; Tal-Ezer & Kosloff 1984), H applied as T
on every surface plus the local matrix, its spectral bounds from the
eigenvalues of V over the grid (:meth:`SurfaceHamiltonian.spectral_range`).
"""
from __future__ import annotations

import functools

import numpy as np

from .fft import AUTO, make_transform
from .hamiltonian import Hamiltonian
from .kernels import view4
from .propagators import scheme_class
from .propagators.chebyshev import chebyshev_expansion, chebyshev_series
from .propagators.coefficients import STRANG

__all__ = ["SurfaceHamiltonian", "local_exponential", "CoupledSplitOperator", "CoupledChebyshev", "coupled_weights",
           "COUPLED_EXPANSIONS", "local_eigenvectors", "adiabatic_populations", "PHASE_CONVENTION"]

# The split-operator compositions a coupled run can use: each registered
# split-operator scheme's own weights (read from the registry, by name)
def coupled_weights(scheme: str) -> tuple:
    """The composition weights of a registered split-operator ``scheme``."""
    cls = scheme_class(scheme)
    weights = getattr(cls, "weights", None)
    if weights is None:
        raise ValueError(f"{scheme!r} is no split-operator scheme: coupled surfaces need one")
    return tuple(weights)


def _terms_at(grid, mass, terms, t: float | None) -> np.ndarray:
    """Sum of ``terms`` on the grid (hartree, full shape): the static ones,
    plus the time-dependent ones at ``t`` (None: left out).  Without a
    radial grid's centrifugal term (static_potential_of would add it): the
    matrix puts it on each diagonal element once, and on no coupling."""
    mesh = grid.mesh()
    v = np.zeros(grid.shape)
    for term in terms:
        if not term.time_dependent:
            v = v + np.broadcast_to(np.asarray(term.static(mesh), float), grid.shape)
        elif t is not None:
            v = v + np.broadcast_to(np.asarray(term.at_time(mesh, t), float), grid.shape)
    return v


class SurfaceHamiltonian:
    """H = T (x) 1 + V(r, t) on S surfaces (see the module notes).

    ``surface_terms``: per surface, its potential terms (shared ones
    included); ``couplings``: ``{(a, b): terms}`` with a < b surface
    indices; ``absorber_rate``: W (hartree, the grid's shape) or None.
    The centrifugal term of a radial grid is on every diagonal."""

    def __init__(self, grid, mass: float, names, surface_terms, couplings, absorber_rate=None):
        self.grid = grid
        self.mass = float(mass)
        self.names = list(names)
        self.surface_terms = [list(t) for t in surface_terms]
        self.couplings = {tuple(sorted(k)): list(v) for k, v in couplings.items()}
        self.absorber_rate = absorber_rate
        every = [term for terms in self.surface_terms for term in terms]
        every += [term for terms in self.couplings.values() for term in terms]
        self.time_dependent = any(term.time_dependent for term in every)
        self._mesh = grid.mesh()
        self._static = None
        self._static = self.matrix(None)

    @property
    def size(self) -> int:
        return len(self.names)

    @functools.cached_property
    def kinetic_operator(self) -> Hamiltonian:
        """T alone, one surface's (its apply_kinetic takes a leading surface axis)."""
        return Hamiltonian(self.grid, self.mass, [], static_potential=np.zeros(self.grid.shape))

    def matrix(self, t: float | None = 0.0) -> np.ndarray:
        """V(r, t) as (S, S, *grid) float64 (hartree); ``t`` None: the static part only."""
        static = getattr(self, "_static", None)
        if static is not None and (t is None or not self.time_dependent):
            return static
        grid, s = self.grid, self.size
        if static is not None:   # per kick: the static matrix made once, plus the time-dependent terms only
            out = static.copy()
            mesh = self._mesh
            for a, terms in enumerate(self.surface_terms):
                for term in terms:
                    if term.time_dependent:
                        out[a, a] += np.broadcast_to(np.asarray(term.at_time(mesh, t), float), grid.shape)
            for (a, b), terms in self.couplings.items():
                for term in terms:
                    if term.time_dependent:
                        out[a, b] += np.broadcast_to(np.asarray(term.at_time(mesh, t), float), grid.shape)
                        out[b, a] = out[a, b]
            return out
        out = np.zeros((s, s) + grid.shape)
        for a, terms in enumerate(self.surface_terms):
            out[a, a] = _terms_at(grid, self.mass, terms, t)
            if grid.radial:
                out[a, a] += grid.centrifugal_potential(self.mass)
        for (a, b), terms in self.couplings.items():
            out[a, b] = out[b, a] = _terms_at(grid, self.mass, terms, t)
        return out

    def apply(self, psi: np.ndarray, t: float = 0.0) -> np.ndarray:
        """(T + V(t)) psi for psi of shape (S, *grid): T by the grid's
        transform on each surface (:meth:`Hamiltonian.apply_kinetic`'s rule:
        FFT periodic, DST-I box), V as the local matrix."""
        out = self.kinetic_operator.apply_kinetic(psi)
        v = self.matrix(t) if self.time_dependent else self._static
        return out + np.einsum("ab...,b...->a...", v, psi)

    def spectral_range(self, t: float | None = None) -> tuple[float, float]:
        """Bounds (hartree) of the spectrum of the discretised H (static
        part, or at ``t``): the eigenvalues of V(r) over the grid
        (numpy.linalg.eigvalsh per point) plus the kinetic energies' range.
        H = T (x) 1 + V with V block-diagonal in position, so by Weyl's
        inequality its eigenvalues lie within [min T + min eig V, max T +
        max eig V]; the Chebyshev expansion scales H into [-1, 1] with them."""
        v = self.matrix(t if self.time_dependent else None)
        eig = np.linalg.eigvalsh(np.moveaxis(v.reshape(self.size, self.size, -1), -1, 0))
        kinetic = self.kinetic_operator.kinetic
        return float(eig.min()) + float(kinetic.min()), float(eig.max()) + float(kinetic.max())


def local_exponential(v: np.ndarray, tau: float) -> np.ndarray:
    """exp(-i V tau) at every point of V (S, S, *grid), real symmetric:
    complex (S, S, *grid).  Two surfaces in closed form (module notes);
    more from numpy.linalg.eigh of each point's matrix."""
    s = v.shape[0]
    if s == 1:
        return np.exp(-1j * tau * v)
    if s == 2:
        v0 = 0.5 * (v[0, 0] + v[1, 1])
        vz = 0.5 * (v[0, 0] - v[1, 1])
        vx = v[0, 1]
        r = np.hypot(vz, vx)
        phase = np.exp(-1j * tau * v0)
        c = np.cos(r * tau)
        # sin(r tau) / r, with its limit tau where r = 0
        sinc = np.where(r > 0, np.sin(r * tau) / np.where(r > 0, r, 1.0), tau)
        out = np.empty((2, 2) + v.shape[2:], complex)
        out[0, 0] = phase * (c - 1j * sinc * vz)
        out[1, 1] = phase * (c + 1j * sinc * vz)
        out[0, 1] = out[1, 0] = phase * (-1j * sinc * vx)
        return out
    flat = np.moveaxis(v.reshape(s, s, -1), -1, 0)           # (N, S, S)
    lam, q = np.linalg.eigh(flat)
    u = np.einsum("nij,nj,nkj->nik", q, np.exp(-1j * tau * lam), q)
    return np.moveaxis(u, 0, -1).reshape((s, s) + v.shape[2:])



# How the local eigenvectors' phases are fixed (said in the result's attributes too).
PHASE_CONVENTION = ("state k at each point is the k-th eigenvector of the local potential matrix V(r, t) in "
                    "ascending order of its eigenvalue (state 0: the lowest adiabatic surface); its phase is "
                    "fixed so that its largest-magnitude diabatic component is real and positive (a tie: the "
                    "first surface in the job's order); populations do not depend on the phases. At an exact "
                    "degeneracy (a crossing where the coupling is exactly zero) the states are any basis of the "
                    "degenerate pair (two surfaces: the diabatic states, the first surface's as the lower), so "
                    "only the degenerate states' summed population means anything there; with zero coupling "
                    "state 0 is whichever surface is locally lower, and its population jumps as the packet "
                    "crosses")


def local_eigenvectors(v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The adiabatic states at every point: the eigen-decomposition of the
    local potential matrix V (S, S, *grid), real symmetric or Hermitian.

    Returns ``(energies, vectors)``: ``energies`` (S, *grid) ascending at
    each point (state 0 the lowest adiabatic surface), ``vectors`` (S, S,
    *grid) with ``vectors[a, k]`` the component on diabatic surface a of
    adiabatic state k (real for a real V, complex otherwise), orthonormal
    at every point.  Phases as :data:`PHASE_CONVENTION`: the
    largest-magnitude component of each state real and positive (a tie: the
    first surface).

    Two surfaces in closed form by the two-level problem's mixing angle
    (Cohen-Tannoudji, Diu & Laloe, *Quantum Mechanics*, ch. IV; from
    memory): with vz = (V_00 - V_11) / 2 and
    V_01 = |b| e^{i phi}, theta = atan2(|b|, vz) / 2 in [0, pi/2],
    upper = (cos theta, e^{-i phi} sin theta), lower = (-sin theta,
    e^{-i phi} cos theta); at an exact degeneracy (vz = b = 0) theta = pi/2,
    so the lower state is the first surface's, as LAPACK's eigh gives for a
    multiple of the identity.  More surfaces: numpy.linalg.eigh of each
    point's matrix, vectorised over the points."""
    s = v.shape[0]
    shape = v.shape[2:]
    if s == 1:
        return np.real(v[0]).astype(float, copy=True)[None], np.ones((1, 1) + shape)
    if s == 2:
        v00, v11, b = np.real(v[0, 0]), np.real(v[1, 1]), v[0, 1]
        v0 = 0.5 * (v00 + v11)
        vz = 0.5 * (v00 - v11)
        size = np.abs(b)
        r = np.hypot(vz, size)
        theta = 0.5 * np.arctan2(size, vz)
        # uncoupled points exactly diabatic (cos(pi/2) is 6e-17, not 0); a degeneracy theta = pi/2
        uncoupled = size == 0
        c = np.where(uncoupled, np.where(vz > 0, 1.0, 0.0), np.cos(theta))
        sn = np.where(uncoupled, np.where(vz > 0, 0.0, 1.0), np.sin(theta))
        energies = np.stack([v0 - r, v0 + r])
        complex_b = np.iscomplexobj(b)
        ph = (np.where(size > 0, b / np.where(size > 0, size, 1.0), 1.0) if complex_b else
              np.where(b < 0, -1.0, 1.0))   # e^{i phi}; real: the sign of V_01
        out = np.empty((2, 2) + shape, complex if complex_b else float)
        # the lower state (-s, conj(ph) c), its larger component made real positive
        first = sn >= c
        out[0, 0] = np.where(first, sn, -ph * sn)
        out[1, 0] = np.where(first, -np.conj(ph) * c, c)
        # the upper state (c, conj(ph) s)
        first = c >= sn
        out[0, 1] = np.where(first, c, ph * c)
        out[1, 1] = np.where(first, np.conj(ph) * sn, sn)
        return energies, out
    flat = np.moveaxis(v.reshape(s, s, -1), -1, 0)           # (N, S, S)
    lam, q = np.linalg.eigh(flat)                              # ascending; q[n, a, k]
    big = np.take_along_axis(q, np.argmax(np.abs(q), axis=1)[:, None, :], axis=1)   # first on a tie
    q = q * (np.conj(big) / np.abs(big))
    return (np.moveaxis(lam, 0, -1).reshape((s,) + shape),
            np.moveaxis(q, 0, -1).reshape((s, s) + shape))


def adiabatic_populations(vectors: np.ndarray, psi: np.ndarray, cell_volume: float) -> np.ndarray:
    """P_k = sum_r |sum_a U_ak(r)^* psi_a(r)|^2 dV for each adiabatic state
    k: ``vectors`` (S, S, *grid) from :func:`local_eigenvectors`, ``psi``
    (S, *grid), ``cell_volume`` dV.  Returns (S,); sum_k P_k is the norm
    (U is unitary at every point), whatever the phases."""
    s = psi.shape[0]
    out = np.empty(s)
    for k in range(s):
        vec = vectors[:, k]
        # psi_a times conj(U_ak): on a real basis the product stays real x complex (no complex copy of U)
        phi = (vec[0] if not np.iscomplexobj(vec) else np.conj(vec[0])) * psi[0]
        for a in range(1, s):
            phi += (vec[a] if not np.iscomplexobj(vec) else np.conj(vec[a])) * psi[a]
        flat = phi.reshape(-1)
        out[k] = float(np.vdot(flat, flat).real) * cell_volume
    return out


# From this many elements (surfaces x points) a kick twice as long as one
# already made (Strang's whole step against its half) applies the half's
# matrix twice instead of keeping its own, S(S+1)/2 complex arrays of the
# grid (two surfaces at this size: 200 MB).  The second pass is arithmetic
# (two surfaces, 4096 points: 16 us against 8.3 for one pass, a step
# 73 us against 61; 1024^2: 6.6 ms against 4.2), so it is paid only where
# the memory matters more.
SQUARED_KICK_FROM_ELEMENTS = 1 << 23


def _key(tau: float, absorb: float) -> tuple[float, float]:
    return (round(tau, 15), round(absorb, 15))


class CoupledSplitOperator:
    """Split-operator steps of psi (S, *grid) under a
    :class:`SurfaceHamiltonian` (module notes).

    ``weights``: the composition (:func:`coupled_weights`); ``absorber``:
    an :class:`~wavesweep.absorbers.layers.Absorber` or None;
    ``transform``: a :class:`~wavesweep.fft.Transform` of the grid with
    ``members`` = S (default: the best backend, complex128).
    ``absorbed`` (S, faces) is the probability each face has taken from
    each surface; ``t`` the current time (atomic units).

    ``members`` M: a batch of M runs that differ only in their packets
    (:mod:`wavesweep.batched`), psi of shape (M, S, *grid) and
    ``absorbed`` (M, S, faces).  The M S surfaces are one batched transform
    (the transform's ``members`` = M S), the kicks one kernel call over all
    members with the matrices made once.  ``absorber`` may then be a list,
    one per member, of one layer geometry (the batch's key) but their own
    rates (a CAP tuned to each member's packet): W(r) times the identity
    commutes with V(r), exp(-i (V - i W_m) tau) = exp(-W_m tau) exp(-i V
    tau) exactly, so the shared matrices are made without the absorber and
    each member's decay exp(-W_m tau) multiplies its rows on the layers'
    slabs after the kick (the ``kick`` kernel with one factor row per
    member and surface), booked with its own loss weights.  Each member's
    psi is the one a solo run gives, to rounding: the same operations in
    the same order (the decay a factor of its own rather than of the
    matrix), only the transforms' batch is larger."""

    def __init__(self, hamiltonian: SurfaceHamiltonian, dt: float, weights=STRANG, absorber=None,
                 t0: float = 0.0, transform=None, members: int | None = None):
        # lazy: the numba kernels (numba import, 0.12 s) load with the first propagator
        from .kernels import kernels_for
        self.h = hamiltonian
        self.grid = hamiltonian.grid
        self.dt = float(dt)
        self.weights = tuple(weights)
        self.t0 = float(t0)
        self.steps_done = 0
        s = hamiltonian.size
        self.members = None if members is None else int(members)
        self.absorber, self._member_absorbers = self._absorbers(absorber)
        n_faces = len(self.absorber.layers) if self.absorber is not None else 0
        # the state's leading axes, and its rows: one per surface (and member), each a grid
        self._lead = (s,) if self.members is None else (self.members, s)
        self._batch_lead = (1, s) if self.members is None else self._lead   # the local_matrix_members kernel's
        rows = s if self.members is None else self.members * s
        self.absorbed = np.zeros(self._lead + (n_faces,))
        self._absorbed_rows = self.absorbed.reshape(rows, n_faces)   # a view: the books of each row
        self._dv = self.grid.cell_volume
        self._nd = self.grid.ndim
        if transform is None:
            transform = make_transform(self.grid, AUTO, np.complex128, members=rows)
        elif transform.members != rows or transform.dtype != np.complex128:
            raise ValueError(f"the transform of {rows} coupled surfaces (members x surfaces) needs "
                             f"members={rows} and complex128")
        self.transform = transform
        self._direct = transform.in_place()
        self._state_view = None   # a batch's (M, S, *grid) view of the in-place buffer (_buffer)
        self._kernels = kernels_for(self.grid.size * rows, transform.threads)
        # u's packed rows: U_ab = u[pair[a, b]] (upper triangle, row by row)
        upper = np.triu_indices(s)
        self._upper = upper
        self._pair = np.zeros((s, s), np.int64)
        self._pair[upper] = self._pair.T[upper] = np.arange(len(upper[0]))
        self._taus = [w * self.dt for w in self.weights]
        self._kinetic_factors = {}
        for tau in self._taus:
            self._kinetic_factor(tau)
        self._kicks: dict[tuple, tuple[np.ndarray, bool]] = {}
        self._losses: dict[tuple, list[np.ndarray]] = {}
        self._decays: dict[tuple, list[np.ndarray]] = {}   # per-member absorbers: (absorb, once) -> slab factors
        self._slabs = None     # (psi, its layers' slab views): the books' views, kept per array
        self._loss_out = np.zeros(rows)
        if not hamiltonian.time_dependent:
            w = self._taus
            # the fused kicks: the call's first and last, across steps, inside a step
            self._plan = (_key(w[0] / 2, self.dt / 2),
                          [_key((w[j] + w[j + 1]) / 2, 0.0) for j in range(len(w) - 1)],
                          _key((w[-1] + w[0]) / 2, self.dt), _key(w[-1] / 2, self.dt / 2))
            first, inner, across, last = self._plan
            for key in sorted({first, across, last, *inner}, key=lambda k: (abs(k[0]), k[1])):
                self._build_kick(key)
            if self.absorber is not None:   # the books of the kick across steps (_book_across)
                u_end = self._kicks[last][0]   # a matrix of its own: no kick is half of it
                lead = (slice(None),) * (4 - self._nd)
                slabs = [lead + layer.slab for layer in self.absorber.layers]
                self._boundary = ([np.ascontiguousarray(u_end[slab]) for slab in slabs],
                                  [np.empty((rows,) + u_end[slab].shape[1:], complex) for slab in slabs])

    def _absorbers(self, absorber):
        """(the absorber whose layers the books use, or None; the members'
        own absorbers when a batch's rates differ, else None)."""
        given = list(absorber) if isinstance(absorber, (list, tuple)) else [absorber]
        if len(given) > 1 and len(given) != (self.members or 1):
            raise ValueError(f"{len(given)} absorbers for {self.members or 1} members")
        active = [a for a in given if a is not None and a.active]
        if not active:
            return None, None
        first = active[0]
        if len(active) != len(given) or any([layer.slab for layer in a.layers] != [layer.slab for layer in first.layers]
                                            for a in active[1:]):
            raise ValueError("the members of a batch need absorbing layers of one geometry "
                             "(kind, thickness and faces); only strengths may differ")
        if all(a is first or np.array_equal(a.rate, first.rate) for a in active[1:]):
            return first, None   # one absorber for the batch: in the kicks' matrices, as a solo run
        return first, active

    @property
    def t(self) -> float:
        return self.t0 + self.steps_done * self.dt

    def load(self, psi: np.ndarray) -> np.ndarray:
        """psi (S, *grid), or (M, S, *grid) for a batch, as complex128 to
        step from: the transform's buffer when it transforms in place (a
        copy otherwise)."""
        if self._direct is not None:
            buf = self._buffer()
            np.copyto(buf, psi)
            return buf
        return np.array(psi, dtype=np.complex128, copy=True)

    def _buffer(self) -> np.ndarray:
        """The in-place transform's buffer shaped as the state, (S, *grid)
        (the buffer itself) or (M, S, *grid) (one view of it, kept)."""
        buf = self._direct[2]
        if self.members is None:
            return buf
        if self._state_view is None:
            self._state_view = buf.reshape(self._lead + self.grid.shape)
        return self._state_view

    def _rows(self, psi) -> np.ndarray:
        """psi as (rows, *grid), one row per surface (and member): a view."""
        return psi if self.members is None else psi.reshape((-1,) + self.grid.shape)

    def _apply(self, psi, u, squared):
        """psi <- U psi at every point, psi the state (S, *grid) or (M, S, *grid)."""
        self._apply_rows(view4(self._rows(psi), self._nd), u, squared)

    def _apply_rows(self, rows4, u, squared):
        """The kick U (packed, the ``local_matrix_members`` kernel's layout) on the
        4D rows (surface, or member x surface, then i, j, k) of psi or of a slab."""
        self._kernels.local_matrix_members(rows4.reshape(self._batch_lead + rows4.shape[1:]), u, self._pair, squared)

    # -- pieces ------------------------------------------------------------------
    def _kinetic_factor(self, tau):
        """exp(-i T tau) as (e0, e12) for the ``kinetic`` kernel (the
        single-surface split-operator's factorisation, 1/N folded in)."""
        key = round(tau, 15)
        out = self._kinetic_factors.get(key)
        if out is None:
            m = self.h.mass
            axes = [None] * (3 - self._nd) + list(self.grid.axes)
            phase = [np.ones(1, complex) if a is None else np.exp(-1j * (a.wavenumbers**2 / (2.0 * m)) * tau)
                     for a in axes]
            scale = self.transform.backward_scale
            e12 = np.ascontiguousarray(phase[1][:, None] * phase[2][None, :] * scale)
            out = self._kinetic_factors[key] = (np.ascontiguousarray(phase[0]), e12)
        return out

    def _free(self, psi, tau):
        """exp(-i T tau) on every surface: one batched transform pair."""
        e0, e12 = self._kinetic_factor(tau)
        if self._direct is not None:
            fwd, bwd, _ = self._direct
            fwd()
            self._kernels.kinetic(view4(self._rows(psi), self._nd), e0, e12)
            bwd()
            return psi
        phi = self.transform.forward(self._rows(psi))
        self._kernels.kinetic(view4(phi, self._nd), e0, e12)
        return self.transform.backward(phi, scaled=False).reshape(psi.shape)

    def _packed(self, v, tau, absorb):
        """exp(-i V tau) exp(-W absorb), V (S, S, *grid): its upper triangle
        as the kernel's contiguous (P, n0, n1, n2); with the members' own
        absorbers exp(-i V tau) alone (:meth:`_decay`)."""
        u = local_exponential(v, tau)[self._upper]
        if self.absorber is not None and absorb > 0 and self._member_absorbers is None:
            u *= np.exp(-self.absorber.rate * absorb)
        return np.ascontiguousarray(view4(u, self._nd))

    def _build_kick(self, key):
        """The static kick ``key`` = (tau, absorb): its packed matrix, or on
        a large grid (:data:`SQUARED_KICK_FROM_ELEMENTS`) a kick half as
        long applied twice (exactly its square, no second array), and its
        books' weights."""
        tau, absorb = key
        large = self.grid.size * self.h.size >= SQUARED_KICK_FROM_ELEMENTS
        half = None if not large else next((k for k, (u, sq) in self._kicks.items() if not sq
                     and abs(2 * k[0] - tau) <= 1e-13 * abs(tau) and abs(2 * k[1] - absorb) <= 1e-13 * abs(tau)),
                    None)   # by closeness: round(tau, 15) / 2 is not always round(tau / 2, 15)
        if half is not None:
            self._kicks[key] = (self._kicks[half][0], True)
        else:
            self._kicks[key] = (self._packed(self.h.matrix(None), tau, absorb), False)
        self._losses[key] = self._loss_weights(absorb)

    def _loss_weights(self, absorb):
        """Per face, the books' weights of a kick absorbing over ``absorb``
        (4D, one row for all rows of psi, or with the members' own
        absorbers one row per member and surface)."""
        if self.absorber is None or absorb <= 0:
            return []
        if self._member_absorbers is None:
            return [view4(lw, self._nd) for lw in self.absorber.loss_weights(absorb)]
        each = [a.loss_weights(absorb) for a in self._member_absorbers]
        return [self._member_rows([lw[n] for lw in each], float) for n in range(len(self.absorber.layers))]

    def _member_rows(self, arrays, dtype=np.complex128) -> np.ndarray:
        """One slab-shaped array per member as the 4D (M S, ...) rows of the
        kernels, each member's repeated on its S surfaces."""
        rows = np.concatenate([view4(np.asarray(a), self._nd) for a in arrays])
        return np.ascontiguousarray(np.repeat(rows, self.h.size, axis=0), dtype=dtype)

    def _decay_factors(self, absorb, once: bool = True):
        """The members' own exp(-W_m absorb) on each layer's slab (the
        (M S, ...) rows of :meth:`_member_rows`).  ``once``: 1 where an
        earlier face's slab already took it (the corners two faces share in
        2D and 3D), so that the slabs of psi together multiply every point
        once; else the whole decay on every slab (for copies of the slabs,
        :meth:`_book_across`)."""
        key = (round(absorb, 15), once)
        out = self._decays.get(key)
        if out is None:
            covered = np.zeros(self.grid.shape, bool)
            out = []
            for layer in self.absorber.layers:
                fresh = ~covered[layer.slab]
                out.append(self._member_rows([np.where(fresh, np.exp(-a.rate[layer.slab] * absorb), 1.0)
                                              for a in self._member_absorbers]))
                if once:
                    covered[layer.slab] = True
            self._decays[key] = out
        return out

    def _decay(self, slabs, absorb):
        """The members' own absorbers over ``absorb`` on ``slabs`` (4D views
        or copies of psi's layers, rows member x surface), after a kick
        made without them: exp(-W_m absorb) commutes with the kick."""
        for slab, factor in zip(slabs, self._decay_factors(absorb)):
            self._kernels.kick(slab, factor, False)

    def _slab_views(self, psi):
        """psi's (S, ...) 4D views of the layers' slabs (kept while psi is the same array)."""
        if self._slabs is None or self._slabs[0] is not psi:
            lead = (slice(None),) * (4 - self._nd)
            psi4 = view4(self._rows(psi), self._nd)
            self._slabs = (psi, [psi4[lead + layer.slab] for layer in self.absorber.layers])
        return self._slabs[1]

    def _book(self, psi, losses):
        """Add to ``absorbed`` what a kick removes, per surface and face:
        sum |psi|^2 times the face's loss weights, before the kick."""
        if not losses:
            return
        out, kernel = self._loss_out, self._kernels.layer_loss
        for n, (slab, lw) in enumerate(zip(self._slab_views(psi), losses)):
            out[:] = 0.0
            kernel(slab, lw, out)
            self._absorbed_rows[:, n] += out * self._dv

    def _book_across(self, psi):
        """The books of the kick across two steps, as the two kicks it
        fuses would keep them: the step's end half exp(-W dt/2) from psi
        before it, the next step's start half from psi at the steps'
        boundary, U_end psi, U_end the step's last half kick (absorber
        included), made on the layers' slabs only.  The sum over surfaces
        is the same either way (U is unitary at every point but for the
        common decay); the share of each surface is the composition's."""
        half = self._losses[self._plan[3]]
        self._book(psi, half)
        out, loss = self._loss_out, self._kernels.layer_loss
        for n, (slab, u, scratch, lw) in enumerate(zip(self._slab_views(psi), *self._boundary, half)):
            np.copyto(scratch, slab)
            self._apply_rows(scratch, u, False)
            if self._member_absorbers is not None:
                self._kernels.kick(scratch, self._decay_factors(self._plan[3][1], once=False)[n], False)
            out[:] = 0.0
            loss(scratch, lw, out)
            self._absorbed_rows[:, n] += out * self._dv

    # -- the step ----------------------------------------------------------------
    def step(self, psi: np.ndarray, nsteps: int = 1) -> np.ndarray:
        """Advance psi (S, *grid) by ``nsteps`` steps: per step, the
        composition of Strang sub-steps K(w_j/2) F(w_j) K(w_j/2), with the
        absorber in the kicks at the step's two ends (half each).  A
        time-dependent V is taken at each sub-step's middle.

        Returns the propagator's array (its transform's buffer when that
        works in place, as :meth:`load`): the next call overwrites it, so a
        caller keeping psi across steps copies it."""
        nsteps = int(nsteps)
        if self._direct is not None:
            buf = self._buffer()
            if psi is not buf:
                np.copyto(buf, psi)
                psi = buf
        else:
            psi = np.array(psi, dtype=np.complex128, copy=True)
        if nsteps > 0:
            psi = self._step_dynamic(psi, nsteps) if self.h.time_dependent else self._step_static(psi, nsteps)
        self.steps_done += nsteps
        return psi

    def _step_static(self, psi, nsteps):
        """A static V: the two half kicks between sub-steps (and between
        steps) fused into one exp(-i V (tau_j + tau_j+1) / 2), exactly their
        product; the call's first and last kicks are halves, so psi ends at
        a true time."""
        first, inner, across, last = self._plan
        kicks, losses, taus = self._kicks, self._losses, self._taus
        nd, pair = self._nd, self._pair
        # (member, surface, i, j, k); a solo run is a batch of one
        apply, shape = self._kernels.local_matrix_members, self._batch_lead + (1,) * (3 - nd) + self.grid.shape
        book = self._book if self.absorber is not None else None
        decay = self._member_absorbers is not None
        m = len(taus) - 1

        def kick(psi, key):
            if book is not None:
                book(psi, losses[key]) if key is not across else self._book_across(psi)
            u, squared = kicks[key]
            apply(psi.reshape(shape), u, pair, squared)
            if decay and key[1] > 0:
                self._decay(self._slab_views(psi), key[1])

        kick(psi, first)
        for n in range(nsteps):
            for j in range(m):
                psi = self._free(psi, taus[j])
                kick(psi, inner[j])
            psi = self._free(psi, taus[m])
            kick(psi, across if n < nsteps - 1 else last)
        return psi

    def _step_dynamic(self, psi, nsteps):
        """A time-dependent V, per sub-step: V at its middle, the half kick
        exp(-i V tau/2) made once and applied on both sides of the free
        step (times the absorber's exp(-W dt/2) at the step's ends)."""
        taus, nd = self._taus, self._nd
        apply = self._apply
        starts = np.concatenate([[0.0], np.cumsum(taus)[:-1]])
        ends = self._loss_weights(self.dt / 2)
        shared = self.absorber is not None and self._member_absorbers is None
        if shared:
            decay = view4(np.exp(-self.absorber.rate * (self.dt / 2)), nd)
        m = len(taus) - 1
        for n in range(nsteps):
            t_step = self.t0 + (self.steps_done + n) * self.dt
            for j, tau in enumerate(taus):
                v = self.h.matrix(t_step + starts[j] + tau / 2)
                u = self._packed(v, tau / 2, 0.0)
                for side in (0, 1):
                    if side:
                        psi = self._free(psi, tau)
                    if self.absorber is not None and (j, side) in ((0, 0), (m, 1)):
                        self._book(psi, ends)
                        if shared:
                            apply(psi, u * decay, False)
                        else:
                            apply(psi, u, False)
                            self._decay(self._slab_views(psi), self.dt / 2)
                    else:
                        apply(psi, u, False)
        return psi


class CoupledChebyshev:
    """The Chebyshev expansion of exp(-i H dt) on coupled surfaces, H = T
    (x) 1 + V(r) time-independent (Tal-Ezer & Kosloff, J. Chem. Phys. 81,
    3967 (1984)), as the single surface's
    (:class:`~wavesweep.propagators.chebyshev.Chebyshev`, whose expansion
    it shares: :func:`~wavesweep.propagators.chebyshev.chebyshev_expansion`): H psi is T psi_a on every surface (the grid's transform,
    FFT or DST-I) plus sum_b V_ab psi_b, and the spectral bounds those of
    :meth:`SurfaceHamiltonian.spectral_range`.  Exact to rounding for any
    dt; the cost per step grows like the spectral half width times dt.

    Absorbers as on one surface: a mask, exp(-W dt) on every surface once
    per step after the expansion, booked per surface and face from the
    density before it; a CAP (non-Hermitian H) and a V that changes in time
    are refused (ValueError; :class:`~wavesweep.setup.CoupledSetup` says it
    in one line naming the field).  ``absorbed`` (S, faces), ``t`` as
    :class:`CoupledSplitOperator`."""

    name = "chebyshev"

    def __init__(self, hamiltonian: SurfaceHamiltonian, dt: float, absorber=None, t0: float = 0.0,
                 transform=None):
        if hamiltonian.time_dependent:
            raise ValueError("the Chebyshev expansion needs time-independent surfaces and couplings")
        self.absorber = absorber if absorber is not None and absorber.active else None
        if self.absorber is not None and self.absorber.kind == "cap":
            raise ValueError("the Chebyshev expansion cannot use a CAP (non-Hermitian H); use a mask")
        self.h = hamiltonian
        self.grid = hamiltonian.grid
        self.dt = float(dt)
        self.t0 = float(t0)
        self.steps_done = 0
        n_faces = len(self.absorber.layers) if self.absorber is not None else 0
        self.absorbed = np.zeros((hamiltonian.size, n_faces))
        self.e_mid, self.e_half, self.coefficients = chebyshev_expansion(hamiltonian, self.dt)
        # H' = (H - E_mid) / E_half folded into T and V once (the recurrence applies it ~200 times a step),
        # T through a planned transform of all S surfaces at once (one made here when none is given)
        n = hamiltonian.size
        self._transform = transform if transform is not None else make_transform(
            self.grid, AUTO, np.complex128, members=n)
        self._t_scaled = hamiltonian.kinetic_operator.kinetic / self.e_half
        self._v_scaled = hamiltonian.matrix(None) / self.e_half
        for a in range(n):
            self._v_scaled[a, a] = self._v_scaled[a, a] - self.e_mid / self.e_half
        self._term = np.empty((n, *self.grid.shape), np.complex128)
        if self.absorber is not None:
            self._mask = np.exp(-self.absorber.rate * self.dt)
            self._loss = self.absorber.loss_weights(self.dt)

    @property
    def t(self) -> float:
        return self.t0 + self.steps_done * self.dt

    def load(self, psi: np.ndarray) -> np.ndarray:
        """A complex128 copy of psi (S, *grid) to step from."""
        return np.array(psi, dtype=np.complex128, copy=True)

    def _scaled_h(self, phi):
        """(H phi - E_mid phi) / E_half on every surface: T' phi_a through the
        transform, then sum_b V'_ab phi_b (a product and a sum per pair, into
        one scratch array: no temporaries of the grid's size)."""
        coeff = self._transform.transform_of(phi)
        coeff *= self._t_scaled
        out = np.array(self._transform.backward(coeff), copy=True)   # out of the transform's buffer
        term = self._term[0]
        for a in range(len(out)):
            for b in range(len(out)):
                np.multiply(self._v_scaled[a, b], phi[b], out=term)
                out[a] += term
        return out

    def step(self, psi: np.ndarray, nsteps: int = 1) -> np.ndarray:
        """Advance psi (S, *grid) by ``nsteps`` steps (a new array)."""
        psi = np.asarray(psi, dtype=np.complex128)
        dv = self.grid.cell_volume
        for _ in range(int(nsteps)):
            psi = chebyshev_series(self._scaled_h, psi, self.coefficients)
            if self.absorber is not None:
                density = np.abs(psi) ** 2
                for n, (layer, lw) in enumerate(zip(self.absorber.layers, self._loss)):
                    slab = (slice(None),) + layer.slab
                    self.absorbed[:, n] += np.sum(density[slab] * lw, axis=tuple(range(1, 1 + self.grid.ndim))) * dv
                psi *= self._mask
        self.steps_done += int(nsteps)
        return psi


# Schemes that expand exp(-i H dt) on coupled surfaces, by the job's evolve.scheme
# (the split-operator schemes are read from the registry, coupled_weights)
COUPLED_EXPANSIONS = {CoupledChebyshev.name: CoupledChebyshev}
