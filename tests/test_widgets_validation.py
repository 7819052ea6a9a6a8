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
    assert workbench.wait(240) and section.status.kind == "ok", section.status.message
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
    assert section.wait(240) and section.status.kind == "ok", section.status.message
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
