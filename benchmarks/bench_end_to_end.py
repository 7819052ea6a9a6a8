"""End-to-end cost of what a user calls, in units of one ducc0 spin-2 HEALPix synthesis, with peak memory.

    python benchmarks/bench_end_to_end.py [--quick] [--nside N --lmax L] [--nthreads N] [--rows mv,gmv,...]

Rows (each in its own process, so that each reports its own peak RSS):

  * ``mv``:  ``lensrec.reconstruct(maps, experiment, estimator="MV", lmax_L=lmax)`` on T, Q, U maps: filter,
    five estimators, normalization;
  * ``gmv``: the same with ``estimator="GMV"`` (joint filter, one spin-1 analysis);
  * ``simulate``: ``lensrec.simulate_sky`` (lensed T, Q, U with noise) at that nside and lmax;
  * ``suite``: one index of a lensing suite (simulate, filter, reconstruct with GMV).

The unit is one spin-2 synthesis (E, B → Q, U at that nside and lmax), timed in the same process before and
after the row (the faster is used: the machine's load drifts). Default size nside 2048, ℓ_max 3000;
``--quick``: nside 512, ℓ_max 1000. Results: benchmarks/results/end_to_end[_quick].json.
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

ROWS = ("mv", "gmv", "simulate", "suite")


def _experiment(lmax):
    import lensrec

    return lensrec.Experiment(
        name="Benchmark Survey",
        noise_temperature=1.0,
        beam_fwhm=1.5,
        ell_min=2,
        ell_max_temperature=lmax,
        ell_max_polarization=lmax,
    )


def _maps(nside, lmax, nthreads):
    import lensrec
    from lensrec import harmonics
    from lensrec.sky import gaussian_cmb_alm

    signal = lensrec.fiducial_spectra().cmb(lensed=True)
    alm = gaussian_cmb_alm({k: v[: lmax + 1] for k, v in signal.items()}, lmax, np.random.default_rng(1))
    return harmonics.alm2map_tqu(alm, nside, lmax, nthreads=nthreads)


def run_row(row, nside, lmax, nthreads) -> dict:
    import lensrec

    experiment = _experiment(lmax)
    unit = spin2_synthesis_seconds(nside, lmax, nthreads, repeat=2)
    extra = {}
    if row in ("mv", "gmv"):
        maps = _maps(nside, lmax, nthreads)
        start = time.perf_counter()
        result = lensrec.reconstruct(maps, experiment, estimator=row.upper(), lmax_L=lmax, nthreads=nthreads)
        seconds = time.perf_counter() - start
        extra = {
            "estimator_transforms": result.settings["transforms"]["total"],
            "jacobi_iterations": result.settings["filter"].get("jacobi_iterations"),
        }
    elif row == "simulate":
        start = time.perf_counter()
        lensrec.simulate_sky(experiment, nside=nside, lmax=lmax, seed=1, nthreads=nthreads)
        seconds = time.perf_counter() - start
    elif row == "suite":
        start = time.perf_counter()
        sky = lensrec.simulate_sky(experiment, nside=nside, lmax=lmax, seed=1, nthreads=nthreads)
        lensrec.reconstruct(sky.maps, experiment, estimator="GMV", lmax_L=lmax, nthreads=nthreads)
        seconds = time.perf_counter() - start
    else:
        raise ValueError(f"unknown row {row!r}; rows: {ROWS}")
    unit = min(unit, spin2_synthesis_seconds(nside, lmax, nthreads, repeat=1))
    return {
        "row": row,
        "nside": nside,
        "lmax": lmax,
        "nthreads": nthreads,
        "seconds": seconds,
        "spin2_synthesis_s": unit,
        "syntheses": seconds / unit,
        "peak_rss_mb": peak_rss_mb(),
        **extra,
    }


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true", help="nside 512, lmax 1000")
    parser.add_argument("--nside", type=int, default=None)
    parser.add_argument("--lmax", type=int, default=None)
    parser.add_argument("--nthreads", type=int, default=2)
    parser.add_argument("--rows", default=",".join(ROWS))
    parser.add_argument("--one", default=None, help=argparse.SUPPRESS)  # internal: run one row, print JSON
    args = parser.parse_args()
    nside, lmax = (512, 1000) if args.quick else (2048, 3000)
    nside = args.nside or nside
    lmax = args.lmax or lmax
    if args.one:
        print("RESULT " + json.dumps(run_row(args.one, nside, lmax, args.nthreads)))
        return 0
    rows = []
    for row in [r.strip() for r in args.rows.split(",") if r.strip()]:
        command = [sys.executable, __file__, "--one", row, "--nside", str(nside), "--lmax", str(lmax)]
        command += ["--nthreads", str(args.nthreads)]
        done = subprocess.run(command, capture_output=True, text=True)
        lines = [line for line in done.stdout.splitlines() if line.startswith("RESULT ")]
        if done.returncode or not lines:
            print(done.stdout, done.stderr, file=sys.stderr)
            return 1
        rows.append(json.loads(lines[-1][len("RESULT ") :]))
        print(rows[-1], flush=True)
    name = "end_to_end" if (nside, lmax) == (2048, 3000) else f"end_to_end_{nside}_{lmax}"
    report(name, rows)
    return 0


if __name__ == "__main__":
    sys.exit(main())
