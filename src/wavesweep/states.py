"""Initial states on a grid (atomic units).

* ``gaussian``: psi(x) = (2 pi s^2)^(-1/4) exp(-(x - x0)^2 / (4 s^2) + i p0 (x - x0)),
  a product over axes in 2D/3D; ``s`` (``width``) is the standard deviation
  of |psi|^2 and p0 the mean momentum (hbar = 1).  ``energy`` E instead of
  ``momentum`` means p0 = direction * sqrt(2 m E) (1D/radial).
* ``superposition``: sum_j a_j exp(i phase_j) psi_j of packets in ``packets``.
* ``file``: psi from the ``psi_real``/``psi_imag`` variables of a netCDF file
  (a result of this tool, or anything on the same grid); ``state = i`` picks
  one along a ``state`` dimension (a file of ``wavesweep levels --states``).
  A file with a ``surface`` dimension (coupled surfaces) starts a coupled
  job on all its surfaces, matched by name (:func:`build_surface_state`).
* ``eigenstate``: the stationary state number ``n`` (0 = ground, in energy
  order) of the job's Hamiltonian at t = 0 without the absorber, or of the
  trap given by its own ``potential`` tables, from
  :func:`wavesweep.eigen.eigenpairs`; optionally boosted,
  psi(r) exp(i p.r) (``momentum``, per axis), which adds p to <p>.  A level
  that is degenerate has no unique state and is refused.
* ``ground_state``: the lowest state of the job's Hamiltonian at t = 0
  including its [interaction] (Gross-Pitaevskii; g N from the set-up in
  ``packet["contact"]``), or of the trap in its own ``potential`` tables with
  the job's interaction, by imaginary time to a relative ``tolerance`` on mu
  (:func:`wavesweep.imaginary_time.ground_state`); boosted by ``momentum`` as
  ``eigenstate``.  Without an interaction it is ``eigenstate``, n = 0.

Every state is normalised on the grid.  A packet whose analytic norm is not
on the grid (centre outside, or cut by an edge) is an error.
"""
from __future__ import annotations

import math
import tomllib
from collections.abc import Mapping
from typing import ClassVar

import numpy as np

from .eigen import degenerate_groups, eigenpairs
from .errors import JobError
from .hamiltonian import Hamiltonian
from .imaginary_time import DEFAULT_TOLERANCE, ground_state
from .io.paths import input_file
from .marginals import momentum_marginal
from .registry import registrar
from .schema import Field

__all__ = ["without_momentum", "build_surface_state", "PACKETS", "PACKET_SCHEMAS", "DEFAULT_PACKET", "PacketKind", "register_packet", "build_state",
           "gaussian_packet", "momentum_spread"]


class PacketKind:
    """One kind of initial state (``[packet] kind = ...``): its keys, its
    formula and how psi is built.  A subclass sets

    * ``kind``: the job-file name; ``parameters``: key -> :class:`Field`
      (``kind`` itself is added by :meth:`schema`); ``formula``: psi(r, 0) in
      the keys' names (``wavesweep keys packet.KIND`` prints both);
    * ``nested``: the key holding packet tables of its own (validated,
      converted and built as packets, named ``packet.KEY.j``), else None;
      ``trap``: the key holding ``[[potential]]``-style tables (validated
      like the job's; built into ``packet["trap_terms"]``), else None.  A
      ``path`` key is a file relative to the job file's folder;
      ``interacting``: True when the state depends on the job's
      [interaction] (the set-up puts g N in ``packet["contact"]``);
      ``own_surfaces``: True when the state may carry a part on every
      coupled surface itself (a state file with a ``surface`` dimension),
      so a coupled job's ``[packet] surface`` is not required of it;

    and implements :meth:`build`, and where they apply :meth:`key_conflicts`,
    :meth:`ignored_keys`, :meth:`unstated_defaults`, :meth:`gaussian_parts`
    and :meth:`all_gaussian`.  :func:`register_packet` makes it a kind: the
    job's validation, the set-up, ``wavesweep keys`` and ``check`` read
    :data:`PACKETS` only.
    """

    kind: ClassVar[str] = ""
    parameters: ClassVar[dict] = {}
    formula: ClassVar[str] = ""
    nested: ClassVar[str | None] = None
    trap: ClassVar[str | None] = None
    interacting: ClassVar[bool] = False
    own_surfaces: ClassVar[bool] = False

    @classmethod
    def schema(cls) -> dict:
        """The table's schema: ``kind`` first, then :attr:`parameters`."""
        return {"kind": Field("str", cls.kind, doc="the packet kind (wavesweep keys packet lists them)"),
                **cls.parameters}

    @classmethod
    def key_conflicts(cls, raw: dict, ndim: int | None) -> list[tuple[str, str]]:
        """``(key, message)`` for keys that may not be given together, from
        their presence alone (checked even when a value is bad)."""
        return []

    @classmethod
    def build(cls, packet: dict, grid, mass: float, field: str, length_unit, terms) -> np.ndarray:
        """psi on the grid (any norm; :func:`build_state` normalises it) from
        the packet table in atomic units; see :func:`build_state`."""
        raise NotImplementedError

    @classmethod
    def ignored_keys(cls, used: dict) -> tuple:
        """Keys whose default does not matter given the others (not listed by
        ``check`` as physics defaults)."""
        return ()

    @classmethod
    def unstated_defaults(cls, given: dict, used: dict, units) -> list[tuple[str, str, str]]:
        """``(key, value in job units, what it is)`` for choices a job left
        out that stay out of the resolved job (``check`` lists them)."""
        return []

    @classmethod
    def gaussian_parts(cls, packet: dict) -> list:
        """The Gaussian packets (atomic units) this packet is made of."""
        return []

    @classmethod
    def all_gaussian(cls, packet: dict) -> bool:
        """Whether it is Gaussian parts only (momenta known in closed form)."""
        return False

    @classmethod
    def declared_momentum(cls, packet: dict, mass: float, ndim: int) -> list[float] | None:
        """The packet's centre momentum as the job declares it (atomic
        units, per axis), or None where only the built state can tell (a
        falling grid then measures it).  A falling grid removes it before
        the state meets the grid's transform, so a launch faster than the
        grid resolves stays exact (a sampled plane wave times its conjugate
        is the envelope, point by point)."""
        return None


# kind -> PacketKind subclass: the one list of packet kinds.
PACKETS: dict[str, type[PacketKind]] = {}


register_packet = registrar(PACKETS, "kind", "a ``[packet] kind``")


class _Schemas(Mapping):
    """kind -> schema of every registered packet kind, read from :data:`PACKETS`."""

    def __getitem__(self, kind):
        return PACKETS[kind].schema()

    def __iter__(self):
        return iter(PACKETS)

    def __len__(self):
        return len(PACKETS)


PACKET_SCHEMAS: Mapping[str, dict] = _Schemas()


def gaussian_packet(coord: np.ndarray, x0: float, width: float, p0: float) -> np.ndarray:
    """One-axis Gaussian packet (bohr, bohr, hbar/bohr); unit L2 norm on the line."""
    s = coord - x0
    return (2 * math.pi * width**2) ** -0.25 * np.exp(-(s**2) / (4 * width**2) + 1j * p0 * s)


def momentum_spread(width: float) -> float:
    """Standard deviation of the momentum of a minimum-uncertainty packet, hbar / (2 width)."""
    return 0.5 / width


def central_momenta(packet: dict, mass: float, ndim: int, field: str) -> list[float]:
    """p0 per axis (atomic units) from ``momentum`` or ``energy`` (already atomic)."""
    if packet.get("momentum") is not None and packet.get("energy") is not None:
        raise JobError(f"{field}.energy", "give either momentum or energy, not both")
    if packet.get("energy") is not None:
        if ndim != 1:
            raise JobError(f"{field}.energy", "in 2D/3D give `momentum` per axis instead")
        return [packet.get("direction", 1.0) * math.sqrt(2 * mass * packet["energy"])]
    p = packet.get("momentum")
    if p is None:
        return [0.0] * ndim
    return list(p)


def build_state(packet: dict, grid, mass: float, field: str = "packet",
                length_unit: tuple[float, str] = (1.0, "bohr"), terms=None) -> np.ndarray:
    """psi on the grid (complex128, normalised) from a packet table in atomic
    units; ``length_unit`` (bohr per unit, label) is for messages only.
    ``terms``: the job's potential terms, the default trap of an
    ``eigenstate`` packet (whose own trap, if any, is ``packet["trap_terms"]``)."""
    kind = packet.get("kind", DEFAULT_PACKET)
    if kind not in PACKETS:  # validated upstream; a programming error here
        raise JobError(f"{field}.kind", f"unknown packet kind {kind!r}")
    psi = PACKETS[kind].build(packet, grid, mass, field, length_unit, terms)
    norm = float(np.sum(np.abs(psi) ** 2)) * grid.cell_volume
    if not np.isfinite(norm) or norm <= 0:
        raise JobError(field, "the initial state is zero or not finite on the grid")
    return psi / math.sqrt(norm)


def _gaussian_state(packet, grid, mass, field, length_unit=(1.0, "bohr")):
    lf, lu = length_unit
    x0s, widths = packet["center"], packet["width"]
    p0s = central_momenta(packet, mass, grid.ndim, field)
    psi = np.ones((1,) * grid.ndim, complex)
    for i, ax in enumerate(grid.axes):
        x0, w = x0s[i], widths[i]
        if not (ax.min < x0 < ax.max):
            raise JobError(f"{field}.center", f"{ax.name} = {x0 / lf:g} {lu} lies outside the grid "
                                              f"[{ax.min / lf:g}, {ax.max / lf:g}] {lu}")
        line = gaussian_packet(ax.coordinates, x0, w, p0s[i])
        # the packet must be on the grid, not cut by an edge (beyond 1e-8 of its weight)
        on_grid = float(np.sum(np.abs(line) ** 2)) * ax.dx
        tail = 0.5 * math.erfc((min(x0 - ax.min, ax.max - x0)) / (math.sqrt(2) * w))
        if ax.boundary == "box" or grid.radial:
            if tail > 1e-8:
                raise JobError(f"{field}.center", f"the packet reaches the {ax.name} wall "
                               f"({tail:.1e} of it lies beyond); move it inward or narrow it")
        elif tail > 1e-8:
            raise JobError(f"{field}.center", f"the packet reaches the {ax.name} edge "
                           f"({tail:.1e} of it lies beyond); move it inward or narrow it")
        if not np.isfinite(on_grid) or abs(on_grid - 1.0) > 1e-6:
            raise JobError(f"{field}.width", f"the grid does not resolve the packet along {ax.name} "
                           f"(norm on grid {on_grid:.6f}); use more points or a wider packet")
        shape = [1] * grid.ndim
        shape[i] = ax.points
        psi = psi * line.reshape(shape)
    return psi


def _superposition(packet, grid, mass, field, length_unit=(1.0, "bohr"), terms=None):
    parts = packet["packets"]
    if not parts:
        raise JobError(f"{field}.packets", "needs at least one packet table")
    amps = packet.get("amplitudes") or [1.0] * len(parts)
    phases = packet.get("phases") or [0.0] * len(parts)
    if len(amps) != len(parts) or len(phases) != len(parts):
        raise JobError(f"{field}.amplitudes", "needs one amplitude and one phase per packet")
    psi = 0.0
    for j, (sub, a, ph) in enumerate(zip(parts, amps, phases)):
        psi = psi + float(a) * np.exp(1j * float(ph)) * build_state(sub, grid, mass, f"{field}.packets.{j}",
                                                                     length_unit, terms)
    return np.broadcast_to(psi, grid.shape).astype(complex)


def build_surface_state(packet: dict, grid, mass: float, surface_terms, names, field: str = "packet",
                        length_unit: tuple[float, str] = (1.0, "bohr")) -> np.ndarray:
    """psi (S, *grid) on coupled surfaces (complex128, normalised over all of
    them) from a packet table in atomic units: the packet on the surface its
    ``surface`` names, or a superposition whose members each name theirs
    (amplitudes and phases as for one surface), or a state file's state on
    all surfaces (a ``file`` packet reading a ``surface`` dimension: a
    coupled run's result or a coupled ``levels --states`` file; each part
    goes to the job's surface of its name, the relative weights kept).  A
    stationary packet is of its own surface's potential
    (``surface_terms[s]``) unless it names a trap."""
    psi = np.zeros((len(names),) + grid.shape, complex)
    if PACKETS[packet.get("kind", DEFAULT_PACKET)].own_surfaces:
        state, its_names = _read_state_file(packet, grid, field, length_unit)
        if its_names is not None:
            psi[:] = _onto_surfaces(state, its_names, names, packet, field)
            return _normalised_over_surfaces(psi, grid, field, "path", "the state in the file is zero")
        if packet.get("surface") is None:
            raise JobError(f"{field}.surface", f"which surface the state in {packet['path']!r} starts on (the "
                                               f"file has one surface): one of {', '.join(map(repr, names))}")
        s = names.index(packet["surface"])
        psi[s] = state
        return _normalised_over_surfaces(psi, grid, field, "path", "the state in the file is zero")
    if packet.get("surface") is not None:
        s = names.index(packet["surface"])
        psi[s] = build_state({k: v for k, v in packet.items() if k != "surface"}, grid, mass, field,
                             length_unit, surface_terms[s])
        return psi
    parts = packet["packets"]   # validated: a superposition whose members name their surfaces
    amps = packet.get("amplitudes") or [1.0] * len(parts)
    phases = packet.get("phases") or [0.0] * len(parts)
    for j, (sub, a, ph) in enumerate(zip(parts, amps, phases)):
        s = names.index(sub["surface"])
        one = build_state({k: v for k, v in sub.items() if k != "surface"}, grid, mass,
                          f"{field}.packets.{j}", length_unit, surface_terms[s])
        psi[s] += float(a) * np.exp(1j * float(ph)) * one
    return _normalised_over_surfaces(psi, grid, field, "amplitudes",
                                     "the superposition vanishes on the grid (its members cancel)")


def _normalised_over_surfaces(psi, grid, field, key, vanished) -> np.ndarray:
    """psi (S, *grid) over sqrt(sum_s integral |psi_s|^2 dV); ``field.key``
    names the error when nothing is left."""
    norm = float(np.sum(np.abs(psi) ** 2)) * grid.cell_volume
    if not np.isfinite(norm) or norm <= 0:
        raise JobError(f"{field}.{key}", vanished)
    return psi / np.sqrt(norm)


def _onto_surfaces(state, its_names, names, packet, field) -> np.ndarray:
    """A file's state (its surfaces ``its_names``, in its order) in the
    job's order of surfaces ``names``; refused, naming the field, when the
    packet names a surface too or the two sets of names differ."""
    path = packet["path"]
    listed = ", ".join(map(repr, its_names))
    if packet.get("surface") is not None:
        raise JobError(f"{field}.surface", f"the state in {path!r} has a part on each of its surfaces ({listed}), "
                                           "which go to this job's surfaces of the same names; remove surface")
    if sorted(its_names) != sorted(names) or len(set(its_names)) != len(its_names):
        raise JobError(f"{field}.path", f"the state in {path!r} is on the surfaces {listed}, this job's are "
                                        f"{', '.join(map(repr, names))}; use a state of a job with the same "
                                        "surface names, or a single-surface state with packet.surface")
    return state[[its_names.index(n) for n in names]]


def _trap_of(packet, terms, kind: str):
    """The terms a state is prepared in: the packet's own ``potential`` (its
    trap) or the job's."""
    trap = packet.get("trap_terms")
    if trap is None:
        if terms is None:
            raise ValueError(f"a {kind} packet needs the job's potential terms")
        trap = terms
    return trap


def _eigenstate(packet, grid, mass, field, terms):
    trap = _trap_of(packet, terms, "eigenstate")
    n = int(packet.get("n", 0))
    if n >= grid.size:
        raise JobError(f"{field}.n", f"the grid has only {grid.size} states (0..{grid.size - 1}); got {n}")
    # one level more than asked for, to tell whether level n is degenerate
    energies, states = eigenpairs(Hamiltonian(grid, mass, trap), min(n + 2, grid.size), t=0.0,
                                  field=f"{field}.n")
    for first, last in degenerate_groups(energies):
        if first <= n <= last:
            j = n + 1 if n < last else n - 1
            raise JobError(f"{field}.n", f"level {n} is degenerate with level {j} (E = {energies[n]:.10g} "
                                         "hartree): its state is not unique; break the symmetry of the trap "
                                         "or superpose the degenerate states yourself")
    psi = states[n].astype(complex)
    if packet.get("momentum") is not None:
        psi = _boost(psi, grid, packet["momentum"], field)
    return psi


def _boost_momentum(packet, ndim) -> list[float]:
    """A stationary state's mean momentum: its boost (a real state has <p> = 0)."""
    p = packet.get("momentum")
    return [0.0] * ndim if p is None else [float(v) for v in p]


# The keys that set a packet's centre momentum (removed by without_momentum).
MOMENTUM_KEYS = ("momentum", "energy", "direction")


def without_momentum(packet: dict) -> dict:
    """The packet table (atomic units) at rest: its momentum keys removed,
    in its members too.  A falling grid builds this and carries the
    declared momentum in its own velocity."""
    out = {k: v for k, v in packet.items() if k not in MOMENTUM_KEYS}
    kind = PACKETS.get(out.get("kind", DEFAULT_PACKET))
    if kind is not None and kind.nested and isinstance(out.get(kind.nested), list):
        out[kind.nested] = [without_momentum(p) for p in out[kind.nested]]
    return out


def _boost(psi, grid, momenta, field):
    """psi exp(i p.r); refused where the boosted state outruns the grid's
    momenta (|p| + 3 sigma_p > k_max on an axis, as for Gaussian packets)."""
    if grid.radial:
        raise JobError(f"{field}.momentum", "a radial state u(r) has no direction to boost; remove momentum")
    phase = 0.0
    for i, (ax, p) in enumerate(zip(grid.axes, momenta)):
        if not p:
            continue
        k, weight = momentum_marginal(psi, grid, i)
        sigma = math.sqrt(float(np.sum(k**2 * weight)))  # psi is real: <p> = 0
        reach = abs(p) + 3.0 * sigma
        if reach > ax.k_max:
            need = math.ceil(ax.length * (abs(p) + 6.0 * sigma) / math.pi) + 1
            raise JobError(f"{field}.momentum", f"the boosted state reaches {reach / ax.k_max:.2f} times the "
                                                f"largest momentum the grid resolves along {ax.name} "
                                                f"(|p| + 3 sigma_p); use at least {need} points or a "
                                                "smaller boost")
        phase = phase + p * grid.coordinate(i)
    return psi * np.exp(1j * phase)


def _from_file(packet, grid, field, length_unit=(1.0, "bohr")):
    """psi on one surface from a state file; a state on coupled surfaces (a
    ``surface`` dimension) is refused: only a coupled job reads it, whole."""
    psi, its_names = _read_state_file(packet, grid, field, length_unit)
    if its_names is not None:
        raise JobError(f"{field}.path", f"the state in {packet['path']!r} is on the coupled surfaces "
                                        f"{', '.join(map(repr, its_names))}: only a job with [[surface]] tables "
                                        "of those names reads it, as its whole [packet] (kind = 'file', "
                                        "without surface); use a single-surface state here")
    return psi


def _read_state_file(packet, grid, field, length_unit=(1.0, "bohr")) -> tuple[np.ndarray, list[str] | None]:
    """``(psi, surfaces)`` from the ``real``/``imag`` variables of a state
    file: psi on the grid and ``surfaces`` None, or, where the file has a
    ``surface`` dimension (a coupled run's result, a coupled ``levels
    --states`` file), psi (S, *grid) and the file's surface names in its
    order.  A file on another grid is refused naming ``path``."""
    import xarray as xr  # lazy: xarray (0.3 s with pandas), only for a state read from a file

    path = packet["path"]
    input_file(path, f"{field}.path", "state file")   # a FIFO or /dev/zero would block or never end
    try:
        with xr.open_dataset(path) as ds:
            for key in ("real", "imag"):
                if packet[key] not in ds:
                    raise JobError(f"{field}.{key}", f"{packet[key]!r} is not in {path!r}")
            re = ds[packet["real"]].load()
            im = ds[packet["imag"]].load()
            lf = float(ds.attrs.get("length_to_bohr", 1.0))
            its_grid = _grid_of_file(ds)
            re, im = _pick_state(re, im, packet.get("state"), path, field)
            surfaces = None
            if "surface" in re.dims:   # the surface axis first, as a coupled job's psi; never a grid axis
                re, im = re.transpose("surface", ...), im.transpose("surface", ...)
                surfaces = ([str(v) for v in re["surface"].values] if "surface" in re.coords
                            else [str(v) for v in range(re.sizes["surface"])])
    except JobError:  # a JobError is a ValueError: keep its own field
        raise
    except (OSError, ValueError) as e:
        raise JobError(f"{field}.path", f"cannot read {path!r} as netCDF: {e}") from e
    axes = [d for d in re.dims if d != "surface"]
    dims = tuple(d.removesuffix("_full") for d in axes)
    shape = tuple(re.sizes[d] for d in axes)
    same = dims == grid.names and shape == grid.shape
    differ = "" if same else "axes" if dims != grid.names else "points"
    if same:
        for dim, ax in zip(axes, grid.axes):
            c = np.asarray(re[dim].values, float) * lf
            if not np.allclose(c, ax.coordinates, rtol=0, atol=1e-6 * ax.dx):
                differ = f"{dim.removesuffix('_full')} coordinates"
                break
    if differ:
        raise JobError(f"{field}.path", _other_grid(path, re, axes, dims, lf, its_grid, grid, differ,
                                                    length_unit))
    return np.asarray(re.values, float) + 1j * np.asarray(im.values, float), surfaces


def _grid_of_file(ds) -> str | None:
    """The [grid] a wavesweep file was made on, as written in its job
    (results and ``levels --states`` files keep the job), else None."""
    try:
        grid = tomllib.loads(str(ds.attrs["job"]))["grid"]
        unit = str(ds.attrs.get("units_length", ""))
        parts = []
        for name in ("x", "y", "z", "r"):
            if isinstance(grid.get(name), dict):
                a = grid[name]
                parts.append(f"{name} = {{ min = {a.get('min', 0.0)!r}, max = {a['max']!r}, "
                             f"points = {a['points']!r} }}")
        if not parts:
            return None
        extras = [unit] if unit else []
        if "boundary" in grid:
            extras.append(f"boundary {grid['boundary']!r}")
        return "; ".join(parts) + (f" ({', '.join(extras)})" if extras else "")
    except (KeyError, TypeError, ValueError, tomllib.TOMLDecodeError):
        return None


def _other_grid(path, re, axes, dims, lf, its_grid, grid, differ, length_unit) -> str:
    """One line: how the file's grid (its grid dimensions ``axes``, named
    ``dims`` without a ``_full``) and the job's differ, and what to do."""
    factor, label = length_unit
    if its_grid is None:   # a foreign file: describe it by its coordinates
        parts = []
        for dim, name in zip(axes, dims):
            c = np.asarray(re[dim].values, float) * lf / factor
            ends = f" from {c[0]:g} to {c[-1]:g} {label}" if c.size else ""
            parts.append(f"{name}: {c.size} points{ends}")
        its_grid = "; ".join(parts) if parts else "no axes"
    ours = "; ".join(f"{ax.name} = {{ min = {ax.min / factor:g}, max = {ax.max / factor:g}, "
                     f"points = {ax.points} }}" for ax in grid.axes)
    boundaries = sorted({ax.boundary for ax in grid.axes})
    ours += f" ({label}, boundary {', '.join(map(repr, boundaries))})"
    return (f"the state in {path!r} is on another grid (its {differ} differ): it was made on {its_grid}, "
            f"this job's grid is {ours}; use a state on this grid (same axes, min, max, points and "
            f"boundary): re-run the job that wrote it with this job's [grid], or write the states of "
            f"this grid with `wavesweep levels JOB.toml --count K --states FILE.nc`")


def _pick_state(re, im, index, path, field):
    """One state along a ``state`` dimension (``wavesweep levels --states``)."""
    if "state" not in re.dims:
        if index is not None:
            raise JobError(f"{field}.state", f"{path!r} holds one state (no state dimension); remove state")
        return re, im
    n = re.sizes["state"]
    if index is None:
        if n != 1:
            raise JobError(f"{field}.state", f"{path!r} holds {n} states; choose one with state = 0..{n - 1}")
        index = 0
    if index >= n:
        raise JobError(f"{field}.state", f"{path!r} holds {n} states (0..{n - 1}); got {index}")
    return re.isel(state=index, drop=True), im.isel(state=index, drop=True)


# ---------------------------------------------------------------------------
# The kinds (registered in this order: `wavesweep keys packet` lists them so)
# ---------------------------------------------------------------------------
@register_packet
class GaussianPacket(PacketKind):
    kind = "gaussian"
    parameters = {
        "center": Field("length", per_axis=True, doc="packet centre x0 (one per axis in 2D/3D)"),
        "width": Field("length", per_axis=True, positive=True,
                       doc="standard deviation of |psi|^2 in position"),
        "momentum": Field("momentum", None, per_axis=True, doc="central momentum p0"),
        "energy": Field("energy", None, nonnegative=True,
                        doc="kinetic energy p0^2/2m of the central momentum (1D)"),
        "direction": Field("number", 1.0, choices=(1, -1, 1.0, -1.0), physics=True,
                           doc="sign of p0 with `energy`: 1 towards +x, -1 towards -x"),
    }
    formula = ("psi(r) = prod_i (2 pi width_i^2)^(-1/4) exp(-(x_i - center_i)^2 / (4 width_i^2) "
               "+ i p_i (x_i - center_i)), p = momentum (hbar = 1); width is the standard "
               "deviation of |psi|^2, the momentum spread is hbar / (2 width).  With energy "
               "instead (1D): p = direction * sqrt(2 m energy).  Neither: p = 0")

    @classmethod
    def key_conflicts(cls, raw, ndim):
        if raw.get("momentum") is not None and raw.get("energy") is not None:
            return [("energy", "give either momentum or energy, not both")]
        if raw.get("energy") is not None and ndim not in (None, 1):
            return [("energy", "in 2D/3D give `momentum` per axis instead")]
        return []

    @classmethod
    def build(cls, packet, grid, mass, field, length_unit, terms):
        return _gaussian_state(packet, grid, mass, field, length_unit)

    @classmethod
    def ignored_keys(cls, used):
        # the sign of p0 matters only when p0 comes from the energy
        return ("direction",) if used.get("energy") is None else ()

    @classmethod
    def unstated_defaults(cls, given, used, units):
        if "momentum" not in given and "energy" not in given:
            return [("momentum", f"0.0 {units.unit_label('momentum')}",
                     "neither momentum nor energy given: a packet at rest")]
        return []

    @classmethod
    def gaussian_parts(cls, packet):
        return [packet]

    @classmethod
    def all_gaussian(cls, packet):
        return True

    @classmethod
    def declared_momentum(cls, packet, mass, ndim):
        return [float(p) for p in central_momenta(packet, mass, ndim, "packet")]


# The kind of a [packet] table that names none.
DEFAULT_PACKET = GaussianPacket.kind


@register_packet
class Superposition(PacketKind):
    kind = "superposition"
    parameters = {
        "packets": Field("list", doc="packet tables to superpose"),
        "amplitudes": Field("list", None, doc="real weights a_j (default all 1)"),
        "phases": Field("list", None, doc="phases in radians (default all 0)"),
    }
    formula = ("psi = sum_j amplitudes_j exp(i phases_j) psi_j, psi_j the packet tables in "
               "packets, then normalised on the grid")
    nested = "packets"

    @classmethod
    def build(cls, packet, grid, mass, field, length_unit, terms):
        return _superposition(packet, grid, mass, field, length_unit, terms)

    @classmethod
    def unstated_defaults(cls, given, used, units):
        n = len(used.get("packets") or [])
        return [(key, repr([value] * n), doc)
                for key, value, doc in (("amplitudes", 1.0, "weights of the packets"),
                                        ("phases", 0.0, "phases of the packets (rad)"))
                if key not in given]

    @classmethod
    def gaussian_parts(cls, packet):
        return [q for p in packet["packets"] for q in PACKETS[p["kind"]].gaussian_parts(p)]

    @classmethod
    def declared_momentum(cls, packet, mass, ndim):
        """The members' common momentum, if they share one (else None: measured)."""
        each = [PACKETS[p["kind"]].declared_momentum(p, mass, ndim) for p in packet["packets"]]
        return each[0] if each and all(e is not None and np.allclose(e, each[0], rtol=0, atol=0) for e in each) \
            else None

    @classmethod
    def all_gaussian(cls, packet):
        return all(PACKETS[p["kind"]].all_gaussian(p) for p in packet["packets"])


@register_packet
class FilePacket(PacketKind):
    kind = "file"
    parameters = {
        "path": Field("str", doc="netCDF file with psi_real and psi_imag on this grid "
                                 "(relative to the job file's folder)"),
        "real": Field("str", "psi_real", doc="variable holding Re psi"),
        "imag": Field("str", "psi_imag", doc="variable holding Im psi"),
        "state": Field("int", None, nonnegative=True,
                       doc="which state along the file's `state` dimension (0-based)"),
    }
    formula = ("psi = real + i imag, the two netCDF variables (on exactly this grid); state picks "
               "one along a `state` dimension.  On coupled surfaces: a file with a `surface` dimension "
               "(a coupled run's result, a coupled `levels --states` file) gives each surface of the "
               "same name its part (no packet surface); a file of one surface goes on packet.surface")
    own_surfaces = True

    @classmethod
    def build(cls, packet, grid, mass, field, length_unit, terms):
        return _from_file(packet, grid, field, length_unit)


@register_packet
class Eigenstate(PacketKind):
    kind = "eigenstate"
    parameters = {
        "n": Field("int", 0, nonnegative=True, physics=True,
                   doc="which stationary state: 0 = ground, in energy order"),
        "momentum": Field("momentum", None, per_axis=True, doc="boost p: psi(r) exp(i p.r)"),
        "potential": Field("list", None, doc="[[potential]]-style tables of the trap the state is "
                                             "prepared in (default: the job's own potential)"),
    }
    formula = ("psi = the n-th stationary state (0 = ground) of the Hamiltonian at t = 0 "
               "without the absorber (the job's potential, or the tables in `potential`), "
               "times exp(i momentum . r) when momentum is given; a degenerate level is refused")
    trap = "potential"

    @classmethod
    def build(cls, packet, grid, mass, field, length_unit, terms):
        return _eigenstate(packet, grid, mass, field, terms)

    @classmethod
    def declared_momentum(cls, packet, mass, ndim):
        return _boost_momentum(packet, ndim)


def _ground_state(packet, grid, mass, field, terms):
    trap = _trap_of(packet, terms, "ground_state")
    hamiltonian = Hamiltonian(grid, mass, trap, contact=packet.get("contact", 0.0))
    tolerance = packet.get("tolerance")
    psi, *_ = ground_state(hamiltonian, DEFAULT_TOLERANCE if tolerance is None else tolerance,
                           field=field)
    psi = psi.astype(complex)
    if packet.get("momentum") is not None:
        psi = _boost(psi, grid, packet["momentum"], field)
    return psi


@register_packet
class GroundState(PacketKind):
    kind = "ground_state"
    parameters = {
        "tolerance": Field("number", DEFAULT_TOLERANCE, positive=True, maximum=0.1, physics=True,
                           doc="relative accuracy of the chemical potential mu (imaginary time, "
                               "splitting error included)"),
        "momentum": Field("momentum", None, per_axis=True, doc="boost p: psi(r) exp(i p.r)"),
        "potential": Field("list", None, doc="[[potential]]-style tables of the trap the state is "
                                             "prepared in (default: the job's own potential)"),
    }
    formula = ("psi = the lowest stationary state of T + V + g N |psi|^2 at t = 0 without the absorber "
               "(the job's potential, or the tables in `potential`; g N from the job's [interaction], "
               "0 without one), by imaginary time (normalised gradient flow, Bao & Du 2004) until mu "
               "is converged to `tolerance` (relative), times exp(i momentum . r) when momentum is given")
    trap = "potential"
    interacting = True

    @classmethod
    def build(cls, packet, grid, mass, field, length_unit, terms):
        return _ground_state(packet, grid, mass, field, terms)

    @classmethod
    def declared_momentum(cls, packet, mass, ndim):
        return _boost_momentum(packet, ndim)
