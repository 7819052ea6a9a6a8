"""Theory power spectra: the embedded fiducial cosmology and, when camb is present, any other.

All spectra are raw C_ℓ in µK² indexed by ℓ from 0 (C_L^φφ is dimensionless); entries at ℓ = 0, 1 are 0.
"""

from __future__ import annotations

import gzip
import json
import os
from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType

import numpy as np

from ._checks import as_finite_array, as_float, as_int

__all__ = ["Spectra", "fiducial_spectra", "spectra_from_camb", "load_spectra_file"]

CMB_KEYS = ("TT", "EE", "BB", "TE")
TENSOR_KEYS = ("TT", "EE", "BB")
_DATA_DIR = os.path.join(os.path.dirname(__file__), "data")
FIDUCIAL_FILE = os.path.join(_DATA_DIR, "fiducial_spectra.txt.gz")


def _frozen(array: np.ndarray) -> np.ndarray:
    array = np.array(array, dtype=np.float64, copy=True)
    array.setflags(write=False)
    return array


@dataclass(frozen=True, eq=False)
class Spectra:
    """A set of theory spectra sharing one ℓ range.

    Parameters
    ----------
    unlensed, lensed : mapping of str to array
        CMB spectra ``"TT"``, ``"EE"``, ``"BB"``, ``"TE"`` in µK², raw C_ℓ, ℓ = 0 … lmax.
    phi : array
        Lensing-potential spectrum C_L^φφ (dimensionless), L = 0 … lmax.
    tensor : mapping of str to array
        Tensor ``"TT"``, ``"EE"``, ``"BB"`` spectra for r = 1 (µK²).
    metadata : mapping
        Where the spectra came from (generator, camb version, parameters).

    Examples
    --------
    >>> import lensrec
    >>> s = lensrec.fiducial_spectra()
    >>> s.lmax
    6000
    >>> float(s.lensed["BB"][2]) > 0.0
    True
    """

    unlensed: Mapping[str, np.ndarray]
    lensed: Mapping[str, np.ndarray]
    phi: np.ndarray
    tensor: Mapping[str, np.ndarray]
    metadata: Mapping = field(default_factory=dict)

    def __post_init__(self):
        lengths = set()
        for label, group, keys in (
            ("unlensed", self.unlensed, CMB_KEYS),
            ("lensed", self.lensed, CMB_KEYS),
            ("tensor", self.tensor, TENSOR_KEYS),
        ):
            if not isinstance(group, Mapping):
                raise TypeError(f"{label} must be a mapping of spectrum name to array, got {type(group).__name__}")
            missing = [k for k in keys if k not in group]
            extra = [k for k in group if k not in keys]
            if missing or extra:
                raise ValueError(
                    f"{label} spectra must have exactly the keys {keys}; missing {missing}, unexpected {extra}"
                )
            checked = {}
            for key in keys:
                array = as_finite_array(group[key], f"{label}[{key!r}]", ndim=1)
                if key != "TE" and np.any(array < 0):
                    raise ValueError(
                        f"{label}[{key!r}] must be non-negative (an auto-spectrum); found {array.min():.3g}"
                    )
                lengths.add(array.size)
                checked[key] = _frozen(array)
            object.__setattr__(self, label, MappingProxyType(checked))
        phi = as_finite_array(self.phi, "phi", ndim=1)
        if np.any(phi < 0):
            raise ValueError(f"phi (C_L^phiphi) must be non-negative; found {phi.min():.3g}")
        lengths.add(phi.size)
        if len(lengths) != 1:
            raise ValueError(f"all spectra must share one length (lmax + 1); got lengths {sorted(lengths)}")
        if phi.size < 3:
            raise ValueError(f"spectra must extend to at least l = 2, got lmax = {phi.size - 1}")
        object.__setattr__(self, "phi", _frozen(phi))
        object.__setattr__(self, "metadata", MappingProxyType(dict(self.metadata)))

    @property
    def lmax(self) -> int:
        """Highest multipole held."""
        return self.phi.size - 1

    def cmb(self, lensed: bool = True, r: float = 0.0) -> dict[str, np.ndarray]:
        """Return the CMB spectra (lensed or unlensed scalar) plus ``r`` times the tensor spectra."""
        r = as_float(r, "r", minimum=0.0)
        base = self.lensed if lensed else self.unlensed
        out = {key: np.array(base[key]) for key in CMB_KEYS}
        if r:
            for key in TENSOR_KEYS:
                out[key] = out[key] + r * self.tensor[key]
        return out

    def truncated(self, lmax: int) -> Spectra:
        """A copy restricted to ℓ ≤ ``lmax``."""
        lmax = as_int(lmax, "lmax", minimum=2, maximum=self.lmax)
        cut = slice(0, lmax + 1)
        return Spectra(
            unlensed={k: v[cut] for k, v in self.unlensed.items()},
            lensed={k: v[cut] for k, v in self.lensed.items()},
            phi=self.phi[cut],
            tensor={k: v[cut] for k, v in self.tensor.items()},
            metadata=dict(self.metadata),
        )

    def with_phi(self, phi) -> Spectra:
        """A copy with another C_L^φφ (the lensed columns are left as they are)."""
        return Spectra(
            unlensed=self.unlensed, lensed=self.lensed, phi=phi, tensor=self.tensor, metadata=dict(self.metadata)
        )


def load_spectra_file(path: str) -> Spectra:
    """Load a spectra table in the lensrec text format (plain or gzip-compressed).

    The header holds a ``# parameters: {json}`` line with a ``columns`` list; the body is one row per ℓ.
    """
    path = os.fspath(path)
    if not os.path.isfile(path):
        raise ValueError(f"spectra file {path!r} does not exist")
    opener = gzip.open if path.endswith(".gz") else open
    metadata = None
    try:
        with opener(path, "rt") as handle:
            for line in handle:
                if not line.startswith("#"):
                    break
                if line.startswith("# parameters:"):
                    metadata = json.loads(line[len("# parameters:") :])
        table = np.loadtxt(path, comments="#", ndmin=2)
    except (OSError, EOFError, ValueError, json.JSONDecodeError) as exc:
        raise ValueError(f"spectra file {path!r} is unreadable or corrupted: {exc}") from None
    if metadata is None or "columns" not in metadata:
        raise ValueError(f"spectra file {path!r} has no '# parameters:' header line with a 'columns' list")
    columns = list(metadata["columns"])
    if table.shape[1] != len(columns):
        raise ValueError(f"spectra file {path!r} has {table.shape[1]} columns but its header names {len(columns)}")
    data = dict(zip(columns, table.T))
    ell = data.get("ell")
    if ell is None or not np.array_equal(ell, np.arange(ell.size)):
        raise ValueError(f"spectra file {path!r} must have an 'ell' column running 0, 1, 2, ... without gaps")
    try:
        return _from_columns(data, metadata)
    except KeyError as exc:
        raise ValueError(f"spectra file {path!r} lacks the column {exc.args[0]!r}") from None


def _from_columns(data: dict, metadata: dict) -> Spectra:
    """A :class:`Spectra` from the named columns of the lensrec table layout."""
    return Spectra(
        unlensed={k: data[f"unlensed_{k}"] for k in CMB_KEYS},
        lensed={k: data[f"lensed_{k}"] for k in CMB_KEYS},
        phi=data["phi_phi"],
        tensor={k: data[f"tensor_{k}"] for k in TENSOR_KEYS},
        metadata=metadata,
    )


_FIDUCIAL_CACHE: dict[str, Spectra] = {}


def as_spectra(spectra=None) -> Spectra:
    """``spectra`` if it is a :class:`Spectra`, the fiducial spectra if None; anything else is refused."""
    spectra = fiducial_spectra() if spectra is None else spectra
    if not isinstance(spectra, Spectra):
        raise TypeError(f"spectra must be a lensrec Spectra object, got {type(spectra).__name__}")
    return spectra


def fiducial_spectra() -> Spectra:
    """The embedded default cosmology (flat ΛCDM, camb, ℓ ≤ 6000); needs no camb.

    The file ``lensrec/data/fiducial_spectra.txt.gz`` was made by ``make_fiducial_spectra.py`` beside it;
    ``Spectra.metadata`` holds the camb version and parameters.
    """
    if "default" not in _FIDUCIAL_CACHE:
        _FIDUCIAL_CACHE["default"] = load_spectra_file(FIDUCIAL_FILE)
    return _FIDUCIAL_CACHE["default"]


def spectra_from_camb(lmax: int = 6000, **parameters) -> Spectra:
    """Compute a :class:`Spectra` with camb for any cosmology (camb must be installed).

    Parameters
    ----------
    lmax : int
        Highest multipole (≥ 100).
    **parameters
        camb parameters accepted by ``camb.set_params`` (``H0``, ``ombh2``, ``omch2``, ``tau``, ``ns``,
        ``As``, ``mnu``, ...). Unspecified ones take the fiducial values.
    """
    try:
        import camb  # noqa: F401
    except ImportError:
        raise ImportError("spectra_from_camb needs camb: pip install 'lensrec[cosmology]'") from None
    from .data.make_fiducial_spectra import COLUMNS, FIDUCIAL_PARAMETERS, compute_columns

    lmax = as_int(lmax, "lmax", minimum=100, maximum=10000)
    merged = dict(FIDUCIAL_PARAMETERS)
    merged.update(parameters)
    table, metadata = compute_columns(merged, lmax=lmax, lmax_tensor=min(lmax, 3000))
    return _from_columns(dict(zip(COLUMNS, table.T)), metadata)
