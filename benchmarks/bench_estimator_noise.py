"""Cost of the exact full-sky responses and N0 of the quadratic estimators, and the speed-up over 3j sums.

    python benchmarks/bench_estimator_noise.py [--quick] [--nthreads N]

Rows, all measured in this run (best of 3 unless noted):
  * all five estimators + MV, gradient and curl, full N0 covariance, lmax = lmax_L = 3000;
  * one estimator alone (EB; gradient + curl, and gradient only — the workbench slider case), and TT;
  * the speed-up over a direct Wigner-3j sum at lmax = lmax_L = 200 for the TT gradient response and N0: the
    fast path is timed for all L; the direct sum (3j symbols from ``wigners``, the reference library the
    tests use, and numpy sums over (l1, l2)) is timed on every 10th L and scaled to all 199 L by the
    measured mean cost per L (its cost per L grows smoothly with L, so even sampling is unbiased);
  * the peak RSS of the process.
``--quick`` uses lmax 1000 and a direct-sum size of 60.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from benchmarks._common import best_time, peak_rss_mb, report  # noqa: E402


def direct_tt_sum(L, C, inverse, lmax):
    """TT gradient R_L and N_L by brute force: OH03 Table I with 3j symbols from wigners."""
    import wigners

    ell = np.arange(lmax + 1)
    table = np.zeros((lmax + 1, lmax + 1))
    for l1 in range(2, lmax + 1):
        for l2 in range(max(2, abs(l1 - L)), min(lmax, l1 + L) + 1):
            if (l1 + L + l2) % 2 == 0:
                table[l1, l2] = wigners.wigner_3j(l1, L, l2, 0, 0, 0)
    norm = np.sqrt((2 * ell[:, None] + 1) * (2 * L + 1) * (2 * ell[None, :] + 1) / (16 * np.pi))
    bracket = L * (L + 1) + ell[None, :] * (ell[None, :] + 1) - ell[:, None] * (ell[:, None] + 1)
    F = bracket * norm * table
    f = C[:, None] * F.T + C[None, :] * F
    weight = f * inverse[:, None] * inverse[None, :]
    R = np.sum(weight * f) / (2 * (2 * L + 1))
    return R, 1.0 / R


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true", help="small sizes for a smoke run")
    parser.add_argument("--nthreads", type=int, default=2, help="threads (default: %(default)s)")
    args = parser.parse_args()

    import lensrec
    from lensrec.estimator_noise import reconstruction_noise

    lmax = 1000 if args.quick else 3000
    lmax_direct = 60 if args.quick else 200
    spectra = lensrec.fiducial_spectra()
    experiment = lensrec.Experiment(
        name="bench", noise_temperature=1.0, beam_fwhm=1.0, ell_max_temperature=lmax, ell_max_polarization=lmax
    )
    rows = []

    def timed(label, repeat=3, **kwargs):
        reconstruction_noise(experiment, spectra, nthreads=args.nthreads, **kwargs)  # warm caches (GL nodes)
        seconds = best_time(lambda: reconstruction_noise(experiment, spectra, nthreads=args.nthreads, **kwargs), repeat)
        result = reconstruction_noise(experiment, spectra, nthreads=args.nthreads, **kwargs)
        rows.append(
            {
                "case": label,
                "lmax": lmax,
                "lmax_L": lmax,
                "nthreads": args.nthreads,
                "seconds": seconds,
                "wigner_series": result.settings["wigner_series"],
                "projections": result.settings["projections"],
                "peak_rss_mb": peak_rss_mb(),
            }
        )
        return seconds

    t_all = timed("TT,TE,EE,TB,EB,MV gradient+curl with covariance")
    t_eb = timed("EB gradient+curl", estimators=("EB",))
    t_eb_grad = timed("EB gradient only", estimators=("EB",), components=("gradient",))
    t_tt = timed("TT gradient+curl", estimators=("TT",))

    # side by side at a small size: fast path (all L) against the direct 3j sum (sampled L, scaled)
    small = lensrec.Experiment(
        name="bench-direct",
        noise_temperature=1.0,
        beam_fwhm=5.0,
        ell_max_temperature=lmax_direct,
        ell_max_polarization=lmax_direct,
    )
    fast_kwargs = {"estimators": ("TT",), "components": ("gradient",), "lmax_L": lmax_direct, "nthreads": args.nthreads}
    reconstruction_noise(small, spectra, **fast_kwargs)
    t_fast = best_time(lambda: reconstruction_noise(small, spectra, **fast_kwargs), 5)
    fast = reconstruction_noise(small, spectra, **fast_kwargs)
    C = spectra.cmb(lensed=True)["TT"][: lmax_direct + 1]
    total = small.total_spectra(spectra, lmax_direct)["TT"]
    inverse = np.where(np.isfinite(total), 1.0 / total, 0.0)
    sampled = list(range(2, lmax_direct + 1, 10))
    start = time.perf_counter()
    worst = 0.0
    for L in sampled:
        _, n0 = direct_tt_sum(L, C, inverse, lmax_direct)
        worst = max(worst, abs(fast.n0["TT"]["gradient"][L] / n0 - 1))
    t_direct = (time.perf_counter() - start) / len(sampled) * (lmax_direct - 1)
    rows.append(
        {
            "case": "TT gradient, direct 3j sum (sampled L, scaled to all L)",
            "lmax": lmax_direct,
            "lmax_L": lmax_direct,
            "seconds": t_direct,
            "sampled_L": len(sampled),
            "peak_rss_mb": peak_rss_mb(),
        }
    )
    rows.append(
        {
            "case": "TT gradient, fast path (all L)",
            "lmax": lmax_direct,
            "lmax_L": lmax_direct,
            "seconds": t_fast,
            "speedup_over_direct": t_direct / t_fast,
            "max_rel_difference_n0": worst,
            "peak_rss_mb": peak_rss_mb(),
        }
    )
    report("estimator_noise", rows)
    print(
        f"\nall estimators + MV + curl at lmax {lmax}: {t_all:.3f} s; EB alone {t_eb:.3f} s "
        f"(gradient only {t_eb_grad:.3f} s); TT alone {t_tt:.3f} s; nthreads={args.nthreads}"
    )
    print(
        f"direct 3j sum at lmax {lmax_direct}: {t_direct:.1f} s vs fast {t_fast * 1e3:.1f} ms "
        f"-> speed-up {t_direct / t_fast:.0f}x (max N0 difference {worst:.1e}); peak RSS {peak_rss_mb():.0f} MB"
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())
