"""What analysis of a finished run needs from its set-up, written into the
result at run time and read back from it.

Analysis (``arrivals``, ``transmission``, ``levels --from``, ``collect``)
reads a result file, never a set-up rebuilt from the file's ``job``
attribute: that rebuild allocates what the job names (a 173 KB file naming a
512^3 grid took 5.4 GB) and opens the files the job names (a FIFO hangs).
So the run writes, once, the few things analysis needs
(:func:`analysis_record`, written by :class:`~wavesweep.io.recorder.ResultWriter`):

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
only when that is bounded: its memory judged from the job's grid shape
before anything is built (refused, naming the file, above the machine's
memory), and a file the job names must be a regular file.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field

import numpy as np

from .errors import JobError
from .grid import Axis, Grid
from .marginals import free_space_marginals

__all__ = ["RecordedRun", "analysis_record", "read_record", "RECORD_VERSION"]

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
    import zlib

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

    @classmethod
    def from_setup(cls, setup, lanczos: bool = False) -> "RecordedRun":
        """The record of a set-up in memory (what the run writes), without a
        file; ``lanczos``: with the recurrence of psi0 (up to 240
        applications of H)."""
        rec = analysis_record(setup, warnings=False, lanczos=lanczos)
        lanczos = None
        if rec["lanczos"] is not None:
            lanczos = tuple(rec["lanczos"])
        ab = setup.absorber
        return cls(grid=setup.grid, mass=float(setup.mass),
                   detectors=[RecordedDetector(d.name, d.axis, float(d.position)) for d in setup.detectors],
                   absorber=RecordedAbsorber(ab.kind, float(ab.thickness),
                                             [RecordedLayer(layer.name, layer.axis) for layer in ab.layers]),
                   time_dependent=bool(setup.hamiltonian.time_dependent),
                   marginals={i: m for i, m in enumerate(rec["marginals_au"])}, dt=float(setup.dt),
                   psi0=setup.psi0 if setup.grid.ndim == 1 else None,
                   static_potential=setup.hamiltonian.static_potential if setup.grid.ndim == 1 else None,
                   warnings=None, lanczos=lanczos)


def as_record(obj) -> RecordedRun:
    """A RecordedRun as it is, a Setup recorded in memory."""
    return obj if isinstance(obj, RecordedRun) else RecordedRun.from_setup(obj)


# -- at run time ----------------------------------------------------------------------
def analysis_record(setup, warnings: bool = True, lanczos: bool = True) -> dict:
    """What the run writes for analysis (see the module notes), from its set-up:
    ``attrs`` (global attributes, job units), ``marginals`` (per axis name:
    rho, k in 1/length job units, w), ``marginals_au`` (the same in atomic
    units, by axis index), ``initial_psi`` (1D, job units) and
    ``potential_full`` (1D, job energy units) or None, and ``lanczos``
    (alphas, betas, exhausted, spectrum min, max; hartree) or None.
    ``warnings=False`` leaves out the adequacy warnings (they need the
    classical trajectories, which a caller may not want to pay for);
    ``lanczos=False`` the recurrence."""
    u, grid = setup.units, setup.grid
    lf, ef = u.factor("length"), u.factor("energy")
    attrs = {"analysis_record": RECORD_VERSION, "grid_axes": " ".join(grid.names),
             "absorber_thickness": float(setup.absorber.thickness / lf),
             "time_dependent": int(bool(setup.hamiltonian.time_dependent))}
    for a in grid.axes:
        attrs.update({f"grid_{a.name}_min": float(a.min / lf), f"grid_{a.name}_max": float(a.max / lf),
                      f"grid_{a.name}_points": int(a.points), f"grid_{a.name}_boundary": a.boundary})
    if warnings:
        from .adequacy import run_warnings
        attrs["adequacy_warnings"] = json.dumps(run_warnings(setup))
    marginals_au = [free_space_marginals(setup.psi0, grid, i) for i in range(grid.ndim)]
    marginals = {a.name: (rho, k * lf, w) for a, (rho, k, w) in zip(grid.axes, marginals_au)}
    out = {"attrs": attrs, "marginals": marginals, "marginals_au": marginals_au, "energy_factor": ef,
           "initial_psi": None, "potential_full": None, "lanczos": None}
    if grid.ndim == 1:
        out["initial_psi"] = np.asarray(setup.psi0, np.complex128) * math.sqrt(lf)
        out["potential_full"] = np.asarray(setup.hamiltonian.static_potential, float) / ef
    if lanczos and not setup.hamiltonian.time_dependent and grid.size <= LANCZOS_MAX_POINTS:
        # lazy: the run needs it once, at its start
        from .eigen import (BAND_CHUNK, BAND_STEPS, DEFAULT_MIN_WEIGHT, DENSE_MAX_POINTS, band_window,
                                       lanczos_recurrence)
        resolution, width = band_window(setup.total_steps * setup.dt, setup.sample_steps * setup.dt)
        # a bounded share of the run: at most a tenth of its steps (each costs about two of them), and
        # the ground level only where it is a dense eigh of a few thousand points
        steps = min(BAND_STEPS, max(2 * BAND_CHUNK, setup.total_steps // 10))
        recorded = lanczos_recurrence(setup.hamiltonian, setup.psi0, DEFAULT_MIN_WEIGHT, resolution, width,
                                      max_steps=steps, ground=grid.size <= DENSE_MAX_POINTS)
        out["lanczos"] = recorded
        alphas, betas, exhausted, lo, hi, ground = recorded
        attrs.update({"lanczos_exhausted": int(exhausted), "spectrum_min": float(lo / ef),
                      "spectrum_max": float(hi / ef)})
        if ground is not None:
            attrs["ground_energy"] = float(ground / ef)
    return out


# -- at analysis time -----------------------------------------------------------------
def read_record(ds, field: str = "RUN.nc", lanczos: bool = False) -> RecordedRun:
    """The run's record from an open result (atomic units).  A file without
    one (written before it existed) is rebuilt from its job when that is
    bounded (see the module notes; ``lanczos``: with the recurrence of psi0,
    which only ``levels --from`` needs); JobError(field) otherwise."""
    a = ds.attrs
    if int(a.get("analysis_record", 0) or 0) < 1:
        return _rebuilt(ds, field, lanczos)
    if "analysis_record_crc32" not in a or int(a["analysis_record_crc32"]) != record_checksum(a):
        raise JobError(field, f"{_name(ds)}: the attributes of the run's set-up fail their checksum, the file is "
                              "damaged; run the job again")
    try:
        return _read(ds)
    except (KeyError, ValueError, TypeError) as e:
        raise JobError(field, f"{_name(ds)}: the analysis record is incomplete or damaged ({e}); "
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


def _rebuilt(ds, field, lanczos: bool) -> RecordedRun:
    """An older file's record, from its job rebuilt in memory: the memory a
    run of that job holds is judged from the grid's shape first (nothing is
    built above the machine's available memory), and files the job names
    must be regular files (checked as the job loads)."""
    import tomllib

    from .adequacy import memory_error, memory_estimate, run_warnings
    from .jobfile import job_from_dict
    from .simulation import Setup

    try:
        table = tomllib.loads(str(ds.attrs["job"]))
    except tomllib.TOMLDecodeError as e:
        raise JobError(field, f"{_name(ds)}: the job text stored in the result cannot be read: {e}") from None
    table.pop("sweep", None)
    try:
        job = job_from_dict(table)
    except JobError as e:
        raise JobError(field, f"{_name(ds)} was written before results kept what analysis needs, and "
                              f"its job cannot be rebuilt here ({e}); run the job again") from None
    need = memory_estimate(job)["estimate_bytes"]
    points = memory_estimate(job)["points"]
    too_big = memory_error(need, f"{_name(ds)} was written before results kept what analysis needs: "
                                 f"rebuilding its set-up ({points:.0f} grid points)", field)
    if too_big is not None:   # judged from the shape: nothing was allocated
        raise JobError(field, f"{too_big.message}; or run the job again with this version, whose "
                              "results keep what analysis needs")
    try:
        setup = Setup(job)
    except JobError as e:
        raise JobError(field, f"{_name(ds)}: the run's job cannot be rebuilt here ({e}); "
                              "files it refers to must still exist") from None
    rec = RecordedRun.from_setup(setup, lanczos=lanczos)
    rec.warnings = run_warnings(setup)
    return rec


def _name(ds) -> str:
    source = getattr(ds, "encoding", {}).get("source")
    return repr(str(source)) if source else "the result"
