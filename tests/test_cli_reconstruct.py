"""``lensrec reconstruct`` end to end at small nside: outputs, provenance, --force, bad input (exit codes 0/2)."""

import json
import os

import numpy as np
import pytest

import lensrec
from lensrec.cli import main
from lensrec.commands.forecast import forecast_document
from lensrec.io import read_alm, write_maps

NSIDE = 64
LMAX = 128


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    folder = tmp_path_factory.mktemp("reconstruct_inputs")
    experiment = lensrec.Experiment(
        name="Small CLI Survey",
        noise_temperature=2.0,
        beam_fwhm=10.0,
        ell_min=2,
        ell_max_temperature=LMAX,
        ell_max_polarization=LMAX,
    )
    path = folder / "small.toml"
    experiment.to_toml(path)
    sky = lensrec.simulate_sky(experiment, nside=NSIDE, lmax=LMAX, lmax_margin=64, seed=12, nthreads=2)
    maps = folder / "maps.fits"
    write_maps(maps, sky.maps)
    mask = folder / "mask.fits"
    write_maps(mask, lensrec.cap_mask(NSIDE, 0.0, 40.0, 70.0, width=10.0))
    return {"experiment": str(path), "maps": str(maps), "mask": str(mask), "sky": sky}


def arguments(inputs, out, *extra):
    return [
        "reconstruct",
        "--experiment",
        inputs["experiment"],
        "--maps",
        inputs["maps"],
        "--estimator",
        "EB",
        "--lmax-L",
        "100",
        "--out",
        str(out),
        "--nthreads",
        "2",
        *extra,
    ]


def test_reconstruct_writes_estimates_n0_and_provenance(inputs, tmp_path, capsys):
    out = tmp_path / "rec"
    assert main(arguments(inputs, out)) == 0
    phi = read_alm(out / "phi_alm.fits")
    curl = read_alm(out / "curl_alm.fits")
    assert phi.shape == curl.shape == (lensrec.harmonics.nalm(100),)
    # the files hold what the library computes for the same inputs (read back through FITS: double precision)
    maps = lensrec.io.read_maps(inputs["maps"])
    library = lensrec.reconstruct(maps, inputs["experiment"], estimator="EB", lmax_L=100, nthreads=2)
    assert np.allclose(phi, library.phi_alm, rtol=1e-12, atol=0)
    assert np.allclose(curl, library.curl_alm, rtol=1e-12, atol=0)

    document = json.loads((out / "n0.json").read_text())
    forecast, _ = forecast_document(lensrec.load_experiment(inputs["experiment"]), estimators="EB", lmax_L=100)
    assert set(document) == set(forecast) | {"provenance"}  # the forecast command's layout
    assert document["L"] == forecast["L"] == list(range(101))
    assert document["n0"]["EB"]["gradient"][0] is None  # NaN below L = 2 is written as null (docs/conventions.md)
    assert np.allclose(document["n0"]["EB"]["gradient"][2:], forecast["n0"]["EB"]["gradient"][2:], rtol=1e-12)
    assert np.allclose(document["n0"]["EB"]["curl"][2:], forecast["n0"]["EB"]["curl"][2:], rtol=1e-12)
    assert document["snr"]["EB"] == pytest.approx(forecast["snr"]["EB"], rel=1e-12)

    record = json.loads((out / "run.json").read_text())
    assert record["command"] == "reconstruct" and record["experiment"]["name"] == "Small CLI Survey"
    assert record["settings"]["estimator"] == "EB" and record["settings"]["transforms"]["total"] == 7
    assert record["inputs"]["maps_sha256"] and record["inputs"]["mask"] is None
    assert record["git_commit"] is None or len(record["git_commit"]) == 40
    assert {"inputs", "reconstruction", "writing"} <= set(record["timings_seconds"])
    assert "wrote" in capsys.readouterr().out
    assert main(["inspect", str(out)]) == 0
    assert "reconstruct" in capsys.readouterr().out


def test_existing_outputs_are_refused_before_any_work_and_replaced_with_force(inputs, tmp_path, capsys):
    out = tmp_path / "rec"
    os.makedirs(out)
    (out / "n0.json").write_text("precious")
    assert main(arguments(inputs, out)) == 2
    assert "n0.json" in capsys.readouterr().err
    assert not (out / "phi_alm.fits").exists()  # nothing was computed or written
    assert (out / "n0.json").read_text() == "precious"
    assert main(arguments(inputs, out, "--force")) == 0
    assert json.loads((out / "n0.json").read_text())["L"][-1] == 100


def test_mask_option_is_recorded(inputs, tmp_path):
    out = tmp_path / "masked"
    assert main(arguments(inputs, out, "--mask", inputs["mask"], "--filter", "isotropic")) == 0
    record = json.loads((out / "run.json").read_text())
    assert record["inputs"]["mask_sha256"] and 0 < record["mask_moments"]["w2"] < 1


def test_bad_input_exits_2_with_one_line(inputs, tmp_path, capsys):
    small_mask = tmp_path / "mask32.fits"
    write_maps(small_mask, np.ones(12 * 32**2))
    one_map = tmp_path / "t_only.fits"
    write_maps(one_map, inputs["sky"].maps[0])
    cases = [
        (["--estimator", "EBB"], "did you mean 'EB'"),
        (["--lmax-L", "400"], "lmax_L=400 exceeds the CMB band limit lmax=128"),
        (["--mask", str(small_mask)], "nside 32"),
        (["--maps", str(tmp_path / "missing.fits")], "does not exist"),
        (["--maps", str(one_map)], "three maps"),
        (["--lmax", "300"], "exceeds 3*nside-1"),
        (["--experiment", "no_such_survey"], "no experiment file or shipped experiment"),
    ]
    for extra, message in cases:
        argv = arguments(inputs, tmp_path / "x")
        for flag, value in zip(extra[::2], extra[1::2], strict=True):
            if flag in argv:
                argv[argv.index(flag) + 1] = value
            else:
                argv += [flag, value]
        assert main(argv) == 2, extra
        err = capsys.readouterr().err.strip()
        assert message in err and len(err.splitlines()) == 1, (extra, err)
    assert not (tmp_path / "x" / "phi_alm.fits").exists()


@pytest.fixture(scope="module")
def iterated(inputs, tmp_path_factory):
    out = tmp_path_factory.mktemp("iterated") / "rec"
    assert main(arguments(inputs, out, "--lensing-iterations", "1")) == 0
    return out


def test_reconstruct_with_lensing_iterations(inputs, iterated, tmp_path, capsys):
    out = iterated
    run = json.loads((out / "run.json").read_text())
    steps = run["settings"]["n0_per_iteration"]
    assert run["settings"]["lensing_iterations"] == 1 and len(steps) == 2
    n0 = json.loads((out / "n0.json").read_text())
    # n0.json keeps the layout of 'lensrec forecast' and holds the last step's noise
    assert list(n0["n0"]) == ["EB"] and n0["n0"]["EB"]["gradient"][2:] == steps[-1]["gradient"][2:]
    phi = read_alm(str(out / "phi_alm.fits"))
    assert phi.size == lensrec.harmonics.nalm(100) and np.all(np.isfinite(phi))
    # bad input names the value, before any work
    assert main(arguments(inputs, tmp_path / "bad", "--lensing-iterations", "-2")) == 2
    assert "got -2" in capsys.readouterr().err
    bad = arguments(inputs, tmp_path / "bad", "--lensing-iterations", "1")
    bad[bad.index("EB")] = "TE"
    assert main(bad) == 2
    assert "estimator 'TE' has none" in capsys.readouterr().err
    assert main(arguments(inputs, tmp_path / "bad", "--lensing-iterations", "1", "--mask", inputs["mask"])) == 2
    assert "full sky" in capsys.readouterr().err
    assert not (tmp_path / "bad").exists()


def test_delens_accepts_the_iterated_reconstruction(inputs, iterated, tmp_path, capsys):
    # n0.json of an iterated run keeps the layout 'lensrec delens' reads (the last step's N0 Wiener-filters phi)
    rec = iterated
    out = tmp_path / "delensed"
    args = ["delens", "--experiment", inputs["experiment"], "--maps", inputs["maps"]]
    assert main(args + ["--phi", str(rec / "phi_alm.fits"), "--out", str(out), "--nthreads", "2"]) == 0
    spectra = json.loads((out / "spectra.json").read_text())
    assert np.isfinite(spectra["alens_residual"])
    assert "delensing bias" in capsys.readouterr().out.lower()  # EB reuses the B modes it delenses
