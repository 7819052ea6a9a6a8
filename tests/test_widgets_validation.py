"""Headless tests of the Validation section: the suite it runs, the budget and bandpowers it draws, Cancel."""

import json
import os
import threading

import numpy as np
import pytest

import lensrec
from widgets import Workbench
from widgets.validation_panel import NEEDS

if not all(hasattr(lensrec, name) for name in NEEDS):  # the section then says what it needs instead
    pytest.skip("this lensrec has no lensing simulation suite", allow_module_level=True)

from lensrec import bandpowers  # noqa: E402

SMALL = {"nside": 32, "lmax": 64, "n_sims": 4, "seed": 5}


def _configure(section, folder, **changes):
    values = dict(SMALL, **changes)
    section.nside.value = values["nside"]
    section.lmax.value = values["lmax"]
    section.n_sims.value = values["n_sims"]
    section.seed.value = values["seed"]
    section.estimator.value = "MV"
    section.executor.value = "serial"
    section.folder.value = str(folder)


@pytest.fixture(scope="module")
def app(tmp_path_factory):
    workbench = Workbench(experiment="deep_highland", nthreads=2)
    section = workbench["validation"]
    _configure(section, tmp_path_factory.mktemp("suite"))
    section.run_button.click()
    # "warning" when the tiny suite cannot constrain A_lens (checked in test_an_unconstrained_fit_is_flagged)
    assert workbench.wait(240) and section.status.kind in ("ok", "warning"), section.status.message
    assert section.result is not None
    return workbench


def test_suite_has_the_settings_of_the_controls(app):
    section = app["validation"]
    with open(os.path.join(section.folder.value, "suite.json")) as handle:
        stored = json.load(handle)["settings"]
    expected = lensrec.lensing_suite_settings(
        lensrec.load_experiment("deep_highland"),
        nside=32,
        lmax=64,
        estimators=("MV",),
        n_sims=4,
        seed=5,
        n1=False,
        lmax_margin=section.lmax_margin.value,
    )
    assert stored == json.loads(json.dumps(expected))


def test_drawn_bandpowers_and_budget_are_the_library_result(app):
    section = app["validation"]
    reference = lensrec.lensing_bandpowers(section.folder.value, estimator="MV")
    drawn = section.plotted()
    np.testing.assert_allclose(drawn["L_eff"], reference.L_eff, rtol=1e-12)
    np.testing.assert_allclose(drawn["bandpowers"], reference.debiased, rtol=1e-12)
    np.testing.assert_allclose(drawn["errors"], reference.errors, rtol=1e-9)
    np.testing.assert_allclose(drawn["rdn0"], np.abs(reference.terms["rdn0"]), rtol=1e-12)
    np.testing.assert_allclose(drawn["raw"], np.abs(reference.raw), rtol=1e-12)
    assert f"{reference.amplitude:.3f}" in section.status.message
    for row in bandpowers.bias_budget(reference)["bandpowers"]:
        assert f"{row['rdn0']:.3g}" in section.table.value
    assert app.state.validation is section.result


def test_cancel_keeps_finished_simulations_and_run_resumes(app, tmp_path):
    section = app["validation"]
    _configure(section, tmp_path / "cancelled", n_sims=12)
    started = threading.Event()
    section.task.label.observe(lambda change: started.set() if "simulations" in change["new"] else None, "value")
    section.run_button.click()
    assert started.wait(120)
    section.cancel_button.click()
    assert section.wait(120)
    assert section.status.kind == "warning" and "Press Run suite again to resume" in section.status.message
    assert not section.run_button.disabled and section.cancel_button.disabled
    section.n_sims.value = 4
    section.run_button.click()
    assert section.wait(240) and section.status.kind in ("ok", "warning"), section.status.message
    assert section.result is not None and "A_lens" in section.status.message
    assert section.suite.runs["simulations"].reused  # finished simulations came from the cache


def test_a_folder_holding_another_suite_is_refused_visibly(app, tmp_path):
    section = app["validation"]
    folder = app["validation"].folder.value
    _configure(section, folder, seed=99)
    section.run_button.click()
    assert section.wait(60)
    assert section.status.kind == "error" and "use a new folder" in section.status.message
    assert not section.run_button.disabled


def test_bad_suite_size_is_reported(app, tmp_path):
    section = app["validation"]
    _configure(section, tmp_path / "bad", n_sims=0)
    section.run_button.click()
    assert section.wait(60)
    assert section.status.kind == "error" and "n_sims" in section.status.message


def test_the_curl_view_follows_the_toggle_at_once(app):
    section = app["validation"]
    suite, runs = section.suite, section.task.runs
    section.component.value = "curl"
    assert section.wait(60)
    assert section.task.runs == runs and section.suite is suite  # analyzed again, not simulated again
    assert section.result.component == "curl"
    reference = lensrec.lensing_bandpowers(suite, estimator="MV", component="curl")
    np.testing.assert_allclose(section.plotted()["bandpowers"], reference.debiased, rtol=1e-12)
    assert "curl" in section.bands_title.get_text()
    # curl has no signal: ratios are to the analytic N0 and the column says so
    assert "RDN0/N0 (analytic)" in section.table.value and "RDN0/S" not in section.table.value
    # legends list only curves that are drawn: no signal and no fiducial or fitted curve for the curl
    bias_legend = [t.get_text() for t in section.ax_bias.get_legend().get_texts()]
    bands_legend = [t.get_text() for t in section.ax_bands.get_legend().get_texts()]
    assert "signal" not in bias_legend and "raw" in bias_legend
    assert not any("fiducial" in text for text in bands_legend)
    drawn = {line.get_label() for line in section.ax_bias.get_lines()
             if np.isfinite(np.asarray(line.get_ydata(), dtype=float)).any() and line.get_visible()}  # fmt: skip
    assert set(bias_legend) <= drawn
    section.component.value = "gradient"
    assert section.wait(60)
    assert section.result.component == "gradient" and "RDN0/S" in section.table.value
    assert any("fiducial" in t.get_text() for t in section.ax_bands.get_legend().get_texts())


def test_an_unconstrained_fit_is_flagged(app):
    from types import SimpleNamespace

    from widgets.validation_panel import amplitude_is_constrained

    section = app["validation"]
    result = section.result
    constrained = amplitude_is_constrained(result)
    assert constrained == (result.amplitude_error <= 0.5)
    assert (section.status.kind == "warning") == (not constrained)
    assert ("⚠" in section.table.value) == (not constrained)
    # a fit like A_lens = −4.6 ± 6.2 cannot tell lensing from none and must carry the caution
    fake = SimpleNamespace(amplitude=-4.6, amplitude_error=6.2, estimator="MV", n_sims=4, chi2=3.0, dof=8, pte=0.9)
    assert not amplitude_is_constrained(fake)
    kept, section.result = section.result, fake
    try:
        kind, text = section.summary_message()
    finally:
        section.result = kept
    assert kind == "warning" and "does not constrain A_lens" in text
    fake.amplitude, fake.amplitude_error = 1.02, 0.08
    assert amplitude_is_constrained(fake)


def test_workers_field_only_for_worker_processes(app):
    section = app["validation"]
    assert section.executor.value == "serial" and section.workers.layout.display == "none"
    section.executor.value = "processes"
    assert section.workers.layout.display is None
    section.executor.value = "serial"


def test_use_the_sky_settings_takes_the_sky_and_its_mask(app, tmp_path):
    section = app["validation"]
    assert section.use_sky_button.disabled  # no sky yet
    sky = app["sky"]
    sky.nside.value, sky.lmax.value, sky.seed.value = 32, 60, 2
    sky.mask.value, sky.cap_radius.value, sky.taper.value = "cap", 40.0, 10.0
    sky.noise.value = False
    sky.simulate_button.click()
    assert app.wait(120) and sky.status.kind == "ok", sky.status.message
    assert not section.use_sky_button.disabled
    section.use_sky_button.click()
    assert section.status.kind == "ok", section.status.message
    assert (section.nside.value, section.lmax.value, section.noise.value) == (32, 60, False)
    assert section.lmax_margin.value == app.state.sky.settings["lmax_margin"]
    assert section.use_sky_mask.value
    path = section._mask_file(str(tmp_path))
    np.testing.assert_array_equal(lensrec.load_mask(path, 32), app.state.sky.mask)
    settings = lensrec.lensing_suite_settings(app.state.experiment, nside=32, lmax=60, mask=path, n_sims=4,
                                              noise=False)  # fmt: skip
    assert settings["mask_moments"]["w2"] == pytest.approx(np.mean(np.asarray(app.state.sky.mask) ** 2), rel=1e-12)
    assert section._mask_file(str(tmp_path)) == path  # the same mask is written once
    section.use_sky_mask.value = False
    assert section._mask_file(str(tmp_path)) is None
