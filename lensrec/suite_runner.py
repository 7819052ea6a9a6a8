"""Run a suite of simulations, one index at a time, with an on-disk cache that survives crashes.

A *suite* is a settings dict (experiment, resolution, estimators, seed, ...) plus a number of simulations.
For each index the runner calls a *task*, a top-level function ``task(settings, index) -> dict[str,
ndarray]``, and stores its arrays in ``<folder>/sims/sim_<index>.npz`` (written atomically, no pickle).
``<folder>/manifest.json`` records the settings, their fingerprint and the SHA-256 of every stored file.

- Resuming: finished indices whose checksum verifies are not recomputed, so a suite stopped by a crash or
  Ctrl-C continues where it stopped and ends with the same answer as an uninterrupted run.
- Safety: a folder that holds a suite made with other settings is refused (the message lists the keys that
  differ); a stored file whose checksum fails is reported, deleted and recomputed, never used. Settings
  keys that start with "_" reach the task but are not fingerprinted: they say where inputs live on this
  machine (a folder, a file path), whose contents the fingerprinted keys pin (e.g. by a checksum).
- Executors: ``"serial"``, ``"processes"`` (``concurrent.futures.ProcessPoolExecutor``) or any
  ``dask.distributed.Client`` (a ``LocalCluster`` on a laptop, or a batch-system cluster through
  dask-jobqueue). Tasks are deterministic functions of (settings, index) through
  :func:`lensrec.seeding.rng_for`, and each runs with the same thread count (``settings["nthreads"]``),
  so the stored arrays are bit-identical whichever executor ran them.

Worker processes write their own result files and return only (index, file name, checksum); nothing is
unpickled from disk.
"""

from __future__ import annotations

import hashlib
import importlib
import json
import os
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from ._checks import as_int
from ._deprecation import renamed_arguments
from .io import atomic_path, file_sha256, read_json, write_json

__all__ = ["SuiteCache", "SuiteRun", "run_suite", "settings_fingerprint"]

MANIFEST = "manifest.json"
FORMAT_VERSION = 1


def _fingerprinted(key) -> bool:
    """Keys that describe what is computed; ``n_sims`` and keys starting with "_" (where inputs live on this
    machine, e.g. a mask file's path whose content is fingerprinted by its checksum) are not."""
    return key != "n_sims" and not str(key).startswith("_")


# Fingerprints are taken on the key spelling of the first suites ("threads_per_task", mask moments "fsky" and
# "fsky_spectra"), so that suites written before the names were unified resume with the same fingerprint.
_FINGERPRINT_SPELLING = {"nthreads": "threads_per_task"}
_MASK_MOMENT_SPELLING = {"sky_fraction": "fsky", "sky_fraction_spectra": "fsky_spectra"}


def _fingerprint_spelling(key, value):
    if key == "mask_moments" and isinstance(value, dict):
        value = {_MASK_MOMENT_SPELLING.get(k, k): v for k, v in value.items()}
    return _FINGERPRINT_SPELLING.get(key, key), value


def settings_fingerprint(settings: dict) -> str:
    """SHA-256 of the canonical JSON of ``settings`` (the number of simulations and "_" keys are not part of it)."""
    canonical = dict(_fingerprint_spelling(k, v) for k, v in settings.items() if _fingerprinted(k))
    text = json.dumps(canonical, sort_keys=True, separators=(",", ":"), default=_plain)
    return hashlib.sha256(text.encode()).hexdigest()


def _plain(value):
    if isinstance(value, (np.integer, np.floating, np.bool_)):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, tuple):
        return list(value)
    raise TypeError(f"suite settings must be plain JSON values, got {type(value).__name__}")


def _task_name(task: Callable) -> str:
    name = f"{task.__module__}:{task.__qualname__}"
    if "<" in task.__qualname__:
        raise TypeError(f"the suite task must be a top-level (importable) function, got {name}")
    return name


def _resolve_task(name: str) -> Callable:
    module, _, qualname = name.partition(":")
    target = importlib.import_module(module)
    for part in qualname.split("."):
        target = getattr(target, part)
    return target


def execute_one(task_name: str, settings: dict, index: int, directory: str) -> tuple[int, str, str]:
    """Worker entry point: run the task for ``index`` and store its arrays; return (index, file, sha256)."""
    task = _resolve_task(task_name)
    arrays = task(settings, index)
    if not isinstance(arrays, dict) or not arrays:
        raise TypeError(f"suite task {task_name} must return a non-empty dict of arrays, got {type(arrays).__name__}")
    name = f"sim_{index:05d}.npz"
    path = os.path.join(directory, "sims", name)
    clean = {}
    for key, value in arrays.items():
        value = np.asarray(value)
        if value.dtype == object:
            raise TypeError(f"suite task output {key!r} has dtype object; only numeric arrays are stored")
        clean[key] = value
    with atomic_path(path, force=True, suffix=".npz") as tmp:
        with open(tmp, "wb") as handle:
            np.savez(handle, **clean)
    return index, name, file_sha256(path)


@dataclass
class SuiteCache:
    """The folder of a suite: its manifest and the stored arrays of each finished simulation."""

    directory: str
    settings: dict
    entries: dict[int, dict] = field(default_factory=dict)

    @property
    def manifest_path(self) -> str:
        return os.path.join(self.directory, MANIFEST)

    @classmethod
    def open(cls, directory: str, settings: dict, task_name: str) -> SuiteCache:
        """Open (or create) the cache in ``directory``, refusing one made with other settings."""
        directory = os.fspath(directory)
        os.makedirs(os.path.join(directory, "sims"), exist_ok=True)
        cache = cls(directory=directory, settings=dict(settings))
        if os.path.exists(cache.manifest_path):
            manifest = read_json(cache.manifest_path)
            if manifest.get("fingerprint") != settings_fingerprint(settings) or manifest.get("task") != task_name:
                old = manifest.get("settings", {})
                keys = sorted(
                    k
                    for k in set(old) | set(settings)
                    if _fingerprinted(k) and old.get(k) != _jsonable(settings.get(k))
                )
                if manifest.get("task") != task_name:
                    keys.append(f"task ({manifest.get('task')} vs {task_name})")
                raise ValueError(
                    f"suite folder {directory!r} holds results made with other settings (differing: {', '.join(keys) or 'unknown'}); "
                    "use a new folder, or delete this one, so that results are never mixed"
                )
            cache.entries = {int(k): v for k, v in manifest.get("entries", {}).items()}
        return cache

    def path_of(self, index: int) -> str:
        return os.path.join(self.directory, "sims", self.entries[index]["file"])

    def verify(self, index: int) -> bool:
        """True if ``index`` is stored and its checksum matches."""
        entry = self.entries.get(index)
        if entry is None:
            return False
        path = os.path.join(self.directory, "sims", entry["file"])
        return os.path.isfile(path) and file_sha256(path) == entry["sha256"]

    def record(self, index: int, name: str, checksum: str, task_name: str) -> None:
        self.entries[index] = {"file": name, "sha256": checksum}
        self.write_manifest(task_name)

    def forget(self, index: int, task_name: str) -> None:
        entry = self.entries.pop(index, None)
        if entry is not None:
            path = os.path.join(self.directory, "sims", entry["file"])
            if os.path.exists(path):
                os.unlink(path)
            self.write_manifest(task_name)

    def write_manifest(self, task_name: str) -> None:
        write_json(
            self.manifest_path,
            {
                "format_version": FORMAT_VERSION,
                "task": task_name,
                "fingerprint": settings_fingerprint(self.settings),
                "settings": _jsonable(self.settings),
                "entries": {str(k): self.entries[k] for k in sorted(self.entries)},
            },
            force=True,
        )

    def load(self, index: int) -> dict[str, np.ndarray]:
        """The stored arrays of simulation ``index`` (checksum verified first)."""
        if not self.verify(index):
            raise ValueError(
                f"simulation {index} of suite {self.directory!r} is missing or fails its checksum; rerun the suite"
            )
        with np.load(self.path_of(index), allow_pickle=False) as data:
            return {key: data[key] for key in data.files}

    def finished(self) -> list[int]:
        return sorted(self.entries)


def _jsonable(value):
    return json.loads(json.dumps(value, default=_plain))


@dataclass
class SuiteRun:
    """What one call of :func:`run_suite` did."""

    cache: SuiteCache
    computed: list[int]
    reused: list[int]
    recomputed_corrupt: list[int]
    cancelled: bool
    seconds: float


@renamed_arguments(max_workers="workers")
def run_suite(
    settings: dict,
    directory,
    task: Callable,
    executor="serial",
    workers: int | None = None,
    progress=True,
    cancel: threading.Event | None = None,
    indices=None,
    label: str = "simulations",
) -> SuiteRun:
    """Run ``task`` for every simulation index of the suite, reusing verified cached results.

    Parameters
    ----------
    settings : dict
        Plain JSON values describing the suite; must contain ``n_sims`` (and should contain ``seed``).
    directory : path
        The suite folder (created if needed).
    task : callable
        A top-level function ``task(settings, index) -> dict[str, ndarray]``, deterministic in its inputs.
    executor : {"serial", "processes"} or dask.distributed.Client
        Where the tasks run.
    workers : int, optional
        Process-pool size (default: 2).
    progress : bool or callable
        ``True`` shows a tqdm bar; a callable is called as ``progress(done, total)``.
    cancel : threading.Event, optional
        When set, no new task starts; finished ones stay cached; the run returns with ``cancelled=True``.
    indices : iterable of int, optional
        Run only these indices (default: ``range(n_sims)``).
    label : str
        Description shown on the progress bar (default "simulations").

    Returns
    -------
    SuiteRun
    """
    if not isinstance(settings, dict):
        raise TypeError(f"settings must be a dict, got {type(settings).__name__}")
    n_sims = as_int(settings.get("n_sims"), "settings['n_sims']", minimum=1, maximum=100000)
    task_name = _task_name(task)
    _jsonable(settings)  # refuses non-JSON settings early
    cache = SuiteCache.open(directory, settings, task_name)
    wanted = list(range(n_sims)) if indices is None else [as_int(i, "index", 0, n_sims - 1) for i in indices]
    start = time.perf_counter()
    reused, corrupt = [], []
    todo = []
    for index in wanted:
        if index in cache.entries:
            if cache.verify(index):
                reused.append(index)
                continue
            corrupt.append(index)
            import warnings

            warnings.warn(
                f"suite {cache.directory!r}: simulation {index} failed its checksum; recomputing it",
                RuntimeWarning,
                stacklevel=2,
            )
            cache.forget(index, task_name)
        todo.append(index)
    if cache.entries == {} and not os.path.exists(cache.manifest_path):
        cache.write_manifest(task_name)

    bar, report = _progress(progress, len(wanted), len(reused), label)
    computed: list[int] = []
    cancelled = False

    def done(result):
        index, name, checksum = result
        cache.record(index, name, checksum, task_name)
        computed.append(index)
        report(1)

    try:
        if executor == "serial":
            for index in todo:
                if cancel is not None and cancel.is_set():
                    cancelled = True
                    break
                done(execute_one(task_name, settings, index, cache.directory))
        elif executor == "processes":
            cancelled = _run_pool(task_name, settings, cache.directory, todo, workers or 2, cancel, done)
        elif hasattr(executor, "submit") and hasattr(executor, "gather"):
            cancelled = _run_dask(executor, task_name, settings, cache.directory, todo, cancel, done)
        else:
            raise ValueError(f"executor must be 'serial', 'processes' or a dask.distributed.Client, got {executor!r}")
    finally:
        if bar is not None:
            bar.close()
    return SuiteRun(
        cache=cache,
        computed=sorted(computed),
        reused=reused,
        recomputed_corrupt=corrupt,
        cancelled=cancelled,
        seconds=time.perf_counter() - start,
    )


def _progress(progress, total: int, initial: int, label: str = "simulations"):
    if callable(progress):
        state = {"done": initial}

        def report(step):
            state["done"] += step
            progress(state["done"], total)

        progress(initial, total)
        return None, report
    if progress:
        from tqdm.auto import tqdm

        bar = tqdm(total=total, initial=initial, desc=label, unit="sim")
        return bar, bar.update
    return None, lambda step: None


def _run_pool(task_name, settings, directory, todo, workers, cancel, done) -> bool:
    import multiprocessing
    from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait

    context = multiprocessing.get_context("spawn")  # fork is unsafe after threaded transforms ran
    pending = list(todo)
    running = set()
    with ProcessPoolExecutor(max_workers=workers, mp_context=context) as pool:
        try:
            while pending or running:
                while pending and len(running) < workers and not (cancel is not None and cancel.is_set()):
                    running.add(pool.submit(execute_one, task_name, settings, pending.pop(0), directory))
                if not running:
                    return True
                finished, running = wait(running, timeout=0.5, return_when=FIRST_COMPLETED)
                for future in finished:
                    done(future.result())
        except BaseException:
            for future in running:
                future.cancel()
            raise
    return bool(pending)


def _run_dask(client, task_name, settings, directory, todo, cancel, done) -> bool:
    from distributed import as_completed

    futures = [client.submit(execute_one, task_name, settings, index, directory, pure=False) for index in todo]
    try:
        for future in as_completed(futures):
            done(future.result())
            if cancel is not None and cancel.is_set():
                remaining = [f for f in futures if not f.done()]
                client.cancel(remaining)
                return bool(remaining)
    except BaseException:
        client.cancel(futures)
        raise
    return False


def gaussian_field_task(settings: dict, index: int) -> dict[str, np.ndarray]:
    """A cheap reference task: a Gaussian spin-0 field with spectrum 1/(ℓ+1)², its map and its spectrum.

    Used to test and benchmark the runner itself (executors, caching, resuming) without the full pipeline.
    Settings keys: ``seed``, ``nside``, ``lmax``, ``nthreads``.
    """
    import ducc0

    from .seeding import rng_for

    lmax = int(settings["lmax"])
    nside = int(settings["nside"])
    rng = rng_for(int(settings["seed"]), index, "cmb")
    nalm = (lmax + 1) * (lmax + 2) // 2
    alm = (rng.standard_normal(nalm) + 1j * rng.standard_normal(nalm)) / np.sqrt(2.0)
    alm[: lmax + 1] = alm[: lmax + 1].real * np.sqrt(2.0)
    ell = np.concatenate([np.arange(m, lmax + 1) for m in range(lmax + 1)])
    alm *= 1.0 / (ell + 1.0)
    base = ducc0.healpix.Healpix_Base(nside, "RING")
    geometry = base.sht_info()
    field_map = ducc0.sht.synthesis(
        alm=alm[None, :], lmax=lmax, spin=0, nthreads=int(settings.get("nthreads", 1)), **geometry
    )[0]
    weight = np.where(np.arange(nalm) <= lmax, 1.0, 2.0)  # the first lmax+1 entries are m = 0
    power = np.bincount(ell, weights=weight * np.abs(alm) ** 2, minlength=lmax + 1) / (2 * np.arange(lmax + 1) + 1)
    return {"alm": alm, "map": field_map, "power": power}
