"""Safe reading and writing of lensrec outputs, and the provenance record every output carries.

Every writer is atomic: it writes a temporary file in the destination folder, flushes and fsyncs it, then
renames it over the destination, so an interrupted run leaves either the previous file or none. Existing
outputs are never replaced unless ``force=True``. Nothing is ever unpickled.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import json
import os
import platform
import subprocess
import sys
import tempfile
import warnings

import numpy as np

from ._checks import as_finite_array, check_nside
from ._version import __version__

__all__ = [
    "OutputExistsError",
    "atomic_path",
    "atomic_write_text",
    "write_json",
    "read_json",
    "write_maps",
    "read_maps",
    "write_alm",
    "read_alm",
    "check_outputs_free",
    "file_sha256",
    "provenance",
]


class OutputExistsError(FileExistsError):
    """An output already exists and ``force`` was not given."""


def _refuse_existing(path: str, force: bool) -> None:
    if os.path.lexists(path) and not force:
        raise OutputExistsError(f"output {path!r} already exists; pass force=True (CLI: --force) to overwrite it")


def check_outputs_free(paths, force: bool = False) -> None:
    """Raise :class:`OutputExistsError` if any of ``paths`` exists and ``force`` is False."""
    for path in paths:
        _refuse_existing(os.fspath(path), force)


@contextlib.contextmanager
def atomic_path(path, force: bool = False, suffix: str = ""):
    """Yield a temporary path beside ``path``; on success it is fsynced and renamed onto ``path``.

    On any exception the temporary file is removed and ``path`` is left untouched.
    """
    path = os.fspath(path)
    _refuse_existing(path, force)
    directory = os.path.dirname(os.path.abspath(path))
    os.makedirs(directory, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=directory, prefix=f".{os.path.basename(path)}.", suffix=suffix + ".part")
    os.close(fd)
    os.unlink(tmp)  # writers such as astropy's refuse an existing file; the name stays reserved by us
    try:
        yield tmp
        with open(tmp, "rb+") as handle:
            os.fsync(handle.fileno())
        os.chmod(tmp, 0o644)
        if not force:
            _refuse_existing(path, force)
        os.replace(tmp, path)
        with contextlib.suppress(OSError):
            dir_fd = os.open(directory, os.O_RDONLY)
            try:
                os.fsync(dir_fd)
            finally:
                os.close(dir_fd)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)


def atomic_write_text(path, text: str, force: bool = False) -> None:
    """Write ``text`` (UTF-8) to ``path`` atomically."""
    with atomic_path(path, force=force) as tmp:
        with open(tmp, "w", encoding="utf-8") as handle:
            handle.write(text)


def _json_default(value):
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, (np.floating, np.integer, np.bool_)):
        return value.item()
    raise TypeError(f"cannot store {type(value).__name__} in JSON")


def _nan_to_none(value):
    if isinstance(value, float) and not np.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _nan_to_none(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_nan_to_none(v) for v in value]
    return value


def write_json(path, document, force: bool = False) -> None:
    """Write a JSON document atomically; NaN and inf become ``null``."""
    plain = json.loads(json.dumps(document, default=_json_default, allow_nan=True))
    text = json.dumps(_nan_to_none(plain), indent=1, allow_nan=False)
    atomic_write_text(path, text + "\n", force=force)


def read_json(path) -> dict:
    """Read a JSON file, with a clear error for missing or corrupted files."""
    path = os.fspath(path)
    if not os.path.isfile(path):
        raise ValueError(f"JSON file {path!r} does not exist")
    try:
        with open(path, encoding="utf-8") as handle:
            return json.load(handle)
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise ValueError(f"JSON file {path!r} is corrupted or truncated: {exc}") from None


def file_sha256(path) -> str:
    """SHA-256 hex digest of a file's bytes (read in 1 MiB blocks)."""
    import hashlib

    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _healpy():
    import healpy

    return healpy


def write_maps(path, maps, force: bool = False, column_names=("T", "Q", "U")) -> None:
    """Write HEALPix maps (RING, µK) in healpy's standard FITS layout, atomically."""
    maps = as_finite_array(maps, "maps", ndim=(1, 2))
    maps2 = np.atleast_2d(maps)
    check_nside(_nside_of(maps2.shape[1], "maps"), "nside of maps")
    names = list(column_names)[: maps2.shape[0]] if maps2.shape[0] > 1 else None
    with atomic_path(path, force=force, suffix=".fits") as tmp:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            _healpy().write_map(
                tmp,
                maps if maps.ndim == 1 else list(maps2),
                column_names=names,
                column_units="uK",
                dtype=np.float64,
                overwrite=True,
            )


def _nside_of(npix: int, name: str) -> int:
    nside = int(round(np.sqrt(npix / 12.0)))
    if 12 * nside * nside != npix:
        raise ValueError(f"{name} has {npix} pixels, which is not 12*nside^2 for any nside")
    return nside


def _check_fits_readable(path: str, what: str) -> None:
    """Open and fully read a FITS file once, so that truncation or corruption gives a clear ValueError."""
    from astropy.io import fits

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with fits.open(path, memmap=False, lazy_load_hdus=False) as hdul:
                if len(hdul) < 2:
                    raise ValueError("no table extension")
                for hdu in hdul[1:]:
                    _ = hdu.data  # forces the read; truncated data raises here
                    if hdu.data is None or len(hdu.data) == 0:
                        raise ValueError("empty extension")
    except Exception as exc:
        raise ValueError(
            f"{what} {path!r} is unreadable, truncated or corrupted ({type(exc).__name__}: {exc})"
        ) from None


def read_maps(path, fields=(0, 1, 2)) -> np.ndarray:
    """Read HEALPix maps from FITS (returned in RING order), validating shape and finiteness."""
    path = os.fspath(path)
    if not os.path.isfile(path):
        raise ValueError(f"map file {path!r} does not exist")
    _check_fits_readable(path, "map file")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            maps = _healpy().read_map(path, field=fields, dtype=np.float64)
    except Exception as exc:  # astropy raises many kinds for truncated or corrupted files
        raise ValueError(
            f"map file {path!r} is unreadable, truncated or corrupted ({type(exc).__name__}: {exc})"
        ) from None
    maps = np.asarray(maps, dtype=np.float64)
    bad_pixels = np.isclose(maps, _healpy().UNSEEN)
    if np.any(bad_pixels):
        raise ValueError(
            f"map file {path!r} has {int(bad_pixels.sum())} UNSEEN pixels; fill them (lensrec applies masks explicitly)"
        )
    nside = _nside_of(np.atleast_2d(maps).shape[1], f"map file {path!r}")
    check_nside(nside, f"nside of {path!r}")
    return as_finite_array(maps, f"maps in {path!r}")


def write_alm(path, alm, lmax: int | None = None, force: bool = False) -> None:
    """Write harmonic coefficients (healpy triangular layout) in healpy's alm FITS, atomically."""
    alm = np.asarray(alm)
    if not np.iscomplexobj(alm):
        raise TypeError(f"alm must be complex, got dtype {alm.dtype}")
    if not np.all(np.isfinite(alm)):
        raise ValueError("alm contains non-finite values")
    with atomic_path(path, force=force, suffix=".fits") as tmp:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            _healpy().write_alm(tmp, alm, lmax=-1 if lmax is None else lmax, overwrite=True)


def read_alm(path, hdu=1) -> np.ndarray:
    """Read harmonic coefficients from a healpy alm FITS file, with a clear error if it is damaged."""
    path = os.fspath(path)
    if not os.path.isfile(path):
        raise ValueError(f"alm file {path!r} does not exist")
    _check_fits_readable(path, "alm file")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            alm = _healpy().read_alm(path, hdu=hdu)
    except Exception as exc:
        raise ValueError(
            f"alm file {path!r} is unreadable, truncated or corrupted ({type(exc).__name__}: {exc})"
        ) from None
    alm = np.asarray(alm, dtype=np.complex128)
    if not np.all(np.isfinite(alm)):
        raise ValueError(f"alm file {path!r} contains non-finite coefficients")
    return alm


def _git_commit() -> str | None:
    here = os.path.dirname(os.path.abspath(__file__))
    try:
        out = subprocess.run(["git", "-C", here, "rev-parse", "HEAD"], capture_output=True, text=True, timeout=5)
    except (OSError, subprocess.SubprocessError):
        return None
    return out.stdout.strip() or None if out.returncode == 0 else None


def _library_versions() -> dict[str, str]:
    from importlib import metadata

    versions = {}
    for name in ("numpy", "scipy", "healpy", "ducc0", "camb", "dask", "distributed"):
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            continue
    return versions


def provenance(
    command: str,
    arguments: dict | None = None,
    experiment=None,
    seed=None,
    timings: dict | None = None,
    extra: dict | None = None,
) -> dict:
    """The provenance record stored in every output: versions, commit, inputs, seeds and timings."""
    record = {
        "lensrec_version": __version__,
        "git_commit": _git_commit(),
        "command": command,
        "arguments": arguments or {},
        "experiment": experiment.to_dict() if experiment is not None else None,
        "seed": seed,
        "timings_seconds": timings or {},
        "libraries": _library_versions(),
        "python": sys.version.split()[0],
        "platform": platform.platform(),
        "created_utc": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
    }
    if extra:
        record.update(extra)
    return record
