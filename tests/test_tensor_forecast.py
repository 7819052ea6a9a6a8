import math

import numpy as np
import pytest

import lensrec
from lensrec import sigma_r
from lensrec.tensor_forecast import alens_residual, power_law_foreground_bb, tensor_fisher

ARCMIN = math.pi / 10800.0


def _white_noise(level_uk_arcmin, lmax):
    noise = np.full(lmax + 1, (level_uk_arcmin * ARCMIN) ** 2)
    noise[:2] = np.inf
    return noise


def test_sigma_r_matches_a_direct_fisher_sum(fiducial):
    # common practice (Knox 1995, PRD 52, 4307; Tegmark, Taylor & Heavens 1997, ApJ 480, 22): for one
    # parameter, F = sum_l f_sky (2l+1)/2 (dC_l/dr / C_l^total)^2 and sigma(r) = F^-1/2; written out here
    # term by term, independently of the library's vectorized sum.
    lensing = np.array(fiducial.lensed["BB"][:401])
    tensor = np.array(fiducial.tensor["BB"][:401])
    noise = _white_noise(2.0, 400)
    fisher = 0.0
    for ell in range(20, 301):
        total = lensing[ell] + noise[ell]
        fisher += 0.6 * (2 * ell + 1) / 2.0 * (tensor[ell] / total) ** 2
    expected = fisher**-0.5
    got = sigma_r(lensing, noise, tensor, 0.6, 20, 300)
    assert got == pytest.approx(expected, rel=1e-12)  # the same sum in another order: float rounding only
    # with r > 0 its own tensor power enters the variance (same formula, r C^t added to the total)
    fisher_r = sum(
        0.6 * (2 * ell + 1) / 2.0 * (tensor[ell] / (0.05 * tensor[ell] + lensing[ell] + noise[ell])) ** 2
        for ell in range(20, 301)
    )
    assert sigma_r(lensing, noise, tensor, 0.6, 20, 300, r=0.05) == pytest.approx(fisher_r**-0.5, rel=1e-12)


def test_sigma_r_scales_as_one_over_root_sky_fraction(fiducial):
    # common practice: mode counting makes F proportional to f_sky, so sigma(r) ∝ f_sky^(-1/2) exactly
    lensing, tensor = fiducial.lensed["BB"][:301], fiducial.tensor["BB"][:301]
    noise = _white_noise(3.0, 300)
    full = sigma_r(lensing, noise, tensor, 1.0, 2, 300)
    for sky_fraction in (0.5, 0.1, 0.01):
        assert sigma_r(lensing, noise, tensor, sky_fraction, 2, 300) == pytest.approx(
            full / math.sqrt(sky_fraction), rel=1e-12
        )


def test_sigma_r_reaches_the_cosmic_variance_limit_without_lensing_or_noise(fiducial):
    # common practice: with no lensing and no noise, each mode measures r to sigma(C)/C = sqrt(2/(2l+1)),
    # so sigma(r) = r sqrt(2 / (f_sky sum_l (2l+1))) = r sqrt(2 / (f_sky ((lmax+1)^2 - lmin^2))).
    tensor = fiducial.tensor["BB"][:301]
    r = 0.01
    limit = r * math.sqrt(2.0 / (0.3 * (301**2 - 2**2)))
    previous = np.inf
    for scale in (1e-1, 1e-3, 1e-6):
        lensing = scale * fiducial.lensed["BB"][:301]
        noise = _white_noise(scale * 1.0, 300)
        value = sigma_r(lensing, noise, tensor, 0.3, 2, 300, r=r)
        assert limit < value < previous  # approaches the limit from above as lensing and noise vanish
        previous = value
    # at scale 1e-6 the lensing plus noise is <= 2.7e-4 of r C^t at every l used, which moves sigma(r) by at
    # most that fraction: 1e-3 leaves a factor ~4 of headroom over this bound
    assert previous == pytest.approx(limit, rel=1e-3)
    exact = sigma_r(np.zeros(301), np.zeros(301), tensor, 0.3, 2, 300, r=r)
    assert exact == pytest.approx(limit, rel=1e-12)  # closed form: float rounding only


def test_lower_residual_lensing_lowers_sigma_r(fiducial):
    # common practice: removing lensing B-mode power can only shrink the variance and so sigma(r)
    lensing, tensor = fiducial.lensed["BB"][:301], fiducial.tensor["BB"][:301]
    noise = _white_noise(1.0, 300)
    values = [sigma_r(a * lensing, noise, tensor, 0.1, 30, 300) for a in (1.0, 0.5, 0.1)]
    assert values[0] > values[1] > values[2]


@pytest.mark.parametrize(
    "change, error, match",
    [
        ({"lensed_bb": np.ones(100)}, ValueError, "lensed_bb has 100 entries"),
        ({"noise_bb": np.full(301, np.nan)}, ValueError, "noise_bb contains NaN"),
        ({"lensed_bb": np.full(301, np.inf)}, ValueError, "lensed_bb contains 301 non-finite"),
        ({"tensor_bb": -np.ones(301)}, ValueError, "tensor_bb must be non-negative"),
        ({"lensed_bb": np.ones((2, 301))}, ValueError, "lensed_bb must have 1 dimension"),
        ({"noise_bb": "flat"}, TypeError, "noise_bb must be a numeric array"),
        ({"sky_fraction": 0.0}, ValueError, "sky_fraction must be > 0"),
        ({"sky_fraction": 1.5}, ValueError, "sky_fraction must be <= 1"),
        ({"ell_min": 1}, ValueError, "ell_min must be >= 2"),
        ({"ell_min": 200, "ell_max": 100}, ValueError, "inverted"),
        ({"ell_max": 2.5}, TypeError, "ell_max must be an integer"),
        ({"r": -0.1}, ValueError, "r must be >= 0"),
        ({"lensed_bb": np.zeros(301), "noise_bb": np.zeros(301)}, ValueError, "degenerate"),
        ({"noise_bb": np.full(301, np.inf)}, ValueError, "no multipole"),
    ],
)
def test_sigma_r_refuses_bad_input(change, error, match):
    ell = np.arange(301)
    arguments = {
        "lensed_bb": np.full(301, 1e-6),
        "noise_bb": np.full(301, 1e-6),
        "tensor_bb": np.where(ell >= 2, 1e-4, 0.0),
        "sky_fraction": 0.5,
        "ell_min": 2,
        "ell_max": 300,
    }
    arguments.update(change)
    with pytest.raises(error, match=match):
        sigma_r(**arguments)


def test_sigma_r_is_exported():
    assert "sigma_r" in lensrec.__all__ and lensrec.sigma_r is sigma_r
    assert "delensing_forecast" in lensrec.__all__


# ----------------------------------------------------------------------------------- delensing forecast
def _toy_n0(size, level=2e-8):
    """A toy reconstruction noise flat in [L(L+1)]^2 N0 / 2pi (equal to C^pp near L ~ 500 for 2e-8)."""
    big_l = np.arange(size, dtype=float)
    n0 = level * 2 * np.pi / np.maximum(big_l * (big_l + 1), 1.0) ** 2
    n0[:2] = np.nan
    return n0


def test_forecast_without_delensing_matches_a_direct_fisher_sum(fiducial):
    # reference library: camb's lensed BB (fiducial file) and the Knox (1995) noise N = (Delta pi/10800)^2
    # exp(l(l+1) sigma_b^2), both written out here; Fisher sum as in Knox 1995 (PRD 52, 4307). The forecast
    # uses our own lensed BB, which matches camb's to <= 0.26% at l <= 2500 (test_lensed_spectra.py), so sigma(r)
    # may differ by at most about that: allow 0.5%.
    experiment = lensrec.load_experiment("deep_highland")
    result = lensrec.delensing_forecast(experiment, n0=_toy_n0(fiducial.lmax + 1), lmax=600)
    sigma_b = experiment.beam_fwhm * ARCMIN / math.sqrt(8 * math.log(2))
    fisher = 0.0
    for ell in range(experiment.ell_min, 601):
        noise = (experiment.noise_polarization * ARCMIN) ** 2 * math.exp(ell * (ell + 1) * sigma_b**2)
        total = fiducial.lensed["BB"][ell] + noise
        fisher += experiment.sky_fraction * (2 * ell + 1) / 2 * (fiducial.tensor["BB"][ell] / total) ** 2
    assert (result.ell_min, result.ell_max) == (experiment.ell_min, 600)
    assert result.sigma_r_lensed == pytest.approx(fisher**-0.5, rel=5e-3)


def test_delensing_lowers_sigma_r_and_the_residual_amplitude(fiducial):
    # common practice: a better reconstruction (lower N0) leaves less lensing B-mode power, so A_lens^res falls
    # below 1 and sigma(r) shrinks, monotonically in N0; no reconstruction (N0 = inf) changes nothing.
    experiment = lensrec.load_experiment("deep_highland")
    size = fiducial.lmax + 1
    results = [
        lensrec.delensing_forecast(experiment, n0=_toy_n0(size, level), lmax=500) for level in (1e-7, 2e-8, 2e-9)
    ]
    alens = [item.alens_residual for item in results]
    assert 1.0 > alens[0] > alens[1] > alens[2] > 0.0
    delensed = [item.sigma_r_delensed for item in results]
    assert results[0].sigma_r_lensed > delensed[0] > delensed[1] > delensed[2]
    for item in results:
        used = slice(item.ell_min, item.ell_max + 1)
        assert np.all(item.residual_bb[used] < item.lensed_bb[used])
        assert item.improvement > 1.0
    none = lensrec.delensing_forecast(experiment, n0=np.full(size, np.inf), lmax=500, template_e_noise=False)
    assert none.alens_residual == pytest.approx(1.0, rel=1e-12)  # identical spectra: float rounding only
    assert none.sigma_r_delensed == pytest.approx(none.sigma_r_lensed, rel=1e-12)


def test_forecast_sigma_r_scales_as_one_over_root_sky_fraction(fiducial):
    # common practice: only the mode count depends on f_sky, so sigma(r) ∝ f_sky^(-1/2) exactly
    experiment = lensrec.load_experiment("wide_lowland")
    n0 = _toy_n0(fiducial.lmax + 1)
    wide = lensrec.delensing_forecast(experiment, n0=n0, lmax=400)
    narrow = lensrec.delensing_forecast(experiment.replace(sky_fraction=0.1), n0=n0, lmax=400)
    ratio = math.sqrt(experiment.sky_fraction / 0.1)
    assert narrow.sigma_r_lensed == pytest.approx(wide.sigma_r_lensed * ratio, rel=1e-12)
    assert narrow.sigma_r_delensed == pytest.approx(wide.sigma_r_delensed * ratio, rel=1e-12)
    assert narrow.alens_residual == pytest.approx(wide.alens_residual, rel=1e-12)


def test_perfect_delensing_without_noise_reaches_the_cosmic_variance_limit(fiducial):
    # common practice: with no instrument noise and a noise-free reconstruction (N0 = 0) nothing but the
    # primordial B modes is left (the scalar unlensed BB is zero), so sigma(r) = r sqrt(2 / (f_sky sum (2l+1))).
    # E must be measured to l >= lmax + ell_margin = 2300 for the template to be complete (E modes above the
    # survey's cut are missing from it and leave first-order B modes), hence ell_max_polarization = 4000.
    experiment = lensrec.Experiment(
        name="ideal",
        noise_temperature=0.0,
        noise_polarization=0.0,
        beam_fwhm=0.0,
        ell_min=2,
        ell_max_polarization=4000,
        sky_fraction=0.5,
    )
    result = lensrec.delensing_forecast(experiment, n0=np.zeros(fiducial.lmax + 1), lmax=300, r=0.01)
    assert result.ell_max == 300 and np.all(result.residual_bb == 0.0)
    limit = 0.01 * math.sqrt(2.0 / (0.5 * (301**2 - 2**2)))
    assert result.sigma_r_delensed == pytest.approx(limit, rel=1e-12)  # closed form: float rounding only
    assert result.alens_residual == 0.0
    assert result.sigma_r_lensed > 2 * limit  # lensing B modes dominate the variance at r = 0.01 (common practice)
    # the same survey measuring E only to l = 300: the template lacks E above 300 and B-mode power remains
    cut = lensrec.delensing_forecast(experiment.replace(ell_max_polarization=300), n0=np.zeros(fiducial.lmax + 1))
    assert cut.alens_residual > 0.5


def test_forecast_carries_the_delensing_bias_warning_and_serializes(fiducial, tmp_path):
    result = lensrec.delensing_forecast("deep_highland", n0=_toy_n0(fiducial.lmax + 1), lmax=300)
    assert any("delensing bias" in note for note in result.notes)
    assert "Delensing bias" in lensrec.delensing_forecast.__doc__
    from lensrec.io import read_json, write_json

    write_json(tmp_path / "forecast.json", result.to_dict())
    back = read_json(tmp_path / "forecast.json")
    assert back["alens_residual"] == pytest.approx(result.alens_residual, rel=1e-15)
    assert len(back["residual_bb"]) == 301


def test_alens_residual_is_the_weighted_mean_ratio():
    # the definition written out: sum w (C^res / C^lens) / sum w with w = (2l+1) (C^lens / (C^res + N))^2
    ell = np.arange(201, dtype=float)
    lensed = 1e-6 * (1 + ell / 100)
    residual = lensed * np.linspace(0.2, 0.6, 201)
    noise = np.full(201, 5e-7)
    noise[150:] = np.inf
    w = (2 * ell[10:150] + 1) * (lensed[10:150] / (residual[10:150] + noise[10:150])) ** 2
    expected = np.sum(w * residual[10:150] / lensed[10:150]) / np.sum(w)
    assert alens_residual(lensed, residual, noise, 10, 200) == pytest.approx(expected, rel=1e-13)


@pytest.mark.parametrize(
    "arguments, error, match",
    [
        ({"experiment": 3.0}, TypeError, "experiment must be an Experiment"),
        ({"experiment": "no_such_survey"}, ValueError, "no experiment file or shipped experiment"),
        ({"spectra": {"TT": 1}}, TypeError, "spectra must be a lensrec.Spectra"),
        ({"n0": None}, ValueError, "n0 is required"),
        ({"n0": "flat"}, TypeError, "n0 must be a numeric array"),
        ({"lmax": 5000}, ValueError, "lmax must be <= 4000"),
        ({"lmax": 100, "ell_min_b": 200}, ValueError, "the B-mode range is empty"),
        ({"r": -1.0}, ValueError, "r must be >= 0"),
    ],
)
def test_delensing_forecast_refuses_bad_input(fiducial, arguments, error, match):
    call = {"experiment": "deep_highland", "n0": _toy_n0(fiducial.lmax + 1), "lmax": 200}
    call.update(arguments)
    with pytest.raises(error, match=match):
        lensrec.delensing_forecast(**call)


# ------------------------------------------------------------------ r with the lensing amplitude free
def _fisher_inputs(fiducial, lmax=300):
    ell = np.arange(lmax + 1)
    return {
        "lensed_bb": np.array(fiducial.lensed["BB"][: lmax + 1]),
        "noise_bb": _white_noise(2.0, lmax),
        "tensor_bb": np.array(fiducial.tensor["BB"][: lmax + 1]),
        "sky_fraction": 0.4,
        "ell_min": 20,
        "ell_max": lmax,
        "r": 0.01,
        "foreground_bb": np.where(ell >= 2, 3e-7 * (np.maximum(ell, 2) / 80.0) ** -2.42, 0.0),
    }


def test_two_parameter_fisher_with_the_lensing_amplitude_fixed_is_sigma_r(fiducial):
    # common practice (Tegmark, Taylor & Heavens 1997, ApJ 480, 22): fixing a parameter leaves F_rr, so the
    # conditional sigma(r) = F_rr^-1/2 is the one-parameter forecast; only summation order differs.
    inputs = _fisher_inputs(fiducial)
    inputs.pop("foreground_bb")
    result = tensor_fisher(**inputs)
    assert result.parameters == ("r", "alens")
    assert result.sigma_r_conditional == pytest.approx(sigma_r(**inputs), rel=1e-12)
    fixed = tensor_fisher(**inputs, vary_alens=False)
    assert fixed.parameters == ("r",)
    assert fixed.sigma_r_marginalized == pytest.approx(sigma_r(**inputs), rel=1e-12)


def test_fisher_matches_a_direct_two_parameter_sum(fiducial):
    # Tegmark, Taylor & Heavens 1997, ApJ 480, 22: F_ij = sum_l f_sky (2l+1)/2 dC/dp_i dC/dp_j / C^2 and the
    # marginalized error sqrt((F^-1)_rr); written out here with the 2x2 inverse in closed form.
    inputs = _fisher_inputs(fiducial)
    inputs.pop("foreground_bb")
    f_rr = f_ra = f_aa = 0.0
    for ell in range(20, 301):
        total = 0.01 * inputs["tensor_bb"][ell] + inputs["lensed_bb"][ell] + inputs["noise_bb"][ell]
        modes = 0.4 * (2 * ell + 1) / 2.0 / total**2
        f_rr += modes * inputs["tensor_bb"][ell] ** 2
        f_ra += modes * inputs["tensor_bb"][ell] * inputs["lensed_bb"][ell]
        f_aa += modes * inputs["lensed_bb"][ell] ** 2
    marginalized = math.sqrt(f_aa / (f_rr * f_aa - f_ra**2))
    result = tensor_fisher(**inputs)
    assert result.fisher[0, 1] == pytest.approx(f_ra, rel=1e-12)  # float rounding only
    assert result.sigma_r_marginalized == pytest.approx(marginalized, rel=1e-9)  # a 2x2 inverse: rounding only
    assert result.sigma_r_conditional == pytest.approx(f_rr**-0.5, rel=1e-12)
    # the lensing BB and the tensor BB overlap at l < 150, so marginalizing costs something measurable
    assert result.sigma_r_marginalized > 1.01 * result.sigma_r_conditional
    assert -1.0 < result.correlation_r_alens < 0.0  # more lensing mimics more r: anti-correlated (common practice)


def test_marginalizing_never_lowers_sigma_r(fiducial):
    # common practice: (F^-1)_rr >= 1/F_rr for any positive-definite F (Cauchy-Schwarz), and freeing a third
    # parameter at the same variance can only widen it further
    inputs = _fisher_inputs(fiducial)
    foreground = inputs.pop("foreground_bb")
    for scale in (0.0, 0.3, 1.0):
        lensing = scale * inputs["lensed_bb"]
        three = tensor_fisher(**{**inputs, "lensed_bb": lensing}, foreground_bb=foreground)
        # the same variance with the foreground power counted as fixed noise: r and A_lens only
        two = tensor_fisher(**{**inputs, "lensed_bb": lensing, "noise_bb": inputs["noise_bb"] + foreground})
        assert three.sigma_r_conditional == pytest.approx(two.sigma_r_conditional, rel=1e-12)
        assert three.sigma_r_marginalized >= two.sigma_r_marginalized >= two.sigma_r_conditional
    assert three.parameters == ("r", "alens", "foreground")
    assert three.sigma_r_marginalized > 1.01 * two.sigma_r_marginalized  # the dust-like slope overlaps r


def test_a_zero_residual_amplitude_is_held_fixed(fiducial):
    # perfect delensing leaves no lensing B power: its amplitude has no derivative and cannot move r
    inputs = _fisher_inputs(fiducial)
    inputs.pop("foreground_bb")
    inputs["lensed_bb"] = np.zeros(301)
    result = tensor_fisher(**inputs)
    assert result.parameters == ("r",) and "alens is held fixed" in result.notes[0]
    assert result.sigma_r_marginalized == pytest.approx(sigma_r(**inputs), rel=1e-12)


def test_proportional_nuisance_spectra_are_refused(fiducial):
    inputs = _fisher_inputs(fiducial)
    inputs["foreground_bb"] = 2.0 * inputs["lensed_bb"]
    with pytest.raises(ValueError, match="singular"):
        tensor_fisher(**inputs)
    inputs["foreground_bb"] = -inputs["lensed_bb"]
    with pytest.raises(ValueError, match="foreground_bb must be non-negative"):
        tensor_fisher(**inputs)


def test_power_law_foreground_has_the_stated_slope():
    # Planck Collaboration Int. XXX 2016, A&A 586, A133: dust D_l^BB ∝ l^-0.42
    fg = power_law_foreground_bb(500, 0.02)
    ell = np.arange(501)
    d_ell = ell * (ell + 1) * fg / (2 * math.pi)
    assert d_ell[80] == pytest.approx(0.02, rel=1e-12)
    assert d_ell[320] / d_ell[80] == pytest.approx(4.0**-0.42, rel=1e-12)
    with pytest.raises(ValueError, match="amplitude must be >= 0"):
        power_law_foreground_bb(500, -1.0)


def test_delensing_forecast_reports_marginalized_and_conditional_sigma_r(fiducial):
    experiment = lensrec.load_experiment("deep_highland")
    fg = power_law_foreground_bb(500, 1e-3)
    result = lensrec.delensing_forecast(experiment, n0=_toy_n0(fiducial.lmax + 1), lmax=500, foreground_bb=fg)
    assert result.sigma_r_delensed_marginalized >= result.sigma_r_delensed
    assert result.sigma_r_lensed_marginalized >= result.sigma_r_lensed
    assert result.sigma_r_delensed_marginalized < result.sigma_r_lensed_marginalized
    data = result.to_dict()
    assert data["sigma_r_delensed_marginalized"] == result.sigma_r_delensed_marginalized
    assert len(data["foreground_bb"]) == 501


# ------------------------------------------------ the Wiener residual includes the noise-lensed E
def test_wiener_residual_includes_the_b_modes_of_the_reconstruction_noise(fiducial):
    # Smith, Hanson, LoVerde, Hirata & Zahn 2012, JCAP 06, 014: with phi^WF = rho^2 (phi + n), n of power N0
    # and rho^2 = C/(C + N0), the template's power K[W C^EE, rho^4 (C + N0)] equals its cross with the lensing
    # B modes, so the residual is K[C^EE, C^pp(1 - rho^2)] + K[(1 - W) C^EE, rho^2 C^pp] and no separate
    # noise-lensing term K[W C^EE, rho^4 N0] adds to it. Checked on a first-order simulation (lensing B and
    # template both first order, Hu 2000, PRD 62, 043007) with N0 = C^pp (rho^2 = 1/2), where that extra term
    # would be ~49% of the residual. Tolerance: 4 sigma of the band power, sqrt(2/nu), nu = sum (2l+1).
    from lensrec import delensing
    from lensrec.harmonics import scale_alm
    from lensrec.sky import gaussian_alm

    lmax_b, lmax_s = 400, 1200
    rng = np.random.default_rng(3)
    ee, pp = np.array(fiducial.unlensed["EE"][: lmax_s + 1]), np.array(fiducial.phi[: lmax_s + 1])
    ell = np.arange(lmax_s + 1.0)
    n0 = pp.copy()
    e_noise = np.where(ell >= 2, 2e-6 * (ell / 500.0) ** 2, 0.0)
    wiener_e = np.where(ee > 0, ee / np.where(ee > 0, ee + e_noise, 1.0), 0.0)
    rho2 = np.where(pp > 0, 0.5, 0.0)
    e, phi = gaussian_alm(ee, lmax_s, rng), gaussian_alm(pp, lmax_s, rng)
    e_obs, phi_hat = e + gaussian_alm(e_noise, lmax_s, rng), phi + gaussian_alm(n0, lmax_s, rng)
    lensing_b = delensing.lensing_b_template(e, phi, lmax_b, method="first_order", nthreads=2)
    template = delensing.lensing_b_template(
        scale_alm(e_obs, wiener_e, lmax_s), scale_alm(phi_hat, rho2, lmax_s), lmax_b, method="first_order", nthreads=2
    )
    residual = lensrec.auto_spectrum(lensing_b - template)

    def kernel(a, b):
        return lensrec.first_order_lensed_bb(a, b, lmax_b, ell_margin=lmax_s - lmax_b)

    forecast = kernel(ee, pp * (1 - rho2)) + kernel((1 - wiener_e) * ee, rho2 * pp)
    noise_lensing = kernel(wiener_e * ee, rho2**2 * n0)
    for lo, hi in ((30, 100), (100, 200), (200, 400)):
        band = slice(lo, hi + 1)
        modes = 2 * np.arange(lo, hi + 1) + 1
        ratio = np.sum(modes * residual[band]) / np.sum(modes * forecast[band])
        assert abs(ratio - 1) < 4 * math.sqrt(2 / np.sum(modes)), (lo, hi, ratio)
        assert np.sum(modes * noise_lensing[band]) / np.sum(modes * forecast[band]) > 0.4  # the test can tell


def test_docstring_examples_run():
    import doctest

    from lensrec import tensor_forecast

    assert doctest.testmod(tensor_forecast).failed == 0
