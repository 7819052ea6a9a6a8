"""Cost of one lensed T, Q, U simulation in units of one ducc0 spin-2 HEALPix synthesis of the same size.

    python benchmarks/bench_simulate.py [--quick] [--nthreads N] [--epsilon EPS] [--profile]

Sizes: nside 512 (lmax 1000), 1024 (lmax 2000) and 2048 (lmax 3000), the unlensed fields to lmax + 1000;
``--quick`` runs nside 512 only. Each row reports the simulation wall time, the time of one spin-2
synthesis (E, B → Q, U at that nside and lmax) measured in the same run, their ratio, the same ratio in
CPU time summed over threads (steadier when other jobs share the machine), and the peak RSS of the
process so far. ``--profile`` also prints where the simulation wall time goes.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from benchmarks._common import peak_rss_mb, report, spin2_synthesis_seconds  # noqa: E402

SIZES = ((512, 1000), (1024, 2000), (2048, 3000))


def _profiled_steps():
    """Wrap the main steps of the simulation with timers; returns the dict they accumulate into."""
    from lensrec import harmonics, remapping, sky

    totals: dict[str, float] = {}

    def timed(name, function):
        def wrapper(*args, **kwargs):
            start = time.perf_counter()
            try:
                return function(*args, **kwargs)
            finally:
                totals[name] = totals.get(name, 0.0) + time.perf_counter() - start

        return wrapper

    sky.gaussian_cmb_alm = timed("unlensed_alm", sky.gaussian_cmb_alm)
    sky.gaussian_alm = timed("phi_alm", sky.gaussian_alm)
    remapping._deflection_on_grid = timed("deflection", remapping._deflection_on_grid)
    remapping._displaced_positions = timed("positions", remapping._displaced_positions)
    harmonics._synthesis_at = timed("synthesis_at_positions", harmonics._synthesis_at)
    harmonics.GLGrid.analysis = timed("gl_analysis", harmonics.GLGrid.analysis)
    harmonics.alm2map_tqu = timed("healpix_synthesis", harmonics.alm2map_tqu)
    sky._add_noise = timed("noise", sky._add_noise)
    return totals


def spin2_synthesis_cpu_seconds(nside: int, lmax: int, nthreads: int, repeat: int = 2) -> float:
    """CPU time (all threads) of the reference spin-2 synthesis: less sensitive to other jobs on a shared
    machine than wall time."""
    import numpy as np

    from lensrec import harmonics

    rng = np.random.default_rng(0)
    size = harmonics.nalm(lmax)
    alm = rng.normal(size=(2, size)) + 1j * rng.normal(size=(2, size))
    best = np.inf
    for _ in range(repeat):
        start = time.process_time()
        harmonics.alm2map(alm, nside, lmax, spin=2, nthreads=nthreads)
        best = min(best, time.process_time() - start)
    return best


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true", help="nside 512 only (a smoke run)")
    parser.add_argument("--nthreads", type=int, default=2)
    parser.add_argument("--epsilon", type=float, default=None, help="synthesis accuracy (default: lensrec's)")
    parser.add_argument("--profile", action="store_true", help="print the time of each step")
    parser.add_argument("--nside", type=int, action="append", help="run only this nside (repeatable)")
    args = parser.parse_args()

    import lensrec

    totals = _profiled_steps() if args.profile else None
    extra = {} if args.epsilon is None else {"epsilon": args.epsilon}
    rows = []
    sizes = SIZES[:1] if args.quick else SIZES
    if args.nside:
        sizes = [size for size in SIZES if size[0] in args.nside]
    for nside, lmax in sizes:
        unit = spin2_synthesis_seconds(nside, lmax, args.nthreads, repeat=2)
        if totals is not None:
            totals.clear()
        unit_cpu = spin2_synthesis_cpu_seconds(nside, lmax, args.nthreads)
        start, start_cpu = time.perf_counter(), time.process_time()
        sky = lensrec.simulate_sky("deep_highland", nside=nside, lmax=lmax, seed=1, nthreads=args.nthreads, **extra)
        seconds, cpu_seconds = time.perf_counter() - start, time.process_time() - start_cpu
        del sky
        unit_after = spin2_synthesis_seconds(nside, lmax, args.nthreads, repeat=1)
        unit = min(unit, unit_after)  # machine load drifts; use the faster reference time of the two
        unit_cpu = min(unit_cpu, spin2_synthesis_cpu_seconds(nside, lmax, args.nthreads, repeat=1))
        row = {
            "nside": nside,
            "lmax": lmax,
            "lmax_unlensed": lmax + 1000,
            "epsilon": args.epsilon if args.epsilon is not None else 1e-7,
            "nthreads": args.nthreads,
            "simulation_s": seconds,
            "spin2_synthesis_s": unit,
            "ratio": seconds / unit,
            "simulation_cpu_s": cpu_seconds,
            "spin2_synthesis_cpu_s": unit_cpu,
            "cpu_ratio": cpu_seconds / unit_cpu,
            "peak_rss_mb": peak_rss_mb(),
        }
        if totals is not None:
            row.update({f"step_{name}_in_units": value / unit for name, value in totals.items()})
        rows.append(row)
        print(row, flush=True)
    name = "simulate" if args.epsilon is None else f"simulate_eps{args.epsilon:g}"
    if args.quick:
        name += "_quick"
    elif args.nside:
        name += "_nside" + "_".join(str(n) for n in sorted(set(args.nside)))
    report(name, rows)
    return 0


if __name__ == "__main__":
    sys.exit(main())
