"""wavesweep: time-dependent wave-packet simulations on grids, parameter
studies, and their analysis.

Run a job from Python as from the shell::

    import wavesweep as ws
    job = ws.load_job("jobs/resonant-tunnelling.toml", overrides=["packet.energy=90"])
    print(ws.check_job(job).text())
    path = ws.Simulation(job).run("out/")
"""
__version__ = "0.1.0"

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
from .check import check_job
from .analysis.spectra import stationary_states, autocorrelation_levels

__all__ = [
    "__version__", "JobError", "RunFailed", "UnitSet", "Axis", "Grid", "Job", "load_job",
    "job_from_dict", "PotentialTerm", "POTENTIALS", "register_potential", "Propagator", "SCHEMES",
    "Strang", "Order4", "Chebyshev", "CrankNicolson", "Hamiltonian", "Observer", "Detector",
    "Setup", "Simulation", "run_job", "check_job", "stationary_states", "autocorrelation_levels",
]
