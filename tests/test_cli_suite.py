"""``lensrec suite run`` and ``lensrec suite report`` at a tiny size: outputs, resuming, --force, exit codes,
provenance."""

import json
import os

import numpy as np
import pytest

from lensrec.cli import main

RUN = [
    "suite",
    "run",
    "--experiment",
    "deep_highland",
    "--nside",
    "32",
    "--lmax",
    "64",
    "--lmax-L",
    "48",
    "--estimators",
    "EB",
    "--n-sims",
    "4",
    "--seed",
    "3",
    "--lmax-margin",
    "32",
    "--n1",
    "--quiet",
]


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    folder = tmp_path_factory.mktemp("cli") / "suite"
    assert main(RUN + ["--out", str(folder)]) == 0
    return folder


def test_run_then_report_writes_bandpowers_budget_and_provenance(finished, tmp_path, capsys):
    report = tmp_path / "report"
    capsys.readouterr()
    assert main(["suite", "report", str(finished), "--out", str(report), "--n-bins", "4"]) == 0
    out = capsys.readouterr().out
    assert "A_lens =" in out and "chi2 to zero" in out
    names = sorted(os.listdir(report))
    for component in ("gradient", "curl"):
        for ext in ("json", "txt", "png"):
            assert f"bias_budget_EB_{component}.{ext}" in names
    summary = json.loads((report / "bandpowers.json").read_text())
    gradient = summary["estimators"]["EB"]["gradient"]
    assert len(gradient["debiased"]) == 4 and np.isfinite(gradient["amplitude"])
    assert gradient["n1_computed"] and len(gradient["covariance"]) == 4
    table = (report / "bias_budget_EB_gradient.txt").read_text()
    assert "RDN0" in table and "A_lens" in table
    with open(report / "bias_budget_EB_gradient.png", "rb") as handle:
        assert handle.read(8) == b"\x89PNG\r\n\x1a\n"
    # provenance of the suite and of the report, through `lensrec inspect`
    assert main(["inspect", str(finished)]) == 0
    inspected = capsys.readouterr().out
    assert "suite run" in inspected and "lensrec_version" in inspected
    assert main(["inspect", str(report)]) == 0
    assert "suite report" in capsys.readouterr().out
    record = json.loads((report / "run.json").read_text())
    assert record["suite_settings"]["seed"] == 3 and "numpy" in record["libraries"]


def test_run_resumes_refuses_other_settings_and_force_starts_afresh(finished, tmp_path, capsys):
    import shutil

    folder = tmp_path / "suite"
    shutil.copytree(finished, folder)
    capsys.readouterr()
    assert main(RUN + ["--out", str(folder)]) == 0  # the same suite: nothing to do
    assert "simulations: 0 computed, 4 reused" in capsys.readouterr().out
    other = [arg if arg != "3" else "4" for arg in RUN]  # another seed
    assert main(other + ["--out", str(folder)]) == 2
    err = capsys.readouterr().err
    assert "other settings" in err and "seed" in err
    assert main(other + ["--out", str(folder), "--force"]) == 0
    assert "simulations: 4 computed, 0 reused" in capsys.readouterr().out
    settings = json.loads((folder / "suite.json").read_text())["settings"]
    assert settings["seed"] == 4


def test_report_refuses_to_overwrite_without_force(finished, tmp_path, capsys):
    report = tmp_path / "report"
    assert main(["suite", "report", str(finished), "--out", str(report), "--n-bins", "3"]) == 0
    before = (report / "bandpowers.json").read_text()
    capsys.readouterr()
    assert main(["suite", "report", str(finished), "--out", str(report), "--n-bins", "4"]) == 2
    assert "already exists" in capsys.readouterr().err
    assert (report / "bandpowers.json").read_text() == before  # untouched
    assert main(["suite", "report", str(finished), "--out", str(report), "--n-bins", "4", "--force"]) == 0
    assert len(json.loads((report / "bandpowers.json").read_text())["estimators"]["EB"]["gradient"]["L_eff"]) == 4


@pytest.mark.parametrize(
    "arguments, message",
    [
        (["--nside", "33"], "power of two"),
        (["--n-sims", "2"], "n_sims must be >= 4"),
        (["--estimators", "EB,QQ"], "unknown estimator 'QQ'"),
        (["--lmax-L", "500"], "lmax_L=500 exceeds"),
        (["--scheduler", "tcp://127.0.0.1:1", "--executor", "processes"], "needs --executor dask"),
        (["--experiment", "no_such_survey"], "no_such_survey"),
    ],
)
def test_bad_input_exits_2_with_a_message(tmp_path, capsys, arguments, message):
    argv = list(RUN)
    for flag, value in zip(arguments[0::2], arguments[1::2], strict=True):
        if flag in argv:
            argv[argv.index(flag) + 1] = value
        else:
            argv += [flag, value]
    assert main(argv + ["--out", str(tmp_path / "suite")]) == 2
    assert message in capsys.readouterr().err
    assert not (tmp_path / "suite").exists()  # refused before any work


def test_report_of_a_folder_without_a_suite_exits_2(tmp_path, capsys):
    assert main(["suite", "report", str(tmp_path), "--out", str(tmp_path / "r")]) == 2
    assert "holds no lensing suite" in capsys.readouterr().err
    assert main(["suite"]) == 2  # an action is required
