"""Suite throughput from the cost of one index: its simulation task and its two mixed pairs, before and after
symmetrizing the pairs in one pass.

    python benchmarks/bench_suite_pairs.py [--quick] [--estimator MV]

One index of a lensing suite simulates and filters a sky and reconstructs it (the "simulation" task), then
forms two symmetrized mixed pairs φ̂{d, s_i} and φ̂{s_{i−1}, s_i} (the "pairs" task, for RDN0). A mixed pair
used to be two calls, φ̂[a, b] and φ̂[b, a]; it is now one pass (``symmetrize=True``: each input's legs
synthesized once, one analysis per estimator). Sims per minute = 60 / (simulation task + 2 pairs), at nside
512, ℓ_max 1000, L_max 1000 (``--quick``: nside 128, ℓ_max 256). Results: benchmarks/results/suite_pairs.json.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from benchmarks._common import peak_rss_mb, report, spin2_synthesis_seconds  # noqa: E402


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--estimator", default="MV")
    parser.add_argument("--nthreads", type=int, default=2)
    args = parser.parse_args()

    import lensrec
    from lensrec.filtering import IsotropicFilter
    from lensrec.reconstruction import reconstruct_filtered

    nside, lmax = (128, 256) if args.quick else (512, 1000)
    nthreads = args.nthreads
    estimator = args.estimator
    experiment = lensrec.Experiment(
        name="Benchmark Survey", noise_temperature=1.0, beam_fwhm=4.0, ell_min=2,
        ell_max_temperature=lmax, ell_max_polarization=lmax,
    )  # fmt: skip
    spectra = lensrec.fiducial_spectra()
    noise = lensrec.reconstruction_noise(experiment, spectra, lmax_L=lmax, nthreads=nthreads)
    unit = spin2_synthesis_seconds(nside, lmax, nthreads, repeat=2)
    joint = estimator == "GMV"
    filt = IsotropicFilter(experiment, spectra, joint=joint, nthreads=nthreads)

    start = time.perf_counter()
    skies = [lensrec.simulate_sky(experiment, spectra, nside=nside, lmax=lmax, seed=3, index=i, nthreads=nthreads)
             for i in range(2)]  # fmt: skip
    fields = [filt.filter(sky.maps) for sky in skies]
    reconstruct_filtered(fields[1], experiment, spectra=spectra, estimator=estimator, noise=noise, nthreads=nthreads)
    simulation_task = (time.perf_counter() - start) / 2 + 0.0  # two skies simulated and filtered, one estimate
    a, b = fields
    common = dict(spectra=spectra, estimator=estimator, noise=noise, nthreads=nthreads)

    start = time.perf_counter()
    forward = reconstruct_filtered(a, experiment, second=b, **common)
    backward = reconstruct_filtered(b, experiment, second=a, **common)
    two_calls = time.perf_counter() - start
    start = time.perf_counter()
    one_pass = reconstruct_filtered(a, experiment, second=b, symmetrize=True, **common)
    one_pass_seconds = time.perf_counter() - start
    difference = np.max(np.abs(one_pass.phi_alm - 0.5 * (forward.phi_alm + backward.phi_alm)))
    unit = min(unit, spin2_synthesis_seconds(nside, lmax, nthreads, repeat=1))
    rows = []
    for name, pair in (("two calls (before)", two_calls), ("one pass (after)", one_pass_seconds)):
        per_index = simulation_task + 2 * pair
        rows.append(
            {
                "pairs": name,
                "estimator": estimator,
                "nside": nside,
                "lmax": lmax,
                "pair_seconds": pair,
                "pair_in_syntheses": pair / unit,
                "simulation_task_seconds": simulation_task,
                "sims_per_minute": 60.0 / per_index,
                "max_abs_difference": float(difference),
                "peak_rss_mb": peak_rss_mb(),
            }
        )
    report("suite_pairs_quick" if args.quick else "suite_pairs", rows)
    return 0


if __name__ == "__main__":
    sys.exit(main())
