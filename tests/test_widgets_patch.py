"""The workbench on the invented deep patch: the sky section simulates it, reconstruction picks the optimal filter."""

import numpy as np

from lensrec.demo_patch import patch_footprint
from widgets import Workbench


def test_patch_sky_is_reconstructed_with_the_optimal_filter_and_its_progress_is_shown(monkeypatch):
    # this checks the workbench's plumbing (patch sky, filter choice, CG progress), not the filter's accuracy
    # (tests/test_optimal_filter.py): at nside 32 the signal-dominated low multipoles make the harmonic-diagonal
    # preconditioner slow, so a loose tolerance keeps the test short
    monkeypatch.setattr("lensrec.filter_choice.DEFAULT_CG_TOLERANCE", 0.05)
    workbench = Workbench(experiment="deep_highland", nthreads=1)
    sky = workbench["sky"]
    sky.nside.value, sky.lmax.value = 32, 64
    sky.mask.value = "patch"
    sky.simulate_button.click()
    assert workbench.wait(180) and sky.status.kind == "ok", sky.status.message
    simulated = workbench.state.sky
    mask, hits = patch_footprint(32)
    np.testing.assert_array_equal(simulated.mask, mask)
    assert simulated.pixel_noise is not None and simulated.settings["noise_model"] == "pixel_variance_white"
    section = workbench["reconstruction"]
    messages = []
    section.task.label.observe(lambda change: messages.append(change["new"]), names="value")
    section.estimator.value = "TT"
    section.filter.value = "auto"
    section.run_button.click()
    assert workbench.wait(300) and section.status.kind == "ok", section.status.message
    assert section.result.settings["filter_choice"] == "optimal"
    assert section.result.settings["filter"]["cg_iterations"] > 0
    assert any("optimal filter: iteration" in str(message) for message in messages)
