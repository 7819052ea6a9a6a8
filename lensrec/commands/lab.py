"""``lensrec lab``: start JupyterLab on 127.0.0.1 with your own copy of the workbench notebook open.

The notebook shipped in ``notebooks/workbench.ipynb`` is a template and is never opened itself: JupyterLab
saves notebooks (outputs included) and writes ``.ipynb_checkpoints`` beside them, which would change the
source tree. ``lensrec lab`` copies it once into a working folder (default ``~/lensrec-workbench``, or
``--folder``), serves that folder, and leaves an existing copy as it is, so your own edits persist.
"""

from __future__ import annotations

import os
import shlex
import sys
import urllib.parse

HELP = "start JupyterLab on 127.0.0.1 (this machine only) with your copy of the workbench notebook open"
EXAMPLES = """examples:
  lensrec lab                          # copies the workbench notebook to ~/lensrec-workbench once and opens it
  lensrec lab --folder ~/survey-study  # keep the copy (and what you save) in another working folder
  lensrec lab --port 8890 --no-browser # print the URL (with its token) instead of opening a browser
  lensrec lab --notebook my_copy.ipynb # open a notebook of your own where it is"""

WORKBENCH_NOTEBOOK = os.path.join(
    os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))), "notebooks", "workbench.ipynb"
)
DEFAULT_FOLDER = os.path.join("~", "lensrec-workbench")


def add_arguments(parser) -> None:
    parser.add_argument(
        "--folder",
        default=None,
        help=f"working folder for your copy of the workbench notebook (default: {DEFAULT_FOLDER})",
    )
    parser.add_argument("--notebook", default=None, help="open this notebook of your own instead (served where it is)")
    parser.add_argument(
        "--port",
        type=int,
        default=8888,
        help="port on 127.0.0.1 (default: %(default)s; the next free one is used if taken)",
    )
    parser.add_argument("--no-browser", action="store_true", help="do not open a web browser; print the URL")
    parser.add_argument("--dry-run", action="store_true", help="print the JupyterLab command and exit")


def working_copy(folder: str | None = None) -> tuple[str, bool]:
    """Your copy of the workbench notebook in ``folder`` (default ~/lensrec-workbench), made if missing.

    Returns the path and whether it was created now. An existing copy is never overwritten.

    Raises
    ------
    ValueError
        If this lensrec has no workbench notebook (not a source checkout) or ``folder`` is a file.
    """
    from ..io import atomic_path

    folder = os.path.abspath(os.path.expanduser(folder or DEFAULT_FOLDER))
    if os.path.exists(folder) and not os.path.isdir(folder):
        raise ValueError(f"--folder {folder!r} exists and is not a folder; choose a folder for the workbench copy")
    path = os.path.join(folder, os.path.basename(WORKBENCH_NOTEBOOK))
    if os.path.exists(path):
        return path, False
    if not os.path.isfile(WORKBENCH_NOTEBOOK):
        raise ValueError(
            f"the workbench notebook {WORKBENCH_NOTEBOOK!r} is missing (this lensrec is not a source checkout); "
            "pass --notebook PATH"
        )
    os.makedirs(folder, exist_ok=True)
    with open(WORKBENCH_NOTEBOOK, "rb") as source, atomic_path(path, suffix=".ipynb") as target:
        with open(target, "wb") as handle:
            handle.write(source.read())
    return path, True


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
    return _server_command(folder, name, port, open_browser), folder


def _server_command(folder: str, name: str, port: int, open_browser: bool) -> list[str]:
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
    return command


def run(args) -> int:
    if args.notebook is not None and args.folder is not None:
        raise ValueError(
            "give either --notebook (a notebook of your own) or --folder (where your copy lives), not both"
        )
    open_browser = not args.no_browser
    if args.notebook is not None:
        command, folder = lab_command(args.notebook, args.port, open_browser)
    elif args.dry_run:  # say what would happen, without copying anything
        folder = os.path.abspath(os.path.expanduser(args.folder or DEFAULT_FOLDER))
        name = os.path.basename(WORKBENCH_NOTEBOOK)
        if not os.path.exists(os.path.join(folder, name)):
            print(f"# first copies {WORKBENCH_NOTEBOOK} to {os.path.join(folder, name)}")
        lab_command(None, args.port, open_browser)  # the same checks as a real start
        command = _server_command(folder, name, args.port, open_browser)
    else:
        notebook, created = working_copy(args.folder)
        what = "made your copy of the workbench notebook" if created else "opening your copy of the workbench notebook"
        print(f"lensrec lab: {what}: {notebook}", file=sys.stderr, flush=True)
        command, folder = lab_command(notebook, args.port, open_browser)
    if args.dry_run:
        print(f"cd {shlex.quote(folder)} && {shlex.join(command)}")
        return 0
    print(f"lensrec lab: serving {folder} on 127.0.0.1 (stop with Ctrl-C)", file=sys.stderr, flush=True)
    os.chdir(folder)
    # become the JupyterLab process, so Ctrl-C and termination signals reach the server directly
    os.execv(command[0], command)
    return 1  # not reached
