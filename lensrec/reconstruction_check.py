"""A quantitative check of one reconstruction of a simulation against its input φ, per band.

From the mask-corrected spectra of :func:`lensrec.compare_with_input` this gives, in bands binned by
:func:`lensrec.power.bin_spectrum` (the plotted quantity, 2L+1 weights):

* the response C^{φ̂φ}/C^{φφ} with its Gaussian error;
* the auto-spectrum minus the noise biases (N0, and optionally N1 and a mean-field power) in
  [L(L+1)]² C_L/2π with its Gaussian error, beside the binned theory;
* the cross-correlation coefficient ρ_L = C^{φ̂φ}/√(C^{φ̂φ̂} C^{φφ}) of reconstruction and input against
  its expectation √(C/(C+N)), N = N0 (+ N1): the correlation a Wiener filter of the reconstruction has with
  the truth (e.g. Sherwin et al. 2017, PRD 96, 123511 for its use in delensing).

Errors are those of Gaussian fields on a sky fraction f (Knox 1995, PRD 52, 4307):
Var C_L = 2 (C_L + N_L)² / ((2L+1) f) for the auto-spectrum, Var C^{φ̂φ}_L = [C_L (C_L + N_L) + C_L²] /
((2L+1) f) for the cross-spectrum with the input, of which only the noise part C_L N_L / ((2L+1) f) scatters
the ratio to the same realization's input power. On a masked sky f is the effective sky fraction of
spectra, ⟨w²⟩²/⟨w⁴⟩ (Hivon et al. 2002, ApJ 567, 2). These describe one simulated sky; they are not the
errors of a survey analysis.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._checks import as_finite_array, as_float
from .power import bin_spectrum, spectrum_scale

__all__ = ["ReconstructionCheck", "check_reconstruction"]


@dataclass(frozen=True, eq=False)
class ReconstructionCheck:
    """Per-band check of a reconstruction against its input (see the module docstring).

    Attributes
    ----------
    edges : ndarray
        Band edges; band b holds edges[b] ≤ L < edges[b+1].
    L_eff : ndarray
        Mode-weighted mean L of each band.
    response, response_error : ndarray
        Binned C^{φ̂φ} / binned C^{φφ} of the input, and its Gaussian error.
    auto_minus_bias, auto_error : ndarray
        Binned [L(L+1)]² (C^{φ̂φ̂}_L − N0_L − N1_L − mean-field power) / 2π and its Gaussian error.
    theory : ndarray
        The theory C^φφ binned in the same way (the curve the bands scatter around).
    rho, rho_expected : ndarray
        Measured ρ per band (binned cross over the root of the binned autos) and its expectation
        √(Σ w C / Σ w (C + N)).
    rho_expected_per_L : ndarray
        √(C_L/(C_L + N_L)) for L = 0 … lmax_L (NaN below 2).
    subtracted : tuple of str
        The biases subtracted: "N0", and "N1", "mean field" when given.
    sky_fraction : float
        The sky fraction f of the errors.
    """

    edges: np.ndarray
    L_eff: np.ndarray
    response: np.ndarray
    response_error: np.ndarray
    auto_minus_bias: np.ndarray
    auto_error: np.ndarray
    theory: np.ndarray
    rho: np.ndarray
    rho_expected: np.ndarray
    rho_expected_per_L: np.ndarray
    subtracted: tuple
    sky_fraction: float


def _per_L(values, name: str, size: int) -> np.ndarray:
    array = np.asarray(values, dtype=np.float64)
    if array.ndim != 1 or array.size < size:
        raise ValueError(f"{name} must be one value per L reaching L = {size - 1}, got shape {array.shape}")
    array = array[:size].copy()
    array[:2] = 0.0  # L = 0, 1 carry no lensing modes
    if not np.all(np.isfinite(array[2:])):
        raise ValueError(f"{name} must be finite for 2 ≤ L ≤ {size - 1}")
    return array


def _binned_variance(variance, edges, weights, scale) -> np.ndarray:
    """Variance of Σ w f X / Σ w for independent X_L of the given variance."""
    size = variance.size
    ell = np.arange(size)
    out = []
    for low, high in zip(edges[:-1], edges[1:], strict=True):
        part = (ell >= low) & (ell < high)
        total = weights[part].sum()
        out.append(np.sum((weights[part] * scale[part]) ** 2 * variance[part]) / total**2 if total > 0 else np.nan)
    return np.array(out)


def check_reconstruction(
    comparison, phi_spectrum, edges, sky_fraction: float = 1.0, n1=None, mean_field_power=None
) -> ReconstructionCheck:
    """Per-band response, debiased auto-spectrum and ρ_L of a reconstruction, with Gaussian errors.

    Parameters
    ----------
    comparison : lensrec.reconstruction.InputComparison
        From :func:`lensrec.compare_with_input` (mask moments already applied).
    phi_spectrum : array
        Theory C_L^φφ from L = 0, reaching the comparison's lmax_L.
    edges : sequence of int
        Band edges in [2, lmax_L + 1] (see :func:`lensrec.power.bin_spectrum`).
    sky_fraction : float
        Sky fraction of the errors, in (0, 1]: 1 on the full sky, ``sky_fraction_moments(mask)
        ["sky_fraction_spectra"]`` on a masked one.
    n1 : array, optional
        N1_L to subtract and to add to the noise of ρ's expectation and of the errors (e.g.
        :func:`lensrec.analytic_n1`).
    mean_field_power : array, optional
        Power of the mean field to subtract (e.g. from a suite with the same mask and settings).

    Returns
    -------
    ReconstructionCheck

    Raises
    ------
    ValueError
        Spectra too short or not finite, edges outside [2, lmax_L + 1], a sky fraction outside (0, 1].

    Examples
    --------
    >>> import numpy as np
    >>> from types import SimpleNamespace
    >>> L = np.arange(11.0); C = np.where(L >= 2, 1.0 / (L + 1.0) ** 4, 0.0)
    >>> perfect = SimpleNamespace(cross=C, input_auto=C, auto=2 * C, n0=C)   # N0 = C: ρ = 1/√2
    >>> check = check_reconstruction(perfect, C, [2, 11])
    >>> round(float(check.rho[0]), 6), round(float(check.rho_expected[0]), 6), float(check.response[0])
    (0.707107, 0.707107, 1.0)
    """
    sky_fraction = as_float(sky_fraction, "sky_fraction", minimum=0.0, maximum=1.0)
    if sky_fraction <= 0.0:
        raise ValueError(f"sky_fraction must be in (0, 1], got {sky_fraction}")
    size = np.asarray(comparison.cross).size
    cross = _per_L(comparison.cross, "cross", size)
    input_auto = _per_L(comparison.input_auto, "input_auto", size)
    auto = _per_L(comparison.auto, "auto", size)
    n0 = _per_L(comparison.n0, "n0", size)
    theory = _per_L(phi_spectrum, "phi_spectrum", size)
    edges = np.asarray(as_finite_array(edges, "edges", ndim=1), dtype=np.int64)
    if edges.size < 2 or edges[0] < 2 or edges[-1] > size:
        raise ValueError(f"edges must lie in [2, {size}] (lmax_L = {size - 1}), got {edges.tolist()}")
    noise, biases, subtracted = n0.copy(), n0.copy(), ["N0"]
    if n1 is not None:
        n1 = _per_L(n1, "n1", size)
        noise += n1
        biases += n1
        subtracted.append("N1")
    if mean_field_power is not None:
        biases += _per_L(mean_field_power, "mean_field_power", size)
        subtracted.append("mean field")

    L = np.arange(size, dtype=np.float64)
    modes = 2.0 * L + 1.0
    lensing = spectrum_scale("lensing", size)
    ones = np.ones(size)
    L_eff, auto_band = bin_spectrum(auto - biases, edges, weights="modes", scale="lensing")
    theory_band = bin_spectrum(theory, edges, weights="modes", scale="lensing")[1]
    cross_band = bin_spectrum(cross, edges, weights="modes")[1]
    input_band = bin_spectrum(input_auto, edges, weights="modes")[1]
    auto_raw_band = bin_spectrum(auto, edges, weights="modes")[1]
    theory_plain = bin_spectrum(theory, edges, weights="modes")[1]
    total_plain = bin_spectrum(theory + noise, edges, weights="modes")[1]
    with np.errstate(divide="ignore", invalid="ignore"):
        auto_variance = np.where(L >= 2, 2.0 * (theory + noise) ** 2 / (modes * sky_fraction), 0.0)
        cross_noise_variance = np.where(L >= 2, theory * noise / (modes * sky_fraction), 0.0)
        response = cross_band / input_band
        response_error = np.sqrt(_binned_variance(cross_noise_variance, edges, modes, ones)) / theory_plain
        auto_error = np.sqrt(_binned_variance(auto_variance, edges, modes, lensing))
        rho = cross_band / np.sqrt(auto_raw_band * input_band)
        rho_expected = np.sqrt(theory_plain / total_plain)
        per_L = np.where(L >= 2, np.sqrt(theory / (theory + noise)), np.nan)
    return ReconstructionCheck(
        edges=edges,
        L_eff=L_eff,
        response=response,
        response_error=response_error,
        auto_minus_bias=auto_band,
        auto_error=auto_error,
        theory=theory_band,
        rho=rho,
        rho_expected=rho_expected,
        rho_expected_per_L=per_L,
        subtracted=tuple(subtracted),
        sky_fraction=sky_fraction,
    )
