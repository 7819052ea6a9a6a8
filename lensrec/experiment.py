"""The experiment model: white (optionally 1/f) noise, a Gaussian beam and multipole cuts.

Noise follows the Knox (1995) form used throughout the trade (common practice): the beam-deconvolved
noise power is N_ℓ = (Δ · π/10800)² · exp(ℓ(ℓ+1) σ²), σ = FWHM/√(8 ln 2), times 1 + (ℓ/ℓ_knee)^α when a
knee is set. Multipoles outside [ell_min, ell_max] of a field carry infinite noise.
"""

from __future__ import annotations

import dataclasses
import difflib
import json
import math
import os
import tomllib
from dataclasses import dataclass

import numpy as np

from ._checks import as_float, as_int

__all__ = ["Experiment", "available_experiments", "load_experiment"]

ARCMIN = math.pi / 10800.0
EXPERIMENTS_DIR = os.path.join(os.path.dirname(__file__), "data", "experiments")
# exp(ℓ(ℓ+1)σ²) above e^700 overflows float64; refuse beams that reach it inside the used ℓ range.
_MAX_BEAM_EXPONENT = 700.0
_FIELDS = {"T": "temperature", "E": "polarization", "B": "polarization"}


def _field(field: str) -> str:
    if not isinstance(field, str):
        raise TypeError(f"field must be one of 'T', 'E', 'B', got {field!r}")
    key = field.upper()
    if len(key) == 2 and key[0] == key[1]:
        key = key[0]
    if key not in _FIELDS:
        raise ValueError(f"field must be one of 'T', 'E', 'B' (or 'TT', 'EE', 'BB'), got {field!r}")
    return key


@dataclass(frozen=True)
class Experiment:
    """A CMB survey's noise, beam and multipole cuts, validated on construction.

    Parameters
    ----------
    name : str
        A label for outputs and plots.
    noise_temperature : float
        White-noise level Δ_T in µK-arcmin (≥ 0).
    noise_polarization : float or None
        Δ_P in µK-arcmin; ``None`` means √2 × ``noise_temperature``.
    beam_fwhm : float
        Gaussian beam full width at half maximum in arcmin; 0 means no beam.
    ell_min : int
        Lowest CMB multipole used by filters and estimators (≥ 2).
    ell_max_temperature, ell_max_polarization : int
        Highest multipole used for T and for E/B.
    ell_knee_temperature, alpha_knee_temperature, ell_knee_polarization, alpha_knee_polarization : float
        Optional 1/f term 1 + (ℓ/ℓ_knee)^α; ℓ_knee = 0 switches it off, α must be negative when on.
    sky_fraction : float
        Observed fraction of the sky in (0, 1], used by forecasts.

    Examples
    --------
    >>> from lensrec import Experiment
    >>> e = Experiment(name="demo", noise_temperature=1.0, beam_fwhm=1.0)
    >>> round(e.noise_polarization, 6)
    1.414214
    >>> e.noise_spectrum("E", 3000).shape
    (3001,)
    """

    name: str = "custom"
    noise_temperature: float = 1.0
    noise_polarization: float | None = None
    beam_fwhm: float = 1.0
    ell_min: int = 2
    ell_max_temperature: int = 3000
    ell_max_polarization: int = 3000
    ell_knee_temperature: float = 0.0
    alpha_knee_temperature: float = 0.0
    ell_knee_polarization: float = 0.0
    alpha_knee_polarization: float = 0.0
    sky_fraction: float = 1.0

    def __post_init__(self):
        if not isinstance(self.name, str) or not self.name.strip():
            raise TypeError(f"name must be a non-empty string, got {self.name!r}")
        set_ = object.__setattr__
        set_(self, "noise_temperature", as_float(self.noise_temperature, "noise_temperature", 0.0, 1e5))
        if self.noise_polarization is None:
            set_(self, "noise_polarization", math.sqrt(2.0) * self.noise_temperature)
        else:
            set_(self, "noise_polarization", as_float(self.noise_polarization, "noise_polarization", 0.0, 1e5))
        set_(self, "beam_fwhm", as_float(self.beam_fwhm, "beam_fwhm", 0.0, 600.0))
        set_(self, "ell_min", as_int(self.ell_min, "ell_min", 2, 20000))
        for key in ("ell_max_temperature", "ell_max_polarization"):
            value = as_int(getattr(self, key), key, 2, 20000)
            if value <= self.ell_min:
                raise ValueError(f"{key}={value} must be greater than ell_min={self.ell_min} (inverted multipole cuts)")
            set_(self, key, value)
        for which in ("temperature", "polarization"):
            knee = as_float(getattr(self, f"ell_knee_{which}"), f"ell_knee_{which}", 0.0, 20000.0)
            alpha = as_float(getattr(self, f"alpha_knee_{which}"), f"alpha_knee_{which}", -10.0, 0.0)
            if knee > 0 and alpha >= 0:
                raise ValueError(f"alpha_knee_{which} must be negative when ell_knee_{which} > 0, got {alpha}")
            set_(self, f"ell_knee_{which}", knee)
            set_(self, f"alpha_knee_{which}", alpha)
        set_(self, "sky_fraction", as_float(self.sky_fraction, "sky_fraction", 0.0, 1.0, strict_minimum=True))
        sigma2 = self.beam_sigma**2
        for key in ("ell_max_temperature", "ell_max_polarization"):
            ell = getattr(self, key)
            if ell * (ell + 1) * sigma2 > _MAX_BEAM_EXPONENT:
                largest = int((-1 + math.sqrt(1 + 4 * _MAX_BEAM_EXPONENT / sigma2)) / 2)
                raise ValueError(
                    f"beam_fwhm={self.beam_fwhm} arcmin cannot be deconvolved up to {key}={ell}: "
                    f"exp(l(l+1)sigma^2) overflows; lower {key} to at most {largest} or use a smaller beam"
                )

    # ----------------------------------------------------------------------------------------- beams
    @property
    def beam_sigma(self) -> float:
        """Gaussian beam width σ in radians."""
        return self.beam_fwhm * ARCMIN / math.sqrt(8.0 * math.log(2.0))

    def beam(self, lmax: int) -> np.ndarray:
        """Beam transfer function b_ℓ = exp(−ℓ(ℓ+1)σ²/2) for ℓ = 0 … lmax."""
        lmax = as_int(lmax, "lmax", 0, 20000)
        ell = np.arange(lmax + 1, dtype=float)
        return np.exp(-0.5 * ell * (ell + 1) * self.beam_sigma**2)

    def ell_max(self, field: str) -> int:
        """Highest multipole used for ``field`` ('T', 'E' or 'B')."""
        return self.ell_max_temperature if _field(field) == "T" else self.ell_max_polarization

    # ----------------------------------------------------------------------------------------- noise
    def noise_level(self, field: str) -> float:
        """White-noise level in µK-arcmin for ``field``."""
        return self.noise_temperature if _field(field) == "T" else self.noise_polarization

    def noise_spectrum(self, field: str, lmax: int, deconvolved: bool = True, cut: bool = True) -> np.ndarray:
        """Noise power N_ℓ (µK²) of ``field`` for ℓ = 0 … lmax.

        Parameters
        ----------
        field : {'T', 'E', 'B'}
        lmax : int
        deconvolved : bool
            Divide by b_ℓ² (the noise of the beam-deconvolved map). If False, the noise as it is in the map.
        cut : bool
            Set ℓ outside [ell_min, ell_max(field)] to ``inf`` (not used by any filter or estimator).
        """
        key = _field(field)
        lmax = as_int(lmax, "lmax", 0, 20000)
        ell = np.arange(lmax + 1, dtype=float)
        which = _FIELDS[key]
        noise = np.full(lmax + 1, (self.noise_level(key) * ARCMIN) ** 2)
        knee = getattr(self, f"ell_knee_{which}")
        if knee > 0:
            alpha = getattr(self, f"alpha_knee_{which}")
            with np.errstate(divide="ignore"):
                noise[1:] *= 1.0 + (ell[1:] / knee) ** alpha
            noise[0] = np.inf if noise[0] > 0 else noise[0]
        if deconvolved:
            if cut:
                used = min(lmax, self.ell_max(key))
                noise[: used + 1] *= np.exp(ell[: used + 1] * (ell[: used + 1] + 1) * self.beam_sigma**2)
            else:
                with np.errstate(over="ignore"):
                    noise *= np.exp(ell * (ell + 1) * self.beam_sigma**2)
        if cut:
            noise[: self.ell_min] = np.inf
            noise[self.ell_max(key) + 1 :] = np.inf
        return noise

    def total_spectra(self, spectra, lmax: int, lensed: bool = True) -> dict[str, np.ndarray]:
        """Signal plus beam-deconvolved noise for 'TT', 'EE', 'BB', 'TE' (ℓ = 0 … lmax).

        Auto-spectra are ``inf`` outside each field's cuts and TE is 0 where either field is cut.
        """
        lmax = as_int(lmax, "lmax", 2, spectra.lmax)
        signal = spectra.cmb(lensed=lensed)
        total = {}
        for key in ("TT", "EE", "BB"):
            total[key] = signal[key][: lmax + 1] + self.noise_spectrum(key[0], lmax)
        te = np.array(signal["TE"][: lmax + 1])
        te[~(np.isfinite(total["TT"]) & np.isfinite(total["EE"]))] = 0.0
        total["TE"] = te
        return total

    def replace(self, **changes) -> Experiment:
        """A validated copy with some fields changed (``noise_polarization=None`` re-derives √2 Δ_T)."""
        unknown = [key for key in changes if key not in _field_names()]
        if unknown:
            raise ValueError(_unknown_key_message(unknown[0], "Experiment field"))
        return dataclasses.replace(self, **changes)

    # ------------------------------------------------------------------------------------------ TOML
    def to_dict(self) -> dict:
        """The fields as a plain dict (the TOML keys)."""
        return {name: getattr(self, name) for name in _field_names()}

    @classmethod
    def from_dict(cls, values: dict, source: str = "experiment") -> Experiment:
        """Build from a mapping of field names, refusing unknown keys with a suggestion."""
        if not isinstance(values, dict):
            raise TypeError(f"{source} must be a table of experiment keys, got {type(values).__name__}")
        for key in values:
            if key not in _field_names():
                raise ValueError(f"{source}: " + _unknown_key_message(key, "key"))
        return cls(**values)

    @classmethod
    def from_toml(cls, path) -> Experiment:
        """Read an ``[experiment]`` table from a TOML file."""
        path = os.fspath(path)
        if not os.path.isfile(path):
            raise ValueError(
                f"experiment file {path!r} does not exist (or name a shipped one: {available_experiments()})"
            )
        try:
            with open(path, "rb") as handle:
                document = tomllib.load(handle)
        except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
            raise ValueError(f"experiment file {path!r} is not valid TOML: {exc}") from None
        extra = [key for key in document if key != "experiment"]
        if "experiment" not in document or extra:
            raise ValueError(
                f"experiment file {path!r} must hold exactly one [experiment] table; found tables/keys {list(document)}"
            )
        return cls.from_dict(document["experiment"], source=f"{path} [experiment]")

    def to_toml(self, path, force: bool = False) -> None:
        """Write the ``[experiment]`` table atomically; refuses to overwrite unless ``force``."""
        from .io import atomic_write_text

        lines = ["[experiment]"]
        for key, value in self.to_dict().items():
            if isinstance(value, str):
                lines.append(f"{key} = {json.dumps(value)}")
            elif isinstance(value, int):
                lines.append(f"{key} = {value}")
            else:
                lines.append(f"{key} = {repr(float(value))}")
        atomic_write_text(path, "\n".join(lines) + "\n", force=force)


def _field_names() -> tuple[str, ...]:
    return tuple(f.name for f in dataclasses.fields(Experiment))


def _unknown_key_message(key, what: str) -> str:
    suggestion = difflib.get_close_matches(str(key), _field_names(), n=1, cutoff=0.5)
    hint = f"; did you mean {suggestion[0]!r}?" if suggestion else "."
    return f"unknown {what} {key!r}{hint} Allowed keys: {', '.join(_field_names())}"


def available_experiments() -> list[str]:
    """Names of the invented example experiments shipped with lensrec."""
    if not os.path.isdir(EXPERIMENTS_DIR):
        return []
    return sorted(name[:-5] for name in os.listdir(EXPERIMENTS_DIR) if name.endswith(".toml"))


def as_experiment(experiment) -> Experiment:
    """An :class:`Experiment` as given, or loaded from a shipped name or TOML path; anything else is refused."""
    if isinstance(experiment, (str, bytes)) or hasattr(experiment, "__fspath__"):
        experiment = load_experiment(experiment)
    if not isinstance(experiment, Experiment):
        raise TypeError(f"experiment must be an Experiment or the name/path of one, got {type(experiment).__name__}")
    return experiment


def load_experiment(name_or_path) -> Experiment:
    """Load a shipped example experiment by name, or any experiment TOML file by path."""
    if isinstance(name_or_path, Experiment):
        return name_or_path
    text = os.fspath(name_or_path)
    if os.path.isfile(text):
        return Experiment.from_toml(text)
    if text in available_experiments():
        return Experiment.from_toml(os.path.join(EXPERIMENTS_DIR, text + ".toml"))
    suggestion = difflib.get_close_matches(text, available_experiments(), n=1)
    hint = f"; did you mean {suggestion[0]!r}?" if suggestion else "."
    raise ValueError(
        f"no experiment file or shipped experiment named {text!r}{hint} Shipped: {available_experiments()}"
    )
