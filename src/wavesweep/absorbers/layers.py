"""Absorbing layers at grid faces and the per-face bookkeeping.

Two shapes, both expressed as an amplitude decay *rate* W(r) >= 0 (hartree):
the propagator multiplies psi by exp(-W delta) for a kick of length delta
(hbar = 1), so probability decays at 2W.

* ``cap``: power-law complex absorbing potential -i W, W = strength (s/d)^n,
  s the depth into a layer of thickness d (e.g. Riss & Meyer, J. Phys. B 26,
  4503 (1993) for the power-law form).  The strength, unless given, is tuned
  so that the return probability (reflection plus what survives the round
  trip) over the packet's energy window is smallest (see :mod:`.tuning`).
* ``mask``: a multiplicative mask applied once per step,
  M(s) = cos(pi s / 2d)^(1/8) (a common-practice profile), written as the
  equivalent rate W = -ln M / dt so that both shapes share one code path.

Where layers of two faces overlap (corners in 2D/3D), a point's loss is
shared between the faces in proportion to their rates, so the sum over faces
is exactly the probability removed.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import JobError

__all__ = ["Absorber", "FaceLayer", "face_names"]


def face_names(grid) -> list[str]:
    """Faces a grid has: ``x-``, ``x+``, ... (a radial grid only ``r+``)."""
    if grid.radial:
        return ["r+"]
    return [f"{a.name}{side}" for a in grid.axes for side in "-+"]


@dataclass
class FaceLayer:
    """One face's layer: its slab of the grid and its own rate there."""

    name: str
    axis: int
    slab: tuple            # index tuple selecting the slab from the full grid
    rate: np.ndarray       # W_face on the slab, broadcastable (hartree)


class Absorber:
    """Absorbing layers of a run (atomic units).

    Parameters
    ----------
    grid : Grid
    kind : ``"cap"``, ``"mask"`` or ``"none"``
    thickness : layer thickness (bohr)
    faces : face names to cover (default: all of the grid's faces)
    strength : CAP strength (hartree): one number, one per grid axis, or a
        dict by face name (required here; tuning happens upstream)
    power : CAP exponent n
    dt : time step (atomic units), needed by ``mask``
    mask_exponent : exponent of the cosine mask (default 1/8)
    """

    def __init__(self, grid, kind="none", thickness=0.0, faces=None, strength=None, power=2.0,
                 dt=None, mask_exponent=0.125):
        self.grid = grid
        self.kind = kind
        self.faces = list(faces) if faces is not None else (face_names(grid) if kind != "none" else [])
        self.thickness = float(thickness)
        self.layers: list[FaceLayer] = []
        self.rate = None
        if kind == "none" or not self.faces:
            self.kind = "none"
            return
        total = np.zeros(grid.shape)
        for face in self.faces:
            name, side = face[:-1], face[-1]
            i = grid.axis_index(name)
            ax = grid.axes[i]
            x = ax.coordinates
            if side == "+":
                depth = x - (ax.max - self.thickness)
            else:
                depth = (ax.min + self.thickness) - x
            inside = np.nonzero(depth > 0)[0]
            if inside.size == 0:
                continue
            s = depth[inside] / self.thickness
            if kind == "cap":
                if isinstance(strength, dict):
                    value = strength.get(face, 0.0)
                elif isinstance(strength, (list, tuple)):
                    value = strength[i]
                else:
                    value = strength
                w = value * s**power
            else:
                m = np.cos(0.5 * np.pi * np.clip(s, 0.0, 1.0)) ** mask_exponent
                w = -np.log(np.maximum(m, 1e-300)) / dt
            shape = [1] * grid.ndim
            shape[i] = inside.size
            w = w.reshape(shape)
            slab = [slice(None)] * grid.ndim
            slab[i] = slice(int(inside[0]), int(inside[-1]) + 1)
            slab = tuple(slab)
            total[slab] += w
            self.layers.append(FaceLayer(face, i, slab, w))
        self.rate = total
        self._total = total

    @property
    def active(self) -> bool:
        return self.rate is not None

    def loss_weights(self, delta: float) -> list[np.ndarray]:
        """Per face, on its slab: the fraction of |psi|^2 a kick of length
        ``delta`` removes there and books to that face:
        (1 - exp(-2 W_total delta)) W_face / W_total."""
        out = []
        for layer in self.layers:
            wt = self._total[layer.slab]
            share = np.divide(np.broadcast_to(layer.rate, wt.shape), wt,
                              out=np.zeros(wt.shape), where=wt > 0)
            out.append(np.ascontiguousarray(-np.expm1(-2.0 * wt * delta) * share))
        return out


def check_faces(grid, faces, field="absorber.faces") -> list[str]:
    allowed = face_names(grid)
    for f in faces:
        if f not in allowed:
            raise JobError(field, f"{f!r} is not a face of this grid; faces: {', '.join(allowed)}")
    return list(faces)
