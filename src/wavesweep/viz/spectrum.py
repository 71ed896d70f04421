"""Figure of the momentum spectra of what left through each detector
(:func:`wavesweep.analysis.surface_flux.spectrum`): the density per unit
momentum, log scale, one row per detector; a line's or plane's row adds a
map of the density over the normal and the first transverse momentum."""
from __future__ import annotations

from pathlib import Path

import numpy as np

from ..io.paths import output_file
from .arrivals import FIGURE_TYPES, QUANTUM

__all__ = ["plot_spectrum"]

DECADES = 8   # the log scales span this many decades below the peak


def plot_spectrum(out: dict, path, title: str = "", dpi: int = 100, overwrite: bool = True) -> Path:
    """One row per detector: dP/dp against the normal momentum (job
    units; on a line or plane its marginal over the transverse momenta),
    on a log scale down to 1e-8 of its peak, and for a line or plane a map
    of log10 of the density over (normal, first transverse) momentum (a
    plane's summed over its second transverse axis); written to ``path``
    (PNG, PDF or SVG by its extension)."""
    import matplotlib   # lazy: matplotlib (0.2-0.4 s) loads with the first figure
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt   # lazy: as above, after choosing the Agg backend

    path = output_file(path, "--plot", FIGURE_TYPES, overwrite=overwrite, kind="figure")
    found = out["detectors"]
    maps = any("transverse_axes" in d for d in found)
    fig, axes = plt.subplots(len(found), 2 if maps else 1, figsize=(11 if maps else 7, 2.8 * len(found) + 0.4),
                             squeeze=False, constrained_layout=True)
    for row, d in zip(axes, found):
        ax = row[0]
        density = np.asarray(d.get("probability_density_normal", d["probability_density"]), float)
        trust = (f" ± {d['total_uncertainty']:.1g}" if d.get("total_uncertainty") else "")
        good = d.get("cut_uncertainty")
        ax.semilogy(d["momentum"], np.maximum(density, 1e-300), color=QUANTUM, lw=1.5,
                    label=f"through {d['detector']!r} (total {d['total']:.3g}{trust}"
                          + (f"; density good to {good:.0e} of its peak)" if good is not None else ")"))
        top = float(density.max()) if density.size else 1.0
        ax.set_ylim(top * 10.0**-DECADES, top * 2)
        normal = d.get("axis")
        ax.set_xlabel(f"momentum{' p_' + normal if normal else ''} ({d['momentum_units']})")
        ax.set_ylabel("dP/dp" if not normal else f"dP/dp_{normal}")
        ax.legend(loc="best", fontsize="small")
        if maps:
            _density_map(row[1], d) if "transverse_axes" in d else row[1].set_axis_off()
    if title:
        fig.suptitle(title)
    fig.savefig(path, dpi=dpi)
    plt.close(fig)
    return path


def _density_map(ax, d):
    """log10 of the density over (normal, first transverse) momentum."""
    cube = np.asarray(d["probability_density"], float)
    across = d["transverse_axes"]
    plane = cube.sum(axis=tuple(range(2, cube.ndim))) * _spacing(d, across[1:])
    top = float(plane.max()) if plane.size else 1.0
    shown = np.log10(np.maximum(plane, top * 10.0**-DECADES))
    mesh = ax.pcolormesh(d["momentum"], d[f"momentum_{across[0]}"], shown.T, shading="nearest", cmap="viridis",
                         vmin=np.log10(top) - DECADES, vmax=np.log10(top))
    ax.figure.colorbar(mesh, ax=ax, label="log10 density")
    ax.set_xlabel(f"p_{d['axis']} ({d['momentum_units']})")
    ax.set_ylabel(f"p_{across[0]} ({d['momentum_units']})")
    if len(across) > 1:
        ax.set_title(f"summed over p_{across[1]}", fontsize="small")


def _spacing(d, axes) -> float:
    """The product of the transverse momentum spacings of ``axes`` (1 for none)."""
    out = 1.0
    for a in axes:
        m = np.asarray(d[f"momentum_{a}"], float)
        out *= float(m[1] - m[0]) if len(m) > 1 else 1.0
    return out
