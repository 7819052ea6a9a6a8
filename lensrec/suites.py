r"""Simulation suites for the lensing power spectrum: simulate → filter → reconstruct, cached and resumable.

A *lensing suite* is an experiment and its analysis settings (nside, lmax, lmax_L, estimators, noise, mask,
lmax_margin, nthreads), a seed and a number of simulations, plus the *data*: the map set being
analyzed, either a simulation of its own seed (``data_seed``, never one of the suite's simulations) or
your own T, Q, U maps. :func:`lensing_suite_settings` validates all of it into plain JSON;
:func:`run_lensing_suite` computes it with :func:`lensrec.suite_runner.run_suite` (caching, checksums,
resuming, executors, progress bars, cancellation) in three stages, each its own cached folder:

``DIR/data/``
    The data: filtered fields T̄, Ē, B̄ and the normalized φ̂ and Ω̂ (curl) of every estimator.
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

φ̂{a, b} = (φ̂[a, b] + φ̂[b, a])/2 is the symmetrized pair estimate (one call for TT and EE, whose
estimates are symmetric in their legs; two otherwise). Everything is deterministic in (settings, index)
through :func:`lensrec.seeding.rng_for`, and every transform of a task uses ``nthreads`` threads,
so the stored arrays are bit-identical whichever executor ran them. The bandpowers, the bias budget and
the amplitude fit are in :mod:`lensrec.bandpowers`. This module keeps the suite folder (storage, caching,
running); the settings are validated by :mod:`lensrec.suite_settings` and the per-index science is
:mod:`lensrec.suite_tasks` (both re-exported here).

Running on a laptop
===================
Two worker processes with one thread each are usually fastest on a small machine::

    import lensrec
    settings = lensrec.lensing_suite_settings("deep_highland", nside=256, lmax=512, lmax_L=400,
                                              estimators="EB", n_sims=16, seed=1, n1=True, lmax_margin=256)
    suite = lensrec.run_lensing_suite(settings, "suite_dir", executor="processes", workers=2)
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
                                              n_sims=400, seed=7, n1=True, nthreads=1)
    suite = lensrec.run_lensing_suite(settings, "/shared/scratch/suite_wide", executor=client)

or, from a login node, ``lensrec suite run ... --executor dask --scheduler tcp://HOST:8786``. A job that
hits its wall time loses only its running simulations; run the same command again to finish.
"""

from __future__ import annotations

import inspect
import os
import shutil
import threading
import warnings
from dataclasses import dataclass, field

import numpy as np

from ._checks import as_int
from ._deprecation import renamed_arguments
from .io import read_json, write_json
from .suite_runner import SuiteCache, SuiteRun, _task_name, run_suite, settings_fingerprint
from .suite_settings import (  # noqa: F401  (re-exported: the settings lived here)
    COMPONENTS,
    DEFAULT_LMAX_MARGIN,
    ESTIMATORS,
    MIN_SIMS,
    STAGES,
    SUITE_FILE,
    SUITE_FORMAT,
    SUITE_KIND,
    SYMMETRIC_ESTIMATORS,
    _array_digest,
    _check_settings,
    _jsonable,
    _parse_estimators,
    _read_data_maps,
    _stage_settings,
    estimate_key,
    lensing_suite_settings,
    upgrade_settings,
)
from .suite_tasks import (  # noqa: F401  (re-exported: the per-index science lived here)
    _context,
    _fields_from_alm,
    _reconstruct,
    lensing_pair_task,
    lensing_simulation_task,
    n1_pair_estimates,
)

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


# ------------------------------------------------------------------------------------------- storage
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


@renamed_arguments(max_workers="workers")
def run_lensing_suite(
    settings: dict,
    directory,
    executor="serial",
    workers: int | None = None,
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
    workers : int, optional
        Process-pool size (default 2).
    progress : bool or callable
        tqdm bars per stage (``True``), none (``False``) or ``progress(done, total, stage)``, called with the
        stage that is running (one of :data:`lensrec.labels.SUITE_STAGES`: "data", "simulations", "pairs")
        and its counts. A callable that takes only ``(done, total)`` still works for one release, with a
        DeprecationWarning.
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
        old = upgrade_settings(read_json(suite_path).get("settings", {}))
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
            workers=workers,
            progress=_stage_progress(progress, stage),
            cancel=cancel,
            label=stage,
        )
        suite.runs[stage] = run
        if run.cancelled:
            suite.cancelled = True
            break
    return suite


def _stage_progress(progress, stage: str):
    """The progress argument of one stage's run: a callable gets the stage named as its third argument."""
    if not callable(progress):
        return progress
    try:
        inspect.signature(progress).bind(0, 0, stage)
    except TypeError:
        warnings.warn(
            "a run_lensing_suite progress callback should take (done, total, stage); (done, total) is deprecated "
            "and stops working in the next release",
            DeprecationWarning,
            stacklevel=3,
        )
        return progress
    except ValueError:  # no signature to inspect (some builtins): pass the stage
        pass
    return lambda done, total: progress(done, total, stage)


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
