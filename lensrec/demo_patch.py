"""An invented deep survey patch for demonstrations: the "Quiet Hollow" field, made deterministically.

The footprint is an ellipse on the sky (semi-axes 28° × 19°, center at longitude 40°, latitude −55°,
long axis tilted 30° from the meridian), about 4% of the sky. The hit map falls off from the center to the
edge as a deep ground-based scan does: h ∝ (1 − ρ⁴)^(1/2) + 0.15, with ρ the elliptical radius (0 at the
center, 1 on the edge), times a ±5% stripe pattern along the scan direction. Nothing here describes a real
survey; the field, its numbers and its name are invented.

:func:`patch_footprint` builds the binary mask and the hits at any nside in well under a second, so the
patch is generated at run time (no data file); ``python -m lensrec.demo_patch OUT_DIR --nside 256`` writes
them as HEALPix FITS (mask.fits, hits.fits) for the command line.
"""

from __future__ import annotations

import argparse
import math
import os

import numpy as np

from ._checks import as_float, check_nside

__all__ = ["PATCH_NAME", "patch_footprint", "write_patch"]

PATCH_NAME = "Quiet Hollow"
_CENTRE = (40.0, -55.0)  # longitude, latitude in degrees
_SEMI_AXES = (28.0, 19.0)  # degrees
_TILT = 30.0  # degrees from the local meridian


def patch_footprint(nside: int, apodization: float | None = None) -> tuple[np.ndarray, np.ndarray]:
    """The patch's mask and hit map at ``nside`` (RING): ``(mask, hits)``.

    Parameters
    ----------
    nside : int
    apodization : float, optional
        Taper width in degrees: return an apodized mask (:func:`lensrec.apodize_binary_mask`, C2) for the
        isotropic filter instead of the binary one the optimal filter uses.

    Returns
    -------
    mask : ndarray
        1 inside the ellipse, 0 outside (or the apodized weights).
    hits : ndarray
        Relative hit counts (mean 1 over the patch), 0 outside it.

    Examples
    --------
    >>> mask, hits = patch_footprint(64)
    >>> 0.03 < mask.mean() < 0.05, round(float(hits[mask > 0].mean()), 6)
    (True, 1.0)
    """
    import healpy

    nside = check_nside(nside)
    theta, phi = healpy.pix2ang(nside, np.arange(12 * nside * nside))
    lon0, lat0 = np.radians(_CENTRE[0]), np.radians(_CENTRE[1])
    # gnomonic-like local coordinates around the center (tangent-plane projection of the unit vectors)
    x, y, z = np.sin(theta) * np.cos(phi), np.sin(theta) * np.sin(phi), np.cos(theta)
    center = np.array([math.cos(lat0) * math.cos(lon0), math.cos(lat0) * math.sin(lon0), math.sin(lat0)])
    east = np.array([-math.sin(lon0), math.cos(lon0), 0.0])
    north = np.cross(center, east)
    cosine = x * center[0] + y * center[1] + z * center[2]
    angle = np.arccos(np.clip(cosine, -1.0, 1.0))
    u = x * east[0] + y * east[1] + z * east[2]
    v = x * north[0] + y * north[1] + z * north[2]
    norm = np.hypot(u, v)
    safe = np.where(norm > 0, norm, 1.0)
    along = angle * np.where(norm > 0, v / safe, 0.0)
    across = angle * np.where(norm > 0, u / safe, 0.0)
    rotated_along = along * math.cos(math.radians(_TILT)) + across * math.sin(math.radians(_TILT))
    rotated_across = -along * math.sin(math.radians(_TILT)) + across * math.cos(math.radians(_TILT))
    rho = np.hypot(rotated_along / math.radians(_SEMI_AXES[0]), rotated_across / math.radians(_SEMI_AXES[1]))
    inside = (rho < 1.0) & (cosine > 0)
    mask = inside.astype(np.float64)
    hits = np.zeros_like(mask)
    depth = np.sqrt(np.clip(1.0 - rho[inside] ** 4, 0.0, None)) + 0.15
    stripes = 1.0 + 0.05 * np.cos(2.0 * np.pi * rotated_across[inside] / math.radians(1.5))
    hits[inside] = depth * stripes
    hits[inside] /= hits[inside].mean()
    if apodization is not None:
        from .masks import apodize_binary_mask

        mask = apodize_binary_mask(mask, as_float(apodization, "apodization", 0.0, 30.0, strict_minimum=True))
    return mask, hits


def write_patch(folder, nside: int = 256, force: bool = False) -> dict[str, str]:
    """Write the patch's mask.fits (binary) and hits.fits into ``folder``; returns their paths."""
    from .io import write_maps

    mask, hits = patch_footprint(nside)
    os.makedirs(folder, exist_ok=True)
    paths = {"mask": os.path.join(folder, "mask.fits"), "hits": os.path.join(folder, "hits.fits")}
    write_maps(paths["mask"], mask, force=force, unit=None)
    write_maps(paths["hits"], hits, force=force, unit=None)
    return paths


def _main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=f"write the invented {PATCH_NAME} patch (mask.fits, hits.fits)")
    parser.add_argument("out", help="output folder")
    parser.add_argument("--nside", type=int, default=256)
    parser.add_argument("--force", action="store_true")
    args = parser.parse_args(argv)
    paths = write_patch(args.out, args.nside, args.force)
    print(f"wrote {paths['mask']} and {paths['hits']}")
    return 0


if __name__ == "__main__":
    raise SystemExit(_main())
