"""Inverse-variance filtering: healpy as the reference transform, the Knox-form total spectra, cuts, Wiener
filter, masks and the filter protocol.

References: healpy (``alm2map``, ``map2alm`` with iter=3, use_weights=False) for the transforms; the filter
X / (b_l C_tot) of Okamoto & Hu 2003, PRD 67, 083002, §III with C_tot = lensed CMB + Knox (1995, PRD 52, 4307)
beam-deconvolved white noise (written out below independently of lensrec.experiment).
"""

import doctest
import math

import healpy as hp
import numpy as np
import pytest

import lensrec
from lensrec import filtering, harmonics
from lensrec.filtering import FieldFilter, FilteredFields, IsotropicFilter

NSIDE = 64
LMAX = 128


@pytest.fixture(scope="module")
def experiment():
    # distinct cuts for T and P so that per-field cuts are exercised
    return lensrec.Experiment(
        name="Filter Test Survey",
        noise_temperature=3.0,
        noise_polarization=5.0,
        beam_fwhm=20.0,
        ell_min=5,
        ell_max_temperature=100,
        ell_max_polarization=LMAX,
    )


@pytest.fixture(scope="module")
def observed(experiment):
    """Beam-convolved T, Q, U maps band-limited at LMAX, made with healpy, and their (T, E, B) coefficients."""
    spectra = lensrec.fiducial_spectra()
    rng = np.random.default_rng(4)
    cls = spectra.cmb(lensed=True)
    alm = lensrec.sky.gaussian_cmb_alm({k: v[: LMAX + 1] for k, v in cls.items()}, LMAX, rng)
    ell = np.arange(LMAX + 1)
    sigma = experiment.beam_fwhm * math.pi / 10800 / math.sqrt(8 * math.log(2))
    beam = np.exp(-0.5 * ell * (ell + 1) * sigma**2)
    beamed = np.array([hp.almxfl(a, beam) for a in alm])
    maps = hp.alm2map(beamed, NSIDE, lmax=LMAX, pol=True)
    return maps, beamed, beam


def knox_total(experiment, lmax):
    """C_tot = lensed CMB + (Delta pi/10800)^2 exp(l(l+1) sigma^2), inf outside [ell_min, ell_max] (Knox 1995)."""
    spectra = lensrec.fiducial_spectra().cmb(lensed=True)
    ell = np.arange(lmax + 1)
    sigma = experiment.beam_fwhm * math.pi / 10800 / math.sqrt(8 * math.log(2))
    out = {}
    for field, level, top in (
        ("T", experiment.noise_temperature, experiment.ell_max_temperature),
        ("E", experiment.noise_polarization, experiment.ell_max_polarization),
        ("B", experiment.noise_polarization, experiment.ell_max_polarization),
    ):
        total = spectra[field * 2][: lmax + 1] + (level * math.pi / 10800) ** 2 * np.exp(ell * (ell + 1) * sigma**2)
        total[(ell < experiment.ell_min) | (ell > top)] = np.inf
        out[field] = total
    return out


def test_docstring_examples_run():
    assert doctest.testmod(filtering).failed == 0


def test_filter_is_healpy_analysis_over_beam_times_total_spectrum(experiment, observed):
    maps, _, beam = observed
    total = knox_total(experiment, LMAX)
    ell = harmonics.ell_of_alm(LMAX)
    # "auto" picks one Jacobi step at lmax = 2 nside, nside 64 (lensrec.harmonics.jacobi_iterations_for)
    for iterations, requested in ((3, 3), (1, "auto"), (0, 0)):
        fields = IsotropicFilter(experiment, nthreads=2, jacobi_iterations=requested).filter(maps)
        assert fields.settings["jacobi_iterations"] == iterations
        reference = hp.map2alm(maps, lmax=LMAX, iter=iterations, use_weights=False, pol=True)  # healpy reference
        for k, field in enumerate("TEB"):
            expected = reference[k] / (beam[ell] * total[field][ell])
            # the same Jacobi analysis in double precision: agreement to rounding (1e-10 of the max)
            assert np.allclose(fields.alm[k], expected, rtol=0, atol=1e-10 * np.abs(expected).max()), field
    assert fields.lmax == LMAX and not fields.masked and fields.settings["filter"] == "isotropic"


def test_filter_zeroes_multipoles_outside_each_fields_cuts(experiment, observed):
    maps, _, _ = observed
    fields = IsotropicFilter(experiment, nthreads=2).filter(maps)
    ell = harmonics.ell_of_alm(LMAX)
    # docs/conventions.md: multipoles outside [ell_min, ell_max] of a field are not used by any filter
    assert np.all(fields.T[(ell < 5) | (ell > 100)] == 0)
    assert np.all(fields.E[ell < 5] == 0) and np.all(fields.B[ell < 5] == 0)
    assert np.any(fields.E[ell > 100] != 0)  # polarization keeps l up to 128
    assert np.all(fields.T[(ell >= 5) & (ell <= 100)] != 0)


def test_filter_alm_matches_the_map_path_and_the_formula(experiment, observed):
    maps, beamed, beam = observed
    filt = IsotropicFilter(experiment, nthreads=2)
    from_alm = filt.filter_alm(beamed)
    total = knox_total(experiment, LMAX)
    ell = harmonics.ell_of_alm(LMAX)
    for k, field in enumerate("TEB"):
        expected = beamed[k] / (beam[ell] * total[field][ell])
        assert np.allclose(from_alm.alm[k], expected, rtol=1e-13, atol=0)  # the defining formula, exactly
    # maps band-limited at 2 nside: the 3-step HEALPix analysis is not exact quadrature; its residual is of
    # order 1e-6 of the field amplitude (Gorski et al. 2005, §5); B is compared in units of the polarization
    # amplitude because the residual leaks E into the ~100x smaller B
    from_maps = IsotropicFilter(experiment, nthreads=2, jacobi_iterations=3).filter(maps)
    for k, field in enumerate("TEB"):
        inside = np.isfinite(total[field][ell])
        recovered = from_maps.alm[k][inside] * beam[ell][inside] * total[field][ell][inside]
        scale = np.abs(beamed[min(k, 1)]).max()
        assert np.allclose(recovered, beamed[k][inside], rtol=0, atol=1e-5 * scale), field
    # coefficients to a higher band limit are truncated first
    longer = np.zeros((3, harmonics.nalm(LMAX + 20)), complex)
    for k in range(3):
        longer[k] = hp.resize_alm(beamed[k], LMAX, LMAX, LMAX + 20, LMAX + 20)
    assert np.allclose(filt.filter_alm(longer).alm, from_alm.alm, rtol=1e-13, atol=0)


def test_wiener_filter_is_signal_over_signal_plus_noise(experiment, observed):
    _, beamed, beam = observed
    fields = IsotropicFilter(experiment, nthreads=2).filter_alm(beamed)
    signal = lensrec.fiducial_spectra().cmb(lensed=True)
    total = knox_total(experiment, LMAX)
    ell = harmonics.ell_of_alm(LMAX)
    for field in "TEB":
        k = "TEB".index(field)
        c = signal[field * 2][: LMAX + 1]
        gain = np.where(np.isfinite(total[field]), c / total[field], 0.0)  # C / (C + N), the Wiener filter
        expected = beamed[k] / beam[ell] * gain[ell]
        assert np.allclose(fields.wiener(field), expected, rtol=1e-12, atol=0), field
    assert np.allclose(fields.wiener_alm()[1], fields.wiener("E"))


def test_masked_filter_multiplies_the_maps_and_records_the_moments(experiment, observed):
    maps, _, beam = observed
    mask = lensrec.latitude_mask(NSIDE, 20.0, width=10.0)
    fields = IsotropicFilter(experiment, mask=mask, nthreads=2).filter(maps)
    iterations = fields.settings["jacobi_iterations"]
    reference = hp.map2alm(maps * mask, lmax=LMAX, iter=iterations, use_weights=False, pol=True)  # healpy
    total = knox_total(experiment, LMAX)
    ell = harmonics.ell_of_alm(LMAX)
    expected = reference[1] / (beam[ell] * total["E"][ell])
    assert np.allclose(fields.E, expected, rtol=0, atol=1e-10 * np.abs(expected).max())
    for order in (1, 2, 3, 4):  # <w^n> as direct numpy means over the sphere
        assert np.isclose(fields.mask_moments[f"w{order}"], np.mean(mask**order), rtol=1e-12)
    assert fields.masked


def test_binary_mask_is_apodized_on_request(experiment):
    binary = (lensrec.latitude_mask(NSIDE, 30.0) > 0).astype(float)
    filt = IsotropicFilter(experiment, mask=binary, apodization=8.0)
    assert np.allclose(filt.mask, lensrec.apodize_binary_mask(binary, 8.0))
    assert 0.0 < filt.mask_moments["w2"] < filt.mask_moments["w1"] < np.mean(binary)


def test_a_lower_lmax_caps_the_experiment(experiment, observed):
    _, beamed, _ = observed
    filt = IsotropicFilter(experiment, lmax=90, nthreads=2)
    assert filt.experiment.ell_max_temperature == 90 and filt.experiment.ell_max_polarization == 90
    fields = filt.filter_alm(beamed)
    assert fields.lmax == 90 and fields.settings["experiment"]["ell_max_polarization"] == 90


def test_the_protocol_accepts_any_object_with_a_filter_method(experiment):
    class Passthrough:
        def filter(self, maps):
            return FilteredFields(
                np.zeros((3, harmonics.nalm(8)), complex), 8, {k: np.ones(9) for k in ("TT", "EE", "BB", "TE")}
            )

    assert isinstance(IsotropicFilter(experiment), FieldFilter)
    assert isinstance(Passthrough(), FieldFilter)
    assert not isinstance(object(), FieldFilter)


def test_filtered_fields_are_read_only_and_validated():
    spectra = {k: np.ones(9) for k in ("TT", "EE", "BB", "TE")}
    fields = FilteredFields(np.ones((3, harmonics.nalm(8)), complex), 8, spectra)
    with pytest.raises(ValueError, match="read-only"):
        fields.alm[0, 0] = 2.0
    with pytest.raises(ValueError, match=r"shape \(3, 45\)"):
        FilteredFields(np.ones((2, harmonics.nalm(8)), complex), 8, spectra)
    with pytest.raises(ValueError, match="'TE' is missing"):
        FilteredFields(np.ones((3, harmonics.nalm(8)), complex), 8, {k: np.ones(9) for k in ("TT", "EE", "BB")})
    with pytest.raises(ValueError, match="field must be one of"):
        fields.wiener("P")


def test_bad_maps_and_masks_are_refused_with_clear_messages(experiment, observed):
    maps, beamed, _ = observed
    filt = IsotropicFilter(experiment, nthreads=2)
    with pytest.raises(ValueError, match=r"shape \(3, npix\)"):
        filt.filter(maps[:2])
    with pytest.raises(ValueError, match="not 12\\*nside\\^2"):
        filt.filter(np.zeros((3, 1000)))
    bad = np.array(maps)
    bad[1, 17] = np.nan
    with pytest.raises(ValueError, match="non-finite"):
        filt.filter(bad)
    with pytest.raises(ValueError, match="exceeds 3\\*nside-1"):
        filt.filter(np.zeros((3, 12 * 16**2)))  # nside 16 supports l <= 47 only
    masked = IsotropicFilter(experiment, mask=np.ones(12 * 32**2), nthreads=2)
    with pytest.raises(ValueError, match="mask has nside 32 .* maps have nside 64"):
        masked.filter(maps)
    with pytest.raises(ValueError, match="filter_alm takes full-sky"):
        masked.filter_alm(beamed)
    with pytest.raises(ValueError, match="values must lie in \\[0, 1\\]"):
        IsotropicFilter(experiment, mask=np.full(12 * NSIDE**2, 1.5))
    with pytest.raises(ValueError, match="apodization was given without a mask"):
        IsotropicFilter(experiment, apodization=5.0)
    with pytest.raises(ValueError, match="alm reach l=100"):
        filt.filter_alm(np.zeros((3, harmonics.nalm(100)), complex))
    with pytest.raises(TypeError, match="Spectra"):
        IsotropicFilter(experiment, spectra={"TT": 1})
