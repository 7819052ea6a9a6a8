"""Presentation of lensing bandpowers: the bias-budget text table, its figure and the report files.

The numbers come from :mod:`lensrec.bandpowers` (:func:`lensrec.bandpowers.bias_budget` is the budget as
data); this module only lays them out. Figures are :class:`matplotlib.figure.Figure` objects not attached
to pyplot.
"""

from __future__ import annotations

import numpy as np

from .bandpowers import TERM_LABELS, LensingBandpowers, bias_budget
from .power import spectrum_scale

__all__ = ["bias_budget_table", "plot_bias_budget", "write_bias_report"]


def bias_budget_table(result: LensingBandpowers) -> str:
    """A text table of the bias budget: each term per bandpower and as a fraction of the signal."""
    budget = bias_budget(result)
    ratio_name = "S" if result.amplitude is not None else "N0"
    header = (
        f"{'L range':>11} {'L_eff':>7} {'signal':>10} {'raw':>10} {'RDN0':>10} {'MC-N0':>10} {'MC-N1':>10} "
        f"{'an. N1':>10} "
        f"{'MF':>10} {'1/rho^2':>8} {'debiased':>10} {'sigma':>9} "
        f"{'RDN0/' + ratio_name:>8} {'N1/' + ratio_name:>8} {'MF/' + ratio_name:>8}"
    )
    lines = [
        f"bias budget: estimator {result.estimator}, {result.component}; units [L(L+1)]^2 C_L/2pi; "
        f"{result.n_sims} simulations"
        + ("" if result.n1_computed else "; MC-N1 not computed")
        + "; an. N1 = analytic N1 (flat sky, not subtracted)",
        header,
        "-" * len(header),
    ]

    def ratio(value):
        return "n/a" if value is None else f"{value:.3g}"

    for row in budget["bandpowers"]:
        lines.append(
            f"{row['L_min']:>5}-{row['L_max']:<5} {row['L_eff']:>7.1f} {row['signal']:>10.3e} {row['raw']:>10.3e} "
            f"{row['rdn0']:>10.3e} {row['mc_n0']:>10.3e} {row['n1']:>10.3e} {row['analytic_n1']:>10.3e} "
            f"{row['mean_field']:>10.3e} "
            f"{row['normalization_correction']:>8.4f} {row['debiased']:>10.3e} {row['error']:>9.2e} "
            f"{ratio(row['rdn0_over_signal']):>8} {ratio(row['n1_over_signal']):>8} "
            f"{ratio(row['mean_field_over_signal']):>8}"
        )
    if result.amplitude is not None:
        lines.append(
            f"A_lens = {result.amplitude:.4f} +- {result.amplitude_error:.4f} (scatter of {result.n_sims} simulations and the "
            "Monte-Carlo error of RDN0 and N1)"
        )
    target = "fiducial model" if result.amplitude is not None else "zero (null test)"
    lines.append(
        f"chi2 to the {target} = {result.chi2:.2f} for {result.dof} bandpowers (PTE {result.pte:.3f}; "
        f"{result.chi2_method})"
    )
    return "\n".join(lines) + "\n"


_STYLE = {
    "theory": "#1b3a5c",
    "data": "#c0392b",
    "rdn0": "#2e86ab",
    "mc_n0": "#7fb3d5",
    "n1": "#e67e22",
    "mean_field": "#8e44ad",
    "analytic_n0": "#7f8c8d",
    "analytic_n1": "#d35400",
    "normalization": "#27ae60",
}


def plot_bias_budget(result: LensingBandpowers, title: str | None = None):
    """A log–log figure of the bias budget: signal, debiased data, and |each term| per bandpower.

    Returns a :class:`matplotlib.figure.Figure` (not attached to pyplot); negative terms are drawn with
    open markers at their absolute value.
    """
    from matplotlib.figure import Figure

    if not isinstance(result, LensingBandpowers):
        raise TypeError(f"result must be LensingBandpowers, got {type(result).__name__}")
    figure = Figure(figsize=(8.0, 5.6), dpi=110, layout="constrained")
    axes = figure.add_subplot()
    L_all = np.asarray(result.unbinned["L"])
    keep = L_all >= 2
    factor = spectrum_scale("lensing", int(L_all.max()) + 1)[L_all.astype(np.int64)]
    L_eff = result.L_eff
    if result.amplitude is not None:
        axes.plot(
            L_all[keep],
            (factor * result.unbinned["theory"])[keep],
            color=_STYLE["theory"],
            lw=2.0,
            label=r"fiducial $C_L^{\phi\phi}$",
        )
    axes.plot(
        L_all[keep],
        (factor * result.unbinned["analytic_n0"])[keep],
        color=_STYLE["analytic_n0"],
        lw=1.2,
        ls="--",
        label="analytic N0",
    )
    axes.plot(
        L_all[keep],
        np.abs(factor * result.unbinned["analytic_n1"])[keep],
        color=_STYLE["analytic_n1"],
        lw=1.2,
        ls="-.",
        label="|analytic N1|",
    )
    for name, marker in (("rdn0", "s"), ("mc_n0", "D"), ("n1", "o"), ("mean_field", "v")):
        if name == "n1" and not result.n1_computed:
            continue
        values = result.terms[name]
        positive = values > 0
        # a line only joins terms that are positive in every bin; mixed signs are shown as markers alone
        axes.plot(
            L_eff[positive],
            values[positive],
            marker=marker,
            ls="-" if positive.all() else "none",
            lw=0.8,
            color=_STYLE[name],
            ms=6,
            label=TERM_LABELS[name],
        )
        if np.any(~positive):
            axes.plot(
                L_eff[~positive],
                -values[~positive],
                marker=marker,
                ls="none",
                ms=6,
                mfc="white",
                color=_STYLE[name],
                label=f"−{TERM_LABELS[name]} (negative)",
            )
    if result.amplitude is not None:
        shift = np.abs(result.normalization - 1.0) * result.theory
        axes.plot(L_eff, shift, marker="^", ls=":", color=_STYLE["normalization"], ms=6, label=r"|1/ρ² − 1| × signal")
    visible = result.debiased > 0
    axes.errorbar(
        L_eff[visible],
        result.debiased[visible],
        yerr=result.errors[visible],
        fmt="o",
        ms=5,
        color=_STYLE["data"],
        ecolor=_STYLE["data"],
        capsize=3,
        label="debiased data",
        zorder=5,
    )
    axes.set_xscale("log")
    axes.set_yscale("log")
    axes.set_xlabel("lensing multipole $L$")
    axes.set_ylabel(r"$[L(L+1)]^2\, C_L / 2\pi$" + ("" if result.component == "gradient" else "  (curl)"))
    axes.set_xlim(max(2.0, result.binning.edges[0] * 0.8), result.binning.edges[-1] * 1.1)
    axes.grid(True, which="major", color="#dddddd", lw=0.6)
    axes.grid(True, which="minor", color="#f0f0f0", lw=0.4)
    for spine in ("top", "right"):
        axes.spines[spine].set_visible(False)
    if title is None:
        title = f"bias budget: {result.estimator} {result.component}, {result.n_sims} simulations"
        if result.amplitude is not None:
            title += f"  —  A_lens = {result.amplitude:.3f} ± {result.amplitude_error:.3f}"
    axes.set_title(title, fontsize=10)
    axes.legend(fontsize=8, frameon=False, ncols=2, loc="best")
    return figure


def write_bias_report(
    result: LensingBandpowers, directory, force: bool = False, provenance: dict | None = None, stem: str | None = None
) -> list[str]:
    """Write ``<stem>.json`` (bandpowers, covariance, budget, amplitude), ``<stem>.txt`` and ``<stem>.png``.

    Parameters
    ----------
    result : LensingBandpowers
    directory : path
        Created if needed.
    force : bool
        Overwrite existing files (default: refuse, before writing anything).
    provenance : dict, optional
        Stored under "provenance" in the JSON.
    stem : str, optional
        Default ``bias_budget_<estimator>_<component>``.

    Returns
    -------
    list of str
        The paths written.
    """
    import os

    from .io import atomic_path, atomic_write_text, check_outputs_free, write_json

    stem = stem or f"bias_budget_{result.estimator}_{result.component}"
    paths = [os.path.join(os.fspath(directory), f"{stem}.{ext}") for ext in ("json", "txt", "png")]
    check_outputs_free(paths, force=force)
    os.makedirs(directory, exist_ok=True)
    document = {"bandpowers": result.to_dict(), "budget": bias_budget(result)}
    if provenance is not None:
        document["provenance"] = provenance
    write_json(paths[0], document, force=force)
    atomic_write_text(paths[1], bias_budget_table(result), force=force)
    figure = plot_bias_budget(result)
    with atomic_path(paths[2], force=force, suffix=".png") as tmp:
        figure.savefig(tmp, format="png")
    return paths
