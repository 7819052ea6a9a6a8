"""Wiener filters of the delensing inputs: the reconstructed lensing potential φ̂ and the observed E modes.

    φ^WF_LM = C_L^φφ / (C_L^φφ + N0_L) · φ̂_LM,         E^WF_ℓm = C̃_ℓ^EE · Ē_ℓm,

with φ̂ the normalized (unit-response) gradient reconstruction of Gaussian noise N0, Ē the
inverse-variance-filtered E modes (on the full sky with isotropic noise, Ē = E / (C̃^EE + N^EE), so
E^WF = C̃^EE/(C̃^EE + N^EE) · E) and C̃^EE the lensed E spectrum. :func:`template_inputs` filters observed
maps into the Wiener-filtered E and the beam-deconvolved B that the template of
:mod:`lensrec.lensing_templates` and the spectra of :mod:`lensrec.delensing` take.

References: Seljak & Hirata 2004, PRD 69, 043005; Smith, Hanson, LoVerde, Hirata & Zahn 2012, JCAP 06, 014.
"""

from __future__ import annotations

import numpy as np

from . import harmonics
from ._checks import as_finite_array, as_real_array
from .harmonics import lmax_from_nalm, scale_alm

__all__ = ["wiener_filter_phi", "wiener_filter_e", "template_inputs"]


# ------------------------------------------------------------------------------------------ validation
def _coefficients(values, name: str) -> tuple[np.ndarray, int]:
    """One set of finite complex harmonic coefficients in the triangular layout, and its lmax."""
    array = as_finite_array(values, name, dtype=np.complex128)
    if array.ndim != 1:
        raise ValueError(
            f"{name} must be one set of harmonic coefficients (1-D, healpy triangular layout), got shape {array.shape}"
        )
    return array, lmax_from_nalm(array.size, name)


def _spectrum(values, name: str, lmax: int, allow_inf: bool = False) -> np.ndarray:
    """A 1-D non-negative spectrum indexed from ℓ = 0 reaching ``lmax`` (``inf`` allowed if asked)."""
    array = as_real_array(values, name, ndim=1)
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


def wiener_filter_phi(phi_alm, n0, phi_spectrum=None, n1=None) -> np.ndarray:
    """Wiener-filter a normalized lensing reconstruction: φ^WF_LM = C_L^φφ / (C_L^φφ + N0_L + N1_L) · φ̂_LM.

    The filter must use the reconstruction's true noise, N0 + N1. The forecast identity of delensing, that
    the residual lensing potential power C_L^φφ (1 − ρ_L²), ρ_L² = C_L^φφ/(C_L^φφ + N_L), already includes
    the B modes made by the reconstruction noise, holds only when N_L in the filter is the noise actually in
    φ̂ (Smith et al. 2012, JCAP 06, 014): with N0 alone the filter over-weights φ̂ where N1 is not small, and
    the template carries more noise than the forecast counts. lensrec's recipes (the delens command, the
    demo, the workbench) therefore pass the analytic N1 of :func:`lensrec.analytic_n1` by default; ``n1=None``
    here means no N1 (for callers that have only N0).

    Parameters
    ----------
    phi_alm : complex array, shape (nalm(lmax_L),)
        The normalized (unit-response) gradient reconstruction φ̂_LM (dimensionless), healpy layout.
    n0 : array_like, shape (lmax_L + 1,)
        Its Gaussian reconstruction noise N0_L in C_L^φφ units, L = 0 … lmax_L exactly (the L range of
        ``phi_alm``). NaN is accepted at L < 2 (lensrec's convention for undefined entries), ``inf`` anywhere
        (no reconstruction: weight 0).
    phi_spectrum : array_like, optional
        C_L^φφ reaching L_max; default the fiducial spectrum (:func:`lensrec.fiducial_spectra`).
    n1 : array_like, optional
        The N1 bias of the reconstruction on the same L range (NaN allowed where N0 is NaN or infinite, and
        below the first L of an interpolated N1, where it counts as zero); default none.

    Returns
    -------
    numpy.ndarray
        φ^WF_LM, same shape as ``phi_alm``; zero at L < 2 and where N0 is infinite.

    Raises
    ------
    TypeError, ValueError
        For non-finite or badly shaped ``phi_alm``, an ``n0`` whose length is not lmax_L + 1, NaN in ``n0`` at
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
    phi_alm, lmax_L = _coefficients(phi_alm, "phi_alm")
    if lmax_L < 2:
        raise ValueError(f"phi_alm must reach L >= 2 to carry any lensing, got lmax_L = {lmax_L}")
    if isinstance(n0, (str, bytes)) or n0 is None:
        raise TypeError(f"n0 must be a numeric array, got {type(n0).__name__}")
    noise = np.asarray(n0)
    if not (np.issubdtype(noise.dtype, np.floating) or np.issubdtype(noise.dtype, np.integer)):
        raise TypeError(f"n0 must be a real numeric array, got dtype {noise.dtype}")
    noise = noise.astype(np.float64)
    if noise.ndim != 1 or noise.size != lmax_L + 1:
        raise ValueError(
            f"n0 must cover exactly the L range of phi_alm (L = 0 ... {lmax_L}, {lmax_L + 1} values), got shape "
            f"{noise.shape}: the noise belongs to another reconstruction"
        )
    if np.any(np.isnan(noise[2:])):
        bad = int(np.argmax(np.isnan(noise[2:]))) + 2
        raise ValueError(
            f"n0 is NaN at L = {bad}; NaN is allowed only at L < 2 (use inf where nothing is reconstructed)"
        )
    if np.any(noise[~np.isnan(noise)] < 0):
        raise ValueError(f"n0 must be non-negative (a noise power); got {np.nanmin(noise):.4g}")
    if n1 is not None:
        if isinstance(n1, (str, bytes)):
            raise TypeError(f"n1 must be a numeric array or None, got {type(n1).__name__}")
        extra = np.asarray(n1, dtype=np.float64)
        if extra.shape != noise.shape:
            raise ValueError(f"n1 must have the shape of n0 {noise.shape}, got {extra.shape}")
        if np.any(np.isinf(extra)):
            raise ValueError("n1 must be finite (NaN allowed where it is not defined)")
        noise = noise + np.nan_to_num(extra, nan=0.0)
        if np.any(noise[2:][np.isfinite(noise[2:])] < 0):
            raise ValueError("n0 + n1 is negative somewhere; N1 must not exceed N0 in magnitude when negative")
    if phi_spectrum is None:
        from .spectra import fiducial_spectra

        phi_spectrum = fiducial_spectra().phi
    signal = _spectrum(phi_spectrum, "phi_spectrum", lmax_L)
    weight = np.zeros(lmax_L + 1)
    used = np.isfinite(noise) & (signal + np.nan_to_num(noise, nan=0.0) > 0)
    used[:2] = False
    weight[used] = signal[used] / (signal[used] + noise[used])
    return scale_alm(phi_alm, weight, lmax_L)


def wiener_filter_e(e_alm, experiment, spectra=None, beam_convolved=True) -> np.ndarray:
    """Wiener-filter full-sky E modes: E^WF = C̃^EE · Ē, Ē the isotropic inverse-variance-filtered E.

    Ē comes from :class:`lensrec.filtering.IsotropicFilter` (Ē = E / (b_ℓ C̃^EE_tot) inside the polarization
    cuts, 0 outside), so E^WF = C̃^EE / (C̃^EE + N^EE) · E / b_ℓ with the beam-deconvolved noise N^EE: the same
    field as ``IsotropicFilter(...).filter(maps).wiener("E")`` for coefficients already analyzed from maps.

    Parameters
    ----------
    e_alm : complex array, shape (nalm(lmax),)
        Observed E modes in µK on the full sky: as analyzed from the maps (beam-convolved) if
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
