"""What the subcommands share: the options every command spells the same way, and the input-error type.

A command module imports these from here (never from :mod:`lensrec.cli`, which imports the commands).
"""

from __future__ import annotations

import argparse

__all__ = ["InputError", "add_common", "add_map_reading", "map_reading_options"]


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


def add_map_reading(parser: argparse.ArgumentParser) -> None:
    """Options that settle what a map file's header cannot (see :func:`lensrec.io.read_maps`)."""
    parser.add_argument(
        "--map-unit",
        default=None,
        help="unit of the sky maps when their header has no TUNIT or a wrong one: K, mK or uK (default: the header)",
    )
    parser.add_argument(
        "--map-ordering",
        choices=("RING", "NESTED"),
        default=None,
        help="pixel ordering of the sky maps when their header has no ORDERING (default: the header)",
    )
    parser.add_argument(
        "--polarization-convention",
        choices=("COSMO", "IAU"),
        default=None,
        help="Q/U convention of the sky maps, overriding POLCCONV (default: the header; COSMO, HEALPix's "
        "convention, when absent); IAU maps have U of opposite sign and are converted",
    )


def map_reading_options(args) -> dict:
    """The keyword arguments of :func:`lensrec.io.read_maps` given by :func:`add_map_reading`'s options."""
    return {
        "unit": getattr(args, "map_unit", None),
        "ordering": getattr(args, "map_ordering", None),
        "polarization_convention": getattr(args, "polarization_convention", None),
    }
