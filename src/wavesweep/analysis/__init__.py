"""Analysis of results: arrival times, transmission, stationary states."""
from .arrivals import ArrivalDistribution, arrival_statistics, arrival_times
from .spectra import AutocorrelationLevels, autocorrelation_levels, eigenpairs, stationary_states, write_states
from .transmission import energy_resolved_transmission, transmission, transmission_totals

__all__ = ["ArrivalDistribution", "arrival_statistics", "arrival_times", "energy_resolved_transmission",
           "transmission", "transmission_totals", "AutocorrelationLevels", "autocorrelation_levels",
           "eigenpairs", "stationary_states", "write_states"]
