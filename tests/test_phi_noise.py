"""Reading the noise of a phi estimate for its Wiener filter (JSON or text)."""

import json

import numpy as np
import pytest

from lensrec.phi_noise import read_phi_noise


def _document(labels, lmax=5, estimator=None, **extra):
    values = [None, None] + [1.0 + k for k in range(lmax - 1)]
    document = {"L": list(range(lmax + 1)), "n0": {label: {"gradient": values, "curl": values} for label in labels}}
    if estimator:
        document["provenance"] = {"settings": {"estimator": estimator}}
    document.update(extra)
    return document


def test_json_reads_the_n0_of_the_estimator_that_made_phi(tmp_path):
    path = tmp_path / "n0.json"
    path.write_text(json.dumps(_document(["TT", "TT+TE+EE"], estimator="TT+TE+EE")))
    values, what = read_phi_noise(path, 5)
    assert np.isnan(values[:2]).all() and values[2:].tolist() == [1.0, 2.0, 3.0, 4.0]
    assert what == "N0 of TT+TE+EE (gradient) from n0.json"
    path.write_text(json.dumps(_document(["TT", "MV"])))
    with pytest.raises(ValueError, match="does not say which made phi"):
        read_phi_noise(path, 5)
    assert read_phi_noise(path, 5, estimator="MV")[1].startswith("N0 of MV")


def test_json_prefers_the_iterative_noise_and_adds_n1(tmp_path):
    path = tmp_path / "n0.json"
    iterative = {"n0": {"MV": {"gradient": [None, None, 0.5, 0.5, 0.5, 0.5]}}}
    path.write_text(json.dumps(_document(["MV"], estimator="MV", iterative=iterative)))
    values, what = read_phi_noise(path, 5)
    assert what.startswith("iterative N0 of MV") and values[2:].tolist() == [0.5] * 4
    n1 = {"MV": {"gradient": [None, None, 0.25, 0.25, 0.25, 0.25]}}
    path.write_text(json.dumps(_document(["MV"], estimator="MV", n1=n1)))
    values, what = read_phi_noise(path, 5)
    assert what.startswith("N0 + N1 of MV") and values[2:].tolist() == [1.25, 2.25, 3.25, 4.25]


def test_text_tables_and_bad_lengths(tmp_path):
    one = tmp_path / "n.txt"
    np.savetxt(one, [np.nan, np.nan, 1, 2, 3, np.inf])
    values, what = read_phi_noise(one, 5)
    assert values[5] == np.inf and what == "noise as given in n.txt"
    two = tmp_path / "n2.txt"
    np.savetxt(two, np.column_stack([np.arange(6), [0, 0, 1, 2, 3, 4]]))
    assert read_phi_noise(two, 5)[0].tolist() == [0, 0, 1, 2, 3, 4]
    with pytest.raises(ValueError, match="has 6 values but phi reaches lmax_L = 7"):
        read_phi_noise(one, 7)
    np.savetxt(one, [0, 0, -1.0, 1, 1, 1])
    with pytest.raises(ValueError, match="must be non-negative"):
        read_phi_noise(one, 5)
    np.savetxt(one, [0, 0, np.nan, 1, 1, 1])
    with pytest.raises(ValueError, match="NaN \\(null\\) at L = 2"):
        read_phi_noise(one, 5)
    with pytest.raises(ValueError, match="does not exist"):
        read_phi_noise(tmp_path / "missing.json", 5)
