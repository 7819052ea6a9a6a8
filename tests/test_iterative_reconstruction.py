"""Iterative reconstruction of maps (lensrec.iterative_reconstruction): the inverse remap, bad input, the
iteration's bookkeeping and its surfaces. The physics on simulations (response, noise against the forecast)
is in tests marked validate and docs/validation.md."""

from __future__ import annotations

import threading

import healpy as hp
import numpy as np
import pytest

import lensrec
from lensrec.harmonics import truncate_alm
from lensrec.iterative_reconstruction import (
    b_mode_self_term,
    check_lensing_iterations,
    inverse_deflection,
    iterate_reconstruction,
)
from lensrec.lensed_spectra import first_order_lensed_bb

NSIDE, LMAX = 64, 128


@pytest.fixture(scope="module")
def deep():
    return lensrec.Experiment(
        name="deep test", noise_temperature=0.5, noise_polarization=0.7, beam_fwhm=1.0, ell_min=2,
        ell_max_temperature=LMAX, ell_max_polarization=LMAX,
    )  # fmt: skip


@pytest.fixture(scope="module")
def sky(deep):
    return lensrec.simulate_sky(deep, nside=NSIDE, lmax=LMAX, seed=11, index=0, nthreads=2)


def test_inverse_deflection_undoes_the_lensing(sky):
    # Remapping with the inverse deflection restores the unlensed field (Carron & Lewis 2017, PRD 96, 063510);
    # -grad(phi) does so only to first order, leaving the (d.grad)d term (order of the lensing B power itself).
    lmax_in = LMAX + 100
    unlensed = truncate_alm(sky.unlensed_alm[1:], lmax_in, sky.lmax_unlensed)
    phi = truncate_alm(sky.phi_alm, lmax_in, sky.lmax_unlensed)
    lensed = lensrec.lens_alm(unlensed, phi, lmax_in, spin=2, lmax_in=lmax_in, nthreads=2)
    lensing_b = hp.alm2cl(lensed[1])[20:LMAX].sum()

    phi_inv, curl_inv = inverse_deflection(phi, nthreads=2)
    delensed = lensrec.lens_alm(lensed, phi_inv, LMAX, spin=2, lmax_in=lmax_in, curl_alm=curl_inv, nthreads=2)
    naive = lensrec.lens_alm(lensed, -phi, LMAX, spin=2, lmax_in=lmax_in, nthreads=2)
    exact_left = hp.alm2cl(delensed[1])[20:LMAX].sum() / lensing_b
    naive_left = hp.alm2cl(naive[1])[20:LMAX].sum() / lensing_b
    assert exact_left < 0.01  # the band edge leaves a few per mille
    assert naive_left > 3 * exact_left
    # the inverse deflection is -grad(phi) plus a small correction with a curl part
    assert np.allclose(phi_inv, -phi, atol=0.05 * np.abs(phi).max())
    assert 0 < np.abs(curl_inv).max() < 0.05 * np.abs(phi).max()


def test_self_term_is_the_convolution_over_the_b_filter():
    # epsilon_l = K[C^EE, C^phiphi N/(C^phiphi + N)]_l / C^BB_tot,l (first-order template, Namikawa 2017,
    # PRD 95, 103514): assembled from the first-order convolution (checked against camb and a flat-sky route
    # elsewhere) over the B filter, and its limits.
    s = lensrec.fiducial_spectra()
    lmax = 300
    n0 = np.full(lmax + 1, 1e-8)
    total = np.array(s.lensed["BB"][: lmax + 1]) + 1e-6
    eps = b_mode_self_term(s.lensed["EE"], n0, s.phi, total, lmax)
    residual = s.phi[: lmax + 1] * 1e-8 / (s.phi[: lmax + 1] + 1e-8)
    residual[:2] = 0
    ee = np.array(s.lensed["EE"][: lmax + 1])
    ee[:2] = 0
    np.testing.assert_allclose(eps[2:], first_order_lensed_bb(ee, residual, lmax, ell_margin=0)[2:] / total[2:])
    assert np.all((eps >= 0) & (eps < 1))
    # no reconstruction (infinite noise): nothing delensed, nothing to undo
    none = b_mode_self_term(s.lensed["EE"], np.full(lmax + 1, np.inf), s.phi, total, lmax)
    assert np.all(none == 0)


def test_bad_lensing_iterations_name_the_value(sky, deep):
    with pytest.raises(ValueError, match="lensing_iterations must be >= 0.*got -1"):
        check_lensing_iterations(-1, "EB")
    with pytest.raises(TypeError, match="non-negative integer, got 1.5"):
        check_lensing_iterations(1.5, "EB")
    with pytest.raises(ValueError, match="lensing_iterations=2 needs an estimator with an iterative form.*'TT'"):
        lensrec.reconstruct(sky.maps, deep, estimator="TT", lensing_iterations=2)
    with pytest.raises(ValueError, match="full sky.*mask"):
        lensrec.reconstruct(sky.maps, deep, estimator="EB", lensing_iterations=1, mask=np.ones(sky.maps.shape[1]))
    assert check_lensing_iterations(0, "GMV") == 0  # the quadratic estimator needs no iterative form


def test_zero_iterations_is_the_quadratic_estimate(sky, deep):
    quadratic = lensrec.reconstruct(sky.maps, deep, estimator="EB", nthreads=2)
    same = iterate_reconstruction(sky.maps, deep, estimator="EB", lensing_iterations=0, nthreads=2)
    np.testing.assert_allclose(same.phi_alm, quadratic.phi_alm, rtol=1e-12, atol=1e-30)
    assert same.settings["lensing_iterations"] == 0 and len(same.settings["n0_per_iteration"]) == 1


def test_iterations_record_every_step_report_progress_and_stop_on_cancel(sky, deep):
    calls = []
    result = lensrec.reconstruct(
        sky.maps, deep, estimator="EB", lensing_iterations=2, nthreads=2, progress=lambda d, t: calls.append((d, t))
    )
    assert calls == [(1, 3), (2, 3), (3, 3)]
    steps = result.settings["n0_per_iteration"]
    assert result.settings["lensing_iterations"] == 2 and len(steps) == 3
    # every step's analytic noise is below the quadratic one (less lensing B in the filter)
    assert all(np.nanmax(np.array(step["gradient"][2:]) / np.array(steps[0]["gradient"][2:])) < 1 for step in steps[1:])
    np.testing.assert_array_equal(result.n0["gradient"][2:], steps[-1]["gradient"][2:])
    assert np.all(np.isfinite(result.phi_alm)) and result.phi_alm[0] == 0
    stop = threading.Event()
    stop.set()
    cancelled = lensrec.reconstruct(sky.maps, deep, estimator="EB", lensing_iterations=3, nthreads=2, cancel=stop)
    assert cancelled.settings["cancelled"] and cancelled.settings["lensing_iterations"] == 0


def test_suite_settings_and_task_take_lensing_iterations(deep, tmp_path):
    from lensrec.suite_settings import _stage_settings
    from lensrec.suite_tasks import lensing_simulation_task

    settings = lensrec.lensing_suite_settings(
        deep, nside=NSIDE, lmax=LMAX, lmax_L=100, estimators="EB", n_sims=4, lmax_margin=64, lensing_iterations=1
    )
    assert settings["lensing_iterations"] == 1
    quadratic = lensrec.lensing_suite_settings(deep, nside=NSIDE, lmax=LMAX, lmax_L=100, estimators="EB", n_sims=4)
    assert "lensing_iterations" not in quadratic  # quadratic suites keep their fingerprints
    with pytest.raises(ValueError, match="estimator 'TT' has none"):
        lensrec.lensing_suite_settings(deep, nside=NSIDE, lmax=LMAX, estimators="TT", lensing_iterations=1)
    with pytest.raises(ValueError, match="without N1 pairs"):
        lensrec.lensing_suite_settings(deep, nside=NSIDE, lmax=LMAX, estimators="EB", n1=True, lensing_iterations=1)
    out = lensing_simulation_task(_stage_settings(settings, "simulations", str(tmp_path)), 0)
    iterated = out["auto_gradient_EB"]
    assert iterated.shape == out["phi_input"].shape and np.all(np.isfinite(iterated))
    direct = lensrec.reconstruct(
        lensrec.simulate_sky(deep, nside=NSIDE, lmax=LMAX, seed=settings["seed"], index=0, lmax_margin=64,
                             nthreads=1).maps,
        deep, estimator="EB", lmax_L=100, lmax=LMAX, nthreads=1, lensing_iterations=1,
    )  # fmt: skip
    np.testing.assert_allclose(iterated, direct.phi_alm, rtol=1e-6, atol=1e-6 * np.abs(direct.phi_alm).max())
