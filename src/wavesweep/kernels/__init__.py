"""Numba kernels: pure functions of arrays and scalars, no orchestration.

Arrays are handled as 4D views ``(member, i, j, k)`` (:func:`view4`: a
batch of states, a 1D or 2D grid padded with leading length-1 axes), so
one kernel serves every dimension and batches alike.

The kernel modules (:mod:`.split`, :mod:`.observe`) import numba, 0.12-0.17 s
per process; they are loaded on the first access to one of their names
(PEP 562), so importing this package, or a module that prepares kernel
arguments with :func:`view4`, costs no numba import: a process that never
steps (check, submit, analysis) never pays it.  Callers fetch the kernels
once per run (``kernels_for``, ``observe_kernels_for``), not per step.
"""
import importlib

from .views import as3d, view4

_LAZY = {"KernelSet": ".split", "kernels_for": ".split", "real_matvec": ".split",
         "ObserveKernels": ".observe", "observe_kernels_for": ".observe", "density_of": ".observe"}

__all__ = ["view4", "as3d", "KernelSet", "kernels_for", "real_matvec", "ObserveKernels",
           "observe_kernels_for", "density_of"]


def __getattr__(name):
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(module, __name__), name)
    globals()[name] = value   # later look-ups are plain attribute reads
    return value


def __dir__():
    return sorted(set(globals()) | set(_LAZY))
