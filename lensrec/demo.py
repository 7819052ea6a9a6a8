"""The whole job on the embedded default, headless: forecast, simulate, reconstruct, validate, delens, σ(r).

``lensrec demo --out DIR`` (and ``make demo``) calls :func:`run_demo`, which writes a self-contained report
(``DIR/index.html`` with PNG figures, and ``DIR/summary.json``) and prints a short summary table. It needs
no network and no camb: it uses :func:`lensrec.fiducial_spectra` and a shipped invented experiment.
:func:`run_demo` is a sequence of library calls; the figures, the page and the table are made by
:mod:`lensrec.report_demo`.

Everything it reports describes one simulation of an idealized survey (full sky, isotropic noise, Gaussian
foreground-free CMB); none of it is a survey-ready result.
"""

from __future__ import annotations

import os
import time

import numpy as np

from ._checks import as_int, check_nside
from .io import check_outputs_free, provenance

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
    "These results describe one simulation of an idealized survey (full sky, isotropic white noise, no "
    "foregrounds, Gaussian unlensed CMB). They are a demonstration of the method, not a forecast or "
    "measurement for any real survey."
)
FORECAST_L = (30, 100, 300, 1000)
KAPPA_L_MAX = 200  # the κ maps show L ≤ 200: large-scale structure is what the eye can compare on an all-sky view


def delensed_range(lmax: int) -> int:
    """Highest multipole the demo delenses and measures A_lens^res over: lmax/2, at most 500 (the B modes
    above it stay in the reconstruction; primordial B modes carry their information at l < 300)."""
    return min(lmax // 2, 500)


def default_lmax(nside: int, experiment) -> int:
    """Band limit of the demo maps: 2·nside (where HEALPix analysis is accurate), capped at 3000 and at the
    experiment's largest ℓ_max. Closer to 3·nside − 1 the filter's map analysis lowers the response by ~2%."""
    return min(2 * nside, 3000, max(experiment.ell_max_temperature, experiment.ell_max_polarization))


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

    The reconstruction leaves out the B modes that are then delensed (ℓ ≤ :func:`delensed_range`), so the
    measured A_lens^res carries no B-mode reuse bias and agrees with its forecast.

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
    from . import report_demo
    from .analytic_n1 import reconstruction_n1
    from .delensing import delens_maps
    from .delensing_bias import bias_treatment_note, exclude_delensed_b
    from .estimator_noise import reconstruction_noise
    from .experiment import load_experiment
    from .iterative_noise import iterative_reconstruction_noise
    from .reconstruction import compare_with_input, reconstruct
    from .remapping import deflection_maps, kappa_map
    from .sky import simulate_sky
    from .spectra import fiducial_spectra
    from .tensor_forecast import delensing_forecast
    from .wiener_filters import wiener_filter_phi

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
    spectra = fiducial_spectra()
    timings: dict[str, float] = {}
    clock = {"step": None, "start": 0.0}

    def step(name, text=None):
        """Close the running step's timing and start the next one (``name`` None: just close)."""
        if clock["step"] is not None:
            timings[clock["step"]] = time.perf_counter() - clock["start"]
        if name is not None:
            log(f"[{len(timings) + 1}/6] {text}")
        clock.update(step=name, start=time.perf_counter())

    step("forecast", f"forecast N0 of every estimator for {experiment.name}")
    lmax_forecast = min(3000, max(experiment.ell_max_temperature, experiment.ell_max_polarization))
    forecast = reconstruction_noise(experiment, spectra, lmax_L=lmax_forecast, nthreads=nthreads)
    iterative = iterative_reconstruction_noise(
        experiment, spectra, estimators=("EB", "MV"), lmax_L=lmax_forecast, nthreads=nthreads
    )

    step("simulate", f"simulate a lensed, beamed, noisy sky at nside {nside}, lmax {lmax} (seed {seed})")
    sky = simulate_sky(experiment, spectra, nside=nside, lmax=lmax, seed=seed, noise=True, nthreads=nthreads)
    deflection = deflection_maps(sky.phi_alm, nside, nthreads=nthreads)

    # the B modes the template will delens (l <= ell_delensed) are left out of the reconstruction, so the
    # residual measured on them carries no B-mode reuse bias (Baleato Lizancos, Challinor & Carron 2021,
    # JCAP 03, 016); EB keeps the B modes above
    ell_delensed = delensed_range(lmax)
    step(
        "reconstruct",
        f"reconstruct phi with the MV estimator to L = {lmax_L} (B modes at l <= {ell_delensed} left out)",
    )
    rec = reconstruct(
        sky.maps, exclude_delensed_b(experiment, ell_delensed), spectra, estimator="MV", lmax=lmax, lmax_L=lmax_L,
        nthreads=nthreads,
    )  # fmt: skip

    step("validate", "validate the reconstruction against the input phi")
    comparison = compare_with_input(rec, sky.phi_alm)
    # the analytic N1 of the MV estimator: the curl null test expects N0 + N1, and the φ Wiener filter uses
    # the true noise N0 + N1
    n1 = reconstruction_n1(rec, spectra, points=12, nthreads=nthreads).n1[rec.estimator]
    n1_gradient = np.nan_to_num(n1["gradient"], nan=0.0)
    L_show = min(lmax_L, KAPPA_L_MAX)
    phi_wiener = wiener_filter_phi(rec.phi_alm, rec.n0["gradient"], spectra.phi, n1=n1_gradient)
    kappa = (kappa_map(sky.phi_alm, nside, L_show, nthreads), kappa_map(phi_wiener, nside, L_show, nthreads))

    step("delens", "build the lensing B-mode template and delens")
    treatment = bias_treatment_note("MV", "exclude_delensed_b", ell_delensed)
    delensed = delens_maps(
        sky.maps,
        rec,
        experiment,
        spectra,
        lmax=lmax,
        ell_max=ell_delensed,
        notes=(treatment,),
        n1=n1_gradient,
        nthreads=nthreads,
    )

    step("tensor_forecast", "forecast sigma(r) with and without delensing")
    tensor = delensing_forecast(experiment, spectra, n0=forecast.n0["MV"]["gradient"], nthreads=nthreads)
    tensor_iterative = iterative.delensing_forecast("MV", spectra=spectra, nthreads=nthreads)
    # the same forecast for what this simulation can do (its band limit and its reconstruction's N0), to
    # compare with the A_lens^res measured on it
    n0_sim = np.full(spectra.lmax + 1, np.inf)
    n0_sim[: lmax_L + 1] = rec.n0["gradient"] + n1_gradient  # the noise the Wiener filter used
    sim_experiment = experiment.replace(
        ell_max_temperature=min(experiment.ell_max_temperature, lmax),
        ell_max_polarization=min(experiment.ell_max_polarization, lmax),
    )
    tensor_sim = delensing_forecast(sim_experiment, spectra, n0=n0_sim, lmax=ell_delensed, nthreads=nthreads)
    step(None)

    results = report_demo.DemoResults(
        experiment=experiment, spectra=spectra, forecast=forecast, sky=sky, deflection=deflection,
        reconstruction=rec, comparison=comparison, kappa=kappa, kappa_L_max=L_show, delensed=delensed,
        tensor=tensor, tensor_simulation=tensor_sim, forecast_L=FORECAST_L, caution=CAUTION,
        iterative=iterative, tensor_iterative=tensor_iterative, n1=n1,
    )  # fmt: skip
    record = provenance(
        "demo",
        arguments={"nside": nside, "lmax": lmax, "lmax_L": lmax_L, "seed": seed, "experiment": experiment.name},
        experiment=experiment,
        seed=seed,
        timings=timings,
    )
    return report_demo.write_demo_report(paths, results, record, force=force, log=log)
