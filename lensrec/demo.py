"""The whole job on the embedded default, headless: forecast, simulate, reconstruct, validate, delens, σ(r).

``lensrec demo --out DIR`` (and ``make demo``) calls :func:`run_demo`, which writes a self-contained report
(``DIR/index.html`` with PNG figures, and ``DIR/summary.json``) and prints a short summary table. It needs
no network and no camb: it uses :func:`lensrec.fiducial_spectra` and a shipped invented experiment.

Everything it reports describes one simulation of an idealised survey (full sky, isotropic noise, Gaussian
foreground-free CMB); none of it is a survey-ready result.
"""

from __future__ import annotations

import os
import time

import numpy as np

from ._checks import as_int, check_nside
from .io import check_outputs_free, provenance, write_json

__all__ = ["run_demo", "DEMO_OUTPUTS"]

DEMO_OUTPUTS = (
    "index.html",
    "summary.json",
    "noise_forecast.png",
    "sky_maps.png",
    "convergence.png",
    "reconstruction_spectra.png",
    "delensing_spectra.png",
    "tensor_forecast.png",
)
CAUTION = (
    "These results describe one simulation of an idealised survey (full sky, isotropic white noise, no "
    "foregrounds, Gaussian unlensed CMB). They are a demonstration of the method, not a forecast or "
    "measurement for any real survey."
)
FORECAST_L = (30, 100, 300, 1000)


def default_lmax(nside: int, experiment) -> int:
    """Band limit of the demo maps: 2·nside (where HEALPix analysis is accurate), capped at 3000 and at the
    experiment's largest ℓ_max. Closer to 3·nside − 1 the filter's map analysis lowers the response by ~2%."""
    return min(2 * nside, 3000, max(experiment.ell_max_temperature, experiment.ell_max_polarization))


def _binned(values, edges):
    centres, means = [], []
    for lo, hi in zip(edges[:-1], edges[1:]):
        chunk = values[lo:hi]
        chunk = chunk[np.isfinite(chunk)]
        if chunk.size:
            centres.append(0.5 * (lo + hi - 1))
            means.append(float(np.mean(chunk)))
    return np.array(centres), np.array(means)


def run_demo(
    out,
    experiment="deep_highland",
    nside: int = 512,
    lmax: int | None = None,
    lmax_L: int | None = None,
    seed: int = 0,
    force: bool = False,
    nthreads: int | None = None,
    log=print,
) -> dict:
    """Run forecast → simulate → reconstruct (MV) → validate → delens → σ(r) and write the report.

    Parameters
    ----------
    out : path
        Report folder (created). Existing report files are refused unless ``force``.
    experiment : str, path or Experiment
        A shipped experiment name, a TOML file, or an :class:`~lensrec.Experiment` (default: the invented
        ``deep_highland`` survey).
    nside : int
        HEALPix resolution of the simulated sky (default 512: about two minutes on 2 cores).
    lmax, lmax_L : int, optional
        CMB band limit of the maps (default :func:`default_lmax`) and lensing band limit (default ``lmax``).
    seed : int
        Seed of the simulation.
    force : bool
        Overwrite an existing report.
    nthreads : int, optional
        Threads for transforms.
    log : callable
        Receives one progress line per step (``print`` by default).

    Returns
    -------
    dict
        The summary also written to ``summary.json``.
    """
    from . import report
    from .delensing import delens, template_inputs, wiener_filter_phi
    from .estimator_noise import reconstruction_noise
    from .experiment import load_experiment
    from .harmonics import scale_alm
    from .power import cross_spectrum
    from .reconstruction import reconstruct
    from .sky import deflection_maps, simulate_sky
    from .spectra import fiducial_spectra
    from .tensor_forecast import delensing_forecast

    nside = check_nside(nside)
    seed = as_int(seed, "seed", minimum=0)
    experiment = load_experiment(experiment)
    lmax = default_lmax(nside, experiment) if lmax is None else as_int(lmax, "lmax", 100, 3 * nside - 1)
    lmax_L = lmax if lmax_L is None else as_int(lmax_L, "lmax_L", 100, lmax)
    out = os.fspath(out)
    if os.path.exists(out) and not os.path.isdir(out):
        raise ValueError(f"out {out!r} exists and is not a folder")
    paths = {name: os.path.join(out, name) for name in DEMO_OUTPUTS}
    check_outputs_free(paths.values(), force=force)
    os.makedirs(out, exist_ok=True)
    spectra = fiducial_spectra()
    timings: dict[str, float] = {}
    steps = 6

    def step(number, text):
        log(f"[{number}/{steps}] {text}")
        return time.perf_counter()

    # 1. forecast ---------------------------------------------------------------------------------------
    start = step(1, f"forecast N0 of every estimator for {experiment.name}")
    lmax_forecast = min(3000, max(experiment.ell_max_temperature, experiment.ell_max_polarization))
    forecast = reconstruction_noise(experiment, spectra, lmax_L=lmax_forecast, nthreads=nthreads)
    snr = forecast.lensing_snr()
    timings["forecast"] = time.perf_counter() - start
    L_f = forecast.L
    fig, axes = report.new_figure(2, 1, width=5.6)
    scale = (L_f * (L_f + 1.0)) ** 2 / (2 * np.pi)
    for ax, component in zip(axes[0], ("gradient", "curl")):
        if component == "gradient":
            ax.plot(
                L_f[2:],
                (scale * spectra.phi[: L_f.size])[2:],
                color=report.PALETTE["signal"],
                lw=3,
                label="signal $C_L^{\\phi\\phi}$",
            )
        for label in forecast.n0:
            ax.plot(
                L_f[2:],
                (scale * forecast.n0[label][component])[2:],
                color=report.ESTIMATOR_COLOURS[label],
                lw=2.2 if label == "MV" else 1.3,
                label=f"N0 {label}",
            )
        ax.set(
            xscale="log",
            yscale="log",
            xlabel="lensing multipole $L$",
            ylabel="$[L(L+1)]^2 C_L / 2\\pi$",
            title=f"N0, {component} – {experiment.name}",
        )
        ax.set_ylim(1e-9, 1e-5)
        ax.legend(fontsize=8, ncol=2, frameon=False)
    report.save_figure(fig, paths["noise_forecast.png"], force=force)

    # 2. simulate ---------------------------------------------------------------------------------------
    start = step(2, f"simulate a lensed, beamed, noisy sky at nside {nside}, lmax {lmax} (seed {seed})")
    sky = simulate_sky(experiment, spectra, nside=nside, lmax=lmax, seed=seed, noise=True, nthreads=nthreads)
    deflection = deflection_maps(sky.phi_alm, nside, nthreads=nthreads)
    timings["simulate"] = time.perf_counter() - start
    rms_deflection = deflection.rms_arcmin
    fig, axes = report.new_figure(2, 2, width=5.2, height=3.0)
    for ax, values, title in zip(
        axes.flat,
        (sky.maps[0], sky.maps[1], sky.maps[2], deflection.magnitude_arcmin),
        ("observed T [µK]", "observed Q [µK]", "observed U [µK]", "|deflection| [arcmin]"),
    ):
        image = report.mollweide_array(values, xsize=600)
        limit = np.nanpercentile(np.abs(image), 99)
        cmap, vmin = ("RdBu_r", -limit) if "deflection" not in title else ("magma", 0.0)
        im = ax.imshow(image, origin="lower", cmap=cmap, vmin=vmin, vmax=limit)
        ax.set_axis_off()
        ax.set_title(title)
        fig.colorbar(im, ax=ax, orientation="horizontal", fraction=0.05, pad=0.02)
    report.save_figure(fig, paths["sky_maps.png"], force=force)

    # 3. reconstruct ------------------------------------------------------------------------------------
    start = step(3, f"reconstruct phi with the MV estimator to L = {lmax_L}")
    rec = reconstruct(sky.maps, experiment, spectra, estimator="MV", lmax=lmax, lmax_L=lmax_L, nthreads=nthreads)
    timings["reconstruct"] = time.perf_counter() - start

    # 4. validate ---------------------------------------------------------------------------------------
    start = step(4, "validate the reconstruction against the input phi")
    from .harmonics import truncate_alm

    phi_in = truncate_alm(sky.phi_alm, lmax_L)
    cross = cross_spectrum(rec.phi_alm, phi_in, lmax_L)
    auto_in = cross_spectrum(phi_in, lmax=lmax_L)
    auto_rec = cross_spectrum(rec.phi_alm, lmax=lmax_L)
    auto_curl = cross_spectrum(rec.curl_alm, lmax=lmax_L)
    n0 = rec.n0["gradient"]
    edges = np.unique(np.round(np.geomspace(20, lmax_L + 1, 16)).astype(int))
    L_b, ratio_b = _binned(np.divide(cross, auto_in, out=np.full_like(cross, np.nan), where=auto_in > 0), edges)
    _, debiased_b = _binned(auto_rec - n0, edges)
    _, theory_b = _binned(spectra.phi[: lmax_L + 1], edges)
    _, curl_ratio_b = _binned(auto_curl / rec.n0["curl"], edges)
    signal_dominated = np.nonzero(spectra.phi[: lmax_L + 1] > n0)[0]
    L_top = int(signal_dominated[signal_dominated >= 20].max()) if np.any(signal_dominated >= 20) else 100
    valid = (np.arange(lmax_L + 1) >= 20) & (np.arange(lmax_L + 1) <= L_top)
    modes = (2 * np.arange(lmax_L + 1) + 1.0) * valid
    cross_over_input = float(np.sum(modes * cross) / np.sum(modes * auto_in))
    timings["validate"] = time.perf_counter() - start

    fig, axes = report.new_figure(2, 1, width=5.6)
    ax = axes[0, 0]
    ax.axhline(1.0, color=report.PALETTE["signal"], lw=1)
    ax.plot(L_b, ratio_b, "o-", color=report.PALETTE["output"], label="cross(φ̂, φ) / auto(φ)")
    ax.plot(L_b, curl_ratio_b, "s--", color=report.PALETTE["input"], label="curl auto / curl N0")
    ax.set(xscale="log", xlabel="lensing multipole $L$", ylabel="ratio", title="response and curl null test")
    ax.set_ylim(0.5, 1.5)
    report.tidy_log_axis(ax)
    ax.legend(frameon=False, fontsize=9)
    ax = axes[0, 1]
    Lr = np.arange(lmax_L + 1)
    sc = (Lr * (Lr + 1.0)) ** 2 / (2 * np.pi)
    ax.plot(
        Lr[2:],
        (sc * spectra.phi[: lmax_L + 1])[2:],
        color=report.PALETTE["signal"],
        lw=3,
        label="theory $C_L^{\\phi\\phi}$",
    )
    ax.plot(Lr[2:], (sc * n0)[2:], color=report.ESTIMATOR_COLOURS["MV"], lw=1.2, ls=":", label="analytic N0 (MV)")
    scb = (L_b * (L_b + 1.0)) ** 2 / (2 * np.pi)
    ax.plot(L_b, scb * debiased_b, "o", color=report.PALETTE["output"], label="auto − N0 (this sim)")
    ax.set(
        xscale="log",
        yscale="log",
        xlabel="lensing multipole $L$",
        ylabel="$[L(L+1)]^2 C_L / 2\\pi$",
        title="reconstructed lensing power",
    )
    ax.set_ylim(1e-9, 1e-6)
    ax.legend(frameon=False, fontsize=9)
    report.save_figure(fig, paths["reconstruction_spectra.png"], force=force)

    phi_wiener = wiener_filter_phi(rec.phi_alm, n0, spectra.phi)
    from .harmonics import alm2map

    L_show = min(lmax_L, 200)  # large-scale structure is what the eye can compare on an all-sky view
    kappa_factor = 0.5 * Lr * (Lr + 1.0) * (Lr <= L_show)
    kappa_in = alm2map(scale_alm(phi_in, kappa_factor, lmax_L), nside, lmax_L, nthreads=nthreads)
    kappa_wf = alm2map(scale_alm(phi_wiener, kappa_factor, lmax_L), nside, lmax_L, nthreads=nthreads)
    fig, axes = report.new_figure(2, 1, width=5.4, height=3.3)
    limit = float(np.percentile(np.abs(kappa_in), 99.5))
    for ax, values, title in zip(
        axes[0], (kappa_in, kappa_wf), (f"input κ, L ≤ {L_show}", f"reconstructed κ (Wiener-filtered MV), L ≤ {L_show}")
    ):
        im = ax.imshow(
            report.mollweide_array(values, xsize=600), origin="lower", cmap="RdBu_r", vmin=-limit, vmax=limit
        )
        ax.set_axis_off()
        ax.set_title(title)
    fig.colorbar(im, ax=list(axes[0]), orientation="horizontal", fraction=0.05, pad=0.02, label="κ (shared scale)")
    report.save_figure(fig, paths["convergence.png"], force=force)

    # 5. delens -----------------------------------------------------------------------------------------
    start = step(5, "build the lensing B-mode template and delens")
    e_wiener, b_observed, _ = template_inputs(sky.maps, experiment, spectra, lmax=lmax, nthreads=nthreads)
    noise_bb = experiment.noise_spectrum("B", lmax)
    delensed = delens(
        b_observed,
        e_wiener,
        phi_wiener,
        lmax,
        method="remap",
        noise_bb=noise_bb,
        lensed_bb=spectra.lensed["BB"],
        nthreads=nthreads,
    )
    timings["delens"] = time.perf_counter() - start

    # 6. sigma(r) ---------------------------------------------------------------------------------------
    start = step(6, "forecast sigma(r) with and without delensing")
    tensor = delensing_forecast(experiment, spectra, n0=forecast.n0["MV"]["gradient"], nthreads=nthreads)
    # the same forecast for what this simulation can do (its band limit and its reconstruction's N0), to
    # compare with the A_lens^res measured on it
    n0_sim = np.full(spectra.lmax + 1, np.inf)
    n0_sim[: lmax_L + 1] = n0
    sim_experiment = experiment.replace(
        ell_max_temperature=min(experiment.ell_max_temperature, lmax),
        ell_max_polarization=min(experiment.ell_max_polarization, lmax),
    )
    tensor_sim = delensing_forecast(sim_experiment, spectra, n0=n0_sim, lmax=min(lmax, 1000), nthreads=nthreads)
    timings["tensor_forecast"] = time.perf_counter() - start

    ell = delensed.ell
    dl = ell * (ell + 1.0) / (2 * np.pi)
    fig, axes = report.new_figure(2, 1, width=5.6)
    ax = axes[0, 0]
    finite_noise = np.where(np.isfinite(noise_bb), noise_bb, np.nan)
    for values, label, colour, width in (
        (delensed.observed_bb - np.nan_to_num(finite_noise), "observed − noise", report.PALETTE["ink"], 1.2),
        (delensed.template_bb, "template", report.PALETTE["input"], 1.2),
        (delensed.residual_bb - np.nan_to_num(finite_noise), "residual − noise", report.PALETTE["output"], 1.2),
        (spectra.lensed["BB"][: ell.size], "lensing BB (theory)", report.PALETTE["signal"], 3),
        (finite_noise, "noise", report.PALETTE["accent"], 1.2),
    ):
        e_c, v_c = _binned(dl * values, np.unique(np.round(np.geomspace(20, lmax + 1, 30)).astype(int)))
        ax.plot(e_c, v_c, color=colour, lw=width, label=label)
    ax.set(
        xscale="log",
        yscale="log",
        xlabel="multipole $\\ell$",
        ylabel="$D_\\ell^{BB}$ [µK²]",
        title="B modes before and after delensing (this sim)",
    )
    report.tidy_log_axis(ax)
    ax.legend(frameon=False, fontsize=8)
    ax = axes[0, 1]
    lt = tensor.ell
    dlt = lt * (lt + 1.0) / (2 * np.pi)
    ax.plot(lt[2:], (dlt * tensor.lensed_bb)[2:], color=report.PALETTE["signal"], lw=3, label="lensing BB")
    ax.plot(lt[2:], (dlt * tensor.residual_bb)[2:], color=report.PALETTE["output"], label="forecast residual")
    ax.plot(
        lt[2:],
        (dlt * np.where(np.isfinite(tensor.noise_bb), tensor.noise_bb, np.nan))[2:],
        color=report.PALETTE["accent"],
        label="noise",
    )
    ax.plot(
        lt[2:],
        (dlt * 0.01 * tensor.tensor_bb_r1)[2:],
        color=report.PALETTE["input"],
        ls="--",
        label="primordial, r = 0.01",
    )
    ax.set(
        xscale="log",
        yscale="log",
        xlabel="multipole $\\ell$",
        ylabel="$D_\\ell^{BB}$ [µK²]",
        title=f"σ(r): {tensor.sigma_r_lensed:.2g} → {tensor.sigma_r_delensed:.2g} delensed",
    )
    ax.legend(frameon=False, fontsize=8)
    report.save_figure(fig, paths["tensor_forecast.png"], force=force)
    # the tensor figure doubles as the delensing-spectra figure name for the page order
    fig, axes = report.new_figure(1, 1, width=6.0, height=3.6)
    ax = axes[0, 0]
    e_c, eff = _binned(delensed.efficiency, np.unique(np.round(np.geomspace(30, lmax + 1, 25)).astype(int)))
    ax.plot(e_c, 100 * eff, "o-", color=report.PALETTE["good"])
    ax.set(
        xscale="log",
        xlabel="multipole $\\ell$",
        ylabel="lensing B power removed [%]",
        title="delensing efficiency (this sim, noise power subtracted)",
    )
    report.tidy_log_axis(ax)
    report.save_figure(fig, paths["delensing_spectra.png"], force=force)

    bands = [(lo, hi) for lo, hi in ((30, 100), (100, 300), (300, 1000), (1000, 2000)) if hi <= lmax]
    summary = {
        "experiment": experiment.to_dict(),
        "simulation": {
            "nside": nside,
            "lmax": lmax,
            "lmax_L": lmax_L,
            "seed": seed,
            "rms_deflection_arcmin": rms_deflection,
        },
        "forecast": {
            "lmax_L": lmax_forecast,
            "n0_gradient": {
                label: {str(L): float(forecast.n0[label]["gradient"][L]) for L in FORECAST_L if L <= lmax_forecast}
                for label in forecast.n0
            },
            "lensing_snr": {label: float(value) for label, value in snr.items()},
        },
        "reconstruction": {
            "estimator": "MV",
            "cross_over_input": cross_over_input,
            "cross_over_input_L_range": [20, L_top],
            "curl_auto_over_n0_median": float(np.nanmedian(curl_ratio_b)),
        },
        "delensing": {
            "method": "remap",
            "efficiency_by_band": {f"{lo}-{hi}": float(delensed.efficiency_in_range(lo, hi)) for lo, hi in bands},
            "alens_residual_measured": float(delensed.alens_residual),
            "alens_residual_forecast_for_this_simulation": float(tensor_sim.alens_residual),
            "alens_residual_forecast_full_experiment": float(tensor.alens_residual),
            "notes": list(delensed.notes),
        },
        "tensor_forecast": {
            "sigma_r_lensed": float(tensor.sigma_r_lensed),
            "sigma_r_delensed": float(tensor.sigma_r_delensed),
            "ell_range": [int(tensor.ell_min), int(tensor.ell_max)],
            "sky_fraction": float(tensor.sky_fraction),
        },
        "caution": CAUTION,
    }
    summary["provenance"] = provenance(
        "demo",
        arguments={"nside": nside, "lmax": lmax, "lmax_L": lmax_L, "seed": seed, "experiment": experiment.name},
        experiment=experiment,
        seed=seed,
        timings=timings,
    )
    _write_page(paths, summary, experiment, force)
    write_json(paths["summary.json"], summary, force=force)
    _print_table(summary, log)
    return summary


def _write_page(paths, summary, experiment, force):
    from . import report

    f = summary["forecast"]
    r = summary["reconstruction"]
    d = summary["delensing"]
    t = summary["tensor_forecast"]
    s = summary["simulation"]
    labels = list(f["lensing_snr"])
    n0_rows = [
        [label] + [f["n0_gradient"][label].get(str(L), float("nan")) for L in FORECAST_L] + [f["lensing_snr"][label]]
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
            ],
            [paths["noise_forecast.png"]],
            [(["estimator"] + [f"N0 at L={L}" for L in FORECAST_L] + ["lensing S/N"], n0_rows)],
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
                f"MV reconstruction to L = {s['lmax_L']}. Mode-weighted cross/input over L = "
                f"{r['cross_over_input_L_range'][0]}–{r['cross_over_input_L_range'][1]}: {r['cross_over_input']:.3f} "
                "(1 means unit response). The curl auto-spectrum over its N0 is a null test (1 expected)."
            ],
            [paths["convergence.png"], paths["reconstruction_spectra.png"]],
            [],
        ),
        (
            "5. Delensing",
            [
                "The lensing B-mode template is the B part of the Wiener-filtered E remapped by the Wiener-filtered MV "
                f"reconstruction. Measured A_lens^res = {d['alens_residual_measured']:.3f}; the forecast for this "
                f"simulation's band limit and N0 is {d['alens_residual_forecast_for_this_simulation']:.3f}, and for the "
                f"full experiment (ℓ to {experiment.ell_max_polarization}) {d['alens_residual_forecast_full_experiment']:.3f}."
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
        paths["index.html"], f"lensrec demo report – {experiment.name}", sections, CAUTION, force=force
    )


def _print_table(summary, log):
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
