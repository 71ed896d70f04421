"""Array views for the kernels: numpy only, so that the code preparing the
kernels' arguments can be imported without numba (see the package notes)."""
from __future__ import annotations

import numpy as np

__all__ = ["view4", "as3d"]


def view4(a: np.ndarray, ndim: int) -> np.ndarray:
    """A no-copy 4D view ``(members, i, j, k)`` of an array shaped like the
    grid (``ndim`` axes), optionally after one leading member axis."""
    lead = a.ndim - ndim
    if lead not in (0, 1):
        raise ValueError(f"array of shape {a.shape} is not a grid of {ndim} axes or a batch of them")
    members = a.shape[0] if lead else 1
    return a.reshape((members,) + (1,) * (3 - ndim) + a.shape[lead:])


def as3d(a: np.ndarray) -> np.ndarray:
    """A view of a 1D/2D/3D array as 3D with leading length-1 axes; no copy."""
    if a.ndim == 3:
        return a
    return a.reshape((1,) * (3 - a.ndim) + a.shape)
