"""The vector work of one Lanczos step after H's kinetic part (numba).

:func:`lanczos_update` takes w = T q (the kinetic part, applied through the
transforms by the caller) and in three passes, with no temporaries, adds
V q, removes the previous vector, and orthogonalises against q twice (the
second pass keeps the local orthogonality, as the numpy version did),
returning alpha's two parts and the residual's norm.  Through numpy these
were eight array operations and five temporaries a step (~110 us at 4096
points, 40 steps in every run's analysis record).
"""
from __future__ import annotations

import math

import numba
import numpy as np

__all__ = ["lanczos_update"]


# IEEE order, no fast-math flags: the kernel writes the recurrence's vectors
# (the project's rule for kernels that write state), and the recurrence
# amplifies rounding; the sums' vectorisation saved ~2 us of a ~90 us step.
@numba.njit(cache=True, nogil=True)
def lanczos_update(w, q, q_prev, v, beta_prev, has_prev):
    """In place on ``w`` (complex128, flat; T q on entry): w += V q, then
    w -= beta_prev q_prev (with ``has_prev``), a = Re <q|w>, w -= a q,
    c = <q|w>, w -= c q.  Returns (a, Re c, ||w||) for the step's alpha
    = a + Re c and beta = ||w|| (``v`` the real potential, flat, hartree)."""
    n = w.size
    sa = 0.0
    for j in range(n):
        z = w[j] + v[j] * q[j]
        if has_prev:
            z -= beta_prev * q_prev[j]
        w[j] = z
        qj = q[j]
        sa += qj.real * z.real + qj.imag * z.imag
    a = sa
    cr = 0.0
    ci = 0.0
    for j in range(n):
        qj = q[j]
        z = w[j] - a * qj
        w[j] = z
        cr += qj.real * z.real + qj.imag * z.imag
        ci += qj.real * z.imag - qj.imag * z.real
    c = complex(cr, ci)
    s = 0.0
    for j in range(n):
        z = w[j] - c * q[j]
        w[j] = z
        s += z.real * z.real + z.imag * z.imag
    return a, cr, math.sqrt(s)
