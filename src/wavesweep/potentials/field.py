"""A driving electric field in the length gauge: V(r, t) = -q E(t) x_axis.

E(t) = amplitude * envelope(t) * cos(omega (t - start) + phase), with the
particle's charge q (units of e) from ``particle.charge``.  ``omega`` has no
default: a field without it was silently a zero-frequency pulse (issue 12);
a static field says ``omega = 0``.  The term is
separable, V = f(t) g(r) with g = -q x and f = E(t), so the propagator
evaluates the grid part once and only the scalar E(t) per step (at the middle
of each step, for second order).
"""
from __future__ import annotations

import math

import numpy as np

from ..errors import JobError
from ..schema import Field
from .base import PotentialTerm, register

ENVELOPES = ("constant", "sin2", "trapezoid", "gaussian")


@register
class DrivingField(PotentialTerm):
    kind = "field"
    time_dependent = True
    uniform_force = True
    summary = ("electric field along `axis`, V = -q E(t) x, E(t) = amplitude envelope(t) "
               "cos(omega (t - start) + phase)")
    formula = "\n".join((
        "V(r, t) = -q * E(t) * x  (length gauge; q = particle.charge in units of e, x the "
        "coordinate along `axis`; the force is q E(t) along +x)",
        "E(t) = amplitude * envelope(t) * cos(omega (t - start) + phase)  (the carrier has phase "
        "`phase` at t = start: phase = 0 is a cosine at its crest; omega = 0 is a static field "
        "amplitude * cos(phase) under the envelope)",
        "envelope(t), s = t - start:",
        "  constant:  1 for s >= 0; 0 again for s > duration if duration is given",
        "  sin2:      sin^2(pi s / duration) for 0 <= s <= duration, else 0",
        "  trapezoid: min(1, s / ramp, (duration - s) / ramp) for 0 <= s <= duration, else 0",
        "  gaussian:  exp(-2 ln 2 ((t - peak) / fwhm)^2), fwhm that of the intensity E^2; never "
        "cut off (start only sets the carrier's time origin)",
        "duration spans the whole pulse, from start to the end of the switch-off (both ramps "
        "of a trapezoid included).  The propagator takes E(t) at the middle of each (sub)step.  "
        "amplitude is in [units] energy/(charge*length), e.g. meV/(e nm) with meV and nm.",
    ))
    parameters = {
        "amplitude": Field("electric_field", doc="peak field strength E0"),
        "omega": Field("frequency", nonnegative=True,
                       doc="carrier angular frequency (0 for a static field)"),
        "phase": Field("number", 0.0, physics=True, doc="carrier phase at t = start (rad)"),
        "envelope": Field("str", "sin2", choices=ENVELOPES, physics=True,
                          doc="pulse shape: constant, sin2, trapezoid or gaussian"),
        "start": Field("time", 0.0, physics=True, doc="switch-on time (the carrier's time origin)"),
        "duration": Field("time", None, positive=True,
                          doc="total length of a sin2/trapezoid pulse; constant: optional switch-off"),
        "ramp": Field("time", None, positive=True, doc="trapezoid rise and fall time"),
        "fwhm": Field("time", None, positive=True, doc="gaussian: FWHM of the intensity"),
        "peak": Field("time", None, doc="gaussian: time of the envelope maximum"),
        "axis": Field("str", None, "polarisation axis (default: the first)"),
    }

    def validate(self):
        f = self.ctx.field
        if self.ctx.charge is None:
            raise JobError("particle.charge", "required by the driving field term "
                           f"({f}); give the particle's charge in units of e, e.g. -1 for an electron")
        if self.ctx.grid.radial:
            raise JobError(f"{f}.kind", "a linearly polarised field breaks spherical symmetry; "
                                        "use a Cartesian grid")
        env = self.p["envelope"]
        need = {"sin2": ("duration",), "trapezoid": ("duration", "ramp"), "gaussian": ("fwhm", "peak")}
        for key in need.get(env, ()):
            if self.p.get(key) is None:
                raise JobError(f"{f}.{key}", f"required by envelope = {env!r}")
        if env == "trapezoid" and 2 * self.p["ramp"] > self.p["duration"]:
            raise JobError(f"{f}.ramp", "two ramps must fit in the duration")

    def envelope(self, t: float) -> float:
        p, env = self.p, self.p["envelope"]
        s = t - p["start"]
        if env == "gaussian":
            return math.exp(-2.0 * math.log(2.0) * ((t - p["peak"]) / p["fwhm"]) ** 2)
        if s < 0:
            return 0.0
        dur = p.get("duration")
        if env == "constant":
            return 1.0 if dur is None or s <= dur else 0.0
        if s > dur:
            return 0.0
        if env == "sin2":
            return math.sin(math.pi * s / dur) ** 2
        ramp = p["ramp"]  # trapezoid
        return min(1.0, s / ramp, (dur - s) / ramp)

    def electric_field(self, t: float) -> float:
        """E(t) in atomic units (hartree / (e bohr))."""
        p = self.p
        return p["amplitude"] * self.envelope(t) * math.cos(p["omega"] * (t - p["start"]) + p["phase"])

    def spatial(self, mesh) -> np.ndarray:
        return -self.ctx.charge * mesh[self.ctx.grid.names[self.axis_of()]]

    def separable(self):
        return self.spatial, self.electric_field

    def force_at(self, t: float) -> np.ndarray:
        """q E(t) along the field's axis (hartree/bohr)."""
        out = np.zeros(self.ctx.grid.ndim)
        out[self.axis_of()] = self.ctx.charge * self.electric_field(t)
        return out

    def at_time(self, mesh, t):
        return self.electric_field(t) * self.spatial(mesh)

    def static(self, mesh):
        return np.zeros(())
