import math

import numpy as np
import pytest

import lensrec
from lensrec.experiment import ARCMIN
from lensrec.pixel_noise import PixelNoise, pixel_window
from lensrec.seeding import rng_for

NSIDE = 16
NPIX = 12 * NSIDE**2
AREA = 4 * math.pi / NPIX / ARCMIN**2  # pixel area in arcmin^2


def test_the_two_noise_levels_are_the_arithmetic_and_harmonic_means():
    variance = np.where(np.arange(NPIX) % 2 == 0, 1.0, 4.0)
    levels = PixelNoise(variance).noise_levels()
    # arithmetic mean (1 + 4)/2 = 2.5; harmonic mean 1/((1 + 1/4)/2) = 1.6 (definitions, common practice)
    assert levels["arithmetic"][0] == pytest.approx(math.sqrt(2.5 * AREA), rel=1e-12)
    assert levels["inverse_variance"][0] == pytest.approx(math.sqrt(1.6 * AREA), rel=1e-12)
    assert levels["arithmetic"][1] == pytest.approx(math.sqrt(2 * 2.5 * AREA), rel=1e-12)
    # an apodized mask weights the arithmetic mean by w^2: only the even (sigma^2 = 1) pixels at full weight
    mask = np.where(np.arange(NPIX) % 2 == 0, 1.0, 0.5)
    weighted = PixelNoise(variance, mask).noise_levels()["arithmetic"][0]
    assert weighted == pytest.approx(math.sqrt((1.0 + 0.25 * 4.0) / 1.25 * AREA), rel=1e-12)


def test_hits_give_the_experiment_depth_as_the_inverse_variance_level(rng):
    experiment = lensrec.Experiment(noise_temperature=2.0, noise_polarization=3.0)
    hits = rng.uniform(1.0, 10.0, NPIX)
    mask = (np.arange(NPIX) < NPIX // 3).astype(float)
    hits[mask == 0] = 0.0
    noise = PixelNoise.from_hits(experiment, hits, mask)
    levels = noise.noise_levels()
    np.testing.assert_allclose(levels["inverse_variance"], [2.0, 3.0, 3.0], rtol=1e-12)
    assert levels["arithmetic"][0] > 2.0 * 1.05  # hits vary by 10x: the arithmetic level is clearly worse
    assert noise.experiment_for(experiment, "inverse_variance").noise_temperature == pytest.approx(2.0)
    with pytest.raises(ValueError, match="hits is zero in 1 pixel.*pixel 5"):
        bad = hits.copy()
        bad[5] = 0.0
        PixelNoise.from_hits(experiment, bad, mask)


def test_bad_variance_inside_the_mask_is_named():
    variance = np.ones(NPIX)
    variance[17] = np.nan
    with pytest.raises(ValueError, match="T variance is nan at pixel 17"):
        PixelNoise(variance)
    variance[17] = 0.0
    with pytest.raises(ValueError, match="T variance is 0.0 at pixel 17"):
        PixelNoise(variance)
    mask = np.ones(NPIX)
    mask[17] = 0.0
    assert PixelNoise(variance, mask).variance[0, 17] == 0.0  # outside the mask it is not used
    with pytest.raises(ValueError, match="zero everywhere"):
        PixelNoise(np.ones(NPIX), np.zeros(NPIX))
    with pytest.raises(ValueError, match="nside 8"):
        PixelNoise(np.ones(NPIX), np.ones(12 * 8**2))


def test_simulated_noise_follows_the_variance_map_white_and_one_over_f():
    variance = np.where(np.arange(NPIX) < NPIX // 2, 1.0, 9.0)
    noise = PixelNoise(variance)
    white = lensrec.Experiment(noise_temperature=1.0)
    maps = noise.simulate(white, 3 * NSIDE - 1, rng_for(1, 0, "noise"))
    north, south = maps[0, : NPIX // 2].var(), maps[0, NPIX // 2 :].var()
    # sample variance of 1536 Gaussian pixels: relative error sqrt(2/1536) = 3.6%; allow 4 sigma
    assert north == pytest.approx(1.0, rel=0.15) and south == pytest.approx(9.0, rel=0.15)
    assert maps[1, NPIX // 2 :].var() == pytest.approx(18.0, rel=0.15)
    # 1/f: a red spectrum at low ell, modulated by the same map (Knox 1995 form with a knee, common practice)
    knee = lensrec.Experiment(noise_temperature=1.0, ell_knee_temperature=20.0, alpha_knee_temperature=-3.0)
    uniform = PixelNoise(np.ones(NPIX))
    spectra = []
    for index in range(4):
        m = uniform.simulate(knee, 3 * NSIDE - 1, rng_for(2, index, "noise"))
        spectra.append(lensrec.harmonics.map2alm(m[0], 3 * NSIDE - 1, nthreads=1))
    import healpy

    cl = np.mean([healpy.alm2cl(a) for a in spectra], axis=0)
    area_sr = 4 * math.pi / NPIX
    ell = np.maximum(np.arange(cl.size), 1)
    expected = area_sr * (1 + (ell / 20.0) ** -3.0)
    low, high = slice(4, 10), slice(30, 45)
    # band averages over 4 sims: (2l+1)*6*4 modes > 400 -> ~7% error; allow 25%
    assert cl[low].mean() / expected[low].mean() == pytest.approx(1.0, rel=0.25)
    assert cl[high].mean() / expected[high].mean() == pytest.approx(1.0, rel=0.25)
    assert cl[low].mean() > 5 * cl[high].mean()


def test_pixel_window_matches_averaging_into_pixels():
    import healpy

    window = pixel_window(NSIDE)
    lmax = 3 * NSIDE - 1
    # reference: healpy.ud_grade averages high-resolution pixels into each low-resolution pixel (healpy);
    # the cross-spectrum of the averaged field with the input, over the input power, is the window
    ratios = []
    rng = np.random.default_rng(3)
    for _ in range(6):
        alm = rng.normal(size=(lmax + 1) * (lmax + 2) // 2) + 1j * rng.normal(size=(lmax + 1) * (lmax + 2) // 2)
        alm[: lmax + 1] = alm[: lmax + 1].real
        high = healpy.alm2map(alm, 256, lmax=lmax)
        low = healpy.map2alm(healpy.ud_grade(high, NSIDE), lmax=lmax, iter=10)
        ratios.append(healpy.alm2cl(low, alm) / healpy.alm2cl(alm))
    measured = np.mean(ratios, axis=0)
    band = slice(24, 48)
    # six sims, 24 multipoles: the anisotropic pixel shapes scatter the ratio by ~0.3%; allow 1%
    np.testing.assert_allclose(measured[band].mean(), window[band].mean(), rtol=0.01)
    assert window[band].mean() < 0.9  # the window is far from 1 here: a missing window would fail
    assert window[0] == pytest.approx(1.0, abs=1e-12)


def test_simulate_sky_draws_noise_from_the_variance_map():
    variance = np.where(np.arange(NPIX) < NPIX // 2, 1.0, 100.0)
    experiment = lensrec.Experiment(noise_temperature=1.0, beam_fwhm=30.0)
    common = dict(nside=NSIDE, lmax=32, lmax_margin=16, seed=4, nthreads=1)
    clean = lensrec.simulate_sky(experiment, noise=False, **common)
    noisy = lensrec.simulate_sky(experiment, pixel_noise=PixelNoise(variance), **common)
    noise = noisy.maps - clean.maps
    # sample variance of 1536 pixels: ~3.6% relative error; allow 15%
    assert noise[0, NPIX // 2 :].var() == pytest.approx(100.0, rel=0.15)
    assert noise[0, : NPIX // 2].var() == pytest.approx(1.0, rel=0.15)
    assert noisy.settings["noise_model"] == "pixel_variance_white"
    with pytest.raises(ValueError, match="nside 8"):
        lensrec.simulate_sky(experiment, pixel_noise=PixelNoise(np.ones(12 * 64)), **common)
