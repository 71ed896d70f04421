"""FFTW's own plans of one row, for a compiled stepping loop.

A split-operator step of a 1D grid is two FFTs and two multiplications of a
few thousand points; through Python each call costs ~1 us, and a 2048-point
step spent a third of its time between calls.  A numba loop can call FFTW
itself: :func:`row_plans` gives in-place forward and backward plans of one
row (``n`` complex128 or complex64 points) made with FFTW's C interface in
the very library pyFFTW loaded (so the process's wisdom serves them), and
the addresses of the plans and of ``fftw_execute_dft`` (``fftwf_`` in
single precision: FFTW's new-array execute, safe to call from several
threads at once).  The loop (:func:`wavesweep.kernels.steps.strang_rows`)
runs every row of a batch through the same two plans, one member at a time
while its row is in cache.

FFTW's rule for executing a plan on other arrays is that they have the
alignment the plan was made for; rows that do not share one alignment get
plans made with FFTW_UNALIGNED.

FFTW's planner is not thread-safe: two threads planning (or one planning
while another destroys a plan) corrupt its heap.  pyFFTW serialises its own
plans with a lock Python cannot reach, so these plans are kept out of its
way: they are made only by the main thread (where the runs of a worker
process, and a batch's lanes, are built; a Dask worker's task threads take
the plain calls), under :data:`PLANNER_LOCK`, which wavesweep's own pyFFTW
planning takes too (:func:`wavesweep.fft._plan`), and they are made once
per process and kind (precision, length, alignment, effort) and never
destroyed.  The library is found among the process's loaded objects (Linux
``/proc/self/maps``); anywhere else :func:`row_plans` says None and the
steps go through pyFFTW's calls.
"""
from __future__ import annotations

import ctypes
import os
import sys
import threading

import numpy as np

__all__ = ["RowPlans", "row_plans", "PLANNER_LOCK"]

# FFTW's flags (fftw3.h)
FFTW_FORWARD, FFTW_BACKWARD = -1, 1
FFTW_DESTROY_INPUT, FFTW_UNALIGNED, FFTW_WISDOM_ONLY = 1, 2, 1 << 21
EFFORTS = {"FFTW_ESTIMATE": 1 << 6, "FFTW_MEASURE": 0, "FFTW_PATIENT": 1 << 5, "FFTW_EXHAUSTIVE": 1 << 3}

# Every FFTW planning wavesweep does, through pyFFTW or here, holds this lock
# (reentrant: fft._plan may be entered with it held).
PLANNER_LOCK = threading.RLock()
# per precision ("fftw" double, "fftwf" single): (the library, its planner's thread-count setter or None)
_libraries: dict = {}
# (precision, n, effort, alignment or None for unaligned) -> RowPlans, for the life of the process
_plans: dict = {}


class RowPlans:
    """In-place forward and backward FFTW plans of one row of ``n`` points:
    ``execute``, ``forward`` and ``backward`` are addresses (integers) for
    a compiled loop; ``learnt`` says whether planning measured a transform
    the process's wisdom did not hold.  ``prefix``: "fftw" (complex128) or
    "fftwf" (complex64).  Kept for the life of the process (see the module
    notes: destroying a plan is planning too)."""

    def __init__(self, lib, prefix: str, n: int, row: np.ndarray, flags: int, nthreads):
        vp = ctypes.c_void_p
        plan = getattr(lib, f"{prefix}_plan_dft_1d")
        plan.restype = vp
        plan.argtypes = [ctypes.c_int, vp, vp, ctypes.c_int, ctypes.c_uint]
        saved = row.copy()       # planning overwrites the row
        plans, self.learnt = [], False
        if nthreads is not None:
            nthreads(1)          # pyFFTW sets the planner's thread count for each plan of its own
        for sign in (FFTW_FORWARD, FFTW_BACKWARD):
            p = plan(n, row.ctypes.data, row.ctypes.data, sign, flags | FFTW_WISDOM_ONLY)
            if not p:
                p = plan(n, row.ctypes.data, row.ctypes.data, sign, flags)
                self.learnt = True
            plans.append(p)
        np.copyto(row, saved)
        if not all(plans):       # (FFTW makes a plan of any length: not seen)
            destroy = getattr(lib, f"{prefix}_destroy_plan")
            destroy.argtypes, destroy.restype = [vp], None
            for p in plans:
                if p:
                    destroy(p)
            raise RuntimeError("FFTW made no plan")
        self.forward, self.backward = plans
        self.execute = ctypes.cast(getattr(lib, f"{prefix}_execute_dft"), ctypes.c_void_p).value


def _loaded_objects() -> list[str]:
    try:
        with open("/proc/self/maps") as f:
            return sorted({line.split()[-1] for line in f if ".so" in line and "/" in line})
    except OSError:
        return []


def _find_library(prefix: str):
    """FFTW's library of one precision (``prefix`` "fftw": libfftw3,
    "fftwf": libfftw3f) as pyFFTW loaded it, and the planner's thread-count
    setter of its threads library (None if none); None if not found (and
    not remembered unless pyFFTW is loaded: it may load the library later)."""
    if prefix in _libraries:
        return _libraries[prefix]
    stem = "libfftw3" + prefix[4:]      # libfftw3, libfftw3f
    paths = _loaded_objects()

    def named(start):
        return [p for p in paths if os.path.basename(p).split(".")[0].split("-")[0] == start]

    found = None
    plain = named(stem)
    if plain:
        try:
            lib = ctypes.CDLL(plain[0])
            for name in ("execute_dft", "plan_dft_1d", "destroy_plan", "alignment_of"):
                getattr(lib, f"{prefix}_{name}")
        except (OSError, AttributeError):
            lib = None
        if lib is not None:
            nthreads = None
            for path in named(stem + "_omp") + named(stem + "_threads"):
                try:
                    setter = getattr(ctypes.CDLL(path), f"{prefix}_plan_with_nthreads")
                except (OSError, AttributeError):
                    continue
                setter.argtypes, setter.restype = [ctypes.c_int], None
                nthreads = setter
                break
            align = getattr(lib, f"{prefix}_alignment_of")
            align.argtypes, align.restype = [ctypes.c_void_p], ctypes.c_int
            found = (lib, nthreads)
    if found is not None or "pyfftw" in sys.modules:
        _libraries[prefix] = found
    return found


_PREFIX = {np.dtype(np.complex128): "fftw", np.dtype(np.complex64): "fftwf"}


def row_plans(buffer: np.ndarray, effort: str = "FFTW_MEASURE") -> RowPlans | None:
    """Plans of one row of ``buffer`` (complex128 or complex64, shape (n,)
    or (rows, n), C-contiguous; pyFFTW loaded), made with ``effort``, or
    None: where FFTW's library cannot be reached this way, or when called
    from a thread other than the main one (see the module notes)."""
    prefix = _PREFIX.get(buffer.dtype)
    if (prefix is None or not buffer.flags.c_contiguous or buffer.ndim not in (1, 2) or effort not in EFFORTS
            or threading.current_thread() is not threading.main_thread()):
        return None
    with PLANNER_LOCK:
        found = _find_library(prefix)
        if found is None:
            return None
        lib, nthreads = found
        align = getattr(lib, f"{prefix}_alignment_of")
        rows = buffer.reshape(-1, buffer.shape[-1])
        first = align(rows[0].ctypes.data)
        aligned = all(align(r.ctypes.data) == first for r in rows[1:])
        key = (prefix, rows.shape[1], effort, first if aligned else None)
        plans = _plans.get(key)
        if plans is None:
            flags = EFFORTS[effort] | FFTW_DESTROY_INPUT | (0 if aligned else FFTW_UNALIGNED)
            try:
                plans = RowPlans(lib, prefix, rows.shape[1], rows[0], flags, nthreads)
            except RuntimeError:
                return None
            _plans[key] = plans
        return plans
