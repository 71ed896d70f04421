"""The DST-I through the FFT of the odd extension against scipy.fft.dstn
(type 1, norm="ortho": a general-purpose reference implementation), in
double and single precision, along one or two axes of 1D-4D arrays."""
from __future__ import annotations

import numpy as np
import pytest
import scipy.fft

pyfftw = pytest.importorskip("pyfftw")

from wavesweep.sine_transform import OddExtensionSine  # noqa: E402


@pytest.mark.parametrize("shape, axes", [((4095,), (0,)), ((100,), (0,)), ((63, 80), (0,)), ((63, 80), (0, 1)),
                                         ((4, 31, 47), (1, 2)), ((2, 5, 6, 7), (1, 3))])
@pytest.mark.parametrize("dtype, tol", [(np.complex128, 1e-14), (np.complex64, 1e-6)])
def test_the_odd_extension_gives_scipys_orthonormal_dst(shape, axes, dtype, tol):
    rng = np.random.default_rng(len(shape) * 7 + len(axes))
    a = (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)).astype(dtype)
    reference = scipy.fft.dstn(a.astype(np.complex128), type=1, axes=axes, norm="ortho")
    transform = OddExtensionSine(pyfftw, shape, dtype, axes, effort="FFTW_ESTIMATE")
    out = transform(a.copy())
    assert np.abs(out - reference).max() <= tol * np.abs(reference).max()
    # its own inverse, twice in a row on the same buffers (the planned FFT destroys its input)
    again = transform(transform(a.copy()))
    assert np.abs(again - a).max() <= 10 * tol * np.abs(a).max()
