"""Cost of the conjugate-gradient optimal filter on the invented deep patch, in spin-2 synthesis units.

    python benchmarks/bench_optimal_filter.py [--quick] [--nside N] [--lmax L] [--nthreads N] [--tolerance T]

Size: nside 2048 with ℓ_max = 3000 (``--quick``: nside 256, ℓ_max = 512) on the "Quiet Hollow" patch
(lensrec.demo_patch, ~4% of the sky, noise from its hit map, 3 µK-arcmin inverse-variance depth, 3′ beam).
Rows, measured in this run: CG iterations to the tolerance, wall and CPU time of the solve and per iteration,
both in units of one ducc0 spin-2 HEALPix synthesis at that size (CPU time of the faster of a measurement
before and one after the solve, as the machine's load drifts), and the process's peak RSS. One iteration
costs one spin-0 and one spin-2 synthesis plus their adjoints (about 3 spin-2 synthesis units).
"""

from __future__ import annotations

import argparse
import os
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from benchmarks._common import peak_rss_mb, report  # noqa: E402
from benchmarks.bench_reconstruction import spin2_synthesis_cpu_seconds  # noqa: E402


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--nside", type=int, default=None)
    parser.add_argument("--lmax", type=int, default=None)
    parser.add_argument("--nthreads", type=int, default=2)
    parser.add_argument("--tolerance", type=float, default=1e-4)
    args = parser.parse_args()
    nside = args.nside or (256 if args.quick else 2048)
    lmax = args.lmax or (512 if args.quick else 3000)

    import lensrec
    from lensrec.demo_patch import patch_footprint

    experiment = lensrec.Experiment(
        name="Quiet Hollow deep", noise_temperature=3.0, beam_fwhm=3.0, ell_max_temperature=lmax,
        ell_max_polarization=lmax,
    )  # fmt: skip
    mask, hits = patch_footprint(nside)
    noise = lensrec.PixelNoise.from_hits(experiment, hits, mask)
    unit_before = spin2_synthesis_cpu_seconds(nside, lmax, args.nthreads)
    sky = lensrec.simulate_sky(experiment, nside=nside, lmax=lmax, lmax_margin=200, seed=1, pixel_noise=noise,
                               nthreads=args.nthreads)  # fmt: skip
    maps = sky.maps
    del sky
    optimal = lensrec.OptimalFilter(experiment, noise, lmax=lmax, cg_tolerance=args.tolerance,
                                    cg_max_iterations=5000, nthreads=args.nthreads)  # fmt: skip
    start, start_cpu = time.perf_counter(), time.process_time()
    fields = optimal.filter(maps)
    wall, cpu = time.perf_counter() - start, time.process_time() - start_cpu
    unit = min(unit_before, spin2_synthesis_cpu_seconds(nside, lmax, args.nthreads))
    iterations = fields.settings["cg_iterations"]
    report(
        "optimal_filter",
        [
            {
                "nside": nside,
                "lmax": lmax,
                "sky_fraction": float(mask.mean()),
                "preconditioner": "harmonic-diagonal",
                "cg_tolerance": args.tolerance,
                "cg_iterations": iterations,
                "wall_seconds": wall,
                "cpu_seconds": cpu,
                "spin2_synthesis_cpu_seconds": unit,
                "solve_in_synthesis_units": cpu / unit,
                "iteration_in_synthesis_units": cpu / unit / max(iterations, 1),
                "peak_rss_mb": peak_rss_mb(),
            }
        ],
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())
