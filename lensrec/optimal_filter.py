r"""The optimal (conjugate-gradient) inverse-variance filter for masked skies with inhomogeneous noise.

Form
====
With d the observed T, Q, U maps, Y the HEALPix synthesis of (T, E, B) coefficients into (T, Q, U) (spin 0
and spin 2), B the beam times the pixel window per ℓ, S the lensed CMB covariance per ℓ and N⁻¹ the inverse
pixel noise variance (µK⁻², zero outside the mask, diagonal per pixel with Q and U uncorrelated), the
Wiener-filtered sky is

    x̂ = (S⁻¹ + Bᵀ Yᵀ N⁻¹ Y B)⁻¹ Bᵀ Yᵀ N⁻¹ d,

and the inverse-variance filtered fields handed to the quadratic estimators are X̄ = S⁻¹ x̂ (Smith, Zahn &
Doré 2007, PRD 76, 043510; Eriksen et al. 2004, ApJS 155, 227). Yᵀ is the exact adjoint of the synthesis
(:func:`lensrec.harmonics.adjoint_alm2map`, no pixel weights). On a full sky with uniform noise σ² per
pixel, Yᵀ N⁻¹ Y = (N_pix/4π σ²) · 1 up to HEALPix quadrature, so X̄ = B d_ℓm/(B² S + N_ℓ) with N_ℓ = σ² Ω_pix:
the isotropic filter of :class:`lensrec.IsotropicFilter` (same beam-convolved convention). The unknowns are
the (T, E, B) coefficients with ℓ_min ≤ ℓ ≤ ℓ_max of each field (the ℓ cuts); other multipoles are zero in
x̂ and X̄, as in the isotropic filter.

Joint or separate
=================
``joint=True`` keeps the TE correlation in S (a 3×3 block per ℓ), so T̄ and Ē draw on each other: these are
the fields of the joint "GMV" estimator (``FilteredFields.joint`` True). ``joint=False`` (default) drops C^TE
from S; the noise does not couple temperature and polarization either, so T and (E, B) are then filtered
separately: these are the per-field filtered inputs that the pair estimators TT … EB and their MV
combination are normalized for. Both run in one conjugate-gradient solve (the cost is the same: one spin-0
and one spin-2 synthesis and adjoint per iteration).

Solver
======
Preconditioned conjugate gradients (Hestenes & Stiefel 1952) on the real inner product of the coefficients
(m > 0 counted twice). The preconditioner is harmonic-diagonal: (S⁻¹ + B² n̄⁻¹)⁻¹ per ℓ (3×3 block), with n̄⁻¹
the inverse noise averaged over the observed pixels × N_pix/4π (Smith et al. 2007, §IV). The solve stops when
|r|/|b| < ``cg_tolerance`` (r = b − A x, b = Bᵀ Yᵀ N⁻¹ d) and raises :class:`ConvergenceError` if it has not
within ``cg_max_iterations``. The iterations and final residual are stored in ``FilteredFields.settings``;
``callback(iteration, residual)`` is called after each iteration (progress bars; raise from it to cancel).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from types import MappingProxyType

import numpy as np

from . import harmonics
from ._checks import as_finite_array, as_float, as_int, check_lmax_for_nside, resolve_nthreads
from .experiment import Experiment, load_experiment
from .filtering import FIELDS, FilteredFields, joint_inverse_spectra
from .harmonics import ell_of_alm, nalm, npix_to_nside
from .masks import sky_fraction_moments
from .pixel_noise import PixelNoise, pixel_window
from .spectra import Spectra, fiducial_spectra

__all__ = ["OptimalFilter", "ConvergenceError", "DEFAULT_CG_TOLERANCE", "DEFAULT_CG_MAX_ITERATIONS"]

DEFAULT_CG_TOLERANCE = 1e-4
DEFAULT_CG_MAX_ITERATIONS = 1000
_SIGNAL_KEYS = ("TT", "EE", "BB", "TE")


class ConvergenceError(ValueError):
    """The conjugate-gradient filter did not reach its tolerance within its iteration limit."""


def _readonly(array) -> np.ndarray:
    array = np.array(array, copy=True)
    array.setflags(write=False)
    return array


def _block_apply(matrix: np.ndarray, alm: np.ndarray, ell: np.ndarray) -> np.ndarray:
    """Apply a per-ℓ 3×3 matrix (3, 3, lmax+1) to (3, nalm) coefficients."""
    out = np.empty_like(alm)
    for i in range(3):
        out[i] = matrix[i, 0][ell] * alm[0] + matrix[i, 1][ell] * alm[1] + matrix[i, 2][ell] * alm[2]
    return out


def _inverse_blocks(tt, te, ee, bb) -> np.ndarray:
    """(3, 3, n) inverse of [[tt, te, 0], [te, ee, 0], [0, 0, bb]] via :func:`joint_inverse_spectra`."""
    inverse = joint_inverse_spectra({"TT": tt, "TE": te, "EE": ee, "BB": bb})
    matrix = np.zeros((3, 3, tt.size))
    matrix[0, 0], matrix[0, 1], matrix[1, 0] = inverse["TT"], inverse["TE"], inverse["TE"]
    matrix[1, 1], matrix[2, 2] = inverse["EE"], inverse["BB"]
    return matrix


@dataclass(frozen=True, eq=False)
class OptimalFilter:
    """Conjugate-gradient inverse-variance filter X̄ = S⁻¹ (S⁻¹ + Bᵀ Yᵀ N⁻¹ Y B)⁻¹ Bᵀ Yᵀ N⁻¹ d (module docstring).

    Parameters
    ----------
    experiment : Experiment or str
        Beam and multipole cuts (its noise levels are not used: the noise is ``noise``).
    noise : PixelNoise
        Per-pixel noise variance and the mask; N⁻¹ = 1/σ² where the mask is > 0, 0 elsewhere (an apodized
        mask only marks the observed region here: the optimal filter needs no apodization).
    spectra : Spectra, optional
        Lensed CMB spectra for S; default the fiducial cosmology.
    lmax : int, optional
        Band limit (default: the lesser of the experiment's largest ℓ_max and 2·nside, HEALPix's accurate
        quadrature range).
    joint : bool
        Keep the TE correlation in S (fields for the joint "GMV" estimator); default False (T and
        polarization filtered separately, the fields of the pair estimators and MV).
    pixel_window : bool or array
        Include the HEALPix pixel window in B (True: :func:`lensrec.pixel_window`; or an array w_ℓ).
    cg_tolerance : float
        Stop when |r|/|b| < cg_tolerance (default 1e-4).
    cg_max_iterations : int
        Raise :class:`ConvergenceError` beyond this many iterations (default 1000).
    callback : callable, optional
        ``callback(iteration, residual)`` after every iteration.
    nthreads : int, optional

    Examples
    --------
    >>> import numpy as np, lensrec
    >>> e = lensrec.Experiment(noise_temperature=5.0, beam_fwhm=60.0, ell_max_temperature=20,
    ...                        ell_max_polarization=20)
    >>> f = OptimalFilter(e, lensrec.PixelNoise.uniform(e, 8), nthreads=1)
    >>> fields = f.filter(np.zeros((3, 12 * 8**2)))
    >>> fields.lmax, fields.settings["cg_iterations"]
    (16, 0)
    """

    experiment: Experiment
    noise: PixelNoise
    spectra: Spectra | None = None
    lmax: int | None = None
    joint: bool = False
    pixel_window: bool | np.ndarray = False
    cg_tolerance: float = DEFAULT_CG_TOLERANCE
    cg_max_iterations: int = DEFAULT_CG_MAX_ITERATIONS
    callback: Callable | None = None
    nthreads: int | None = None

    def __post_init__(self):
        set_ = object.__setattr__
        experiment = load_experiment(self.experiment)
        if not isinstance(self.noise, PixelNoise):
            raise TypeError(
                f"noise must be a lensrec PixelNoise (from a variance or hit map), got {type(self.noise).__name__}"
            )
        nside = self.noise.nside
        spectra = fiducial_spectra() if self.spectra is None else self.spectra
        if not isinstance(spectra, Spectra):
            raise TypeError(f"spectra must be a lensrec Spectra object (or None), got {type(spectra).__name__}")
        largest = max(experiment.ell_max_temperature, experiment.ell_max_polarization)
        if self.lmax is None:
            lmax = min(largest, 2 * nside)
        else:
            lmax = as_int(self.lmax, "lmax", minimum=experiment.ell_min + 1)
        lmax = check_lmax_for_nside(lmax, nside, name="lmax")
        if lmax > spectra.lmax:
            raise ValueError(f"lmax={lmax} exceeds the reach of the spectra (l <= {spectra.lmax})")
        if lmax < largest:
            experiment = experiment.replace(
                ell_max_temperature=min(experiment.ell_max_temperature, lmax),
                ell_max_polarization=min(experiment.ell_max_polarization, lmax),
            )
        if not isinstance(self.joint, (bool, np.bool_)):
            raise TypeError(f"joint must be True or False, got {self.joint!r}")
        set_(self, "joint", bool(self.joint))
        set_(self, "experiment", experiment)
        set_(self, "spectra", spectra)
        set_(self, "lmax", lmax)
        set_(self, "cg_tolerance", as_float(self.cg_tolerance, "cg_tolerance", 1e-14, 0.5, strict_minimum=False))
        set_(self, "cg_max_iterations", as_int(self.cg_max_iterations, "cg_max_iterations", 1, 100000))
        if self.callback is not None and not callable(self.callback):
            raise TypeError(f"callback must be callable(iteration, residual), got {self.callback!r}")
        set_(self, "nthreads", resolve_nthreads(self.nthreads))
        # transfer: beam times pixel window
        transfer = experiment.beam(lmax)
        window = self.pixel_window
        if window is True:
            transfer = transfer * pixel_window(nside, lmax)
            set_(self, "pixel_window", True)
        elif window is False or window is None:
            set_(self, "pixel_window", False)
        else:
            values = as_finite_array(window, "pixel_window", ndim=1)
            if values.size < lmax + 1:
                raise ValueError(f"pixel_window has {values.size} entries but lmax={lmax} needs {lmax + 1}")
            transfer = transfer * values[: lmax + 1]
            set_(self, "pixel_window", _readonly(values[: lmax + 1]))
        set_(self, "_transfer", _readonly(transfer))
        # the signal covariance restricted to each field's multipole cuts
        signal = spectra.cmb(lensed=True)
        ell = np.arange(lmax + 1)
        active = np.zeros((3, lmax + 1), dtype=bool)
        for k, name in enumerate(FIELDS):
            active[k] = (ell >= experiment.ell_min) & (ell <= experiment.ell_max(name))
        blocks = {}
        for key in ("TT", "EE", "BB"):
            values = np.array(signal[key][: lmax + 1], dtype=float)
            use = active[FIELDS.index(key[0])] & (values > 0)
            blocks[key] = np.where(use, values, np.inf)
        te = np.array(signal["TE"][: lmax + 1], dtype=float) if self.joint else np.zeros(lmax + 1)
        active &= np.isfinite(np.stack([blocks["TT"], blocks["EE"], blocks["BB"]]))
        set_(self, "_signal_inverse", _readonly(_inverse_blocks(blocks["TT"], te, blocks["EE"], blocks["BB"])))
        set_(self, "_active", _readonly(active))
        if not active.any():
            raise ValueError(f"no multipole between ell_min={experiment.ell_min} and lmax={lmax} is used")
        # harmonic-diagonal preconditioner: (S^-1 + B^2 nbar^-1)^-1
        ninv = self.noise.inverse_variance()
        observed = self.noise.observed
        npix = ninv.shape[1]
        mean_t = ninv[0, observed].mean() * npix / (4.0 * math.pi)
        mean_p = 0.5 * (ninv[1, observed].mean() + ninv[2, observed].mean()) * npix / (4.0 * math.pi)
        set_(self, "_ninv", _readonly(ninv))
        precon = np.zeros((3, 3, lmax + 1))
        cov = np.zeros((3, 3, lmax + 1))
        cov[:] = self._signal_inverse
        cov[0, 0] += transfer**2 * mean_t
        cov[1, 1] += transfer**2 * mean_p
        cov[2, 2] += transfer**2 * mean_p
        for i in range(lmax + 1):
            idx = np.flatnonzero(active[:, i])
            if idx.size:
                precon[np.ix_(idx, idx, [i])] = np.linalg.inv(cov[np.ix_(idx, idx, [i])][:, :, 0])[:, :, None]
        set_(self, "_preconditioner", _readonly(precon))

    # --------------------------------------------------------------------------------------- pieces
    @property
    def nside(self) -> int:
        return self.noise.nside

    def _ell(self) -> np.ndarray:
        return ell_of_alm(self.lmax)

    def _active_alm(self) -> np.ndarray:
        return self._active[:, self._ell()]

    def _synthesis(self, alm: np.ndarray) -> np.ndarray:
        return harmonics.alm2map_tqu(alm, self.nside, self.lmax, nthreads=self.nthreads)

    def _adjoint(self, maps: np.ndarray) -> np.ndarray:
        out = np.empty((3, nalm(self.lmax)), dtype=np.complex128)
        out[0] = harmonics.adjoint_alm2map(maps[0], self.lmax, 0, self.nthreads)
        out[1:] = harmonics.adjoint_alm2map(maps[1:], self.lmax, 2, self.nthreads)
        return out

    def operator(self, x) -> np.ndarray:
        """A x = S⁻¹ x + Bᵀ Yᵀ N⁻¹ Y B x for (3, nalm(lmax)) coefficients (zero outside the ℓ cuts)."""
        ell = self._ell()
        x = np.asarray(x, dtype=np.complex128) * self._active_alm()
        maps = self._synthesis(x * self._transfer[ell])
        maps *= self._ninv
        out = self._adjoint(maps) * self._transfer[ell]
        out += _block_apply(self._signal_inverse, x, ell)
        return out * self._active_alm()

    def right_hand_side(self, maps) -> np.ndarray:
        """b = Bᵀ Yᵀ N⁻¹ d (zero outside the ℓ cuts)."""
        return self._adjoint(maps * self._ninv) * self._transfer[self._ell()] * self._active_alm()

    def precondition(self, r) -> np.ndarray:
        """The harmonic-diagonal preconditioner (S⁻¹ + B² n̄⁻¹)⁻¹ applied to ``r``."""
        return _block_apply(self._preconditioner, r, self._ell())

    def _dot(self, a, b) -> float:
        weights = np.where(np.arange(nalm(self.lmax)) <= self.lmax, 1.0, 2.0)  # m = 0 first in healpy's layout
        return float(np.sum(weights * (a.real * b.real + a.imag * b.imag)))

    def solve(self, maps) -> tuple[np.ndarray, dict]:
        """The Wiener-filtered (T, E, B) coefficients x̂ (µK) and the solver record (iterations, residual)."""
        array = self._check_maps(maps)
        b = self.right_hand_side(array)
        norm_b = math.sqrt(self._dot(b, b))
        x = np.zeros_like(b)
        record = {"cg_iterations": 0, "cg_residual": 0.0, "cg_tolerance": self.cg_tolerance}
        if norm_b == 0.0:
            return x, record
        r = b.copy()
        z = self.precondition(r)
        p = z.copy()
        rz = self._dot(r, z)
        residual = 1.0
        for iteration in range(1, self.cg_max_iterations + 1):
            q = self.operator(p)
            alpha = rz / self._dot(p, q)
            x += alpha * p
            r -= alpha * q
            residual = math.sqrt(self._dot(r, r)) / norm_b
            if self.callback is not None:
                self.callback(iteration, residual)
            if residual < self.cg_tolerance:
                record.update(cg_iterations=iteration, cg_residual=residual)
                return x, record
            z = self.precondition(r)
            rz_new = self._dot(r, z)
            p = z + (rz_new / rz) * p
            rz = rz_new
        raise ConvergenceError(
            f"the conjugate-gradient filter did not converge: residual {residual:.3g} after cg_max_iterations="
            f"{self.cg_max_iterations} is above cg_tolerance={self.cg_tolerance:g}; raise cg_max_iterations or "
            "loosen cg_tolerance (nside, lmax, mask and noise map decide how many are needed)"
        )

    def filter(self, maps) -> FilteredFields:
        """Filter observed (T, Q, U) maps (µK, RING; unmasked, or masked with a binary mask) into X̄ = S⁻¹ x̂."""
        x, record = self.solve(maps)
        filtered = _block_apply(self._signal_inverse, x, self._ell()) * self._active_alm()
        signal = self.spectra.cmb(lensed=True)
        signal = {key: np.array(signal[key][: self.lmax + 1]) for key in _SIGNAL_KEYS}
        if not self.joint:
            signal["TE"] = np.zeros(self.lmax + 1)
        binary = self.noise.observed.astype(float)
        moments = None if binary.all() else sky_fraction_moments(binary)
        settings = {
            "filter": "optimal",
            "joint": self.joint,
            "lmax": self.lmax,
            "nside": self.nside,
            "experiment": self.experiment.to_dict(),
            "spectra": dict(self.spectra.metadata),
            "pixel_window": self.pixel_window is not False,
            "preconditioner": "harmonic-diagonal",
            "noise_levels_uK_arcmin": self.noise.noise_levels(),
            "sky_fraction": float(binary.mean()),
            **record,
        }
        return FilteredFields(filtered, self.lmax, signal, moments, settings, joint=self.joint)

    def _check_maps(self, maps) -> np.ndarray:
        raw = np.asarray(maps) if not isinstance(maps, (str, bytes)) else maps
        if isinstance(raw, np.ndarray) and (raw.ndim != 2 or raw.shape[0] != 3):
            raise ValueError(f"maps must have shape (3, npix) for T, Q, U, got {raw.shape}")
        array = as_finite_array(maps, "maps", ndim=2)
        nside = npix_to_nside(array.shape[1], "maps")
        if nside != self.nside:
            raise ValueError(
                f"the maps have nside {nside} but the noise model and mask have nside {self.nside}; "
                "regrade one of them (e.g. healpy.ud_grade)"
            )
        return array

    @property
    def signal_inverse(self) -> MappingProxyType:
        """S⁻¹ blocks per ℓ as a read-only mapping 'TT', 'TE', 'EE', 'BB' (µK⁻², zero outside the cuts)."""
        m = self._signal_inverse
        return MappingProxyType({"TT": m[0, 0], "TE": m[0, 1], "EE": m[1, 1], "BB": m[2, 2]})
