"""The ``lensrec lab`` command: JupyterLab on loopback only, with the workbench notebook open."""

import json
import os
import re
import subprocess
import sys
import time
import urllib.request

import pytest

from lensrec.cli import main
from lensrec.commands.lab import WORKBENCH_NOTEBOOK, lab_command, working_copy


class socket_port:
    """A free TCP port on 127.0.0.1 (bound and released)."""

    def __enter__(self):
        import socket

        self._sock = socket.socket()
        self._sock.bind(("127.0.0.1", 0))
        return self._sock.getsockname()[1]

    def __exit__(self, *exc):
        self._sock.close()


def test_lab_serves_the_workbench_on_loopback_only():
    command, folder = lab_command()
    assert command[:3] == [sys.executable, "-m", "jupyterlab"]
    assert "--ServerApp.ip=127.0.0.1" in command
    assert os.path.isfile(WORKBENCH_NOTEBOOK)
    assert "--LabApp.default_url=/lab/tree/workbench.ipynb" in command
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


def test_lab_dry_run_prints_the_command(capsys, tmp_path):
    folder = tmp_path / "work"
    assert main(["lab", "--dry-run", "--port", "8877", "--folder", str(folder)]) == 0
    out = capsys.readouterr().out
    assert "jupyterlab" in out and "--ServerApp.port=8877" in out and "127.0.0.1" in out
    # the working folder is served, not the source tree, and a dry run copies nothing
    assert f"--ServerApp.root_dir={folder}" in out and "first copies" in out
    assert not folder.exists()


def test_lab_works_on_a_copy_and_never_overwrites_it(tmp_path):
    folder = tmp_path / "work"
    path, created = working_copy(str(folder))
    assert created and path == str(folder / "workbench.ipynb")
    with open(WORKBENCH_NOTEBOOK, "rb") as handle:
        assert (folder / "workbench.ipynb").read_bytes() == handle.read()
    (folder / "workbench.ipynb").write_text('{"edited": true}')  # the user's own edits
    again, created = working_copy(str(folder))
    assert again == path and not created
    assert (folder / "workbench.ipynb").read_text() == '{"edited": true}'


def test_lab_refuses_a_file_as_folder_and_both_options(tmp_path, capsys):
    afile = tmp_path / "file"
    afile.write_text("x")
    with pytest.raises(ValueError, match="is not a folder"):
        working_copy(str(afile))
    assert main(["lab", "--dry-run", "--folder", str(tmp_path), "--notebook", WORKBENCH_NOTEBOOK]) == 2
    assert "not both" in capsys.readouterr().err


def test_lab_reports_a_missing_notebook(capsys):
    assert main(["lab", "--notebook", "/no/such/file.ipynb", "--dry-run"]) == 2
    assert "does not exist" in capsys.readouterr().err


def test_lab_starts_jupyterlab_with_the_workbench_open(tmp_path):
    notebooks = os.path.dirname(WORKBENCH_NOTEBOOK)
    before = sorted(os.listdir(notebooks))
    folder = tmp_path / "work"
    with socket_port() as port:
        pass
    env = dict(os.environ, JUPYTER_CONFIG_DIR=str(tmp_path / "config"), JUPYTER_RUNTIME_DIR=str(tmp_path / "run"),
               JUPYTERLAB_WORKSPACES_DIR=str(tmp_path / "ws"), IPYTHONDIR=str(tmp_path / "ipython"))  # fmt: skip
    log = tmp_path / "lab.log"
    with open(log, "wb") as out:
        process = subprocess.Popen([sys.executable, "-m", "lensrec.cli", "lab", "--no-browser", "--port", str(port),
                                    "--folder", str(folder)], stdout=out, stderr=subprocess.STDOUT,
                                   stdin=subprocess.DEVNULL, env=env)  # fmt: skip
        try:
            url = None
            deadline = time.monotonic() + 90
            while url is None and time.monotonic() < deadline and process.poll() is None:
                found = re.search(rf"http://127\.0\.0\.1:{port}/lab/tree/workbench\.ipynb\?token=\w+", log.read_text())
                url = found.group(0) if found else None
                time.sleep(0.5)
            assert url, f"no workbench URL printed:\n{log.read_text()[-3000:]}"
            opener = urllib.request.build_opener(urllib.request.ProxyHandler({}))
            with opener.open(url, timeout=10) as response:
                assert response.status == 200
            token = url.rsplit("=", 1)[1]
            status = opener.open(urllib.request.Request(f"http://127.0.0.1:{port}/api/status",
                                                        headers={"Authorization": f"token {token}"}), timeout=10)  # fmt: skip
            assert "started" in json.loads(status.read())
        finally:
            process.terminate()  # the command became the JupyterLab process, so this stops the server
            process.wait(30)
    assert (folder / "workbench.ipynb").is_file()  # served from the user's copy ...
    assert sorted(os.listdir(notebooks)) == before  # ... and nothing was added beside the tracked notebook
