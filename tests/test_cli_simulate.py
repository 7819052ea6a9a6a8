"""``lensrec simulate`` end to end: outputs, refusal to overwrite, provenance, bad input."""

import json
import os

import numpy as np

import lensrec
from lensrec.cli import main
from lensrec.io import read_alm, read_maps, write_maps

ARGS = [
    "simulate",
    "--experiment",
    "deep_highland",
    "--nside",
    "64",
    "--lmax",
    "128",
    "--lmax-margin",
    "100",
    "--seed",
    "3",
    "--nthreads",
    "2",
]


def test_simulate_writes_maps_phi_and_provenance(tmp_path, capsys):
    out = tmp_path / "sky"
    assert main(ARGS + ["--out", str(out)]) == 0
    maps = read_maps(out / "maps.fits")
    assert maps.shape == (3, 12 * 64**2)
    phi = read_alm(out / "phi_input_alm.fits")
    # the files hold exactly the simulation the library makes with the same arguments (same nthreads)
    again = lensrec.simulate_sky("deep_highland", nside=64, lmax=128, lmax_margin=100, seed=3, nthreads=2)
    assert np.allclose(maps, again.maps, rtol=0, atol=1e-12 * np.abs(again.maps).max())
    assert np.array_equal(phi, again.phi_alm)
    record = json.loads((out / "run.json").read_text())
    assert record["seed"] == 3 and record["command"] == "simulate"
    assert record["settings"]["lmax_unlensed"] == 228 and record["experiment"]["name"] == "Deep Highland Patch"
    assert "simulation" in record["timings_seconds"]

    capsys.readouterr()
    assert main(ARGS + ["--out", str(out)]) == 2  # refuses to overwrite
    assert "already exists" in capsys.readouterr().err
    assert main(ARGS + ["--out", str(out), "--force", "--no-noise"]) == 0
    assert json.loads((out / "run.json").read_text())["settings"]["noise"] is False

    assert main(["inspect", str(out)]) == 0
    shown = capsys.readouterr().out
    assert "lensrec_version" in shown and "git_commit" in shown and "simulate" in shown


def test_existing_output_is_checked_before_any_work(tmp_path, capsys):
    out = tmp_path / "sky"
    os.makedirs(out)
    (out / "run.json").write_text("{}")
    assert main(ARGS + ["--out", str(out)]) == 2
    assert "run.json" in capsys.readouterr().err
    assert not (out / "maps.fits").exists()  # nothing was written


def test_bad_input_exits_2_with_one_line(tmp_path, capsys):
    cases = [
        (["--nside", "100"], "power of two"),
        (["--lmax", "500"], "exceeds 3*nside-1"),
        (["--experiment", "no_such_survey"], "no experiment file or shipped experiment"),
        (["--mask", str(tmp_path / "missing.fits")], "does not exist"),
    ]
    wrong_nside = tmp_path / "mask32.fits"
    write_maps(wrong_nside, np.ones(12 * 32**2))
    cases.append((["--mask", str(wrong_nside)], "nside 32"))
    for extra, message in cases:
        argv = list(ARGS) + ["--out", str(tmp_path / "x")]
        for flag, value in zip(extra[::2], extra[1::2], strict=True):
            if flag in argv:
                argv[argv.index(flag) + 1] = value
            else:
                argv += [flag, value]
        assert main(argv) == 2, extra
        err = capsys.readouterr().err.strip()
        assert message in err and len(err.splitlines()) == 1, (extra, err)


def test_mask_option_applies_the_mask(tmp_path):
    mask = lensrec.cap_mask(64, 0.0, 45.0, 40.0, width=5.0)
    path = tmp_path / "mask.fits"
    write_maps(path, mask)
    assert main(ARGS + ["--mask", str(path), "--out", str(tmp_path / "masked")]) == 0
    maps = read_maps(tmp_path / "masked" / "maps.fits")
    assert np.all(maps[:, mask == 0] == 0.0)


def test_simulate_writes_tracers_correlated_with_phi(tmp_path):
    out = tmp_path / "sky"
    assert main(ARGS + ["--tracer", "diffuse_glow", "--out", str(out)]) == 0
    phi = read_alm(out / "phi_input_alm.fits")
    tracer = read_alm(out / "tracer_alm.fits")
    record = json.loads((out / "run.json").read_text())
    assert record["settings"]["tracers"]["names"] == ["diffuse_glow"] and "tracer_alm.fits" in record["outputs"]
    shipped = lensrec.load_tracers("diffuse_glow").truncated(228)
    # the same draw as the library's (seed, index) stream
    assert np.array_equal(tracer, lensrec.simulate_tracers(shipped, phi, seed=3)[0])
    # correlated with the simulated phi as given: whitened band correlation over 50 <= L <= 228 within
    # 3 (1 - rho^2)/sqrt(nu) (Fisher 1915, Biometrika 10, 507, the scatter of a correlation coefficient)
    ell = np.arange(50, 229)
    band = slice(50, 229)
    total = (shipped.tracers[0].auto + shipped.tracers[0].noise)[band]
    cross = lensrec.cross_spectrum(tracer, phi)[band] / np.sqrt(total * shipped.phi[band])
    autos = lensrec.auto_spectrum(tracer)[band] / total, lensrec.auto_spectrum(phi)[band] / shipped.phi[band]
    measured = np.sum((2 * ell + 1) * cross) / np.sqrt(
        np.sum((2 * ell + 1) * autos[0]) * np.sum((2 * ell + 1) * autos[1])
    )
    rho = shipped.tracers[0].correlation(shipped.phi)[band]
    given = np.sum((2 * ell + 1) * rho) / np.sum(2 * ell + 1)
    assert abs(measured - given) < 3 * (1 - given**2) / np.sqrt(np.sum(2 * ell + 1))
