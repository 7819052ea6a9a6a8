"""Lensing suites end to end: the bias terms against analytic N0, the recovered lensing amplitude, N1, and
reproducibility (executors, resuming, checksums) at the level of the physics task.

Two suites at nside 256 are shared by the physics tests (module fixtures): Gaussian skies of the lensed CMB
(no lensing signal, so the exact Gaussian N0 applies) and lensed skies with N1 pairs. The reproducibility
tests use a tiny suite at nside 32.
"""

import json
import os
import shutil
import threading

import numpy as np
import pytest
import scipy.stats

import lensrec
from lensrec.bandpowers import Binning, fit_amplitude, lensing_bandpowers
from lensrec.biases import monte_carlo_n1
from lensrec.labels import SUITE_STAGES
from lensrec.power import cross_spectrum
from lensrec.suites import (
    estimate_key,
    lensing_suite_settings,
    n1_pair_estimates,
    open_lensing_suite,
    run_lensing_suite,
)

PHYSICS = dict(experiment="deep_highland", nside=256, lmax=512, lmax_L=400, nthreads=1)
POOL = dict(executor="processes", workers=2, progress=False)  # 2 workers of 1 thread: fastest on 2 cores
TINY = dict(
    experiment="deep_highland",
    nside=32,
    lmax=64,
    lmax_L=48,
    estimators="TT,EB",
    n_sims=4,
    seed=5,
    lmax_margin=32,
    n1=True,
    nthreads=1,
)


@pytest.fixture(scope="module")
def gaussian_suite(tmp_path_factory):
    # Gaussian skies: the lensed spectra as Gaussian fields (no remapping, so no margin is needed)
    settings = lensing_suite_settings(**PHYSICS, estimators="TT,EB", n_sims=6, seed=11, lensing=False, lmax_margin=0)
    return run_lensing_suite(settings, tmp_path_factory.mktemp("gaussian"), **POOL)


@pytest.fixture(scope="module")
def lensed_suite(tmp_path_factory):
    # N1 pairs on 4 of the 8 simulations: their paired construction has a small Monte-Carlo error. A margin of
    # 600 leaves lensed BB ~10% low near lmax (lensrec.simulate_sky); data and simulations share it, and every
    # bias here is measured on the simulations themselves.
    settings = lensing_suite_settings(**PHYSICS, estimators="EB", n_sims=8, seed=3, n1=True, n1_sims=4, lmax_margin=600)
    return run_lensing_suite(settings, tmp_path_factory.mktemp("lensed"), **POOL)


def _stored(suite):
    out = {}
    for stage in ("data", "simulations", "pairs"):
        cache = suite.cache(stage)
        out[stage] = {i: cache.load(i) for i in cache.finished()}
    return out


def _assert_identical(first, second):
    assert first.keys() == second.keys()
    for stage in first:
        assert sorted(first[stage]) == sorted(second[stage])
        for index, arrays in first[stage].items():
            assert sorted(arrays) == sorted(second[stage][index])
            for key, value in arrays.items():
                np.testing.assert_array_equal(value, second[stage][index][key], err_msg=f"{stage} {index} {key}")


# ----------------------------------------------------------------------------------------------- physics
def _realised_power_offset(suite, estimator):
    """Largest fractional offset of the data's power from the filter's total spectra, over the fields of the
    estimator and four multipole bands (the data's own cosmic variance)."""
    from lensrec.suites import _context

    total = _context(dict(suite.settings, role="data")).filter.total
    filtered = suite.data()["filtered"]
    lmax, worst = suite.settings["lmax"], 0.0
    for field in sorted(set(estimator)):
        k = "TEB".index(field)
        # C^{X-bar X-bar} C_tot is 1 on average inside the multipole cuts (X-bar = X / C_tot)
        power = cross_spectrum(filtered[k], lmax=lmax)[30:] * total[field * 2][30 : lmax + 1]  # ell_min = 30
        for lo, hi in ((30, 100), (100, 200), (200, 350), (350, lmax + 1)):
            worst = max(worst, abs(float(np.mean(power[lo - 30 : hi - 30])) - 1.0))
    return worst


@pytest.mark.slow
@pytest.mark.parametrize("estimator", ["TT", "EB"])
@pytest.mark.parametrize("component", ["gradient", "curl"])
def test_rdn0_and_mc_n0_of_gaussian_skies_match_the_analytic_n0(gaussian_suite, estimator, component):
    # For Gaussian skies with the filter's own total spectra, the ensemble mean of MC-N0 (and of RDN0) is the
    # Gaussian N0 of lensrec.reconstruction_noise exactly (Namikawa, Hanson & Takahashi 2013, MNRAS 431, 609,
    # eq. 41 and §3; Okamoto & Hu 2003, PRD 67, 083002, §III).
    # MC-N0: per bin the difference is Monte-Carlo noise; chi2 over the 8 bins with the quoted 1-sigma errors
    # plus a 0.5% systematic allowance (HEALPix analysis of maps at lmax = 2 nside, 3 Jacobi iterations). The
    # errors come from 5 pairs, so chi2 carries a Student-t inflation: 35 for 8 bins is PTE ~ 3e-5 for chi2_8
    # and ~ 1e-3 after it. A 5% error in the N0 scale gives chi2 > 60 (errors are 0.2-0.5% at L > 100).
    # RDN0 follows the data's realized spectra to first order (that is its purpose), and N0 is quadratic in
    # the legs' power, so it may differ from the ensemble N0 by up to twice the data's largest fractional power
    # offset (measured from the data, ~0.5-0.8% here); that is added as a further systematic allowance.
    result = lensing_bandpowers(gaussian_suite, estimator, component)
    analytic = result.terms["analytic_n0"]
    realized = 2.0 * _realised_power_offset(gaussian_suite, estimator)
    for name, allowance in (("mc_n0", 0.005), ("rdn0", np.hypot(0.005, realized))):
        sigma = np.hypot(result.term_errors[name], allowance * analytic)
        chi2 = float(np.sum(((result.terms[name] - analytic) / sigma) ** 2))
        assert chi2 < 35, (name, (result.terms[name] / analytic).round(4).tolist())
    # the inverse-variance mean of MC-N0 / N0 over the bins: 1 within 4 sigma plus the 0.5% allowance
    relative_error = result.term_errors["mc_n0"] / analytic
    weights = 1.0 / relative_error**2
    mean = np.sum(weights * result.terms["mc_n0"] / analytic) / np.sum(weights)
    assert abs(mean - 1.0) < 4.0 / np.sqrt(np.sum(weights)) + 0.005


@pytest.mark.slow
def test_gaussian_skies_have_no_lensing_signal_after_debiasing(gaussian_suite):
    # no lensing: the debiased gradient bandpowers scatter around zero (a null test, chi2 to zero); common practice
    result = lensing_bandpowers(gaussian_suite, "EB", "gradient")
    assert result.amplitude is None
    assert result.pte > 1e-3


@pytest.mark.slow
def test_bandpowers_recover_the_input_lensing_spectrum(lensed_suite):
    result = lensing_bandpowers(lensed_suite)
    binning, matrix = result.binning, result.binning.matrix(400)
    # 1) The data: A_lens = 1 within 3 sigma (sigma from the scatter of 8 simulations, cosmic variance of phi
    #    included), and against the data's own input phi (cosmic variance removed) within 3 sigma of the
    #    simulations' scatter of (A - A_input).
    assert abs(result.amplitude - 1.0) < 3 * result.amplitude_error
    data_input = matrix @ cross_spectrum(lensed_suite.data()["phi_input"])
    inputs = np.array([matrix @ cross_spectrum(lensed_suite.simulation(i)["phi_input"]) for i in range(8)])
    variance = result.errors**2
    a_input = fit_amplitude(inputs, result.theory, variance)
    sigma_diff = np.std(result.amplitude_simulations - a_input, ddof=1)
    assert abs(result.amplitude - fit_amplitude(data_input, result.theory, variance)) < 3 * sigma_diff
    # 2) Zero bias on average: the mean amplitude of the 8 simulations (debiased with MC-N0 and N1, which the
    #    auto-spectra do not share with the pairs that estimate them) is 1 within 3 sigma/sqrt(8); without N1
    #    it would be ~ 1.08 (N1/C ~ 6-13% below L = 250, see the N1 test), without the N0 factor of 2 far off.
    assert result.n1_computed
    spread = result.amplitude_error / np.sqrt(8)
    assert abs(np.mean(result.amplitude_simulations) - 1.0) < 3 * spread
    # 3) Every bandpower of the data within 4 sigma of the fiducial model, and a chi2 that is not extreme.
    assert np.all(np.abs(result.debiased - result.theory) < 4 * result.errors)
    assert result.pte > 1e-3
    assert binning.n_bins == result.debiased.size


@pytest.mark.slow
def test_the_analytic_normalization_needs_only_a_small_correction_on_the_full_sky(lensed_suite):
    # On the full sky with lensed-spectrum weights the analytic response is close to the true one: 1/rho^2
    # within 5% of one (from memory: the non-perturbative response differs from the first-order one at the
    # percent level below L ~ 500 for lensed weights), plus 4 sigma of its Monte-Carlo error.
    result = lensing_bandpowers(lensed_suite)
    assert np.all(np.abs(result.normalization - 1.0) < 0.05 + 4 * result.normalization_error)


@pytest.mark.slow
def test_mean_field_of_a_full_isotropic_sky_is_only_noise(lensed_suite):
    # No mask, white noise: the mean-field is zero, and the cross-spectrum of the two half means (n1 = n2 = 4
    # simulations) scatters around zero with sigma_b ~ P_b / sqrt(n1 n2 sum_b (2L+1)), P_b the total power of
    # one estimate (Gaussian statistics of independent means; common practice). Within 4 sigma.
    result = lensing_bandpowers(lensed_suite)
    L = np.arange(401)
    modes = np.array(
        [np.sum(2 * L[lo:hi] + 1) for lo, hi in zip(result.binning.edges[:-1], result.binning.edges[1:], strict=True)]
    )
    sigma = result.raw / np.sqrt(4 * 4 * modes)
    assert np.all(np.abs(result.terms["mean_field"]) < 4 * sigma)


@pytest.mark.slow
def test_n1_is_positive_and_of_the_expected_size(lensed_suite):
    # N1 of EB at lmax 512: positive at > 3 sigma of its Monte-Carlo error above L = 50 (the lowest bins have
    # too few modes for 4 simulations); from memory, N1 of the polarization estimators of a low-noise survey
    # is a percent to tens of percent of C_L^phiphi, rising steeply as L approaches the CMB band limit (where
    # it can exceed the signal). Here: 1%-30% below L = lmax/2 = 256, and less than the signal up to 400.
    result = lensing_bandpowers(lensed_suite)
    n1, error, signal = result.terms["n1"], result.term_errors["n1"], result.theory
    high = result.binning.edges[:-1] > 50
    assert np.all(n1[high] > 3 * error[high]) and np.all(n1 > 0)
    ratio = n1 / signal
    low = result.binning.edges[1:] <= 256
    assert np.all((ratio[low] > 0.01) & (ratio[low] < 0.3)), ratio
    assert np.all(ratio < 1.0), ratio
    # the curl estimator also has an N1 from lensing; its curl "signal" is zero, so the debiased curl is a null
    # test (chi2 to zero not extreme)
    curl = lensing_bandpowers(lensed_suite, component="curl")
    assert curl.pte > 1e-3


def test_analytic_n1_beside_mc_n1_in_the_budget(lensed_suite):
    # The budget shows the analytic N1 (Kesden, Cooray & Kamionkowski 2003, PRD 67, 123507; flat-sky
    # evaluation) beside MC-N1: they agree within 3 sigma of the Monte-Carlo error plus 15% (the analytic
    # N1 keeps first order in C^phiphi with lensed spectra in the legs; the simulations' 600-multipole margin
    # leaves their lensed BB ~10% low near lmax). A 30% error in either would exceed that bound.
    result = lensing_bandpowers(lensed_suite)
    mc, error, analytic = result.terms["n1"], result.term_errors["n1"], result.terms["analytic_n1"]
    high = result.binning.edges[:-1] > 50
    assert np.all(np.abs(mc - analytic)[high] < 3 * error[high] + 0.15 * analytic[high]), (mc / analytic, error / mc)
    assert "an. N1" in lensrec.bias_budget_table(result)


def test_curl_auto_minus_n0_and_analytic_n1_is_consistent_with_zero(lensed_suite):
    # The curl null test of a lensed sky: the curl estimator's auto-spectrum carries N0 and an N1 from lensing
    # by φ (Kesden, Cooray & Kamionkowski 2003, PRD 67, 123507), here ~30% of N0 for EB at depth, which is the
    # 1.2–1.3 excess of curl auto/N0 seen without it. raw − RDN0 − analytic N1 is consistent with zero (χ² of
    # the bins above L = 50 with the suite's diagonal errors, PTE > 0.001), while dropping N1 is not.
    result = lensing_bandpowers(lensed_suite, component="curl")
    high = result.binning.edges[:-1] > 50
    errors = result.errors[high]
    residual = (result.raw - result.terms["rdn0"] - result.terms["analytic_n1"])[high]
    without_n1 = (result.raw - result.terms["rdn0"])[high]
    chi2 = float(np.sum((residual / errors) ** 2))
    assert chi2 < scipy.stats.chi2.isf(1e-3, high.sum()), residual / errors
    assert float(np.sum((without_n1 / errors) ** 2)) > scipy.stats.chi2.isf(1e-3, high.sum())


@pytest.mark.slow
def test_n1_at_high_L_for_a_low_noise_polarization_survey():
    # From memory: N1 of the polarization (EB) estimator of a ~1 uK-arcmin survey is a percent to tens of
    # percent of C_L^phiphi at L = 500-1000 (for a CMB band limit of a few thousand), and it rises steeply as L
    # approaches the band limit. With lmax 1000 here: 1%-60% for L = 300-700, larger still above. Two
    # simulations suffice: the low-variance pairing (the same second CMB lensed by a shared or an independent
    # phi) leaves a Monte-Carlo error below 1% of the signal.
    settings = lensing_suite_settings(
        "deep_highland",
        nside=512,
        lmax=1000,
        lmax_L=1000,
        estimators="EB",
        n_sims=4,
        seed=21,
        n1=True,
        lmax_margin=500,
        nthreads=2,
    )
    binning = Binning([300, 500, 700, 1001])
    shared, independent = [], []
    for index in range(2):
        pairs = n1_pair_estimates(settings, index)
        shared.append(binning.bin(cross_spectrum(pairs[estimate_key("n1_shared", "gradient", "EB")])))
        independent.append(binning.bin(cross_spectrum(pairs[estimate_key("n1_independent", "gradient", "EB")])))
    n1 = monte_carlo_n1(shared, independent)
    signal = binning.bin(lensrec.fiducial_spectra().phi[:1001])
    ratio = n1.value / signal
    assert np.all(n1.value > 3 * n1.error), (ratio, n1.error / signal)
    assert np.all((ratio[:2] > 0.01) & (ratio[:2] < 0.6)), ratio
    assert np.all(np.diff(ratio) > 0), ratio  # rising towards the band limit


# ------------------------------------------------------------------------------------- reproducibility
@pytest.fixture(scope="module")
def tiny_serial(tmp_path_factory):
    return run_lensing_suite(lensing_suite_settings(**TINY), tmp_path_factory.mktemp("serial"), progress=False)


def test_serial_processes_and_dask_suites_are_bit_identical(tiny_serial, tmp_path):
    settings = lensing_suite_settings(**TINY)
    pool = run_lensing_suite(settings, tmp_path / "pool", executor="processes", workers=2, progress=False)
    _assert_identical(_stored(tiny_serial), _stored(pool))
    distributed = pytest.importorskip("distributed")
    with (
        distributed.LocalCluster(
            n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None, silence_logs=50
        ) as cluster,
        distributed.Client(cluster) as client,
    ):
        dask_suite = run_lensing_suite(settings, tmp_path / "dask", executor=client, progress=False)
    _assert_identical(_stored(tiny_serial), _stored(dask_suite))


def test_a_suite_stopped_halfway_resumes_to_the_same_answer(tiny_serial, tmp_path):
    settings = lensing_suite_settings(**TINY)
    cancel = threading.Event()

    seen = []

    def progress(done, total, stage):  # the callback is told which stage runs
        seen.append(stage)
        if stage == "simulations" and done >= 2:  # after two of four simulations
            cancel.set()

    part = run_lensing_suite(settings, tmp_path, progress=progress, cancel=cancel)
    assert part.cancelled and sorted(part.runs) == ["data", "simulations"]
    assert part.runs["simulations"].computed == [0, 1] and not part.complete
    assert seen[0] == "data" and seen[-1] == "simulations" and seen == sorted(seen, key=SUITE_STAGES.index)
    with pytest.warns(DeprecationWarning, match="done, total, stage"):  # the old two-argument callback
        resumed = run_lensing_suite(settings, tmp_path, progress=lambda done, total: None)
    assert resumed.runs["simulations"].reused == [0, 1] and resumed.runs["simulations"].computed == [2, 3]
    assert resumed.runs["data"].reused == [0] and resumed.complete
    _assert_identical(_stored(tiny_serial), _stored(resumed))


def test_a_corrupted_simulation_is_detected_reported_and_recomputed(tiny_serial, tmp_path):
    folder = tmp_path / "suite"
    shutil.copytree(tiny_serial.directory, folder)
    suite = open_lensing_suite(folder)
    path = suite.cache("simulations").path_of(2)
    with open(path, "r+b") as handle:
        handle.seek(300)
        handle.write(b"\x00corrupt\x00")
    with pytest.raises(ValueError, match="checksum"):
        suite.simulation(2)
    with pytest.warns(RuntimeWarning, match="simulation 2 failed its checksum"):
        again = run_lensing_suite(lensing_suite_settings(**TINY), folder, progress=False)
    assert again.runs["simulations"].recomputed_corrupt == [2] and again.runs["simulations"].computed == [2]
    assert again.runs["pairs"].computed == []  # the pair estimates were made from the same (recomputed) fields
    _assert_identical(_stored(tiny_serial), _stored(again))


def test_a_moved_suite_folder_is_still_the_same_suite(tiny_serial, tmp_path):
    # where the inputs live is not part of the fingerprint: a copied suite reuses everything
    shutil.copytree(tiny_serial.directory, tmp_path / "moved")
    again = run_lensing_suite(lensing_suite_settings(**TINY), tmp_path / "moved", progress=False)
    assert all(run.computed == [] for run in again.runs.values())


def test_other_settings_are_refused_and_more_simulations_are_added(tiny_serial, tmp_path):
    shutil.copytree(tiny_serial.directory, tmp_path / "suite")
    with pytest.raises(ValueError, match="differing: data, seed"):  # the data seed follows the seed
        run_lensing_suite(lensing_suite_settings(**dict(TINY, seed=6)), tmp_path / "suite", progress=False)
    grown = run_lensing_suite(lensing_suite_settings(**dict(TINY, n_sims=5)), tmp_path / "suite", progress=False)
    assert grown.runs["simulations"].computed == [4] and grown.runs["pairs"].computed == [4]
    fresh = run_lensing_suite(
        lensing_suite_settings(**dict(TINY, seed=6)), tmp_path / "suite", progress=False, force=True
    )
    assert fresh.runs["simulations"].computed == [0, 1, 2, 3]
    assert json.loads((tmp_path / "suite" / "suite.json").read_text())["settings"]["seed"] == 6


def test_the_stored_arrays_are_what_the_bias_estimators_need(tiny_serial):
    sim = tiny_serial.simulation(1)
    nalm_L = (48 + 1) * (48 + 2) // 2
    assert sim["filtered"].shape == (3, (64 + 1) * (64 + 2) // 2)
    assert sim["phi_input"].shape == (nalm_L,)
    for kind in ("auto", "n1_shared", "n1_independent"):
        for component in ("gradient", "curl"):
            for estimator in ("TT", "EB"):
                assert sim[estimate_key(kind, component, estimator)].shape == (nalm_L,)
    assert sorted(tiny_serial.pairs(0)) == sorted(
        estimate_key("data_sim", c, e) for c in ("gradient", "curl") for e in ("TT", "EB")
    )
    assert estimate_key("sim_sim", "gradient", "EB") in tiny_serial.pairs(1)
    # the data is not one of the simulations
    assert not np.array_equal(tiny_serial.data()["phi_input"], tiny_serial.simulation(0)["phi_input"])


def test_tt_pair_estimates_are_symmetric_in_their_legs(tiny_serial):
    # the suite computes TT and EE pairs once, relying on phi[a, b] = phi[b, a] for them (Okamoto & Hu 2003,
    # PRD 67, 083002: f^TT and f^EE are symmetric under l1 <-> l2); check it on two stored filtered fields
    from lensrec.suites import _context, _fields_from_alm, _reconstruct

    settings = dict(tiny_serial.settings, role="simulation")
    context = _context(settings)
    a = _fields_from_alm(tiny_serial.simulation(0)["filtered"], context, settings)
    b = _fields_from_alm(tiny_serial.simulation(1)["filtered"], context, settings)
    # GMV sums both orders of every field pair (Maniyar et al. 2021, PRD 103, 083524), so it is symmetric too
    for estimator in ("TT", "EE", "GMV"):
        forward = _reconstruct(a, b, estimator, context, settings)["gradient"]
        backward = _reconstruct(b, a, estimator, context, settings)["gradient"]
        np.testing.assert_allclose(forward, backward, rtol=0, atol=1e-12 * np.abs(forward).max())  # rounding only


def test_bad_settings_are_refused(tmp_path):
    with pytest.raises(ValueError, match="power of two"):
        lensing_suite_settings(nside=48)
    with pytest.raises(ValueError, match="lmax_L=600 exceeds"):
        lensing_suite_settings(nside=128, lmax=256, lmax_L=600)
    with pytest.raises(ValueError, match="unknown estimator 'XY'"):
        lensing_suite_settings(nside=64, lmax=128, estimators="TT,XY")
    with pytest.raises(ValueError, match="n_sims must be >= 4"):
        lensing_suite_settings(nside=64, lmax=128, n_sims=2)
    with pytest.raises(ValueError, match="data_seed must differ"):
        lensing_suite_settings(nside=64, lmax=128, seed=3, data_seed=3)
    with pytest.raises(ValueError, match="n1=True needs lensed"):
        lensing_suite_settings(nside=64, lmax=128, n1=True, lensing=False)
    with pytest.raises(TypeError, match="mask must be the path"):
        lensing_suite_settings(nside=64, lmax=128, mask=np.ones(12 * 64**2))
    with pytest.raises(ValueError, match="does not exist"):
        lensing_suite_settings(nside=64, lmax=128, mask=str(tmp_path / "missing.fits"))
    with pytest.raises(ValueError, match="lensing_suite_settings"):
        run_lensing_suite({"n_sims": 4}, tmp_path)
    with pytest.raises(ValueError, match="no lensing suite"):
        open_lensing_suite(tmp_path)
    assert not os.listdir(tmp_path)


def test_a_masked_suite_with_user_maps_as_data(tmp_path):
    # the mask and the data maps are read from files whose contents are fingerprinted
    from lensrec.io import write_maps

    mask = lensrec.cap_mask(32, lon=0.0, lat=30.0, radius=60.0, width=10.0)
    write_maps(tmp_path / "mask.fits", mask)
    sky = lensrec.simulate_sky("deep_highland", nside=32, lmax=64, lmax_margin=32, seed=99, nthreads=1)
    write_maps(tmp_path / "data.fits", sky.maps)
    settings = lensing_suite_settings(
        **dict(TINY, n1=False, estimators="EB"), mask=str(tmp_path / "mask.fits"), data_maps=str(tmp_path / "data.fits")
    )
    assert settings["data"]["source"] == "maps" and settings["mask_moments"]["sky_fraction"] < 0.5
    suite = run_lensing_suite(settings, tmp_path / "suite", progress=False)
    assert "phi_input" not in suite.data() and suite.complete
    result = lensing_bandpowers(suite, binning=Binning([8, 20, 49]))
    assert np.all(np.isfinite(result.debiased)) and result.amplitude is not None
    write_maps(tmp_path / "mask.fits", np.clip(mask + 0.01, 0, 1), force=True)
    with pytest.raises(ValueError, match="changed since the suite was set up"):
        run_lensing_suite(dict(settings, n_sims=5), tmp_path / "suite", progress=False)


def test_suites_reconstruct_the_b_free_combination_without_b_modes(tiny_serial):
    # TT+TE+EE combines only estimators built on T and E (lensrec.labels): zeroing the filtered B modes leaves
    # its estimate unchanged to the last bit, while MV (which holds EB and TB) changes.
    from lensrec.suites import _context, _fields_from_alm, _reconstruct

    settings = dict(tiny_serial.settings, role="simulation")
    context = _context(settings)
    stored = np.array(tiny_serial.simulation(0)["filtered"])
    no_b = stored.copy()
    no_b[2] = 0.0
    a, a_no_b = (_fields_from_alm(x, context, settings) for x in (stored, no_b))
    for label, unchanged in (("TT+TE+EE", True), ("MV", False)):
        full = _reconstruct(a, a, label, context, settings)["gradient"]
        cut = _reconstruct(a_no_b, a_no_b, label, context, settings)["gradient"]
        assert np.array_equal(full, cut) is unchanged, label


def test_the_analytic_n0_of_a_suite_is_the_normalization_its_reconstructions_use():
    # suite_analytic_n0 computes one estimator alone; it must equal the N0 of the normalization the suite's
    # tasks build (experiment cut at the suite's lmax), which is what the bias budget shows beside RDN0
    from lensrec.suite_tasks import _context, suite_analytic_n0

    settings = lensing_suite_settings(**TINY)
    used = _context(settings).noise.n0
    for estimator, component in (("EB", "gradient"), ("TT", "curl")):
        alone = suite_analytic_n0(settings, estimator, component)
        assert np.allclose(alone[2:], used[estimator][component][2:], rtol=1e-12, atol=0)  # same sums, rounding
    with pytest.raises(ValueError, match="component must be one of"):
        suite_analytic_n0(settings, "EB", "divergence")
