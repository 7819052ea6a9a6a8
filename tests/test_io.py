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
