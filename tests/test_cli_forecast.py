"""``lensrec forecast``: JSON shape, nulls below L = 2, overwrite protection, bad input (exit codes 0/2)."""

import json

import numpy as np

import lensrec
from lensrec.cli import main


def small_experiment(tmp_path):
    path = tmp_path / "small.toml"
    lensrec.Experiment(
        name="Small Test Survey",
        noise_temperature=2.0,
        beam_fwhm=2.0,
        ell_max_temperature=400,
        ell_max_polarization=500,
    ).to_toml(path)
    return str(path)


def test_forecast_writes_the_documented_json(tmp_path, capsys):
    out = tmp_path / "n0.json"
    code = main(
        [
            "forecast",
            "--experiment",
            small_experiment(tmp_path),
            "--lmax-L",
            "300",
            "--out",
            str(out),
            "--nthreads",
            "2",
        ]
    )
    assert code == 0
    document = json.loads(out.read_text())
    assert set(document) == {"L", "n0", "snr", "provenance"}
    assert document["L"] == list(range(301))
    assert list(document["n0"]) == list(lensrec.labels.ESTIMATORS)
    for label, parts in document["n0"].items():
        assert set(parts) == {"gradient", "curl"}
        for values in parts.values():
            assert len(values) == 301
            assert values[0] is None and values[1] is None  # undefined below L = 2 (docs/conventions.md)
            assert all(isinstance(v, float) and v > 0 for v in values[2:])
        assert document["snr"][label] > 0
    assert document["provenance"]["command"] == "forecast"
    assert document["provenance"]["experiment"]["name"] == "Small Test Survey"
    # the file holds what the library computes for the same inputs
    result = lensrec.reconstruction_noise(lensrec.load_experiment(str(tmp_path / "small.toml")), lmax_L=300)
    assert np.allclose(document["n0"]["EB"]["gradient"][2:], result.n0["EB"]["gradient"][2:], rtol=1e-12)
    printed = capsys.readouterr().out
    assert "MV" in printed and "S/N" in printed and str(out) in printed


def test_forecast_subset_of_estimators(tmp_path):
    out = tmp_path / "n0.json"
    assert (
        main(
            [
                "forecast",
                "--experiment",
                small_experiment(tmp_path),
                "--estimators",
                "TT,EB,MV",
                "--lmax-L",
                "200",
                "--out",
                str(out),
            ]
        )
        == 0
    )
    document = json.loads(out.read_text())
    assert list(document["n0"]) == ["TT", "EB", "MV"] and list(document["snr"]) == ["TT", "EB", "MV"]


def test_forecast_refuses_to_overwrite_without_force(tmp_path, capsys):
    out = tmp_path / "n0.json"
    out.write_text("precious")
    args = ["forecast", "--experiment", small_experiment(tmp_path), "--lmax-L", "100", "--out", str(out)]
    assert main(args) == 2
    assert "already exists" in capsys.readouterr().err
    assert out.read_text() == "precious"
    assert main(args + ["--force"]) == 0
    assert json.loads(out.read_text())["L"][-1] == 100


def test_forecast_bad_input_exits_2_with_a_message(tmp_path, capsys):
    experiment = small_experiment(tmp_path)
    out = tmp_path / "n0.json"
    assert main(["forecast", "--experiment", experiment, "--estimators", "TT,EBB", "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert "unknown estimator 'EBB'" in err and "did you mean 'EB'" in err
    assert main(["forecast", "--experiment", experiment, "--lmax-L", "900", "--out", str(out)]) == 2
    assert "exceeds the CMB l_max=500" in capsys.readouterr().err
    assert main(["forecast", "--experiment", "no_such_survey", "--out", str(out)]) == 2
    assert "no experiment file or shipped experiment" in capsys.readouterr().err
    assert not out.exists()


def test_forecast_with_a_tracer_reports_each_input_and_their_combination(tmp_path, capsys):
    # Sherwin & Schmittfull 2015, PRD 92, 043005: the optimal combination correlates at least as well with phi
    # as its best input, so it delenses at least as well (a forecast statement).
    out = tmp_path / "fc.json"
    args = ["forecast", "--experiment", "deep_highland", "--lmax-L", "400", "--estimators", "EE,MV"]
    assert main(args + ["--tracer", "glow_and_motes", "--out", str(out)]) == 0
    block = json.loads(out.read_text())["tracers"]
    assert block["inputs"] == ["diffuse_glow", "scattered_motes", "internal"]
    alens = {name: item["alens_residual"] for name, item in block["delensing"].items()}
    assert alens["combined"] <= min(alens[name] for name in block["inputs"])
    for item in block["delensing"].values():
        assert item["sigma_r_delensed_marginalized"] >= item["sigma_r_delensed"]
    assert np.all(np.array(block["rho"]["combined"][2:]) >= np.array(block["rho"]["diffuse_glow"][2:]) - 1e-12)
    assert "combined" in capsys.readouterr().out
    assert main(args + ["--tracer", str(tmp_path / "none.toml"), "--out", str(out), "--force"]) == 2
    assert "not found; shipped tracers" in capsys.readouterr().err


def deep_experiment(tmp_path):
    path = tmp_path / "deep.toml"
    lensrec.Experiment(
        name="Deep Test Patch",
        noise_temperature=0.7,
        noise_polarization=1.0,
        beam_fwhm=1.0,
        ell_max_temperature=1500,
        ell_max_polarization=1500,
    ).to_toml(path)
    return str(path)


def test_forecast_iterative_adds_the_converged_noise_and_its_delensing(tmp_path, capsys):
    # At 1 µK-arcmin the iterated EB noise lies below the quadratic one and delensing with it leaves less
    # lensing B (Smith et al. 2012, JCAP 06, 014; Seljak & Hirata 2004, PRD 69, 043005).
    out = tmp_path / "fc.json"
    args = ["forecast", "--experiment", deep_experiment(tmp_path), "--lmax-L", "500", "--estimators", "EB,MV"]
    assert main(args + ["--iterative", "--delensing", "--out", str(out), "--nthreads", "2"]) == 0
    document = json.loads(out.read_text())
    block = document["iterative"]
    assert set(block["n0"]) == {"EB", "MV"}
    for label, parts in block["n0"].items():
        assert set(parts) == set(document["n0"][label])  # same layout as the top-level n0
        assert len(parts["gradient"]) == len(document["L"]) and parts["gradient"][:2] == [None, None]
        iterative, quadratic = np.array(parts["gradient"][2:]), np.array(document["n0"][label]["gradient"][2:])
        assert np.all(iterative < quadratic)
        steps = block["lensing_iterations"][label]
        assert steps >= 1 and len(block["n0_per_iteration"][label]) == steps + 1
        assert block["n0_per_iteration"][label][0]["gradient"][2:] == document["n0"][label]["gradient"][2:]
    assert block["n0_estimator"] == "MV"
    assert 0.0 < block["alens_residual"] < document["delensing"]["alens_residual"] < 1.0
    assert block["sigma_r_delensed"] < document["delensing"]["sigma_r_delensed"]
    assert len(block["residual_bb"]) == len(document["delensing"]["residual_bb"])
    assert "iterative estimator" in capsys.readouterr().out
    # no estimator with an iterative form: a clear refusal naming the ones that have one
    assert main(args[:-1] + ["TT,EE", "--iterative", "--out", str(out), "--force"]) == 2
    assert "--iterative forecasts EB, MV" in capsys.readouterr().err


def test_forecast_n1_has_the_layout_of_n0(tmp_path, capsys):
    out = tmp_path / "n1.json"
    experiment = small_experiment(tmp_path)
    args = ["forecast", "--experiment", experiment, "--estimators", "TT,EB", "--lmax-L", "300", "--n1"]
    assert main([*args, "--out", str(out), "--nthreads", "1"]) == 0
    document = json.loads(out.read_text())
    assert list(document["n1"]) == list(document["n0"]) == ["TT", "EB"]
    for parts in document["n1"].values():
        assert set(parts) == {"gradient", "curl"}
        for values in parts.values():
            assert len(values) == 301 and values[0] is None and values[1] is None
            assert all(isinstance(v, float) for v in values[2:])
    assert document["n1_L_grid"][0] == 2 and document["n1_L_grid"][-1] == 300
    # the file holds what the library computes for the same inputs
    library = lensrec.analytic_n1(
        lensrec.load_experiment(experiment), estimators="TT,EB", lmax_L=300, components="gradient", nthreads=1
    )
    np.testing.assert_allclose(document["n1"]["EB"]["gradient"][2:], library.n1["EB"]["gradient"][2:], rtol=1e-10)
    assert "analytic N1 / N0" in capsys.readouterr().out
