"""Small helpers shared by the report's plot modules (no plotting policy here)."""

from __future__ import annotations

import math
from typing import Any

from matplotlib.figure import Figure

from plateaufit.report.style import COLUMN_WIDTH

__all__ = ["text", "short", "figure", "band", "padded", "LOW_P", "TAU_LABEL"]

TAU_LABEL = r"$\tau_\mathrm{int}$ ($1/2 + \sum\rho$ convention)"
#: fits below this p-value are drawn hollow (the same level as the warnings' LOW_P_VALUE)
LOW_P = 0.05
_LAYOUT = "constrained"


def text(s: Any) -> str:
    """Plain text for matplotlib: a '$' in a user's name must not start mathtext."""
    return str(s).replace("$", r"\$")


def short(name: Any, limit: int = 18) -> str:
    """A name shortened for a title (the page and captions carry it in full)."""
    name = str(name)
    return name if len(name) <= limit else name[:limit - 1] + "…"


def figure(height: float, width: float = COLUMN_WIDTH) -> Figure:
    """A new figure (no pyplot) with the report's layout engine."""
    return Figure(figsize=(width, height), layout=_LAYOUT)


def band(ax: Any, lo: float, hi: float, value: float, error: float, *, color: str,
         label: str | None = None, alpha: float = 0.22, hatch: str | None = None,
         zorder: float = 1) -> None:
    """A horizontal value +- error band over lo..hi with the central line."""
    if not (math.isfinite(value) and math.isfinite(error)):
        return
    # a hatched band is hatch only, so a filled band beneath it stays visible
    ax.fill_between([lo, hi], value - error, value + error,
                    facecolor="none" if hatch else color, alpha=alpha,
                    edgecolor=color if hatch else "none", linewidth=0, label=label,
                    hatch=hatch, zorder=zorder)
    ax.plot([lo, hi], [value, value], color=color, linewidth=0.9, zorder=zorder + 0.5)


def padded(lo: float, hi: float, frac: float = 0.08) -> tuple[float, float]:
    """``(lo, hi)`` widened by ``frac`` of the span on each side."""
    span = hi - lo
    if not math.isfinite(span) or span <= 0:
        span = abs(hi) * 0.1 or 1.0
    return lo - frac * span, hi + frac * span
