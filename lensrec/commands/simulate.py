"""``lensrec simulate``: one lensed, observed CMB sky written as HEALPix FITS with its provenance."""

from __future__ import annotations

import os
import time

HELP = "simulate one lensed, observed CMB sky (T, Q, U maps and the input phi) on HEALPix"
EXAMPLES = """examples:
  lensrec simulate --experiment deep_highland --nside 512 --lmax 1000 --seed 1 --out sky/
  lensrec simulate --experiment my_survey.toml --nside 1024 --lmax 2000 --mask mask.fits --out sky2/
  lensrec simulate --experiment wide_lowland --nside 256 --lmax 500 --no-noise --force --out sky/

writes DIR/maps.fits (T, Q, U in uK, RING), DIR/phi_input_alm.fits (phi_LM to lmax + lmax-margin) and
DIR/run.json (provenance: versions, git commit, experiment, arguments, seed, timings). With --tracer FILE
(a tracer TOML or a shipped name such as diffuse_glow) also DIR/tracer_alm.fits: one healpy alm HDU per
tracer, in the file's order, Gaussian and correlated with the simulated phi (lensrec.simulate_tracers)."""

OUTPUTS = ("maps.fits", "phi_input_alm.fits", "run.json")


def add_arguments(parser) -> None:
    from ..sky import DEFAULT_LMAX_MARGIN
    from .options import add_common, add_noise_model

    add_common(parser, experiment=True, out=True, seed=True)
    parser.add_argument("--nside", type=int, required=True, help="HEALPix nside of the maps (a power of two)")
    parser.add_argument("--lmax", type=int, required=True, help="band limit of the lensed sky (<= 3*nside-1)")
    parser.add_argument("--index", type=int, default=0, help="simulation index within the seed (default: %(default)s)")
    parser.add_argument(
        "--lmax-margin",
        type=int,
        default=DEFAULT_LMAX_MARGIN,
        help="extra multipoles of the unlensed fields beyond lmax (default: %(default)s)",
    )
    parser.add_argument("--no-noise", action="store_true", help="noise-free maps")
    parser.add_argument("--mask", default=None, help="HEALPix FITS mask (values in [0, 1], same nside)")
    add_noise_model(parser)
    parser.add_argument("--r", type=float, default=0.0, help="tensor-to-scalar ratio (default: %(default)s)")
    parser.add_argument(
        "--tracer",
        default=None,
        help="also simulate the tracers of this TOML file (or shipped name), correlated with the simulated phi",
    )


def run(args) -> int:
    import lensrec

    from ..io import check_outputs_free, provenance, write_alm, write_json, write_maps

    paths = {name: os.path.join(args.out, name) for name in OUTPUTS}
    if os.path.exists(args.out) and not os.path.isdir(args.out):
        raise ValueError(f"--out {args.out!r} exists and is not a folder")
    check_outputs_free(paths.values(), force=args.force)  # refuse before any work
    timings = {}
    start = time.perf_counter()
    experiment = lensrec.load_experiment(args.experiment)
    mask = lensrec.load_mask(args.mask, args.nside) if args.mask else None
    from .options import load_noise_model

    pixel_noise = load_noise_model(args, experiment, args.nside)
    tracer_set = None
    if args.tracer:
        from ..tracers import load_tracers

        tracer_set = load_tracers(args.tracer)
        paths["tracer_alm.fits"] = os.path.join(args.out, "tracer_alm.fits")
        check_outputs_free([paths["tracer_alm.fits"]], force=args.force)
    timings["inputs"] = time.perf_counter() - start

    start = time.perf_counter()
    result = lensrec.simulate_sky(
        experiment,
        nside=args.nside,
        lmax=args.lmax,
        seed=args.seed,
        index=args.index,
        r=args.r,
        lmax_margin=args.lmax_margin,
        noise=not args.no_noise,
        mask=mask,
        pixel_noise=pixel_noise,
        nthreads=args.nthreads,
    )
    timings["simulation"] = time.perf_counter() - start

    start = time.perf_counter()
    os.makedirs(args.out, exist_ok=True)
    write_maps(paths["maps.fits"], result.maps, force=args.force, masked=mask is not None)
    write_alm(paths["phi_input_alm.fits"], result.phi_alm, force=args.force)
    extra_settings = {}
    if tracer_set is not None:
        from ..harmonics import lmax_from_nalm
        from ..tracers import simulate_tracers

        tracer_set = tracer_set.truncated(min(tracer_set.lmax_L, lmax_from_nalm(result.phi_alm.size)))
        tracer_alm = simulate_tracers(tracer_set, result.phi_alm, seed=args.seed, index=args.index)
        write_alm(paths["tracer_alm.fits"], list(tracer_alm), force=args.force)
        extra_settings["tracers"] = {
            "names": list(tracer_set.names),
            "source": tracer_set.source,
            "lmax_L": tracer_set.lmax_L,
        }
    timings["writing"] = time.perf_counter() - start
    arguments = {key: value for key, value in vars(args).items() if not key.startswith("_")}
    record = provenance(
        "simulate",
        arguments=arguments,
        experiment=experiment,
        seed=args.seed,
        timings=timings,
        extra={
            "settings": {**dict(result.settings), **extra_settings},
            "outputs": [os.path.basename(p) for p in paths.values()],
        },
    )
    write_json(paths["run.json"], record, force=args.force)
    print(f"wrote {', '.join(paths.values())} ({timings['simulation']:.1f} s simulation)")
    return 0
