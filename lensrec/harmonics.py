# Over 600 lines: the one wrapper of every ducc0 transform, so healpy signs and layouts live in one place.
"""Spherical-harmonic transforms on HEALPix and Gauss–Legendre grids, in healpy's conventions.

A thin, validated layer over ``ducc0.sht``. Every function takes and returns harmonic coefficients in
healpy's triangular, m-major layout (``healpy.Alm.getidx``) with ``mmax = lmax``, and maps in HEALPix
RING order. Spin-weighted fields follow healpy exactly: for spin s > 0 the two real maps (f₁, f₂) and the
gradient/curl coefficients (G, C) are related by f₁ + i f₂ = −Σ (G + i C) ₛY_ℓm, so spin 2 with (E, B)
gives healpy's (Q, U), and spin 1 with G = √(ℓ(ℓ+1)) φ_ℓm gives the gradient components
(∂_θ φ, ∂_φ φ / sin θ) on the local (e_θ, e_φ) basis. ducc0 uses the same signs (checked against
``healpy.alm2map_spin`` for spin 1, 2 and 3 and ``healpy.alm2map_der1`` in the tests), so no sign is
flipped here.

Threads: every function takes ``nthreads``; ``None`` means ``LENSREC_NTHREADS`` or all cores.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np

from ._checks import as_finite_array, as_float, as_int, check_lmax_for_nside, check_nside, resolve_nthreads
from ._deprecation import renamed_arguments

__all__ = [
    "SPINS",
    "nalm",
    "lmax_from_nalm",
    "npix_to_nside",
    "ell_of_alm",
    "scale_alm",
    "truncate_alm",
    "alm2map",
    "adjoint_alm2map",
    "map2alm",
    "alm2map_tqu",
    "map2alm_tqu",
    "jacobi_iterations_for",
    "GLGrid",
    "gl_grid_for_band_limits",
    "alm2positions",
]

SPINS = (0, 1, 2, 3)


def _ducc_sht():
    import ducc0.sht

    return ducc0.sht


# --------------------------------------------------------------------------------------- layout helpers
def nalm(lmax: int) -> int:
    """Number of coefficients a_ℓm, 0 ≤ m ≤ ℓ ≤ lmax, in the triangular layout.

    Examples
    --------
    >>> nalm(2)
    6
    """
    lmax = as_int(lmax, "lmax", minimum=0)
    return (lmax + 1) * (lmax + 2) // 2


def lmax_from_nalm(size: int, name: str = "alm") -> int:
    """The lmax of a triangular (mmax = lmax) coefficient array of ``size`` entries.

    Raises
    ------
    ValueError
        If ``size`` is not (lmax+1)(lmax+2)/2 for any lmax.

    Examples
    --------
    >>> lmax_from_nalm(6)
    2
    """
    size = as_int(size, f"size of {name}", minimum=1)
    lmax = int(round((math.sqrt(8 * size + 1) - 3) / 2))
    if nalm(lmax) != size:
        raise ValueError(f"{name} has {size} coefficients, which is not (lmax+1)(lmax+2)/2 for any lmax")
    return lmax


def npix_to_nside(npix: int, name: str = "maps") -> int:
    """The nside of a HEALPix map of ``npix`` pixels (validated as a power of two)."""
    npix = as_int(npix, f"number of pixels of {name}", minimum=12)
    nside = int(round(math.sqrt(npix / 12.0)))
    if 12 * nside * nside != npix:
        raise ValueError(f"{name} has {npix} pixels, which is not 12*nside^2 for any nside")
    return check_nside(nside, f"nside of {name}")


@functools.lru_cache(maxsize=8)
def _ell_array(lmax: int) -> np.ndarray:
    ell = np.concatenate([np.arange(m, lmax + 1) for m in range(lmax + 1)]).astype(np.int64)
    ell.setflags(write=False)
    return ell


def ell_of_alm(lmax: int) -> np.ndarray:
    """The multipole ℓ of each entry of a triangular coefficient array (read-only int64 array).

    Examples
    --------
    >>> ell_of_alm(2).tolist()
    [0, 1, 2, 1, 2, 2]
    """
    return _ell_array(as_int(lmax, "lmax", minimum=0))


def scale_alm(alm, factor, lmax: int | None = None) -> np.ndarray:
    """Multiply every a_ℓm by ``factor[ℓ]`` (a new array; works on 1-D or stacked coefficients).

    Parameters
    ----------
    alm : complex array, shape (nalm,) or (k, nalm)
    factor : real array, shape (≥ lmax + 1,)
        The per-ℓ factor, e.g. a beam b_ℓ or √(ℓ(ℓ+1)).
    lmax : int, optional
        Band limit of ``alm``; derived from its size if omitted.

    Examples
    --------
    >>> scale_alm(np.ones(3, complex), [0.0, 2.0]).real.tolist()
    [0.0, 2.0, 2.0]
    """
    alm = np.asarray(alm)
    if lmax is None:
        lmax = lmax_from_nalm(alm.shape[-1])
    lmax = as_int(lmax, "lmax", minimum=0)
    if alm.shape[-1] != nalm(lmax):
        raise ValueError(f"alm has {alm.shape[-1]} coefficients per field but lmax={lmax} needs {nalm(lmax)}")
    factor = as_finite_array(factor, "factor", ndim=1)
    if factor.size < lmax + 1:
        raise ValueError(f"factor must cover l = 0..{lmax} ({lmax + 1} values), got {factor.size}")
    return alm * factor[: lmax + 1][ell_of_alm(lmax)]


def truncate_alm(alm, lmax_out: int, lmax_in: int | None = None) -> np.ndarray:
    """Coefficients restricted to ℓ ≤ ``lmax_out`` (1-D or stacked, triangular layout, a new array).

    Examples
    --------
    >>> import numpy as np
    >>> truncate_alm(np.arange(6.0) + 0j, 1).real.tolist()   # lmax 2 -> 1: (0,0) (1,0) (1,1)
    [0.0, 1.0, 3.0]
    """
    alm = np.asarray(alm)
    if lmax_in is None:
        lmax_in = lmax_from_nalm(alm.shape[-1])
    lmax_in = as_int(lmax_in, "lmax_in", minimum=0)
    lmax_out = as_int(lmax_out, "lmax_out", minimum=0, maximum=lmax_in)
    if alm.shape[-1] != nalm(lmax_in):
        raise ValueError(f"alm has {alm.shape[-1]} coefficients but lmax_in={lmax_in} needs {nalm(lmax_in)}")
    out = np.empty(alm.shape[:-1] + (nalm(lmax_out),), dtype=np.result_type(alm.dtype, np.complex128))
    start_in = start_out = 0
    for m in range(lmax_out + 1):
        count = lmax_out - m + 1
        out[..., start_out : start_out + count] = alm[..., start_in : start_in + count]
        start_out += count
        start_in += lmax_in - m + 1
    return out


# ------------------------------------------------------------------------------------------ validation
def check_spin(spin) -> int:
    """Validate a transform spin (0, 1, 2 or 3)."""
    spin = as_int(spin, "spin")
    if spin not in SPINS:
        raise ValueError(f"spin must be one of {SPINS}, got {spin}")
    return spin


def _as_alm(alm, lmax: int, spin: int, name: str = "alm", stacked_spin0: bool = True):
    """Return (alm as complex128 of shape (k, nalm), was_1d)."""
    array = as_finite_array(alm, name, ndim=(1, 2), dtype=np.complex128)
    size = nalm(lmax)
    if array.shape[-1] != size:
        try:
            implied = f" (that size means lmax={lmax_from_nalm(array.shape[-1], name)})"
        except ValueError:
            implied = ""
        raise ValueError(f"{name} has {array.shape[-1]} coefficients per field but lmax={lmax} needs {size}{implied}")
    if spin == 0:
        if array.ndim == 2 and not stacked_spin0 and array.shape[0] != 1:
            raise ValueError(f"{name} for spin 0 must be one set of coefficients, got shape {array.shape}")
        return np.atleast_2d(array), array.ndim == 1
    if array.shape != (2, size):
        raise ValueError(
            f"{name} for spin {spin} must have shape (2, {size}) (gradient and curl, e.g. E and B), got {array.shape}"
        )
    return array, False


def _as_maps(maps, spin: int, name: str = "maps"):
    """Return (maps as float64 of shape (k, npix), nside, was_1d)."""
    array = as_finite_array(maps, name, ndim=(1, 2))
    nside = npix_to_nside(array.shape[-1], name)
    if spin > 0 and (array.ndim != 2 or array.shape[0] != 2):
        raise ValueError(f"{name} for spin {spin} must have shape (2, npix), got {array.shape}")
    return np.atleast_2d(array), nside, array.ndim == 1


@functools.lru_cache(maxsize=8)
def healpix_geometry(nside: int) -> dict:
    """Ring layout of a HEALPix RING map (theta, phi0, nphi, ringstart) as ducc0 wants it."""
    import ducc0.healpix

    nside = check_nside(nside)
    info = ducc0.healpix.Healpix_Base(nside, "RING").sht_info()
    for value in info.values():
        value.setflags(write=False)
    return info


# ---------------------------------------------------------------------------------- HEALPix transforms
def alm2map(
    alm, nside: int, lmax: int, spin: int = 0, nthreads: int | None = None, allow_high_lmax: bool = False
) -> np.ndarray:
    """Synthesize HEALPix RING maps from harmonic coefficients (healpy's ``alm2map`` / ``alm2map_spin``).

    Parameters
    ----------
    alm : complex array
        Spin 0: shape (nalm,) or (k, nalm) for k independent fields. Spin 1, 2, 3: shape (2, nalm), the
        gradient and curl coefficients (E and B for spin 2).
    nside : int
        HEALPix resolution (a power of two).
    lmax : int
        Band limit of ``alm`` (mmax = lmax); at most 3·nside − 1 unless ``allow_high_lmax``.
    spin : {0, 1, 2, 3}
        Spin weight of the field; default 0.
    nthreads : int, optional
        Threads; default ``LENSREC_NTHREADS`` or all cores.
    allow_high_lmax : bool
        Accept lmax > 3·nside − 1 (the map then under-samples the field).

    Returns
    -------
    numpy.ndarray
        Spin 0: shape (npix,) for 1-D input, else (k, npix). Spin > 0: shape (2, npix), the real and
        imaginary parts of the spin-s field (Q and U for spin 2), in the same units as ``alm``.

    Raises
    ------
    ValueError, TypeError
        For a bad nside, lmax, spin, coefficient shape or non-finite input.

    Notes
    -----
    Uses ducc0's intermediate equidistant-θ grid where it speeds up the transform; the result agrees
    with the direct transform and with healpy to ≲ 1e-10 relative.

    References
    ----------
    Górski et al. 2005, ApJ 622, 759 (HEALPix); Reinecke & Seljebotn 2013, A&A 554, A112 (libsharp).

    Examples
    --------
    >>> import numpy as np
    >>> alm = np.zeros(nalm(8), complex); alm[0] = np.sqrt(4 * np.pi)
    >>> bool(np.allclose(alm2map(alm, 4, 8, nthreads=1), 1.0))
    True
    """
    nside = check_nside(nside)
    lmax = check_lmax_for_nside(lmax, nside, allow_high_lmax=allow_high_lmax)
    spin = check_spin(spin)
    array, was_1d = _as_alm(alm, lmax, spin)
    out = np.empty((array.shape[0], 12 * nside * nside))
    _synthesis_healpix(array, nside, lmax, spin, resolve_nthreads(nthreads), out)
    return out[0] if was_1d else out


def _synthesis_healpix(alm: np.ndarray, nside: int, lmax: int, spin: int, nthreads: int, out: np.ndarray) -> None:
    """ducc0 HEALPix synthesis of validated (k, nalm) coefficients into ``out`` of shape (k, npix)."""
    sht = _ducc_sht()
    geometry = healpix_geometry(nside)
    if spin == 0:
        for k in range(alm.shape[0]):
            sht.synthesis(
                alm=alm[k : k + 1],
                lmax=lmax,
                spin=0,
                nthreads=nthreads,
                map=out[k : k + 1],
                theta_interpol=True,
                **geometry,
            )
    else:
        sht.synthesis(alm=alm, lmax=lmax, spin=spin, nthreads=nthreads, map=out, theta_interpol=True, **geometry)


def adjoint_alm2map(
    maps, lmax: int, spin: int = 0, nthreads: int | None = None, allow_high_lmax: bool = False
) -> np.ndarray:
    """The exact adjoint (transpose) of :func:`alm2map`: a_ℓm = Σ_p Y*_ℓm(p) m(p), with no pixel weight.

    Parameters
    ----------
    maps : real array
        Spin 0: shape (npix,) or (k, npix); spin > 0: shape (2, npix).
    lmax : int
        Band limit of the output (≤ 3·nside − 1 unless ``allow_high_lmax``).
    spin : {0, 1, 2, 3}
    nthreads : int, optional

    Returns
    -------
    numpy.ndarray
        Complex coefficients, shape (nalm,), (k, nalm) or (2, nalm) matching ``maps``.

    Examples
    --------
    >>> import numpy as np
    >>> a = adjoint_alm2map(np.ones(192), 8, nthreads=1)
    >>> round(float(a[0].real * 4 * np.pi / 192 / np.sqrt(4 * np.pi)), 6)
    1.0
    """
    spin = check_spin(spin)
    array, nside, was_1d = _as_maps(maps, spin)
    lmax = check_lmax_for_nside(lmax, nside, allow_high_lmax=allow_high_lmax)
    out = _adjoint_healpix(array, nside, lmax, spin, resolve_nthreads(nthreads))
    return out[0] if was_1d else out


def _adjoint_healpix(array: np.ndarray, nside: int, lmax: int, spin: int, nthreads: int) -> np.ndarray:
    """ducc0 adjoint HEALPix synthesis of validated (k, npix) maps into new (k, nalm) coefficients."""
    sht = _ducc_sht()
    geometry = healpix_geometry(nside)
    if spin == 0:
        out = np.empty((array.shape[0], nalm(lmax)), dtype=np.complex128)
        for k in range(array.shape[0]):
            sht.adjoint_synthesis(
                map=array[k : k + 1],
                lmax=lmax,
                spin=0,
                nthreads=nthreads,
                alm=out[k : k + 1],
                theta_interpol=True,
                **geometry,
            )
        return out
    return sht.adjoint_synthesis(
        map=np.ascontiguousarray(array), lmax=lmax, spin=spin, nthreads=nthreads, theta_interpol=True, **geometry
    )


@renamed_arguments(iterations="jacobi_iterations")
def map2alm(
    maps,
    lmax: int,
    spin: int = 0,
    jacobi_iterations: int = 3,
    nthreads: int | None = None,
    allow_high_lmax: bool = False,
) -> np.ndarray:
    """Harmonic analysis of HEALPix maps by Jacobi iteration, as ``healpy.map2alm(iter=n, use_weights=False)``.

    With w = 4π/npix and A the synthesis operator, a⁰ = w Aᵀ m, then ``jacobi_iterations`` times
    a ← a + w Aᵀ (m − A a). HEALPix quadrature is not exact, so the result is approximate (it converges
    towards the least-squares a_ℓm for band-limited maps).

    Parameters
    ----------
    maps : real array
        Spin 0: shape (npix,) or (k, npix); spin > 0: shape (2, npix) (Q, U for spin 2).
    lmax : int
        Band limit of the output (≤ 3·nside − 1 unless ``allow_high_lmax``).
    spin : {0, 1, 2, 3}
    jacobi_iterations : int
        Number of Jacobi refinement steps (default 3, healpy's default); 0 gives the plain quadrature.
    nthreads : int, optional

    Returns
    -------
    numpy.ndarray
        Complex coefficients, shape (nalm,), (k, nalm) or (2, nalm) matching ``maps``.

    References
    ----------
    Górski et al. 2005, ApJ 622, 759, §5 (iterative HEALPix analysis).

    Examples
    --------
    >>> import numpy as np
    >>> a = map2alm(np.ones(768), 16, nthreads=1)   # a constant map: a_00 = sqrt(4 pi)
    >>> round(float(a[0].real / np.sqrt(4 * np.pi)), 4)
    1.0
    """
    spin = check_spin(spin)
    jacobi_iterations = as_int(jacobi_iterations, "jacobi_iterations", minimum=0, maximum=100)
    array, nside, was_1d = _as_maps(maps, spin)
    lmax = check_lmax_for_nside(lmax, nside, allow_high_lmax=allow_high_lmax)
    nthreads = resolve_nthreads(nthreads)
    weight = 4.0 * np.pi / array.shape[-1]
    alm = _adjoint_healpix(array, nside, lmax, spin, nthreads)
    alm *= weight
    if jacobi_iterations:
        # one residual buffer, synthesized into and subtracted in place (no map-sized temporaries per step)
        residual = np.empty_like(array)
        for _ in range(jacobi_iterations):
            _synthesis_healpix(alm, nside, lmax, spin, nthreads, residual)
            np.subtract(array, residual, out=residual)
            correction = _adjoint_healpix(residual, nside, lmax, spin, nthreads)
            correction *= weight
            alm += correction
    return alm[0] if was_1d else alm


def jacobi_iterations_for(lmax: int, nside: int) -> int:
    """The fewest Jacobi iterations of :func:`map2alm` that keep a lensing filter's response within 1e-3.

    Measured (benchmarks/filter_accuracy.py, table in docs/filtering.md) on skies with the lensed CMB spectra
    band-limited at ``lmax``: up to ℓ_max = 2·nside the plain HEALPix quadrature (0 iterations) leaves T, E, B
    transfer errors ≤ 1.4e-4 at nside ≥ 256 (binned in ℓ) and E→B leakage ≤ 6e-5 of the B power, and the
    reconstructed φ agrees with the converged analysis to ≤ 6e-4 in every L bin (measured at nside 256 with
    white pixel noise); at nside 128 the quadrature alone leaves 1.3e-3 at L < 20, so 1 iteration is used
    there (2.4e-4). Up to 2.5·nside 3 iterations keep the transfer ≤ 5e-5 (2 leave 5e-4 E→B leakage).
    Beyond 2.5·nside no number of iterations (nor ducc0's LSMR pseudo-analysis) gets below ~1e-3 at 3·nside,
    and 3 (healpy's default) is returned.

    Parameters
    ----------
    lmax : int
        Band limit of the analysis.
    nside : int
        HEALPix resolution of the maps.

    Returns
    -------
    int

    Examples
    --------
    >>> jacobi_iterations_for(3000, 2048), jacobi_iterations_for(256, 128), jacobi_iterations_for(1200, 512)
    (0, 1, 3)
    """
    nside = check_nside(nside)
    lmax = as_int(lmax, "lmax", minimum=0)
    if lmax <= 2 * nside:
        return 0 if nside >= 256 else 1
    return 3


def alm2map_tqu(alm, nside: int, lmax: int, nthreads: int | None = None, allow_high_lmax: bool = False) -> np.ndarray:
    """(T, E, B) coefficients to (T, Q, U) HEALPix maps, as ``healpy.alm2map(alm, nside, pol=True)``.

    Parameters
    ----------
    alm : complex array, shape (3, nalm)
    nside, lmax, nthreads, allow_high_lmax : see :func:`alm2map`

    Returns
    -------
    numpy.ndarray, shape (3, npix)

    Examples
    --------
    >>> import numpy as np
    >>> alm2map_tqu(np.zeros((3, nalm(8)), complex), 4, 8, nthreads=1).shape
    (3, 192)
    """
    nside = check_nside(nside)
    lmax = check_lmax_for_nside(lmax, nside, allow_high_lmax=allow_high_lmax)
    array = as_finite_array(alm, "alm", shape=(3, nalm(lmax)), dtype=np.complex128)
    nthreads = resolve_nthreads(nthreads)
    out = np.empty((3, 12 * nside * nside))
    _synthesis_healpix(array[:1], nside, lmax, 0, nthreads, out[:1])
    _synthesis_healpix(array[1:], nside, lmax, 2, nthreads, out[1:])
    return out


@renamed_arguments(iterations="jacobi_iterations")
def map2alm_tqu(
    maps, lmax: int, jacobi_iterations: int = 3, nthreads: int | None = None, allow_high_lmax: bool = False
) -> np.ndarray:
    """(T, Q, U) HEALPix maps to (T, E, B) coefficients, as ``healpy.map2alm(maps, iter=3, use_weights=False)``.

    Parameters
    ----------
    maps : real array, shape (3, npix)
    lmax, jacobi_iterations, nthreads, allow_high_lmax : see :func:`map2alm`

    Returns
    -------
    numpy.ndarray, shape (3, nalm)

    Examples
    --------
    >>> import numpy as np
    >>> map2alm_tqu(np.zeros((3, 192)), 8, nthreads=1).shape
    (3, 45)
    """
    array = as_finite_array(maps, "maps", ndim=2)
    if array.shape[0] != 3:
        raise ValueError(f"maps must have shape (3, npix) for T, Q, U, got {array.shape}")
    out = np.empty((3, nalm(as_int(lmax, "lmax", minimum=0))), dtype=np.complex128)
    out[0] = map2alm(array[0], lmax, 0, jacobi_iterations, nthreads, allow_high_lmax)
    out[1:] = map2alm(array[1:], lmax, 2, jacobi_iterations, nthreads, allow_high_lmax)
    return out


# ---------------------------------------------------------------------------------- Gauss–Legendre grids
@dataclass(frozen=True)
class GLGrid:
    """A Gauss–Legendre grid: ``ntheta`` rings at the Gauss–Legendre nodes in cos θ, ``nphi`` equidistant
    pixels per ring starting at φ = 0.

    Synthesis followed by analysis is exact (to rounding) for fields band-limited at ``lmax`` when
    ``ntheta ≥ lmax + 1`` and ``nphi ≥ 2·lmax + 1``; more generally the analysis to ``lmax`` of a field
    band-limited at ``lmax_field`` is exact when ``ntheta ≥ (lmax + lmax_field)/2 + 1`` and
    ``nphi ≥ lmax + lmax_field + 1`` (the product of the two is then a polynomial the quadrature integrates
    exactly). Maps on the grid have shape (ncomp, ntheta, nphi).

    Parameters
    ----------
    ntheta : int
        Number of rings (≥ 1).
    nphi : int
        Pixels per ring (≥ 1).

    References
    ----------
    Driscoll & Healy 1994, Adv. Appl. Math. 15, 202 (exact quadrature on the sphere).

    Examples
    --------
    >>> import numpy as np
    >>> grid = GLGrid.for_lmax(8)
    >>> alm = np.zeros(nalm(8), complex); alm[5] = 1.0
    >>> bool(np.allclose(grid.analysis(grid.synthesis(alm, 8, nthreads=1), 8, nthreads=1)[0], alm))
    True
    """

    ntheta: int
    nphi: int

    def __post_init__(self):
        object.__setattr__(self, "ntheta", as_int(self.ntheta, "ntheta", minimum=1, maximum=200_000))
        object.__setattr__(self, "nphi", as_int(self.nphi, "nphi", minimum=1, maximum=400_000))

    @classmethod
    def for_lmax(cls, lmax: int, lmax_field: int | None = None) -> GLGrid:
        """The smallest grid (with an FFT-friendly nphi) on which analysis to ``lmax`` is exact for a field
        band-limited at ``lmax_field`` (default ``lmax``)."""
        return gl_grid_for_band_limits(lmax, lmax if lmax_field is None else lmax_field)

    @property
    def shape(self) -> tuple[int, int]:
        return (self.ntheta, self.nphi)

    @property
    def size(self) -> int:
        return self.ntheta * self.nphi

    @property
    def theta(self) -> np.ndarray:
        """Ring colatitudes in radians (increasing from the north pole)."""
        import ducc0.misc

        return ducc0.misc.GL_thetas(self.ntheta)

    @property
    def phi(self) -> np.ndarray:
        """Pixel longitudes of every ring in radians, 2π j / nphi."""
        return 2.0 * np.pi * np.arange(self.nphi) / self.nphi

    @property
    def weights(self) -> np.ndarray:
        """Quadrature weight of each pixel of each ring (sr), shape (ntheta,); they sum to 4π over the grid."""
        return _ducc_sht().get_gridweights("GL", self.ntheta) / self.nphi

    def positions(self) -> np.ndarray:
        """(θ, φ) of every pixel, ring by ring, shape (ntheta·nphi, 2), as :func:`alm2positions` takes."""
        loc = np.empty((self.ntheta, self.nphi, 2))
        loc[:, :, 0] = self.theta[:, None]
        loc[:, :, 1] = self.phi[None, :]
        return loc.reshape(-1, 2)

    def _check_lmax(self, lmax) -> int:
        lmax = as_int(lmax, "lmax", minimum=0)
        if lmax + 1 > self.ntheta or 2 * lmax + 1 > self.nphi:
            raise ValueError(
                f"lmax={lmax} is too high for a Gauss-Legendre grid of {self.ntheta} x {self.nphi}: "
                f"need ntheta >= lmax+1 and nphi >= 2*lmax+1 (use GLGrid.for_lmax({lmax}))"
            )
        return lmax

    def synthesis(self, alm, lmax: int, spin: int = 0, nthreads: int | None = None) -> np.ndarray:
        """Harmonic coefficients to grid maps, shape (ncomp, ntheta, nphi) (spin 0: k fields; spin > 0: 2).

        The values at the grid points are exact for any ``lmax``. ``alm`` shapes and the spin convention are those of :func:`alm2map`.
        """
        spin = check_spin(spin)
        # point values are exact for any grid size (modes m > nphi/2 fold correctly in the ring FFTs)
        lmax = as_int(lmax, "lmax", minimum=0)
        array, _ = _as_alm(alm, lmax, spin)
        nthreads = resolve_nthreads(nthreads)
        sht = _ducc_sht()
        if spin == 0:
            out = np.empty((array.shape[0], self.ntheta, self.nphi))
            for k in range(array.shape[0]):
                sht.synthesis_2d(
                    alm=array[k : k + 1], lmax=lmax, spin=0, geometry="GL", nthreads=nthreads, map=out[k : k + 1]
                )
            return out
        return sht.synthesis_2d(
            alm=array, lmax=lmax, spin=spin, geometry="GL", ntheta=self.ntheta, nphi=self.nphi, nthreads=nthreads
        )

    def analysis(self, maps, lmax: int, spin: int = 0, nthreads: int | None = None) -> np.ndarray:
        """Grid maps of shape (ncomp, ntheta, nphi) to coefficients, shape (ncomp, nalm), by exact quadrature.

        Exact for fields band-limited as described in the class docstring.
        """
        spin = check_spin(spin)
        lmax = self._check_lmax(lmax)
        array = as_finite_array(maps, "maps", ndim=3)
        if array.shape[1:] != self.shape:
            raise ValueError(f"maps must have shape (ncomp, {self.ntheta}, {self.nphi}), got {array.shape}")
        if spin > 0 and array.shape[0] != 2:
            raise ValueError(f"maps for spin {spin} must have 2 components, got {array.shape[0]}")
        nthreads = resolve_nthreads(nthreads)
        sht = _ducc_sht()
        if spin == 0:
            out = np.empty((array.shape[0], nalm(lmax)), dtype=np.complex128)
            for k in range(array.shape[0]):
                sht.analysis_2d(
                    map=array[k : k + 1], lmax=lmax, spin=0, geometry="GL", nthreads=nthreads, alm=out[k : k + 1]
                )
            return out
        return sht.analysis_2d(map=array, lmax=lmax, spin=spin, geometry="GL", nthreads=nthreads)


def gl_grid_for_band_limits(lmax: int, lmax_field: int) -> GLGrid:
    """The Gauss–Legendre grid on which analysis to ``lmax`` is exact for a field band-limited at ``lmax_field``.

    θ: the integrand ₛf · ₛY*_ℓm is, ring by ring, a polynomial of degree ℓ_f + ℓ in cos θ, and N
    Gauss–Legendre nodes integrate degree 2N − 1 exactly, so N = ⌊(lmax + lmax_field)/2⌋ + 1.
    φ: with nphi equidistant points, a field mode m' aliases onto m when m' ≡ m (mod nphi); no mode
    |m'| ≤ lmax_field lands on |m| ≤ lmax when nphi ≥ lmax + lmax_field + 1 (rounded up to an FFT-friendly
    size).

    Examples
    --------
    >>> gl_grid_for_band_limits(10, 20).shape
    (16, 32)
    """
    import ducc0.fft

    lmax = as_int(lmax, "lmax", minimum=0)
    lmax_field = as_int(lmax_field, "lmax_field", minimum=0)
    ntheta = (lmax + lmax_field) // 2 + 1
    nphi = int(ducc0.fft.good_size(lmax + lmax_field + 1))
    while nphi % 2:  # an even ring length (ducc0's FFTs handle factors 2, 3, 5, 7, 11 well)
        nphi = int(ducc0.fft.good_size(nphi + 1))
    return GLGrid(ntheta, nphi)


# ---------------------------------------------------------------------------------- arbitrary positions
def alm2positions(
    alm, theta, phi, spin: int = 0, lmax: int | None = None, epsilon: float = 1e-7, nthreads: int | None = None
) -> np.ndarray:
    """Evaluate a band-limited field at arbitrary points of the sphere (non-uniform synthesis).

    Parameters
    ----------
    alm : complex array
        As for :func:`alm2map` (spin 0: (nalm,) or (1, nalm); spin > 0: (2, nalm)).
    theta, phi : real arrays of one shape
        Colatitude in [0, π] and longitude (any real value; taken modulo 2π), radians.
    spin : {0, 1, 2, 3}
    lmax : int, optional
        Band limit of ``alm``; derived from its size if omitted.
    epsilon : float
        Requested relative accuracy (L2 norm of the error over the norm of the field), 2e-13 … 1e-1;
        default 1e-7.
    nthreads : int, optional

    Returns
    -------
    numpy.ndarray
        Spin 0: the field values, shape of ``theta`` (for 1-D ``alm``) or (1, …); spin > 0: shape
        (2, …) with the two real components in the (e_θ, e_φ) basis of each point (healpy's convention).

    References
    ----------
    Reinecke, Belkner & Carron 2023, A&A 678, A165 (spherical-harmonic synthesis at arbitrary points
    with a non-uniform FFT).

    Examples
    --------
    >>> import numpy as np
    >>> alm = np.zeros(nalm(4), complex); alm[1] = np.sqrt(4 * np.pi / 3)   # Y_10 scaled: cos(theta)
    >>> out = alm2positions(alm, np.array([0.3]), np.array([1.0]), lmax=4, nthreads=1)
    >>> bool(np.allclose(out, np.cos(0.3), atol=1e-6))
    True
    """
    spin = check_spin(spin)
    raw = np.asarray(alm)
    if lmax is None:
        lmax = lmax_from_nalm(raw.shape[-1] if raw.ndim else 1)
    lmax = as_int(lmax, "lmax", minimum=0)
    array, was_1d = _as_alm(alm, lmax, spin, stacked_spin0=False)
    epsilon = as_float(epsilon, "epsilon", minimum=2e-13, maximum=0.1)
    theta = as_finite_array(theta, "theta")
    phi = as_finite_array(phi, "phi")
    if theta.shape != phi.shape:
        raise ValueError(f"theta and phi must have one shape, got {theta.shape} and {phi.shape}")
    if theta.size and (theta.min() < 0.0 or theta.max() > np.pi):
        raise ValueError(f"theta must lie in [0, pi] radians, got values in [{theta.min()}, {theta.max()}]")
    loc = np.empty((theta.size, 2))
    loc[:, 0] = theta.ravel()
    loc[:, 1] = np.mod(phi.ravel(), 2.0 * np.pi)
    out = _synthesis_at(array, loc, spin, lmax, epsilon, resolve_nthreads(nthreads))
    out = out.reshape((out.shape[0],) + theta.shape)
    return out[0] if was_1d else out


def _synthesis_at(
    alm: np.ndarray, loc: np.ndarray, spin: int, lmax: int, epsilon: float, nthreads: int, gradient_only: bool = False
) -> np.ndarray:
    """ducc0 non-uniform synthesis on validated input; ``gradient_only`` skips an all-zero curl part
    (ducc0's gradient-only mode, which is not faster at every size)."""
    sht = _ducc_sht()
    if loc.shape[0] == 0:
        return np.empty((1 if spin == 0 else 2, 0))
    if spin > 0 and gradient_only:
        return sht.synthesis_general(
            alm=alm[:1], spin=spin, lmax=lmax, loc=loc, epsilon=epsilon, nthreads=nthreads, mode="GRAD_ONLY"
        )
    return sht.synthesis_general(alm=alm, spin=spin, lmax=lmax, loc=loc, epsilon=epsilon, nthreads=nthreads)
