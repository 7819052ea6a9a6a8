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


def bin_spectrum(cl, edges, weights=None) -> tuple[np.ndarray, np.ndarray]:
    """Average a spectrum in bins [edges[i], edges[i+1]) (half-open, integer ℓ).

    Parameters
    ----------
    cl : array, shape (lmax + 1,)
        Spectrum indexed by ℓ from 0.
    edges : sequence of int
        Strictly increasing bin edges in [0, lmax + 1]; bin i holds edges[i] ≤ ℓ < edges[i+1].
    weights : array, shape (lmax + 1,), optional
        Non-negative per-ℓ weights (default: uniform). E.g. 2ℓ+1 for a mode-count average.

    Returns
    -------
    centres : ndarray
        Weighted mean ℓ of each bin.
    values : ndarray
        Σ w_ℓ C_ℓ / Σ w_ℓ in each bin (NaN where a bin has zero total weight or a NaN entry).

    Examples
    --------
    >>> centres, values = bin_spectrum([0.0, 1.0, 2.0, 3.0, 4.0], [1, 3, 5])
    >>> centres.tolist(), values.tolist()
    ([1.5, 3.5], [1.5, 3.5])
    """
    values = np.asarray(cl, dtype=np.float64)
    if values.ndim != 1:
        raise ValueError(f"cl must be one-dimensional, got shape {values.shape}")
    if np.any(np.isinf(values)):
        raise ValueError("cl contains infinite values; mask them (NaN marks undefined entries)")
    edges = _check_edges(edges, values.size)
    if weights is None:
        w = np.ones(values.size)
    else:
        w = as_finite_array(weights, "weights", ndim=1)
        if w.size != values.size:
            raise ValueError(f"weights must have the length of cl ({values.size}), got {w.size}")
        if np.any(w < 0):
            raise ValueError(f"weights must be non-negative, found {w.min():.3g}")
    ell = np.arange(values.size, dtype=np.float64)
    centres, out = [], []
    for low, high in zip(edges[:-1], edges[1:], strict=True):
        part = slice(low, high)
        total = w[part].sum()
        if total == 0:
            centres.append(0.5 * (low + high - 1))
            out.append(np.nan)
            continue
        centres.append(float(np.sum(w[part] * ell[part]) / total))
        out.append(float(np.sum(w[part] * values[part]) / total))
    return np.array(centres), np.array(out)


def binned_cross_spectrum(alm1, alm2, edges, lmax: int | None = None, weights=None):
    """Binned :func:`cross_spectrum` (``alm2=None`` for the auto-spectrum); returns (centres, values).

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
