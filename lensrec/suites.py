r"""Simulation suites for the lensing power spectrum: simulate → filter → reconstruct, cached and resumable.

A *lensing suite* is an experiment and its analysis settings (nside, lmax, lmax_L, estimators, noise, mask,
lmax_margin, threads_per_task), a seed and a number of simulations, plus the *data*: the map set being
analysed, either a simulation of its own seed (``data_seed``, never one of the suite's simulations) or
your own T, Q, U maps. :func:`lensing_suite_settings` validates all of it into plain JSON;
:func:`run_lensing_suite` computes it with :func:`lensrec.suite_runner.run_suite` (caching, checksums,
resuming, executors, progress bars, cancellation) in three stages, each its own cached folder:

``DIR/data/``
    The data: filtered fields T̄, Ē, B̄ and the normalised φ̂ and Ω̂ (curl) of every estimator.
``DIR/simulations/``
    Per simulation i (:func:`lensing_simulation_task`): a lensed, noisy sky (:func:`lensrec.simulate_sky`,
    seed, index i) filtered (:class:`lensrec.filtering.IsotropicFilter`, with the mask) and reconstructed
    (:func:`lensrec.reconstruction.reconstruct_filtered`); stored: the input φ to lmax_L, the filtered
    fields (for mixed pairs), φ̂{s_i, s_i} and Ω̂ per estimator. With ``n1=True`` also the two N1 pair
    estimates of :mod:`lensrec.biases` eq. (3), φ̂{a_i, b_i} and φ̂{a_i, b'_i}: a_i is simulation i's
    lensed CMB without noise, b_i a second CMB (stream "cmb_second" of index i) lensed by the same φ_i,
    b'_i the same second CMB lensed by the φ of index i + 1 (independent of φ_i). N1 legs carry no noise
    (noise adds only scatter) but pass through the same filter and mask.
``DIR/pairs/``
    Per simulation i (:func:`lensing_pair_task`): the mixed pair estimates that RDN0 and the Monte-Carlo
    N0 need, φ̂{d, s_i} and, for i ≥ 1, φ̂{s_{i−1}, s_i}. Pairs never depend on the number of
    simulations, so growing a suite reuses every stored pair.

φ̂{a, b} = (φ̂[a, b] + φ̂[b, a])/2 is the symmetrised pair estimate (one call for TT and EE, whose
estimates are symmetric in their legs; two otherwise). Everything is deterministic in (settings, index)
through :func:`lensrec.seeding.rng_for`, and every transform of a task uses ``threads_per_task`` threads,
so the stored arrays are bit-identical whichever executor ran them. The bandpowers, the bias budget and
the amplitude fit are in :mod:`lensrec.bandpowers`.

Running on a laptop
===================
Two worker processes with one thread each are usually fastest on a small machine::

    import lensrec
    settings = lensrec.lensing_suite_settings("deep_highland", nside=256, lmax=512, lmax_L=400,
                                              estimators="EB", n_sims=16, seed=1, n1=True, lmax_margin=256)
    suite = lensrec.run_lensing_suite(settings, "suite_dir", executor="processes", max_workers=2)
    result = lensrec.lensing_bandpowers(suite)
    print(result.amplitude, result.amplitude_error)

or through a dask LocalCluster (the same cached results; its dashboard shows the tasks)::

    from distributed import Client, LocalCluster
    with LocalCluster(n_workers=2, threads_per_worker=1) as cluster, Client(cluster) as client:
        suite = lensrec.run_lensing_suite(settings, "suite_dir", executor=client)

The command line does the same: ``lensrec suite run --experiment deep_highland --nside 256 --lmax 512
--lmax-L 400 --estimators EB --n-sims 16 --seed 1 --n1 --executor processes --workers 2 --out suite_dir``,
then ``lensrec suite report suite_dir --out report_dir``. A run stopped by Ctrl-C resumes where it stopped.

Running on a batch cluster (dask-jobqueue; not tested here)
===========================================================
Each dask worker is one batch job; the suite folder must be on a file system that every node sees::

    from dask_jobqueue import SLURMCluster
    from distributed import Client
    cluster = SLURMCluster(cores=4, processes=4, memory="16GB", walltime="02:00:00",
                           job_extra_directives=["--constraint=cpu"])
    cluster.scale(jobs=8)                      # 32 workers of one thread
    client = Client(cluster)
    settings = lensrec.lensing_suite_settings("wide_lowland", nside=2048, lmax=3000, lmax_L=2000,
                                              n_sims=400, seed=7, n1=True, threads_per_task=1)
    suite = lensrec.run_lensing_suite(settings, "/shared/scratch/suite_wide", executor=client)

or, from a login node, ``lensrec suite run ... --executor dask --scheduler tcp://HOST:8786``. A job that
hits its wall time loses only its running simulations; run the same command again to finish.
"""

from __future__ import annotations

import hashlib
import os
import shutil
import threading
from dataclasses import dataclass, field

import numpy as np

from ._checks import as_float, as_int, check_lmax_for_nside, check_nside
from .harmonics import ell_of_alm, truncate_alm
from .io import read_json, write_json
from .suite_runner import SuiteCache, SuiteRun, _task_name, run_suite, settings_fingerprint

__all__ = [
    "LensingSuite",
    "lensing_suite_settings",
    "lensing_simulation_task",
    "lensing_pair_task",
    "n1_pair_estimates",
    "run_lensing_suite",
    "open_lensing_suite",
    "estimate_key",
]

SUITE_KIND = "lensing_suite"
SUITE_FORMAT = 1
SUITE_FILE = "suite.json"
STAGES = ("data", "simulations", "pairs")
COMPONENTS = ("gradient", "curl")
ESTIMATORS = ("TT", "TE", "EE", "TB", "EB", "MV")
SYMMETRIC_ESTIMATORS = ("TT", "EE")  # φ̂[a, b] = φ̂[b, a] (lensrec.reconstruction, leg order)
MIN_SIMS = 4  # RDN0 needs two data × sim and two sim × sim pairs; each simulation's half-split needs two others
DEFAULT_LMAX_MARGIN = 1000


def estimate_key(kind: str, component: str, estimator: str) -> str:
    """Name of a stored estimate: ``kind`` in {"auto", "data_sim", "sim_sim", "n1_shared", "n1_independent"}.

    Examples
    --------
    >>> estimate_key("auto", "gradient", "MV")
    'auto_gradient_MV'
    """
    return f"{kind}_{component}_{estimator}"


# -------------------------------------------------------------------------------------------- settings
def _array_digest(array: np.ndarray) -> str:
    return hashlib.sha256(np.ascontiguousarray(array, dtype=np.float64).tobytes()).hexdigest()


def _parse_estimators(estimators) -> list[str]:
    if isinstance(estimators, str):
        estimators = [part.strip() for part in estimators.split(",") if part.strip()]
    try:
        labels = list(estimators)
    except TypeError:
        raise TypeError(f"estimators must be labels from {ESTIMATORS}, got {estimators!r}") from None
    if not labels:
        raise ValueError(f"estimators must name at least one of {ESTIMATORS}, got none")
    for label in labels:
        if label not in ESTIMATORS:
            raise ValueError(f"unknown estimator {label!r}; allowed: {', '.join(ESTIMATORS)}")
    if len(set(labels)) != len(labels):
        raise ValueError(f"estimators lists a label twice: {labels}")
    return labels


def lensing_suite_settings(
    experiment="deep_highland",
    nside: int = 512,
    lmax: int | None = None,
    lmax_L: int | None = None,
    estimators=("MV",),
    n_sims: int = 16,
    seed: int = 0,
    n1: bool = False,
    n1_sims: int | None = None,
    mask=None,
    noise: bool = True,
    lensing: bool = True,
    lmax_margin: int = DEFAULT_LMAX_MARGIN,
    threads_per_task: int = 1,
    data_seed: int | None = None,
    data_maps=None,
    epsilon: float = 1e-7,
) -> dict:
    """Validated, plain-JSON settings of a lensing suite (the input of :func:`run_lensing_suite`).

    Parameters
    ----------
    experiment : Experiment or str
        The survey (noise, beam, ℓ cuts), or a shipped name / TOML path; stored in full, so a changed
        TOML file is a different suite.
    nside : int
        HEALPix resolution of the maps; default 512.
    lmax : int, optional
        CMB band limit of the simulated sky and of the filter (default 2·nside, ≤ 3·nside − 1); the
        experiment's ℓ_max is capped at it.
    lmax_L : int, optional
        Highest lensing multipole (default and maximum: the capped CMB ℓ_max).
    estimators : str or sequence of str
        Labels from "TT", "TE", "EE", "TB", "EB", "MV" (default "MV"); "TT,EB" works too.
    n_sims : int
        Number of simulations (≥ 4); may grow later without recomputing anything.
    seed : int
        Seed of the simulations (≥ 0).
    n1 : bool
        Also store the pair estimates for the Monte-Carlo N1 (three lensing operations per simulation
        instead of one); default False.
    n1_sims : int, optional
        With ``n1``, only simulations 0 … n1_sims − 1 carry the N1 pairs (default: all). The Monte-Carlo
        error of N1 is small (the paired construction cancels most of the Gaussian scatter), so a few
        simulations usually suffice; at least 2.
    mask : str or path, optional
        HEALPix FITS mask (weights in [0, 1], apodized, same nside), applied by the filter to every map
        set; its content is fingerprinted (SHA-256), its path is only where to read it.
    noise : bool
        Add instrument noise to the simulations (default True).
    lensing : bool
        True (default): skies lensed by a Gaussian φ (exact remapping). False: *Gaussian* skies, Gaussian
        realisations of the lensed CMB spectra with the same noise and no lensing signal (φ = 0), the
        standard check of N0 and of the filters: their quadratic estimates have exactly the Gaussian
        noise of :func:`lensrec.reconstruction_noise`. N1 needs lensing.
    lmax_margin : int
        Multipoles of the unlensed fields beyond lmax (see :func:`lensrec.simulate_sky`); default 1000.
    threads_per_task : int
        Threads of every transform in a task (default 1); fixed so that results do not depend on the
        executor.
    data_seed : int, optional
        Seed of the simulated data (index 0 of that seed); default ``seed + 1``; must differ from ``seed``.
    data_maps : str or path, optional
        Your own observed T, Q, U maps (HEALPix FITS, µK, same nside) as the data instead of a simulation.
    epsilon : float
        Accuracy of the lensing remapping (see :func:`lensrec.simulate_sky`); default 1e-7.

    Returns
    -------
    dict
        Plain JSON values. Keys starting with "_" hold file locations (not fingerprinted).

    Raises
    ------
    TypeError, ValueError
        For any invalid value, before any work.

    Examples
    --------
    >>> s = lensing_suite_settings("deep_highland", nside=64, lmax=128, lmax_L=100, estimators="EB",
    ...                            n_sims=4, lmax_margin=64)
    >>> s["lmax_L"], s["estimators"], s["data"]
    (100, ['EB'], {'source': 'simulation', 'seed': 1})
    """
    from .experiment import load_experiment
    from .masks import load_mask, sky_fraction_moments
    from .spectra import fiducial_spectra

    experiment = load_experiment(experiment)
    nside = check_nside(nside)
    lmax = check_lmax_for_nside(2 * nside if lmax is None else lmax, nside)
    cmb_lmax = min(max(experiment.ell_max_temperature, experiment.ell_max_polarization), lmax)
    if cmb_lmax <= experiment.ell_min:
        raise ValueError(f"lmax={lmax} leaves no multipole above the experiment's ell_min={experiment.ell_min}")
    lmax_L = cmb_lmax if lmax_L is None else as_int(lmax_L, "lmax_L", minimum=2)
    if lmax_L > cmb_lmax:
        raise ValueError(
            f"lmax_L={lmax_L} exceeds the CMB band limit {cmb_lmax} of the filtered maps "
            f"(min(lmax, experiment ell_max)); choose lmax_L <= {cmb_lmax}"
        )
    seed = as_int(seed, "seed", minimum=0)
    data_seed = seed + 1 if data_seed is None else as_int(data_seed, "data_seed", minimum=0)
    if data_seed == seed:
        raise ValueError(
            f"data_seed must differ from seed (got {seed} for both): the data must be independent of "
            "the simulations that debias it"
        )
    for name, value in (("n1", n1), ("noise", noise), ("lensing", lensing)):
        if not isinstance(value, (bool, np.bool_)):
            raise TypeError(f"{name} must be True or False, got {value!r}")
    if n1_sims is not None:
        if not n1:
            raise ValueError(f"n1_sims={n1_sims!r} was given without n1=True")
        n1_sims = as_int(n1_sims, "n1_sims", minimum=2, maximum=as_int(n_sims, "n_sims"))
    if n1 and not lensing:
        raise ValueError(
            "n1=True needs lensed simulations (lensing=True): N1 comes from the lensing four-point "
            "function, which Gaussian skies do not have"
        )
    spectra = fiducial_spectra()
    lmax_margin = as_int(lmax_margin, "lmax_margin", minimum=0, maximum=20000)
    if lmax + lmax_margin > spectra.lmax:
        raise ValueError(
            f"lmax + lmax_margin = {lmax + lmax_margin} exceeds the fiducial spectra's reach "
            f"(l <= {spectra.lmax}); lower lmax_margin"
        )
    settings = {
        "kind": SUITE_KIND,
        "format": SUITE_FORMAT,
        "experiment": experiment.to_dict(),
        "spectra": dict(spectra.metadata),
        "nside": nside,
        "lmax": lmax,
        "lmax_L": lmax_L,
        "estimators": _parse_estimators(estimators),
        "noise": bool(noise),
        "lensing": bool(lensing),
        "lmax_margin": lmax_margin,
        "epsilon": as_float(epsilon, "epsilon", minimum=2e-13, maximum=0.1),
        "threads_per_task": as_int(threads_per_task, "threads_per_task", minimum=1, maximum=256),
        "seed": seed,
        "n_sims": as_int(n_sims, "n_sims", minimum=MIN_SIMS, maximum=100000),
        "n1": bool(n1),
        "n1_sims": n1_sims,
        "mask_sha256": None,
        "mask_moments": None,
        "data": {"source": "simulation", "seed": data_seed},
    }
    if mask is not None:
        if not isinstance(mask, (str, os.PathLike)):
            raise TypeError(f"mask must be the path of a HEALPix FITS mask, got {type(mask).__name__}")
        array = load_mask(mask, nside)
        settings["mask_sha256"] = _array_digest(array)
        settings["mask_moments"] = sky_fraction_moments(array)
        settings["_mask_path"] = os.path.abspath(os.fspath(mask))
    if data_maps is not None:
        if not isinstance(data_maps, (str, os.PathLike)):
            raise TypeError(
                f"data_maps must be the path of a HEALPix FITS file of T, Q, U, got {type(data_maps).__name__}"
            )
        maps = _read_data_maps(os.fspath(data_maps), nside)
        settings["data"] = {"source": "maps", "sha256": _array_digest(maps)}
        settings["_data_maps_path"] = os.path.abspath(os.fspath(data_maps))
    return settings


def _read_data_maps(path: str, nside: int) -> np.ndarray:
    from .io import read_maps

    maps = np.atleast_2d(read_maps(path))
    if maps.shape != (3, 12 * nside * nside):
        raise ValueError(
            f"data maps {path!r} must hold T, Q, U at nside {nside} (shape (3, {12 * nside * nside})), "
            f"got shape {maps.shape}"
        )
    return maps


def _check_settings(settings) -> dict:
    if not isinstance(settings, dict):
        raise TypeError(f"settings must be the dict of lensing_suite_settings(...), got {type(settings).__name__}")
    if settings.get("kind") != SUITE_KIND or settings.get("format") != SUITE_FORMAT:
        raise ValueError(
            f"settings are not lensing-suite settings of format {SUITE_FORMAT} (kind={settings.get('kind')!r}, "
            f"format={settings.get('format')!r}); build them with lensing_suite_settings(...)"
        )
    return settings


def _stage_settings(settings: dict, stage: str, directory: str | None = None) -> dict:
    base = {key: value for key, value in settings.items() if key not in ("role", "_directory")}
    if stage == "data":
        return {**base, "role": "data", "n_sims": 1}
    if stage == "simulations":
        return {**base, "role": "simulation"}
    if stage == "pairs":
        return {**base, "role": "pairs", "_directory": os.path.abspath(directory)}
    raise ValueError(f"stage must be one of {STAGES}, got {stage!r}")


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
    """Filter, normalisation and mask of a suite, built once per process (they depend only on the settings)."""
    from .estimator_noise import reconstruction_noise
    from .experiment import Experiment
    from .filtering import IsotropicFilter
    from .masks import load_mask
    from .spectra import fiducial_spectra

    key = settings_fingerprint({k: v for k, v in settings.items() if k not in ("role", "n_sims")})
    with _CONTEXT_LOCK:
        if key in _CONTEXTS:
            return _CONTEXTS[key]
    spectra = fiducial_spectra()
    if _jsonable(dict(spectra.metadata)) != settings["spectra"]:
        raise ValueError(
            "this suite was made with other spectra than lensrec's fiducial ones; it cannot be "
            "continued with this version"
        )
    experiment = Experiment.from_dict(dict(settings["experiment"]))
    nthreads = int(settings["threads_per_task"])
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
        field_filter.experiment, spectra, estimators=ESTIMATORS, lmax_L=settings["lmax_L"], nthreads=nthreads
    )
    context = _Context(experiment, field_filter, noise, spectra, mask, nthreads)
    with _CONTEXT_LOCK:
        if len(_CONTEXTS) >= 4:  # a long-lived worker may see several suites; keep the memory bounded
            _CONTEXTS.clear()
        _CONTEXTS[key] = context
    return context


def _jsonable(value):
    import json

    from .suite_runner import _plain

    return json.loads(json.dumps(value, default=_plain))


def _reconstruct(first, second, estimator: str, context: _Context, settings: dict):
    from .reconstruction import reconstruct_filtered

    result = reconstruct_filtered(
        first,
        context.filter.experiment,
        second=second,
        spectra=context.spectra,
        estimator=estimator,
        lmax_L=settings["lmax_L"],
        noise=context.noise,
        nthreads=context.nthreads,
    )
    return {"gradient": np.array(result.phi_alm), "curl": np.array(result.curl_alm)}


def _symmetric_pair(first, second, estimator: str, context: _Context, settings: dict) -> dict:
    """φ̂{a, b} = (φ̂[a, b] + φ̂[b, a]) / 2 for both components."""
    forward = _reconstruct(first, second, estimator, context, settings)
    if estimator in SYMMETRIC_ESTIMATORS:
        return forward
    backward = _reconstruct(second, first, estimator, context, settings)
    return {c: 0.5 * (forward[c] + backward[c]) for c in COMPONENTS}


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
        ``auto_<component>_<estimator>`` normalised φ̂ / Ω̂ (nalm(lmax_L)); with ``n1``, for simulations,
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


_TASKS = {"data": lensing_simulation_task, "simulations": lensing_simulation_task, "pairs": lensing_pair_task}


def _open_cache(directory: str, settings: dict, stage: str) -> SuiteCache:
    stage_settings = _stage_settings(settings, stage, directory)
    return SuiteCache.open(os.path.join(directory, stage), stage_settings, _task_name(_TASKS[stage]))


# -------------------------------------------------------------------------------------------- running
@dataclass
class LensingSuite:
    """A lensing suite on disk: its settings and the cached stages (see the module docstring).

    Attributes
    ----------
    directory : str
    settings : dict
        As made by :func:`lensing_suite_settings` (``n_sims`` is the number requested last).
    runs : dict stage → SuiteRun
        What the last :func:`run_lensing_suite` call did (empty for :func:`open_lensing_suite`).
    cancelled : bool
        True when the last run was cancelled before finishing.
    """

    directory: str
    settings: dict
    runs: dict = field(default_factory=dict)
    cancelled: bool = False

    @property
    def n_sims(self) -> int:
        return int(self.settings["n_sims"])

    @property
    def estimators(self) -> list[str]:
        return list(self.settings["estimators"])

    def cache(self, stage: str) -> SuiteCache:
        """The :class:`lensrec.suite_runner.SuiteCache` of ``stage`` ("data", "simulations" or "pairs")."""
        return _open_cache(self.directory, self.settings, stage)

    @property
    def complete(self) -> bool:
        """True when every stage holds all of its entries (verified checksums are checked on load)."""
        needed = {"data": 1, "simulations": self.n_sims, "pairs": self.n_sims}
        return all(set(range(count)) <= set(self.cache(stage).finished()) for stage, count in needed.items())

    def data(self) -> dict[str, np.ndarray]:
        """Stored arrays of the data (checksum verified)."""
        return self.cache("data").load(0)

    def simulation(self, index: int) -> dict[str, np.ndarray]:
        """Stored arrays of simulation ``index`` (checksum verified)."""
        return self.cache("simulations").load(as_int(index, "index", 0, self.n_sims - 1))

    def pairs(self, index: int) -> dict[str, np.ndarray]:
        """Stored pair estimates of simulation ``index`` (checksum verified)."""
        return self.cache("pairs").load(as_int(index, "index", 0, self.n_sims - 1))


def _differing(old: dict, new: dict) -> list[str]:
    keys = set(old) | set(new)
    return sorted(k for k in keys if k != "n_sims" and not str(k).startswith("_") and old.get(k) != new.get(k))


def _clear(directory: str) -> None:
    """Remove the stages and the suite file of a lensing suite folder (nothing else in it)."""
    for stage in STAGES:
        path = os.path.join(directory, stage)
        if os.path.isdir(path):
            shutil.rmtree(path)
    for name in (SUITE_FILE,):
        path = os.path.join(directory, name)
        if os.path.exists(path):
            os.unlink(path)


def _verify_inputs(settings: dict) -> None:
    """The mask and data files must still hold what the settings fingerprinted (checked before any work)."""
    from .masks import load_mask

    if settings["mask_sha256"] is not None:
        path = settings.get("_mask_path")
        if not path or _array_digest(load_mask(path, settings["nside"])) != settings["mask_sha256"]:
            raise ValueError(
                f"mask file {path!r} changed since the suite was set up (its SHA-256 differs) or is "
                "missing; restore it or start a new suite"
            )
    if settings["data"]["source"] == "maps":
        path = settings.get("_data_maps_path")
        if not path or _array_digest(_read_data_maps(path, settings["nside"])) != settings["data"]["sha256"]:
            raise ValueError(
                f"data maps {path!r} changed since the suite was set up (SHA-256 differs) or are "
                "missing; restore them or start a new suite"
            )


def run_lensing_suite(
    settings: dict,
    directory,
    executor="serial",
    max_workers: int | None = None,
    progress=True,
    cancel: threading.Event | None = None,
    force: bool = False,
) -> LensingSuite:
    """Compute (or finish) a lensing suite in ``directory``: the data, the simulations, the pair estimates.

    Parameters
    ----------
    settings : dict
        From :func:`lensing_suite_settings`.
    directory : path
        The suite folder. A folder holding the same suite is resumed (finished simulations whose checksum
        verifies are reused; more simulations may be requested); one holding another suite is refused.
    executor : {"serial", "processes"} or dask.distributed.Client
        Where the tasks run (see :func:`lensrec.suite_runner.run_suite`).
    max_workers : int, optional
        Process-pool size (default 2).
    progress : bool or callable
        tqdm bars per stage (``True``), none (``False``) or ``progress(done, total)``.
    cancel : threading.Event, optional
        Stop starting new tasks once set; finished ones stay cached.
    force : bool
        Delete a different suite's stages in ``directory`` and start afresh (default False: refuse).

    Returns
    -------
    LensingSuite

    Raises
    ------
    ValueError
        Settings of another suite in ``directory`` (the differing keys are listed), invalid settings.
    """
    settings = _check_settings(settings)
    _verify_inputs(settings)
    directory = os.path.abspath(os.fspath(directory))
    if os.path.exists(directory) and not os.path.isdir(directory):
        raise ValueError(f"suite folder {directory!r} exists and is not a folder")
    os.makedirs(directory, exist_ok=True)
    suite_path = os.path.join(directory, SUITE_FILE)
    if os.path.exists(suite_path):
        old = read_json(suite_path).get("settings", {})
        keys = _differing(old, _jsonable(settings))
        if keys and not force:
            raise ValueError(
                f"suite folder {directory!r} holds a suite made with other settings (differing: "
                f"{', '.join(keys)}); use a new folder, or force to delete the old results"
            )
        if keys:
            _clear(directory)
    elif force:
        _clear(directory)
    write_json(
        suite_path,
        {
            "kind": SUITE_KIND,
            "format": SUITE_FORMAT,
            "settings": settings,
            "fingerprint": settings_fingerprint(settings),
        },
        force=True,
    )
    suite = LensingSuite(directory, dict(settings))
    for stage in STAGES:
        stage_settings = _stage_settings(settings, stage, directory)
        run: SuiteRun = run_suite(
            stage_settings,
            os.path.join(directory, stage),
            _TASKS[stage],
            executor=executor,
            max_workers=max_workers,
            progress=progress,
            cancel=cancel,
            label=stage,
        )
        suite.runs[stage] = run
        if run.cancelled:
            suite.cancelled = True
            break
    return suite


def open_lensing_suite(directory) -> LensingSuite:
    """Open a suite folder written by :func:`run_lensing_suite` (for reports; nothing is computed).

    Raises
    ------
    ValueError
        No suite in ``directory``, or a suite file of another kind or format.
    """
    directory = os.path.abspath(os.fspath(directory))
    path = os.path.join(directory, SUITE_FILE)
    if not os.path.isfile(path):
        raise ValueError(f"{directory!r} holds no lensing suite (no {SUITE_FILE}); run 'lensrec suite run' first")
    document = read_json(path)
    settings = document.get("settings")
    if document.get("kind") != SUITE_KIND or not isinstance(settings, dict):
        raise ValueError(f"{path!r} is not a lensing-suite file")
    return LensingSuite(directory, _check_settings(settings))
