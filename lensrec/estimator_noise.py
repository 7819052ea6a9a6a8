# Over 600 lines: responses, N0, covariance and combined labels come from one pass of the quadrature.
"""Exact full-sky responses and Gaussian reconstruction noise (N0) of the quadratic lensing estimators.

The estimators, their response R_L, normalization A_L = 1/R_L and the noise covariance are defined in
:mod:`lensrec.estimator_weights` (module docstring, with Okamoto & Hu 2003 references); every double sum
over (ℓ1, ℓ2) is evaluated exactly with the Gauss–Legendre identity of :mod:`lensrec.quadrature`, in O(ℓ²).

The minimum-variance (MV) combination uses, per L, the inverse of the full N0 covariance of the five
normalized estimators (cross terms included): weights w = C⁻¹1 / (1ᵀC⁻¹1), N0_MV = 1/(1ᵀC⁻¹1), unit response.
Estimators whose N0 is undefined at some L (zero response) are left out of the MV at that L.

Beyond :func:`reconstruction_noise`, :func:`estimator_responses` and :func:`noise_covariance` accept any
estimators (weights) and any source kernels, so an estimator built with one set of weights can be asked for
its response to another source (the curl, unlensed spectra, …) or for its N0 under another total spectrum.
"""

from __future__ import annotations

import functools
from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType

import numpy as np

from ._checks import as_finite_array, as_float, as_int, readonly_copy
from .estimator_weights import (
    FactorTable,
    KernelSums,
    PairKernel,
    QuadraticEstimator,
    quadratic_estimator,
    response_kernel,
    spectrum_name,
)
from .experiment import Experiment, as_experiment
from .filtering import joint_inverse_spectra
from .gradient_spectra import resolve_weights, weight_spectra
from .labels import (
    COMBINED_ESTIMATORS,
    COMPONENTS,
    ESTIMATOR_FIELDS,
    ESTIMATORS,
    FIELDS,
    JOINT_ESTIMATORS,
    parse_components,
    parse_estimators,
)
from .spectra import Spectra, as_spectra

__all__ = [
    "ESTIMATORS",
    "ReconstructionNoise",
    "reconstruction_noise",
    "standard_factors",
    "estimator_responses",
    "noise_covariance",
    "minimum_variance",
]

# the joint estimator ("GMV") and the nine ordered field pairs (p, q) it sums over
(JOINT_ESTIMATOR,) = tuple(JOINT_ESTIMATORS)
JOINT_PAIRS = tuple((p, q) for p in FIELDS for q in FIELDS)
# Imaginary parts of sums that are real by symmetry must cancel to rounding; anything larger is a defect.
_IMAGINARY_TOLERANCE = 1e-9


# ---------------------------------------------------------------------------------------- factors
def standard_factors(
    experiment: Experiment,
    spectra: Spectra,
    lmax: int,
    weights: str | None = None,
    total_prefix: str = "total",
    filter_prefix: str = "inverse",
    spectra_prefix: str = "cmb",
    joint_prefix: str = "joint",
    lensed_weights: bool | None = None,
) -> FactorTable:
    """The factor table lensrec's estimators use.

    ``"cmb:XY"``: CMB spectra in the weights and response (``weights``: lensed, unlensed or lensed-gradient,
    :func:`lensrec.gradient_spectra.weight_spectra`);
    ``"total:XY"``: total spectra C_tot = lensed CMB + beam-deconvolved noise, set to 0 outside the ℓ cuts
    (where every filter vanishes); ``"inverse:X"``: the diagonal filters 1/C^XX_tot (0 outside the cuts);
    ``"joint:XY"``: elements of the inverse 3×3 total covariance C_tot⁻¹ (the joint filter,
    :func:`lensrec.filtering.joint_inverse_spectra`; "joint:TB" and "joint:EB" are zero).

    Parameters
    ----------
    experiment : Experiment
    spectra : Spectra
    lmax : int
        Highest CMB multipole (≤ ``spectra.lmax``).
    weights : {"lensed", "unlensed", "gradient"}, optional
        Spectra in the weights and response (default :data:`lensrec.gradient_spectra.DEFAULT_WEIGHTS`).
    total_prefix, filter_prefix, spectra_prefix, joint_prefix : str
        Name prefixes (change them to hold several sets in one table).
    lensed_weights : bool, optional
        Deprecated: True means ``weights="lensed"``, False ``weights="unlensed"``.
    """
    weights = resolve_weights(weights, lensed_weights)
    lmax = as_int(lmax, "lmax", minimum=2, maximum=spectra.lmax)
    signal = weight_spectra(spectra, weights, lmax)
    total = experiment.total_spectra(spectra, lmax, lensed=True)
    table = FactorTable()
    for key in ("TT", "EE", "BB", "TE"):
        table.add(f"{spectra_prefix}:{key}", as_finite_array(signal[key][: lmax + 1], f"spectra {key}"))
        values = np.where(np.isfinite(total[key]), total[key], 0.0)
        table.add(f"{total_prefix}:{key}", values)
    for key, values in joint_inverse_spectra(total).items():
        table.add(f"{joint_prefix}:{key}", values)
    for field_name in "TEB":
        auto = total[field_name * 2]
        usable = np.isfinite(auto) & (auto > 0)
        inverse = np.zeros(lmax + 1)
        inverse[usable] = 1.0 / auto[usable]
        table.add(f"{filter_prefix}:{field_name}", inverse)
    return table


# ----------------------------------------------------------------------------------- general sums
def _register_noise(sums: KernelSums, a: QuadraticEstimator, b: QuadraticEstimator, total: str) -> tuple[int, int]:
    """Register the two Wick terms of N^{ab} (estimator_weights docstring, item 3)."""
    x, y = a.fields
    z, v = b.fields
    scale = 1.0 / (a.symmetry * b.symmetry)
    first = sums.add(
        a.weight,
        b.weight.conjugate(),
        first=(spectrum_name(total, x, z),),
        second=(spectrum_name(total, y, v),),
        scale=scale,
    )
    second = sums.add(
        a.weight,
        b.weight.swapped().conjugate(),
        first=(spectrum_name(total, x, v),),
        second=(spectrum_name(total, y, z),),
        scale=scale,
    )
    return first, second


def joint_estimator_parts(component: str = "gradient", spectra: str = "cmb") -> dict:
    """The joint (GMV) estimator as a sum over ordered field pairs of jointly filtered fields.

    ḡ^GMV_LM = ½ Σ_{p,q ∈ {T,E,B}} Σ_{ℓ1m1ℓ2m2} (−1)^M (ℓ1 ℓ2 L; m1 m2 −M) [f^pq_{ℓ1Lℓ2}]* X̄^p_ℓ1m1 X̄^q_ℓ2m2 ,

    with X̄ = C_tot⁻¹ X the jointly filtered fields (3×3 total covariance per ℓ, TE correlation included) and
    f^pq the response functions of :func:`lensrec.estimator_weights.response_kernel` for all nine ordered
    pairs (f^BB ∝ C^BB is kept). Returns {(p, q): QuadraticEstimator with weight [f^pq]* on (X̄^p, X̄^q)}
    (symmetry 1; the ½ is applied by the sums below).

    References
    ----------
    Maniyar, Ali-Haïmoud, Carron, Lewis & Madhavacheril 2021, PRD 103, 083524 (generalized minimum-variance
    estimator); Okamoto & Hu 2003, PRD 67, 083002 (the response functions f).
    """
    return {
        (p, q): QuadraticEstimator(
            JOINT_ESTIMATOR, component, response_kernel((p, q), component, spectra).conjugate(), 1
        )
        for p, q in JOINT_PAIRS
    }


def _register_joint_response(sums: KernelSums, component: str, joint: str = "joint") -> list[int]:
    """R^GMV_L = 1/(2(2L+1)) Σ_{pq,ij} [f^pq]* (C⁻¹)^pi_ℓ1 (C⁻¹)^qj_ℓ2 f^ij (the response of ½ Σ f* X̄ X̄)."""
    parts = joint_estimator_parts(component)
    out = []
    for (p, q), estimator in parts.items():
        for i in "TEB":
            first = spectrum_name(joint, p, i)
            if sums.factors.is_zero(first):
                continue
            for j in "TEB":
                second = spectrum_name(joint, q, j)
                if sums.factors.is_zero(second):
                    continue
                source = response_kernel((i, j), component)
                out.append(sums.add(estimator.weight, source, first=(first,), second=(second,), scale=0.5))
    return out


def _register_joint_noise(sums: KernelSums, component: str, filtered: str = "joint") -> list[tuple[int, float]]:
    """Gaussian noise of ḡ^GMV: ¼ Σ over ordered pairs of pairs of the two Wick terms, filtered-field spectra.

    ``filtered`` names the spectra of the filtered fields, ⟨X̄^p X̄^r*⟩ = (C⁻¹ C_data C⁻¹)^pr; when the data
    have the filter's total spectra that is C⁻¹ itself ("joint"). Returns (sum index, multiplicity) with
    multiplicity 2 for the off-diagonal pairs of pairs (their Hermitian partners give the complex conjugate,
    so twice the real part is used).
    """
    parts = list(joint_estimator_parts(component).values())
    out = []
    for a_index, a in enumerate(parts):
        for b_index in range(a_index, len(parts)):
            b = parts[b_index]
            x, y = a.fields
            z, v = b.fields
            weight = 1.0 if a_index == b_index else 2.0
            names = (
                (spectrum_name(filtered, x, z), spectrum_name(filtered, y, v), b.weight.conjugate()),
                (spectrum_name(filtered, x, v), spectrum_name(filtered, y, z), b.weight.swapped().conjugate()),
            )
            for first, second, right in names:
                if sums.factors.is_zero(first) or sums.factors.is_zero(second):
                    continue
                out.append((sums.add(a.weight, right, first=(first,), second=(second,), scale=0.25), weight))
    return out


def estimator_responses(estimators, sources, factors: FactorTable, lmax: int, lmax_L: int, nthreads=None):
    """Responses R_L of unnormalized estimators to source kernels: ⟨ḡ_LM⟩ = R_L ψ_LM.

    Parameters
    ----------
    estimators : sequence of QuadraticEstimator
    sources : sequence of PairKernel
        One source kernel per estimator, on the estimator's field pair (e.g.
        ``response_kernel("EB", "curl")`` to ask a gradient estimator for its curl response).
    factors : FactorTable
    lmax, lmax_L : int
        Highest CMB multipole in the sums and highest L returned.
    nthreads : int, optional

    Returns
    -------
    list of complex ndarray, shape (lmax_L+1,)
        R_L = 1/(η(2L+1)) Σ W f (real for physical pairs; complex in general).
    """
    estimators, sources = list(estimators), list(sources)
    if len(estimators) != len(sources):
        raise ValueError(f"need one source per estimator, got {len(estimators)} estimators and {len(sources)} sources")
    sums = KernelSums(factors, lmax, lmax, lmax_L, nthreads)
    for estimator, source in zip(estimators, sources, strict=True):
        if not isinstance(estimator, QuadraticEstimator) or not isinstance(source, PairKernel):
            raise TypeError("estimators must be QuadraticEstimator and sources PairKernel objects")
        if source.fields != estimator.fields:
            raise ValueError(f"source fields {source.fields} differ from the estimator's {estimator.fields}")
        sums.add(estimator.weight, source, scale=1.0 / estimator.symmetry)
    return sums.evaluate()


def noise_covariance(estimators, factors: FactorTable, lmax: int, lmax_L: int, total: str = "total", nthreads=None):
    """Gaussian noise covariance N^{ab}_L of unnormalized estimators (divide by R^a R^b for N0).

    Parameters
    ----------
    estimators : sequence of QuadraticEstimator
    factors : FactorTable
        Must hold the total spectra ``"<total>:TT"``, ``"<total>:EE"``, ``"<total>:BB"``, ``"<total>:TE"``.
    lmax, lmax_L : int
    total : str
        Prefix of the total spectra of the data: pass another set to get the noise of the same weights under
        a different sky or noise level.
    nthreads : int, optional

    Returns
    -------
    complex ndarray, shape (n, n, lmax_L+1)
    """
    estimators = list(estimators)
    sums = KernelSums(factors, lmax, lmax, lmax_L, nthreads)
    index = {}
    for i, a in enumerate(estimators):
        for j in range(i, len(estimators)):
            index[i, j] = _register_noise(sums, a, estimators[j], total)
    values = sums.evaluate()
    out = np.zeros((len(estimators), len(estimators), lmax_L + 1), dtype=np.complex128)
    for (i, j), (p, q) in index.items():
        out[i, j] = values[p] + values[q]
        out[j, i] = np.conj(out[i, j])
    return out


def minimum_variance(covariance) -> tuple[np.ndarray, np.ndarray]:
    """Per-L minimum-variance combination of unit-response estimators.

    Parameters
    ----------
    covariance : array_like, shape (n, n, nL)
        N0 covariance of normalized estimators; estimators with a non-finite or non-positive diagonal at
        some L are excluded there.

    Returns
    -------
    n0 : ndarray, shape (nL,)
        1/(1ᵀC⁻¹1) (NaN where no estimator is usable).
    weights : ndarray, shape (n, nL)
        C⁻¹1/(1ᵀC⁻¹1), summing to one (0 for excluded estimators, NaN where none is usable).

    References
    ----------
    Okamoto & Hu 2003, PRD 67, 083002, §III (minimum-variance combination with the full noise covariance).
    """
    cov = np.asarray(covariance, dtype=np.float64)
    if cov.ndim != 3 or cov.shape[0] != cov.shape[1]:
        raise ValueError(f"covariance must have shape (n, n, nL), got {cov.shape}")
    n, _, n_l = cov.shape
    diagonal = np.array([cov[i, i] for i in range(n)])
    usable = np.isfinite(diagonal) & (diagonal > 0)
    for i in range(n):
        for j in range(n):
            usable[i] &= np.isfinite(cov[i, j]) | ~usable[j]
    n0 = np.full(n_l, np.nan)
    weights = np.full((n, n_l), np.nan)
    patterns = {}
    for ell in range(n_l):
        patterns.setdefault(tuple(usable[:, ell]), []).append(ell)
    for pattern, ells in patterns.items():
        keep = np.flatnonzero(pattern)
        if keep.size == 0:
            continue
        ells = np.array(ells)
        block = np.moveaxis(cov[np.ix_(keep, keep, ells)], -1, 0)  # (nL, k, k)
        scale = np.sqrt(np.einsum("lii->li", block))  # correlation form keeps the solve well conditioned
        corr = block / (scale[:, :, None] * scale[:, None, :])
        rhs = 1.0 / scale
        try:
            solved = np.linalg.solve(corr, rhs[..., None])[..., 0]
        except np.linalg.LinAlgError:
            solved = np.einsum("lij,lj->li", np.linalg.pinv(corr), rhs)
        inverse_one = solved / scale  # C⁻¹ 1
        total = inverse_one.sum(axis=1)
        n0[ells] = 1.0 / total
        w = np.zeros((n, ells.size))
        w[keep] = (inverse_one / total[:, None]).T
        weights[:, ells] = w
    return n0, weights


# ---------------------------------------------------------------------------------------- result
_frozen_array = functools.partial(readonly_copy, dtype=np.float64)


@dataclass(frozen=True, eq=False)
class ReconstructionNoise:
    """Responses, N0 and their covariance for a set of quadratic estimators (read-only).

    Attributes
    ----------
    L : ndarray
        0 … lmax_L.
    n0 : mapping label → component → ndarray
        Gaussian N0 of the normalized estimators in C_L^φφ units (C_L^ΩΩ units for the curl), NaN for L < 2
        and wherever the response vanishes.
    response : mapping label → component → ndarray
        R_L of the unnormalized estimator to its own source (A_L = 1/R_L); for "MV", 1/N0_MV (the MV
        combination is optimal, so its normalization equals its noise).
    covariance : mapping component → ndarray, shape (n_est, n_est, lmax_L+1)
        N0 cross-covariance of the normalized estimators listed in ``covariance_labels``.
    covariance_labels : tuple of str
    mv_weights : mapping component → ndarray, shape (n_est, lmax_L+1)
        Per-L MV weights over ``covariance_labels`` (only when "MV" was requested).
    combined_weights : mapping label → component → ndarray, shape (n_est, lmax_L+1)
        Per-L weights over ``covariance_labels`` of every requested combined label (of
        :data:`lensrec.labels.COMBINED_ESTIMATORS`; 0 for the estimators it does not combine).
    experiment : Experiment
    phi_spectrum : ndarray
        C_L^φφ of the spectra used (for :meth:`lensing_snr`).
    settings : mapping
        lmax, lmax_L, weights (and the old lensed_weights flag), estimators, components, quadrature nodes.
    """

    L: np.ndarray
    n0: Mapping
    response: Mapping
    covariance: Mapping
    covariance_labels: tuple
    mv_weights: Mapping
    experiment: Experiment
    phi_spectrum: np.ndarray
    settings: Mapping
    combined_weights: Mapping = field(default_factory=lambda: MappingProxyType({}))

    def lensing_snr(self, sky_fraction=None, L_min=2, L_max=None) -> dict[str, float]:
        """Fisher signal-to-noise of the lensing power spectrum for each estimator.

        (S/N)² = Σ_{L=L_min}^{L_max} f_sky (2L+1)/2 · (C_L^φφ / (C_L^φφ + N0_L))² (common practice: Gaussian
        band-power errors, reconstruction noise N0 only).

        Parameters
        ----------
        sky_fraction : float, optional
            f_sky in (0, 1]; default: the experiment's ``sky_fraction``.
        L_min, L_max : int
            Inclusive range (2 ≤ L_min ≤ L_max ≤ lmax_L; default L_max = lmax_L).

        Returns
        -------
        dict label → S/N (gradient component).
        """
        if "gradient" not in self.settings["components"]:
            raise ValueError("lensing_snr needs the gradient component; it was not computed")
        f_sky = self.experiment.sky_fraction if sky_fraction is None else sky_fraction
        f_sky = as_float(f_sky, "sky_fraction", 0.0, 1.0, strict_minimum=True)
        lmax_L = int(self.L[-1])
        L_min = as_int(L_min, "L_min", minimum=2, maximum=lmax_L)
        L_max = lmax_L if L_max is None else as_int(L_max, "L_max", minimum=L_min, maximum=lmax_L)
        ell = np.arange(L_min, L_max + 1)
        signal = self.phi_spectrum[ell]
        out = {}
        for label, parts in self.n0.items():
            noise = parts["gradient"][ell]
            with np.errstate(invalid="ignore", divide="ignore"):
                ratio = np.where(np.isfinite(noise), signal / (signal + noise), 0.0)
            out[label] = float(np.sqrt(np.sum(f_sky * (2 * ell + 1) / 2.0 * ratio**2)))
        return out

    def to_dict(self, include_covariance: bool = False) -> dict:
        """Plain lists and dicts for JSON (NaN stays NaN; ``lensrec.io.write_json`` turns it into null)."""
        document = {
            "L": self.L.tolist(),
            "n0": {label: {c: v.tolist() for c, v in parts.items()} for label, parts in self.n0.items()},
            "response": {label: {c: v.tolist() for c, v in parts.items()} for label, parts in self.response.items()},
            "settings": dict(self.settings),
            "experiment": self.experiment.to_dict(),
        }
        if self.mv_weights:
            document["mv_weights"] = {
                "labels": list(self.covariance_labels),
                **{c: v.tolist() for c, v in self.mv_weights.items()},
            }
        if include_covariance:
            document["covariance"] = {
                "labels": list(self.covariance_labels),
                **{c: v.tolist() for c, v in self.covariance.items()},
            }
        return document


# --------------------------------------------------------------------------------------- main entry
def reconstruction_noise(
    experiment,
    spectra=None,
    estimators=ESTIMATORS,
    lmax_L=None,
    lensed_weights=None,
    nthreads=None,
    components=COMPONENTS,
    weights=None,
) -> ReconstructionNoise:
    """Exact full-sky responses and Gaussian N0 of the quadratic estimators, their covariance and the MV.

    Parameters
    ----------
    experiment : Experiment or str
        The survey (noise, beam, ℓ cuts), or the name/path of an experiment TOML file.
    spectra : Spectra, optional
        Theory spectra (default: the embedded fiducial cosmology). Must reach the experiment's largest ℓ_max.
    estimators : sequence of str or str
        Any of "TT", "TE", "EE", "TB", "EB", "MV" (default all); a comma-separated string also works. "MV"
        combines all five, or those of them that are defined when a field has no usable multipole.
    lmax_L : int, optional
        Highest lensing multipole (default and maximum: the CMB ℓ_max, the larger of the experiment's
        temperature and polarization ℓ_max).
    lensed_weights : bool, optional
        Deprecated (use ``weights``): True means "lensed", False "unlensed".
    nthreads : int, optional
        Threads (default: ``LENSREC_NTHREADS`` or all cores).
    components : sequence of str
        "gradient" and/or "curl" (default both).
    weights : {"lensed", "unlensed", "gradient"}, optional
        CMB spectra in the weights and the response: lensed C (common practice), unlensed C, or the
        lensed-gradient C^{T∇T} of Lewis, Challinor & Hanson 2011 (JCAP 03, 018) for TT with lensed
        polarization (:mod:`lensrec.gradient_spectra`). Default :data:`lensrec.gradient_spectra.DEFAULT_WEIGHTS`.
        The filters always use the total (lensed + noise) spectra.

    Returns
    -------
    ReconstructionNoise

    Raises
    ------
    TypeError, ValueError
        Unknown estimator (with the nearest label), lmax_L outside [2, CMB ℓ_max], spectra too short or
        non-finite, a requested estimator whose field has no usable multipole.

    References
    ----------
    Okamoto & Hu 2003, PRD 67, 083002 (full-sky estimators, §III); Hu & Okamoto 2002, ApJ 574, 566.

    Examples
    --------
    >>> import lensrec
    >>> e = lensrec.Experiment(name="demo", noise_temperature=1.0, beam_fwhm=1.0,
    ...                        ell_max_temperature=1000, ell_max_polarization=1000)
    >>> result = lensrec.reconstruction_noise(e, estimators=("EB", "MV"), lmax_L=500)
    >>> bool(result.n0["MV"]["gradient"][100] <= result.n0["EB"]["gradient"][100])
    True
    """
    weights = resolve_weights(weights, lensed_weights)
    experiment, spectra = as_experiment(experiment), as_spectra(spectra)
    labels = parse_estimators(estimators)
    components = parse_components(components)
    lmax = max(experiment.ell_max_temperature, experiment.ell_max_polarization)
    if spectra.lmax < lmax:
        raise ValueError(
            f"spectra reach only l = {spectra.lmax} but the experiment uses l up to {lmax}; "
            "lower the experiment's ell_max or pass spectra computed to higher l"
        )
    lmax_L = lmax if lmax_L is None else as_int(lmax_L, "lmax_L", minimum=2)
    if lmax_L > lmax:
        raise ValueError(
            f"lmax_L={lmax_L} exceeds the CMB l_max={lmax} of experiment {experiment.name!r}; choose lmax_L <= {lmax}"
        )
    for key in ("TT", "EE", "BB", "TE"):
        for which in (spectra.lensed, spectra.unlensed):
            as_finite_array(which[key][: lmax + 1], f"spectra {key}")
    factors = standard_factors(experiment, spectra, lmax, weights)
    wanted = set(labels).union(*(COMBINED_ESTIMATORS.get(label, ()) for label in labels))
    base = tuple(label for label in ESTIMATOR_FIELDS if label in wanted)
    usable = []
    for label in base:
        cut = [f for f in ESTIMATOR_FIELDS[label] if factors.is_zero(f"inverse:{f}")]
        if not cut:
            usable.append(label)
        elif label in labels:  # named explicitly: its N0 is undefined, say so
            raise ValueError(
                f"estimator {label} has no usable multipole of {cut[0]}: every l of {cut[0]} is cut "
                f"(ell_min={experiment.ell_min}, ell_max={experiment.ell_max(cut[0])}, "
                f"spectra to l={spectra.lmax}); drop {label} from estimators"
            )
    base = tuple(usable)  # a combination combines those of its estimators that are defined
    if not base and (JOINT_ESTIMATOR not in labels or all(factors.is_zero(f"inverse:{f}") for f in "TEB")):
        raise ValueError("no estimator has usable multipoles: every field is cut")

    sums = KernelSums(factors, lmax, lmax, lmax_L, nthreads)
    registry = {}
    for component in components:
        est = [quadratic_estimator(label, component) for label in base]
        registry[component, "response"] = [
            sums.add(e.weight, response_kernel(e.fields, component), scale=1.0 / e.symmetry) for e in est
        ]
        registry[component, "noise"] = {
            (i, j): _register_noise(sums, est[i], est[j], "total")
            for i in range(len(base))
            for j in range(i, len(base))
        }
        if JOINT_ESTIMATOR in labels:
            registry[component, "joint response"] = _register_joint_response(sums, component)
            registry[component, "joint noise"] = _register_joint_noise(sums, component)
    values = sums.evaluate()

    L = np.arange(lmax_L + 1)
    low = L < 2
    n0, response, covariance, mv_weights, combined_weights = {}, {}, {}, {}, {}
    for component in components:
        responses = np.array([values[k] for k in registry[component, "response"]]).reshape(len(base), lmax_L + 1)
        _check_real(responses, np.abs(responses), "response")
        responses = responses.real
        noise = np.zeros((len(base), len(base), lmax_L + 1), dtype=np.complex128)
        for (i, j), (p, q) in registry[component, "noise"].items():
            noise[i, j] = values[p] + values[q]
            noise[j, i] = np.conj(noise[i, j])
        diag = np.abs(np.einsum("iil->il", noise))
        _check_real(noise, np.sqrt(diag[:, None] * diag[None, :]), "noise covariance")
        noise = noise.real
        with np.errstate(divide="ignore", invalid="ignore"):
            defined = (responses > 0) & ~low[None, :]
            norm = np.where(defined, 1.0 / np.where(defined, responses, 1.0), np.nan)
            cov = noise * norm[:, None, :] * norm[None, :, :]
        covariance[component] = _frozen_array(cov)
        for i, label in enumerate(base):
            if label in labels:
                n0.setdefault(label, {})[component] = _frozen_array(cov[i, i])
                response.setdefault(label, {})[component] = _frozen_array(np.where(low, np.nan, responses[i]))
        for label in labels:
            if label not in COMBINED_ESTIMATORS:
                continue
            index = [i for i, pair in enumerate(base) if pair in COMBINED_ESTIMATORS[label]]
            part = cov[np.ix_(index, index)]
            combined_n0, combination = minimum_variance(np.where(np.isnan(part), np.inf, part))
            combined_n0[low] = np.nan
            combination[:, low] = np.nan
            n0.setdefault(label, {})[component] = _frozen_array(combined_n0)
            with np.errstate(divide="ignore"):
                response.setdefault(label, {})[component] = _frozen_array(1.0 / combined_n0)
            full = np.zeros((len(base), lmax_L + 1))
            full[index] = combination
            full[:, low] = np.nan
            combined_weights.setdefault(label, {})[component] = _frozen_array(full)
            if label == "MV":  # MV combines every defined estimator: its weights run over covariance_labels
                mv_weights[component] = _frozen_array(combination)
        if JOINT_ESTIMATOR in labels:
            joint_response = sum(values[k] for k in registry[component, "joint response"])
            _check_real(joint_response, np.abs(joint_response), "joint response")
            joint_response = joint_response.real
            joint_noise = np.zeros(lmax_L + 1, dtype=np.complex128)
            for k, multiplicity in registry[component, "joint noise"]:
                joint_noise += values[k] if multiplicity == 1 else 2.0 * values[k].real
            _check_real(joint_noise, np.abs(joint_noise), "joint noise")
            with np.errstate(divide="ignore", invalid="ignore"):
                defined = (joint_response > 0) & ~low
                joint_n0 = np.where(defined, joint_noise.real / np.where(defined, joint_response, 1.0) ** 2, np.nan)
            n0.setdefault(JOINT_ESTIMATOR, {})[component] = _frozen_array(joint_n0)
            response.setdefault(JOINT_ESTIMATOR, {})[component] = _frozen_array(np.where(low, np.nan, joint_response))
    ordered = {label: MappingProxyType(n0[label]) for label in labels}
    settings = {
        "lmax": lmax,
        "lmax_L": lmax_L,
        "weights": weights,
        "lensed_weights": weights == "lensed",
        "estimators": list(labels),
        "components": list(components),
        "quadrature_points": sums.last_counts["npoints"],
        "wigner_series": sums.last_counts["series"],
        "projections": sums.last_counts["projections"],
    }
    return ReconstructionNoise(
        L=_frozen_array(L),
        n0=MappingProxyType(ordered),
        response=MappingProxyType({label: MappingProxyType(response[label]) for label in labels}),
        covariance=MappingProxyType(covariance),
        covariance_labels=tuple(base),
        mv_weights=MappingProxyType(mv_weights),
        combined_weights=MappingProxyType({k: MappingProxyType(v) for k, v in combined_weights.items()}),
        experiment=experiment,
        phi_spectrum=_frozen_array(spectra.phi[: lmax_L + 1]),
        settings=MappingProxyType(settings),
    )


def _check_real(values: np.ndarray, scale: np.ndarray, what: str) -> None:
    """Sums that are real by symmetry must have negligible imaginary parts; otherwise say so loudly."""
    with np.errstate(invalid="ignore"):
        bad = np.abs(values.imag) > _IMAGINARY_TOLERANCE * np.maximum(scale, np.finfo(float).tiny)
    bad &= np.abs(values.imag) > 1e-300
    if np.any(bad[..., 2:]):
        raise RuntimeError(
            f"internal error: the {what} has a non-negligible imaginary part "
            f"(max {np.max(np.abs(values.imag)):.3g}); please report it"
        )
