"""Elementwise kernels of the split-operator step (numba, cached on disk).

Every kernel works in place on 4D views ``(member, i, j, k)``: a batch of
``B`` states (``B = 1`` for a single run) on a grid of one to three axes
padded with *leading* length-1 axes (:func:`view4`), so that the innermost
loop runs over the last, contiguous and longest axis (with trailing padding
a 1D grid became (N, 1, 1) and every element paid a loop of length one:
measured 4x slower than numpy).  Factors shared by all members have a
leading length of 1, per-member factors a leading length of ``B``.

Each kernel is built twice (:class:`KernelSet`): threaded (``prange`` over
rows) and serial.  On small grids starting threads costs more than the work
(measured, 2 cores: a kick of 4096 points took 78 us with 2 threads, 2.3 us
in the threaded build with one thread, 1.1 us serial).
"""
from __future__ import annotations

import types

import numba
import numpy as np

from .views import as3d, view4

__all__ = ["view4", "as3d", "KernelSet", "kernels_for", "real_matvec"]


def _twins(fn, fastmath=False):
    """(threaded, serial) numba builds of one kernel.  The serial copy gets
    its own qualified name: numba's disk cache is keyed by name and line,
    not by the ``parallel`` flag, so two builds of one function would load
    each other's machine code.  Both release the GIL (nogil): the lanes
    of a batch step in threads of one process.  ``fastmath``: numba's
    flags for the build (a set such as REDUCTION_FLAGS, or False)."""
    serial = types.FunctionType(fn.__code__, fn.__globals__, fn.__name__ + "_serial",
                                fn.__defaults__, fn.__closure__)
    serial.__qualname__ = fn.__qualname__ + "_serial"
    serial.__doc__ = fn.__doc__
    flags = set(fastmath) if fastmath else False   # numba wants a set (a copy each: it keeps it)
    return (numba.njit(cache=True, parallel=True, fastmath=flags, nogil=True)(fn),
            numba.njit(cache=True, parallel=False, fastmath=set(flags) if flags else False, nogil=True)(serial))


# Reductions may reassociate their sums (so that the compiler vectorises them: a
# pass of sums over 4096 points measured 23.6 us as written, 6.6 us with these
# flags) and contract a * b + c: rounding-level changes only.  No flag that assumes
# finite values: a NaN must still reach the run's health check.
REDUCTION_FLAGS = frozenset({"reassoc", "contract"})


@numba.njit(cache=True, inline="always")
def row_indices(r, n0, n1):
    """(member, i, j) of row ``r`` of a (member, i, j, k) array: kernels run
    over rows in parallel and along k inside."""
    ij = r % (n0 * n1)
    return r // (n0 * n1), ij // n1, ij % n1


@numba.njit(cache=True, inline="always")
def sum_rows(part, rows_per_member, out):
    """out[b] = sum of part[r] over the rows of member b."""
    for b in range(out.shape[0]):
        out[b] = 0.0
    for r in range(part.shape[0]):
        out[r // rows_per_member] += part[r]


@numba.njit(cache=True, nogil=True, inline="always")
def abs2(z):
    """|z|^2 in float64, a complex64 value's parts promoted before they are
    squared: a packet's far tails in float32 square below float32's normal
    range, and the subnormal arithmetic made a pass of sums over a 1024^2
    single-precision grid 6x slower (4.1 ms against 0.63).  (complex128:
    the same numbers as before.)"""
    re = np.float64(z.real)
    im = np.float64(z.imag)
    return re * re + im * im


# -- the kernels (pure functions of arrays; prange is range in the serial build)

def kick(psi, factor, squared):
    """psi *= factor (or factor**2 when ``squared``: the whole-step kick of
    a Strang step is the square of its half kick, so one array serves both)."""
    nb, n0, n1, n2 = psi.shape
    per_member = factor.shape[0] > 1
    rows = nb * n0 * n1
    for r in numba.prange(rows):
        b, i, j = row_indices(r, n0, n1)
        bf = b if per_member else 0
        if squared:
            for k in range(n2):
                f = factor[bf, i, j, k]
                psi[b, i, j, k] *= f * f
        else:
            for k in range(n2):
                psi[b, i, j, k] *= factor[bf, i, j, k]


def kick_dynamic(psi, factor, squared, ph0, ph1, ph2, g, coef, v, has_v, scale, before, after,
                 measure):
    """psi *= scale[b] * factor * exp(-i phase), with
    phase = ph0[i] + ph1[j] + ph2[k] + sum_m coef[m] g[m] + (v if has_v).

    The time-dependent part of a kick is formed here, element by element:
    one-axis terms (a field along an axis) as three 1D phase arrays, terms
    f(t) g(r) as their stored g times a coefficient, and anything else as
    one full-grid array ``v``.  With ``measure``, ``before[b]`` and
    ``after[b]`` receive sum |psi|^2 of each member before and after (no
    cell volume), for the renormalisation of single-precision runs."""
    nb, n0, n1, n2 = psi.shape
    per_member = factor.shape[0] > 1
    nterms = g.shape[0]
    rows = nb * n0 * n1
    part_b = np.zeros(rows)
    part_a = np.zeros(rows)
    for r in numba.prange(rows):
        b, i, j = row_indices(r, n0, n1)
        bf = b if per_member else 0
        s = scale[b]
        p_ij = ph0[i] + ph1[j]
        sb = 0.0
        sa = 0.0
        for k in range(n2):
            ph = p_ij + ph2[k]
            for m in range(nterms):
                ph += coef[m] * g[m, i, j, k]
            if has_v:
                ph += v[i, j, k]
            f = factor[bf, i, j, k]
            if squared:
                f = f * f
            z = psi[b, i, j, k]
            if measure:
                sb += abs2(z)
            z = z * f * (np.cos(ph) - 1j * np.sin(ph)) * s
            psi[b, i, j, k] = z
            if measure:
                sa += abs2(z)
        part_b[r] = sb
        part_a[r] = sa
    if measure:
        sum_rows(part_b, n0 * n1, before)
        sum_rows(part_a, n0 * n1, after)


def kick_measured(psi, factor, squared, scale, before, after):
    """As :func:`kick`, times ``scale[b]``, with sum |psi|^2 of each member
    before and after the kick in ``before`` and ``after`` (no cell volume)."""
    nb, n0, n1, n2 = psi.shape
    per_member = factor.shape[0] > 1
    rows = nb * n0 * n1
    part_b = np.zeros(rows)
    part_a = np.zeros(rows)
    for r in numba.prange(rows):
        b, i, j = row_indices(r, n0, n1)
        bf = b if per_member else 0
        s = scale[b]
        sb = 0.0
        sa = 0.0
        for k in range(n2):
            f = factor[bf, i, j, k]
            if squared:
                f = f * f
            z = psi[b, i, j, k]
            sb += abs2(z)
            z = z * f * s
            psi[b, i, j, k] = z
            sa += abs2(z)
        part_b[r] = sb
        part_a[r] = sa
    sum_rows(part_b, n0 * n1, before)
    sum_rows(part_a, n0 * n1, after)


def kick_contact(psi, factor, squared, has_factor, g_tau):
    """psi *= factor (squared, as in :func:`kick`; skipped without
    ``has_factor``), then psi *= exp(-i g_tau |psi|^2): the mean-field kick
    of a Gross-Pitaevskii step, g_tau = g N tau (hartree bohr^d x au_time).
    |psi| does not change under a phase, so the nonlinear sub-step is
    solved exactly with the density it starts from (Bao, Jaksch &
    Markowich, J. Comput. Phys. 187, 318 (2003))."""
    nb, n0, n1, n2 = psi.shape
    per_member = factor.shape[0] > 1
    rows = nb * n0 * n1
    for r in numba.prange(rows):
        b, i, j = row_indices(r, n0, n1)
        bf = b if per_member else 0
        for k in range(n2):
            z = psi[b, i, j, k]
            if has_factor:
                f = factor[bf, i, j, k]
                if squared:
                    f = f * f
                z = z * f
            ph = g_tau * abs2(z)
            psi[b, i, j, k] = z * (np.cos(ph) - 1j * np.sin(ph))


def kinetic(psi, e0, e12):
    """psi *= e0[i] e12[j, k]: the kinetic phase exp(-i T tau) of a
    Cartesian grid is a product of one factor per axis, so a 3D grid keeps
    a 1D and a 2D table instead of a full-grid array (1D and 2D grids have
    n0 = 1 and e12 is the whole factor)."""
    nb, n0, n1, n2 = psi.shape
    rows = nb * n0 * n1
    for r in numba.prange(rows):
        b, i, j = row_indices(r, n0, n1)
        if n0 == 1:
            for k in range(n2):
                psi[b, i, j, k] *= e12[j, k]
        else:
            e_i = e0[i]
            for k in range(n2):
                psi[b, i, j, k] *= e_i * e12[j, k]


def layer_loss(psi, w, out):
    """out[b] += sum |psi|^2 w over a slab of each member (4D strided views;
    ``w`` shared, leading length 1, or per member)."""
    nb, n0, n1, n2 = psi.shape
    per_member = w.shape[0] > 1
    rows = nb * n0 * n1
    part = np.zeros(rows)
    for r in numba.prange(rows):
        b, i, j = row_indices(r, n0, n1)
        bw = b if per_member else 0
        s = 0.0
        for k in range(n2):
            z = psi[b, i, j, k]
            s += abs2(z) * w[bw, i, j, k]
        part[r] = s
    for r in range(rows):   # adds to out (the books of several kicks)
        out[r // (n0 * n1)] += part[r]


def local_matrix_members(psi, u, pair, squared):
    """psi_a <- sum_b U_ab psi_b at every point of every member of the
    (member, surface, i, j, k) array ``psi`` (a solo run is a batch of
    one): the kick exp(-i V tau) of coupled surfaces, V the local real
    symmetric S x S matrix (so U is complex symmetric), the same for every
    member (a batch of coupled runs that differ only in their packets).
    Its upper triangle is packed along u's first axis, U_ab = u[pair[a, b],
    i, j, k]; with ``squared`` U is applied twice (a kick twice as long as
    one built, as in :func:`kick`).  Two surfaces have their own loop over
    contiguous rows (no scratch vector; it vectorises: measured 1.3x
    faster at 4096 points than the general loop).  One loop over all
    members' rows: a batch pays one kernel call per kick."""
    m, s, n0, n1, n2 = psi.shape
    rows = n0 * n1
    for r in numba.prange(m * rows):
        b = r // rows
        i = (r % rows) // n1
        j = r % n1
        if s == 2:
            _apply_pair(psi[b, 0, i, j], psi[b, 1, i, j], u[0, i, j], u[1, i, j], u[2, i, j])
            if squared:
                _apply_pair(psi[b, 0, i, j], psi[b, 1, i, j], u[0, i, j], u[1, i, j], u[2, i, j])
        else:
            old = np.empty(s, psi.dtype)
            for k in range(n2):
                for _ in range(2 if squared else 1):
                    for a in range(s):
                        old[a] = psi[b, a, i, j, k]
                    for a in range(s):
                        acc = 0j
                        for c in range(s):
                            acc += u[pair[a, c], i, j, k] * old[c]
                        psi[b, a, i, j, k] = acc


@numba.njit(cache=True, nogil=True)
def _apply_pair(p0, p1, u00, u01, u11):
    """(p0, p1) <- U (p0, p1) along a row, U = [[u00, u01], [u01, u11]]."""
    for k in range(p0.shape[0]):
        a = p0[k]
        b = p1[k]
        p0[k] = u00[k] * a + u01[k] * b
        p1[k] = u01[k] * a + u11[k] * b

@numba.njit(cache=True, parallel=True, fastmath=False, nogil=True)
def real_matvec(q, x, out):
    """out = q @ x for a real C-contiguous (n, n) matrix q and a complex vector x
    (the dense kinetic step of a radial grid; rows in parallel, no BLAS threads)."""
    n = q.shape[0]
    for i in numba.prange(n):
        re = 0.0
        im = 0.0
        for j in range(n):
            re += q[i, j] * x[j].real
            im += q[i, j] * x[j].imag
        out[i] = re + 1j * im


_KERNELS = {name: _twins(fn) for name, fn in
            (("kick", kick), ("kick_dynamic", kick_dynamic), ("kick_measured", kick_measured),
             ("kick_contact", kick_contact), ("kinetic", kinetic),
             ("local_matrix_members", local_matrix_members))}
# the absorbers' books only sum (they write no state): their sums may reassociate.  A kernel that writes
# psi keeps IEEE order: with the flags the threaded and serial builds of the measured kick multiplied
# z f s in different orders and their states differed in the last bit.
_KERNELS["layer_loss"] = _twins(layer_loss, REDUCTION_FLAGS)


class KernelSet:
    """The kernels in one build: ``KernelSet(threaded=True)`` or ``False``."""

    def __init__(self, threaded: bool):
        self.threaded = bool(threaded)
        for name, (par, ser) in _KERNELS.items():
            setattr(self, name, par if self.threaded else ser)


# Below this many elements (all members together) the serial build is used:
# waking passive OpenMP threads costs ~65 us per kernel (2 cores), so a kick
# of 512^2 took 0.16 ms threaded and 0.11 ms serial, of 1024^2 0.82 and 1.17.
THREADED_MIN_ELEMENTS = 1 << 19


def kernels_for(elements: int, threads: int) -> KernelSet:
    """The build that pays for ``elements`` complex numbers and ``threads``."""
    return KernelSet(threads > 1 and elements >= THREADED_MIN_ELEMENTS)
