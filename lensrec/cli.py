"""The ``lensrec`` command line.

Each subcommand lives in its own module ``lensrec/commands/<name>.py`` exposing ``HELP`` (one line),
``EXAMPLES`` (text), ``add_arguments(parser)`` and ``run(args) -> int``. Register it in ``COMMANDS``.

Exit codes: 0 success; 2 usage or input error (one-line message on stderr); 1 internal error.
"""

from __future__ import annotations

import argparse
import importlib
import sys

from .commands.options import InputError, add_common  # noqa: F401  (add_common: kept importable here)
from .io import OutputExistsError

# name -> module under lensrec.commands; the order is the order shown by --help
COMMANDS = {
    "forecast": "forecast",
    "simulate": "simulate",
    "reconstruct": "reconstruct",
    "delens": "delens",
    "suite": "suite",
    "demo": "demo",
    "inspect": "inspect",
    "lab": "lab",
}

EPILOG = """examples:
  lensrec forecast --experiment deep_highland --lmax-L 3000 --out n0.json
  lensrec simulate --experiment deep_highland --nside 512 --lmax 1500 --seed 1 --out sky/
  lensrec demo --out report/

run 'lensrec COMMAND --help' for the options of one command."""


def _load_command(name: str):
    return importlib.import_module(f"lensrec.commands.{COMMANDS[name]}")


def build_parser(available=None) -> argparse.ArgumentParser:
    from ._version import __version__

    parser = argparse.ArgumentParser(
        prog="lensrec",
        description="CMB lensing reconstruction and delensing on simulated HEALPix skies.",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"lensrec {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMANDS if available is None else available:
        try:
            module = _load_command(name)
        except ModuleNotFoundError as exc:
            if exc.name == f"lensrec.commands.{COMMANDS[name]}":
                continue  # not built yet
            raise
        command = sub.add_parser(
            name,
            help=module.HELP,
            description=module.HELP,
            epilog=getattr(module, "EXAMPLES", None),
            formatter_class=argparse.RawDescriptionHelpFormatter,
        )
        module.add_arguments(command)
        command.set_defaults(_run=module.run)
    return parser


def main(argv=None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    available = None
    if argv and argv[0] in COMMANDS:
        available = [argv[0]]  # import only the command being run
    parser = build_parser(available)
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:
        return int(exc.code or 0)
    if not getattr(args, "_run", None):
        parser.print_help()
        return 2
    try:
        return int(args._run(args) or 0)
    except BrokenPipeError:  # output piped into e.g. `head`, which closed early: not an error of ours
        import os

        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0
    except KeyboardInterrupt:
        print("lensrec: interrupted; finished outputs are complete, unfinished ones were not written", file=sys.stderr)
        return 130
    except (OutputExistsError, InputError, ValueError, TypeError, FileNotFoundError) as exc:
        message = " ".join(str(exc).split())
        print(f"lensrec {args.command}: error: {message}", file=sys.stderr)
        return 2
    except Exception as exc:  # an internal error: say so and keep the traceback
        import traceback

        traceback.print_exc()
        print(f"lensrec {args.command}: internal error ({type(exc).__name__}); please report it", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
