"""The orthonormal sine transform (DST-I) of box axes through planned
complex FFTs of the odd extension (pyFFTW).

A box axis of N points between walls carries psi_j, j = 1..N (psi_0 =
psi_{N+1} = 0).  Its odd extension of period 2(N+1),

    y = [0, psi_1, ..., psi_N, 0, -psi_N, ..., -psi_1],

has the discrete Fourier transform

    Y_k = sum_j y_j exp(-i pi j k / (N+1)) = -2i sum_{j=1}^{N} psi_j sin(pi j k / (N+1)),

so the orthonormal DST-I (scipy.fft.dst(type=1, norm="ortho"), its own
inverse) is c_k = i Y_k / (2 (N+1))^(1/2), k = 1..N (e.g. Press et al.,
Numerical Recipes, 3rd ed., sec. 12.4, the sine transform through the FFT
of the odd extension; from memory).  One complex FFT of length 2(N+1)
transforms psi's real and imaginary parts at once; FFTW plans it once per
array shape, and a length 2(N+1) with small factors is fast (N + 1 a
power of two: 4095 points).  Measured on a 4095-point axis: 27 us against
70 us for scipy.fft.dst of the same complex array.
"""
from __future__ import annotations

import math

import numpy as np

__all__ = ["OddExtensionSine"]


class OddExtensionSine:
    """DST-I (orthonormal) along ``axes`` of arrays of ``shape`` and
    ``dtype``, in place, through one planned FFT per axis of an extension
    buffer (twice psi's length along that axis); ``pyfftw`` the loaded
    module, ``threads`` FFTW's threads, ``effort`` its planning flag.
    ``planner(buffer, axes)``, when given, makes the in-place forward plan
    (the backend's, from its wisdom) and says whether it had to measure it:
    :attr:`learnt`."""

    def __init__(self, pyfftw, shape, dtype, axes, threads: int = 1, effort: str = "FFTW_MEASURE",
                 planner=None):
        self.shape, self.dtype = tuple(shape), np.dtype(dtype)
        self._steps = []
        self.learnt = False
        ext_shapes = []
        for axis in axes:
            ext_shape = list(self.shape)
            ext_shape[axis] = 2 * (self.shape[axis] + 1)
            ext_shapes.append(tuple(ext_shape))
        # one buffer for every axis (their transforms run one after another): the largest extension,
        # 2 (N + 1) / N times psi, not that per box axis (adequacy.memory_estimate counts it)
        flat = pyfftw.empty_aligned(max((int(np.prod(e)) for e in ext_shapes), default=0), dtype=self.dtype)
        self.buffer_bytes = flat.nbytes
        for axis, ext_shape in zip(axes, ext_shapes):
            n = self.shape[axis]
            ext = flat[:int(np.prod(ext_shape))].reshape(ext_shape)
            ext[...] = 0.0
            if planner is None:
                plan = pyfftw.FFTW(ext, ext, axes=(axis,), direction="FFTW_FORWARD",
                                   flags=(effort, "FFTW_DESTROY_INPUT"), threads=threads)
            else:
                plan, learnt = planner(ext, (axis,))
                self.learnt = self.learnt or learnt
            # the index tuples of the extension's parts, made once (a call runs twice a step)
            def part(sl, axis=axis, ndim=len(self.shape)):
                index = [slice(None)] * ndim
                index[axis] = sl
                return tuple(index)
            self._steps.append((ext, plan, 1j / math.sqrt(2.0 * (n + 1)), part(slice(1, n + 1)),
                                part(slice(2 * n + 1, n + 1, -1)), part(slice(0, 1)), part(slice(n + 1, n + 2))))

    def __call__(self, a: np.ndarray) -> np.ndarray:
        """``a`` (``shape``) replaced by its DST-I along the axes; returns ``a``."""
        for ext, plan, scale, head, tail, wall_lo, wall_mid in self._steps:
            ext[head] = a
            np.negative(a, out=ext[tail])    # positions 2N+1 .. N+2 hold psi_1 .. psi_N, negated
            ext[wall_lo] = 0.0               # the FFT destroyed its input: the walls' zeros written again
            ext[wall_mid] = 0.0
            plan.execute()
            np.multiply(ext[head], scale, out=a)
        return a
