"""Delensing of B modes: Wiener-filtered φ and E, lensing B-mode templates, residuals and their spectra.

A lensing B-mode template is the B part of the Wiener-filtered E modes lensed by the Wiener-filtered
lensing potential; subtracting it from the observed B modes removes (part of) the lensing B power:

    φ^WF_LM = C_L^φφ / (C_L^φφ + N0_L) · φ̂_LM,         E^WF_ℓm = C̃_ℓ^EE · Ē_ℓm,
    B^template = B[ remap(E^WF, B = 0) by ∇φ^WF ],     B^residual = B^observed − B^template,

with φ̂ the normalised (unit-response) gradient reconstruction of Gaussian noise N0, Ē the
inverse-variance-filtered E modes (on the full sky with isotropic noise, Ē = E / (C̃^EE + N^EE), so
E^WF = C̃^EE/(C̃^EE + N^EE) · E) and C̃^EE the lensed E spectrum.

Two templates are built by :func:`lensing_b_template`:

``"remap"``
    Non-perturbative: (E^WF, 0) as Q/U is remapped by d = ∇φ^WF with the exact great-circle remapping and
    parallel transport that the simulations use (:func:`lensrec.sky.lens_alm`, spin 2), and the B part
    is kept.
``"first_order"``
    The gradient expansion P̃ ≈ P + d·∇P, B^lens ≈ B[∇φ·∇P]. With the spin-raising and -lowering operators
    ð, ð̄ (∇_θ = −(ð + ð̄)/2 and ∇_φ/sin θ = i(ð − ð̄)/2 on a spin-s field) the covariant directional
    derivative along d is d·∇P = −½ [d̄ ðP + d ð̄P], d = d_θ + i d_φ. In healpy's signs
    (f₁ + i f₂ = −Σ (G + iC) ₛY_ℓm, and ðₛY = √((ℓ−s)(ℓ+s+1)) ₛ₊₁Y, ð̄ₛY = −√((ℓ+s)(ℓ−s+1)) ₛ₋₁Y):
    d = −ðφ is the spin-1 map of G = √(L(L+1)) φ_LM; ðP is the spin-3 map of G = √((ℓ−2)(ℓ+3)) E_ℓm;
    −ð̄P is the spin-1 map of G = √((ℓ+2)(ℓ−1)) E_ℓm. Hence d·∇P = ½ [d · S₁ − d̄ · S₃] with S₁, S₃ those
    two maps, and the B part of its spin-2 analysis is the template. All products are formed on a
    Gauss–Legendre grid on which the analysis to ℓ_max is exact for the band limit L_max + ℓ_max^E of the
    product, so the only approximation is the truncation of the Taylor series. The signs are checked
    against the remapping in the small-deflection limit (tests/test_delensing.py).

The first-order template misses the higher-order terms of the remapping, which matter most at high ℓ,
where B^lens draws on E and φ modes whose product with the deflection (ℓ · |d| ~ 1 at ℓ ~ 1500 for the
2.5 arcmin rms deflection) is no longer small. Measured (tests/test_delensing.py, one full-sky simulation,
true unlensed E and true φ to ℓ = 2500): the remapped template removes 99.5–99.9% of the lensing B power in
30 ≤ ℓ ≤ 1000, the first-order one 90% at ℓ ≤ 300 falling to 75% at 600–1000. With a noisy Wiener-filtered
φ̂ the order reverses at high ℓ: the remapping also displaces E by the reconstruction noise in φ^WF, and it
removed 9.9% against 11.4% for the first-order template at 600 ≤ ℓ ≤ 1000 for an EE reconstruction at
1.4 µK-arcmin (equal at ℓ ≤ 300); the forecast of :func:`lensrec.delensing_forecast` describes the
first-order template (11.8% there).

Cost (benchmarks/bench_delensing.py, E and φ to 3000, template to 3000, 2 threads): the remapped template
costs 1.8–2.4 spin-2 HEALPix syntheses at nside 2048, the first-order one 3.2–3.6 (four exact transforms on
a grid for the band L_max + ℓ_max^E, against one synthesis, one non-uniform synthesis and one analysis on the
remapping's smaller grid); peak memory 2.4 and 2.7 GB. At ℓ_max = 1000 the first-order one is the faster
(0.8 of the remapping).

.. warning:: **Delensing bias.** If φ̂ is reconstructed partly from the same B modes that the template is
   subtracted from (EB, TB, or the MV combination, which EB dominates for deep polarization surveys), the
   template is correlated with the B-mode noise and with the lensing B modes themselves, beyond what the
   lensing potential alone explains. The residual power measured on the data then comes out lower than the
   true residual, the delensing looks better than it is, and an uncorrected r analysis is biased low.
   Measured with this module on one full-sky simulation at 1.4 µK-arcmin (1 arcmin beam, E to ℓ = 1500, φ̂
   to L = 1000, first-order template, tests/test_delensing.py): an EB reconstruction from the same maps gives
   an apparent A_lens^res of 0.28 where the forecast without the bias is 0.40 (the residual ~30% low; 0.35
   measured against the noise-free lensed B, the rest from the B noise), while an EE reconstruction of the
   same sky gives 0.89 against 0.88. Published estimates are of the same order, tens of percent of the
   residual for deep polarization-based reconstructions (from memory; Namikawa 2017, PRD 95, 103514;
   Baleato Lizancos, Challinor & Carron 2021, JCAP 03, 016). Reusing the template's E modes inside an EE or
   TE reconstruction gives a much smaller correlation. Avoid the bias by reconstructing φ without the
   delensed B modes (TT, TE, EE only, disjoint multipole ranges, or independent data), or calibrate it with
   simulations; nothing here corrects it.

References
----------
Knox & Song 2002, PRL 89, 011303; Kesden, Cooray & Kamionkowski 2002, PRL 89, 011304 (delensing);
Seljak & Hirata 2004, PRD 69, 043005; Smith, Hanson, LoVerde, Hirata & Zahn 2012, JCAP 06, 014 (Wiener-filtered
templates and their residual); Hu 2000, PRD 62, 043007 (the first-order lensing of polarization);
Lewis 2005, PRD 71, 083008 (remapping on the sphere).
"""

from __future__ import annotations

import concurrent.futures
from dataclasses import dataclass

import numpy as np

from . import harmonics
from ._checks import as_finite_array, as_float, as_int, resolve_nthreads
from .harmonics import gl_grid_for_band_limits, lmax_from_nalm, scale_alm
from .power import auto_spectrum, cross_spectrum

__all__ = [
    "TEMPLATE_METHODS",
    "DelensingResult",
    "wiener_filter_phi",
    "wiener_filter_e",
    "template_inputs",
    "lensing_b_template",
    "delens",
    "delensing_spectra",
    "delensing_efficiency",
    "measured_alens_residual",
    "MEASURED_BIAS_NOTE",
]

TEMPLATE_METHODS = ("remap", "first_order")
DEFAULT_EPSILON = 1e-7


# ------------------------------------------------------------------------------------------ validation
def _coefficients(values, name: str) -> tuple[np.ndarray, int]:
    """One set of finite complex harmonic coefficients in the triangular layout, and its lmax."""
    array = as_finite_array(values, name, dtype=np.complex128)
    if array.ndim != 1:
        raise ValueError(
            f"{name} must be one set of harmonic coefficients (1-D, healpy triangular layout), got shape {array.shape}"
        )
    return array, lmax_from_nalm(array.size, name)


def _check_method(method) -> str:
    if not isinstance(method, str) or method not in TEMPLATE_METHODS:
        raise ValueError(f"method must be one of {', '.join(repr(m) for m in TEMPLATE_METHODS)}, got {method!r}")
    return method


def _spectrum(values, name: str, lmax: int, allow_inf: bool = False) -> np.ndarray:
    """A 1-D non-negative spectrum indexed from ℓ = 0 reaching ``lmax`` (``inf`` allowed if asked)."""
    if isinstance(values, (str, bytes)) or values is None:
        raise TypeError(f"{name} must be a numeric array, got {type(values).__name__}")
    array = np.asarray(values)
    if not (np.issubdtype(array.dtype, np.floating) or np.issubdtype(array.dtype, np.integer)):
        raise TypeError(f"{name} must be a real numeric array, got dtype {array.dtype}")
    array = array.astype(np.float64)
    if array.ndim != 1:
        raise ValueError(f"{name} must be 1-D (indexed by l from 0), got shape {array.shape}")
    if array.size < lmax + 1:
        raise ValueError(f"{name} has {array.size} entries (l = 0 ... {array.size - 1}) but l up to {lmax} is needed")
    array = array[: lmax + 1]
    if np.any(np.isnan(array)) or np.any(array == -np.inf) or (not allow_inf and np.any(np.isinf(array))):
        allowed = "finite or +inf (no data)" if allow_inf else "finite"
        raise ValueError(f"{name} must be {allowed}; it contains NaN or infinite values")
    if np.any(array < 0):
        bad = int(np.argmin(array))
        raise ValueError(f"{name} must be non-negative (a power spectrum); got {array[bad]:.4g} at l = {bad}")
    return array


# ------------------------------------------------------------------------------------- Wiener filters
def wiener_filter_phi(phi_alm, n0, phi_spectrum=None) -> np.ndarray:
    """Wiener-filter a normalised lensing reconstruction: φ^WF_LM = C_L^φφ / (C_L^φφ + N0_L) · φ̂_LM.

    Parameters
    ----------
    phi_alm : complex array, shape (nalm(L_max),)
        The normalised (unit-response) gradient reconstruction φ̂_LM (dimensionless), healpy layout.
    n0 : array_like, shape (L_max + 1,)
        Its Gaussian reconstruction noise N0_L in C_L^φφ units, L = 0 … L_max exactly (the L range of
        ``phi_alm``). NaN is accepted at L < 2 (lensrec's convention for undefined entries), ``inf`` anywhere
        (no reconstruction: weight 0).
    phi_spectrum : array_like, optional
        C_L^φφ reaching L_max; default the fiducial spectrum (:func:`lensrec.fiducial_spectra`).

    Returns
    -------
    numpy.ndarray
        φ^WF_LM, same shape as ``phi_alm``; zero at L < 2 and where N0 is infinite.

    Raises
    ------
    TypeError, ValueError
        For non-finite or badly shaped ``phi_alm``, an ``n0`` whose length is not L_max + 1, NaN in ``n0`` at
        L ≥ 2, negative N0, or a C^φφ that is negative, non-finite or too short.

    References
    ----------
    Smith, Hanson, LoVerde, Hirata & Zahn 2012, JCAP 06, 014 (the Wiener-filtered reconstruction used for
    delensing, and its residual C^φφ (1 − ρ²)).

    Examples
    --------
    >>> import numpy as np
    >>> from lensrec.harmonics import nalm
    >>> phi = np.ones(nalm(3), complex)
    >>> n0 = np.array([np.nan, np.nan, 1.0, np.inf])
    >>> wiener_filter_phi(phi, n0, phi_spectrum=np.array([0.0, 0.0, 1.0, 1.0])).real.tolist()
    [0.0, 0.0, 0.5, 0.0, 0.0, 0.5, 0.0, 0.5, 0.0, 0.0]
    """
    phi_alm, lmax_phi = _coefficients(phi_alm, "phi_alm")
    if lmax_phi < 2:
        raise ValueError(f"phi_alm must reach L >= 2 to carry any lensing, got L_max = {lmax_phi}")
    if isinstance(n0, (str, bytes)) or n0 is None:
        raise TypeError(f"n0 must be a numeric array, got {type(n0).__name__}")
    noise = np.asarray(n0)
    if not (np.issubdtype(noise.dtype, np.floating) or np.issubdtype(noise.dtype, np.integer)):
        raise TypeError(f"n0 must be a real numeric array, got dtype {noise.dtype}")
    noise = noise.astype(np.float64)
    if noise.ndim != 1 or noise.size != lmax_phi + 1:
        raise ValueError(
            f"n0 must cover exactly the L range of phi_alm (L = 0 ... {lmax_phi}, {lmax_phi + 1} values), got shape "
            f"{noise.shape}: the noise belongs to another reconstruction"
        )
    if np.any(np.isnan(noise[2:])):
        bad = int(np.argmax(np.isnan(noise[2:]))) + 2
        raise ValueError(
            f"n0 is NaN at L = {bad}; NaN is allowed only at L < 2 (use inf where nothing is reconstructed)"
        )
    if np.any(noise[~np.isnan(noise)] < 0):
        raise ValueError(f"n0 must be non-negative (a noise power); got {np.nanmin(noise):.4g}")
    if phi_spectrum is None:
        from .spectra import fiducial_spectra

        phi_spectrum = fiducial_spectra().phi
    signal = _spectrum(phi_spectrum, "phi_spectrum", lmax_phi)
    weight = np.zeros(lmax_phi + 1)
    used = np.isfinite(noise) & (signal + np.nan_to_num(noise, nan=0.0) > 0)
    used[:2] = False
    weight[used] = signal[used] / (signal[used] + noise[used])
    return scale_alm(phi_alm, weight, lmax_phi)


def wiener_filter_e(e_alm, experiment, spectra=None, beam_convolved=True) -> np.ndarray:
    """Wiener-filter full-sky E modes: E^WF = C̃^EE · Ē, Ē the isotropic inverse-variance-filtered E.

    Ē comes from :class:`lensrec.filtering.IsotropicFilter` (Ē = E / (b_ℓ C̃^EE_tot) inside the polarization
    cuts, 0 outside), so E^WF = C̃^EE / (C̃^EE + N^EE) · E / b_ℓ with the beam-deconvolved noise N^EE: the same
    field as ``IsotropicFilter(...).filter(maps).wiener("E")`` for coefficients already analysed from maps.

    Parameters
    ----------
    e_alm : complex array, shape (nalm(lmax),)
        Observed E modes in µK on the full sky: as analysed from the maps (beam-convolved) if
        ``beam_convolved``, else already divided by the beam.
    experiment : Experiment or str
        The survey (noise, beam and cuts), or a shipped name / TOML path.
    spectra : Spectra, optional
        Theory spectra for C̃^EE and the total spectra; default :func:`lensrec.fiducial_spectra`.
    beam_convolved : bool, default True
        Whether ``e_alm`` still carries the beam.

    Returns
    -------
    numpy.ndarray
        E^WF_ℓm in µK (sky units, beam removed), same shape as ``e_alm``.

    Raises
    ------
    TypeError, ValueError
        For non-finite or badly shaped coefficients, an unknown experiment or too short spectra.

    References
    ----------
    Smith et al. 2012, JCAP 06, 014 (the Wiener-filtered E of the template).

    Examples
    --------
    >>> import numpy as np, lensrec
    >>> from lensrec.harmonics import nalm
    >>> e = lensrec.Experiment(name="demo", noise_temperature=1.0, beam_fwhm=0.0, ell_min=2,
    ...                        ell_max_polarization=100)
    >>> out = wiener_filter_e(np.ones(nalm(200), complex), e)
    >>> bool(0.9 < out[100].real < 1.0), float(abs(out[150]))   # l = 100 kept, l = 150 beyond the cut
    (True, 0.0)
    """
    from .experiment import load_experiment
    from .filtering import IsotropicFilter

    e_alm, lmax = _coefficients(e_alm, "e_alm")
    if not isinstance(beam_convolved, (bool, np.bool_)):
        raise TypeError(f"beam_convolved must be True or False, got {beam_convolved!r}")
    experiment = load_experiment(experiment)
    fields = np.zeros((3, e_alm.size), dtype=np.complex128)
    fields[1] = e_alm if beam_convolved else scale_alm(e_alm, experiment.beam(lmax), lmax)
    return IsotropicFilter(experiment, spectra, lmax=lmax).filter_alm(fields).wiener("E")


def template_inputs(maps, experiment, spectra=None, lmax: int | None = None, mask=None, nthreads: int | None = None):
    """The Wiener-filtered E and the observed B (sky units) of T, Q, U maps, from the isotropic filter.

    Parameters
    ----------
    maps : array, shape (3, 12·nside²)
        Observed T, Q, U in µK (HEALPix RING).
    experiment : Experiment or str
    spectra : Spectra, optional
        Default :func:`lensrec.fiducial_spectra`.
    lmax : int, optional
        Band limit (default min(3·nside − 1, the experiment's polarization ℓ_max)).
    mask : array, optional
        Weights applied before filtering (:class:`lensrec.filtering.IsotropicFilter`); spectra of masked
        B modes are pseudo-spectra (⟨w²⟩ for the observed B; E-to-B leakage is not removed).
    nthreads : int, optional

    Returns
    -------
    e_wiener : ndarray
        C̃^EE · Ē (µK), zero outside the polarization cuts.
    b_observed : ndarray
        B̄ · C^BB_tot = B / b_ℓ (µK, beam removed), zero outside the polarization cuts.
    fields : FilteredFields
        The filtered fields themselves.

    Raises
    ------
    TypeError, ValueError
        As :class:`lensrec.filtering.IsotropicFilter` (bad maps, nside, lmax above 3·nside − 1, mask).
    """
    from ._checks import check_lmax_for_nside
    from .experiment import load_experiment
    from .filtering import IsotropicFilter

    experiment = load_experiment(experiment)
    shape = np.shape(maps) if not isinstance(maps, (str, bytes)) else ()
    if len(shape) != 2 or shape[0] != 3:
        raise ValueError(f"maps must have shape (3, npix) for T, Q, U, got {shape}")
    nside = harmonics.npix_to_nside(shape[1], "maps")
    if lmax is None:
        lmax = min(3 * nside - 1, experiment.ell_max_polarization)
    lmax = check_lmax_for_nside(lmax, nside)
    field_filter = IsotropicFilter(experiment, spectra, lmax=lmax, mask=mask, nthreads=nthreads)
    fields = field_filter.filter(maps)
    total = field_filter.total["BB"]
    b_factor = np.where(np.isfinite(total), total, 0.0)
    return fields.wiener("E"), scale_alm(fields.B, b_factor, lmax), fields


# ----------------------------------------------------------------------------------------- templates
def lensing_b_template(
    e_alm, phi_alm, lmax: int, method: str = "remap", epsilon: float = DEFAULT_EPSILON, nthreads: int | None = None
) -> np.ndarray:
    """Lensing B-mode template: the B modes of E lensed by φ (E and φ normally Wiener-filtered).

    Parameters
    ----------
    e_alm : complex array, shape (nalm(ℓ_max^E),)
        E modes in µK (sky units, beam removed), e.g. from :func:`wiener_filter_e`; the template takes the
        unlensed B modes to be zero.
    phi_alm : complex array, shape (nalm(L_max),)
        Lensing potential (dimensionless), e.g. from :func:`wiener_filter_phi`.
    lmax : int
        Band limit of the template, 2 ≤ lmax ≤ ℓ_max^E (B modes above the E band limit would miss most of
        their sources).
    method : {"remap", "first_order"}
        ``"remap"`` (default): exact remapping of (E, B = 0) by ∇φ with the simulations' great-circle
        remapping and parallel transport (:func:`lensrec.sky.lens_alm`), keeping the B part. ``"first_order"``:
        B part of ∇φ·∇P (see the module docstring for the derivation and signs).
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
    ``"remap"`` evaluates the lensed field on the Gauss–Legendre grid of :func:`lensrec.sky.lensing_grid`
    (exact up to the aliasing of the lensed tail beyond ℓ_max^E + min(L_max, 1000), < 0.6% of lensed BB
    near lmax). ``"first_order"`` is exact for its truncated series: its grid integrates products of
    band limit L_max + ℓ_max^E exactly. Both templates are of the E modes given: B modes sourced by E
    above ℓ_max^E or φ above L_max are missing from them.

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
    phi_alm, lmax_phi = _coefficients(phi_alm, "phi_alm")
    method = _check_method(method)
    lmax = as_int(lmax, "lmax", minimum=2)
    if lmax > lmax_e:
        raise ValueError(
            f"lmax={lmax} exceeds the band limit of e_alm ({lmax_e}); the template can reach at most the E band "
            "limit (lower lmax, or analyse E to a higher lmax)"
        )
    if lmax_phi < 1:
        raise ValueError(f"phi_alm must reach L >= 1, got L_max = {lmax_phi}")
    epsilon = as_float(epsilon, "epsilon", minimum=2e-13, maximum=0.1)
    nthreads = resolve_nthreads(nthreads)
    if method == "remap":
        from .sky import lens_alm

        fields = np.zeros((2, e_alm.size), dtype=np.complex128)
        fields[0] = e_alm
        return lens_alm(fields, phi_alm, lmax, spin=2, lmax_in=lmax_e, epsilon=epsilon, nthreads=nthreads)[1]
    return _first_order_template(e_alm, lmax_e, phi_alm, lmax_phi, lmax, nthreads)


def _ell_factor(lmax: int, function) -> np.ndarray:
    ell = np.arange(lmax + 1, dtype=np.float64)
    return np.sqrt(np.clip(function(ell), 0.0, None))


# ducc0 0.42, measured at lmax 2000 on a 3001 x 6048 grid (CPU time, 2 threads): its gradient-only
# synthesis is faster than the full one with a zero curl for spin 3 (1.7 s against 1.9 s), slower for
# spin 1 (1.6 s against 1.3 s). Only the speed depends on this choice.
_GRADIENT_ONLY_SPINS = (3,)


def _first_order_template(e_alm, lmax_e, phi_alm, lmax_phi, lmax, nthreads) -> np.ndarray:
    """B part of d·∇P = ½ [d S₁ − d̄ S₃] on an exact Gauss–Legendre grid (module docstring)."""
    sht = harmonics._ducc_sht()
    grid = gl_grid_for_band_limits(lmax, lmax_phi + lmax_e)
    shape = {"ntheta": grid.ntheta, "nphi": grid.nphi, "geometry": "GL", "nthreads": nthreads}

    def gradient_map(alm, band, spin):
        if spin in _GRADIENT_ONLY_SPINS:
            return sht.synthesis_2d(alm=alm[None, :], lmax=band, spin=spin, mode="GRAD_ONLY", **shape)
        coefficients = np.zeros((2, alm.size), dtype=np.complex128)
        coefficients[0] = alm
        return sht.synthesis_2d(alm=coefficients, lmax=band, spin=spin, **shape)

    deflection = gradient_map(
        scale_alm(phi_alm, _ell_factor(lmax_phi, lambda ell: ell * (ell + 1.0)), lmax_phi), lmax_phi, 1
    )
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

    if nthreads > 1 and len(blocks) > 1:
        with concurrent.futures.ThreadPoolExecutor(nthreads) as pool:
            list(pool.map(work, blocks))
    else:
        for block in blocks:
            work(block)


# ------------------------------------------------------------------------------------------- spectra
def delensing_efficiency(observed_bb, residual_bb, noise_bb=None) -> np.ndarray:
    """Per-ℓ delensing efficiency: the fraction of the lensing B power removed.

    ε_ℓ = 1 − (C_ℓ^res − N_ℓ) / (C_ℓ^obs − N_ℓ): the lensing part of the residual power over the lensing
    part of the observed power, with the B-mode noise power N_ℓ subtracted from both (for noise-free B
    modes, or the true lensed B of a simulation, leave ``noise_bb`` out). 1 is perfect delensing, 0 none.

    Parameters
    ----------
    observed_bb, residual_bb : array_like
        Power of the observed B modes and of the delensed residual (µK², from ℓ = 0, one length).
    noise_bb : array_like, optional
        Expected noise power of the observed B modes (µK², beam-deconvolved, ``inf`` outside the cuts);
        default zero. The noise realisation's own scatter and any correlation of the template with the noise
        (delensing bias) are not removed by the subtraction.

    Returns
    -------
    numpy.ndarray
        ε_ℓ; NaN where the noise is infinite or the observed lensing power C^obs − N is not positive
        (ℓ < 2 in particular).

    Examples
    --------
    >>> import numpy as np
    >>> delensing_efficiency(np.array([0.0, 0.0, 3.0]), np.array([0.0, 0.0, 2.0]), np.array([0, 0, 1.0])).tolist()
    [nan, nan, 0.5]
    """
    lmax = max(np.size(observed_bb) - 1, 0)
    observed = _spectrum(observed_bb, "observed_bb", lmax)
    residual = _spectrum(residual_bb, "residual_bb", lmax)
    if np.size(residual_bb) != lmax + 1:
        raise ValueError(f"residual_bb has {np.size(residual_bb)} entries but observed_bb has {lmax + 1}")
    noise = np.zeros(lmax + 1) if noise_bb is None else _spectrum(noise_bb, "noise_bb", lmax, allow_inf=True)
    out = np.full(lmax + 1, np.nan)
    finite = np.isfinite(noise)
    lensing = np.where(finite, observed - np.where(finite, noise, 0.0), 0.0)
    usable = finite & (lensing > 0)
    usable[:2] = False
    out[usable] = 1.0 - (residual[usable] - noise[usable]) / lensing[usable]
    return out


def measured_alens_residual(
    residual_bb, lensed_bb, noise_bb=None, ell_min: int = 2, ell_max: int | None = None, iterations: int = 8
) -> float:
    """A_lens^res of a measured residual: the Fisher-weighted fit of A · C^lens + N to the delensed BB.

    The definition of :func:`lensrec.tensor_forecast.alens_residual` (the amplitude that a fit of
    A·C^lens + N to the delensed spectrum returns, with the fit's inverse-variance weights): here
    A = Σ w_ℓ (C_ℓ^res − N_ℓ)/C_ℓ^lens / Σ w_ℓ with w_ℓ = (2ℓ+1) [C_ℓ^lens / (A C_ℓ^lens + N_ℓ)]², iterated
    from A = 1 to self-consistency. The weights use the model A·C^lens + N rather than the measured C^res,
    which scatters from ℓ to ℓ and would bias a ratio of noisy weights; for a residual proportional to C^lens
    the two definitions coincide. Multipoles with infinite noise or no lensing power get no weight.

    Parameters
    ----------
    residual_bb : array_like
        Measured power of the delensed B modes (µK², from ℓ = 0), noise included.
    lensed_bb : array_like
        The lensing BB power before delensing that A is measured against (µK², from ℓ = 0): the theory
        lensed BB, or the measured lensing power of the same sky.
    noise_bb : array_like, optional
        Noise power in ``residual_bb`` (µK², ``inf`` allowed); default zero.
    ell_min, ell_max : int
        Inclusive multipole range (default 2 … the end of ``residual_bb``).
    iterations : int, default 8
        Fixed-point iterations of the weights (the fit converges in a few).

    Returns
    -------
    float
        A_lens^res (0 perfect delensing, 1 none); negative values can occur for a noisy residual.

    Examples
    --------
    >>> import numpy as np
    >>> lensed = np.full(101, 2e-6); noise = np.full(101, 1e-6)
    >>> round(measured_alens_residual(0.3 * lensed + noise, lensed, noise, 2, 100), 12)
    0.3
    """
    size = np.size(residual_bb)
    ell_max = size - 1 if ell_max is None else ell_max
    ell_min = as_int(ell_min, "ell_min", minimum=2)
    ell_max = as_int(ell_max, "ell_max", minimum=ell_min)
    iterations = as_int(iterations, "iterations", minimum=1, maximum=100)
    residual = _spectrum(residual_bb, "residual_bb", ell_max)[ell_min:]
    lensed = _spectrum(lensed_bb, "lensed_bb", ell_max)[ell_min:]
    noise = (np.zeros(ell_max + 1) if noise_bb is None else _spectrum(noise_bb, "noise_bb", ell_max, allow_inf=True))[
        ell_min:
    ]
    usable = np.isfinite(noise) & (lensed > 0)
    if not np.any(usable):
        raise ValueError(f"no multipole in [{ell_min}, {ell_max}] has lensing power and finite noise")
    ell = np.arange(ell_min, ell_max + 1, dtype=np.float64)[usable]
    lensed, residual, noise = lensed[usable], residual[usable], noise[usable]
    ratio = (residual - noise) / lensed
    amplitude = 1.0
    for _ in range(iterations):
        model = max(amplitude, 0.0) * lensed + noise
        if np.any(model <= 0):  # no noise and A ≤ 0: fall back to the noise-free weights (2ℓ+1)
            weights = 2.0 * ell + 1.0
        else:
            weights = (2.0 * ell + 1.0) * (lensed / model) ** 2
        amplitude = float(np.sum(weights * ratio) / np.sum(weights))
    return amplitude


@dataclass(frozen=True, eq=False)
class DelensingResult:
    """Observed, template and residual B modes and their full-sky spectra (µK², ℓ from 0).

    Attributes
    ----------
    ell : ndarray
        ℓ = 0 … lmax.
    template_alm, residual_alm : ndarray
        The lensing B-mode template and the residual B = observed − template (µK, nalm(lmax)).
    observed_bb, template_bb, residual_bb : ndarray
        Auto-spectra of the observed B modes, the template and the residual.
    cross_bb : ndarray
        Cross-spectrum of the observed B modes with the template.
    noise_bb : ndarray
        Noise power subtracted from the observed and residual spectra in ``efficiency`` and
        ``alens_residual`` (zeros for noise-free B modes; ``inf`` outside the experiment's cuts).
    lensed_bb : ndarray
        The lensing BB that A_lens^res is measured against.
    efficiency : ndarray
        :func:`delensing_efficiency` per ℓ.
    alens_residual : float
        :func:`measured_alens_residual` over [ell_min, ell_max].
    ell_min, ell_max : int
        Range of ``alens_residual``.
    method : str
        Template method.
    notes : tuple of str
        Caveats travelling with the numbers (the delensing bias first).
    """

    ell: np.ndarray
    template_alm: np.ndarray
    residual_alm: np.ndarray
    observed_bb: np.ndarray
    template_bb: np.ndarray
    residual_bb: np.ndarray
    cross_bb: np.ndarray
    noise_bb: np.ndarray
    lensed_bb: np.ndarray
    efficiency: np.ndarray
    alens_residual: float
    ell_min: int
    ell_max: int
    method: str
    notes: tuple = ()

    @property
    def lmax(self) -> int:
        return int(self.ell[-1])

    def efficiency_in_range(self, ell_min: int, ell_max: int) -> float:
        """Fraction of the lensing B power removed over [ell_min, ell_max], mode-weighted:
        1 − Σ (2ℓ+1)(C^res − N) / Σ (2ℓ+1)(C^obs − N) over the multipoles with finite noise."""
        ell_min = as_int(ell_min, "ell_min", minimum=2, maximum=self.lmax)
        ell_max = as_int(ell_max, "ell_max", minimum=ell_min, maximum=self.lmax)
        part = slice(ell_min, ell_max + 1)
        noise = self.noise_bb[part]
        finite = np.isfinite(noise)
        modes = (2.0 * self.ell[part] + 1.0)[finite]
        lensing = np.sum(modes * (self.observed_bb[part][finite] - noise[finite]))
        if not lensing > 0:
            raise ValueError(f"no lensing power with finite noise in [{ell_min}, {ell_max}]")
        return float(1.0 - np.sum(modes * (self.residual_bb[part][finite] - noise[finite])) / lensing)

    def spectra_dict(self) -> dict:
        """Plain lists for JSON: ℓ, the four spectra, noise, efficiency, A_lens^res and the notes."""
        return {
            "ell": self.ell.astype(int).tolist(),
            "observed_bb": self.observed_bb.tolist(),
            "template_bb": self.template_bb.tolist(),
            "residual_bb": self.residual_bb.tolist(),
            "observed_x_template_bb": self.cross_bb.tolist(),
            "noise_bb": self.noise_bb.tolist(),
            "lensed_bb_reference": self.lensed_bb.tolist(),
            "efficiency": self.efficiency.tolist(),
            "alens_residual": self.alens_residual,
            "alens_range": [self.ell_min, self.ell_max],
            "method": self.method,
            "notes": list(self.notes),
        }


MEASURED_BIAS_NOTE = (
    "Delensing bias: this residual is measured on the B modes given. If the lensing potential of the template "
    "was reconstructed partly from those same B modes (EB, TB or MV from the same maps), the template correlates "
    "with their noise and with the lensing B modes beyond what phi explains, and the measured residual comes out "
    "lower than the true one: the efficiency and A_lens^res are then optimistic and an r analysis of the residual "
    "biased low. On a full-sky simulation at 1.4 uK-arcmin (EB to L = 1000, E to l = 1500) lensrec measured an "
    "apparent A_lens^res of 0.28 against 0.40 forecast without the bias (the residual ~30% low); an EE "
    "reconstruction of the same sky gave 0.89 against 0.88. Published estimates are of the same order (from "
    "memory; Namikawa 2017, PRD 95, 103514; Baleato Lizancos, Challinor & Carron 2021, JCAP 03, 016). Avoid it "
    "by reconstructing phi without the delensed B modes (TT, TE, EE, disjoint multipoles or independent data) or "
    "calibrate it with simulations; nothing here corrects it."
)

_EFFICIENCY_NOTE = (
    "efficiency = 1 - (C_res - N) / (C_obs - N) per l, with N the expected B-mode noise power subtracted from the "
    "observed and residual spectra (zero for noise-free B modes); alens_residual is the Fisher-weighted fit of "
    "A * C_lens + N to the residual spectrum, weights (2l+1) (C_lens / (A C_lens + N))^2, the definition of "
    "lensrec.tensor_forecast.alens_residual."
)


def delensing_spectra(
    observed_b_alm,
    template_alm,
    noise_bb=None,
    lensed_bb=None,
    ell_min: int | None = None,
    ell_max: int | None = None,
    method: str = "remap",
) -> DelensingResult:
    """Residual B modes (observed − template) and the spectra, efficiency and A_lens^res that describe them.

    Parameters
    ----------
    observed_b_alm : complex array, shape (nalm(ℓ_obs),)
        Observed B modes in sky units (µK, beam removed), ℓ_obs ≥ the template's lmax; truncated to it.
    template_alm : complex array, shape (nalm(lmax),)
        The lensing B-mode template (:func:`lensing_b_template`).
    noise_bb : array_like, optional
        Expected noise power of ``observed_b_alm`` (µK², ``inf`` allowed), reaching lmax; default zero.
    lensed_bb : array_like, optional
        Lensing BB that A_lens^res is measured against (µK², reaching lmax); default the fiducial lensed BB.
    ell_min, ell_max : int, optional
        Range of A_lens^res; default 2 (or the first ℓ with finite noise) … lmax.
    method : str
        Recorded in the result.

    Returns
    -------
    DelensingResult

    Raises
    ------
    TypeError, ValueError
        For non-finite or badly shaped coefficients, observed B modes below the template's band limit, or
        spectra that are negative, NaN or too short.

    Examples
    --------
    >>> import numpy as np
    >>> from lensrec.harmonics import nalm
    >>> b = np.ones(nalm(10), complex)
    >>> result = delensing_spectra(b, 0.75 * b, lensed_bb=np.ones(11))
    >>> round(float(result.efficiency[5]), 12), round(result.alens_residual, 12)
    (0.9375, 0.0625)
    """
    template_alm, lmax = _coefficients(template_alm, "template_alm")
    observed, lmax_obs = _coefficients(observed_b_alm, "observed_b_alm")
    if lmax < 2:
        raise ValueError(f"template_alm must reach l >= 2, got lmax = {lmax}")
    if lmax_obs < lmax:
        raise ValueError(
            f"observed_b_alm reaches l = {lmax_obs}, below the template's band limit {lmax}; build the template to "
            f"lmax <= {lmax_obs}"
        )
    if lmax_obs > lmax:
        observed = harmonics.truncate_alm(observed, lmax, lmax_obs)
    method = _check_method(method)
    noise = np.zeros(lmax + 1) if noise_bb is None else _spectrum(noise_bb, "noise_bb", lmax, allow_inf=True)
    if lensed_bb is None:
        from .spectra import fiducial_spectra

        lensed_bb = fiducial_spectra().lensed["BB"]
    lensed = _spectrum(lensed_bb, "lensed_bb", lmax)
    finite = np.flatnonzero(np.isfinite(noise[2:])) + 2
    if finite.size == 0:
        raise ValueError("noise_bb is infinite at every l >= 2: there are no B modes to delens")
    ell_min = int(finite[0]) if ell_min is None else as_int(ell_min, "ell_min", minimum=2, maximum=lmax)
    ell_max = int(finite[-1]) if ell_max is None else as_int(ell_max, "ell_max", minimum=ell_min, maximum=lmax)
    residual = observed - template_alm
    observed_bb = auto_spectrum(observed, lmax)
    residual_bb = auto_spectrum(residual, lmax)
    return DelensingResult(
        ell=np.arange(lmax + 1),
        template_alm=template_alm,
        residual_alm=residual,
        observed_bb=observed_bb,
        template_bb=auto_spectrum(template_alm, lmax),
        residual_bb=residual_bb,
        cross_bb=cross_spectrum(observed, template_alm, lmax),
        noise_bb=noise,
        lensed_bb=lensed,
        efficiency=delensing_efficiency(observed_bb, residual_bb, noise),
        alens_residual=measured_alens_residual(residual_bb, lensed, noise, ell_min, ell_max),
        ell_min=ell_min,
        ell_max=ell_max,
        method=method,
        notes=(MEASURED_BIAS_NOTE, _EFFICIENCY_NOTE),
    )


def delens(
    observed_b_alm,
    e_alm,
    phi_alm,
    lmax: int | None = None,
    method: str = "remap",
    noise_bb=None,
    lensed_bb=None,
    ell_min: int | None = None,
    ell_max: int | None = None,
    epsilon: float = DEFAULT_EPSILON,
    nthreads: int | None = None,
) -> DelensingResult:
    """Build the lensing B-mode template from E and φ and subtract it from the observed B modes.

    Parameters
    ----------
    observed_b_alm : complex array
        Observed B modes (µK, beam removed), healpy layout, reaching at least ``lmax``.
    e_alm, phi_alm : complex arrays
        Wiener-filtered E (µK) and φ (see :func:`wiener_filter_e`, :func:`wiener_filter_phi`).
    lmax : int, optional
        Band limit of the template and the spectra; default min(ℓ_max of ``e_alm``, of ``observed_b_alm``).
    method : {"remap", "first_order"}
        Template method (:func:`lensing_b_template`).
    noise_bb, lensed_bb, ell_min, ell_max
        As for :func:`delensing_spectra`.
    epsilon : float
        Accuracy of the remapping's non-uniform synthesis.
    nthreads : int, optional

    Returns
    -------
    DelensingResult

    Raises
    ------
    TypeError, ValueError
        As :func:`lensing_b_template` and :func:`delensing_spectra`.

    Notes
    -----
    .. warning:: The residual of B modes that also entered the φ reconstruction (EB, TB, MV) is biased low
       (delensing bias; see the module docstring and ``result.notes``).

    References
    ----------
    Smith et al. 2012, JCAP 06, 014; Namikawa 2017, PRD 95, 103514 (the delensing bias).

    Examples
    --------
    >>> import numpy as np
    >>> from lensrec.harmonics import nalm
    >>> rng = np.random.default_rng(0)
    >>> e = rng.normal(size=nalm(64)) + 0j
    >>> phi = 1e-5 * (rng.normal(size=nalm(64)) + 0j)
    >>> template = lensing_b_template(e, phi, 64, nthreads=1)
    >>> result = delens(template, e, phi, nthreads=1)     # observed B = the template itself: all removed
    >>> float(np.abs(result.residual_alm).max())
    0.0
    """
    e_alm, lmax_e = _coefficients(e_alm, "e_alm")
    observed, lmax_obs = _coefficients(observed_b_alm, "observed_b_alm")
    lmax = min(lmax_e, lmax_obs) if lmax is None else as_int(lmax, "lmax", minimum=2)
    template = lensing_b_template(e_alm, phi_alm, lmax, method=method, epsilon=epsilon, nthreads=nthreads)
    return delensing_spectra(
        observed, template, noise_bb=noise_bb, lensed_bb=lensed_bb, ell_min=ell_min, ell_max=ell_max, method=method
    )
