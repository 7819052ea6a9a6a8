"""``lensrec lab``: start JupyterLab on 127.0.0.1 with the workbench notebook open."""

from __future__ import annotations

import os
import shlex
import sys
import urllib.parse

HELP = "start JupyterLab on 127.0.0.1 (this machine only) with the workbench notebook open"
EXAMPLES = """examples:
  lensrec lab                          # opens notebooks/workbench.ipynb of this checkout
  lensrec lab --port 8890 --no-browser # print the URL (with its token) instead of opening a browser
  lensrec lab --notebook my_copy.ipynb"""

WORKBENCH_NOTEBOOK = os.path.join(
    os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))), "notebooks", "workbench.ipynb"
)


def add_arguments(parser) -> None:
    parser.add_argument(
        "--notebook", default=None, help="notebook to open (default: notebooks/workbench.ipynb of this checkout)"
    )
    parser.add_argument(
        "--port",
        type=int,
        default=8888,
        help="port on 127.0.0.1 (default: %(default)s; the next free one is used if taken)",
    )
    parser.add_argument("--no-browser", action="store_true", help="do not open a web browser; print the URL")
    parser.add_argument("--dry-run", action="store_true", help="print the JupyterLab command and exit")


def lab_command(notebook: str | None = None, port: int = 8888, open_browser: bool = True) -> tuple[list[str], str]:
    """The JupyterLab command line and working folder that serve ``notebook`` on 127.0.0.1 only.

    Raises
    ------
    ValueError
        If the notebook does not exist or the port is outside 1–65535.
    """
    path = os.path.abspath(os.path.expanduser(notebook or WORKBENCH_NOTEBOOK))
    if not os.path.isfile(path):
        hint = "pass --notebook PATH" if notebook else "this lensrec is not a source checkout; pass --notebook PATH"
        raise ValueError(f"notebook {path!r} does not exist; {hint}")
    if not path.endswith(".ipynb"):
        raise ValueError(f"--notebook must be a .ipynb file, got {path!r}")
    if isinstance(port, bool) or not isinstance(port, int) or not 1 <= port <= 65535:
        raise ValueError(f"--port must be an integer between 1 and 65535, got {port!r}")
    folder, name = os.path.split(path)
    command = [
        sys.executable,
        "-m",
        "jupyterlab",
        "--ServerApp.ip=127.0.0.1",
        f"--ServerApp.port={port}",
        f"--ServerApp.root_dir={folder}",
        f"--ServerApp.open_browser={open_browser}",
        # the printed URL and the browser both open the notebook itself
        f"--LabApp.default_url=/lab/tree/{urllib.parse.quote(name)}",
    ]
    if hasattr(os, "geteuid") and os.geteuid() == 0:
        command.append("--allow-root")
    return command, folder


def run(args) -> int:
    command, folder = lab_command(args.notebook, args.port, open_browser=not args.no_browser)
    if args.dry_run:
        print(f"cd {shlex.quote(folder)} && {shlex.join(command)}")
        return 0
    print(f"lensrec lab: serving {folder} on 127.0.0.1 (stop with Ctrl-C)", file=sys.stderr, flush=True)
    os.chdir(folder)
    # become the JupyterLab process, so Ctrl-C and termination signals reach the server directly
    os.execv(command[0], command)
    return 1  # not reached
