"""Cost of the position-space quadratic estimators in units of one ducc0 spin-2 HEALPix synthesis.

    python benchmarks/bench_reconstruction.py [--quick] [--nthreads N] [--lmax-L L] [--estimators TT,EB,MV]

Size: nside 2048 with ℓ_max = 3000 (``--quick``: nside 512, ℓ_max = 1000), L_max = ℓ_max unless given. Rows, all
measured in this run against the spin-2 synthesis (E, B → Q, U at that nside and ℓ_max; the faster of a
measurement before and one after the rows, since the machine's load drifts):

  * each estimator (TT, TE, EE, TB, EB) and MV (the five, sharing their legs) from filtered fields: wall and
    CPU time, the split into leg syntheses / products / spin-1 analyses, and the transform count against the
    minimum for the position-space form (one synthesis per distinct (field, ℓ-weight, |spin|) leg, one spin-1
    analysis per estimator; see lensrec.reconstruction);
  * the isotropic filter of (T, Q, U) maps at that nside (HEALPix analysis with 3 Jacobi iterations);
  * the normalization (exact full-sky responses, N0 and MV weights, lensrec.reconstruction_noise);
  * the peak RSS of the process.

Filtered fields are Gaussian with the lensed spectra (the cost does not depend on their values).
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from benchmarks._common import peak_rss_mb, report, spin2_synthesis_seconds  # noqa: E402

# The fewest transforms of the position-space form, one input (lensrec.reconstruction docstring): distinct legs
# (field, l-weight, |spin|) + one spin-1 analysis per estimator (lensed weights, C^BB != 0).
MINIMUM = {"TT": 2 + 1, "EE": 3 + 1, "TB": 3 + 1, "TE": 5 + 1, "EB": 6 + 1, "MV": 11 + 5}


def spin2_synthesis_cpu_seconds(nside: int, lmax: int, nthreads: int, repeat: int = 2) -> float:
    """CPU time (all threads) of one spin-2 HEALPix synthesis: steadier than wall time on a shared machine."""
    from lensrec import harmonics

    rng = np.random.default_rng(0)
    size = harmonics.nalm(lmax)
    alm = rng.normal(size=(2, size)) + 1j * rng.normal(size=(2, size))
    best = np.inf
    for _ in range(repeat):
        start = time.process_time()
        harmonics.alm2map(alm, nside, lmax, spin=2, nthreads=nthreads)
        best = min(best, time.process_time() - start)
    return best


def timed(function):
    start, start_cpu = time.perf_counter(), time.process_time()
    value = function()
    return value, time.perf_counter() - start, time.process_time() - start_cpu


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true", help="nside 512, lmax 1000 (a smoke run)")
    parser.add_argument("--nthreads", type=int, default=2)
    parser.add_argument("--lmax-L", dest="lmax_L", type=int, default=None, help="highest L (default: lmax)")
    parser.add_argument("--estimators", default="TT,TE,EE,TB,EB,MV", help="rows to time (default: %(default)s)")
    parser.add_argument("--skip-filter", action="store_true", help="do not time the map filter")
    parser.add_argument(
        "--workspace-mb", type=float, default=None, help="memory per block of rings (default: lensrec's, 1024 MB)"
    )
    args = parser.parse_args()

    import lensrec
    from lensrec import harmonics
    from lensrec.filtering import FilteredFields, IsotropicFilter
    from lensrec.reconstruction import BASE_ESTIMATORS, quadratic_estimates
    from lensrec.sky import gaussian_cmb_alm

    nside, lmax = (512, 1000) if args.quick else (2048, 3000)
    lmax_L = lmax if args.lmax_L is None else args.lmax_L
    nthreads = args.nthreads
    labels = [label.strip() for label in args.estimators.split(",")]
    spectra = lensrec.fiducial_spectra()
    experiment = lensrec.Experiment(
        name="Benchmark Survey",
        noise_temperature=1.0,
        beam_fwhm=1.5,
        ell_min=2,
        ell_max_temperature=lmax,
        ell_max_polarization=lmax,
    )
    unit = spin2_synthesis_seconds(nside, lmax, nthreads, repeat=2)
    unit_cpu = spin2_synthesis_cpu_seconds(nside, lmax, nthreads)

    signal = spectra.cmb(lensed=True)
    alm = gaussian_cmb_alm(
        {k: v[: lmax + 1] for k, v in signal.items()}, lmax, np.random.default_rng(1), nthreads=nthreads
    )
    fields = FilteredFields(alm, lmax, {k: v[: lmax + 1] for k, v in signal.items()})
    del alm

    rows = []
    for label in labels:
        estimators = BASE_ESTIMATORS if label == "MV" else (label,)
        result, seconds, cpu = timed(
            lambda estimators=estimators: quadratic_estimates(
                fields, estimators=estimators, lmax_L=lmax_L, nthreads=nthreads, workspace_mb=args.workspace_mb
            )
        )
        settings = result.settings
        del result
        split = settings["seconds"]
        rows.append(
            {
                "row": f"estimator {label}",
                "workspace_mb": args.workspace_mb or 1024,
                "nside": nside,
                "lmax": lmax,
                "lmax_L": lmax_L,
                "nthreads": nthreads,
                "seconds": seconds,
                "cpu_seconds": cpu,
                "transforms": settings["transforms"]["total"],
                "minimum_transforms": MINIMUM[label],
                "syntheses": settings["transforms"]["synthesis"],
                "analyses": settings["transforms"]["analysis_spin1"],
                "products": settings["products"],
                "grid": "x".join(map(str, settings["grid"])),
                "ring_blocks": settings["ring_blocks"],
                "legs_s": split["legs"],
                "products_s": split["products"],
                "analysis_s": split["analysis"],
                "peak_rss_mb": peak_rss_mb(),
            }
        )

    _, noise_seconds, noise_cpu = timed(
        lambda: lensrec.reconstruction_noise(experiment, lmax_L=lmax_L, nthreads=nthreads)
    )
    rows.append(
        {
            "row": "normalization (responses, N0, MV weights)",
            "seconds": noise_seconds,
            "cpu_seconds": noise_cpu,
            "peak_rss_mb": peak_rss_mb(),
        }
    )
    if not args.skip_filter:
        maps = harmonics.alm2map_tqu(fields.wiener_alm(), nside, lmax, nthreads=nthreads)
        filt = IsotropicFilter(experiment, spectra, nthreads=nthreads)
        _, filter_seconds, filter_cpu = timed(lambda: filt.filter(maps))
        del maps
        rows.append(
            {
                "row": "isotropic filter of T, Q, U maps (3 Jacobi iterations)",
                "seconds": filter_seconds,
                "cpu_seconds": filter_cpu,
                "peak_rss_mb": peak_rss_mb(),
            }
        )

    unit = min(unit, spin2_synthesis_seconds(nside, lmax, nthreads, repeat=1))
    unit_cpu = min(unit_cpu, spin2_synthesis_cpu_seconds(nside, lmax, nthreads, repeat=1))
    for row in rows:
        row["spin2_synthesis_s"] = unit
        row["ratio"] = row["seconds"] / unit
        row["cpu_ratio"] = row["cpu_seconds"] / unit_cpu
        for key in ("legs_s", "products_s", "analysis_s"):
            if key in row:
                row[key.replace("_s", "_in_units")] = row.pop(key) / unit
    report("reconstruction_quick" if args.quick else "reconstruction", rows)
    return 0


if __name__ == "__main__":
    sys.exit(main())
