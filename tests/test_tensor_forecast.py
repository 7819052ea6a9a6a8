import math

import numpy as np
import pytest

import lensrec
from lensrec import sigma_r

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
    for fsky in (0.5, 0.1, 0.01):
        assert sigma_r(lensing, noise, tensor, fsky, 2, 300) == pytest.approx(full / math.sqrt(fsky), rel=1e-12)


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
        ({"bb_lensing": np.ones(100)}, ValueError, "bb_lensing has 100 entries"),
        ({"bb_noise": np.full(301, np.nan)}, ValueError, "bb_noise contains NaN"),
        ({"bb_lensing": np.full(301, np.inf)}, ValueError, "bb_lensing contains 301 non-finite"),
        ({"bb_tensor_r1": -np.ones(301)}, ValueError, "bb_tensor_r1 must be non-negative"),
        ({"bb_lensing": np.ones((2, 301))}, ValueError, "bb_lensing must have 1 dimension"),
        ({"bb_noise": "flat"}, TypeError, "bb_noise must be a numeric array"),
        ({"sky_fraction": 0.0}, ValueError, "sky_fraction must be > 0"),
        ({"sky_fraction": 1.5}, ValueError, "sky_fraction must be <= 1"),
        ({"ell_min": 1}, ValueError, "ell_min must be >= 2"),
        ({"ell_min": 200, "ell_max": 100}, ValueError, "inverted"),
        ({"ell_max": 2.5}, TypeError, "ell_max must be an integer"),
        ({"r": -0.1}, ValueError, "r must be >= 0"),
        ({"bb_lensing": np.zeros(301), "bb_noise": np.zeros(301)}, ValueError, "degenerate"),
        ({"bb_noise": np.full(301, np.inf)}, ValueError, "no multipole"),
    ],
)
def test_sigma_r_refuses_bad_input(change, error, match):
    ell = np.arange(301)
    arguments = {
        "bb_lensing": np.full(301, 1e-6),
        "bb_noise": np.full(301, 1e-6),
        "bb_tensor_r1": np.where(ell >= 2, 1e-4, 0.0),
        "sky_fraction": 0.5,
        "ell_min": 2,
        "ell_max": 300,
    }
    arguments.update(change)
    with pytest.raises(error, match=match):
        sigma_r(**arguments)


def test_sigma_r_is_exported():
    assert "sigma_r" in lensrec.__all__ and lensrec.sigma_r is sigma_r
