"""Numba kernels: pure functions of arrays and scalars, no orchestration.

Arrays are handled as 3D views (a 1D or 2D grid is padded with length-1
axes by :func:`as3d`), so one kernel serves every dimension.
"""
from .split import abs2_weighted_sum, as3d, kick_general, kick_separable, multiply_inplace, real_matvec

__all__ = ["as3d", "multiply_inplace", "kick_separable", "kick_general", "abs2_weighted_sum",
           "real_matvec"]
