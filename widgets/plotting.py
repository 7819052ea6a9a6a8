"""The workbench's plot style and the figure-in-a-widget view that every section draws into.

Figures are plain :class:`matplotlib.figure.Figure` objects (no pyplot state, so worker threads can draw
them) rendered by the Agg canvas to PNG bytes, which go into a fixed-size ``ipywidgets.Image``. Each
figure is built once; updates change the artists' data and re-render, so the page never re-lays out.
"""

from __future__ import annotations

import io
import threading

import ipywidgets as widgets
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from lensrec.power import spectrum_scale

__all__ = [
    "COLORS",
    "ESTIMATOR_COLORS",
    "estimator_color",
    "DPI",
    "WIDE",
    "SQUARE",
    "PAIR",
    "FigureView",
    "d_ell",
    "phi_plot_units",
    "finite_or_nan",
    "symmetric_limit",
    "set_log_range",
]

DPI = 96
# Figure sizes in inches at DPI; the image widgets get the matching pixel size so layouts never jump.
WIDE = (7.6, 4.0)
SQUARE = (5.2, 4.0)
PAIR = (9.6, 3.6)

# Our palette: muted, distinguishable in print and for common color-vision deficiencies.
COLORS = {
    "TT": "#1b4f72",
    "EE": "#1e8449",
    "BB": "#b9770e",
    "TE": "#6c3483",
    "phi": "#17202a",
    "signal": "#95a5a6",
    "noise": "#7f8c8d",
    "input": "#17202a",
    "reconstructed": "#c0392b",
    "template": "#2874a6",
    "residual": "#c0392b",
    "lensed": "#b9770e",
    "delensed": "#1e8449",
    "band": "#d5dbdb",
    "grid": "#e5e8e8",
}
ESTIMATOR_COLORS = {
    "TT": "#1b4f72",
    "TE": "#6c3483",
    "EE": "#1e8449",
    "TB": "#ca6f1e",
    "EB": "#b03a2e",
    "MV": "#17202a",
    "GMV": "#7f8c8d",
}


def estimator_color(label: str) -> str:
    """The line color of an estimator in the workbench (a tab10 color for labels without an entry)."""
    from lensrec.report import estimator_color as color

    return color(label, ESTIMATOR_COLORS)


MAP_CMAP = "RdBu_r"
POSITIVE_CMAP = "magma"


def d_ell(cl) -> np.ndarray:
    """D_ℓ = ℓ(ℓ+1) C_ℓ / 2π for a spectrum indexed from ℓ = 0 (plot units only; lensrec.power.spectrum_scale)."""
    cl = np.asarray(cl, dtype=float)
    return spectrum_scale("cmb", cl.size) * cl


def phi_plot_units(cl, units: str) -> np.ndarray:
    """A C_L^φφ-unit array shown as [L(L+1)]² C_L / 2π (``units="phi"``) or as C_L^κκ (``units="kappa"``).

    C_L^κκ = [L(L+1)]² C_L^φφ / 4 follows from κ = L(L+1) φ / 2 (lensrec conventions).
    """
    if units not in ("phi", "kappa"):
        raise ValueError(f"units must be 'phi' or 'kappa', got {units!r}")
    cl = np.asarray(cl, dtype=float)
    return spectrum_scale("lensing" if units == "phi" else "kappa", cl.size) * cl


def finite_or_nan(values) -> np.ndarray:
    """A float copy with inf replaced by NaN, so cut multipoles leave a gap instead of a spike."""
    out = np.array(values, dtype=float, copy=True)
    out[~np.isfinite(out)] = np.nan
    return out


def symmetric_limit(*arrays, percentile: float = 99.5) -> float:
    """One color limit ± v shared by several maps: the given percentile of |value| over all of them."""
    values = [np.abs(np.asarray(a, dtype=float)[np.isfinite(a)]) for a in arrays]
    values = [v for v in values if v.size]
    if not values:
        return 1.0
    limit = float(np.percentile(np.concatenate(values), percentile))
    return limit if limit > 0 else 1.0


def style_axes(ax, grid: bool = True) -> None:
    """Our axis style: light grid, no top/right spines, compact ticks."""
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.tick_params(labelsize=8.5, direction="out")
    if grid:
        ax.grid(True, which="major", color=COLORS["grid"], linewidth=0.7)
    ax.set_axisbelow(True)
    from matplotlib.ticker import NullFormatter

    for axis, scale in ((ax.xaxis, ax.get_xscale()), (ax.yaxis, ax.get_yscale())):
        if scale == "log":
            axis.set_minor_formatter(NullFormatter())  # narrow log ranges would otherwise label minor ticks


def set_log_range(ax, low: float, high: float, axis: str = "x") -> None:
    """Set a log axis range; within less than a decade also label the minor ticks (else none would show)."""
    from matplotlib.ticker import FormatStrFormatter, NullFormatter

    (ax.set_xlim if axis == "x" else ax.set_ylim)(low, high)
    target = ax.xaxis if axis == "x" else ax.yaxis
    target.set_minor_formatter(FormatStrFormatter("%g") if high < 10.0 * low else NullFormatter())


class FigureView:
    """A matplotlib figure shown as a PNG in a fixed-size widget, with a note that can stand in for it.

    Parameters
    ----------
    size : (float, float)
        Figure size in inches (rendered at :data:`DPI`).
    name : str
        CSS class suffix for the widget (``lensrec-plot-<name>``), used by browser tests.

    Attributes
    ----------
    figure : matplotlib.figure.Figure
        Build axes and artists on it once, then change their data and call :meth:`draw`.
    widget : ipywidgets.Box
        What a section puts in its layout.
    draws : int
        How many times the figure has been rendered (handy in tests).
    """

    def __init__(self, size=WIDE, name: str = "figure"):
        self.figure = Figure(figsize=size, dpi=DPI)
        self.canvas = FigureCanvasAgg(self.figure)
        width, height = int(round(size[0] * DPI)), int(round(size[1] * DPI))
        self.image = widgets.Image(format="png", layout=widgets.Layout(width=f"{width}px", height=f"{height}px"))
        self.image.add_class(f"lensrec-plot-{name}")
        self.note = widgets.HTML(
            layout=widgets.Layout(
                width=f"{width}px",
                height=f"{height}px",
                display="none",
                align_items="center",
                justify_content="center",
                border="1px dashed #aab7b8",
                padding="0 1em",
            ),
        )
        self.note.add_class(f"lensrec-note-{name}")
        self.widget = widgets.Box([self.image, self.note])
        self.draws = 0
        self._lock = threading.Lock()
        self.show_note("drawing…")  # never an empty image (a browser shows a broken-image icon for one)

    def draw(self) -> None:
        """Render the figure and show it (replacing any note)."""
        with self._lock:
            buffer = io.BytesIO()
            self.figure.savefig(buffer, format="png", dpi=DPI)
            self.image.value = buffer.getvalue()
            self.draws += 1
        self.note.layout.display = "none"
        self.image.layout.display = None

    def show_note(self, html: str) -> None:
        """Hide the plot and show ``html`` in its place (same size), e.g. what to do to get the plot."""
        self.note.value = f"<div style='color:#515a5a;max-width:36em'>{html}</div>"
        self.image.layout.display = "none"
        self.note.layout.display = "flex"

    @property
    def showing_plot(self) -> bool:
        return self.image.layout.display != "none" and self.draws > 0
