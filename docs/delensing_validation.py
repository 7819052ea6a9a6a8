"""Delensing on simulations: the B-mode reuse bias, its treatments, and the template methods.

Run from the repository root (about 25 minutes for 8 simulations on 2 busy cores)::

    LMAXS=767 .venv/bin/python docs/delensing_validation.py 8

Full-sky simulations at nside 256 of the shipped deep patch's noise and beam (1.0 / 1.4 µK-arcmin, 1')
cut at l = LMAXS (default 512; 767 = 3 nside - 1 in docs/validation.md), seed 500, indices 0 … n-1. Each is
reconstructed with TT+TE+EE (no B modes), MV (B modes reused) and MV without the B modes at l <= 300
("MV_excl"), and delensed with each template method; A_lens^res is measured over 30 <= l <= 300 on the
observed B modes with the noise power subtracted ("apparent") and on the simulation's noise-free lensed B
modes ("true"), against the forecast of lensrec.delensing_forecast for the same band limits and N0.
Writes docs/delensing_validation_nside256.json. The checks are tests/test_delensing_validation.py.
"""

import json
import os
import sys
import time

import numpy as np

import lensrec
from lensrec import delensing
from lensrec.delensing_bias import exclude_delensed_b
from lensrec.harmonics import truncate_alm

NSIDE, LMAX, ELLMIN, ELLD = 256, int(os.environ.get("LMAXS", 512)), 30, 300
METHODS = ("first_order", "remap", "remap_delensed_e")


def main(n):
    s = lensrec.fiducial_spectra()
    exp = lensrec.load_experiment("deep_highland").replace(
        ell_max_temperature=LMAX, ell_max_polarization=LMAX, sky_fraction=1.0
    )
    cases = {"TT+TE+EE": exp, "MV": exp, "MV_excl": exclude_delensed_b(exp, ELLD)}
    noise_bb = exp.noise_spectrum("B", LMAX)
    forecast = {}
    for key, source in cases.items():
        label = "MV" if key.startswith("MV") else key
        noise = lensrec.reconstruction_noise(source, s, estimators=(label,), lmax_L=LMAX)
        n0 = np.full(s.lmax + 1, np.inf)
        n0[: LMAX + 1] = noise.n0[label]["gradient"]
        forecast[key] = lensrec.delensing_forecast(exp, s, n0=n0, lmax=ELLD).alens_residual
    rows = []
    for i in range(n):
        start = time.time()
        sky = lensrec.simulate_sky(exp, s, nside=NSIDE, lmax=LMAX, seed=500, index=i, nthreads=2)
        e_wf, b_obs, _ = delensing.template_inputs(sky.maps, exp, s, lmax=LMAX, nthreads=2)
        lensed_b = np.array(sky.lensed_alm[2])
        if sky.lmax > LMAX:
            lensed_b = truncate_alm(lensed_b, LMAX, sky.lmax)
        row = {}
        for key, source in cases.items():
            label = "MV" if key.startswith("MV") else key
            rec = lensrec.reconstruct(sky.maps, source, s, estimator=label, lmax=LMAX, lmax_L=LMAX, nthreads=2)
            phi_wf = delensing.wiener_filter_phi(rec.phi_alm, np.array(rec.n0["gradient"]), s.phi)
            for method in METHODS:
                template = delensing.lensing_b_template(e_wf, phi_wf, LMAX, method=method, nthreads=2)
                apparent = delensing.delensing_spectra(b_obs, template, noise_bb=noise_bb, ell_min=ELLMIN, ell_max=ELLD)
                true = delensing.delensing_spectra(lensed_b, template, ell_min=ELLMIN, ell_max=ELLD)
                row[f"{key}|{method}"] = {
                    "apparent": apparent.alens_residual,
                    "true": true.alens_residual,
                    "removed": true.efficiency_in_range(ELLMIN, ELLD),
                }
        rows.append(row)
        print(i, round(time.time() - start, 1), flush=True)
    document = {"lmax": LMAX, "nside": NSIDE, "alens_range": [ELLMIN, ELLD], "forecast": forecast, "rows": rows}
    with open(
        os.path.join(os.path.dirname(os.path.abspath(__file__)), f"delensing_validation_nside{NSIDE}.json"), "w"
    ) as f:
        json.dump(document, f, indent=1)
    for key in rows[0]:
        for what in ("apparent", "true", "removed"):
            values = np.array([row[key][what] for row in rows])
            print(key, what, f"{values.mean():.3f} ± {values.std(ddof=1) / np.sqrt(len(values)):.3f}")
        print(key, "forecast", f"{forecast[key.split('|')[0]]:.3f}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 2)
