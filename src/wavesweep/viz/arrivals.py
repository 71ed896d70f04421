"""Figure of arrival-time distributions: the quantum density per detector
with the classical estimate beside it (free flight, or falling under the
run's constant uniform force)."""
from __future__ import annotations

from pathlib import Path

import numpy as np

from ..errors import JobError
from ..io.paths import output_file
from .style import SURFACE_STYLES, plain

__all__ = ["plot_arrivals", "plot_surface_arrivals"]

# colour-blind safe pair (Okabe & Ito 2008 palette): blue, vermillion
QUANTUM, CLASSICAL, BACKFLOW = "#0072B2", "#D55E00", "#999999"


# Figure files plot_arrivals writes (by the suffix).
FIGURE_TYPES = (".png", ".pdf", ".svg")


def plot_arrivals(distributions: dict, path, title: str = "", dpi: int = 100, overwrite: bool = True) -> Path:
    """One panel per detector: Pi(t) = J / P (or dA/dt / P), the classical
    curve, the mean and the 10/90 % quantiles; written to ``path`` (PNG, PDF
    or SVG by its extension)."""
    import matplotlib   # lazy: matplotlib (0.2-0.4 s) loads with the first figure
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt   # lazy: as above, after choosing the Agg backend

    path = output_file(path, "--plot", FIGURE_TYPES, overwrite=overwrite, kind="figure")
    n = len(distributions)
    fig, axes = plt.subplots(n, 1, figsize=(7, 2.8 * n + 0.4), squeeze=False, constrained_layout=True)
    for ax, (name, d) in zip(axes[:, 0], distributions.items()):
        p = d.stats["probability"]
        # normalised by what the times describe: the net crossing, or the
        # forward flux where the flux changes sign
        norm = d.stats.get("forward", p) if d.definition == "positive flux" else p
        scale = 1.0 / norm if norm > 0 else 1.0
        rho = d.density * scale
        label = {"flux": "quantum (flux J / P)", "positive flux": "quantum (flux / forward flux)",
                 "absorption": "quantum (absorption rate / P)"}.get(d.definition, d.definition)
        ax.plot(d.time, rho, color=QUANTUM, lw=1.6, label=label)
        neg = np.where(rho < 0, rho, np.nan)
        if d.stats.get("backflow", 0.0) > 1e-6 * max(abs(norm), 1e-300):
            ax.fill_between(d.time, 0, neg, color=BACKFLOW, alpha=0.6,
                            label="negative flux (flowing back)")
        cp = d.stats.get("classical_probability", 0.0)
        if not d.stats.get("classical_is_reference", True):
            cp = 0.0   # a free-flight curve under gravity or a field would only mislead: not drawn
        if cp > 0:
            ax.plot(d.time, d.classical_density / cp, color=CLASSICAL, lw=1.2, ls="--",
                    label="classical, uniform force" if "classical_acceleration" in d.stats
                    else "classical free flight")
        for key, style, text in (("mean", "-", "mean"), ("q10", ":", "10 / 90 %"), ("q90", ":", None)):
            v = d.stats.get(key)
            if v is not None and np.isfinite(v):
                ax.axvline(v, color=QUANTUM, lw=0.8, ls=style, alpha=0.7, label=text)
        # zoom on where something arrives (1e-3 of the peak), quantum or classical
        signal = np.maximum(np.abs(rho), np.abs(d.classical_density / cp) if cp > 0 else 0.0)
        busy = np.nonzero(signal > 1e-3 * signal.max())[0] if signal.max() > 0 else []
        if len(busy):
            lo, hi = d.time[busy[0]], d.time[busy[-1]]
            pad = 0.1 * (hi - lo) if hi > lo else 1.0
            ax.set_xlim(max(d.time[0], lo - pad), min(d.time[-1], hi + pad))
        ax.set_xlabel(f"time ({d.time_units})")
        ax.set_ylabel(f"arrival density ({d.time_units}$^{{-1}}$)")
        back = d.stats.get("backflow", 0.0)
        note = "" if np.isfinite(d.stats["mean"]) else " (nothing arrived)"
        if d.stats.get("truncated"):
            note += " (truncated: the run ended too early)"
        ax.set_title(f"detector {plain(repr(name))}: net crossing P = {p:.4g}"
                     + (f", flowing back {back:.3g}" if back > 1e-6 else "")
                     + f"; mean {d.stats['mean']:.4g} {d.time_units}{note}", fontsize=10)
        ax.legend(fontsize=8, frameon=False)
        ax.axhline(0, color="black", lw=0.5)
    return _saved(fig, plt, path, title, dpi)


def plot_surface_arrivals(distributions: dict, path, title: str = "", dpi: int = 100,
                          overwrite: bool = True) -> Path:
    """Coupled surfaces: one panel per detector, one curve per surface, the
    arrival density J_s / P (P = sum_s P_s, what crossed on any surface, so
    each curve's area is its surface's share), told apart by colour, line
    style and the legend.  ``distributions``: {detector: {surface:
    ArrivalDistribution}} (:func:`wavesweep.analysis.arrivals.arrival_times`
    with ``surfaces=True``)."""
    import matplotlib   # lazy: matplotlib (0.2-0.4 s) loads with the first figure
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt   # lazy: as above, after choosing the Agg backend

    path = output_file(path, "--plot", FIGURE_TYPES, overwrite=overwrite, kind="figure")
    n = len(distributions)
    fig, axes = plt.subplots(n, 1, figsize=(7, 2.8 * n + 0.4), squeeze=False, constrained_layout=True)
    for ax, (name, per) in zip(axes[:, 0], distributions.items()):
        total = sum(d.stats["probability"] for d in per.values())
        scale = 1.0 / total if total > 0 else 1.0
        span = []
        for i, (surface, d) in enumerate(per.items()):
            colour, style, width = SURFACE_STYLES[i % len(SURFACE_STYLES)]
            rho = d.density * scale
            ax.plot(d.time, rho, color=colour, ls=style, lw=width,
                    label=f"surface {plain(surface)}: P = {d.stats['probability']:.4g}"
                          + ("" if np.isfinite(d.stats["mean"]) else " (nothing arrived)"))
            if np.isfinite(d.stats["mean"]):
                ax.axvline(d.stats["mean"], color=colour, ls=style, lw=0.8, alpha=0.7)
            busy = np.nonzero(np.abs(rho) > 1e-3 * np.abs(rho).max())[0] if np.abs(rho).max() > 0 else []
            if len(busy):
                span += [d.time[busy[0]], d.time[busy[-1]]]
        if span:
            lo, hi = min(span), max(span)
            pad = 0.1 * (hi - lo) if hi > lo else 1.0
            ax.set_xlim(max(d.time[0], lo - pad), min(d.time[-1], hi + pad))
        ax.set_xlabel(f"time ({d.time_units})")
        ax.set_ylabel(f"arrival density ({d.time_units}$^{{-1}}$)")
        ax.set_title(f"detector {plain(repr(name))}: P = {total:.4g} on all surfaces; "
                     "thin lines: each surface's mean", fontsize=10)
        ax.legend(fontsize=8, frameon=False)
        ax.axhline(0, color="black", lw=0.5)
    return _saved(fig, plt, path, title, dpi)


def _saved(fig, plt, path, title: str, dpi: int):
    """The figure titled, written to ``path`` (a write error is one line on
    --plot) and closed; returns the path."""
    if title:
        fig.suptitle(plain(title), fontsize=11)
    try:
        fig.savefig(path, dpi=dpi)
    except OSError as e:
        raise JobError("--plot", f"cannot write {str(path)!r}: {e.strerror or e}") from None
    finally:
        plt.close(fig)
    return path
