"""Power spectra of a_lm: healpy's alm2cl as the reference, binning, and the mask-moment corrections.

References: healpy (``alm2cl``, ``synalm``, ``map2alm``) as the reference library; Hivon et al. 2002, ApJ 567,
2 (pseudo-C_l of masked fields, f_sky ~ <w^2>) for the mask corrections.
"""

import doctest

import healpy as hp
import numpy as np
import pytest

import lensrec
from lensrec import harmonics, power
from lensrec.power import (
    auto_spectrum,
    bin_spectrum,
    binned_cross_spectrum,
    cross_spectrum,
    mask_corrected,
    mask_moment_order,
)


def random_alm(rng, lmax):
    alm = rng.normal(size=harmonics.nalm(lmax)) + 1j * rng.normal(size=harmonics.nalm(lmax))
    alm[: lmax + 1] = alm[: lmax + 1].real  # m = 0 entries of a real field are real
    return alm


def test_docstring_examples_run():
    assert doctest.testmod(power).failed == 0


def test_cross_and_auto_spectra_match_healpy(rng):
    a, b = random_alm(rng, 40), random_alm(rng, 40)
    # healpy.alm2cl is the reference definition (same sum over m = -l..l); double-precision rounding only
    assert np.allclose(cross_spectrum(a, b), hp.alm2cl(a, b), rtol=1e-12, atol=0)
    assert np.allclose(auto_spectrum(a), hp.alm2cl(a), rtol=1e-12, atol=0)
    assert np.allclose(cross_spectrum(a, b), cross_spectrum(b, a), rtol=1e-13, atol=0)


def test_cross_spectrum_of_different_band_limits_uses_the_common_range(rng):
    a, b = random_alm(rng, 30), random_alm(rng, 45)
    b_cut = harmonics.truncate_alm(b, 30)
    assert np.allclose(cross_spectrum(a, b), hp.alm2cl(a, b_cut), rtol=1e-12, atol=0)  # healpy reference
    assert cross_spectrum(a, b, lmax=20).shape == (21,)
    with pytest.raises(ValueError, match="lmax must be <= 30"):
        cross_spectrum(a, b, lmax=31)


def test_binning_is_the_weighted_mean_in_half_open_bins():
    cl = np.arange(11, dtype=float) ** 2
    centers, values = bin_spectrum(cl, [2, 5, 11])
    # direct numpy means over l = 2..4 and 5..10 (the definition of a half-open bin average)
    assert np.allclose(values, [np.mean(cl[2:5]), np.mean(cl[5:11])])
    assert np.allclose(centers, [3.0, 7.5])
    weights = 2 * np.arange(11) + 1.0
    _, weighted = bin_spectrum(cl, [2, 5], weights)
    assert np.isclose(weighted[0], np.sum(weights[2:5] * cl[2:5]) / np.sum(weights[2:5]))


def test_nan_entries_are_skipped_on_request_and_spectra_bin_along_the_last_axis():
    cl = np.arange(10, dtype=float)
    cl[3] = np.nan
    # a NaN makes its bin undefined unless it is skipped; then the bin is the mean of the other entries
    assert np.isnan(bin_spectrum(cl, [0, 5, 10])[1][0])
    centers, values = bin_spectrum(cl, [0, 5, 10], skip_nan=True)
    assert values.tolist() == [np.mean([0.0, 1.0, 2.0, 4.0]), 7.0] and centers[0] == 1.75
    stacked = bin_spectrum(np.vstack([np.arange(10.0), 2 * np.arange(10.0)]), [0, 5, 10])[1]
    assert stacked.tolist() == [[2.0, 7.0], [4.0, 14.0]]
    with pytest.raises(ValueError, match="scale must be None, 'cmb', 'lensing'"):
        bin_spectrum(np.ones(10), [0, 5], scale="dl")


def test_binned_theory_stays_on_the_plotted_curve(fiducial):
    # Bin the plotted quantity [L(L+1)]^2 C_L^phiphi/2pi, (2L+1)-weighted (common practice: bin what you plot):
    # a weighted mean of the curve over a band lies between the curve's extremes in that band, and the
    # binning matrix gives the same numbers. Averaging C_L first and multiplying by the factor of the band
    # center instead lands far above the curve where the factor varies across the band (L = 2-33: 27x).
    phi = fiducial.phi[:300]
    L = np.arange(300.0)
    curve = (L * (L + 1)) ** 2 * phi / (2 * np.pi)
    edges = [2, 34, 100, 300]
    centers, binned = bin_spectrum(phi, edges, weights="modes", scale="lensing")
    for (low, high), value in zip(zip(edges[:-1], edges[1:]), binned):
        assert curve[low:high].min() <= value <= curve[low:high].max()
    assert np.allclose(power.binning_matrix(edges, 300, weights="modes", scale="lensing") @ phi, binned, rtol=1e-12)
    # the D_l convention the same way: l(l+1) C_l/2pi
    d_ell = bin_spectrum(fiducial.lensed["BB"][:300], edges, scale="cmb")[1]
    assert np.allclose(d_ell, [np.mean(L[lo:hi] * (L[lo:hi] + 1) * fiducial.lensed["BB"][lo:hi]) / (2 * np.pi)
                               for lo, hi in zip(edges[:-1], edges[1:])], rtol=1e-12)  # fmt: skip
    # the error this guards against
    wrong = bin_spectrum(phi, edges, weights="modes")[1] * (centers * (centers + 1)) ** 2 / (2 * np.pi)
    assert wrong[0] > 10 * curve[2:34].max()


@pytest.mark.parametrize(
    "edges, message",
    [
        ([5], "at least two"),
        ([5, 3], "increase strictly"),
        ([0, 20], r"lie in \[0, 11\]"),
        ([0.5, 3], "integer"),
    ],
)
def test_bad_edges_are_refused(edges, message):
    with pytest.raises(ValueError, match=message):
        bin_spectrum(np.ones(11), edges)


def test_bad_spectrum_inputs_are_refused(rng):
    with pytest.raises(ValueError, match="not \\(lmax\\+1\\)\\(lmax\\+2\\)/2"):
        cross_spectrum(np.ones(7, complex))
    with pytest.raises(ValueError, match="non-finite"):
        cross_spectrum(np.full(6, np.nan, complex))
    with pytest.raises(ValueError, match="first must be one of"):
        mask_moment_order("phi", "input")
    with pytest.raises(ValueError, match="lacks 'w3'"):
        mask_corrected(np.ones(3), {"w2": 0.5}, 3)


def test_mask_moment_orders():
    # p + q of the two fields' mask powers (module docstring): map x map, estimate x input, estimate x estimate
    assert mask_moment_order("map", "map") == 2
    assert mask_moment_order("estimate", "input") == 2
    assert mask_moment_order("estimate", "masked_input") == 3
    assert mask_moment_order("estimate", "estimate") == 4


@pytest.fixture(scope="module")
def masked_gaussian_field():
    """A Gaussian field with a smooth red spectrum on nside 128, and an apodized 50-degree cap (C2, 10 deg)."""
    nside, lmax = 128, 256
    ell = np.arange(lmax + 1)
    cl = np.zeros(lmax + 1)
    cl[2:] = 1.0 / (ell[2:] + 10.0) ** 2
    rng = np.random.default_rng(17)
    alm = lensrec.sky.gaussian_alm(cl, lmax, rng)
    field = harmonics.alm2map(alm, nside, lmax, nthreads=2)
    mask = lensrec.cap_mask(nside, 30.0, 40.0, 50.0, width=10.0)
    return cl, alm, field, mask, lmax


def test_masked_map_spectrum_over_w2_recovers_the_input_spectrum(masked_gaussian_field):
    cl, alm, field, mask, lmax = masked_gaussian_field
    moments = lensrec.sky_fraction_moments(mask)
    pseudo = hp.alm2cl(harmonics.map2alm(field * mask, lmax, nthreads=2))  # healpy-convention analysis
    truth = hp.alm2cl(alm)  # the realization's own full-sky spectrum: cancels most cosmic variance
    edges = np.arange(20, 201, 30)
    weights = 2 * np.arange(lmax + 1) + 1.0
    _, corrected = bin_spectrum(mask_corrected(pseudo, moments, mask_moment_order("map", "map")), edges, weights)
    ratio = corrected / bin_spectrum(truth, edges, weights)[1]
    # Hivon et al. 2002: <C~> ~ <w^2> C for a spectrum smooth over the mask kernel. Bound: 3 sigma with
    # sigma = sqrt(2 / ((2l+1) dl f_sky)) (cosmic variance of the masked part, f_sky = <w2>^2/<w4>, not
    # cancelled by dividing by the full-sky realization) plus 2% for the slope of 1/(l+10)^2 across the
    # mask's harmonic width (about 180/50 ~ 4 multipoles: (4/l)^2 at l = 20 is 4%, averaged over bins ~2%)
    for (low, high), value in zip(zip(edges[:-1], edges[1:], strict=True), ratio, strict=True):
        modes = np.sum(2 * np.arange(low, high) + 1)
        sigma = np.sqrt(2.0 / (modes * moments["sky_fraction_spectra"]))
        assert abs(value - 1.0) < 3 * sigma + 0.02, (low, value, sigma)


def test_cross_of_w2_weighted_field_with_the_unmasked_field_scales_as_w2(masked_gaussian_field):
    cl, alm, field, mask, lmax = masked_gaussian_field
    moments = lensrec.sky_fraction_moments(mask)
    weighted = harmonics.map2alm(field * mask**2, lmax, nthreads=2)  # a field carrying w^2, like an estimate
    edges = np.arange(20, 201, 30)
    _, ratio = binned_cross_spectrum(weighted, alm, edges, weights=2 * np.arange(lmax + 1) + 1.0)
    _, truth = binned_cross_spectrum(alm, None, edges, weights=2 * np.arange(lmax + 1) + 1.0)
    corrected = mask_corrected(ratio, moments, mask_moment_order("estimate", "input")) / truth
    # <w^2 f, f> = <w^2> C (Hivon et al. 2002 with windows w^2 and 1); same bound reasoning as above, with
    # the cross's variance ~ (1 + <w^4>/<w^2>^2)/2 relative, bounded here by the map case's f_sky
    for (low, high), value in zip(zip(edges[:-1], edges[1:], strict=True), corrected, strict=True):
        modes = np.sum(2 * np.arange(low, high) + 1)
        sigma = np.sqrt(2.0 / (modes * moments["sky_fraction_spectra"]))
        assert abs(value - 1.0) < 3 * sigma + 0.02, (low, value, sigma)
    # passing the mask itself gives the same moment as the recorded moments
    assert np.allclose(mask_corrected(ratio, mask, 2), mask_corrected(ratio, moments, 2), rtol=1e-12)


def test_the_kappa_scale_turns_the_phi_spectrum_into_the_kappa_spectrum(rng):
    # κ_LM = L(L+1) φ_LM / 2 (κ = −∇²φ/2, common practice), so C_L^κκ = [L(L+1)]² C_L^φφ / 4; reference
    # spectra from healpy.almxfl and healpy.alm2cl. Rounding tolerance.
    phi = random_alm(rng, 30)
    L = np.arange(31.0)
    kappa = hp.almxfl(phi, L * (L + 1) / 2)
    assert np.allclose(power.spectrum_scale("kappa", 31) * hp.alm2cl(phi), hp.alm2cl(kappa), rtol=1e-12, atol=0)
