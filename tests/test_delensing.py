"""Delensing: the two lensing B-mode templates on simulations, residual spectra, efficiency and A_lens^res
(the filters alone: tests/test_wiener_filters.py; template signs and input checks: tests/test_lensing_templates.py).

Cosmic variance of a full-sky band power over a band of ν = Σ(2ℓ+1) modes (common practice, Knox 1995,
PRD 52, 4307): σ/C ≈ √(2/ν). The bands used below, ℓ ∈ [30, 100], [100, 300], [300, 600], [600, 1000],
hold ν ≈ 9.3e3, 8.0e4, 2.7e5, 6.4e5 modes: σ/C ≈ 1.5%, 0.50%, 0.27%, 0.18%.
"""

import numpy as np
import pytest

import lensrec
from lensrec import delensing
from lensrec.harmonics import nalm, truncate_alm

BANDS = ((30, 100), (100, 300), (300, 600), (600, 1000))
LMAX = 1000  # band limit of the B-mode templates tested
LMAX_CMB = 1500  # lensed band limit of the simulation and of the filtered E
MARGIN = 1500  # the unlensed E and phi of the simulation reach LMAX + MARGIN = 2500
# A low-noise full-sky survey: the shipped deep patch's noise and beam (1.0 / 1.4 uK-arcmin, 1 arcmin), cut at
# l = 1500 so that nside 512 resolves it, observing the whole sky.
DEEP = dict(
    noise_temperature=1.0,
    noise_polarization=1.4,
    beam_fwhm=1.0,
    ell_min=30,
    ell_max_temperature=LMAX_CMB,
    ell_max_polarization=LMAX_CMB,
    sky_fraction=1.0,
)


def band_modes(lo, hi):
    return (hi + 1) ** 2 - lo**2


def band_sigma(lo, hi):
    """Gaussian σ/C of a full-sky band power over [lo, hi] (module docstring)."""
    return np.sqrt(2.0 / band_modes(lo, hi))


def band_mean(cl, lo, hi):
    ell = np.arange(lo, hi + 1)
    return np.sum((2 * ell + 1) * cl[lo : hi + 1]) / np.sum(2 * ell + 1)


@pytest.fixture(scope="module")
def experiment():
    return lensrec.Experiment(name="deep full sky", **DEEP)


@pytest.fixture(scope="module")
def sky(experiment):
    """One low-noise full-sky simulation at nside 512: lensed to l = 1500, unlensed E and phi to 2500."""
    return lensrec.simulate_sky(
        experiment, nside=512, lmax=LMAX_CMB, lmax_margin=LMAX + MARGIN - LMAX_CMB, seed=21, nthreads=2
    )


@pytest.fixture(scope="module")
def true_inputs(sky):
    """True unlensed E and phi (to 2500) and the noise-free lensed B to l = 1000 of the simulation."""
    lensed_b = truncate_alm(np.array(sky.lensed_alm[2]), LMAX, LMAX_CMB)
    return np.array(sky.unlensed_alm[1]), np.array(sky.phi_alm), lensed_b


@pytest.fixture(scope="module")
def perfect_templates(true_inputs):
    """Templates of both methods from the true unlensed E and the true phi (the full band of the simulation)."""
    e_alm, phi_alm, _ = true_inputs
    return {
        method: delensing.lensing_b_template(e_alm, phi_alm, LMAX, method=method, nthreads=2)
        for method in ("remap", "first_order")  # of the true unlensed E: remapping it is exact
    }


# ------------------------------------------------------------------------------- perfect knowledge
@pytest.mark.slow
def test_perfect_knowledge_remap_template_removes_the_lensing_b_modes(true_inputs, perfect_templates):
    # Reference: the simulation's own noise-free lensed B modes (lensrec.sky's exact remapping). With the
    # true phi and the true unlensed E the non-perturbative template removes, on this sim, 99.94%, 99.94%,
    # 99.87% and 99.51% of the lensing B power in the four bands (99.71% over 30-1000). What is left is the
    # aliasing of the lensed tail: the simulation analyzed its lensed field on a grid sized for l <= 1500 and
    # the template on one for l <= 1000, each good to < 0.6% of lensed BB near its band limit (lens_alm's
    # stated accuracy), so together at most ~1.2%: hence >= 98.5% in every band, beyond the >= 95% required.
    _, _, lensed_b = true_inputs
    result = delensing.delensing_spectra(lensed_b, perfect_templates["remap"])
    assert result.efficiency_in_range(30, 1000) >= 0.95
    for lo, hi in BANDS:
        assert result.efficiency_in_range(lo, hi) >= 0.985, (lo, hi)


@pytest.mark.slow
def test_first_order_template_removes_less_at_high_ell(true_inputs, perfect_templates):
    # Common practice (no source): the gradient-order template misses the higher-order terms of the remapping,
    # which grow with l |d| (|d| ~ 2.5 arcmin rms), so it removes less than the exact remapping, and less at
    # high l than at low l. Measured on this sim: 90.0%, 89.6%, 84.5%, 74.6% in the four bands (80.6% over
    # 30-1000), against 99.5-99.9% for the remapping.
    _, _, lensed_b = true_inputs
    first = delensing.delensing_spectra(lensed_b, perfect_templates["first_order"], method="first_order")
    exact = delensing.delensing_spectra(lensed_b, perfect_templates["remap"])
    low, high = first.efficiency_in_range(30, 300), first.efficiency_in_range(600, 1000)
    # The band efficiencies scatter by < 1 percentage point between realizations (residual power over
    # > 9e3 modes, module docstring); the differences asserted are 5 points.
    assert high < exact.efficiency_in_range(600, 1000) - 0.05
    assert high < low - 0.05
    assert low > 0.8  # the first-order term is the bulk of the lensing B modes at l < 300 (Hu 2000, PRD 62, 043007)


@pytest.mark.slow
def test_first_order_template_power_matches_the_full_sky_first_order_kernel(true_inputs, perfect_templates):
    # Reference: Hu 2000, PRD 62, 043007: first-order lensing BB = convolution of C^EE and C^phiphi
    # (lensrec.first_order_lensed_bb, checked against Hu's 3j sums and camb elsewhere). Evaluated with this
    # realization's own C^EE and C^phiphi (to l = 2500, the simulation's band), so the phi cosmic variance that
    # moves all bands together drops out; what remains is the Gaussian scatter of the B modes themselves.
    # Tolerance: 4 sigma of the band power (module docstring) plus 0.3% for the non-Gaussian scatter left.
    e_alm, phi_alm, _ = true_inputs
    template_bb = lensrec.auto_spectrum(perfect_templates["first_order"])
    kernel = lensrec.first_order_lensed_bb(
        lensrec.auto_spectrum(e_alm), lensrec.auto_spectrum(phi_alm), LMAX, ell_margin=MARGIN
    )
    for lo, hi in BANDS:
        ratio = band_mean(template_bb, lo, hi) / band_mean(kernel, lo, hi)
        assert abs(ratio - 1.0) < 4 * band_sigma(lo, hi) + 0.003, (lo, hi, ratio)


@pytest.mark.slow
def test_template_from_band_limited_sources_removes_the_predicted_fraction(true_inputs, fiducial):
    # With E and phi known only to l = 1500 (the simulation has them to 2500), the template misses the lensing
    # B modes sourced by the higher multipoles. At first order (Hu 2000 kernel K) the removed fraction is
    # K[C^EE_<, C^phiphi_<] / K[C^EE, C^phiphi] (the template is a part of the bilinear sum, so its cross with
    # the lensed B equals its own power). Measured: 97.8%, 97.7%, 96.1%, 90.3% against predicted 97.9%, 97.8%,
    # 96.2%, 90.7%. Tolerance: the residual's band-power scatter (< 0.1 points) plus 1.5 percentage points
    # for the non-perturbative terms, which move lensed BB by ~1% at l <= 1000 (Challinor & Lewis 2005,
    # PRD 71, 103010).
    e_alm, phi_alm, lensed_b = true_inputs
    cut, lmax_in = 1500, LMAX + MARGIN
    template = delensing.lensing_b_template(
        truncate_alm(e_alm, cut, lmax_in), truncate_alm(phi_alm, cut, lmax_in), LMAX, method="remap", nthreads=2
    )
    result = delensing.delensing_spectra(lensed_b, template, method="remap")
    ee, pp = np.array(fiducial.unlensed["EE"][: lmax_in + 1]), np.array(fiducial.phi[: lmax_in + 1])
    full = lensrec.first_order_lensed_bb(ee, pp, LMAX, ell_margin=MARGIN)
    ee[cut + 1 :], pp[cut + 1 :] = 0.0, 0.0
    partial = lensrec.first_order_lensed_bb(ee, pp, LMAX, ell_margin=MARGIN)
    for lo, hi in BANDS:
        predicted = band_mean(partial, lo, hi) / band_mean(full, lo, hi)
        assert abs(result.efficiency_in_range(lo, hi) - predicted) < 0.015, (lo, hi)
    assert result.efficiency_in_range(600, 1000) < result.efficiency_in_range(30, 100)  # the loss grows with l


# ------------------------------------------------------------------------------- reconstructed phi
@pytest.fixture(scope="module")
def ee_reconstruction(sky, experiment):
    """The EE reconstruction of the simulation to L = 1000 (no B modes enter it: no B-mode delensing bias).

    Above L = 1000 its N0 exceeds C^phiphi by more than 10^3, so the Wiener filter would keep < 0.1% there."""
    return lensrec.reconstruct(sky.maps, experiment, estimator="EE", lmax_L=LMAX, nthreads=2)


@pytest.fixture(scope="module")
def template_fields(sky, experiment, fiducial):
    e_wiener, b_observed, _ = delensing.template_inputs(sky.maps, experiment, fiducial, lmax=LMAX_CMB, nthreads=2)
    return e_wiener, truncate_alm(b_observed, LMAX, LMAX_CMB)


def efficiency_sigma(efficiency, lo, hi):
    """Realization scatter of a measured band efficiency ε = (2 C^{B,T} − C^{T,T}) / C^{B,B}.

    For a template of power ≈ ε C^BB and cross ≈ ε C^BB, the Gaussian band scatter of the cross is
    √(C^BB C^TT / ν) and of each auto √(2/ν) C; adding the cross (twice), template-auto and reference-auto
    terms linearly (conservative): σ_ε ≈ 2 √(ε/ν) + 2 ε √(2/ν).
    """
    modes = band_modes(lo, hi)
    return 2 * np.sqrt(efficiency / modes) + 2 * efficiency * np.sqrt(2 / modes)


@pytest.mark.slow
def test_reconstructed_phi_delensing_matches_the_forecast(
    ee_reconstruction, template_fields, true_inputs, experiment, fiducial
):
    # Reference: the forecast residual of lensrec.delensing_forecast (Smith et al. 2012, JCAP 06, 014: residual
    # C^BB - K[W C^EE, rho^2 C^phiphi] at first order, lensed spectra checked against camb elsewhere) from the
    # analytic N0 of the same EE reconstruction, with the same band limits as the simulation (E and phi to 2500,
    # the template's E to 1500 through the E noise cut). Measured against the simulation's noise-free lensed B
    # so that the B noise does not enter. EE reconstruction: no B modes are reused.
    # Tolerance: 3 sigma of the realization scatter (efficiency_sigma) plus a 10% (of epsilon) allowance for
    # what the forecast leaves out: the higher-order response of phi-hat (a few percent), N1 bias absent from
    # the Wiener filter (a few percent of N0 at this noise, from memory), and the reuse of the template's E
    # modes inside the EE estimate (percent level, from memory).
    # Measured (first order): 8.6%, 11.3%, 12.2%, 11.4% against forecast 8.2%, 11.1%, 12.1%, 11.8%;
    # remap: 8.6%, 11.0%, 11.5%, 9.9%.
    e_wiener, _ = template_fields
    _, _, lensed_b = true_inputs
    n0 = np.array(ee_reconstruction.n0["gradient"])
    phi_wiener = delensing.wiener_filter_phi(ee_reconstruction.phi_alm, n0, fiducial.phi)
    forecast = lensrec.delensing_forecast(experiment, fiducial, n0=n0, lmax=LMAX, ell_margin=MARGIN, nthreads=2)
    expected = {
        band: 1.0 - band_mean(forecast.residual_bb, *band) / band_mean(forecast.lensed_bb, *band) for band in BANDS
    }
    assert 0.05 < min(expected.values())  # a reconstruction that delenses measurably
    measured = {}
    for method in ("first_order", "remap"):
        template = delensing.lensing_b_template(e_wiener, phi_wiener, LMAX, method=method, nthreads=2)
        measured[method] = delensing.delensing_spectra(lensed_b, template, method=method)
    for band in BANDS:
        tolerance = 3 * efficiency_sigma(expected[band], *band) + 0.1 * expected[band]
        assert abs(measured["first_order"].efficiency_in_range(*band) - expected[band]) < tolerance, band
    # The forecast is of a template linear in phi^WF. The remapped template agrees where l |d^WF| << 1; at
    # higher l its own deflection by phi^WF (mostly reconstruction noise at L > 300) decorrelates it from the
    # lensing B modes and it removes less (measured 9.9% against 11.8% at 600-1000): checked at l <= 300.
    for band in BANDS[:2]:
        tolerance = 3 * efficiency_sigma(expected[band], *band) + 0.1 * expected[band]
        assert abs(measured["remap"].efficiency_in_range(*band) - expected[band]) < tolerance, band

    # sigma(r) with the measured residual lensing power is lower than without delensing (Knox & Song 2002,
    # PRL 89, 011303: removing lensing B power lowers the sample variance of the r measurement)
    noise = experiment.noise_spectrum("B", LMAX)
    tensor = fiducial.tensor["BB"][: LMAX + 1]
    result = measured["remap"]
    args = (noise, tensor, experiment.sky_fraction, experiment.ell_min, LMAX)
    assert lensrec.sigma_r(result.residual_bb, *args) < lensrec.sigma_r(result.observed_bb, *args)
    assert forecast.sigma_r_delensed < forecast.sigma_r_lensed


@pytest.mark.slow
def test_reusing_the_b_modes_biases_the_measured_residual_low(sky, experiment, template_fields, true_inputs, fiducial):
    # Delensing bias (Namikawa 2017, PRD 95, 103514; Baleato Lizancos, Challinor & Carron 2021, JCAP 03, 016):
    # with an EB reconstruction (the estimator that dominates MV at this noise) from the same maps, the template
    # correlates with the B-mode noise, so the noise-subtracted efficiency measured on the observed B modes
    # exceeds the true efficiency, measured on the simulation's noise-free lensed B modes with the same
    # template. Without the bias the two differ only by the noise realization:
    # σ ≈ [√(2/ν) N + 2 √(C^res N / ν)] / C^BB ≈ 0.4 points over 30 <= l <= 300 (N/C^BB ≈ 0.08 at
    # 1.4 uK-arcmin); asserted: more than 2 points, 5 sigma.
    # Measured on this sim (remap): 71.3% apparent against 67.1% true over 30-300 (forecast without any bias:
    # 62.1%); A_lens^res 0.39 apparent, 0.46 true. The true efficiency also exceeds the forecast because the
    # lensing B modes themselves entered the EB estimate (first-order template: 70.4% true, 74.8% apparent,
    # A_lens^res 0.35 and 0.28 against 0.40 forecast: the apparent residual is ~30% low).
    e_wiener, b_observed = template_fields
    _, _, lensed_b = true_inputs
    eb = lensrec.reconstruct(sky.maps, experiment, estimator="EB", lmax_L=LMAX, nthreads=2)
    phi_wiener = delensing.wiener_filter_phi(eb.phi_alm, np.array(eb.n0["gradient"]), fiducial.phi)
    template = delensing.lensing_b_template(e_wiener, phi_wiener, LMAX, nthreads=2)
    noise = experiment.noise_spectrum("B", LMAX)
    apparent = delensing.delensing_spectra(b_observed, template, noise_bb=noise)
    true = delensing.delensing_spectra(lensed_b, template)
    assert apparent.efficiency_in_range(30, 300) > true.efficiency_in_range(30, 300) + 0.02
    assert apparent.alens_residual < true.alens_residual  # biased low, as every note on it says
    assert "delensing bias" in apparent.notes[0].lower()


# ------------------------------------------------------------------------------ efficiency, A_lens
def test_efficiency_and_alens_definitions():
    # efficiency: lensing power removed over lensing power present, noise subtracted (hand-computed values)
    observed = np.array([0.0, 0.0, 5.0, 3.0, 1.0])
    residual = np.array([0.0, 0.0, 2.0, 1.0, 1.0])
    noise = np.array([0.0, 0.0, 1.0, 1.0, np.inf])
    out = delensing.delensing_efficiency(observed, residual, noise)
    assert np.isnan(out[:2]).all() and np.isnan(out[4])
    assert out[2] == pytest.approx(1 - 1 / 4) and out[3] == pytest.approx(1.0)


def test_measured_alens_agrees_with_the_forecast_definition():
    # For a residual proportional to the lensed BB, the forecast's A_lens^res (lensrec.tensor_forecast, the
    # Fisher-weighted mean of C^res/C^lens) and the fitted amplitude here coincide exactly (numerical precision)
    from lensrec.tensor_forecast import alens_residual

    ell = np.arange(501.0)
    lensed = np.where(ell >= 2, 2e-6 * (1 + ell / 300.0), 0.0)
    noise = np.full(501, 1.5e-6)
    noise[400:] = np.inf
    for amplitude in (0.1, 0.45, 0.9):
        forecast = alens_residual(lensed, amplitude * lensed, noise, 20, 500)
        residual = amplitude * lensed + np.where(np.isfinite(noise), noise, 0.0)  # a spectrum is always finite
        measured = delensing.measured_alens_residual(residual, lensed, noise, 20, 500)
        assert measured == pytest.approx(forecast, rel=1e-10) == pytest.approx(amplitude, rel=1e-10)


# ----------------------------------------------------------------------------------------- bad input
@pytest.fixture(scope="module")
def small_fields():
    rng = np.random.default_rng(3)
    e_alm = rng.normal(size=nalm(40)) + 1j * rng.normal(size=nalm(40))
    phi_alm = 1e-5 * (rng.normal(size=nalm(30)) + 1j * rng.normal(size=nalm(30)))
    return e_alm, phi_alm


def test_delensing_spectra_input_errors(small_fields):
    e_alm, _ = small_fields
    template = e_alm[: nalm(30)]
    with pytest.raises(ValueError, match="observed_b_alm reaches l = 20, below the template's band limit 30"):
        delensing.delensing_spectra(e_alm[: nalm(20)], template, lensed_bb=np.ones(41))
    with pytest.raises(ValueError, match="noise_bb must be finite or \\+inf"):
        delensing.delensing_spectra(e_alm, template, noise_bb=np.full(41, np.nan), lensed_bb=np.ones(41))
    with pytest.raises(ValueError, match="lensed_bb has 10 entries"):
        delensing.delensing_spectra(e_alm, template, lensed_bb=np.ones(10))
    with pytest.raises(ValueError, match="noise_bb is infinite at every l >= 2"):
        delensing.delensing_spectra(e_alm, template, noise_bb=np.full(41, np.inf), lensed_bb=np.ones(41))


def test_delens_maps_runs_the_whole_recipe(fiducial):
    # the recipe is the composition template_inputs -> wiener_filter_phi -> delens with the experiment's B
    # noise and the lensed BB: identical arrays to running the steps by hand (same numbers, same order)
    from types import SimpleNamespace

    experiment = lensrec.Experiment(name="small", noise_temperature=3.0, beam_fwhm=30.0, ell_max_polarization=60)
    sky = lensrec.simulate_sky(experiment, nside=32, lmax=80, lmax_margin=40, seed=2, nthreads=1)
    phi_hat = truncate_alm(sky.phi_alm, 60, sky.lmax_unlensed)
    n0 = np.full(61, 1e-8)
    n0[:2] = np.nan
    e_wiener, b_observed, _ = delensing.template_inputs(sky.maps, experiment, fiducial, lmax=60, nthreads=1)
    phi_wiener = delensing.wiener_filter_phi(phi_hat, n0, fiducial.phi)
    by_hand = delensing.delens(b_observed, e_wiener, phi_wiener, 60, noise_bb=experiment.noise_spectrum("B", 60),
                               lensed_bb=fiducial.lensed["BB"], nthreads=1)  # fmt: skip
    steps = []
    recipe = lensrec.delens_maps(sky.maps, phi_hat, experiment, fiducial, n0=n0, lmax=60, nthreads=1,
                                 progress=lambda fraction, message: steps.append(fraction))  # fmt: skip
    assert np.array_equal(recipe.residual_alm, by_hand.residual_alm)
    assert np.array_equal(recipe.efficiency, by_hand.efficiency, equal_nan=True)
    assert recipe.alens_residual == by_hand.alens_residual and steps == sorted(steps) and steps[-1] == 1.0
    reconstruction = SimpleNamespace(phi_alm=phi_hat, n0={"gradient": n0})  # a Reconstruction's two fields
    again = lensrec.delens_maps(sky.maps, reconstruction, experiment, fiducial, lmax=60, nthreads=1)
    assert np.array_equal(again.residual_alm, by_hand.residual_alm)
    with pytest.raises(ValueError, match="n0 is needed"):
        lensrec.delens_maps(sky.maps, phi_hat, experiment, fiducial, lmax=60)
