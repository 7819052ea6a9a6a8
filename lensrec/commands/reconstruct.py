"""``lensrec reconstruct``: quadratic-estimator reconstruction of φ (and the curl) from T, Q, U HEALPix maps."""

from __future__ import annotations

import os
import time

from ..labels import ESTIMATORS, parse_estimator

HELP = "reconstruct the lensing potential phi (and the curl null test) from T, Q, U maps with a quadratic estimator"
EXAMPLES = """examples:
  lensrec reconstruct --experiment deep_highland --maps sky/maps.fits --estimator GMV --lmax-L 2000 --out rec/
  lensrec reconstruct --experiment my_survey.toml --maps sky/maps.fits --estimator EB --lmax 3000 \\
      --lmax-L 2000 --mask mask.fits --out rec_eb/ --force
  lensrec reconstruct --experiment deep_highland --maps patch/maps.fits --mask patch_mask.fits \\
      --hits patch_hits.fits --filter optimal --estimator GMV --out rec_patch/

writes DIR/phi_alm.fits and DIR/curl_alm.fits (normalized estimates to lmax_L, healpy alm FITS),
DIR/n0.json (analytic N0 of the estimators used, in the layout of 'lensrec forecast': {"L": [...],
"n0": {"EB": {"gradient": [...], "curl": [...]}, ...}, "snr": {...}, "provenance": {...}}) and DIR/run.json
(provenance: versions, git commit, experiment, arguments, input checksums, transform counts, timings).
The estimate is normalized with the full-sky response; with a mask, subtract a mean-field from simulations
(Python API: lensrec.mean_field) and correct spectra with the mask moments stored in run.json.
--lensing-iterations N (EB, full sky): N steps of the iterative estimator after the quadratic one (delens E and B
with the current Wiener-filtered estimate, estimate again); phi_alm.fits holds the final estimate, n0.json the
last step's N0 (same layout) and run.json every step's N0 ("n0_per_iteration") and seconds per step.
  lensrec reconstruct --experiment deep.toml --maps sky/maps.fits --estimator EB --lensing-iterations 1 --out it/
--filter auto (the default) uses the optimal conjugate-gradient filter when there is a --mask or a noise map
(--noise-map or --hits) and the isotropic one otherwise; run.json records the choice and the iterations.
Maps that 'lensrec simulate --mask' wrote carry LRMASKED = T and are not masked a second time."""

OUTPUTS = ("phi_alm.fits", "curl_alm.fits", "n0.json", "run.json")


def add_arguments(parser) -> None:
    from .options import add_common, add_filter_options, add_map_reading, add_noise_model, add_weights_option

    add_common(parser, experiment=True, out=True)
    add_map_reading(parser)
    parser.add_argument(
        "--maps", required=True, help="HEALPix FITS file with T, Q, U in uK (e.g. from 'lensrec simulate')"
    )
    parser.add_argument(
        "--estimator",
        default="GMV",
        help=f"one of {', '.join(ESTIMATORS)} (default: %(default)s, the joint estimator)",
    )
    parser.add_argument(
        "--lmax-L",
        dest="lmax_L",
        type=int,
        default=None,
        help="highest lensing multipole (default and maximum: the CMB lmax)",
    )
    parser.add_argument(
        "--lmax",
        type=int,
        default=None,
        help="CMB band limit of the filter (default: the lesser of the experiment's largest ell_max and "
        "2*nside; <= 3*nside-1)",
    )
    parser.add_argument("--mask", default=None, help="apodized HEALPix FITS mask (values in [0, 1], same nside)")
    add_noise_model(parser)
    add_filter_options(parser)
    parser.add_argument(
        "--lensing-iterations",
        dest="lensing_iterations",
        type=int,
        default=0,
        help="steps of the iterative estimator after the quadratic one (default 0; estimator EB, full sky)",
    )
    parser.add_argument(
        "--exclude-delensed-b",
        type=int,
        default=None,
        metavar="L",
        help="leave the B modes at l <= L out of the reconstruction, so that delensing them later carries no "
        "B-mode reuse bias (Baleato Lizancos, Challinor & Carron 2021); recorded in n0.json",
    )
    add_weights_option(parser)


def _column_count(path: str) -> int:
    """Number of map columns in the first table extension of a HEALPix FITS file (0 if there is none)."""
    import warnings

    from astropy.io import fits

    if not os.path.isfile(path):
        raise ValueError(f"map file {path!r} does not exist")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with fits.open(path, memmap=False) as hdul:
                return len(hdul[1].columns) if len(hdul) > 1 and hasattr(hdul[1], "columns") else 0
    except (OSError, ValueError, TypeError) as exc:
        raise ValueError(f"map file {path!r} is not a readable FITS file ({type(exc).__name__}: {exc})") from None


def n0_document(result) -> dict:
    """The N0 document of a :class:`lensrec.Reconstruction`, in the layout of ``lensrec forecast``'s JSON."""
    from .forecast import forecast_document

    return forecast_document(result.noise.experiment, noise=result.noise)[0]


def run(args) -> int:
    import lensrec

    from ..io import check_outputs_free, file_sha256, provenance, read_maps, write_alm, write_json

    paths = {name: os.path.join(args.out, name) for name in OUTPUTS}
    if os.path.exists(args.out) and not os.path.isdir(args.out):
        raise ValueError(f"--out {args.out!r} exists and is not a folder")
    check_outputs_free(paths.values(), force=args.force)  # refuse before any work
    estimator = parse_estimator(args.estimator)
    from ..iterative_reconstruction import check_lensing_iterations

    iterations = check_lensing_iterations(args.lensing_iterations, estimator)
    if iterations and args.mask:
        raise ValueError(f"--lensing-iterations {iterations} works on the full sky; drop --mask {args.mask!r}")

    timings = {}
    start = time.perf_counter()
    experiment = lensrec.load_experiment(args.experiment)
    source_experiment = experiment
    if args.exclude_delensed_b is not None:
        from ..delensing_bias import exclude_delensed_b

        source_experiment = exclude_delensed_b(experiment, args.exclude_delensed_b)
    columns = _column_count(args.maps)
    if columns < 3:
        raise ValueError(f"map file {args.maps!r} must hold three maps (T, Q, U), found {columns} column(s)")
    from .options import map_reading_options

    maps = read_maps(args.maps, **map_reading_options(args))
    nside = lensrec.harmonics.npix_to_nside(maps.shape[1], f"maps in {args.maps!r}")
    mask = lensrec.load_mask(args.mask, nside) if args.mask else None
    from ..gradient_spectra import DEFAULT_WEIGHTS
    from ..io import map_is_masked
    from .options import cg_progress, default_lmax, load_noise_model

    noise = load_noise_model(args, experiment, nside)
    maps_masked = bool(map_is_masked(args.maps)) and mask is not None
    lmax = args.lmax if args.lmax is not None else default_lmax(experiment, nside)
    inputs = {
        "maps": os.path.abspath(args.maps),
        "maps_sha256": file_sha256(args.maps),
        "nside": nside,
        "mask": os.path.abspath(args.mask) if args.mask else None,
        "mask_sha256": file_sha256(args.mask) if args.mask else None,
        "noise_map": os.path.abspath(args.noise_map) if args.noise_map else None,
        "hits": os.path.abspath(args.hits) if args.hits else None,
        "maps_masked": maps_masked,
    }
    timings["inputs"] = time.perf_counter() - start

    start = time.perf_counter()
    bar = None
    if iterations:
        from tqdm.auto import tqdm

        bar = tqdm(total=iterations + 1, desc="quadratic + lensing iterations", unit="step", leave=False)

        def progress(done, total):
            bar.n = done
            bar.refresh()

    cg_callback, close = cg_progress()
    try:
        result = lensrec.reconstruct(
            maps,
            source_experiment,
            estimator=estimator,
            lmax_L=args.lmax_L,
            mask=mask,
            lmax=lmax,
            nthreads=args.nthreads,
            weights=args.weights if not iterations or args.weights != DEFAULT_WEIGHTS else None,
            lensing_iterations=iterations,
            progress=progress if iterations else None,
            filter=args.filter,
            noise=noise,
            maps_masked=maps_masked,
            cg_tolerance=args.cg_tolerance,
            cg_max_iterations=args.cg_max_iterations,
            cg_progress=cg_callback,
        )
    finally:
        close()
        if bar is not None:
            bar.close()
    timings["reconstruction"] = time.perf_counter() - start

    start = time.perf_counter()
    os.makedirs(args.out, exist_ok=True)
    write_alm(paths["phi_alm.fits"], result.phi_alm, lmax=result.lmax_L, force=args.force)
    write_alm(paths["curl_alm.fits"], result.curl_alm, lmax=result.lmax_L, force=args.force)
    arguments = {key: value for key, value in vars(args).items() if not key.startswith("_")}
    document = n0_document(result)
    document["provenance"] = provenance(
        "reconstruct",
        arguments=arguments,
        experiment=experiment,
        extra={
            "settings": {
                "estimator": estimator,
                "lmax_L": result.lmax_L,
                "weights": result.settings.get("weights"),
                "lensing_iterations": iterations,
                "b_excluded_ell_max": args.exclude_delensed_b,
                "filter": result.settings.get("filter_choice", "isotropic"),
            }
        },
    )
    write_json(paths["n0.json"], document, force=args.force)
    timings["writing"] = time.perf_counter() - start
    record = provenance(
        "reconstruct",
        arguments=arguments,
        experiment=experiment,
        timings=timings,
        extra={
            "settings": dict(result.settings),
            "inputs": inputs,
            "outputs": list(OUTPUTS),
            "mask_moments": None if result.mask_moments is None else dict(result.mask_moments),
        },
    )
    write_json(paths["run.json"], record, force=args.force)
    transforms = result.settings["transforms"]
    filtered = result.settings.get("filter", {})
    if result.settings.get("filter_choice") == "optimal":
        print(
            f"lensrec reconstruct: optimal filter converged in {filtered['cg_iterations']} conjugate-gradient "
            f"iterations (residual {filtered['cg_residual']:.2e} < {filtered['cg_tolerance']:g})"
        )
    print(
        f"lensrec reconstruct: {estimator} to L = {result.lmax_L} from nside {nside} maps "
        f"({transforms['synthesis']} syntheses + {transforms['analysis_spin1']} analyses on a "
        f"{result.settings['grid'][0]} x {result.settings['grid'][1]} grid, {timings['reconstruction']:.1f} s)"
    )
    if iterations:
        steps = result.settings["n0_per_iteration"]
        L = min(100, result.lmax_L)
        print(
            f"lensing iterations: {iterations}; N0(L={L}) per step: "
            + ", ".join(f"{step['gradient'][L]:.3e}" for step in steps)
        )
    print(f"wrote {', '.join(paths.values())}")
    return 0
