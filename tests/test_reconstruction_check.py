"""The per-band reconstruction check: its Gaussian errors match the scatter of simulated spectra, ρ matches
its Wiener expectation, and binned theory lies on the theory curve."""

from types import SimpleNamespace

import healpy
import numpy as np
import pytest

from lensrec import power
from lensrec.reconstruction_check import check_reconstruction

LMAX = 300
EDGES = np.unique(np.geomspace(8, LMAX + 1, 13).astype(int))


def _spectra(fiducial):
    L = np.arange(LMAX + 1, dtype=float)
    theory = np.where(L >= 2, fiducial.phi[: LMAX + 1], 0.0)
    n0 = np.where(L >= 2, 1.5 * theory[10] * (L / 10.0) ** 0.5 * (L >= 2), 0.0)  # noise crossing the signal
    return theory, n0


def _gaussian_alm(cl, rng):
    # a_lm in healpy's ordering: real for m = 0 with variance C_l, complex for m > 0 with ⟨|a_lm|²⟩ = C_l
    ell, m = healpy.Alm.getlm(LMAX)
    sigma = np.sqrt(np.asarray(cl)[ell])
    alm = (rng.standard_normal(ell.size) + 1j * rng.standard_normal(ell.size)) * sigma / np.sqrt(2.0)
    alm[m == 0] = rng.standard_normal(int(np.sum(m == 0))) * sigma[m == 0]
    return alm


def _realization(theory, n0, rng_seed: int):
    # a Gaussian input and a reconstruction = input + independent Gaussian noise of power N0
    rng = np.random.default_rng(rng_seed)
    phi = _gaussian_alm(theory, rng)
    estimate = phi + _gaussian_alm(n0, rng)
    return SimpleNamespace(
        cross=healpy.alm2cl(estimate, phi), input_auto=healpy.alm2cl(phi), auto=healpy.alm2cl(estimate), n0=n0
    )


def test_errors_match_the_scatter_and_rho_its_wiener_expectation(fiducial):
    theory, n0 = _spectra(fiducial)
    pulls_auto, pulls_response, rho, expected = [], [], [], None
    for seed in range(24):
        check = check_reconstruction(_realization(theory, n0, 100 + seed), theory, EDGES)
        pulls_auto.append((check.auto_minus_bias - check.theory) / check.auto_error)
        pulls_response.append((check.response - 1.0) / check.response_error)
        rho.append(check.rho)
        expected = check.rho_expected
    pulls_auto, pulls_response = np.concatenate(pulls_auto), np.concatenate(pulls_response)
    # Knox (1995) errors: unit-variance pulls. With ~290 pulls the sample std is known to ~5%; the bands'
    # non-Gaussian tails (few modes at low L) add a little: 0.8–1.2 (a 30% error in σ fails).
    assert 0.8 < np.std(pulls_auto) < 1.2, np.std(pulls_auto)
    assert 0.8 < np.std(pulls_response) < 1.2, np.std(pulls_response)
    assert abs(np.mean(pulls_auto)) < 0.25 and abs(np.mean(pulls_response)) < 0.25  # unbiased within ~4σ/√n
    # ρ of an estimate = truth + independent noise is √(C/(C+N)) (Wiener correlation); the mean over 24
    # realizations agrees to a few percent (its scatter per band is ≲ 0.05 at the lowest L)
    np.testing.assert_allclose(np.mean(rho, axis=0), expected, atol=0.03)
    assert expected[0] > expected[-1]  # the noise grows with L here: the correlation falls


def test_binned_theory_lies_on_the_theory_curve(fiducial):
    # binning the plotted quantity [L(L+1)]² C_L/2π: each band's value lies between the curve's extremes in the
    # band (within rounding), and the mode-weighted mean of a straight line is its value at the band's L_eff
    theory, n0 = _spectra(fiducial)
    check = check_reconstruction(SimpleNamespace(cross=theory, input_auto=theory, auto=theory + n0, n0=n0),
                                 theory, EDGES)  # fmt: skip
    curve = power.spectrum_scale("lensing", LMAX + 1) * theory
    for b, (low, high) in enumerate(zip(EDGES[:-1], EDGES[1:], strict=True)):
        inside = curve[low:high]
        assert inside.min() * (1 - 1e-12) <= check.theory[b] <= inside.max() * (1 + 1e-12)
    # spectra equal to their expectations: the debiased bands are the binned theory, the response is one and
    # ρ is its expectation, in every band (to rounding)
    np.testing.assert_allclose(check.auto_minus_bias, check.theory, rtol=1e-10)
    np.testing.assert_allclose(check.response, 1.0, rtol=1e-12)
    np.testing.assert_allclose(check.rho, check.rho_expected, rtol=1e-12)


def test_errors_scale_with_the_sky_fraction_and_n1_is_subtracted(fiducial):
    theory, n0 = _spectra(fiducial)
    data = _realization(theory, n0, 7)
    full = check_reconstruction(data, theory, EDGES)
    quarter = check_reconstruction(data, theory, EDGES, sky_fraction=0.25)
    np.testing.assert_allclose(quarter.auto_error, 2.0 * full.auto_error, rtol=1e-12)  # σ ∝ 1/√f (Knox 1995)
    n1 = 0.1 * theory
    with_n1 = check_reconstruction(data, theory, EDGES, n1=n1)
    scale = power.bin_spectrum(n1, EDGES, weights="modes", scale="lensing")[1]
    # a difference of two binned spectra: equal to rounding of the larger auto-spectrum (1e-8 relative)
    np.testing.assert_allclose(full.auto_minus_bias - with_n1.auto_minus_bias, scale, rtol=1e-8)
    assert with_n1.subtracted == ("N0", "N1") and np.all(with_n1.rho_expected < full.rho_expected)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [({"sky_fraction": 0.0}, "sky_fraction"), ({"sky_fraction": 1.5}, "sky_fraction"), ({"edges": [0, 10]}, "edges")],
)
def test_bad_input_is_refused(fiducial, kwargs, message):
    theory, n0 = _spectra(fiducial)
    data = SimpleNamespace(cross=theory, input_auto=theory, auto=theory + n0, n0=n0)
    arguments = {"edges": EDGES, **kwargs}
    with pytest.raises(ValueError, match=message):
        check_reconstruction(data, theory, **arguments)
