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
    "map_header",
    "map_is_masked",
    "MAP_QUANTITIES",
    "POLARIZATION_CONVENTIONS",
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


# ------------------------------------------------------------------------------------- HEALPix headers
#: Map quantities :func:`read_maps` knows: sky maps in temperature units (returned in µK), noise-variance
#: maps (returned in µK²) and plain numbers (masks, hit counts; TUNIT is not used).
MAP_QUANTITIES = ("temperature", "variance", "none")
#: Polarization conventions of Q/U maps (the FITS keyword POLCCONV).
POLARIZATION_CONVENTIONS = ("COSMO", "IAU")
ORDERINGS = ("RING", "NESTED")

# Factor that takes a map in each TUNIT to µK (thermodynamic CMB units only: brightness-temperature or
# intensity units cannot be converted without a bandpass and are refused).
_TEMPERATURE_UNITS = {
    "k": 1e6,
    "kcmb": 1e6,
    "k_cmb": 1e6,
    "k(cmb)": 1e6,
    "mk": 1e3,
    "mkcmb": 1e3,
    "mk_cmb": 1e3,
    "uk": 1.0,
    "µk": 1.0,
    "μk": 1.0,
    "muk": 1.0,
    "microk": 1.0,
    "ukcmb": 1.0,
    "uk_cmb": 1.0,
    "µk_cmb": 1.0,
}


def _unit_factor(unit: str, quantity: str, where: str) -> float:
    """The factor taking a map in ``unit`` to µK (``quantity`` 'temperature') or µK² ('variance')."""
    text = unit.strip().replace(" ", "")
    if quantity == "variance":
        for suffix in ("^2", "**2", "2"):
            if text.endswith(suffix) and text[: -len(suffix)].lower() in _TEMPERATURE_UNITS:
                return _TEMPERATURE_UNITS[text[: -len(suffix)].lower()] ** 2
        allowed = "K^2, mK^2, uK^2 (also K2, K**2, ...)"
    else:
        if text.lower() in _TEMPERATURE_UNITS:
            return _TEMPERATURE_UNITS[text.lower()]
        allowed = "K, mK, uK (K_CMB, uK_CMB, ... thermodynamic)"
    raise ValueError(
        f"{where} has unit {unit!r}, which lensrec cannot convert to "
        f"{'uK^2' if quantity == 'variance' else 'uK'}; allowed: {allowed}. Convert the map, or pass "
        "unit= (CLI: --map-unit) if the header is wrong"
    )


def _choice(value, allowed, name: str):
    if value is None:
        return None
    if not isinstance(value, str) or value.strip().upper() not in allowed:
        raise ValueError(f"{name} must be one of {allowed} (or None to read it from the header), got {value!r}")
    return value.strip().upper()


def write_maps(
    path, maps, force: bool = False, column_names=("T", "Q", "U"), unit: str | None = "uK", masked: bool | None = None
) -> None:
    """Write HEALPix maps in healpy's standard FITS layout, atomically, with the keys :func:`read_maps` reads.

    The header always carries ORDERING = 'RING', POLCCONV = 'COSMO' (HEALPix's convention, which healpy
    uses) and TUNITn = ``unit`` for every column ('uK' for sky maps; ``None`` for masks or hit counts).
    ``masked`` (True/False) records in the key LRMASKED whether a mask has already multiplied the maps,
    so that a filter does not apply it a second time.
    """
    maps = as_finite_array(maps, "maps", ndim=(1, 2))
    maps2 = np.atleast_2d(maps)
    check_nside(_nside_of(maps2.shape[1], "maps"), "nside of maps")
    names = list(column_names)[: maps2.shape[0]] if maps2.shape[0] > 1 else None
    extra = [("POLCCONV", "COSMO", "Q/U convention: COSMO (HEALPix)")]
    if masked is not None:
        if not isinstance(masked, (bool, np.bool_)):
            raise TypeError(f"masked must be True, False or None, got {masked!r}")
        extra.append(("LRMASKED", bool(masked), "a mask already multiplies these maps"))
    with atomic_path(path, force=force, suffix=".fits") as tmp:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            _healpy().write_map(
                tmp,
                maps if maps.ndim == 1 else list(maps2),
                column_names=names,
                column_units=unit,
                dtype=np.float64,
                overwrite=True,
                extra_header=extra,
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


def map_header(path) -> dict:
    """The HEALPix keys of a map file's first table extension: ordering, per-column units, POLCCONV, masked.

    Returns ``{"ordering": str | None, "units": [str | None, ...], "names": [...], "polarization_convention":
    str | None, "masked": bool | None, "columns": int}`` (None where the key is absent).
    """
    from astropy.io import fits

    path = os.fspath(path)
    if not os.path.isfile(path):
        raise ValueError(f"map file {path!r} does not exist")
    _check_fits_readable(path, "map file")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with fits.open(path, memmap=False) as hdul:
            header = hdul[1].header
            columns = int(header.get("TFIELDS", 0))
            ordering = header.get("ORDERING")
            convention = header.get("POLCCONV")
            masked = header.get("LRMASKED")
            return {
                "ordering": str(ordering).strip().upper() if ordering is not None else None,
                "units": [header.get(f"TUNIT{k + 1}") for k in range(columns)],
                "names": [header.get(f"TTYPE{k + 1}") for k in range(columns)],
                "polarization_convention": str(convention).strip().upper() if convention is not None else None,
                "masked": bool(masked) if masked is not None else None,
                "columns": columns,
            }


def read_maps(
    path,
    fields=(0, 1, 2),
    quantity: str = "temperature",
    unit: str | None = None,
    polarization_convention: str | None = None,
    ordering: str | None = None,
) -> np.ndarray:
    """Read HEALPix maps from FITS, returned in RING order, µK (or µK²) and the COSMO Q/U convention.

    The FITS header decides what the numbers mean, and what it cannot settle is refused:

    - ORDERING: 'NESTED' maps are reordered to RING (healpy.reorder). A file without ORDERING is refused
      unless ``ordering`` says which it is.
    - TUNITn (``quantity='temperature'``): K, mK or µK (thermodynamic CMB units) are converted to µK; a
      column without TUNIT, or with a unit that needs a bandpass (K_RJ, MJy/sr), is refused unless
      ``unit`` says what the numbers are. ``quantity='variance'``: K², mK², µK² are converted to µK².
      ``quantity='none'`` (masks, hit counts): units are not used.
    - POLCCONV: Q/U in the IAU convention (polarization angle measured from north through east) are
      converted to COSMO, HEALPix's convention which lensrec uses internally, by flipping the sign of U
      (Górski et al. 2005, ApJ 622, 759; HEALPix documentation on polarization conventions). An absent
      POLCCONV means COSMO, the HEALPix convention that healpy writes. ``polarization_convention`` forces
      either, whatever the header says. U is taken to be the third column of the file.

    Parameters
    ----------
    path : str or path
    fields : int or sequence of int
        Columns to read (0-based).
    quantity : {'temperature', 'variance', 'none'}
    unit : str, optional
        Unit of every read column, overriding the header (e.g. 'K', 'mK', 'uK'; 'K^2' for variances).
    polarization_convention : {'COSMO', 'IAU'}, optional
        Force the Q/U convention of the file (default: POLCCONV from the header, COSMO when absent).
    ordering : {'RING', 'NESTED'}, optional
        Force the pixel ordering (default: ORDERING from the header; refused when absent).

    Raises
    ------
    ValueError
        Missing, truncated or corrupted file; unknown or missing ordering or unit; unknown POLCCONV;
        UNSEEN or non-finite pixels; a pixel count that is no HEALPix nside.
    """
    path = os.fspath(path)
    if quantity not in MAP_QUANTITIES:
        raise ValueError(f"quantity must be one of {MAP_QUANTITIES}, got {quantity!r}")
    forced_convention = _choice(polarization_convention, POLARIZATION_CONVENTIONS, "polarization_convention")
    forced_ordering = _choice(ordering, ORDERINGS + ("NEST",), "ordering")
    if unit is not None and not isinstance(unit, str):
        raise TypeError(f"unit must be a string such as 'uK', 'mK' or 'K', got {unit!r}")
    keys = map_header(path)  # checks existence and readability first
    single = np.ndim(fields) == 0
    wanted = [int(fields)] if single else [int(k) for k in fields]
    for column in wanted:
        if column < 0 or column >= keys["columns"]:
            raise ValueError(
                f"map file {path!r} has {keys['columns']} column(s); column {column} was asked for (fields={fields!r})"
            )
    order = forced_ordering or keys["ordering"]
    if order is None:
        raise ValueError(
            f"map file {path!r} does not say its pixel ordering (no ORDERING key); pass ordering='RING' or "
            "'NESTED' (CLI: --map-ordering) if you know it"
        )
    if order not in ("RING", "NESTED", "NEST"):
        raise ValueError(f"map file {path!r} has ORDERING={order!r}; lensrec reads RING or NESTED maps")
    factors = np.ones(len(wanted))
    if quantity != "none":
        for k, column in enumerate(wanted):
            column_unit = unit if unit is not None else keys["units"][column]
            where = f"column {column} of map file {path!r}"
            if column_unit is None or not str(column_unit).strip():
                raise ValueError(
                    f"{where} has no unit (no TUNIT{column + 1} key); pass unit= (CLI: --map-unit), e.g. "
                    f"'uK', 'mK' or 'K'{' squared' if quantity == 'variance' else ''}, if you know it"
                )
            factors[k] = _unit_factor(str(column_unit), quantity, where)
    convention = forced_convention or keys["polarization_convention"] or "COSMO"
    if convention not in POLARIZATION_CONVENTIONS:
        raise ValueError(
            f"map file {path!r} has POLCCONV={keys['polarization_convention']!r}; allowed: "
            f"{POLARIZATION_CONVENTIONS} (pass polarization_convention= to force one)"
        )
    from astropy.io import fits

    # healpy reads from the HDU we opened, so the file is closed by this block whatever healpy does
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with fits.open(path, memmap=False) as hdul:
            try:
                maps = _healpy().read_map(hdul[1], field=wanted, dtype=np.float64, nest=None)
            except Exception as exc:  # astropy raises many kinds for truncated or corrupted files
                raise ValueError(
                    f"map file {path!r} is unreadable, truncated or corrupted ({type(exc).__name__}: {exc})"
                ) from None
            maps = np.array(np.atleast_2d(maps), dtype=np.float64)
    bad_pixels = np.isclose(maps, _healpy().UNSEEN)
    if np.any(bad_pixels):
        raise ValueError(
            f"map file {path!r} has {int(bad_pixels.sum())} UNSEEN pixels; fill them (lensrec applies masks explicitly)"
        )
    nside = _nside_of(maps.shape[1], f"map file {path!r}")
    check_nside(nside, f"nside of {path!r}")
    maps = as_finite_array(maps, f"maps in {path!r}")
    if order in ("NESTED", "NEST"):
        maps = np.array(_healpy().reorder(maps, n2r=True), dtype=np.float64, ndmin=2)
    maps *= factors[:, None]
    if quantity == "temperature" and convention == "IAU" and 2 in wanted:
        maps[wanted.index(2)] *= -1.0  # IAU -> COSMO flips U
    return maps[0] if single else maps


def map_is_masked(path) -> bool | None:
    """Whether a map file says a mask already multiplies it (LRMASKED key); None if it does not say."""
    return map_header(path)["masked"]


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
