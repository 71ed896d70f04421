"""FFTW's own plans of one row, for a compiled stepping loop.

A split-operator step of a 1D grid is two FFTs and two multiplications of a
few thousand points; through Python each call costs ~1 us, and a 2048-point
step spent a third of its time between calls.  A numba loop can call FFTW
itself: :func:`row_plans` makes in-place forward and backward plans of one
row (``n`` complex128 points) with FFTW's C interface, in the very library
pyFFTW loaded (so the process's wisdom serves them), and hands out the
addresses of the plans and of ``fftw_execute_dft`` (FFTW's new-array
execute, safe to call from several threads at once).  The loop
(:func:`wavesweep.kernels.steps.strang_rows`) runs every row of a batch
through the same two plans, one member at a time while its row is in cache.

FFTW's rule for executing a plan on other arrays is that they have the
alignment the plan was made for; a batch's rows that do not share it get
plans made with FFTW_UNALIGNED.  Planning is not thread-safe in FFTW: plans
are made under the lock pyFFTW's loader holds, and only by the thread that
builds a run.  The library is found among the process's loaded objects
(Linux ``/proc/self/maps``); anywhere else :func:`row_plans` says None and
the steps go through pyFFTW's calls as before.
"""
from __future__ import annotations

import ctypes
import os
import threading
import weakref

import numpy as np

__all__ = ["RowPlans", "row_plans"]

# FFTW's flags (fftw3.h)
FFTW_FORWARD, FFTW_BACKWARD = -1, 1
FFTW_MEASURE, FFTW_DESTROY_INPUT, FFTW_UNALIGNED, FFTW_WISDOM_ONLY = 0, 1, 2, 1 << 21

# reentrant: a plan destroyed by the garbage collector (weakref.finalize) may take it inside a
# planning block of the same thread
_lock = threading.RLock()
_library = None   # (the double-precision library, its plan_with_nthreads or None), once found
_searched = False


class RowPlans:
    """In-place forward and backward FFTW plans of one row of ``n`` points:
    ``execute``, ``forward`` and ``backward`` are addresses (integers) for
    a compiled loop; ``learnt`` says whether planning measured a transform
    the process's wisdom did not hold.  The plans are destroyed with this
    object."""

    def __init__(self, lib, n: int, row: np.ndarray, aligned: bool, nthreads):
        vp = ctypes.c_void_p
        lib.fftw_plan_dft_1d.restype = vp
        lib.fftw_plan_dft_1d.argtypes = [ctypes.c_int, vp, vp, ctypes.c_int, ctypes.c_uint]
        lib.fftw_destroy_plan.argtypes = [vp]
        lib.fftw_destroy_plan.restype = None
        saved = row.copy()       # planning overwrites the row
        flags = FFTW_MEASURE | FFTW_DESTROY_INPUT | (0 if aligned else FFTW_UNALIGNED)
        plans, self.learnt = [], False
        with _lock:
            if nthreads is not None:
                nthreads(1)      # pyFFTW sets the planner's thread count for each plan of its own
            for sign in (FFTW_FORWARD, FFTW_BACKWARD):
                p = lib.fftw_plan_dft_1d(n, row.ctypes.data, row.ctypes.data, sign, flags | FFTW_WISDOM_ONLY)
                if not p:
                    p = lib.fftw_plan_dft_1d(n, row.ctypes.data, row.ctypes.data, sign, flags)
                    self.learnt = True
                plans.append(p)
        np.copyto(row, saved)
        if not all(plans):
            raise RuntimeError("FFTW made no plan")
        self.forward, self.backward = plans
        self.execute = ctypes.cast(lib.fftw_execute_dft, ctypes.c_void_p).value
        weakref.finalize(self, _destroy, lib, tuple(plans))


def _destroy(lib, plans) -> None:
    with _lock:
        for p in plans:
            lib.fftw_destroy_plan(p)


def _loaded_objects() -> list[str]:
    try:
        with open("/proc/self/maps") as f:
            return sorted({line.split()[-1] for line in f if ".so" in line and "/" in line})
    except OSError:
        return []


def _find_library():
    """FFTW's double-precision library as pyFFTW loaded it, and the
    planner's thread-count setter of its threads library (None if none)."""
    global _library, _searched
    with _lock:
        if _searched:
            return _library
        _searched = True
        paths = _loaded_objects()

        def named(stem):
            return [p for p in paths if os.path.basename(p).startswith(stem)]

        plain = [p for p in named("libfftw3") if os.path.basename(p).split(".")[0].split("-")[0] == "libfftw3"]
        if not plain:
            return None
        try:
            lib = ctypes.CDLL(plain[0])
            lib.fftw_execute_dft, lib.fftw_plan_dft_1d, lib.fftw_destroy_plan, lib.fftw_alignment_of
        except (OSError, AttributeError):
            return None
        nthreads = None
        for path in named("libfftw3_omp") + named("libfftw3_threads"):
            try:
                setter = ctypes.CDLL(path).fftw_plan_with_nthreads
            except (OSError, AttributeError):
                continue
            setter.argtypes, setter.restype = [ctypes.c_int], None
            nthreads = setter
            break
        lib.fftw_alignment_of.argtypes, lib.fftw_alignment_of.restype = [ctypes.c_void_p], ctypes.c_int
        _library = (lib, nthreads)
        return _library


def row_plans(buffer: np.ndarray) -> RowPlans | None:
    """Plans of one row of ``buffer`` (complex128, shape (n,) or (rows,
    n), C-contiguous; pyFFTW imported), or None where FFTW's library
    cannot be reached this way."""
    if buffer.dtype != np.complex128 or not buffer.flags.c_contiguous or buffer.ndim not in (1, 2):
        return None
    found = _find_library()
    if found is None:
        return None
    lib, nthreads = found
    rows = buffer.reshape(-1, buffer.shape[-1])
    first = lib.fftw_alignment_of(rows[0].ctypes.data)
    aligned = all(lib.fftw_alignment_of(r.ctypes.data) == first for r in rows[1:])
    try:
        return RowPlans(lib, rows.shape[1], rows[0], aligned, nthreads)
    except RuntimeError:
        return None
