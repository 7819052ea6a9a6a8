r"""Debiased lensing bandpowers from a suite, their covariance, the lensing amplitude and the bias budget.

The budget's presentation (text table, figure, report files) is in :mod:`lensrec.report_bandpowers`.

Bandpowers
==========
Every spectrum is binned as D_L = [L(L+1)]² C_L / 2π with weights 2L + 1 inside each bin
(:class:`Binning`); the theory is binned the same way, so data and model are compared like with like. On a
masked sky, spectra of two reconstructions are divided by ⟨w⁴⟩ and cross-spectra of a reconstruction with
the input φ by ⟨w²⟩ (:mod:`lensrec.power`: each quadratic estimate carries two powers of the mask weights).

The data bandpowers (:func:`lensing_bandpowers`, notation of :mod:`lensrec.biases`)::

    Ĉ_b = (1/ρ_b²) · [C_b^{split} − RDN0_b − N1_b] ,

with C^{split} the half-split mean-field-subtracted spectrum (eq. 4), RDN0 from data × simulation and
simulation × simulation pairs (eq. 1), the Monte-Carlo N1 (eq. 3, zero when the suite has none) and the
normalization correction 1/ρ² from the simulations' cross-spectra with their input φ. Each simulation's
own bandpowers are debiased the same way with the Monte-Carlo N0 (eq. 2) in place of RDN0 and
mean-field halves that leave it out; their sample covariance, plus the (diagonal) Monte-Carlo variance of
the RDN0 and N1 that the data subtracts, is the covariance of the data bandpowers (slightly conservative:
RDN0 removes part of the bandpower correlations that MC-N0 leaves; Namikawa, Hanson & Takahashi 2013,
MNRAS 431, 609, §5). With few simulations the Monte-Carlo part is not small: RDN0's error falls only as
1/√n_sims.

Lensing amplitude
=================
A = Σ_b w_b Ĉ_b / Σ_b w_b C_b^{fid} with w_b = C_b^{fid}/σ_b², the diagonal inverse-variance fit of the
fiducial shape (near-optimal when bandpower correlations are weak). Its error is the scatter of the same
linear estimator over the simulations (no inverse of a noisy covariance is needed) combined with the
Monte-Carlo error of the subtracted RDN0 and N1. χ² of the fiducial
model uses the inverse sample covariance with the factor (n − n_b − 2)/(n − 1) of Hartlap, Simon &
Schneider 2007 (A&A 464, 399) when n > n_b + 2 simulations are available, and the diagonal otherwise.

For the curl component, and for a suite of Gaussian (unlensed) skies, the model is zero: the debiased
bandpowers are a null test (χ² to zero), and no normalization correction or amplitude applies.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType

import numpy as np

from ._checks import as_int, readonly_copy
from ._deprecation import deprecated_property
from .biases import (
    half_split_mean_fields,
    mean_field_power,
    mean_field_split_spectrum,
    monte_carlo_n0,
    monte_carlo_n1,
    normalization_correction,
    realization_dependent_n0,
)
from .power import bin_spectrum, binning_matrix, cross_spectrum, mask_corrected, mask_moment_order

__all__ = [
    "Binning",
    "default_binning",
    "LensingBandpowers",
    "lensing_bandpowers",
    "fit_amplitude",
    "chi_squared",
    "bias_budget",
]

TERMS = ("mean_field", "rdn0", "mc_n0", "n1", "analytic_n0", "analytic_n1")
TERM_LABELS = {
    "mean_field": "mean-field power",
    "rdn0": "RDN0",
    "mc_n0": "MC-N0",
    "n1": "MC-N1",
    "analytic_n0": "analytic N0",
    "analytic_n1": "analytic N1",
}
# coarse L grid of the analytic N1 shown in the budget (it is interpolated in between)
_ANALYTIC_N1_POINTS = 12
_ANALYTIC_N1_GRID_SIZE = 96


# --------------------------------------------------------------------------------------------- binning
@dataclass(frozen=True, eq=False)
class Binning:
    """Bandpower bins [edges[b], edges[b+1]) in L, binning D_L = [L(L+1)]² C_L/2π with weights 2L + 1.

    Parameters
    ----------
    edges : sequence of int
        Strictly increasing, first ≥ 2.

    Examples
    --------
    >>> import numpy as np
    >>> b = Binning([2, 4, 8])
    >>> b.n_bins, b.L_eff.round(2).tolist()
    (2, [2.58, 5.71])
    >>> b.bin(np.ones(10)).shape
    (2,)
    """

    edges: np.ndarray

    def __post_init__(self):
        edges = np.asarray(self.edges)
        if edges.ndim != 1 or edges.size < 2 or not np.issubdtype(edges.dtype, np.number):
            raise ValueError(f"edges must be at least two increasing multipoles, got {self.edges!r}")
        if np.any(edges != np.round(edges)) or edges[0] < 2 or np.any(np.diff(edges) <= 0):
            raise ValueError(f"edges must be increasing integers starting at L >= 2, got {edges.tolist()}")
        edges = edges.astype(np.int64)
        edges.setflags(write=False)
        object.__setattr__(self, "edges", edges)

    @property
    def n_bins(self) -> int:
        return int(self.edges.size - 1)

    @property
    def lmax_L(self) -> int:
        """Highest L used (edges[-1] − 1)."""
        return int(self.edges[-1] - 1)

    @property
    def L_eff(self) -> np.ndarray:
        """(2L+1)-weighted mean L of each bin."""
        return binning_matrix(self.edges, self.lmax_L + 1, weights="modes") @ np.arange(self.lmax_L + 1.0)

    def matrix(self, lmax_L: int | None = None) -> np.ndarray:
        """(n_bins, lmax_L + 1) matrix taking raw C_L to binned [L(L+1)]² C_L/2π (:func:`lensrec.power.binning_matrix`)."""
        lmax_L = self.lmax_L if lmax_L is None else as_int(lmax_L, "lmax_L", minimum=self.lmax_L)
        return binning_matrix(self.edges, lmax_L + 1, weights="modes", scale="lensing")

    def bin(self, spectrum) -> np.ndarray:
        """Binned [L(L+1)]² C_L/2π of raw spectra (last axis L = 0 … ≥ lmax_L; :func:`lensrec.power.bin_spectrum`)."""
        spectrum = np.asarray(spectrum, dtype=np.float64)
        if spectrum.shape[-1] < self.lmax_L + 1:
            raise ValueError(f"spectrum has {spectrum.shape[-1]} multipoles but the bins reach L = {self.lmax_L}")
        return bin_spectrum(spectrum[..., : self.lmax_L + 1], self.edges, weights="modes", scale="lensing")[1]


def default_binning(lmax_L: int, L_min: int = 8, n_bins: int = 8) -> Binning:
    """Logarithmically spaced bins from ``L_min`` to ``lmax_L`` (inclusive).

    Examples
    --------
    >>> default_binning(400).edges.tolist()
    [8, 13, 21, 35, 57, 92, 151, 246, 401]
    """
    lmax_L = as_int(lmax_L, "lmax_L", minimum=4)
    L_min = as_int(L_min, "L_min", minimum=2, maximum=lmax_L - 1)
    n_bins = as_int(n_bins, "n_bins", minimum=1, maximum=lmax_L - L_min + 1)
    edges = np.unique(np.round(np.geomspace(L_min, lmax_L + 1, n_bins + 1)).astype(int))
    return Binning(edges)


# ------------------------------------------------------------------------------------------ statistics
def fit_amplitude(bandpowers, model, variance) -> float:
    """A = Σ w b / Σ w t with w = t/σ²: the diagonal inverse-variance fit of the model's amplitude.

    Parameters
    ----------
    bandpowers : array, shape (..., n_bins)
        One or more sets of bandpowers (the fit is linear, so it applies row by row).
    model : array, shape (n_bins,)
    variance : array, shape (n_bins,)
        σ_b² (positive).

    Returns
    -------
    float or ndarray

    Examples
    --------
    >>> float(fit_amplitude([2.0, 4.0], [1.0, 2.0], [1.0, 1.0]))
    2.0
    """
    model = np.asarray(model, dtype=np.float64)
    variance = np.asarray(variance, dtype=np.float64)
    if np.any(~(variance > 0)):
        raise ValueError("variance must be positive in every bin")
    weights = model / variance
    return np.asarray(bandpowers, dtype=np.float64) @ weights / float(weights @ model)


def chi_squared(bandpowers, model, covariance, n_sims: int) -> tuple[float, int, float, str]:
    """χ², degrees of freedom, probability to exceed and method, for a covariance estimated from n_sims.

    With n_sims > n_bins + 2 the inverse sample covariance is scaled by (n − n_b − 2)/(n − 1) (Hartlap,
    Simon & Schneider 2007, A&A 464, 399); otherwise only its diagonal is used.
    """
    from scipy import stats

    residual = np.asarray(bandpowers, dtype=np.float64) - np.asarray(model, dtype=np.float64)
    covariance = np.asarray(covariance, dtype=np.float64)
    n_bins = residual.size
    if n_sims > n_bins + 2:
        inverse = np.linalg.inv(covariance) * (n_sims - n_bins - 2) / (n_sims - 1)
        method = "sample covariance with the Hartlap factor"
    else:
        inverse = np.diag(1.0 / np.diag(covariance))
        method = "diagonal of the sample covariance (too few simulations for its inverse)"
    value = float(residual @ inverse @ residual)
    return value, n_bins, float(stats.chi2.sf(value, n_bins)), method


# ------------------------------------------------------------------------------------------ the result
@dataclass(frozen=True, eq=False)
class LensingBandpowers:
    """Debiased lensing bandpowers of one estimator and component, with every bias term (read-only).

    All bandpower arrays are binned [L(L+1)]² C_L/2π (shape (n_bins,)); ``unbinned`` holds the same terms
    per L (raw C_L, L = 0 … lmax_L) for plots.

    Attributes
    ----------
    estimator, component : str
    binning : Binning
    theory : ndarray
        The fiducial C_L^φφ binned (zero for the curl).
    raw : ndarray
        The data's half-split mean-field-subtracted spectrum, before any bias subtraction.
    terms, term_errors : mapping name → ndarray
        "mean_field" (the mean-field's own power, already excluded from ``raw`` by the split),
        "rdn0", "mc_n0", "n1" (zero without N1 pairs), "analytic_n0"; errors are Monte-Carlo 1σ.
    normalization, normalization_error : ndarray
        The factor 1/ρ² applied to the bias-subtracted spectrum (1 for the curl), and its error.
    debiased, errors : ndarray
        Ĉ_b of the data and √diag(covariance).
    covariance : ndarray, shape (n_bins, n_bins)
        Of the data bandpowers: the simulations' sample covariance plus the Monte-Carlo variance of the
        subtracted RDN0 and N1 on the diagonal.
    simulations : ndarray, shape (n_sims, n_bins)
        Each simulation's debiased bandpowers.
    amplitude, amplitude_error : float or None
        A_lens of the data and its error (None for the curl).
    amplitude_simulations : ndarray or None
    chi2, dof, pte : float, int, float
        Of the fiducial model (zero for the curl).
    chi2_method : str
    n_sims, n1_computed : int, bool
    unbinned : mapping
    settings : mapping
    """

    estimator: str
    component: str
    binning: Binning
    theory: np.ndarray
    raw: np.ndarray
    terms: Mapping
    term_errors: Mapping
    normalization: np.ndarray
    normalization_error: np.ndarray
    debiased: np.ndarray
    errors: np.ndarray
    covariance: np.ndarray
    simulations: np.ndarray
    amplitude: float | None
    amplitude_error: float | None
    amplitude_simulations: np.ndarray | None
    chi2: float
    dof: int
    pte: float
    chi2_method: str
    n_sims: int
    n1_computed: bool
    unbinned: Mapping
    settings: Mapping

    # the British spellings answer until 0.2 with a DeprecationWarning
    normalisation = deprecated_property("normalization", "normalisation")
    normalisation_error = deprecated_property("normalization_error", "normalisation_error")

    @property
    def L_eff(self) -> np.ndarray:
        return self.binning.L_eff

    def to_dict(self) -> dict:
        """Plain lists and dicts for JSON."""
        return {
            "estimator": self.estimator,
            "component": self.component,
            "units": "[L(L+1)]^2 C_L / 2pi (binned with weights 2L+1)",
            "bin_edges": self.binning.edges.tolist(),
            "L_eff": self.L_eff.tolist(),
            "theory": self.theory.tolist(),
            "raw": self.raw.tolist(),
            "terms": {k: v.tolist() for k, v in self.terms.items()},
            "term_errors": {k: v.tolist() for k, v in self.term_errors.items()},
            "normalization_correction": self.normalization.tolist(),
            "normalization_correction_error": self.normalization_error.tolist(),
            "debiased": self.debiased.tolist(),
            "errors": self.errors.tolist(),
            "covariance": self.covariance.tolist(),
            "amplitude": self.amplitude,
            "amplitude_error": self.amplitude_error,
            "chi2": self.chi2,
            "dof": self.dof,
            "pte": self.pte,
            "chi2_method": self.chi2_method,
            "n_sims": self.n_sims,
            "n1_computed": self.n1_computed,
            "settings": dict(self.settings),
        }


def _frozen(values, dtype=np.float64) -> np.ndarray:
    return readonly_copy(values, dtype)


def lensing_bandpowers(
    suite, estimator: str | None = None, component: str = "gradient", binning: Binning | None = None
) -> LensingBandpowers:
    """Debiased bandpowers of the suite's data, the bias budget, the covariance and A_lens.

    Parameters
    ----------
    suite : LensingSuite or path
        A finished suite (:func:`lensrec.run_lensing_suite`) or its folder.
    estimator : str, optional
        One of the suite's estimators (default: the first).
    component : {"gradient", "curl"}
        Lensing potential (default) or the curl null test.
    binning : Binning, optional
        Default :func:`default_binning` (lmax_L).

    Returns
    -------
    LensingBandpowers

    Raises
    ------
    ValueError
        An unfinished suite, an estimator it does not hold, bins beyond its lmax_L.

    References
    ----------
    Namikawa, Hanson & Takahashi 2013, MNRAS 431, 609 (RDN0); Kesden, Cooray & Kamionkowski 2003, PRD 67,
    123507 (N1); Hartlap, Simon & Schneider 2007, A&A 464, 399 (inverse sample covariance).
    """
    from .suite_tasks import suite_analytic_n0, suite_spectra
    from .suites import COMPONENTS, LensingSuite, estimate_key, open_lensing_suite

    if not isinstance(suite, LensingSuite):
        suite = open_lensing_suite(suite)
    settings = suite.settings
    estimator = suite.estimators[0] if estimator is None else estimator
    if estimator not in suite.estimators:
        raise ValueError(f"estimator {estimator!r} is not in this suite (it holds {suite.estimators})")
    if component not in COMPONENTS:
        raise ValueError(f"component must be one of {COMPONENTS}, got {component!r}")
    lmax_L = int(settings["lmax_L"])
    binning = default_binning(lmax_L) if binning is None else binning
    if not isinstance(binning, Binning):
        raise TypeError(f"binning must be a lensrec.bandpowers.Binning, got {type(binning).__name__}")
    if binning.lmax_L > lmax_L:
        raise ValueError(f"the bins reach L = {binning.lmax_L} but the suite stops at lmax_L = {lmax_L}")
    if not suite.complete:
        raise ValueError(f"suite {suite.directory!r} is not finished; run it again (it resumes) before the report")
    n = suite.n_sims
    moments = settings["mask_moments"]  # None on the full sky
    auto_order = mask_moment_order("estimate", "estimate")  # ⟨w⁴⟩
    input_order = mask_moment_order("estimate", "input")  # ⟨w²⟩

    def estimate_power(first, second=None):
        return mask_corrected(cross_spectrum(first, second), moments, auto_order)

    matrix = binning.matrix(lmax_L)

    def key(kind):
        return estimate_key(kind, component, estimator)

    autos, inputs, shared, independent, data_sim, sim_sim = [], [], [], [], [], []
    for i in range(n):
        stored = suite.simulation(i)
        autos.append(stored[key("auto")])
        inputs.append(stored["phi_input"])
        if key("n1_shared") in stored:
            shared.append(estimate_power(stored[key("n1_shared")]))
            independent.append(estimate_power(stored[key("n1_independent")]))
        pairs = suite.pairs(i)
        data_sim.append(estimate_power(pairs[key("data_sim")]))
        if i >= 1:
            sim_sim.append(estimate_power(pairs[key("sim_sim")]))
    autos = np.array(autos)
    data_auto = suite.data()[key("auto")]

    one, two = half_split_mean_fields(autos)
    raw_data = mask_corrected(mean_field_split_spectrum(data_auto, one, two), moments, auto_order)
    mf_power = mask_corrected(mean_field_power(one, two), moments, auto_order)
    raw_sims = np.array(
        [
            mask_corrected(
                mean_field_split_spectrum(autos[i], *half_split_mean_fields(autos, exclude=i)), moments, auto_order
            )
            for i in range(n)
        ]
    )
    data_sim, sim_sim = np.array(data_sim), np.array(sim_sim)

    binned = {}
    unbinned = {"L": np.arange(lmax_L + 1)}
    rdn0 = realization_dependent_n0(data_sim @ matrix.T, sim_sim @ matrix.T)
    mcn0 = monte_carlo_n0(sim_sim @ matrix.T)
    binned["rdn0"], binned["mc_n0"] = rdn0, mcn0
    unbinned["rdn0"] = realization_dependent_n0(data_sim, sim_sim).value
    unbinned["mc_n0"] = monte_carlo_n0(sim_sim).value
    if len(shared) >= 2:
        shared, independent = np.array(shared), np.array(independent)
        binned["n1"] = monte_carlo_n1(shared @ matrix.T, independent @ matrix.T)
        unbinned["n1"] = monte_carlo_n1(shared, independent).value
    analytic = np.nan_to_num(suite_analytic_n0(settings, estimator, component)[: lmax_L + 1], nan=0.0)
    unbinned["analytic_n0"] = analytic
    unbinned["analytic_n1"] = _analytic_n1(settings, estimator, component, lmax_L)
    unbinned["mean_field"] = mf_power
    unbinned["raw"] = raw_data

    spectra = suite_spectra(settings)
    has_signal = component == "gradient" and bool(settings.get("lensing", True))
    if has_signal:
        theory_unbinned = np.array(spectra.phi[: lmax_L + 1])
        cross = np.array(
            [mask_corrected(cross_spectrum(a, p), moments, input_order) for a, p in zip(autos, inputs, strict=True)]
        )
        input_auto = np.array([cross_spectrum(p) for p in inputs])
        correction = normalization_correction(cross, input_auto, binning=matrix)
        factor, factor_error = correction.value, correction.error
    else:
        theory_unbinned = np.zeros(lmax_L + 1)
        factor, factor_error = np.ones(binning.n_bins), np.zeros(binning.n_bins)
    unbinned["theory"] = theory_unbinned
    theory = matrix @ theory_unbinned

    zeros = np.zeros(binning.n_bins)
    n1_value = binned["n1"].value if "n1" in binned else zeros
    terms = {
        "mean_field": matrix @ mf_power,
        "rdn0": rdn0.value,
        "mc_n0": mcn0.value,
        "n1": n1_value,
        "analytic_n0": matrix @ analytic,
        "analytic_n1": matrix @ unbinned["analytic_n1"],
    }
    term_errors = {
        "mean_field": zeros,
        "rdn0": rdn0.error,
        "mc_n0": mcn0.error,
        "n1": binned["n1"].error if "n1" in binned else zeros,
        "analytic_n0": zeros,
        "analytic_n1": zeros,
    }
    raw = matrix @ raw_data
    debiased = factor * (raw - rdn0.value - n1_value)
    simulations = factor * (raw_sims @ matrix.T - mcn0.value - n1_value)
    sample = np.cov(simulations, rowvar=False, ddof=1).reshape(binning.n_bins, binning.n_bins)
    # the Monte-Carlo errors of the subtracted terms enter the data (each simulation shares one MC-N0 and N1,
    # so they do not appear in the simulations' scatter)
    monte_carlo = factor**2 * (rdn0.error**2 + term_errors["n1"] ** 2)
    covariance = sample + np.diag(monte_carlo)
    errors = np.sqrt(np.diag(covariance))
    if has_signal:
        weights = theory / errors**2
        amplitude = float(fit_amplitude(debiased, theory, errors**2))
        amplitude_sims = fit_amplitude(simulations, theory, errors**2)
        amplitude_error = float(
            np.sqrt(np.var(amplitude_sims, ddof=1) + np.sum(weights**2 * monte_carlo) / float(weights @ theory) ** 2)
        )
    else:
        amplitude = amplitude_error = amplitude_sims = None
    chi2, dof, pte, method = chi_squared(debiased, theory, covariance, n)
    info = {
        "experiment": settings["experiment"]["name"],
        "nside": settings["nside"],
        "lmax": settings["lmax"],
        "lmax_L": lmax_L,
        "seed": settings["seed"],
        "data": dict(settings["data"]),
        "mask_moments": settings["mask_moments"],
        "directory": suite.directory,
    }
    return LensingBandpowers(
        estimator=estimator,
        component=component,
        binning=binning,
        theory=_frozen(theory),
        raw=_frozen(raw),
        terms=MappingProxyType({k: _frozen(v) for k, v in terms.items()}),
        term_errors=MappingProxyType({k: _frozen(v) for k, v in term_errors.items()}),
        normalization=_frozen(factor),
        normalization_error=_frozen(factor_error),
        debiased=_frozen(debiased),
        errors=_frozen(errors),
        covariance=_frozen(covariance),
        simulations=_frozen(simulations),
        amplitude=amplitude,
        amplitude_error=amplitude_error,
        amplitude_simulations=None if amplitude_sims is None else _frozen(amplitude_sims),
        chi2=chi2,
        dof=dof,
        pte=pte,
        chi2_method=method,
        n_sims=n,
        n1_computed="n1" in binned,
        unbinned=MappingProxyType({k: _frozen(v) for k, v in unbinned.items()}),
        settings=MappingProxyType(info),
    )


def _analytic_n1(settings: dict, estimator: str, component: str, lmax_L: int) -> np.ndarray:
    """Analytic N1 (:func:`lensrec.analytic_n1`) of a suite's estimator, for display beside MC-N1 (0 below L = 2).

    The suite's experiment with its multipoles cut at the suite's lmax and the suite's spectra, as for the
    analytic N0; a coarse L grid (it is interpolated in between).
    """
    from .analytic_n1 import analytic_n1, default_n1_L_grid
    from .experiment import Experiment
    from .filtering import IsotropicFilter
    from .suite_tasks import suite_spectra

    spectra = suite_spectra(settings)
    experiment = IsotropicFilter(
        Experiment.from_dict(dict(settings["experiment"])), spectra, lmax=settings["lmax"]
    ).experiment
    result = analytic_n1(
        experiment,
        spectra=spectra,
        estimators=[estimator],
        lmax_L=lmax_L,
        components=[component],
        L_grid=default_n1_L_grid(lmax_L, _ANALYTIC_N1_POINTS),
        grid_size=_ANALYTIC_N1_GRID_SIZE,
        nthreads=int(settings["nthreads"]),
    )
    return np.nan_to_num(np.asarray(result.n1[estimator][component]), nan=0.0)


# ----------------------------------------------------------------------------------------- the budget
def bias_budget(result: LensingBandpowers) -> dict:
    """The bias budget as plain data: per bandpower, every term and its ratio to the signal.

    The signal is the fiducial bandpower (for the curl or Gaussian skies, which have none, ratios are to
    the analytic N0).
    """
    if not isinstance(result, LensingBandpowers):
        raise TypeError(f"result must be LensingBandpowers, got {type(result).__name__}")
    has_signal = result.amplitude is not None
    reference = result.theory if has_signal else result.terms["analytic_n0"]
    rows = []
    for b in range(result.binning.n_bins):
        lo, hi = int(result.binning.edges[b]), int(result.binning.edges[b + 1] - 1)
        row = {
            "L_min": lo,
            "L_max": hi,
            "L_eff": float(result.L_eff[b]),
            "signal": float(result.theory[b]),
            "raw": float(result.raw[b]),
            "debiased": float(result.debiased[b]),
            "error": float(result.errors[b]),
            "normalization_correction": float(result.normalization[b]),
            "normalization_correction_error": float(result.normalization_error[b]),
        }
        for name in TERMS:
            row[name] = float(result.terms[name][b])
            row[f"{name}_error"] = float(result.term_errors[name][b])
            row[f"{name}_over_signal"] = float(result.terms[name][b] / reference[b]) if reference[b] else None
        rows.append(row)
    return {
        "estimator": result.estimator,
        "component": result.component,
        "units": "[L(L+1)]^2 C_L / 2pi",
        "reference_for_ratios": "signal" if has_signal else "analytic_n0",
        "bandpowers": rows,
        "amplitude": result.amplitude,
        "amplitude_error": result.amplitude_error,
        "chi2": result.chi2,
        "dof": result.dof,
        "pte": result.pte,
        "chi2_method": result.chi2_method,
        "n_sims": result.n_sims,
        "n1_computed": result.n1_computed,
        "settings": dict(result.settings),
    }


# The presentation of the budget (table, figure, report files) is in lensrec.report_bandpowers; its names
# stay importable from here without this statistics module importing the report layer.
_PRESENTATION = ("bias_budget_table", "plot_bias_budget", "write_bias_report")


def __getattr__(name: str):
    if name in _PRESENTATION:
        from . import report_bandpowers

        return getattr(report_bandpowers, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
