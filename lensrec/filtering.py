r"""Filtering of observed T, Q, U maps for the quadratic estimators: the seam where filters plug in.

A *filter* turns observed maps into :class:`FilteredFields`, the inverse-variance filtered harmonic
coefficients T̄, Ē, B̄ that every quadratic estimator of :mod:`lensrec.reconstruction` uses as its legs.
Any object with a method ``filter(maps) -> FilteredFields`` is a filter (the :class:`FieldFilter`
protocol), so a better one (conjugate-gradient inversion of the full pixel covariance, anisotropic noise,
a joint T/E filter) plugs in without touching the estimators. The estimators use the filtered fields as
they are; their analytic normalization assumes the isotropic filter below (on a masked sky, or with any
other filter, the normalization is only approximate and simulations calibrate it).

Isotropic filter (:class:`IsotropicFilter`)
===========================================
Exactly the diagonal filter of :mod:`lensrec.estimator_weights` (module docstring, item 2)::

    X_ℓm = [map2alm(w · (T, Q, U))]_ℓm / b_ℓ ,         X̄_ℓm = X_ℓm / C^XX_tot,ℓ   (ℓ_min ≤ ℓ ≤ ℓ_max(X)),

and X̄_ℓm = 0 outside each field's multipole cuts, with b_ℓ the experiment's Gaussian beam, w the mask
(1 without one) and C_tot = lensed CMB + beam-deconvolved noise (:meth:`lensrec.Experiment.total_spectra`).
T̄, Ē, B̄ are in µK⁻¹. The harmonic analysis is healpy's iterative ``map2alm`` scheme
(:func:`lensrec.harmonics.map2alm_tqu`) with ``jacobi_iterations`` steps, by default the fewest that keep
the estimators' response within 1e-3 (:func:`lensrec.harmonics.jacobi_iterations_for`; measured table in
docs/filtering.md): none up to ℓ_max = 2·nside at nside ≥ 256, where HEALPix quadrature alone leaves
transfer errors ≤ 1.4e-4, one at smaller nside, and 3 above 2·nside. No pixel window is deconvolved (lensrec's simulations do not apply one unless asked).
Towards 3·nside the analysis degrades whatever the iterations (≈ 5% power errors near ℓ_max = 2.9·nside,
which lowered the measured EB response by 2% in a test at nside 512, ℓ_max 1500), so keep ℓ_max ≤ 2·nside
for lensing reconstruction.

Joint filter (``IsotropicFilter(..., joint=True)``): the same analysis, then X̄_ℓm = (C_ℓ⁻¹ X_ℓm) / b_ℓ with
C_ℓ the 3×3 total (T, E, B) covariance (TE correlation kept; :func:`joint_inverse_spectra`), so Ē draws on
T and T̄ on E. These are the inputs of the joint "GMV" estimator (Maniyar et al. 2021, PRD 103, 083524),
which is normalized for exactly this filter; :attr:`FilteredFields.joint` records which filter was used and
the estimators refuse fields filtered the other way. This is the seam a conjugate-gradient filter of the
full pixel covariance plugs into: it too returns C⁻¹-filtered T̄, Ē, B̄ with ``joint=True``.

Optimal filter (:class:`lensrec.optimal_filter.OptimalFilter`): the conjugate-gradient solution of
(S⁻¹ + Bᵀ Yᵀ N⁻¹ Y B) x̂ = Bᵀ Yᵀ N⁻¹ d for masked skies with a per-pixel noise variance, returning
X̄ = S⁻¹ x̂ in this same container (joint or per field); on a full sky with uniform noise it reduces to
the isotropic filter above.

Wiener filter: :meth:`FilteredFields.wiener` returns C^XX · X̄ (lensed C^XX), which for this diagonal
filter is the Wiener-filtered field C^XX/(C^XX + N^XX) · X of each field separately (the TE correlation is
not used: e.g. the Wiener-filtered E does not borrow from T). That is the E-mode template delensing
needs, and the "gradient" leg of the estimators. For jointly filtered fields it is Σ_Y C^XY Ȳ, the joint
Wiener filter C C_tot⁻¹ X.

Masks
=====
With a mask, the maps are multiplied by the weights w(n) before the transform. Pass an *apodized* mask
(:func:`lensrec.masks.apodize_binary_mask`, :func:`lensrec.masks.cap_mask` with a taper width, or
``apodization=`` here to apodize a binary one): a sharp edge rings in harmonic space and feeds a large
mean-field into the lensing estimate. The sky-fraction moments ⟨wⁿ⟩, n = 1…4, are recorded in
:attr:`FilteredFields.mask_moments` for the pseudo-C_ℓ corrections of :mod:`lensrec.power`.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping
from dataclasses import dataclass
from dataclasses import field as dataclass_field
from types import MappingProxyType
from typing import Protocol, runtime_checkable

import numpy as np

from . import harmonics
from ._checks import as_finite_array, as_float, as_int, check_lmax_for_nside, resolve_nthreads
from .experiment import Experiment, load_experiment
from .harmonics import ell_of_alm, nalm, npix_to_nside, truncate_alm
from .masks import MaskMoments, apodize_binary_mask, check_mask, sky_fraction_moments
from .spectra import Spectra, fiducial_spectra

__all__ = ["FIELDS", "FilteredFields", "FieldFilter", "IsotropicFilter", "joint_inverse_spectra"]

FIELDS = ("T", "E", "B")
_SIGNAL_KEYS = ("TT", "EE", "BB", "TE")


def _readonly(array: np.ndarray) -> np.ndarray:
    array = np.array(array, copy=True)
    array.setflags(write=False)
    return array


def joint_inverse_spectra(total: Mapping) -> dict[str, np.ndarray]:
    """Elements of the inverse of the 3×3 total (T, E, B) covariance per ℓ: the joint inverse-variance filter.

    With C_ℓ = [[C^TT, C^TE, 0], [C^TE, C^EE, 0], [0, 0, C^BB]] (total = lensed CMB + beam-deconvolved noise),
    returns (C_ℓ⁻¹)^TT, (C_ℓ⁻¹)^TE, (C_ℓ⁻¹)^EE and (C_ℓ⁻¹)^BB (the TB and EB elements vanish). Where a field is
    cut (auto-spectrum ``inf``, not positive or not finite) it drops out of the block: e.g. with E cut at ℓ,
    (C⁻¹)^TT = 1/C^TT and (C⁻¹)^TE = (C⁻¹)^EE = 0, so the filter reduces to the diagonal one there.

    Parameters
    ----------
    total : mapping
        'TT', 'EE', 'BB' and 'TE' total spectra on ℓ = 0 … lmax, as :meth:`lensrec.Experiment.total_spectra`.

    Returns
    -------
    dict 'TT', 'TE', 'EE', 'BB' → ndarray (µK⁻²)

    Raises
    ------
    ValueError
        Spectra of different lengths, or a T–E block that is not positive definite where both fields are used.

    References
    ----------
    Maniyar, Ali-Haïmoud, Carron, Lewis & Madhavacheril 2021, PRD 103, 083524 (the joint filter C⁻¹ of the
    generalized minimum-variance estimator).

    Examples
    --------
    >>> import numpy as np
    >>> inv = joint_inverse_spectra({"TT": np.array([2.0]), "EE": np.array([1.0]), "BB": np.array([4.0]),
    ...                              "TE": np.array([1.0])})
    >>> [float(inv[k][0]) for k in ("TT", "TE", "EE", "BB")]
    [1.0, -1.0, 2.0, 0.25]
    """
    arrays = {key: np.asarray(total[key], dtype=np.float64) for key in _SIGNAL_KEYS}
    size = arrays["TT"].size
    if any(array.shape != (size,) for array in arrays.values()):
        raise ValueError(
            f"total spectra must be 1-D arrays of one length, got { {k: v.shape for k, v in arrays.items()} }"
        )
    use = {x: np.isfinite(arrays[x + x]) & (arrays[x + x] > 0) for x in "TEB"}
    out = {key: np.zeros(size) for key in ("TT", "TE", "EE", "BB")}
    both = use["T"] & use["E"]
    te = np.where(both, arrays["TE"], 0.0)
    if not np.all(np.isfinite(te)):
        raise ValueError("the total TE spectrum must be finite where T and E are both used")
    tt = np.where(use["T"], arrays["TT"], 1.0)
    ee = np.where(use["E"], arrays["EE"], 1.0)
    determinant = tt * ee - te**2
    if np.any(determinant[both] <= 0):
        bad = int(np.flatnonzero(both & (determinant <= 0))[0])
        raise ValueError(f"the total T-E covariance is not positive definite at l={bad} (C^TE^2 >= C^TT C^EE)")
    out["TT"] = np.where(both, ee / np.where(both, determinant, 1.0), np.where(use["T"], 1.0 / tt, 0.0))
    out["EE"] = np.where(both, tt / np.where(both, determinant, 1.0), np.where(use["E"], 1.0 / ee, 0.0))
    out["TE"] = np.where(both, -te / np.where(both, determinant, 1.0), 0.0)
    out["BB"] = np.where(use["B"], 1.0 / np.where(use["B"], arrays["BB"], 1.0), 0.0)
    return out


def _field_index(name) -> int:
    if not isinstance(name, str) or name.upper() not in FIELDS:
        raise ValueError(f"field must be one of {FIELDS}, got {name!r}")
    return FIELDS.index(name.upper())


# ----------------------------------------------------------------------------------------- container
@dataclass(frozen=True, eq=False)
class FilteredFields:
    """Inverse-variance filtered T̄, Ē, B̄ harmonic coefficients (read-only) and how they were made.

    Parameters
    ----------
    alm : complex array, shape (3, nalm(lmax))
        T̄, Ē, B̄ in µK⁻¹ (healpy's triangular layout), zero outside each field's multipole cuts.
    lmax : int
        Band limit of ``alm``.
    signal : mapping
        CMB spectra ``"TT"``, ``"EE"``, ``"BB"``, ``"TE"`` (µK², ℓ = 0 … lmax) that define the Wiener filter
        C^XX · X̄ (lensed spectra for :class:`IsotropicFilter`).
    mask_moments : mapping or None
        ⟨wⁿ⟩ of the mask (``"w1"`` … ``"w4"``, ``"sky_fraction"``, ``"sky_fraction_spectra"``; see
        :func:`lensrec.masks.sky_fraction_moments`), None for a full, unmasked sky.
    settings : mapping
        How the fields were filtered (filter name, experiment, nside, jacobi_iterations, …).
    joint : bool
        False (default): each field filtered by its own total spectrum, X̄ = X / C^XX_tot (the pair
        estimators' filter). True: T, E, B filtered jointly, X̄ = C_tot⁻¹ X with the 3×3 total covariance
        per ℓ (TE correlation kept, :func:`joint_inverse_spectra`), the filter of the joint "GMV" estimator.

    Examples
    --------
    >>> import numpy as np
    >>> from lensrec.harmonics import nalm
    >>> spectra = {k: np.ones(9) for k in ("TT", "EE", "BB", "TE")}
    >>> fields = FilteredFields(np.ones((3, nalm(8)), complex), 8, spectra)
    >>> fields.E.shape, float(fields.wiener("E")[3].real)
    ((45,), 1.0)
    """

    alm: np.ndarray
    lmax: int
    signal: Mapping
    mask_moments: Mapping | None = None
    settings: Mapping = dataclass_field(default_factory=dict)
    joint: bool = False

    def __post_init__(self):
        if not isinstance(self.joint, (bool, np.bool_)):
            raise TypeError(f"joint must be True or False, got {self.joint!r}")
        object.__setattr__(self, "joint", bool(self.joint))
        lmax = as_int(self.lmax, "lmax", minimum=1)
        alm = as_finite_array(self.alm, "alm", shape=(3, nalm(lmax)), dtype=np.complex128)
        object.__setattr__(self, "lmax", lmax)
        object.__setattr__(self, "alm", _readonly(alm))
        if not isinstance(self.signal, Mapping):
            raise TypeError(f"signal must be a mapping of spectra {_SIGNAL_KEYS}, got {type(self.signal).__name__}")
        signal = {}
        for key in _SIGNAL_KEYS:
            if key not in self.signal:
                raise ValueError(f"signal must hold the spectra {_SIGNAL_KEYS}; {key!r} is missing")
            values = as_finite_array(self.signal[key], f"signal[{key!r}]", ndim=1)
            if values.size < lmax + 1:
                raise ValueError(f"signal[{key!r}] has {values.size} entries but lmax={lmax} needs {lmax + 1}")
            signal[key] = _readonly(values[: lmax + 1])
        object.__setattr__(self, "signal", MappingProxyType(signal))
        if self.mask_moments is not None:
            object.__setattr__(self, "mask_moments", MappingProxyType(MaskMoments.upgraded(self.mask_moments)))
        object.__setattr__(self, "settings", MappingProxyType(dict(self.settings)))

    @property
    def T(self) -> np.ndarray:
        """T̄_ℓm (µK⁻¹)."""
        return self.alm[0]

    @property
    def E(self) -> np.ndarray:
        """Ē_ℓm (µK⁻¹)."""
        return self.alm[1]

    @property
    def B(self) -> np.ndarray:
        """B̄_ℓm (µK⁻¹)."""
        return self.alm[2]

    @property
    def masked(self) -> bool:
        """True when the maps were multiplied by a mask before filtering."""
        return self.mask_moments is not None

    def field(self, name: str) -> np.ndarray:
        """X̄_ℓm of ``name`` ('T', 'E' or 'B')."""
        return self.alm[_field_index(name)]

    def wiener(self, name: str) -> np.ndarray:
        """The Wiener-filtered field (µK) of ``name`` ('T', 'E' or 'B'), a new array.

        Per-field filter (``joint`` False): C^XX · X̄, i.e. C^XX/(C^XX + N^XX) · X of that field alone. Joint
        filter: Σ_Y C^XY · Ȳ = (C C_tot⁻¹ X)_X, so the Wiener-filtered E also draws on T through C^TE.
        """
        index = _field_index(name)
        key = FIELDS[index] * 2
        out = harmonics.scale_alm(self.alm[index], self.signal[key], self.lmax)
        if self.joint and FIELDS[index] in "TE":
            other = 1 - index  # T <-> E
            out += harmonics.scale_alm(self.alm[other], self.signal["TE"], self.lmax)
        return out

    def wiener_alm(self) -> np.ndarray:
        """Wiener-filtered T, E, B coefficients, shape (3, nalm(lmax)) (µK)."""
        return np.stack([self.wiener(name) for name in FIELDS])


# ------------------------------------------------------------------------------------------ protocol
@runtime_checkable
class FieldFilter(Protocol):
    """Anything that turns observed (T, Q, U) maps into :class:`FilteredFields`.

    The estimators only ever call ``filter(maps)``; implement it (and nothing else is required) to plug in
    another filter. Implementations should validate the maps up front and record their settings in
    ``FilteredFields.settings``.
    """

    def filter(self, maps) -> FilteredFields:  # pragma: no cover - protocol signature only
        ...


# ----------------------------------------------------------------------------------------- isotropic
@dataclass(frozen=True, eq=False)
class IsotropicFilter:
    """The diagonal, isotropic inverse-variance filter X̄ = X / (b_ℓ C^XX_tot) (see the module docstring).

    Parameters
    ----------
    experiment : Experiment or str
        Noise, beam and multipole cuts (or the name / TOML path of an experiment).
    spectra : Spectra, optional
        Theory spectra for the total spectra and the Wiener filter; default: the fiducial cosmology.
    lmax : int, optional
        Band limit of the filtered fields. Default: the experiment's largest ℓ_max. A smaller value cuts
        both fields there (the experiment is replaced by one with ℓ_max ≤ lmax, stored as
        :attr:`experiment`, so that responses and N0 computed from it match the filter).
    mask : array, optional
        Weights w in [0, 1] on HEALPix RING pixels, multiplied into the maps before the transform.
    apodization : float, optional
        Taper width in degrees: apodize a *binary* ``mask`` first (:func:`lensrec.masks.apodize_binary_mask`,
        C2 taper). Default: use ``mask`` as given.
    jacobi_iterations : int or "auto"
        Jacobi iterations of the HEALPix analysis (0 is plain quadrature; healpy's default is 3). Default
        "auto": per call, the fewest that keep the response within 1e-3 for the maps' nside and ``lmax``
        (:func:`lensrec.harmonics.jacobi_iterations_for`: 0 up to ℓ_max = 2·nside at nside ≥ 256, 1 below,
        else 3; measured table in docs/filtering.md). The number used is recorded in ``FilteredFields.settings``.
    nthreads : int, optional
        Threads for the transforms (default ``LENSREC_NTHREADS`` or all cores).
    joint : bool
        False (default): filter each field by its own total spectrum, X̄ = X / (b_ℓ C^XX_tot). True: filter
        T, E, B jointly with the inverse 3×3 total covariance per ℓ, X̄ = C_tot⁻¹ X / b_ℓ (the filter of the
        joint "GMV" estimator; Maniyar et al. 2021, PRD 103, 083524). Both cost the same transforms.
    iterations : int, optional
        Deprecated name of ``jacobi_iterations`` (kept for one release; gives a DeprecationWarning).

    Attributes
    ----------
    experiment : Experiment
        The experiment actually used (ℓ_max capped at ``lmax``).
    total : mapping
        C_tot for 'TT', 'EE', 'BB' (inf outside the cuts) and 'TE', ℓ = 0 … lmax (µK²).

    Examples
    --------
    >>> import numpy as np, lensrec
    >>> e = lensrec.Experiment(name="demo", noise_temperature=5.0, beam_fwhm=10.0, ell_min=2,
    ...                        ell_max_temperature=40, ell_max_polarization=40)
    >>> f = IsotropicFilter(e, nthreads=1)
    >>> fields = f.filter(np.zeros((3, 12 * 16**2)))
    >>> fields.lmax, fields.masked
    (40, False)
    """

    experiment: Experiment
    spectra: Spectra | None = None
    lmax: int | None = None
    mask: np.ndarray | None = None
    apodization: float | None = None
    jacobi_iterations: int | str = "auto"
    nthreads: int | None = None
    joint: bool = False
    iterations: int | None = None

    def __post_init__(self):
        set_ = object.__setattr__
        if self.iterations is not None:
            warnings.warn(
                "IsotropicFilter(iterations=...) is deprecated; use jacobi_iterations=...",
                DeprecationWarning,
                stacklevel=3,
            )
            set_(self, "jacobi_iterations", self.iterations)
            set_(self, "iterations", None)
        if not isinstance(self.joint, (bool, np.bool_)):
            raise TypeError(f"joint must be True or False, got {self.joint!r}")
        set_(self, "joint", bool(self.joint))
        experiment = load_experiment(self.experiment)
        spectra = fiducial_spectra() if self.spectra is None else self.spectra
        if not isinstance(spectra, Spectra):
            raise TypeError(f"spectra must be a lensrec Spectra object (or None), got {type(spectra).__name__}")
        largest = max(experiment.ell_max_temperature, experiment.ell_max_polarization)
        lmax = largest if self.lmax is None else as_int(self.lmax, "lmax", minimum=experiment.ell_min + 1)
        if lmax > spectra.lmax:
            raise ValueError(
                f"lmax={lmax} exceeds the reach of the spectra (l <= {spectra.lmax}); lower lmax or "
                "supply spectra computed to higher l"
            )
        if lmax < largest:
            experiment = experiment.replace(
                ell_max_temperature=min(experiment.ell_max_temperature, lmax),
                ell_max_polarization=min(experiment.ell_max_polarization, lmax),
            )
        set_(self, "experiment", experiment)
        set_(self, "spectra", spectra)
        set_(self, "lmax", lmax)
        if self.jacobi_iterations != "auto":
            if isinstance(self.jacobi_iterations, str):
                raise ValueError(f"jacobi_iterations must be an integer >= 0 or 'auto', got {self.jacobi_iterations!r}")
            set_(self, "jacobi_iterations", as_int(self.jacobi_iterations, "jacobi_iterations", minimum=0, maximum=100))
        if self.nthreads is not None:
            set_(self, "nthreads", resolve_nthreads(self.nthreads))
        if self.mask is not None:
            mask = np.array(check_mask(self.mask))
            if self.apodization is not None:
                width = as_float(self.apodization, "apodization", minimum=0.0, maximum=90.0, strict_minimum=True)
                mask = apodize_binary_mask(mask, width)
                set_(self, "apodization", width)
            mask.setflags(write=False)
            set_(self, "mask", mask)
        elif self.apodization is not None:
            raise ValueError("apodization was given without a mask; pass mask= (a binary mask to apodize)")
        total = experiment.total_spectra(spectra, lmax, lensed=True)
        set_(self, "total", MappingProxyType({k: _readonly(v) for k, v in total.items()}))
        beam = experiment.beam(lmax)
        factors = []
        for name in FIELDS:
            auto = total[name * 2]
            usable = np.isfinite(auto) & (auto > 0)
            factor = np.zeros(lmax + 1)
            factor[usable] = 1.0 / (beam[usable] * auto[usable])
            if not np.any(usable):
                raise ValueError(
                    f"field {name} has no usable multipole between ell_min={experiment.ell_min} and lmax={lmax}"
                )
            factors.append(factor)
        set_(self, "_factors", _readonly(np.array(factors)))
        inverse = joint_inverse_spectra(total)
        with np.errstate(divide="ignore"):
            unbeam = np.where(beam > 0, 1.0 / np.where(beam > 0, beam, 1.0), 0.0)
        # rows T̄, Ē, B̄; columns T, E, B: (C_tot⁻¹)^XY / b_ℓ
        matrix = np.zeros((3, 3, lmax + 1))
        for (i, j), key in {(0, 0): "TT", (0, 1): "TE", (1, 0): "TE", (1, 1): "EE", (2, 2): "BB"}.items():
            matrix[i, j] = inverse[key] * unbeam
        set_(self, "_joint_matrix", _readonly(matrix))

    @property
    def mask_moments(self) -> dict | None:
        """⟨wⁿ⟩ of the mask (None without one)."""
        return None if self.mask is None else sky_fraction_moments(self.mask)

    def inverse_variance(self, field: str) -> np.ndarray:
        """The filter 1/(b_ℓ C^XX_tot,ℓ) applied to the observed X_ℓm of ``field`` (0 outside the cuts).

        This is the per-field filter; with ``joint=True`` the fields are filtered by
        :meth:`joint_inverse_variance` instead.
        """
        return np.array(self._factors[_field_index(field)])

    def joint_inverse_variance(self, output: str, observed: str) -> np.ndarray:
        """(C_tot⁻¹)^XY / b_ℓ: how the observed Y_ℓm enters the jointly filtered X̄_ℓm (0 between B and T or E)."""
        return np.array(self._joint_matrix[_field_index(output), _field_index(observed)])

    def _settings(self, **extra) -> dict:
        settings = {
            "filter": "isotropic",
            "joint": self.joint,
            "lmax": self.lmax,
            "jacobi_iterations": self.jacobi_iterations,
            "experiment": self.experiment.to_dict(),
            "spectra": dict(self.spectra.metadata),
            "apodization_deg": self.apodization,
        }
        settings.update(extra)
        return settings

    def _signal(self) -> dict:
        signal = self.spectra.cmb(lensed=True)
        return {key: signal[key][: self.lmax + 1] for key in _SIGNAL_KEYS}

    def filter(self, maps) -> FilteredFields:
        """Filter observed (T, Q, U) HEALPix maps (µK, RING).

        Parameters
        ----------
        maps : array, shape (3, 12·nside²)
            Observed T, Q, U (beam-convolved sky plus noise) in healpy's polarization convention.

        Returns
        -------
        FilteredFields

        Raises
        ------
        ValueError, TypeError
            Maps of the wrong shape or with non-finite pixels, nside not a power of two, lmax above
            3·nside − 1, a mask of another nside.
        """
        array = _check_maps(maps)
        nside = npix_to_nside(array.shape[1], "maps")
        check_lmax_for_nside(self.lmax, nside, name="lmax")
        moments = None
        if self.mask is not None:
            if self.mask.size != array.shape[1]:
                mask_nside = npix_to_nside(self.mask.size, "mask")
                raise ValueError(
                    f"mask has nside {mask_nside} ({self.mask.size} pixels) but the maps have nside "
                    f"{nside} ({array.shape[1]} pixels); regrade the mask (e.g. healpy.ud_grade)"
                )
            array = array * self.mask
            moments = sky_fraction_moments(self.mask)
        iterations = self.jacobi_iterations
        if iterations == "auto":
            iterations = harmonics.jacobi_iterations_for(self.lmax, nside)
        alm = harmonics.map2alm_tqu(array, self.lmax, jacobi_iterations=iterations, nthreads=self.nthreads)
        return self._finish(alm, moments, nside=nside, source="maps", jacobi_iterations=iterations)

    def filter_alm(self, alm) -> FilteredFields:
        """Filter observed full-sky (T, E, B) harmonic coefficients (beam-convolved, µK), skipping the maps.

        Parameters
        ----------
        alm : complex array, shape (3, nalm(L)) with L ≥ lmax
            Coefficients to any band limit at or above the filter's ``lmax`` (higher ℓ are dropped).

        Raises
        ------
        ValueError
            If a mask was given (masks act on maps: use :meth:`filter`), or for a bad shape.
        """
        if self.mask is not None:
            raise ValueError("filter_alm takes full-sky coefficients; with a mask, filter the maps with filter(maps)")
        raw = np.asarray(alm)
        if raw.ndim != 2 or raw.shape[0] != 3:
            raise ValueError(f"alm must have shape (3, nalm) for T, E, B, got {raw.shape}")
        lmax_in = harmonics.lmax_from_nalm(raw.shape[1], "alm")
        if lmax_in < self.lmax:
            raise ValueError(f"alm reach l={lmax_in} but the filter needs l up to lmax={self.lmax}")
        array = as_finite_array(raw, "alm", dtype=np.complex128)
        if lmax_in > self.lmax:
            array = truncate_alm(array, self.lmax, lmax_in)
        return self._finish(array, None, source="alm", jacobi_iterations=None)

    def joint_fields(self, fields: FilteredFields) -> FilteredFields:
        """Jointly filtered fields from fields this filter made field by field, without a transform.

        X̄_joint = C_tot⁻¹ (C^XX_tot X̄): the per-field filter is undone per ℓ (exactly, where the field is used;
        elsewhere both are zero) and the joint one applied. The result equals ``filter`` with ``joint=True``
        on the same maps, to rounding.

        Raises
        ------
        TypeError, ValueError
            Not FilteredFields, already joint, or made to another lmax.
        """
        if not isinstance(fields, FilteredFields):
            raise TypeError(f"fields must be FilteredFields, got {type(fields).__name__}")
        if fields.joint:
            raise ValueError("these fields are filtered jointly already")
        if fields.lmax != self.lmax:
            raise ValueError(f"fields reach lmax={fields.lmax} but this filter works to lmax={self.lmax}")
        ell = ell_of_alm(self.lmax)
        with np.errstate(divide="ignore"):
            undo = np.where(self._factors > 0, 1.0 / np.where(self._factors > 0, self._factors, 1.0), 0.0)
        observed = fields.alm * undo[:, ell]  # b_ℓ X: the per-field factors are 1/(b C^XX)
        joint = self._joint_matrix
        out = np.empty_like(observed)
        out[0] = observed[0] * joint[0, 0, ell] + observed[1] * joint[0, 1, ell]
        out[1] = observed[0] * joint[1, 0, ell] + observed[1] * joint[1, 1, ell]
        out[2] = observed[2] * joint[2, 2, ell]
        settings = dict(fields.settings)
        settings["joint"] = True
        return FilteredFields(out, self.lmax, fields.signal, fields.mask_moments, settings, joint=True)

    def _finish(self, alm: np.ndarray, moments, **extra) -> FilteredFields:
        ell = ell_of_alm(self.lmax)
        if self.joint:
            matrix = self._joint_matrix
            out = np.empty_like(alm)
            out[0] = alm[0] * matrix[0, 0, ell] + alm[1] * matrix[0, 1, ell]
            out[1] = alm[0] * matrix[1, 0, ell] + alm[1] * matrix[1, 1, ell]
            out[2] = alm[2] * matrix[2, 2, ell]
            alm = out
        else:
            alm = alm * self._factors[:, ell]
        return FilteredFields(alm, self.lmax, self._signal(), moments, self._settings(**extra), joint=self.joint)


def _check_maps(maps) -> np.ndarray:
    raw = np.asarray(maps) if not isinstance(maps, (str, bytes)) else maps
    if isinstance(raw, np.ndarray) and (raw.ndim != 2 or raw.shape[0] != 3):
        raise ValueError(f"maps must have shape (3, npix) for T, Q, U, got {raw.shape}")
    array = as_finite_array(maps, "maps", ndim=2)
    npix_to_nside(array.shape[1], "maps")
    return array
