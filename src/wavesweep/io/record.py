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
  lines: :func:`wavesweep.adequacy.run_warnings`, judged once);
- per detector, the few numbers analysis would otherwise take from
  grid-sized arrays (so ``collect`` reads no array of the grid's size):
  ``detector_initial_mean`` (the initial packet's mean position along the
  detector's axis), ``classical_arrival_probability`` and
  ``classical_arrival_mean`` (:func:`classical_share` of the marginals), and
  in 1D runs that keep their final state, from it at the end,
  ``final_probability_beyond`` (on the grid beyond the detector) and
  ``final_probability_to_come`` (before it, or before the inner edge of the
  layer holding it, moving towards it): :func:`side_probability`.  A file
  without them gets the same numbers from its arrays, as before.

:func:`read_record` gives a :class:`RecordedRun` (atomic units) from a
dataset.  A file written before the record existed is rebuilt from its job
(:func:`wavesweep.analysis.recorded.run_record`) only when that is bounded: its memory judged from the job's grid shape
before anything is built (refused, naming the file, above the machine's
memory), and a file the job names must be a regular file.
"""
from __future__ import annotations

import functools
import json
import math
import zlib
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from ..errors import JobError
from ..grid import Axis, Grid

__all__ = ["RecordedRun", "RecordedDetector", "RecordedAbsorber", "RecordedLayer", "read_record", "has_record",
           "record_checksum", "result_name", "RECORD_VERSION", "DPSI_UNITS_VERSION", "LANCZOS_MAX_POINTS", "DETECTOR_VALUES", "FINAL_DETECTOR_VALUES",
           "side_probability", "classical_share", "initial_beyond", "BEYOND_FLOOR", "first_arrival", "packet_side_positions", "layer_holding",
           "layer_edge"]

# Bumped when the record's content changes; files without it are rebuilt (bounded).
RECORD_VERSION = 1

# The global attribute ``dpsi_units`` of a result whose recorded dpsi/dx
# (``detector_dpsi_*``, ``spectrum_dpsi_*``) is in the job's length units,
# psi's unit over a length.  Files written before it (2026-12-05) multiplied
# by the length unit's size in bohr where they should have divided: their
# dpsi is off by (length unit / bohr)^2 (exactly 1 in bohr); the spectrum
# analysis corrects that (analysis.surface_flux.dpsi_correction).
DPSI_UNITS_VERSION = 2
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


# Per-detector values of the record (variables on the ``detector`` dimension): name -> (kind
# of unit, long_name).  Each may be missing (older files; final_* where the run kept no final
# state or is not 1D): analysis then computes it from the file's arrays.
DETECTOR_VALUES = {
    "detector_initial_mean": ("length", "mean position of the initial packet along the detector's axis"),
    "classical_arrival_probability": ("1", "classical free-flight probability of moving towards the detector"),
    "classical_arrival_mean": ("time", "classical free-flight mean arrival time at the detector"),
    # written only where a constant uniform force (gravity) acts along the detector's axis
    "classical_acceleration": ("acceleration", "constant acceleration along the detector's axis in the "
                                               "classical estimate (uniform forces; absent: free flight)"),
    # the plane waves beyond a detector have energies p^2 / 2m + this (the spectrum's outgoing states)
    "detector_potential": ("energy", "static V at the detector (on a line or plane its mean over it)"),
    # the spectrum's premises, judged on the full grid at run time (the file's V may be decimated)
    "potential_spread_beyond": ("energy", "largest |V - detector_potential| beyond the detector (away from the "
                                          "initial packet)"),
    "potential_spread_on": ("energy", "largest |V - detector_potential| on the detector's line or plane"),
    "final_probability_beyond": ("1", "probability on the grid beyond the detector at the run's end"),
    "final_probability_to_come": ("1", "probability before the detector (or the inner edge of the layer "
                                       "holding it) at the run's end, moving towards it"),
}

# initial_beyond keeps psi0 beyond a detector where |psi0| is above this fraction of its peak (what
# it drops moves b(k, 0) by at most this fraction of max|psi0| per grid point: far below 1e-12 of a
# spectrum's peak; an imaginary-time state's tail is rounding noise near 1e-16 of its peak)
BEYOND_FLOOR = 1e-15


def initial_beyond(psi0, x, x_detector: float, side: float, axis: int = 0) -> tuple[int, np.ndarray]:
    """The part of psi0 beyond ``x_detector`` on ``axis`` (coordinates
    ``x``) towards ``side`` (+1: larger x), trimmed along that axis to the
    span where |psi0| (its largest over the other axes) exceeds BEYOND_FLOOR
    of its peak: (index of its first point along ``axis``, values with that
    axis first; empty when nothing is there).  Run time and analysis of
    older files call it alike."""
    psi0 = np.asarray(psi0)
    x = np.asarray(x, float)
    size = np.moveaxis(np.abs(psi0), axis, 0).reshape(len(x), -1).max(axis=1) if psi0.size else np.zeros(len(x))
    peak = float(size.max()) if psi0.size else 0.0
    there = np.flatnonzero((side * (x - x_detector) > 0) & (size > BEYOND_FLOOR * peak))
    if not there.size:
        return 0, np.zeros((0, *np.delete(psi0.shape, axis)), complex)
    return int(there[0]), np.asarray(np.moveaxis(psi0, axis, 0)[there[0]:there[-1] + 1], complex)


# Those the run computes from its final state (1D runs that keep it).
FINAL_DETECTOR_VALUES = ("final_probability_beyond", "final_probability_to_come")


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
    detector_values: dict = field(default_factory=dict)
    potential_min: float | None = None       # hartree (1D; None where the file does not say)
    initial_beyond: dict | None = None       # detector index -> (first grid index, psi0 values, bohr^-1/2)
    # 2D/3D detectors recording a spectrum: index -> (first index along the normal, psi0 beyond the line or
    # plane with the normal axis first, bohr^(-d/2))
    spectrum_initial_beyond: dict | None = None

    def __getattribute__(self, name):
        # arrays of the grid's size read from a file are loaded on first use (_OnFirstUse)
        value = object.__getattribute__(self, name)
        if type(value) is _OnFirstUse:
            value = value.load()
            object.__setattr__(self, name, value)
        return value

    def packet_center(self, axis: int) -> float:
        """Mean of the initial packet's position along ``axis`` (bohr)."""
        rho = self.marginals[axis][0]
        return float(np.sum(rho * self.grid.axes[axis].coordinates) / np.sum(rho))

    def detector_value(self, name: str, j: int) -> float | None:
        """Detector ``j``'s recorded value ``name`` (a DETECTOR_VALUES key,
        atomic units), or None where the file does not hold it."""
        values = self.detector_values.get(name)
        if values is None or not math.isfinite(float(values[j])):
            return None
        return float(values[j])


class _OnFirstUse:
    """A value of a RecordedRun read from its file when first used."""

    def __init__(self, load):
        self.load = load


class _AxesOnFirstUse(Mapping):
    """Per-axis values read from the file when an axis is first asked for."""

    def __init__(self, loaders: dict):
        self._loaders, self._values = loaders, {}

    def __getitem__(self, axis):
        if axis not in self._values:
            self._values[axis] = self._loaders[axis]()
        return self._values[axis]

    def __iter__(self):
        return iter(self._loaders)

    def __len__(self):
        return len(self._loaders)


def _damage_as_job_error(load, ds, field):
    """``load`` with a missing or malformed array of the record as the
    JobError read_record gives (the array is read after read_record returned)."""
    def checked():
        try:
            return load()
        except (KeyError, ValueError, TypeError, RuntimeError, OSError) as e:
            raise JobError(field, f"{result_name(ds)}: the analysis record is incomplete or damaged ({e}); "
                                  "run the job again") from None
    return checked

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
    def marginal(i, n):
        def load():
            rho = np.asarray(ds[f"initial_position_marginal_{n}"].values, float)
            k = np.asarray(ds[f"k_{n}"].values, float) / lf
            w = np.asarray(ds[f"initial_momentum_marginal_{n}"].values, float)
            if rho.shape != (axes[i].points,) or k.shape != w.shape:
                raise ValueError(f"the marginals along {n} do not match the grid")
            return rho, k, w
        return _damage_as_job_error(load, ds, field)

    for n in names:   # present, or the record is incomplete (said now, not at first use)
        for v in (f"initial_position_marginal_{n}", f"k_{n}", f"initial_momentum_marginal_{n}"):
            if v not in ds.variables:
                raise KeyError(v)
    marginals = _AxesOnFirstUse({i: marginal(i, n) for i, n in enumerate(names)})
    psi0 = v_full = None
    if len(names) == 1 and "initial_psi_real" in ds:
        v_name = "potential_full" if "potential_full" in ds else "potential"

        def initial():
            psi = (np.asarray(ds["initial_psi_real"].values, float)
                   + 1j * np.asarray(ds["initial_psi_imag"].values, float)) / math.sqrt(lf)
            v = np.asarray(ds[v_name].values, float) * ef
            if psi.shape != grid.shape or v.shape != grid.shape:
                raise ValueError("psi0 or the potential does not match the grid")
            return psi, v
        both = functools.cache(_damage_as_job_error(initial, ds, field))   # one read for the two
        psi0 = _OnFirstUse(lambda: both()[0])
        v_full = _OnFirstUse(lambda: both()[1])
    lanczos = None
    if "lanczos_alpha" in ds:
        betas = np.asarray(ds["lanczos_beta"].values, float)
        lanczos = (np.asarray(ds["lanczos_alpha"].values, float) * ef,
                   betas[np.isfinite(betas)] * ef,       # NaN past the last (an exhausted recurrence)
                   bool(int(a["lanczos_exhausted"])), float(a["spectrum_min"]) * ef,
                   float(a["spectrum_max"]) * ef,
                   float(a["ground_energy"]) * ef if "ground_energy" in a else None)
    warnings = json.loads(a["adequacy_warnings"]) if "adequacy_warnings" in a else None
    factors = {"1": 1.0, "length": lf, "time": tf, "acceleration": lf / tf**2, "energy": ef}
    values = {}
    for name, (kind, _) in DETECTOR_VALUES.items():
        if name in ds.variables and dets:
            v = np.asarray(ds[name].values, float) * factors[kind]
            if v.shape != (len(dets),):
                raise ValueError(f"{name} does not match the detectors")
            values[name] = v
    beyond = None
    if "initial_beyond_first" in ds.variables and dets:
        first = np.asarray(ds["initial_beyond_first"].values, np.int64)
        parts = (np.asarray(ds["initial_beyond_real"].values, float)
                 + 1j * np.asarray(ds["initial_beyond_imag"].values, float)) / math.sqrt(lf)
        if first.shape != (len(dets),) or parts.shape[0] != len(dets):
            raise ValueError("initial_beyond does not match the detectors")
        beyond = {j: (int(first[j]), parts[j][np.isfinite(parts[j])]) for j in range(len(dets))}
    spectrum_beyond = None
    if "spectrum_initial_beyond_first" in ds.variables and dets:
        lines = [str(v) for v in ds["spectrum_detector"].values]
        first = np.asarray(ds["spectrum_initial_beyond_first"].values, np.int64)
        slabs = (np.asarray(ds["spectrum_initial_beyond_real"].values, float)
                 + 1j * np.asarray(ds["spectrum_initial_beyond_imag"].values, float)) / lf ** (grid.ndim / 2)
        count = np.asarray(ds["spectrum_initial_beyond_points"].values, np.int64)
        by_name = {str(d.name): j for j, d in enumerate(dets)}
        spectrum_beyond = {by_name[n]: (int(first[i]), slabs[i, :count[i]]) for i, n in enumerate(lines)}
    return RecordedRun(grid=grid, mass=mass, detectors=dets, absorber=absorber,
                       time_dependent=bool(int(a["time_dependent"])), marginals=marginals,
                       dt=float(a["dt"]) * tf, psi0=psi0, static_potential=v_full,
                       warnings=warnings, lanczos=lanczos, detector_values=values,
                       potential_min=float(ds["potential_min"].values) * ef if "potential_min" in ds.variables else None,
                       initial_beyond=beyond, spectrum_initial_beyond=spectrum_beyond)


def result_name(ds) -> str:
    """The file an open dataset was read from, quoted, for messages."""
    source = getattr(ds, "encoding", {}).get("source")
    return repr(str(source)) if source else "the result"


# -- values of the record, computed the same way at run time and from an older file -------
def packet_side_positions(x_axis, rho, x_detector):
    """The positions that carry the packet on its side of the detector
    (arrivals come from the packet's side, as for the oriented flux):
    (x, rho there, x_detector - x); ``rho`` sums to 1 on ``x_axis``."""
    x_axis, rho = np.asarray(x_axis, float), np.asarray(rho, float)
    x0 = float(np.sum(rho * x_axis))
    keep = (rho > 1e-12 * rho.max()) & ((x_axis - x_detector) * (x0 - x_detector) > 0)
    x = x_axis[keep]
    return x, rho[keep], x_detector - x


# Position-momentum pairs summed at once by the accelerated classical estimate
PAIR_BLOCK = 2**20


def first_arrival(distance, velocity, acceleration: float):
    """The first t > 0 at which x(t) = x + v t + a t^2 / 2 has moved by
    ``distance`` d (broadcast arrays; atomic units), NaN where it never
    does: the smaller positive root of (a/2) t^2 + v t - d = 0, in the
    cancellation-free form q = -(v + sign(v) sqrt(v^2 + 2 a d)) / 2,
    t = q / (a/2) and -d / q (Press et al., Numerical Recipes, sec. 5.6)."""
    d = np.asarray(distance, float)
    v = np.asarray(velocity, float)
    half_a = 0.5 * acceleration
    disc = v * v + 2.0 * acceleration * d
    root = np.sqrt(np.maximum(disc, 0.0))
    q = -0.5 * (v + np.where(v >= 0, root, -root))
    with np.errstate(divide="ignore", invalid="ignore"):
        t1 = q / half_a
        t2 = -d / q
    t1 = np.where(t1 > 0, t1, np.inf)
    t2 = np.where(t2 > 0, t2, np.inf)
    t = np.minimum(t1, t2)
    return np.where((disc >= 0) & np.isfinite(t), t, np.nan)


def classical_share(rho, distance, k, w, mass: float, acceleration: float = 0.0) -> tuple[float, float]:
    """(probability of arriving at the detector, mean arrival time) of the
    classical ensemble (:func:`wavesweep.analysis.arrivals.classical_free_flight`):
    positions ``rho`` at signed distances ``distance`` from the detector
    (all of one sign: the packet's side, :func:`packet_side_positions`),
    momenta ``w`` on ``k``, and a constant ``acceleration`` along the axis
    (a uniform force such as gravity; 0: free flight).  In free flight the
    ensemble's weight rho(x) w(k) on the pairs with k d > 0 factors, so
    P = sum rho * sum_{k d > 0} w and <m d / k> = m sum(rho d) sum_{k d > 0}
    (w / k) / P: O(grid), where the sum over pairs is O(grid^2).  With an
    acceleration every pair (of non-negligible weight) is summed with its
    first arrival time (:func:`first_arrival`), in blocks (atomic units)."""
    if not len(distance):
        return 0.0, math.nan
    k, w = np.asarray(k, float), np.asarray(w, float)
    if acceleration:
        weight_k = w > 1e-14 * w.max()
        k, w = k[weight_k], w[weight_k]
        rho, distance = np.asarray(rho, float), np.asarray(distance, float)
        prob = total = 0.0
        rows = max(1, PAIR_BLOCK // max(len(k), 1))
        for i0 in range(0, len(rho), rows):
            t = first_arrival(distance[i0:i0 + rows, None], k[None, :] / mass, acceleration)
            reach = np.isfinite(t)
            pair = rho[i0:i0 + rows, None] * w[None, :]
            prob += float(np.sum(pair, where=reach))
            total += float(np.sum(pair * np.where(reach, t, 0.0)))
        return (prob, total / prob) if prob > 0 else (0.0, math.nan)
    towards = k * distance[0] > 0
    w_towards = w[towards]
    prob = float(np.sum(rho) * np.sum(w_towards))
    if prob <= 0:
        return 0.0, math.nan
    mean = float(mass * np.sum(rho * distance) * np.sum(w_towards / k[towards])) / prob
    return prob, mean


def side_probability(values, coords, length_factor: float, axis: int, x_det: float, side: float,
                     towards: bool = False, is_psi: bool = True, momentum_offset: float = 0.0) -> float:
    """Probability on the ``side`` (+1: above) of the plane x_det (bohr) on
    ``axis``, from psi (``is_psi``) or |psi|^2 on the grid ``coords`` (job
    units, one array per axis; |psi|^2 dV is the same in job units); with
    ``towards``, only the part whose momentum points at the plane (from the
    transform of psi; the part running away does not count).  O(grid):
    a few arrays of psi's size.

    ``momentum_offset`` (hbar/bohr, along ``axis``): ``values`` is psi with
    the plane wave exp(i momentum_offset x) divided out, and its momenta
    are those of the transform plus the offset.  A falling grid's lab psi
    carries m u(t), which its spacing need not resolve (a 1 mm drop of
    Rb-87 reaches ~30 times the grid's k_max): its transform would alias
    the direction of motion, the demodulated one does not."""
    coords = [np.asarray(c, float) for c in coords]
    lf = length_factor
    dv = float(np.prod([abs(c[1] - c[0]) for c in coords]))
    # each point stands for a cell of width dx: count the part of its cell
    # on that side (a detector on a grid point splits that cell)
    x, dx = coords[axis] * lf, abs(coords[axis][1] - coords[axis][0]) * lf
    fraction = np.clip(0.5 + (x - x_det) * side / dx, 0.0, 1.0)
    shape = [1] * values.ndim
    shape[axis] = len(x)
    fraction = fraction.reshape(shape)
    if not is_psi:
        return float(np.sum(values * fraction) * dv)
    total = float(np.sum(np.abs(values) ** 2 * fraction) * dv)
    if not towards or total == 0.0:
        return total
    # The share moving towards the detector, from the transform of psi cut
    # off smoothly (a tanh ramp over a few wavelengths: a sharp cut at a
    # detector the packet is crossing puts ~1 % into spurious momenta).
    k = (2 * np.pi * np.fft.fftfreq(len(x), dx)).reshape(shape)
    c = np.abs(np.fft.fft(values, axis=axis)) ** 2
    k_rms = math.sqrt(float(np.sum(c * k**2) / np.sum(c))) or 1.0 / dx
    ramp = 0.5 * (1 + np.tanh((x - x_det) * side * k_rms / 4.0)).reshape(shape)
    c = np.abs(np.fft.fft(values * ramp, axis=axis)) ** 2
    k_lab = k + momentum_offset
    moving = float(np.sum(c * (k_lab * -side > 0)) + 0.5 * np.sum(c * (k_lab == 0)))
    return total * moving / float(np.sum(c))


def layer_holding(setup, axis: int, x: float) -> str | None:
    """The absorbing face whose layer contains the point x (bohr) on
    ``axis``; ``setup``: a RecordedRun or a set-up (``absorber``, ``grid``)."""
    ab = setup.absorber
    if not ab.active:
        return None
    ax = setup.grid.axes[axis]
    for layer in ab.layers:
        if layer.axis != axis:
            continue
        if layer.name.endswith("+") and x > ax.max - ab.thickness:
            return layer.name
        if layer.name.endswith("-") and x < ax.min + ab.thickness:
            return layer.name
    return None


def layer_edge(setup, face: str) -> float:
    """Inner edge (bohr) of a face's absorbing layer."""
    ax = setup.grid.axes[setup.grid.axis_index(face[:-1])]
    th = setup.absorber.thickness
    return ax.max - th if face.endswith("+") else ax.min + th
