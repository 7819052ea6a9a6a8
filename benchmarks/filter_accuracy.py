"""Accuracy of the isotropic filter's HEALPix analysis against Jacobi iterations and ducc0's pseudo-analysis.

    python benchmarks/filter_accuracy.py [--quick]

For each nside and ℓ_max/nside, a Gaussian sky with the fiducial lensed T, E, B spectra, band-limited at ℓ_max,
is synthesized on HEALPix and analyzed back with ``jacobi_iterations`` = 0 … 4 (lensrec.harmonics.map2alm,
healpy's scheme) and with ducc0's LSMR pseudo-analysis (``ducc0.sht.pseudo_analysis``) for a few iteration
caps. Reported per field (T, E, B), over 2 ≤ ℓ ≤ ℓ_max:

- ``transfer``: max over ℓ-bins of |t − 1|, t = Re Σ â a* / Σ |a|² over the bin's (ℓ, m) (bins of width
  max(16, ℓ_max/16); the filter's effective transfer, which scales each leg of a quadratic estimator and so
  its response);
- ``residual``: max_ℓ Σ_m |â − a|² / Σ_m |a|² (error power relative to the field's own power at ℓ);

and the cost in units of one spin-2 synthesis at that size (timed in the same run). The response of a
quadratic estimator is a product of two legs, so its error is at most about 2 × max transfer error of the
fields it uses (plus leakage terms bounded by the residual). Results go to benchmarks/results/filter_accuracy.json;
docs/filtering.md quotes them.
"""

from __future__ import annotations

import functools
import sys
import time

import numpy as np

import lensrec
from lensrec import harmonics

try:
    from _common import report, spin2_synthesis_seconds
except ImportError:  # run from the repository root
    sys.path.insert(0, __import__("os").path.dirname(__file__))
    from _common import report, spin2_synthesis_seconds


def metrics(estimate, truth, lmax):
    """Per field: the largest |binned transfer − 1| and the largest per-ℓ relative error power, ℓ ≥ 2."""
    ell = harmonics.ell_of_alm(lmax)
    weight = np.where(np.arange(ell.size) <= lmax, 1.0, 2.0)  # m = 0 first (healpy layout); m > 0 twice (±m)
    width = max(16, lmax // 16)
    edges = np.r_[np.arange(2, lmax + 1, width), lmax + 1]
    out = {}
    for k, name in enumerate("TEB"):
        a, b = truth[k], estimate[k]
        power = np.bincount(ell, weight * np.abs(a) ** 2, lmax + 1)
        cross = np.bincount(ell, weight * (b * np.conj(a)).real, lmax + 1)
        error = np.bincount(ell, weight * np.abs(b - a) ** 2, lmax + 1)
        # bins of width max(16, lmax/16): the estimator's response averages the transfer over many ℓ, and a
        # bin averages out the realization's chance correlation of the leaked error with the field
        transfer = np.add.reduceat(cross, edges[:-1]) / np.add.reduceat(power, edges[:-1])
        out[f"transfer_{name}"] = float(np.max(np.abs(transfer - 1.0)))
        out[f"residual_{name}"] = float(np.max(error[2:] / power[2:]))
    return out


def pseudo(maps, nside, lmax, maxiter, nthreads):
    import ducc0

    geometry = harmonics.healpix_geometry(nside)
    out = np.empty((3, harmonics.nalm(lmax)), dtype=np.complex128)
    t = ducc0.sht.pseudo_analysis(
        map=maps[:1], lmax=lmax, spin=0, maxiter=maxiter, epsilon=1e-12, nthreads=nthreads, **geometry
    )
    out[:1] = t[0]
    p = ducc0.sht.pseudo_analysis(
        map=maps[1:], lmax=lmax, spin=2, maxiter=maxiter, epsilon=1e-12, nthreads=nthreads, **geometry
    )
    out[1:] = p[0]
    return out


def main() -> None:
    quick = "--quick" in sys.argv
    nthreads = 2
    spectra = lensrec.fiducial_spectra()
    nsides = (64, 128) if quick else (128, 256, 512)
    ratios = (1.0, 1.5, 2.0, 2.5, 3.0)
    rows = []
    for nside in nsides:
        for ratio in ratios:
            lmax = min(int(round(ratio * nside)), 3 * nside - 1)
            rng = np.random.default_rng(nside + lmax)
            cl = spectra.cmb(lensed=True)
            truth = lensrec.sky.gaussian_cmb_alm({k: cl[k][: lmax + 1] for k in ("TT", "EE", "BB", "TE")}, lmax, rng)
            truth[:, harmonics.ell_of_alm(lmax) < 2] = 0.0
            maps = harmonics.alm2map_tqu(truth, nside, lmax, nthreads=nthreads, allow_high_lmax=True)
            unit = spin2_synthesis_seconds(nside, lmax, nthreads, repeat=2)
            methods = [(f"jacobi {n}", functools.partial(harmonics.map2alm_tqu, maps, lmax, n, nthreads, True))
                       for n in range(5)]  # cost: (1 + 2 n) spin-0 and spin-2 transforms  # fmt: skip
            methods += [(f"pseudo {n}", functools.partial(pseudo, maps, nside, lmax, n, nthreads)) for n in (3, 5, 10)]
            for method, analyze in methods:
                start = time.perf_counter()
                estimate = analyze()
                seconds = time.perf_counter() - start
                rows.append(
                    {
                        "nside": nside,
                        "lmax": lmax,
                        "lmax_over_nside": round(lmax / nside, 3),
                        "method": method,
                        "cost_syntheses": seconds / unit,
                        **metrics(estimate, truth, lmax),
                    }
                )
            print(f"nside {nside} lmax {lmax} done", flush=True)
    report("filter_accuracy_quick" if quick else "filter_accuracy", rows)


if __name__ == "__main__":
    main()
