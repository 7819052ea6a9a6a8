# Over 600 lines: sigma(r) and the delensing forecast built on it share one B-mode model and its checks.
"""Fisher forecasts of the tensor-to-scalar ratio r from B-mode power, with and without delensing.

The B-mode likelihood is taken Gaussian in the measured C_ℓ^BB with cosmic plus noise variance (common
practice; e.g. Knox 1995, PRD 52, 4307, for the variance of a measured spectrum). For one parameter r,

    F = Σ_ℓ f_sky (2ℓ+1)/2 · [ C_ℓ^BB,tensor(r=1) / (r C_ℓ^BB,tensor(r=1) + C_ℓ^BB,lens + N_ℓ^BB) ]²,
    σ(r) = F^(-1/2),

where C^BB,lens is whatever lensing B-mode power is left in the map: the full lensing B modes, a delensed
residual, or a forecast residual from :func:`lensrec.delensed_spectra`.

:func:`tensor_fisher` extends this to several parameters: the model is

    C_ℓ^BB = r C_ℓ^t + A_lens C_ℓ^lens + A_fg C_ℓ^fg + N_ℓ,

evaluated at the fiducial r, A_lens = 1 (and A_fg = 1 if a foreground residual is given), with the Fisher
matrix F_ij = Σ_ℓ f_sky (2ℓ+1)/2 · ∂_i C_ℓ ∂_j C_ℓ / C_ℓ² (Tegmark, Taylor & Heavens 1997, ApJ 480, 22).
The conditional σ(r) = F_rr^(-1/2) (the amplitudes known) is exactly :func:`sigma_r`; the marginalized
σ(r) = [(F⁻¹)_rr]^(1/2) lets the amplitudes float, and is never smaller.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from ._checks import as_finite_array, as_float, as_int
from ._deprecation import renamed_arguments

__all__ = [
    "sigma_r",
    "tensor_fisher",
    "TensorFisher",
    "power_law_foreground_bb",
    "delensing_forecast",
    "alens_residual",
    "DelensingForecast",
    "DELENSING_BIAS_NOTE",
]

DELENSING_BIAS_NOTE = (
    "The forecast residual assumes the B-mode template and the B modes it is subtracted from are independent. "
    "If the lensing potential is reconstructed partly from the same B modes (EB, TB, or the MV combination), "
    "the template correlates with the B-mode noise and the lensing B modes themselves, and the residual power "
    "measured on the data comes out lower than the true residual: a delensing bias that makes the delensed "
    "spectrum look better than it is and, uncorrected, biases r low and makes sigma(r) optimistic. Its size "
    "is comparable to the contribution of the reused B modes to the reconstruction noise and can reach tens "
    "of percent of the residual lensing power for low-noise polarization-dominated reconstructions "
    "(Namikawa 2017, PRD 95, 103514; Baleato Lizancos, Challinor & Carron 2021, JCAP 03, 016). "
    "Avoid it by reconstructing phi without the B modes that are delensed (e.g. TT/TE/EE only, or disjoint "
    "multipole ranges), i.e. a B-free label or lensrec.delensing_bias.exclude_delensed_b; this forecast "
    "describes the residual without the bias."
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


def _fisher_settings(ell_min, ell_max, sky_fraction, r) -> tuple:
    """The checked multipole range, sky fraction and fiducial r of a B-mode Fisher forecast."""
    ell_min = as_int(ell_min, "ell_min", minimum=2)
    ell_max = as_int(ell_max, "ell_max", minimum=2)
    if ell_max < ell_min:
        raise ValueError(f"ell_max={ell_max} must be >= ell_min={ell_min} (the multipole range is inverted)")
    sky_fraction = as_float(sky_fraction, "sky_fraction", minimum=0.0, maximum=1.0, strict_minimum=True)
    return ell_min, ell_max, sky_fraction, as_float(r, "r", minimum=0.0)


@renamed_arguments(bb_lensing="lensed_bb", bb_noise="noise_bb", bb_tensor_r1="tensor_bb")
def sigma_r(lensed_bb, noise_bb, tensor_bb, sky_fraction, ell_min, ell_max, r=0.0) -> float:
    """Fisher forecast of the 1σ uncertainty on r from the B-mode power spectrum alone.

    Parameters
    ----------
    lensed_bb : array_like
        Lensing B-mode power left in the map, C_ℓ^BB in µK², indexed from ℓ = 0: the lensed BB (no
        delensing), a delensed residual, or a forecast residual. Entries must be finite and ≥ 0.
    noise_bb : array_like
        Beam-deconvolved B-mode noise power N_ℓ^BB in µK², indexed from ℓ = 0; ``inf`` marks multipoles
        without data (they add nothing to F). NaN is refused.
    tensor_bb : array_like
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
    ell_min, ell_max, sky_fraction, r = _fisher_settings(ell_min, ell_max, sky_fraction, r)
    lensing = _spectrum(lensed_bb, "lensed_bb", ell_max)
    noise = _spectrum(noise_bb, "noise_bb", ell_max, allow_inf=True)
    tensor = _spectrum(tensor_bb, "tensor_bb", ell_max)
    ell = np.arange(ell_min, ell_max + 1, dtype=np.float64)
    used = slice(ell_min, ell_max + 1)
    variance = r * tensor[used] + lensing[used] + noise[used]
    signal = tensor[used]
    degenerate = (variance == 0.0) & (signal > 0.0)
    if np.any(degenerate):
        where = int(ell[np.argmax(degenerate)])
        raise ValueError(
            f"the Fisher forecast is degenerate at l = {where}: tensor power but zero variance (r = 0 with zero "
            "lensing and zero noise gives sigma(r) -> 0); give r > 0 or a non-zero lensed_bb or noise_bb"
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


# Dust-like slope of a polarized foreground residual: D_ℓ^BB ∝ ℓ^-0.42, i.e. C_ℓ ∝ ℓ^-2.42 (Planck
# Collaboration Int. XXX 2016, A&A 586, A133).
FOREGROUND_SLOPE = -0.42
FOREGROUND_PIVOT = 80


def power_law_foreground_bb(lmax, amplitude, slope=FOREGROUND_SLOPE, ell_pivot=FOREGROUND_PIVOT) -> np.ndarray:
    """A power-law foreground-residual B-mode spectrum, D_ℓ = amplitude · (ℓ / ell_pivot)^slope.

    Parameters
    ----------
    lmax : int
        Highest multipole (≥ 2).
    amplitude : float
        D_ℓ = ℓ(ℓ+1) C_ℓ / 2π at ``ell_pivot`` in µK² (≥ 0).
    slope : float, default -0.42
        Power-law index of D_ℓ; the default is the slope of polarized dust B modes (Planck Collaboration
        Int. XXX 2016, A&A 586, A133).
    ell_pivot : int, default 80
        Pivot multipole of ``amplitude``.

    Returns
    -------
    ndarray
        C_ℓ^fg in µK², ℓ = 0 … lmax (0 at ℓ < 2).

    Examples
    --------
    >>> import math
    >>> from lensrec.tensor_forecast import power_law_foreground_bb
    >>> fg = power_law_foreground_bb(100, 0.01)
    >>> round(float(80 * 81 * fg[80] / (2 * math.pi)), 12)
    0.01
    """
    lmax = as_int(lmax, "lmax", minimum=2)
    amplitude = as_float(amplitude, "amplitude", minimum=0.0)
    slope = as_float(slope, "slope")
    ell_pivot = as_int(ell_pivot, "ell_pivot", minimum=2)
    ell = np.arange(lmax + 1, dtype=np.float64)
    out = np.zeros(lmax + 1)
    out[2:] = amplitude * (ell[2:] / ell_pivot) ** slope * 2.0 * math.pi / (ell[2:] * (ell[2:] + 1.0))
    return out


@dataclass(frozen=True, eq=False)
class TensorFisher:
    """Result of :func:`tensor_fisher`.

    Attributes
    ----------
    parameters : tuple of str
        Parameter names in the order of the matrix: ``"r"``, then ``"alens"`` and ``"foreground"`` when
        they are varied.
    fisher : ndarray, shape (n, n)
        The Fisher matrix.
    sigma_r_marginalized : float
        [(F⁻¹)_rr]^(1/2): σ(r) with the amplitudes free.
    sigma_r_conditional : float
        F_rr^(-1/2): σ(r) with the amplitudes fixed (equal to :func:`sigma_r`).
    sigma : dict of str to float
        Marginalized 1σ error of every parameter.
    correlation_r_alens : float
        Correlation coefficient of r and A_lens in F⁻¹ (NaN if A_lens is not varied).
    notes : tuple of str
        Parameters left fixed because their spectrum is zero in the range, and the model's caveats.
    """

    parameters: tuple
    fisher: np.ndarray
    sigma_r_marginalized: float
    sigma_r_conditional: float
    sigma: dict
    correlation_r_alens: float
    notes: tuple = ()

    def to_dict(self) -> dict:
        return {
            "parameters": list(self.parameters),
            "fisher": self.fisher.tolist(),
            "sigma_r_marginalized": self.sigma_r_marginalized,
            "sigma_r_conditional": self.sigma_r_conditional,
            "sigma": dict(self.sigma),
            "correlation_r_alens": self.correlation_r_alens,
            "notes": list(self.notes),
        }


@renamed_arguments(bb_lensing="lensed_bb", bb_noise="noise_bb", bb_tensor_r1="tensor_bb")
def tensor_fisher(
    lensed_bb,
    noise_bb,
    tensor_bb,
    sky_fraction,
    ell_min,
    ell_max,
    r=0.0,
    foreground_bb=None,
    vary_alens=True,
) -> TensorFisher:
    """Fisher forecast of r together with a residual-lensing amplitude (and a foreground-residual amplitude).

    The B-mode power is modeled as C_ℓ = r C_ℓ^t + A_lens C_ℓ^lens + A_fg C_ℓ^fg + N_ℓ with Gaussian
    bandpower errors (cosmic plus noise variance, f_sky mode counting), at the fiducial r, A_lens = 1 and
    A_fg = 1, and F_ij = Σ_ℓ f_sky (2ℓ+1)/2 · ∂_i C_ℓ ∂_j C_ℓ / C_ℓ².

    Parameters
    ----------
    lensed_bb, noise_bb, tensor_bb, sky_fraction, ell_min, ell_max, r
        As for :func:`sigma_r`. ``lensed_bb`` is the lensing B-mode power left in the map (lensed or a
        delensed residual); its amplitude A_lens is the lensing nuisance parameter.
    foreground_bb : array_like, optional
        The foreground-residual B-mode power at amplitude 1 (µK², from ℓ = 0, e.g.
        :func:`power_law_foreground_bb`); it adds to the variance and its amplitude A_fg is varied.
    vary_alens : bool, default True
        Vary A_lens (False fixes it: then only r and, if given, A_fg).

    Returns
    -------
    TensorFisher
        Marginalized and conditional σ(r). A nuisance amplitude whose spectrum is zero over the range
        (e.g. a perfectly delensed residual) carries no information and cannot move r: it is left fixed and
        named in ``notes``.

    Raises
    ------
    TypeError, ValueError
        As :func:`sigma_r`; also for a bad ``foreground_bb`` and for nuisance spectra so nearly degenerate
        with each other or with the tensor spectrum that the Fisher matrix cannot be inverted.

    References
    ----------
    Tegmark, Taylor & Heavens 1997, ApJ 480, 22 (the Fisher matrix of Gaussian fields); Knox 1995,
    PRD 52, 4307 (bandpower variance with noise).

    Examples
    --------
    >>> import numpy as np
    >>> from lensrec.tensor_forecast import sigma_r, tensor_fisher
    >>> s = __import__("lensrec").fiducial_spectra()
    >>> lens, tensor, noise = s.lensed["BB"][:301], s.tensor["BB"][:301], np.full(301, 1e-7)
    >>> out = tensor_fisher(lens, noise, tensor, 0.1, 30, 300)
    >>> round(out.sigma_r_conditional / sigma_r(lens, noise, tensor, 0.1, 30, 300), 12)
    1.0
    >>> bool(out.sigma_r_marginalized >= out.sigma_r_conditional)
    True
    """
    ell_min, ell_max, sky_fraction, r = _fisher_settings(ell_min, ell_max, sky_fraction, r)
    if not isinstance(vary_alens, (bool, np.bool_)):
        raise TypeError(f"vary_alens must be True or False, got {vary_alens!r}")
    used = slice(ell_min, ell_max + 1)
    lensing = _spectrum(lensed_bb, "lensed_bb", ell_max)[used]
    noise = _spectrum(noise_bb, "noise_bb", ell_max, allow_inf=True)[used]
    tensor = _spectrum(tensor_bb, "tensor_bb", ell_max)[used]
    foreground = None if foreground_bb is None else _spectrum(foreground_bb, "foreground_bb", ell_max)[used]
    ell = np.arange(ell_min, ell_max + 1, dtype=np.float64)
    total = r * tensor + lensing + noise + (0.0 if foreground is None else foreground)
    data = np.isfinite(noise)
    if np.any(data & (total == 0.0) & (tensor > 0.0)):
        where = int(ell[np.argmax(data & (total == 0.0) & (tensor > 0.0))])
        raise ValueError(
            f"the Fisher forecast is degenerate at l = {where}: tensor power but zero variance; give r > 0 or a "
            "non-zero lensed_bb, noise_bb or foreground_bb"
        )
    data &= total > 0.0
    derivatives = {"r": tensor}
    notes = []
    for name, spectrum, wanted in (("alens", lensing, vary_alens), ("foreground", foreground, foreground is not None)):
        if not wanted:
            continue
        if np.any(spectrum[data] > 0.0):
            derivatives[name] = spectrum
        else:
            notes.append(
                f"{name} is held fixed: its spectrum is zero at every multipole with data, so it cannot move r"
            )
    weight = np.zeros(ell.size)
    weight[data] = sky_fraction * (2.0 * ell[data] + 1.0) / 2.0 / total[data] ** 2
    names = tuple(derivatives)
    stacked = np.array([np.where(data, derivatives[name], 0.0) for name in names])
    fisher = (stacked * weight) @ stacked.T
    if not fisher[0, 0] > 0.0:
        raise ValueError(
            f"no multipole in [{ell_min}, {ell_max}] carries information on r (tensor power zero or noise "
            "infinite everywhere); widen the range or check the inputs"
        )
    scale = np.sqrt(np.diag(fisher))
    normalized = fisher / np.outer(scale, scale)
    if np.linalg.cond(normalized) > 1e12:
        raise ValueError(
            f"the Fisher matrix over {names} is singular: the spectra of these parameters are (nearly) "
            "proportional over the range, so they cannot be separated"
        )
    covariance = np.linalg.inv(normalized) / np.outer(scale, scale)
    sigma = {name: float(math.sqrt(covariance[i, i])) for i, name in enumerate(names)}
    if "alens" in names:
        k = names.index("alens")
        correlation = float(covariance[0, k] / math.sqrt(covariance[0, 0] * covariance[k, k]))
    else:
        correlation = float("nan")
    return TensorFisher(
        parameters=names,
        fisher=fisher,
        sigma_r_marginalized=sigma["r"],
        sigma_r_conditional=1.0 / math.sqrt(fisher[0, 0]),
        sigma=sigma,
        correlation_r_alens=correlation,
        notes=tuple(notes)
        + (
            "Gaussian BB-only Fisher forecast with f_sky mode counting; amplitudes at fiducial 1, "
            "derivatives are the given spectra.",
        ),
    )


# Primordial B modes carry (almost) no information above this multipole: the r = 1 tensor BB at ℓ = 1000
# is 2e-3 of the lensing BB and 1e-7 of its own peak (fiducial camb spectra).
DEFAULT_FORECAST_LMAX = 1000


@dataclass(frozen=True, eq=False)
class DelensingForecast:
    """Result of :func:`delensing_forecast` (arrays indexed by ℓ from 0; µK²).

    Attributes
    ----------
    ell : ndarray
        ℓ = 0 … lmax.
    lensed_bb, residual_bb, noise_bb : ndarray
        Lensing BB before delensing, the forecast residual after delensing, and the beam-deconvolved B noise
        (``inf`` outside the experiment's polarization cuts).
    tensor_bb_r1 : ndarray
        Primordial BB for r = 1.
    phi_residual : ndarray
        Residual lensing power C_L^φφ (1 − ρ²), L = 0 … lmax + ell_margin.
    alens_residual : float
        A_lens^res, the amplitude of lensing BB left after delensing (see :func:`delensing_forecast`).
    sigma_r_lensed, sigma_r_delensed : float
        σ(r) from BB alone without and with delensing, the lensing (and foreground) amplitude fixed: the
        conditional σ(r) of :func:`tensor_fisher`.
    sigma_r_lensed_marginalized, sigma_r_delensed_marginalized : float
        The same with the lensing amplitude (A_lens, or A_lens^res after delensing) and, if a foreground
        residual is given, its amplitude marginalized (:func:`tensor_fisher`).
    ell_min, ell_max : int
        Multipole range of the B-mode Fisher sums and of A_lens^res.
    sky_fraction, r : float
        f_sky and the fiducial r of the Fisher forecasts.
    notes : tuple of str
        Caveats that travel with the numbers (the delensing bias in particular).
    """

    ell: np.ndarray
    lensed_bb: np.ndarray
    residual_bb: np.ndarray
    noise_bb: np.ndarray
    tensor_bb_r1: np.ndarray
    phi_residual: np.ndarray
    alens_residual: float
    sigma_r_lensed: float
    sigma_r_delensed: float
    ell_min: int
    ell_max: int
    sky_fraction: float
    r: float
    notes: tuple = ()
    sigma_r_lensed_marginalized: float = float("nan")
    sigma_r_delensed_marginalized: float = float("nan")
    foreground_bb: np.ndarray | None = None

    @property
    def efficiency(self) -> np.ndarray:
        """Per-ℓ fraction of the lensing BB removed, 1 − C_ℓ^res / C_ℓ^lens (NaN where there is no lensing BB).

        The definition of :func:`lensrec.delensing.delensing_efficiency` for noise-free spectra.
        """
        from .delensing import delensing_efficiency

        return delensing_efficiency(self.lensed_bb, self.residual_bb)

    @property
    def improvement(self) -> float:
        """σ(r) without delensing divided by σ(r) with delensing."""
        return self.sigma_r_lensed / self.sigma_r_delensed

    def to_dict(self) -> dict:
        """Plain values for JSON (arrays as lists; ``inf`` noise becomes ``null`` in lensrec.io.write_json)."""
        out = {}
        for item in dataclasses.fields(self):
            value = getattr(self, item.name)
            out[item.name] = (
                None
                if value is None
                else value.tolist()
                if isinstance(value, np.ndarray)
                else (list(value) if isinstance(value, tuple) else value)
            )
        return out


@renamed_arguments(bb_noise="noise_bb")
def alens_residual(lensed_bb, residual_bb, noise_bb, ell_min, ell_max) -> float:
    """A_lens^res: the Fisher-weighted mean of C_ℓ^res / C_ℓ^lens over [ell_min, ell_max].

    It is the amplitude A that a fit of A·C^lens + N to the delensed BB spectrum would return on average,
    with the weights of that fit's inverse variance, w_ℓ = (2ℓ+1) [C_ℓ^lens / (C_ℓ^res + N_ℓ)]² (multipoles
    with infinite noise get zero weight; multipoles with neither residual nor noise have infinite weight and
    make the result 0). 1 means no delensing, 0 perfect delensing.

    Parameters
    ----------
    lensed_bb, residual_bb : array_like
        Lensing BB before and after delensing (µK², from ℓ = 0).
    noise_bb : array_like
        B-mode noise (µK², from ℓ = 0; ``inf`` allowed).
    ell_min, ell_max : int
        Inclusive multipole range.

    Returns
    -------
    float

    Examples
    --------
    >>> import numpy as np
    >>> from lensrec.tensor_forecast import alens_residual
    >>> lensed = np.full(101, 2e-6)
    >>> round(alens_residual(lensed, 0.25 * lensed, np.full(101, 1e-6), 2, 100), 12)
    0.25
    """
    ell_min = as_int(ell_min, "ell_min", minimum=2)
    ell_max = as_int(ell_max, "ell_max", minimum=ell_min)
    lensed = _spectrum(lensed_bb, "lensed_bb", ell_max)[ell_min:]
    residual = _spectrum(residual_bb, "residual_bb", ell_max)[ell_min:]
    noise = _spectrum(noise_bb, "noise_bb", ell_max, allow_inf=True)[ell_min:]
    ell = np.arange(ell_min, ell_max + 1, dtype=np.float64)
    exact = np.isfinite(noise) & (lensed > 0) & (residual + noise == 0)
    if np.any(exact):
        # zero residual and zero noise: these multipoles have infinite weight and a ratio of exactly 0
        return 0.0
    usable = np.isfinite(noise) & (lensed > 0) & (residual + noise > 0)
    if not np.any(usable):
        raise ValueError(f"no multipole in [{ell_min}, {ell_max}] has lensing power and finite noise")
    weights = (2.0 * ell[usable] + 1.0) * (lensed[usable] / (residual[usable] + noise[usable])) ** 2
    return float(np.sum(weights * residual[usable] / lensed[usable]) / np.sum(weights))


def delensing_forecast(
    experiment,
    spectra=None,
    n0=None,
    lmax=None,
    ell_min_b=None,
    r=0.0,
    template_e_noise=True,
    ell_margin=None,
    nthreads=None,
    foreground_bb=None,
) -> DelensingForecast:
    """Forecast the lensing B modes left after delensing, A_lens^res, and σ(r) with and without delensing.

    The residual lensing BB is the B-mode spectrum of the CMB lensed by the residual potential
    C_L^φφ (1 − ρ_L²), ρ_L² = C_L^φφ / (C_L^φφ + N0_L), computed non-perturbatively
    (:func:`lensrec.delensed_spectra`), plus (``template_e_noise``) the first-order B modes of the E modes
    that the Wiener-filtered template misses because of the experiment's E noise. σ(r) is the BB-only
    Fisher forecast of :func:`sigma_r` with the experiment's beam-deconvolved B noise and sky fraction, over
    ℓ from max(experiment.ell_min, ell_min_b) to min(experiment.ell_max_polarization, lmax).

    .. warning:: **Delensing bias.** If φ̂ is reconstructed partly from the same B modes that are delensed
       (EB, TB, or the MV combination, which EB dominates for deep polarization surveys), the template is
       correlated with those B modes and the residual measured on data is biased low. This forecast assumes
       independent B modes and so is optimistic for such reconstructions; see :data:`DELENSING_BIAS_NOTE`,
       repeated in the result's ``notes``.

    Parameters
    ----------
    experiment : Experiment or str or path
        The survey (a shipped name such as ``"deep_highland"`` or a TOML path is loaded).
    spectra : Spectra, optional
        Theory spectra (default :func:`lensrec.fiducial_spectra`); the tensor BB for r = 1 comes from it.
    n0 : array_like
        Lensing reconstruction noise N0_L (C_L^φφ units, L from 0; NaN allowed at L < 2, ``inf`` where there
        is no reconstruction), typically the MV gradient N0 from lensrec's reconstruction-noise module.
        Required.
    lmax : int, optional
        Highest ℓ of the B-mode spectra and of the Fisher sums; default
        min(experiment.ell_max_polarization, 1000) (tensor BB carries no information above ~1000).
    ell_min_b : int, optional
        Lowest B-mode multipole used (e.g. to mimic a large-scale cut); default the experiment's ell_min.
    r : float, default 0.0
        Fiducial r of the Fisher forecasts.
    template_e_noise : bool, default True
        Include the experiment's E noise in the B-mode template (Wiener factor on E).
    ell_margin : int, optional
        Input multipoles above lmax used for lensing (default 2000; see :func:`lensrec.lensed_cmb_spectra`).
    nthreads : int, optional
        Threads for the Wigner-d engine.
    foreground_bb : array_like, optional
        A foreground-residual B-mode spectrum (µK², from ℓ = 0, reaching lmax; e.g.
        :func:`power_law_foreground_bb`) added to the variance of every σ(r), whose amplitude is marginalized
        in the ``*_marginalized`` values.

    Returns
    -------
    DelensingForecast
        With ``alens_residual`` defined by :func:`alens_residual` over the same ℓ range: the Fisher-weighted
        mean of C_ℓ^res / C_ℓ^lens with weights (2ℓ+1) [C_ℓ^lens / (C_ℓ^res + N_ℓ)]².

    Raises
    ------
    TypeError, ValueError
        If ``experiment`` cannot be loaded, ``spectra`` is not a :class:`lensrec.Spectra`, ``n0`` is missing or
        invalid, or lmax / ell_min_b are out of range for the experiment and the spectra.

    Notes
    -----
    The B modes that the template's own reconstruction noise creates (E lensed by the noise in φ^WF) are
    included: with the Wiener filter built from the true N0, the template's power K[W C^EE, ρ⁴(C^φφ + N0)]
    equals its cross with the lensing B modes K[W C^EE, ρ² C^φφ], so the residual is
    K[C^EE, C^φφ] − K[W C^EE, ρ² C^φφ], which is exactly what C^φφ(1 − ρ²) and the E-noise term give
    (checked on simulations in tests/test_tensor_forecast.py). Not included: the delensing bias above,
    foregrounds unless ``foreground_bb`` is given, E-to-B leakage from masks, and an N0 other than the one
    the Wiener filter uses.

    References
    ----------
    Knox & Song 2002, PRL 89, 011303, and Kesden, Cooray & Kamionkowski 2002, PRL 89, 011304 (delensing
    and its limit on r); Seljak & Hirata 2004, PRD 69, 043005; Smith et al. 2012, JCAP 06, 014 (residual
    C^φφ(1 − ρ²) and the E-noise factor).

    Examples
    --------
    >>> import numpy as np, lensrec
    >>> L = np.arange(6001.0)
    >>> n0 = 2e-8 * 2 * np.pi / np.maximum(L * (L + 1), 1) ** 2   # a toy N0 (use the MV gradient N0)
    >>> result = lensrec.delensing_forecast("deep_highland", n0=n0, lmax=400)
    >>> bool(0.0 < result.alens_residual < 1.0), bool(result.sigma_r_delensed < result.sigma_r_lensed)
    (True, True)
    """
    from .experiment import Experiment, load_experiment
    from .lensed_spectra import DEFAULT_ELL_MARGIN, delensed_spectra, lensed_cmb_spectra
    from .spectra import Spectra, fiducial_spectra

    if not isinstance(experiment, Experiment):
        if not isinstance(experiment, (str, bytes)) and not hasattr(experiment, "__fspath__"):
            raise TypeError(
                f"experiment must be an Experiment, a shipped experiment name or a TOML path, got "
                f"{type(experiment).__name__}"
            )
        experiment = load_experiment(experiment)
    if spectra is None:
        spectra = fiducial_spectra()
    if not isinstance(spectra, Spectra):
        raise TypeError(
            f"spectra must be a lensrec.Spectra (e.g. lensrec.fiducial_spectra()), got {type(spectra).__name__}"
        )
    if n0 is None:
        raise ValueError(
            "n0 is required: pass the lensing reconstruction noise N0_L (e.g. the MV gradient N0) as an array "
            "indexed from L = 0"
        )
    if ell_margin is None:
        ell_margin = DEFAULT_ELL_MARGIN
    ell_margin = as_int(ell_margin, "ell_margin", minimum=0)
    if lmax is None:
        lmax = min(experiment.ell_max_polarization, DEFAULT_FORECAST_LMAX)
    lmax = as_int(lmax, "lmax", minimum=3, maximum=spectra.lmax - ell_margin)
    ell_min = (
        experiment.ell_min if ell_min_b is None else max(experiment.ell_min, as_int(ell_min_b, "ell_min_b", minimum=2))
    )
    ell_max = min(experiment.ell_max_polarization, lmax)
    if ell_min >= ell_max:
        raise ValueError(
            f"the B-mode range is empty: ell_min={ell_min} (experiment ell_min {experiment.ell_min}, ell_min_b "
            f"{ell_min_b}) is not below ell_max={ell_max} (lmax {lmax}, experiment ell_max_polarization "
            f"{experiment.ell_max_polarization})"
        )
    r = as_float(r, "r", minimum=0.0)
    lensed = lensed_cmb_spectra(spectra.unlensed, spectra.phi, lmax, ell_margin=ell_margin, nthreads=nthreads)
    e_noise = experiment.noise_spectrum("E", lmax + ell_margin) if template_e_noise else None
    delensed = delensed_spectra(
        spectra.unlensed,
        spectra.phi,
        n0,
        lmax,
        ell_margin=ell_margin,
        ee_noise=e_noise,
        lensed_ee=spectra.lensed["EE"] if template_e_noise else None,
        nthreads=nthreads,
    )
    noise = experiment.noise_spectrum("B", lmax)
    tensor = np.array(spectra.tensor["BB"][: lmax + 1])
    lensed_bb, residual_bb = lensed["BB"], delensed["BB"]
    sky = experiment.sky_fraction
    foreground = None if foreground_bb is None else _spectrum(foreground_bb, "foreground_bb", lmax).copy()
    fisher_lensed, fisher_delensed = (
        tensor_fisher(bb, noise, tensor, sky, ell_min, ell_max, r=r, foreground_bb=foreground)
        for bb in (lensed_bb, residual_bb)
    )
    notes = (
        DELENSING_BIAS_NOTE,
        "sigma(r) is a Gaussian, BB-only Fisher forecast with the f_sky mode-counting approximation and no "
        "E-to-B leakage; sigma_r_lensed and sigma_r_delensed hold the lensing amplitude fixed (conditional), "
        "the *_marginalized values let it float"
        + (" together with the foreground-residual amplitude." if foreground is not None else "; no foregrounds."),
        "alens_residual is the Fisher-weighted mean of C^res/C^lens over the B-mode range, weights "
        "(2l+1) (C^lens / (C^res + N))^2.",
        "The residual is the lensing of the CMB by C^phiphi (1 - rho^2)"
        + (
            ", plus the first-order B modes of the E modes the noisy template misses."
            if template_e_noise
            else " with a noise-free E template."
        ),
    )
    return DelensingForecast(
        ell=np.arange(lmax + 1),
        lensed_bb=lensed_bb,
        residual_bb=residual_bb,
        noise_bb=noise,
        tensor_bb_r1=tensor,
        phi_residual=delensed["phi_residual"],
        alens_residual=alens_residual(lensed_bb, residual_bb, noise, ell_min, ell_max),
        sigma_r_lensed=fisher_lensed.sigma_r_conditional,
        sigma_r_delensed=fisher_delensed.sigma_r_conditional,
        ell_min=ell_min,
        ell_max=ell_max,
        sky_fraction=sky,
        r=r,
        notes=notes,
        sigma_r_lensed_marginalized=fisher_lensed.sigma_r_marginalized,
        sigma_r_delensed_marginalized=fisher_delensed.sigma_r_marginalized,
        foreground_bb=foreground,
    )
