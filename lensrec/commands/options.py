"""What the subcommands share: the options every command spells the same way, and the input-error type.

A command module imports these from here (never from :mod:`lensrec.cli`, which imports the commands).
"""

from __future__ import annotations

import argparse

__all__ = ["InputError", "add_common"]


class InputError(ValueError):
    """A user-input problem detected by a command (exit code 2)."""


def add_common(parser: argparse.ArgumentParser, experiment=True, out=True, seed=False) -> None:
    """The options every command spells the same way."""
    if experiment:
        parser.add_argument(
            "--experiment", default="deep_highland", help="experiment TOML file or shipped name (default: %(default)s)"
        )
    if out:
        parser.add_argument("--out", required=True, help="output file or folder")
        parser.add_argument("--force", action="store_true", help="overwrite existing outputs")
    if seed:
        parser.add_argument("--seed", type=int, default=0, help="random seed (default: %(default)s)")
    parser.add_argument(
        "--nthreads", type=int, default=None, help="threads for transforms (default: LENSREC_NTHREADS or all cores)"
    )
