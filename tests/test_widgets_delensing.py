"""Headless tests of the Delensing section: the forecast drawn is lensrec's, and its inputs come from state."""

import numpy as np
import pytest

import lensrec
from widgets import Workbench

SMALL = lensrec.Experiment(name="small delensing survey", noise_temperature=2.0, beam_fwhm=2.0, ell_min=20,
                           ell_max_temperature=1500, ell_max_polarization=1500, sky_fraction=0.1)  # fmt: skip


@pytest.fixture(scope="module")
def app():
    workbench = Workbench(experiment=SMALL, delay=0.0, nthreads=2)
    assert workbench.wait(60)
    return workbench


def _d_ell(cl):
    ell = np.arange(len(cl))
    return ell * (ell + 1) * np.asarray(cl) / (2 * np.pi)


def test_forecast_drawn_equals_the_library_forecast(app):
    section = app["delensing"]
    section.estimator.value = "EE"
    section.forecast_button.click()
    assert section.wait(60) and section.status.kind == "ok", section.status.message
    n0 = lensrec.reconstruction_noise(SMALL, nthreads=2).n0["EE"]["gradient"]
    expected = lensrec.delensing_forecast(SMALL, n0=n0, nthreads=2)
    plotted = section.plotted()
    ell = np.arange(expected.ell_min, expected.ell_max + 1)
    np.testing.assert_array_equal(plotted["lensed"][0], ell)
    np.testing.assert_allclose(plotted["lensed"][1], _d_ell(expected.lensed_bb)[ell], rtol=1e-12)
    np.testing.assert_allclose(plotted["residual"][1], _d_ell(expected.residual_bb)[ell], rtol=1e-12)
    np.testing.assert_allclose(plotted["efficiency"][1], 1 - expected.residual_bb[ell] / expected.lensed_bb[ell],
                               rtol=1e-12)  # fmt: skip
    assert section.forecast.alens_residual == pytest.approx(expected.alens_residual, rel=1e-12)
    assert f"{expected.alens_residual:.3f}" in section.summary.value
    assert f"{expected.sigma_r_delensed:.3g}" in section.summary.value
    assert "⚠" not in section.summary.value  # EE uses no B modes: no delensing-bias warning


def test_delensing_removes_power_and_warns_about_bias_for_mv(app):
    section = app["delensing"]
    section.estimator.value = "MV"
    section.forecast_button.click()
    assert section.wait(60) and section.status.kind == "ok"
    forecast = section.forecast
    # delensing can only remove lensing power: 0 < A_lens^res < 1 and σ(r) shrinks (Knox & Song 2002, PRL 89, 011303)
    assert 0 < forecast.alens_residual < 1
    assert forecast.sigma_r_delensed < forecast.sigma_r_lensed
    efficiency = section.plotted()["efficiency"][1]
    assert np.all((efficiency > 0) & (efficiency < 1))
    assert "⚠" in section.summary.value and "biased" in section.summary.value


def test_a_new_noise_result_marks_the_forecast_out_of_date(app):
    section = app["delensing"]
    app["experiment"].controls["noise_temperature"].value = 4.0
    assert app.wait(60)
    assert section.status.kind == "warning" and "press Forecast" in section.status.message


def test_bad_range_is_reported_and_the_button_re_enabled(app):
    section = app["delensing"]
    section.ell_min_b.value = 5000  # above the experiment's polarization ℓ_max
    section.forecast_button.click()
    assert section.wait(60)
    assert section.status.kind == "error" and "B-mode range is empty" in section.status.message
    assert not section.forecast_button.disabled
    section.ell_min_b.value = 0


def test_without_noise_the_section_says_what_to_do():
    workbench = Workbench(experiment=SMALL, delay=0.0, nthreads=2)
    assert workbench.wait(60)
    section = workbench["delensing"]
    workbench.state.noise = None
    assert "No reconstruction noise yet" in section.view.note.value
    assert section.run_forecast() is False
    assert section.status.kind == "error" and "Estimator noise tab" in section.status.message
