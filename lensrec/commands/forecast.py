"""``lensrec forecast``: exact full-sky reconstruction noise (N0) of the quadratic estimators, as JSON."""

from __future__ import annotations

import time

from ..labels import ESTIMATORS

HELP = "exact full-sky reconstruction noise N0 (gradient and curl) and lensing S/N of the quadratic estimators"
EXAMPLES = """examples:
  lensrec forecast --experiment deep_highland --lmax-L 3000 --out n0.json
  lensrec forecast --experiment my_survey.toml --estimators TT,EB,MV --out n0_eb.json --force
  lensrec forecast --experiment wide_lowland --lmax-L 2000 --weights unlensed --out n0_unlensed.json
  lensrec forecast --experiment deep_highland --estimators TT,EB,MV --n1 --out n0_n1.json

writes one JSON file: {"L": [0..lmax_L], "n0": {"TT": {"gradient": [...], "curl": [...]}, ...},
"snr": {"TT": ..., ...}, "provenance": {...}}; N0 in C_L^phiphi units (C_L^OmegaOmega for the curl),
null below L = 2; snr is the Fisher S/N of C_L^phiphi over 2 <= L <= lmax_L with the experiment's sky fraction.
--delensing adds "delensing": the lensed and forecast residual BB, A_lens^res and sigma(r) (lensing amplitude
fixed, and marginalized) with and without delensing, from lensrec.delensing_forecast with the gradient N0 of
--delensing-estimator (default MV) under --bias-treatment: b_free for labels without B modes (TT+TE+EE),
exclude_delensed_b (default for B-using labels: the reconstruction leaves out the delensed B modes,
Baleato Lizancos, Challinor & Carron 2021) or none (B modes reused: a measured residual is biased low).
--tracer FILE (a tracer TOML or a shipped name such as diffuse_glow) adds "tracers": the correlation rho_L of
each tracer, of the same internal reconstruction and of their optimal combination (Sherwin & Schmittfull
2015), and the delensing forecast (A_lens^res, sigma(r) conditional and marginalized) with each of them.
--n1 adds "n1" in the layout of "n0" (the analytic N1 bias, flat-sky evaluation on a coarse L grid listed in
"n1_L_grid" and interpolated; Kesden, Cooray & Kamionkowski 2003; lensrec.analytic_n1).
--iterative adds "iterative": the converged noise of the iterative estimator (EB and MV among --estimators):
"n0" in the layout of the top-level "n0", "lensing_iterations" (steps to converge per estimator),
"n0_per_iteration" (every step, 0 = quadratic), "residual_bb" and "alens_residual" of delensing with it (MV if
present, else EB), and with --delensing its sigma(r) (lensrec.iterative_reconstruction_noise)."""

TABLE_L = (30, 100, 300, 1000, 2000, 3000)


def add_arguments(parser) -> None:
    from .options import add_common, add_weights_option

    add_common(parser, experiment=True, out=True)
    parser.add_argument(
        "--lmax-L",
        dest="lmax_L",
        type=int,
        default=None,
        help="highest lensing multipole (default and maximum: the experiment's CMB l_max)",
    )
    parser.add_argument(
        "--estimators",
        default=",".join(ESTIMATORS),
        help=f"comma-separated estimators from {', '.join(ESTIMATORS)} (default: %(default)s)",
    )
    add_weights_option(parser)
    parser.add_argument(
        "--n1",
        action="store_true",
        help='also compute the analytic N1 bias of each estimator (gradient and curl), written as "n1"',
    )
    parser.add_argument(
        "--delensing",
        action="store_true",
        help="also forecast delensing with the MV gradient N0: residual BB, A_lens^res, sigma(r)",
    )
    parser.add_argument(
        "--iterative",
        action="store_true",
        help="also forecast the iterative estimator (EB, MV): converged N0, steps, residual BB, A_lens^res",
    )
    parser.add_argument(
        "--delensing-estimator",
        default="MV",
        help=f"estimator whose N0 delenses, one of {', '.join(ESTIMATORS)} (default: %(default)s)",
    )
    parser.add_argument(
        "--bias-treatment",
        choices=("b_free", "exclude_delensed_b", "none"),
        default=None,
        help="treatment of the B-mode reuse bias (default: b_free for B-free labels, else exclude_delensed_b)",
    )
    parser.add_argument(
        "--tracer",
        default=None,
        help="tracer TOML file or shipped name: forecast delensing with the tracers, the internal MV phi and "
        "their optimal combination",
    )


def forecast_document(
    experiment,
    estimators=ESTIMATORS,
    lmax_L=None,
    lensed_weights=None,
    nthreads=None,
    spectra=None,
    noise=None,
    weights=None,
) -> tuple[dict, object]:
    """Compute N0 and S/N and return (the JSON document without provenance, the ReconstructionNoise).

    Parameters are those of :func:`lensrec.reconstruction_noise`; the document holds "L", "n0" (NaN below
    L = 2, written as null) and "snr". Pass ``noise`` (a :class:`lensrec.ReconstructionNoise` already
    computed for ``experiment``, e.g. ``Reconstruction.noise``) to write its N0 without recomputing it; the
    document then lists the estimators it holds, and ``lmax_L``, if given, must be its lmax_L.
    """
    from ..estimator_noise import ReconstructionNoise, reconstruction_noise

    if noise is None:
        result = reconstruction_noise(
            experiment,
            spectra=spectra,
            estimators=estimators,
            lmax_L=lmax_L,
            lensed_weights=lensed_weights,
            nthreads=nthreads,
            weights=weights,
        )
    else:
        if not isinstance(noise, ReconstructionNoise):
            raise TypeError(f"noise must be a ReconstructionNoise (or None), got {type(noise).__name__}")
        if lmax_L is not None and int(lmax_L) != int(noise.L[-1]):
            raise ValueError(f"lmax_L={lmax_L} differs from the lmax_L={int(noise.L[-1])} of the given noise")
        result = noise
    document = {
        "L": result.L.astype(int).tolist(),
        "n0": {
            label: {component: values.tolist() for component, values in parts.items()}
            for label, parts in result.n0.items()
        },
        "snr": result.lensing_snr(),
    }
    return document, result


def format_table(result, snr: dict) -> str:
    """A short per-estimator table: gradient N0 at a few L (C_L^φφ units) and the lensing S/N."""
    lmax_L = int(result.L[-1])
    columns = [L for L in TABLE_L if L <= lmax_L] or [lmax_L]
    header = "estimator " + "".join(f"{'N0(L=' + str(L) + ')':>14s}" for L in columns) + f"{'S/N':>9s}"
    lines = [header]
    for label, parts in result.n0.items():
        values = "".join(f"{parts['gradient'][L]:14.4e}" for L in columns)
        lines.append(f"{label:9s} {values}{snr[label]:9.1f}")
    return "\n".join(lines)


def format_n1(result, n1) -> str:
    """Analytic N1 over N0 (gradient) at a few L."""
    lmax_L = int(result.L[-1])
    columns = [L for L in TABLE_L if L <= lmax_L] or [lmax_L]
    lines = ["analytic N1 / N0 (gradient):", "estimator " + "".join(f"{'L=' + str(L):>10s}" for L in columns)]
    for label, parts in n1.n1.items():
        values = "".join(f"{parts['gradient'][L] / result.n0[label]['gradient'][L]:10.4f}" for L in columns)
        lines.append(f"{label:9s} {values}")
    return "\n".join(lines)


def format_delensing(forecast, summary=None) -> str:
    """Lensed and forecast residual BB at a few l, A_lens^res and sigma(r), without and with delensing."""
    columns = [ell for ell in (30, 100, 300, 1000) if forecast.ell_min <= ell <= forecast.ell_max]
    lines = [
        f"delensing with the {'MV' if summary is None else summary['estimator']} gradient N0 "
        f"(l = {forecast.ell_min}-{forecast.ell_max}, "
        f"sky fraction = {forecast.sky_fraction:g}, r = {forecast.r:g}):",
        f"{'':12s}"
        + "".join(f"{'BB(l=' + str(ell) + ')':>12s}" for ell in columns)
        + f"{'A_lens^res':>12s}{'sigma(r)':>12s}{'marginal.':>12s}",
    ]
    for label, bb, alens, sigma, marginal in (
        ("lensed", forecast.lensed_bb, 1.0, forecast.sigma_r_lensed, forecast.sigma_r_lensed_marginalized),
        (
            "delensed",
            forecast.residual_bb,
            forecast.alens_residual,
            forecast.sigma_r_delensed,
            forecast.sigma_r_delensed_marginalized,
        ),
    ):
        lines.append(
            f"{label:12s}"
            + "".join(f"{bb[ell]:12.4e}" for ell in columns)
            + f"{alens:12.3f}{sigma:12.4e}{marginal:12.4e}"
        )
    lines.append("sigma(r): lensing amplitude fixed (conditional); marginal.: lensing amplitude marginalized (Fisher)")
    lines.append("BB in uK^2. " + (forecast.notes[0] if summary is not None else ""))
    return "\n".join(lines)


def format_tracers(block: dict) -> str:
    """rho_L at a few L and the delensing forecast with each input and with their combination."""
    columns = [L for L in (30, 100, 300, 1000) if L < len(block["L"])]
    lines = [
        f"delensing with tracers (internal = {block['internal_estimator']} reconstruction, bias treatment "
        f"{block['bias_treatment']}; combined = optimal combination):",
        f"{'input':18s}"
        + "".join(f"{'rho(L=' + str(L) + ')':>12s}" for L in columns)
        + f"{'A_lens^res':>12s}{'sigma(r)':>12s}{'marginal.':>12s}",
    ]
    for name, item in block["delensing"].items():
        lines.append(
            f"{name:18s}"
            + "".join(f"{block['rho'][name][L]:12.3f}" for L in columns)
            + f"{item['alens_residual']:12.3f}{item['sigma_r_delensed']:12.4e}"
            + f"{item['sigma_r_delensed_marginalized']:12.4e}"
        )
    return "\n".join(lines)


def iterative_block(experiment, estimators, lmax_L=None, delensing=False, nthreads=None, spectra=None):
    """The iterative forecast and its JSON block (see EXAMPLES) for the iterative ones among ``estimators``.

    Returns (IterativeNoise, dict). Raises ValueError naming the estimators if none has an iterative form.
    """
    from ..iterative_noise import iterative_reconstruction_noise
    from ..labels import ITERATIVE_ESTIMATORS, parse_estimators

    labels = [label for label in parse_estimators(estimators) if label in ITERATIVE_ESTIMATORS]
    if not labels:
        raise ValueError(
            f"--iterative forecasts {', '.join(ITERATIVE_ESTIMATORS)}: include one of them in --estimators "
            f"(got {estimators!r})"
        )
    result = iterative_reconstruction_noise(experiment, spectra, estimators=labels, lmax_L=lmax_L, nthreads=nthreads)
    forecast = result.delensing_forecast(spectra=spectra, nthreads=nthreads)
    document = result.to_dict()
    block = {
        "n0": document["n0"],
        "lensing_iterations": document["lensing_iterations"],
        "changes": document["changes"],
        "n0_per_iteration": document["n0_per_iteration"],
        "tolerance": result.settings["tolerance"],
        "delensed_spectra": result.settings["delensed_spectra"],
        "n0_estimator": result.delensing_estimator,
        "residual_bb": forecast.residual_bb.tolist(),
        "alens_residual": forecast.alens_residual,
    }
    if delensing:
        block["sigma_r_delensed"] = forecast.sigma_r_delensed
        block["sigma_r_delensed_marginalized"] = forecast.sigma_r_delensed_marginalized
    block["notes"] = list(forecast.notes)
    return result, block


def format_iterative(result, block: dict) -> str:
    """Converged iterative N0 against the quadratic one at a few L, steps, and A_lens^res with it."""
    lmax_L = int(result.L[-1])
    columns = [L for L in TABLE_L if L <= lmax_L] or [lmax_L]
    lines = [
        "iterative estimator (converged; gain = quadratic N0 / iterative N0):",
        "estimator " + "".join(f"{'gain(L=' + str(L) + ')':>14s}" for L in columns) + f"{'steps':>7s}",
    ]
    for label in result.n0:
        gain = result.gain(label)
        values = "".join(f"{gain[L]:14.3f}" for L in columns)
        lines.append(f"{label:9s} {values}{result.lensing_iterations[label]:7d}")
    line = f"delensing with the iterative {block['n0_estimator']} N0: A_lens^res = {block['alens_residual']:.3f}"
    if "sigma_r_delensed" in block:
        line += (
            f", sigma(r) = {block['sigma_r_delensed']:.4e} (marginalized {block['sigma_r_delensed_marginalized']:.4e})"
        )
    lines.append(line)
    return "\n".join(lines)


def run(args) -> int:
    import numpy as np

    from ..experiment import load_experiment
    from ..io import check_outputs_free, provenance, write_json

    check_outputs_free([args.out], force=args.force)  # refuse before any work
    from ..delensing_bias import resolve_bias_treatment
    from ..labels import parse_estimator

    if args.delensing or args.tracer:
        args.delensing_estimator = parse_estimator(args.delensing_estimator)
        resolve_bias_treatment(args.delensing_estimator, args.bias_treatment)  # refuse before any work
    timings = {}
    start = time.perf_counter()
    experiment = load_experiment(args.experiment)
    timings["inputs"] = time.perf_counter() - start
    start = time.perf_counter()
    document, result = forecast_document(
        experiment,
        estimators=args.estimators,
        lmax_L=args.lmax_L,
        weights=args.weights,
        nthreads=args.nthreads,
    )
    timings["reconstruction_noise"] = time.perf_counter() - start
    n1 = None
    if args.n1:
        from ..analytic_n1 import analytic_n1

        start = time.perf_counter()
        n1 = analytic_n1(
            experiment,
            estimators=list(result.n0),
            lmax_L=int(result.L[-1]),
            weights=args.weights,
            noise=result,
            nthreads=args.nthreads,
        )
        n1_document = n1.to_dict()
        document["n1"] = n1_document["n1"]
        document["n1_L_grid"] = n1_document["L_grid"]
        document["n1_settings"] = n1_document["settings"]
        timings["analytic_n1"] = time.perf_counter() - start
    delensing = summary = None
    if args.delensing or args.tracer:
        from ..delensing_bias import internal_delensing_forecast

        start = time.perf_counter()
        delensing, summary = internal_delensing_forecast(
            experiment,
            args.delensing_estimator,
            args.bias_treatment,
            lmax_L=int(result.L[-1]),
            nthreads=args.nthreads,
        )
        if args.delensing:
            document["delensing"] = {
                "n0_estimator": summary["estimator"],
                "bias_treatment": summary["bias_treatment"],
                "ell_max_delensed": summary["ell_max_delensed"],
                **delensing.to_dict(),
            }
        timings["delensing"] = time.perf_counter() - start
    iterative = None
    if args.iterative:
        start = time.perf_counter()
        iterative, block = iterative_block(
            experiment, args.estimators, lmax_L=args.lmax_L, delensing=args.delensing, nthreads=args.nthreads
        )
        document["iterative"] = block
        timings["iterative"] = time.perf_counter() - start
    tracer_forecasts = None
    if args.tracer:
        from ..tracers import load_tracers, tracer_delensing_forecasts

        start = time.perf_counter()
        tracer_set = load_tracers(args.tracer)
        combination, tracer_forecasts = tracer_delensing_forecasts(
            experiment, tracer_set, n0=summary["n0"], nthreads=args.nthreads
        )
        document["tracers"] = {
            "source": tracer_set.source,
            "inputs": list(combination.inputs),
            "internal_estimator": summary["estimator"],
            "bias_treatment": summary["bias_treatment"],
            "L": list(range(combination.lmax_L + 1)),
            "rho": {
                **{name: np.sqrt(value).tolist() for name, value in combination.rho2_single.items()},
                "combined": np.sqrt(combination.rho2).tolist(),
            },
            "delensing": {
                name: {
                    "alens_residual": item.alens_residual,
                    "sigma_r_delensed": item.sigma_r_delensed,
                    "sigma_r_delensed_marginalized": item.sigma_r_delensed_marginalized,
                    "residual_bb": item.residual_bb.tolist(),
                }
                for name, item in tracer_forecasts.items()
            },
            "notes": list(combination.notes),
        }
        timings["tracers"] = time.perf_counter() - start
    arguments = {
        "tracer": args.tracer,
        "experiment": args.experiment,
        "lmax_L": int(result.L[-1]),
        "estimators": args.estimators,
        "weights": args.weights,
        "n1": bool(args.n1),
        "delensing": bool(args.delensing),
        "iterative": bool(args.iterative),
        "nthreads": args.nthreads,
    }
    document["provenance"] = provenance(
        "forecast",
        arguments=arguments,
        experiment=experiment,
        timings=timings,
        extra={"settings": dict(result.settings)},
    )
    write_json(args.out, document, force=args.force)
    print(
        f"lensrec forecast: {experiment.name}, lmax_L={int(result.L[-1])}, "
        f"{timings['reconstruction_noise']:.2f} s; N0 in C_L^phiphi units"
    )
    print(format_table(result, document["snr"]))
    if n1 is not None:
        print(format_n1(result, n1))
    if args.delensing:
        print(format_delensing(delensing, summary))
    if iterative is not None:
        print(format_iterative(iterative, document["iterative"]))
    if tracer_forecasts is not None:
        print(format_tracers(document["tracers"]))
    print(f"wrote {args.out}")
    return 0
