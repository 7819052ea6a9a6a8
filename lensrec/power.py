r"""Angular power spectra of harmonic coefficients: auto and cross spectra, binning, mask corrections.

Spectra follow healpy's ``alm2cl``: Ĉ_ℓ = (1/(2ℓ+1)) Σ_m Re(a_ℓm b*_ℓm), summing m = −ℓ … ℓ (the m < 0 terms
from the reality of the fields), for coefficients in the triangular m-major layout.

Masked skies: which mask moment corrects which spectrum
========================================================
A field observed as w^p(n) f(n) (w the mask weights) has, for a spectrum that varies slowly across the
harmonic width of the mask, the pseudo-spectrum ⟨Ĉ^{w^p f, w^q g}_ℓ⟩ ≈ ⟨w^{p+q}⟩ C^{fg}_ℓ, with
⟨wⁿ⟩ = (1/4π) ∫ wⁿ dn the mean of wⁿ over the whole sphere: the mode-coupling matrix of the product field
has rows summing to the mean of the product of the two windows (Hivon et al. 2002, ApJ 567, 2, eqs. 5–6
and their f_sky ≈ ⟨w²⟩ for a map's spectrum). The power p of each field:

- a masked CMB map: p = 1 (the map is w · X);
- a quadratic estimate made from masked maps: p = 2. The filtered legs are locally w · X̄ when w varies
  slowly compared with the filter kernel, so the product of two legs, and the lensing response, are
  locally w² times their full-sky values: φ̂(n) ≈ w²(n) [φ(n) + noise(n)];
- an unmasked input (the simulation's φ): p = 0; a masked input w · φ: p = 1.

So: map × map → ⟨w²⟩; estimate × estimate (and its N0, mean-field and noise) → ⟨w⁴⟩; estimate × unmasked
input φ → ⟨w²⟩; estimate × masked input → ⟨w³⟩ (:func:`mask_moment_order` gives p + q). The effective sky
fraction for the variance of a pseudo-spectrum is ⟨w²⟩²/⟨w⁴⟩ for maps (Hivon et al. 2002, §4), and
⟨w⁴⟩²/⟨w⁸⟩ for the auto-spectrum of the estimate by the same argument.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from ._checks import as_finite_array, as_int
from .harmonics import lmax_from_nalm, truncate_alm

__all__ = [
    "MASK_POWER",
    "cross_spectrum",
    "auto_spectrum",
    "bin_spectrum",
    "binning_matrix",
    "spectrum_scale",
    "binned_cross_spectrum",
    "mask_moment_order",
    "mask_corrected",
]

# Power of the mask weights carried by each kind of field (see the module docstring).
MASK_POWER = {"map": 1, "estimate": 2, "input": 0, "masked_input": 1}


def _as_alm(alm, name: str):
    array = as_finite_array(alm, name, ndim=1, dtype=np.complex128)
    return array, lmax_from_nalm(array.size, name)


def cross_spectrum(alm1, alm2=None, lmax: int | None = None) -> np.ndarray:
    """Cross-spectrum Ĉ_ℓ = (1/(2ℓ+1)) Σ_m Re(a_ℓm b*_ℓm) of two sets of coefficients (auto if ``alm2`` is None).

    Parameters
    ----------
    alm1, alm2 : complex array, shape (nalm(L1),), (nalm(L2),)
        Coefficients of real fields in healpy's triangular layout; their band limits may differ.
    lmax : int, optional
        Highest ℓ returned (default: the smaller band limit; at most that).

    Returns
    -------
    numpy.ndarray, shape (lmax + 1,)
        In the product of the two fields' units (e.g. dimensionless for φ × φ).

    Raises
    ------
    ValueError, TypeError
        Arrays that are not triangular coefficient sets, non-finite values, lmax out of range.

    References
    ----------
    healpy's ``alm2cl`` (same definition; Górski et al. 2005, ApJ 622, 759).

    Examples
    --------
    >>> import numpy as np
    >>> a = np.zeros(6, complex); a[3] = 1 + 1j          # (l, m) = (1, 1)
    >>> cross_spectrum(a).tolist()                        # 2 |a_11|^2 / 3 at l = 1
    [0.0, 1.3333333333333333, 0.0]
    """
    first, lmax1 = _as_alm(alm1, "alm1")
    if alm2 is None:
        second, lmax2 = first, lmax1
    else:
        second, lmax2 = _as_alm(alm2, "alm2")
    top = min(lmax1, lmax2)
    lmax = top if lmax is None else as_int(lmax, "lmax", minimum=0, maximum=top)
    if lmax1 != lmax:
        first = truncate_alm(first, lmax, lmax1)
    if lmax2 != lmax:
        second = truncate_alm(second, lmax, lmax2)
    product = (first * np.conj(second)).real
    out = np.zeros(lmax + 1)
    out += product[: lmax + 1]  # m = 0 block: ℓ = 0 … lmax
    start = lmax + 1
    for m in range(1, lmax + 1):
        count = lmax - m + 1
        out[m:] += 2.0 * product[start : start + count]
        start += count
    out /= 2.0 * np.arange(lmax + 1) + 1.0
    return out


def auto_spectrum(alm, lmax: int | None = None) -> np.ndarray:
    """Auto-spectrum Ĉ_ℓ = (1/(2ℓ+1)) Σ_m |a_ℓm|² (see :func:`cross_spectrum`).

    Examples
    --------
    >>> import numpy as np
    >>> auto_spectrum(np.array([2.0, 0.0, 0.0 + 0j])).tolist()
    [4.0, 0.0]
    """
    return cross_spectrum(alm, None, lmax)


def _check_edges(edges, size: int) -> np.ndarray:
    raw = as_finite_array(edges, "edges", ndim=1)
    if raw.size < 2:
        raise ValueError(f"edges must hold at least two multipoles (one bin), got {raw.size}")
    if not np.all(raw == np.round(raw)):
        raise ValueError(f"edges must be integer multipoles, got {raw.tolist()}")
    values = raw.astype(np.int64)
    if np.any(np.diff(values) <= 0):
        raise ValueError(f"edges must increase strictly, got {values.tolist()}")
    if values[0] < 0 or values[-1] > size:
        raise ValueError(
            f"edges must lie in [0, {size}] (the spectrum has l = 0..{size - 1}), got [{values[0]}, {values[-1]}]"
        )
    return values


def spectrum_scale(scale, size: int) -> np.ndarray:
    """The per-ℓ factor f_ℓ of a plotted quantity f_ℓ C_ℓ, for ℓ = 0 … size − 1.

    ``None``: 1 (C_ℓ itself); ``"cmb"``: ℓ(ℓ+1)/2π (D_ℓ); ``"lensing"``: [L(L+1)]²/2π (the lensing-potential
    convention); ``"kappa"``: [L(L+1)]²/4, turning C_L^φφ into C_L^κκ (κ = L(L+1)φ/2); or an array of
    ``size`` finite factors.

    Examples
    --------
    >>> spectrum_scale("lensing", 3).round(4).tolist()
    [0.0, 0.6366, 5.7296]
    """
    ell = np.arange(size, dtype=np.float64)
    if scale is None:
        return np.ones(size)
    if isinstance(scale, str):
        if scale == "cmb":
            return ell * (ell + 1.0) / (2.0 * np.pi)
        if scale == "lensing":
            return (ell * (ell + 1.0)) ** 2 / (2.0 * np.pi)
        if scale == "kappa":
            return (ell * (ell + 1.0)) ** 2 / 4.0
        raise ValueError(f"scale must be None, 'cmb', 'lensing', 'kappa' or an array of factors, got {scale!r}")
    factor = as_finite_array(scale, "scale", ndim=1)
    if factor.size != size:
        raise ValueError(f"scale must have one factor per multipole ({size}), got {factor.size}")
    return factor


def _bin_weights(weights, size: int) -> np.ndarray:
    if weights is None:
        return np.ones(size)
    if isinstance(weights, str):
        if weights == "modes":
            return 2.0 * np.arange(size) + 1.0
        raise ValueError(f"weights must be None, 'modes' or an array of per-l weights, got {weights!r}")
    w = as_finite_array(weights, "weights", ndim=1)
    if w.size != size:
        raise ValueError(f"weights must have the length of cl ({size}), got {w.size}")
    if np.any(w < 0):
        raise ValueError(f"weights must be non-negative, found {w.min():.3g}")
    return w


def binning_matrix(edges, size: int, weights=None, scale=None) -> np.ndarray:
    """(n_bins, size) matrix B with B @ C = the binned f_ℓ C_ℓ: rows w_ℓ f_ℓ / Σ_bin w_ℓ inside each bin.

    The same weights as :func:`bin_spectrum` (use that for data with NaN entries); a bin of zero total
    weight has a zero row.

    Examples
    --------
    >>> binning_matrix([2, 4], 5, weights="modes").round(3).tolist()
    [[0.0, 0.0, 0.417, 0.583, 0.0]]
    """
    size = as_int(size, "size", minimum=1)
    edges = _check_edges(edges, size)
    indicator = _bin_indicator(edges, size) * _bin_weights(weights, size)
    totals = indicator.sum(axis=1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        rows = np.where(totals > 0, indicator / totals, 0.0)
    return rows * spectrum_scale(scale, size)


def _bin_indicator(edges: np.ndarray, size: int) -> np.ndarray:
    ell = np.arange(size)
    return ((ell >= edges[:-1, None]) & (ell < edges[1:, None])).astype(np.float64)


def bin_spectrum(cl, edges, weights=None, scale=None, skip_nan: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Bin a spectrum, or the plotted quantity f_ℓ C_ℓ, in bins [edges[i], edges[i+1]) (half-open, integer ℓ).

    This is lensrec's one binning rule, for data and theory alike: bin exactly the quantity that is plotted
    (``scale``), weighted within the bin, so a binned theory curve is comparable with binned data. Binning C_ℓ
    and multiplying by the factor of the bin center instead overshoots wherever the factor varies across the
    bin (for [L(L+1)]² C_L^φφ/2π over L = 2–33 by more than an order of magnitude).

    Parameters
    ----------
    cl : array, shape (..., lmax + 1)
        Spectra indexed by ℓ from 0 along the last axis. NaN marks undefined entries.
    edges : sequence of int
        Strictly increasing bin edges in [0, lmax + 1]; bin i holds edges[i] ≤ ℓ < edges[i+1].
    weights : {None, "modes"} or array, shape (lmax + 1,), optional
        Non-negative per-ℓ weights w_ℓ: uniform (default), "modes" for 2ℓ + 1, or an array.
    scale : {None, "cmb", "lensing", "kappa"} or array, optional
        The factor f_ℓ of the binned quantity (:func:`spectrum_scale`): C_ℓ (default), D_ℓ = ℓ(ℓ+1)C_ℓ/2π,
        [L(L+1)]² C_L/2π or C_L^κκ = [L(L+1)]² C_L^φφ/4.
    skip_nan : bool
        Leave NaN entries out of their bin (its weights renormalized) instead of making the bin NaN.

    Returns
    -------
    centers : ndarray, shape (n_bins,)
        Weighted mean ℓ of each bin (of its finite entries, for one spectrum with ``skip_nan``).
    values : ndarray, shape (..., n_bins)
        Σ w_ℓ f_ℓ C_ℓ / Σ w_ℓ in each bin; NaN where a bin has zero total weight, or holds a NaN entry
        (unless ``skip_nan``).

    Examples
    --------
    >>> centers, values = bin_spectrum([0.0, 1.0, 2.0, 3.0, 4.0], [1, 3, 5])
    >>> centers.tolist(), values.tolist()
    ([1.5, 3.5], [1.5, 3.5])
    >>> bin_spectrum([0.0, 1.0, float("nan"), 3.0], [1, 4], skip_nan=True)[1].tolist()
    [2.0]
    """
    values = np.asarray(cl, dtype=np.float64)
    if values.ndim < 1 or values.shape[-1] == 0:
        raise ValueError(f"cl must hold at least one multipole along its last axis, got shape {values.shape}")
    if np.any(np.isinf(values)):
        raise ValueError("cl contains infinite values; mask them (NaN marks undefined entries)")
    size = values.shape[-1]
    edges = _check_edges(edges, size)
    weighted = _bin_indicator(edges, size) * _bin_weights(weights, size)
    factor = spectrum_scale(scale, size)
    ell = np.arange(size, dtype=np.float64)
    finite = ~np.isnan(values)
    totals = (
        finite.astype(np.float64) @ weighted.T
        if skip_nan
        else np.broadcast_to(weighted.sum(axis=1), values.shape[:-1] + (len(edges) - 1,))
    )
    with np.errstate(invalid="ignore", divide="ignore"):
        out = (np.where(finite, values * factor, 0.0) @ weighted.T) / totals
        if skip_nan and values.ndim == 1:
            centers = (finite * ell) @ weighted.T / totals
        else:
            all_weights = weighted.sum(axis=1)
            centers = (weighted @ ell) / all_weights
    out = np.where(totals > 0, out, np.nan)
    if not skip_nan:
        out = np.where((~finite).astype(np.float64) @ (weighted > 0).T > 0, np.nan, out)
    middle = 0.5 * (edges[:-1] + edges[1:] - 1)
    centers = np.where(np.isfinite(centers), centers, middle)
    return np.asarray(centers, dtype=np.float64), out


def binned_cross_spectrum(alm1, alm2, edges, lmax: int | None = None, weights=None):
    """Binned :func:`cross_spectrum` (``alm2=None`` for the auto-spectrum); returns (centers, values).

    Examples
    --------
    >>> import numpy as np
    >>> from lensrec.harmonics import nalm
    >>> a = np.ones(nalm(4), complex)          # every |a_lm|^2 = 1, so C_l = 1
    >>> binned_cross_spectrum(a, None, [0, 5])[1].round(6).tolist()
    [1.0]
    """
    spectrum = cross_spectrum(alm1, alm2, lmax)
    return bin_spectrum(spectrum, edges, weights)


def mask_moment_order(first: str, second: str) -> int:
    """The moment n of ⟨wⁿ⟩ that corrects the pseudo-spectrum of two fields (module docstring).

    Parameters
    ----------
    first, second : {'map', 'estimate', 'input', 'masked_input'}
        Kinds of the two fields: a masked map (w¹), a quadratic estimate from masked maps (w²), an unmasked
        input (w⁰), a masked input (w¹).

    Examples
    --------
    >>> mask_moment_order("estimate", "input"), mask_moment_order("estimate", "estimate")
    (2, 4)
    """
    for name, kind in (("first", first), ("second", second)):
        if kind not in MASK_POWER:
            raise ValueError(f"{name} must be one of {tuple(MASK_POWER)}, got {kind!r}")
    return MASK_POWER[first] + MASK_POWER[second]


def mask_corrected(cl, mask_moments, order: int) -> np.ndarray:
    """A pseudo-spectrum divided by the mask moment ⟨w^order⟩ (an estimate of the full-sky spectrum).

    Parameters
    ----------
    cl : array
        Pseudo-spectrum of fields carrying w^p and w^q (order = p + q, see :func:`mask_moment_order`).
    mask_moments : mapping or array
        ``{"w1": ⟨w⟩, "w2": ⟨w²⟩, …}`` (e.g. ``FilteredFields.mask_moments`` or
        :func:`lensrec.masks.sky_fraction_moments`), or the mask itself (a HEALPix weight map), from which
        the moment is computed; None means an unmasked sky (no correction).
    order : int
        0 … 8.

    Returns
    -------
    numpy.ndarray

    References
    ----------
    Hivon et al. 2002, ApJ 567, 2, eqs. 5–6 (pseudo-C_ℓ of a masked field and its f_sky approximation).

    Examples
    --------
    >>> mask_corrected([2.0, 4.0], {"w2": 0.5}, 2).tolist()
    [4.0, 8.0]
    """
    order = as_int(order, "order", minimum=0, maximum=8)
    values = np.asarray(cl, dtype=np.float64)
    if mask_moments is None or order == 0:
        return values.copy()
    if isinstance(mask_moments, Mapping):
        key = f"w{order}"
        if key not in mask_moments:
            raise ValueError(
                f"mask_moments lacks {key!r} (has {sorted(mask_moments)}); compute it with "
                f"lensrec.sky_fraction_moments(mask, orders=range(1, {order + 1}))"
            )
        moment = float(mask_moments[key])
    else:
        from .masks import check_mask

        moment = float(np.mean(check_mask(mask_moments) ** order))
    if not moment > 0:
        raise ValueError(f"the mask moment <w^{order}> is {moment}; it must be positive")
    return values / moment
