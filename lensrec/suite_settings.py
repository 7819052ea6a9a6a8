"""Settings of lensing suites: validation into plain JSON, the stored-estimate names and the stage layout.

The suite itself (storage, caching, running) is :mod:`lensrec.suites`; the per-index science is
:mod:`lensrec.suite_tasks`.
"""

from __future__ import annotations

import hashlib
import os

import numpy as np

from ._checks import as_float, as_int, check_lmax_for_nside, check_nside
from ._deprecation import renamed_arguments, upgrade_keys
from .gradient_spectra import parse_weights
from .labels import (  # noqa: F401  (COMPONENTS re-exported: it lived here)
    COMBINED_ESTIMATORS,
    COMPONENTS,
    JOINT_ESTIMATORS,
    PAIR_ESTIMATORS,
    SUITE_STAGES,
    is_symmetric,
    parse_estimators,
)

__all__ = ["lensing_suite_settings", "estimate_key"]

SUITE_KIND = "lensing_suite"
SUITE_FORMAT = 1
SUITE_FILE = "suite.json"
STAGES = SUITE_STAGES
# every pair estimator, every combination of them and the joint estimator (lensrec.labels); suites store
# per-field filtered fields and derive the joint ones from them (IsotropicFilter.joint_fields)
ESTIMATORS = PAIR_ESTIMATORS + tuple(COMBINED_ESTIMATORS) + tuple(JOINT_ESTIMATORS)
# φ̂[a, b] = φ̂[b, a] (lensrec.reconstruction, leg order; the joint estimator sums both orders)
SYMMETRIC_ESTIMATORS = tuple(label for label in PAIR_ESTIMATORS if is_symmetric(label)) + tuple(JOINT_ESTIMATORS)
# Settings written before the names were unified (format 1 keeps them readable): old key -> new key.
RENAMED_SETTINGS = {"threads_per_task": "nthreads"}
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
    return list(parse_estimators(estimators, allowed=ESTIMATORS))


@renamed_arguments(threads_per_task="nthreads")
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
    nthreads: int = 1,
    data_seed: int | None = None,
    data_maps=None,
    epsilon: float = 1e-7,
    lensing_iterations: int = 0,
    weights: str = "lensed",
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
        Labels of pair or combined estimators (:data:`lensrec.labels.PAIR_ESTIMATORS`,
        :data:`lensrec.labels.COMBINED_ESTIMATORS`: "TT", …, "MV", "TT+TE+EE"; default "MV"); "TT,EB" works too.
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
        realizations of the lensed CMB spectra with the same noise and no lensing signal (φ = 0), the
        standard check of N0 and of the filters: their quadratic estimates have exactly the Gaussian
        noise of :func:`lensrec.reconstruction_noise`. N1 needs lensing.
    lmax_margin : int
        Multipoles of the unlensed fields beyond lmax (see :func:`lensrec.simulate_sky`); default 1000.
    nthreads : int
        Threads of every transform in a task (default 1); fixed so that results do not depend on the
        executor. (``threads_per_task`` is the deprecated old name.)
    data_seed : int, optional
        Seed of the simulated data (index 0 of that seed); default ``seed + 1``; must differ from ``seed``.
    data_maps : str or path, optional
        Your own observed T, Q, U maps (HEALPix FITS, µK, same nside) as the data instead of a simulation.
    epsilon : float
        Accuracy of the lensing remapping (see :func:`lensrec.simulate_sky`); default 1e-7.
    lensing_iterations : int
        0 (default): quadratic estimates. N > 0 (estimator "EB", full sky, no N1): the data's and every
        simulation's own estimate ("auto") is the iterative one after N steps
        (:mod:`lensrec.iterative_reconstruction`), so the mean-field, the response from simulations and the
        Monte-Carlo N0 from their autos are those of the iterated estimate; the mixed-pair estimates (RDN0)
        stay quadratic. The curl auto is the curl of the last step's residual deflection: a null test with the
        converged filters, whose noise is that step's curl N0.
    weights : {"lensed", "unlensed", "gradient"}
        CMB spectra in the estimator weights and the analytic response (:func:`lensrec.reconstruction_noise`);
        default "lensed", under which suites made before the choice existed keep their fingerprints.

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
    from .iterative_reconstruction import check_lensing_iterations

    parsed = _parse_estimators(estimators)
    iterations = max(check_lensing_iterations(lensing_iterations, label) for label in parsed)
    if iterations and (mask is not None or n1):
        raise ValueError(
            f"lensing_iterations={iterations} works on the full sky without N1 pairs (they are quadratic); "
            f"drop {'mask' if mask is not None else 'n1=True'}"
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
        "nthreads": as_int(nthreads, "nthreads", minimum=1, maximum=256),
        "seed": seed,
        "n_sims": as_int(n_sims, "n_sims", minimum=MIN_SIMS, maximum=100000),
        "n1": bool(n1),
        "n1_sims": n1_sims,
        "mask_sha256": None,
        "mask_moments": None,
        "data": {"source": "simulation", "seed": data_seed},
    }
    if iterations:  # absent when 0, so quadratic suites keep their fingerprints
        settings["lensing_iterations"] = iterations
    weights = parse_weights(weights)
    if weights != "lensed":  # absent for lensed weights, so existing suites keep their fingerprints
        if iterations:
            raise ValueError(f"lensing_iterations={iterations} uses its own weights; drop weights={weights!r}")
        settings["weights"] = weights
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
    return upgrade_settings(settings)


def upgrade_settings(settings: dict) -> dict:
    """Settings with the names of this version: old keys (from a suite written earlier) renamed, with a warning."""
    if not any(old in settings for old in RENAMED_SETTINGS) and not _old_mask_keys(settings):
        return settings
    from .masks import MaskMoments

    out = upgrade_keys(settings, RENAMED_SETTINGS, "suite settings")
    if _old_mask_keys(out):
        out["mask_moments"] = dict(MaskMoments.upgraded(out["mask_moments"]))
    return out


def _old_mask_keys(settings: dict) -> bool:
    from .masks import MaskMoments

    moments = settings.get("mask_moments")
    return isinstance(moments, dict) and any(old in moments for old in MaskMoments.RENAMED)


def _stage_settings(settings: dict, stage: str, directory: str | None = None) -> dict:
    base = {key: value for key, value in settings.items() if key not in ("role", "_directory")}
    if stage == "data":
        return {**base, "role": "data", "n_sims": 1}
    if stage == "simulations":
        return {**base, "role": "simulation"}
    if stage == "pairs":
        return {**base, "role": "pairs", "_directory": os.path.abspath(directory)}
    raise ValueError(f"stage must be one of {STAGES}, got {stage!r}")


def _jsonable(value):
    import json

    from .suite_runner import _plain

    return json.loads(json.dumps(value, default=_plain))
