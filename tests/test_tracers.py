"""External tracers of φ: validation, correlated simulation, optimal combination and delensing with them."""

import math

import numpy as np
import pytest

import lensrec
from lensrec import delensing, tracers
from lensrec.harmonics import scale_alm
from lensrec.sky import gaussian_alm


def _phi(fiducial, lmax):
    phi = np.array(fiducial.phi[: lmax + 1])
    phi[:2] = 0.0
    return phi


def _two_tracers(phi, rho_a=0.8, rho_b=0.5, shared=0.3):
    """Two tracers I = phi + s + own (units of phi), correlated through phi and a shared part s."""
    own_a = phi * (1 / rho_a**2 - 1 - shared)
    own_b = phi * (1 / rho_b**2 - 1 - shared)
    a = tracers.make_tracer("a", phi * (1 + shared) + own_a, phi, np.zeros_like(phi))
    b = tracers.make_tracer("b", phi * (1 + shared) + own_b, phi, np.zeros_like(phi))
    return tracers.tracer_set([a, b], {("a", "b"): phi * (1 + shared)}, phi_spectrum=phi)


# ------------------------------------------------------------------------------------------- forecast
def test_single_tracer_correlation_and_the_combination_formula():
    # Sherwin & Schmittfull 2015, PRD 92, 043005: one tracer, rho^2 = (C^Ip)^2 / (C^pp (C^II + N)); with an
    # independent-noise internal reconstruction the two combine to rho^2 = c^T C^-1 c / C^pp, here written
    # out with the 2x2 inverse in closed form.
    phi = np.array([0.0, 0.0, 2.0, 3.0, 1.0])
    glow = tracers.make_tracer(
        "glow", np.array([0, 0, 4.0, 5.0, 2.0]), np.array([0, 0, 2.0, -1.0, 1.0]), np.full(5, 1.0)
    )
    n0 = np.array([np.nan, np.nan, 2.0, 1.0, np.inf])
    result = tracers.combine_tracers(tracers.tracer_set(glow, phi_spectrum=phi), n0=n0)
    assert result.inputs == ("glow", "internal")
    for L in (2, 3):
        cii, cip, pp, noise = glow.auto[L] + 1.0, glow.cross_phi[L], phi[L], n0[L]
        assert result.rho2_single["glow"][L] == pytest.approx(cip**2 / (pp * cii), rel=1e-12)
        matrix = np.array([[cii, cip], [cip, pp + noise]])
        vector = np.array([cip, pp])
        assert result.rho2[L] == pytest.approx(vector @ np.linalg.inv(matrix) @ vector / pp, rel=1e-12)
    # where the internal reconstruction is absent (N0 = inf) the tracer alone is used
    assert result.rho2[4] == pytest.approx(result.rho2_single["glow"][4], rel=1e-12)
    assert result.weights[1, 4] == 0.0


def test_combining_never_does_worse_than_the_best_single_tracer(fiducial):
    # common practice (Sherwin & Schmittfull 2015, PRD 92, 043005): each single input is one admissible
    # linear combination, so the optimal one has rho^2 >= max_i rho_i^2 at every L. Checked on random
    # positive-definite sets and on the shipped pair with an internal reconstruction.
    rng = np.random.default_rng(8)
    phi = _phi(fiducial, 60)
    for _ in range(20):
        n = rng.integers(1, 4)
        root = rng.normal(size=(61, n + 1, n + 1))
        covariance = np.einsum("lij,lkj->lik", root, root) * phi[:, None, None]
        scale = np.where(phi > 0, phi / np.where(phi > 0, covariance[:, 0, 0], 1.0), 0.0)
        items = [
            tracers.make_tracer(
                f"t{i}",
                covariance[:, i + 1, i + 1],
                covariance[:, 0, i + 1] * np.sqrt(scale),
                rng.uniform(0, 1, 61) * phi,
            )
            for i in range(n)
        ]
        # rescale phi's row so that C^pp is the fiducial one: I_i' = I_i, phi' = sqrt(scale) phi
        cross = {(f"t{i}", f"t{j}"): covariance[:, i + 1, j + 1] for i in range(n) for j in range(i + 1, n)}
        n0 = np.where(np.arange(61) >= 2, rng.uniform(0.2, 5.0, 61) * phi, np.nan)
        result = tracers.combine_tracers(tracers.tracer_set(items, cross, phi_spectrum=phi), n0=n0)
        best = np.max(np.array(list(result.rho2_single.values())), axis=0)
        assert np.all(result.rho2[2:] >= best[2:] * (1 - 1e-10))
        assert np.all(result.rho2 <= 1.0)


def test_combined_forecast_delenses_at_least_as_well_as_each_input(fiducial):
    # common practice: A_lens^res falls as rho^2 rises at every L (residual C^pp (1 - rho^2)); the combined
    # forecast is never worse than the best single input. Holds for a forecast, not for one realization.
    experiment = lensrec.load_experiment("deep_highland")
    shipped = tracers.load_tracers("glow_and_motes")
    L = np.arange(shipped.lmax_L + 1.0)
    n0 = 4e-8 * 2 * np.pi / np.maximum(L * (L + 1), 1) ** 2  # a toy internal N0
    n0[:2] = np.nan
    combined = tracers.combine_tracers(shipped, n0=n0)
    alens = {}
    for name, rho2 in (*combined.rho2_single.items(), ("combined", combined.rho2)):
        noise = tracers._effective_noise(combined.phi, rho2)
        alens[name] = lensrec.delensing_forecast(experiment, n0=noise, lmax=300).alens_residual
    assert alens["combined"] <= min(value for key, value in alens.items() if key != "combined")
    assert 0.0 < alens["combined"] < 1.0


# ------------------------------------------------------------------------------------------ simulation
def test_simulated_tracer_correlates_with_the_input_phi_as_given(fiducial):
    # The band correlation coefficient of nu real Gaussian modes scatters by (1 - rho^2)/sqrt(nu) (common
    # practice: the large-sample error of a correlation coefficient, Fisher 1915, Biometrika 10, 507).
    # Asserted within 2 sigma in each band, and the tracer-tracer correlation likewise.
    lmax_L = 800
    shipped = tracers.load_tracers("glow_and_motes", lmax_L=lmax_L)
    phi_alm = gaussian_alm(shipped.phi, lmax_L, lensrec.seeding.rng_for(4, 0, "phi"))
    maps = tracers.simulate_tracers(shipped, phi_alm, seed=4)
    assert maps.shape == (2, phi_alm.size)
    again = tracers.simulate_tracers(shipped, phi_alm, seed=4)
    assert np.array_equal(maps, again)  # reproducible from the seed
    pp = lensrec.auto_spectrum(phi_alm)
    for i, tracer in enumerate(shipped.tracers):
        ii = lensrec.auto_spectrum(maps[i])
        ip = lensrec.cross_spectrum(maps[i], phi_alm)
        total = tracer.auto + tracer.noise
        rho = tracer.correlation(shipped.phi)
        for lo, hi in ((20, 100), (100, 300), (300, 800)):
            # the sample correlation of the fields whitened by their theory power, over the band's modes
            ell = np.arange(lo, hi + 1)
            modes = 2 * ell + 1
            band = slice(lo, hi + 1)
            measured = np.sum(modes * ip[band] / np.sqrt(total[band] * shipped.phi[band])) / math.sqrt(
                np.sum(modes * ii[band] / total[band]) * np.sum(modes * pp[band] / shipped.phi[band])
            )
            given = np.sum(modes * rho[band]) / np.sum(modes)
            sigma = (1 - given**2) / math.sqrt(np.sum(modes))
            assert abs(measured - given) < 2 * sigma, (tracer.name, lo, hi, measured, given, sigma)
    # the tracer-tracer cross-spectrum is reproduced too (amplitude within 4 sigma of its Gaussian scatter)
    cross = lensrec.cross_spectrum(maps[0], maps[1])
    band = slice(100, 801)
    ell = np.arange(100, 801)
    ratio = np.sum((2 * ell + 1) * cross[band]) / np.sum((2 * ell + 1) * shipped.cross[(0, 1)][band])
    assert abs(ratio - 1) < 4 * math.sqrt(2.0 / np.sum(2 * ell + 1)) * 2  # correlated pair: ≤ 2x an auto's scatter


def test_combined_tracer_residual_matches_its_forecast(fiducial):
    # Residual lensing B after delensing with the combined (tracers + internal) phi: forecast C^pp(1 - rho^2)
    # lensing plus the E-noise term (Smith et al. 2012, JCAP 06, 014; Sherwin & Schmittfull 2015, PRD 92,
    # 043005), against a first-order simulation (lensing B and template both first order, Hu 2000, PRD 62,
    # 043007). Asserted within 10% per band: band-power scatter <= 4 sqrt(2/nu) <= 6% at l >= 30, plus the
    # forecast's non-perturbative lensing, which differs from first order by ~1% at l <= 400.
    # Measured: residual / forecast = 1.020, 0.987, 1.006 in the three bands.
    lmax_b, lmax_s = 400, 1200
    shipped = tracers.load_tracers("glow_and_motes", lmax_L=lmax_s)
    phi_spectrum = shipped.phi
    ee = np.array(fiducial.unlensed["EE"][: lmax_s + 1])
    ell = np.arange(lmax_s + 1.0)
    e_noise = np.where(ell >= 2, 2e-6 * (ell / 500.0) ** 2, 0.0)  # a rising E noise (µK^2)
    n0 = np.where(ell >= 2, 2.0 * phi_spectrum, np.nan)  # a noisy internal reconstruction, rho^2 = 1/3
    rng = np.random.default_rng(11)
    phi_alm = gaussian_alm(phi_spectrum, lmax_s, rng)
    e = gaussian_alm(ee, lmax_s, rng)
    e_obs = e + gaussian_alm(e_noise, lmax_s, rng)
    phi_hat = phi_alm + gaussian_alm(np.nan_to_num(n0), lmax_s, rng)
    tracer_alm = tracers.simulate_tracers(shipped, phi_alm, seed=11)
    combination = tracers.combine_tracers(shipped, n0=n0)
    phi_comb = tracers.combined_phi(combination, tracer_alm, phi_hat)
    wiener_e = np.where(ee > 0, ee / np.where(ee > 0, ee + e_noise, 1.0), 0.0)
    lensing_b = delensing.lensing_b_template(e, phi_alm, lmax_b, method="first_order", nthreads=2)
    template = delensing.lensing_b_template(
        scale_alm(e_obs, wiener_e, lmax_s), phi_comb, lmax_b, method="first_order", nthreads=2
    )
    residual = lensrec.auto_spectrum(lensing_b - template)
    margin = lmax_s - lmax_b
    forecast = lensrec.delensed_spectra(
        fiducial.unlensed,
        phi_spectrum,
        combination.effective_noise(),
        lmax_b,
        ell_margin=margin,
        ee_noise=e_noise,
        lensed_ee=ee,
    )["BB"]
    tracer_only = lensrec.auto_spectrum(
        lensing_b
        - delensing.lensing_b_template(
            scale_alm(e_obs, wiener_e, lmax_s),
            tracers.combined_phi(tracers.combine_tracers(shipped), tracer_alm),
            lmax_b,
            method="first_order",
            nthreads=2,
        )
    )
    for lo, hi in ((30, 100), (100, 200), (200, 400)):
        band = slice(lo, hi + 1)
        modes = 2 * np.arange(lo, hi + 1) + 1
        ratio = np.sum(modes * residual[band]) / np.sum(modes * forecast[band])
        assert abs(ratio - 1) < 0.10, (lo, hi, ratio)
        # adding the internal reconstruction removes more than the tracers alone (forecast and here)
        assert np.sum(modes * residual[band]) < np.sum(modes * tracer_only[band])


# ------------------------------------------------------------------------------------------- bad input
def test_negative_power_and_non_psd_covariances_are_refused(fiducial):
    phi = _phi(fiducial, 50)
    with pytest.raises(ValueError, match="auto must be non-negative"):
        tracers.make_tracer("x", -phi, phi, phi)
    with pytest.raises(ValueError, match="noise must be non-negative"):
        tracers.make_tracer("x", phi, phi, -phi)
    # |C^Ip|^2 > C^II C^pp: a correlation above one
    with pytest.raises(ValueError, match="not positive semidefinite at L = 2"):
        tracers.tracer_set(tracers.make_tracer("x", phi, 1.5 * phi, phi), phi_spectrum=phi)
    # each pair allowed, the three together not: rho(a,phi) = rho(b,phi) = 0.9 but rho(a,b) = -0.9
    good = _two_tracers(phi, 0.9, 0.9, 0.0)
    a, b = good.tracers
    with pytest.raises(ValueError, match="not positive semidefinite"):
        tracers.tracer_set([a, b], {("b", "a"): -0.9 * a.auto}, phi_spectrum=phi)
    with pytest.raises(ValueError, match="cross-spectrum of tracers 'a' and 'b' is missing"):
        tracers.tracer_set([a, b], phi_spectrum=phi)
    with pytest.raises(ValueError, match="unknown tracer pairs"):
        tracers.tracer_set([a, b], {("a", "b"): a.auto * 0, ("a", "c"): a.auto}, phi_spectrum=phi)
    with pytest.raises(ValueError, match="cross_with must be 'phi' or 'kappa'"):
        tracers.make_tracer("x", phi, phi, phi, cross_with="density")
    with pytest.raises(ValueError, match="needs tracers, an internal n0"):
        tracers.combine_tracers()


def test_toml_files_are_read_and_checked(tmp_path, fiducial):
    shipped = tracers.load_tracers("diffuse_glow")
    assert shipped.names == ("diffuse_glow",) and "diffuse_glow" in tracers.available_tracers()
    path = tmp_path / "t.toml"
    path.write_text(
        "[[tracer]]\nname = 'k'\ncross_with = 'kappa'\n"
        f"auto = {[1e-7] * 11}\ncross = {[0.0, 0.0] + [1e-8] * 9}\nnoise = {[0.0] * 11}\n"
    )
    loaded = tracers.load_tracers(path, phi_spectrum=fiducial.phi)
    # C^I kappa = L(L+1)/2 C^I phi (kappa = -laplacian(phi)/2; common practice)
    assert loaded.tracers[0].cross_phi[10] == pytest.approx(2e-8 / 110, rel=1e-12)
    path.write_text(f"[[tracer]]\nname = 'k'\nauto = {[-1.0] * 11}\ncross = {[0.0] * 11}\nnoise = {[0.0] * 11}\n")
    with pytest.raises(ValueError, match="auto must be non-negative"):
        tracers.load_tracers(path)
    path.write_text("[[tracer]]\nname = 'k'\nspectra = 'missing.txt'\n")
    with pytest.raises(ValueError, match="cannot read the spectra"):
        tracers.load_tracers(path)
    path.write_text("[tracers]\nname = 'k'\n")
    with pytest.raises(ValueError, match="unknown sections"):
        tracers.load_tracers(path)
    with pytest.raises(ValueError, match="not found; shipped tracers"):
        tracers.load_tracers("no_such_tracer")
