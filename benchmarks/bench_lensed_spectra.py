"""Cost of the full-sky lensed-spectra engine in units of one ducc0 spin-2 HEALPix synthesis.

    python benchmarks/bench_lensed_spectra.py [--quick] [--nthreads N] [--no-synthesis]

Times ``lensed_cmb_spectra`` (all of TT, EE, BB, TE, non-perturbative) and ``first_order_lensed_bb`` at
output lmax 3000 and 6000 with the default ell_margin (2000, so inputs to lmax + 2000), and, in the same run,
one spin-2 synthesis (E, B → Q, U) at nside 2048 / lmax 3000 as the unit of cost. ``--quick`` runs lmax 1000
against nside 512 / lmax 1000. Peak RSS is reported after the engine runs (before the synthesis's maps
exist) and after the synthesis.

The fiducial spectra end at ℓ = 6000; for lmax = 6000 the inputs are extended to ℓ = 8000 by a power law
fitted to ℓ = 5000–6000 (timing only: the numbers computed there are not meant to be accurate).
"""

from __future__ import annotations

import argparse
import os
import sys

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from benchmarks._common import best_time, peak_rss_mb, report  # noqa: E402


def _extended(values, lmax):
    """Extend a positive spectrum beyond its end by a log-log linear fit to its last 1000 multipoles."""
    values = np.asarray(values, dtype=float)
    if values.size > lmax:
        return values[: lmax + 1].copy()
    ell = np.arange(values.size - 1000, values.size)
    tail = np.abs(values[ell]) + 1e-300
    slope, intercept = np.polyfit(np.log(ell), np.log(tail), 1)
    new = np.arange(values.size, lmax + 1)
    sign = np.sign(values[-1]) or 1.0
    return np.concatenate([values, sign * np.exp(intercept + slope * np.log(new))])


def _inputs(lmax_input):
    import lensrec

    spectra = lensrec.fiducial_spectra()
    unlensed = {key: _extended(spectra.unlensed[key], lmax_input) for key in ("TT", "EE", "TE")}
    unlensed["BB"] = np.zeros(lmax_input + 1)
    return unlensed, _extended(spectra.phi, lmax_input)


def _synthesis_seconds(nside, lmax, nthreads):
    """One spin-2 HEALPix synthesis, through lensrec.harmonics when present, else ducc0 directly."""
    try:
        from benchmarks._common import spin2_synthesis_seconds

        return spin2_synthesis_seconds(nside, lmax, nthreads, repeat=2), "lensrec.harmonics"
    except ImportError:
        import ducc0

        rng = np.random.default_rng(0)
        nalm = (lmax + 1) * (lmax + 2) // 2
        alm = rng.normal(size=(2, nalm)) + 1j * rng.normal(size=(2, nalm))
        base = ducc0.healpix.Healpix_Base(nside, "RING").sht_info()

        def run():
            ducc0.sht.synthesis(alm=alm, lmax=lmax, spin=2, nthreads=nthreads, **base)

        return best_time(run, repeat=2), "ducc0.sht.synthesis"


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true", help="lmax 1000 against nside 512 (a smoke run)")
    parser.add_argument("--nthreads", type=int, default=2)
    parser.add_argument("--no-synthesis", action="store_true", help="skip the reference synthesis")
    args = parser.parse_args()

    import lensrec
    from lensrec.lensed_spectra import DEFAULT_ELL_MARGIN

    sizes = (1000,) if args.quick else (3000, 6000)
    nside, lmax_sht = (512, 1000) if args.quick else (2048, 3000)
    rows = []
    for lmax in sizes:  # the engine first, so that its own peak RSS is seen before the big maps exist
        unlensed, phi = _inputs(lmax + DEFAULT_ELL_MARGIN)
        full = best_time(lambda: lensrec.lensed_cmb_spectra(unlensed, phi, lmax, nthreads=args.nthreads), 2)  # noqa: B023
        first = best_time(
            lambda: lensrec.first_order_lensed_bb(unlensed["EE"], phi, lmax, nthreads=args.nthreads),  # noqa: B023
            2,
        )
        rows.append(
            {
                "lmax": lmax,
                "input_lmax": lmax + DEFAULT_ELL_MARGIN,
                "lensed_spectra_s": full,
                "first_order_bb_s": first,
                "peak_rss_mb_engine": peak_rss_mb(),
            }
        )
    unit, how = (np.nan, "skipped") if args.no_synthesis else _synthesis_seconds(nside, lmax_sht, args.nthreads)
    for row in rows:
        row.update(
            {
                "synthesis_s": unit,
                "synthesis": f"spin-2 nside {nside} lmax {lmax_sht} via {how}",
                "lensed_over_synthesis": row["lensed_spectra_s"] / unit,
                "nthreads": args.nthreads,
                "peak_rss_mb_with_synthesis": peak_rss_mb(),
            }
        )
    report("lensed_spectra" + ("_quick" if args.quick else ""), rows)
    return 0


if __name__ == "__main__":
    sys.exit(main())
