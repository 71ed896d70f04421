"""Analysis of results: arrival times, transmission, stationary states.

``arrivals`` and ``transmission`` read result files only; ``spectra`` also
builds a job's Hamiltonian for ``levels JOB.toml`` (the run layer), so it is
loaded when first asked for and reading a result never pays for it."""
import importlib as _importlib

from .arrivals import ArrivalDistribution, arrival_statistics, arrival_times
from .transmission import energy_resolved_transmission, transmission, transmission_totals

_SPECTRA = ("AutocorrelationLevels", "autocorrelation_levels", "stationary_states", "write_states")


def __getattr__(name):
    if name in _SPECTRA:   # lazy: spectra loads the run layer (numba, the FFTs)
        return getattr(_importlib.import_module(".spectra", __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


__all__ = ["ArrivalDistribution", "arrival_statistics", "arrival_times", "energy_resolved_transmission",
           "transmission", "transmission_totals", *_SPECTRA]
