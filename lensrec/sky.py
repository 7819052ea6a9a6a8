"""Lensed CMB skies on the sphere: Gaussian fields, remapping by the deflection, observation.

A simulated sky is drawn as Gaussian unlensed T, E, B and φ (:func:`gaussian_cmb_alm`, :func:`gaussian_alm`,
from the seeded streams of :func:`lensrec.seeding.rng_for`), lensed by the exact remapping of
:mod:`lensrec.remapping` (T̃(n) = T(n′), P̃(n) = e^{2iχ(n)} P(n′) along the great circle of the deflection;
Lewis 2005, PRD 71, 083008), then convolved with the beam (and pixel window), given noise and masked
(:func:`simulate_sky`). The remapping's public pieces (:func:`lens_alm`, :func:`lens_tqu_alm`,
:func:`deflection_maps`, :func:`lensing_grid`) are re-exported here.
"""

from __future__ import annotations

import hashlib
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType

import numpy as np

from . import harmonics
from ._checks import (
    as_finite_array,
    as_float,
    as_int,
    check_lmax_for_nside,
    check_nside,
    resolve_nthreads,
    run_parallel,
)
from .harmonics import ell_of_alm, nalm, truncate_alm
from .remapping import (  # noqa: F401  (re-exported: the remapping engine lived here)
    ARCMIN,
    DEFAULT_EPSILON,
    LENSED_TAIL,
    DeflectionMaps,
    deflection_maps,
    lens_alm,
    lens_tqu_alm,
    lensing_grid,
)
from .seeding import rng_for

__all__ = [
    "SimulatedSky",
    "DeflectionMaps",
    "simulate_sky",
    "gaussian_alm",
    "gaussian_cmb_alm",
    "lens_alm",
    "lens_tqu_alm",
    "deflection_maps",
    "truncate_alm",
    "lensing_grid",
    "standard_normals",
]

DEFAULT_LMAX_MARGIN = 1000


# ------------------------------------------------------------------------------------- small helpers
_CHUNK = 1 << 21  # values per sub-stream of a chunked draw
_CHUNK_TAG = 7919  # spawn-key tag that keeps chunk sub-streams apart from any other child stream


def standard_normals(
    rng: np.random.Generator, size: int, dtype=np.float64, nthreads: int = 1, out: np.ndarray | None = None
) -> np.ndarray:
    """``size`` unit normals from ``rng``, drawn in fixed chunks that each have their own sub-stream.

    Four 63-bit integers are drawn from ``rng`` (advancing it, so successive calls differ) and chunk k of
    2²¹ values comes from ``PCG64(SeedSequence(those integers, spawn_key=(7919, k)))``: the result
    depends only on the state of ``rng``, bit for bit, whatever ``nthreads`` is, and chunks can be drawn
    in parallel.

    Examples
    --------
    >>> import numpy as np
    >>> a = standard_normals(np.random.default_rng(3), 5_000_000, nthreads=1)
    >>> bool(np.array_equal(a, standard_normals(np.random.default_rng(3), 5_000_000, nthreads=2)))
    True
    """
    sequence = rng.bit_generator.seed_seq
    if not isinstance(sequence, np.random.SeedSequence):
        raise TypeError("rng must be a numpy Generator seeded from a SeedSequence (e.g. lensrec.seeding.rng_for)")
    size = as_int(size, "size", minimum=0)
    values = np.empty(size, dtype=dtype) if out is None else out.reshape(-1)
    if values.size != size:
        raise ValueError(f"out has {values.size} entries but size={size}")

    def store(start, chunk):
        values[start : start + chunk.size] = chunk

    _chunked_normals(rng, size, store, dtype, nthreads)
    return values if out is None else out


def _chunked_normals(rng: np.random.Generator, size: int, consume, dtype, nthreads: int) -> None:
    """Call ``consume(start, normals)`` for each chunk of the fixed-chunk stream (see standard_normals)."""
    if not isinstance(rng, np.random.Generator):
        raise TypeError(f"rng must be a numpy.random.Generator, got {type(rng).__name__}")
    entropy = [int(value) for value in rng.integers(0, 2**63, size=4, dtype=np.int64)]
    starts = range(0, size, _CHUNK)

    def draw(start):
        child = np.random.SeedSequence(entropy, spawn_key=(_CHUNK_TAG, start // _CHUNK))
        generator = np.random.Generator(np.random.PCG64(child))
        consume(start, generator.standard_normal(min(_CHUNK, size - start), dtype=dtype))

    run_parallel(draw, starts, nthreads)


def _unit_normal_alm(rng: np.random.Generator, ncomp: int, lmax: int, nthreads: int = 1) -> np.ndarray:
    """Complex Gaussian coefficients with ⟨|a_ℓm|²⟩ = 1, m = 0 real (a fixed draw order per stream)."""
    size = nalm(lmax)
    alm = np.empty((ncomp, size), dtype=np.complex128)
    view = alm.view(np.float64)  # interleaved (real, imaginary) pairs
    standard_normals(rng, view.size, nthreads=nthreads, out=view)
    view *= np.sqrt(0.5)
    alm[:, : lmax + 1] = view[:, 0 : 2 * (lmax + 1) : 2] * np.sqrt(2.0)  # m = 0 (first block): real, variance 1
    return alm


def gaussian_alm(cl, lmax: int, rng: np.random.Generator, nthreads: int | None = 1) -> np.ndarray:
    """One Gaussian realization of a real isotropic field with power ``cl``: ⟨|a_ℓm|²⟩ = C_ℓ, m = 0 real.

    Parameters
    ----------
    cl : array, shape (≥ lmax + 1,)
        Power spectrum C_ℓ (non-negative, finite).
    lmax : int
    rng : numpy.random.Generator
        Source of randomness (e.g. :func:`lensrec.seeding.rng_for`); it is advanced, and the draws depend
        only on its state (see :func:`standard_normals`).
    nthreads : int, optional
        Threads for drawing (the result does not depend on it); default 1, ``None`` for the default count.

    Returns
    -------
    numpy.ndarray, complex, shape (nalm(lmax),)

    Examples
    --------
    >>> import numpy as np
    >>> a = gaussian_alm(np.ones(101), 100, np.random.default_rng(0))
    >>> abs(float(np.mean(np.abs(a) ** 2)) - 1.0) < 0.05
    True
    """
    lmax = as_int(lmax, "lmax", minimum=0)
    cl = _spectrum(cl, "cl", lmax)
    if np.any(cl < 0):
        raise ValueError(f"cl must be non-negative, found {cl.min():.3g}")
    alm = _unit_normal_alm(rng, 1, lmax, resolve_nthreads(nthreads))[0]
    _scale_by_ell(alm, np.sqrt(cl), lmax)
    return alm


def _scale_by_ell(alm: np.ndarray, factor: np.ndarray, lmax: int) -> None:
    """In place: a_ℓm *= factor[ℓ], one contiguous m block at a time (no ℓ-index gather)."""
    start = 0
    for m in range(lmax + 1):
        stop = start + lmax - m + 1
        alm[..., start:stop] *= factor[m:]
        start = stop


def gaussian_cmb_alm(
    cls: Mapping[str, np.ndarray], lmax: int, rng: np.random.Generator, nthreads: int | None = 1
) -> np.ndarray:
    """Gaussian T, E, B coefficients with the TE correlation (a Cholesky factor per ℓ).

    T = √C^TT z₁, E = (C^TE/√C^TT) z₁ + √(C^EE − (C^TE)²/C^TT) z₂, B = √C^BB z₃ with independent unit
    complex Gaussians z_i, so ⟨T T*⟩ = C^TT, ⟨E E*⟩ = C^EE, ⟨T E*⟩ = C^TE.

    Parameters
    ----------
    cls : mapping
        ``"TT"``, ``"EE"``, ``"BB"``, ``"TE"`` arrays of length ≥ lmax + 1 (µK²).
    lmax : int
    rng : numpy.random.Generator
        As for :func:`gaussian_alm`.
    nthreads : int, optional
        Threads for drawing (the result does not depend on it).

    Returns
    -------
    numpy.ndarray, complex, shape (3, nalm(lmax))

    Raises
    ------
    ValueError
        If the spectra are non-finite, too short, or not positive semi-definite ((C^TE)² > C^TT C^EE).
    """
    lmax = as_int(lmax, "lmax", minimum=0)
    tt, ee, bb, te = (_spectrum(cls[key], f"spectra[{key!r}]", lmax) for key in ("TT", "EE", "BB", "TE"))
    for key, value in (("TT", tt), ("EE", ee), ("BB", bb)):
        if np.any(value < 0):
            raise ValueError(f"spectra[{key!r}] must be non-negative, found {value.min():.3g}")
    excess = te**2 - tt * ee
    if np.any(excess > 1e-10 * tt * ee + 1e-300):
        worst = int(np.argmax(excess))
        raise ValueError(f"spectra are not positive semi-definite: (C_TE)^2 > C_TT C_EE at l={worst}")
    root_tt = np.sqrt(tt)
    with np.errstate(divide="ignore", invalid="ignore"):
        cross = np.where(tt > 0, te / root_tt, 0.0)
        rest = np.sqrt(np.maximum(ee - np.where(tt > 0, te**2 / tt, 0.0), 0.0))
    out = _unit_normal_alm(rng, 3, lmax, resolve_nthreads(nthreads))
    start = 0
    for m in range(lmax + 1):  # per m block: E = cross z1 + rest z2 must use z1 before T overwrites it
        stop = start + lmax - m + 1
        out[1, start:stop] *= rest[m:]
        out[1, start:stop] += cross[m:] * out[0, start:stop]
        out[0, start:stop] *= root_tt[m:]
        start = stop
    _scale_by_ell(out[2], np.sqrt(bb), lmax)
    return out


def _spectrum(values, name: str, lmax: int) -> np.ndarray:
    array = as_finite_array(values, name, ndim=1)
    if array.size < lmax + 1:
        raise ValueError(f"{name} has {array.size} entries (lmax {array.size - 1}) but l up to {lmax} is needed")
    return array[: lmax + 1]


# ----------------------------------------------------------------------------------------- simulation
def _readonly(array):
    if array is None:
        return None
    array = np.asarray(array)
    array.setflags(write=False)
    return array


@dataclass(frozen=True, eq=False)
class SimulatedSky:
    """One simulated observed sky and the fields it was made from (all arrays read-only).

    Attributes
    ----------
    maps : numpy.ndarray, shape (3, 12·nside²)
        Observed T, Q, U in µK (RING): lensed CMB × beam (× pixel window) + noise, × mask.
    phi_alm : numpy.ndarray, shape (nalm(lmax_unlensed),)
        The input lensing potential φ_LM.
    unlensed_alm : numpy.ndarray, shape (3, nalm(lmax_unlensed))
        Unlensed T, E, B (µK).
    lensed_alm : numpy.ndarray, shape (3, nalm(lmax))
        Lensed T, E, B (µK) before beam, pixel window, noise and mask.
    mask : numpy.ndarray or None
        The mask applied to ``maps``.
    settings : mapping
        Everything needed to reproduce the simulation (see :func:`simulate_sky`).
    pixel_noise : PixelNoise or None
        The per-pixel noise model the noise was drawn from (for the optimal filter), if one was given.
    """

    maps: np.ndarray
    phi_alm: np.ndarray
    unlensed_alm: np.ndarray
    lensed_alm: np.ndarray
    mask: np.ndarray | None
    settings: Mapping = field(default_factory=dict)
    pixel_noise: object = None

    @property
    def nside(self) -> int:
        return int(self.settings["nside"])

    @property
    def lmax(self) -> int:
        return int(self.settings["lmax"])

    @property
    def lmax_unlensed(self) -> int:
        return int(self.settings["lmax_unlensed"])


def _digest(array) -> str | None:
    if array is None:
        return None
    return hashlib.sha256(np.ascontiguousarray(array, dtype=np.float64).tobytes()).hexdigest()[:16]


def _add_noise(
    maps: np.ndarray,
    experiment,
    nside: int,
    lmax: int,
    seed: int,
    index: int,
    scale,
    nthreads: int,
    allow_high_lmax: bool = False,
) -> str:
    """Add T, Q, U noise (µK) to ``maps`` in place; ``scale`` (per pixel or None) modulates its amplitude.

    White noise unless the experiment has a 1/f knee, then a harmonic Gaussian field. Returns the model name.
    """
    rng = rng_for(seed, index, "noise")
    npix = 12 * nside * nside
    has_knee = experiment.ell_knee_temperature > 0 or experiment.ell_knee_polarization > 0
    if not has_knee:
        # white noise of Δ µK-arcmin has pixel variance Δ² / Ω_pix (Ω_pix in arcmin²); unit normals are
        # drawn in float32 (ample for noise) in fixed chunks and added in float64
        pixel_arcmin = math.sqrt(4.0 * math.pi / npix) / ARCMIN
        levels = (
            np.array([experiment.noise_temperature, experiment.noise_polarization, experiment.noise_polarization])
            / pixel_arcmin
        )
        flat = maps.reshape(-1)

        def add(start, normals):
            stop = start + normals.size
            position = start
            while position < stop:  # a chunk may straddle the T/Q or Q/U boundary
                component, pixel = divmod(position, npix)
                end = min(stop, (component + 1) * npix)
                part = normals[position - start : end - start]
                part *= np.float32(levels[component])  # float32 rounding (6e-8) is far below any noise use
                if scale is not None:
                    np.multiply(part, scale[pixel : pixel + end - position], out=part, casting="same_kind")
                flat[position:end] += part
                position = end

        _chunked_normals(rng, 3 * npix, add, np.float32, nthreads)
        return "white"
    # 1/f noise: a Gaussian field with the noise power as it is in the map (not beam-deconvolved), ℓ ≥ 2,
    # band-limited at lmax like the signal
    alm = _unit_normal_alm(rng, 3, lmax, nthreads)
    for k, key in enumerate("TEB"):
        spectrum = experiment.noise_spectrum(key, lmax, deconvolved=False, cut=False)
        spectrum[:2] = 0.0
        _scale_by_ell(alm[k], np.sqrt(spectrum), lmax)
    noise = harmonics.alm2map_tqu(alm, nside, lmax, nthreads=nthreads, allow_high_lmax=allow_high_lmax)
    if scale is not None:
        noise *= scale
    maps += noise
    return "one_over_f"


def _pixel_window(pixel_window, nside: int, lmax: int):
    if pixel_window is False or pixel_window is None:
        return None
    if pixel_window is True:
        from .pixel_noise import pixel_window as compute_window

        window = compute_window(nside, lmax)
        return window, window
    if isinstance(pixel_window, (tuple, list)) and len(pixel_window) == 2:
        return tuple(_spectrum(w, f"pixel_window[{k}]", lmax) for k, w in enumerate(pixel_window))
    raise TypeError("pixel_window must be True, False or a pair of arrays (window_T, window_P)")


def simulate_sky(
    experiment,
    spectra=None,
    nside: int = 512,
    lmax: int | None = None,
    seed: int = 0,
    index: int = 0,
    r: float = 0.0,
    lmax_margin: int = DEFAULT_LMAX_MARGIN,
    noise: bool = True,
    mask=None,
    hits=None,
    pixel_window=False,
    pixel_noise=None,
    epsilon: float = DEFAULT_EPSILON,
    allow_high_lmax: bool = False,
    nthreads: int | None = None,
    progress=None,
) -> SimulatedSky:
    """Simulate one observed, lensed CMB sky (T, Q, U on HEALPix) and keep its ingredients.

    Steps: Gaussian unlensed T, E, B (TE-correlated; unlensed scalar spectra plus r × tensor) and a
    Gaussian φ, both to ``lmax + lmax_margin``; exact remapping by d = ∇φ with the polarization rotation
    (:func:`lens_tqu_alm`), lensed a_ℓm to ``lmax`` by Gauss–Legendre quadrature; beam (and optionally
    the pixel window) applied to the lensed a_ℓm; synthesis of T, Q, U at ``nside``; noise; mask.

    Parameters
    ----------
    experiment : Experiment or str
        The survey (noise, beam), or a shipped name / TOML path for :func:`lensrec.load_experiment`.
    spectra : Spectra, optional
        Theory spectra; default :func:`lensrec.fiducial_spectra`. They must reach ``lmax + lmax_margin``.
    nside : int
        HEALPix resolution of the maps; default 512.
    lmax : int, optional
        Band limit of the lensed sky and of the maps; default 2·nside (≤ 3·nside − 1 unless
        ``allow_high_lmax``).
    seed, index : int
        Run seed and simulation index; the CMB, φ and noise each come from their own stream
        (:func:`lensrec.seeding.rng_for`), so one (seed, index) always gives the same sky: bit for bit
        with the same ``nthreads``; with another thread count the random fields are bit-identical and
        the transforms agree to rounding (~1e-15 relative; ducc0 sums in a thread-dependent order).
    r : float
        Tensor-to-scalar ratio added to the unlensed spectra (≥ 0); default 0.
    lmax_margin : int
        Extra multipoles of the unlensed fields and φ beyond ``lmax`` (≥ 0); default 1000. Lensed BB
        near ``lmax`` misses the E and φ beyond the margin: with 1000 it is low by ≈ 1.2% at ℓ ≈ lmax,
        ≈ 0.5% at lmax − 500 and ≈ 0.1% at lmax − 1000 (measured at lmax 2000 against margin 2000);
        TT, EE and TE are affected far less.
    noise : bool
        Add instrument noise (default True): white pixel noise of the experiment's µK-arcmin levels, or,
        if it has a 1/f knee, a harmonic Gaussian field with ``experiment.noise_spectrum(field, lmax,
        deconvolved=False, cut=False)`` for ℓ ≥ 2, band-limited at ``lmax``.
    mask : array, optional
        Weights in [0, 1] (12·nside² pixels) multiplying the observed maps.
    hits : array, optional
        Hit counts (≥ 0) for inhomogeneous noise: the noise of each pixel is scaled by
        √(⟨hits⟩ / hits), the mean taken over the used pixels (mask > 0, or all). Zero hits are allowed only
        where the mask is 0.
    pixel_window : bool or (array, array)
        Multiply by the HEALPix pixel window (computed offline by :func:`lensrec.pixel_noise.pixel_window`)
        or by the given (T, polarization) windows; default False.
    pixel_noise : PixelNoise, optional
        Noise that follows a per-pixel variance map (:class:`lensrec.pixel_noise.PixelNoise`, from a
        variance or hit map), white or, with the experiment's 1/f knee, 1/f modulated by the map; replaces
        the experiment's uniform noise. Not together with ``hits``.
    epsilon : float
        Accuracy of the non-uniform synthesis at the displaced points; default 1e-7.
    allow_high_lmax : bool
        Accept lmax > 3·nside − 1.
    nthreads : int, optional
        Threads; default ``LENSREC_NTHREADS`` or all cores.
    progress : callable, optional
        ``progress(done, 6)`` before the work (done = 0) and after each of its six steps: the Gaussian CMB and
        φ, the deflection field, lensing T, lensing E and B, beam and synthesis of the maps, noise and mask.
        An exception it raises stops the simulation (nothing is returned), e.g. to cancel it.

    Returns
    -------
    SimulatedSky
        ``settings`` holds nside, lmax, lmax_unlensed, lmax_margin, seed, index, r, noise, noise_model,
        epsilon, pixel_window, the Gauss–Legendre grid shape, the experiment as a dict, the spectra
        metadata and sha256 digests of the mask and hit map.

    Raises
    ------
    ValueError, TypeError
        For any invalid input (checked before any work).

    References
    ----------
    Lewis 2005, PRD 71, 083008; Challinor & Chon 2002, PRD 66, 127301; Knox 1995, PRD 52, 4307 (noise).

    Examples
    --------
    >>> import lensrec
    >>> sky = lensrec.simulate_sky("orbital_allsky", nside=32, lmax=64, lmax_margin=64, seed=1, nthreads=1)
    >>> sky.maps.shape, sky.lensed_alm.shape
    ((3, 12288), (3, 2145))
    """
    from .experiment import load_experiment
    from .masks import check_mask
    from .spectra import Spectra, fiducial_spectra

    experiment = load_experiment(experiment)
    if spectra is None:
        spectra = fiducial_spectra()
    if not isinstance(spectra, Spectra):
        raise TypeError(
            f"spectra must be a lensrec.Spectra (or None for the fiducial ones), got {type(spectra).__name__}"
        )
    nside = check_nside(nside)
    lmax = 2 * nside if lmax is None else lmax
    lmax = check_lmax_for_nside(lmax, nside, allow_high_lmax=allow_high_lmax)
    lmax_margin = as_int(lmax_margin, "lmax_margin", minimum=0, maximum=20000)
    lmax_unlensed = lmax + lmax_margin
    if spectra.lmax < lmax_unlensed:
        raise ValueError(
            f"spectra reach l={spectra.lmax} but lmax + lmax_margin = {lmax} + {lmax_margin} = {lmax_unlensed} is "
            f"needed; lower lmax or lmax_margin, or supply spectra to l >= {lmax_unlensed}"
        )
    seed = as_int(seed, "seed", minimum=0)
    index = as_int(index, "index", minimum=0)
    r = as_float(r, "r", minimum=0.0)
    epsilon = as_float(epsilon, "epsilon", minimum=2e-13, maximum=0.1)
    if not isinstance(noise, (bool, np.bool_)):
        raise TypeError(f"noise must be True or False, got {noise!r}")
    if mask is not None:
        mask = np.array(check_mask(mask, nside))  # a private copy: the result holds it read-only
    if hits is not None:
        hits = as_finite_array(hits, "hits", ndim=1)
        if hits.size != 12 * nside * nside:
            raise ValueError(f"hits has {hits.size} pixels but nside={nside} needs {12 * nside * nside}")
        if np.any(hits < 0):
            raise ValueError(f"hits must be non-negative, found {hits.min():.6g}")
        used = mask > 0 if mask is not None else np.ones(hits.size, dtype=bool)
        empty = used & (hits == 0)
        if np.any(empty):
            raise ValueError(
                f"hits is zero in {int(empty.sum())} pixel(s) that the mask keeps (or no mask was given); "
                "mask those pixels (mask = 0) or give them hits > 0"
            )
    if pixel_noise is not None:
        from .pixel_noise import PixelNoise

        if not isinstance(pixel_noise, PixelNoise):
            raise TypeError(f"pixel_noise must be a lensrec PixelNoise, got {type(pixel_noise).__name__}")
        if pixel_noise.nside != nside:
            raise ValueError(f"pixel_noise has nside {pixel_noise.nside} but the maps have nside {nside}")
        if hits is not None:
            raise ValueError("give hits or pixel_noise, not both (PixelNoise.from_hits makes one from hits)")
    windows = _pixel_window(pixel_window, nside, lmax)
    nthreads = resolve_nthreads(nthreads)

    def step(done: int) -> None:
        if progress is not None:
            progress(done, 6)

    step(0)
    cmb = spectra.cmb(lensed=False, r=r)
    cls = {key: cmb[key][: lmax_unlensed + 1] for key in ("TT", "EE", "BB", "TE")}
    unlensed = gaussian_cmb_alm(cls, lmax_unlensed, rng_for(seed, index, "cmb"), nthreads=nthreads)
    phi_alm = gaussian_alm(spectra.phi, lmax_unlensed, rng_for(seed, index, "phi"), nthreads=nthreads)
    step(1)
    lensed = lens_tqu_alm(
        unlensed,
        phi_alm,
        lmax,
        lmax_in=lmax_unlensed,
        epsilon=epsilon,
        nthreads=nthreads,
        progress=None if progress is None else (lambda done, _total: step(1 + done)),
    )

    ell = ell_of_alm(lmax)
    observed = lensed * experiment.beam(lmax)[ell]
    if windows is not None:
        observed[0] *= windows[0][ell]
        observed[1:] *= windows[1][ell]
    maps = harmonics.alm2map_tqu(observed, nside, lmax, nthreads=nthreads, allow_high_lmax=allow_high_lmax)
    del observed
    step(5)
    noise_model = None
    if noise and pixel_noise is not None:
        maps += pixel_noise.simulate(experiment, lmax, rng_for(seed, index, "noise"), nthreads=nthreads)
        has_knee = experiment.ell_knee_temperature > 0 or experiment.ell_knee_polarization > 0
        noise_model = "pixel_variance_one_over_f" if has_knee else "pixel_variance_white"
    elif noise:
        scale = None
        if hits is not None:
            used = mask > 0 if mask is not None else np.ones(hits.size, dtype=bool)
            scale = np.zeros(hits.size)
            observed = hits > 0
            scale[observed] = np.sqrt(hits[used].mean() / hits[observed])
        noise_model = _add_noise(maps, experiment, nside, lmax, seed, index, scale, nthreads, allow_high_lmax)
    if mask is not None:
        maps *= mask
    step(6)

    grid = lensing_grid(lmax_unlensed, lmax, lmax_unlensed)
    settings = {
        "nside": nside,
        "lmax": lmax,
        "lmax_margin": lmax_margin,
        "lmax_unlensed": lmax_unlensed,
        "seed": seed,
        "index": index,
        "r": r,
        "noise": bool(noise),
        "noise_model": noise_model,
        "epsilon": epsilon,
        "pixel_window": windows is not None,
        "gl_grid": [grid.ntheta, grid.nphi],
        "experiment": experiment.to_dict(),
        "spectra": dict(spectra.metadata),
        "mask_sha256": _digest(mask),
        "hits_sha256": _digest(hits),
        "noise_variance_sha256": _digest(pixel_noise.variance) if pixel_noise is not None else None,
    }
    return SimulatedSky(
        maps=_readonly(maps),
        phi_alm=_readonly(phi_alm),
        unlensed_alm=_readonly(unlensed),
        lensed_alm=_readonly(lensed),
        mask=_readonly(mask),
        settings=MappingProxyType(settings),
        pixel_noise=pixel_noise,
    )
