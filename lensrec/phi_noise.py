"""Reading the noise of a lensing-potential estimate for its Wiener filter, from JSON or text.

The delensing template uses φ^WF = C^φφ / (C^φφ + N_L) · φ̂; N_L must be the noise power of the φ̂ given,
in C_L^φφ units, indexed by L = 0 … L_max of φ̂. Which noise is read:

- JSON in the layout of ``lensrec forecast`` / ``lensrec reconstruct`` (``{"L": [...], "n0": {label:
  {"gradient": [...]}}, ...}``): the Gaussian **N0** of the gradient of the estimator named by
  ``estimator`` (or by ``provenance.settings.estimator``, or the only label in the file). If the file holds
  an ``"iterative"`` block with that label (``lensrec forecast --iterative``; an iterative reconstruction),
  its converged **iterative N0** is read instead. If it holds an ``"n1"`` table with that label, **N0 + N1**
  is read (the N1 bias adds to the noise of φ̂; Kesden, Cooray & Kamionkowski 2003, PRD 67, 123507).
- Text: one column (N_L for L = 0, 1, …) or two columns (L, N_L); read as given (the user's choice of
  N0, N0 + N1 or iterative N0). ``nan`` is allowed at L < 2, ``inf`` marks L without reconstruction.

The reader returns the values and a one-line description of what was read, for provenance.
"""

from __future__ import annotations

import os

import numpy as np

from ._deprecation import renamed_arguments
from .labels import ESTIMATORS

__all__ = ["read_phi_noise"]


def _values(items, where: str) -> np.ndarray:
    try:
        return np.array([np.nan if value is None else value for value in items], dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{where} is not a list of numbers ({exc})") from None


def _check(values: np.ndarray, lmax_L: int, where: str) -> np.ndarray:
    if values.ndim != 1 or values.size != lmax_L + 1:
        raise ValueError(
            f"{where} has {values.size} values but phi reaches lmax_L = {lmax_L}: one noise value per L = 0 ... "
            f"{lmax_L} ({lmax_L + 1} values) is needed; the noise belongs to another reconstruction"
        )
    if np.any(np.isnan(values[2:])):
        bad = int(np.argmax(np.isnan(values[2:]))) + 2
        raise ValueError(f"{where} is NaN (null) at L = {bad}; only L < 2 may be undefined (use inf for no data)")
    finite = values[~np.isnan(values)]
    if np.any(finite < 0):
        raise ValueError(f"{where} must be non-negative (a noise power); got {finite.min():.4g}")
    return values


def noise_label(document: dict, path: str, estimator: str | None = None) -> str:
    """The estimator whose noise a JSON document gives: ``estimator``, else ``provenance.settings.estimator``,
    else its only label (ValueError if it holds several and names none, or names an unknown label)."""
    noise = document.get("n0") if isinstance(document, dict) else None
    if not isinstance(noise, dict) or not noise:
        raise ValueError(f"{path!r} holds no 'n0' table of reconstruction noise")
    settings = (document.get("provenance") or {}).get("settings") or {}
    label = estimator or settings.get("estimator")
    if label is None:
        if len(noise) != 1:
            raise ValueError(
                f"{path!r} holds the noise of {sorted(noise)} and does not say which made phi "
                "(provenance.settings.estimator); name the estimator"
            )
        label = next(iter(noise))
    if label not in ESTIMATORS:
        raise ValueError(f"{path!r} names the estimator {label!r}, which is not one of {', '.join(ESTIMATORS)}")
    return str(label)


@renamed_arguments(lmax_phi="lmax_L")
def read_phi_noise(path, lmax_L: int, estimator: str | None = None) -> tuple[np.ndarray, str]:
    """The noise N_L of a φ estimate from a JSON or text file (see the module docstring for which noise).

    Parameters
    ----------
    path : str or path
        ``.json`` (forecast/reconstruct layout) or a text table.
    lmax_L : int
        Band limit of the φ coefficients; the file must give exactly L = 0 … lmax_L (``lmax_phi`` is the
        deprecated old name).
    estimator : str, optional
        The label whose noise to read from a JSON file holding several.

    Returns
    -------
    (ndarray, str)
        N_L (NaN allowed at L < 2) and a description such as ``"N0 of MV (gradient) from n0.json"``.

    Raises
    ------
    ValueError
        If the file is missing or unreadable, names no estimator when it holds several, or has the wrong
        length, NaN at L ≥ 2 or negative values.
    """
    path = os.fspath(path)
    if not os.path.isfile(path):
        raise ValueError(f"the phi noise file {path!r} does not exist")
    name = os.path.basename(path)
    if path.endswith(".json"):
        from .io import read_json

        document = read_json(path)
        label = noise_label(document, path, estimator)
        noise = document["n0"]
        L = np.asarray(document.get("L", []))
        if L.ndim != 1 or not np.array_equal(L, np.arange(L.size)):
            raise ValueError(f"{path!r}: 'L' must be 0, 1, ..., L_max with one noise value per L")
        iterative = document.get("iterative")
        if isinstance(iterative, dict) and label in (iterative.get("n0") or {}):
            values = _values(iterative["n0"][label]["gradient"], f"{path!r} iterative N0 of {label}")
            kind = "iterative N0"
        else:
            if label not in noise or not isinstance(noise[label], dict) or "gradient" not in noise[label]:
                raise ValueError(f"{path!r} lacks the gradient N0 of the estimator {label!r}")
            values = _values(noise[label]["gradient"], f"{path!r} N0 of {label}")
            kind = "N0"
            n1 = document.get("n1")
            if isinstance(n1, dict) and isinstance(n1.get(label), dict) and "gradient" in n1[label]:
                extra = _values(n1[label]["gradient"], f"{path!r} N1 of {label}")
                if extra.shape == values.shape:
                    values = values + np.nan_to_num(extra, nan=0.0)
                    kind = "N0 + N1"
        return _check(values, lmax_L, f"the noise in {path!r}"), f"{kind} of {label} (gradient) from {name}"
    try:
        table = np.loadtxt(path, ndmin=2)
    except (OSError, ValueError) as exc:
        raise ValueError(
            f"cannot read the phi noise table {path!r} ({exc}); give one column N_L or two (L, N_L)"
        ) from None
    if table.shape[1] == 2:
        if not np.array_equal(table[:, 0], np.arange(table.shape[0])):
            raise ValueError(f"{path!r}: the first of two columns must be L = 0, 1, 2, ...")
        values = table[:, 1]
    elif table.shape[1] == 1:
        values = table[:, 0]
    else:
        raise ValueError(f"{path!r} has {table.shape[1]} columns; give one column N_L or two (L, N_L)")
    return _check(values, lmax_L, f"the noise in {path!r}"), f"noise as given in {name}"
