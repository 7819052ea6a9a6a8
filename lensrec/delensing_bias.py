"""Treatments of the internal-delensing bias, and the forecast of delensing with a given estimator.

When φ̂ is reconstructed from the same B modes that its template then delenses (EB, TB, MV, or any label
for which :func:`lensrec.labels.uses_b_modes` is true), the template correlates with those B modes beyond
what φ explains and the residual measured on them comes out too low (Namikawa 2017, PRD 95, 103514;
Baleato Lizancos, Challinor & Carron 2021, JCAP 03, 016). Two routes avoid it:

``"b_free"``
    Reconstruct with a label that reads no B modes (TT+TE+EE, TT, TE, EE). Only the E modes are then
    reused (the template's E also enters φ̂), which leaves a much smaller bias (see :data:`E_REUSE_NOTE`).
``"exclude_delensed_b"``
    Keep a B-using estimator but exclude from its reconstruction the B modes that the template delenses:
    the B leg of the filter is set to zero at ℓ ≤ ℓ_delensed (their noise treated as infinite), in the
    filter, the response and N0 alike (Baleato Lizancos, Challinor & Carron 2021, JCAP 03, 016). The
    template is then independent of the delensed B modes at the price of a higher N0.

``"none"`` reuses the B modes and is biased low; it is refused by the recipes unless asked for.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._checks import as_int
from .experiment import Experiment, load_experiment
from .labels import parse_estimator, uses_b_modes

__all__ = [
    "BIAS_TREATMENTS",
    "E_REUSE_NOTE",
    "ExcludedBExperiment",
    "exclude_delensed_b",
    "resolve_bias_treatment",
    "bias_treatment_note",
    "internal_delensing_forecast",
]

BIAS_TREATMENTS = ("b_free", "exclude_delensed_b", "none")

# The measured figures are in docs/validation.md ("Delensing: B-mode reuse bias, ...").
E_REUSE_NOTE = (
    "E-reuse bias: with a B-free estimator (TT+TE+EE) the template's Wiener-filtered E also entered phi-hat. "
    "On eight nside-256 simulations of a 1.4 uK-arcmin survey it lowered the measured A_lens^res by "
    "0.004 +- 0.002 (0.4%), against 0.35 (55%) for reusing the B modes with MV (docs/validation.md); results "
    "describe simulations."
)


@dataclass(frozen=True)
class ExcludedBExperiment(Experiment):
    """An :class:`lensrec.Experiment` whose B modes at ℓ ≤ ``b_excluded_ell_max`` are left out of filtering.

    Only the cut noise spectrum of B changes (``inf`` at ℓ ≤ ``b_excluded_ell_max``), so every filter,
    response and N0 built from it ignores those B modes; simulated noise (``cut=False``) is unchanged.
    """

    b_excluded_ell_max: int = 0

    def noise_spectrum(self, field: str, lmax: int, deconvolved: bool = True, cut: bool = True) -> np.ndarray:
        noise = super().noise_spectrum(field, lmax, deconvolved=deconvolved, cut=cut)
        if cut and str(field).upper() == "B":
            noise[: self.b_excluded_ell_max + 1] = np.inf
        return noise


def exclude_delensed_b(experiment, ell_max_delensed: int) -> ExcludedBExperiment:
    """The experiment to reconstruct φ with when the template delenses the B modes at ℓ ≤ ell_max_delensed.

    If ``ell_max_delensed`` reaches the polarization ℓ_max no B mode is left: combined labels then combine
    their B-free members only (MV becomes TT+TE+EE), and a B-using pair estimator has no usable multipole.

    Examples
    --------
    >>> import numpy as np
    >>> e = exclude_delensed_b("deep_highland", 300)
    >>> bool(np.isinf(e.noise_spectrum("B", 400)[300])), bool(np.isfinite(e.noise_spectrum("B", 400)[301]))
    (True, True)
    >>> bool(np.isfinite(e.noise_spectrum("E", 400)[300]))
    True
    """
    experiment = load_experiment(experiment)
    ell_max_delensed = as_int(ell_max_delensed, "ell_max_delensed", minimum=2)
    return ExcludedBExperiment(**experiment.to_dict(), b_excluded_ell_max=ell_max_delensed)


def resolve_bias_treatment(estimator: str, treatment: str | None = None) -> str:
    """The bias treatment that applies to ``estimator``: "b_free" for labels that read no B modes; for
    B-using labels ``treatment`` ("exclude_delensed_b" by default, or "none" to reuse the B modes).

    Raises
    ------
    ValueError
        For an unknown treatment, or "exclude_delensed_b" asked of a label that reads no B modes.

    Examples
    --------
    >>> resolve_bias_treatment("TT+TE+EE"), resolve_bias_treatment("MV"), resolve_bias_treatment("EB", "none")
    ('b_free', 'exclude_delensed_b', 'none')
    """
    estimator = parse_estimator(estimator)
    if treatment is not None and treatment not in BIAS_TREATMENTS:
        raise ValueError(f"bias treatment must be one of {', '.join(BIAS_TREATMENTS)}, got {treatment!r}")
    if not uses_b_modes(estimator):
        if treatment == "exclude_delensed_b":
            raise ValueError(f"{estimator} reads no B modes: there is nothing to exclude (its treatment is b_free)")
        return "b_free"
    if treatment == "b_free":
        raise ValueError(f"{estimator} reads B modes; choose exclude_delensed_b or none, or a B-free estimator")
    return treatment or "exclude_delensed_b"


def bias_treatment_note(estimator: str, treatment: str, ell_max_delensed: int | None = None) -> str:
    """One sentence saying which treatment of the delensing bias was applied (for JSON notes and CLI)."""
    if treatment == "b_free":
        return f"bias treatment: b_free ({estimator} reads no B modes; no B-mode reuse). " + E_REUSE_NOTE
    if treatment == "exclude_delensed_b":
        where = "" if ell_max_delensed is None else f" (B modes at l <= {ell_max_delensed})"
        return (
            f"bias treatment: exclude_delensed_b: {estimator} was reconstructed without the B modes the template "
            f"delenses{where} (Baleato Lizancos, Challinor & Carron 2021, JCAP 03, 016)"
        )
    return (
        f"bias treatment: none: {estimator} reuses the delensed B modes, so the measured residual is biased low "
        "(Namikawa 2017, PRD 95, 103514)"
    )


def internal_delensing_forecast(
    experiment,
    estimator: str = "TT+TE+EE",
    bias_treatment: str | None = None,
    spectra=None,
    lmax: int | None = None,
    lmax_L: int | None = None,
    r: float = 0.0,
    foreground_bb=None,
    nthreads: int | None = None,
):
    """Forecast delensing with the internal reconstruction of one estimator label, under a bias treatment.

    The N0 of ``estimator`` (:func:`lensrec.reconstruction_noise`) feeds :func:`lensrec.delensing_forecast`;
    with ``"exclude_delensed_b"`` the N0 is that of the reconstruction without the B modes at
    ℓ ≤ lmax (the range delensed and forecast).

    Parameters
    ----------
    experiment : Experiment or str
    estimator : str
        Any label of :data:`lensrec.labels.ESTIMATORS` that :func:`lensrec.reconstruction_noise` accepts.
    bias_treatment : {"b_free", "exclude_delensed_b", "none"}, optional
        Default: "b_free" for labels without B modes, "exclude_delensed_b" otherwise
        (:func:`resolve_bias_treatment`).
    spectra, lmax, r, foreground_bb, nthreads
        As for :func:`lensrec.delensing_forecast` (lmax default min(polarization ℓ_max, 1000)).
    lmax_L : int, optional
        Band limit of the reconstruction (default the experiment's CMB ℓ_max, at most 3000).

    Returns
    -------
    (DelensingForecast, dict)
        The forecast, whose notes start with the treatment applied, and a summary: ``estimator``,
        ``bias_treatment``, ``ell_max_delensed`` (or None) and ``n0`` (the gradient N0 used).
    """
    import dataclasses

    from .estimator_noise import reconstruction_noise
    from .tensor_forecast import DEFAULT_FORECAST_LMAX, DELENSING_BIAS_NOTE, delensing_forecast

    experiment = load_experiment(experiment)
    estimator = parse_estimator(estimator)
    treatment = resolve_bias_treatment(estimator, bias_treatment)
    if lmax is None:
        lmax = min(experiment.ell_max_polarization, DEFAULT_FORECAST_LMAX)
    lmax = as_int(lmax, "lmax", minimum=3)
    if lmax_L is None:
        lmax_L = min(max(experiment.ell_max_temperature, experiment.ell_max_polarization), 3000)
    ell_max_delensed = lmax if treatment == "exclude_delensed_b" else None
    source = experiment if ell_max_delensed is None else exclude_delensed_b(experiment, ell_max_delensed)
    noise = reconstruction_noise(source, spectra, estimators=(estimator,), lmax_L=lmax_L, nthreads=nthreads)
    n0 = np.array(noise.n0[estimator]["gradient"])
    forecast = delensing_forecast(
        experiment, spectra, n0=n0, lmax=lmax, r=r, nthreads=nthreads, foreground_bb=foreground_bb
    )
    note = bias_treatment_note(estimator, treatment, ell_max_delensed)
    notes = tuple(item for item in forecast.notes if item != DELENSING_BIAS_NOTE or treatment == "none")
    forecast = dataclasses.replace(forecast, notes=(note,) + notes)
    summary = {
        "estimator": estimator,
        "bias_treatment": treatment,
        "ell_max_delensed": ell_max_delensed,
        "n0": n0,
    }
    return forecast, summary
