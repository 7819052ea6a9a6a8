"""``lensrec delens``: a lensing B-mode template from observed maps and a reconstructed φ, and the residual."""

from __future__ import annotations

import os
import time

from ..labels import uses_b_modes

HELP = "build a lensing B-mode template from the maps' E modes and a reconstructed phi, and delens the B modes"
EXAMPLES = """examples:
  lensrec delens --experiment deep_highland --maps sky/maps.fits --phi rec/phi_alm.fits --out delensed/
  lensrec delens --experiment my_survey.toml --maps sky/maps.fits --phi rec/phi_alm.fits --method remap \\
      --lmax 1500 --out delensed_remap/ --force
  lensrec delens --maps sky/maps.fits --phi sky/phi_input_alm.fits --phi-exact --out delensed_exact/
  lensrec delens --maps sky/maps.fits --phi my_phi.fits --phi-noise my_noise.txt --out delensed_any/
  lensrec delens --maps sky/maps.fits --phi rec/phi_alm.fits --tracer diffuse_glow --out delensed_glow/

phi and its noise: by default the normalized reconstruction phi_alm.fits and the gradient N0 of its estimator
from n0.json beside it (written by 'lensrec reconstruct'; any label, GMV included; an "iterative" block there
gives the iterative N0, an "n1" table adds N1). --phi-noise PATH reads the noise from another JSON file (same
layout) or a text table (one column N_L, or two: L, N_L), used as given. phi is Wiener-filtered with
C_L^phiphi / (C_L^phiphi + N_L); --phi-exact uses phi as given (e.g. a simulation's input phi: the
perfect-knowledge bound). --tracer FILE (tracer TOML or shipped name) combines the tracers' maps
(--tracer-alm, default tracer_alm.fits beside --maps, as 'lensrec simulate --tracer' writes) with phi
optimally (Sherwin & Schmittfull 2015); without --phi the tracers alone delens.
The maps' E modes are Wiener-filtered with C_l^EE / (C_l^EE + N_l^EE); writes DIR/b_template_alm.fits
(template B_lm in uK, healpy alm FITS), DIR/spectra.json (l, observed / template / residual BB, observed x
template, the noise subtracted, the delensing efficiency per l, A_lens^res, the phi source and the bias
treatment, notes) and DIR/run.json (provenance).

delensing bias: if phi was reconstructed with B modes (EB, TB, MV, GMV) from the same maps, the residual is
biased low unless the reconstruction left out the delensed B modes ('lensrec reconstruct
--exclude-delensed-b L': A_lens^res is then measured at l <= L); TT+TE+EE reads no B modes (only its E-reuse
bias remains, about 1% of A_lens^res on simulations). The treatment applied is printed and recorded."""

OUTPUTS = ("b_template_alm.fits", "spectra.json", "run.json")
SUMMARY_BANDS = ((30, 100), (100, 300), (300, 1000), (1000, 2000), (2000, 3000))


def add_arguments(parser) -> None:
    from .options import add_common, add_map_reading

    add_common(parser, experiment=True, out=True)
    add_map_reading(parser)
    parser.add_argument("--maps", required=True, help="observed T, Q, U maps (HEALPix FITS, uK, RING)")
    from ..lensing_templates import DEFAULT_TEMPLATE_METHOD, TEMPLATE_METHODS

    parser.add_argument(
        "--phi", default=None, help="phi (healpy alm FITS): a normalized reconstruction with n0.json beside it"
    )
    parser.add_argument(
        "--phi-noise",
        default=None,
        help="noise of phi for its Wiener filter: JSON (forecast/reconstruct layout) or text (N_L, or L and N_L)",
    )
    parser.add_argument(
        "--phi-exact", action="store_true", help="phi is exact (e.g. a simulation's input): no Wiener filter"
    )
    parser.add_argument("--tracer", default=None, help="tracer TOML file or shipped name to combine with phi")
    parser.add_argument(
        "--tracer-alm", default=None, help="the tracers' alm FITS (default: tracer_alm.fits beside --maps)"
    )
    parser.add_argument(
        "--method",
        choices=TEMPLATE_METHODS,
        default=DEFAULT_TEMPLATE_METHOD,
        help="template: first-order gradient expansion, exact remapping, or remapping of a delensed E "
        "(default: %(default)s)",
    )
    parser.add_argument(
        "--lmax",
        type=int,
        default=None,
        help="band limit of E, B and the template (default: min(2*nside, the experiment's polarization l_max); "
        "HEALPix analysis is accurate to 2*nside)",
    )


def read_phi_noise(phi_path: str, lmax_L: int) -> tuple:
    """The noise of the reconstruction in ``phi_path`` from the n0.json beside it.

    Returns (noise array, estimator, description, provenance settings); the noise is the gradient N0 of the
    estimator, or its iterative N0, or N0 + N1 (see :mod:`lensrec.phi_noise`).

    The file is the one ``lensrec reconstruct`` writes: {"L": [0 … lmax_L], "n0": {label: {"gradient": [...],
    "curl": [...]}, ...}, "provenance": {"settings": {"estimator": label, ...}, ...}}; null entries are NaN.

    Raises
    ------
    ValueError
        If the file is missing or unreadable, names no estimator (when it holds several), lacks the gradient
        N0 of its estimator, or its L range is not 0 … ``lmax_L``.
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
    from ..phi_noise import noise_label

    estimator = noise_label(document, path)
    noise = document["n0"]
    settings = (document.get("provenance") or {}).get("settings") or {}
    if not isinstance(noise.get(estimator), dict) or "gradient" not in noise[estimator]:
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
        raise ValueError(f"{path!r}: 'L' must be 0, 1, ..., lmax_L with one N0 value per L")
    if L.size != lmax_L + 1:
        raise ValueError(
            f"the L range of {path!r} (L = 0 ... {L.size - 1}) does not match {phi_path!r} (lmax_L = {lmax_L}); "
            "they come from different reconstructions"
        )
    from ..phi_noise import read_phi_noise as read_noise

    values, description = read_noise(path, lmax_L, estimator=estimator)
    return values, str(estimator), description, settings


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
    if args.phi is None and args.tracer is None:
        raise InputError("give --phi (a reconstruction or an exact phi), --tracer, or both")
    if args.phi_exact and args.phi_noise:
        raise InputError("--phi-noise and --phi-exact exclude each other: an exact phi has no noise (no Wiener filter)")
    if args.phi is None and (args.phi_exact or args.phi_noise):
        raise InputError("--phi-exact and --phi-noise describe --phi, which is missing")
    estimator, description, bias_settings = None, None, {}
    n0 = None
    lmax_L = None
    if args.phi is not None:
        phi_hat = read_alm(args.phi)
        lmax_L = harmonics.lmax_from_nalm(phi_hat.size, f"--phi {args.phi!r}")
        if args.phi_exact:
            description = "exact phi (no Wiener filter)"
        elif args.phi_noise:
            from ..phi_noise import read_phi_noise as read_noise

            n0, description = read_noise(args.phi_noise, lmax_L)
        else:
            n0, estimator, description, bias_settings = read_phi_noise(args.phi, lmax_L)
    else:
        phi_hat = None
    if lmax_L is not None and lmax_L > 3 * nside - 1 and not args.phi_exact:
        raise InputError(
            f"--phi {args.phi!r} reaches L = {lmax_L}, beyond the band limit 3*nside-1 = {3 * nside - 1} of the "
            f"nside {nside} maps in --maps: it was not reconstructed from maps of this resolution"
        )
    tracer_set = tracer_alm = None
    if args.tracer:
        from ..tracers import load_tracers

        tracer_set = load_tracers(args.tracer)
        tracer_path = args.tracer_alm or os.path.join(os.path.dirname(os.path.abspath(args.maps)), "tracer_alm.fits")
        if not os.path.isfile(tracer_path):
            raise InputError(
                f"the tracer maps {tracer_path!r} do not exist: give --tracer-alm (one alm HDU per tracer, as "
                "'lensrec simulate --tracer' writes)"
            )
        tracer_alm = np.array([read_alm(tracer_path, hdu=k + 1) for k in range(len(tracer_set.tracers))])
        if args.phi_exact:
            raise InputError("--tracer combines tracers with a noisy phi; an exact phi needs no tracer")
    if args.phi is None:
        source = {}
    else:
        source = _reconstruction_inputs(args.phi)
    if source.get("nside") is not None and int(source["nside"]) != nside:
        raise InputError(
            f"--phi {args.phi!r} was reconstructed from nside {source['nside']} maps, but --maps {args.maps!r} "
            f"has nside {nside}; delens the maps the reconstruction belongs to"
        )
    maps_digest = file_sha256(args.maps)
    same_maps = source.get("maps_sha256") == maps_digest if source.get("maps_sha256") else None
    lmax = min(2 * nside, experiment.ell_max_polarization) if args.lmax is None else args.lmax
    if lmax < 2 or lmax > 3 * nside - 1:
        raise InputError(f"--lmax {lmax} must lie in [2, 3*nside-1 = {3 * nside - 1}] for the maps' nside {nside}")
    if spectra.lmax < max(lmax, 0 if args.phi_exact else lmax_L or 0):
        raise InputError(f"the fiducial spectra reach l = {spectra.lmax}, below lmax {lmax} or lmax_L {lmax_L}")
    # zeros in Q and U alike mark masked pixels; the maps are analyzed as a full sky here
    masked_fraction = float(np.mean((maps[1] == 0.0) & (maps[2] == 0.0)))
    mask_warning = None
    if masked_fraction > 0.001:
        mask_warning = (
            f"{100 * masked_fraction:.1f}% of the pixels are zero in Q and U (a mask?): the maps are "
            "analyzed as a full sky, so the spectra are pseudo-spectra and E-to-B leakage of the cut is "
            "not removed"
        )
    timings["inputs"] = time.perf_counter() - start

    from ..delensing_bias import bias_treatment_note

    # which treatment of the B-mode reuse bias applies (the rule comes from lensrec.labels)
    ell_max = None
    excluded = bias_settings.get("b_excluded_ell_max")
    if estimator is None:
        treatment = "exact phi" if args.phi_exact else ("not known" if args.phi else "tracers only")
    elif not uses_b_modes(estimator):
        treatment = "b_free"
    elif excluded is not None:
        treatment = "exclude_delensed_b"
        ell_max = min(int(excluded), lmax)
    else:
        treatment = "none"
    bias_warning = None
    if treatment == "none":
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
            "(delensing bias); reconstruct with TT+TE+EE, or with --exclude-delensed-b, for an unbiased residual"
        )
    elif treatment == "not known":
        bias_warning = (
            "the noise of phi came from --phi-noise, so lensrec cannot tell whether phi reused these B modes; if "
            "it did, the residual is biased low (delensing bias)"
        )
    treatment_note = (
        bias_treatment_note(estimator, treatment, ell_max)
        if treatment in ("b_free", "exclude_delensed_b", "none")
        else f"bias treatment: {treatment}"
    )
    phi_kind = "exact" if args.phi_exact else ("internal" if args.phi else None)
    phi_for_template, n0_for_template, filtered = phi_hat, n0, bool(args.phi_exact)
    if tracer_set is not None:
        from ..tracers import combine_tracers, combined_phi

        tracer_set = tracer_set.truncated(min(tracer_set.lmax_L, lmax_L or lmax, lmax))
        combination = combine_tracers(tracer_set, n0=None if n0 is None else n0[: tracer_set.lmax_L + 1])
        phi_for_template = combined_phi(combination, tracer_alm, None if n0 is None else phi_hat)
        n0_for_template, filtered = None, True
        phi_kind = "combined" if args.phi else "tracer"
        description = (
            f"optimal combination of {', '.join(combination.inputs)} (Sherwin & Schmittfull 2015, PRD 92, 043005)"
        )

    start = time.perf_counter()
    result = delensing.delens_maps(
        maps,
        phi_for_template,
        experiment,
        spectra,
        n0=n0_for_template,
        lmax=lmax,
        method=args.method,
        ell_max=ell_max,
        phi_filtered=filtered,
        notes=(treatment_note,),
        nthreads=args.nthreads,
    )
    timings["delens"] = time.perf_counter() - start

    warnings = [text for text in (bias_warning, mask_warning) if text]
    document = result.spectra_dict()
    document["estimator"] = estimator
    document["phi_source"] = {"kind": phi_kind, "noise": description, "bias_treatment": treatment}
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
                "phi": None if args.phi is None else os.path.abspath(args.phi),
                "phi_sha256": None if args.phi is None else file_sha256(args.phi),
                "phi_source": phi_kind,
                "phi_noise": description,
                "tracer": None if tracer_set is None else tracer_set.source,
                "estimator": estimator,
                "nside": nside,
                "lmax_L": lmax_L,
                "phi_from_these_maps": same_maps,
            },
            "settings": {
                "method": args.method,
                "lmax": lmax,
                "alens_range": [result.ell_min, result.ell_max],
                "e_filter": "C_EE times the isotropic inverse-variance-filtered E (full sky)",
                "phi_filter": "none (used as given)" if filtered else "C_phiphi / (C_phiphi + N), N: " + description,
                "bias_treatment": treatment,
            },
            "outputs": list(OUTPUTS),
        },
    )
    write_json(paths["run.json"], record, force=args.force)

    print(
        f"lensrec delens: {experiment.name}, method {args.method}, lmax {lmax}, phi: {phi_kind}, "
        f"{description} ({timings['delens']:.1f} s to delens)"
    )
    print(treatment_note.split(". E-reuse")[0])
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
