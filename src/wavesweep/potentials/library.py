"""The named potential kinds.  Every formula is in atomic units (hartree, bohr).

Terms that act along one direction take ``axis`` (default: the first axis);
terms with a centre take one value per axis in 2D/3D.
"""
from __future__ import annotations

import numpy as np
import scipy.constants as sc

from ..errors import JobError
from ..schema import Field
from .base import PotentialTerm, register

_AXIS = Field("str", None, "axis the term varies along (default: the first)")

# How every term with sharp edges (step, barrier, double_barrier) samples them.
EDGES = ("Edges: smoothing = 0 makes them sharp and cell-averaged: a grid point takes the "
         "fraction of its cell [x - dx/2, x + dx/2] that lies inside, so the feature keeps its "
         "width and area on any grid; smoothing > 0 makes each edge S(s) = (1 + tanh(s / "
         "smoothing)) / 2, s the signed distance past the edge.")


def _center(doc: str = "centre", per_axis: bool = False) -> Field:
    return Field("length", 0.0, per_axis=per_axis, physics=True, doc=doc)


def _smoothing() -> Field:
    return Field("length", 0.0, nonnegative=True, physics=True,
                 doc="edge length of the tanh profile (0: sharp, cell-averaged edges)")


def _along(term: PotentialTerm, mesh) -> np.ndarray:
    i = term.axis_of()
    return mesh[term.ctx.grid.names[i]]


def _sharp_or_smooth(s: np.ndarray, smoothing: float, dx: float = 0.0) -> np.ndarray:
    """(1 + tanh(s/smoothing))/2 with a smoothing length; without, the
    Heaviside step averaged over the grid cell of width ``dx`` around each
    point (``dx`` = 0: the bare step)."""
    if smoothing > 0:
        return 0.5 * (1.0 + np.tanh(s / smoothing))
    if dx > 0:
        return np.clip(0.5 + s / dx, 0.0, 1.0)
    return (s >= 0).astype(float)


def _cell_overlap(x: np.ndarray, lo: float, hi: float, dx: float) -> np.ndarray:
    """Fraction of the cell [x - dx/2, x + dx/2] inside [lo, hi].

    A sharp edge is represented by the cell averages of its indicator: the
    sampled barrier then has its nominal width and area on any grid, where
    point samples made it a whole number of cells wide (a 2 nm barrier on a
    0.29 nm grid became 2.05 nm and T came out 13 % low; review finding)."""
    return np.clip((np.minimum(x + dx / 2, hi) - np.maximum(x - dx / 2, lo)) / dx, 0.0, 1.0)


def _cell(term) -> float:
    return float(term.ctx.grid.axes[term.axis_of()].dx)


def _radius2(term, mesh, center) -> np.ndarray:
    r2 = 0.0
    for name, c in zip(term.ctx.grid.names, center):
        r2 = r2 + (mesh[name] - c) ** 2
    return r2


@register
class Free(PotentialTerm):
    kind = "free"
    summary = "V = 0"
    formula = "V(r) = 0 (a free particle; the default when a job has no [[potential]])"
    parameters = {}

    def static(self, mesh):
        return np.zeros(())


@register
class Step(PotentialTerm):
    kind = "step"
    summary = "V = height for x >= position (optionally smoothed over `smoothing`)"
    formula = ("V(x) = height * Theta(x - position), x the coordinate along `axis`: 0 below "
               "position, height above.\n" + EDGES)
    parameters = {
        "height": Field("energy", doc="step height (V beyond position)"),
        "position": Field("length", 0.0, physics=True, doc="where the step is"),
        "smoothing": _smoothing(),
        "axis": _AXIS,
    }

    def static(self, mesh):
        x = _along(self, mesh)
        return self.p["height"] * _sharp_or_smooth(x - self.p["position"], self.p["smoothing"], _cell(self))


@register
class Barrier(PotentialTerm):
    kind = "barrier"
    summary = "rectangular barrier: V = height for |x - center| < width/2 (edges cell-averaged)"
    formula = ("V(x) = height for |x - center| < width / 2, else 0; x along `axis`.  With "
               "smoothing > 0: V = height * S(x - center + width/2) * S(center + width/2 - x).\n"
               + EDGES)
    parameters = {
        "height": Field("energy", doc="barrier height (negative for a well)"),
        "width": Field("length", doc="full width", positive=True),
        "center": _center("centre of the barrier"),
        "smoothing": _smoothing(),
        "axis": _AXIS,
    }

    def static(self, mesh):
        x = _along(self, mesh) - self.p["center"]
        half, s = self.p["width"] / 2, self.p["smoothing"]
        if s > 0:
            return self.p["height"] * _sharp_or_smooth(x + half, s) * _sharp_or_smooth(half - x, s)
        return self.p["height"] * _cell_overlap(x, -half, half, _cell(self))


@register
class DoubleBarrier(PotentialTerm):
    kind = "double_barrier"
    summary = "two rectangular barriers of `width` with a `gap` between their inner edges"
    formula = ("V(x) = height for gap/2 < |x - center| < gap/2 + width, else 0; x along `axis` "
               "(two barriers of `width`, a well of `gap` between them).  With smoothing > 0: "
               "V = height * S(u - gap/2) * S(gap/2 + width - u), u = |x - center|.\n" + EDGES)
    parameters = {
        "height": Field("energy", doc="height of both barriers"),
        "width": Field("length", positive=True, doc="width of each barrier"),
        "gap": Field("length", positive=True, doc="distance between the inner edges"),
        "center": _center("midpoint of the gap"),
        "smoothing": _smoothing(),
        "axis": _AXIS,
    }

    def static(self, mesh):
        xs = _along(self, mesh) - self.p["center"]
        x = np.abs(xs)
        inner, outer, s = self.p["gap"] / 2, self.p["gap"] / 2 + self.p["width"], self.p["smoothing"]
        if s > 0:
            return self.p["height"] * _sharp_or_smooth(x - inner, s) * _sharp_or_smooth(outer - x, s)
        dx = _cell(self)
        return self.p["height"] * (_cell_overlap(xs, inner, outer, dx) + _cell_overlap(xs, -outer, -inner, dx))


@register
class Gaussian(PotentialTerm):
    kind = "gaussian"
    summary = "V = height exp(-|r - center|^2 / (2 width^2)); width is a standard deviation"
    formula = ("V(r) = height * exp(-sum_i (x_i - center_i)^2 / (2 width_i^2)), the sum over the "
               "grid's axes; width is the standard deviation (FWHM = 2.355 width)")
    parameters = {
        "height": Field("energy", doc="peak value (negative for a well)"),
        "width": Field("length", per_axis=True, positive=True, doc="standard deviation along each axis"),
        "center": _center("position of the peak", per_axis=True),
    }

    def static(self, mesh):
        names = self.ctx.grid.names
        arg = 0.0
        for name, c, w in zip(names, _each(self.p["center"], len(names)), _each(self.p["width"], len(names))):
            arg = arg + ((mesh[name] - c) / w) ** 2
        return self.p["height"] * np.exp(-0.5 * arg)


@register
class Eckart(PotentialTerm):
    kind = "eckart"
    summary = "symmetric Eckart barrier V = height / cosh^2((x - center)/width)"
    formula = "V(x) = height / cosh^2((x - center) / width); x along `axis`"
    parameters = {
        "height": Field("energy", doc="peak value (negative for a Poeschl-Teller well)"),
        "width": Field("length", positive=True, doc="length scale a of the cosh^2 profile"),
        "center": _center("position of the peak"),
        "axis": _AXIS,
    }

    def static(self, mesh):
        x = (_along(self, mesh) - self.p["center"]) / self.p["width"]
        return self.p["height"] / np.cosh(np.clip(x, -350, 350)) ** 2


@register
class Harmonic(PotentialTerm):
    kind = "harmonic"
    summary = "V = m/2 sum_i omega_i^2 (x_i - center_i)^2 (omega: angular frequency)"
    formula = ("V(r) = (m / 2) * sum_i omega_i^2 (x_i - center_i)^2, m = particle.mass; levels "
               "hbar omega (n + 1/2) per axis")
    parameters = {
        "omega": Field("frequency", per_axis=True, nonnegative=True,
                       doc="angular frequency of the oscillator along each axis"),
        "center": _center("position of the minimum", per_axis=True),
    }

    def static(self, mesh):
        names = self.ctx.grid.names
        v = 0.0
        for name, c, w in zip(names, _each(self.p["center"], len(names)), _each(self.p["omega"], len(names))):
            v = v + w**2 * (mesh[name] - c) ** 2
        return 0.5 * self.ctx.mass * v


@register
class Morse(PotentialTerm):
    kind = "morse"
    summary = ("V = depth (1 - exp(-stiffness (x - center)))^2 (zero at the minimum; the "
               "repulsive wall is capped at ~2.4e17 depth, 20/stiffness inside the minimum)")
    formula = ("V(x) = depth * (1 - exp(-stiffness (x - center)))^2; x along `axis`; 0 at the "
               "minimum x = center, depth far outside; the repulsive wall is capped where "
               "stiffness (center - x) > 20")
    parameters = {
        "depth": Field("energy", positive=True, doc="dissociation energy D"),
        "stiffness": Field("wavenumber", positive=True, doc="range parameter a of exp(-a (x - center))"),
        "center": _center("position of the minimum"),
        "axis": _AXIS,
    }

    def static(self, mesh):
        x = _along(self, mesh) - self.p["center"]
        # The repulsive wall grows as exp(2 a |x|).  Clipped only at exp's own
        # limit (709) the square overflows to inf on a wide grid and the kick
        # exp(-i V dt) turns psi into NaN.  The wall is capped instead at
        # depth (1 - e^20)^2 ~ 2.4e17 depth, 20 / stiffness inside the
        # minimum: far above any kinetic energy a grid represents, so no
        # resolved state sees the difference.
        arg = np.clip(-self.p["stiffness"] * x, -700, 20)
        return self.p["depth"] * (1.0 - np.exp(arg)) ** 2


@register
class DoubleWell(PotentialTerm):
    kind = "double_well"
    summary = "quartic double well V = height ((x-center)^2/a^2 - 1)^2, minima at center +/- a"
    formula = ("V(x) = height * ((x - center)^2 / a^2 - 1)^2, a = separation / 2; x along "
               "`axis`; minima V = 0 at center +/- a, V = height at center")
    parameters = {
        "height": Field("energy", positive=True, doc="barrier height between the wells"),
        "separation": Field("length", positive=True, doc="distance between the minima (2a)"),
        "center": _center("midpoint between the minima"),
        "axis": _AXIS,
    }

    def static(self, mesh):
        a = self.p["separation"] / 2
        x = (_along(self, mesh) - self.p["center"]) / a
        return self.p["height"] * (x**2 - 1.0) ** 2


@register
class SoftCoulomb(PotentialTerm):
    kind = "soft_coulomb"
    summary = "V = -Z / sqrt(|r - center|^2 + softening^2) (Z in units of e)"
    formula = ("V(r) = -charge / sqrt(|r - center|^2 + softening^2) in atomic units (charge = Z "
               "in units of e; the attraction of a particle of charge -e: particle.charge is "
               "not used)")
    parameters = {
        "charge": Field("number", 1.0, physics=True, doc="Z of the attracting centre"),
        "softening": Field("length", positive=True, doc="softening length (V(center) = -charge / softening)"),
        "center": _center("position of the centre", per_axis=True),
    }

    def static(self, mesh):
        r2 = _radius2(self, mesh, _each(self.p["center"], self.ctx.grid.ndim))
        return -self.p["charge"] / np.sqrt(r2 + self.p["softening"] ** 2)


@register
class Coulomb(PotentialTerm):
    kind = "coulomb"
    summary = "V = -Z / |r - center|; on a radial grid -Z/r"
    formula = ("V(r) = -charge / |r - center| in atomic units (charge = Z in units of e; the "
               "attraction of a particle of charge -e: particle.charge is not used); on a radial "
               "grid V = -charge / r.  No grid point may sit on the singularity")
    parameters = {
        "charge": Field("number", 1.0, physics=True, doc="Z of the attracting centre"),
        "center": _center("position of the centre (r = 0 on a radial grid)", per_axis=True),
    }

    def static(self, mesh):
        grid = self.ctx.grid
        center = _each(self.p["center"], grid.ndim)
        if grid.radial and center[0] != 0.0:
            raise JobError(f"{self.ctx.field}.center", "on a radial grid the centre is r = 0")
        r = np.sqrt(_radius2(self, mesh, center))
        if np.min(r) < 1e-9 * min(a.dx for a in grid.axes):
            raise JobError(f"{self.ctx.field}.center",
                           "a grid point sits on the singularity; shift the centre by half a "
                           "grid step or use kind = 'soft_coulomb'")
        return -self.p["charge"] / r


@register
class Lattice(PotentialTerm):
    kind = "lattice"
    summary = "optical lattice V = depth sin^2(pi (x - origin) / spacing), minima at origin + n spacing"
    formula = ("V(x) = depth * sin^2(pi (x - origin) / spacing); x along `axis`; minima V = 0 at "
               "origin + n spacing, maxima V = depth between them")
    parameters = {
        "depth": Field("energy", doc="lattice depth (maximum minus minimum of V)"),
        "spacing": Field("length", positive=True, doc="lattice period (half the laser wavelength "
                                                      "for a retro-reflected beam)"),
        "origin": Field("length", 0.0, physics=True, doc="position of one minimum"),
        "axis": _AXIS,
    }

    def static(self, mesh):
        x = _along(self, mesh) - self.p["origin"]
        return self.p["depth"] * np.sin(np.pi * x / self.p["spacing"]) ** 2


@register
class Slits(PotentialTerm):
    kind = "slits"
    summary = "a wall of `height` across `axis` at `position`, with openings along `across`"
    formula = ("V(r) = height where |x - position| < thickness / 2 and |y - c| >= opening_width / 2 "
               "for every c in openings, else 0; x along `axis`, y along `across`.  The wall's "
               "edges are sampled at the grid points (not cell-averaged)")
    parameters = {
        "height": Field("energy", positive=True, doc="height of the wall"),
        "position": Field("length", 0.0, physics=True, doc="centre of the wall along `axis`"),
        "thickness": Field("length", positive=True, doc="thickness of the wall along `axis`"),
        "openings": Field("list", doc="centres of the openings along `across`"),
        "opening_width": Field("length", positive=True, doc="full width of each opening"),
        "axis": _AXIS,
        "across": Field("str", None, "axis along which the openings lie (default: the second)"),
        "smoothing": Field("length", 0.0, nonnegative=True,
                           doc="tanh edge length of the wall and its openings (0: sharp)"),
    }

    def validate(self):
        if self.ctx.grid.ndim < 2:
            raise JobError(f"{self.ctx.field}.kind", "slits need a 2D or 3D grid")
        units = self.ctx.units
        self.open_at = [units.to_atomic(v, "length", f"{self.ctx.field}.openings.{i}")
                        for i, v in enumerate(self.p["openings"])]

    def static(self, mesh):
        names = self.ctx.grid.names
        x = _along(self, mesh)
        across = self.p.get("across") or names[1]
        if across not in names or across == names[self.axis_of()]:
            raise JobError(f"{self.ctx.field}.across", f"must be another axis of {', '.join(names)}")
        y = mesh[across]
        s = self.p.get("smoothing") or 0.0
        if s > 0:   # tanh edges: the wall's spectrum falls off exponentially (resolvable)
            half = self.p["thickness"] / 2
            d = x - self.p["position"]
            wall = _sharp_or_smooth(d + half, s) * _sharp_or_smooth(half - d, s)
            hole = np.zeros(np.shape(y))
            for c in self.open_at:
                w = self.p["opening_width"] / 2
                hole = np.maximum(hole, _sharp_or_smooth(y - c + w, s) * _sharp_or_smooth(c + w - y, s))
            return self.p["height"] * wall * (1.0 - hole)
        wall = np.abs(x - self.p["position"]) < self.p["thickness"] / 2
        hole = np.zeros(np.broadcast_shapes(np.shape(y)), bool)
        for c in self.open_at:
            hole = hole | (np.abs(y - c) < self.p["opening_width"] / 2)
        return self.p["height"] * (wall & ~hole)


@register
class Gravity(PotentialTerm):
    """A uniform gravitational field: V = m g s along one axis.

    The force -dV/ds = -m g pulls toward negative s for g > 0 (the axis
    points up).  The term is linear in s, so the split-operator kick
    exp(-i m g s dt / hbar) is a momentum shift of -m g dt per step: exact
    on a box axis (hard walls, DST-I), but on a periodic axis V jumps by
    m g L at the wrap, where the kick cannot be periodic (its phase is
    continuous round the ring only if m g L dt / hbar is a multiple of
    2 pi): refused there.  A radial grid has no direction: refused.
    """

    kind = "gravity"
    uniform_force = True
    summary = ("uniform gravity V = m g s along `axis` (default: the last Cartesian axis), "
               "pulling toward -s; g defaults to standard gravity")
    formula = ("V(r) = m * acceleration * s, m = particle.mass, s the coordinate along `axis` "
               "(default: the last Cartesian axis: x in 1D, y in 2D, z in 3D), measured from s = 0 "
               "of the grid's coordinates (V = 0 there).  The force is -m * acceleration along "
               "`axis`: toward -s for acceleration > 0 (the axis points up); a negative "
               "acceleration pulls toward +s (an axis that points down).  The axis must have "
               "boundary = 'box' (a uniform force is not periodic); not on a radial grid.")
    parameters = {
        "acceleration": Field("acceleration", f"{sc.g!r} m/s^2", physics=True,
                              doc="free-fall acceleration g in [units] length/time^2 (default: "
                                  "standard gravity 9.80665 m/s^2); negative pulls toward +s"),
        "axis": Field("str", None, "vertical axis, pointing up (default: the last Cartesian axis)"),
    }

    def axis_index(self) -> int:
        """Index of the vertical axis: ``axis``, or the grid's last axis."""
        names = self.ctx.grid.names
        axis = self.p.get("axis") or names[-1]
        if axis not in names:
            raise JobError(f"{self.ctx.field}.axis",
                           f"{axis!r} is not an axis of this grid ({', '.join(names)})")
        return names.index(axis)

    def validate(self):
        grid, f = self.ctx.grid, self.ctx.field
        if grid.radial:
            raise JobError(f"{f}.kind", "gravity has a direction and a radial grid has none; "
                                        "use a Cartesian grid (x, y, z) with a box axis")
        i = self.axis_index()
        ax = grid.axes[i]
        if ax.boundary == "periodic" and self.ctx.frame == "lab":   # a falling frame removes V
            raise JobError(f"grid.{ax.name}.boundary",
                           f"gravity along {ax.name} ({f}) needs a box axis: a uniform force is not "
                           f"periodic (V jumps by m g L at the wrap); set grid.{ax.name}.boundary = "
                           "'box' (or grid.boundary = 'box'), or let the grid fall with it: grid.frame = 'free_fall'")

    def force(self) -> np.ndarray:
        """The uniform force -grad V per grid axis (hartree/bohr): -m g on
        the vertical axis, 0 on the others."""
        out = np.zeros(self.ctx.grid.ndim)
        out[self.axis_index()] = -self.ctx.mass * self.p["acceleration"]
        return out

    def force_at(self, t: float) -> np.ndarray:
        return self.force()

    def static(self, mesh):
        s = mesh[self.ctx.grid.names[self.axis_index()]]
        return self.ctx.mass * self.p["acceleration"] * s


def _each(value, n: int) -> list:
    return list(value) if isinstance(value, (list, tuple)) else [value] * n
