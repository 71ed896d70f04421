"""The mean-field contact interaction of a Bose-Einstein condensate
(Gross-Pitaevskii equation), atomic units throughout.

    i hbar dpsi/dt = [T + V(r, t) + g N |psi|^2] psi,   sum |psi|^2 dV = 1,

for N atoms of mass m in one condensate mode psi.  The coupling g (energy x
length^d on a d-dimensional grid) is given directly or from the s-wave
scattering length a with the usual reduced-dimension conventions:

* 3D: g = 4 pi hbar^2 a / m;
* 2D (a pancake, tight harmonic confinement omega_z along the missing axis):
  g = sqrt(8 pi) hbar^2 a / (m a_z), a_z = sqrt(hbar / (m omega_z))
  (Petrov, Holzmann & Shlyapnikov, Phys. Rev. Lett. 84, 2551 (2000), the
  quasi-2D regime a << a_z, without the logarithmic correction);
* 1D (a cigar, transverse confinement omega_perp):
  g = 2 hbar omega_perp a (Olshanii, Phys. Rev. Lett. 81, 938 (1998), the
  weak-confinement limit a << a_perp, without the confinement-induced
  resonance).

The energy per atom is the Gross-Pitaevskii functional
E = <T> + <V> + (g N / 2) int |psi|^4 dV, and the chemical potential, the
eigenvalue of a stationary state, mu = <T> + <V> + g N int |psi|^4 dV
(Pitaevskii & Stringari, Bose-Einstein Condensation, ch. 5).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

__all__ = ["ContactInteraction", "COUPLING_KINDS", "coupling_from_scattering_length"]

# Quantity kind of the coupling g by grid dimension (energy x length^d).
COUPLING_KINDS = {1: "energy_length", 2: "energy_area", 3: "energy_volume"}


def coupling_from_scattering_length(scattering_length: float, mass: float, ndim: int,
                                    axial_omega: float | None = None,
                                    transverse_omega: float | None = None) -> float:
    """g (hartree bohr^ndim) of atoms of ``mass`` (m_e) with s-wave
    ``scattering_length`` a (bohr; negative: attractive), by the conventions
    in the module notes.  ``axial_omega`` (2D) and ``transverse_omega`` (1D)
    are the angular frequencies (1 / au_time) of the harmonic confinement
    that froze the missing axes."""
    a, m = float(scattering_length), float(mass)
    if ndim == 3:
        return 4.0 * math.pi * a / m
    if ndim == 2:
        if axial_omega is None:
            raise ValueError("a 2D coupling from the scattering length needs axial_omega")
        a_z = math.sqrt(1.0 / (m * axial_omega))
        return math.sqrt(8.0 * math.pi) * a / (m * a_z)
    if ndim == 1:
        if transverse_omega is None:
            raise ValueError("a 1D coupling from the scattering length needs transverse_omega")
        return 2.0 * transverse_omega * a
    raise ValueError(f"no contact coupling in {ndim} dimensions")


@dataclass(frozen=True)
class ContactInteraction:
    """``atoms`` N in the condensate and the coupling ``coupling`` g
    (hartree bohr^d); the kick and the energies carry their product g N."""

    atoms: float
    coupling: float

    @property
    def strength(self) -> float:
        """g N (hartree bohr^d): the mean-field potential is g N |psi|^2."""
        return self.atoms * self.coupling

    @classmethod
    def from_table(cls, table: dict, mass: float, ndim: int) -> "ContactInteraction":
        """From an [interaction] table already in atomic units."""
        if table.get("coupling") is not None:
            g = float(table["coupling"])
        else:
            g = coupling_from_scattering_length(table["scattering_length"], mass, ndim,
                                                table.get("axial_omega"), table.get("transverse_omega"))
        return cls(float(table["atoms"]), g)
