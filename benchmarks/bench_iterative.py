"""Cost of the iterative lensing estimator: the noise forecast, and one iteration on maps in spin-2 units.

    python benchmarks/bench_iterative.py [--quick] [--nside N --lmax L] [--nthreads N] [--rows forecast,iteration]

Rows (each in its own process, so that each reports its own peak RSS):

  * ``forecast``: ``lensrec.iterative_reconstruction_noise`` for EB and MV (gradient and curl) of a
    0.5 µK-arcmin survey with ℓ_max 3000 (``--quick``: 1500), wall seconds and steps;
  * ``iteration``: ``lensrec.reconstruct(maps, experiment, estimator="EB", lensing_iterations=1)`` on T, Q, U
    maps; one delens-and-estimate step (inverse deflection, remap of E and B, partially delensed spectra,
    filter, EB estimate) in units of one spin-2 HEALPix synthesis at the same nside and ℓ_max, timed in the
    same process. Default nside 2048, ℓ_max 3000; ``--quick``: nside 512, ℓ_max 1000.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from benchmarks._common import peak_rss_mb, report, spin2_synthesis_seconds  # noqa: E402

ROWS = ("forecast", "iteration")


def _experiment(lmax, depth=0.5):
    import lensrec

    return lensrec.Experiment(
        name="Benchmark Deep Survey",
        noise_temperature=depth / np.sqrt(2.0),
        noise_polarization=depth,
        beam_fwhm=1.0,
        ell_min=2,
        ell_max_temperature=lmax,
        ell_max_polarization=lmax,
    )


def run_row(row, nside, lmax, nthreads, quick) -> dict:
    import lensrec

    if row == "forecast":
        lmax_f = 1500 if quick else 3000
        experiment = _experiment(lmax_f)
        lensrec.reconstruction_noise(experiment, estimators=("EB",), lmax_L=200, nthreads=nthreads)  # warm-up
        start, cpu = time.perf_counter(), time.process_time()
        result = lensrec.iterative_reconstruction_noise(experiment, estimators=("EB", "MV"), nthreads=nthreads)
        seconds, cpu = time.perf_counter() - start, time.process_time() - cpu
        return {
            "row": row,
            "lmax": lmax_f,
            "nthreads": nthreads,
            "seconds": seconds,
            "cpu_seconds": cpu,  # all threads; on an otherwise idle machine wall >= cpu / nthreads
            "steps_EB": result.lensing_iterations["EB"],
            "steps_MV": result.lensing_iterations["MV"],
            "gain_EB_L100": float(result.gain("EB")[100]),
            "peak_rss_mb": peak_rss_mb(),
        }
    from lensrec import harmonics
    from lensrec.sky import gaussian_cmb_alm

    experiment = _experiment(lmax)
    signal = lensrec.fiducial_spectra().cmb(lensed=True)
    alm = gaussian_cmb_alm({k: v[: lmax + 1] for k, v in signal.items()}, lmax, np.random.default_rng(1))
    maps = harmonics.alm2map_tqu(alm, nside, lmax, nthreads=nthreads)
    del alm
    unit_before = spin2_synthesis_seconds(nside, lmax, nthreads)
    result = lensrec.reconstruct(maps, experiment, estimator="EB", lmax_L=lmax, nthreads=nthreads, lensing_iterations=1)
    unit = min(unit_before, spin2_synthesis_seconds(nside, lmax, nthreads))
    quadratic, step = result.settings["seconds_per_iteration"]
    return {
        "row": row,
        "nside": nside,
        "lmax": lmax,
        "nthreads": nthreads,
        "spin2_synthesis_s": unit,
        "quadratic_s": quadratic,
        "iteration_s": step,
        "quadratic_units": quadratic / unit,
        "iteration_units": step / unit,
        "peak_rss_mb": peak_rss_mb(),
    }


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--nside", type=int, default=None)
    parser.add_argument("--lmax", type=int, default=None)
    parser.add_argument("--nthreads", type=int, default=2)
    parser.add_argument("--rows", default=",".join(ROWS))
    parser.add_argument("--one-row", default=None, help=argparse.SUPPRESS)
    args = parser.parse_args()
    nside = args.nside or (512 if args.quick else 2048)
    lmax = args.lmax or (1000 if args.quick else 3000)
    if args.one_row:
        print(json.dumps(run_row(args.one_row, nside, lmax, args.nthreads, args.quick)))
        return 0
    rows = []
    for row in args.rows.split(","):
        command = [sys.executable, __file__, "--one-row", row, "--nside", str(nside), "--lmax", str(lmax)]
        command += ["--nthreads", str(args.nthreads)] + (["--quick"] if args.quick else [])
        done = subprocess.run(command, capture_output=True, text=True)
        if done.returncode != 0:
            print(done.stderr, file=sys.stderr)
            return 1
        rows.append(json.loads(done.stdout.strip().splitlines()[-1]))
    report("iterative_quick" if args.quick else "iterative", rows)
    return 0


if __name__ == "__main__":
    sys.exit(main())
