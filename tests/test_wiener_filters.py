"""Wiener filters of the delensing inputs: φ^WF and E^WF weights, the observed-map route (against healpy),
and bad input."""

import healpy
import numpy as np
import pytest

import lensrec
from lensrec import wiener_filters
from lensrec.harmonics import nalm
from lensrec.sky import gaussian_alm


@pytest.fixture(scope="module")
def small_phi():
    rng = np.random.default_rng(3)
    return 1e-5 * (rng.normal(size=nalm(30)) + 1j * rng.normal(size=nalm(30)))


def test_wiener_filter_phi_weights(fiducial):
    # φ^WF = C^φφ/(C^φφ + N0) φ̂ (Smith et al. 2012, JCAP 06, 014, the Wiener filter of a reconstruction)
    lmax = 50
    n0 = np.linspace(1e-8, 1e-6, lmax + 1)
    n0[:2] = np.nan
    n0[40:] = np.inf
    phi_hat = np.ones(nalm(lmax), complex)
    out = wiener_filters.wiener_filter_phi(phi_hat, n0, fiducial.phi)
    ell = lensrec.harmonics.ell_of_alm(lmax)
    signal = fiducial.phi[ell]
    expected = np.where((ell >= 2) & (ell < 40), signal / (signal + n0[ell]), 0.0)
    assert np.allclose(out, expected, rtol=1e-14, atol=0)  # numerical precision


def test_wiener_filter_phi_with_n1_reaches_the_forecast_residual_only_with_the_true_noise(fiducial):
    # φ̂ = φ + n with noise power N = N0 + N1: the residual φ − φ^WF has power C(1 − ρ²) = C N/(C + N) exactly
    # when the filter uses N (Smith et al. 2012, JCAP 06, 014); with N0 alone it is larger. Checked on a
    # Gaussian realization: the mode-weighted mean ratio over L = 2…300 scatters by √(2/#modes) ≈ 0.5%.
    lmax = 300
    rng = np.random.default_rng(5)
    signal = fiducial.phi[: lmax + 1]
    n0 = signal.copy()
    n1 = signal.copy()
    n0[:2], n1[:2] = np.nan, np.nan
    phi = gaussian_alm(signal, lmax, rng)
    noise = gaussian_alm(np.nan_to_num(n0 + n1), lmax, rng)
    L = np.arange(lmax + 1)
    expected = (signal * (n0 + n1) / (signal + n0 + n1))[2:]

    def residual(**kwargs):
        out = wiener_filters.wiener_filter_phi(phi + noise, n0, fiducial.phi, **kwargs)
        power = healpy.alm2cl(phi - out)
        return np.sum((2 * L[2:] + 1) * power[2:] / expected) / np.sum(2 * L[2:] + 1)  # mode-weighted mean ratio

    assert abs(residual(n1=n1) - 1) < 0.02  # 6 sigma of the realization's scatter
    assert residual() > 1.06  # N0 alone over-weights the noisy φ̂: (1/4 + 2/4)/(2/3) = 1.125 expected
    with pytest.raises(ValueError, match="n1 must have the shape of n0"):
        wiener_filters.wiener_filter_phi(phi, n0, fiducial.phi, n1=n1[:-1])


def test_wiener_filter_e_removes_the_beam_and_weights_by_signal_over_total(fiducial):
    # E^WF = C^EE/(C^EE + N^EE) E / b_l for full-sky isotropic noise (Smith et al. 2012); checked on the
    # coefficients of a beam-convolved E directly
    experiment = lensrec.load_experiment("deep_highland")
    lmax = 300
    e_alm = gaussian_alm(fiducial.lensed["EE"], lmax, np.random.default_rng(2))
    beam = experiment.beam(lmax)
    observed = lensrec.harmonics.scale_alm(e_alm, beam)
    out = wiener_filters.wiener_filter_e(observed, experiment, fiducial)
    noise = experiment.noise_spectrum("E", lmax)
    signal = fiducial.lensed["EE"][: lmax + 1]
    factor = np.where(np.isfinite(noise), signal / (signal + noise), 0.0)
    factor[:2] = 0.0
    assert np.allclose(out, lensrec.harmonics.scale_alm(e_alm, factor), rtol=1e-12, atol=0)
    assert np.all(out[lensrec.harmonics.ell_of_alm(lmax) < experiment.ell_min] == 0)  # cut multipoles


def test_wiener_filter_phi_input_errors(small_phi, fiducial):
    phi_alm = small_phi
    n0 = np.full(31, 1e-7)
    n0[:2] = np.nan
    with pytest.raises(ValueError, match="n0 must cover exactly the L range of phi_alm"):
        wiener_filters.wiener_filter_phi(phi_alm, n0[:-1], fiducial.phi)
    bad = n0.copy()
    bad[10] = np.nan
    with pytest.raises(ValueError, match="n0 is NaN at L = 10"):
        wiener_filters.wiener_filter_phi(phi_alm, bad, fiducial.phi)
    bad[10] = -1.0
    with pytest.raises(ValueError, match="non-negative"):
        wiener_filters.wiener_filter_phi(phi_alm, bad, fiducial.phi)
    with pytest.raises(ValueError, match="phi_spectrum has 20 entries"):
        wiener_filters.wiener_filter_phi(phi_alm, n0, fiducial.phi[:20])
    with pytest.raises(TypeError, match="n0 must be a numeric array"):
        wiener_filters.wiener_filter_phi(phi_alm, None, fiducial.phi)


def test_template_inputs_match_healpy_analysis(fiducial):
    # Reference: healpy.map2alm (with the Jacobi iterations of the lensrec filter's analysis) of the same maps,
    # divided by the beam; E Wiener-filtered with C^EE/(C^EE + N^EE) (Smith et al. 2012), B in sky units, both zero outside the
    # polarization cuts. Tolerance: healpy and ducc0 agree to ~1e-10 of the largest coefficient.
    experiment = lensrec.Experiment(
        name="small",
        noise_temperature=3.0,
        beam_fwhm=30.0,
        ell_min=4,
        ell_max_temperature=120,
        ell_max_polarization=100,
    )
    sky = lensrec.simulate_sky(experiment, nside=64, lmax=150, lmax_margin=50, seed=4, nthreads=1)
    e_wiener, b_observed, fields = wiener_filters.template_inputs(sky.maps, experiment, fiducial, lmax=120, nthreads=1)
    iterations = fields.settings["jacobi_iterations"]  # the filter's map analysis, as healpy's iter
    reference = healpy.map2alm(np.array(sky.maps), lmax=120, iter=iterations, use_weights=False)
    ell = lensrec.harmonics.ell_of_alm(120)
    beam = experiment.beam(120)[ell]
    noise = experiment.noise_spectrum("E", 120)[ell]
    signal = fiducial.lensed["EE"][ell]
    inside = np.isfinite(noise)  # the cuts exclude l < 4, where signal + noise could vanish
    factor = np.zeros(ell.size)
    factor[inside] = signal[inside] / (signal[inside] + noise[inside]) / beam[inside]
    expected_e = factor * reference[1]
    expected_b = np.where(inside, reference[2] / beam, 0.0)
    assert np.allclose(e_wiener, expected_e, rtol=0, atol=1e-9 * np.abs(expected_e).max())
    assert np.allclose(b_observed, expected_b, rtol=0, atol=1e-9 * np.abs(expected_b).max())
    assert fields.lmax == 120 and not fields.masked
    with pytest.raises(ValueError, match="maps must have shape \\(3, npix\\)"):
        wiener_filters.template_inputs(sky.maps[1:], experiment, fiducial)
    with pytest.raises(ValueError, match="exceeds 3\\*nside-1"):
        wiener_filters.template_inputs(sky.maps, experiment, fiducial, lmax=200)
