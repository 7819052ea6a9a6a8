"""Reconstruction noise of the iterative lensing estimator: the fixed point of delensing and re-estimating.

For deep polarization surveys the B modes that the EB estimator filters are mostly lensing B. Delensing the
fields with the current φ estimate, then estimating again, removes that lensing B from the filters' total
power and lowers the noise (Hirata & Seljak 2003, PRD 68, 083002; Seljak & Hirata 2004, PRD 69, 043005).
The forecast used here is the standard one for the converged iterative (or maximum a posteriori) estimator
(Smith et al. 2012, JCAP 06, 014, §3; Carron & Lewis 2017, PRD 96, 063510, §V):

    N_0  = N0 of the quadratic estimator with lensed spectra,
    C^φφ_res,k = C^φφ N_k / (C^φφ + N_k)                          (what a Wiener-filtered φ̂ leaves),
    C̃_k = the CMB spectra lensed by C^φφ_res,k                   (partially delensed spectra),
    N_{k+1} = N0 of the same estimator with C̃_k in its weights, response and filters (+ noise),

repeated until max_L |N_{k+1}/N_k − 1| ≤ ``tolerance`` over 2 ≤ L ≤ lmax_L (N_{k+1} the noise computed with
the spectra delensed by N_k). The partially delensed spectra
come from the non-perturbative lensed-spectra engine (:func:`lensrec.lensed_cmb_spectra` with the residual
C^φφ of :func:`lensrec.lensed_spectra.residual_lensing_potential`); N0 from
:func:`lensrec.reconstruction_noise`. The map is a contraction (a lower N0 lowers the residual lensing B,
which lowers N0 by less: the ratio is 0.3-0.5 at 0.5-1 µK-arcmin), so plain repetition converges from above;
from the third step on the noise used to delens is extrapolated along the direction of travel (Aitken), which
halves the number of steps and may overshoot the fixed point by a fraction of a percent before settling.

Which spectra are delensed: E and B (EE and BB); TT and TE keep their lensed values. The iterative
estimator delenses by remapping the observed polarization with the inverse of the estimated deflection, so
its filters and weights must describe partially delensed E and B. Nearly all of the gain comes from B (the
lensing B power leaves the EB filter's denominator); delensing E sharpens its acoustic peaks and changes the
EB noise by well under a percent. Temperature is left lensed: the map iteration does not remap it, and the
gain a delensed TT would promise comes from sharper acoustic peaks in the TT response, which depends on the
response model (lensed against lensed-gradient spectra, Lewis, Challinor & Hanson 2011, JCAP 03, 018) rather
than on removing lensing B, so leaving it out keeps the MV forecast conservative. The partially delensed BB
includes, at first order, the lensing B of the E modes the delensing cannot use (outside the polarization
cuts or noise dominated; the E-noise term of :func:`lensrec.delensed_spectra`).

The curl component is forecast with the same partially delensed spectra. After iterating, the curl estimate
is the curl of the residual deflection of the delensed fields, an estimator of the field rotation (zero for
Born lensing) that serves as a null test with the converged filters.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType

import numpy as np

from ._checks import as_float, as_int, readonly_copy
from .estimator_noise import ReconstructionNoise, reconstruction_noise
from .experiment import Experiment, as_experiment
from .labels import COMPONENTS, ITERATIVE_ESTIMATORS, parse_components, parse_estimators
from .lensed_spectra import DEFAULT_ELL_MARGIN, delensed_spectra
from .spectra import Spectra, as_spectra

__all__ = [
    "IterativeNoise",
    "iterative_reconstruction_noise",
    "partially_delensed_spectra",
]

DEFAULT_TOLERANCE = 1e-3
DEFAULT_MAX_LENSING_ITERATIONS = 30


def _frozen(values) -> np.ndarray:
    return readonly_copy(values, np.float64)


@dataclass(frozen=True, eq=False)
class IterativeNoise:
    """Converged noise of the iterative lensing estimator and every step that led to it (read-only).

    Attributes
    ----------
    L : ndarray
        0 … lmax_L.
    n0 : mapping label → component → ndarray
        Converged N0 (C_L^φφ units; C_L^ΩΩ for the curl), same layout as :attr:`ReconstructionNoise.n0`.
    quadratic_n0 : mapping label → component → ndarray
        N0 of the quadratic estimator (iteration 0), same layout.
    history : mapping label → tuple of mapping component → ndarray
        N0 of every iteration, from 0 (quadratic) to ``lensing_iterations[label]``.
    lensing_iterations : mapping label → int
        Number of delens-and-estimate steps taken to converge.
    changes : mapping label → tuple of float
        max_L |N_k/N_{k−1} − 1| of the gradient N0 at each step k ≥ 1 (the last one is ≤ ``tolerance``).
    phi_residual : mapping label → ndarray
        C^φφ N/(C^φφ + N) with the converged gradient N0 (L = 0 … lmax + ell_margin).
    delensed : mapping label → mapping spectrum → ndarray
        The spectra of the converged step (µK², ℓ = 0 … lmax): EE and BB partially delensed, TT and TE lensed.
    phi_spectrum : ndarray
        C_L^φφ, L = 0 … lmax_L.
    experiment : Experiment
    settings : mapping
        lmax, lmax_L, tolerance, max_lensing_iterations, ell_margin, estimators, components.
    """

    L: np.ndarray
    n0: Mapping
    quadratic_n0: Mapping
    history: Mapping
    lensing_iterations: Mapping
    changes: Mapping
    phi_residual: Mapping
    delensed: Mapping
    phi_spectrum: np.ndarray
    experiment: Experiment
    settings: Mapping

    def gain(self, label: str, component: str = "gradient") -> np.ndarray:
        """N0 of the quadratic estimator over the converged iterative N0 (≥ 1; NaN below L = 2)."""
        if label not in self.n0:
            raise ValueError(f"estimator {label!r} was not computed; computed: {', '.join(self.n0)}")
        if component not in self.n0[label]:
            raise ValueError(f"component {component!r} was not computed; computed: {', '.join(self.n0[label])}")
        with np.errstate(invalid="ignore", divide="ignore"):
            return self.quadratic_n0[label][component] / self.n0[label][component]

    @property
    def delensing_estimator(self) -> str:
        """The estimator whose iterative noise delenses in :meth:`delensing_forecast`: MV if computed, else EB."""
        return "MV" if "MV" in self.n0 else next(iter(self.n0))

    def delensing_forecast(self, label=None, spectra=None, **options):
        """:func:`lensrec.delensing_forecast` with the converged gradient N0 of ``label``.

        Parameters
        ----------
        label : str, optional
            One of the computed estimators (default :attr:`delensing_estimator`).
        spectra : Spectra, optional
            The spectra of the forecast (default the embedded fiducial cosmology).
        **options
            Passed on (lmax, ell_min_b, r, template_e_noise, ell_margin, nthreads, …).

        Returns
        -------
        DelensingForecast
            Residual BB, A_lens^res and σ(r) with the iterative reconstruction. The delensing-bias caveat of
            :func:`lensrec.delensing_forecast` applies with more force: the iterated EB estimate reuses the
            same B modes at every step.
        """
        from .tensor_forecast import delensing_forecast

        label = self.delensing_estimator if label is None else label
        if label not in self.n0:
            raise ValueError(f"estimator {label!r} was not computed; computed: {', '.join(self.n0)}")
        return delensing_forecast(self.experiment, spectra=spectra, n0=self.n0[label]["gradient"], **options)

    def to_dict(self, include_history: bool = True) -> dict:
        """Plain lists and dicts for JSON (NaN stays NaN; ``lensrec.io.write_json`` writes null)."""
        document = {
            "L": self.L.astype(int).tolist(),
            "n0": {label: {c: v.tolist() for c, v in parts.items()} for label, parts in self.n0.items()},
            "lensing_iterations": dict(self.lensing_iterations),
            "changes": {label: list(values) for label, values in self.changes.items()},
            "settings": dict(self.settings),
        }
        if include_history:
            document["n0_per_iteration"] = {
                label: [{c: v.tolist() for c, v in step.items()} for step in steps]
                for label, steps in self.history.items()
            }
        return document


def _with_lensed(spectra: Spectra, replacement: Mapping) -> Spectra:
    """``spectra`` with its lensed columns replaced up to the length of ``replacement`` (kept above)."""
    lensed = {}
    for key, values in spectra.lensed.items():
        column = np.array(values)
        if key in replacement:
            new = np.asarray(replacement[key])
            column[: new.size] = new
        lensed[key] = column
    return Spectra(
        unlensed=spectra.unlensed,
        lensed=lensed,
        phi=spectra.phi,
        tensor=spectra.tensor,
        metadata=dict(spectra.metadata),
    )


def partially_delensed_spectra(
    spectra: Spectra, n0, lmax: int, ell_margin=None, polarization_only=False, experiment=None, nthreads=None
):
    """The CMB spectra after delensing with a Wiener-filtered φ̂ of noise N0, by the lensed-spectra engine.

    The CMB lensed by the residual C^φφ N0/(C^φφ + N0) (:func:`lensrec.delensed_spectra`), plus, with an
    ``experiment``, the first-order B modes of the E modes that the delensing cannot use: those outside the
    experiment's polarization cuts and the noise-dominated ones (the E-noise term of
    :func:`lensrec.delensed_spectra`). Without it every E mode to ℓ_max + ell_margin is taken as delensable.

    Parameters
    ----------
    spectra : Spectra
    n0 : array_like
        Gradient N0 of the φ estimate used to delens (L from 0; NaN allowed at L < 2; L beyond its end are
        taken as not reconstructed).
    lmax : int
        Highest ℓ of the output.
    ell_margin : int, optional
        Input multipoles above lmax (default 2000, lowered to what ``spectra`` holds).
    polarization_only : bool
        Skip T and TE (left as the lensed columns of ``spectra``), for estimators that use only E and B; EE
        and BB do not depend on T, so they are the same either way.
    experiment : Experiment, optional
        Its E noise and polarization cuts limit the delensable E modes (see above).
    nthreads : int, optional

    Returns
    -------
    spectra : dict
        "TT", "EE", "BB", "TE" (µK², ℓ = 0 … lmax).
    phi_residual : ndarray
        The residual C_L^φφ (L = 0 … lmax + ell_margin).
    """
    margin = DEFAULT_ELL_MARGIN if ell_margin is None else as_int(ell_margin, "ell_margin", minimum=0)
    margin = min(margin, spectra.lmax - lmax)
    top = lmax + margin
    unlensed = {key: np.array(values[: top + 1]) for key, values in spectra.unlensed.items()}
    if polarization_only:
        unlensed["TT"] = np.zeros(top + 1)
        unlensed["TE"] = np.zeros(top + 1)
    e_noise = None if experiment is None else experiment.noise_spectrum("E", top)
    out = delensed_spectra(
        unlensed,
        spectra.phi[: top + 1],
        n0,
        lmax,
        ell_margin=margin,
        ee_noise=e_noise,
        lensed_ee=None if experiment is None else spectra.lensed["EE"][: top + 1],
        nthreads=nthreads,
    )
    residual = out.pop("phi_residual")
    if polarization_only:
        out["TT"] = np.array(spectra.lensed["TT"][: lmax + 1])
        out["TE"] = np.array(spectra.lensed["TE"][: lmax + 1])
    return out, residual


def _next_input(used, result, previous):
    """The N0 to delens with at the next step: the last result, extrapolated along the direction of travel.

    The map F: log N_in → log N_out has a Jacobian of nearly rank one (every L of the residual lensing feeds
    the same lensing B power), so after one plain step successive changes are nearly parallel and shrink by
    its eigenvalue λ. Aitken's extrapolation with λ estimated by least squares from the last two steps,
    x_next = y + λ/(1 − λ) (y − x), with λ clipped to [0, 0.8], removes most of the remaining distance; the
    stopping rule, |N_out/N_in − 1| ≤ tolerance at the same step, does not depend on it.
    Returns (next input, state for the following call).
    """
    usable = np.isfinite(used) & np.isfinite(result) & (used > 0) & (result > 0)
    usable[:2] = False
    x = np.log(np.where(usable, used, 1.0))
    y = np.log(np.where(usable, result, 1.0))
    following = np.array(result, dtype=np.float64)
    if previous is not None:
        dx, dy = x - previous[0], y - previous[1]
        norm = float(np.sum(dx[usable] ** 2))
        if norm > 0:
            slope = float(np.clip(np.sum(dx[usable] * dy[usable]) / norm, 0.0, 0.8))
            following[usable] = np.exp(y[usable] + slope / (1.0 - slope) * (y[usable] - x[usable]))
    return following, (x, y)


def _relative_change(new: np.ndarray, old: np.ndarray) -> float:
    usable = np.isfinite(new) & np.isfinite(old) & (old > 0)
    usable[:2] = False
    if not np.any(usable):
        return 0.0
    return float(np.max(np.abs(new[usable] / old[usable] - 1.0)))


def iterative_reconstruction_noise(
    experiment,
    spectra=None,
    estimators=ITERATIVE_ESTIMATORS,
    lmax_L=None,
    components=COMPONENTS,
    tolerance=DEFAULT_TOLERANCE,
    max_lensing_iterations=DEFAULT_MAX_LENSING_ITERATIONS,
    ell_margin=None,
    nthreads=None,
    progress=None,
) -> IterativeNoise:
    """Converged reconstruction noise of the iterative lensing estimator, with the noise of every step.

    Starting from the quadratic estimator's N0, each step delenses the CMB spectra with the residual lensing
    power that a Wiener-filtered estimate of the current noise leaves, C^φφ N/(C^φφ + N), and recomputes N0
    with those partially delensed spectra in the weights, the response and the filters; it stops when the
    gradient N0 changes by at most ``tolerance`` (relative, every 2 ≤ L ≤ lmax_L). E and B are
    delensed, T is not (module docstring: the iterative estimator remaps the polarization with the inverse
    estimated deflection); the gain comes almost entirely from the lensing B power that leaves the B filter.

    Parameters
    ----------
    experiment : Experiment or str
        The survey, or the name/path of an experiment TOML file.
    spectra : Spectra, optional
        Theory spectra (default the embedded fiducial cosmology); they must reach the CMB ℓ_max (and are
        used up to ℓ_max + 2000 for the lensing, when they reach that far).
    estimators : sequence of str or str
        Any of "EB" and "MV" (default both). Each has its own fixed point: the EB forecast delenses with the
        EB noise, the MV forecast with the MV noise (MV combines all five pair estimators, each with the
        partially delensed spectra).
    lmax_L : int, optional
        Highest lensing multipole (default the CMB ℓ_max). Lensing above lmax_L is not delensed.
    components : sequence of str
        "gradient" and/or "curl" (default both); the gradient N0 always drives the iteration.
    tolerance : float
        Stop when max_L |N_k/N_{k−1} − 1| ≤ tolerance (default 1e-3).
    max_lensing_iterations : int
        Refuse to go on beyond this many steps (default 30; RuntimeError if not converged by then).
    ell_margin : int, optional
        Multipoles above ℓ_max used by the lensed-spectra engine (default 2000, or what ``spectra`` holds).
    nthreads : int, optional
    progress : callable, optional
        Called as ``progress(label, iteration, change)`` after every step (change is NaN for iteration 0).

    Returns
    -------
    IterativeNoise

    Raises
    ------
    TypeError, ValueError
        As :func:`lensrec.reconstruction_noise`; for an estimator with no iterative forecast (naming it and
        the ones allowed), a tolerance outside (0, 0.5] or fewer than 1 allowed iteration.
    RuntimeError
        If the noise has not converged after ``max_lensing_iterations`` steps.

    References
    ----------
    Hirata & Seljak 2003, PRD 68, 083002; Seljak & Hirata 2004, PRD 69, 043005; Smith et al. 2012, JCAP 06,
    014 (the iterated EB forecast); Carron & Lewis 2017, PRD 96, 063510.

    Examples
    --------
    >>> import lensrec
    >>> e = lensrec.Experiment(name="deep", noise_temperature=0.7, beam_fwhm=1.0,
    ...                        ell_max_temperature=1500, ell_max_polarization=1500)
    >>> result = lensrec.iterative_reconstruction_noise(e, estimators="EB", components="gradient", lmax_L=800)
    >>> bool(result.gain("EB")[200] > 1.5)
    True
    """
    experiment, spectra = as_experiment(experiment), as_spectra(spectra)
    labels = _parse_iterative(estimators)
    components = parse_components(components)
    if "gradient" not in components:
        components = ("gradient", *components)  # the gradient drives the iteration; it is returned too
    tolerance = as_float(tolerance, "tolerance", 0.0, 0.5, strict_minimum=True)
    max_steps = as_int(max_lensing_iterations, "max_lensing_iterations", minimum=1, maximum=1000)
    if progress is not None and not callable(progress):
        raise TypeError(f"progress must be callable, got {type(progress).__name__}")

    quadratic = reconstruction_noise(
        experiment, spectra, estimators=labels, lmax_L=lmax_L, components=components, nthreads=nthreads
    )
    lmax = int(quadratic.settings["lmax"])
    lmax_L = int(quadratic.settings["lmax_L"])
    margin = DEFAULT_ELL_MARGIN if ell_margin is None else as_int(ell_margin, "ell_margin", minimum=0)
    margin = min(margin, spectra.lmax - lmax)

    n0, history, steps, changes, residuals, delensed = {}, {}, {}, {}, {}, {}
    for label in labels:
        current = {c: quadratic.n0[label][c] for c in components}
        record = [current]
        moves = []
        if progress is not None:
            progress(label, 0, float("nan"))
        delens_with = current["gradient"]
        previous = None  # (log N used to delens, log N that came out) of the last step
        for step in range(1, max_steps + 1):
            spectra_k, residual = partially_delensed_spectra(
                spectra, delens_with, lmax, ell_margin=margin, polarization_only=True, nthreads=nthreads
            )
            noise = _noise_with(experiment, spectra, spectra_k, label, lmax_L, components, nthreads)
            current = {c: noise.n0[label][c] for c in components}
            change = _relative_change(current["gradient"], delens_with)
            record.append(current)
            moves.append(change)
            if progress is not None:
                progress(label, step, change)
            if change <= tolerance:
                break
            delens_with, previous = _next_input(delens_with, current["gradient"], previous)
        else:
            raise RuntimeError(
                f"the iterative {label} noise has not converged to tolerance={tolerance:g} after "
                f"max_lensing_iterations={max_steps} steps (last relative change {moves[-1]:.3g}); raise "
                "max_lensing_iterations or the tolerance"
            )
        n0[label] = MappingProxyType({c: _frozen(v) for c, v in current.items()})
        history[label] = tuple(MappingProxyType({c: _frozen(v) for c, v in item.items()}) for item in record)
        steps[label] = len(record) - 1
        changes[label] = tuple(moves)
        residuals[label] = _frozen(residual)
        delensed[label] = MappingProxyType({key: _frozen(values) for key, values in spectra_k.items()})

    settings = {
        "lmax": lmax,
        "lmax_L": lmax_L,
        "tolerance": tolerance,
        "max_lensing_iterations": max_steps,
        "ell_margin": margin,
        "estimators": list(labels),
        "components": list(components),
        "delensed_spectra": ["EE", "BB"],
    }
    return IterativeNoise(
        L=_frozen(quadratic.L),
        n0=MappingProxyType(n0),
        quadratic_n0=MappingProxyType(
            {label: MappingProxyType({c: quadratic.n0[label][c] for c in components}) for label in labels}
        ),
        history=MappingProxyType(history),
        lensing_iterations=MappingProxyType(steps),
        changes=MappingProxyType(changes),
        phi_residual=MappingProxyType(residuals),
        delensed=MappingProxyType(delensed),
        phi_spectrum=_frozen(spectra.phi[: lmax_L + 1]),
        experiment=experiment,
        settings=MappingProxyType(settings),
    )


def _noise_with(experiment, spectra, replacement, label, lmax_L, components, nthreads) -> ReconstructionNoise:
    """N0 of ``label`` with the CMB spectra of ``replacement`` in weights, response and filters."""
    return reconstruction_noise(
        experiment,
        _with_lensed(spectra, replacement),
        estimators=(label,),
        lmax_L=lmax_L,
        components=components,
        nthreads=nthreads,
    )


def _parse_iterative(estimators) -> tuple[str, ...]:
    """Known labels (nearest-label hint from lensrec.labels), each with an iterative form."""
    labels = parse_estimators(estimators)
    for label in labels:
        if label not in ITERATIVE_ESTIMATORS:
            raise ValueError(
                f"estimator {label!r} has no iterative form; iterative estimators: {', '.join(ITERATIVE_ESTIMATORS)}"
            )
    return labels
