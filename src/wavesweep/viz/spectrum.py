"""Figure of the momentum spectra of what left through each detector
(:func:`wavesweep.analysis.surface_flux.spectrum`): the density per unit
momentum, log scale, one panel per detector."""
from __future__ import annotations

from pathlib import Path

import numpy as np

from ..io.paths import output_file
from .arrivals import FIGURE_TYPES, QUANTUM

__all__ = ["plot_spectrum"]


def plot_spectrum(out: dict, path, title: str = "", dpi: int = 100, overwrite: bool = True) -> Path:
    """One panel per detector: dP/dp against the normal momentum (job
    units), on a log scale down to 1e-8 of its peak; written to ``path``
    (PNG, PDF or SVG by its extension)."""
    import matplotlib   # lazy: matplotlib (0.2-0.4 s) loads with the first figure
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt   # lazy: as above, after choosing the Agg backend

    path = output_file(path, "--plot", FIGURE_TYPES, overwrite=overwrite, kind="figure")
    found = out["detectors"]
    fig, axes = plt.subplots(len(found), 1, figsize=(7, 2.8 * len(found) + 0.4), squeeze=False,
                             constrained_layout=True)
    for ax, d in zip(axes[:, 0], found):
        density = np.asarray(d["probability_density"], float)
        ax.semilogy(d["momentum"], np.maximum(density, 1e-300), color=QUANTUM, lw=1.5,
                    label=f"through {d['detector']!r} (total {d['total']:.3g})")
        top = float(density.max()) if density.size else 1.0
        ax.set_ylim(top * 1e-8, top * 2)
        ax.set_xlabel(f"momentum ({d['momentum_units']})")
        ax.set_ylabel("dP/dp")
        ax.legend(loc="best", fontsize="small")
    if title:
        fig.suptitle(title)
    fig.savefig(path, dpi=dpi)
    plt.close(fig)
    return path
