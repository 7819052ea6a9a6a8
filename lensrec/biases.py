r"""Estimators of the biases of the lensing power spectrum, on plain harmonic coefficients and spectra.

Every function here works on arrays (a_LM in healpy's layout, or raw spectra C_L indexed from L = 0, e.g.
from :func:`lensrec.power.cross_spectrum`), so it can be checked on synthetic Gaussian fields where the
answer is known, and reused on any suite.

Notation
========
φ̂[a, b] is the normalized quadratic estimate whose first leg (T of TE, E of EB, …) comes from the filtered
fields a and second leg from b. The functions below take spectra of the *symmetrized* pair estimate

    φ̂{a, b} = (φ̂[a, b] + φ̂[b, a]) / 2 ,           φ̂{a, a} = φ̂[a, a] ,

and C^{ab}_L denotes the (pseudo-)spectrum of φ̂{a, b} with itself, (1/(2L+1)) Σ_M |φ̂{a,b}_LM|², divided
by ⟨w⁴⟩ on a masked sky. d is the data, s_i the simulations, all with independent CMB, φ and noise unless
stated. With four ordered pair estimates the realization-dependent N0 of Namikawa, Hanson & Takahashi 2013
(MNRAS 431, 609, eq. 41) reads

    RDN0 = ⟨C[ds, ds] + C[ds, sd] + C[sd, ds] + C[sd, sd] − C[ss', ss'] − C[ss', s's]⟩_{s, s'} ,

and since C[ds,ds] + C[ds,sd] + C[sd,ds] + C[sd,sd] = 4 C^{ds} and the two sim-sim terms have the
expectation of 2 C^{ss'}, this is

    RDN0 = 4 ⟨C^{d s_i}⟩_i − 2 ⟨C^{s_i s_j}⟩_{i≠j} .                                     (1)

Monte-Carlo N0 (the Gaussian bias of a simulation's own spectrum; the average of (1) with d → s'')::

    N0_MC = 2 ⟨C^{s_i s_j}⟩_{i≠j} .                                                      (2)

Monte-Carlo N1 (the term of Kesden, Cooray & Kamionkowski 2003, PRD 67, 123507, first order in C^φφ from
the connected four-point function): pairs that share φ but have independent CMB, minus pairs whose φ are
independent. With a_i = CMB_i lensed by φ_i, b_i = CMB'_i lensed by φ_i and b'_i = CMB'_i lensed by an
independent φ_j (the same unlensed CMB'_i, which makes the two terms nearly equal realization by
realization and removes most of the Gaussian scatter)::

    N1_MC = 2 ⟨C^{a_i b_i} − C^{a_i b'_i}⟩_i .                                           (3)

Both terms share the Gaussian (N0-like) part exactly in expectation; what remains is the part of the
four-point function where φ is contracted across the two estimates, i.e. N1. The legs carry no noise
(noise only adds scatter), but are filtered with the data's filter.

Mean-field, half-split (common practice): the simulations are divided into two disjoint halves, with means
MF₁ and MF₂ of their auto estimates φ̂{s, s}. The spectrum

    C_L^{split} = Re (1/(2L+1)) Σ_M (φ̂ − MF₁)_LM (φ̂ − MF₂)*_LM                               (4)

has expectation C_L of (φ̂ − ⟨φ̂⟩): MF₁ and MF₂ are independent of each other and of φ̂, so the
Monte-Carlo noise of a mean-field estimate (N0/N_half per mode) adds nothing to it, while subtracting one
mean of N simulations from both sides would add ≈ C_L^{φ̂}/N. The power of the mean-field itself is
estimated without that noise by the cross-spectrum of the halves, C^{MF₁ MF₂}.

Normalization correction: the response of the analytic normalization to the input φ, measured from the
simulations' cross-spectra with their input, ρ = ⟨C^{φ̂ φ}⟩ / ⟨C^{φ φ}⟩ (⟨w²⟩ divides the masked cross).
Power spectra are multiplied by 1/ρ² (common practice: a Monte-Carlo correction of the normalization).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._checks import as_finite_array, as_int
from ._deprecation import deprecated_alias
from .power import cross_spectrum

__all__ = [
    "BiasEstimate",
    "half_split_mean_fields",
    "mean_field_split_spectrum",
    "mean_field_power",
    "realization_dependent_n0",
    "monte_carlo_n0",
    "monte_carlo_n1",
    "normalization_correction",
]


@dataclass(frozen=True, eq=False)
class BiasEstimate:
    """A Monte-Carlo estimate of one bias term, with its Monte-Carlo error.

    Attributes
    ----------
    value : ndarray
        The estimate per L (or per bandpower).
    error : ndarray
        Its 1σ Monte-Carlo error from the scatter of the simulations (standard error of the mean).
    count : int
        Number of simulation terms averaged.
    name : str
        "RDN0", "MC-N0", "MC-N1", "normalization".
    """

    value: np.ndarray
    error: np.ndarray
    count: int
    name: str


def _spectra_stack(values, name: str, minimum: int = 1) -> np.ndarray:
    array = as_finite_array(values, name, ndim=2)
    if array.shape[0] < minimum:
        raise ValueError(f"{name} needs at least {minimum} simulation spectra (rows), got {array.shape[0]}")
    return array


def _standard_error(rows: np.ndarray) -> np.ndarray:
    if rows.shape[0] < 2:
        return np.full(rows.shape[1:], np.nan)
    return rows.std(axis=0, ddof=1) / np.sqrt(rows.shape[0])


# ------------------------------------------------------------------------------------------ mean-field
def half_split_mean_fields(estimates, exclude=None) -> tuple[np.ndarray, np.ndarray]:
    """Mean-field estimates MF₁, MF₂ from two disjoint halves of the simulations' auto estimates.

    The simulations left after removing ``exclude`` are split by position: even positions form the first
    half, odd positions the second, so that any one simulation's own spectrum can be debiased with two
    halves that do not contain it.

    Parameters
    ----------
    estimates : complex array, shape (n, nalm)
        φ̂{s_i, s_i} of n ≥ 2 simulations (n ≥ 3 with ``exclude``).
    exclude : int, optional
        Row to leave out (the simulation whose spectrum is being debiased).

    Returns
    -------
    (mf1, mf2) : complex ndarrays, shape (nalm,)

    Raises
    ------
    ValueError
        Fewer than two simulations left.

    Examples
    --------
    >>> import numpy as np
    >>> mf1, mf2 = half_split_mean_fields(np.arange(8.0).reshape(4, 2) + 0j)
    >>> mf1.real.tolist(), mf2.real.tolist()
    ([2.0, 3.0], [4.0, 5.0])
    """
    stack = as_finite_array(estimates, "estimates", ndim=2, dtype=np.complex128)
    rows = list(range(stack.shape[0]))
    if exclude is not None:
        exclude = as_int(exclude, "exclude", minimum=0, maximum=stack.shape[0] - 1)
        rows.remove(exclude)
    if len(rows) < 2:
        raise ValueError(
            f"a half-split mean-field needs at least two simulations besides the excluded one, got {len(rows)}"
        )
    first, second = rows[0::2], rows[1::2]
    return stack[first].mean(axis=0), stack[second].mean(axis=0)


def mean_field_split_spectrum(estimate, mean_field_1, mean_field_2, lmax: int | None = None) -> np.ndarray:
    """Eq. (4): the spectrum of (φ̂ − MF₁) × (φ̂ − MF₂), free of mean-field Monte-Carlo noise.

    Parameters
    ----------
    estimate : complex array, shape (nalm,)
        φ̂_LM (not mean-field subtracted).
    mean_field_1, mean_field_2 : complex arrays, shape (nalm,)
        Means of two disjoint sets of simulations (:func:`half_split_mean_fields`), independent of
        ``estimate``.
    lmax : int, optional

    Returns
    -------
    ndarray, C_L for L = 0 … lmax (not yet divided by any mask moment)

    References
    ----------
    Common practice (the half-split mean-field construction); the mean-field itself: Hanson, Challinor &
    Lewis 2010, GRG 42, 2197.
    """
    estimate = as_finite_array(estimate, "estimate", ndim=1, dtype=np.complex128)
    one = as_finite_array(mean_field_1, "mean_field_1", shape=estimate.shape, dtype=np.complex128)
    two = as_finite_array(mean_field_2, "mean_field_2", shape=estimate.shape, dtype=np.complex128)
    return cross_spectrum(estimate - one, estimate - two, lmax)


def mean_field_power(mean_field_1, mean_field_2, lmax: int | None = None) -> np.ndarray:
    """The power of the mean-field, C^{MF₁ MF₂}: unbiased by the halves' independent Monte-Carlo noise."""
    return cross_spectrum(mean_field_1, mean_field_2, lmax)


# -------------------------------------------------------------------------------------- N0 and N1
def realization_dependent_n0(data_sim, sim_sim) -> BiasEstimate:
    """Eq. (1): RDN0 = 4⟨C^{d s_i}⟩ − 2⟨C^{s_i s_j}⟩ from spectra of symmetrized pair estimates.

    Parameters
    ----------
    data_sim : array, shape (n, lmax_L + 1)
        C^{d s_i}: spectra of φ̂{d, s_i} for n ≥ 2 simulations.
    sim_sim : array, shape (m, lmax_L + 1)
        C^{s_i s_j}: spectra of φ̂{s_i, s_j} for m ≥ 2 pairs of distinct, independent simulations.

    Returns
    -------
    BiasEstimate
        ``error`` adds the standard errors of the two means in quadrature (16 var/n + 4 var/m); the
        two averages share simulations only through terms whose correlation is of the order of the
        realized-power scatter of one simulation, which is negligible against N0's own scatter.

    References
    ----------
    Namikawa, Hanson & Takahashi 2013, MNRAS 431, 609, eq. (41) (see the module docstring).

    Examples
    --------
    >>> import numpy as np
    >>> rdn0 = realization_dependent_n0(np.full((4, 3), 1.0), np.full((3, 3), 1.0))
    >>> rdn0.value.tolist(), rdn0.error.tolist()
    ([2.0, 2.0, 2.0], [0.0, 0.0, 0.0])
    """
    ds = _spectra_stack(data_sim, "data_sim", 2)
    ss = _spectra_stack(sim_sim, "sim_sim", 2)
    if ds.shape[1] != ss.shape[1]:
        raise ValueError(f"data_sim and sim_sim must cover the same L range, got {ds.shape[1]} and {ss.shape[1]}")
    value = 4.0 * ds.mean(axis=0) - 2.0 * ss.mean(axis=0)
    error = np.sqrt(16.0 * _standard_error(ds) ** 2 + 4.0 * _standard_error(ss) ** 2)
    return BiasEstimate(value, error, int(ds.shape[0]), "RDN0")


def monte_carlo_n0(sim_sim) -> BiasEstimate:
    """Eq. (2): N0_MC = 2⟨C^{s_i s_j}⟩ from spectra of symmetrized estimates of independent pairs.

    Parameters
    ----------
    sim_sim : array, shape (m, lmax_L + 1), m ≥ 2

    Returns
    -------
    BiasEstimate

    References
    ----------
    Namikawa, Hanson & Takahashi 2013, MNRAS 431, 609, §4 (the Monte-Carlo N0 as the mean of RDN0).
    """
    ss = _spectra_stack(sim_sim, "sim_sim", 2)
    return BiasEstimate(2.0 * ss.mean(axis=0), 2.0 * _standard_error(ss), int(ss.shape[0]), "MC-N0")


def monte_carlo_n1(shared_phi, independent_phi) -> BiasEstimate:
    """Eq. (3): N1_MC = 2⟨C^{a_i b_i} − C^{a_i b'_i}⟩ (shared φ minus independent φ, same CMB pairs).

    Parameters
    ----------
    shared_phi : array, shape (n, lmax_L + 1)
        C^{a_i b_i}: spectra of φ̂{a_i, b_i}, a_i and b_i lensed by the same φ_i, independent CMB.
    independent_phi : array, shape (n, lmax_L + 1)
        C^{a_i b'_i}: the same CMB pairs with b'_i lensed by an independent φ. Row i of both inputs must
        come from the same simulation (the difference is taken per simulation).

    Returns
    -------
    BiasEstimate
        The error is the standard error of the per-simulation differences.

    References
    ----------
    Kesden, Cooray & Kamionkowski 2003, PRD 67, 123507 (the N1 term); the Monte-Carlo construction with
    simulations that share φ is common practice.
    """
    shared = _spectra_stack(shared_phi, "shared_phi", 2)
    independent = _spectra_stack(independent_phi, "independent_phi", 2)
    if shared.shape != independent.shape:
        raise ValueError(
            f"shared_phi and independent_phi must have the same shape (one row per simulation), "
            f"got {shared.shape} and {independent.shape}"
        )
    difference = 2.0 * (shared - independent)
    return BiasEstimate(difference.mean(axis=0), _standard_error(difference), int(shared.shape[0]), "MC-N1")


def normalization_correction(cross_input, input_auto, binning=None) -> BiasEstimate:
    """The multiplicative correction 1/ρ² of the power spectrum, ρ = ⟨C^{φ̂ φ}⟩ / ⟨C^{φ φ}⟩.

    Parameters
    ----------
    cross_input : array, shape (n, lmax_L + 1)
        Cross-spectra of each simulation's φ̂ with its input φ (divided by ⟨w²⟩ on a masked sky).
    input_auto : array, shape (n, lmax_L + 1)
        Auto-spectra of the input φ of the same simulations.
    binning : array, shape (n_bins, lmax_L + 1), optional
        Weights applied to both before the ratio (a bandpower binning matrix); the ratio of binned means
        is far less noisy than per-L ratios.

    Returns
    -------
    BiasEstimate
        ``value`` = 1/ρ², ``error`` from the delta method with the sample covariance of the two
        (strongly correlated) binned spectra: var ρ = [var X/Ī² + X̄² var I/Ī⁴ − 2 X̄ cov(X, I)/Ī³]/n,
        σ(1/ρ²) = 2 σ_ρ/ρ³. NaN where ⟨C^{φφ}⟩ is zero.

    References
    ----------
    Common practice (Monte-Carlo correction of the analytic normalization from the cross-spectrum with the
    input lensing potential).

    Examples
    --------
    >>> import numpy as np
    >>> c = normalization_correction(np.full((3, 4), 0.5), np.full((3, 4), 1.0))
    >>> c.value.tolist()
    [4.0, 4.0, 4.0, 4.0]
    """
    cross = _spectra_stack(cross_input, "cross_input", 2)
    auto = _spectra_stack(input_auto, "input_auto", 2)
    if cross.shape != auto.shape:
        raise ValueError(f"cross_input and input_auto must have the same shape, got {cross.shape} and {auto.shape}")
    if binning is not None:
        matrix = as_finite_array(binning, "binning", ndim=2)
        if matrix.shape[1] != cross.shape[1]:
            raise ValueError(f"binning has {matrix.shape[1]} columns but the spectra have {cross.shape[1]} L values")
        cross = cross @ matrix.T
        auto = auto @ matrix.T
    n = cross.shape[0]
    mean_x, mean_i = cross.mean(axis=0), auto.mean(axis=0)
    var_x, var_i = cross.var(axis=0, ddof=1), auto.var(axis=0, ddof=1)
    cov_xi = ((cross - mean_x) * (auto - mean_i)).sum(axis=0) / (n - 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        rho = np.where(mean_i != 0, mean_x / mean_i, np.nan)
        var_rho = (var_x / mean_i**2 + mean_x**2 * var_i / mean_i**4 - 2.0 * mean_x * cov_xi / mean_i**3) / n
        factor = 1.0 / rho**2
        error = 2.0 * np.sqrt(np.clip(var_rho, 0.0, None)) / np.abs(rho) ** 3
    return BiasEstimate(factor, error, n, "normalization")


# The British spelling answers until 0.2 with a DeprecationWarning.
normalisation_correction = deprecated_alias(normalization_correction, "normalisation_correction")
