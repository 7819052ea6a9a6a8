"""Lensed-gradient spectra for the estimator weights, and the choice of spectra in the weights.

The quadratic estimators respond to lensing through the gradient of the unlensed CMB carried to the lensed
position. Averaged over the other lenses, the non-perturbative response of the lensed temperature T̃ to a
change of φ is set by the cross-correlation of T̃ with the lensed gradient (∇T)~, not by the lensed
spectrum C̃^TT (Lewis, Challinor & Hanson 2011, JCAP 03, 018). Weights built from the lensed-gradient
spectrum C^{T∇T} remove the normalization bias that lensed-C^TT weights leave at high ℓ_max.

Definition (full sky, spin-1 ð on a spin-0 field; notation of :mod:`lensrec.lensed_spectra`)::

    ξ^{T∇T}(β) = ⟨T̃(n₁) (ðT)~(n₂)⟩ = Σ_ℓ (2ℓ+1)/4π √(ℓ(ℓ+1)) C_ℓ^{T∇T} d^ℓ_{10}(β),

so that without lensing C^{T∇T} = C^TT and ξ^{T∇T} = dξ/dβ. Keeping σ²(β) to all orders and C_gl,2 to
second order, as the lensed correlation functions do, the average over Gaussian deflections gives (from the
flat-sky average ⟨exp(i l·Δα)⟩ = exp(−½ l²[σ² + C_gl,2 cos 2ψ]) times the extra factor i l·r̂ of the gradient,
with the Bessel functions J₁, J₃, J₅ of the flat sky written as the Wigner functions d_{10}, d_{2,−1},
d_{3,−2}, d_{01}, d_{−1,2} they approximate and l² → ℓ(ℓ+1))::

    ξ^{T∇T}(β) = Σ_ℓ (2ℓ+1)/4π √(ℓ(ℓ+1)) C_ℓ X²_000 [ d_{10}
                 + ¼ ℓ(ℓ+1) C_gl,2 (d_{01} + d_{2,−1})
                 + (1/16) ℓ²(ℓ+1)² C²_gl,2 (d_{10} + ½ d_{−1,2} + ½ d_{3,−2}) ],

with X²_000 = exp(−ℓ(ℓ+1)σ²(β)/2). The spin-dependent factors exp(O(σ²)) of the full-sky X functions,
below 10⁻⁵ for the ΛCDM σ², are set to 1. The same approximations give the lensed TT correlation function of
Challinor & Lewis 2005 (PRD 71, 103010) in :mod:`lensrec.lensed_spectra`, whose engine (deflection
correlations, heat-kernel interpolation, Gauss–Legendre projection) computes both here. C^{T∇T} is the
d_{10} projection of ξ^{T∇T} divided by √(ℓ(ℓ+1)).

Only the temperature gradient is computed; in the "gradient" weights the polarization spectra stay lensed.
"""

from __future__ import annotations

import hashlib
import math
import warnings

import numpy as np

from ._checks import resolve_nthreads
from ._deprecation import REMOVAL
from .lensed_spectra import (
    DEFAULT_ELL_MARGIN,
    _check_margin,
    _check_phi,
    _check_unlensed,
    _correlation_changes,
    _ell_arrays,
    _lensing_terms,
    deflection_correlations,
)
from .quadrature import gauss_legendre, npoints_for, wigner_d_project

__all__ = [
    "WEIGHTS",
    "DEFAULT_WEIGHTS",
    "lensed_gradient_spectra",
    "parse_weights",
    "resolve_weights",
    "weight_spectra",
]

#: The CMB spectra the estimator weights and responses can use.
WEIGHTS = ("lensed", "unlensed", "gradient")
#: The choice used when none is given (docs/conventions.md, section on estimator weights).
DEFAULT_WEIGHTS = "lensed"


def parse_weights(weights) -> str:
    """Check a weights choice: one of ``"lensed"``, ``"unlensed"``, ``"gradient"``."""
    if not isinstance(weights, str):
        raise TypeError(f"weights must be a string, one of {WEIGHTS}; got {type(weights).__name__}")
    value = weights.strip().lower()
    if value not in WEIGHTS:
        raise ValueError(f"weights must be one of {', '.join(WEIGHTS)}; got {weights!r}")
    return value


def resolve_weights(weights=None, lensed_weights=None, default=None) -> str:
    """The weights choice, honoring the deprecated boolean ``lensed_weights`` (DeprecationWarning).

    A bool passed as ``weights`` (the old positional ``lensed_weights``) is read as ``lensed_weights``.
    ``None`` everywhere gives ``default`` (:data:`DEFAULT_WEIGHTS` unless given).
    """
    if isinstance(weights, (bool, np.bool_)):
        weights, lensed_weights = None, bool(weights)
    if lensed_weights is not None:
        warnings.warn(
            f"lensed_weights is deprecated and will be removed in lensrec {REMOVAL}; use weights='lensed', "
            "'unlensed' or 'gradient'",
            DeprecationWarning,
            stacklevel=3,
        )
        implied = "lensed" if bool(lensed_weights) else "unlensed"
        if weights is not None and parse_weights(weights) != implied:
            raise ValueError(f"lensed_weights={lensed_weights!r} contradicts weights={weights!r}; pass weights only")
        return implied
    return parse_weights((default or DEFAULT_WEIGHTS) if weights is None else weights)


def _gradient_terms(cl):
    """The terms of ξ^{T∇T} − dξ/dβ in the form of :func:`lensrec.lensed_spectra._lensing_terms` (key "G")."""
    _, llp1, norm = _ell_arrays(cl["TT"].size - 1)
    base = norm * np.sqrt(llp1) * cl["TT"]

    def one(s, c2):
        return np.ones_like(s)

    def first(s, c2):
        return c2

    def second(s, c2):
        return c2**2

    quarter, sixteenth = base * llp1 / 4.0, base * llp1**2 / 16.0
    return [
        ("G", 1, 0, base, "expm1", one),
        ("G", 0, 1, quarter, "exp", first),
        ("G", 2, -1, quarter, "exp", first),
        ("G", 1, 0, sixteenth, "exp", second),
        ("G", -1, 2, 0.5 * sixteenth, "exp", second),
        ("G", 3, -2, 0.5 * sixteenth, "exp", second),
    ]


def _gradient_and_lensed_tt(cl, phi, lmax, nthreads):
    """(C^{T∇T}, C̃^TT) from one evaluation of the engine on the same nodes."""
    npoints = npoints_for(cl["TT"].size - 1, phi.size - 1, lmax)
    x, w = gauss_legendre(npoints)
    _, sigma2, cgl2 = deflection_correlations(phi, x, nthreads=nthreads)
    terms = [term for term in _lensing_terms(cl) if term[0] == "T"] + _gradient_terms(cl)
    changes = _correlation_changes(cl, sigma2, cgl2, x, nthreads, terms=terms)
    _, llp1, _ = _ell_arrays(lmax)
    root = np.sqrt(np.where(llp1 > 0, llp1, 1.0))
    gradient = (
        cl["TT"][: lmax + 1]
        + 2.0 * math.pi * wigner_d_project(changes["G"], 1, 0, lmax, x, w, nthreads=nthreads) / root
    )
    lensed = cl["TT"][: lmax + 1] + 2.0 * math.pi * wigner_d_project(changes["T"], 0, 0, lmax, x, w, nthreads=nthreads)
    gradient[:2] = lensed[:2] = 0.0
    return gradient, lensed


def lensed_gradient_spectra(unlensed, phi, lmax, ell_margin=DEFAULT_ELL_MARGIN, nthreads=None):
    """The lensed-gradient temperature spectrum C^{T∇T} on the full sky (module docstring).

    Parameters
    ----------
    unlensed : mapping of str to array_like
        Unlensed ``"TT"``, ``"EE"``, ``"BB"``, ``"TE"`` (µK², from ℓ = 0), e.g. :attr:`lensrec.Spectra.unlensed`.
    phi : array_like
        C_L^φφ (dimensionless), from L = 0.
    lmax : int
        Highest output multipole (≥ 2).
    ell_margin : int, default 2000
        Inputs are used up to ℓ = lmax + ell_margin (see :func:`lensrec.lensed_cmb_spectra`).
    nthreads : int, optional
        Threads for the Wigner-d engine.

    Returns
    -------
    dict of str to ndarray
        ``"TT"``: C^{T∇T} in µK², ℓ = 0 … lmax (ℓ = 0, 1 set to 0).

    Raises
    ------
    TypeError, ValueError
        As :func:`lensrec.lensed_cmb_spectra` (missing, negative, non-finite or too short inputs).

    References
    ----------
    Lewis, Challinor & Hanson 2011, JCAP 03, 018 (lensed-gradient spectra in the estimator response);
    Challinor & Lewis 2005, PRD 71, 103010 (the correlation-function method).

    Examples
    --------
    >>> import lensrec
    >>> s = lensrec.fiducial_spectra()
    >>> g = lensrec.lensed_gradient_spectra(s.unlensed, s.phi, lmax=300, ell_margin=300)
    >>> bool(abs(g["TT"][200] / s.lensed["TT"][200] - 1) < 0.01)
    True
    """
    lmax, ell_margin = _check_margin(lmax, ell_margin)
    cl = _check_unlensed(unlensed, lmax, ell_margin)
    phi = _check_phi(phi, lmax, ell_margin)
    gradient, _ = _gradient_and_lensed_tt(cl, phi, lmax, resolve_nthreads(nthreads))
    return {"TT": gradient}


_CACHE: dict = {}


def _fingerprint(spectra, lmax):
    digest = hashlib.sha1()
    for array in (spectra.phi, *(spectra.unlensed[k] for k in ("TT", "EE", "BB", "TE")), spectra.lensed["TT"]):
        digest.update(np.ascontiguousarray(array, dtype=np.float64).tobytes())
    return digest.hexdigest(), int(lmax)


def weight_spectra(spectra, weights, lmax, nthreads=None) -> dict[str, np.ndarray]:
    """CMB spectra ``"TT"``, ``"EE"``, ``"BB"``, ``"TE"`` (ℓ = 0 … lmax) for the estimator weights.

    ``"lensed"`` and ``"unlensed"`` return the columns of ``spectra``. ``"gradient"`` replaces the lensed TT by
    C^{T∇T}: the table's lensed C^TT plus the difference C^{T∇T} − C̃^TT computed by one evaluation of the
    correlation-function engine (inputs read to min(lmax + 2000, spectra.lmax)); the difference converges
    with the margin faster than either spectrum, and it vanishes exactly when C^φφ = 0. The polarization
    spectra stay lensed. Results are cached per spectra content and lmax.
    """
    weights = parse_weights(weights)
    if weights != "gradient":
        base = spectra.lensed if weights == "lensed" else spectra.unlensed
        return {key: np.array(base[key][: lmax + 1], dtype=np.float64) for key in ("TT", "EE", "BB", "TE")}
    key = _fingerprint(spectra, lmax)
    if key not in _CACHE:
        margin = min(DEFAULT_ELL_MARGIN, spectra.lmax - lmax)
        cl = _check_unlensed(spectra.unlensed, lmax, margin)
        phi = _check_phi(spectra.phi, lmax, margin)
        gradient, lensed = _gradient_and_lensed_tt(cl, phi, lmax, resolve_nthreads(nthreads))
        if len(_CACHE) > 16:
            _CACHE.clear()
        _CACHE[key] = np.asarray(spectra.lensed["TT"][: lmax + 1], dtype=np.float64) + (gradient - lensed)
    out = {k: np.array(spectra.lensed[k][: lmax + 1], dtype=np.float64) for k in ("TT", "EE", "BB", "TE")}
    out["TT"] = np.array(_CACHE[key])
    out["TT"][:2] = spectra.lensed["TT"][:2]
    return out
