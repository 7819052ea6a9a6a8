"""Lensed-sky simulation: spectra against camb, φ against theory, the φ = 0 identity, noise levels, seeding
and input validation (the remapping itself: tests/test_remapping.py).

Cosmic variance of a full-sky band power averaged over N sims (common practice, Knox 1995, PRD 52, 4307):
σ²(auto) = Σ_ℓ 2 C_ℓ² / (2ℓ+1) / n_ℓ² / N and σ²(TE) = Σ_ℓ (C^TT C^EE + (C^TE)²) / (2ℓ+1) / n_ℓ² / N for a
bin of n_ℓ multipoles.
"""

import healpy
import numpy as np
import pytest

import lensrec
from lensrec import harmonics, sky
from lensrec.harmonics import truncate_alm

ARCMIN = np.pi / 10800


def band_powers(cl, edges):
    return np.array([cl[lo:hi].mean() for lo, hi in zip(edges[:-1], edges[1:], strict=True)])


def band_sigma(variance_per_ell, edges, nsims):
    """σ of a bin mean from the per-ℓ variance of one C_ℓ estimate."""
    return np.array(
        [np.sqrt(variance_per_ell[lo:hi].sum()) / (hi - lo) for lo, hi in zip(edges[:-1], edges[1:], strict=True)]
    ) / np.sqrt(nsims)


# ------------------------------------------------------------------------------ spectra against camb
NSIDE_CAMB, LMAX_CAMB, NSIMS_CAMB = 1024, 2000, 3
EDGES = np.arange(30, 2031, 100)  # bins [30,130), ..., [1930,2030): l in 30...2000 (last bin clipped below)
EDGES[-1] = 2001


@pytest.fixture(scope="module")
def lensed_sims():
    """Noise-free lensed a_lm of a few full-sky sims at nside 1024, lmax 2000 (unlensed to 3000)."""
    experiment = lensrec.Experiment(name="no beam", noise_temperature=0.0, beam_fwhm=0.0)
    spectra = {key: [] for key in ("TT", "EE", "BB", "TE", "PP")}
    for index in range(NSIMS_CAMB):
        result = lensrec.simulate_sky(
            experiment, nside=NSIDE_CAMB, lmax=LMAX_CAMB, seed=11, index=index, noise=False, nthreads=2
        )
        cls = healpy.alm2cl(np.array(result.lensed_alm), lmax=LMAX_CAMB)  # TT EE BB TE EB TB
        for key, row in zip(("TT", "EE", "BB", "TE"), (0, 1, 2, 3), strict=True):
            spectra[key].append(cls[row])
        spectra["PP"].append(healpy.alm2cl(np.array(result.phi_alm)))
    return {key: np.mean(value, axis=0) for key, value in spectra.items()}


def camb_comparison(measured, theory, key, fiducial):
    lensed = fiducial.lensed
    ell = np.arange(LMAX_CAMB + 1)
    if key == "TE":
        variance = lensed["TT"][: LMAX_CAMB + 1] * lensed["EE"][: LMAX_CAMB + 1] + lensed["TE"][: LMAX_CAMB + 1] ** 2
        scale = band_powers(np.sqrt(lensed["TT"][: LMAX_CAMB + 1] * lensed["EE"][: LMAX_CAMB + 1]), EDGES)
    else:
        variance = 2 * theory[: LMAX_CAMB + 1] ** 2
        scale = band_powers(theory, EDGES)
    variance = variance / (2 * ell + 1)
    sigma = band_sigma(variance, EDGES, NSIMS_CAMB)
    deviation = band_powers(measured, EDGES) - band_powers(theory, EDGES)
    return deviation, sigma, scale


@pytest.mark.slow
@pytest.mark.parametrize("key", ["TT", "EE", "TE"])
def test_lensed_tt_ee_te_match_camb(lensed_sims, fiducial, key):
    # reference library: camb lensed spectra (lensrec.fiducial_spectra, lens_potential_accuracy=1).
    # Tolerance: 4 sigma of Gaussian cosmic variance per bin (20 bins x 4 spectra: a 4-sigma Gaussian
    # excursion has ~0.5% chance overall) plus a 0.3% systematic allowance for camb's lensed-spectrum
    # accuracy at this setting and the non-Gaussian (phi sample variance) scatter of lensed spectra
    # (from memory: both are ~0.1-0.2%).
    deviation, sigma, scale = camb_comparison(lensed_sims[key], fiducial.lensed[key], key, fiducial)
    bound = 4 * sigma + 3e-3 * np.abs(scale)
    assert np.all(np.abs(deviation) < bound), list(zip(EDGES[:-1], np.round(deviation / sigma, 2), strict=True))


@pytest.mark.slow
def test_lensed_bb_matches_camb(lensed_sims, fiducial):
    # The sharpest test of the remapping and the polarization rotation: lensed BB (no primordial B) is
    # entirely made by lensing E, and dropping the rotation or mis-signing d changes it at the 10% level.
    # reference library: camb. Tolerance: 4 sigma Gaussian per bin plus a 1% allowance for the
    # non-Gaussian variance of lensed BB, which adds a coherent phi-sample-variance scatter comparable
    # to the Gaussian one at l ~ 1000-2000 (Smith, Challinor & Rocha 2006, PRD 73, 023517), for camb's
    # lensed-BB accuracy, and for the unlensed band limit lmax + 1000: E beyond it is missing, which
    # lowers BB near lmax by about 1% (it shrinks as lmax_margin grows; grid aliasing is < 0.6%).
    theory = fiducial.lensed["BB"]
    deviation, sigma, scale = camb_comparison(lensed_sims["BB"], theory, "BB", fiducial)
    in_sigma = deviation / sigma
    print("lensed BB deviation per bin in sigma:", np.round(in_sigma, 2).tolist())
    assert np.all(np.abs(deviation) < 4 * sigma + 1e-2 * scale), list(
        zip(EDGES[:-1], np.round(in_sigma, 2), strict=True)
    )
    # and the B modes are there at all: the binned power is within 5% of camb everywhere (cosmic variance
    # per bin < 1.3% for 3 sims)
    assert np.all(np.abs(deviation / scale) < 0.05)


@pytest.mark.slow
def test_input_phi_spectrum_matches_theory(lensed_sims, fiducial):
    # the input phi is Gaussian with C_L^phiphi (fiducial file, camb): 4 sigma of cosmic variance per bin,
    # no systematic allowance (the draw is exact Gaussian)
    lmax = LMAX_CAMB + 1000
    ell = np.arange(lmax + 1)
    theory = fiducial.phi[: lmax + 1]
    edges = np.r_[2, 10, 30, np.arange(100, lmax + 2, 200)]
    sigma = band_sigma(2 * theory**2 / (2 * ell + 1), edges, NSIMS_CAMB)
    deviation = band_powers(lensed_sims["PP"], edges) - band_powers(theory, edges)
    assert np.all(np.abs(deviation) < 4 * sigma)


# ----------------------------------------------------------------------------------- exact identities
def test_zero_phi_reproduces_the_unlensed_maps(fiducial):
    # with phi = 0 every displaced point is the grid point itself: the lensed a_lm are the unlensed ones
    # truncated to lmax, up to the non-uniform synthesis accuracy epsilon (an L2 relative bound)
    experiment = lensrec.Experiment(name="beam only", noise_temperature=0.0, beam_fwhm=30.0)
    spectra = fiducial.with_phi(np.zeros(fiducial.lmax + 1))
    result = lensrec.simulate_sky(
        experiment, spectra, nside=64, lmax=150, lmax_margin=100, seed=3, noise=False, nthreads=2
    )
    unlensed = truncate_alm(result.unlensed_alm, 150)
    assert np.linalg.norm(result.lensed_alm - unlensed) < 1e-7 * np.linalg.norm(unlensed)
    expected = harmonics.alm2map_tqu(harmonics.scale_alm(unlensed, experiment.beam(150)), 64, 150, nthreads=2)
    assert np.linalg.norm(result.maps - expected) < 1e-7 * np.linalg.norm(expected)


# ----------------------------------------------------------------------------------------- Gaussian draws
def test_gaussian_cmb_alm_has_the_input_spectra(fiducial):
    # unit-normalized draws with the per-l Cholesky factor: <|a_lm|^2> = C_l and <T E*> = C^TE, 4 sigma
    lmax = 600
    cls = {key: fiducial.unlensed[key][: lmax + 1] for key in ("TT", "EE", "BB", "TE")}
    cls["BB"] = 0.01 * cls["EE"]
    alm = sky.gaussian_cmb_alm(cls, lmax, np.random.default_rng(8))
    assert np.all(alm[:, : lmax + 1].imag == 0)  # m = 0 real
    measured = healpy.alm2cl(alm)
    ell = np.arange(lmax + 1)
    edges = np.arange(2, lmax + 2, 50)
    for row, key in enumerate(("TT", "EE", "BB", "TE")):
        if key == "TE":
            variance = (cls["TT"] * cls["EE"] + cls["TE"] ** 2) / (2 * ell + 1)
        else:
            variance = 2 * cls[key] ** 2 / (2 * ell + 1)
        sigma = band_sigma(variance, edges, 1)
        deviation = band_powers(measured[row], edges) - band_powers(cls[key], edges)
        assert np.all(np.abs(deviation) < 4 * sigma), key


def test_draws_do_not_depend_on_threads():
    a = sky.standard_normals(np.random.default_rng(1), 5_000_000, nthreads=1)
    b = sky.standard_normals(np.random.default_rng(1), 5_000_000, nthreads=2)
    assert np.array_equal(a, b)
    rng = np.random.default_rng(1)
    assert not np.array_equal(sky.standard_normals(rng, 10), sky.standard_normals(rng, 10))  # rng advances


# ---------------------------------------------------------------------------------------- noise
def noise_only(experiment, nside=64, lmax=150, **kwargs):
    common = dict(nside=nside, lmax=lmax, lmax_margin=50, seed=2, nthreads=2)
    with_noise = lensrec.simulate_sky(experiment, noise=True, **common, **kwargs)
    without = lensrec.simulate_sky(experiment, noise=False, **common, **kwargs)
    return np.array(with_noise.maps) - np.array(without.maps), with_noise


def test_white_noise_pixel_level():
    # pixel noise sigma = Delta / sqrt(Omega_pix) (Delta in uK-arcmin, Omega in arcmin^2; common practice);
    # the sample std of npix Gaussian values has relative sigma 1/sqrt(2 npix): 5 sigma
    experiment = lensrec.Experiment(name="white", noise_temperature=10.0, noise_polarization=20.0, beam_fwhm=5.0)
    noise, result = noise_only(experiment)
    npix = noise.shape[1]
    pixel_arcmin = np.sqrt(4 * np.pi / npix) / ARCMIN
    for row, level in ((0, 10.0), (1, 20.0), (2, 20.0)):
        assert abs(noise[row].std() / (level / pixel_arcmin) - 1) < 5 / np.sqrt(2 * npix)
    assert result.settings["noise_model"] == "white"
    assert abs(np.corrcoef(noise[1], noise[2])[0, 1]) < 5 / np.sqrt(npix)  # independent Q and U


def test_one_over_f_noise_spectrum():
    # harmonic noise with the experiment's (beam-convolved) N_l including 1 + (l/l_knee)^alpha
    # (Knox 1995 form, docs/conventions.md): binned power within 4 sigma of cosmic variance plus 1% for the
    # HEALPix analysis (map2alm with 3 iterations at lmax = 2 nside)
    experiment = lensrec.Experiment(
        name="knee",
        noise_temperature=10.0,
        beam_fwhm=5.0,
        ell_knee_temperature=80.0,
        alpha_knee_temperature=-2.0,
        ell_knee_polarization=40.0,
        alpha_knee_polarization=-1.5,
    )
    noise, result = noise_only(experiment, lmax=128)
    assert result.settings["noise_model"] == "one_over_f"
    alm = harmonics.map2alm_tqu(noise, 128, nthreads=2)
    measured = healpy.alm2cl(alm)
    ell = np.arange(129)
    edges = np.arange(2, 130, 16)
    for row, key in ((0, "T"), (1, "E"), (2, "B")):
        theory = experiment.noise_spectrum(key, 128, deconvolved=False, cut=False)
        theory[:2] = 0
        sigma = band_sigma(2 * theory**2 / (2 * ell + 1), edges, 1)
        deviation = band_powers(measured[row], edges) - band_powers(theory, edges)
        assert np.all(np.abs(deviation) < 4 * sigma + 1e-2 * band_powers(theory, edges)), key


def test_hits_scale_the_noise_and_masked_zero_hits_are_allowed():
    # noise variance proportional to 1/hits (common practice): pixels with 4x the hits have half the std
    experiment = lensrec.Experiment(name="white", noise_temperature=10.0, beam_fwhm=5.0)
    nside = 64
    npix = 12 * nside**2
    hits = np.where(np.arange(npix) % 2 == 0, 1.0, 4.0)
    mask = np.ones(npix)
    mask[:100] = 0.0
    hits[:100] = 0.0
    noise, _ = noise_only(experiment, hits=hits, mask=mask)
    used = mask > 0
    ratio = noise[0][used & (hits == 1)].std() / noise[0][used & (hits == 4)].std()
    assert abs(ratio - 2.0) < 2.0 * 5 * np.sqrt(2 / (npix / 2))  # 5 sigma of two std estimates
    assert np.all(noise[:, :100] == 0.0)


def test_mask_is_applied():
    mask = lensrec.cap_mask(32, 0.0, 60.0, 30.0, width=5.0)
    result = lensrec.simulate_sky("orbital_allsky", nside=32, lmax=64, lmax_margin=64, seed=1, mask=mask, nthreads=2)
    assert np.all(result.maps[:, mask == 0] == 0.0)
    assert result.mask is not None and result.settings["mask_sha256"]


# ---------------------------------------------------------------------------------------- seeding
def small_sky(seed, index=0):
    return lensrec.simulate_sky("deep_highland", nside=32, lmax=64, lmax_margin=64, seed=seed, index=index, nthreads=2)


def test_same_seed_is_bit_identical_and_different_seeds_differ():
    a, b, c = small_sky(5), small_sky(5), small_sky(6)
    assert np.array_equal(a.maps, b.maps) and np.array_equal(a.phi_alm, b.phi_alm)
    assert not np.allclose(a.maps, c.maps)
    assert not np.allclose(a.phi_alm, c.phi_alm)
    assert not np.allclose(small_sky(5, index=1).maps, a.maps)


def test_sim_index_is_reproducible_alone():
    in_sequence = [small_sky(9, index) for index in range(4)][3]
    alone = small_sky(9, 3)
    assert np.array_equal(in_sequence.maps, alone.maps)
    assert np.array_equal(in_sequence.unlensed_alm, alone.unlensed_alm)


def test_settings_reproduce_the_simulation():
    a = small_sky(12)
    s = a.settings
    again = lensrec.simulate_sky(
        lensrec.Experiment(**s["experiment"]),
        nside=s["nside"],
        lmax=s["lmax"],
        lmax_margin=s["lmax_margin"],
        seed=s["seed"],
        index=s["index"],
        r=s["r"],
        epsilon=s["epsilon"],
        noise=s["noise"],
        nthreads=2,
    )
    assert np.array_equal(a.maps, again.maps)
    assert a.maps.flags.writeable is False
    # with another thread count the random fields are bit-identical and the transforms agree to rounding
    # (ducc0 sums in a thread-dependent order; ~1e-15 relative)
    one_thread = lensrec.simulate_sky("deep_highland", nside=32, lmax=64, lmax_margin=64, seed=12, nthreads=1)
    assert np.array_equal(one_thread.unlensed_alm, a.unlensed_alm)
    assert np.array_equal(one_thread.phi_alm, a.phi_alm)
    assert np.max(np.abs(one_thread.maps - a.maps)) < 1e-12 * np.max(np.abs(a.maps))


def test_tensor_modes_add_b_power(fiducial):
    # unlensed B = r x tensor BB (camb tensor spectra for r = 1 in the fiducial file)
    result = lensrec.simulate_sky("deep_highland", nside=32, lmax=64, lmax_margin=64, r=0.1, noise=False, nthreads=2)
    b = healpy.alm2cl(np.array(result.unlensed_alm[2]))[2:64]
    theory = 0.1 * fiducial.tensor["BB"][2:64]
    ell = np.arange(2, 64)
    sigma = np.sqrt(np.sum(2 * theory**2 / (2 * ell + 1))) / theory.size
    assert abs(b.mean() - theory.mean()) < 4 * sigma


# ---------------------------------------------------------------------------------------- bad input
@pytest.mark.parametrize(
    "kwargs, match",
    [
        (dict(nside=100), "nside must be a power of two"),
        (dict(nside=32, lmax=200), "exceeds 3\\*nside-1"),
        (dict(nside=32, lmax=64, lmax_margin=-1), "lmax_margin must be >= 0"),
        (dict(nside=32, lmax=64, mask=np.ones(100)), "not 12\\*nside\\^2"),
        (dict(nside=32, lmax=64, mask=np.ones(12 * 16 * 16)), "nside 16 .* but nside 32"),
        (dict(nside=32, lmax=64, mask=np.full(12 * 32 * 32, 2.0)), "must lie in \\[0, 1\\]"),
        (dict(nside=32, lmax=64, hits=np.zeros(12 * 32 * 32)), "hits is zero in 12288 pixel"),
        (dict(nside=32, lmax=64, r=-0.1), "r must be >= 0"),
        (dict(nside=32, lmax=64, epsilon=0.0), "epsilon must be >= "),
    ],
)
def test_bad_simulation_input(kwargs, match):
    with pytest.raises(ValueError, match=match):
        lensrec.simulate_sky("deep_highland", **kwargs)


def test_spectra_too_short_are_refused(fiducial):
    with pytest.raises(ValueError, match="lmax \\+ lmax_margin = 1000 \\+ 1000 = 2000 is needed"):
        lensrec.simulate_sky("deep_highland", fiducial.truncated(1500), nside=512, lmax=1000)


def test_non_finite_spectra_are_refused(fiducial):
    bad = {key: np.array(fiducial.unlensed[key][:101]) for key in ("TT", "EE", "BB", "TE")}
    bad["EE"][50] = np.nan
    with pytest.raises(ValueError, match="non-finite"):
        sky.gaussian_cmb_alm(bad, 100, np.random.default_rng(0))
    with pytest.raises(ValueError, match="non-finite"):
        fiducial.with_phi(np.full(fiducial.lmax + 1, np.inf))
    bad["EE"][50] = 0.0  # TE^2 > TT EE
    with pytest.raises(ValueError, match="not positive semi-definite"):
        sky.gaussian_cmb_alm(bad, 100, np.random.default_rng(0))


def test_pixel_window_arrays_multiply_the_signal():
    # a window w_l multiplies the lensed a_lm of T (first array) and of E, B (second) before synthesis;
    # constant windows therefore scale the noise-free maps exactly (to rounding)
    common = dict(nside=32, lmax=64, lmax_margin=64, seed=4, noise=False, nthreads=2)
    plain = lensrec.simulate_sky("deep_highland", **common)
    windows = (np.full(65, 0.5), np.full(65, 0.25))
    windowed = lensrec.simulate_sky("deep_highland", pixel_window=windows, **common)
    assert np.allclose(windowed.maps[0], 0.5 * plain.maps[0], rtol=1e-12, atol=1e-12)
    assert np.allclose(windowed.maps[1:], 0.25 * plain.maps[1:], rtol=1e-12, atol=1e-12)
    assert windowed.settings["pixel_window"] is True and plain.settings["pixel_window"] is False
    with pytest.raises(ValueError, match="pixel_window\\[1\\] has 10 entries"):
        lensrec.simulate_sky("deep_highland", pixel_window=(np.ones(65), np.ones(10)), **common)


def test_allow_high_lmax_reaches_the_map_synthesis():
    # lmax above 3 nside - 1 is refused unless allowed; when allowed the maps are made (with 1/f noise too,
    # whose harmonic synthesis runs at the same lmax): the sky's band limit is kept, the maps under-sample it
    experiment = lensrec.Experiment(
        name="high", noise_temperature=10.0, beam_fwhm=30.0, ell_knee_temperature=50.0, alpha_knee_temperature=-2.0
    )
    with pytest.raises(ValueError, match="allow_high_lmax"):
        lensrec.simulate_sky(experiment, nside=16, lmax=60, lmax_margin=20, seed=1, nthreads=1)
    sky = lensrec.simulate_sky(experiment, nside=16, lmax=60, lmax_margin=20, seed=1, nthreads=1, allow_high_lmax=True)
    assert sky.maps.shape == (3, 12 * 16**2) and sky.lensed_alm.shape == (3, harmonics.nalm(60))
    assert np.all(np.isfinite(sky.maps)) and sky.settings["noise_model"] == "one_over_f"
