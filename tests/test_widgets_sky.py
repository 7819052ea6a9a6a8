"""Headless tests of the Sky section: the simulated sky and the drawn projections equal lensrec's and healpy's."""

import functools

import healpy
import numpy as np
import pytest

import lensrec
from widgets import Workbench

SETTINGS = {"nside": 32, "lmax": 64, "seed": 7, "noise": True}


def _configure(section, nside=32, lmax=64, seed=7, noise=True):
    section.nside.value = nside
    section.lmax.value = lmax
    section.seed.value = seed
    section.noise.value = noise


@pytest.fixture(scope="module")
def simulated():
    app = Workbench(experiment="wide_lowland", nthreads=2)
    section = app["sky"]
    _configure(section)
    section.simulate_button.click()
    assert app.wait(120)
    assert section.status.kind == "ok", section.status.message
    return app


@pytest.fixture(scope="module")
def app():
    """A workbench without a sky yet, shared by the tests of settings and errors."""
    workbench = Workbench(experiment="wide_lowland", nthreads=2)
    assert workbench.wait(60)
    return workbench


def _mollweide(values, nside):
    # healpy's own projector (reference library), as healpy.mollview uses it
    projector = healpy.projector.MollweideProj(xsize=720)
    image = np.array(projector.projmap(values, functools.partial(healpy.vec2pix, nside)), dtype=float)
    image[~np.isfinite(image)] = np.nan
    return image


def test_simulated_sky_is_the_library_sky(simulated):
    sky = simulated.state.sky
    expected = lensrec.simulate_sky("wide_lowland", nthreads=2, **SETTINGS)
    # same seed, same thread count: the library promises the same sky; 1e-12 µK allows transform rounding
    np.testing.assert_allclose(sky.maps, expected.maps, rtol=0, atol=1e-12)
    np.testing.assert_allclose(sky.phi_alm, expected.phi_alm, rtol=0, atol=1e-20)
    assert simulated.state.sky_experiment == lensrec.load_experiment("wide_lowland")
    assert not simulated["sky"].simulate_button.disabled


def test_temperature_view_is_healpy_projection_of_the_observed_map(simulated):
    section = simulated["sky"]
    section.field.value = "T"
    assert section.wait(30)
    drawn = np.asarray(section.image_all.get_array(), dtype=float)
    np.testing.assert_array_equal(np.isnan(drawn), np.isnan(_mollweide(simulated.state.sky.maps[0], 32)))
    np.testing.assert_allclose(drawn, _mollweide(simulated.state.sky.maps[0], 32), equal_nan=True, rtol=1e-15)
    # one color scale for the all-sky and the zoomed view
    assert section.image_all.get_clim() == section.image_zoom.get_clim()
    low, high = section.image_all.get_clim()
    assert high > 0 and low == -high


def test_kappa_view_is_the_library_convergence(simulated):
    section = simulated["sky"]
    section.field.value = "kappa"
    assert section.wait(30)
    sky = simulated.state.sky
    kappa = lensrec.deflection_maps(sky.phi_alm, 32, 64, nthreads=2).kappa
    drawn = np.asarray(section.image_all.get_array(), dtype=float)
    np.testing.assert_allclose(drawn, _mollweide(kappa, 32), equal_nan=True, rtol=1e-12, atol=1e-15)
    assert section.colorbar.ax.get_ylabel() == "dimensionless"


def test_deflection_view_is_positive_with_a_realistic_rms(simulated):
    section = simulated["sky"]
    section.field.value = "deflection"
    assert section.wait(30)
    low, high = section.image_all.get_clim()
    assert low == 0.0 and high > 0
    # rms lensing deflection ≈ 2.5 arcmin (common practice); at lmax 64 most of its power (L ≲ 100) is kept,
    # and one realization scatters by a few per cent: accept 1.5–3 arcmin
    assert 1.5 < section.deflection_rms_arcmin < 3.0


def test_zoom_window_follows_its_controls(simulated):
    section = simulated["sky"]
    section.field.value = "T"
    section.zoom_lon.value, section.zoom_lat.value, section.zoom_size.value = 40.0, 20.0, 30.0
    assert section.wait(30)
    projector = healpy.projector.GnomonicProj(rot=(40.0, 20.0, 0.0), xsize=360, reso=30.0 * 60.0 / 360)
    expected = np.array(projector.projmap(simulated.state.sky.maps[0], functools.partial(healpy.vec2pix, 32)))
    np.testing.assert_allclose(np.asarray(section.image_zoom.get_array(), dtype=float), expected, rtol=1e-15)
    assert section.image_zoom.get_extent() == [-15.0, 15.0, -15.0, 15.0]
    assert "30° × 30° at (40°, 20°)" in section.title_zoom.get_text()


def test_cap_mask_is_applied_and_shaded():
    app = Workbench(experiment="wide_lowland", nthreads=2)
    section = app["sky"]
    _configure(section, noise=False)
    section.mask.value = "cap"
    section.cap_lon.value, section.cap_lat.value, section.cap_radius.value = 0.0, 90.0, 60.0
    section.simulate_button.click()
    assert app.wait(120) and section.status.kind == "ok", section.status.message
    sky = app.state.sky
    np.testing.assert_array_equal(sky.mask, lensrec.cap_mask(32, 0.0, 90.0, 60.0))
    assert np.all(sky.maps[:, sky.mask == 0] == 0)
    # a 60° cap around the north pole keeps f_sky = (1 − cos 60°)/2 = 0.25 (spherical geometry)
    assert abs(sky.mask.mean() - 0.25) < 0.01  # pixelisation of the cap edge at nside 32
    shade = np.asarray(section.shade_all.get_array())
    assert shade[..., 3].any() and not shade[..., 3].all()


def test_too_high_lmax_is_reported_and_the_button_re_enabled(app):
    section = app["sky"]
    _configure(section, lmax=200)  # > 3·32 − 1
    section.simulate_button.click()
    assert app.wait(60)
    assert section.status.kind == "error"
    assert "lmax=200 exceeds 3·nside − 1 = 95" in section.status.message
    assert "allow_high_lmax" not in section.status.message  # the workbench cannot pass it
    assert not section.simulate_button.disabled
    assert app.state.sky is None and "No sky yet" in section.view.note.value


def test_bad_mask_parameter_is_reported(app):
    section = app["sky"]
    _configure(section)
    section.mask.value = "latitude"
    section.b_min.value = 95.0
    section.simulate_button.click()
    assert app.wait(60)
    assert section.status.kind == "error" and "b_min must be <= 90" in section.status.message
    assert app.state.sky is None
    section.mask.value = "none"


def test_nside_sets_a_default_lmax(app):
    section = app["sky"]
    section.nside.value = 256
    assert section.lmax.value == 512


def test_experiment_change_marks_the_sky_out_of_date(simulated):
    section = simulated["sky"]
    simulated["experiment"].controls["noise_temperature"].value = 30.0
    assert simulated.wait(60)
    assert section.status.kind == "warning" and "press Simulate" in section.status.message
    assert simulated.state.sky_experiment == lensrec.load_experiment("wide_lowland")


def test_cancel_keeps_the_previous_sky_marked_out_of_date(simulated):
    section = simulated["sky"]
    before = simulated.state.sky
    section.seed.value = 8
    section.simulate_button.click()
    section.cancel_button.click()
    assert simulated.wait(120)
    assert section.status.kind == "warning" and "cancelled" in section.status.message
    assert simulated.state.sky is before and section.sky is before
    assert section.view.stale and "cancelled" in section.view.banner.value
    assert not section.simulate_button.disabled and section.cancel_button.disabled
    section.seed.value = 7


def test_simulation_progress_moves_through_its_steps(simulated):
    section = simulated["sky"]
    fractions, labels = [], []
    section.task.progress.observe(lambda change: fractions.append(change["new"]), "value")
    section.task.label.observe(lambda change: labels.append(change["new"]), "value")
    section.seed.value = 9
    section.simulate_button.click()
    assert simulated.wait(120) and section.status.kind == "ok", section.status.message
    # the bar moves with the library's steps (not one jump from 15% to done) and says what it is doing
    assert len({round(f, 3) for f in fractions if 0.05 <= f <= 0.85}) >= 6, fractions
    assert any("lensing Q and U" in text for text in labels) and any("noise and mask" in text for text in labels)
