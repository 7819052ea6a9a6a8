"""Input validation shared by every public entry point.

Each helper raises ``TypeError`` for a value of the wrong kind and ``ValueError`` for a value of the right
kind outside its allowed range, with a message that names the argument, the value received and what is
allowed. Nothing here returns a silently corrected value except where the docstring says so.
"""

from __future__ import annotations

import numbers
import os

import numpy as np

__all__ = [
    "as_int",
    "as_float",
    "check_nside",
    "check_lmax_for_nside",
    "as_finite_array",
    "resolve_nthreads",
]


def as_int(value, name: str, minimum: int | None = None, maximum: int | None = None) -> int:
    """Return ``value`` as a Python int, refusing bools, non-integral floats and out-of-range values."""
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (numbers.Integral, numbers.Real)):
        raise TypeError(f"{name} must be an integer, got {value!r} of type {type(value).__name__}")
    if not isinstance(value, numbers.Integral):
        if not np.isfinite(value) or float(value) != int(value):
            raise TypeError(f"{name} must be an integer, got {value!r}")
    result = int(value)
    if minimum is not None and result < minimum:
        raise ValueError(f"{name} must be >= {minimum}, got {result}")
    if maximum is not None and result > maximum:
        raise ValueError(f"{name} must be <= {maximum}, got {result}")
    return result


def as_float(
    value, name: str, minimum: float | None = None, maximum: float | None = None, strict_minimum: bool = False
) -> float:
    """Return ``value`` as a finite Python float within the given bounds."""
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Real):
        raise TypeError(f"{name} must be a real number, got {value!r} of type {type(value).__name__}")
    result = float(value)
    if not np.isfinite(result):
        raise ValueError(f"{name} must be finite, got {result}")
    if minimum is not None:
        if strict_minimum and result <= minimum:
            raise ValueError(f"{name} must be > {minimum}, got {result}")
        if not strict_minimum and result < minimum:
            raise ValueError(f"{name} must be >= {minimum}, got {result}")
    if maximum is not None and result > maximum:
        raise ValueError(f"{name} must be <= {maximum}, got {result}")
    return result


def check_nside(nside, name: str = "nside") -> int:
    """Validate a HEALPix nside: a power of two between 1 and 2**16."""
    nside = as_int(nside, name, minimum=1, maximum=2**16)
    if nside & (nside - 1):
        lower = 1 << (nside.bit_length() - 1)
        raise ValueError(f"{name} must be a power of two, got {nside} (nearest allowed: {lower} or {2 * lower})")
    return nside


def check_lmax_for_nside(lmax, nside: int, name: str = "lmax", allow_high_lmax: bool = False) -> int:
    """Validate ``lmax`` against the HEALPix band limit 3·nside − 1 (overridable)."""
    lmax = as_int(lmax, name, minimum=2)
    if lmax > 3 * nside - 1 and not allow_high_lmax:
        raise ValueError(
            f"{name}={lmax} exceeds 3*nside-1={3 * nside - 1} for nside={nside}; lower {name}, raise nside, "
            "or pass allow_high_lmax=True if you accept aliasing"
        )
    return lmax


def as_real_array(
    values, name: str, ndim: int | tuple[int, ...] | None = None, shape: tuple | None = None, dtype=np.float64
) -> np.ndarray:
    """Convert to a numpy array of ``dtype`` and check dimensionality and shape; NaN and inf pass (the caller
    says which of them it allows)."""
    if isinstance(values, (str, bytes)) or values is None:
        raise TypeError(f"{name} must be a numeric array, got {type(values).__name__}")
    try:
        array = np.asarray(values)
    except Exception as exc:  # ragged lists and the like
        raise TypeError(f"{name} must be a numeric array: {exc}") from None
    if array.dtype == object or not (np.issubdtype(array.dtype, np.number) or array.dtype == np.bool_):
        raise TypeError(f"{name} must be a numeric array, got dtype {array.dtype}")
    if np.iscomplexobj(array) and not np.issubdtype(np.dtype(dtype), np.complexfloating):
        raise TypeError(f"{name} must be real, got a complex array")
    array = array.astype(dtype, copy=False)
    if ndim is not None:
        allowed = (ndim,) if isinstance(ndim, int) else tuple(ndim)
        if array.ndim not in allowed:
            raise ValueError(f"{name} must have {' or '.join(map(str, allowed))} dimension(s), got shape {array.shape}")
    if shape is not None and array.shape != tuple(shape):
        raise ValueError(f"{name} must have shape {tuple(shape)}, got {array.shape}")
    return array


def as_finite_array(
    values, name: str, ndim: int | tuple[int, ...] | None = None, shape: tuple | None = None, dtype=np.float64
) -> np.ndarray:
    """Convert to a numpy array of ``dtype`` and check dimensionality, shape and finiteness."""
    array = as_real_array(values, name, ndim=ndim, shape=shape, dtype=dtype)
    if array.size and not np.all(np.isfinite(array)):
        bad = int(np.size(array) - np.count_nonzero(np.isfinite(array)))
        raise ValueError(f"{name} contains {bad} non-finite value(s) (NaN or inf); all values must be finite")
    return array


def readonly_copy(values, dtype=None) -> np.ndarray:
    """A read-only copy of ``values`` (as ``dtype`` if given): what result objects hold."""
    array = np.array(values, dtype=dtype, copy=True)
    array.setflags(write=False)
    return array


def run_parallel(work, items, nthreads: int) -> None:
    """Call ``work(item)`` for every item, on a pool of ``nthreads`` threads when that helps (items must not
    depend on each other; the work is expected to release the GIL, as numpy and ducc0 calls do)."""
    items = list(items)
    if nthreads > 1 and len(items) > 1:
        import concurrent.futures

        with concurrent.futures.ThreadPoolExecutor(nthreads) as pool:
            list(pool.map(work, items))
    else:
        for item in items:
            work(item)


def resolve_nthreads(nthreads=None) -> int:
    """Number of threads for transforms: explicit argument, else ``LENSREC_NTHREADS``, else all cores."""
    if nthreads is None:
        env = os.environ.get("LENSREC_NTHREADS", "").strip()
        if env:
            try:
                nthreads = int(env)
            except ValueError:
                raise ValueError(f"LENSREC_NTHREADS must be a positive integer, got {env!r}") from None
            if nthreads < 1:
                raise ValueError(f"LENSREC_NTHREADS must be a positive integer, got {env!r}")
            return nthreads
        return max(1, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 1)
    return as_int(nthreads, "nthreads", minimum=1, maximum=1024)
