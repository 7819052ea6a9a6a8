"""Figures and a self-contained HTML page for lensrec reports (matplotlib with the Agg backend).

The figures use lensrec's own palette and labels: D_ℓ = ℓ(ℓ+1)C_ℓ/2π in µK² for CMB spectra and
[L(L+1)]² C_L^φφ/2π for the lensing potential, log axes where the trade uses them.
"""

from __future__ import annotations

import html
import os

import numpy as np

from ._deprecation import module_getattr
from .io import atomic_path, atomic_write_text

__all__ = [
    "PALETTE",
    "ESTIMATOR_COLORS",
    "estimator_color",
    "new_figure",
    "save_figure",
    "tidy_log_axis",
    "write_html_report",
    "mollweide_array",
]

# lensrec's own palette: ink, slate, and a warm/cool pair for comparisons
PALETTE = {
    "ink": "#1d2433",
    "signal": "#8a9a9d",
    "input": "#2f6690",
    "output": "#d1495b",
    "accent": "#edae49",
    "good": "#3a7d44",
    "grid": "#d9dde3",
}
ESTIMATOR_COLORS = {
    "TT": "#2f6690",
    "TE": "#7b4b94",
    "EE": "#3a7d44",
    "TB": "#c97c2b",
    "EB": "#d1495b",
    "MV": "#1d2433",
}
# ESTIMATOR_COLOURS, the old spelling, answers until 0.2 with a DeprecationWarning.
__getattr__ = module_getattr(__name__, {"ESTIMATOR_COLOURS": "ESTIMATOR_COLORS"}, globals())


def estimator_color(label: str, palette=None) -> str:
    """The line color of an estimator: its entry in ``palette`` (default ESTIMATOR_COLORS), else one from
    matplotlib's tab10 cycle (so that a newly added estimator is drawn without touching the palettes)."""
    palette = ESTIMATOR_COLORS if palette is None else palette
    if label in palette:
        return palette[label]
    from matplotlib import colormaps, colors

    from .labels import ESTIMATORS

    index = ESTIMATORS.index(label) if label in ESTIMATORS else 0
    return colors.to_hex(colormaps["tab10"](index % 10))


def _pyplot():
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    return plt


def new_figure(ncols: int = 1, nrows: int = 1, width: float = 6.4, height: float = 4.2):
    """A figure with lensrec's style: light grid, no top/right spines."""
    plt = _pyplot()
    fig, axes = plt.subplots(nrows, ncols, figsize=(width * ncols, height * nrows), squeeze=False, layout="constrained")
    for ax in axes.flat:
        ax.grid(True, color=PALETTE["grid"], linewidth=0.6)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
        ax.tick_params(colors=PALETTE["ink"])
    return fig, axes


def save_figure(fig, path, force: bool = False) -> None:
    """Write ``fig`` as PNG atomically and close it."""
    plt = _pyplot()
    with atomic_path(path, force=force, suffix=".png") as tmp:
        fig.savefig(tmp, dpi=110, format="png")
    plt.close(fig)


def mollweide_array(values, xsize: int = 800) -> np.ndarray:
    """A HEALPix map projected on a Mollweide grid (NaN outside the ellipse), for imshow."""
    import healpy

    values = np.asarray(values, dtype=float)
    nside = healpy.npix2nside(values.size)
    projector = healpy.projector.MollweideProj(xsize=xsize)
    image = np.array(projector.projmap(values, lambda x, y, z: healpy.vec2pix(nside, x, y, z)), dtype=float)
    image[~np.isfinite(image)] = np.nan  # outside the ellipse healpy returns -inf
    return image


def tidy_log_axis(ax, axis: str = "x") -> None:
    """Plain tick labels (10, 100, 1000) on a log axis, no crowded minor labels."""
    from matplotlib.ticker import LogLocator, NullFormatter, ScalarFormatter

    target = ax.xaxis if axis == "x" else ax.yaxis
    target.set_major_locator(LogLocator(base=10))
    formatter = ScalarFormatter()
    formatter.set_scientific(False)
    target.set_major_formatter(formatter)
    target.set_minor_formatter(NullFormatter())


def write_html_report(path, title: str, sections, caution: str, force: bool = False) -> None:
    """Write a self-contained page: ``sections`` is a list of (heading, paragraphs, figures, tables).

    ``figures`` are PNG file names relative to the page; ``tables`` are (header, rows) pairs.
    """
    parts = [
        "<!doctype html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>{html.escape(title)}</title>",
        "<style>body{font-family:system-ui,sans-serif;max-width:1100px;margin:2em auto;color:#1d2433;"
        "line-height:1.45}h1{font-size:1.6em}h2{border-bottom:2px solid #edae49;padding-bottom:.2em}"
        "table{border-collapse:collapse;margin:.8em 0}td,th{padding:.25em .8em;border-bottom:1px solid #d9dde3;"
        "text-align:right}th{background:#f3f4f6}td:first-child,th:first-child{text-align:left}"
        "img{max-width:100%;border:1px solid #d9dde3;margin:.5em 0}.caution{background:#fff6e0;"
        "border-left:4px solid #edae49;padding:.6em 1em}</style></head><body>",
        f"<h1>{html.escape(title)}</h1>",
        f"<p class='caution'>{html.escape(caution)}</p>",
    ]
    for heading, paragraphs, figures, tables in sections:
        parts.append(f"<h2>{html.escape(heading)}</h2>")
        parts.extend(f"<p>{html.escape(p)}</p>" for p in paragraphs)
        for header, rows in tables:
            parts.append("<table><tr>" + "".join(f"<th>{html.escape(str(h))}</th>" for h in header) + "</tr>")
            for row in rows:
                parts.append("<tr>" + "".join(f"<td>{html.escape(_cell(v))}</td>" for v in row) + "</tr>")
            parts.append("</table>")
        for figure in figures:
            name = os.path.basename(figure)
            parts.append(f"<img src='{html.escape(name)}' alt='{html.escape(name)}'>")
    parts.append("</body></html>")
    atomic_write_text(path, "\n".join(parts) + "\n", force=force)


def _cell(value) -> str:
    if isinstance(value, float):
        if not np.isfinite(value):
            return "—"
        return f"{value:.3g}" if (abs(value) < 1e-2 or abs(value) >= 1e4) and value != 0 else f"{value:.4g}"
    return str(value)
