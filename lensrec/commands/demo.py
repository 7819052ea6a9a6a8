"""``lensrec demo``: the whole job on the embedded default, with a self-contained report."""

from __future__ import annotations

HELP = "run forecast, simulation, MV reconstruction, validation, delensing and sigma(r) on the embedded default"
EXAMPLES = """examples:
  lensrec demo --out report/                 # nside 512, about two minutes on 2 cores
  lensrec demo --out report/ --force         # replace an earlier report
  lensrec demo --out big/ --nside 2048       # the same job at full resolution (lmax 3000)
  lensrec demo --out wide/ --experiment wide_lowland

writes DIR/index.html (figures as PNG beside it) and DIR/summary.json, and prints a summary table.
The report describes one simulation of an idealized survey, not a result for any real survey."""


def add_arguments(parser) -> None:
    from .options import add_common

    add_common(parser, experiment=True, out=True, seed=True)
    parser.add_argument("--nside", type=int, default=512, help="HEALPix nside of the simulation (default: %(default)s)")
    parser.add_argument("--lmax", type=int, default=None, help="CMB band limit (default: min(2*nside, 3000))")
    parser.add_argument(
        "--lmax-L",
        dest="lmax_L",
        type=int,
        default=None,
        help="lensing band limit of the reconstruction (default: lmax)",
    )


def run(args) -> int:
    import os
    import time

    from ..demo import run_demo

    start = time.perf_counter()
    run_demo(
        args.out,
        experiment=args.experiment,
        nside=args.nside,
        lmax=args.lmax,
        lmax_L=args.lmax_L,
        seed=args.seed,
        force=args.force,
        nthreads=args.nthreads,
        log=lambda line: print(line, flush=True),
    )
    print(f"report: {os.path.join(args.out, 'index.html')} ({time.perf_counter() - start:.0f} s)")
    return 0
