"""Normalization bias of the TT estimator with lensed and with lensed-gradient weights, on noise-free simulations.

Each simulation: Gaussian unlensed T, E, B to lmax + margin and a Gaussian φ (fiducial spectra), lensed by exact
remapping on a Gauss–Legendre grid (:func:`lensrec.remapping.lens_tqu_alm`), filtered in harmonic space by the
isotropic noise-free filter (lensed C^TT), reconstructed with the TT estimator. The bias is the binned
cross-spectrum of the normalized estimate with the input φ over the input auto-spectrum, minus 1, averaged
over simulations; the error is the scatter of the per-simulation ratio over the simulations (or, for one
simulation, none). These are simulations of an ideal noise-free full-sky survey.

    python benchmarks/gradient_weights_bias.py --lmax 3000 --sims 2 --nthreads 2
"""

from __future__ import annotations

import argparse
import time

import numpy as np

import lensrec
from lensrec.filtering import IsotropicFilter
from lensrec.reconstruction import reconstruct_filtered
from lensrec.remapping import lens_tqu_alm
from lensrec.sky import gaussian_alm, gaussian_cmb_alm

EDGES = (30, 100, 300, 600, 1000)


def _binned_ratio(estimate, truth, lmax_L):
    ell = lensrec.harmonics.ell_of_alm(lmax_L)
    m = np.repeat(np.arange(lmax_L + 1), np.arange(lmax_L + 1, 0, -1))  # healpy layout: m-major
    weight = np.where(m == 0, 1.0, 2.0)
    cross = (estimate * truth.conj()).real * weight
    auto = np.abs(truth) ** 2 * weight
    out = []
    for low, high in zip(EDGES[:-1], EDGES[1:], strict=True):
        sel = (ell >= low) & (ell < high)
        out.append(cross[sel].sum() / auto[sel].sum())
    return np.array(out)


def measure(lmax=3000, margin=1000, sims=2, seed=7, nthreads=2, progress=print):
    """Per-simulation binned cross/input ratios {weights: array (sims, bins)} for lensed and gradient weights."""
    spectra = lensrec.fiducial_spectra()
    lmax_in, lmax_L = lmax + margin, EDGES[-1]
    experiment = lensrec.Experiment(
        name="noise-free check", noise_temperature=0.0, beam_fwhm=0.0,
        ell_max_temperature=lmax, ell_max_polarization=lmax,
    )  # fmt: skip
    field_filter = IsotropicFilter(experiment, spectra, lmax=lmax, nthreads=nthreads)
    noise = {
        w: lensrec.reconstruction_noise(experiment, spectra, estimators="TT", lmax_L=lmax_L, weights=w)
        for w in ("lensed", "gradient")
    }
    unlensed = spectra.cmb(lensed=False)
    ratios = {w: [] for w in noise}
    start = time.perf_counter()
    for index in range(sims):
        rng = np.random.default_rng(seed + index)
        teb = gaussian_cmb_alm({k: unlensed[k][: lmax_in + 1] for k in unlensed}, lmax_in, rng, nthreads)
        phi = gaussian_alm(spectra.phi, lmax_in, rng, nthreads)
        lensed = lens_tqu_alm(teb, phi, lmax, lmax_in=lmax_in, nthreads=nthreads)
        fields = field_filter.filter_alm(lensed)
        truth = lensrec.harmonics.truncate_alm(phi, lmax_L, lmax_in)
        for w in noise:
            result = reconstruct_filtered(
                fields, experiment, spectra=spectra, estimator="TT", lmax_L=lmax_L, noise=noise[w], weights=w,
                nthreads=nthreads,
            )  # fmt: skip
            ratios[w].append(_binned_ratio(result.phi_alm, truth, lmax_L))
        if progress:
            progress(f"simulation {index + 1}/{sims} done after {time.perf_counter() - start:.0f} s")
    return {w: np.array(values) for w, values in ratios.items()}


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--lmax", type=int, default=3000)
    parser.add_argument("--margin", type=int, default=1000)
    parser.add_argument("--sims", type=int, default=2)
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--nthreads", type=int, default=2)
    args = parser.parse_args()
    ratios = measure(args.lmax, args.margin, args.sims, args.seed, args.nthreads)
    lmax, lmax_in = args.lmax, args.lmax + args.margin
    print(f"lmax {lmax}, lensed to lmax_in {lmax_in}, {args.sims} noise-free full-sky simulations, TT estimator")
    for w, values in ratios.items():
        values = np.array(values)
        mean = values.mean(axis=0) - 1.0
        error = values.std(axis=0, ddof=1) / np.sqrt(len(values)) if len(values) > 1 else np.full(mean.size, np.nan)
        cells = ", ".join(
            f"L {lo}-{hi}: {100 * m:+.2f} ± {100 * e:.2f}%"
            for lo, hi, m, e in zip(EDGES[:-1], EDGES[1:], mean, error, strict=True)
        )
        print(f"{w:>9} weights: cross/input − 1 = {cells}")
    difference = (np.array(ratios["gradient"]) - np.array(ratios["lensed"])).mean(axis=0)
    cells = ", ".join(
        f"L {lo}-{hi}: {100 * d:+.3f}%" for lo, hi, d in zip(EDGES[:-1], EDGES[1:], difference, strict=True)
    )
    print(f"gradient − lensed (same simulations): {cells}")


if __name__ == "__main__":
    main()
