"""Headless tests of the Reconstruction section: drawn maps and spectra are lensrec's, and errors are visible."""

import functools

import healpy
import numpy as np
import pytest

import lensrec
from lensrec import harmonics
from widgets import Workbench

NSIDE, LMAX = 64, 128

if not hasattr(lensrec, "reconstruct"):  # the section then shows what it needs instead (tested in test_widgets.py)
    pytest.skip("this lensrec has no reconstruct()", allow_module_level=True)


@pytest.fixture(scope="module")
def app():
    workbench = Workbench(experiment="deep_highland", nthreads=2)
    sky = workbench["sky"]
    sky.nside.value, sky.lmax.value, sky.seed.value = NSIDE, LMAX, 3
    sky.simulate_button.click()
    assert workbench.wait(120) and sky.status.kind == "ok", sky.status.message
    section = workbench["reconstruction"]
    section.estimator.value = "MV"
    section.run_button.click()
    assert workbench.wait(120) and section.status.kind == "ok", section.status.message
    assert "Cut sky" not in section.status.message  # a full sky carries no cut-sky caution
    return workbench


@pytest.fixture(scope="module")
def expected(app):
    """The same reconstruction computed here directly with lensrec."""
    sky = app.state.sky
    result = lensrec.reconstruct(sky.maps, app.state.sky_experiment, estimator="MV", lmax_L=LMAX, lmax=LMAX,
                                 nthreads=2)  # fmt: skip
    phi_input = harmonics.truncate_alm(sky.phi_alm, LMAX, sky.lmax_unlensed)
    return result, phi_input


def _mollweide(values):
    # healpy's projector (reference library), as in healpy.mollview
    projector = healpy.projector.MollweideProj(xsize=600)
    image = np.array(projector.projmap(values, functools.partial(healpy.vec2pix, NSIDE)), dtype=float)
    image[~np.isfinite(image)] = np.nan
    return image


def test_maps_are_the_input_and_the_wiener_filtered_reconstruction(app, expected):
    result, phi_input = expected
    drawn = app["reconstruction"].plotted()
    kappa_input = lensrec.deflection_maps(phi_input, NSIDE, LMAX, nthreads=2).kappa
    phi_wf = lensrec.wiener_filter_phi(result.phi_alm, result.n0["gradient"])
    kappa_wf = lensrec.deflection_maps(phi_wf, NSIDE, LMAX, nthreads=2).kappa
    # same inputs and thread count; 1e-12 relative covers rounding in the transforms
    np.testing.assert_allclose(drawn["kappa_input"], _mollweide(kappa_input), rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(drawn["kappa_wf"], _mollweide(kappa_wf), rtol=1e-9, atol=1e-12)
    clim_input, clim_wf = drawn["clim"]
    assert clim_input == clim_wf  # one color scale for the comparison


def test_spectra_are_the_library_spectra(app, expected):
    result, phi_input = expected
    drawn = app["reconstruction"].plotted()
    L = np.arange(2, LMAX + 1)
    # spectra by healpy.alm2cl (reference library)
    cross = healpy.alm2cl(result.phi_alm, phi_input, lmax=LMAX)[2:]
    ratio = cross / healpy.alm2cl(phi_input, lmax=LMAX)[2:]
    np.testing.assert_array_equal(drawn["cross"][0], L)
    np.testing.assert_allclose(drawn["cross"][1], ratio, rtol=1e-9)
    weight = (L * (L + 1.0)) ** 2 / (2 * np.pi)
    np.testing.assert_allclose(drawn["n0"][1], weight * result.n0["gradient"][2:], rtol=1e-12)
    np.testing.assert_allclose(drawn["theory"][1], weight * lensrec.fiducial_spectra().phi[2 : LMAX + 1], rtol=1e-12)
    assert app.state.reconstruction is app["reconstruction"].result


def test_binned_theory_lies_on_the_theory_curve(app):
    # the bands bin the plotted quantity [L(L+1)]² C_L/2π with 2L+1 weights (lensrec.power.bin_spectrum), so each
    # binned theory value lies within the curve's range over its band; binning C_L and multiplying by the band
    # centre's factor put the first band (L = 2–3x) more than ten times above the curve
    section = app["reconstruction"]
    drawn = section.plotted()
    theory_L, theory_curve = drawn["theory"]
    centers, binned = drawn["theory_band"]
    edges = section.products["check"].edges
    assert edges[0] == 2 and edges[-1] == LMAX + 1
    for b, (low, high) in enumerate(zip(edges[:-1], edges[1:], strict=True)):
        inside = theory_curve[(theory_L >= low) & (theory_L < high)]
        assert inside.min() * (1 - 1e-12) <= binned[b] <= inside.max() * (1 + 1e-12), (low, high)
        assert low <= centers[b] < high
    expected = lensrec.power.bin_spectrum(app.state.spectra.phi[: LMAX + 1], edges, weights="modes",
                                          scale="lensing")[1]  # fmt: skip
    np.testing.assert_allclose(binned, expected, rtol=1e-12)


def test_bands_carry_the_gaussian_errors_of_the_library_check(app):
    from lensrec.reconstruction_check import check_reconstruction

    section = app["reconstruction"]
    comparison = lensrec.compare_with_input(section.result, app.state.sky.phi_alm)
    reference = check_reconstruction(comparison, app.state.spectra.phi, section.products["check"].edges)
    response_errors, auto_errors = section.plotted()["errors"]
    np.testing.assert_allclose(response_errors, reference.response_error, rtol=1e-9)
    np.testing.assert_allclose(auto_errors, reference.auto_error, rtol=1e-9)
    # errors shrink with the number of modes: the highest band is measured better than the lowest (Knox 1995)
    assert reference.response_error[-1] < reference.response_error[0]


def test_reconstruction_has_unit_response_to_the_input(app):
    # A normalized quadratic estimator has unit response: <C_L^(φ̂φ)> = C_L^φφ (Hu & Okamoto 2002, ApJ 574, 566).
    # Per L the ratio scatters with variance ≈ (1 + N0/C)/(2L+1) (Gaussian fields, common practice); the
    # inverse-variance mean over 10 ≤ L ≤ lmax must be within 4σ of 1, plus 10% for the higher-order and
    # N1-like response changes at this low band limit (from memory).
    section = app["reconstruction"]
    products = section.products
    L = np.arange(10, LMAX + 1)
    theory, n0 = products["theory"][L], products["n0"][L]
    weights = (2 * L + 1) * theory / (theory + n0)
    mean = np.sum(weights * products["cross_over_input"][L]) / np.sum(weights)
    sigma = 1 / np.sqrt(np.sum(weights))
    assert abs(mean - 1) < 4 * sigma + 0.10, (mean, sigma)


def test_too_high_lmax_L_is_reported():
    workbench = Workbench(experiment="deep_highland", nthreads=2)
    sky = workbench["sky"]
    sky.nside.value, sky.lmax.value = 32, 64
    sky.simulate_button.click()
    assert workbench.wait(120)
    section = workbench["reconstruction"]
    section.lmax_L.value = 500
    section.run_button.click()
    assert workbench.wait(60)
    assert section.status.kind == "error" and "lmax_L=500" in section.status.message
    assert not section.run_button.disabled


# ------------------------------------------------------------------------------- delensing template
def test_template_is_built_from_the_reconstruction_as_lensrec_delens_does(app, expected):
    from lensrec import delensing

    section = app["delensing"]
    section.method.value = "first_order"
    section.build_button.click()
    assert app.wait(120) and section.status.kind == "ok", section.status.message
    sky, experiment, spectra = app.state.sky, app.state.sky_experiment, app.state.spectra
    result, _ = expected
    lmax = min(LMAX, experiment.ell_max_polarization)
    # the delensing pipeline written out with lensrec's own functions
    e_wiener, b_observed, _ = delensing.template_inputs(sky.maps, experiment, spectra, lmax=lmax, nthreads=2)
    # the recipe's phi Wiener filter uses N0 + analytic N1 (lensrec.delens_maps)
    from lensrec.analytic_n1 import reconstruction_n1

    n1 = reconstruction_n1(result, spectra, nthreads=2).n1["MV"]["gradient"]
    phi_wiener = lensrec.wiener_filter_phi(result.phi_alm, result.n0["gradient"], spectra.phi, n1=n1)
    reference = lensrec.delens(b_observed, e_wiener, phi_wiener, lmax, method="first_order",
                               noise_bb=experiment.noise_spectrum("B", lmax), lensed_bb=spectra.lensed["BB"],
                               nthreads=2)  # fmt: skip
    drawn = section.template_plotted()
    ell = np.arange(max(2, reference.ell_min), reference.ell_max + 1)
    dl = ell * (ell + 1) / (2 * np.pi)
    np.testing.assert_array_equal(drawn["template"][0], ell)
    # same inputs; 1e-8 relative covers the thread-order rounding of the transforms in the template
    np.testing.assert_allclose(drawn["template"][1], dl * reference.template_bb[ell], rtol=1e-8)
    np.testing.assert_allclose(drawn["residual"][1], dl * reference.residual_bb[ell], rtol=1e-8)
    np.testing.assert_allclose(drawn["efficiency"][1], reference.efficiency[ell], rtol=1e-6, atol=1e-9)
    assert section.template.alens_residual == pytest.approx(reference.alens_residual, rel=1e-8)
    # MV uses these B modes: the delensing-bias warning must be shown, with the bias-free residual beside it
    assert "delensing bias" in section.template_summary.value
    assert section.bias_free is not None and "bias-free" in section.template_summary.value
    assert section.bias_free.ell_max == LMAX // 2 and "exclude_delensed_b" in section.bias_free.notes[0]
    # a template made of lensed E modes must remove some lensing power and cannot remove more than all of it
    assert 0 < section.template.alens_residual < 1


def test_the_measured_residual_sits_beside_a_forecast_for_the_same_sky(app, expected):
    section = app["delensing"]
    assert section.template is not None and section.sky_forecast is not None
    experiment, spectra = app.state.sky_experiment, app.state.spectra
    result, _ = expected
    # the forecast for what this sky can do: its band limit, its reconstruction's N0 (inf above lmax_L)
    n0 = np.full(spectra.lmax + 1, np.inf)
    n0[: LMAX + 1] = result.n0["gradient"]
    limited = experiment.replace(ell_max_temperature=min(experiment.ell_max_temperature, LMAX),
                                 ell_max_polarization=min(experiment.ell_max_polarization, LMAX))  # fmt: skip
    reference = lensrec.delensing_forecast(limited, spectra, n0=n0, lmax=LMAX, nthreads=2)
    assert section.sky_forecast.alens_residual == pytest.approx(reference.alens_residual, rel=1e-6)
    assert section.sky_forecast.ell_max == LMAX  # the sky's band limit, not the experiment's 1000 or more
    summary = section.template_summary.value
    assert "measured" in summary and "forecast for this sky" in summary
    assert f"{reference.alens_residual:.3f}" in summary and f"{section.template.alens_residual:.3f}" in summary
    # the experiment-wide forecast uses a much lower N0 and more modes: it must differ, or the two are confused
    full = lensrec.delensing_forecast(experiment, spectra, n0=lensrec.reconstruction_noise(experiment, nthreads=2)
                                      .n0["MV"]["gradient"], nthreads=2)  # fmt: skip
    assert abs(full.alens_residual - reference.alens_residual) > 0.05


def test_cancelled_template_keeps_the_previous_one_marked_out_of_date(app):
    section = app["delensing"]
    before = section.template
    assert before is not None
    section.build_button.click()
    section.template_cancel.click()
    assert app.wait(120)
    assert section.status.kind == "warning" and "cancelled" in section.status.message
    assert section.template is before and section.template_view.stale
    assert not section.build_button.disabled and section.template_cancel.disabled


def test_template_from_the_exact_phi_and_from_a_tracer(app):
    # exact phi: the perfect-knowledge bound removes lensing B (here only what E <= 128 sources: 0 < A < 1;
    # a phi that did not arrive would leave A = 1); tracer: a simulated invented tracer delenses part of it
    section = app["delensing"]
    section.method.value = "first_order"
    section.phi_source.value = "internal"
    section.build_button.click()
    assert app.wait(120) and section.status.kind == "ok", section.status.message
    try:
        section.phi_source.value = "exact"
        section.build_button.click()
        assert app.wait(120) and section.status.kind == "ok", section.status.message
        assert 0 < section.template.alens_residual < 0.97 and section.bias_free is None
        section.phi_source.value, section.tracer.value = "tracer", "diffuse_glow"
        section.build_button.click()
        assert app.wait(120) and section.status.kind == "ok", section.status.message
        assert 0 < section.template.alens_residual < 1 and "diffuse_glow" in section.template_title.get_text()
    finally:
        section.phi_source.value = "internal"


def test_masked_sky_spectra_are_divided_by_the_mask_moments():
    from lensrec import power

    workbench = Workbench(experiment="deep_highland", nthreads=2)
    sky = workbench["sky"]
    sky.nside.value, sky.lmax.value = 32, 64
    sky.mask.value = "latitude"
    sky.b_min.value, sky.taper.value = 20.0, 10.0
    sky.simulate_button.click()
    assert workbench.wait(120) and sky.status.kind == "ok", sky.status.message
    section = workbench["reconstruction"]
    section.run_button.click()
    assert workbench.wait(120) and section.status.kind == "ok", section.status.message
    # one cut-sky simulation holds the mask's mean-field: its response is flagged as indicative only
    assert "Cut sky" in section.status.message and "Validation tab" in section.status.message
    state = workbench.state
    # the sky's maps already carry the mask: it is applied once (maps_masked), not a second time
    result = lensrec.reconstruct(state.sky.maps, state.sky_experiment, estimator="MV", lmax_L=64, lmax=64,
                                 mask=state.sky.mask, maps_masked=True, nthreads=2)  # fmt: skip
    assert result.settings["filter_choice"] == "isotropic"  # auto cannot use the optimal filter on apodized maps
    phi_input = harmonics.truncate_alm(state.sky.phi_alm, 64, state.sky.lmax_unlensed)
    moments = lensrec.sky_fraction_moments(state.sky.mask)
    # pseudo-C_L of w²φ̂ × φ is ⟨w²⟩ C_L (Hivon et al. 2002, ApJ 567, 2, eqs. 5–6; lensrec.power docstring)
    expected = healpy.alm2cl(result.phi_alm, phi_input)[2:] / moments["w2"]
    expected = expected / healpy.alm2cl(phi_input)[2:]
    np.testing.assert_allclose(section.plotted()["cross"][1], expected, rtol=1e-9)
    assert power.mask_moment_order("estimate", "estimate") == 4
    assert "⟨w⁴⟩" in section.auto_title.get_text()


def test_export_writes_the_reconstruction_and_template_spectra(app, expected, tmp_path):
    import json

    section = app["export"]
    section.folder.value = str(tmp_path)
    section.export_button.click()
    assert section.status.kind == "ok", section.status.message
    with open(tmp_path / "reconstruction_spectra.json") as handle:
        spectra = json.load(handle)
    result, _ = expected
    assert spectra["estimator"] == "MV" and spectra["lmax_L"] == LMAX
    np.testing.assert_allclose(spectra["n0"][2:], result.n0["gradient"][2:], rtol=1e-9)
    assert spectra["sky"]["nside"] == NSIDE and "provenance" in spectra
    with open(tmp_path / "delensing_template.json") as handle:
        template = json.load(handle)
    delensing = app["delensing"]
    assert template["alens_residual_measured"] == pytest.approx(delensing.template.alens_residual, rel=1e-12)
    forecast = delensing.sky_forecast  # None unless the template came from the internal reconstruction
    assert template["alens_residual_forecast_for_this_sky"] == (
        None if forecast is None else pytest.approx(forecast.alens_residual, rel=1e-12)
    )
    assert (tmp_path / "reconstruction-maps.png").is_file() and (tmp_path / "delensing-template.pdf").is_file()


def test_lensing_iterations_control_runs_the_iterative_estimate_and_reports_errors(app):
    section = app["reconstruction"]
    section.estimator.value, section.lensing_iterations.value = "EB", 1
    try:
        section.run_button.click()
        assert app.wait(180) and section.status.kind == "ok", section.status.message
        assert section.result.settings["lensing_iterations"] == 1
        assert len(section.result.settings["n0_per_iteration"]) == 2
        # an estimator without an iterative form: the message names it
        section.estimator.value = "TT"
        section.run_button.click()
        assert app.wait(60) and section.status.kind == "error"
        assert "'TT'" in section.status.message and "iterative form" in section.status.message
    finally:
        section.estimator.value, section.lensing_iterations.value = "MV", 0


# tests below change the shared state: keep them last
def test_cancelled_reconstruction_keeps_the_previous_result_marked_out_of_date(app):
    section = app["reconstruction"]
    before = section.result
    section.run_button.click()
    assert section.maps_view.stale and section.spectra_view.stale  # marked as soon as the new run starts
    section.cancel_button.click()
    assert app.wait(120)
    assert section.status.kind == "warning" and "cancelled" in section.status.message
    assert section.result is before and app.state.reconstruction is before
    assert section.maps_view.stale and section.spectra_view.stale
    assert "cancelled" in section.maps_view.banner.value
    assert not section.run_button.disabled and section.cancel_button.disabled
    section.run_button.click()  # a finished run removes the mark
    assert app.wait(120) and section.status.kind == "ok"
    assert not section.maps_view.stale and not section.spectra_view.stale


def test_a_new_sky_withdraws_the_old_reconstruction(app):
    section = app["reconstruction"]
    app.state.sky = None  # what a new simulation does first, in effect: the old result no longer applies
    assert section.result is None and app.state.reconstruction is None
    assert "press <b>Reconstruct</b>" in section.maps_view.note.value or "No sky yet" in section.maps_view.note.value
    assert section.run() is False
    assert section.status.kind == "error" and "simulate one on the Sky tab" in section.status.message


def test_template_without_reconstruction_says_what_to_do(app):
    section = app["delensing"]
    app.state.reconstruction = None
    assert "No reconstruction yet" in section.template_view.note.value
    assert section.build_template() is False
    assert section.status.kind == "error" and "Reconstruction tab" in section.status.message
