"""Lensing B-mode templates: the B part of Wiener-filtered E modes lensed by a Wiener-filtered φ.

    B^template = B[ remap(E^WF, B = 0) by ∇φ^WF ],     B^residual = B^observed − B^template

(the Wiener filters are in :mod:`lensrec.wiener_filters`, the residual spectra in :mod:`lensrec.delensing`).

Three templates are built by :func:`lensing_b_template` (``"first_order"`` is the default, see below):

``"remap"``
    Non-perturbative: (E^WF, 0) as Q/U is remapped by d = ∇φ^WF with the exact great-circle remapping and
    parallel transport that the simulations use (:func:`lensrec.remapping.lens_alm`, spin 2), and the B part
    is kept.
``"first_order"``
    The gradient expansion P̃ ≈ P + d·∇P, B^lens ≈ B[∇φ·∇P]. With the spin-raising and -lowering operators
    ð, ð̄ (∇_θ = −(ð + ð̄)/2 and ∇_φ/sin θ = i(ð − ð̄)/2 on a spin-s field) the covariant directional
    derivative along d is d·∇P = −½ [d̄ ðP + d ð̄P], d = d_θ + i d_φ. In healpy's signs
    (f₁ + i f₂ = −Σ (G + iC) ₛY_ℓm, and ðₛY = √((ℓ−s)(ℓ+s+1)) ₛ₊₁Y, ð̄ₛY = −√((ℓ+s)(ℓ−s+1)) ₛ₋₁Y):
    d = −ðφ is the spin-1 map of G = √(L(L+1)) φ_LM; ðP is the spin-3 map of G = √((ℓ−2)(ℓ+3)) E_ℓm;
    −ð̄P is the spin-1 map of G = √((ℓ+2)(ℓ−1)) E_ℓm. Hence d·∇P = ½ [d · S₁ − d̄ · S₃] with S₁, S₃ those
    two maps, and the B part of its spin-2 analysis is the template. All products are formed on a
    Gauss–Legendre grid on which the analysis to ℓ_max is exact for the band limit lmax_L + ℓ_max^E of the
    product, so the only approximation is the truncation of the Taylor series. The signs are checked
    against the remapping in the small-deflection limit (tests/test_lensing_templates.py).
``"remap_delensed_e"``
    The observed E is already lensed; it is first delensed (remapped by −∇φ^WF, the E part kept) and then
    remapped by ∇φ^WF like ``"remap"`` (Baleato Lizancos, Challinor & Carron 2021, PRD 103, 023518).

The first-order template misses the higher-order terms of the remapping, which matter most at high ℓ,
where B^lens draws on E and φ modes whose product with the deflection (ℓ · |d| ~ 1 at ℓ ~ 1500 for the
2.5 arcmin rms deflection) is no longer small. Measured (tests/test_delensing.py, one full-sky simulation,
true unlensed E and true φ to ℓ = 2500): the remapped template removes 99.5–99.9% of the lensing B power in
30 ≤ ℓ ≤ 1000, the first-order one 90% at ℓ ≤ 300 falling to 75% at 600–1000. With a noisy Wiener-filtered
φ̂ the order reverses at high ℓ: the remapping also displaces E by the reconstruction noise in φ^WF, and it
removed 9.9% against 11.4% for the first-order template at 600 ≤ ℓ ≤ 1000 for an EE reconstruction at
1.4 µK-arcmin (equal at ℓ ≤ 300); the forecast of :func:`lensrec.delensing_forecast` describes the
first-order template (11.8% there).

**Default: first order.** What a template is built from in practice is the observed, lensed E and a noisy
φ^WF; there the first-order template removes more lensing B than remapping the observed E, which lenses it a
second time, and as much as remapping a delensed E at about half its cost (Baleato Lizancos, Challinor &
Carron 2021, PRD 103, 023518). Measured in lensrec's tests: with the true φ and E lensed by it (E, φ to
ℓ = 500), first order 78.8% / 74.2% of the lensing B power removed at ℓ = 30–150 / 150–300, remapping
76.8% / 72.1%, remapping of the delensed E 78.9% / 74.2% (tests/test_lensing_templates.py); on eight
nside-256 simulations of a 1.4 µK-arcmin survey with an MV reconstruction, first order 65.7%, remapping
64.0%, remapping of the delensed E 65.7% at ℓ = 30–300 (docs/validation.md). ``"remap"`` stays the right
choice for the true unlensed E (99.7% removed against 81%).

Cost (benchmarks/bench_delensing.py, E and φ to 3000, template to 3000, 2 threads): the remapped template
costs 1.8–2.4 spin-2 HEALPix syntheses at nside 2048, the first-order one 3.2–3.6 (four exact transforms on
a grid for the band lmax_L + ℓ_max^E, against one synthesis, one non-uniform synthesis and one analysis on the
remapping's smaller grid); peak memory 2.4 and 2.7 GB. At ℓ_max = 1000 the first-order one is the faster
(0.8 of the remapping).

References: Hu 2000, PRD 62, 043007 (first-order lensing of polarization); Lewis 2005, PRD 71, 083008
(remapping on the sphere); Smith, Hanson, LoVerde, Hirata & Zahn 2012, JCAP 06, 014 (templates).
"""

from __future__ import annotations

import numpy as np

from . import harmonics
from ._checks import as_float, as_int, resolve_nthreads, run_parallel
from .harmonics import gl_grid_for_band_limits, scale_alm
from .remapping import DEFAULT_EPSILON, lens_alm
from .wiener_filters import _coefficients

__all__ = ["TEMPLATE_METHODS", "DEFAULT_TEMPLATE_METHOD", "lensing_b_template"]

TEMPLATE_METHODS = ("first_order", "remap", "remap_delensed_e")
DEFAULT_TEMPLATE_METHOD = "first_order"  # removes the most lensing B from observed E (module docstring)


def _check_method(method) -> str:
    if not isinstance(method, str) or method not in TEMPLATE_METHODS:
        raise ValueError(f"method must be one of {', '.join(repr(m) for m in TEMPLATE_METHODS)}, got {method!r}")
    return method


def lensing_b_template(
    e_alm,
    phi_alm,
    lmax: int,
    method: str = DEFAULT_TEMPLATE_METHOD,
    epsilon: float = DEFAULT_EPSILON,
    nthreads: int | None = None,
) -> np.ndarray:
    """Lensing B-mode template: the B modes of E lensed by φ (E and φ normally Wiener-filtered).

    Parameters
    ----------
    e_alm : complex array, shape (nalm(ℓ_max^E),)
        E modes in µK (sky units, beam removed), e.g. from :func:`wiener_filter_e`; the template takes the
        unlensed B modes to be zero.
    phi_alm : complex array, shape (nalm(lmax_L),)
        Lensing potential (dimensionless), e.g. from :func:`wiener_filter_phi`.
    lmax : int
        Band limit of the template, 2 ≤ lmax ≤ ℓ_max^E (B modes above the E band limit would miss most of
        their sources).
    method : {"remap", "first_order", "remap_delensed_e"}
        ``"first_order"`` (default) or ``"remap"``: exact remapping of (E, B = 0) by ∇φ with the simulations' great-circle
        remapping and parallel transport (:func:`lensrec.remapping.lens_alm`), keeping the B part. ``"first_order"``:
        B part of ∇φ·∇P (see the module docstring for the derivation and signs). ``"remap_delensed_e"``: the
        E modes are first delensed (remapped by −φ, E part kept), then remapped by φ: the observed E is
        already lensed, and remapping it again lenses it twice (Baleato Lizancos, Challinor & Carron 2021,
        PRD 103, 023518).
    epsilon : float, default 1e-7
        Accuracy of the non-uniform synthesis at the displaced points (``"remap"`` only).
    nthreads : int, optional
        Threads; default ``LENSREC_NTHREADS`` or all cores.

    Returns
    -------
    numpy.ndarray
        Template B_ℓm in µK, shape (nalm(lmax),).

    Raises
    ------
    TypeError, ValueError
        For non-finite or badly shaped coefficients, lmax above the E band limit, or an unknown method.

    Notes
    -----
    ``"remap"`` evaluates the lensed field on the Gauss–Legendre grid of :func:`lensrec.remapping.lensing_grid`
    (exact up to the aliasing of the lensed tail beyond ℓ_max^E + min(lmax_L, 1000), < 0.6% of lensed BB
    near lmax). ``"first_order"`` is exact for its truncated series: its grid integrates products of
    band limit lmax_L + ℓ_max^E exactly. Both templates are of the E modes given: B modes sourced by E
    above ℓ_max^E or φ above lmax_L are missing from them.

    .. warning:: If φ was reconstructed partly from the B modes the template is subtracted from (EB, TB,
       MV), the residual measured on those B modes is biased low (delensing bias; module docstring).

    References
    ----------
    Lewis 2005, PRD 71, 083008 (remapping); Hu 2000, PRD 62, 043007 (first-order lensing of polarization);
    Smith et al. 2012, JCAP 06, 014 (templates for delensing).

    Examples
    --------
    >>> import numpy as np
    >>> from lensrec.harmonics import nalm
    >>> e = np.zeros(nalm(40), complex); e[10] = 1.0           # one E mode, l = 10, m = 0
    >>> phi = np.zeros(nalm(40), complex); phi[5] = 1e-4       # one lensing mode, L = 5, m = 0
    >>> b = lensing_b_template(e, phi, 30, method="first_order", nthreads=1)
    >>> bool(np.allclose(b, 0.0, atol=1e-12))                  # two m = 0 modes make no B (azimuthal symmetry)
    True
    >>> phi[45] = 1e-4                                         # add L = 5, m = 1
    >>> b1 = lensing_b_template(e, phi, 30, method="first_order", nthreads=1)
    >>> b2 = lensing_b_template(e, phi, 30, method="remap", nthreads=1)
    >>> bool(np.abs(b1).max() > 0 and np.allclose(b1, b2, rtol=0, atol=1e-3 * np.abs(b1).max()))
    True
    """
    e_alm, lmax_e = _coefficients(e_alm, "e_alm")
    phi_alm, lmax_L = _coefficients(phi_alm, "phi_alm")
    method = _check_method(method)
    lmax = as_int(lmax, "lmax", minimum=2)
    if lmax > lmax_e:
        raise ValueError(
            f"lmax={lmax} exceeds the band limit of e_alm ({lmax_e}); the template can reach at most the E band "
            "limit (lower lmax, or analyze E to a higher lmax)"
        )
    if lmax_L < 1:
        raise ValueError(f"phi_alm must reach L >= 1, got lmax_L = {lmax_L}")
    epsilon = as_float(epsilon, "epsilon", minimum=2e-13, maximum=0.1)
    nthreads = resolve_nthreads(nthreads)
    if method == "remap_delensed_e":
        # the observed E is lensed: undo its lensing first (remapping by -phi, the inverse to first order in
        # phi; Baleato Lizancos, Challinor & Carron 2021, PRD 103, 023518), keep the E part, then remap forward
        fields = np.zeros((2, e_alm.size), dtype=np.complex128)
        fields[0] = e_alm
        delensed = lens_alm(fields, -phi_alm, lmax_e, spin=2, lmax_in=lmax_e, epsilon=epsilon, nthreads=nthreads)
        e_alm = delensed[0]
        method = "remap"
    if method == "remap":
        fields = np.zeros((2, e_alm.size), dtype=np.complex128)
        fields[0] = e_alm
        return lens_alm(fields, phi_alm, lmax, spin=2, lmax_in=lmax_e, epsilon=epsilon, nthreads=nthreads)[1]
    return _first_order_template(e_alm, lmax_e, phi_alm, lmax_L, lmax, nthreads)


def _ell_factor(lmax: int, function) -> np.ndarray:
    ell = np.arange(lmax + 1, dtype=np.float64)
    return np.sqrt(np.clip(function(ell), 0.0, None))


# ducc0 0.42, measured at lmax 2000 on a 3001 x 6048 grid (CPU time, 2 threads): its gradient-only
# synthesis is faster than the full one with a zero curl for spin 3 (1.7 s against 1.9 s), slower for
# spin 1 (1.6 s against 1.3 s). Only the speed depends on this choice.
_GRADIENT_ONLY_SPINS = (3,)


def _first_order_template(e_alm, lmax_e, phi_alm, lmax_L, lmax, nthreads) -> np.ndarray:
    """B part of d·∇P = ½ [d S₁ − d̄ S₃] on an exact Gauss–Legendre grid (module docstring)."""
    sht = harmonics._ducc_sht()
    grid = gl_grid_for_band_limits(lmax, lmax_L + lmax_e)
    shape = {"ntheta": grid.ntheta, "nphi": grid.nphi, "geometry": "GL", "nthreads": nthreads}

    def gradient_map(alm, band, spin):
        if spin in _GRADIENT_ONLY_SPINS:
            return sht.synthesis_2d(alm=alm[None, :], lmax=band, spin=spin, mode="GRAD_ONLY", **shape)
        coefficients = np.zeros((2, alm.size), dtype=np.complex128)
        coefficients[0] = alm
        return sht.synthesis_2d(alm=coefficients, lmax=band, spin=spin, **shape)

    deflection = gradient_map(scale_alm(phi_alm, _ell_factor(lmax_L, lambda ell: ell * (ell + 1.0)), lmax_L), lmax_L, 1)
    product = gradient_map(
        scale_alm(e_alm, _ell_factor(lmax_e, lambda ell: (ell - 2.0) * (ell + 3.0)), lmax_e), lmax_e, 3
    )
    _combine(product, deflection, sign=-1.0, nthreads=nthreads)  # −½ d̄ S₃, in place
    lowered = gradient_map(
        scale_alm(e_alm, _ell_factor(lmax_e, lambda ell: (ell + 2.0) * (ell - 1.0)), lmax_e), lmax_e, 1
    )
    _combine(lowered, deflection, sign=1.0, nthreads=nthreads)  # +½ d S₁, in place
    del deflection
    product += lowered
    del lowered
    return sht.analysis_2d(map=product, lmax=lmax, spin=2, geometry="GL", nthreads=nthreads)[1]


def _combine(values: np.ndarray, deflection: np.ndarray, sign: float, nthreads: int) -> None:
    """In place, ring block by ring block: v ← ½ d v (sign +1) or v ← −½ d̄ v (sign −1), complex maps as
    (real, imaginary) pairs of shape (2, ntheta, nphi)."""
    rings = max(1, 100_000 // values.shape[2])
    blocks = [slice(start, min(start + rings, values.shape[1])) for start in range(0, values.shape[1], rings)]

    def work(block):
        d1, d2 = deflection[0, block], deflection[1, block]
        v1, v2 = values[0, block], values[1, block]
        if sign > 0:  # (d1 + i d2)(v1 + i v2)
            real = d1 * v1 - d2 * v2
            imag = d1 * v2 + d2 * v1
        else:  # −(d1 − i d2)(v1 + i v2)
            real = -(d1 * v1 + d2 * v2)
            imag = d2 * v1 - d1 * v2
        v1[...] = 0.5 * real
        v2[...] = 0.5 * imag

    run_parallel(work, blocks, nthreads)
