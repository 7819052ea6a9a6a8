"""Exact remapping by the deflection: rotation covariance (spins 0–3, with and without the polarization
rotation), a dipole deflection against the direct geometry, the deflection and κ maps, input checks."""

import healpy
import numpy as np
import pytest

import lensrec
from lensrec import harmonics, remapping, sky
from lensrec.harmonics import nalm, truncate_alm

ARCMIN = np.pi / 10800


def smooth_fields(rng, lmax_in):
    """A steeply falling CMB-like spectrum (so the lensed field has negligible power above lmax_in) and a
    large-scale phi with deflections of ~20 arcmin."""
    ell = np.arange(lmax_in + 1)
    cl = np.exp(-((ell / 30.0) ** 2))
    cl[:2] = 0
    teb = sky.gaussian_cmb_alm({"TT": cl, "EE": 0.5 * cl, "BB": 0.3 * cl, "TE": 0.2 * cl}, lmax_in, rng)
    cl_phi = np.where(ell <= 40, 1e-4 / (ell + 1.0) ** 4, 0.0)
    cl_phi[:2] = 0
    return teb, sky.gaussian_alm(cl_phi, lmax_in, rng)


def test_lensing_commutes_with_rotations(rng, monkeypatch):
    # Lensing is geometric: rotating the unlensed sky and phi, then lensing, equals lensing then rotating.
    # reference library: healpy.Rotator.rotate_alm. With parallel transport of Q/U this holds to the
    # quadrature residual of the lensed power above lmax_in (~1e-6 here, tolerance 2e-5); without the
    # polarization rotation E and B break it at the 1e-2 level, which the second half checks.
    lmax_in, lmax_out = 256, 128
    teb, phi = smooth_fields(rng, lmax_in)
    rotator = healpy.Rotator(rot=[30.0, 50.0, 20.0], deg=True)

    def rotate(alm):
        alm = np.atleast_2d(alm)
        return np.squeeze(np.array([rotator.rotate_alm(np.array(a)) for a in alm]))

    def covariance_error():
        lensed = remapping.lens_tqu_alm(teb, phi, lmax_out, epsilon=1e-12, nthreads=2)
        lensed_rotated = remapping.lens_tqu_alm(rotate(teb), rotate(phi), lmax_out, epsilon=1e-12, nthreads=2)
        return np.max(np.abs(lensed_rotated - rotate(lensed)), axis=1) / np.max(np.abs(lensed), axis=1)

    error = covariance_error()
    assert np.all(error < 2e-5), error
    lensing = np.max(np.abs(remapping.lens_tqu_alm(teb, phi, lmax_out, nthreads=2) - truncate_alm(teb, lmax_out)))
    assert lensing > 1e-2 * np.max(np.abs(teb))  # the deflection does change the field

    original = remapping._displace_rings

    def without_rotation(theta, phi_, d_theta, d_phi, loc, rotation, spin):
        original(theta, phi_, d_theta, d_phi, loc, rotation, spin)
        if rotation is not None:
            rotation[0], rotation[1] = 1.0, 0.0

    monkeypatch.setattr(remapping, "_displace_rings", without_rotation)
    broken = covariance_error()
    assert broken[0] < 2e-5 and np.all(broken[1:] > 1e-3), broken


def test_dipole_deflection_moves_points_along_meridians():
    # phi = c Y_10 ∝ cos(theta): d = grad phi = -c' sin(theta) e_theta, so T~(theta) = T(theta - c' sin theta)
    # exactly (a meridional shift); check at arbitrary points against a direct evaluation of T (healpy
    # conventions for Y_lm; exact geometry).
    lmax_in = lmax_out = 120
    ell = np.arange(lmax_in + 1)
    rng = np.random.default_rng(5)
    cl = np.exp(-((ell / 20.0) ** 2))
    t = sky.gaussian_alm(cl, lmax_in, rng)
    t[lmax_in + 1 :] = 0  # axisymmetric field (m = 0 only) so T depends on theta alone
    phi = np.zeros(nalm(lmax_in), complex)
    amplitude = 0.02  # radians of phi in the Y_10 coefficient
    phi[1] = amplitude
    lensed = remapping.lens_alm(t, phi, lmax_out, epsilon=1e-12, nthreads=2)
    theta = np.linspace(0.05, np.pi - 0.05, 50)
    slope = amplitude * np.sqrt(3 / (4 * np.pi))  # d(c Y_10)/d theta = -c sqrt(3/4pi) sin(theta)
    displaced = theta - slope * np.sin(theta)
    direct = harmonics.alm2positions(t, displaced, np.zeros_like(theta), lmax=lmax_in, epsilon=1e-12, nthreads=1)
    ours = harmonics.alm2positions(lensed, theta, np.zeros_like(theta), lmax=lmax_out, epsilon=1e-12, nthreads=1)
    # residual: the lensed field is truncated at lmax_out = 120, where its amplitude is ~ e^{-18} ~ 1e-8 of
    # the peak (C_l = e^{-(l/20)^2}), and epsilon = 1e-12: tolerance 1e-6
    assert np.max(np.abs(ours - direct)) < 1e-6 * np.max(np.abs(direct))
    # the opposite displacement is far off (the check is sensitive to the sign of d = grad phi)
    wrong = harmonics.alm2positions(
        t, theta + slope * np.sin(theta), np.zeros_like(theta), lmax=lmax_in, epsilon=1e-12, nthreads=1
    )
    assert np.max(np.abs(ours - wrong)) > 1e-2 * np.max(np.abs(direct))


def test_rms_deflection(fiducial):
    # theory: <|d|^2> = sum_L (2L+1)/(4pi) L(L+1) C_L^phiphi, about (2.5 arcmin)^2 (common practice).
    # Sampling variance of the sky average of |d|^2: sum_L ((2L+1)/(4pi) L(L+1))^2 2 C_L^2/(2L+1).
    lmax, nside = 1000, 512
    ell = np.arange(lmax + 1)
    weights = (2 * ell + 1) / (4 * np.pi) * ell * (ell + 1)
    theory = np.sqrt(np.sum(weights * fiducial.phi[: lmax + 1])) / ARCMIN
    assert 2.0 < theory < 3.0  # ≈ 2.5 arcmin, common practice
    sigma_d2 = np.sqrt(np.sum(weights**2 * 2 * fiducial.phi[: lmax + 1] ** 2 / (2 * ell + 1))) / ARCMIN**2
    phi = sky.gaussian_alm(fiducial.phi, lmax, lensrec.seeding.rng_for(4, 0, "phi"))
    maps = remapping.deflection_maps(phi, nside, lmax, nthreads=2)
    # 4 sigma of sampling variance plus 0.1% for the HEALPix pixel average of a field band-limited at 2 lmax
    assert abs(maps.rms_arcmin**2 - theory**2) < 4 * sigma_d2 + 1e-3 * theory**2
    # kappa = L(L+1) phi / 2 (docs/conventions.md): its map mean square is the kappa spectrum sum
    kappa_theory = np.sum((2 * ell + 1) / (4 * np.pi) * (ell * (ell + 1) / 2) ** 2 * healpy.alm2cl(phi))
    assert abs(np.mean(maps.kappa**2) / kappa_theory - 1) < 1e-2


def test_lens_alm_input_checks():
    phi = np.zeros(nalm(40), complex)
    with pytest.raises(ValueError, match="lmax_out=50 exceeds lmax_in=40"):
        remapping.lens_alm(np.zeros(nalm(40), complex), phi, 50)
    with pytest.raises(ValueError, match="shape \\(2, 861\\)"):
        remapping.lens_alm(np.zeros(nalm(40), complex), phi, 20, spin=2)
    with pytest.raises(ValueError, match="non-finite"):
        remapping.lens_alm(np.zeros(nalm(40), complex), np.full(nalm(40), np.nan, complex), 20)


@pytest.mark.parametrize("spin", [1, 3])
def test_spin1_and_spin3_lensing_commute_with_rotations(rng, spin):
    # the same geometric identity for the other spins lens_alm supports (the phase is e^{i s chi});
    # reference library: healpy.Rotator.rotate_alm; tolerance as in the spin-2 case
    lmax_in, lmax_out = 256, 128
    teb, phi = smooth_fields(rng, lmax_in)
    field = teb[1:].copy()
    field[:, harmonics.ell_of_alm(lmax_in) < spin] = 0.0
    rotator = healpy.Rotator(rot=[-40.0, 70.0, 10.0], deg=True)

    def rotate(alm):
        return np.array([rotator.rotate_alm(np.array(a)) for a in np.atleast_2d(alm)])

    lensed = remapping.lens_alm(field, phi, lmax_out, spin=spin, epsilon=1e-12, nthreads=2)
    lensed_rotated = remapping.lens_alm(rotate(field), rotate(phi)[0], lmax_out, spin=spin, epsilon=1e-12, nthreads=2)
    error = np.max(np.abs(lensed_rotated - rotate(lensed))) / np.max(np.abs(lensed))
    assert error < 2e-5


def test_kappa_map_is_minus_half_the_laplacian_of_phi():
    # on the sphere ∇²Y_LM = −L(L+1) Y_LM (common practice), so κ = −∇²φ/2 of a field of one multipole L is
    # L(L+1)/2 times the map of φ; reference synthesis: healpy.alm2map. Tolerance: double-precision rounding.
    lmax, nside = 24, 16
    rng = np.random.default_rng(11)
    ell, m = healpy.Alm.getlm(lmax)
    phi = 1e-4 * (rng.normal(size=nalm(lmax)) + 1j * rng.normal(size=nalm(lmax)))
    phi[m == 0] = phi[m == 0].real
    only_7 = np.where(ell == 7, phi, 0.0)
    expected = 28.0 * healpy.alm2map(only_7, nside, lmax=lmax)
    kappa = remapping.kappa_map(only_7, nside, nthreads=1)
    assert np.allclose(kappa, expected, rtol=0, atol=1e-12 * np.abs(expected).max())
    # lmax drops the higher multipoles: the L = 7 part alone survives a cut at L = 10
    with_high = only_7 + np.where(ell == 20, phi, 0.0)
    cut = remapping.kappa_map(with_high, nside, lmax=10, nthreads=1)
    assert np.allclose(cut, expected, rtol=0, atol=1e-12 * np.abs(expected).max())
    # the deflection maps carry the same κ map
    assert np.array_equal(remapping.deflection_maps(with_high, nside, nthreads=1).kappa,
                          remapping.kappa_map(with_high, nside, nthreads=1))  # fmt: skip
    with pytest.raises(ValueError, match="lmax=30 exceeds the band limit of phi_alm"):
        remapping.kappa_map(phi, nside, lmax=30)
