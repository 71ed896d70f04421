"""wavesweep: time-dependent wave-packet simulations on grids, parameter
studies, and their analysis.

Run a job from Python as from the shell::

    import wavesweep as ws
    job = ws.load_job("jobs/kestrel-diode.toml", overrides=["packet.energy=90"])
    print(ws.check_job(job).text())
    path = ws.Simulation(job).run("out/")
    print(ws.arrival_times(path)["after"].stats["mean"])
    ws.render_movie(path, "out/diode.mp4")

and a study: ``ws.submit("jobs/kestrel-scan.toml", "runs")``,
``ws.work("runs", workers=2)``, ``ws.collect("runs", "kestrel-scan")``.
"""
import importlib as _importlib
import os as _os

from ._version import __version__

# numba's OpenMP threads spin for a while after each parallel kernel; between
# kernels the FFT threads then compete with them for the cores.  Measured on
# 2 cores at 512^2: a split-operator step cost 9.8 FFT pairs with spinning
# threads and 1.0 with passive ones.  Must be set before libgomp loads.
_os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

# The public API, each name loaded from its module when first asked for
# (PEP 562): `import wavesweep` costs no numba, FFT library, xarray or
# matplotlib, so every process (a worker, `wavesweep --help`) starts fast
# and pays only for what it uses.  Name -> (module, attribute).
_PUBLIC = {
    "JobError": (".errors", "JobError"), "RunFailed": (".errors", "RunFailed"),
    "UnitSet": (".units", "UnitSet"), "Axis": (".grid", "Axis"), "Grid": (".grid", "Grid"),
    "Job": (".job", "Job"), "load_job": (".job", "load_job"), "job_from_dict": (".job", "job_from_dict"),
    "PotentialTerm": (".potentials", "PotentialTerm"), "POTENTIALS": (".potentials", "REGISTRY"),
    "register_potential": (".potentials", "register"),
    "Propagator": (".propagators", "Propagator"), "SCHEMES": (".propagators", "SCHEMES"),
    "Strang": (".propagators", "Strang"), "Order4": (".propagators", "Order4"),
    "Chebyshev": (".propagators", "Chebyshev"), "CrankNicolson": (".propagators", "CrankNicolson"),
    "Hamiltonian": (".hamiltonian", "Hamiltonian"),
    "Observer": (".observables", "Observer"), "Detector": (".observables", "Detector"),
    "Setup": (".setup", "Setup"), "resolve_job": (".setup", "resolve_job"),
    "Simulation": (".run", "Simulation"), "run_job": (".run", "run_job"),
    "BatchedRun": (".batched", "BatchedRun"), "batch_key": (".batched", "batch_key"),
    "load_study": (".study", "load_study"),
    "check_job": (".check", "check_job"),
    "submit": (".studies.api", "submit"), "work": (".studies.api", "work"), "status": (".studies.api", "status"),
    "collect": (".studies.collect", "collect"),
    "arrival_times": (".analysis.arrivals", "arrival_times"),
    "transmission": (".analysis.transmission", "transmission"),
    "stationary_states": (".analysis.spectra", "stationary_states"),
    "autocorrelation_levels": (".analysis.spectra", "autocorrelation_levels"),
    "render_movie": (".viz.movie", "render_movie"), "MovieOptions": (".viz.movie", "MovieOptions"),
    "plot_result": (".viz.summary", "plot_result"), "plot_run": (".viz.summary", "plot_run"),
    "plot_study": (".viz.summary", "plot_study"), "plot_arrivals": (".viz.arrivals", "plot_arrivals"),
}
_SUBPACKAGES = ("analysis", "viz", "studies", "job", "io", "potentials", "propagators", "absorbers", "kernels")


def __getattr__(name):
    if name in _PUBLIC:
        module, attribute = _PUBLIC[name]
        value = getattr(_importlib.import_module(module, __name__), attribute)
        globals()[name] = value   # once loaded, an ordinary attribute
        return value
    if name in _SUBPACKAGES:
        return _importlib.import_module(f".{name}", __name__)
    raise AttributeError(f"module 'wavesweep' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_PUBLIC))


__all__ = ["__version__", *_PUBLIC]
