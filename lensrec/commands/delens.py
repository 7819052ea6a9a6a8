"""``lensrec delens``: a lensing B-mode template from observed maps and a reconstructed φ, and the residual."""

from __future__ import annotations

import os
import time

from ..labels import parse_estimator, uses_b_modes

HELP = "build a lensing B-mode template from the maps' E modes and a reconstructed phi, and delens the B modes"
EXAMPLES = """examples:
  lensrec delens --experiment deep_highland --maps sky/maps.fits --phi rec/phi_alm.fits --out delensed/
  lensrec delens --experiment my_survey.toml --maps sky/maps.fits --phi rec/phi_alm.fits --method first_order \\
      --lmax 1500 --out delensed_fo/ --force

reads the normalised reconstruction phi_alm.fits and its N0 from n0.json beside it (written by
'lensrec reconstruct'); Wiener-filters phi with C_L^phiphi / (C_L^phiphi + N0_L) and the maps' E modes with
C_l^EE / (C_l^EE + N_l^EE); writes DIR/b_template_alm.fits (template B_lm in uK, healpy alm FITS),
DIR/spectra.json (l, observed / template / residual BB, observed x template, the noise subtracted, the
delensing efficiency per l, A_lens^res, notes) and DIR/run.json (provenance).

caution: if phi was reconstructed with B modes (EB, TB or MV) from the same maps, the residual measured here
is biased low (delensing bias); reconstruct with TT, TE, EE for an unbiased residual."""

OUTPUTS = ("b_template_alm.fits", "spectra.json", "run.json")
SUMMARY_BANDS = ((30, 100), (100, 300), (300, 1000), (1000, 2000), (2000, 3000))


def add_arguments(parser) -> None:
    from .options import add_common, add_map_reading

    add_common(parser, experiment=True, out=True)
    add_map_reading(parser)
    parser.add_argument("--maps", required=True, help="observed T, Q, U maps (HEALPix FITS, uK, RING)")
    parser.add_argument(
        "--phi", required=True, help="normalised phi reconstruction (healpy alm FITS) with its n0.json beside it"
    )
    parser.add_argument(
        "--method",
        choices=("remap", "first_order"),
        default="remap",
        help="template: exact remapping or first-order gradient expansion (default: %(default)s)",
    )
    parser.add_argument(
        "--lmax",
        type=int,
        default=None,
        help="band limit of E, B and the template (default: min(3*nside-1, the experiment's polarization l_max))",
    )


def read_phi_noise(phi_path: str, lmax_phi: int) -> tuple:
    """The gradient N0 of the reconstruction in ``phi_path`` from the n0.json beside it: (N0 array, estimator).

    The file is the one ``lensrec reconstruct`` writes: {"L": [0 … L_max], "n0": {label: {"gradient": [...],
    "curl": [...]}, ...}, "provenance": {"settings": {"estimator": label, ...}, ...}}; null entries are NaN.

    Raises
    ------
    ValueError
        If the file is missing or unreadable, names no estimator (when it holds several), lacks the gradient
        N0 of its estimator, or its L range is not 0 … ``lmax_phi``.
    """
    import numpy as np

    from ..io import read_json

    path = os.path.join(os.path.dirname(os.path.abspath(phi_path)), "n0.json")
    if not os.path.isfile(path):
        raise ValueError(
            f"the reconstruction noise {path!r} is missing: the Wiener filter of phi needs the N0 of the "
            f"reconstruction in {phi_path!r} (write both with 'lensrec reconstruct')"
        )
    document = read_json(path)
    noise = document.get("n0") if isinstance(document, dict) else None
    if not isinstance(noise, dict) or not noise:
        raise ValueError(f"{path!r} holds no 'n0' table of reconstruction noise")
    settings = (document.get("provenance") or {}).get("settings") or {}
    estimator = settings.get("estimator")
    if estimator is None:
        if len(noise) != 1:
            raise ValueError(
                f"{path!r} does not say which of {sorted(noise)} made {phi_path!r} "
                "(provenance.settings.estimator is missing)"
            )
        estimator = next(iter(noise))
    try:
        estimator = parse_estimator(estimator)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{path!r} names an estimator lensrec does not know: {exc}") from None
    if estimator not in noise or not isinstance(noise[estimator], dict) or "gradient" not in noise[estimator]:
        raise ValueError(f"{path!r} lacks the gradient N0 of its estimator {estimator!r}")
    try:
        L = np.asarray(document["L"], dtype=np.int64)
        values = np.array(
            [np.nan if value is None else value for value in noise[estimator]["gradient"]], dtype=np.float64
        )
    except (KeyError, TypeError, ValueError) as exc:
        raise ValueError(
            f"{path!r} does not hold a gradient N0 with its L values ({type(exc).__name__}: {exc})"
        ) from None
    if L.ndim != 1 or values.shape != L.shape or not np.array_equal(L, np.arange(L.size)):
        raise ValueError(f"{path!r}: 'L' must be 0, 1, ..., L_max with one N0 value per L")
    if L.size != lmax_phi + 1:
        raise ValueError(
            f"the L range of {path!r} (L = 0 ... {L.size - 1}) does not match {phi_path!r} (L_max = {lmax_phi}); "
            "they come from different reconstructions"
        )
    return values, str(estimator)


def _reconstruction_inputs(phi_path: str) -> dict:
    """The ``inputs`` block of the run.json beside the reconstruction (empty if there is none)."""
    from ..io import read_json

    path = os.path.join(os.path.dirname(os.path.abspath(phi_path)), "run.json")
    if not os.path.isfile(path):
        return {}
    record = read_json(path)
    inputs = record.get("inputs") if isinstance(record, dict) else None
    return inputs if isinstance(inputs, dict) else {}


def run(args) -> int:
    import numpy as np

    import lensrec
    from lensrec import delensing, harmonics

    from ..io import check_outputs_free, file_sha256, provenance, read_alm, read_maps, write_alm, write_json
    from .options import InputError

    paths = {name: os.path.join(args.out, name) for name in OUTPUTS}
    if os.path.exists(args.out) and not os.path.isdir(args.out):
        raise InputError(f"--out {args.out!r} exists and is not a folder")
    check_outputs_free(paths.values(), force=args.force)  # refuse before any work
    timings = {}
    start = time.perf_counter()
    experiment = lensrec.load_experiment(args.experiment)
    spectra = lensrec.fiducial_spectra()
    from .options import map_reading_options

    maps = read_maps(args.maps, **map_reading_options(args))
    if maps.ndim != 2 or maps.shape[0] != 3:
        raise InputError(f"--maps {args.maps!r} must hold three maps T, Q, U, got shape {maps.shape}")
    nside = harmonics.npix_to_nside(maps.shape[1], f"--maps {args.maps!r}")
    phi_hat = read_alm(args.phi)
    lmax_phi = harmonics.lmax_from_nalm(phi_hat.size, f"--phi {args.phi!r}")
    n0, estimator = read_phi_noise(args.phi, lmax_phi)
    if lmax_phi > 3 * nside - 1:
        raise InputError(
            f"--phi {args.phi!r} reaches L = {lmax_phi}, beyond the band limit 3*nside-1 = {3 * nside - 1} of the "
            f"nside {nside} maps in --maps: it was not reconstructed from maps of this resolution"
        )
    source = _reconstruction_inputs(args.phi)
    if source.get("nside") is not None and int(source["nside"]) != nside:
        raise InputError(
            f"--phi {args.phi!r} was reconstructed from nside {source['nside']} maps, but --maps {args.maps!r} "
            f"has nside {nside}; delens the maps the reconstruction belongs to"
        )
    maps_digest = file_sha256(args.maps)
    same_maps = source.get("maps_sha256") == maps_digest if source.get("maps_sha256") else None
    lmax = min(3 * nside - 1, experiment.ell_max_polarization) if args.lmax is None else args.lmax
    if lmax < 2 or lmax > 3 * nside - 1:
        raise InputError(f"--lmax {lmax} must lie in [2, 3*nside-1 = {3 * nside - 1}] for the maps' nside {nside}")
    if spectra.lmax < max(lmax, lmax_phi):
        raise InputError(f"the fiducial spectra reach l = {spectra.lmax}, below lmax {lmax} or L_max {lmax_phi}")
    # zeros in Q and U alike mark masked pixels; the maps are analysed as a full sky here
    masked_fraction = float(np.mean((maps[1] == 0.0) & (maps[2] == 0.0)))
    mask_warning = None
    if masked_fraction > 0.001:
        mask_warning = (
            f"{100 * masked_fraction:.1f}% of the pixels are zero in Q and U (a mask?): the maps are "
            "analysed as a full sky, so the spectra are pseudo-spectra and E-to-B leakage of the cut is "
            "not removed"
        )
    timings["inputs"] = time.perf_counter() - start

    start = time.perf_counter()
    result = delensing.delens_maps(
        maps, phi_hat, experiment, spectra, n0=n0, lmax=lmax, method=args.method, nthreads=args.nthreads
    )
    timings["delens"] = time.perf_counter() - start

    bias_warning = None
    if uses_b_modes(estimator):
        where = (
            "these same maps"
            if same_maps
            else "maps whose provenance is not recorded"
            if same_maps is None
            else "other maps (no bias if their B modes are independent of these)"
        )
        bias_warning = (
            f"phi was reconstructed with {estimator}, which uses B modes, from {where}: if those B modes "
            "are the ones delensed here, the residual, efficiency and A_lens^res reported here are biased low "
            "(delensing bias); reconstruct with TT, TE or EE for an unbiased residual"
        )
    warnings = [text for text in (bias_warning, mask_warning) if text]
    document = result.spectra_dict()
    document["estimator"] = estimator
    document["notes"] = ["WARNING: " + text for text in warnings] + document["notes"]
    os.makedirs(args.out, exist_ok=True)
    start = time.perf_counter()
    write_alm(paths["b_template_alm.fits"], result.template_alm, force=args.force)
    write_json(paths["spectra.json"], document, force=args.force)
    timings["writing"] = time.perf_counter() - start
    arguments = {key: value for key, value in vars(args).items() if not key.startswith("_")}
    arguments["lmax"] = lmax
    record = provenance(
        "delens",
        arguments=arguments,
        experiment=experiment,
        timings=timings,
        extra={
            "inputs": {
                "maps": os.path.abspath(args.maps),
                "maps_sha256": maps_digest,
                "phi": os.path.abspath(args.phi),
                "phi_sha256": file_sha256(args.phi),
                "estimator": estimator,
                "nside": nside,
                "lmax_phi": lmax_phi,
                "phi_from_these_maps": same_maps,
            },
            "settings": {
                "method": args.method,
                "lmax": lmax,
                "alens_range": [result.ell_min, result.ell_max],
                "e_filter": "C_EE times the isotropic inverse-variance-filtered E (full sky)",
                "phi_filter": "C_phiphi / (C_phiphi + N0)",
            },
            "outputs": list(OUTPUTS),
        },
    )
    write_json(paths["run.json"], record, force=args.force)

    print(
        f"lensrec delens: {experiment.name}, method {args.method}, lmax {lmax}, phi to L {lmax_phi} "
        f"({timings['delens']:.1f} s to delens)"
    )
    print(f"{'l range':>12s} {'lensing B power removed':>24s}")
    for lo, hi in SUMMARY_BANDS:
        lo, hi = max(lo, result.ell_min), min(hi, result.ell_max)
        if lo >= hi:
            continue
        try:
            print(f"{lo:5d}-{hi:<6d} {100 * result.efficiency_in_range(lo, hi):23.1f}%")
        except ValueError:  # no lensing power above the noise in this range
            continue
    print(
        f"A_lens^res = {result.alens_residual:.3f} over l = {result.ell_min}-{result.ell_max} "
        "(B noise power subtracted; 1 = no delensing)"
    )
    for text in warnings:
        print(f"warning: {text}")
    print(f"wrote {', '.join(paths.values())}")
    return 0
