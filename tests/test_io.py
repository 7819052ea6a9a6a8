import os

import numpy as np
import pytest

from lensrec import io


def test_atomic_write_refuses_to_overwrite_and_keeps_old_file_on_failure(tmp_path):
    path = tmp_path / "out.json"
    io.write_json(path, {"a": 1.0, "b": float("nan")})
    assert io.read_json(path) == {"a": 1.0, "b": None}
    with pytest.raises(io.OutputExistsError):
        io.write_json(path, {"a": 2})
    # a writer killed mid-write: the exception escapes inside the atomic block
    with pytest.raises(RuntimeError):
        with io.atomic_path(path, force=True) as tmp:
            with open(tmp, "w") as handle:
                handle.write('{"a": 3, "half')
            raise RuntimeError("simulated kill")
    assert io.read_json(path) == {"a": 1.0, "b": None}
    assert [p for p in os.listdir(tmp_path) if p != "out.json"] == []


def test_maps_and_alm_round_trip_and_corruption_is_reported(tmp_path, rng):
    maps = rng.normal(size=(3, 12 * 16**2))
    io.write_maps(tmp_path / "m.fits", maps)
    np.testing.assert_array_equal(io.read_maps(tmp_path / "m.fits"), maps)
    alm = rng.normal(size=55) + 1j * rng.normal(size=55)
    alm[:10] = alm[:10].real  # m = 0 entries are real
    io.write_alm(tmp_path / "a.fits", alm)
    np.testing.assert_allclose(io.read_alm(tmp_path / "a.fits"), alm, rtol=0, atol=0)
    data = (tmp_path / "m.fits").read_bytes()
    (tmp_path / "cut.fits").write_bytes(data[: len(data) // 2])
    with pytest.raises(ValueError, match="truncated or corrupted"):
        io.read_maps(tmp_path / "cut.fits")
    (tmp_path / "junk.fits").write_bytes(b"not a fits file at all" * 100)
    with pytest.raises(ValueError, match="truncated or corrupted"):
        io.read_alm(tmp_path / "junk.fits")
    with pytest.raises(ValueError, match="non-finite"):
        io.write_maps(tmp_path / "nan.fits", np.full(12 * 4, np.nan))
    with pytest.raises(ValueError, match="not 12\\*nside"):
        io.write_maps(tmp_path / "odd.fits", np.zeros(100))


def test_provenance_records_versions_and_arguments():
    record = io.provenance("test", arguments={"x": 1}, seed=5)
    assert record["lensrec_version"] and record["seed"] == 5 and "numpy" in record["libraries"]


# ----------------------------------------------------------------------------- HEALPix header handling
def _healpy_write(path, maps, **kwargs):
    import warnings

    import healpy

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        healpy.write_map(str(path), list(np.atleast_2d(maps)), dtype=np.float64, overwrite=True, **kwargs)


def test_nested_maps_in_kelvin_are_read_as_ring_in_microkelvin(tmp_path, rng):
    import healpy

    maps = rng.normal(size=(3, 12 * 8**2))
    # healpy.reorder is the reference for NEST <-> RING (healpy)
    _healpy_write(tmp_path / "n.fits", healpy.reorder(maps, r2n=True) * 1e-6, nest=True, column_units="K")
    np.testing.assert_allclose(io.read_maps(tmp_path / "n.fits"), maps, rtol=1e-12, atol=0)
    _healpy_write(tmp_path / "m.fits", maps * 1e-3, column_units="mK")
    np.testing.assert_allclose(io.read_maps(tmp_path / "m.fits"), maps, rtol=1e-12, atol=0)
    # the map a NEST file would give if read as RING differs: the check guards against that error
    assert not np.allclose(healpy.reorder(maps, r2n=True), maps)


def test_iau_polarization_flips_u_and_absent_polcconv_means_cosmo(tmp_path, rng):
    maps = rng.normal(size=(3, 12 * 4**2))
    _healpy_write(tmp_path / "iau.fits", maps, column_units="uK", extra_header=[("POLCCONV", "IAU")])
    read = io.read_maps(tmp_path / "iau.fits")
    # IAU and COSMO differ by the sign of U (HEALPix documentation, polarization conventions)
    np.testing.assert_array_equal(read[:2], maps[:2])
    np.testing.assert_array_equal(read[2], -maps[2])
    _healpy_write(tmp_path / "plain.fits", maps, column_units="uK")
    np.testing.assert_array_equal(io.read_maps(tmp_path / "plain.fits"), maps)
    # forcing the convention overrides the header either way
    np.testing.assert_array_equal(io.read_maps(tmp_path / "plain.fits", polarization_convention="IAU")[2], -maps[2])
    np.testing.assert_array_equal(io.read_maps(tmp_path / "iau.fits", polarization_convention="COSMO"), maps)
    _healpy_write(tmp_path / "odd.fits", maps, column_units="uK", extra_header=[("POLCCONV", "WEIRD")])
    with pytest.raises(ValueError, match="POLCCONV='WEIRD'"):
        io.read_maps(tmp_path / "odd.fits")


def test_what_the_header_cannot_settle_is_refused(tmp_path, rng):
    maps = rng.normal(size=(3, 12 * 4**2))
    _healpy_write(tmp_path / "nounit.fits", maps)
    with pytest.raises(ValueError, match="no unit .*TUNIT1"):
        io.read_maps(tmp_path / "nounit.fits")
    np.testing.assert_array_equal(io.read_maps(tmp_path / "nounit.fits", unit="uK"), maps)
    _healpy_write(tmp_path / "rj.fits", maps, column_units="K_RJ")
    with pytest.raises(ValueError, match="unit 'K_RJ'"):
        io.read_maps(tmp_path / "rj.fits")
    # a file without ORDERING: written by astropy directly (healpy always writes the key)
    from astropy.io import fits

    columns = [fits.Column(name=n, format="D", array=m, unit="uK") for n, m in zip("TQU", maps, strict=True)]
    table = fits.BinTableHDU.from_columns(columns)
    table.header["PIXTYPE"] = "HEALPIX"
    table.header["NSIDE"] = 4
    fits.HDUList([fits.PrimaryHDU(), table]).writeto(tmp_path / "noorder.fits")
    with pytest.raises(ValueError, match="no ORDERING key"):
        io.read_maps(tmp_path / "noorder.fits")
    np.testing.assert_array_equal(io.read_maps(tmp_path / "noorder.fits", ordering="RING"), maps)
    with pytest.raises(ValueError, match="column 5"):
        io.read_maps(tmp_path / "noorder.fits", fields=(0, 5), ordering="RING")


def test_variance_maps_convert_squared_units(tmp_path, rng):
    variance = rng.uniform(1.0, 2.0, size=12 * 4**2)
    _healpy_write(tmp_path / "v.fits", variance * 1e-12, column_units="K^2")
    np.testing.assert_allclose(io.read_maps(tmp_path / "v.fits", fields=0, quantity="variance"), variance, rtol=1e-12)


def test_lensrec_writes_the_keys_it_reads(tmp_path, rng):
    maps = rng.normal(size=(3, 12 * 4**2))
    io.write_maps(tmp_path / "w.fits", maps, masked=True)
    keys = io.map_header(tmp_path / "w.fits")
    assert keys["ordering"] == "RING" and keys["units"] == ["uK"] * 3
    assert keys["polarization_convention"] == "COSMO" and keys["masked"] is True
    assert io.map_is_masked(tmp_path / "w.fits") is True


def test_read_maps_closes_its_file_when_healpy_fails(tmp_path, rng, monkeypatch):
    import healpy

    io.write_maps(tmp_path / "w.fits", rng.normal(size=(3, 12 * 4**2)))
    target = os.path.realpath(tmp_path / "w.fits")

    def open_handles():
        fds = os.listdir("/proc/self/fd")
        return sum(1 for fd in fds if os.path.realpath(os.path.join("/proc/self/fd", fd)) == target)

    leaked = []

    def failing(source, *args, **kwargs):
        # like healpy given a file name: it opens the file itself and raises before closing it
        if isinstance(source, (str, os.PathLike)):
            leaked.append(open(source, "rb"))  # noqa: SIM115
        raise IndexError("field out of range")

    monkeypatch.setattr(healpy, "read_map", failing)
    try:
        with pytest.raises(ValueError, match="IndexError"):
            io.read_maps(tmp_path / "w.fits")
        assert open_handles() == 0
    finally:
        for handle in leaked:
            handle.close()
