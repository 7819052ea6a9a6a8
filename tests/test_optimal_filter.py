import numpy as np
import pytest

import lensrec
from lensrec.optimal_filter import ConvergenceError, OptimalFilter
from lensrec.pixel_noise import PixelNoise


def _experiment(lmax):
    return lensrec.Experiment(
        noise_temperature=8.0, beam_fwhm=40.0, ell_max_temperature=lmax, ell_max_polarization=lmax
    )


@pytest.fixture(scope="module")
def small_sky():
    nside, lmax = 16, 32
    experiment = _experiment(lmax)
    sky = lensrec.simulate_sky(experiment, nside=nside, lmax=lmax, lmax_margin=16, seed=4, nthreads=1)
    return experiment, sky, nside, lmax


@pytest.fixture(scope="module")
def full_sky():
    nside, lmax = 64, 128
    experiment = _experiment(lmax)
    sky = lensrec.simulate_sky(experiment, nside=nside, lmax=lmax, lmax_margin=32, seed=3, nthreads=1)
    return experiment, sky, nside, lmax


@pytest.mark.parametrize("joint", [False, True])
def test_full_sky_uniform_noise_equals_the_isotropic_filter(full_sky, joint):
    experiment, sky, nside, lmax = full_sky
    noise = PixelNoise.uniform(experiment, nside)
    optimal = OptimalFilter(experiment, noise, lmax=lmax, joint=joint, cg_tolerance=1e-9, nthreads=1)
    fields = optimal.filter(sky.maps)
    reference = lensrec.IsotropicFilter(experiment, lmax=lmax, joint=joint, jacobi_iterations=3, nthreads=1).filter(
        sky.maps
    )  # converged HEALPix analysis (3 Jacobi steps), as the optimal filter solves to its tolerance
    # on the full sky with uniform noise (S^-1 + B^T Y^T N^-1 Y B)^-1 B^T Y^T N^-1 reduces to B/(B^2 S + N)
    # (Smith et al. 2007, PRD 76, 043510) up to HEALPix quadrature: the two differ only in how power above
    # lmax = 2 nside aliases into the fit (measured at nside 64: relative power errors 5e-12 (T; 3e-8 with
    # the joint filter, through TE), 4e-8 to 8e-8 (E), 1e-6 (B); bounds a few times that)
    for k, bound in enumerate((1e-7, 5e-7, 5e-6)):
        error = np.sum(np.abs(fields.alm[k] - reference.alm[k]) ** 2) / np.sum(np.abs(reference.alm[k]) ** 2)
        assert error < bound, ("TEB"[k], error)
    assert fields.joint is joint and fields.settings["filter"] == "optimal"
    assert 0 < fields.settings["cg_iterations"] < 30  # uniform full sky: the diagonal preconditioner is exact
    # phi from either set of fields: the lensing estimate agrees to 1e-3 (quadrature accuracy, see above)
    estimator = "GMV" if joint else "MV"
    phi_opt = lensrec.reconstruct_filtered(fields, experiment, estimator=estimator, lmax_L=lmax, nthreads=1)
    phi_iso = lensrec.reconstruct_filtered(reference, experiment, estimator=estimator, lmax_L=lmax, nthreads=1)
    difference = np.sum(np.abs(phi_opt.phi_alm - phi_iso.phi_alm) ** 2) / np.sum(np.abs(phi_iso.phi_alm) ** 2)
    assert difference < 1e-6  # amplitude error < 1e-3 (measured 6e-7 in power, 8e-4 in amplitude)


def _dense(operator, size, active):
    """The operator as a real matrix on (Re, Im) of the active coefficients (m = 0: real part only)."""
    columns = []
    lmax_index = active.shape[1]
    keys = []
    for field in range(3):
        for i in np.flatnonzero(active[field]):
            keys.append((field, i, 1.0))
            if i >= size:  # m > 0 (healpy layout: the first lmax + 1 entries have m = 0)
                keys.append((field, i, 1j))
    for field, i, unit in keys:
        vector = np.zeros((3, lmax_index), complex)
        vector[field, i] = unit
        out = operator(vector)
        columns.append([out[f, j].real if u == 1.0 else out[f, j].imag for f, j, u in keys])
    return np.array(columns).T, keys


def test_conjugate_gradient_agrees_with_a_dense_solve_on_a_patch(rng):
    nside, lmax = 8, 16
    experiment = _experiment(lmax)
    mask = lensrec.cap_mask(nside, 30.0, 20.0, 50.0)
    variance = rng.uniform(50.0, 500.0, size=12 * nside**2)
    noise = PixelNoise(variance, mask)
    optimal = OptimalFilter(experiment, noise, lmax=lmax, cg_tolerance=1e-11, cg_max_iterations=3000, nthreads=1)
    maps = rng.normal(scale=30.0, size=(3, 12 * nside**2))
    x, record = optimal.solve(maps)
    active = optimal._active_alm()
    matrix, keys = _dense(optimal.operator, lmax + 1, active)
    # the operator is symmetric in the real inner product of real fields, where m > 0 coefficients count
    # twice (a property of S^-1 + B Y^T N^-1 Y B; common practice)
    weights = np.array([1.0 if j < lmax + 1 else 2.0 for _, j, _ in keys])
    weighted = weights[:, None] * matrix
    np.testing.assert_allclose(weighted, weighted.T, rtol=1e-9, atol=1e-9 * np.abs(weighted).max())
    b = optimal.right_hand_side(maps)
    rhs = np.array([b[f, j].real if u == 1.0 else b[f, j].imag for f, j, u in keys])
    direct = np.linalg.solve(matrix, rhs)
    solved = np.array([x[f, j].real if u == 1.0 else x[f, j].imag for f, j, u in keys])
    # CG to 1e-11 against LAPACK's direct solve: agreement to 1e-6 relative (numerical precision)
    fields = np.array([f for f, _, _ in keys])
    for k in range(3):
        error = np.max(np.abs(solved - direct)[fields == k]) / np.max(np.abs(direct[fields == k]))
        assert error < 1e-6, ("TEB"[k], error)
    assert record["cg_iterations"] > 5  # a patch with varying noise is not solved by the preconditioner alone


def test_bad_input_is_refused_with_the_value(small_sky):
    experiment, sky, nside, lmax = small_sky
    mask = lensrec.cap_mask(nside, 0.0, 0.0, 30.0)
    noise = PixelNoise(np.full(12 * nside**2, 100.0), mask)
    with pytest.raises(ValueError, match="maps have nside 8 but the noise model and mask have nside 16"):
        OptimalFilter(experiment, noise, lmax=lmax, nthreads=1).filter(np.zeros((3, 12 * 8**2)))
    with pytest.raises(ConvergenceError, match="cg_max_iterations=2 .*cg_tolerance=1e-09"):
        OptimalFilter(experiment, noise, lmax=lmax, cg_tolerance=1e-9, cg_max_iterations=2, nthreads=1).filter(sky.maps)
    with pytest.raises(TypeError, match="noise must be a lensrec PixelNoise"):
        OptimalFilter(experiment, np.ones(12 * nside**2))
    with pytest.raises(ValueError, match="lmax=200 exceeds 3\\*nside-1=47"):
        OptimalFilter(experiment, noise, lmax=200)
    bad = np.full(12 * nside**2, 100.0)
    bad[np.flatnonzero(mask)[3]] = 0.0
    with pytest.raises(ValueError, match=f"T variance is 0.0 at pixel {np.flatnonzero(mask)[3]}"):
        PixelNoise(bad, mask)
    with pytest.raises(ValueError, match="zero everywhere"):
        PixelNoise(np.ones(12 * nside**2), np.zeros(12 * nside**2))
    maps = np.array(sky.maps)
    maps[1, 5] = np.nan
    with pytest.raises(ValueError, match="non-finite"):
        OptimalFilter(experiment, noise, lmax=lmax, nthreads=1).filter(maps)


def test_progress_callback_sees_every_iteration_and_can_cancel(small_sky):
    experiment, sky, nside, lmax = small_sky
    mask = lensrec.cap_mask(nside, 0.0, 0.0, 40.0)
    seen = []
    noise = PixelNoise(np.full(12 * nside**2, 100.0), mask)
    fields = OptimalFilter(experiment, noise, lmax=lmax, nthreads=1, callback=lambda i, r: seen.append((i, r))).filter(
        sky.maps
    )
    assert [i for i, _ in seen] == list(range(1, fields.settings["cg_iterations"] + 1))
    assert seen[-1][1] == fields.settings["cg_residual"] < fields.settings["cg_tolerance"]

    class Cancelled(Exception):
        pass

    def cancel(iteration, residual):
        if iteration == 3:
            raise Cancelled

    with pytest.raises(Cancelled):
        OptimalFilter(experiment, noise, lmax=lmax, nthreads=1, callback=cancel).filter(sky.maps)
