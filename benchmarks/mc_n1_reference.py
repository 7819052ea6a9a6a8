"""Make the Monte-Carlo N1 reference that tests/test_analytic_n1.py compares the analytic N1 with.

Noise-free N1 pairs of lensrec's suites (lensrec.suites.n1_pair_estimates: a_i lensed by φ_i, the second CMB
lensed by φ_i and by the independent φ_{i+1}; eq. 3 of lensrec.biases) for TT and EB, gradient and curl, at
nside 256, lmax 512, lmax_L 400 (deep_highland filter), binned as plain means over L in
[20, 50, 100, 150, 200, 300, 400). Per-simulation spectra are cached in --work (resumable), the reference is
written to tests/data/mc_n1_reference.json.

    .venv/bin/python benchmarks/mc_n1_reference.py --n-sims 32 --work /tmp/n1mc

32 simulations took about 15 CPU-minutes (single thread each).
"""

from __future__ import annotations

import argparse
import json
import os

import numpy as np

SETTINGS = dict(
    experiment="deep_highland",
    nside=256,
    lmax=512,
    lmax_L=400,
    estimators=("TT", "EB"),
    seed=11,
    n1=True,
    noise=False,
    lmax_margin=256,
    nthreads=1,
)
EDGES = (20, 50, 100, 150, 200, 300, 400)
OUT = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "tests", "data", "mc_n1_reference.json")


def simulation_spectra(settings: dict, index: int, work: str) -> dict:
    """C_L of the two N1 pair estimates of simulation ``index`` (cached as sim<index>.npz in ``work``)."""
    import healpy

    from lensrec.suites import n1_pair_estimates

    path = os.path.join(work, f"sim{index}.npz")
    if not os.path.exists(path):
        spectra = {key: healpy.alm2cl(value) for key, value in n1_pair_estimates(settings, index).items()}
        np.savez(path, **spectra)
    with np.load(path, allow_pickle=False) as stored:
        return {key: stored[key] for key in stored.files}


def main() -> None:
    import lensrec

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n-sims", type=int, default=32)
    parser.add_argument("--work", required=True, help="folder for the per-simulation spectra (resumable)")
    parser.add_argument("--out", default=OUT)
    args = parser.parse_args()
    os.makedirs(args.work, exist_ok=True)
    settings = lensrec.lensing_suite_settings(**SETTINGS, n_sims=max(4, args.n_sims))
    sims = [simulation_spectra(settings, i, args.work) for i in range(args.n_sims)]
    reference = {"settings": {**SETTINGS, "n_sims": args.n_sims}, "edges": list(EDGES), "n1": {}, "error": {}}
    for estimator in SETTINGS["estimators"]:
        for component in ("gradient", "curl"):
            rows = []
            for spectra in sims:
                n1 = 2.0 * (
                    spectra[f"n1_shared_{component}_{estimator}"] - spectra[f"n1_independent_{component}_{estimator}"]
                )
                rows.append([n1[lo:hi].mean() for lo, hi in zip(EDGES[:-1], EDGES[1:], strict=True)])
            rows = np.array(rows)
            key = f"{estimator}/{component}"
            reference["n1"][key] = rows.mean(axis=0).tolist()
            reference["error"][key] = (rows.std(axis=0, ddof=1) / np.sqrt(len(rows))).tolist()
    os.makedirs(os.path.dirname(args.out), exist_ok=True)
    with open(args.out, "w") as handle:
        json.dump(reference, handle, indent=1)
    print(f"wrote {args.out} from {args.n_sims} simulations")


if __name__ == "__main__":
    main()
