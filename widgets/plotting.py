"""The workbench's plot style and the figure-in-a-widget view that every section draws into.

Figures are plain :class:`matplotlib.figure.Figure` objects (no pyplot state, so worker threads can draw
them) rendered by the Agg canvas to PNG bytes, which go into a fixed-size ``ipywidgets.Image``. Each
figure is built once; updates change the artists' data and re-render, so the page never re-lays out.
"""

from __future__ import annotations

import io
import threading
from html import escape

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
    "labelled_ticks",
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
    """Set a log axis range and make sure it labels at least two ticks.

    Over less than two decades at most one power of ten is in view, so the minor ticks at 2× and 5× each
    power of ten (all of 2–9× within one decade) are labelled too; wider ranges label the powers of ten only.
    """
    from matplotlib.ticker import FormatStrFormatter, LogFormatterSciNotation, LogLocator, NullFormatter

    (ax.set_xlim if axis == "x" else ax.set_ylim)(low, high)
    target = ax.xaxis if axis == "x" else ax.yaxis
    decades = np.log10(high / low) if low > 0 and high > low else 0.0
    if decades < 2.0:  # plain numbers on major and minor ticks alike, so the labels read as one scale
        subs = np.arange(2.0, 10.0) if decades < 1.0 else (2.0, 5.0)
        target.set_minor_locator(LogLocator(base=10.0, subs=subs))
        target.set_minor_formatter(FormatStrFormatter("%g"))
        target.set_major_formatter(FormatStrFormatter("%g"))
    else:
        target.set_minor_locator(LogLocator(base=10.0, subs=np.arange(2.0, 10.0)))
        target.set_minor_formatter(NullFormatter())
        target.set_major_formatter(LogFormatterSciNotation())


def labelled_ticks(ax, axis: str = "x") -> list[str]:
    """The tick labels drawn inside the axis range (major and minor), for tests and checks."""
    ax.figure.canvas.draw()
    target = ax.xaxis if axis == "x" else ax.yaxis
    low, high = sorted(ax.get_xlim() if axis == "x" else ax.get_ylim())
    labels = []
    for tick in [*target.get_major_ticks(), *target.get_minor_ticks()]:
        position, text = tick.get_loc(), tick.label1.get_text()
        if text and tick.label1.get_visible() and low <= position <= high:
            labels.append(text)
    return labels


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
        self.name = name
        self.size_px = (width, height)
        # The image is as wide as the figure, or as its container when that is narrower; its height follows
        # from the PNG's own aspect ratio (height auto), so a narrow window scales the figure down instead of
        # squashing it. The box is a block (not a flex row) so the image is never stretched across its axis.
        self.image = widgets.Image(format="png", layout=widgets.Layout(width="100%", height="auto", min_width="0"))
        self.image.add_class(f"lensrec-plot-{name}")
        self.note = widgets.HTML(
            layout=widgets.Layout(
                width="100%",
                height=f"{height}px",
                display="none",
                align_items="center",
                justify_content="center",
                border="1px dashed #aab7b8",
                padding="0 1em",
            ),
        )
        self.note.add_class(f"lensrec-note-{name}")
        self.banner = widgets.HTML(layout=widgets.Layout(display="none", width="100%"))
        self.banner.add_class(f"lensrec-stale-{name}")
        self.widget = widgets.Box(
            [self.banner, self.image, self.note],
            layout=widgets.Layout(display="block", width=f"{width}px", max_width="100%", flex="0 1 auto"),
        )
        self.widget.add_class("lensrec-figure")
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
        self.clear_stale()

    def mark_stale(self, text: str) -> None:
        """Keep the plot but put a visible out-of-date mark above it (no mark when no plot is shown)."""
        if not self.showing_plot:
            return
        self.banner.value = (
            "<div style='background:#fcf3cf;color:#7d6608;padding:2px 8px;border-left:3px solid #b7950b'>"
            f"⚠ {escape(text)}</div>"
        )
        self.banner.layout.display = None

    def clear_stale(self) -> None:
        self.banner.value = ""
        self.banner.layout.display = "none"

    @property
    def stale(self) -> bool:
        """True while the plot carries an out-of-date mark."""
        return self.banner.layout.display != "none"

    def show_note(self, html: str) -> None:
        """Hide the plot and show ``html`` in its place (same size), e.g. what to do to get the plot."""
        self.note.value = f"<div style='color:#515a5a;max-width:36em;line-height:1.45;white-space:normal'>{html}</div>"
        self.image.layout.display = "none"
        self.note.layout.display = "flex"
        self.clear_stale()

    @property
    def showing_plot(self) -> bool:
        return self.image.layout.display != "none" and self.draws > 0
