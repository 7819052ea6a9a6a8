"""Fisher forecasts of the tensor-to-scalar ratio r from B-mode power, with and without delensing.

The B-mode likelihood is taken Gaussian in the measured C_ℓ^BB with cosmic plus noise variance (common
practice; e.g. Knox 1995, PRD 52, 4307, for the variance of a measured spectrum). For one parameter r,

    F = Σ_ℓ f_sky (2ℓ+1)/2 · [ C_ℓ^BB,tensor(r=1) / (r C_ℓ^BB,tensor(r=1) + C_ℓ^BB,lens + N_ℓ^BB) ]²,
    σ(r) = F^(-1/2),

where C^BB,lens is whatever lensing B-mode power is left in the map: the full lensing B modes, a delensed
residual, or a forecast residual from :func:`lensrec.delensed_spectra`.
"""

from __future__ import annotations

import math

import numpy as np

from ._checks import as_finite_array, as_float, as_int

__all__ = ["sigma_r", "DELENSING_BIAS_NOTE"]

DELENSING_BIAS_NOTE = (
    "The forecast residual assumes the B-mode template and the B modes it is subtracted from are independent. "
    "If the lensing potential is reconstructed partly from the same B modes (EB, TB, or the MV combination), "
    "the template correlates with the B-mode noise and the lensing B modes themselves, and the residual power "
    "measured on the data comes out lower than the true residual: a delensing bias that makes the delensed "
    "spectrum look better than it is and, uncorrected, biases r low and makes sigma(r) optimistic. Its size "
    "is comparable to the contribution of the reused B modes to the reconstruction noise and can reach tens "
    "of percent of the residual lensing power for low-noise polarization-dominated reconstructions (from "
    "memory; Namikawa 2017, PRD 95, 103514; Baleato Lizancos, Challinor & Carron 2021, JCAP 03, 016). "
    "Avoid it by reconstructing phi without the B modes that are delensed (e.g. TT/TE/EE only, or disjoint "
    "multipole ranges), or remove it with simulations; this forecast does neither."
)


def _spectrum(values, name: str, ell_max: int, allow_inf: bool = False) -> np.ndarray:
    """A 1-D non-negative spectrum indexed from ℓ = 0 that reaches at least ``ell_max`` (+inf if allowed)."""
    try:
        array = as_finite_array(values, name, ndim=1)
    except ValueError as exc:
        if not allow_inf or "non-finite" not in str(exc):
            raise
        array = np.asarray(values, dtype=np.float64)
        if np.any(np.isnan(array)) or np.any(array == -np.inf):
            raise ValueError(f"{name} contains NaN or -inf; use +inf for multipoles without data") from None
    if array.size < ell_max + 1:
        raise ValueError(
            f"{name} has {array.size} entries (l = 0 ... {array.size - 1}) but ell_max={ell_max} needs at least "
            f"{ell_max + 1}; spectra are indexed by l from 0"
        )
    if np.any(array[: ell_max + 1] < 0):
        bad = int(np.argmin(array[: ell_max + 1]))
        raise ValueError(f"{name} must be non-negative (a power spectrum); got {array[bad]:.4g} at l = {bad}")
    return array[: ell_max + 1]


def sigma_r(bb_lensing, bb_noise, bb_tensor_r1, sky_fraction, ell_min, ell_max, r=0.0) -> float:
    """Fisher forecast of the 1σ uncertainty on r from the B-mode power spectrum alone.

    Parameters
    ----------
    bb_lensing : array_like
        Lensing B-mode power left in the map, C_ℓ^BB in µK², indexed from ℓ = 0: the lensed BB (no
        delensing), a delensed residual, or a forecast residual. Entries must be finite and ≥ 0.
    bb_noise : array_like
        Beam-deconvolved B-mode noise power N_ℓ^BB in µK², indexed from ℓ = 0; ``inf`` marks multipoles
        without data (they add nothing to F). NaN is refused.
    bb_tensor_r1 : array_like
        Primordial (tensor) B-mode power for r = 1 in µK², indexed from ℓ = 0.
    sky_fraction : float
        Observed sky fraction f_sky in (0, 1].
    ell_min, ell_max : int
        Inclusive multipole range of the sum, 2 ≤ ell_min ≤ ell_max; every array must reach ell_max.
    r : float, default 0.0
        Fiducial tensor-to-scalar ratio at which the Fisher information is evaluated (≥ 0); its tensor
        power adds to the sample variance.

    Returns
    -------
    float
        σ(r) = F^(-1/2) with F = Σ_ℓ f_sky (2ℓ+1)/2 [C_ℓ^t / (r C_ℓ^t + C_ℓ^lens + N_ℓ)]².

    Raises
    ------
    TypeError
        If an array is not numeric, or a scalar has the wrong type.
    ValueError
        If an array is not 1-D, too short, negative or non-finite (noise may be ``inf``), if the ℓ range is
        empty or inverted, if f_sky is outside (0, 1], or if the forecast is degenerate: a multipole with
        tensor power but zero total variance (r = 0 with neither lensing nor noise), or no multipole in the
        range carries information.

    Notes
    -----
    Only the BB auto-spectrum enters (no EE or TE), a single parameter is varied (no foreground or A_lens
    marginalization) and the f_sky factor is the usual mode-counting approximation for a cut sky.

    References
    ----------
    Knox 1995, PRD 52, 4307 (variance of a measured power spectrum with noise);
    Tegmark, Taylor & Heavens 1997, ApJ 480, 22 (the Fisher matrix for Gaussian fields).

    Examples
    --------
    >>> import math
    >>> import numpy as np
    >>> from lensrec import sigma_r
    >>> ell = np.arange(301)
    >>> tensor = np.where(ell >= 2, 1e-3, 0.0)   # a flat toy tensor spectrum (µK², r = 1)
    >>> value = sigma_r(np.zeros(301), np.zeros(301), tensor, 1.0, 2, 300, r=0.01)
    >>> round(value / (0.01 * math.sqrt(2.0 / (301**2 - 4))), 12)   # the cosmic-variance limit
    1.0
    """
    ell_min = as_int(ell_min, "ell_min", minimum=2)
    ell_max = as_int(ell_max, "ell_max", minimum=2)
    if ell_max < ell_min:
        raise ValueError(f"ell_max={ell_max} must be >= ell_min={ell_min} (the multipole range is inverted)")
    sky_fraction = as_float(sky_fraction, "sky_fraction", minimum=0.0, maximum=1.0, strict_minimum=True)
    r = as_float(r, "r", minimum=0.0)
    lensing = _spectrum(bb_lensing, "bb_lensing", ell_max)
    noise = _spectrum(bb_noise, "bb_noise", ell_max, allow_inf=True)
    tensor = _spectrum(bb_tensor_r1, "bb_tensor_r1", ell_max)
    ell = np.arange(ell_min, ell_max + 1, dtype=np.float64)
    used = slice(ell_min, ell_max + 1)
    variance = r * tensor[used] + lensing[used] + noise[used]
    signal = tensor[used]
    degenerate = (variance == 0.0) & (signal > 0.0)
    if np.any(degenerate):
        where = int(ell[np.argmax(degenerate)])
        raise ValueError(
            f"the Fisher forecast is degenerate at l = {where}: tensor power but zero variance (r = 0 with zero "
            "lensing and zero noise gives sigma(r) -> 0); give r > 0 or a non-zero bb_lensing or bb_noise"
        )
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(signal > 0.0, signal / variance, 0.0)  # inf noise gives 0
    fisher = float(np.sum(sky_fraction * (2.0 * ell + 1.0) / 2.0 * ratio**2))
    if not fisher > 0.0:
        raise ValueError(
            f"no multipole in [{ell_min}, {ell_max}] carries information on r (tensor power zero or noise "
            "infinite everywhere); widen the range or check the inputs"
        )
    return 1.0 / math.sqrt(fisher)
