"""Cost of the analytic N1 (lensrec.analytic_n1) at L_max 3000: wall time, CPU time and peak RSS.

    python benchmarks/bench_analytic_n1.py [--quick] [--nthreads N]

Rows, each one call (the work is deterministic; the machine's load shows in wall − CPU):
  * MV, gradient only: the five pair estimators and every cross term N1^αβ;
  * every estimator (TT, TE, EE, TB, EB, MV, GMV), gradient and curl;
  * MV gradient with the N1 matrix dN1_L/dC^φφ_L' on the grid.
Experiment: 1 µK-arcmin in temperature (√2 in polarization), 1' beam, ℓ = 30–3000 in T and P, lmax_L = 3000;
the default L grid (24 log-spaced points from 2 to 3000, :func:`lensrec.analytic_n1.default_n1_L_grid`) and
l grid (128², spacing 3·3001/128 ≈ 70). ``--quick``: ℓ_max = lmax_L = 1000.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from benchmarks._common import peak_rss_mb, report  # noqa: E402


def timed(function):
    wall, cpu = time.perf_counter(), time.process_time()
    result = function()
    return result, time.perf_counter() - wall, time.process_time() - cpu


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true", help="small sizes for a smoke run")
    parser.add_argument("--nthreads", type=int, default=2, help="threads (default: %(default)s)")
    args = parser.parse_args()

    import lensrec
    from lensrec.analytic_n1 import default_n1_L_grid

    lmax = 1000 if args.quick else 3000
    experiment = lensrec.Experiment(
        name="benchmark", noise_temperature=1.0, beam_fwhm=1.0, ell_min=30,
        ell_max_temperature=lmax, ell_max_polarization=lmax,
    )  # fmt: skip
    spectra = lensrec.fiducial_spectra()
    noise = lensrec.reconstruction_noise(experiment, spectra, lmax_L=lmax, nthreads=args.nthreads)
    grid = default_n1_L_grid(lmax)
    rows = []
    cases = (
        ("MV gradient", dict(estimators="MV", components="gradient")),
        ("all estimators, gradient and curl", dict()),
        ("MV gradient with the N1 matrix", dict(estimators="MV", components="gradient", matrix=True)),
    )
    for name, kwargs in cases:
        result, wall, cpu = timed(
            lambda kwargs=kwargs: lensrec.analytic_n1(
                experiment, spectra, lmax_L=lmax, noise=noise, nthreads=args.nthreads, **kwargs
            )
        )
        rows.append(
            {
                "case": name,
                "lmax": lmax,
                "L_grid_points": int(grid.size),
                "wall_s": wall,
                "cpu_s": cpu,
                "peak_rss_mb": peak_rss_mb(),
                "mv_n1_over_n0_at_L1000": float(result.n1["MV"]["gradient"][1000] / noise.n0["MV"]["gradient"][1000]),
            }
        )
    report("analytic_n1", rows)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
