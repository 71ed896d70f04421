"""A job's physics in atomic units: the grid, the Hamiltonian, the packet,
the absorber, the detectors and the propagator, with nothing stepped.

:class:`Model` is the particle, grid, potential and real Hamiltonian alone:
stationary states (``levels``) need no packet.  :class:`Setup` adds the
packet, the absorber (tuning a CAP the job leaves open), the detectors and
the propagator.  :func:`resolve_job` gives the complete job (a tuned CAP
written in): a new :class:`~wavesweep.job.Job`, the given one unchanged.

The run's analysis record (what analysis reads from a result instead of a
rebuilt set-up; :mod:`wavesweep.io.record`) is made here from a set-up:
:func:`analysis_record` (written by the run), :func:`recorded_run` (the
same in memory), and :func:`rebuilt_record` for a file written before
results kept it.
"""
from __future__ import annotations

import contextlib
import functools
import json
import math
import threading
import tomllib

import numpy as np

from .absorbers.layers import Absorber, face_names
from .absorbers.tuning import cached_cap_strength
from .adequacy import (coupled_dynamics, dynamics, memory_error, memory_estimate, physical_memory_error,
                       representability, run_warnings)
from .eigen import BAND_CHUNK, BAND_STEPS, DEFAULT_MIN_WEIGHT, DENSE_MAX_POINTS, band_window, lanczos_recurrence
from .errors import JobError
from .fft import AUTO, PLAIN, make_transform
from .grid import Axis, Grid
from .hamiltonian import Hamiltonian, static_potential_of
from .interaction import ContactInteraction
from .io.record import (LANCZOS_MAX_POINTS, initial_beyond, RECORD_VERSION, RecordedAbsorber, RecordedDetector, RecordedLayer,
                        RecordedRun, classical_share, layer_edge, layer_holding, packet_side_positions, result_name,
                        side_probability)
from .job import Job, grid_axes, job_from_dict
from .job.schemas import interaction_schema
from .marginals import free_space_marginals
from .frame import FreeFallFrame, frame_terms
from .observables import Detector, Observer, mean_position_momentum, recorded_scalars
from .potentials import PotentialContext, make_term
from .propagators import scheme_class
from .schema import to_atomic
from .states import PACKET_SCHEMAS, PACKETS, build_state, build_surface_state, without_momentum
from .surfaces import (COUPLED_EXPANSIONS, CoupledChebyshev, CoupledSplitOperator, SurfaceHamiltonian,
                       adiabatic_populations, coupled_weights, local_eigenvectors)

__all__ = ["Model", "Setup", "CoupledSetup", "resolve_job", "analysis_record", "recorded_run", "rebuilt_record",
           "final_detector_values", "records_final_values", "set_kernel_threads", "single_threaded_blas",
           "blas_on_one_thread", "AXIS_LONG"]

AXIS_LONG = {"x": "position x", "y": "position y", "z": "position z", "r": "radius r"}


def resolve_job(job: Job) -> Job:
    """The complete job: ``job`` itself when nothing is left for the physics
    to choose, else a new Job with the CAP's strength (one per face) and
    exponent tuned to what arrives at each layer (see
    :meth:`Setup._tuned_cap`; the tuning is cached in memory and on disk).
    ``job`` is not changed.  Run ids and job TOML are those of the
    complete job, so the id is the same before and after a run, and for a
    rerun of the job text stored in the result."""
    if not job.needs_tuning:
        return job
    # the tuning builds the set-up (psi0, V): judged from the grid's shape
    # first, a grid no machine holds is one line, not an allocation
    error = physical_memory_error(memory_estimate(job)["estimate_bytes"])
    if error is not None:
        raise error
    return (CoupledSetup if job.table.get("surface") else Setup)(job).job   # coupled: a CAP's power written in


class Model:
    """The job's particle, grid and potential terms in atomic units, and the
    real Hamiltonian they make: what stationary states need, and nothing of
    the run (no packet, absorber, detectors or time stepping), so nothing
    about the packet can stop it.

    ``grid`` replaces the job's grid (the terms are evaluated on it): the
    same physics on another grid, as convergence studies need.
    ``hamiltonian`` is T + V0 + the time-dependent terms, without the
    absorber (:class:`Setup` replaces it by the run's, with the absorber)."""

    def __init__(self, job: Job, grid: Grid | None = None):
        self.job = job
        t, u = job.table, job.units
        self.units = u
        self.mass = u.to_atomic(t["particle"]["mass"], "mass", "particle.mass")
        charge = t["particle"].get("charge")
        self.charge = None if charge is None else u.to_atomic(charge, "charge", "particle.charge")
        self.grid = self._grid(t["grid"]) if grid is None else grid
        self.terms = [self._term(i, p) for i, p in enumerate(t["potential"])]
        self.lab_terms = self.terms   # the job's terms in the lab (a falling grid's Hamiltonian has others)
        self.interaction = self._interaction(t.get("interaction"))
        # coupled surfaces ([[surface]], [[coupling]]): names, each surface's terms (the job's
        # [[potential]] terms on every one) and each coupled pair's; none: one surface
        self.surfaces = [s["name"] for s in t.get("surface", [])]
        self.surface_terms = [self.terms + [self._term(k, p, f"surface.{i}.potential")
                                            for k, p in enumerate(s["potential"])]
                              for i, s in enumerate(t.get("surface", []))]
        self.coupling_terms = {}
        for i, c in enumerate(t.get("coupling", [])):
            a, b = sorted(self.surfaces.index(n) for n in c["surfaces"])
            self.coupling_terms[a, b] = [self._term(k, p, f"coupling.{i}.potential") for k, p in enumerate(c["potential"])]

    @property
    def coupled(self) -> bool:
        """Whether the job has several surfaces ([[surface]] tables)."""
        return bool(self.surfaces)

    @functools.cached_property
    def surface_hamiltonian(self) -> SurfaceHamiltonian:
        """H = T + V(r, t) on the job's surfaces, without the absorber (:mod:`wavesweep.surfaces`)."""
        if not self.coupled:
            raise ValueError("the job has one surface: use Model.hamiltonian")
        return SurfaceHamiltonian(self.grid, self.mass, self.surfaces, self.surface_terms, self.coupling_terms)

    @functools.cached_property
    def hamiltonian(self) -> Hamiltonian:
        return Hamiltonian(self.grid, self.mass, self.terms, static_potential=self.hamiltonian_static_potential(),
                           contact=self.contact)

    @property
    def contact(self) -> float:
        """g N (hartree bohr^d) of the job's [interaction]; 0 without one."""
        return 0.0 if self.interaction is None else self.interaction.strength

    def _interaction(self, table) -> ContactInteraction | None:
        """The [interaction] in atomic units (None without the table)."""
        if table is None:
            return None
        nd = self.grid.ndim
        au = to_atomic(table, interaction_schema(nd), self.units, "interaction", nd)
        return ContactInteraction.from_table(au, self.mass, nd)

    def _grid(self, g) -> Grid:
        u, axes = self.units, []
        for name in grid_axes(g):
            a = g[name]
            axes.append(Axis(name, u.to_atomic(a["min"], "length"), u.to_atomic(a["max"], "length"),
                             int(a["points"]), a.get("boundary") or g["boundary"]))
        return Grid(tuple(axes), radial="r" in g, angular_momentum=int(g.get("l", 0)))

    def _term(self, i, table, prefix="potential"):
        """A potential term from its table; ``prefix.i`` names it in messages."""
        # the job's terms see the grid's frame; a packet's own trap is where it was prepared: the lab
        frame = self.job.table["grid"].get("frame", "lab") if prefix == "potential" else "lab"
        ctx = PotentialContext(self.grid, self.mass, self.charge, self.units, f"{prefix}.{i}", frame)
        return make_term(table, ctx)

    def hamiltonian_static_potential(self) -> np.ndarray:
        """Static V on the grid (hartree), before the Hamiltonian exists."""
        if getattr(self, "_v_static", None) is None:
            self._v_static = static_potential_of(self.grid, self.mass, self.terms)
        return self._v_static


class Setup(Model):
    """Atomic-unit objects of a job (no time stepping)."""

    def __init__(self, job: Job, fft: str | None = None, threads: int | None = None):
        super().__init__(job)
        t, u = job.table, job.units
        if self.coupled:
            # one surface's set-up: a coupled job's is CoupledSetup (what run and check build);
            # refused rather than run on one surface
            raise JobError("surface", "coupled surfaces ([[surface]], [[coupling]]) are set up by CoupledSetup "
                                      "(`wavesweep run` builds it), not by this single-surface Setup")
        ev = t["evolve"]
        self.dt = u.to_atomic(ev["dt"], "time", "evolve.dt")
        self.duration = u.to_atomic(ev["duration"], "time", "evolve.duration")
        self.total_steps = round(self.duration / self.dt)
        rec = t["record"]
        self.sample_steps = round(u.to_atomic(rec["every"], "time") / self.dt)
        self.snapshot_steps = round(u.to_atomic(rec["snapshot_every"], "time") / self.dt)
        self.dtype = np.complex64 if ev["precision"] == "single" else np.complex128
        self.packet = self._packet_atomic(t["packet"])
        self.frame = None
        falling = t["grid"].get("frame", "lab") == "free_fall"
        declared = PACKETS[self.packet["kind"]].declared_momentum(self.packet, self.mass, self.grid.ndim) \
            if falling else None
        if declared is not None:   # a falling grid carries the launch: the packet is built at rest on it
            self.packet = without_momentum(self.packet)
        representability(self)  # before the absorber's tuning squares the packet's momenta
        self.psi0 = build_state(self.packet, self.grid, self.mass,
                                length_unit=(u.factor("length"), u.unit_label("length")), terms=self.terms)
        if falling:
            self._enter_free_fall(declared)
        if self.dtype == np.complex64:   # single precision end to end (half the bytes)
            self.psi0 = self.psi0.astype(np.complex64)
            if self.frame is not None:
                self.psi0_lab = self.psi0_lab.astype(np.complex64)
        if self.frame is None:
            self.psi0_lab = self.psi0   # the packet in the lab, as analysis reads its marginals
        self.cap_tuning = None   # per face, when the CAP is tuned here: e_min, e_max (hartree), worst_return
        absorber = self._resolved_absorber(t["absorber"])
        if absorber is not t["absorber"]:   # the complete job: a new Job, the given one unchanged
            self.job = job.with_absorber(absorber)
        self.absorber = self._absorber(absorber)
        self.hamiltonian = Hamiltonian(self.grid, self.mass, self.terms, self.absorber.rate,
                                       static_potential=self.hamiltonian_static_potential(),
                                       contact=self.contact)
        self.scalars = recorded_scalars(interacting=self.interaction is not None)
        self.detectors = [self._detector(i, d) for i, d in enumerate(t["detector"])]
        for i, d in enumerate(t["detector"]):
            if d.get("resolved") and self.frame is not None:
                raise JobError(f"detector.{i}.resolved", "a resolved screen on a falling grid is not supported "
                                                          "yet; use grid.frame = 'lab' or remove resolved")
            if d.get("spectrum") and self.frame is not None:
                raise JobError(f"detector.{i}.spectrum", "a spectrum needs a grid fixed in the lab; use "
                                                          "grid.frame = 'lab' or remove spectrum")
        self.fft_backend = fft or ev.get("fft", AUTO)
        self.threads = threads or ev.get("threads")
        self.scheme = scheme_class(ev["scheme"])
        self.scheme.check_supported(self.hamiltonian, self.absorber, self.grid)

    # -- pieces ----------------------------------------------------------------
    def _enter_free_fall(self, declared) -> None:
        """The grid falls (:mod:`wavesweep.frame`): the frame starts at the
        lab grid with the packet's velocity, the ``declared`` centre
        momentum (the packet was then built at rest: psi0 is phi0 already,
        however fast the launch) or else the built state's measured mean
        momentum (psi0 then loses it, phi(y, 0) = exp(-i m u0 . y) psi(y, 0));
        the uniform forces leave the Hamiltonian and the other terms are seen
        at lab positions.  ``psi0_lab`` is the lab state on the grid's points
        (a launch beyond k_max is aliased there: analysis reads phi0 and the
        frame's momentum instead, :meth:`initial_marginals`)."""
        for i, term in enumerate(self.terms):
            if term.kind == "file":
                raise JobError(f"potential.{i}.kind", "a potential read from a file is tabulated on the lab "
                                                      "grid and cannot follow a falling grid; give it as an "
                                                      "expression, or use grid.frame = 'lab'")
        if declared is None:
            _, momentum, _ = mean_position_momentum(self.psi0, self.grid)
        else:
            momentum = np.asarray(declared, float)
        uniform = [term for term in self.terms if term.uniform_force]
        self.frame = FreeFallFrame(uniform, self.mass, momentum / self.mass, self.grid.ndim, self.duration)
        self.terms = frame_terms(self.lab_terms, self.frame)
        self._v_static = None
        lab_phase = self.frame.lab_phase(self.grid, 0.0)
        if declared is None:
            self.psi0_lab = self.psi0
            self.psi0 = self.psi0 * np.conj(lab_phase)
        else:
            self.psi0_lab = self.psi0 * lab_phase

    def initial_marginals(self) -> list:
        """Per axis (rho, k, w) of the initial lab state (atomic units;
        :func:`~wavesweep.marginals.free_space_marginals`): on a falling grid
        those of phi0 with k shifted by the frame's momentum m u0 (the lab
        state's own transform would alias a launch beyond k_max)."""
        if self.frame is None:
            return [free_space_marginals(self.psi0_lab, self.grid, i) for i in range(self.grid.ndim)]
        shift = self.mass * self.frame.velocity0
        out = []
        for i in range(self.grid.ndim):
            rho, k, w = free_space_marginals(self.psi0, self.grid, i)
            out.append((rho, k + shift[i], w))
        return out

    def _packet_atomic(self, table, name="packet") -> dict:
        kind = table["kind"]
        cls = PACKETS[kind]
        p = to_atomic(table, PACKET_SCHEMAS[kind], self.units, name, self.grid.ndim)
        if cls.nested:
            p[cls.nested] = [self._packet_atomic(s, f"{name}.{cls.nested}.{j}")
                             for j, s in enumerate(table[cls.nested])]
        if cls.trap and table.get(cls.trap) is not None:
            # the trap's own terms, named under the packet in messages
            p["trap_terms"] = [self._term(i, tab, f"{name}.{cls.trap}") for i, tab in enumerate(table[cls.trap])]
        if cls.interacting:   # the state depends on the atoms' interaction (g N)
            p["contact"] = self.contact
        return p

    def energy_window(self, axis: int, face: str) -> tuple[float, float]:
        """Kinetic energies (hartree) normal to ``face`` that its absorbing
        layer must take over the run (:func:`wavesweep.adequacy.dynamics`:
        the packet's momenta shifted by the potential drop to the layer,
        widened by what classical trajectories under V(r, t) bring there,
        by diffraction where V couples the axes and by electrons a field
        frees, floored where the wavelength reaches the layer thickness)."""
        return dynamics(self).windows[face]

    def _resolved_absorber(self, table: dict) -> dict:
        """The absorber table with what the physics chooses filled in: a new
        dict where something was open (the CAP's strength, tuned with its
        exponent unless that is given; a given strength without an exponent
        is quadratic), ``table`` itself otherwise."""
        if table["kind"] != "cap":
            return table
        if table.get("strength") is None:
            th = self.units.to_atomic(table["thickness"], "length", "absorber.thickness")
            table, self.cap_tuning = self._tuned_cap(table, th, table.get("faces"))
            return table
        if table.get("power") is None:
            return {**table, "power": 2.0}
        return table

    def _absorber(self, table) -> Absorber:
        kind = table["kind"]
        if kind == "none":
            return Absorber(self.grid, "none")
        u = self.units
        th = u.to_atomic(table["thickness"], "length", "absorber.thickness")
        faces = table.get("faces")
        if kind == "cap":
            raw = table["strength"]
            if isinstance(raw, dict):
                strength_au = {f: u.to_atomic(v, "energy", f"absorber.strength.{f}") for f, v in raw.items()}
            elif isinstance(raw, list):
                strength_au = [u.to_atomic(v, "energy", f"absorber.strength.{i}") for i, v in enumerate(raw)]
            else:
                strength_au = u.to_atomic(raw, "energy", "absorber.strength")
            return Absorber(self.grid, "cap", th, faces, strength=strength_au, power=table["power"])
        return Absorber(self.grid, "mask", th, faces, dt=self.dt, mask_exponent=table["mask_exponent"])

    # Exponents tried when absorber.power is not given: 2 is best for layers
    # of about one wavelength, 3 from a few wavelengths on (measured worst
    # return at 0.5..2 hartree, m = 1: 10 bohr 7e-6 vs 3e-5; 20 bohr 5e-7 vs
    # 1e-8; 40 bohr 1e-8 vs 5e-11).
    CAP_POWERS = (2.0, 3.0)

    def _tuned_cap(self, table, th, faces) -> tuple[dict, dict]:
        """``(table, tuning)``: ``table`` (a copy) with the CAP exponent (unless given) and one
        strength per face, tuned to the kinetic energies that arrive there (a
        packet fast along x and spreading slowly along y, or one running down
        a step towards x+, needs different layers): the resolved job carries
        both, so a rerun uses the same layers.  On a periodic axis the figure of merit is
        the reflection plus the one-way transmission (what passes wraps round
        into the opposite layer); on a box axis the return with the wall."""
        u = self.units
        faces = list(faces) if faces else face_names(self.grid)
        powers = (table["power"],) if table.get("power") is not None else self.CAP_POWERS
        best = None
        for power in powers:
            tuned, tuning = {}, {}
            for face in faces:
                i = self.grid.axis_index(face[:-1])
                e_min, e_max = self.energy_window(i, face)
                periodic = self.grid.axes[i].boundary == "periodic"
                s_au, worst = cached_cap_strength(th, self.mass, e_min, e_max, power, periodic=periodic)
                tuning[face] = {"e_min": e_min, "e_max": e_max, "worst_return": worst,
                                "periodic": periodic}
                tuned[face] = float(f"{u.to_job(s_au, 'energy'):.12g}")
            score = max(t["worst_return"] for t in tuning.values())
            if best is None or score < best[0]:
                best = (score, power, tuned, tuning)
        _, power, tuned, tuning = best
        return {**table, "power": power, "strength": tuned}, tuning

    def _detector(self, i, d) -> Detector:
        axis = next(a for a in self.grid.names if d.get(a) is not None)
        return Detector(d["name"], self.grid.axis_index(axis),
                        self.units.to_atomic(d[axis], "length", f"detector.{i}.{axis}"),
                        resolved=bool(d.get("resolved")), spectrum=bool(d.get("spectrum")))

    def propagator_transform(self, members: int | None = None, threads: int | None = None):
        """The propagator's transform (``members``: for a batch of that many
        states).  Only split-operator steps work in the planned in-place
        buffer of a fast backend; the others keep several arrays alive at
        once and use scipy.fft."""
        backend = self.fft_backend if self.scheme.in_place_transform else PLAIN
        return make_transform(self.grid, backend, self.dtype, threads or self.threads, members=members)

    def observer_transform(self, members: int | None = None, threads: int | None = None):
        """The observer's own transform (same backend and precision as the
        run's): it must never touch the propagator's buffer, which holds psi."""
        return make_transform(self.grid, self.fft_backend, self.dtype, threads or self.threads, members=members)

    def make_propagator(self, transform=None):
        transform = transform if transform is not None else self.propagator_transform()
        set_kernel_threads(transform.threads)
        return self.scheme(self.hamiltonian, self.dt, transform, self.absorber, self.dtype)

    def make_observer(self):
        """Observables use a transform of their own (same backend and
        precision as the run's): they must never touch the propagator's
        buffer, which holds psi."""
        return Observer(self.grid, self.mass, self.observer_transform(), self.detectors,
                        self.psi0 if self.frame is None else None,   # no lab autocorrelation in a falling frame
                        contact=self.contact if self.interaction is not None else None, frame=self.frame,
                        stride=int(self.job.table["record"]["stride"]))

    def measure(self, observer, psi, t: float) -> dict:
        """The sample's values (atomic units) from ``observer``
        (:meth:`make_observer`) at time ``t``: the loop's one call for a
        single surface and coupled ones (:meth:`CoupledSetup.measure`)."""
        return observer.measure(psi, self.hamiltonian.potential(t), t)

    def lab_state(self, psi, t: float):
        """psi as the lab sees it at time ``t`` (atomic units) on the lab
        positions the grid occupies: psi itself, or in a falling frame
        phi times exp(i [m u . r + theta]) (:meth:`FreeFallFrame.lab_phase`)."""
        return psi if self.frame is None else psi * self.frame.lab_phase(self.grid, t)

    def recorded_potential(self) -> np.ndarray:
        """The static potential the result records (hartree, full grid): the
        Hamiltonian's V0; in a falling frame, the lab's static terms without
        the uniform forces, at the lab positions of the grid at t = 0 (the
        frame's V0 is zero: every lab term moves across it)."""
        if self.frame is None:
            return self.hamiltonian.static_potential
        rest = [term for term in self.lab_terms if not term.uniform_force]
        return np.broadcast_to(static_potential_of(self.grid, self.mass, rest), self.grid.shape)

    def unit_labels(self) -> dict:
        """Unit labels by quantity kind: those of the recorded scalars
        (observables.SCALARS), the axes, densities and fluxes."""
        u = self.units
        return {**{s.kind: u.unit_label(s.kind) for s in self.scalars if s.kind},
                "length": u.unit_label("length"), "time": u.unit_label("time"),
                "energy": u.unit_label("energy"), "momentum": u.unit_label("momentum"),
                "density": f"{u.unit_label('length')}-{self.grid.ndim}",
                "flux": f"{u.unit_label('time')}-1",
                "acceleration": f"{u.unit_label('length')} {u.unit_label('time')}-2"}

    def recorded(self, lanczos: bool = False) -> RecordedRun:
        """This set-up as analysis reads a result's record (:func:`recorded_run`)."""
        return recorded_run(self, lanczos=lanczos)


# OpenBLAS's threads spin ~0.1 s (2^28 cycles) after each call before they
# sleep; between two samples the FFT's and numba's threads then share the
# cores with them.  Measured on 2 cores at 2D 1024^2 (a sample's detector
# products are BLAS calls): 10 steps after a sample cost 165 ms against 102,
# and single precision's whole step-and-sample 1.38x double's instead of 1.6x.
# The products are small; one thread does them.  Runs in threads of one
# process (a Dask worker's tasks) share the limit: the first takes it, the
# last gives the process's own limits back.
# threadpoolctl's controller finds the loaded libraries once (~0.3 ms); a limit
# through it then costs ~15 us a run.
_BLAS_LOCK = threading.Lock()
_blas = {"users": 0, "limits": None, "controller": None}


@contextlib.contextmanager
def single_threaded_blas():
    """BLAS (OpenBLAS and the others threadpoolctl knows) on one thread for
    the duration: what a run's loop of transforms, numba kernels and
    small BLAS products wants (see the notes above)."""
    with _BLAS_LOCK:
        if _blas["users"] == 0:
            try:
                if _blas["controller"] is None:
                    import threadpoolctl   # lazy: only a run's loop needs it
                    _blas["controller"] = threadpoolctl.ThreadpoolController()
                _blas["limits"] = _blas["controller"].select(user_api="blas").limit(limits=1)
            except Exception:   # (an unknown BLAS: left as it is)
                _blas["limits"] = None
        _blas["users"] += 1
    try:
        yield
    finally:
        with _BLAS_LOCK:
            _blas["users"] -= 1
            if _blas["users"] == 0 and _blas["limits"] is not None:
                _blas["limits"].restore_original_limits()
                _blas["limits"] = None


def blas_on_one_thread(method):
    """A method run inside :func:`single_threaded_blas`."""
    @functools.wraps(method)
    def wrapped(*args, **kwargs):
        with single_threaded_blas():
            return method(*args, **kwargs)
    return wrapped


def set_kernel_threads(n: int) -> None:
    """numba's parallel kernels use as many threads as the transforms."""
    import numba  # lazy: the kernels' own import loads it; this only sets its threads
    numba.set_num_threads(max(1, min(int(n), numba.config.NUMBA_NUM_THREADS)))


# -- the analysis record -------------------------------------------------------------
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
    attrs = {"analysis_record": RECORD_VERSION, **grid_attributes(setup)}
    if warnings:
        attrs["adequacy_warnings"] = json.dumps(run_warnings(setup))
    psi0 = setup.psi0_lab   # the packet in the lab (in a falling frame, phi0 has lost the frame's velocity)
    marginals_au = setup.initial_marginals()
    marginals = {a.name: (rho, k * lf, w) for a, (rho, k, w) in zip(grid.axes, marginals_au)}
    out = {"attrs": attrs, "marginals": marginals, "marginals_au": marginals_au, "energy_factor": ef,
           "initial_psi": None, "potential_full": None, "lanczos": None,
           "detectors": _initial_detector_values(setup, marginals_au),
           "final_values": records_final_values(setup)}
    if grid.ndim == 1:
        out["initial_psi"] = np.asarray(psi0, np.complex128) * math.sqrt(lf)
        out["potential_full"] = np.asarray(setup.recorded_potential(), float) / ef
        if setup.frame is None and not grid.radial:   # the spectrum: a cartesian grid fixed in the lab
            out["potential_min"] = float(np.min(out["potential_full"]))
            out["initial_beyond"] = _initial_beyond_values(setup, out["detectors"], psi0)
    elif setup.frame is None and not grid.radial and any(d.spectrum for d in setup.detectors):
        # a line's or plane's spectrum: psi0 beyond it (its b(k, 0)) and V's minimum (the band's low end)
        out["potential_min"] = float(np.min(setup.recorded_potential())) / ef
        out["spectrum_initial_beyond"] = _initial_beyond_values(
            setup, out["detectors"], psi0, [d for d in setup.detectors if d.spectrum])
    # (a falling frame's H is not the lab's: its spectrum would mean nothing to levels)
    if lanczos and not setup.hamiltonian.time_dependent and grid.size <= LANCZOS_MAX_POINTS \
            and setup.frame is None:
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


def grid_attributes(setup) -> dict:
    """The grid and absorber as a result file's global attributes (job
    units): ``grid_axes`` (the axes' names, which tells readers the grid's
    dimensions from the others: ``surface``, ``detector``...), each axis's
    ``grid_<axis>_min/max/points/boundary``, ``absorber_thickness`` and
    ``time_dependent``.  Written by every run, on one surface or several."""
    lf = setup.units.factor("length")
    attrs = {"grid_axes": " ".join(setup.grid.names), "absorber_thickness": float(setup.absorber.thickness / lf),
             "time_dependent": int(bool(setup.hamiltonian.time_dependent))}
    for a in setup.grid.axes:
        attrs.update({f"grid_{a.name}_min": float(a.min / lf), f"grid_{a.name}_max": float(a.max / lf),
                      f"grid_{a.name}_points": int(a.points), f"grid_{a.name}_boundary": a.boundary})
    return attrs


def coupled_attributes(setup) -> dict:
    """What a run on coupled surfaces writes for analysis, as global
    attributes: the surfaces' names, :func:`grid_attributes` and the
    adequacy warnings judged at run time (``adequacy_warnings``, JSON), which
    its analysis repeats as a single surface's does."""
    return {"surfaces": list(setup.surfaces), **grid_attributes(setup),
            "adequacy_warnings": json.dumps(run_warnings(setup))}


def _initial_detector_values(setup, marginals_au) -> dict:
    """Per detector (job units): the initial packet's mean position along
    its axis and the classical free-flight probability and mean arrival
    time (:func:`wavesweep.io.record.classical_share`), as analysis computes
    them from the marginals (O(grid), once, at run time)."""
    lf, tf = setup.units.factor("length"), setup.units.factor("time")
    ef = setup.units.factor("energy")
    out = {"detector_initial_mean": [], "classical_arrival_probability": [], "classical_arrival_mean": [],
           "detector_potential": [], "potential_spread_beyond": [], "potential_spread_on": []}
    accel = classical_acceleration(setup)
    v_static = np.asarray(setup.recorded_potential(), float).reshape(setup.grid.shape) if setup.detectors else None
    for d in setup.detectors:
        rho = marginals_au[d.axis][0]
        coords = setup.grid.axes[d.axis].coordinates
        outwards = 1.0 if d.position >= float(np.sum(rho * coords) / np.sum(rho)) else -1.0
        v_d, beyond, on = potential_on_detector(v_static, setup.grid, d, outwards)
        out["detector_potential"].append(v_d / ef)
        out["potential_spread_beyond"].append(beyond / ef)
        out["potential_spread_on"].append(on / ef)
        rho, k, w = marginals_au[d.axis]
        coords = setup.grid.axes[d.axis].coordinates
        _, rho_kept, distance = packet_side_positions(coords, rho, d.position)
        a = 0.0 if accel is None else float(accel[d.axis])
        prob, mean = classical_share(rho_kept, distance, k, w, float(setup.mass), a)
        out["detector_initial_mean"].append(float(np.sum(rho * coords) / np.sum(rho)) / lf)
        out["classical_arrival_probability"].append(prob)
        out["classical_arrival_mean"].append(mean / tf)
    if accel is not None and setup.detectors:   # absent in free flight: those files stay as they were
        out["classical_acceleration"] = [float(accel[d.axis]) / (lf / tf**2) for d in setup.detectors]
    return {name: np.asarray(v, float) for name, v in out.items()}


def potential_on_detector(v_static, grid, detector, outwards: float) -> tuple[float, float, float]:
    """(V_d, spread beyond, spread on), hartree: the static V at a detector
    (linear between the grid points around it along its axis; on a line or
    plane its mean over it), and the largest |V - V_d| beyond it (towards
    ``outwards``, +1 or -1 along its axis) and on its line or plane."""
    x = grid.axes[detector.axis].coordinates
    i = int(np.clip(np.searchsorted(x, detector.position) - 1, 0, len(x) - 2))
    w = float(np.clip((detector.position - x[i]) / (x[i + 1] - x[i]), 0.0, 1.0))
    v = np.asarray(v_static, float).reshape(grid.shape)
    line = (1 - w) * np.take(v, i, axis=detector.axis) + w * np.take(v, i + 1, axis=detector.axis)
    v_d = float(np.mean(line))
    beyond = np.flatnonzero(outwards * (x - detector.position) > 0)
    spread_beyond = float(np.max(np.abs(np.take(v, beyond, axis=detector.axis) - v_d))) if beyond.size else 0.0
    return v_d, spread_beyond, float(np.max(np.abs(line - v_d)))


def _initial_beyond_values(setup, detector_values, psi0, chosen=None) -> list:
    """Per detector (or those ``chosen``), (first index along its axis,
    psi0 beyond it in job units, that axis first): the part the momentum
    spectrum projects on plane waves as b(k, 0)
    (:func:`wavesweep.io.record.initial_beyond`), beyond the detector away
    from the packet's mean (the mean as the file gives it back, so that
    analysis takes the same side)."""
    lf = setup.units.factor("length")
    out = []
    for d, mean in zip(setup.detectors, detector_values["detector_initial_mean"]):
        if chosen is not None and d not in chosen:
            continue
        x_d = float(d.position / lf) * lf        # as the file gives it back
        side = 1.0 if x_d >= float(mean) * lf else -1.0
        first, values = initial_beyond(psi0, setup.grid.axes[d.axis].coordinates, x_d, side, d.axis)
        out.append((first, values * lf ** (setup.grid.ndim / 2)))
    return out


def classical_acceleration(setup) -> np.ndarray | None:
    """The constant acceleration (bohr per atomic time unit squared, per
    axis) the job's uniform forces give the classical estimate, or None:
    no uniform force, or one that changes in time (a pulse; the estimate
    is then free flight, and analysis says it is no reference)."""
    terms = [term for term in setup.lab_terms if term.uniform_force]
    if not terms or any(term.time_dependent for term in terms):
        return None
    return sum(term.force_at(0.0) for term in terms) / setup.mass


def records_final_values(setup) -> bool:
    """Whether the run records its detectors' final values
    (:func:`final_detector_values`): 1D runs that keep their final state
    (the few arrays it takes are small beside a run's; analysis of other
    runs reads the final state, or the last snapshot, instead)."""
    return (not setup.coupled and bool(setup.detectors) and setup.grid.ndim == 1
            and bool(setup.job.table["record"]["final_state"]))


def final_detector_values(setup, psi, length_scale: float) -> dict | None:
    """``final_probability_beyond`` and ``final_probability_to_come`` per
    detector from the final psi (atomic units; ``length_scale`` takes it to
    job units, as the file stores it), computed as analysis computes them
    from the file (:func:`wavesweep.io.record.side_probability` on the
    stored psi, coordinates and detector positions), or None where the run
    does not record them (:func:`records_final_values`)."""
    if not records_final_values(setup):
        return None
    lf = setup.units.factor("length")
    psi_job = (np.multiply(psi.real, length_scale, dtype=np.float64)
               + 1j * np.multiply(psi.imag, length_scale, dtype=np.float64))
    ax = setup.grid.axes[0]
    # a falling grid is X(T) below where it started: lab position = coordinate + X
    shift = 0.0 if setup.frame is None else float(setup.frame.offset(setup.total_steps * setup.dt)[0])
    coords = [(ax.coordinates + shift) / lf]
    # the geometry as the file gives it back (job units times the factor)
    stored = RecordedRun(grid=Grid((Axis(ax.name, float(ax.min / lf) * lf, float(ax.max / lf) * lf, ax.points,
                                         ax.boundary),)),
                         mass=float(setup.mass), detectors=[], marginals={}, dt=float(setup.dt),
                         time_dependent=False,
                         absorber=RecordedAbsorber(setup.absorber.kind, float(setup.absorber.thickness / lf) * lf,
                                                   [RecordedLayer(layer.name, layer.axis)
                                                    for layer in setup.absorber.layers]))
    density0 = np.abs(setup.psi0) ** 2
    x0 = float(np.sum(density0 * ax.coordinates) / np.sum(density0))
    # a falling grid's lab psi carries exp(i m u x), beyond the grid's k_max in general: which way
    # it moves is read from psi with that plane wave divided out, its momenta shifted by m u
    p_frame = 0.0 if setup.frame is None else float(setup.mass * setup.frame.velocity(setup.total_steps * setup.dt)[0])
    psi_slow = psi_job if p_frame == 0.0 else psi_job * np.exp(-1j * p_frame * (ax.coordinates + shift))
    beyond, to_come = [], []
    for d in setup.detectors:
        x_det = float(d.position / lf) * lf
        side = 1.0 if x0 > x_det else -1.0
        face = layer_holding(stored, 0, x_det - shift)
        edge = x_det if face is None else layer_edge(stored, face) + shift
        beyond.append(side_probability(psi_job, coords, lf, 0, x_det, -side))
        to_come.append(side_probability(psi_slow, coords, lf, 0, edge, side, towards=True, momentum_offset=p_frame))
    return {"final_probability_beyond": np.asarray(beyond, float),
            "final_probability_to_come": np.asarray(to_come, float)}


def recorded_run(setup, lanczos: bool = False) -> RecordedRun:
    """The record of a set-up in memory (what the run writes), without a
    file; ``lanczos``: with the recurrence of psi0 (up to 240 applications
    of H)."""
    rec = analysis_record(setup, warnings=False, lanczos=lanczos)
    recurrence = None if rec["lanczos"] is None else tuple(rec["lanczos"])
    ab = setup.absorber
    one_d = setup.grid.ndim == 1
    return RecordedRun(grid=setup.grid, mass=float(setup.mass),
                       detectors=[RecordedDetector(d.name, d.axis, float(d.position)) for d in setup.detectors],
                       absorber=RecordedAbsorber(ab.kind, float(ab.thickness),
                                                 [RecordedLayer(layer.name, layer.axis) for layer in ab.layers]),
                       time_dependent=bool(setup.hamiltonian.time_dependent),
                       marginals={i: m for i, m in enumerate(rec["marginals_au"])}, dt=float(setup.dt),
                       psi0=setup.psi0_lab if one_d else None,
                       static_potential=setup.recorded_potential() if one_d else None,
                       warnings=None, lanczos=recurrence)


def rebuilt_record(ds, field: str, lanczos: bool) -> RecordedRun:
    """An older file's record, from its job rebuilt in memory: the memory a
    run of that job holds is judged from the grid's shape first (nothing is
    built above the machine's available memory), and files the job names
    must be regular files (checked as the job loads)."""
    try:
        table = tomllib.loads(str(ds.attrs["job"]))
    except tomllib.TOMLDecodeError as e:
        raise JobError(field, f"{result_name(ds)}: the job text stored in the result cannot be read: {e}") from None
    table.pop("sweep", None)
    try:
        job = job_from_dict(table)
    except JobError as e:
        raise JobError(field, f"{result_name(ds)} was written before results kept what analysis needs, and "
                              f"its job cannot be rebuilt here ({e}); run the job again") from None
    need = memory_estimate(job)["estimate_bytes"]
    points = memory_estimate(job)["points"]
    too_big = memory_error(need, f"{result_name(ds)} was written before results kept what analysis needs: "
                                 f"rebuilding its set-up ({points:.0f} grid points)", field)
    if too_big is not None:   # judged from the shape: nothing was allocated
        raise JobError(field, f"{too_big.message}; or run the job again with this version, whose "
                              "results keep what analysis needs")
    try:
        setup = Setup(job)
    except JobError as e:
        raise JobError(field, f"{result_name(ds)}: the run's job cannot be rebuilt here ({e}); "
                              "files it refers to must still exist") from None
    rec = recorded_run(setup, lanczos=lanczos)
    rec.warnings = run_warnings(setup)
    return rec


class CoupledSetup(Setup):
    """A job on coupled surfaces ([[surface]], [[coupling]]; issue 16, in
    progress): the grid, each surface's and each pair's terms, psi0 of shape
    (S, *grid) (:func:`~wavesweep.states.build_surface_state`), the absorber
    (the same layers on every surface), the :class:`SurfaceHamiltonian`
    with its rate, the coupled split-operator propagator (or, for
    ``evolve.scheme = 'chebyshev'`` and a time-independent V, the Chebyshev
    expansion, :class:`~wavesweep.surfaces.CoupledChebyshev`) and an observer
    per surface.  :class:`~wavesweep.run.Simulation` builds it for a job
    with surfaces (:class:`Setup` refuses one); the result file then has a
    ``surface`` dimension.  A CAP without a strength is tuned per face to
    the energies arriving on any surface (:meth:`energy_window`), as on one
    surface.  Not supported yet, refused naming the field: single
    precision, an interaction, a falling grid, ``record.column`` and
    ``record.snapshot_psi``."""

    def __init__(self, job: Job, fft: str | None = None, threads: int | None = None):
        Model.__init__(self, job)
        if not self.coupled:
            raise ValueError("a CoupledSetup needs [[surface]] tables; use Setup")
        t, u = job.table, job.units
        ev, rec = t["evolve"], t["record"]
        self.frame = None
        self.dt = u.to_atomic(ev["dt"], "time", "evolve.dt")
        self.duration = u.to_atomic(ev["duration"], "time", "evolve.duration")
        self.total_steps = round(self.duration / self.dt)
        self.sample_steps = round(u.to_atomic(rec["every"], "time") / self.dt)
        self.snapshot_steps = round(u.to_atomic(rec["snapshot_every"], "time") / self.dt)
        refusals = (
            (ev["precision"] == "single", "evolve.precision",
             "coupled surfaces run in double precision (population moves between surfaces: the "
             "single-precision norm keeping of one surface does not apply); use 'double'"),
            (t.get("interaction") is not None, "interaction", "a mean-field interaction on coupled surfaces is not "
                                                              "supported; remove [interaction]"),
            (t["grid"].get("frame", "lab") != "lab", "grid.frame", "a falling grid on coupled surfaces is not "
                                                                   "supported; use frame = 'lab'"),
            (rec.get("column") is not None, "record.column", "a column density of coupled surfaces is not "
                                                             "recorded yet; remove record.column"),
            (bool(rec.get("snapshot_psi")), "record.snapshot_psi", "psi at snapshots of coupled surfaces is not "
                                                                    "recorded yet; remove record.snapshot_psi"),
            *((True, f"detector.{i}.resolved", "a resolved screen on coupled surfaces is not recorded yet; "
                                               "remove resolved") for i, d in enumerate(t["detector"])
              if d.get("resolved")),
            *((True, f"detector.{i}.spectrum", "a spectrum's line or plane on coupled surfaces is not recorded "
                                               "yet; remove spectrum") for i, d in enumerate(t["detector"])
              if d.get("spectrum")),
        )
        for refused, field, message in refusals:
            if refused:
                raise JobError(field, message)
        self.weights = None   # an expansion of exp(-i H dt) (COUPLED_EXPANSIONS) has none
        if ev["scheme"] in COUPLED_EXPANSIONS:
            self._check_expansion(ev["scheme"], t["absorber"])
        else:
            try:
                self.weights = coupled_weights(ev["scheme"])
            except ValueError:
                raise JobError("evolve.scheme", f"{ev['scheme']!r} cannot propagate coupled surfaces; use a "
                                                "split-operator scheme: 'strang', 'order4' or 'order4_suzuki', or "
                                                f"{', '.join(map(repr, COUPLED_EXPANSIONS))} (time-independent "
                                                "surfaces and couplings)") from None
        self.scheme = scheme_class(ev["scheme"])
        self.dtype = np.complex128
        self.packet = self._packet_atomic(t["packet"])
        self.psi0 = build_surface_state(self.packet, self.grid, self.mass, self.surface_terms, self.surfaces,
                                        length_unit=(u.factor("length"), u.unit_label("length")))
        self.psi0_lab = self.psi0
        self.detectors = [self._detector(i, d) for i, d in enumerate(t["detector"])]
        # a CAP left open is tuned as on one surface, to the energies arriving on every curve (energy_window)
        self.cap_tuning = None
        table = self._resolved_absorber(t["absorber"])
        if table is not t["absorber"]:   # the complete job (its TOML and run id): a new Job, the given one unchanged
            self.job = job.with_absorber(table)
        self.absorber = self._absorber(table)
        self.hamiltonian = SurfaceHamiltonian(self.grid, self.mass, self.surfaces, self.surface_terms,
                                              self.coupling_terms, self.absorber.rate)
        self.scalars = recorded_scalars()   # norm, x_mean, x_std, p_mean per surface; energy in total
        self.fft_backend = fft or ev.get("fft", AUTO)
        self.threads = threads or ev.get("threads")
        # record.adiabatic: population_adiabatic(time, state) per sample (adiabatic_basis)
        self.adiabatic = bool(rec.get("adiabatic"))
        self._static_basis = None

    def adiabatic_basis(self, t: float) -> np.ndarray:
        """The local eigenvectors of V(r, t) (:func:`~wavesweep.surfaces.local_eigenvectors`:
        (S, S, *grid), ``[a, k]`` surface a's component of adiabatic state
        k, ascending energies, phases by
        :data:`~wavesweep.surfaces.PHASE_CONVENTION`); made once when V is
        static, at every call (time ``t``, atomic units) otherwise."""
        h = self.hamiltonian
        if h.time_dependent:
            return local_eigenvectors(h.matrix(t))[1]
        if self._static_basis is None:
            self._static_basis = local_eigenvectors(h.matrix(None))[1]
        return self._static_basis

    def energy_window(self, axis: int, face: str) -> tuple[float, float]:
        """Kinetic energies (hartree) normal to ``face`` that its layer must
        take over the run on any surface: the union over the diabatic
        surfaces and adiabatic curves the packet can be on of each one's
        single-surface window, the packet's energy conserved by a hop
        (:func:`wavesweep.adequacy.coupled_dynamics`).  The layers are the
        same on every surface, so one strength per face tuned to the union
        meets the tuning's worst return on each."""
        return coupled_dynamics(self).windows[face]

    def _check_expansion(self, scheme: str, absorber: dict) -> None:
        """Refuse what an expansion of exp(-i H dt) on coupled surfaces
        (:class:`~wavesweep.surfaces.CoupledChebyshev`) cannot do, in one
        line naming the field: a V that changes in time, a CAP."""
        terms = [term for ts in self.surface_terms + list(self.coupling_terms.values()) for term in ts]
        if any(term.time_dependent for term in terms):
            raise JobError("evolve.scheme", f"{scheme!r} expands exp(-i H dt) for a time-independent H, and this "
                                            "job's surfaces or couplings change in time; use a split-operator "
                                            "scheme: evolve.scheme = 'strang', 'order4' or 'order4_suzuki'")
        if absorber["kind"] == "cap":
            raise JobError("absorber.kind", f"{scheme!r} cannot use a CAP (non-Hermitian H), on coupled surfaces "
                                            "as on one; use absorber.kind = 'mask', or a split-operator scheme "
                                            "('strang', 'order4' or 'order4_suzuki')")

    def recorded_potential(self) -> np.ndarray:
        """Each surface's static diagonal V_ss (hartree), (surface, *grid)."""
        v = self.hamiltonian.matrix(None)
        return np.stack([v[a, a] for a in range(len(self.surfaces))])

    def recorded_couplings(self) -> dict:
        """Each coupled pair's static V_ab (hartree, the grid's shape) by (a, b), a < b."""
        v = self.hamiltonian.matrix(None)
        return {(a, b): v[a, b] for a, b in sorted(self.hamiltonian.couplings)}

    def _packet_atomic(self, table, name="packet") -> dict:
        """As :meth:`Setup._packet_atomic`, keeping each table's ``surface``."""
        out = super()._packet_atomic({k: v for k, v in table.items() if k != "surface"}, name)
        if table.get("surface") is not None:
            out["surface"] = table["surface"]
        nested = PACKETS[table["kind"]].nested
        if nested:
            for member, raw in zip(out[nested], table[nested]):
                if raw.get("surface") is not None:
                    member["surface"] = raw["surface"]
        return out

    def make_propagator(self, transform=None, members: int | None = None,
                        threads: int | None = None, absorbers=None) -> CoupledSplitOperator | CoupledChebyshev:
        """The coupled split-operator of this job (or the expansion its
        scheme names, :data:`~wavesweep.surfaces.COUPLED_EXPANSIONS`);
        ``members``: for a batch of that many runs differing only in their
        packets (psi (members, S, *grid), :mod:`wavesweep.batched`), its
        transform with ``threads``, and ``absorbers`` one per member (their
        CAP strengths may differ; default: this job's for all)."""
        absorber = self.absorber if self.absorber.active else None
        if absorbers is not None:
            absorber = list(absorbers)
        if self.weights is None:
            if members is not None:
                raise ValueError(f"{self.scheme.name!r} on coupled surfaces steps one run at a time")
            transform = transform or make_transform(self.grid, self.fft_backend, np.complex128,
                                                    threads or self.threads, members=len(self.surfaces))
            return COUPLED_EXPANSIONS[self.scheme.name](self.hamiltonian, self.dt, absorber, transform=transform)
        if transform is None and members is not None:
            rows = int(members) * len(self.surfaces)
            transform = make_transform(self.grid, AUTO, np.complex128, threads or self.threads, members=rows)
        return CoupledSplitOperator(self.hamiltonian, self.dt, self.weights, absorber, transform=transform,
                                    members=members)

    def make_observer(self) -> Observer:
        """One observer for all surfaces: each is a member of its batch."""
        n = len(self.surfaces)
        transform = make_transform(self.grid, PLAIN, np.complex128, self.threads, members=n)
        return Observer(self.grid, self.mass, transform, self.detectors, members=n)

    def measure(self, observer, psi, t: float) -> dict:
        """The sample's values (atomic units): per surface (arrays over the
        surfaces, in their order) ``norm``, ``x_mean``, ``x_std``,
        ``p_mean``, ``flux`` (surface, detector) and, 1D, ``detector_psi``;
        and ``energy``, <T + V> over the total norm with the couplings'
        2 Re <psi_a|V_ab|psi_b> (the per-surface observables see no V);
        with ``record.adiabatic``, ``population_adiabatic`` (state,): the
        probability on each adiabatic state at time ``t``
        (:meth:`adiabatic_basis`, :func:`~wavesweep.surfaces.adiabatic_populations`)."""
        if getattr(self, "_no_potential", None) is None:   # the per-surface observables see no V: made once
            self._no_potential = np.zeros(self.grid.shape)
        each = observer.measure_members(psi, self._no_potential)
        out = {key: np.array([e[key] for e in each]) for key in ("norm", "x_mean", "x_std", "p_mean", "flux")}
        if "detector_psi" in each[0]:
            out["detector_psi"] = np.array([e["detector_psi"] for e in each])
        kinetic = float(sum(e["energy"] * e["norm"] for e in each if e["norm"] > 0))
        v = self.hamiltonian.matrix(t if self.hamiltonian.time_dependent else None)
        # sum_a <psi_a|V_aa|psi_a> + 2 Re sum_{a<b} <psi_a|V_ab|psi_b> (V real symmetric): no S x S temporaries
        rho = np.abs(psi) ** 2
        potential = sum(float(np.vdot(rho[a], v[a, a])) for a in range(len(self.surfaces)))
        potential += sum(2.0 * float(np.real(np.vdot(psi[a], v[a, b] * psi[b])))
                         for a, b in self.hamiltonian.couplings)
        potential *= self.grid.cell_volume
        total = float(out["norm"].sum())
        out["energy"] = (kinetic + potential) / total if total > 0 else float("nan")
        if self.adiabatic:
            out["population_adiabatic"] = adiabatic_populations(self.adiabatic_basis(t), psi, self.grid.cell_volume)
        return out
