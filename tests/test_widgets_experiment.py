"""Headless tests of the Experiment section: controls → state, examples, TOML, and the noise plot."""

import math

import numpy as np
import pytest

import lensrec
from widgets import Workbench

ARCMIN = math.pi / 10800


@pytest.fixture(scope="module")
def app():
    workbench = Workbench(experiment="deep_highland", nthreads=2)
    assert workbench.wait(60)
    return workbench


@pytest.fixture
def section(app):
    """The Experiment section, reset to the shipped deep_highland example before each test."""
    section = app["experiment"]
    section.picker.value = "wide_lowland"  # a change of example resets every control
    section.picker.value = "deep_highland"
    section.path_box.value = ""
    section.overwrite.value = False
    assert app.wait(60)
    assert section.state.experiment == lensrec.load_experiment("deep_highland")
    return section


def d_ell(cl):
    ell = np.arange(len(cl))
    return ell * (ell + 1) * np.asarray(cl) / (2 * np.pi)


def test_plot_shows_library_spectra_and_noise(section, fiducial):
    plotted = section.plotted()
    experiment = section.state.experiment
    lensed = fiducial.cmb(lensed=True)
    for key in ("TT", "EE", "BB"):
        np.testing.assert_allclose(plotted[key][2:], d_ell(lensed[key][:5001])[2:], rtol=1e-12)
    for key, field in (("noise T", "T"), ("noise P", "E")):
        expected = experiment.noise_spectrum(field, 5000)
        used = np.isfinite(expected)
        np.testing.assert_allclose(plotted[key][used], d_ell(np.where(used, expected, 0.0))[used], rtol=1e-12)
        assert np.all(np.isnan(plotted[key][~used]))  # cut multipoles are gaps, not spikes
    assert section.view.showing_plot and section.view.image.value[:4] == b"\x89PNG"


def test_noise_plot_follows_the_knox_formula(section):
    # Knox 1995 (PRD 52, 4307) white noise, beam-deconvolved: N = (Δ·π/10800)² exp(ℓ(ℓ+1)σ²) (common practice)
    section.controls["noise_temperature"].value = 3.0
    section.controls["beam_fwhm"].value = 2.0
    assert section.wait(10)
    sigma = 2.0 * ARCMIN / math.sqrt(8 * math.log(2))
    ell = np.arange(100, 2001)
    knox = (3.0 * ARCMIN) ** 2 * np.exp(ell * (ell + 1) * sigma**2)
    # both sides are the same closed form in float64; 1e-10 covers rounding of exp at ℓ(ℓ+1)σ² ≈ 1
    np.testing.assert_allclose(section.plotted()["noise T"][100:2001], ell * (ell + 1) * knox / (2 * np.pi), rtol=1e-10)


def test_changing_a_control_updates_state_and_redraws(section):
    before = section.view.image.value
    draws = section.view.draws
    section.controls["noise_temperature"].value = 7.5
    assert section.wait(10)
    assert section.state.experiment.noise_temperature == 7.5
    assert section.picker.value == ""  # no longer the shipped example
    assert section.view.draws > draws and section.view.image.value != before
    assert section.status.kind == "ok"


def test_invalid_control_reports_and_keeps_previous_experiment(section):
    previous = section.state.experiment
    section.controls["ell_knee_temperature"].value = 500.0  # α is still 0: not a valid 1/f term
    assert section.status.kind == "error"
    assert "alpha_knee_temperature must be negative" in section.status.message
    assert section.state.experiment == previous
    section.controls["alpha_knee_temperature"].value = -3.0
    assert section.status.kind == "ok"
    assert section.state.experiment.ell_knee_temperature == 500.0


def test_inverted_ell_range_is_reported(section):
    section.controls["ell_min"].value = 5000
    assert section.status.kind == "error" and "must be greater than ell_min=5000" in section.status.message


def test_picker_loads_each_shipped_example(section):
    for name in lensrec.available_experiments():
        section.picker.value = name
        assert section.state.experiment == lensrec.load_experiment(name)
        assert section.controls["beam_fwhm"].value == lensrec.load_experiment(name).beam_fwhm
    assert section.wait(10)


def test_sqrt2_checkbox_derives_polarization_noise(section):
    section.controls["noise_temperature"].value = 2.0
    section.sqrt2.value = True
    assert section.controls["noise_polarization"].disabled
    assert section.state.experiment.noise_polarization == pytest.approx(2.0 * math.sqrt(2.0), rel=1e-15)
    section.sqrt2.value = False
    section.controls["noise_polarization"].value = 9.0
    assert section.state.experiment.noise_polarization == 9.0


def test_toml_save_load_round_trip_and_overwrite_guard(section, tmp_path):
    path = tmp_path / "survey.toml"
    section.controls["noise_temperature"].value = 4.25
    section.path_box.value = str(path)
    section.save_button.click()
    assert section.status.kind == "ok" and path.is_file()
    assert lensrec.Experiment.from_toml(path) == section.state.experiment

    section.save_button.click()  # refuses to overwrite silently
    assert section.status.kind == "error" and "tick 'overwrite'" in section.status.message
    section.overwrite.value = True
    section.save_button.click()
    assert section.status.kind == "ok"

    section.picker.value = "wide_lowland"
    section.load_button.click()
    assert section.state.experiment.noise_temperature == 4.25
    assert section.controls["noise_temperature"].value == 4.25


def test_toml_load_errors_are_visible(section, tmp_path):
    section.path_box.value = ""
    section.load_button.click()
    assert section.status.kind == "error" and "file name is empty" in section.status.message
    section.path_box.value = str(tmp_path / "missing.toml")
    section.load_button.click()
    assert section.status.kind == "error" and "does not exist" in section.status.message
    bad = tmp_path / "bad.toml"
    bad.write_text("[experiment]\nnoise_temprature = 1.0\n")
    section.path_box.value = str(bad)
    section.load_button.click()
    assert section.status.kind == "error" and "did you mean 'noise_temperature'" in section.status.message
    assert not section.load_button.disabled


def test_an_edited_example_is_renamed_and_titles_follow(section, app):
    shipped = lensrec.load_experiment("deep_highland").name
    section.controls["noise_temperature"].value = 9.0
    assert section.state.experiment.name == f"{shipped} (modified)"
    assert section.name_box.value == f"{shipped} (modified)"
    assert section.picker.value == ""  # "custom settings": no shipped example has these values
    assert app.wait(60)
    assert f"{shipped} (modified)" in section.plot_title.get_text()
    assert f"{shipped} (modified)" in app["noise"].plot_title.get_text()
    section.name_box.value = "my survey"  # a name typed by the user is kept as typed
    assert section.state.experiment.name == "my survey"
    section.controls["beam_fwhm"].value = 2.5
    assert section.state.experiment.name == "my survey"
    assert app.wait(60)
    assert "my survey" in app["noise"].plot_title.get_text()
