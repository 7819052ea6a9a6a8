"""Headless tests of the Export section: what it writes equals the library's documents, with provenance, and
it never replaces a file without the overwrite box."""

import json
import os

import numpy as np
import pytest

import lensrec
from widgets import Workbench

SMALL = lensrec.Experiment(name="small export survey", noise_temperature=3.0, beam_fwhm=3.0, ell_min=2,
                           ell_max_temperature=800, ell_max_polarization=800, sky_fraction=0.3)  # fmt: skip


@pytest.fixture(scope="module")
def app():
    workbench = Workbench(experiment=SMALL, delay=0.0, nthreads=2)
    assert workbench.wait(60) and workbench.state.noise is not None
    return workbench


def _read(path):
    with open(path) as handle:
        return json.load(handle)


def test_export_writes_the_n0_table_in_the_forecast_layout_with_provenance(app, tmp_path):
    section = app["export"]
    section.folder.value = str(tmp_path / "out")
    section.export_button.click()
    assert section.status.kind == "ok", section.status.message
    assert "not available" in section.status.message  # no reconstruction or suite yet: said, not hidden
    document = _read(tmp_path / "out" / "n0.json")
    expected = lensrec.reconstruction_noise(SMALL, nthreads=2)
    assert document["L"] == list(range(int(expected.L[-1]) + 1))
    for label in ("TT", "EB", "MV"):
        values = np.array([np.nan if v is None else v for v in document["n0"][label]["gradient"]])
        # the same N0, written as JSON: equal to the float's round trip
        np.testing.assert_allclose(values[2:], expected.n0[label]["gradient"][2:], rtol=1e-12)
    assert document["snr"]["MV"] == pytest.approx(expected.lensing_snr()["MV"], rel=1e-12)
    provenance = document["provenance"]
    assert provenance["lensrec_version"] == lensrec.__version__
    assert provenance["experiment"]["name"] == SMALL.name and "simulated" in provenance["caution"]
    # the figures on screen, as PNG and PDF, with the index of everything written
    assert (tmp_path / "out" / "noise-n0.png").is_file() and (tmp_path / "out" / "noise-n0.pdf").is_file()
    assert (tmp_path / "out" / "experiment-spectra.png").read_bytes()[:4] == b"\x89PNG"
    index = _read(tmp_path / "out" / "export.json")
    assert "n0.json" in index["files"] and "noise-n0" in index["figures"]


def test_export_never_overwrites_without_the_box(app, tmp_path):
    section = app["export"]
    folder = tmp_path / "again"
    section.folder.value = str(folder)
    section.export_button.click()
    assert section.status.kind == "ok"
    before = {name: (folder / name).read_bytes() for name in os.listdir(folder)}
    section.export_button.click()
    assert section.status.kind == "error" and "overwrite" in section.status.message
    assert {name: (folder / name).read_bytes() for name in os.listdir(folder)} == before  # nothing touched
    section.overwrite.value = True
    section.export_button.click()
    assert section.status.kind == "ok"
    section.overwrite.value = False


def test_export_refuses_an_empty_folder_name_and_a_file(app, tmp_path):
    section = app["export"]
    section.folder.value = ""
    section.export_button.click()
    assert section.status.kind == "error" and "folder is empty" in section.status.message
    afile = tmp_path / "file.txt"
    afile.write_text("x")
    section.folder.value = str(afile)
    section.export_button.click()
    assert section.status.kind == "error" and "not a folder" in section.status.message


def test_export_of_nothing_available_says_what_is_missing(app, tmp_path):
    section = app["export"]
    for key, box in section.boxes.items():
        box.value = key == "suite"
    section.folder.value = str(tmp_path / "none")
    section.export_button.click()
    assert section.status.kind == "error" and "finished suite" in section.status.message
    assert not (tmp_path / "none").exists()
    for box in section.boxes.values():
        box.value = True
