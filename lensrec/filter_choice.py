"""Choosing and building the map filter: isotropic, optimal (conjugate gradient) or automatic.

``filter="auto"`` chooses the optimal filter (:class:`lensrec.OptimalFilter`) when there is a mask or a
per-pixel noise map, and the isotropic filter (:class:`lensrec.IsotropicFilter`) for a full sky with
uniform noise, where the two agree to HEALPix quadrature accuracy and the isotropic one is cheaper, and
for maps already multiplied by an apodized mask, which the optimal filter cannot use.

The analytic normalization of the estimators assumes an isotropic filter of some white-noise level. Each
filter is normalized with the level that describes it (:mod:`lensrec.pixel_noise`): the isotropic filter
with the mask-weighted arithmetic level of the noise map, the optimal filter with the inverse-variance
level. On a patch this normalization is approximate; a Monte-Carlo correction from simulations fixes it.

A mask is never applied twice: maps that a mask already multiplies (``maps_masked=True``; lensrec records
it in the FITS key LRMASKED) are not multiplied again by the isotropic filter, and the optimal filter,
which needs unweighted data inside the observed region, accepts them only when the mask is binary.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from .experiment import load_experiment
from .filtering import IsotropicFilter
from .masks import check_mask, sky_fraction_moments
from .optimal_filter import DEFAULT_CG_MAX_ITERATIONS, DEFAULT_CG_TOLERANCE, OptimalFilter
from .pixel_noise import PixelNoise

__all__ = ["FILTERS", "resolve_filter", "build_filter"]

FILTERS = ("isotropic", "optimal", "auto")


def resolve_filter(filter: str, mask=None, noise=None) -> str:
    """'isotropic' or 'optimal' for a ``filter`` choice in :data:`FILTERS` ('auto': optimal with a mask or noise map)."""
    if not isinstance(filter, str) or filter not in FILTERS:
        raise ValueError(f"filter must be one of {FILTERS}, got {filter!r}")
    if filter == "auto":
        return "optimal" if (mask is not None or noise is not None) else "isotropic"
    return filter


@dataclasses.dataclass(frozen=True, eq=False)
class _PremaskedIsotropic:
    """The isotropic filter for maps a mask already multiplies: no second multiplication, same moments."""

    inner: IsotropicFilter
    mask: np.ndarray

    @property
    def experiment(self):
        return self.inner.experiment

    def filter(self, maps):
        fields = self.inner.filter(maps)
        settings = dict(fields.settings, maps_masked=True)
        return dataclasses.replace(fields, mask_moments=sky_fraction_moments(self.mask), settings=settings)


def build_filter(
    filter: str,
    experiment,
    nside: int,
    spectra=None,
    lmax: int | None = None,
    mask=None,
    noise: PixelNoise | None = None,
    joint: bool = False,
    jacobi_iterations: int | str = "auto",
    maps_masked: bool = False,
    cg_tolerance: float | None = None,
    cg_max_iterations: int | None = None,
    callback=None,
    nthreads: int | None = None,
):
    """Build the filter for maps of ``nside``: returns ``(field_filter, experiment_for_normalization, choice)``.

    Parameters
    ----------
    filter : {'isotropic', 'optimal', 'auto'}
    experiment : Experiment or str
    nside : int
        Resolution of the maps to be filtered.
    mask : array, optional
        Weights in [0, 1] (the isotropic filter multiplies the maps by them; the optimal one sets N⁻¹ = 0
        where they are 0).
    noise : PixelNoise, optional
        Per-pixel noise variance (its own mask is replaced by ``mask`` when both are given).
    joint : bool
        Filter T, E, B jointly (for the "GMV" estimator).
    jacobi_iterations : int or "auto"
        Jacobi iterations of the isotropic filter's HEALPix analysis (:class:`lensrec.IsotropicFilter`).
    maps_masked : bool
        The maps are already multiplied by ``mask``.
    cg_tolerance, cg_max_iterations, callback : optional
        Settings of the optimal filter (:class:`lensrec.OptimalFilter`).
    """
    experiment = load_experiment(experiment)
    if noise is not None and not isinstance(noise, PixelNoise):
        raise TypeError(f"noise must be a lensrec PixelNoise, got {type(noise).__name__}")
    if mask is not None:
        mask = np.array(check_mask(mask))  # its nside is checked where it meets the maps
    if noise is not None and noise.nside != nside:
        raise ValueError(f"the noise map has nside {noise.nside} but the maps have nside {nside}")
    if maps_masked and mask is None:
        raise ValueError("maps_masked=True needs the mask that multiplies the maps (mask=)")
    choice = resolve_filter(filter, mask, noise)
    binary = mask is None or bool(np.all((mask == 0.0) | (mask == 1.0)))
    if filter == "auto" and maps_masked and not binary:
        choice = "isotropic"  # apodized maps cannot be unweighted for the optimal filter
    if noise is not None and mask is not None:
        noise = PixelNoise(noise.variance, np.array(check_mask(mask, nside)) * noise.observed)
    if choice == "optimal":
        if maps_masked and not binary:
            raise ValueError(
                "the maps are already multiplied by an apodized mask, which the optimal filter cannot undo; "
                "give it unmasked maps (or maps masked with a binary mask), or use filter='isotropic'"
            )
        pixel = noise if noise is not None else PixelNoise.uniform(experiment, nside, mask)
        field_filter = OptimalFilter(
            experiment,
            pixel,
            spectra,
            lmax=lmax,
            joint=joint,
            cg_tolerance=DEFAULT_CG_TOLERANCE if cg_tolerance is None else cg_tolerance,
            cg_max_iterations=DEFAULT_CG_MAX_ITERATIONS if cg_max_iterations is None else cg_max_iterations,
            callback=callback,
            nthreads=nthreads,
        )
        normalization = pixel.experiment_for(field_filter.experiment, "inverse_variance")
        return field_filter, normalization, choice
    base = noise.experiment_for(experiment, "arithmetic") if noise is not None else experiment
    if maps_masked:
        inner = IsotropicFilter(
            base, spectra, lmax=lmax, nthreads=nthreads, joint=joint, jacobi_iterations=jacobi_iterations
        )
        return _PremaskedIsotropic(inner, mask), inner.experiment, choice
    field_filter = IsotropicFilter(
        base, spectra, lmax=lmax, mask=mask, nthreads=nthreads, joint=joint, jacobi_iterations=jacobi_iterations
    )
    return field_filter, field_filter.experiment, choice
