r"""Noise on the sphere: per-pixel noise variance, hit counts, the two noise levels, and the pixel window.

A :class:`PixelNoise` is the noise model of a survey that does not see the sky uniformly: the noise
variance σ²_p of every HEALPix pixel (µK², for T and for each of Q and U, no Q/U correlation) and the
mask w_p ∈ [0, 1] of the observed region. It comes from a noise-variance map, or from a hit-count map and
an :class:`lensrec.Experiment`, or from the experiment alone (uniform noise).

From hits
=========
The pixel variance scales as 1/hits. The experiment's white-noise level Δ (µK-arcmin) is taken to be the
*effective* (inverse-variance) depth of the observed region, so that
σ²_p = (Δ²/Ω_pix) · h̄ / h_p with h̄ the mean hit count over observed pixels (w > 0) and Ω_pix the pixel
area in arcmin². The inverse-variance depth of the result is then exactly Δ.

The two noise levels
====================
One survey has two honest "noise levels", and each N0 uses its own (both are returned by
:meth:`PixelNoise.noise_levels`, in µK-arcmin):

- ``"arithmetic"``: √(Ω_pix Σ_p w_p² σ²_p / Σ_p w_p²), the mask-weighted arithmetic mean of the pixel
  variance times the pixel area. It is the white-noise power of the pseudo-spectrum of the *unweighted*
  (only masked) map divided by the mask's ⟨w²⟩ (Hivon et al. 2002, ApJ 567, 2): the level the isotropic
  filter sees, and the one its analytic N0 uses.
- ``"inverse_variance"``: √(Ω_pix / ⟨1/σ²_p⟩_obs), the harmonic mean of the pixel variance over observed
  pixels (w > 0): the depth of an inverse-variance-weighted map, which the optimal filter (N⁻¹ weighting,
  :mod:`lensrec.optimal_filter`) reaches, and which its N0 approximately uses.

By the inequality of arithmetic and harmonic means the inverse-variance level is never worse; they are
equal for uniform noise. :meth:`PixelNoise.experiment_for` returns the experiment with its white levels
replaced by either one (1/f knees and beam kept), for N0 forecasts of each filter.

1/f noise
=========
When the experiment sets ``ell_knee_*``, simulated noise is a harmonic Gaussian field with the shape
1 + (ℓ/ℓ_knee)^α normalized so that its white part has unit pixel variance, then multiplied by σ_p:
the variance map modulates the 1/f field exactly as it modulates white noise (:meth:`PixelNoise.simulate`).

Pixel window
============
:func:`pixel_window` computes the HEALPix pixel window w_ℓ offline (no data file, no download): the
average over pixels of the harmonic transform of each pixel's top-hat, w²_ℓ = ⟨ ∬ P_ℓ(n̂·n̂′) ⟩_pixels
(Górski et al. 2005, ApJ 622, 759, §4), evaluated on sub-pixel centers (see its docstring).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ._checks import as_finite_array, as_int, check_nside, readonly_copy
from .experiment import ARCMIN, Experiment, load_experiment
from .harmonics import npix_to_nside
from .masks import check_mask

__all__ = ["PixelNoise", "pixel_window", "NOISE_LEVELS"]

NOISE_LEVELS = ("arithmetic", "inverse_variance")


def _pixel_area_arcmin2(nside: int) -> float:
    return 4.0 * math.pi / (12 * nside * nside) / ARCMIN**2


@dataclass(frozen=True, eq=False)
class PixelNoise:
    """Per-pixel noise variance (T, Q, U; µK²) and the mask of the observed region (see the module docstring).

    Parameters
    ----------
    variance : array, shape (3, 12·nside²) or (12·nside²,)
        Noise variance per pixel in µK² for T, Q, U (one map: T, with Q and U twice that, the variance of
        Δ_P = √2 Δ_T). Must be finite and > 0 wherever the mask is > 0; ignored where it is 0.
    mask : array, optional
        Weights in [0, 1]; default: the whole sky.

    Examples
    --------
    >>> import numpy as np, lensrec
    >>> e = lensrec.Experiment(noise_temperature=3.0)
    >>> noise = PixelNoise.uniform(e, 16)
    >>> [round(v, 6) for v in noise.noise_levels()["arithmetic"]]
    [3.0, 4.242641, 4.242641]
    """

    variance: np.ndarray
    mask: np.ndarray | None = None

    def __post_init__(self):
        raw = np.asarray(self.variance, dtype=np.float64) if not isinstance(self.variance, str) else self.variance
        if isinstance(raw, np.ndarray) and raw.ndim == 1:
            raw = np.stack([raw, 2.0 * raw, 2.0 * raw])
        if not isinstance(raw, np.ndarray) or raw.ndim != 2 or raw.shape[0] != 3:
            raise ValueError(
                f"variance must have shape (3, npix) for T, Q, U or (npix,) for T, got "
                f"{getattr(raw, 'shape', type(raw).__name__)}"
            )
        nside = npix_to_nside(raw.shape[1], "variance")
        mask = np.ones(raw.shape[1]) if self.mask is None else np.array(check_mask(self.mask, nside))
        observed = mask > 0
        inside = raw[:, observed]
        bad = ~np.isfinite(inside) | (inside <= 0)
        if np.any(bad):
            component, pixel = np.argwhere(bad)[0]
            where = np.flatnonzero(observed)[pixel]
            raise ValueError(
                f"noise variance must be finite and > 0 inside the mask; the {'TQU'[component]} variance is "
                f"{float(inside[component, pixel])!r} at pixel {where} (and {int(bad.sum())} value(s) in all); mask those "
                "pixels (mask = 0) or fix the variance map"
            )
        variance = np.where(observed, raw, 0.0)
        object.__setattr__(self, "variance", readonly_copy(variance, np.float64))
        object.__setattr__(self, "mask", readonly_copy(mask, np.float64))

    # ------------------------------------------------------------------------------------ constructors
    @classmethod
    def uniform(cls, experiment, nside: int, mask=None) -> PixelNoise:
        """Uniform white noise of the experiment's levels: σ² = Δ²/Ω_pix."""
        experiment = load_experiment(experiment)
        nside = check_nside(nside)
        area = _pixel_area_arcmin2(nside)
        levels = np.array([experiment.noise_temperature, experiment.noise_polarization, experiment.noise_polarization])
        if np.any(levels <= 0):
            raise ValueError(f"a pixel noise model needs noise levels > 0, got {levels.tolist()} uK-arcmin")
        variance = np.repeat((levels**2 / area)[:, None], 12 * nside * nside, axis=1)
        return cls(variance, mask)

    @classmethod
    def from_hits(cls, experiment, hits, mask=None) -> PixelNoise:
        """Noise variance ∝ 1/hits, normalized so that the inverse-variance depth is the experiment's Δ."""
        experiment = load_experiment(experiment)
        hits = as_finite_array(hits, "hits", ndim=1)
        nside = npix_to_nside(hits.size, "hits")
        if np.any(hits < 0):
            raise ValueError(f"hits must be non-negative, found {hits.min():.6g}")
        mask = np.ones(hits.size) if mask is None else np.array(check_mask(mask, nside))
        observed = mask > 0
        empty = observed & (hits <= 0)
        if np.any(empty):
            raise ValueError(
                f"hits is zero in {int(empty.sum())} pixel(s) that the mask keeps (first: pixel "
                f"{int(np.flatnonzero(empty)[0])}); mask those pixels (mask = 0) or give them hits > 0"
            )
        mean_hits = hits[observed].mean()
        uniform = cls.uniform(experiment, nside)
        scale = np.zeros(hits.size)
        scale[observed] = mean_hits / hits[observed]
        return cls(uniform.variance * scale, mask)

    @classmethod
    def from_files(cls, experiment=None, noise_map=None, hits=None, mask=None, nside: int | None = None):
        """Build from FITS paths: a noise-variance map (µK², 1 or 3 columns) or a hit map, and a mask."""
        from .io import map_header, read_maps
        from .masks import load_mask

        if (noise_map is None) == (hits is None):
            raise ValueError("give exactly one of noise_map (a variance map) or hits (a hit-count map)")
        mask_array = load_mask(mask, nside) if mask is not None else None
        if noise_map is not None:
            columns = map_header(noise_map)["columns"]
            fields = (0, 1, 2) if columns >= 3 else 0
            variance = read_maps(noise_map, fields=fields, quantity="variance")
            if nside is not None and npix_to_nside(np.atleast_2d(variance).shape[1]) != nside:
                raise ValueError(f"noise map {noise_map!r} is not at nside {nside}")
            return cls(variance, mask_array)
        if experiment is None:
            raise ValueError("a hit map needs the experiment whose noise level it modulates")
        counts = read_maps(hits, fields=0, quantity="none")
        if nside is not None and npix_to_nside(counts.size) != nside:
            raise ValueError(f"hit map {hits!r} is not at nside {nside}")
        return cls.from_hits(experiment, counts, mask_array)

    # ------------------------------------------------------------------------------------------ views
    @property
    def nside(self) -> int:
        return npix_to_nside(self.variance.shape[1], "variance")

    @property
    def observed(self) -> np.ndarray:
        """Boolean map of observed pixels (mask > 0)."""
        return self.mask > 0

    def inverse_variance(self) -> np.ndarray:
        """N⁻¹ per pixel (µK⁻²), shape (3, npix): 1/σ² inside the mask, 0 outside."""
        out = np.zeros_like(self.variance)
        observed = self.observed
        out[:, observed] = 1.0 / self.variance[:, observed]
        return out

    def noise_levels(self) -> dict[str, list[float]]:
        """The two noise levels of T, Q, U in µK-arcmin (module docstring): 'arithmetic', 'inverse_variance'."""
        area = _pixel_area_arcmin2(self.nside)
        weight = self.mask**2
        observed = self.observed
        arithmetic = np.sqrt(area * (self.variance * weight).sum(axis=1) / weight.sum())
        harmonic = np.sqrt(area / np.mean(1.0 / self.variance[:, observed], axis=1))
        return {"arithmetic": arithmetic.tolist(), "inverse_variance": harmonic.tolist()}

    def experiment_for(self, experiment, level: str) -> Experiment:
        """``experiment`` with its white-noise levels replaced by the given noise level (T and P)."""
        if level not in NOISE_LEVELS:
            raise ValueError(f"level must be one of {NOISE_LEVELS}, got {level!r}")
        experiment = load_experiment(experiment)
        t, q, u = self.noise_levels()[level]
        return experiment.replace(
            noise_temperature=float(t), noise_polarization=float(math.sqrt(0.5 * (q * q + u * u)))
        )

    # ------------------------------------------------------------------------------------- simulation
    def simulate(self, experiment, lmax: int, rng: np.random.Generator, nthreads: int | None = None) -> np.ndarray:
        """One T, Q, U noise realization (µK), shape (3, npix), following the variance map.

        White noise σ_p g_p, or, when the experiment sets a 1/f knee, a harmonic Gaussian field with power
        Ω_pix (1 + (ℓ/ℓ_knee)^α) for ℓ ≥ 2 to ``lmax`` (unit white pixel variance) times σ_p. Zero outside
        the mask. ``rng`` should come from :func:`lensrec.seeding.rng_for` (component "noise").
        """
        from . import harmonics
        from .harmonics import ell_of_alm, nalm

        experiment = load_experiment(experiment)
        nside = self.nside
        lmax = as_int(lmax, "lmax", minimum=2, maximum=3 * nside - 1)
        sigma = np.sqrt(self.variance)
        knees = (experiment.ell_knee_temperature, experiment.ell_knee_polarization)
        if knees[0] <= 0 and knees[1] <= 0:
            return sigma * rng.standard_normal(self.variance.shape)
        area_sr = 4.0 * math.pi / (12 * nside * nside)
        ell = np.arange(lmax + 1, dtype=float)
        size = nalm(lmax)
        alm = (rng.standard_normal((3, size)) + 1j * rng.standard_normal((3, size))) / math.sqrt(2.0)
        m_zero = np.arange(size) <= lmax  # healpy layout: the first lmax+1 entries have m = 0
        alm[:, m_zero] = alm[:, m_zero].real * math.sqrt(2.0)
        for k, which in enumerate(("temperature", "polarization", "polarization")):
            knee = getattr(experiment, f"ell_knee_{which}")
            shape = np.ones(lmax + 1)
            if knee > 0:
                alpha = getattr(experiment, f"alpha_knee_{which}")
                shape[1:] += (ell[1:] / knee) ** alpha
            shape[:2] = 0.0
            alm[k] *= np.sqrt(area_sr * shape)[ell_of_alm(lmax)]
        unit = harmonics.alm2map_tqu(alm, nside, lmax, nthreads=nthreads)
        return sigma * unit


# -------------------------------------------------------------------------------------- pixel window
def pixel_window(nside: int, lmax: int | None = None, subdivision: int = 8, pixels: int = 4096) -> np.ndarray:
    """The HEALPix pixel window w_ℓ for ℓ = 0 … lmax (default 3·nside − 1), computed without data files.

    w²_ℓ is the pixel average of ∬ t_p(n̂) t_p(n̂′) P_ℓ(n̂·n̂′) dn̂ dn̂′ for the unit-integral top-hat t_p of
    pixel p (Górski et al. 2005, ApJ 622, 759, §4: the window is the pixel-averaged isotropic part of the
    pixel's transform). The double integral is a sum over the ``subdivision``² sub-pixel centers at
    nside·subdivision (their NEST children), times the window of one sub-pixel taken as a square top-hat,
    exp(−ℓ(ℓ+1) a²/24) with a² its area (error ≈ (ℓa)⁴/1000, < 1e-4 at ℓ = 3·nside for subdivision 8).
    The pixel average uses ``pixels`` pixels evenly spaced in RING index (all pixels when there are
    fewer), which samples every latitude. The same window is used for T and for Q/U (the spin-2 window
    differs from it at second order in the pixel size).

    Examples
    --------
    >>> w = pixel_window(16)
    >>> round(float(w[0]), 12), bool(np.all(np.diff(w) < 0))
    (1.0, True)
    """
    import healpy

    nside = check_nside(nside)
    lmax = 3 * nside - 1 if lmax is None else as_int(lmax, "lmax", minimum=0, maximum=4 * nside)
    subdivision = as_int(subdivision, "subdivision", minimum=1, maximum=64)
    if subdivision & (subdivision - 1):
        raise ValueError(f"subdivision must be a power of two, got {subdivision}")
    npix = 12 * nside * nside
    count = min(as_int(pixels, "pixels", minimum=1), npix)
    ring = np.unique(np.linspace(0, npix - 1, count).round().astype(np.int64))
    nest = healpy.ring2nest(nside, ring)
    k2 = subdivision * subdivision
    children = (nest[:, None] * k2 + np.arange(k2)[None, :]).ravel()
    vectors = np.array(healpy.pix2vec(nside * subdivision, children, nest=True)).T.reshape(ring.size, k2, 3)
    cosines = np.einsum("pia,pja->pij", vectors, vectors).ravel()
    np.clip(cosines, -1.0, 1.0, out=cosines)
    # Legendre sums over all pairs via a fine histogram in the angle with linear (cloud-in-cell) weights
    angle = np.arccos(cosines)
    top = float(angle.max()) * (1 + 1e-12) + 1e-300
    nbins = 8192
    position = angle / top * (nbins - 1)
    lower = np.floor(position).astype(np.int64)
    frac = position - lower
    weights = np.bincount(lower, weights=1.0 - frac, minlength=nbins + 1)
    weights += np.bincount(lower + 1, weights=frac, minlength=nbins + 1)
    nodes = np.cos(np.arange(nbins + 1) * top / (nbins - 1))
    used = weights > 0
    x, wts = nodes[used], weights[used] / weights.sum()
    window2 = np.empty(lmax + 1)
    p_prev, p_curr = np.ones_like(x), x.copy()
    window2[0] = 1.0
    if lmax >= 1:
        window2[1] = float(wts @ p_curr)
    for ell in range(2, lmax + 1):  # Bonnet's recursion for P_ℓ
        p_prev, p_curr = p_curr, ((2 * ell - 1) * x * p_curr - (ell - 1) * p_prev) / ell
        window2[ell] = float(wts @ p_curr)
    ell = np.arange(lmax + 1, dtype=float)
    sub_area = 4.0 * math.pi / (12 * (nside * subdivision) ** 2)
    window = np.sqrt(np.clip(window2, 0.0, None)) * np.exp(-ell * (ell + 1) * sub_area / 24.0)
    return window
