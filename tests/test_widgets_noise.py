"""Headless tests of the Estimator-noise section: plotted N0 and S/N equal lensrec's, live updates, errors."""

import numpy as np
import pytest

import lensrec
from widgets import Workbench

# a small experiment keeps each N0 evaluation well under a second
SMALL = lensrec.Experiment(name="small test survey", noise_temperature=3.0, beam_fwhm=3.0, ell_min=2,
                           ell_max_temperature=1000, ell_max_polarization=1000, sky_fraction=0.5)  # fmt: skip


@pytest.fixture
def app():
    workbench = Workbench(experiment=SMALL, delay=0.0, nthreads=2)
    assert workbench.wait(60)
    return workbench


def _phi_units(cl):
    # [L(L+1)]² C_L / 2π: the usual lensing-potential plot units (lensrec conventions)
    L = np.arange(len(cl))
    return (L * (L + 1.0)) ** 2 * cl / (2 * np.pi)


def _kappa_units(cl):
    # C_L^κκ = [L(L+1)]² C_L^φφ / 4 from κ = L(L+1) φ / 2 (lensrec conventions)
    L = np.arange(len(cl))
    return (L * (L + 1.0)) ** 2 * cl / 4.0


def test_plotted_n0_equals_the_library_result(app):
    section = app["noise"]
    expected = lensrec.reconstruction_noise(SMALL, nthreads=2)
    plotted = section.plotted()
    assert set(plotted) == {"signal", *lensrec.labels.ESTIMATORS}
    for label in ("TT", "EE", "EB", "MV", "GMV"):
        x, y = plotted[label]
        np.testing.assert_array_equal(x, np.arange(2, 1001))
        # same computation, same inputs: equal to rounding of the units conversion
        np.testing.assert_allclose(y, _phi_units(expected.n0[label]["gradient"])[2:], rtol=1e-12)
    x, y = plotted["signal"]
    np.testing.assert_allclose(y, _phi_units(lensrec.fiducial_spectra().phi[:1001])[2:], rtol=1e-12)
    assert app.state.noise is section.result


def test_snr_table_matches_the_library(app):
    section = app["noise"]
    expected = lensrec.reconstruction_noise(SMALL, nthreads=2).lensing_snr()
    assert set(section.snr) == set(expected)
    for label, value in expected.items():
        assert section.snr[label] == pytest.approx(value, rel=1e-12)
        assert f"{value:.1f}" in section.table.value
    assert "sky fraction = 0.5" in section.table.value


def test_units_and_component_redraw_without_recomputing(app):
    section = app["noise"]
    result = section.result
    section.units.value = "kappa"
    section.component.value = "curl"
    assert section.wait(30)
    assert section.result is result  # nothing that N0 depends on changed
    x, y = section.plotted()["MV"]
    np.testing.assert_allclose(y, _kappa_units(result.n0["MV"]["curl"])[2:], rtol=1e-12)
    assert "curl" in section.plot_title.get_text()


def test_experiment_change_recomputes_n0_live(app):
    before = app["noise"].result
    app["experiment"].controls["noise_temperature"].value = 12.0
    app["experiment"].controls["beam_fwhm"].value = 4.0
    assert app.wait(60)
    section = app["noise"]
    assert section.result is not before
    # the section keeps "Δ_P = √2 Δ_T" ticked for an experiment defined that way
    changed = SMALL.replace(noise_temperature=12.0, noise_polarization=None, beam_fwhm=4.0)
    assert section.result.experiment == changed
    expected = lensrec.reconstruction_noise(changed, nthreads=2)
    np.testing.assert_allclose(section.plotted()["TT"][1], _phi_units(expected.n0["TT"]["gradient"])[2:], rtol=1e-12)
    # more noise, more N0: the 4x noise power must raise the TT reconstruction noise at every L
    assert np.all(expected.n0["TT"]["gradient"][2:] > before.n0["TT"]["gradient"][2:])


def test_estimator_choice_and_lmax_L(app):
    section = app["noise"]
    for label in set(lensrec.labels.ESTIMATORS) - {"EE", "EB", "MV"}:
        section.estimator_boxes[label].value = False
    section.lmax_L.value = 600
    assert section.wait(30)
    assert set(section.plotted()) == {"signal", "EE", "EB", "MV"}
    assert int(section.result.L[-1]) == 600
    expected = lensrec.reconstruction_noise(SMALL, estimators=("EE", "EB", "MV"), lmax_L=600, nthreads=2)
    np.testing.assert_allclose(section.plotted()["MV"][1], _phi_units(expected.n0["MV"]["gradient"])[2:], rtol=1e-12)


def test_bad_lmax_L_is_reported_and_the_stale_plot_withdrawn(app):
    section = app["noise"]
    section.lmax_L.value = 5000  # beyond the experiment's CMB ℓ_max of 1000
    assert section.wait(30)
    assert section.status.kind == "error"
    assert "lmax_L=5000 exceeds the CMB l_max=1000" in section.status.message
    assert not section.view.showing_plot and "No N0" in section.view.note.value
    assert app.state.noise is None
    section.lmax_L.value = 0
    assert section.wait(30)
    assert section.status.kind == "ok" and section.view.showing_plot


def test_no_estimator_selected_is_a_visible_warning(app):
    section = app["noise"]
    for box in section.estimator_boxes.values():
        box.value = False
    assert section.wait(30)
    assert section.status.kind == "warning" and "No estimator" in section.status.message
    assert not section.view.showing_plot


def test_iterative_toggle_adds_the_iterative_curves(app):
    # The iterative noise lies below the quadratic one (Smith et al. 2012, JCAP 06, 014) and is drawn from
    # lensrec.iterative_reconstruction_noise unchanged.
    section = app["noise"]
    section.curves.value = "iterative"
    assert app.wait(120)
    plotted = section.plotted()
    assert {"EB iterative", "MV iterative"} <= set(plotted)
    expected = lensrec.iterative_reconstruction_noise(SMALL, estimators=("EB", "MV"), nthreads=2)
    for label in ("EB", "MV"):
        x, y = plotted[f"{label} iterative"]
        np.testing.assert_allclose(y, _phi_units(expected.n0[label]["gradient"])[2:], rtol=1e-12)
        assert np.all(y <= plotted[label][1] * (1 + 1e-12))
    section.curves.value = "quadratic"
    assert app.wait(60)
    assert "EB iterative" not in section.plotted()


def test_n1_checkbox_adds_n0_plus_analytic_n1(app):
    # The dash-dot curves are N0 + lensrec.analytic_n1 unchanged (same coarse grid); N1 of EB is positive
    # (Kesden, Cooray & Kamionkowski 2003), so the total lies above N0.
    section = app["noise"]
    for label, box in section.estimator_boxes.items():
        box.value = label in ("TT", "EB")
    assert app.wait(60)
    section.with_n1.value = True
    assert app.wait(120)
    plotted = section.plotted()
    assert {"TT N0+N1", "EB N0+N1"} <= set(plotted)
    grid = np.unique(np.round(np.geomspace(2, 1000, 12)).astype(int))
    n1 = lensrec.analytic_n1(SMALL, estimators=("TT", "EB"), L_grid=grid, grid_size=96, nthreads=2)
    x, y = plotted["EB N0+N1"]
    np.testing.assert_allclose(y, _phi_units(section.result.n0["EB"]["gradient"] + n1.n1["EB"]["gradient"])[2:],
                               rtol=1e-9)  # fmt: skip
    assert np.all(y[98:] > plotted["EB"][1][98:])  # L >= 100
    section.with_n1.value = False
    assert app.wait(60)
    assert "EB N0+N1" not in section.plotted()


def test_reticking_an_estimator_clears_the_warning_and_the_snr_follows_the_choice(app):
    section = app["noise"]
    for box in section.estimator_boxes.values():
        box.value = False
    assert section.wait(30)
    assert section.status.kind == "warning" and section.table.value == ""  # no S/N left from before
    section.estimator_boxes["EE"].value = True
    assert section.wait(30)
    # the earlier result for the same choice may be reused, but the status must say what is shown
    assert section.status.kind == "ok" and "N0 of EE" in section.status.message, section.status.message
    assert section.view.showing_plot and "EE" in section.table.value and "TT" not in section.table.value


def test_convergence_units_name_the_convergence_in_the_legend(app):
    section = app["noise"]
    section.units.value = "kappa"
    assert section.wait(30)
    texts = [text.get_text() for text in section.ax.get_legend().get_texts()]
    assert any(r"\kappa\kappa" in text for text in texts)
    assert not any(r"\phi\phi" in text for text in texts)
    section.units.value = "phi"
    assert section.wait(30)
    texts = [text.get_text() for text in section.ax.get_legend().get_texts()]
    assert any(r"\phi\phi" in text for text in texts)
