r"""Iterative lensing reconstruction of full-sky maps: delens with the current estimate, estimate again.

Scheme (the iterated quadratic estimator of Smith et al. 2012, JCAP 06, 014, §3, after Hirata & Seljak 2003,
PRD 68, 083002 and Seljak & Hirata 2004, PRD 69, 043005)::

    φ̂_0 = quadratic EB estimate of the observed maps, noise N_0 (analytic);
    for k = 1 … lensing_iterations:
        φ^WF = C^φφ / (C^φφ + N_{k−1}) · φ̂_{k−1}                           (Wiener filter)
        E_d, B_d = observed E, B remapped with the INVERSE of the deflection ∇φ^WF     (delens)
        B_d += ε_ℓ B_obs                                   (undo the B modes' self-term, see below)
        C̃_k = CMB spectra lensed by C^φφ N_{k−1}/(C^φφ + N_{k−1})            (partially delensed spectra)
        ψ̂_k = EB estimate from (E_d, B_d), filtered with C̃_k + noise, weights from C̃_k,
              normalized with the analytic response R_k of that estimator to lensing (C̃_k in f^EB)
        φ̂_k = φ^WF + ψ̂_k,           noise N_k = 1/R_k (the N0 of step k)

Why the estimates add: the delensed fields are lensed by what the delensing left, φ − φ^WF (the inverse
remap undoes ∇φ^WF exactly), and the step-k estimator measures that with unit response, so
φ̂_k = φ^WF + (φ − φ^WF) + n_k = φ + n_k: the noise n_{k−1} drops out (delensing with φ^WF ∋ W n_{k−1} lenses
the fields by −W n_{k−1}, which ψ̂_k measures), and the noise of φ̂_k is that of the last step, N_k, the
analytic iterative noise of :func:`lensrec.iterative_reconstruction_noise` step by step. With a Newton step
of curvature 1/N + 1/C^φφ this is also the form of a MAP iteration (Carron & Lewis 2017),
φ^WF_{k} = W_k (φ^WF_{k−1} + ψ̂_k).

B-mode self-term. That argument holds for a φ estimate independent of the B modes (checked: with an external
φ̂ of the same noise, one step at nside 256, 0.5 µK-arcmin gives response 0.99 and noise 1.03 N_k). The EB
estimate is built from the same B modes it delenses, and the template then holds each observed B_ℓm itself:
the delensed B is short of ε_ℓ B_ℓm (:func:`b_mode_self_term`, ε ≈ 0.4 at ℓ ≲ 100 at 0.5 µK-arcmin), which
left alone cuts the next step's response to 0.65-0.77 and wipes out the gain. Each step adds ε_ℓ B_ℓm back
(first order in the template). Measured on simulations (docs/validation.md): after one step the response is
0.92-0.95 and the noise, after a Monte-Carlo response correction, is below the quadratic estimator's by about
the forecast gain. Later steps use ε from the previous step's noise, weights and filter; that first-order
estimate over-corrects there (response 1.12-1.17 after two steps) and further steps do not add gain in these
tests, so one step (``lensing_iterations=1``) is the recommended setting; the response correction from
simulations is required in every case.

Inverse deflection. Lensing maps the unlensed field X to X̃(n) = X(n + d(n)). Undoing it needs
X(n) = X̃(n + d⁻¹(n)) with n + d⁻¹(n) + d(n + d⁻¹(n)) = n, i.e. the fixed point d⁻¹(n) = −d(n + d⁻¹(n))
(the vector at the displaced point parallel-transported back to n), solved by repetition from d⁻¹ = −d
(each pass shrinks the error by ~|∇d|, a few 10⁻², so ``INVERSE_PASSES`` = 2 leaves ~10⁻⁴ of d; Carron & Lewis 2017,
PRD 96, 063510, appendix). −∇φ^WF is only its first-order approximation; the difference (d·∇)d is of the
order of the lensing B modes' own size at small scales. d⁻¹ is a general spin-1 field (it has a curl
part), analyzed into potentials (φ_inv, Ω_inv) and applied with the exact remapping engine.

What is delensed: E and B (the EB estimator's fields); T is left as observed. Noise is remapped with the
signal; for white noise the remap is area-preserving to first order and leaves its spectrum unchanged.

Curl after iterating: Ω̂ is the curl estimate of the last step, ψ̂_k's curl part, i.e. the curl of the
residual deflection of the delensed fields — a null test with the converged filters (lensing has no curl at
Born order), whose noise is the curl N0 of the last step.

Compared with the maximum a posteriori estimate (Carron & Lewis 2017, PRD 96, 063510): MAP maximizes the
lensing posterior with a conjugate gradient over the lensed-CMB covariance at every step (the lensing
operator and its adjoint); its gradient is a likelihood derivative, so the B modes' own contribution is
handled exactly rather than by the first-order self-term above, and it converges over several steps. The
scheme here needs only the quadratic estimator and one remap per step, and was chosen for that; its limits
are the self-term's first-order treatment and the response correction it needs. Full sky, isotropic noise
only: the analytic normalization of every step assumes the isotropic filter.

Cost (benchmarks/bench_iterative.py, nside 2048, ℓ_max 3000, 2 threads, in units of one spin-2 HEALPix
synthesis of that size timed in the same process, benchmarks/RESULTS.md): one step 11.2 units, the
quadratic EB estimate from the maps 9.5 units, peak RSS 5.5 GB, measured on a heavily shared machine. Each step is: the inverse deflection (spin-1 syntheses on a Gauss–Legendre
grid, two non-uniform spin-1 syntheses, one spin-1 analysis), one exact remap of E and B (a spin-2
non-uniform synthesis and analysis), the partially delensed spectra (~1 s) and the EB estimate (six leg
syntheses, one spin-1 analysis). A MAP step instead runs a conjugate gradient whose every iteration applies
the remapping and its adjoint, so each of its steps costs several of these.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import replace
from types import MappingProxyType

import numpy as np

from . import harmonics
from ._checks import as_int, resolve_nthreads
from .experiment import Experiment, load_experiment
from .filtering import IsotropicFilter
from .harmonics import ell_of_alm, gl_grid_for_band_limits
from .iterative_noise import _with_lensed, partially_delensed_spectra
from .labels import ITERATIVE_ESTIMATORS, parse_estimator
from .lensed_spectra import first_order_lensed_bb
from .reconstruction import Reconstruction, reconstruct_filtered
from .remapping import (
    LENSED_TAIL,
    _deflection_on_grid,
    _displaced_positions,
    _gradient_coefficients,
    _rotate_in_place,
    lens_alm,
)
from .spectra import Spectra, fiducial_spectra
from .wiener_filters import wiener_filter_phi

__all__ = [
    "MAP_ESTIMATORS",
    "b_mode_self_term",
    "inverse_deflection",
    "iterate_reconstruction",
    "check_lensing_iterations",
]

# The map iteration delenses E and B and re-estimates with EB (the iterative estimator that carries the gain).
MAP_ESTIMATORS = tuple(label for label in ITERATIVE_ESTIMATORS if label == "EB")
INVERSE_PASSES = 2
_EPSILON = 1e-7


def check_lensing_iterations(lensing_iterations, estimator) -> int:
    """Validate a number of lensing iterations for ``estimator`` (0 = the quadratic estimator).

    Raises
    ------
    TypeError, ValueError
        Naming the value: a non-integer, a negative number, or iterations > 0 with an estimator that has no
        iterative form for maps.
    """
    if isinstance(lensing_iterations, bool) or not isinstance(lensing_iterations, (int, np.integer)):
        raise TypeError(f"lensing_iterations must be a non-negative integer, got {lensing_iterations!r}")
    count = int(lensing_iterations)
    if count < 0:
        raise ValueError(f"lensing_iterations must be >= 0 (0 = the quadratic estimator), got {count}")
    if count > 0 and estimator not in MAP_ESTIMATORS:
        raise ValueError(
            f"lensing_iterations={count} needs an estimator with an iterative form ({', '.join(MAP_ESTIMATORS)}); "
            f"estimator {estimator!r} has none: use lensing_iterations=0 or estimator='EB'"
        )
    return as_int(count, "lensing_iterations", minimum=0, maximum=100)


# ------------------------------------------------------------------------------------ inverse deflection
def inverse_deflection(phi_alm, lmax_out=None, passes=INVERSE_PASSES, nthreads=None):
    """Potentials (φ_inv, Ω_inv) of the inverse of the deflection d = ∇φ: remapping by them undoes lensing.

    Solves d⁻¹(n) = −d(n + d⁻¹(n)) (parallel-transported back to n) by ``passes`` repetitions from −d on a
    Gauss–Legendre grid, then analyses d⁻¹ = ∇φ_inv + n̂ × ∇Ω_inv into its two potentials.

    Parameters
    ----------
    phi_alm : complex array, shape (nalm(L_max),)
        Lensing potential φ_LM.
    lmax_out : int, optional
        Band limit of the output potentials (default L_max).
    passes : int
        Fixed-point repetitions (default 2; 0 returns −φ and Ω = 0).
    nthreads : int, optional

    Returns
    -------
    phi_inv, curl_inv : complex ndarray, shape (nalm(lmax_out),)

    References
    ----------
    Carron & Lewis 2017, PRD 96, 063510 (inverse deflection by fixed-point iteration).
    """
    phi_alm = np.asarray(phi_alm, dtype=np.complex128)
    lmax_L = harmonics.lmax_from_nalm(phi_alm.size, "phi_alm")
    lmax_out = lmax_L if lmax_out is None else as_int(lmax_out, "lmax_out", minimum=1)
    passes = as_int(passes, "passes", minimum=0, maximum=20)
    nthreads = resolve_nthreads(nthreads)
    # d⁻¹ carries products of d with its gradient; as for a lensed field (remapping.LENSED_TAIL), their power
    # beyond L_max + min(L_max, 1000) is negligible, so the grid integrates d⁻¹ to lmax_out as if band-limited there
    grid = gl_grid_for_band_limits(lmax_out, lmax_L + min(lmax_L, LENSED_TAIL))
    coefficients = _gradient_coefficients(phi_alm, None, lmax_L)
    forward = _deflection_on_grid(coefficients, lmax_L, grid, nthreads)
    inverse = -forward
    for _ in range(passes):
        loc, rotation = _displaced_positions(inverse, grid, 1, nthreads)
        values = harmonics._synthesis_at(coefficients, loc, 1, lmax_L, _EPSILON, nthreads)
        _rotate_in_place(values, rotation, nthreads)
        inverse = -values.reshape(2, grid.ntheta, grid.nphi)
    potentials = grid.analysis(inverse, lmax_out, spin=1, nthreads=nthreads)
    ell = ell_of_alm(lmax_out).astype(np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        scale = np.where(ell > 0, 1.0 / np.sqrt(ell * (ell + 1.0)), 0.0)
    return potentials[0] * scale, potentials[1] * scale


def b_mode_self_term(weights_ee, n0, phi_spectrum, total_bb, lmax):
    """ε_ℓ: the fraction of the observed B_ℓm that delensing with a Wiener-filtered EB estimate removes as itself.

    The template T = ∇E·∇φ^WF built from φ^WF = W φ̂, φ̂ = A Σ w E B, contains each observed B_ℓm through φ̂:
    contracting the template's E with the E inside φ̂ leaves −ε_ℓ B_ℓm in the delensed B, with (the first-order
    lensing kernel ₂F of :func:`lensrec.first_order_lensed_bb`, K[a, b]_ℓ = (2ℓ+1)⁻¹ Σ |₂F_ℓLℓ'|² b_L a_ℓ')::

        ε_ℓ = K[C^EE_w, C^φφ N/(C^φφ + N)]_ℓ / C^BB_tot,ℓ ,

    C^EE_w the E spectrum in the estimator's weights, N its noise, C^BB_tot its B filter's total power (the
    template's E is the observed E, whose power cancels the E filter). It is the internal-delensing bias of
    Namikawa 2017 (PRD 95, 103514) in the form the next estimator sees: ε reaches 0.4 at ℓ ≲ 100 at
    0.5 µK-arcmin. Adding ε_ℓ B_ℓm back to the delensed B removes it to first order.
    """
    ee = np.zeros(lmax + 1)
    ee[2:] = np.asarray(weights_ee, dtype=np.float64)[2 : lmax + 1]
    noise = np.asarray(n0, dtype=np.float64)
    signal = np.asarray(phi_spectrum, dtype=np.float64)[: lmax + 1]
    residual = np.zeros(lmax + 1)
    top = min(lmax, noise.size - 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        part = signal[: top + 1] * noise[: top + 1] / (signal[: top + 1] + noise[: top + 1])
    residual[2 : top + 1] = np.nan_to_num(part[2:], nan=0.0, posinf=0.0)
    convolved = first_order_lensed_bb(ee, residual, lmax, ell_margin=0)
    total = np.asarray(total_bb, dtype=np.float64)[: lmax + 1]
    usable = np.isfinite(total) & (total > 0)
    out = np.zeros(lmax + 1)
    out[usable] = convolved[usable] / total[usable]
    return out


def _delens_polarization(eb_alm, phi_alm, lmax, nthreads):
    """E, B (beam-deconvolved, to lmax) remapped with the inverse deflection of φ."""
    phi_inv, curl_inv = inverse_deflection(phi_alm, nthreads=nthreads)
    return lens_alm(eb_alm, phi_inv, lmax, spin=2, lmax_in=lmax, curl_alm=curl_inv, nthreads=nthreads)


# ------------------------------------------------------------------------------------------- iteration
def iterate_reconstruction(
    maps,
    experiment,
    spectra: Spectra | None = None,
    estimator: str = "EB",
    lensing_iterations: int = 1,
    lmax_L: int | None = None,
    lmax: int | None = None,
    jacobi_iterations: int | str = "auto",
    nthreads: int | None = None,
    progress: Callable | None = None,
    cancel=None,
) -> Reconstruction:
    """Iterative EB reconstruction of φ from full-sky T, Q, U maps (module docstring for the scheme).

    Parameters
    ----------
    maps : array, shape (3, 12·nside²)
        Observed T, Q, U (µK, RING), full sky, isotropic noise.
    experiment : Experiment or str
    spectra : Spectra, optional
        Theory spectra (default the fiducial cosmology); C^φφ for the Wiener filter and the delensed spectra.
    estimator : str
        "EB" (the estimator with an iterative form for maps).
    lensing_iterations : int
        Delens-and-estimate steps after the quadratic estimate (≥ 0; 0 returns the quadratic estimate).
    lmax_L, lmax, jacobi_iterations, nthreads
        As :func:`lensrec.reconstruct` (lmax ≤ 2·nside recommended).
    progress : callable, optional
        ``progress(done, total)`` after the quadratic estimate and after every step (total = iterations + 1).
    cancel : threading.Event, optional
        Checked before every step; when set, the estimate of the last finished step is returned with
        ``settings["cancelled"] = True``.

    Returns
    -------
    Reconstruction
        ``phi_alm`` = the final φ̂_k, ``curl_alm`` = the last step's curl, ``n0`` and ``response`` of the last
        step; ``settings["lensing_iterations"]`` (steps done), ``settings["n0_per_iteration"]`` (gradient and
        curl N0 of every step, 0 = quadratic), ``settings["seconds_per_iteration"]``.

    Raises
    ------
    TypeError, ValueError
        Negative or non-integer ``lensing_iterations`` or an estimator other than "EB" with iterations,
        naming the value; and everything :func:`lensrec.reconstruct` refuses.
    """
    estimator = parse_estimator(estimator)
    count = check_lensing_iterations(lensing_iterations, estimator)
    if progress is not None and not callable(progress):
        raise TypeError(f"progress must be callable as progress(done, total), got {type(progress).__name__}")
    if cancel is not None and not callable(getattr(cancel, "is_set", None)):
        raise TypeError(f"cancel must be a threading.Event (anything with is_set()), got {type(cancel).__name__}")
    experiment = load_experiment(experiment)
    if not isinstance(experiment, Experiment):
        raise TypeError(f"experiment must be an Experiment, got {type(experiment).__name__}")
    spectra = fiducial_spectra() if spectra is None else spectra
    nthreads = resolve_nthreads(nthreads)
    first_filter = IsotropicFilter(
        experiment, spectra, lmax=lmax, jacobi_iterations=jacobi_iterations, nthreads=nthreads
    )
    experiment, lmax = first_filter.experiment, first_filter.lmax
    start = time.perf_counter()
    fields = first_filter.filter(maps)
    observed = harmonics.map2alm_tqu(
        np.asarray(maps, dtype=np.float64),
        lmax,
        jacobi_iterations=fields.settings["jacobi_iterations"],  # the count the filter used ("auto" resolved)
        nthreads=nthreads,
    )
    current = reconstruct_filtered(
        fields, experiment, spectra=spectra, estimator=estimator, lmax_L=lmax_L, nthreads=nthreads
    )
    lmax_L = current.lmax_L
    seconds = [time.perf_counter() - start]
    history = [{c: current.n0[c].tolist() for c in current.n0}]
    if progress is not None:
        progress(1, count + 1)
    beam = experiment.beam(lmax)
    ell = ell_of_alm(lmax)
    with np.errstate(divide="ignore"):
        unbeam = np.where(beam > 0, 1.0 / np.where(beam > 0, beam, 1.0), 0.0)
    polarization = observed[1:] * unbeam[ell]
    phi_hat = current.phi_alm
    weights_ee, filter_bb = spectra.lensed["EE"], first_filter.total["BB"]
    done, cancelled = 0, False
    for _ in range(count):
        if cancel is not None and cancel.is_set():
            cancelled = True
            break
        start = time.perf_counter()
        noise = np.asarray(current.n0["gradient"])
        wiener = wiener_filter_phi(phi_hat, noise, phi_spectrum=spectra.phi)
        delensed = _delens_polarization(polarization, wiener, lmax, nthreads)
        # undo the B modes' own share of the template (module docstring, "B-mode self-term")
        self_term = b_mode_self_term(weights_ee, noise, spectra.phi, filter_bb, lmax)
        delensed[1] += self_term[ell] * polarization[1]
        partial, _ = partially_delensed_spectra(
            spectra, noise, lmax, polarization_only=True, experiment=experiment, nthreads=nthreads
        )
        spectra_k = _with_lensed(spectra, partial)
        step_filter = IsotropicFilter(
            experiment, spectra_k, lmax=lmax, jacobi_iterations=jacobi_iterations, nthreads=nthreads
        )
        alm = np.empty_like(observed)
        alm[0] = observed[0]
        alm[1:] = delensed * beam[ell]
        step = reconstruct_filtered(
            step_filter.filter_alm(alm),
            experiment,
            spectra=spectra_k,
            estimator=estimator,
            lmax_L=lmax_L,
            nthreads=nthreads,
        )
        weights_ee, filter_bb = spectra_k.lensed["EE"], step_filter.total["BB"]
        phi_hat = wiener + step.phi_alm
        phi_hat[ell_of_alm(lmax_L) < 2] = 0.0
        current = step
        done += 1
        seconds.append(time.perf_counter() - start)
        history.append({c: step.n0[c].tolist() for c in step.n0})
        if progress is not None:
            progress(done + 1, count + 1)
    settings = dict(current.settings)
    settings.update(
        {
            "lensing_iterations": done,
            "lensing_iterations_requested": count,
            "cancelled": cancelled,
            "n0_per_iteration": history,
            "seconds_per_iteration": seconds,
            "combination": "phi_k = WienerFilter(phi_{k-1}) + normalized estimate from the delensed fields",
            "delensed_fields": ["E", "B"],
            "inverse_passes": INVERSE_PASSES,
        }
    )
    return replace(current, phi_alm=_readonly(phi_hat), settings=MappingProxyType(settings))


def _readonly(array) -> np.ndarray:
    out = np.array(array, dtype=np.complex128, copy=True)
    out.setflags(write=False)
    return out
