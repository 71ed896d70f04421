"""Marginal distributions of a wave function along one axis of its grid:
the one home for them (adequacy's momentum reach, the boost check of
eigenstate packets, the run's analysis record).

Two momentum distributions, because two questions are asked:

- :func:`momentum_marginal`: on the grid's own momenta, the expansion in
  the grid's modes: plane waves (FFT) on a periodic axis, standing waves
  (orthonormal DST-I, |k| only) on box and radial axes.  What the grid can
  represent: how close a state comes to the largest momentum it resolves.
- :func:`free_space_marginals`: the position marginal and the *signed*
  momentum distribution of psi continued by zero beyond the grid (the
  zero-padded FFT on every axis, :data:`MOMENTUM_PAD` times finer in k):
  where the packet is going once it leaves its box, which the classical
  free-flight estimate of arrival times needs (a standing-wave expansion
  cannot say which way a part moves).
"""
from __future__ import annotations

import numpy as np
import scipy.fft

__all__ = ["momentum_marginal", "free_space_marginals", "MOMENTUM_PAD"]

# The free-space momentum marginal is sampled on a grid this many times finer than the
# axis's own (zero-padded transform), as the classical free-flight estimate interpolates it.
MOMENTUM_PAD = 4
# Slabs of psi transformed at once by free_space_marginals (elements, padding included):
# no temporary of the grid's size times the padding is made.
SLAB_ELEMENTS = 2**22


def momentum_marginal(psi, grid, i: int) -> tuple[np.ndarray, np.ndarray]:
    """(k, weight) along axis i of psi: |transform|^2 summed over the other
    axes (FFT on periodic axes, orthonormal DST-I on box and radial ones),
    k ascending, weights summing to 1."""
    ax = grid.axes[i]
    c = (scipy.fft.fft(psi, axis=i) if ax.boundary == "periodic"
         else scipy.fft.dst(psi, type=1, axis=i, norm="ortho"))
    other = tuple(j for j in range(grid.ndim) if j != i)
    weight = np.sum(np.abs(c) ** 2, axis=other) if other else np.abs(c) ** 2
    k = ax.wavenumbers
    order = np.argsort(k)
    weight = weight[order]
    return k[order], weight / weight.sum()


def free_space_marginals(psi0, grid, axis: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``(rho, k, w)`` of psi0 along ``axis`` (atomic units): the position
    marginal |psi0|^2 summed over the other axes, and the momentum marginal
    |FFT_axis psi0|^2 summed over them on a MOMENTUM_PAD times finer k grid
    (zero padding), k ascending; each normalised to sum 1.  The transform
    goes slab by slab along another axis, so no temporary of the grid's
    size (times the padding) is made."""
    ax = grid.axes[axis]
    psi0 = np.asarray(psi0)
    others = tuple(i for i in range(psi0.ndim) if i != axis)
    pad = MOMENTUM_PAD * ax.points
    w = np.zeros(pad)
    rho = np.zeros(ax.points)
    if not others:
        rho = np.abs(psi0) ** 2
        w = np.abs(np.fft.fft(psi0, n=pad)) ** 2
    else:
        o = others[0]
        rest = int(np.prod([psi0.shape[i] for i in others[1:]], dtype=np.int64)) or 1
        per = max(1, SLAB_ELEMENTS // (pad * rest))
        for start in range(0, psi0.shape[o], per):
            slab = psi0[(slice(None),) * o + (slice(start, start + per),)]   # a view: the axes stay
            keep = tuple(i for i in range(slab.ndim) if i != axis)
            rho += (np.abs(slab) ** 2).sum(axis=keep)
            c = np.fft.fft(slab, n=pad, axis=axis)
            w += (np.abs(c) ** 2).sum(axis=keep)
    k = 2 * np.pi * np.fft.fftfreq(pad, ax.dx)
    order = np.argsort(k, kind="stable")
    total_w = float(np.sum(w))
    total_rho = float(np.sum(rho))
    return (rho / total_rho if total_rho > 0 else rho, k[order],
            w[order] / total_w if total_w > 0 else w[order])
