"""Transforms against healpy (the reference library) and exact Gauss–Legendre quadrature.

Tolerances: the transforms are exact up to floating-point rounding accumulated over O(lmax) terms, so
agreement to 1e-10 relative (max |diff| / max |ref|) leaves four or more orders of margin over the ~1e-13
rounding of double precision at these sizes.
"""

import healpy
import numpy as np
import pytest

from lensrec import harmonics

RTOL = 1e-10  # double-precision rounding (~1e-13) with a wide margin


def random_alm(rng, lmax, ncomp=1, spin=0):
    """Complex Gaussian coefficients, m = 0 real, zero below ℓ = spin (a valid real spin field)."""
    size = harmonics.nalm(lmax)
    alm = rng.normal(size=(ncomp, size)) + 1j * rng.normal(size=(ncomp, size))
    alm[:, : lmax + 1] = alm[:, : lmax + 1].real
    alm[:, harmonics.ell_of_alm(lmax) < spin] = 0.0
    return alm


def relative(a, b):
    return np.max(np.abs(np.asarray(a) - np.asarray(b))) / np.max(np.abs(b))


@pytest.mark.parametrize("nside, lmax", [(32, 64), (64, 150), (128, 383)])
def test_spin0_synthesis_matches_healpy(rng, nside, lmax):
    alm = random_alm(rng, lmax)[0]
    ours = harmonics.alm2map(alm, nside, lmax, nthreads=2)
    reference = healpy.alm2map(alm, nside, lmax=lmax)  # reference library: healpy
    assert relative(ours, reference) < RTOL


@pytest.mark.parametrize("spin", [1, 2, 3])
def test_spin_synthesis_matches_healpy_alm2map_spin(rng, spin):
    nside, lmax = 64, 150
    alm = random_alm(rng, lmax, 2, spin)
    ours = harmonics.alm2map(alm, nside, lmax, spin=spin, nthreads=2)
    reference = np.array(healpy.alm2map_spin(list(alm), nside, spin, lmax))  # reference library: healpy
    assert relative(ours, reference) < RTOL


def test_spin1_gradient_is_healpy_first_derivative(rng):
    # spin 1 with G = sqrt(l(l+1)) phi_lm gives (d phi/d theta, d phi/d phi / sin theta): healpy.alm2map_der1
    nside, lmax = 64, 150
    phi = random_alm(rng, lmax)[0]
    ell = harmonics.ell_of_alm(lmax)
    gradient = np.array([phi * np.sqrt(ell * (ell + 1.0)), 0 * phi])
    d_theta, d_phi = harmonics.alm2map(gradient, nside, lmax, spin=1, nthreads=2)
    _, ref_theta, ref_phi = healpy.alm2map_der1(phi, nside, lmax=lmax)  # reference library: healpy
    assert relative(d_theta, ref_theta) < RTOL
    assert relative(d_phi, ref_phi) < RTOL


def test_tqu_synthesis_and_iterative_analysis_match_healpy(rng):
    nside, lmax = 64, 150
    alm = random_alm(rng, lmax, 3, spin=2)
    maps = harmonics.alm2map_tqu(alm, nside, lmax, nthreads=2)
    reference_maps = np.array(healpy.alm2map(list(alm), nside, lmax=lmax, pol=True))  # healpy
    assert relative(maps, reference_maps) < RTOL
    ours = harmonics.map2alm_tqu(maps, lmax, jacobi_iterations=3, nthreads=2)
    reference = healpy.map2alm(reference_maps, lmax=lmax, iter=3, use_weights=False)  # healpy
    assert relative(ours, reference) < RTOL


@pytest.mark.parametrize("jacobi_iterations", [0, 1, 3])
def test_spin0_analysis_matches_healpy(rng, jacobi_iterations):
    nside, lmax = 32, 95
    m = rng.normal(size=12 * nside * nside)
    ours = harmonics.map2alm(m, lmax, jacobi_iterations=jacobi_iterations, nthreads=2)
    reference = healpy.map2alm(m, lmax=lmax, iter=jacobi_iterations, use_weights=False)  # healpy
    assert relative(ours, reference) < RTOL


def test_adjoint_is_the_transpose(rng):
    # <A a, m> = <a, A^T m> with the real inner product over (Re, Im) pairs, counting m > 0 twice
    # (a real map's coefficients), checked on random vectors: exact to rounding
    nside, lmax = 32, 64
    alm = random_alm(rng, lmax, 2, spin=2)
    m = rng.normal(size=(2, 12 * nside * nside))
    left = np.sum(harmonics.alm2map(alm, nside, lmax, spin=2, nthreads=2) * m)
    back = harmonics.adjoint_alm2map(m, lmax, spin=2, nthreads=2)
    weight = np.where(np.arange(alm.shape[1]) <= lmax, 1.0, 2.0)
    right = np.sum(weight * (alm.real * back.real + alm.imag * back.imag))
    assert abs(left - right) < RTOL * abs(left)


@pytest.mark.parametrize("spin", [0, 1, 2, 3])
def test_gauss_legendre_round_trip_is_exact(rng, spin):
    # exact quadrature for band-limited fields (Driscoll & Healy 1994): identity to rounding
    lmax = 96
    grid = harmonics.GLGrid.for_lmax(lmax)
    alm = random_alm(rng, lmax, 1 if spin == 0 else 2, spin)
    back = grid.analysis(grid.synthesis(alm, lmax, spin, nthreads=2), lmax, spin, nthreads=2)
    assert relative(back, alm) < 1e-12  # ~1e-14 rounding at this size, 100x margin


def test_gauss_legendre_grid_is_exact_for_a_wider_field(rng):
    # analysis to lmax of a field band-limited at lmax_field on the grid for (lmax, lmax_field) is exact
    lmax, lmax_field = 40, 120
    grid = harmonics.gl_grid_for_band_limits(lmax, lmax_field)
    alm = random_alm(rng, lmax_field)
    back = grid.analysis(grid.synthesis(alm, lmax_field, nthreads=2), lmax, nthreads=2)[0]
    assert relative(back, harmonics.truncate_alm(alm[0], lmax)) < 1e-12
    # one ring fewer is no longer exact (the check can fail)
    smaller = harmonics.GLGrid(grid.ntheta - 1, grid.nphi)
    worse = smaller.analysis(smaller.synthesis(alm, lmax_field, nthreads=2), lmax, nthreads=2)[0]
    assert relative(worse, harmonics.truncate_alm(alm[0], lmax)) > 1e-6


def test_gauss_legendre_weights_sum_to_the_sphere():
    grid = harmonics.GLGrid(20, 41)
    assert abs(grid.weights.sum() * grid.nphi - 4 * np.pi) < 1e-12  # exact quadrature of 1
    assert grid.positions().shape == (20 * 41, 2)


@pytest.mark.parametrize("spin", [0, 2])
def test_positions_match_healpix_synthesis(rng, spin):
    # synthesis at the HEALPix pixel centers equals the HEALPix synthesis (healpy) to the requested accuracy
    nside, lmax = 32, 64
    alm = random_alm(rng, lmax, 1 if spin == 0 else 2, spin)
    theta, phi = healpy.pix2ang(nside, np.arange(12 * nside * nside))
    if spin == 0:
        reference = healpy.alm2map(alm[0], nside, lmax=lmax)
        ours = harmonics.alm2positions(alm[0], theta, phi, spin=0, lmax=lmax, epsilon=1e-10, nthreads=2)
    else:
        reference = np.array(healpy.alm2map_spin(list(alm), nside, 2, lmax))
        ours = harmonics.alm2positions(alm, theta, phi, spin=2, lmax=lmax, epsilon=1e-10, nthreads=2)
    # epsilon is an L2 relative bound; the max-norm error is a few times larger at most
    assert relative(ours, reference) < 1e-8


def test_positions_near_and_at_the_poles(rng):
    # a pure Y_10 is sqrt(3/4pi) cos(theta): exact values at and next to the poles
    lmax = 8
    alm = np.zeros(harmonics.nalm(lmax), complex)
    alm[1] = 1.0
    theta = np.array([0.0, 1e-9, np.pi - 1e-9, np.pi])
    values = harmonics.alm2positions(alm, theta, np.zeros(4), lmax=lmax, epsilon=1e-12, nthreads=1)
    assert np.allclose(values, np.sqrt(3 / (4 * np.pi)) * np.cos(theta), rtol=0, atol=1e-11)


def test_scale_and_layout_helpers():
    assert harmonics.lmax_from_nalm(harmonics.nalm(37)) == 37
    with pytest.raises(ValueError, match="not \\(lmax\\+1\\)\\(lmax\\+2\\)/2"):
        harmonics.lmax_from_nalm(7)
    ell = harmonics.ell_of_alm(3)
    idx = healpy.Alm.getlm(3)[0]  # healpy's layout
    assert np.array_equal(ell, idx)


@pytest.mark.parametrize(
    "call, match",
    [
        (lambda: harmonics.alm2map(np.zeros(harmonics.nalm(10), complex), 12, 10), "power of two"),
        (lambda: harmonics.alm2map(np.zeros(harmonics.nalm(100), complex), 16, 100), "exceeds 3\\*nside-1"),
        (lambda: harmonics.alm2map(np.zeros(harmonics.nalm(10), complex), 16, 11), "lmax=11 needs"),
        (lambda: harmonics.alm2map(np.zeros(harmonics.nalm(10), complex), 16, 10, spin=4), "spin must be one of"),
        (lambda: harmonics.alm2map(np.zeros(harmonics.nalm(10), complex), 16, 10, spin=2), "shape \\(2, 66\\)"),
        (lambda: harmonics.alm2map(np.full(harmonics.nalm(10), np.nan, complex), 16, 10), "non-finite"),
        (lambda: harmonics.map2alm(np.zeros(100), 10), "not 12\\*nside\\^2"),
        (lambda: harmonics.map2alm(np.zeros(3072), 10, spin=2), "shape \\(2, npix\\)"),
        (lambda: harmonics.GLGrid(10, 20).analysis(np.zeros((1, 10, 20)), 10), "too high"),
        (lambda: harmonics.alm2positions(np.zeros(6, complex), np.array([4.0]), np.array([0.0])), "theta must lie"),
    ],
)
def test_bad_input_is_refused(call, match):
    with pytest.raises((ValueError, TypeError), match=match):
        call()


def test_high_lmax_needs_the_override(rng):
    alm = random_alm(rng, 60)[0]
    out = harmonics.alm2map(alm, 16, 60, allow_high_lmax=True, nthreads=1)
    assert relative(out, healpy.alm2map(alm, 16, lmax=60)) < RTOL
