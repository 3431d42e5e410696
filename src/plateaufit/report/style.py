"""plateaufit's own plot style: one small dict of matplotlib settings.

Sized for a paper's single column (about 3.4 in wide) so that the text stays
readable when the PDF is included at its natural size. The plots apply it with
``matplotlib.rc_context(STYLE)``, so the caller's matplotlib settings are never
changed.
"""

from __future__ import annotations

from cycler import cycler

#: Width of a single-column figure, inches.
COLUMN_WIDTH = 3.4

#: Resolution of the PNG files and of the images embedded in the report page.
PNG_DPI = 150

#: The colour cycle: deep blue, brick, teal, ochre, plum, moss, slate.
COLORS = ("#1f4e79", "#b5403a", "#1d8a84", "#c8902b", "#6b4c8a", "#5c8a3a", "#5a6672")

#: Colour of a chosen result's band, of the averaged band and of a known truth.
BAND_COLOR = "#b5403a"
AVERAGE_COLOR = "#1d8a84"
TRUTH_COLOR = "#222222"

#: Markers for the number of states in a fit (1, 2, 3, ...).
STATE_MARKERS = ("o", "s", "^", "D", "v", "P")

STYLE: dict[str, object] = {
    "figure.figsize": (COLUMN_WIDTH, 2.5),
    "figure.dpi": 100,
    "figure.facecolor": "white",
    "savefig.facecolor": "white",
    "font.family": "DejaVu Sans",
    "mathtext.fontset": "dejavusans",
    "font.size": 8.0,
    "axes.titlesize": 8.0,
    "axes.titleweight": "bold",
    "axes.labelsize": 8.0,
    "xtick.labelsize": 7.0,
    "ytick.labelsize": 7.0,
    "legend.fontsize": 6.5,
    "legend.frameon": False,
    "legend.handletextpad": 0.4,
    "legend.columnspacing": 1.0,
    "axes.prop_cycle": cycler(color=list(COLORS)),
    "axes.linewidth": 0.6,
    "axes.edgecolor": "#333333",
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "axes.axisbelow": True,
    "grid.color": "#e3e3e3",
    "grid.linewidth": 0.5,
    "grid.linestyle": "-",
    "xtick.major.width": 0.6,
    "ytick.major.width": 0.6,
    "xtick.major.size": 2.5,
    "ytick.major.size": 2.5,
    "lines.linewidth": 1.0,
    "lines.markersize": 3.5,
    "errorbar.capsize": 1.5,
    "image.cmap": "RdBu_r",
    "pdf.fonttype": 3,           # Type 3 glyphs: much faster to write than TrueType subsets
}
