"""Delensing of B modes: Wiener-filtered φ and E, lensing B-mode templates, residuals and their spectra.

A lensing B-mode template is the B part of the Wiener-filtered E modes lensed by the Wiener-filtered
lensing potential; subtracting it from the observed B modes removes (part of) the lensing B power:

    φ^WF_LM = C_L^φφ / (C_L^φφ + N0_L) · φ̂_LM,         E^WF_ℓm = C̃_ℓ^EE · Ē_ℓm,
    B^template = B[ remap(E^WF, B = 0) by ∇φ^WF ],     B^residual = B^observed − B^template,

with φ̂ the normalized (unit-response) gradient reconstruction of Gaussian noise N0, Ē the
inverse-variance-filtered E modes (on the full sky with isotropic noise, Ē = E / (C̃^EE + N^EE), so
E^WF = C̃^EE/(C̃^EE + N^EE) · E) and C̃^EE the lensed E spectrum.

The templates ("first_order", the default; "remap"; "remap_delensed_e"), their accuracy and cost are described in
:mod:`lensrec.lensing_templates`; the Wiener filters are in :mod:`lensrec.wiener_filters`. Both are
re-exported here, and :func:`delens` runs filter → template → spectra.

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
   residual for deep polarization-based reconstructions (Namikawa 2017, PRD 95, 103514;
   Baleato Lizancos, Challinor & Carron 2021, JCAP 03, 016). Reusing the template's E modes inside an EE or
   TE reconstruction gives a much smaller correlation. Avoid the bias by reconstructing φ without the
   delensed B modes: the B-free label TT+TE+EE, or a B-using label whose reconstruction leaves out the
   delensed B modes (:mod:`lensrec.delensing_bias`, ``lensrec reconstruct --exclude-delensed-b``; on eight
   nside-256 simulations this closed 97% of the gap, docs/validation.md), or independent data.

References
----------
Knox & Song 2002, PRL 89, 011303; Kesden, Cooray & Kamionkowski 2002, PRL 89, 011304 (delensing);
Seljak & Hirata 2004, PRD 69, 043005; Smith, Hanson, LoVerde, Hirata & Zahn 2012, JCAP 06, 014 (Wiener-filtered
templates and their residual); Hu 2000, PRD 62, 043007 (the first-order lensing of polarization);
Lewis 2005, PRD 71, 083008 (remapping on the sphere).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from . import harmonics
from ._checks import as_int
from ._deprecation import renamed_arguments
from .lensing_templates import (  # noqa: F401  (re-exported: template construction lived here)
    DEFAULT_EPSILON,
    DEFAULT_TEMPLATE_METHOD,
    TEMPLATE_METHODS,
    _check_method,
    lensing_b_template,
)
from .power import auto_spectrum, cross_spectrum
from .wiener_filters import (  # noqa: F401  (re-exported: the Wiener filters lived here)
    _coefficients,
    _spectrum,
    template_inputs,
    wiener_filter_e,
    wiener_filter_phi,
)

__all__ = [
    "TEMPLATE_METHODS",
    "DEFAULT_TEMPLATE_METHOD",
    "DelensingResult",
    "wiener_filter_phi",
    "wiener_filter_e",
    "template_inputs",
    "lensing_b_template",
    "delens",
    "delens_maps",
    "delensing_spectra",
    "delensing_efficiency",
    "measured_alens_residual",
    "MEASURED_BIAS_NOTE",
]


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
        default zero. The noise realization's own scatter and any correlation of the template with the noise
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


@renamed_arguments(iterations="fit_iterations")
def measured_alens_residual(
    residual_bb, lensed_bb, noise_bb=None, ell_min: int = 2, ell_max: int | None = None, fit_iterations: int = 8
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
    fit_iterations : int, default 8
        Fixed-point iterations of the fit's weights (it converges in a few); ``iterations`` is the
        deprecated old name.

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
    fit_iterations = as_int(fit_iterations, "fit_iterations", minimum=1, maximum=100)
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
    for _ in range(fit_iterations):
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
        Caveats traveling with the numbers (the delensing bias first).
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
    "reconstruction of the same sky gave 0.89 against 0.88. Published estimates are of the same order "
    "(Namikawa 2017, PRD 95, 103514; Baleato Lizancos, Challinor & Carron 2021, JCAP 03, 016). Avoid it "
    "by reconstructing phi without the delensed B modes (TT, TE, EE, disjoint multipoles or independent data) or "
    "leave the delensed B modes out of the reconstruction (lensrec.delensing_bias; Baleato Lizancos, Challinor & "
    "Carron 2021, JCAP 03, 016). The bias treatment applied, when known, is the first note."
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
    method: str = DEFAULT_TEMPLATE_METHOD,
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
    method: str = DEFAULT_TEMPLATE_METHOD,
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
    method : {"first_order", "remap", "remap_delensed_e"}
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


# -------------------------------------------------------------------------------------------- recipe
def delens_maps(
    maps,
    reconstruction,
    experiment,
    spectra=None,
    n0=None,
    lmax: int | None = None,
    method: str = DEFAULT_TEMPLATE_METHOD,
    n1="analytic",
    mask=None,
    ell_min: int | None = None,
    ell_max: int | None = None,
    epsilon: float = DEFAULT_EPSILON,
    nthreads: int | None = None,
    progress=None,
    phi_filtered: bool = False,
    notes=(),
) -> DelensingResult:
    """Delens observed maps with a lensing reconstruction: the whole recipe from maps to residual spectra.

    Steps: the Wiener-filtered E and the beam-deconvolved observed B of the maps (:func:`template_inputs`),
    the Wiener-filtered φ̂ (:func:`wiener_filter_phi`, C^φφ/(C^φφ + N0 + N1)), the lensing B template
    (:func:`lensing_b_template`), then the residual spectra, the efficiency per ℓ and A_lens^res
    (:func:`delensing_spectra`) with the experiment's B-mode noise power subtracted and the lensed BB of
    ``spectra`` as the reference. This is what ``lensrec delens``, the demo and the workbench run.

    Parameters
    ----------
    maps : array, shape (3, 12·nside²)
        Observed T, Q, U (µK, RING).
    reconstruction : Reconstruction or complex array
        The lensing reconstruction (its ``phi_alm`` and gradient N0 are used), or normalized φ̂_LM with
        ``n0`` given.
    experiment : Experiment or str
        The experiment the maps were observed with (filter, beam, B-mode noise).
    spectra : Spectra, optional
        Theory spectra (filters, lensed BB); default the fiducial cosmology.
    n0 : array, optional
        Noise of φ̂ per L for its Wiener filter (needed when ``reconstruction`` is an array; default its
        ``n0["gradient"]``): the Gaussian N0, or N0 + N1, or an iterative N0 (:func:`lensrec.phi_noise.read_phi_noise`).
    lmax : int, optional
        Band limit of E, B and the template; default min(3·nside − 1, ℓ_max of polarization).
    method : {"first_order", "remap", "remap_delensed_e"}
        Template method (:func:`lensing_b_template`).
    n1 : "analytic", array or None
        N1 of φ̂ per L added to N0 in the Wiener filter, so that the filter uses the reconstruction's true
        noise (see :func:`wiener_filter_phi`). "analytic" (default): :func:`lensrec.analytic_n1` of the
        reconstruction's estimator when ``reconstruction`` is a Reconstruction (quadratic, not iterated);
        for a bare φ̂ array or an iterated reconstruction it cannot be computed, and N0 alone is used (said in
        ``result.notes``); with ``n0`` given, that is taken as the whole noise of φ̂. None: N0 alone.
    mask : array, optional
        Weights applied to the maps before filtering (:func:`template_inputs`).
    ell_min, ell_max : int, optional
        Range of A_lens^res (:func:`delensing_spectra`).
    epsilon : float
        Accuracy of the remapping's non-uniform synthesis.
    nthreads : int, optional
    progress : callable, optional
        ``progress(fraction, message)`` before each step.
    phi_filtered : bool, default False
        Use φ as given, without a Wiener filter: the exact φ of a simulation (the perfect-knowledge bound), or
        a φ that is already a Wiener estimate (:func:`lensrec.combined_phi` of tracers); ``n0`` must then be
        omitted.
    notes : sequence of str
        Caveats put before the result's own notes (e.g. the bias treatment applied).

    Returns
    -------
    DelensingResult

    Notes
    -----
    .. warning:: If φ̂ was reconstructed from these same B modes (any label with
       :func:`lensrec.labels.uses_b_modes`: EB, TB, MV, GMV), the measured residual,
       efficiency and A_lens^res are biased low (delensing bias; module docstring and ``result.notes``).

    References
    ----------
    Smith, Hanson, LoVerde, Hirata & Zahn 2012, JCAP 06, 014 (Wiener-filtered templates and their residual).
    """
    from .experiment import load_experiment
    from .spectra import fiducial_spectra

    report = progress if progress is not None else (lambda fraction, message: None)
    experiment = load_experiment(experiment)
    spectra = fiducial_spectra() if spectra is None else spectra
    if not isinstance(phi_filtered, (bool, np.bool_)):
        raise TypeError(f"phi_filtered must be True or False, got {phi_filtered!r}")
    if phi_filtered and n0 is not None:
        raise ValueError("n0 was given with phi_filtered=True: a phi used as given (exact or already filtered) has no "
                         "Wiener filter to build from a noise; give one or the other")  # fmt: skip
    n0_given = n0 is not None
    if hasattr(reconstruction, "phi_alm"):
        phi_alm = reconstruction.phi_alm
        n0 = reconstruction.n0["gradient"] if n0 is None and not phi_filtered else n0
    else:
        phi_alm = reconstruction
        if n0 is None and not phi_filtered:
            raise ValueError("n0 is needed when the reconstruction is given as phi_alm alone (its Gaussian N0 per L)")
    extra_notes = ()
    if isinstance(n1, str):
        if n1 != "analytic":
            raise ValueError(f"n1 must be 'analytic', an array or None, got {n1!r}")
        iterated = hasattr(reconstruction, "settings") and int(reconstruction.settings.get("lensing_iterations", 0))
        if phi_filtered or n0_given:  # no filter, or the caller's n0 is the noise of φ̂
            n1 = None
        elif hasattr(reconstruction, "noise") and not iterated:
            from .analytic_n1 import reconstruction_n1

            report(0.02, "analytic N1 of the reconstruction")
            n1 = reconstruction_n1(reconstruction, spectra, nthreads=nthreads).n1[reconstruction.estimator]["gradient"]
        else:
            n1 = None
            extra_notes = ("the φ Wiener filter used N0 alone: no N1 is available for this reconstruction",)
    report(0.05, "Wiener-filtered E and observed B of the maps")
    e_wiener, b_observed, fields = template_inputs(maps, experiment, spectra, lmax=lmax, mask=mask, nthreads=nthreads)
    lmax = fields.lmax
    phi_wiener = (
        _coefficients(phi_alm, "phi_alm")[0] if phi_filtered else wiener_filter_phi(phi_alm, n0, spectra.phi, n1=n1)
    )
    report(0.3, f"lensing B template ({method})")
    result = delens(
        b_observed,
        e_wiener,
        phi_wiener,
        lmax,
        method=method,
        noise_bb=experiment.noise_spectrum("B", lmax),
        lensed_bb=spectra.lensed["BB"],
        ell_min=ell_min,
        ell_max=ell_max,
        epsilon=epsilon,
        nthreads=nthreads,
    )
    report(1.0, "delensed spectra")
    notes = tuple(notes) + extra_notes
    if notes:
        result = replace(result, notes=notes + tuple(result.notes))
    return result
