"""The demo's report: its figures, its HTML page, ``summary.json`` and the printed summary table.

:func:`lensrec.demo.run_demo` computes everything with library calls and hands the results here in a
:class:`DemoResults`; this module only lays them out (binning for display with
:func:`lensrec.power.bin_spectrum`, so binned data and theory are the same plotted quantity).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import report
from .io import write_json
from .labels import COMPONENTS
from .power import bin_spectrum, spectrum_scale

__all__ = ["DemoResults", "write_demo_report"]


@dataclass(frozen=True, eq=False)
class DemoResults:
    """What the demo computed (library objects), for :func:`write_demo_report`."""

    experiment: object
    spectra: object
    forecast: object  # ReconstructionNoise
    sky: object  # SimulatedSky
    deflection: object  # DeflectionMaps
    reconstruction: object  # Reconstruction
    comparison: object  # InputComparison
    kappa: tuple  # (input κ map, Wiener-filtered reconstructed κ map)
    kappa_L_max: int
    delensed: object  # DelensingResult
    tensor: object  # DelensingForecast of the experiment
    tensor_simulation: object  # DelensingForecast at the simulation's band limit and N0
    forecast_L: tuple
    caution: str
    iterative: object = None  # IterativeNoise (EB, MV) or None
    tensor_iterative: object = None  # DelensingForecast with the iterative MV N0, or None
    n1: object = None  # analytic N1 of the reconstruction's estimator: {component: array}, or None


def _log_edges(low: int, high: int, count: int) -> np.ndarray:
    return np.unique(np.round(np.geomspace(low, high, count)).astype(int))


def _response_range(results: DemoResults) -> tuple[int, int]:
    """L range of the response check: from 20 to the highest signal-dominated L (100 if none)."""
    lmax_L = results.reconstruction.lmax_L
    signal_dominated = np.nonzero(results.spectra.phi[: lmax_L + 1] > results.comparison.n0)[0]
    top = signal_dominated[signal_dominated >= 20]
    return 20, int(top.max()) if top.size else 100


def _curl_ratio_expected(results: DemoResults, edges) -> np.ndarray | None:
    """Binned (N0 + N1)/N0 of the curl: what the curl null test expects (None without N1)."""
    if results.n1 is None:
        return None
    comparison = results.comparison
    ratio = 1.0 + np.nan_to_num(results.n1["curl"], nan=0.0) / comparison.curl_n0
    return bin_spectrum(ratio, edges, skip_nan=True)[1]


def _curl_expectation(results: DemoResults, edges) -> dict:
    expected = _curl_ratio_expected(results, edges)
    return {} if expected is None else {"curl_n0_plus_n1_over_n0_median": float(np.nanmedian(expected))}


def demo_summary(results: DemoResults, provenance: dict) -> dict:
    """The numbers of ``summary.json``."""
    experiment, forecast, delensed = results.experiment, results.forecast, results.delensed
    lmax, lmax_L = results.sky.lmax, results.reconstruction.lmax_L
    L_low, L_top = _response_range(results)
    edges = _log_edges(20, lmax_L + 1, 16)
    _, curl_ratio = bin_spectrum(results.comparison.curl_over_n0, edges, skip_nan=True)
    snr = forecast.lensing_snr()
    lmax_forecast = int(forecast.L[-1])
    bands = [(lo, hi) for lo, hi in ((30, 100), (100, 300), (300, 1000), (1000, 2000)) if hi <= lmax]
    return {
        "experiment": experiment.to_dict(),
        "simulation": {
            "nside": results.sky.nside,
            "lmax": lmax,
            "lmax_L": lmax_L,
            "seed": int(results.sky.settings["seed"]),
            "rms_deflection_arcmin": results.deflection.rms_arcmin,
        },
        "forecast": {
            "lmax_L": lmax_forecast,
            "n0_gradient": {
                label: {
                    str(L): float(forecast.n0[label]["gradient"][L]) for L in results.forecast_L if L <= lmax_forecast
                }
                for label in forecast.n0
            },
            "lensing_snr": {label: float(value) for label, value in snr.items()},
        },
        "reconstruction": {
            "estimator": results.reconstruction.estimator,
            "cross_over_input": results.comparison.mode_weighted_response(L_low, L_top),
            "cross_over_input_L_range": [L_low, L_top],
            "curl_auto_over_n0_median": float(np.nanmedian(curl_ratio)),
            **_curl_expectation(results, edges),
        },
        "delensing": {
            "method": delensed.method,
            "efficiency_by_band": {f"{lo}-{hi}": float(delensed.efficiency_in_range(lo, hi)) for lo, hi in bands},
            "alens_residual_measured": float(delensed.alens_residual),
            "alens_residual_forecast_for_this_simulation": float(results.tensor_simulation.alens_residual),
            "alens_residual_forecast_full_experiment": float(results.tensor.alens_residual),
            "alens_range": [int(delensed.ell_min), int(delensed.ell_max)],
            "bias_treatment": "exclude_delensed_b" if "exclude_delensed_b" in delensed.notes[0] else "none",
            "notes": list(delensed.notes),
        },
        "iterative_forecast": _iterative_summary(results),
        "tensor_forecast": {
            "sigma_r_lensed": float(results.tensor.sigma_r_lensed),
            "sigma_r_delensed": float(results.tensor.sigma_r_delensed),
            "sigma_r_lensed_marginalized": float(results.tensor.sigma_r_lensed_marginalized),
            "sigma_r_delensed_marginalized": float(results.tensor.sigma_r_delensed_marginalized),
            "ell_range": [int(results.tensor.ell_min), int(results.tensor.ell_max)],
            "sky_fraction": float(results.tensor.sky_fraction),
        },
        "caution": results.caution,
        "provenance": provenance,
    }


def _iterative_summary(results: DemoResults) -> dict | None:
    """Converged iterative N0 at the forecast L, steps, and A_lens^res / σ(r) of delensing with it."""
    iterative, tensor = results.iterative, results.tensor_iterative
    if iterative is None:
        return None
    lmax_forecast = int(iterative.L[-1])
    return {
        "n0_gradient": {
            label: {str(L): float(parts["gradient"][L]) for L in results.forecast_L if L <= lmax_forecast}
            for label, parts in iterative.n0.items()
        },
        "lensing_iterations": dict(iterative.lensing_iterations),
        "tolerance": float(iterative.settings["tolerance"]),
        "alens_residual": None if tensor is None else float(tensor.alens_residual),
        "sigma_r_delensed": None if tensor is None else float(tensor.sigma_r_delensed),
    }


def write_demo_report(paths: dict, results: DemoResults, provenance: dict, force: bool = False, log=print) -> dict:
    """Write the demo's figures, ``index.html`` and ``summary.json`` to ``paths`` and log the summary table.

    Returns the summary (the content of ``summary.json``).
    """
    import os

    os.makedirs(os.path.dirname(os.path.abspath(paths["index.html"])), exist_ok=True)
    summary = demo_summary(results, provenance)
    _noise_figure(paths["noise_forecast.png"], results, force)
    _sky_figure(paths["sky_maps.png"], results, force)
    _reconstruction_figure(paths["reconstruction_spectra.png"], results, force)
    _convergence_figure(paths["convergence.png"], results, force)
    _tensor_figure(paths["tensor_forecast.png"], results, force)
    _efficiency_figure(paths["delensing_spectra.png"], results, force)
    _write_page(paths, summary, results, force)
    write_json(paths["summary.json"], summary, force=force)
    for line in summary_table(summary):
        log(line)
    return summary


# ------------------------------------------------------------------------------------------ figures
def _noise_figure(path, results: DemoResults, force: bool) -> None:
    forecast, spectra, experiment = results.forecast, results.spectra, results.experiment
    L_f = forecast.L
    scale = spectrum_scale("lensing", L_f.size)
    fig, axes = report.new_figure(2, 1, width=5.6)
    for ax, component in zip(axes[0], COMPONENTS):
        if component == "gradient":
            ax.plot(L_f[2:], (scale * spectra.phi[: L_f.size])[2:], color=report.PALETTE["signal"], lw=3,
                    label="signal $C_L^{\\phi\\phi}$")  # fmt: skip
        for label in forecast.n0:
            ax.plot(L_f[2:], (scale * forecast.n0[label][component])[2:], color=report.estimator_color(label),
                    lw=2.2 if label == "MV" else 1.3, label=f"N0 {label}")  # fmt: skip
        iterative = results.iterative
        for label in () if iterative is None else iterative.n0:
            L_i = iterative.L
            ax.plot(L_i[2:], (spectrum_scale("lensing", L_i.size) * iterative.n0[label][component])[2:],
                    color=report.estimator_color(label), lw=1.8, ls="--", label=f"N0 {label} iterative")  # fmt: skip
        ax.set(xscale="log", yscale="log", xlabel="lensing multipole $L$", ylabel="$[L(L+1)]^2 C_L / 2\\pi$",
               title=f"N0, {component} – {experiment.name}")  # fmt: skip
        ax.set_ylim(1e-9, 1e-5)
        ax.legend(fontsize=8, ncol=2, frameon=False)
    report.save_figure(fig, path, force=force)


def _sky_figure(path, results: DemoResults, force: bool) -> None:
    sky = results.sky
    fig, axes = report.new_figure(2, 2, width=5.2, height=3.0)
    for ax, values, title in zip(
        axes.flat,
        (sky.maps[0], sky.maps[1], sky.maps[2], results.deflection.magnitude_arcmin),
        ("observed T [µK]", "observed Q [µK]", "observed U [µK]", "|deflection| [arcmin]"),
    ):
        image = report.mollweide_array(values, xsize=600)
        limit = np.nanpercentile(np.abs(image), 99)
        cmap, vmin = ("RdBu_r", -limit) if "deflection" not in title else ("magma", 0.0)
        im = ax.imshow(image, origin="lower", cmap=cmap, vmin=vmin, vmax=limit)
        ax.set_axis_off()
        ax.set_title(title)
        fig.colorbar(im, ax=ax, orientation="horizontal", fraction=0.05, pad=0.02)
    report.save_figure(fig, path, force=force)


def _reconstruction_figure(path, results: DemoResults, force: bool) -> None:
    comparison, spectra = results.comparison, results.spectra
    lmax_L = results.reconstruction.lmax_L
    edges = _log_edges(20, lmax_L + 1, 16)
    L_b, ratio_b = bin_spectrum(comparison.cross_over_input, edges, skip_nan=True)
    _, curl_ratio_b = bin_spectrum(comparison.curl_over_n0, edges, skip_nan=True)
    L_d, debiased_b = bin_spectrum(comparison.auto_minus_n0, edges, weights="modes", scale="lensing", skip_nan=True)
    fig, axes = report.new_figure(2, 1, width=5.6)
    ax = axes[0, 0]
    ax.axhline(1.0, color=report.PALETTE["signal"], lw=1)
    ax.plot(L_b, ratio_b, "o-", color=report.PALETTE["output"], label="cross(φ̂, φ) / auto(φ)")
    ax.plot(L_b, curl_ratio_b, "s--", color=report.PALETTE["input"], label="curl auto / curl N0")
    expected = _curl_ratio_expected(results, edges)
    if expected is not None:
        ax.plot(L_b, expected, "-", color=report.PALETTE["input"], lw=1, label="(N0 + analytic N1) / N0, curl")
    ax.set(xscale="log", xlabel="lensing multipole $L$", ylabel="ratio", title="response and curl null test")
    ax.set_ylim(0.5, 1.5)
    report.tidy_log_axis(ax)
    ax.legend(frameon=False, fontsize=9)
    ax = axes[0, 1]
    Lr = comparison.L
    scale = spectrum_scale("lensing", Lr.size)
    ax.plot(Lr[2:], (scale * spectra.phi[: lmax_L + 1])[2:], color=report.PALETTE["signal"], lw=3,
            label="theory $C_L^{\\phi\\phi}$")  # fmt: skip
    ax.plot(Lr[2:], (scale * comparison.n0)[2:], color=report.estimator_color("MV"), lw=1.2, ls=":",
            label="analytic N0 (MV)")  # fmt: skip
    ax.plot(L_d, debiased_b, "o", color=report.PALETTE["output"], label="auto − N0 (this sim, binned)")
    ax.set(xscale="log", yscale="log", xlabel="lensing multipole $L$", ylabel="$[L(L+1)]^2 C_L / 2\\pi$",
           title="reconstructed lensing power")  # fmt: skip
    ax.set_ylim(1e-9, 1e-6)
    ax.legend(frameon=False, fontsize=9)
    report.save_figure(fig, path, force=force)


def _convergence_figure(path, results: DemoResults, force: bool) -> None:
    kappa_in, kappa_wf = results.kappa
    L_show = results.kappa_L_max
    fig, axes = report.new_figure(2, 1, width=5.4, height=3.3)
    limit = float(np.percentile(np.abs(kappa_in), 99.5))
    titles = (
        f"input κ, L ≤ {L_show}",
        f"reconstructed κ (Wiener-filtered {results.reconstruction.estimator}), L ≤ {L_show}",
    )
    for ax, values, title in zip(axes[0], (kappa_in, kappa_wf), titles):
        im = ax.imshow(report.mollweide_array(values, xsize=600), origin="lower", cmap="RdBu_r", vmin=-limit,
                       vmax=limit)  # fmt: skip
        ax.set_axis_off()
        ax.set_title(title)
    fig.colorbar(im, ax=list(axes[0]), orientation="horizontal", fraction=0.05, pad=0.02, label="κ (shared scale)")
    report.save_figure(fig, path, force=force)


def _tensor_figure(path, results: DemoResults, force: bool) -> None:
    delensed, tensor, spectra = results.delensed, results.tensor, results.spectra
    ell = delensed.ell
    noise_bb = results.experiment.noise_spectrum("B", int(ell[-1]))
    finite_noise = np.where(np.isfinite(noise_bb), noise_bb, np.nan)
    edges = _log_edges(20, int(ell[-1]) + 1, 30)
    fig, axes = report.new_figure(2, 1, width=5.6)
    ax = axes[0, 0]
    for values, label, color, width in (
        (delensed.observed_bb - np.nan_to_num(finite_noise), "observed − noise", report.PALETTE["ink"], 1.2),
        (delensed.template_bb, "template", report.PALETTE["input"], 1.2),
        (delensed.residual_bb - np.nan_to_num(finite_noise), "residual − noise", report.PALETTE["output"], 1.2),
        (spectra.lensed["BB"][: ell.size], "lensing BB (theory)", report.PALETTE["signal"], 3),
        (finite_noise, "noise", report.PALETTE["accent"], 1.2),
    ):
        centers, binned = bin_spectrum(values, edges, scale="cmb", skip_nan=True)
        ax.plot(centers, binned, color=color, lw=width, label=label)
    ax.set(xscale="log", yscale="log", xlabel="multipole $\\ell$", ylabel="$D_\\ell^{BB}$ [µK²]",
           title="B modes before and after delensing (this sim)")  # fmt: skip
    report.tidy_log_axis(ax)
    ax.legend(frameon=False, fontsize=8)
    ax = axes[0, 1]
    lt = tensor.ell
    dlt = spectrum_scale("cmb", lt.size)
    ax.plot(lt[2:], (dlt * tensor.lensed_bb)[2:], color=report.PALETTE["signal"], lw=3, label="lensing BB")
    ax.plot(lt[2:], (dlt * tensor.residual_bb)[2:], color=report.PALETTE["output"], label="forecast residual")
    ax.plot(lt[2:], (dlt * np.where(np.isfinite(tensor.noise_bb), tensor.noise_bb, np.nan))[2:],
            color=report.PALETTE["accent"], label="noise")  # fmt: skip
    ax.plot(lt[2:], (dlt * 0.01 * tensor.tensor_bb_r1)[2:], color=report.PALETTE["input"], ls="--",
            label="primordial, r = 0.01")  # fmt: skip
    ax.set(xscale="log", yscale="log", xlabel="multipole $\\ell$", ylabel="$D_\\ell^{BB}$ [µK²]",
           title=f"σ(r): {tensor.sigma_r_lensed:.2g} → {tensor.sigma_r_delensed:.2g} delensed")  # fmt: skip
    ax.legend(frameon=False, fontsize=8)
    report.save_figure(fig, path, force=force)


def _efficiency_figure(path, results: DemoResults, force: bool) -> None:
    delensed = results.delensed
    centers, efficiency = bin_spectrum(
        delensed.efficiency, _log_edges(30, int(delensed.ell[-1]) + 1, 25), skip_nan=True
    )
    fig, axes = report.new_figure(1, 1, width=6.0, height=3.6)
    ax = axes[0, 0]
    ax.plot(centers, 100 * efficiency, "o-", color=report.PALETTE["good"])
    ax.set(xscale="log", xlabel="multipole $\\ell$", ylabel="lensing B power removed [%]",
           title="delensing efficiency (this sim, noise power subtracted)")  # fmt: skip
    report.tidy_log_axis(ax)
    report.save_figure(fig, path, force=force)


# --------------------------------------------------------------------------------------- page, table
def _write_page(paths, summary, results: DemoResults, force):
    experiment, forecast_L, caution = results.experiment, results.forecast_L, results.caution
    f = summary["forecast"]
    r = summary["reconstruction"]
    d = summary["delensing"]
    t = summary["tensor_forecast"]
    s = summary["simulation"]
    it = summary.get("iterative_forecast")
    iterative_text = (
        []
        if not it
        else [
            "Dashed: the converged noise of the iterative estimator (delens with the current estimate, estimate "
            "again; Smith et al. 2012, JCAP 06, 014), steps to converge "
            + ", ".join(f"{label} {count}" for label, count in it["lensing_iterations"].items())
            + f" (tolerance {it['tolerance']:g}). Delensing with the iterative MV N0 forecasts A_lens^res = "
            f"{it['alens_residual']:.3f} and σ(r) = {it['sigma_r_delensed']:.3g}."
        ]
    )
    labels = list(f["lensing_snr"])
    n0_rows = [
        [label] + [f["n0_gradient"][label].get(str(L), float("nan")) for L in forecast_L] + [f["lensing_snr"][label]]
        for label in labels
    ]
    sections = [
        (
            "1. Reconstruction noise forecast",
            [
                f"Full-sky Gaussian N0 of each quadratic estimator for {experiment.name} (noise "
                f"{experiment.noise_temperature:g}/{experiment.noise_polarization:g} µK-arcmin in T/P, beam "
                f"{experiment.beam_fwhm:g} arcmin, ℓ = {experiment.ell_min}–{experiment.ell_max_temperature}/"
                f"{experiment.ell_max_polarization}), and the lensing S/N with f_sky = {experiment.sky_fraction:g}."
            ]
            + iterative_text,
            [paths["noise_forecast.png"]],
            [(["estimator"] + [f"N0 at L={L}" for L in forecast_L] + ["lensing S/N"], n0_rows)],
        ),
        (
            "2. Simulated sky",
            [
                f"One lensed, beamed, noisy full-sky simulation at nside {s['nside']}, ℓ_max {s['lmax']}, seed "
                f"{s['seed']}; rms deflection {s['rms_deflection_arcmin']:.2f} arcmin (about 2.5 arcmin is typical)."
            ],
            [paths["sky_maps.png"]],
            [],
        ),
        (
            "3–4. Reconstruction and validation",
            [
                f"MV reconstruction to L = {s['lmax_L']} (without the B modes at l <= {d['alens_range'][1]}). Mode-weighted cross/input over L = "
                f"{r['cross_over_input_L_range'][0]}–{r['cross_over_input_L_range'][1]}: {r['cross_over_input']:.3f} "
                "(1 means unit response). The curl auto-spectrum over its N0 is a null test: without a curl "
                "signal it is expected at (N0 + N1)/N0, not 1, because lensing by φ gives the curl estimator an "
                "N1 bias (Kesden, Cooray & Kamionkowski 2003)"
                + (
                    f"; median (N0 + analytic N1)/N0 here {r['curl_n0_plus_n1_over_n0_median']:.2f}, measured "
                    f"{r['curl_auto_over_n0_median']:.2f}."
                    if "curl_n0_plus_n1_over_n0_median" in r
                    else "."
                )
                + " The φ Wiener filter of the κ map and the template uses N0 + N1."
            ],
            [paths["convergence.png"], paths["reconstruction_spectra.png"]],
            [],
        ),
        (
            "5. Delensing",
            [
                "The lensing B-mode template is the first-order lensing of the Wiener-filtered E by the Wiener-filtered "
                f"MV reconstruction, which left out the B modes it delenses (l <= {d['alens_range'][1]}; Baleato "
                "Lizancos, Challinor & Carron 2021, JCAP 03, 016), so the residual carries no B-mode reuse bias. "
                f"Measured A_lens^res = {d['alens_residual_measured']:.3f} over l = {d['alens_range'][0]}–"
                f"{d['alens_range'][1]}; the forecast for this simulation's band limit and N0 is "
                f"{d['alens_residual_forecast_for_this_simulation']:.3f}, and for the full experiment (ℓ to "
                f"{experiment.ell_max_polarization}, B modes reused) {d['alens_residual_forecast_full_experiment']:.3f}."
            ]
            + list(d["notes"]),
            [paths["delensing_spectra.png"]],
            [
                (
                    ["ℓ range", "lensing B power removed"],
                    [[band, value] for band, value in d["efficiency_by_band"].items()],
                )
            ],
        ),
        (
            "6. Tensor-to-scalar ratio",
            [
                f"Fisher σ(r) from BB alone over ℓ = {t['ell_range'][0]}–{t['ell_range'][1]} with f_sky = "
                f"{t['sky_fraction']:g}: {t['sigma_r_lensed']:.3g} without delensing, {t['sigma_r_delensed']:.3g} "
                "with forecast delensing (MV N0)."
            ],
            [paths["tensor_forecast.png"]],
            [],
        ),
    ]
    report.write_html_report(
        paths["index.html"], f"lensrec demo report – {experiment.name}", sections, caution, force=force
    )


def summary_table(summary) -> list[str]:
    """The printed summary: N0 and S/N per estimator, the response, A_lens^res and σ(r)."""
    lines = []
    log = lines.append
    f = summary["forecast"]
    log("")
    log(f"{'estimator':>9s} {'N0(L=100)':>11s} {'N0(L=1000)':>11s} {'S/N':>7s}")
    for label, snr in f["lensing_snr"].items():
        n0 = f["n0_gradient"][label]
        log(f"{label:>9s} {n0.get('100', float('nan')):11.3e} {n0.get('1000', float('nan')):11.3e} {snr:7.1f}")
    r = summary["reconstruction"]
    d = summary["delensing"]
    t = summary["tensor_forecast"]
    log(
        f"reconstruction cross/input (L {r['cross_over_input_L_range'][0]}-{r['cross_over_input_L_range'][1]}): "
        f"{r['cross_over_input']:.3f}"
    )
    log(
        f"A_lens^res measured {d['alens_residual_measured']:.3f}, forecast for this sim "
        f"{d['alens_residual_forecast_for_this_simulation']:.3f} (full experiment "
        f"{d['alens_residual_forecast_full_experiment']:.3f})"
    )
    log(f"sigma(r): {t['sigma_r_lensed']:.3g} without delensing, {t['sigma_r_delensed']:.3g} with")
    it = summary.get("iterative_forecast")
    if it:
        n0 = it["n0_gradient"].get("MV", {})
        log(
            f"iterative MV forecast: N0(L=100) {n0.get('100', float('nan')):.3e}, A_lens^res {it['alens_residual']:.3f}, "
            f"sigma(r) {it['sigma_r_delensed']:.3g}"
        )
    return lines
