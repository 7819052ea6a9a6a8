# Over 600 lines: one tracer model shared by its simulation, its combination with phi and its forecasts.
"""External tracers of the lensing potential, their optimal combination with φ̂, and correlated simulations.

A tracer I (e.g. a cosmic-infrared-background-like intensity map or a galaxy density) is described by its
signal auto-spectrum C_L^II, its cross-spectrum with the lensing potential C_L^Iφ (or with the convergence,
C_L^Iκ = L(L+1)/2 · C_L^Iφ) and its noise N_L^I; several tracers also need their signal cross-spectra
C_L^IJ. With the inputs X = (I_1, …, I_n[, φ̂]), of covariance C_L = signal + noise (the internal
reconstruction φ̂ = φ + n enters with auto C^φφ + N0 and cross C^Iφ with every tracer), the linear
combination that minimizes ⟨|φ − Σ_i w_i X_i|²⟩ is the Wiener estimate

    φ^comb_LM = Σ_i w_i(L) X_i,LM,   w(L) = C_L⁻¹ c_L,   c_i = ⟨X_i φ*⟩,
    ρ_L² = c_Lᵀ C_L⁻¹ c_L / C_L^φφ,

and the lensing power left after delensing with it is C^φφ(1 − ρ²) (Sherwin & Schmittfull 2015, PRD 92,
043005; Yu, Hill & Sherwin 2017, PRD 96, 123511). ρ² of a combination is never below the largest ρ² of
its parts (the best single input is one admissible combination). For the forecast of delensing the
combination acts as a reconstruction of effective noise N_eff = C^φφ (1 − ρ²)/ρ²; its Wiener filter
C^φφ/(C^φφ + N_eff) = ρ² is the combination itself (``combined_phi``).

Simulated tracers are Gaussian and drawn conditionally on the simulated φ:
I_LM = (c_L / C_L^φφ) φ_LM + u_LM + n_LM, with u Gaussian of covariance C^II − c cᵀ/C^φφ (the part of the
tracers uncorrelated with φ) and n the noise; the random numbers come from
``lensrec.seeding.rng_for(seed, index, "tracer")``. These are simulations of idealized, Gaussian tracers,
not of any survey.
"""

from __future__ import annotations

import os
import tomllib
from dataclasses import dataclass, field

import numpy as np

from ._checks import as_int
from .harmonics import ell_of_alm, lmax_from_nalm, nalm

__all__ = [
    "Tracer",
    "TracerSet",
    "TracerCombination",
    "make_tracer",
    "tracer_set",
    "load_tracers",
    "combine_tracers",
    "simulate_tracers",
    "combined_phi",
    "available_tracers",
    "tracer_delensing_forecasts",
    "TRACER_NOTE",
]

TRACER_NOTE = (
    "Tracers are modeled as Gaussian fields with the given auto-, cross- and noise spectra; their optimal "
    "combination with the internal reconstruction follows Sherwin & Schmittfull 2015 (PRD 92, 043005) and Yu, "
    "Hill & Sherwin 2017 (PRD 96, 123511). Results describe simulations, not a survey."
)
PSD_TOLERANCE = 1e-10  # relative: eigenvalues above -1e-10 of the largest count as zero (float rounding)


def _data_dir() -> str:
    return os.path.join(os.path.dirname(os.path.abspath(__file__)), "data", "tracers")


def available_tracers() -> list[str]:
    """Names of the shipped (invented) tracer files, usable in :func:`load_tracers` and ``--tracer``."""
    folder = _data_dir()
    return sorted(name[:-5] for name in os.listdir(folder) if name.endswith(".toml")) if os.path.isdir(folder) else []


def _array(values, name: str, allow_negative: bool = False) -> np.ndarray:
    if isinstance(values, (str, bytes)) or values is None:
        raise TypeError(f"{name} must be a numeric array indexed by L from 0, got {type(values).__name__}")
    array = np.asarray(values)
    if not (np.issubdtype(array.dtype, np.floating) or np.issubdtype(array.dtype, np.integer)):
        raise TypeError(f"{name} must be a real numeric array, got dtype {array.dtype}")
    array = array.astype(np.float64)
    if array.ndim != 1 or array.size < 3:
        raise ValueError(f"{name} must be 1-D with at least L = 0, 1, 2, got shape {array.shape}")
    if not np.all(np.isfinite(array)):
        raise ValueError(f"{name} must be finite (NaN or inf found at L = {int(np.argmax(~np.isfinite(array)))})")
    if not allow_negative and np.any(array < 0):
        bad = int(np.argmin(array))
        raise ValueError(f"{name} must be non-negative (a power spectrum); got {array[bad]:.4g} at L = {bad}")
    return array


@dataclass(frozen=True, eq=False)
class Tracer:
    """One tracer of the lensing potential (arrays indexed by L from 0, in the tracer's own units).

    Attributes
    ----------
    name : str
    auto : ndarray
        Signal auto-spectrum C_L^II (noise excluded).
    cross_phi : ndarray
        Cross-spectrum with the lensing potential C_L^Iφ.
    noise : ndarray
        Noise power N_L^I (uncorrelated with φ, the CMB and the other tracers).
    """

    name: str
    auto: np.ndarray
    cross_phi: np.ndarray
    noise: np.ndarray

    @property
    def lmax_L(self) -> int:
        return self.auto.size - 1

    def correlation(self, phi_spectrum) -> np.ndarray:
        """ρ_L = C^Iφ / √(C^φφ (C^II + N^I)), 0 where either power vanishes."""
        phi = np.asarray(phi_spectrum, dtype=np.float64)[: self.lmax_L + 1]
        denominator = np.sqrt(phi * (self.auto + self.noise))
        return np.divide(self.cross_phi, denominator, out=np.zeros_like(denominator), where=denominator > 0)


def make_tracer(name, auto, cross, noise, cross_with: str = "phi") -> Tracer:
    """A :class:`Tracer` from arrays, with its cross-spectrum given with φ or with κ.

    Parameters
    ----------
    name : str
        A label of your own (no spaces needed; used in JSON keys and messages).
    auto, cross, noise : array_like
        Signal auto-spectrum, cross-spectrum with φ (or κ) and noise power, indexed by L from 0, one common
        length. ``auto`` and ``noise`` must be non-negative; ``cross`` may be negative (anti-correlation).
    cross_with : {"phi", "kappa"}
        What ``cross`` correlates with; κ = −∇²φ/2, so C^Iφ = 2 C^Iκ / (L(L+1)) (L ≥ 1; L = 0 set to 0).

    Returns
    -------
    Tracer

    Raises
    ------
    TypeError, ValueError
        For a non-string name, non-numeric or non-finite arrays, arrays of different lengths, negative auto or
        noise power, or an unknown ``cross_with``.

    Examples
    --------
    >>> import numpy as np
    >>> t = make_tracer("glow", np.ones(4), np.full(4, 2.0), np.zeros(4), cross_with="kappa")
    >>> t.cross_phi.tolist()
    [0.0, 2.0, 0.6666666666666666, 0.3333333333333333]
    """
    if not isinstance(name, str) or not name.strip():
        raise TypeError(f"the tracer name must be a non-empty string, got {name!r}")
    auto = _array(auto, f"tracer {name!r} auto")
    cross = _array(cross, f"tracer {name!r} cross", allow_negative=True)
    noise = _array(noise, f"tracer {name!r} noise")
    if not auto.size == cross.size == noise.size:
        raise ValueError(
            f"tracer {name!r}: auto, cross and noise must have one common length (L = 0 ... L_max), got "
            f"{auto.size}, {cross.size}, {noise.size}"
        )
    if cross_with not in ("phi", "kappa"):
        raise ValueError(f"cross_with must be 'phi' or 'kappa', got {cross_with!r}")
    if cross_with == "kappa":
        ell = np.arange(cross.size, dtype=np.float64)
        cross = np.divide(2.0 * cross, ell * (ell + 1.0), out=np.zeros_like(cross), where=ell > 0)
    return Tracer(name=name.strip(), auto=auto, cross_phi=cross, noise=noise)


@dataclass(frozen=True, eq=False)
class TracerSet:
    """Several tracers with their signal cross-spectra, checked against C^φφ (L from 0 to ``lmax_L``).

    Attributes
    ----------
    tracers : tuple of Tracer
    cross : dict of (int, int) to ndarray
        Signal cross-spectra C_L^{I_i I_j} for i < j.
    phi : ndarray
        C_L^φφ the set was checked against.
    source : str
        Where it came from (a file path or "arrays").
    """

    tracers: tuple
    cross: dict
    phi: np.ndarray
    source: str = "arrays"

    @property
    def lmax_L(self) -> int:
        return self.phi.size - 1

    @property
    def names(self) -> tuple:
        return tuple(tracer.name for tracer in self.tracers)

    def signal_covariance(self) -> np.ndarray:
        """Signal covariance of (φ, I_1, …, I_n) per L, shape (L_max + 1, n + 1, n + 1)."""
        n = len(self.tracers)
        out = np.zeros((self.lmax_L + 1, n + 1, n + 1))
        out[:, 0, 0] = self.phi
        for i, tracer in enumerate(self.tracers, start=1):
            out[:, 0, i] = out[:, i, 0] = tracer.cross_phi
            out[:, i, i] = tracer.auto
        for (i, j), spectrum in self.cross.items():
            out[:, i + 1, j + 1] = out[:, j + 1, i + 1] = spectrum
        return out

    def noise(self) -> np.ndarray:
        """Noise power of each tracer, shape (n, L_max + 1)."""
        return np.array([tracer.noise for tracer in self.tracers])

    def truncated(self, lmax_L: int) -> TracerSet:
        """The same set restricted to L ≤ ``lmax_L`` (≤ its own lmax_L)."""
        lmax_L = as_int(lmax_L, "lmax_L", minimum=2, maximum=self.lmax_L)
        cut = slice(0, lmax_L + 1)
        return TracerSet(
            tracers=tuple(Tracer(t.name, t.auto[cut], t.cross_phi[cut], t.noise[cut]) for t in self.tracers),
            cross={key: value[cut] for key, value in self.cross.items()},
            phi=self.phi[cut],
            source=self.source,
        )


def _check_psd(matrices: np.ndarray, what: str) -> None:
    eigen = np.linalg.eigvalsh(matrices)
    scale = np.maximum(np.max(np.abs(eigen), axis=-1), np.finfo(float).tiny)
    bad = eigen[:, 0] < -PSD_TOLERANCE * scale
    bad[:2] = False  # L = 0, 1 carry no lensing and are ignored
    if np.any(bad):
        where = int(np.argmax(bad))
        raise ValueError(
            f"the covariance of {what} is not positive semidefinite at L = {where} (smallest eigenvalue "
            f"{eigen[where, 0]:.3g} against a largest {scale[where]:.3g}): a cross-spectrum exceeds what the "
            "auto-spectra allow, |C^XY|^2 <= C^XX C^YY and its multi-tracer generalization"
        )


def tracer_set(tracers, cross_spectra=None, phi_spectrum=None, lmax_L=None, source="arrays") -> TracerSet:
    """Check tracers and their cross-spectra and put them together.

    Parameters
    ----------
    tracers : Tracer or sequence of Tracer
    cross_spectra : mapping of (str, str) to array_like, optional
        Signal cross-spectra between tracers, keyed by the two names (either order). Required for every
        pair when there are several tracers: the combination uses the full covariance.
    phi_spectrum : array_like, optional
        C_L^φφ; default the fiducial spectrum.
    lmax_L : int, optional
        Highest L kept (default: the tracers' common L_max, at most the reach of ``phi_spectrum``).
    source : str
        Recorded origin.

    Returns
    -------
    TracerSet

    Raises
    ------
    TypeError, ValueError
        For repeated names, a missing or unknown pair, arrays too short, or a signal covariance of
        (φ, tracers) that is not positive semidefinite at some L ≥ 2.
    """
    if isinstance(tracers, Tracer):
        tracers = (tracers,)
    tracers = tuple(tracers)
    if not tracers or not all(isinstance(item, Tracer) for item in tracers):
        raise TypeError("tracers must be one or more lensrec.tracers.Tracer (see make_tracer)")
    names = [item.name for item in tracers]
    if len(set(names)) != len(names):
        raise ValueError(f"tracer names must be distinct, got {names}")
    if phi_spectrum is None:
        from .spectra import fiducial_spectra

        phi_spectrum = fiducial_spectra().phi
    phi = _array(phi_spectrum, "phi_spectrum")
    reach = min(min(item.auto.size for item in tracers) - 1, phi.size - 1)
    lmax_L = reach if lmax_L is None else as_int(lmax_L, "lmax_L", minimum=2, maximum=reach)
    cut = slice(0, lmax_L + 1)
    tracers = tuple(
        Tracer(item.name, item.auto[cut].copy(), item.cross_phi[cut].copy(), item.noise[cut].copy()) for item in tracers
    )
    given = dict(cross_spectra or {})
    cross = {}
    for i in range(len(tracers)):
        for j in range(i + 1, len(tracers)):
            key = next((k for k in ((names[i], names[j]), (names[j], names[i])) if k in given), None)
            if key is None:
                raise ValueError(
                    f"the cross-spectrum of tracers {names[i]!r} and {names[j]!r} is missing: several tracers "
                    "are combined with their full covariance"
                )
            spectrum = _array(given.pop(key), f"cross-spectrum {key}", allow_negative=True)
            if spectrum.size < lmax_L + 1:
                raise ValueError(f"cross-spectrum {key} reaches L = {spectrum.size - 1}, below lmax_L = {lmax_L}")
            cross[(i, j)] = spectrum[cut].copy()
    if given:
        raise ValueError(f"cross-spectra given for unknown tracer pairs {sorted(given)}; tracers are {names}")
    result = TracerSet(tracers=tracers, cross=cross, phi=phi[cut].copy(), source=str(source))
    _check_psd(result.signal_covariance(), "phi and the tracers (signal)")
    return result


def _read_columns(path: str, name: str) -> np.ndarray:
    try:
        table = np.loadtxt(path, ndmin=2)
    except (OSError, ValueError) as exc:
        raise ValueError(f"cannot read the spectra {path!r} of tracer {name!r}: {exc}") from None
    return table


def load_tracers(name_or_path, phi_spectrum=None, lmax_L=None) -> TracerSet:
    """Read tracers from a TOML file (or a shipped name, see :func:`available_tracers`).

    The file holds one ``[[tracer]]`` table per tracer::

        [[tracer]]
        name = "diffuse_glow"
        cross_with = "phi"             # or "kappa"
        spectra = "diffuse_glow.txt"   # columns L, auto, cross, noise (L = 0, 1, 2, …), relative to the file
        # or inline arrays instead of a file: auto = [...], cross = [...], noise = [...]

    and, with several tracers, one ``[[tracer_cross]]`` per pair: ``tracers = ["a", "b"]`` and either
    ``spectrum = [...]`` or ``spectra = "file.txt"`` (columns L, cross).

    Raises
    ------
    ValueError
        For unreadable files, unknown keys, columns not starting at L = 0 in steps of 1, and every check of
        :func:`make_tracer` and :func:`tracer_set`.
    """
    if not isinstance(name_or_path, (str, os.PathLike)):
        raise TypeError(f"tracer must be a TOML path or a shipped name, got {type(name_or_path).__name__}")
    path = os.fspath(name_or_path)
    if not os.path.isfile(path):
        shipped = os.path.join(_data_dir(), f"{path}.toml")
        if not os.path.isfile(shipped):
            raise ValueError(f"tracer file {path!r} not found; shipped tracers: {available_tracers()}")
        path = shipped
    try:
        with open(path, "rb") as handle:
            document = tomllib.load(handle)
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ValueError(f"{path!r} is not valid TOML: {exc}") from None
    unknown = set(document) - {"tracer", "tracer_cross"}
    if unknown:
        raise ValueError(f"{path!r}: unknown sections {sorted(unknown)}; allowed: [[tracer]], [[tracer_cross]]")
    entries = document.get("tracer")
    if not isinstance(entries, list) or not entries:
        raise ValueError(f"{path!r} holds no [[tracer]] table")
    folder = os.path.dirname(os.path.abspath(path))
    tracers = []
    for entry in entries:
        allowed = {"name", "cross_with", "spectra", "auto", "cross", "noise", "description"}
        if set(entry) - allowed:
            raise ValueError(f"{path!r}: unknown tracer keys {sorted(set(entry) - allowed)}; allowed {sorted(allowed)}")
        name = entry.get("name")
        if "spectra" in entry:
            if {"auto", "cross", "noise"} & set(entry):
                raise ValueError(f"{path!r}: tracer {name!r} gives both a spectra file and inline arrays")
            table = _read_columns(os.path.join(folder, entry["spectra"]), name)
            if table.shape[1] != 4:
                raise ValueError(f"spectra of tracer {name!r} need 4 columns (L, auto, cross, noise)")
            if not np.array_equal(table[:, 0], np.arange(table.shape[0])):
                raise ValueError(f"spectra of tracer {name!r}: the first column must be L = 0, 1, 2, ...")
            auto, cross, noise = table[:, 1], table[:, 2], table[:, 3]
        else:
            missing = {"auto", "cross", "noise"} - set(entry)
            if missing:
                raise ValueError(f"{path!r}: tracer {name!r} needs a spectra file or arrays {sorted(missing)}")
            auto, cross, noise = entry["auto"], entry["cross"], entry["noise"]
        tracers.append(make_tracer(name, auto, cross, noise, cross_with=entry.get("cross_with", "phi")))
    pairs = {}
    for entry in document.get("tracer_cross", []):
        pair = entry.get("tracers")
        if not (isinstance(pair, list) and len(pair) == 2):
            raise ValueError(f"{path!r}: [[tracer_cross]] needs tracers = [name, name], got {pair!r}")
        if "spectra" in entry:
            table = _read_columns(os.path.join(folder, entry["spectra"]), f"{pair[0]} x {pair[1]}")
            if table.shape[1] != 2 or not np.array_equal(table[:, 0], np.arange(table.shape[0])):
                raise ValueError(f"cross-spectrum file of {pair} needs 2 columns L = 0, 1, ... and the cross")
            pairs[tuple(pair)] = table[:, 1]
        elif "spectrum" in entry:
            pairs[tuple(pair)] = entry["spectrum"]
        else:
            raise ValueError(f"{path!r}: [[tracer_cross]] {pair} needs 'spectrum' or 'spectra'")
    return tracer_set(tracers, pairs, phi_spectrum=phi_spectrum, lmax_L=lmax_L, source=os.path.abspath(path))


@dataclass(frozen=True, eq=False)
class TracerCombination:
    """The optimal combination of tracers (and the internal φ̂) to estimate φ, per L from 0.

    Attributes
    ----------
    inputs : tuple of str
        Names of the combined inputs in the order of ``weights`` (``"internal"`` for φ̂).
    weights : ndarray, shape (n_inputs, L_max + 1)
        w_i(L) with φ^comb_LM = Σ_i w_i(L) X_i,LM.
    rho2 : ndarray
        ρ_L² of the combination.
    rho2_single : dict of str to ndarray
        ρ_L² of each input alone.
    phi : ndarray
        C_L^φφ.
    notes : tuple of str
    """

    inputs: tuple
    weights: np.ndarray
    rho2: np.ndarray
    rho2_single: dict
    phi: np.ndarray
    notes: tuple = field(default=(TRACER_NOTE,))

    @property
    def lmax_L(self) -> int:
        return self.rho2.size - 1

    def effective_noise(self) -> np.ndarray:
        """N_eff = C^φφ (1 − ρ²)/ρ²: the noise of a reconstruction with the same ρ² (inf where ρ² = 0, NaN at
        L < 2), for :func:`lensrec.delensing_forecast`."""
        return _effective_noise(self.phi, self.rho2)

    def residual_phi(self) -> np.ndarray:
        """C^φφ (1 − ρ²)."""
        return self.phi * (1.0 - self.rho2)


def _effective_noise(phi, rho2):
    out = np.full(phi.size, np.inf)
    good = rho2 > 0
    out[good] = phi[good] * (1.0 - rho2[good]) / rho2[good]
    out[:2] = np.nan
    return out


def combine_tracers(tracers=None, n0=None, phi_spectrum=None) -> TracerCombination:
    """Optimal (Wiener) combination of external tracers and the internal reconstruction to estimate φ.

    Parameters
    ----------
    tracers : TracerSet, Tracer, sequence of Tracer or str, optional
        External tracers (a str is read by :func:`load_tracers`); may be omitted if ``n0`` is given.
    n0 : array_like, optional
        Noise N0_L of the internal unit-response reconstruction φ̂ (L from 0; NaN at L < 2 and ``inf`` where
        nothing is reconstructed are allowed). Omit to combine the external tracers only.
    phi_spectrum : array_like, optional
        C_L^φφ (default: the tracer set's, or the fiducial one).

    Returns
    -------
    TracerCombination
        Over L = 0 … the common reach of the tracers and ``n0``.

    Raises
    ------
    TypeError, ValueError
        If neither tracers nor ``n0`` is given, ``n0`` is negative or NaN at L ≥ 2, or the total covariance is
        not positive semidefinite.

    References
    ----------
    Sherwin & Schmittfull 2015, PRD 92, 043005; Yu, Hill & Sherwin 2017, PRD 96, 123511.

    Examples
    --------
    >>> import numpy as np
    >>> phi = np.array([0.0, 0.0, 1.0, 1.0])
    >>> t = make_tracer("a", np.ones(4), np.full(4, 0.5), np.zeros(4))
    >>> out = combine_tracers(tracer_set(t, phi_spectrum=phi), n0=np.array([np.nan, np.nan, 1.0, 1.0]))
    >>> out.rho2_single["a"][2], out.rho2_single["internal"][2], round(float(out.rho2[2]), 12)
    (0.25, 0.5, 0.571428571429)
    """
    if tracers is None and n0 is None:
        raise ValueError("combine_tracers needs tracers, an internal n0, or both")
    if tracers is not None and not isinstance(tracers, TracerSet):
        if isinstance(tracers, (str, os.PathLike)):
            tracers = load_tracers(tracers, phi_spectrum=phi_spectrum)
        else:
            tracers = tracer_set(tracers, phi_spectrum=phi_spectrum)
    if tracers is not None:
        phi = tracers.phi
    else:
        if phi_spectrum is None:
            from .spectra import fiducial_spectra

            phi_spectrum = fiducial_spectra().phi
        phi = _array(phi_spectrum, "phi_spectrum")
    internal = None
    if n0 is not None:
        if isinstance(n0, (str, bytes)):
            raise TypeError(f"n0 must be a numeric array, got {type(n0).__name__}")
        internal = np.asarray(n0, dtype=np.float64)
        if internal.ndim != 1:
            raise ValueError(f"n0 must be 1-D, got shape {internal.shape}")
        if np.any(np.isnan(internal[2:])) or np.any(internal[~np.isnan(internal)] < 0):
            raise ValueError("n0 must be non-negative, NaN only at L < 2 (inf where nothing is reconstructed)")
        internal = np.where(np.isnan(internal), np.inf, internal)
    lmax_L = phi.size - 1 if internal is None else min(phi.size, internal.size) - 1
    phi = phi[: lmax_L + 1]
    names, signal, noise = [], [], []
    if tracers is not None:
        covariance = tracers.signal_covariance()[: lmax_L + 1]
        names.extend(tracers.names)
        signal = covariance
        noise.extend(tracers.noise()[:, : lmax_L + 1])
    else:
        signal = phi[:, None, None] * np.ones((1, 1, 1))
    if internal is not None:
        # φ̂ = φ + n: its signal is φ itself, so its cross with everything is that of φ
        size = signal.shape[1]
        grown = np.zeros((lmax_L + 1, size + 1, size + 1))
        grown[:, :size, :size] = signal
        grown[:, size, :size] = grown[:, :size, size] = signal[:, 0, :]
        grown[:, size, size] = phi
        signal = grown
        names.append("internal")
        noise.append(internal[: lmax_L + 1])
    n = len(names)
    total = signal[:, 1:, 1:].copy()
    noise = np.array(noise)
    finite = np.isfinite(noise)  # an input with infinite noise at L gets weight 0 there
    total[:, np.arange(n), np.arange(n)] += np.where(finite, noise, 0.0).T
    cross = signal[:, 0, 1:] * finite.T
    weights = np.zeros((n, lmax_L + 1))
    rho2 = np.zeros(lmax_L + 1)
    for L in range(2, lmax_L + 1):
        if phi[L] <= 0:
            continue
        use = finite[:, L]
        if not np.any(use):
            continue
        block = total[L][np.ix_(use, use)]
        solution = np.linalg.lstsq(block, cross[L, use], rcond=1e-12)[0]
        weights[use, L] = solution
        rho2[L] = float(cross[L, use] @ solution) / phi[L]
    single = {}
    for i, name in enumerate(names):
        with np.errstate(divide="ignore", invalid="ignore"):
            value = np.where(finite[i] & (total[:, i, i] > 0), cross[:, i] ** 2 / (total[:, i, i] * phi), 0.0)
        value[:2] = 0.0
        single[name] = np.nan_to_num(value)
    if np.any(rho2 > 1 + 1e-9):
        where = int(np.argmax(rho2))
        raise ValueError(
            f"the combined correlation exceeds 1 at L = {where} (rho^2 = {rho2[where]:.4g}): the covariance is "
            "not positive semidefinite"
        )
    return TracerCombination(
        inputs=tuple(names), weights=weights, rho2=np.clip(rho2, 0.0, 1.0), rho2_single=single, phi=phi.copy()
    )


def simulate_tracers(tracers: TracerSet, phi_alm, seed: int, index: int = 0, nthreads: int | None = 1) -> np.ndarray:
    """Gaussian tracer coefficients correlated with a simulated φ, with their noise.

    Parameters
    ----------
    tracers : TracerSet
    phi_alm : complex array
        The simulated lensing potential φ_LM (healpy layout), reaching at least the set's lmax_L.
    seed, index : int
        The run's seed and the simulation index; draws come from ``rng_for(seed, index, "tracer")``.
    nthreads : int, optional

    Returns
    -------
    ndarray, complex, shape (n_tracers, nalm(lmax_L))
        I_LM = (c_L/C_L^φφ) φ_LM + u_LM + n_LM (module docstring): observed tracers, noise included.

    Raises
    ------
    TypeError, ValueError
        For a bad set, φ coefficients that stop below lmax_L, or a bad seed or index.
    """
    from .seeding import rng_for
    from .sky import _unit_normal_alm

    if not isinstance(tracers, TracerSet):
        raise TypeError(f"tracers must be a TracerSet (see tracer_set, load_tracers), got {type(tracers).__name__}")
    phi_alm = np.asarray(phi_alm)
    if phi_alm.ndim != 1 or not np.iscomplexobj(phi_alm):
        raise TypeError("phi_alm must be one set of complex harmonic coefficients (healpy layout)")
    lmax_phi = lmax_from_nalm(phi_alm.size, "phi_alm")
    lmax_L = tracers.lmax_L
    if lmax_phi < lmax_L:
        raise ValueError(f"phi_alm reaches L = {lmax_phi}, below the tracers' lmax_L = {lmax_L}")
    if lmax_phi > lmax_L:
        from .harmonics import truncate_alm

        phi_alm = truncate_alm(phi_alm, lmax_L, lmax_phi)
    n = len(tracers.tracers)
    covariance = tracers.signal_covariance()
    phi = tracers.phi
    safe = np.where(phi > 0, phi, 1.0)
    response = np.where(phi[:, None] > 0, covariance[:, 0, 1:] / safe[:, None], 0.0)  # (L, n)
    conditional = covariance[:, 1:, 1:] - response[:, :, None] * covariance[:, 0, None, 1:]
    conditional += np.einsum("ij,lj->lij", np.eye(n), tracers.noise().T)
    values, vectors = np.linalg.eigh(conditional)
    roots = vectors * np.sqrt(np.clip(values, 0.0, None))[:, None, :]  # roots @ roots.T = conditional
    rng = rng_for(seed, index, "tracer")
    normals = _unit_normal_alm(rng, n, lmax_L, nthreads=1 if nthreads is None else nthreads)
    ell = ell_of_alm(lmax_L)
    out = response[ell].T * phi_alm[None, :] + np.einsum("kij,jk->ik", roots[ell], normals)
    out[:, ell < 2] = 0.0
    return out


def combined_phi(combination: TracerCombination, tracer_alm=None, phi_hat_alm=None) -> np.ndarray:
    """The map-level combined (Wiener-filtered) φ: Σ_i w_i(L) X_i,LM, ready for a lensing B template.

    Parameters
    ----------
    combination : TracerCombination
    tracer_alm : complex array, shape (n_tracers, nalm(≥ lmax_L)), optional
        Observed tracer coefficients in the order of ``combination.inputs`` (external ones).
    phi_hat_alm : complex array, optional
        The internal unit-response reconstruction, required if the combination includes ``"internal"``.

    Returns
    -------
    ndarray, complex, shape (nalm(lmax_L),)
    """
    from .harmonics import scale_alm, truncate_alm

    if not isinstance(combination, TracerCombination):
        raise TypeError(f"combination must be a TracerCombination, got {type(combination).__name__}")
    lmax_L = combination.lmax_L
    external = [name for name in combination.inputs if name != "internal"]
    fields = []
    if external:
        if tracer_alm is None:
            raise ValueError(f"tracer_alm is required for the tracers {external}")
        tracer_alm = np.atleast_2d(np.asarray(tracer_alm))
        if tracer_alm.shape[0] != len(external):
            raise ValueError(f"tracer_alm has {tracer_alm.shape[0]} rows, the combination {len(external)} tracers")
        fields.extend(tracer_alm)
    if "internal" in combination.inputs:
        if phi_hat_alm is None:
            raise ValueError("phi_hat_alm is required: the combination includes the internal reconstruction")
        fields.append(np.asarray(phi_hat_alm))
    elif phi_hat_alm is not None:
        raise ValueError("phi_hat_alm was given but the combination has no internal reconstruction (pass n0)")
    out = np.zeros(nalm(lmax_L), dtype=np.complex128)
    for weight, values in zip(combination.weights, fields):
        lmax_in = lmax_from_nalm(values.size, "tracer or phi coefficients")
        if lmax_in < lmax_L:
            raise ValueError(f"coefficients reach L = {lmax_in}, below the combination's lmax_L = {lmax_L}")
        values = truncate_alm(values, lmax_L, lmax_in) if lmax_in > lmax_L else values
        out += scale_alm(values, weight, lmax_L)
    return out


def tracer_delensing_forecasts(experiment, tracers=None, n0=None, spectra=None, lmax=None, r=0.0, nthreads=None):
    """Delensing forecasts with each input alone and with their optimal combination.

    Parameters
    ----------
    experiment : Experiment or str
    tracers : TracerSet, str or None
        External tracers (a str is read by :func:`load_tracers`).
    n0 : array_like, optional
        N0 of the internal reconstruction (e.g. the MV or TT+TE+EE gradient N0).
    spectra : Spectra, optional
    lmax : int, optional
        As for :func:`lensrec.delensing_forecast`.
    r : float
    nthreads : int, optional

    Returns
    -------
    (TracerCombination, dict of str to DelensingForecast)
        The combination and one forecast per input name (``"internal"`` for φ̂) and ``"combined"``: each is
        :func:`lensrec.delensing_forecast` with the effective noise C^φφ(1 − ρ²)/ρ² of that input.
    """
    from .tensor_forecast import delensing_forecast

    phi = None if spectra is None else spectra.phi
    combination = combine_tracers(tracers, n0=n0, phi_spectrum=phi)
    out = {}
    for name, rho2 in (*combination.rho2_single.items(), ("combined", combination.rho2)):
        out[name] = delensing_forecast(
            experiment,
            spectra,
            n0=_effective_noise(combination.phi, rho2),
            lmax=lmax,
            r=r,
            nthreads=nthreads,
        )
    return combination, out
