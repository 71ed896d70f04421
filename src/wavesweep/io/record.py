"""What analysis of a finished run needs from its set-up, written into the
result at run time and read back from it.

Analysis (``arrivals``, ``transmission``, ``levels --from``, ``collect``)
reads a result file, never a set-up rebuilt from the file's ``job``
attribute: that rebuild allocates what the job names (a 173 KB file naming a
512^3 grid took 5.4 GB) and opens the files the job names (a FIFO hangs).
So the run writes, once, the few things analysis needs
(:func:`wavesweep.setup.analysis_record`, written by
:class:`~wavesweep.io.recorder.ResultWriter`):

- the grid (``grid_axes`` and ``grid_<axis>_min/max/points/boundary``
  attributes), the absorber's ``absorber_thickness``, whether V depends on
  time (``time_dependent``);
- the initial packet's marginals along each axis: ``initial_position_marginal_<axis>``
  (|psi0|^2 summed over the other axes, normalised) on the full grid, and
  ``initial_momentum_marginal_<axis>`` on ``k_<axis>`` (the zero-padded
  transform along the axis, 4 points per grid point);
- in 1D, psi0 itself (``initial_psi_real/imag``) and the static potential
  on the full grid (``potential_full`` where snapshots are decimated), for
  energy-resolved transmission;
- for a static Hamiltonian on up to LANCZOS_MAX_POINTS points, the Lanczos
  recurrence of psi0 (``lanczos_alpha``/``lanczos_beta``: the steps the
  energy band psi0 holds takes for ``levels --from``'s defaults, at most
  240 and a tenth of the run's steps, each costing about two of them), the
  spectrum's bounds (``spectrum_min``/``spectrum_max``) and, where the band
  needed it and the grid has at most 2048 points, the ground level
  (``ground_energy``): see :func:`wavesweep.eigen.energy_band`
  (a band the recorded steps cannot tighten enough is refused by ``levels
  --from`` with the sampling it would need, as a live one is);
- the set-up's adequacy warnings (``adequacy_warnings``, a JSON list of
  lines: :func:`wavesweep.adequacy.run_warnings`, judged once).

:func:`read_record` gives a :class:`RecordedRun` (atomic units) from a
dataset.  A file written before the record existed is rebuilt from its job
(:func:`wavesweep.analysis.recorded.run_record`) only when that is bounded: its memory judged from the job's grid shape
before anything is built (refused, naming the file, above the machine's
memory), and a file the job names must be a regular file.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
import zlib

import numpy as np

from ..errors import JobError
from ..grid import Axis, Grid

__all__ = ["RecordedRun", "RecordedDetector", "RecordedAbsorber", "RecordedLayer", "read_record", "has_record",
           "record_checksum", "result_name", "RECORD_VERSION", "LANCZOS_MAX_POINTS"]

# Bumped when the record's content changes; files without it are rebuilt (bounded).
RECORD_VERSION = 1
# Global attributes read_record relies on: HDF5 checksums cover variables, not attributes, so
# the writer adds a CRC-32 of these (record_checksum) and the reader refuses a mismatch.
CHECKED_ATTRS = ("analysis_record", "grid_axes", "absorber_thickness", "time_dependent", "adequacy_warnings",
                 "lanczos_exhausted", "spectrum_min", "spectrum_max", "ground_energy", "absorber", "grid_kind",
                 "angular_momentum", "particle_mass", "dt", "length_to_bohr", "energy_to_hartree",
                 "time_to_atomic", "mass_to_electron_mass")


def record_checksum(attrs) -> int:
    """CRC-32 of the attributes the record is read from (CHECKED_ATTRS and
    the grid_<axis>_* ones), each as written: a flipped bit in one of them
    is damage, never a silently different set-up."""

    keys = sorted(k for k in attrs if k in CHECKED_ATTRS or k.startswith("grid_"))
    parts = []
    for k in keys:
        v = attrs[k]
        v = v.item() if hasattr(v, "item") else v
        parts.append(f"{k}={type(v).__name__ if not isinstance(v, (int, float, str)) else ''}{v!r}")
    return zlib.crc32("\n".join(parts).encode())


# Grids up to this many points record the recurrence: it keeps three complex vectors of the
# grid's size at the run's start (above, `levels --from` says the run did not record its band).
LANCZOS_MAX_POINTS = 2**22


@dataclass
class RecordedDetector:
    name: str
    axis: int
    position: float          # bohr


@dataclass
class RecordedLayer:
    name: str                # "x-", "y+", ...
    axis: int


@dataclass
class RecordedAbsorber:
    kind: str
    thickness: float         # bohr
    layers: list = field(default_factory=list)

    @property
    def active(self) -> bool:
        return self.kind != "none" and bool(self.layers)


@dataclass
class RecordedRun:
    """A run's set-up as analysis needs it, in atomic units.

    ``marginals[axis]`` is ``(rho, k, w)``: the initial position marginal on
    the axis's coordinates and the momentum marginal ``w`` on wave numbers
    ``k`` (ascending), both summing to 1.  ``psi0`` and ``static_potential``
    are kept for 1D runs only (None otherwise).  ``warnings`` is None when
    the file does not say (then analysis says the warnings are unavailable).
    ``lanczos`` is ``(alphas, betas, exhausted, spectrum_min, spectrum_max,
    ground or None)`` (hartree) for a static Hamiltonian, else None."""

    grid: Grid
    mass: float
    detectors: list
    absorber: RecordedAbsorber
    time_dependent: bool
    marginals: dict
    dt: float
    psi0: np.ndarray | None = None
    static_potential: np.ndarray | None = None
    warnings: list | None = None
    lanczos: tuple | None = None

    def packet_center(self, axis: int) -> float:
        """Mean of the initial packet's position along ``axis`` (bohr)."""
        rho = self.marginals[axis][0]
        return float(np.sum(rho * self.grid.axes[axis].coordinates) / np.sum(rho))

# -- at analysis time -----------------------------------------------------------------
def has_record(ds) -> bool:
    """Whether an open result holds the analysis record (files written
    before it existed do not: :func:`wavesweep.analysis.recorded.run_record`
    rebuilds theirs, bounded)."""
    return int(ds.attrs.get("analysis_record", 0) or 0) >= 1


def read_record(ds, field: str = "RUN.nc") -> RecordedRun:
    """The run's record from an open result that holds one (atomic units);
    JobError(field) where it is missing, fails its checksum or is incomplete."""
    a = ds.attrs
    if not has_record(ds):
        raise JobError(field, f"{result_name(ds)} was written before results kept what analysis needs; "
                              "run the job again")
    if "analysis_record_crc32" not in a or int(a["analysis_record_crc32"]) != record_checksum(a):
        raise JobError(field, f"{result_name(ds)}: the attributes of the run's set-up fail their checksum, the file is "
                              "damaged; run the job again")
    try:
        return _read(ds)
    except (KeyError, ValueError, TypeError) as e:
        raise JobError(field, f"{result_name(ds)}: the analysis record is incomplete or damaged ({e}); "
                              "run the job again") from None


def _read(ds) -> RecordedRun:
    a = ds.attrs
    lf, ef, tf = (float(a.get(k, 1.0)) for k in ("length_to_bohr", "energy_to_hartree", "time_to_atomic"))
    mass = float(a["particle_mass"]) * float(a.get("mass_to_electron_mass", 1.0))
    names = str(a["grid_axes"]).split()
    axes = tuple(Axis(n, float(a[f"grid_{n}_min"]) * lf, float(a[f"grid_{n}_max"]) * lf,
                      int(a[f"grid_{n}_points"]), str(a[f"grid_{n}_boundary"])) for n in names)
    grid = Grid(axes, radial=a.get("grid_kind") == "radial", angular_momentum=int(a.get("angular_momentum", 0)))
    dets = []
    if "detector" in ds.coords and ds.sizes.get("detector", 0):
        for name, axis, x in zip(ds["detector"].values, ds["detector_axis"].values, ds["detector_x"].values):
            dets.append(RecordedDetector(str(name), names.index(str(axis)), float(x) * lf))
    faces = [str(b) for b in ds["boundary"].values] if "boundary" in ds.coords else []
    absorber = RecordedAbsorber(str(a.get("absorber", "none")), float(a["absorber_thickness"]) * lf,
                                [RecordedLayer(f, names.index(f[:-1])) for f in faces])
    marginals = {}
    for i, n in enumerate(names):
        rho = np.asarray(ds[f"initial_position_marginal_{n}"].values, float)
        k = np.asarray(ds[f"k_{n}"].values, float) / lf
        w = np.asarray(ds[f"initial_momentum_marginal_{n}"].values, float)
        if rho.shape != (axes[i].points,) or k.shape != w.shape:
            raise ValueError(f"the marginals along {n} do not match the grid")
        marginals[i] = (rho, k, w)
    psi0 = v_full = None
    if len(names) == 1 and "initial_psi_real" in ds:
        psi0 = (np.asarray(ds["initial_psi_real"].values, float)
                + 1j * np.asarray(ds["initial_psi_imag"].values, float)) / math.sqrt(lf)
        v_name = "potential_full" if "potential_full" in ds else "potential"
        v_full = np.asarray(ds[v_name].values, float) * ef
        if psi0.shape != grid.shape or v_full.shape != grid.shape:
            raise ValueError("psi0 or the potential does not match the grid")
    lanczos = None
    if "lanczos_alpha" in ds:
        betas = np.asarray(ds["lanczos_beta"].values, float)
        lanczos = (np.asarray(ds["lanczos_alpha"].values, float) * ef,
                   betas[np.isfinite(betas)] * ef,       # NaN past the last (an exhausted recurrence)
                   bool(int(a["lanczos_exhausted"])), float(a["spectrum_min"]) * ef,
                   float(a["spectrum_max"]) * ef,
                   float(a["ground_energy"]) * ef if "ground_energy" in a else None)
    warnings = json.loads(a["adequacy_warnings"]) if "adequacy_warnings" in a else None
    return RecordedRun(grid=grid, mass=mass, detectors=dets, absorber=absorber,
                       time_dependent=bool(int(a["time_dependent"])), marginals=marginals,
                       dt=float(a["dt"]) * tf, psi0=psi0, static_potential=v_full,
                       warnings=warnings, lanczos=lanczos)


def result_name(ds) -> str:
    """The file an open dataset was read from, quoted, for messages."""
    source = getattr(ds, "encoding", {}).get("source")
    return repr(str(source)) if source else "the result"
