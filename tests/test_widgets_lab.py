"""The ``lensrec lab`` command: JupyterLab on loopback only, with the workbench notebook open."""

import os
import sys

import pytest

from lensrec.cli import main
from lensrec.commands.lab import WORKBENCH_NOTEBOOK, lab_command


def test_lab_serves_the_workbench_on_loopback_only():
    command, folder = lab_command()
    assert command[:3] == [sys.executable, "-m", "jupyterlab"]
    assert "--ServerApp.ip=127.0.0.1" in command
    assert command[-1] == WORKBENCH_NOTEBOOK and os.path.isfile(command[-1])
    assert folder == os.path.dirname(WORKBENCH_NOTEBOOK)
    assert f"--ServerApp.root_dir={folder}" in command
    assert ("--allow-root" in command) == (os.geteuid() == 0)


def test_lab_options(tmp_path):
    notebook = tmp_path / "mine.ipynb"
    notebook.write_text("{}")
    command, folder = lab_command(str(notebook), port=8899, open_browser=False)
    assert "--ServerApp.port=8899" in command and "--ServerApp.open_browser=False" in command
    assert folder == str(tmp_path)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"notebook": "/no/such/file.ipynb"}, "does not exist"),
        ({"port": 0}, "between 1 and 65535, got 0"),
        ({"port": 70000}, "between 1 and 65535, got 70000"),
    ],
)
def test_lab_refuses_bad_input(kwargs, message):
    with pytest.raises(ValueError, match=message):
        lab_command(**kwargs)


def test_lab_dry_run_prints_the_command(capsys):
    assert main(["lab", "--dry-run", "--port", "8877"]) == 0
    out = capsys.readouterr().out
    assert "jupyterlab" in out and "--ServerApp.port=8877" in out and "127.0.0.1" in out


def test_lab_reports_a_missing_notebook(capsys):
    assert main(["lab", "--notebook", "/no/such/file.ipynb", "--dry-run"]) == 2
    assert "does not exist" in capsys.readouterr().err
