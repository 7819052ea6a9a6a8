"""Masks: analytic sky fractions (spherical geometry), taper properties, validation of bad masks."""

import healpy
import numpy as np
import pytest

from lensrec import masks


def pixel_error(nside):
    # a binary edge cuts through pixels: the covered fraction is off by at most one row of edge pixels,
    # (edge length x pixel size) / 4pi <= (2pi x pixel size) / 4pi = pixel size / 2 (pixelisation error)
    return np.sqrt(4 * np.pi / (12 * nside**2)) / 2


@pytest.mark.parametrize("radius", [10.0, 30.0, 90.0, 150.0])
def test_cap_sky_fraction_is_the_spherical_cap_area(radius):
    # spherical-cap area 2*pi*(1 - cos r) over 4*pi (elementary spherical geometry)
    nside = 128
    w = masks.cap_mask(nside, lon=40.0, lat=-20.0, radius=radius)
    expected = (1 - np.cos(np.radians(radius))) / 2
    assert abs(masks.sky_fraction_moments(w)["sky_fraction"] - expected) < pixel_error(nside)


@pytest.mark.parametrize("b_min", [0.0, 20.0, 60.0])
def test_latitude_cut_sky_fraction(b_min):
    # |b| > b_min keeps 1 - sin(b_min) of the sphere (elementary spherical geometry)
    nside = 128
    w = masks.latitude_mask(nside, b_min)
    assert abs(w.mean() - (1 - np.sin(np.radians(b_min)))) < pixel_error(nside)


@pytest.mark.parametrize("taper", ["C1", "C2"])
def test_apodized_cap_fraction_and_taper_integral(taper):
    # for a cap of radius R tapered over width W, f_sky = integral over the cap of w(x) dA / 4pi; both
    # profiles are antisymmetric about x = 1/2 (w(x) + w(1-x) = 1, Grain et al. 2009, PRD 79, 123515),
    # so f_sky is the binary cap of radius R - W/2 up to the curvature term O(W^2) (< 1e-4 here)
    nside = 256
    w = masks.cap_mask(nside, 10.0, 50.0, radius=20.0, width=4.0, taper=taper)
    expected = (1 - np.cos(np.radians(18.0))) / 2
    assert abs(w.mean() - expected) < pixel_error(nside) + 1e-4
    assert w.min() >= 0.0 and w.max() <= 1.0


@pytest.mark.parametrize("taper", ["C1", "C2"])
def test_taper_is_monotonic_and_bounded(taper):
    x = np.linspace(-0.5, 1.5, 2001)
    w = masks.taper_profile(x, taper)
    assert np.all(np.diff(w) >= 0) and w.min() == 0.0 and w.max() == 1.0
    # C1/C2 forms of Grain et al. 2009 (PRD 79, 123515, eqs. 31-32): half height at mid-taper
    assert masks.taper_profile(0.5, taper) == pytest.approx(0.5, abs=1e-15)


def test_taper_is_monotonic_along_a_meridian():
    nside = 128
    w = masks.latitude_mask(nside, 20.0, width=10.0, taper="C2")
    theta = np.linspace(0.01, np.pi / 2 - 0.01, 400)
    values = w[healpy.ang2pix(nside, theta, np.zeros_like(theta))]
    assert np.all(np.diff(values) <= 0)  # from the pole down to the cut, the weight never rises
    assert values[0] == 1.0 and values[-1] == 0.0


def test_binary_apodization_matches_the_analytic_latitude_taper():
    # the k-d-tree distance to the nearest unobserved pixel center agrees with the exact distance to the
    # edge within about one pixel (0.46 deg at nside 128): compare the weights at that distance
    nside, width = 128, 8.0
    binary = masks.latitude_mask(nside, 20.0)
    numeric = masks.apodize_binary_mask(binary, width, "C2")
    analytic = masks.latitude_mask(nside, 20.0, width=width, taper="C2")
    pixel = np.degrees(np.sqrt(4 * np.pi / (12 * nside**2)))
    slope = np.pi / 2 / width  # max |dw/dx| of C2 is pi/2 per taper width
    assert np.max(np.abs(numeric - analytic)) < slope * pixel
    assert np.all(numeric[binary == 0] == 0.0)


def test_moments():
    w = masks.cap_mask(64, 0.0, 0.0, 40.0, width=10.0)
    m = masks.sky_fraction_moments(w)
    assert m["w1"] == pytest.approx(np.mean(w)) and m["w2"] == pytest.approx(np.mean(w**2))
    assert m["w4"] <= m["w2"] <= m["w1"]  # weights in [0, 1]
    assert m["sky_fraction_spectra"] == pytest.approx(m["w2"] ** 2 / m["w4"])


def test_load_mask_round_trip_and_refusals(tmp_path):
    from lensrec.io import write_maps

    nside = 16
    good = masks.cap_mask(nside, 0.0, 0.0, 40.0, width=10.0)
    write_maps(tmp_path / "good.fits", good)
    assert np.allclose(masks.load_mask(tmp_path / "good.fits", nside), good)
    with pytest.raises(ValueError, match="nside 16 .* but nside 32"):
        masks.load_mask(tmp_path / "good.fits", 32)
    out_of_range = good * 1.5
    write_maps(tmp_path / "big.fits", out_of_range)
    with pytest.raises(ValueError, match="must lie in \\[0, 1\\]"):
        masks.load_mask(tmp_path / "big.fits", nside)
    negative = good - 0.5
    write_maps(tmp_path / "neg.fits", negative)
    with pytest.raises(ValueError, match="must lie in \\[0, 1\\]"):
        masks.load_mask(tmp_path / "neg.fits", nside)
    with pytest.raises(ValueError, match="does not exist"):
        masks.load_mask(tmp_path / "missing.fits", nside)


def test_nan_mask_is_refused(tmp_path):
    nside = 16
    bad = np.ones(12 * nside**2)
    bad[5] = np.nan
    healpy.write_map(str(tmp_path / "nan.fits"), bad, dtype=np.float64)
    with pytest.raises(ValueError, match="non-finite|UNSEEN"):
        masks.load_mask(tmp_path / "nan.fits", nside)
    with pytest.raises(ValueError, match="non-finite"):
        masks.check_mask(bad)


@pytest.mark.parametrize(
    "call, match",
    [
        (lambda: masks.cap_mask(16, 0, 0, 0.0), "radius must be > 0"),
        (lambda: masks.cap_mask(16, 0, 0, 10.0, width=20.0), "must not exceed the cap radius"),
        (lambda: masks.latitude_mask(16, 90.0), "b_min must be < 90"),
        (lambda: masks.latitude_mask(16, 10.0, taper="C3"), "taper must be one of"),
        (lambda: masks.apodize_binary_mask(np.full(3072, 0.5), 2.0), "must be binary"),
        (lambda: masks.apodize_binary_mask(np.zeros(3072), 2.0), "no observed pixel"),
        (lambda: masks.check_mask(np.zeros(3072)), "zero everywhere"),
    ],
)
def test_bad_mask_arguments(call, match):
    with pytest.raises(ValueError, match=match):
        call()
