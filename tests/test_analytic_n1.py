"""Analytic N1 (flat-sky FFT evaluation) against the exact full-sky N0, the literature and Monte-Carlo N1."""

import numpy as np
import pytest

import lensrec
from lensrec.analytic_n1 import analytic_n1, default_n1_L_grid

PAIRS = ("TT", "TE", "EE", "TB", "EB")


@pytest.fixture(scope="module")
def small_experiment():
    return lensrec.Experiment(
        name="n1 test", noise_temperature=5.0, beam_fwhm=2.0, ell_max_temperature=1000, ell_max_polarization=1000
    )


@pytest.fixture(scope="module")
def all_pairs(small_experiment):
    return analytic_n1(small_experiment, estimators=PAIRS + ("MV", "GMV"), L_grid=[100, 300, 700], nthreads=1)


def test_grid_n0_matches_the_exact_full_sky_n0(small_experiment, all_pairs):
    """The flat-sky translation of the separable weights (every spin phase, both Wick terms, the joint
    estimator's nine parts) reproduces N0.

    Reference: the exact full-sky N0 (Okamoto & Hu 2003, PRD 67, 083002) of lensrec.reconstruction_noise; the
    flat-sky limit agrees with it to O(1%) at L ≥ 100 (Hu & Okamoto 2002, ApJ 574, 566). Tolerance 3%: that
    approximation plus the grid's cell size (3·1001/128 ≈ 23 multipoles). A wrong sign of one spin-2 term
    changes TE, EE or EB by tens of percent.
    """
    exact = lensrec.reconstruction_noise(small_experiment, estimators=PAIRS + ("MV", "GMV"), nthreads=1)
    grid = all_pairs.L_grid
    for label in PAIRS + ("MV", "GMV"):
        for component in ("gradient", "curl"):
            ratio = all_pairs.n0_grid[label][component] / exact.n0[label][component][grid]
            np.testing.assert_allclose(ratio, 1.0, atol=0.03, err_msg=f"{label} {component}")


def test_n1_signs_and_mv(all_pairs):
    """Gradient N1 of TT and EB is positive (Kesden, Cooray & Kamionkowski 2003, PRD 67, 123507, Fig. 3);
    MV combines the pair covariance with weights that sum to one, so it cannot exceed the largest |N1^αβ|."""
    for label in ("TT", "EB"):
        assert np.all(all_pairs.n1_grid[label]["gradient"] > 0)
    for component in ("gradient", "curl"):
        bound = np.max(np.abs(all_pairs.covariance[component]), axis=(0, 1))
        mv = all_pairs.n1_grid["MV"][component]
        assert np.all(np.isfinite(mv)) and np.all(np.abs(mv) <= bound * (1 + 1e-9))
        # the joint estimator uses the same modes as MV with better weights: its N1 is of the same size
        ratio = all_pairs.n1_grid["GMV"][component] / mv
        assert np.all((ratio > 0.5) & (ratio < 2.0)), ratio
    cov = all_pairs.covariance["gradient"]
    np.testing.assert_allclose(cov, np.transpose(cov, (1, 0, 2)), rtol=1e-10, atol=1e-30)


def test_tt_n1_has_the_size_reported_in_the_literature():
    """TT at 30 µK-arcmin, 5' beam, ℓ_max 2500: N1 is comparable to C^φφ at L ≈ 1000 and a few percent of it
    at L ≈ 100 (from memory of Hanson, Challinor, Efstathiou & Bielewicz 2011, PRD 83, 043005, Fig. 2, and
    Kesden, Cooray & Kamionkowski 2003, Fig. 3). Tolerance: a factor 2 (the figures are read by eye, and the
    fiducial cosmology differs)."""
    e = lensrec.Experiment(
        name="planck-like", noise_temperature=30.0, beam_fwhm=5.0, ell_max_temperature=2500, ell_max_polarization=2500
    )
    result = analytic_n1(e, estimators="TT", components="gradient", L_grid=[100, 1000], nthreads=1)
    phi = lensrec.fiducial_spectra().phi
    ratio = result.n1_grid["TT"]["gradient"] / phi[[100, 1000]]
    assert 0.01 < ratio[0] < 0.06, ratio
    assert 0.5 < ratio[1] < 2.0, ratio


def test_matrix_reproduces_n1_and_its_response_to_c_phi_phi(small_experiment):
    """N1 is linear in C^φφ (Kesden et al. 2003, eq. for N1): the matrix reproduces N1 and predicts N1 for a
    C^φφ scaled by a function linear between grid points, to rounding."""
    grid = [50, 150, 400]
    kwargs = dict(estimators=("EB",), components=("gradient",), L_grid=grid, grid_size=64, nthreads=1)
    base = analytic_n1(small_experiment, matrix=True, **kwargs)
    fiducial = lensrec.fiducial_spectra()
    phi_grid = fiducial.phi[grid]
    m = base.matrix["EB"]["gradient"]
    np.testing.assert_allclose(m @ phi_grid, base.n1_grid["EB"]["gradient"], rtol=1e-9)
    # scale C^φφ by 1 + 0.5 (L − 50)/350 clipped to [1, 1.5]: linear between the grid points 50 … 400
    ell = np.arange(fiducial.phi.size)
    scale = 1.0 + 0.5 * np.clip((ell - 50) / 350.0, 0.0, 1.0)
    changed = lensrec.Spectra(
        unlensed=fiducial.unlensed, lensed=fiducial.lensed, phi=fiducial.phi * scale, tensor=fiducial.tensor
    )
    direct = analytic_n1(small_experiment, spectra=changed, **kwargs).n1_grid["EB"]["gradient"]
    predicted = m @ (phi_grid * scale[grid])
    # the scale is linear between grid points and flat outside them, which the hat basis represents exactly
    np.testing.assert_allclose(predicted, direct, rtol=1e-6)


def test_interpolated_n1_passes_through_the_grid(small_experiment, all_pairs):
    values = all_pairs.n1["TT"]["gradient"]
    np.testing.assert_allclose(values[all_pairs.L_grid], all_pairs.n1_grid["TT"]["gradient"], rtol=1e-12)
    assert np.all(np.isnan(values[:100])) and np.all(np.isfinite(values[100:701]))
    assert default_n1_L_grid(3000)[0] == 2 and default_n1_L_grid(3000)[-1] == 3000


@pytest.mark.parametrize(
    "kwargs, message",
    [
        ({"weights": "lensedd"}, "weights must be one of"),
        ({"L_grid": [1, 10]}, "L_grid must be integers"),
        ({"L_grid": [10, 5000]}, "L_grid must be integers"),
        ({"estimators": "TX"}, "unknown estimator"),
        ({"grid_size": 8}, "grid_size must be >= 16"),
    ],
)
def test_bad_input_is_refused(small_experiment, kwargs, message):
    with pytest.raises(ValueError, match=message):
        analytic_n1(small_experiment, **kwargs)
