"""What the subcommands share: the options every command spells the same way, and the input-error type.

A command module imports these from here (never from :mod:`lensrec.cli`, which imports the commands).
"""

from __future__ import annotations

import argparse

__all__ = [
    "InputError",
    "add_common",
    "add_deprecated_option",
    "add_map_reading",
    "map_reading_options",
    "add_noise_model",
    "load_noise_model",
    "add_filter_options",
    "cg_progress",
    "default_lmax",
]


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


def add_noise_model(parser: argparse.ArgumentParser) -> None:
    """--noise-map / --hits: a per-pixel noise model (lensrec.PixelNoise) instead of uniform noise."""
    group = parser.add_mutually_exclusive_group()
    group.add_argument(
        "--noise-map",
        default=None,
        help="HEALPix FITS noise-variance map (uK^2 per pixel, T or T, Q, U columns, same nside as the maps)",
    )
    group.add_argument(
        "--hits",
        default=None,
        help="HEALPix FITS hit-count map: noise variance ~ 1/hits, scaled so that the experiment's noise level "
        "is the inverse-variance depth of the observed region",
    )


def load_noise_model(args, experiment, nside: int):
    """The :class:`lensrec.PixelNoise` of --noise-map or --hits, within --mask (None without either map)."""
    from ..pixel_noise import PixelNoise

    if getattr(args, "noise_map", None) is None and getattr(args, "hits", None) is None:
        return None
    return PixelNoise.from_files(
        experiment, noise_map=args.noise_map, hits=args.hits, mask=getattr(args, "mask", None), nside=nside
    )


def add_filter_options(parser: argparse.ArgumentParser) -> None:
    """--filter and the conjugate-gradient settings of the optimal filter."""
    from ..optimal_filter import DEFAULT_CG_MAX_ITERATIONS, DEFAULT_CG_TOLERANCE

    parser.add_argument(
        "--filter",
        choices=("isotropic", "optimal", "auto"),
        default="auto",
        help="map filter: isotropic harmonic, optimal (conjugate gradient), or auto = optimal when there is a "
        "--mask or a noise map (default: %(default)s)",
    )
    parser.add_argument(
        "--cg-tolerance",
        type=float,
        default=DEFAULT_CG_TOLERANCE,
        help="relative residual at which the optimal filter stops (default: %(default)s)",
    )
    parser.add_argument(
        "--cg-max-iterations",
        type=int,
        default=DEFAULT_CG_MAX_ITERATIONS,
        help="the optimal filter fails with an error beyond this many iterations (default: %(default)s)",
    )


def cg_progress(description: str = "optimal filter"):
    """A tqdm progress bar on stderr for the conjugate-gradient iterations; returns (callback, close)."""
    from tqdm import tqdm

    bars = []  # made at the first iteration, so a run that never iterates prints nothing

    def callback(iteration, residual):
        if not bars:
            bars.append(tqdm(desc=description, unit="it", leave=False, dynamic_ncols=True, disable=None))
        bars[0].update(1)
        bars[0].set_postfix_str(f"residual {residual:.2e}", refresh=False)

    def close():
        for bar in bars:
            bar.close()

    return callback, close


def default_lmax(experiment, nside: int) -> int:
    """The CMB band limit the maps support: the lesser of the experiment's largest ell_max and 2*nside.

    2*nside is where HEALPix analysis keeps the filter's response within a percent (lensrec.filtering).
    """
    return min(max(experiment.ell_max_temperature, experiment.ell_max_polarization), 2 * nside)


class _DeprecatedOption(argparse.Action):
    """Store the value under the new option's destination and warn that the old spelling is deprecated."""

    def __init__(self, option_strings, dest, new_option: str = "", **kwargs):
        self.new_option = new_option
        super().__init__(option_strings, dest, **kwargs)

    def __call__(self, parser, namespace, values, option_string=None):
        import sys
        import warnings

        from .._deprecation import REMOVAL

        message = f"{option_string} is deprecated and will be removed in lensrec {REMOVAL}; use {self.new_option}"
        print(f"{parser.prog}: warning: {message}", file=sys.stderr)
        warnings.warn(message, DeprecationWarning, stacklevel=2)
        setattr(namespace, self.dest, values)


def add_weights_option(parser: argparse.ArgumentParser, default: str | None = None) -> None:
    """``--weights {lensed,unlensed,gradient}``, and the deprecated ``--unlensed-weights`` (= unlensed)."""
    from ..gradient_spectra import DEFAULT_WEIGHTS, WEIGHTS

    default = DEFAULT_WEIGHTS if default is None else default
    parser.add_argument(
        "--weights",
        choices=WEIGHTS,
        default=default,
        help="CMB spectra in the estimator weights and response: lensed, unlensed, or the lensed-gradient "
        "spectra of Lewis, Challinor & Hanson 2011 (the filters always use lensed C + N; default: %(default)s)",
    )
    parser.add_argument(
        "--unlensed-weights",
        dest="weights",
        action=_DeprecatedFlag,
        const="unlensed",
        nargs=0,
        new_option="--weights unlensed",
        help=argparse.SUPPRESS,
    )


class _DeprecatedFlag(_DeprecatedOption):
    """A flag without value that stores ``const`` and warns that ``new_option`` replaces it."""

    def __init__(self, option_strings, dest, new_option: str = "", const=None, nargs=0, **kwargs):
        super().__init__(option_strings, dest, new_option=new_option, nargs=0, const=const, **kwargs)

    def __call__(self, parser, namespace, values, option_string=None):
        super().__call__(parser, namespace, self.const, option_string)


def add_deprecated_option(parser: argparse.ArgumentParser, old: str, new: str, dest: str, **kwargs) -> None:
    """Accept the old option spelling ``old`` for ``new`` (hidden from --help; warns when used)."""
    parser.add_argument(old, dest=dest, action=_DeprecatedOption, new_option=new, help=argparse.SUPPRESS, **kwargs)
