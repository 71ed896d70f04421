"""The schemas of a job file's tables: every key, its kind (a unit kind or a
plain type), its default and its documentation (``wavesweep keys`` prints
them).  The schemas of potentials and packets live with their kinds
(:data:`wavesweep.potentials.REGISTRY`, :data:`wavesweep.states.PACKETS`);
the names of schemes and FFT backends are read from their registries
(:data:`wavesweep.propagators.SCHEMES`, :data:`wavesweep.fft.BACKENDS`) when
a job is validated, so a registered one is accepted."""
from __future__ import annotations

from dataclasses import replace

from ..fft import AUTO, backend_choices
from ..grid import BOUNDARIES, FRAMES
from ..interaction import COUPLING_KINDS
from ..propagators import DEFAULT_SCHEME, SCHEMES
from ..registry import Names
from ..schema import Field

# Keys that choose how a run is computed, not what is computed: left out of the run id.
NOT_PHYSICS = {"evolve": ("fft", "threads")}

TOP_LEVEL = ("title", "units", "particle", "grid", "potential", "packet", "evolve",
             "absorber", "record", "detector", "sweep", "interaction", "surface", "coupling")

# [[surface]] and [[coupling]]: several potential-energy surfaces one packet moves on
# (wavesweep.surfaces); their potential lists are [[potential]] tables.
SURFACE = {
    "name": Field("str", doc="the surface's name (the result's `surface` coordinate)"),
    "potential": Field("list", None, doc="[[potential]]-style tables summed into this surface's V_ss "
                                         "(the job's [[potential]] tables are added to every surface)"),
}
COUPLING = {
    "surfaces": Field("list", doc="the two surfaces it couples, by name: [\"A\", \"B\"]"),
    "potential": Field("list", doc="[[potential]]-style tables summed into the off-diagonal element "
                                   "V_AB(r, t) (real: no potential kind gives a complex value; "
                                   "V_BA = V_AB)"),
}
# [packet] surface (any kind; validated by validate._packet_surfaces against the [[surface]] names)
PACKET_SURFACE = Field("str", None, doc="coupled surfaces ([[surface]]) only, and required there: the "
                                        "surface the packet starts on, by name")

PARTICLE = {
    "mass": Field("mass", 1.0, positive=True, physics=True,
                  doc="particle mass (1 = one job mass unit: the electron mass in atomic units)"),
    "charge": Field("charge", None, doc="charge q in units of e, e.g. -1 for an electron "
                                        "(required by a driving field)"),
}
AXIS = {
    "min": Field("length", None, doc="lower end of the axis (required on x, y, z; a radial axis "
                                     "starts at r = 0: leave it out)"),
    "max": Field("length", doc="upper end of the axis"),
    "points": Field("int", positive=True, doc="number of grid points, at least 4; periodic: "
                                              "dx = (max - min) / points, min on the grid, max not; "
                                              "box: dx = (max - min) / (points + 1), walls off the grid"),
    "boundary": Field("str", None, choices=BOUNDARIES, doc="this axis' boundary; default: grid.boundary"),
}
# [grid] itself (validated by _grid): its axes are AXIS tables.
GRID = {
    "x": Field("table", None, doc="the first Cartesian axis: { min, max, points } (keys below)"),
    "y": Field("table", None, doc="the second Cartesian axis (2D, 3D)"),
    "z": Field("table", None, doc="the third Cartesian axis (3D)"),
    "r": Field("table", None, doc="a radial axis { max, points } instead of x, y, z: u(r) = r R(r), "
                                  "u(0) = 0"),
    "boundary": Field("str", "periodic", choices=BOUNDARIES, physics=True,
                      doc="periodic (FFT: what leaves one side enters the other) or box (hard "
                          "walls, psi = 0, sine transform); a radial grid is always box"),
    "l": Field("int", 0, nonnegative=True, physics=True,
               doc="angular momentum on a radial grid: adds l (l + 1) / (2 m r^2) to V"),
    "frame": Field("str", "lab", choices=FRAMES, physics=True,
                   doc="lab (the grid stays put) or free_fall: the grid follows the classical "
                       "trajectory of the packet's centre under the job's uniform forces (gravity, "
                       "field), which the frame removes exactly; other potentials and the detectors "
                       "stay in the lab; the result's frame_offset says where the grid was"),
}
EVOLVE = {
    "dt": Field("time", positive=True, doc="time step"),
    "duration": Field("time", positive=True, doc="total propagation time, a whole number of steps"),
    "scheme": Field("str", DEFAULT_SCHEME, choices=Names(SCHEMES),
                    doc="propagator (the schemes are listed below)"),
    "precision": Field("str", "double", choices=("double", "single"),
                       doc="complex128 (double) or complex64 (single) arithmetic"),
    "fft": Field("str", AUTO, choices=Names(backend_choices),
                 doc=f"FFT backend (listed below); {AUTO}: the fastest one installed"),
    "threads": Field("int", None, positive=True, maximum=4096,
                     doc="threads of the transforms and kernels (default: WAVESWEEP_THREADS, else "
                         "chosen by the grid size)"),
}
ABSORBER = {
    "kind": Field("str", "none", choices=("cap", "mask", "none"),
                  doc="cap: -i W with W = strength (s/thickness)^power, s the depth into the layer; "
                      "mask: psi times cos(pi s / (2 thickness))^mask_exponent each step; none"),
    "thickness": Field("length", None, positive=True, doc="layer thickness (required for cap and mask)"),
    "faces": Field("list", None, doc="faces with a layer, e.g. ['x-', 'x+'] (default: every face; "
                                     "a radial grid has only 'r+')"),
    "strength": Field("energy", None, nonnegative=True, per_axis=True,
                      doc="CAP strength (one per axis allowed); omitted: tuned to the packet"),
    "power": Field("number", None, positive=True,
                   doc="CAP exponent; omitted with the strength: the better of 2 and 3"),
    "mask_exponent": Field("number", 0.125, positive=True, doc="mask: exponent of the cosine profile"),
}
RECORD = {
    "every": Field("time", None, positive=True,
                   doc="time between scalar samples (default: about 1000 samples, on whole steps)"),
    "snapshot_every": Field("time", None, positive=True,
                            doc="time between density snapshots, a multiple of every "
                                "(default: about 100 snapshots)"),
    "stride": Field("int", 1, positive=True, doc="snapshots keep every stride-th grid point"),
    "final_state": Field("bool", True, doc="store the final psi in the result"),
    # None (not False) by default: absent keys stay out of the run id
    "snapshot_psi": Field("bool", None, doc="store psi (real and imaginary parts) with each snapshot"),
    "column": Field("str", None, doc="2D/3D: also store column_density, the density integrated along this "
                                     "axis at each snapshot (what a camera looking along it sees)"),
    # None (not False) by default, and an explicit false dropped: the job's text and run id as without it
    "adiabatic": Field("bool", None, doc="coupled surfaces ([[surface]]): also store population_adiabatic(time, "
                                         "state), the probability on each adiabatic state (the local "
                                         "eigenvectors of the potential matrix, state 0 the lowest); default "
                                         "false"),
}
DETECTOR = {
    "name": Field("str", None, doc="the detector's name (default: 'x=<position>')"),
    "resolved": Field("bool", None, doc="2D/3D: also record the flux density along the line or plane "
                                        "(screen_flux, its time integral screen_probability), on the "
                                        "snapshot grid's transverse axes (record.stride)"),
    "spectrum": Field("bool", None, doc="2D/3D: also record psi and its normal derivative along the line or "
                                        "plane at every sample (spectrum_psi, spectrum_dpsi, on the full grid's "
                                        "transverse axes), what `wavesweep spectrum` needs for the momentum "
                                        "spectrum of what crossed; 1D detectors always record them"),
}
# The detector's position: one of the grid's axis names as the key.
DETECTOR_POSITION = Field("length", None, doc="position of the detector plane on this axis "
                                              "(give exactly one axis)")
# [interaction] (validated by validate._interaction): the coupling's kind
# follows the grid's dimension (energy x length^d, COUPLING_KINDS).
INTERACTION = {
    "kind": Field("str", "contact", choices=("contact",),
                  doc="contact: the mean-field (Gross-Pitaevskii) potential g N |psi|^2, psi normalised to 1"),
    "atoms": Field("number", positive=True, doc="N, the number of atoms in the condensate"),
    "coupling": Field("energy_length", None,
                      doc="g in energy x length^d (d the grid's dimension); or give scattering_length"),
    "scattering_length": Field("length", None,
                               doc="s-wave scattering length a (negative: attractive): 3D g = 4 pi hbar^2 a / m; "
                                   "2D g = sqrt(8 pi) hbar^2 a / (m a_z), a_z = sqrt(hbar / (m axial_omega)); "
                                   "1D g = 2 hbar transverse_omega a"),
    "axial_omega": Field("frequency", None, positive=True,
                         doc="2D with scattering_length: angular frequency of the trap along the frozen axis"),
    "transverse_omega": Field("frequency", None, positive=True,
                              doc="1D with scattering_length: angular frequency of the transverse trap"),
}


def interaction_schema(ndim: int | None) -> dict:
    """[interaction]'s keys on a grid of ``ndim`` axes (the coupling's unit kind)."""
    if ndim not in COUPLING_KINDS:
        return INTERACTION
    return {**INTERACTION, "coupling": replace(INTERACTION["coupling"], kind=COUPLING_KINDS[ndim])}
