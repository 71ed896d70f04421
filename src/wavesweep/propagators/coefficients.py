"""Splitting coefficients as data.

A symmetric composition method is a tuple of Strang sub-step weights
``w_1..w_s`` (fractions of dt) that sum to one and read the same backwards.

* ``STRANG``: (1,) -- Strang (1968), second order.
* ``YOSHIDA4``: the triple jump w1 = 1/(2 - 2^(1/3)), w0 = -2^(1/3) w1,
  (w1, w0, w1) -- H. Yoshida, Phys. Lett. A 150, 262 (1990); fourth order.
* ``SUZUKI4``: five stages (p, p, 1 - 4p, p, p), p = 1/(4 - 4^(1/3)) --
  M. Suzuki, Phys. Lett. A 146, 319 (1990); fourth order with a smaller
  error constant than the triple jump, at 5 FFT pairs per step.
"""
from __future__ import annotations

_CBRT2 = 2.0 ** (1.0 / 3.0)
_W1 = 1.0 / (2.0 - _CBRT2)
_P = 1.0 / (4.0 - 4.0 ** (1.0 / 3.0))

STRANG = (1.0,)
YOSHIDA4 = (_W1, -_CBRT2 * _W1, _W1)
SUZUKI4 = (_P, _P, 1.0 - 4.0 * _P, _P, _P)
