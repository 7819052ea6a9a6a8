r"""Curved-sky quadratic-estimator reconstruction of the lensing potential φ (and the curl Ω) from maps.

The estimators are those of :mod:`lensrec.estimator_weights` (TT, TE, EE, TB, EB; weights [f^XY]* of
Okamoto & Hu 2003, PRD 67, 083002), evaluated in position space as products of filtered maps and
normalized with the exact full-sky responses of :mod:`lensrec.estimator_noise`.

The unnormalized estimates ḡ are evaluated in position space by :mod:`lensrec.estimator_engine` (its
docstring gives the form, the transform counts and the leg order of mixed pairs); the mean-field is in
:mod:`lensrec.mean_field_average`. Both are re-exported here.

Normalization: φ̂_LM = A_L ḡ_LM with A_L = 1/R_L from :func:`lensrec.reconstruction_noise` (full sky,
lensed weights by default); the MV estimate is Σ_i w_i(L) φ̂^i_LM with the MV weights of the N0
covariance. On a masked sky the same full-sky normalization is used, so φ̂ ≈ w²φ locally; correct
spectra with the mask moments (:mod:`lensrec.power`) and subtract the mean-field
(:func:`mean_field`). L < 2 is set to zero.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType

import numpy as np

from ._checks import as_int
from ._deprecation import deprecated_property, renamed_arguments
from .estimator_engine import (  # noqa: F401  (re-exported: the engine lived here)
    _POSITION_LABELS,
    BASE_ESTIMATORS,
    QuadraticEstimates,
    _check_label,
    _check_labels,
    _readonly,
    quadratic_estimates,
)
from .estimator_noise import JOINT_ESTIMATOR, ReconstructionNoise, reconstruction_noise
from .estimator_weights import COMPONENTS
from .experiment import Experiment, load_experiment
from .filtering import FieldFilter, FilteredFields, IsotropicFilter  # noqa: F401  (importable from here)
from .gradient_spectra import resolve_weights
from .harmonics import ell_of_alm, nalm, npix_to_nside
from .labels import COMBINED_ESTIMATORS, ESTIMATORS
from .mean_field_average import MeanField, _check_mean_field, mean_field
from .spectra import Spectra, fiducial_spectra

__all__ = [
    "ESTIMATORS",
    "QuadraticEstimates",
    "Reconstruction",
    "MeanField",
    "quadratic_estimates",
    "reconstruct_filtered",
    "reconstruct",
    "InputComparison",
    "compare_with_input",
    "mean_field",
]


# ------------------------------------------------------------------------------------------- result
@dataclass(frozen=True, eq=False)
class Reconstruction:
    """A normalized quadratic-estimator reconstruction (all arrays read-only).

    Attributes
    ----------
    phi_alm : complex ndarray, shape (nalm(lmax_L),)
        φ̂_LM (dimensionless), response one to the input φ on the full sky; zero for L < 2.
    curl_alm : complex ndarray
        Ω̂_LM from the curl weights (a null test: no curl signal is expected from lensing).
    estimator : str
        "TT", "TE", "EE", "TB", "EB", "MV" or "GMV".
    lmax_L : int
    n0 : mapping component → ndarray
        Analytic Gaussian N0 of ``phi_alm`` ("gradient") and ``curl_alm`` ("curl"), C_L units, NaN below L = 2.
    response : mapping component → ndarray
        R_L of the unnormalized estimator (A_L = 1/R_L); for "MV", 1/N0_MV (the convention of
        :class:`lensrec.ReconstructionNoise`).
    unnormalized : mapping label → mapping component → ndarray
        The ḡ_LM that were combined (the five estimators for "MV").
    mv_weights : mapping component → ndarray or None
        For "MV": per-L weights of the five normalized estimators (shape (5, lmax_L + 1)).
    noise : ReconstructionNoise
        The full noise calculation used for the normalization.
    mask_moments : mapping or None
        ⟨wⁿ⟩ of the mask of the first input (None on the full sky).
    mean_field_subtracted : bool
    settings : mapping
        Estimator, lmax, lmax_L, weights, grid, transform counts, filter settings.
    """

    phi_alm: np.ndarray
    curl_alm: np.ndarray
    estimator: str
    lmax_L: int
    n0: Mapping
    response: Mapping
    unnormalized: Mapping
    mv_weights: Mapping | None
    noise: ReconstructionNoise
    mask_moments: Mapping | None
    mean_field_subtracted: bool
    settings: Mapping

    # the British spelling answers until 0.2 with a DeprecationWarning
    unnormalised = deprecated_property("unnormalized", "unnormalised")

    @property
    def L(self) -> np.ndarray:
        """0 … lmax_L."""
        return np.arange(self.lmax_L + 1)

    def alm(self, component: str = "gradient") -> np.ndarray:
        """``phi_alm`` for "gradient", ``curl_alm`` for "curl"."""
        if component not in COMPONENTS:
            raise ValueError(f"component must be one of {COMPONENTS}, got {component!r}")
        return self.phi_alm if component == "gradient" else self.curl_alm


# ------------------------------------------------------------------------------------ normalization
def _check_filter_kind(estimator: str, *inputs) -> None:
    """The joint estimator needs jointly filtered fields, the others per-field filtered ones (their
    normalizations assume it); a mismatch would silently give a wrongly normalized estimate."""
    for item in inputs:
        if item is None or not isinstance(item, FilteredFields):
            continue
        if estimator == JOINT_ESTIMATOR and not item.joint:
            raise ValueError(
                f"estimator {JOINT_ESTIMATOR} needs jointly filtered fields (FilteredFields.joint=True, e.g. "
                "IsotropicFilter(..., joint=True)); these were filtered field by field"
            )
        if estimator != JOINT_ESTIMATOR and item.joint:
            raise ValueError(
                f"estimator {estimator} needs fields filtered field by field (joint=False); these were filtered "
                f"jointly, which only the {JOINT_ESTIMATOR} estimator is normalized for"
            )


@renamed_arguments(symmetrise="symmetrize")
def reconstruct_filtered(
    first: FilteredFields,
    experiment,
    second: FilteredFields | None = None,
    spectra: Spectra | None = None,
    estimator: str | None = None,
    lmax_L: int | None = None,
    mean_field: MeanField | None = None,
    lensed_weights: bool | None = None,
    noise: ReconstructionNoise | None = None,
    nthreads: int | None = None,
    symmetrize: bool = False,
    weights: str | None = None,
) -> Reconstruction:
    """Normalized reconstruction from filtered fields (one input, or a mixed pair [a, b]).

    Parameters
    ----------
    first : FilteredFields
        Input a (first field of the label).
    experiment : Experiment or str
        The experiment whose full-sky response normalizes the estimate (for an :class:`IsotropicFilter`,
        its ``experiment`` attribute).
    second : FilteredFields, optional
        Input b (second field of the label); default ``first``.
    spectra : Spectra, optional
        Theory spectra (weights, total spectra, response); default the fiducial cosmology.
    estimator : {'TT', 'TE', 'EE', 'TB', 'EB', 'MV', 'GMV'}, optional
        "GMV" needs jointly filtered fields (``joint=True``), the others per-field filtered ones. Default:
        "GMV" for jointly filtered fields, "MV" otherwise.
    lmax_L : int, optional
        Highest L (default and maximum: the fields' lmax).
    mean_field : MeanField, optional
        Subtracted from the normalized estimate.
    lensed_weights : bool, optional
        Deprecated (use ``weights``): True means "lensed", False "unlensed".
    noise : ReconstructionNoise, optional
        A precomputed :func:`lensrec.reconstruction_noise` result for the same experiment, spectra, lmax_L
        and weights (it must contain the estimator, and all five for "MV"); saves recomputing it.
    nthreads : int, optional
    symmetrize : bool
        For a mixed pair: the symmetrized φ̂{a, b} = ½ (φ̂[a, b] + φ̂[b, a]) in one pass (see
        :func:`lensrec.reconstruction.quadratic_estimates`), as realization-dependent N0 and N1 need it.
    weights : {"lensed", "unlensed", "gradient"}, optional
        CMB spectra in the weights and the response (see :func:`lensrec.reconstruction_noise`); the filters
        keep the lensed spectra plus noise.

    Returns
    -------
    Reconstruction

    References
    ----------
    Okamoto & Hu 2003, PRD 67, 083002, §III (normalization and minimum-variance combination).
    """
    weights = resolve_weights(weights, lensed_weights)
    if not isinstance(first, FilteredFields):
        raise TypeError(f"first must be FilteredFields, got {type(first).__name__}")
    if estimator is None:
        estimator = JOINT_ESTIMATOR if first.joint else "MV"
    estimator = _check_label(estimator)
    experiment = load_experiment(experiment)
    if not isinstance(experiment, Experiment):
        raise TypeError(f"experiment must be an Experiment, got {type(experiment).__name__}")
    largest = max(experiment.ell_max_temperature, experiment.ell_max_polarization)
    if largest > first.lmax:
        raise ValueError(
            f"the experiment uses l up to {largest} but the filtered fields stop at lmax={first.lmax}; "
            "normalize with the experiment the filter used (IsotropicFilter.experiment)"
        )
    if lmax_L is None:
        lmax_L = largest
    lmax_L = as_int(lmax_L, "lmax_L", minimum=2)
    if lmax_L > largest:
        raise ValueError(
            f"lmax_L={lmax_L} exceeds the CMB band limit lmax={largest} of the filtered maps; choose "
            f"lmax_L <= {largest} (or filter to a higher lmax)"
        )
    mean_field = _check_mean_field(mean_field, estimator, lmax_L)
    spectra = fiducial_spectra() if spectra is None else spectra
    combined = estimator in COMBINED_ESTIMATORS
    labels = tuple(COMBINED_ESTIMATORS[estimator]) if combined else (estimator,)
    _check_filter_kind(estimator, first, second)
    if noise is None:
        noise = reconstruction_noise(
            experiment,
            spectra,
            estimators=labels + (estimator,) if combined else labels,
            lmax_L=lmax_L,
            weights=weights,
            nthreads=nthreads,
        )
    elif not isinstance(noise, ReconstructionNoise):
        raise TypeError(f"noise must be a ReconstructionNoise, got {type(noise).__name__}")
    if int(noise.L[-1]) != lmax_L or any(label not in noise.n0 for label in labels + (estimator,)):
        raise ValueError(
            f"noise must hold {estimator} (and its parts) to lmax_L={lmax_L}; got estimators "
            f"{list(noise.n0)} to lmax_L={int(noise.L[-1])}"
        )
    estimates = quadratic_estimates(first, second, labels, lmax_L, spectra, weights, nthreads, symmetrize=symmetrize)

    ell = ell_of_alm(lmax_L)
    low = ell < 2
    out = {}
    for component in COMPONENTS:
        parts = estimates.gradient if component == "gradient" else estimates.curl
        if combined:
            weights = noise.combined_weights[estimator][component]
            order = list(noise.covariance_labels)
            total = np.zeros(nalm(lmax_L), dtype=np.complex128)
            for label in labels:
                response = noise.response[label][component]
                with np.errstate(divide="ignore", invalid="ignore"):
                    scale = np.where(
                        np.isfinite(response) & (response > 0), weights[order.index(label)] / response, 0.0
                    )
                scale = np.nan_to_num(scale, nan=0.0)
                total += parts[label] * scale[ell]
        else:
            response = noise.response[estimator][component]
            with np.errstate(divide="ignore", invalid="ignore"):
                scale = np.where(np.isfinite(response) & (response > 0), 1.0 / response, 0.0)
            total = parts[estimator] * scale[ell]
        total[low] = 0.0
        if mean_field is not None:
            total = total - mean_field.alm(component)
        out[component] = total

    settings = dict(estimates.settings)
    settings.update(
        {
            "estimator": estimator,
            "experiment": experiment.to_dict(),
            "spectra": dict(spectra.metadata),
            "filter": dict(first.settings),
            "mixed_inputs": not estimates.shared,
            "mean_field_count": None if mean_field is None else mean_field.count,
        }
    )
    return Reconstruction(
        phi_alm=_readonly(out["gradient"]),
        curl_alm=_readonly(out["curl"]),
        estimator=estimator,
        lmax_L=lmax_L,
        n0=MappingProxyType({c: noise.n0[estimator][c] for c in COMPONENTS}),
        response=MappingProxyType({c: noise.response[estimator][c] for c in COMPONENTS}),
        unnormalized=MappingProxyType(
            {
                label: MappingProxyType({"gradient": estimates.gradient[label], "curl": estimates.curl[label]})
                for label in labels
            }
        ),
        mv_weights=MappingProxyType(dict(noise.mv_weights)) if estimator == "MV" else None,
        noise=noise,
        mask_moments=first.mask_moments,
        mean_field_subtracted=mean_field is not None,
        settings=MappingProxyType(settings),
    )


def reconstruct(
    maps,
    experiment,
    spectra: Spectra | None = None,
    estimator: str = "GMV",
    lmax_L: int | None = None,
    mask=None,
    mean_field: MeanField | None = None,
    lmax: int | None = None,
    nthreads: int | None = None,
    lensed_weights: bool | None = None,
    field_filter: FieldFilter | None = None,
    lensing_iterations: int = 0,
    progress=None,
    cancel=None,
    jacobi_iterations: int | str = "auto",
    filter: str = "isotropic",
    noise=None,
    maps_masked: bool = False,
    cg_tolerance: float | None = None,
    cg_max_iterations: int | None = None,
    cg_progress=None,
    weights: str | None = None,
) -> Reconstruction:
    """Reconstruct the lensing potential φ (and the curl Ω) from observed T, Q, U maps.

    Filters the maps (:class:`lensrec.filtering.IsotropicFilter` unless ``field_filter`` is given), forms
    the quadratic estimate in position space and normalizes it with the exact full-sky response.

    Parameters
    ----------
    maps : array, shape (3, 12·nside²)
        Observed T, Q, U in µK (HEALPix RING), e.g. ``lensrec.simulate_sky(...).maps``.
    experiment : Experiment or str
        Noise, beam and multipole cuts (or a shipped name / TOML path).
    spectra : Spectra, optional
        Theory spectra (default: the fiducial cosmology).
    estimator : {'TT', 'TE', 'EE', 'TB', 'EB', 'MV', 'GMV'}
        "GMV" (the joint estimator: T, E, B filtered together with the TE correlation, one spin-1 estimate;
        Maniyar et al. 2021, PRD 103, 083524) or "MV" (the five pair estimators combined with their full N0
        covariance) or one pair. Default "GMV": unbiased on full-sky simulations and its N0 is at most the
        MV's at every L, for one spin-1 analysis instead of five.
    lmax_L : int, optional
        Highest lensing multipole (default and maximum: the CMB lmax).
    mask : array, optional
        Apodized weights in [0, 1] on the maps' pixels, applied before filtering (see
        :mod:`lensrec.filtering`).
    mean_field : MeanField, optional
        Mean-field to subtract (from :func:`mean_field` of simulations with the same mask and settings).
    lmax : int, optional
        CMB band limit of the filter (default: the experiment's largest ℓ_max; must be ≤ 3·nside − 1).
    nthreads : int, optional
    lensed_weights : bool, optional
        Deprecated (use ``weights``): True means "lensed", False "unlensed".
    field_filter : FieldFilter, optional
        Another filter (anything with ``filter(maps) -> FilteredFields``); ``mask`` and ``lmax`` then belong
        to it. The analytic normalization still assumes ``experiment``'s isotropic filter.
    lensing_iterations : int
        0 (default): the quadratic estimator. N > 0: N steps of the iterative estimator (delens E and B with
        the current estimate, estimate again; :func:`lensrec.iterative_reconstruction.iterate_reconstruction`),
        for estimator "EB" on the full sky (no mask, no field_filter, no mean_field).
    progress, cancel
        For ``lensing_iterations`` > 0: ``progress(done, total)`` per step, and a ``threading.Event`` that
        stops after the current step. For the quadratic estimator: ``progress(done, 2)`` before filtering
        (0), after filtering (1) and after forming and normalizing the estimate (2); an exception it raises
        stops the reconstruction (nothing is returned), e.g. to cancel it.
    jacobi_iterations : int or "auto"
        Jacobi iterations of the filter's HEALPix analysis; "auto" (default) takes the fewest that keep the
        response within 1e-3 (0 up to lmax = 2·nside at nside ≥ 256, 1 below, else 3;
        :class:`lensrec.filtering.IsotropicFilter`).
    filter : {'isotropic', 'optimal', 'auto'}
        The map filter (:mod:`lensrec.filter_choice`): the isotropic harmonic filter (default), the
        conjugate-gradient optimal filter (:class:`lensrec.OptimalFilter`), or 'auto' (optimal with a
        ``mask`` or ``noise``). The choice is recorded in ``settings["filter_choice"]``.
    noise : PixelNoise, optional
        Per-pixel noise variance (:class:`lensrec.PixelNoise`); its noise levels replace the experiment's
        for the normalization (arithmetic level for the isotropic filter, inverse-variance for the optimal).
    maps_masked : bool
        The maps are already multiplied by ``mask`` (it is then not applied a second time).
    cg_tolerance, cg_max_iterations : optional
        Conjugate-gradient settings of the optimal filter.
    cg_progress : callable, optional
        ``cg_progress(iteration, residual)`` after each conjugate-gradient iteration.
    weights : {"lensed", "unlensed", "gradient"}, optional
        CMB spectra in the weights and response only (see :func:`lensrec.reconstruction_noise`); the filter
        keeps lensed C + N. Default :data:`lensrec.gradient_spectra.DEFAULT_WEIGHTS`.

    Returns
    -------
    Reconstruction
        ``phi_alm``, ``curl_alm`` (normalized), ``n0``, ``response``, ``unnormalized``, ``settings``.

    Raises
    ------
    TypeError, ValueError
        Unknown estimator (the nearest label is suggested), maps of the wrong shape or with NaN pixels,
        a mask of another nside, lmax above 3·nside − 1, lmax_L above lmax — all before any transform.

    References
    ----------
    Okamoto & Hu 2003, PRD 67, 083002; Hu & Okamoto 2002, ApJ 574, 566.

    Examples
    --------
    >>> import lensrec
    >>> e = lensrec.Experiment(name="demo", noise_temperature=1.0, beam_fwhm=30.0, ell_min=2,
    ...                        ell_max_temperature=48, ell_max_polarization=48)
    >>> sky = lensrec.simulate_sky(e, nside=32, lmax=48, lmax_margin=32, seed=2, nthreads=1)
    >>> result = lensrec.reconstruct(sky.maps, e, estimator="TT", lmax_L=32, nthreads=1)
    >>> result.phi_alm.shape, result.estimator
    ((561,), 'TT')
    """
    estimator = _check_label(estimator)
    chosen = weights is not None or lensed_weights is not None
    weights = resolve_weights(weights, lensed_weights)
    from .iterative_reconstruction import check_lensing_iterations, iterate_reconstruction

    if check_lensing_iterations(lensing_iterations, estimator) > 0:
        extras = {"mask": mask, "field_filter": field_filter, "mean_field": mean_field}
        given = [name for name, value in extras.items() if value is not None]
        if chosen and weights != "lensed":
            given.append(f"weights={weights!r}")
        if given:
            raise ValueError(
                f"lensing_iterations={lensing_iterations} works on the full sky with the isotropic filter and "
                f"its own (delensed) weights; drop {', '.join(given)}"
            )
        return iterate_reconstruction(
            maps,
            experiment,
            spectra=spectra,
            estimator=estimator,
            lensing_iterations=lensing_iterations,
            lmax_L=lmax_L,
            lmax=lmax,
            nthreads=nthreads,
            progress=progress,
            cancel=cancel,
            jacobi_iterations=jacobi_iterations,
        )
    experiment = load_experiment(experiment)
    choice = None
    if field_filter is None:
        from .filter_choice import build_filter
        from .filtering import _check_maps

        array = _check_maps(maps)
        field_filter, experiment, choice = build_filter(
            filter,
            experiment,
            npix_to_nside(array.shape[1], "maps"),
            spectra,
            lmax=lmax,
            mask=mask,
            noise=noise,
            joint=estimator == JOINT_ESTIMATOR,
            jacobi_iterations=jacobi_iterations,
            maps_masked=maps_masked,
            cg_tolerance=cg_tolerance,
            cg_max_iterations=cg_max_iterations,
            callback=cg_progress,
            nthreads=nthreads,
        )
    else:
        if mask is not None or lmax is not None or noise is not None:
            raise ValueError("pass mask and lmax to the field_filter itself, not to reconstruct")
        if not isinstance(field_filter, FieldFilter):
            raise TypeError(f"field_filter must have a filter(maps) method, got {type(field_filter).__name__}")
        experiment = getattr(field_filter, "experiment", experiment)
    cmb_lmax = max(experiment.ell_max_temperature, experiment.ell_max_polarization)
    if lmax_L is not None:
        lmax_L = as_int(lmax_L, "lmax_L", minimum=2)
        if lmax_L > cmb_lmax:
            raise ValueError(
                f"lmax_L={lmax_L} exceeds the CMB band limit lmax={cmb_lmax} the maps are filtered to; "
                f"choose lmax_L <= {cmb_lmax}"
            )
    if progress is not None:
        progress(0, 2)
    fields = field_filter.filter(maps)
    if progress is not None:
        progress(1, 2)
    result = reconstruct_filtered(
        fields,
        experiment,
        spectra=spectra,
        estimator=estimator,
        lmax_L=lmax_L,
        mean_field=mean_field,
        weights=weights,
        nthreads=nthreads,
    )
    if progress is not None:
        progress(2, 2)
    settings = dict(result.settings, filter_choice=choice or fields.settings.get("filter"))
    return dataclasses.replace(result, settings=MappingProxyType(settings))


# --------------------------------------------------------------------------------------- validation
@dataclass(frozen=True, eq=False)
class InputComparison:
    """Spectra of a reconstruction of a simulation beside its input φ (per L, mask moments applied).

    Attributes
    ----------
    L : ndarray
        0 … lmax_L.
    cross, input_auto, auto, curl_auto : ndarray
        C_L of φ̂ × φ (÷ ⟨w²⟩ on a masked sky), of the input φ, of φ̂ (÷ ⟨w⁴⟩) and of the curl Ω̂ (÷ ⟨w⁴⟩).
    n0, curl_n0 : ndarray
        The reconstruction's analytic Gaussian N0 of φ̂ and Ω̂ (NaN below L = 2).
    """

    L: np.ndarray
    cross: np.ndarray
    input_auto: np.ndarray
    auto: np.ndarray
    curl_auto: np.ndarray
    n0: np.ndarray
    curl_n0: np.ndarray

    @property
    def cross_over_input(self) -> np.ndarray:
        """The response check C_L^{φ̂φ} / C_L^{φφ}: one for a unit-response estimate (NaN where C^φφ = 0)."""
        return np.divide(self.cross, self.input_auto, out=np.full_like(self.cross, np.nan), where=self.input_auto > 0)

    @property
    def auto_minus_n0(self) -> np.ndarray:
        """C_L^{φ̂φ̂} − N0_L: the input power plus N1 and the scatter of one realization."""
        return self.auto - self.n0

    @property
    def curl_over_n0(self) -> np.ndarray:
        """The curl null test C_L^{Ω̂Ω̂} / N0^curl_L: one without a curl signal (NaN below L = 2)."""
        return self.curl_auto / self.curl_n0

    def mode_weighted_response(self, L_min: int, L_max: int) -> float:
        """Σ (2L+1) C^{φ̂φ} / Σ (2L+1) C^{φφ} over [L_min, L_max]: one number for the response check."""
        L_min = as_int(L_min, "L_min", minimum=2)
        L_max = as_int(L_max, "L_max", minimum=L_min, maximum=int(self.L[-1]))
        modes = 2.0 * self.L[L_min : L_max + 1] + 1.0
        return float(np.sum(modes * self.cross[L_min : L_max + 1]) / np.sum(modes * self.input_auto[L_min : L_max + 1]))


def compare_with_input(reconstruction: Reconstruction, phi_alm) -> InputComparison:
    """Spectra that validate a reconstruction of a simulation against the simulation's input φ.

    On a masked sky each spectrum is divided by the mask moment its fields carry (:mod:`lensrec.power`:
    ⟨w²⟩ for the estimate × the unmasked input, ⟨w⁴⟩ for the estimate's auto-spectra; Hivon et al. 2002,
    ApJ 567, 2). The input is cut to the reconstruction's lmax_L.

    Parameters
    ----------
    reconstruction : Reconstruction
    phi_alm : complex array
        The input lensing potential of the simulation (e.g. ``SimulatedSky.phi_alm``), reaching lmax_L.

    Returns
    -------
    InputComparison
    """
    from .harmonics import lmax_from_nalm, truncate_alm
    from .power import auto_spectrum, cross_spectrum, mask_corrected, mask_moment_order

    if not isinstance(reconstruction, Reconstruction):
        raise TypeError(f"reconstruction must be a Reconstruction, got {type(reconstruction).__name__}")
    lmax_L = reconstruction.lmax_L
    phi_alm = np.asarray(phi_alm, dtype=np.complex128)
    lmax_input = lmax_from_nalm(phi_alm.size, "phi_alm")
    if lmax_input < lmax_L:
        raise ValueError(f"phi_alm reaches L = {lmax_input}, below the reconstruction's lmax_L = {lmax_L}")
    phi_input = truncate_alm(phi_alm, lmax_L, lmax_input)
    moments = reconstruction.mask_moments
    to_input = mask_moment_order("estimate", "input")
    to_itself = mask_moment_order("estimate", "estimate")
    return InputComparison(
        L=np.arange(lmax_L + 1),
        cross=mask_corrected(cross_spectrum(reconstruction.phi_alm, phi_input, lmax_L), moments, to_input),
        input_auto=auto_spectrum(phi_input, lmax_L),
        auto=mask_corrected(auto_spectrum(reconstruction.phi_alm, lmax_L), moments, to_itself),
        curl_auto=mask_corrected(auto_spectrum(reconstruction.curl_alm, lmax_L), moments, to_itself),
        n0=np.asarray(reconstruction.n0["gradient"], dtype=np.float64),
        curl_n0=np.asarray(reconstruction.n0["curl"], dtype=np.float64),
    )
