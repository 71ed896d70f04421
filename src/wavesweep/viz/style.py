"""The house style of wavesweep's figures and movies.

Lines use the Okabe & Ito (2008) palette, distinguishable with the common
colour-vision deficiencies and in grey-scale print by their lightness;
density maps use matplotlib's ``cividis`` (Nuñez, Anderton & Renslow, PLoS
ONE 13, e0199239 (2018)): perceptually uniform and optimised for
colour-blind readers.  Text sizes are chosen for a figure seen at 100 dpi.
"""
from __future__ import annotations

import contextlib
import re

__all__ = ["PALETTE", "DENSITY_CMAP", "POTENTIAL", "ABSORBER", "DETECTOR", "SURFACE_STYLES", "COUPLING",
           "COUPLING_STYLES", "ADIABATIC_STYLES", "figure", "line_colors", "surface_style", "coupling_style",
           "adiabatic_style", "pretty_unit", "style"]

PALETTE = {
    "blue": "#0072B2", "vermillion": "#D55E00", "green": "#009E73", "orange": "#E69F00",
    "sky": "#56B4E9", "purple": "#CC79A7", "yellow": "#F0E442", "black": "#000000",
}
DENSITY_CMAP = "cividis"
DENSITY = PALETTE["blue"]
POTENTIAL = "#555555"
ABSORBER = "#BBBBBB"        # shaded layers, light enough to read the density over them
DETECTOR = PALETTE["vermillion"]
REAL, IMAG = PALETTE["green"], PALETTE["purple"]

# One curve per surface of a coupled run (arrival densities, movie densities and potentials,
# populations): Okabe & Ito (2008) colours with distinct line styles and widths, so the surfaces
# stay apart in grey-scale print too, where blue and vermillion come out about equally light.
# Entries: (colour, line style, line width in points).
SURFACE_STYLES = (("#0072B2", "-", 1.8), ("#D55E00", "--", 1.6), ("#009E73", ":", 2.0),
                  ("#CC79A7", "-.", 1.6), ("#000000", (0, (5, 1, 1, 1, 1, 1)), 1.4), ("#E69F00", (0, (1, 1)), 1.4))
# The off-diagonal couplings |V_ab| beside the surfaces' potentials: greys, thin, apart from every
# surface's style and from each other in grey-scale by their dash pattern, grey level and marker
# (the first pair: dark grey dash-dotted, no marker).  Entries: (colour, line style, width, marker).
COUPLING_STYLES = (("#555555", (0, (3, 1, 1, 1)), 1.0, ""), ("#222222", (0, (8, 2)), 1.0, "x"),
                   ("#888888", (0, (1, 1.5)), 1.3, "+"), ("#222222", (0, (3, 1, 1, 1, 1, 1)), 0.8, "|"),
                   ("#888888", (0, (6, 1, 1, 1)), 1.0, "1"), ("#444444", (0, (2, 3)), 1.1, "."))
COUPLING = COUPLING_STYLES[0][:3]
# The adiabatic populations (record.adiabatic) beside the surfaces' (diabatic) ones: thin solid
# greys with a marker per state, apart from the surfaces' coloured lines.  (colour, marker).
ADIABATIC_STYLES = (("#333333", "o"), ("#777777", "s"), ("#333333", "^"), ("#777777", "v"),
                    ("#333333", "D"), ("#777777", "x"))

RC = {
    "font.size": 9,
    "axes.titlesize": 9,
    "axes.labelsize": 9,
    "legend.fontsize": 8,
    "xtick.labelsize": 8,
    "ytick.labelsize": 8,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": False,
    "figure.facecolor": "white",
    "savefig.facecolor": "white",
    "lines.linewidth": 1.4,
    "image.cmap": DENSITY_CMAP,
}


def plain(text) -> str:
    """User text (a job's title, a detector's name) drawn as written: every
    ``$`` escaped, so matplotlib never reads it as math text (a title such as
    "bad $\\frac{1}{$ title" made plot and movie fail)."""
    return str(text).replace("$", r"\$")


def pretty_unit(unit: str) -> str:
    """A CF unit string for a label: "nm-1" -> nm$^{-1}$, "nm-0.5" -> nm$^{-1/2}$,
    "m2 s-1" -> m$^{2}$ s$^{-1}$."""
    def power(m):
        base, exp = m.group(1), m.group(2)
        exp = {"-0.5": "-1/2", "0.5": "1/2", "-1.5": "-3/2", "1.5": "3/2"}.get(exp, exp)
        return f"{base}$^{{{exp}}}$"

    unit = (unit or "").strip()
    if unit.startswith("(") and unit.endswith(")"):
        unit = unit[1:-1]                       # "(hbar/meV)" inside "time (...)"
    unit = re.sub(r"\bu(m|s)\b", r"µ\1", unit)    # um, us
    return re.sub(r"([A-Za-zµ_]+)(-?\d+(?:\.\d+)?)", power, unit)


def line_colors() -> list[str]:
    """Colours for a family of curves, in a fixed order."""
    order = ("blue", "vermillion", "green", "orange", "sky", "purple", "black")
    return [PALETTE[k] for k in order]


def surface_style(i: int) -> dict:
    """The line keywords (color, ls, lw) of the ``i``-th surface, in a fixed
    order (:data:`SURFACE_STYLES`, repeating after six)."""
    colour, ls, lw = SURFACE_STYLES[i % len(SURFACE_STYLES)]
    return {"color": colour, "ls": ls, "lw": lw}


def coupling_style(i: int) -> dict:
    """The line keywords of the ``i``-th coupled pair's |V_ab| (color, ls,
    lw, and a marker spaced along the line from the second pair on), in a
    fixed order (:data:`COUPLING_STYLES`, repeating after six)."""
    colour, ls, lw, marker = COUPLING_STYLES[i % len(COUPLING_STYLES)]
    keywords = {"color": colour, "ls": ls, "lw": lw}
    if marker:   # spaced by distance along the drawn line (a fraction of the axes' diagonal)
        keywords.update(marker=marker, ms=4, markevery=0.07)
    return keywords


def adiabatic_style(k: int) -> dict:
    """The line keywords of adiabatic state ``k``'s population: thin, solid,
    grey, with a marker per state (:data:`ADIABATIC_STYLES`)."""
    colour, marker = ADIABATIC_STYLES[k % len(ADIABATIC_STYLES)]
    return {"color": colour, "ls": "-", "lw": 0.8, "marker": marker, "ms": 3.5, "markevery": 0.06,
            "mfc": "white"}


def figure(width_px: int, height_px: int, dpi: int):
    """A matplotlib Figure with an Agg canvas (no display needed) in the
    house style, ``width_px`` x ``height_px`` pixels."""
    import matplotlib   # lazy: matplotlib (0.2-0.4 s) loads with the first figure
    from matplotlib.backends.backend_agg import FigureCanvasAgg   # lazy: as above
    from matplotlib.figure import Figure   # lazy: as above

    with matplotlib.rc_context(RC):
        fig = Figure(figsize=(width_px / dpi, height_px / dpi), dpi=dpi)
    FigureCanvasAgg(fig)
    return fig


@contextlib.contextmanager
def style():
    """The house rc settings for code that builds its own axes."""
    import matplotlib   # lazy: matplotlib loads with the first figure

    with matplotlib.rc_context(RC):
        yield
