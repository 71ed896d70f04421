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
from ._version import __version__

import os as _os

# numba's OpenMP threads spin for a while after each parallel kernel; between
# kernels the FFT threads then compete with them for the cores.  Measured on
# 2 cores at 512^2: a split-operator step cost 9.8 FFT pairs with spinning
# threads and 1.0 with passive ones.  Must be set before libgomp loads.
_os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

from .errors import JobError, RunFailed
from .units import UnitSet
from .grid import Axis, Grid
from .jobfile import Job, load_job, job_from_dict
from .potentials import PotentialTerm, REGISTRY as POTENTIALS, register as register_potential
from .propagators import Propagator, SCHEMES, Strang, Order4, Chebyshev, CrankNicolson
from .hamiltonian import Hamiltonian
from .observables import Observer, Detector
from .simulation import Setup, Simulation, run_job
from .batched import BatchedRun, batch_key
from .check import check_job
from .batch.api import submit, work, status

# Loaded when first asked for: analysis and collect need xarray (0.35 s to
# import), figures and movies matplotlib; a worker that only steps needs neither.
_LAZY = {"render_movie": ".viz.movie", "MovieOptions": ".viz.movie", "plot_result": ".viz.summary",
         "plot_run": ".viz.summary", "plot_study": ".viz.summary", "plot_arrivals": ".viz.arrivals",
         "stationary_states": ".analysis.spectra", "autocorrelation_levels": ".analysis.spectra",
         "arrival_times": ".analysis", "transmission": ".analysis", "collect": ".batch.collect"}


def __getattr__(name):
    import importlib
    if name in _LAZY:
        return getattr(importlib.import_module(_LAZY[name], __name__), name)
    if name in ("analysis", "viz"):   # subpackages not imported up front
        return importlib.import_module(f".{name}", __name__)
    raise AttributeError(f"module 'wavesweep' has no attribute {name!r}")


__all__ = [
    "BatchedRun", "batch_key",
    "__version__", "JobError", "RunFailed", "UnitSet", "Axis", "Grid", "Job", "load_job",
    "job_from_dict", "PotentialTerm", "POTENTIALS", "register_potential", "Propagator", "SCHEMES",
    "Strang", "Order4", "Chebyshev", "CrankNicolson", "Hamiltonian", "Observer", "Detector",
    "Setup", "Simulation", "run_job", "check_job",
    "submit", "work", "status", *_LAZY,
]
