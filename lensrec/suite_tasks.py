"""The science of one index of a lensing suite: simulate → filter → reconstruct, and the mixed pair estimates.

Each task is a top-level function ``task(settings, index) -> dict of arrays``, deterministic in its inputs,
run by :func:`lensrec.suite_runner.run_suite` for :func:`lensrec.run_lensing_suite` (see
:mod:`lensrec.suites` for the stages and what each stores).
"""

from __future__ import annotations

import threading
from dataclasses import dataclass

import numpy as np

from ._checks import as_int
from .harmonics import ell_of_alm, truncate_alm
from .suite_runner import settings_fingerprint
from .suite_settings import (
    COMPONENTS,
    ESTIMATORS,
    SYMMETRIC_ESTIMATORS,
    _array_digest,
    _check_settings,
    _jsonable,
    _read_data_maps,
    estimate_key,
)

__all__ = ["lensing_simulation_task", "lensing_pair_task", "n1_pair_estimates", "suite_spectra", "suite_analytic_n0"]


# --------------------------------------------------------------------------------------------- context
@dataclass
class _Context:
    experiment: object
    filter: object
    noise: object
    spectra: object
    mask: np.ndarray | None
    nthreads: int


_CONTEXTS: dict[str, _Context] = {}
_CONTEXT_LOCK = threading.Lock()


def _context(settings: dict) -> _Context:
    """Filter, normalization and mask of a suite, built once per process (they depend only on the settings)."""
    from .estimator_noise import reconstruction_noise
    from .experiment import Experiment
    from .filtering import IsotropicFilter
    from .masks import load_mask

    key = settings_fingerprint({k: v for k, v in settings.items() if k not in ("role", "n_sims")})
    with _CONTEXT_LOCK:
        if key in _CONTEXTS:
            return _CONTEXTS[key]
    spectra = suite_spectra(settings)
    experiment = Experiment.from_dict(dict(settings["experiment"]))
    nthreads = int(settings["nthreads"])
    mask = None
    if settings["mask_sha256"] is not None:
        path = settings.get("_mask_path")
        if not path:
            raise ValueError("the suite uses a mask but its file location (_mask_path) is missing")
        mask = load_mask(path, settings["nside"])
        if _array_digest(mask) != settings["mask_sha256"]:
            raise ValueError(
                f"mask file {path!r} changed since the suite was set up (its SHA-256 differs); restore it "
                "or start a new suite"
            )
    field_filter = IsotropicFilter(experiment, spectra, lmax=settings["lmax"], mask=mask, nthreads=nthreads)
    noise = reconstruction_noise(
        field_filter.experiment,
        spectra,
        estimators=ESTIMATORS,
        lmax_L=settings["lmax_L"],
        nthreads=nthreads,
        weights=settings.get("weights", "lensed"),
    )
    context = _Context(experiment, field_filter, noise, spectra, mask, nthreads)
    with _CONTEXT_LOCK:
        if len(_CONTEXTS) >= 4:  # a long-lived worker may see several suites; keep the memory bounded
            _CONTEXTS.clear()
        _CONTEXTS[key] = context
    return context


def suite_spectra(settings: dict):
    """The theory spectra of a suite (lensrec's fiducial ones; a suite made with others is refused)."""
    from .spectra import fiducial_spectra

    spectra = fiducial_spectra()
    if _jsonable(dict(spectra.metadata)) != _check_settings(settings)["spectra"]:
        raise ValueError(
            "this suite was made with other spectra than lensrec's fiducial ones; it cannot be "
            "continued with this version"
        )
    return spectra


def suite_analytic_n0(settings: dict, estimator: str, component: str = "gradient", nthreads: int | None = None):
    """Analytic Gaussian N0 (C_L, L = 0 … lmax_L; NaN below L = 2) of one estimator of a suite.

    The full-sky N0 of the normalization the suite's reconstructions use: the suite's experiment with its
    multipoles cut at the suite's lmax, the suite's spectra and weights (lensed unless the suite chose others; Okamoto & Hu 2003, PRD 67,
    083002). Only this estimator is computed (and its pairs, for a combination); no filter or mask is built.
    """
    from .estimator_noise import reconstruction_noise
    from .experiment import Experiment
    from .filtering import IsotropicFilter

    settings = _check_settings(settings)
    if component not in COMPONENTS:
        raise ValueError(f"component must be one of {COMPONENTS}, got {component!r}")
    spectra = suite_spectra(settings)
    experiment = IsotropicFilter(
        Experiment.from_dict(dict(settings["experiment"])), spectra, lmax=settings["lmax"]
    ).experiment  # its multipoles cut at lmax, as in the suite's filter
    nthreads = int(settings["nthreads"]) if nthreads is None else nthreads
    noise = reconstruction_noise(
        experiment,
        spectra,
        estimators=(estimator,),
        lmax_L=settings["lmax_L"],
        nthreads=nthreads,
        weights=settings.get("weights", "lensed"),
    )
    return np.asarray(noise.n0[estimator][component])


def _reconstruct(first, second, estimator: str, context: _Context, settings: dict, symmetrize: bool = False):
    from .labels import JOINT_ESTIMATORS
    from .reconstruction import reconstruct_filtered

    if estimator in JOINT_ESTIMATORS:  # the suite stores per-field filtered fields; the joint ones follow exactly
        first = context.filter.joint_fields(first)
        second = None if second is None else context.filter.joint_fields(second)
    result = reconstruct_filtered(
        first,
        context.filter.experiment,
        second=second,
        spectra=context.spectra,
        estimator=estimator,
        lmax_L=settings["lmax_L"],
        noise=context.noise,
        nthreads=context.nthreads,
        symmetrize=symmetrize,
        weights=settings.get("weights", "lensed"),
    )
    return {"gradient": np.array(result.phi_alm), "curl": np.array(result.curl_alm)}


def _iterated(maps, estimator: str, context: _Context, settings: dict) -> dict:
    """The iterative estimate of full-sky maps (lensing_iterations steps; lensrec.iterative_reconstruction)."""
    from .iterative_reconstruction import iterate_reconstruction

    result = iterate_reconstruction(
        maps,
        context.filter.experiment,
        spectra=context.spectra,
        estimator=estimator,
        lensing_iterations=settings["lensing_iterations"],
        lmax_L=settings["lmax_L"],
        lmax=settings["lmax"],
        nthreads=context.nthreads,
    )
    return {"gradient": np.array(result.phi_alm), "curl": np.array(result.curl_alm)}


def _symmetric_pair(first, second, estimator: str, context: _Context, settings: dict) -> dict:
    """φ̂{a, b} = (φ̂[a, b] + φ̂[b, a]) / 2 for both components, in one pass (each input's legs synthesized
    once, one analysis per estimator; lensrec.reconstruction.quadratic_estimates)."""
    return _reconstruct(first, second, estimator, context, settings, symmetrize=estimator not in SYMMETRIC_ESTIMATORS)


def _fields_from_alm(alm: np.ndarray, context: _Context, settings: dict):
    """Rebuild stored filtered fields as FilteredFields (the signal spectra define only the Wiener filter)."""
    from .filtering import FilteredFields

    lmax = settings["lmax"]
    lensed = context.spectra.cmb(lensed=True)
    signal = {key: lensed[key][: lmax + 1] for key in ("TT", "EE", "BB", "TE")}
    return FilteredFields(alm, lmax, signal, settings["mask_moments"], {"filter": "isotropic", "source": "suite"})


def _noise_free_fields(lensed_alm: np.ndarray, context: _Context, settings: dict):
    """Filtered fields of a lensed CMB without noise, observed through the beam (and the mask, if any)."""
    from . import harmonics

    lmax = settings["lmax"]
    observed = lensed_alm * context.experiment.beam(lmax)[ell_of_alm(lmax)]
    if context.mask is None:
        return context.filter.filter_alm(observed)
    maps = harmonics.alm2map_tqu(observed, settings["nside"], lmax, nthreads=context.nthreads)
    return context.filter.filter(maps)


def _simulation_spectra(settings: dict, spectra):
    """The spectra the skies are drawn from: the fiducial ones, or for Gaussian skies the lensed CMB spectra
    as the "unlensed" input with φ = 0 (so the remapping is the identity and the sky is Gaussian)."""
    from .spectra import Spectra

    if settings["lensing"]:
        return spectra
    return Spectra(
        unlensed=spectra.lensed,
        lensed=spectra.lensed,
        phi=np.zeros_like(spectra.phi),
        tensor=spectra.tensor,
        metadata=dict(spectra.metadata),
    )


def _simulate(settings: dict, context: _Context, seed: int, index: int, noise: bool | None = None):
    from .sky import simulate_sky

    # the mask is applied once, by the filter (simulate_sky would multiply the maps by it too)
    noise = settings["noise"] if noise is None else noise
    return simulate_sky(
        context.experiment,
        _simulation_spectra(settings, context.spectra),
        nside=settings["nside"],
        lmax=settings["lmax"],
        seed=seed,
        index=index,
        lmax_margin=settings["lmax_margin"],
        noise=noise,
        epsilon=settings["epsilon"],
        nthreads=context.nthreads,
    )


# ----------------------------------------------------------------------------------------------- tasks
def lensing_simulation_task(settings: dict, index: int) -> dict[str, np.ndarray]:
    """Simulate, filter and reconstruct one map set of a suite (role "simulation" or "data").

    Parameters
    ----------
    settings : dict
        Stage settings (:func:`lensing_suite_settings` plus ``role``), as passed by the runner.
    index : int
        Simulation index (0 for the data).

    Returns
    -------
    dict of arrays
        ``filtered`` (3, nalm(lmax)) T̄, Ē, B̄ (µK⁻¹); ``phi_input`` (nalm(lmax_L)) for simulated skies;
        ``auto_<component>_<estimator>`` normalized φ̂ / Ω̂ (nalm(lmax_L)); with ``n1``, for simulations,
        ``n1_shared_…`` and ``n1_independent_…`` (see the module docstring).
    """
    settings = _check_settings(settings)
    role = settings.get("role")
    if role not in ("simulation", "data"):
        raise ValueError(f"lensing_simulation_task runs the 'simulation' and 'data' roles, got {role!r}")
    context = _context(settings)
    lmax, lmax_L = settings["lmax"], settings["lmax_L"]
    lmax_unlensed = lmax + settings["lmax_margin"]
    sky = None
    if role == "data" and settings["data"]["source"] == "maps":
        maps = _read_data_maps(settings["_data_maps_path"], settings["nside"])
        if _array_digest(maps) != settings["data"]["sha256"]:
            raise ValueError(
                f"data maps {settings['_data_maps_path']!r} changed since the suite was set up "
                "(SHA-256 differs); restore them or start a new suite"
            )
    else:
        seed = settings["data"]["seed"] if role == "data" else settings["seed"]
        sky = _simulate(settings, context, seed, int(index))
        maps = sky.maps
    fields = context.filter.filter(maps)
    out = {"filtered": np.array(fields.alm)}
    if sky is not None:
        out["phi_input"] = truncate_alm(sky.phi_alm, lmax_L, lmax_unlensed)
    for estimator in settings["estimators"]:
        if settings.get("lensing_iterations", 0):
            estimate = _iterated(maps, estimator, context, settings)
        else:
            estimate = _reconstruct(fields, None, estimator, context, settings)
        for component in COMPONENTS:
            out[estimate_key("auto", component, estimator)] = estimate[component]
    if role == "simulation" and _has_n1_pairs(settings, index):
        out.update(n1_pair_estimates(settings, index, sky))
    return out


def n1_pair_estimates(settings: dict, index: int, sky=None) -> dict[str, np.ndarray]:
    """The two N1 pair estimates of simulation ``index``: φ̂{a_i, b_i} (shared φ) and φ̂{a_i, b'_i}.

    a_i is the lensed CMB of simulation i without noise, b_i the second CMB of index i (stream
    "cmb_second") lensed by the same φ_i, b'_i that second CMB lensed by the φ of index i + 1; all three
    are observed through the beam (and mask) and filtered like the data (:mod:`lensrec.biases`, eq. 3).

    Parameters
    ----------
    settings : dict
        Suite settings (:func:`lensing_suite_settings`, ``lensing=True``).
    index : int
    sky : SimulatedSky, optional
        Simulation ``index`` if already made (its ``lensed_alm`` and ``phi_alm`` are used); otherwise it is
        simulated again (without noise, which a_i does not use).

    Returns
    -------
    dict
        ``n1_shared_<component>_<estimator>`` and ``n1_independent_<component>_<estimator>``, nalm(lmax_L).
    """
    from .seeding import rng_for
    from .sky import gaussian_alm, gaussian_cmb_alm, lens_tqu_alm

    settings = _check_settings(settings)
    if not settings["lensing"]:
        raise ValueError("N1 pair estimates need lensed simulations (lensing=True in the suite settings)")
    index = as_int(index, "index", minimum=0)
    context = _context(settings)
    if sky is None:
        sky = _simulate(settings, context, settings["seed"], index, noise=False)
    lmax = settings["lmax"]
    lmax_unlensed = lmax + settings["lmax_margin"]
    nthreads = context.nthreads
    unlensed = context.spectra.cmb(lensed=False)
    cls = {key: unlensed[key][: lmax_unlensed + 1] for key in ("TT", "EE", "BB", "TE")}
    second_cmb = gaussian_cmb_alm(cls, lmax_unlensed, rng_for(settings["seed"], index, "cmb_second"), nthreads)
    # the φ of the next index: independent of φ_i (and of every CMB used here)
    other_phi = gaussian_alm(context.spectra.phi, lmax_unlensed, rng_for(settings["seed"], index + 1, "phi"), nthreads)
    legs = {}
    for name, phi in (("shared", sky.phi_alm), ("independent", other_phi)):
        lensed = lens_tqu_alm(
            second_cmb, phi, lmax, lmax_in=lmax_unlensed, epsilon=settings["epsilon"], nthreads=nthreads
        )
        legs[name] = _noise_free_fields(lensed, context, settings)
    first_leg = _noise_free_fields(np.array(sky.lensed_alm), context, settings)
    out = {}
    for estimator in settings["estimators"]:
        for name, leg in legs.items():
            estimate = _symmetric_pair(first_leg, leg, estimator, context, settings)
            for component in COMPONENTS:
                out[estimate_key(f"n1_{name}", component, estimator)] = estimate[component]
    return out


def _has_n1_pairs(settings: dict, index: int) -> bool:
    limit = settings.get("n1_sims")
    return bool(settings["n1"]) and (limit is None or index < limit)


def lensing_pair_task(settings: dict, index: int) -> dict[str, np.ndarray]:
    """Mixed pair estimates of simulation ``index``: φ̂{d, s_i} and, for i ≥ 1, φ̂{s_{i−1}, s_i}.

    Reads the filtered fields of the data and of the simulations from the suite folder
    (``settings["_directory"]``), each verified against its checksum.

    Returns
    -------
    dict of arrays
        ``data_sim_<component>_<estimator>`` and (i ≥ 1) ``sim_sim_<component>_<estimator>``, nalm(lmax_L).
    """
    settings = _check_settings(settings)
    if settings.get("role") != "pairs":
        raise ValueError(f"lensing_pair_task runs the 'pairs' role, got {settings.get('role')!r}")
    index = as_int(index, "index", minimum=0)
    context = _context(settings)
    from .suites import _open_cache

    directory = settings["_directory"]
    data_cache = _open_cache(directory, settings, "data")
    sim_cache = _open_cache(directory, settings, "simulations")
    data = _fields_from_alm(data_cache.load(0)["filtered"], context, settings)
    current = _fields_from_alm(sim_cache.load(index)["filtered"], context, settings)
    previous = None
    if index >= 1:
        previous = _fields_from_alm(sim_cache.load(index - 1)["filtered"], context, settings)
    out = {}
    for estimator in settings["estimators"]:
        estimate = _symmetric_pair(data, current, estimator, context, settings)
        for component in COMPONENTS:
            out[estimate_key("data_sim", component, estimator)] = estimate[component]
        if previous is not None:
            estimate = _symmetric_pair(previous, current, estimator, context, settings)
            for component in COMPONENTS:
                out[estimate_key("sim_sim", component, estimator)] = estimate[component]
    return out


# Suite folders record each stage's task as "lensrec.suites:<name>" (lensrec.suite_runner checks it when a
# suite is resumed, and workers import the task by that name); the tasks are re-exported there, so keep
# that name for suites made before they moved here.
lensing_simulation_task.__module__ = "lensrec.suites"
lensing_pair_task.__module__ = "lensrec.suites"
