"""The patch end to end on the command line: simulate with a mask and hit map, reconstruct with --filter."""

import numpy as np
import pytest

import lensrec
from lensrec.cli import main
from lensrec.io import map_is_masked, read_json, read_maps, write_maps

NSIDE = 32
LMAX = 64


@pytest.fixture(scope="module")
def patch(tmp_path_factory):
    folder = tmp_path_factory.mktemp("patch")
    experiment = lensrec.Experiment(
        name="Small Patch Survey",
        noise_temperature=20.0,
        beam_fwhm=60.0,
        ell_max_temperature=LMAX,
        ell_max_polarization=LMAX,
    )
    experiment.to_toml(folder / "survey.toml")
    mask = lensrec.cap_mask(NSIDE, 0.0, -60.0, 25.0)
    write_maps(folder / "mask.fits", mask, unit=None)
    theta, _ = __import__("healpy").pix2ang(NSIDE, np.arange(12 * NSIDE**2))
    hits = np.where(mask > 0, 1.0 + 9.0 * np.cos(np.clip(theta - np.radians(150), -1.5, 1.5)) ** 2, 0.0)
    write_maps(folder / "hits.fits", hits, unit=None)
    common = ["--experiment", str(folder / "survey.toml"), "--nthreads", "1"]
    assert (
        main(
            ["simulate", *common, "--nside", str(NSIDE), "--lmax", str(LMAX), "--lmax-margin", "32"]
            + ["--mask", str(folder / "mask.fits"), "--hits", str(folder / "hits.fits"), "--out", str(folder / "sky")]
        )
        == 0
    )
    return folder, common, mask, hits


def test_simulate_marks_masked_maps_and_follows_the_hit_map(patch):
    folder, _, mask, hits = patch
    assert map_is_masked(folder / "sky" / "maps.fits") is True
    maps = read_maps(folder / "sky" / "maps.fits")
    assert np.all(maps[:, mask == 0] == 0.0)
    record = read_json(folder / "sky" / "run.json")
    assert record["settings"]["noise_model"] == "pixel_variance_white"


def test_reconstruct_auto_chooses_the_optimal_filter_on_a_patch_and_records_it(patch, capsys):
    folder, common, _, _ = patch
    args = ["reconstruct", *common, "--maps", str(folder / "sky" / "maps.fits"), "--estimator", "TT"]
    args += ["--mask", str(folder / "mask.fits"), "--hits", str(folder / "hits.fits"), "--lmax-L", "48"]
    assert main(args + ["--out", str(folder / "rec")]) == 0
    shown = capsys.readouterr().out
    assert "optimal filter converged in" in shown
    record = read_json(folder / "rec" / "run.json")
    assert record["settings"]["filter_choice"] == "optimal"
    assert record["settings"]["filter"]["cg_iterations"] > 0
    assert record["inputs"]["maps_masked"] is True
    n0 = read_json(folder / "rec" / "n0.json")
    assert n0["provenance"]["settings"]["filter"] == "optimal"
    # the isotropic filter on maps already masked by the simulation: the mask is not applied a second time
    assert main(args + ["--filter", "isotropic", "--out", str(folder / "iso")]) == 0
    record = read_json(folder / "iso" / "run.json")
    assert record["settings"]["filter_choice"] == "isotropic" and record["settings"]["filter"]["maps_masked"]
    # without a mask or noise map, auto is the isotropic filter; the band limit follows the maps (2 nside)
    plain = ["reconstruct", *common, "--maps", str(folder / "sky" / "maps.fits"), "--estimator", "TT"]
    assert main(plain + ["--out", str(folder / "plain")]) == 0
    record = read_json(folder / "plain" / "run.json")
    assert record["settings"]["filter_choice"] == "isotropic" and record["settings"]["filter"]["lmax"] == 2 * NSIDE


def test_a_cg_that_does_not_converge_is_a_clear_error(patch, capsys):
    folder, common, _, _ = patch
    args = ["reconstruct", *common, "--maps", str(folder / "sky" / "maps.fits"), "--estimator", "TT"]
    args += ["--mask", str(folder / "mask.fits"), "--cg-max-iterations", "2", "--out", str(folder / "fail")]
    assert main(args) == 2
    assert "did not converge" in capsys.readouterr().err
