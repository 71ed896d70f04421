"""Each registry is the one list of its names.

Propagators (``propagators.SCHEMES``), potential kinds (``potentials.REGISTRY``),
packet kinds (``states.PACKETS``), FFT backends (``fft.BACKENDS``) and
executors (``studies.executors.EXECUTORS``): an entry registered here, in the
test, and nowhere else is accepted by the job's validation, offered by the
CLI's choices, listed by ``wavesweep keys`` and not refused by ``check``; and
no module spells two registered names in a literal list of choices (a second
list that a registration would not reach).  Registrations are undone by
monkeypatch.  These tests fail on the code before the registries were read
live: ``evolve.scheme`` froze ``tuple(SCHEMES)`` at import, ``evolve.fft`` and
``run --fft`` were ``("auto", "scipy", "pyfftw")``, packet kinds were branches
on their names.
"""
from __future__ import annotations

import ast
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from tables import merged
from wavesweep import cli
from wavesweep.check import check_job
from wavesweep.errors import JobError
from wavesweep.fft import AUTO, BACKENDS, ScipyTransform
from wavesweep.job import job_from_dict
from wavesweep.job.reference import reference, render_text, topics
from wavesweep.potentials import REGISTRY, PotentialTerm
from wavesweep.propagators import SCHEMES, Strang
from wavesweep.schema import Field
from wavesweep.setup import Setup
from wavesweep.states import PACKETS, PacketKind, gaussian_packet
from wavesweep.studies import executors
from wavesweep.studies.executors import EXECUTORS, Executor, executor_class

PACKAGE = Path(__file__).resolve().parents[2] / "src" / "wavesweep"

# A clean 1D job: a Gaussian packet crossing a barrier, absorbed at both ends.
JOB = {
    "title": "registry test",
    "grid": {"x": {"min": -60.0, "max": 60.0, "points": 256}, "boundary": "periodic"},
    "potential": [{"kind": "barrier", "height": 0.3, "width": 1.0, "center": 10.0}],
    "packet": {"kind": "gaussian", "center": -20.0, "width": 2.0, "momentum": 1.0},
    "evolve": {"dt": 0.02, "duration": 4.0},
    "absorber": {"kind": "cap", "thickness": 15.0},
    "record": {"every": 0.2, "snapshot_every": 1.0},
}


def _errors(report) -> list:
    return [(f.field, f.message) for f in report.findings if f.level == "error"]


def _levels(report) -> list:
    return [(f.topic, f.level, f.field) for f in report.findings if f.topic != "run time"]


# -- propagators -------------------------------------------------------------------
class StrangTwin(Strang):
    """Strang splitting under another name: a scheme known to the registry only."""

    name = "strang_twin_for_test"
    summary = "Strang splitting registered by a test"


@pytest.fixture
def twin_scheme(monkeypatch):
    monkeypatch.setitem(SCHEMES, StrangTwin.name, StrangTwin)
    return StrangTwin.name


def test_a_registered_scheme_is_validated_listed_and_checked(twin_scheme):
    job = job_from_dict(merged(JOB, {"evolve": {"scheme": twin_scheme}}))
    assert job.table["evolve"]["scheme"] == twin_scheme
    assert Setup(job).scheme is StrangTwin
    evolve = reference("evolve")["sections"][0]
    scheme = next(k for k in evolve["keys"] if k["key"] == "scheme")
    assert twin_scheme in scheme["choices"]
    assert any(twin_scheme in note and StrangTwin.summary in note for note in evolve["notes"])
    # check judges it as the scheme it copies: the same findings, nothing refused
    twin, plain = check_job(job, trial_seconds=0), check_job(job_from_dict(JOB), trial_seconds=0)
    assert not _errors(twin)
    assert _levels(twin) == _levels(plain)


def test_an_unregistered_scheme_is_refused_with_the_registered_ones():
    with pytest.raises(JobError) as e:
        job_from_dict(merged(JOB, {"evolve": {"scheme": "strang_twin_for_test"}}))
    assert e.value.field == "evolve.scheme"
    assert all(name in str(e.value) for name in SCHEMES)


def test_a_scheme_that_cannot_run_a_job_names_the_registered_ones_that_can(twin_scheme):
    """The advice of check_supported comes from the registry: a 2D job with
    the 1D-only Crank-Nicolson is told of the split-operator schemes,
    the test's twin among them, and of nothing unregistered."""
    plane = merged(JOB, {"grid": {"y": {"min": -20.0, "max": 20.0, "points": 32}},
                         "packet": {"center": [-20.0, 0.0], "width": [2.0, 2.0], "momentum": [1.0, 0.0]},
                         "evolve": {"scheme": "crank_nicolson"}, "absorber": None})
    with pytest.raises(JobError) as e:
        Setup(job_from_dict(plane))
    assert e.value.field == "evolve.scheme"
    can = [name for name, cls in SCHEMES.items() if cls.in_place_transform] + ["chebyshev"]
    assert all(repr(name) in str(e.value) for name in can) and twin_scheme in str(e.value)
    assert "'crank_nicolson' is 1D only" in str(e.value) and len(str(e.value).splitlines()) == 1


# -- FFT backends ------------------------------------------------------------------
class CountingScipy(ScipyTransform):
    """scipy.fft under another name, counting its instances."""

    name = "scipy_twin_for_test"
    summary = "scipy.fft registered by a test"
    made = 0

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        type(self).made += 1


@pytest.fixture
def twin_backend(monkeypatch):
    monkeypatch.setitem(BACKENDS, CountingScipy.name, CountingScipy)
    monkeypatch.setattr(CountingScipy, "made", 0)
    return CountingScipy.name


def test_a_registered_fft_backend_is_validated_offered_listed_and_used(twin_backend, tmp_path, capsys):
    job = job_from_dict(merged(JOB, {"evolve": {"fft": twin_backend}}))
    setup = Setup(job)
    assert isinstance(setup.propagator_transform(), CountingScipy)
    fft = next(k for k in reference("evolve")["sections"][0]["keys"] if k["key"] == "fft")
    assert fft["choices"][0] == AUTO and twin_backend in fft["choices"]
    assert f"fft = '{twin_backend}'" in render_text(reference("evolve"))
    assert not _errors(check_job(job, trial_seconds=0))
    # the CLI offers it, and a run made with it through the CLI uses it
    job_file = tmp_path / "job.toml"
    job_file.write_text(setup.job.to_toml())   # the complete job (its CAP tuned)
    assert cli._parser().parse_args(["run", str(job_file), "-o", "x", "--fft", twin_backend]).fft == twin_backend
    CountingScipy.made = 0
    assert cli.main(["run", str(job_file), "-o", str(tmp_path / "out"), "--fft", twin_backend, "--quiet"]) == 0
    assert CountingScipy.made >= 1
    assert len(list((tmp_path / "out").glob("*.nc"))) == 1


def test_an_unregistered_fft_backend_is_refused_by_the_cli_naming_the_registered_ones(capsys):
    assert cli.main(["run", "job.toml", "-o", "out", "--fft", "scipy_twin_for_test"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "--fft" in err
    assert all(repr(name) in err for name in (AUTO, *BACKENDS))


# -- potentials --------------------------------------------------------------------
class Ramp(PotentialTerm):
    """V = slope * x: a kind registered by a test."""

    kind = "ramp_for_test"
    summary = "V = slope x"
    formula = "V(x) = slope * x"
    parameters = {"slope": Field("number", doc="hartree per bohr")}

    def static(self, mesh):
        return self.p["slope"] * mesh["x"]


@pytest.fixture
def ramp(monkeypatch):
    monkeypatch.setitem(REGISTRY, Ramp.kind, Ramp)
    return Ramp.kind


def test_a_registered_potential_kind_is_validated_listed_and_checked(ramp):
    job = job_from_dict(merged(JOB, {"potential": [{"kind": ramp, "slope": 1e-4}]}))
    setup = Setup(job)
    # V = slope * x on the grid's points (the closed form of the term)
    x = setup.grid.axes[0].coordinates
    assert np.allclose(np.ravel(setup.hamiltonian.static_potential), 1e-4 * x, rtol=0, atol=1e-15)
    assert f"potential.{ramp}" in topics()
    assert "V(x) = slope * x" in render_text(reference(ramp))
    assert any(k["kind"] == ramp for k in reference("potential")["sections"][0]["kinds"])
    assert not _errors(check_job(job, trial_seconds=0))


# -- packets -----------------------------------------------------------------------
class Lorentzian(PacketKind):
    """psi(x) = sqrt(width / pi) / (x - center + i width): a kind registered by
    a test (|psi|^2 a Cauchy distribution of half width ``width``)."""

    kind = "lorentzian_for_test"
    parameters = {
        "center": Field("length", doc="centre"),
        "width": Field("length", positive=True, doc="half width at half maximum of |psi|^2"),
    }
    formula = "psi(x) = sqrt(width / pi) / (x - center + i width)"

    @classmethod
    def build(cls, packet, grid, mass, field, length_unit, terms):
        x = grid.axes[0].coordinates
        return math.sqrt(packet["width"] / math.pi) / (x - packet["center"] + 1j * packet["width"])


@pytest.fixture
def lorentzian(monkeypatch):
    monkeypatch.setitem(PACKETS, Lorentzian.kind, Lorentzian)
    return Lorentzian.kind


def test_a_registered_packet_kind_is_validated_listed_and_checked(lorentzian):
    job = job_from_dict(merged(JOB, {"packet": {"kind": lorentzian, "center": -20.0, "width": 0.5,
                                                "momentum": None}}))
    setup = Setup(job)
    x = setup.grid.axes[0].coordinates
    psi = 1.0 / (x + 20.0 + 0.5j)      # the formula, normalised on the grid below
    psi /= math.sqrt(np.sum(np.abs(psi) ** 2) * setup.grid.cell_volume)
    assert np.allclose(setup.psi0, psi, rtol=0, atol=1e-12)
    assert f"packet.{lorentzian}" in topics()
    assert Lorentzian.formula in render_text(reference(lorentzian))
    # check measures its momenta (not Gaussian parts): it judges, it does not refuse the kind
    findings = check_job(job, trial_seconds=0).findings
    assert not any(f.field and f.field.startswith("packet.kind") for f in findings)
    # inside a superposition too: the nested kind is validated and built by its own class
    both = job_from_dict(merged(JOB, {"packet": {"kind": "superposition", "center": None, "width": None,
                                                "momentum": None, "packets": [
        {"kind": lorentzian, "center": -20.0, "width": 0.5},
        {"kind": "gaussian", "center": -30.0, "width": 2.0}]}}))
    g = gaussian_packet(x, -30.0, 2.0, 0.0)
    total = psi + g / math.sqrt(np.sum(np.abs(g) ** 2) * setup.grid.cell_volume)   # parts normalised, then the sum
    total /= math.sqrt(np.sum(np.abs(total) ** 2) * setup.grid.cell_volume)
    assert np.allclose(Setup(both).psi0, total, rtol=0, atol=1e-12)


def test_packet_kinds_keep_their_keys_apart(lorentzian):
    with pytest.raises(JobError) as e:
        job_from_dict(merged(JOB, {"packet": {"kind": lorentzian, "center": -20.0, "width": 0.5,
                                              "momentum": 1.0}}))
    assert e.value.field == "packet.momentum"


# -- executors ---------------------------------------------------------------------
class RecordingExecutor(Executor):
    """Drains nothing; records that it was built and asked to drain."""

    name = "recording_for_test"
    drained = []

    def __init__(self, root, workers=1, settings=None):
        super().__init__(root, settings)
        self.workers = workers

    def drain(self):
        type(self).drained.append((self.root, self.workers))
        return {"claimed": 0, "stale": {}}


def test_a_registered_executor_is_offered_by_work_and_loaded_on_first_use(monkeypatch, tmp_path):
    loads = []

    def load():
        loads.append(1)
        return RecordingExecutor

    monkeypatch.setitem(EXECUTORS, RecordingExecutor.name, load)
    monkeypatch.setattr(RecordingExecutor, "drained", [])
    args = cli._parser().parse_args(["work", "--executor", RecordingExecutor.name, "--root", str(tmp_path)])
    assert args.executor == RecordingExecutor.name
    assert not loads     # offered without being imported
    from wavesweep.studies.api import work
    from wavesweep.studies.queue import Queue
    Queue(tmp_path)      # an empty queue
    out = work(tmp_path, workers=3, executor=RecordingExecutor.name)
    assert loads and RecordingExecutor.drained == [(tmp_path, 3)]
    assert out["ok"] and out["done"] == 0
    assert executor_class(RecordingExecutor.name) is RecordingExecutor


def test_an_unknown_executor_is_one_line_naming_the_registered_ones(capsys, tmp_path):
    assert cli.main(["work", "--executor", "nowhere", "--root", str(tmp_path)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "--executor" in err
    assert all(repr(name) in err for name in EXECUTORS)


def test_the_dask_executor_is_registered_but_not_imported_until_used():
    """Importing the executors (and building the CLI's parser) loads neither
    the Dask executor's module nor dask.distributed."""
    code = ("import sys\n"
            "from wavesweep.studies.executors import EXECUTORS, CLUSTER_EXECUTOR\n"
            "from wavesweep import cli\n"
            "cli._parser().parse_args(['work', '--executor', CLUSTER_EXECUTOR])\n"
            "assert CLUSTER_EXECUTOR in EXECUTORS\n"
            "print(sorted(m for m in sys.modules if m == 'distributed' or m.startswith('distributed.')\n"
            "             or m.endswith('executors.cluster')))\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"
    assert executors.CLUSTER_EXECUTOR in EXECUTORS and executors.DEFAULT_EXECUTOR in EXECUTORS


# -- no second list ----------------------------------------------------------------
def _registered() -> dict[str, set[str]]:
    return {"propagators.SCHEMES": set(SCHEMES), "fft.BACKENDS": {AUTO, *BACKENDS},
            "potentials.REGISTRY": set(REGISTRY), "states.PACKETS": set(PACKETS),
            "studies.executors.EXECUTORS": set(EXECUTORS)}


def second_lists(package: Path = PACKAGE) -> list[str]:
    """Literal tuples, lists, sets and dict keys in the package that spell two
    or more names of one registry: a list of choices beside the registry."""
    registries = _registered()
    out = []
    for path in sorted(package.rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, (ast.Tuple, ast.List, ast.Set)):
                items = node.elts
            elif isinstance(node, ast.Dict):
                items = [k for k in node.keys if k is not None]
            else:
                continue
            words = {e.value for e in items if isinstance(e, ast.Constant) and isinstance(e.value, str)}
            for registry, names in registries.items():
                if len(words & names) >= 2:
                    out.append(f"{path.relative_to(package.parent)}:{node.lineno}: "
                               f"{sorted(words & names)} (names of {registry})")
    return out


def test_no_module_lists_registered_names_beside_the_registry():
    found = second_lists()
    assert not found, "read these names from their registry instead:\n" + "\n".join(found)


def test_the_second_list_check_can_fail(tmp_path):
    (tmp_path / "wavesweep").mkdir()
    (tmp_path / "wavesweep" / "cli.py").write_text(
        f'CHOICES = ("{AUTO}", "{next(iter(BACKENDS))}")\nOK = ("{next(iter(BACKENDS))}", "other")\n')
    assert [line.split(": ")[0] for line in second_lists(tmp_path / "wavesweep")] == ["wavesweep/cli.py:1"]


# -- recorded scalars --------------------------------------------------------------
def test_a_declared_scalar_is_recorded_with_its_unit_from_its_declaration_alone(monkeypatch, tmp_path):
    """A Scalar appended to observables.SCALARS, computed by the observer, is
    converted, declared and written without an edit of the run or the
    writer: one atomic unit of time (hbar / E_h, CODATA via scipy.constants)
    recorded in a job whose time unit is the femtosecond."""
    import scipy.constants as sc
    import xarray as xr
    from wavesweep import observables
    from wavesweep.run import Simulation

    au_time_fs = sc.hbar / sc.physical_constants["Hartree energy"][0] / 1e-15
    scalar = observables.Scalar("time_unit_for_test", "time", "one atomic time unit along {axis}")
    observables.SCALARS.append(scalar)
    try:
        measured = observables.Observer.measure_members

        def measure_members(self, psi, potential):
            return [{**r, scalar.name: 1.0} for r in measured(self, psi, potential)]   # 1 au of time

        monkeypatch.setattr(observables.Observer, "measure_members", measure_members)
        job = job_from_dict(merged(JOB, {"units": {"length": "bohr", "energy": "hartree", "time": "fs"}, "absorber": None,
                                         "evolve": {"dt": 0.0005, "duration": 0.01},
                                         "record": {"every": 0.001, "snapshot_every": 0.005}}))
        path = Simulation(job).run(tmp_path, progress=False)
        with xr.open_dataset(path) as ds:
            v = ds[scalar.name]
            assert v.attrs["units"] == "fs" and v.attrs["long_name"] == "one atomic time unit along x"
            assert v.sizes["time"] == ds.sizes["time"] == 11
            assert np.allclose(v.values, au_time_fs, rtol=1e-12, atol=0)
    finally:
        observables.SCALARS.remove(scalar)
