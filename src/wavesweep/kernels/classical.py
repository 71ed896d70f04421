"""Classical trajectories of a static potential (numba, cached on disk).

The compiled loop of :func:`wavesweep.adequacy.classical_reach` for a
time-independent V: velocity Verlet of an ensemble of trajectories on the
grid's multilinear interpolant of -grad V, one global step for all of them
(bounded by the fastest trajectory's crossing of a grid cell and by the
force's scale), kinetic energy clipped to the energy each started with,
box walls reflecting and periodic axes wrapping, a trajectory ending where
it enters an absorbing layer.  The same arithmetic in the same order as the
array version it replaces (which stays for time-dependent V); that version
cost ~70 us a classical step in numpy calls, 70 ms of every run of a
sharp barrier (a thousand steps), more than the 5000 quantum steps' FFTs of
a 2048-point study run.

Grids are padded to three axes (trailing axes of one point), the layers
given as arrays (axis, side +1/-1, inner edge).
"""
from __future__ import annotations

import math
import types

import numba
import numpy as np

__all__ = ["static_reach"]


@numba.njit(cache=True, nogil=True, inline="always")
def _cell(c, x0, dx, points, periodic):
    """(lower index, upper index, fraction) of coordinate ``c`` on one axis."""
    u = (c - x0) / dx
    if periodic:
        f0 = math.floor(u)
        lo = np.int64(f0)
        if lo < 0 or lo >= points:   # an integer division only for a point that wrapped
            lo = lo % points
        hi = lo + 1
        if hi == points:
            hi = 0
        return lo, hi, u - f0
    u = min(max(u, 0.0), points - 1.0)
    lo = min(np.int64(math.floor(u)), points - 2)
    return lo, lo + 1, u - lo


@numba.njit(cache=True, nogil=True, inline="always")
def _interp(values, lead, pt, x0, dx, points, periodic, nd):
    """Multilinear interpolation of ``values[lead]`` (``values`` 4D: a
    stack of the grid padded to 3D) at the point ``pt`` (nd coordinates),
    corners in the order of the array version (axis 0 the lowest bit).
    Scalars and plain indexing only: an array allocated per call made the
    loop allocation-bound, and a view per call (``values[lead]``) cost
    40 ns of reference counting, 15x the interpolation."""
    lo0, hi0, f0 = _cell(pt[0], x0[0], dx[0], points[0], periodic[0])
    lo1, hi1, f1 = np.int64(0), np.int64(0), 0.0
    lo2, hi2, f2 = np.int64(0), np.int64(0), 0.0
    if nd > 1:
        lo1, hi1, f1 = _cell(pt[1], x0[1], dx[1], points[1], periodic[1])
    if nd > 2:
        lo2, hi2, f2 = _cell(pt[2], x0[2], dx[2], points[2], periodic[2])
    out = 0.0
    for corner in range(2 ** nd):
        weight = 1.0
        if corner & 1:
            i = hi0
            weight = weight * f0
        else:
            i = lo0
            weight = weight * (1.0 - f0)
        j = np.int64(0)
        k = np.int64(0)
        if nd > 1:
            if (corner >> 1) & 1:
                j = hi1
                weight = weight * f1
            else:
                j = lo1
                weight = weight * (1.0 - f1)
        if nd > 2:
            if (corner >> 2) & 1:
                k = hi2
                weight = weight * f2
            else:
                k = lo2
                weight = weight * (1.0 - f2)
        out += weight * values[lead, i, j, k]
    return out


@numba.njit(cache=True, nogil=True, inline="always")
def _beyond(x, j, f, layer_axis, layer_side, layer_edge):
    """Whether trajectory ``j`` is beyond the inner edge of layer ``f``."""
    i = layer_axis[f]
    return (x[j, i] > layer_edge[f]) if layer_side[f] > 0 else (x[j, i] < layer_edge[f])


@numba.njit(cache=True, nogil=True)
def _static_reach(nd, x, p, energy, mass, v, grads, x0, dx, points, periodic, ax_min, ax_max, ax_length,
                  layer_axis, layer_side, layer_edge, duration, dx_min, omega, min_tau_steps, max_steps,
                  alive, peak, f, entry, entry_step, faces_hit, lo_seen, hi_seen, edges_reached):
    """The loop of :func:`static_reach` on a grid of ``nd`` axes."""
    n = x.shape[0]
    x_new = np.empty(nd)
    p_half = np.empty(nd)
    f_new = np.empty(nd)
    t = 0.0
    steps = 0
    n_alive = 0
    for j in range(n):
        if alive[j]:
            n_alive += 1
    while t < duration and n_alive > 0 and steps < max_steps:
        v_max = 0.0
        a_max = 0.0
        for j in range(n):
            if alive[j]:
                for i in range(nd):
                    v_max = max(v_max, abs(p[j, i]))
                    a_max = max(a_max, abs(f[j, i]))
        v_max = v_max / mass
        a_max = a_max / mass
        tau = duration
        limit = dx_min / max(v_max, 1e-300)
        if a_max > 0:
            limit = min(limit, math.sqrt(dx_min / a_max))
        if omega > 0:
            limit = min(limit, 2 * math.pi / omega / 32)
        tau = max(min(tau, limit), duration / min_tau_steps)
        tau = min(tau, duration - t)
        for j in range(n):
            if not alive[j]:
                continue
            for i in range(nd):
                p_half[i] = p[j, i] + 0.5 * tau * f[j, i]
                x_new[i] = x[j, i] + tau * p_half[i] / mass
                if x_new[i] >= ax_max[i] or x_new[i] < ax_min[i]:
                    edges_reached[i] = True
            for i in range(nd):   # walls: box axes reflect, periodic ones wrap
                if periodic[i]:
                    x_new[i] = ax_min[i] + np.mod(x_new[i] - ax_min[i], ax_length[i])
                else:
                    over = x_new[i] > ax_max[i]
                    under = x_new[i] < ax_min[i]
                    if over:
                        x_new[i] = 2 * ax_max[i] - x_new[i]
                    if under:
                        x_new[i] = 2 * ax_min[i] - x_new[i]
                    if over or under:
                        p_half[i] *= -1.0
            for i in range(nd):   # -grad V (written out here: as a helper call it cost a quarter of the loop)
                f_new[i] = 0.0 - _interp(grads, i, x_new, x0, dx, points, periodic, nd)
            kinetic = 0.0
            for i in range(nd):
                p_half[i] = p_half[i] + 0.5 * tau * f_new[i]
                kinetic += p_half[i] ** 2
            kinetic = kinetic / (2 * mass)
            allowed = max(energy[j] - _interp(v, 0, x_new, x0, dx, points, periodic, nd), 0.0)
            scale = math.sqrt(allowed / max(kinetic, 1e-300)) if kinetic > allowed else 1.0
            for i in range(nd):
                x[j, i] = x_new[i]
                p[j, i] = p_half[i] * scale
                f[j, i] = f_new[i]
                peak[j, i] = max(peak[j, i], abs(p[j, i]))
        t += tau
        steps += 1
        for j in range(n):
            if not alive[j]:
                continue
            for fc in range(layer_axis.size):
                if _beyond(x, j, fc, layer_axis, layer_side, layer_edge):
                    faces_hit[j] |= 1 << fc
            if faces_hit[j]:
                entry_step[j] = steps
                for i in range(nd):
                    entry[j, i] = p[j, i]
                alive[j] = False
                n_alive -= 1
            else:
                for i in range(nd):
                    lo_seen[i] = min(lo_seen[i], x[j, i])
                    hi_seen[i] = max(hi_seen[i], x[j, i])
    return steps


_AXES = 0   # the number of axes of a compiled copy of _static_reach_axes (see _entry_for); never called as is


def _static_reach_axes(x, p, energy, mass, v, grads, x0, dx, points, periodic, ax_min, ax_max, ax_length,
                       layer_axis, layer_side, layer_edge, duration, dx_min, omega, min_tau_steps, max_steps,
                       alive, peak, f, entry, entry_step, faces_hit, lo_seen, hi_seen, edges_reached):
    return _static_reach(_AXES, x, p, energy, mass, v, grads, x0, dx, points, periodic, ax_min, ax_max,
                         ax_length, layer_axis, layer_side, layer_edge, duration, dx_min, omega, min_tau_steps,
                         max_steps, alive, peak, f, entry, entry_step, faces_hit, lo_seen, hi_seen, edges_reached)


def _entry_for(nd: int):
    """:func:`_static_reach_axes` compiled with ``_AXES`` = nd, a global and
    so a compile-time constant: the compiler then unrolls the loops over the
    axes and keeps a trajectory's coordinates in registers (with nd read
    from the arrays a sharp barrier's 1010 steps took 14.8 ms, with nd
    constant 2.9 ms; the same numbers).  Each copy has a name of its own:
    numba's disk cache is keyed by name and line (as kernels.split._twins)."""
    fn = _static_reach_axes
    copy = types.FunctionType(fn.__code__, {**fn.__globals__, "_AXES": nd}, f"_static_reach_{nd}d",
                              fn.__defaults__, fn.__closure__)
    copy.__qualname__ = f"_static_reach_{nd}d"
    return numba.njit(cache=True, nogil=True)(copy)


_BY_AXES = {nd: _entry_for(nd) for nd in (1, 2, 3)}


def static_reach(x, p, energy, mass, v, grads, x0, dx, points, periodic, ax_min, ax_max, ax_length,
                 layer_axis, layer_side, layer_edge, duration, dx_min, omega, min_tau_steps, max_steps,
                 alive, peak, f, entry, entry_step, faces_hit, lo_seen, hi_seen, edges_reached):
    """Integrate the trajectories ``x``, ``p`` (n, nd; bohr, hbar/bohr) of
    a static potential ``v`` (hartree, shape (1, grid padded to 3D)) with
    force tables ``grads`` (nd, padded grid: dV/dx_i) from t = 0 over
    ``duration``; updated in place: ``x``, ``p``, ``f`` (the force now),
    ``alive``, ``peak`` (largest |p_i| per trajectory), ``entry`` (p when
    it entered a layer), ``entry_step`` (the step count then), ``faces_hit``
    (bit f: beyond layer f's edge then), ``lo_seen``/``hi_seen`` (per axis,
    outside the layers), ``edges_reached`` (per axis).  Returns the
    classical steps taken.  ``energy``: each trajectory's conserved p^2/2m
    + V.  (The compiled loop of the grid's number of axes.)"""
    return _BY_AXES[x.shape[1]](x, p, energy, mass, v, grads, x0, dx, points, periodic, ax_min, ax_max,
                                ax_length, layer_axis, layer_side, layer_edge, duration, dx_min, omega,
                                min_tau_steps, max_steps, alive, peak, f, entry, entry_step, faces_hit,
                                lo_seen, hi_seen, edges_reached)
