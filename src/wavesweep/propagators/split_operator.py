"""Split-operator propagators (Fourier / sine-transform kinetic step).

One Strang sub-step of length tau is
    exp(-i V(t_m) tau/2) exp(-i T tau) exp(-i V(t_m) tau/2),
with V evaluated at the sub-step's middle t_m (exponential midpoint rule, so a
time-dependent V keeps second order, and the sub-step is time-symmetric so
that compositions reach fourth order; Yoshida 1990).  The absorber enters the
kicks as exp(-W tau/2).  Feit, Fleck & Steiger, J. Comput. Phys. 47, 412
(1982) for the split-operator Fourier method.

Consecutive half-kicks commute (both are diagonal in position) and are fused
into one kick, so ``step(psi, n)`` costs n transform pairs per sub-step
weight and one more kick than sub-steps; they are split only at the ends of
each call, where psi sits at a true time for recording.

Radial grids: the static radial Hamiltonian T + V_l + V0 (centrifugal term
l(l+1)/(2 m r^2) and e.g. -Z/r) is singular at r = 0 and stiff on a fine
grid, and kicking with it ruins the splitting: measured against the exact
propagator of the same grid, the Strang error for the l = 1 oscillator
ground state stayed near 1e-2 and did not fall with dt, and for -Z/r it
converged erratically.  So on a radial grid of up to ``RADIAL_DENSE_MAX``
points the "kinetic" step is exp(-i (T + V_l + V0) tau), exact, from a dense
eigendecomposition in the sine basis (made once, O(N^3); a step costs two
real N x N products instead of a DST pair, and the two matrices take
16 N^2 bytes); only the absorber and time-dependent terms are kicked.
Larger radial grids fall back to kicking everything (``wavesweep check``
warns about it).

Memory and passes over it: the kinetic phase of a Cartesian grid is a
product of one 1D factor per axis, so it is never stored in full; the
whole-step kick of Strang is the square of its half kick, so one full-grid
complex array (plus psi) is all a static Strang run keeps.  A batch (the
runs of a study that differ only in their initial state) is stepped as one
array with a leading member axis; the transform runs along the grid axes.

Condensates: with a contact interaction (``hamiltonian.contact`` = g N,
:mod:`wavesweep.interaction`) every kick also multiplies psi by
exp(-i g N |psi|^2 tau), tau the kick's potential length, with the density
of the psi it kicks: |psi| does not change during the potential sub-step,
so this sub-step is solved exactly, and the step is the time-splitting
spectral method of Bao, Jaksch & Markowich, J. Comput. Phys. 187, 318
(2003).  Fused half kicks stay exact (no free step between them changes
|psi|), and the symmetric compositions keep fourth order for the
nonlinear equation (Thalhammer, SIAM J. Numer. Anal. 50, 3231 (2012));
tests/integration/test_interaction.py measures the orders.

Single precision: the FFT pair of a float32 grid does not keep the norm --
forward transform, kinetic phase, backward transform lost 1.6e-7 per step,
systematically (measured at 512^2, pyFFTW and scipy alike: -1.4e-4 over 1000
steps), although the step is unitary, and a float32 kick factor of modulus
one is not quite one either (+4.7e-6 over the same 1000 steps once the
transforms were corrected).  So the propagator keeps the norm psi should
have in float64 -- the initial one minus what the layers booked -- and each
kick measures sum |psi|^2 after itself; the next kick scales psi by
sqrt(expected / measured).  The rounding of one step is undone one kick
later instead of accumulating, and what the absorber removes is what its
books say.
"""
from __future__ import annotations

from typing import ClassVar

import numpy as np

from ..kernels import view4
from .base import Propagator, register_scheme
from .coefficients import STRANG, SUZUKI4, YOSHIDA4

# Largest radial grid whose static Hamiltonian is diagonalised densely (two
# N x N float64 matrices: 268 MB at 4096).
RADIAL_DENSE_MAX = 4096

__all__ = ["SplitOperator", "Strang", "Order4", "Order4Suzuki"]

# Single precision: one kick in this many measures the norm (the error
# between two measurements, ~1e-7 per step, stays below 2e-6).
RENORMALISE_EVERY = 8

_EMPTY_TERMS = np.zeros((0, 1, 1, 1))
_NO_V = np.zeros((1, 1, 1))


def _key(tau: float, absorb: float) -> tuple[float, float]:
    return (round(tau, 15), round(absorb, 15))



# Up to this many points a whole kick that is a half kick squared gets an array of its own: the kernel's
# second complex multiply per point was a quarter of a 1D 4096 kick (3.65 -> 2.7 us); beyond it the second
# grid-sized array is not worth its memory (the kick is then a small part of the step's transform).
SQUARED_ARRAY_MAX = 1 << 20

class SplitOperator(Propagator):
    """Symmetric composition of Strang sub-steps with weights ``weights``."""

    weights: ClassVar[tuple[float, ...]] = STRANG
    in_place_transform: ClassVar[bool] = True  # psi may live in the transform's buffer
    batched: ClassVar[bool] = True
    renormalises_single: ClassVar[bool] = True   # see the module notes
    kick_factors: ClassVar[int] = 3   # kick-factor arrays kept (peak_bytes)

    @classmethod
    def peak_bytes(cls, points, complex_bytes, absorbing, radial_points=None) -> float:
        """psi0, psi, the observer's buffer, the kick factors
        (:attr:`kick_factors`) and half a psi of transients, plus V and the
        absorber's W in float64 (measured 5.2x psi at 128^3 for Strang,
        scripts/bench), and the dense radial eigenbasis (two N x N float64)."""
        psi_bytes = float(points) * complex_bytes
        estimate = psi_bytes * (3.5 + cls.kick_factors) + float(points) * 8.0 * (1 + int(bool(absorbing)))
        if radial_points is not None and radial_points <= RADIAL_DENSE_MAX:
            estimate += 16.0 * radial_points * radial_points
        return estimate

    def __init__(self, *args, **kwargs):
        # lazy: the numba kernels (numba import, 0.12 s) load with the first propagator
        from ..kernels import kernels_for
        super().__init__(*args, **kwargs)
        h, grid = self.hamiltonian, self.grid
        self._nb = self.members or 1
        self._kick_potential = h.static_potential
        self._radial_basis = None
        if grid.radial and grid.axes[0].points <= RADIAL_DENSE_MAX:
            self._setup_radial()
        threads = getattr(self.transform, "threads", 1) or 1
        self._kernels = kernels_for(grid.size * self._nb, threads)
        self._renormalise = self.dtype == np.complex64
        self._scale = np.ones(self._nb)
        self._norm_expected: np.ndarray | None = None   # sum |psi|^2 psi should have (no dV)
        self._before = np.zeros(self._nb)
        self._after = np.zeros(self._nb)
        self._absorbing = any(a is not None and a.active for a in self.absorbers)
        if self._absorbing:
            self._check_layers()
        self._dv = self.grid.cell_volume
        self._loss_out = np.zeros(self._nb)
        self._slab_views: dict = {}
        w = np.asarray(self.weights) * self.dt
        # The distinct kicks (potential length, absorber length): the call's
        # ends, across steps, inside a step (no absorber).
        keys = {_key(w[0] / 2, self.dt / 2), _key(w[-1] / 2, self.dt / 2),
                _key((w[-1] + w[0]) / 2, self.dt)}
        keys |= {_key((w[j - 1] + w[j]) / 2, 0.0) for j in range(1, len(w))}
        self._factors: dict[tuple, tuple[np.ndarray | None, bool]] = {}
        self._losses: dict[tuple, list[np.ndarray]] = {}
        for key in sorted(keys, key=lambda k: (abs(k[0]), k[1])):
            self._build_kick(key)
        self._kinetic_factors = {}
        for tau in set(np.round(w, 15)):
            self._kinetic_factor(float(tau))
        self._plan = (_key(w[0] / 2, self.dt / 2),
                      [_key((w[j] + w[j + 1]) / 2, 0.0) for j in range(len(w) - 1)],
                      _key((w[-1] + w[0]) / 2, self.dt), _key(w[-1] / 2, self.dt / 2),
                      [float(x) for x in w])
        self._ones = np.ones(self._nb)
        self._kick_count = 0
        self._lost_since = 0.0
        if h.time_dependent:
            self._prepare_dynamic()
        # a condensate's mean field g N |psi|^2 (see the module notes); a
        # linear run keeps its kicks as they are, not one test more per kick
        self._contact = float(getattr(h, "contact", 0.0) or 0.0)
        if self._contact:
            self._kick_static = self._kick_static_contact
            self._no_factor = np.ones((1, 1, 1, 1), self.dtype)
        self._rows = self._compiled_steps()

    def _compiled_steps(self):
        """The arguments of :func:`wavesweep.kernels.steps.strang_rows` when
        this propagator's steps can run in that one compiled loop: Strang
        steps of a static H on a 1D Cartesian grid without a mean field,
        through FFTW plans of one row (:func:`wavesweep.fftw_rows.row_plans`;
        single precision keeps its measured kicks there); None otherwise
        (the steps then go through the calls of :meth:`_step_static`)."""
        h, grid = self.hamiltonian, self.grid
        if (len(self.weights) != 1 or grid.ndim != 1 or grid.radial or h.time_dependent or self._contact
                or self.dtype not in (np.complex128, np.complex64)):
            return None
        direct = self.transform.in_place() if self.transform is not None else None
        row_plans = getattr(self.transform, "row_plans", None)
        if direct is None or row_plans is None:
            return None
        first, _, across, last, taus = self._plan
        (half, half_squared), (whole, whole_squared) = self._factors[first], self._factors[across]
        if self._factors[last][0] is not half or half_squared:   # Strang: the two ends are one half kick
            return None
        plans = row_plans()
        if plans is None:
            return None
        n, nb = grid.size, self._nb
        if half is None:   # no potential, no absorber: the kicks multiply by one (exactly)
            half = whole = np.ones((1, n), self.dtype)
            whole_squared = False
        # views of the propagator's own arrays, no copies (a batch's per-member factors are large)
        half, whole = half.reshape(-1, n), whole.reshape(-1, n)
        kinetic = np.ascontiguousarray(self._kinetic_factor(taus[0])[1].reshape(n))
        layers = self.absorber.layers if self._absorbing else []
        lo = np.array([layer.slab[0].start for layer in layers], np.int64)
        hi = np.array([layer.slab[0].stop for layer in layers], np.int64)
        offset = np.concatenate([[0], np.cumsum(hi - lo)[:-1]]).astype(np.int64) if layers else lo
        per = [self._losses.get(key) for key in (first, across, last)]
        if layers and any(x is None for x in per):
            return None
        g = max((w.shape[0] for ws in per for w in ws), default=1) if layers else 1
        losses = (np.ascontiguousarray(np.stack([np.concatenate([np.broadcast_to(w.reshape(w.shape[0], -1),
                                                                                  (g, w[0].size)) for w in ws], axis=1)
                                                 for ws in per]))
                  if layers else np.zeros((3, 1, 0)))
        self._books2d = self.absorbed.reshape(nb, -1)   # a view: the kernel books into self.absorbed
        from ..kernels.steps import strang_rows   # lazy: as the other kernels (numba); bound once, not per call
        self._strang_rows = strang_rows
        return (half, whole, bool(whole_squared), kinetic, plans, lo, hi, offset, losses)

    def load(self, psi):
        direct = self.transform.in_place() if self._radial_basis is None and self.transform else None
        if direct is None:
            return super().load(psi)
        buf = direct[2]
        np.copyto(buf, psi)
        return buf

    # -- precomputed factors --------------------------------------------------
    def _check_layers(self):
        slabs = [[layer.slab for layer in a.layers] if a is not None and a.active else None
                 for a in self.absorbers]
        if any(s != slabs[0] for s in slabs):
            raise ValueError("the members of a batch need absorbing layers of one geometry "
                             "(kind, thickness and faces); only strengths may differ")

    def _build_kick(self, key):
        """exp(-i V0 tau - W absorb) on the grid, one array shared by the
        members or one per member when their absorbers differ.  The absorber
        is applied once per whole step (half at each end), outside the
        composition: the fourth-order schemes have negative sub-steps, and a
        kick of negative length would multiply the layer by exp(+|tau| W)
        (measured: norm 1e263 with a mask and order4).  For Strang this is
        the same as kicking with V - iW.  A kick twice as long as one already
        built is that one squared: an array of its own up to
        SQUARED_ARRAY_MAX points, in the kernel beyond (no second array of a
        large grid)."""
        tau, absorb = key
        half = next((k for k, (arr, sq) in self._factors.items() if arr is not None and not sq
                     and abs(2 * k[0] - tau) <= 1e-13 * abs(tau) and abs(2 * k[1] - absorb) <= 1e-13 * abs(tau)),
                    None)   # by closeness: round(tau, 15) / 2 is not always round(tau / 2, 15)
        if half is not None and self._factors[half][0].size > SQUARED_ARRAY_MAX:
            self._factors[key] = (self._factors[half][0], True)
        elif half is not None:   # small grids: the whole kick as an array of its own (one multiply a point)
            self._factors[key] = (self._factors[half][0] * self._factors[half][0], False)
        else:
            self._factors[key] = (self._kick_array(tau, absorb), False)
        if self._absorbing and absorb > 0:
            per_member = [a.loss_weights(absorb) for a in self.absorbers]
            self._losses[key] = [self._stack([lw[n] for lw in per_member])
                                 for n in range(len(per_member[0]))]

    def _stack(self, arrays) -> np.ndarray:
        """Per-member arrays as one 4D array; a single member's row when they
        are all equal (the common case: one absorber for the whole batch)."""
        first = arrays[0]
        if all(a is first or np.array_equal(a, first) for a in arrays[1:]):
            arrays = arrays[:1]
        return np.ascontiguousarray(np.concatenate([view4(np.asarray(a), self.grid.ndim) for a in arrays]))

    def _kick_array(self, tau, absorb):
        """The 4D factor array (one row, or one per member when their
        absorbers differ), built in place: cos and sin of the phase straight
        into the complex array, the absorber's decay only where W > 0."""
        v = self._kick_potential
        absorbing = self._absorbing and absorb > 0
        if not absorbing and not np.any(v) and not self._renormalise and not self.hamiltonian.time_dependent:
            return None   # exp(0): nothing to multiply (radial grids without absorber)
        members = self.absorbers if absorbing else self.absorbers[:1]
        if absorbing and all(a is members[0] or np.array_equal(a.rate, members[0].rate) for a in members[1:]):
            members = members[:1]
        nd = self.grid.ndim
        out = np.empty((len(members),) + view4(v, nd).shape[1:], dtype=self.dtype)
        phase = v * -tau
        for b, a in enumerate(members):
            row = out[b].reshape(self.grid.shape)
            np.cos(phase, out=row.real, casting="same_kind")
            np.sin(phase, out=row.imag, casting="same_kind")
            if absorbing and a is not None and a.active:
                where = np.nonzero(a.rate.reshape(-1))[0]
                row.reshape(-1)[where] *= np.exp(-a.rate.reshape(-1)[where] * absorb)
        return out

    def _kinetic_factor(self, tau: float):
        """exp(-i T tau) as (e0, e12): e0 along the first padded axis and the
        table e12 over the last two, psi *= e0[i] e12[j, k] (in 1D/2D e12 is
        the whole factor and e0 = [1]).  The 1/N of the inverse FFT is folded
        in (it would be one more pass over psi).  On a dense radial grid: the
        eigenvalue phases."""
        key = round(tau, 15)
        out = self._kinetic_factors.get(key)
        if out is None:
            m = self.hamiltonian.mass
            if self._radial_basis is not None:
                out = np.exp(-1j * self._radial_basis[2] * tau).astype(self.dtype)
            else:
                axes = [None] * (3 - self.grid.ndim) + list(self.grid.axes)
                phase = [np.ones(1, complex) if a is None else np.exp(-1j * (a.wavenumbers**2 / (2.0 * m)) * tau)
                         for a in axes]
                scale = self.transform.backward_scale
                e12 = np.ascontiguousarray((phase[1][:, None] * phase[2][None, :] * scale).astype(self.dtype))
                out = (np.ascontiguousarray(phase[0].astype(self.dtype)), e12)
            self._kinetic_factors[key] = out
        return out

    def _setup_radial(self):
        """T + V_l + V0 = Q diag(lambda) Q^T on a radial grid (see the module notes)."""
        import scipy.linalg   # lazy: 0.04 s, needed only by a radial run
        from ..kernels import real_matvec   # lazy: numba kernels, as in __init__
        self._real_matvec = real_matvec   # bound once: _free_step calls it every step
        h = self.hamiltonian
        # T + V0 in the sine basis; V0 includes the centrifugal term, and the
        # time-dependent terms stay out (they are kicked)
        lam, q = scipy.linalg.eigh(h.static_matrix())
        # float64 even in single precision: a float32 basis is not orthogonal
        # enough (measured norm drift +2e-4 per 1e4 steps)
        self._radial_basis = (np.ascontiguousarray(q), np.ascontiguousarray(q.T), lam)
        self._kick_potential = np.zeros_like(h.static_potential)

    def _free_step(self, psi, tau):
        """exp(-i K tau) psi with K the kinetic step's operator."""
        if self._radial_basis is None:
            phi = self.transform.forward(psi)
            e0, e12 = self._kinetic_factor(tau)
            self._kernels.kinetic(view4(phi, self.grid.ndim), e0, e12)
            return self.transform.backward(phi, scaled=False)
        q, qt, _ = self._radial_basis
        phases = self._kinetic_factor(tau)
        rows = psi.reshape(self._nb, -1)
        out = np.empty_like(rows)
        c = np.empty(rows.shape[1], self.dtype)
        for b in range(self._nb):
            self._real_matvec(qt, rows[b], c)
            c *= phases
            self._real_matvec(q, c, out[b])
        return out.reshape(psi.shape)

    def _prepare_dynamic(self):
        """Sort the time-dependent terms: f(t) g(r) with g along one axis
        (a phase per axis), other f(t) g(r) (g kept, times a coefficient in
        the kernel), and the rest (evaluated on the grid per kick)."""
        h, grid = self.hamiltonian, self.grid
        self._axis_terms = []   # (view axis, g_1d, f)
        full = []
        for g, f in h.separable:
            g = np.asarray(g, dtype=float)
            axes = [i for i in range(g.ndim) if g.shape[i] > 1]
            if g.ndim == grid.ndim and len(axes) == 1:
                self._axis_terms.append((axes[0] + 3 - grid.ndim, g.reshape(-1), f))
            else:
                full.append((np.broadcast_to(g, grid.shape), f))
        self._full_g = (np.ascontiguousarray(np.stack([view4(g, grid.ndim)[0] for g, _ in full]))
                        if full else _EMPTY_TERMS)
        self._full_f = [f for _, f in full]
        self._general = list(h.general)
        self._mesh = grid.mesh()
        self._view_shape = view4(np.empty(grid.shape, bool), grid.ndim).shape[1:]

    # -- the kicks ------------------------------------------------------------
    def _book_losses(self, psi4, key):
        """Add what the kick ``key`` will remove to the books (from |psi|^2
        before it); returns the removed sum |psi|^2 w per member (no dV)."""
        losses = self._losses.get(key)
        if losses is None:
            return 0.0
        slabs = self._slab_views.get(id(psi4))
        if slabs is None:   # the slabs of this psi's view, made once per array
            lead = (slice(None),) * (4 - self.grid.ndim)
            slabs = [psi4[lead + layer.slab] for layer in self.absorber.layers]
            self._slab_views = {id(psi4): slabs}
            self._slab_owner = psi4
        out, kernel = self._loss_out, self._kernels.layer_loss
        if self._nb == 1:   # one run: plain floats (numpy calls on 1-element arrays cost ~1 us each)
            books, lost, dv = self.absorbed.reshape(-1), 0.0, self._dv
            for n, (slab, lw) in enumerate(zip(slabs, losses)):
                out[0] = 0.0
                kernel(slab, lw, out)
                taken = float(out[0])
                books[n] += taken * dv
                lost += taken
            return lost
        books = self.absorbed.reshape(self._nb, -1)
        lost = 0.0
        for n, (slab, lw) in enumerate(zip(slabs, losses)):
            out[:] = 0.0
            kernel(slab, lw, out)
            books[:, n] += out * self._dv
            lost = lost + out
        return lost

    def _measuring(self, lost) -> bool:
        """Whether this kick measures the norm (single precision, one kick in
        RENORMALISE_EVERY); keeps the count of what unmeasured kicks removed."""
        if not self._renormalise:
            return False
        self._lost_since = self._lost_since + lost
        self._kick_count += 1
        return (self._kick_count - 1) % RENORMALISE_EVERY == 0

    def _kick_static(self, psi4, key):
        """A kick of a time-independent Hamiltonian (``key`` = (tau, absorb))
        on the 4D view of psi."""
        factor, squared = self._factors[key]
        lost = self._book_losses(psi4, key) if self._absorbing else 0.0
        if self._measuring(lost):
            self._kernels.kick_measured(psi4, factor, squared, self._scale, self._before, self._after)
            self._renormalised()
        elif factor is not None:
            self._kernels.kick(psi4, factor, squared)

    def _kick_static_contact(self, psi4, key):
        """:meth:`_kick_static` followed by the mean-field phase
        exp(-i g N |psi|^2 tau), tau the kick's potential length, with the
        density after the linear factor (it changes |psi| only inside an
        absorbing layer); one pass over psi unless the norm is measured."""
        factor, squared = self._factors[key]
        lost = self._book_losses(psi4, key) if self._absorbing else 0.0
        g_tau = self._contact * key[0]
        if self._measuring(lost):
            self._kernels.kick_measured(psi4, factor, squared, self._scale, self._before, self._after)
            self._renormalised()
            self._kernels.kick_contact(psi4, self._no_factor, False, False, g_tau)
        elif factor is not None:
            self._kernels.kick_contact(psi4, factor, squared, True, g_tau)
        else:
            self._kernels.kick_contact(psi4, self._no_factor, False, False, g_tau)

    def _apply_kick(self, psi, pieces, absorb):
        """Kick by the sum of (tau_j, t_j) pieces: static part of total length
        sum(tau_j); dynamic part integrated as sum_j tau_j V_dyn(t_j); the
        absorber over ``absorb``."""
        tau = float(sum(p[0] for p in pieces))
        key = _key(tau, absorb)
        if key not in self._factors:
            self._build_kick(key)
        if not self.hamiltonian.time_dependent:
            return self._kick_static(view4(psi, self.grid.ndim), key)
        factor, squared = self._factors[key]
        psi4 = view4(psi, self.grid.ndim)
        lost = self._book_losses(psi4, key) if self._absorbing else 0.0
        phases = [np.zeros(n) for n in self._view_shape]
        for axis, g, f in self._axis_terms:
            phases[axis] += sum(tj * f(t) for tj, t in pieces) * g
        coef = np.array([sum(tj * f(t) for tj, t in pieces) for f in self._full_f], dtype=float)
        v, has_v = _NO_V, False
        if self._general:
            mesh = self._mesh   # made once: the coordinate arrays do not change per kick
            total = 0.0
            for tj, t in pieces:
                for term in self._general:
                    total = total + tj * np.asarray(term.at_time(mesh, t), dtype=float)
            v, has_v = self._general_phase(total, phases)
        measure = self._measuring(lost)
        self._kernels.kick_dynamic(psi4, factor, squared, phases[0], phases[1], phases[2], self._full_g,
                                   coef, v, has_v, self._scale if measure else self._ones,
                                   self._before, self._after, measure)
        if measure:
            self._renormalised()
        if self._contact:
            self._kernels.kick_contact(psi4, self._no_factor, False, False, self._contact * tau)

    def _general_phase(self, total, phases):
        """A general term's sum tau V(t) joins the 1D phases when it varies
        along one axis only; otherwise it is one full-grid array."""
        nd = self.grid.ndim
        total = np.asarray(total, dtype=float)
        if total.ndim == 0:
            phases[2] += float(total)
            return _NO_V, False
        total = total.reshape((1,) * (nd - total.ndim) + total.shape)
        varying = [i for i in range(nd) if total.shape[i] > 1]
        if len(varying) <= 1:
            axis = varying[0] if varying else nd - 1
            phases[axis + 3 - nd] += np.broadcast_to(total.reshape(-1), (self.grid.shape[axis],))
            return _NO_V, False
        return np.ascontiguousarray(view4(np.broadcast_to(total, self.grid.shape), nd)[0]), True

    def _renormalised(self):
        """After a measured kick: the scale the next measured kick applies,
        sqrt(expected / measured), the expected norm being the previous one
        less what the layers booked since (sum |psi|^2, no dV, per member)."""
        lost, self._lost_since = self._lost_since, 0.0
        if self._norm_expected is None:
            self._norm_expected = self._before.copy()   # the first kick: psi's own norm
        self._norm_expected = self._norm_expected - lost
        after, want = self._after, self._norm_expected
        ok = (after > 0) & (want > 0)
        self._scale = np.sqrt(np.divide(want, after, where=ok, out=np.ones_like(after)))

    def norm_keeping(self, member: int = 0) -> dict | None:
        """Single precision's norm keeping of one member (the count of kicks,
        the scale the next measured kick applies, the norm psi should have,
        what the layers took since the last measured kick), for a
        checkpoint: a run resumed with it takes the kicks the uninterrupted
        run takes (without it the first measured kick after a resume chose
        its own reference, and the norm moved by 2.4e-6).  None in double
        precision."""
        if not self._renormalise:
            return None

        def at(value):
            value = np.asarray(value, float).reshape(-1)
            return float(value[member] if value.size > 1 else value[0])
        return {"kick_count": int(self._kick_count), "scale": at(self._scale),
                "expected": None if self._norm_expected is None else at(self._norm_expected),
                "lost_since": at(self._lost_since)}

    def resume_norm_keeping(self, states) -> None:
        """Take up :meth:`norm_keeping` states (one per member, from their
        checkpoints); nothing when any is missing (a checkpoint written
        before they were kept: the first measured kick then starts anew)."""
        if not self._renormalise or not states or any(st is None for st in states):
            return
        self._kick_count = int(states[0]["kick_count"])
        self._scale = np.array([st["scale"] for st in states], float)
        if all(st["expected"] is not None for st in states):
            self._norm_expected = np.array([st["expected"] for st in states], float)
        lost = np.array([st["lost_since"] for st in states], float)
        self._lost_since = lost if self._nb > 1 else float(lost[0])

    # -- the step -------------------------------------------------------------
    def _step_impl(self, psi, nsteps):
        psi = np.ascontiguousarray(psi, dtype=self.dtype)
        if not self.hamiltonian.time_dependent:
            return self._step_static(psi, nsteps)
        w = self.weights
        taus = [wi * self.dt for wi in w]
        t = self.t
        # Sub-step starts within one step (cumulative weights).
        starts = np.concatenate([[0.0], np.cumsum(taus)[:-1]])
        mids = [s + tau / 2 for s, tau in zip(starts, taus)]
        pending = [(taus[0] / 2, t + mids[0])]
        for n in range(nsteps):
            t_step = t + n * self.dt
            for j, tau in enumerate(taus):
                tm = t_step + mids[j]
                if n or j:
                    pending.append((tau / 2, tm))
                absorb = (self.dt / 2 if n == 0 else self.dt) if j == 0 else 0.0
                self._apply_kick(psi, pending, absorb)
                pending = [(tau / 2, tm)]
                psi = self._free_step(psi, tau)
        self._apply_kick(psi, pending, self.dt / 2)
        return psi

    def _step_static(self, psi, nsteps):
        """The same composition for a time-independent H, with the kicks'
        keys worked out once (per-step Python overhead is what limits small
        grids): half kick, then per step the free sub-steps with the fused
        kicks between them, the last kick split off at the end.  With a
        backend that transforms one buffer in place, psi stays in it and
        the loop calls the plans directly."""
        first, inner, across, last, taus = self._plan
        kick, nd = self._kick_static, self.grid.ndim
        direct = self.transform.in_place() if self._radial_basis is None else None
        if self._rows is not None:   # the whole call in one compiled loop (kernels.steps)
            strang_rows = self._strang_rows
            buf = direct[2]
            if psi is not buf:
                np.copyto(buf, psi)
            half, whole, whole_squared, kinetic, plans, lo, hi, offset, losses = self._rows
            nb = self._nb
            if self._renormalise:   # single precision's norm keeping (see _measuring, _renormalised), per member
                lost_since = np.broadcast_to(np.asarray(self._lost_since, float), (nb,)).copy()
                expected = (np.zeros(nb) if self._norm_expected is None
                            else np.array(self._norm_expected, float).reshape(nb))
                scale = np.array(self._scale, float).reshape(nb)
            else:                   # unused: the arrays made once (a call's Python is per sample interval)
                lost_since = expected = scale = self._ones
            strang_rows(buf.reshape(nb, -1), half, whole, whole_squared, kinetic, int(nsteps), plans.execute,
                        plans.forward, plans.backward, lo, hi, offset, losses,
                        self._books2d, self._dv,
                        RENORMALISE_EVERY if self._renormalise else 0, self._kick_count, scale, expected,
                        self._norm_expected is not None, lost_since)
            if self._renormalise:
                # a kick numbered count .. count + nsteps was measured: a multiple of RENORMALISE_EVERY lies there
                first_kick, last_kick = self._kick_count, self._kick_count + int(nsteps)
                measured = last_kick // RENORMALISE_EVERY >= -(-first_kick // RENORMALISE_EVERY)
                self._kick_count += int(nsteps) + 1
                self._scale, self._lost_since = scale, (lost_since if nb > 1 else float(lost_since[0]))
                if measured:
                    self._norm_expected = expected
            return buf
        if direct is not None:
            fwd, bwd, buf = direct
            if psi is not buf:
                np.copyto(buf, psi)
                psi = buf
            psi4 = view4(buf, nd)
            kinetic = self._kernels.kinetic
            phases = [self._kinetic_factor(tau) for tau in taus]

            def free(psi, j):
                fwd()
                e0, e12 = phases[j]
                kinetic(psi4, e0, e12)
                bwd()
                return psi
        else:
            def free(psi, j):
                return self._free_step(psi, taus[j])
        kick(view4(psi, nd), first)
        m = len(taus) - 1
        for n in range(nsteps):
            for j in range(m):
                psi = free(psi, j)
                kick(psi4 if direct else view4(psi, nd), inner[j])
            psi = free(psi, m)
            kick(psi4 if direct else view4(psi, nd), across if n < nsteps - 1 else last)
        return psi


@register_scheme
class Strang(SplitOperator):
    """Second-order Strang splitting (Strang, SIAM J. Numer. Anal. 5, 506 (1968))."""

    name = "strang"
    order = 2
    summary = "second-order split-operator (Strang): 1 FFT pair per step"
    weights = STRANG
    kick_factors = 1   # its whole kick is the half kick squared


@register_scheme
class Order4(SplitOperator):
    """Fourth order: Yoshida's triple jump of Strang sub-steps (3 FFT pairs)."""

    name = "order4"
    order = 4
    summary = "fourth-order split-operator (Yoshida's triple jump): 3 FFT pairs per step"
    weights = YOSHIDA4
    kick_factors = 2


@register_scheme
class Order4Suzuki(SplitOperator):
    """Fourth order: Suzuki's five-stage composition (5 FFT pairs, smaller error)."""

    name = "order4_suzuki"
    order = 4
    summary = "fourth-order split-operator (Suzuki, five stages): 5 FFT pairs, a smaller error"
    weights = SUZUKI4

