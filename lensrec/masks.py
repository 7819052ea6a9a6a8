"""Sky masks: binary and apodized weights on HEALPix (RING) maps.

A mask is a map of weights w(n) in [0, 1]: 0 is unobserved, 1 fully used. Apodized masks fall from 1 to
0 over a taper of given width (degrees) measured inward from the edge of the observed region, with a
cosine profile of C¹ or C² smoothness:

    C1:  w = x − sin(2πx)/(2π),     C2:  w = (1 − cos πx)/2,     x = (distance to the edge)/width ∈ [0, 1],

and w = 1 for x ≥ 1 (Grain, Tristram & Stompor 2009, PRD 79, 123515, eqs. 31–32). For latitude cuts and
circular caps the distance to the edge is exact; for an arbitrary binary mask it is the angular distance
from each observed pixel center to the nearest unobserved pixel center (accurate to about half a pixel).
"""

from __future__ import annotations

import os

import numpy as np

from ._checks import as_finite_array, as_float, check_nside
from ._deprecation import RenamedKeys, upgrade_keys
from .harmonics import npix_to_nside

__all__ = [
    "TAPERS",
    "taper_profile",
    "apodize_binary_mask",
    "latitude_mask",
    "cap_mask",
    "sky_fraction_moments",
    "check_mask",
    "load_mask",
]

TAPERS = ("C1", "C2")


def _check_taper(taper) -> str:
    if not isinstance(taper, str) or taper.upper() not in TAPERS:
        raise ValueError(f"taper must be one of {TAPERS}, got {taper!r}")
    return taper.upper()


def taper_profile(x, taper: str = "C2") -> np.ndarray:
    """The taper w(x) for x = distance to the edge / taper width (0 at the edge, 1 from x = 1 on).

    Parameters
    ----------
    x : array
        Normalized distance inside the observed region; values < 0 give 0, values > 1 give 1.
    taper : {'C1', 'C2'}
        Profile (Grain, Tristram & Stompor 2009, PRD 79, 123515, eqs. 31–32).

    Examples
    --------
    >>> np.round(taper_profile([0.0, 0.5, 1.0, 2.0]), 12).tolist()
    [0.0, 0.5, 1.0, 1.0]
    """
    taper = _check_taper(taper)
    x = np.clip(np.asarray(x, dtype=np.float64), 0.0, 1.0)
    if taper == "C1":
        return x - np.sin(2.0 * np.pi * x) / (2.0 * np.pi)
    return 0.5 * (1.0 - np.cos(np.pi * x))


def _taper_from_distance(distance_rad: np.ndarray, width_deg: float, taper: str) -> np.ndarray:
    """Weights from the signed distance to the edge (positive inside the observed region)."""
    if width_deg == 0.0:
        return (distance_rad > 0.0).astype(np.float64)
    return taper_profile(distance_rad / np.radians(width_deg), taper)


def _pixel_vectors(nside: int) -> np.ndarray:
    import healpy

    return np.array(healpy.pix2vec(nside, np.arange(12 * nside * nside))).T


def latitude_mask(nside: int, b_min: float, width: float = 0.0, taper: str = "C2") -> np.ndarray:
    """A Galactic-style cut keeping |b| > ``b_min``, where b = 90° − θ is the latitude of the map frame.

    Parameters
    ----------
    nside : int
        HEALPix resolution.
    b_min : float
        Half-width of the removed band in degrees, 0 ≤ b_min < 90.
    width : float
        Taper width in degrees inside the kept region (0 gives a binary mask); default 0.
    taper : {'C1', 'C2'}

    Returns
    -------
    numpy.ndarray, shape (12·nside²,)
        Weights in [0, 1] (RING order).

    Examples
    --------
    >>> w = latitude_mask(16, 30.0)
    >>> round(float(w.mean()), 1)   # analytic 1 - sin(30 deg) = 0.5
    0.5
    """
    import healpy

    nside = check_nside(nside)
    b_min = as_float(b_min, "b_min", minimum=0.0, maximum=90.0)
    if b_min >= 90.0:
        raise ValueError(f"b_min must be < 90 degrees (a cut at 90 removes the whole sky), got {b_min}")
    width = as_float(width, "width", minimum=0.0, maximum=90.0)
    taper = _check_taper(taper)
    theta, _ = healpy.pix2ang(nside, np.arange(12 * nside * nside))
    latitude = np.pi / 2.0 - theta
    return _taper_from_distance(np.abs(latitude) - np.radians(b_min), width, taper)


def cap_mask(nside: int, lon: float, lat: float, radius: float, width: float = 0.0, taper: str = "C2") -> np.ndarray:
    """A circular cap of angular ``radius`` around (``lon``, ``lat``), optionally apodized inward.

    Parameters
    ----------
    nside : int
        HEALPix resolution.
    lon, lat : float
        Center longitude and latitude in degrees (latitude in [−90, 90]).
    radius : float
        Cap radius in degrees, 0 < radius ≤ 180.
    width : float
        Taper width in degrees (≤ radius); default 0 (binary).
    taper : {'C1', 'C2'}

    Returns
    -------
    numpy.ndarray, shape (12·nside²,)
        Weights in [0, 1]. The binary cap covers f_sky = (1 − cos r)/2.

    Examples
    --------
    >>> w = cap_mask(64, 0.0, 90.0, 60.0)
    >>> abs(float(w.mean()) - 0.25) < 0.01
    True
    """
    import healpy

    nside = check_nside(nside)
    lon = as_float(lon, "lon")
    lat = as_float(lat, "lat", minimum=-90.0, maximum=90.0)
    radius = as_float(radius, "radius", minimum=0.0, maximum=180.0, strict_minimum=True)
    width = as_float(width, "width", minimum=0.0, maximum=180.0)
    if width > radius:
        raise ValueError(f"width={width} degrees must not exceed the cap radius={radius} degrees")
    taper = _check_taper(taper)
    center = healpy.ang2vec(np.radians(90.0 - lat), np.radians(lon))
    vectors = _pixel_vectors(nside)
    separation = np.arctan2(np.linalg.norm(np.cross(vectors, center), axis=1), vectors @ center)
    return _taper_from_distance(np.radians(radius) - separation, width, taper)


def apodize_binary_mask(mask, width: float, taper: str = "C2") -> np.ndarray:
    """Apodize a binary mask: weights rise from 0 at the edge to 1 at ``width`` degrees inside.

    The distance of each observed pixel (value 1) to the nearest unobserved pixel (value 0) is found with a
    k-d tree on the pixel unit vectors (chord → angle), so pixels on the edge get a weight of about
    half a pixel over the width.

    Parameters
    ----------
    mask : array, shape (12·nside²,)
        Values 0 or 1 (RING order).
    width : float
        Taper width in degrees (> 0).
    taper : {'C1', 'C2'}

    Returns
    -------
    numpy.ndarray
        Weights in [0, 1], zero wherever ``mask`` is 0.

    Raises
    ------
    ValueError
        If the mask is not binary, or has no observed or no unobserved pixel.

    Examples
    --------
    >>> import numpy as np
    >>> binary = (latitude_mask(32, 20.0) > 0).astype(float)
    >>> w = apodize_binary_mask(binary, 5.0)
    >>> bool(w.max() == 1.0 and w[binary == 0].max() == 0.0)
    True
    """
    from scipy.spatial import cKDTree

    mask = as_finite_array(mask, "mask", ndim=1)
    nside = npix_to_nside(mask.size, "mask")
    if not np.all((mask == 0.0) | (mask == 1.0)):
        raise ValueError("mask must be binary (only 0 and 1) to be apodized; threshold it first, e.g. mask > 0.5")
    width = as_float(width, "width", minimum=0.0, maximum=90.0, strict_minimum=True)
    taper = _check_taper(taper)
    observed = mask == 1.0
    if not observed.any():
        raise ValueError("mask has no observed pixel (all zero)")
    if observed.all():
        return np.ones_like(mask)
    vectors = _pixel_vectors(nside)
    tree = cKDTree(vectors[~observed])
    chord_limit = 2.0 * np.sin(min(np.radians(width), np.pi) / 2.0)
    chord, _ = tree.query(vectors[observed], k=1, distance_upper_bound=chord_limit * (1 + 1e-9))
    angle = np.where(np.isfinite(chord), 2.0 * np.arcsin(np.minimum(chord, 2.0) / 2.0), np.inf)
    weights = np.zeros_like(mask)
    weights[observed] = _taper_from_distance(angle, width, taper)
    return weights


def check_mask(mask, nside: int | None = None, name: str = "mask") -> np.ndarray:
    """Validate a mask: finite, in [0, 1], with 12·nside² pixels (if ``nside`` is given), not all zero.

    Returns
    -------
    numpy.ndarray
        The mask as float64.

    Examples
    --------
    >>> check_mask(np.ones(12), nside=1).shape
    (12,)
    """
    array = as_finite_array(mask, name, ndim=1)
    mask_nside = npix_to_nside(array.size, name)
    if nside is not None and mask_nside != check_nside(nside):
        raise ValueError(
            f"{name} has nside {mask_nside} ({array.size} pixels) but nside {nside} ({12 * nside * nside} pixels) "
            "is required; regrade it (e.g. healpy.ud_grade) first"
        )
    low, high = float(array.min()), float(array.max())
    if low < 0.0 or high > 1.0:
        raise ValueError(f"{name} values must lie in [0, 1]; found values in [{low:.6g}, {high:.6g}]")
    if high == 0.0:
        raise ValueError(f"{name} is zero everywhere: nothing is observed")
    return array


def load_mask(path, nside: int | None = None) -> np.ndarray:
    """Read a mask from a HEALPix FITS file (first column, returned in RING order) and validate it.

    Parameters
    ----------
    path : str or path
    nside : int, optional
        Required resolution; a mask of another nside is refused.

    Raises
    ------
    ValueError
        Missing or unreadable file, NaN/inf or UNSEEN pixels, values outside [0, 1], wrong nside.
    """
    from .io import read_maps

    path = os.fspath(path)
    try:
        mask = read_maps(path, fields=0, quantity="none")
    except ValueError as exc:
        raise ValueError(f"mask file {path!r} cannot be used: {exc}") from None
    return check_mask(mask, nside, name=f"mask in {path!r}")


class MaskMoments(RenamedKeys):
    """The dict of :func:`sky_fraction_moments` (a plain dict that also answers the old key names)."""

    RENAMED = {"fsky": "sky_fraction", "fsky_spectra": "sky_fraction_spectra"}
    WHERE = "sky_fraction_moments()"

    @classmethod
    def upgraded(cls, moments) -> MaskMoments:
        """The moments of a mapping that may use the old key names (e.g. read from an older file)."""
        return cls(upgrade_keys(dict(moments), cls.RENAMED, "mask moments"))


def sky_fraction_moments(mask, orders=(1, 2, 3, 4)) -> dict[str, float]:
    """Moments ⟨wⁿ⟩ of the mask weights over the full sky, and the usual effective sky fractions.

    Parameters
    ----------
    mask : array
        Weights in [0, 1] (validated).
    orders : iterable of int
        Moments to return; default 1 to 4.

    Returns
    -------
    dict
        ``"w1"``, ``"w2"``, … for each order; ``"sky_fraction"`` = ⟨w⟩; ``"sky_fraction_spectra"`` =
        ⟨w²⟩²/⟨w⁴⟩, the effective fraction for the variance of pseudo-C_ℓ (Hivon et al. 2002, ApJ 567, 2,
        §4). The old keys ``"fsky"`` and ``"fsky_spectra"`` still answer, with a DeprecationWarning.

    Examples
    --------
    >>> import numpy as np
    >>> m = sky_fraction_moments(np.r_[np.ones(6), np.zeros(6)])
    >>> m["sky_fraction"], m["w2"], m["sky_fraction_spectra"]
    (0.5, 0.5, 0.5)
    """
    array = check_mask(mask)
    result = MaskMoments()
    for order in orders:
        order = int(order)
        if order < 1:
            raise ValueError(f"orders must be positive integers, got {order}")
        result[f"w{order}"] = float(np.mean(array**order))
    result["sky_fraction"] = float(np.mean(array))
    w2 = float(np.mean(array**2))
    w4 = float(np.mean(array**4))
    result["sky_fraction_spectra"] = w2 * w2 / w4
    return result
