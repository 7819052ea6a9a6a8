"""Iterative EB reconstruction on simulations against the analytic iterative noise (docs/validation.md).

Run:  .venv/bin/python docs/iterative_validation.py [--nside 256] [--sims 4] [--iterations 1] [--depth 0.5]

For each simulation (full sky, white noise, 1' beam, l_max = 2 nside) it reconstructs phi with the quadratic
EB estimator and with ``lensing_iterations`` steps of the iterative one, corrects each estimate's response
with the mean cross/input of the OTHER simulations (leave-one-out, per L band), and measures the noise as the
power of phi_hat/R_MC - phi_input. It writes docs/iterative_validation.json and docs/iterative_validation.png.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import time

import numpy as np

BANDS = ((30, 60), (60, 100), (100, 150), (150, 200), (200, 300), (300, 401))


def run(nside=256, sims=4, iterations=1, depth=0.5, seed=2027, nthreads=2, progress=print):
    import healpy as hp

    import lensrec
    from lensrec.harmonics import truncate_alm

    lmax = 2 * nside
    experiment = lensrec.Experiment(
        name="iterative validation",
        noise_temperature=depth / math.sqrt(2.0),
        noise_polarization=depth,
        beam_fwhm=1.0,
        ell_min=2,
        ell_max_temperature=lmax,
        ell_max_polarization=lmax,
    )
    forecast = lensrec.iterative_reconstruction_noise(
        experiment, estimators="EB", components="gradient", lmax_L=lmax, nthreads=nthreads
    )
    quadratic_n0 = np.array(forecast.quadratic_n0["EB"]["gradient"])
    converged_n0 = np.array(forecast.n0["EB"]["gradient"])
    cross = {"quadratic": [], "iterative": []}
    auto_in, estimates, inputs, seconds = [], {"quadratic": [], "iterative": []}, [], []
    step_n0 = None
    for index in range(sims):
        began = time.perf_counter()
        sky = lensrec.simulate_sky(experiment, nside=nside, lmax=lmax, seed=seed, index=index, nthreads=nthreads)
        phi = truncate_alm(sky.phi_alm, lmax, sky.lmax_unlensed)
        quadratic = lensrec.reconstruct(sky.maps, experiment, estimator="EB", lmax_L=lmax, nthreads=nthreads)
        iterated = lensrec.reconstruct(
            sky.maps, experiment, estimator="EB", lmax_L=lmax, nthreads=nthreads, lensing_iterations=iterations
        )
        step_n0 = np.array(iterated.settings["n0_per_iteration"][-1]["gradient"])
        inputs.append(phi)
        auto_in.append(hp.alm2cl(phi))
        for name, result in (("quadratic", quadratic), ("iterative", iterated)):
            estimates[name].append(result.phi_alm)
            cross[name].append(hp.alm2cl(result.phi_alm, phi))
        seconds.append(time.perf_counter() - began)
        progress(f"simulation {index}: {seconds[-1]:.0f} s")

    def band(values, lo, hi):
        return float(np.nansum(values[lo:hi]))

    out = {"nside": nside, "lmax": lmax, "depth_uK_arcmin": depth, "sims": sims, "lensing_iterations": iterations}
    out["bands"] = [list(b) for b in BANDS]
    out["forecast_gain_converged"] = [band(quadratic_n0, *b) / band(converged_n0, *b) for b in BANDS]
    out["forecast_gain_after_steps"] = [band(quadratic_n0, *b) / band(step_n0, *b) for b in BANDS]
    for name in ("quadratic", "iterative"):
        responses, noises, raw = [], [], []
        for index in range(sims):
            others = [i for i in range(sims) if i != index]
            response = [
                sum(band(cross[name][i], *b) for i in others) / sum(band(auto_in[i], *b) for i in others) for b in BANDS
            ]
            own = [band(cross[name][index], *b) / band(auto_in[index], *b) for b in BANDS]
            ell = lensrec.harmonics.ell_of_alm(lmax)
            scale = np.ones(lmax + 1)
            for (lo, hi), value in zip(BANDS, response, strict=True):
                scale[lo:hi] = 1.0 / value
            corrected = estimates[name][index] * scale[ell]
            residual = hp.alm2cl(corrected - inputs[index])
            noises.append([band(residual, *b) for b in BANDS])
            responses.append([o / r for o, r in zip(own, response, strict=True)])
            raw.append(own)
        out[name] = {
            "raw_response": np.mean(raw, axis=0).tolist(),
            "response_after_correction": np.mean(responses, axis=0).tolist(),
            "response_after_correction_per_sim": responses,
            "noise": np.mean(noises, axis=0).tolist(),
        }
    out["analytic"] = {
        "quadratic": [band(quadratic_n0, *b) for b in BANDS],
        "iterative_converged": [band(converged_n0, *b) for b in BANDS],
        "iterative_after_steps": [band(step_n0, *b) for b in BANDS],
    }
    measured_gain = [q / i for q, i in zip(out["quadratic"]["noise"], out["iterative"]["noise"], strict=True)]
    out["measured_gain"] = measured_gain
    out["fraction_of_forecast_gain"] = [
        (m - 1.0) / (f - 1.0) for m, f in zip(measured_gain, out["forecast_gain_converged"], strict=True)
    ]
    out["noise_over_analytic_iterative"] = [
        n / a for n, a in zip(out["iterative"]["noise"], out["analytic"]["iterative_converged"], strict=True)
    ]
    # held out: the response over L = 30-400 calibrated on the first half of the simulations, applied to
    # the second half (no simulation is both calibrated and tested)
    half = sims // 2
    whole = (30, 401)
    for name in ("quadratic", "iterative"):
        calibration = sum(band(cross[name][i], *whole) for i in range(half)) / sum(
            band(auto_in[i], *whole) for i in range(half)
        )
        tested = sum(band(cross[name][i], *whole) for i in range(half, sims)) / sum(
            band(auto_in[i], *whole) for i in range(half, sims)
        )
        out[name]["held_out_response_30_400"] = tested / calibration
        out[name]["raw_response_30_400"] = calibration
    out["measured_gain_30_400"] = sum(out["quadratic"]["noise"]) / sum(out["iterative"]["noise"])
    out["forecast_gain_30_400_after_steps"] = sum(out["analytic"]["quadratic"]) / sum(
        out["analytic"]["iterative_after_steps"]
    )
    out["forecast_gain_30_400_converged"] = sum(out["analytic"]["quadratic"]) / sum(
        out["analytic"]["iterative_converged"]
    )
    out["noise_over_analytic_after_steps_30_400"] = sum(out["iterative"]["noise"]) / sum(
        out["analytic"]["iterative_after_steps"]
    )
    out["noise_over_analytic_converged_30_400"] = sum(out["iterative"]["noise"]) / sum(
        out["analytic"]["iterative_converged"]
    )
    out["seconds_per_simulation"] = seconds
    return out


def figure(result, path):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    centers = [0.5 * (lo + hi) for lo, hi in result["bands"]]
    fig, (top, bottom) = plt.subplots(2, 1, figsize=(7, 6), sharex=True)
    for name, style in (("quadratic", "o-"), ("iterative", "s-")):
        top.plot(centers, result[name]["noise"], style, label=f"measured, {name}")
    top.plot(centers, result["analytic"]["quadratic"], "k--", label="analytic N0, quadratic")
    top.plot(centers, result["analytic"]["iterative_converged"], "k:", label="analytic N0, iterative (converged)")
    top.set_yscale("log")
    top.set_ylabel(r"$\sum_{L\in\mathrm{band}} N_L$  (C$_L^{\phi\phi}$ units)")
    top.legend(fontsize=8)
    for name, style in (("quadratic", "o-"), ("iterative", "s-")):
        bottom.plot(centers, result[name]["raw_response"], style, label=f"cross/input before correction, {name}")
    bottom.axhline(1.0, color="k", lw=0.8)
    bottom.set_ylabel("cross / input")
    bottom.set_xlabel("lensing multipole L")
    bottom.legend(fontsize=8)
    fig.suptitle(
        f"EB, nside {result['nside']}, {result['depth_uK_arcmin']} µK-arcmin, {result['sims']} simulations, "
        f"{result['lensing_iterations']} lensing iteration(s)",
        fontsize=9,
    )
    fig.savefig(path, dpi=110)


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--nside", type=int, default=256)
    parser.add_argument("--sims", type=int, default=4)
    parser.add_argument("--iterations", type=int, default=1)
    parser.add_argument("--depth", type=float, default=0.5)
    parser.add_argument("--nthreads", type=int, default=2)
    args = parser.parse_args()
    result = run(args.nside, args.sims, args.iterations, args.depth, nthreads=args.nthreads)
    here = os.path.dirname(os.path.abspath(__file__))
    stem = os.path.join(here, f"iterative_validation_nside{args.nside}_it{args.iterations}")
    with open(stem + ".json", "w") as handle:
        json.dump(result, handle, indent=1)
    figure(result, stem + ".png")
    print(json.dumps({k: v for k, v in result.items() if k not in ("quadratic", "iterative")}, indent=1))


if __name__ == "__main__":
    main()
