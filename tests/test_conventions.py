"""The sign of the C^BB term in the EB response (docs/conventions.md, "Signs").

With unlensed C^BB = C^EE and C^EB = 0 the E ↔ B symmetry of a spin-2 field makes the two terms of f^EB
equally strong: the + sign (lensrec's) responds fully to lensing, the other sign not at all.
"""

from __future__ import annotations

import numpy as np
import pytest

import lensrec
from lensrec import harmonics
from lensrec.estimator_noise import estimator_responses, standard_factors
from lensrec.estimator_weights import QuadraticEstimator, response_kernel


def _symmetric_spectra(no_bb_in_weights=False):
    """Fiducial spectra with unlensed C^BB = C^EE (and 'lensed' = unlensed, so weights and filter agree)."""
    fiducial = lensrec.fiducial_spectra()
    unlensed = {key: np.array(value) for key, value in fiducial.unlensed.items()}
    unlensed["BB"] = unlensed["EE"].copy()
    weights = dict(unlensed, BB=np.zeros_like(unlensed["EE"])) if no_bb_in_weights else dict(unlensed)
    return lensrec.Spectra(
        unlensed=weights,
        lensed=dict(unlensed),
        phi=np.array(fiducial.phi),
        tensor=dict(fiducial.tensor),
        metadata=dict(fiducial.metadata),
    )


def _experiment(lmax):
    return lensrec.Experiment(
        name="symmetric", noise_temperature=0.5, beam_fwhm=1.0, ell_min=2,
        ell_max_temperature=lmax, ell_max_polarization=lmax,
    )  # fmt: skip


def _responses(lmax, lmax_L):
    """R of the + sign and − sign EB estimators (unlensed weights) to the true lensing and to themselves."""
    experiment = _experiment(lmax)
    factors = standard_factors(experiment, _symmetric_spectra(), lmax, weights="unlensed")
    for key in ("TT", "EE", "TE"):
        factors.add(f"nobb:{key}", factors.values(f"cmb:{key}", lmax))
    factors.add("nobb:BB", np.zeros(lmax + 1))
    true = response_kernel("EB", "gradient", "cmb")
    # f_true = f_E + f_B (the C^EE and C^BB terms); the other sign is f_E − f_B = 2 f_E − f_true
    flipped = response_kernel("EB", "gradient", "nobb").times(2.0) + true.times(-1.0)

    def estimator(kernel):
        weight = kernel.conjugate().times(first=("inverse:E",), second=("inverse:B",))
        return QuadraticEstimator("EB", "gradient", weight, 1)

    values = estimator_responses(
        [estimator(true), estimator(flipped), estimator(flipped)], [true, true, flipped], factors, lmax, lmax_L, 1
    )
    return [np.real(v) for v in values]


def test_the_two_eb_terms_respond_equally_when_bb_equals_ee():
    # The symmetry the simulation below relies on (it fails if the spin ±2 kernels S± are wrong); the sign
    # itself is fixed by the simulation and by test_estimator_noise.test_eb_sign_from_the_polarization_symmetry.
    lmax, lmax_L = 120, 60
    own, flipped_to_true, flipped_own = _responses(lmax, lmax_L)
    L = slice(2, lmax_L + 1)
    assert np.all(own[L] > 0) and np.all(flipped_own[L] > 0)
    # R(f_E − f_B, f_E + f_B) = R_EE − R_BB = 0 by the E ↔ B symmetry (docs/conventions.md): zero to
    # rounding of the quadrature sums, whose terms are of size R
    assert np.max(np.abs(flipped_to_true[L] / flipped_own[L])) < 1e-9


@pytest.mark.validate
def test_simulated_cross_over_input_is_one_for_the_plus_sign_and_zero_for_the_other():
    """Measured (docs/conventions.md): + sign 0.973 (expected scatter 0.020), other sign −0.000."""
    from lensrec.filtering import IsotropicFilter
    from lensrec.power import cross_spectrum
    from lensrec.reconstruction import reconstruct_filtered

    lmax, lmax_L = 1024, 512
    experiment = _experiment(lmax)
    spectra = _symmetric_spectra()
    sky = lensrec.simulate_sky(
        experiment, spectra=spectra, nside=512, lmax=lmax, lmax_margin=300, seed=11, noise=False, nthreads=2
    )
    ell = harmonics.ell_of_alm(lmax)
    fields = IsotropicFilter(experiment, spectra=spectra, nthreads=2).filter_alm(
        sky.lensed_alm * experiment.beam(lmax)[ell]
    )
    phi = harmonics.truncate_alm(sky.phi_alm, lmax_L, sky.lmax_unlensed)
    common = dict(estimator="EB", lmax_L=lmax_L, weights="unlensed", nthreads=2)
    plus = reconstruct_filtered(fields, experiment, spectra=spectra, **common)
    e_term = reconstruct_filtered(fields, experiment, spectra=_symmetric_spectra(no_bb_in_weights=True), **common)
    _, _, flipped_own = _responses(lmax, lmax_L)
    scale = np.zeros(lmax_L + 1)
    scale[2:] = 1.0 / flipped_own[2:]
    minus = (2 * e_term.unnormalized["EB"]["gradient"] - plus.unnormalized["EB"]["gradient"]) * scale[
        harmonics.ell_of_alm(lmax_L)
    ]
    L = np.arange(lmax_L + 1)
    band = L >= 10
    signal = cross_spectrum(phi)
    n0 = np.nan_to_num(plus.n0["gradient"], nan=np.inf)
    theory = spectra.phi[: lmax_L + 1]
    weight = ((2 * L + 1) * theory / (theory + n0) ** 2)[band]  # inverse-variance weights of an amplitude

    def ratio(alm):
        return float(np.sum(weight * cross_spectrum(alm, phi)[band]) / np.sum(weight * signal[band]))

    # scatter of a cross with the realization itself: var = C_in N0 / (2L+1) per L
    sigma = 1.0 / np.sqrt(np.sum(((2 * L + 1) * signal / n0)[band]))
    # 3 sigma plus 3%: unlensed weights against an exactly lensed sky (higher-order response, percent
    # level, common practice)
    assert abs(ratio(plus.phi_alm) - 1.0) < 3 * sigma + 0.03
    # the other sign would give ≈ 1 if it responded like the + sign; 0.1 is five times the scatter above
    assert abs(ratio(minus)) < 0.1
