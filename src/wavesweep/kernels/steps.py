"""Whole split-operator steps of a 1D grid in one compiled loop (numba).

:func:`strang_rows` runs ``nsteps`` Strang steps of every row of a batch
(one row: one run) without returning to Python: the kicks, FFTW's own
transforms (called through their addresses, see :mod:`wavesweep.fftw_rows`)
and the kinetic phases, one member at a time, so that a member's row and
its factors stay in cache across its steps; the absorbing layers' books are
kept at every kick as :func:`wavesweep.kernels.split.layer_loss` keeps them,
and a single-precision run's norm as its measured kicks keep it.
Through Python a 2048-point step cost 1.5-1.7 bare FFT pairs, a third of it
between calls; the loop also runs without the GIL, so a batch's lanes step
in parallel.  The arithmetic per point is the plain loop's (a member's
numbers do not depend on the others or on the order of the members).
"""
from __future__ import annotations

import numba
import numpy as np
from llvmlite import ir
from numba import types
from numba.extending import intrinsic

from .split import abs2

__all__ = ["strang_rows", "execute_address"]


@intrinsic
def execute_address(typingctx, fn, plan, src, dst):
    """Call ``void fn(plan, src, dst)`` (FFTW's new-array execute) at the
    address ``fn``: the address is an argument, not a constant of the
    machine code, so the compiled loop caches on disk like any kernel."""
    sig = types.void(types.intp, types.intp, types.intp, types.intp)

    def codegen(context, builder, signature, args):
        f, p, a, b = args
        ptr = ir.IntType(8).as_pointer()
        fnty = ir.FunctionType(ir.VoidType(), [ptr, ptr, ptr])
        call = builder.inttoptr(f, fnty.as_pointer())
        builder.call(call, [builder.inttoptr(p, ptr), builder.inttoptr(a, ptr), builder.inttoptr(b, ptr)])
        return context.get_dummy_value()

    return sig, codegen


@numba.njit(cache=True, nogil=True, inline="always")
def _kick(row, factor, squared):
    if squared:
        for k in range(row.size):
            f = factor[k]
            row[k] *= f * f
    else:
        for k in range(row.size):
            row[k] *= factor[k]


@numba.njit(cache=True, nogil=True, inline="always")
def _book(row, lo, hi, offset, weights, books, dv):
    """books[layer] += sum over the layer's slab of |psi|^2 w, times dv;
    returns the sum over the layers of what they took (no dv)."""
    lost = 0.0
    for layer in range(lo.size):
        s = 0.0
        o = offset[layer] - lo[layer]
        for k in range(lo[layer], hi[layer]):
            z = row[k]
            s += abs2(z) * weights[o + k]
        books[layer] += s * dv
        lost += s
    return lost


@numba.njit(cache=True, nogil=True, fastmath={"reassoc", "contract"})
def _layer_sums(row, lo, hi, offset, weights, books, dv):
    return _book(row, lo, hi, offset, weights, books, dv)


@numba.njit(cache=True, nogil=True)
def _kick_measured(row, factor, squared, scale):
    """As :func:`wavesweep.kernels.split.kick_measured` on one row (the same
    arithmetic, IEEE order): (sum |psi|^2 before, after), psi *= f scale."""
    sb = 0.0
    sa = 0.0
    for k in range(row.size):
        f = factor[k]
        if squared:
            f = f * f
        z = row[k]
        sb += abs2(z)
        z = z * f * scale
        row[k] = z
        sa += abs2(z)
    return sb, sa


def strang_rows(psi, half, whole, whole_squared, kinetic, nsteps, execute, forward, backward,
                lo, hi, offset, losses, books, dv, measure_every, count, scale, expected, has_expected,
                lost_since):
    """``nsteps`` Strang steps of each row of ``psi`` (members, n), in
    place: the half kick ``half``, then per step the kinetic step (FFTW
    ``forward``, times ``kinetic`` (n,), which holds the inverse
    transform's 1/n, FFTW ``backward``) and the whole kick ``whole``
    between steps (squared with ``whole_squared``: then it is the half
    kick's array) or ``half`` after the last.  ``half`` and ``whole`` are
    (f, n), f one (shared) or one per member.  Absorbing layers (slabs
    ``lo[l]:hi[l]``): before kick j (0 the first, 1 between steps, 2 the
    last), books[b, l] += sum |psi|^2 w dv over the slab, the weights
    ``losses[j, g, offset[l] + k - lo[l]]``; no layers: ``lo`` empty.

    Single precision keeps its norm as :class:`~wavesweep.propagators.
    split_operator.SplitOperator` does: with ``measure_every`` > 0 the kick
    whose number (``count`` kicks came before this call) is a multiple of
    it is measured, times ``scale[b]``; then ``expected[b]`` (psi's own
    norm at the first measured kick unless ``has_expected``) less what the
    layers took since (``lost_since[b]``) gives the next scale, sqrt(
    expected / after).  All updated in place; a member's numbers depend on
    no other member."""
    nb, n = psi.shape
    per_member_loss = losses.shape[1] > 1
    for b in range(nb):
        row = psi[b]
        p = row.ctypes.data
        f_half = half[b if half.shape[0] > 1 else 0]
        f_whole = whole[b if whole.shape[0] > 1 else 0]
        lb = b if per_member_loss else 0
        have = has_expected
        for s in range(nsteps + 1):
            if s > 0:
                execute_address(execute, forward, p, p)
                for k in range(n):
                    row[k] *= kinetic[k]
                execute_address(execute, backward, p, p)
            j = 0 if s == 0 else (1 if s < nsteps else 2)
            lost = 0.0
            if lo.size:
                lost = _layer_sums(row, lo, hi, offset, losses[j, lb], books[b], dv)
            factor = f_whole if j == 1 else f_half
            squared = whole_squared and j == 1
            if measure_every > 0:
                lost_since[b] += lost
                if (count + s) % measure_every == 0:
                    before, after = _kick_measured(row, factor, squared, scale[b])
                    if not have:
                        expected[b] = before
                        have = True
                    expected[b] = expected[b] - lost_since[b]
                    lost_since[b] = 0.0
                    want = expected[b]
                    scale[b] = np.sqrt(want / after) if (after > 0 and want > 0) else 1.0
                    continue
            _kick(row, factor, squared)


strang_rows = numba.njit(cache=True, nogil=True)(strang_rows)
