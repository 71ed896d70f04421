"""Numba kernels: pure functions of arrays and scalars, no orchestration.

Arrays are handled as 4D views ``(member, i, j, k)`` (:func:`view4`: a
batch of states, a 1D or 2D grid padded with leading length-1 axes), so
one kernel serves every dimension and batches alike.
"""
from .observe import ObserveKernels, density_of, observe_kernels_for
from .split import KernelSet, as3d, kernels_for, real_matvec, view4

__all__ = ["view4", "as3d", "KernelSet", "kernels_for", "real_matvec", "ObserveKernels",
           "observe_kernels_for", "density_of"]
