"""Cost of one lensing B-mode template (both methods) in units of one ducc0 spin-2 HEALPix synthesis.

    python benchmarks/bench_delensing.py [--quick] [--nthreads N]

Size: E and φ to ℓ_max = 3000, template to 3000, against one spin-2 synthesis (E, B → Q, U) at nside 2048,
ℓ_max 3000 measured in the same run (before and after; the faster is kept); ``--quick`` runs ℓ_max 1000
against nside 512. The reference and each template run in their own child process (the parent stays
small: Linux carries a process's peak RSS across fork and exec), so the peak RSS reported is that of one
method alone, the input coefficients (~0.2 GB at ℓ_max 3000) included. Wall and CPU times are both
reported; on a shared machine the CPU-time ratio is the steadier one.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from benchmarks._common import peak_rss_mb, report, spin2_synthesis_seconds  # noqa: E402

SIZE = (2048, 3000)
QUICK_SIZE = (512, 1000)
METHODS = ("remap", "first_order")


def _child(method: str, lmax: int, nthreads: int) -> None:
    """Build one template from Gaussian E and φ with the fiducial spectra; print seconds and peak RSS."""
    import numpy as np

    import lensrec
    from lensrec.delensing import lensing_b_template
    from lensrec.sky import gaussian_alm

    spectra = lensrec.fiducial_spectra()
    rng = np.random.default_rng(1)
    e_alm = gaussian_alm(spectra.lensed["EE"], lmax, rng)
    phi_alm = gaussian_alm(spectra.phi, lmax, rng)
    rss_inputs = peak_rss_mb()
    lensing_b_template(
        e_alm[: lensrec.harmonics.nalm(100)],
        phi_alm[: lensrec.harmonics.nalm(100)],
        100,
        method=method,
        nthreads=nthreads,
    )  # warm-up (imports, plans)
    start, start_cpu = time.perf_counter(), time.process_time()
    lensing_b_template(e_alm, phi_alm, lmax, method=method, nthreads=nthreads)
    seconds, cpu_seconds = time.perf_counter() - start, time.process_time() - start_cpu
    print(
        json.dumps(
            {"seconds": seconds, "cpu_seconds": cpu_seconds, "peak_rss_mb": peak_rss_mb(), "inputs_rss_mb": rss_inputs}
        ),
        flush=True,
    )


def _reference(nside: int, lmax: int, nthreads: int) -> None:
    """Time one spin-2 HEALPix synthesis (wall and CPU); print them."""
    import numpy as np

    from lensrec import harmonics

    wall = spin2_synthesis_seconds(nside, lmax, nthreads, repeat=2)
    rng = np.random.default_rng(0)
    alm = rng.normal(size=(2, harmonics.nalm(lmax))) + 1j * rng.normal(size=(2, harmonics.nalm(lmax)))
    start = time.process_time()
    harmonics.alm2map(alm, nside, lmax, spin=2, nthreads=nthreads)
    print(json.dumps({"seconds": wall, "cpu_seconds": time.process_time() - start}), flush=True)


def _run_child(*options) -> dict:
    command = [sys.executable, os.path.abspath(__file__), *map(str, options)]
    output = subprocess.run(command, capture_output=True, text=True, check=True).stdout
    return json.loads(output.strip().splitlines()[-1])


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true", help="lmax 1000 against nside 512 (a smoke run)")
    parser.add_argument("--nthreads", type=int, default=2)
    parser.add_argument("--child", choices=(*METHODS, "reference"), help=argparse.SUPPRESS)
    parser.add_argument("--lmax", type=int, default=None, help=argparse.SUPPRESS)
    args = parser.parse_args()
    nside, lmax = QUICK_SIZE if args.quick else SIZE
    if args.child == "reference":
        _reference(nside, lmax, args.nthreads)
        return 0
    if args.child:
        _child(args.child, args.lmax or lmax, args.nthreads)
        return 0

    quick = ["--quick"] if args.quick else []
    before = _run_child("--child", "reference", "--nthreads", args.nthreads, *quick)
    rows = [
        {"method": method, **_run_child("--child", method, "--lmax", lmax, "--nthreads", args.nthreads)}
        for method in METHODS
    ]
    after = _run_child("--child", "reference", "--nthreads", args.nthreads, *quick)
    unit = min(before["seconds"], after["seconds"])  # machine load drifts: keep the faster reference
    unit_cpu = min(before["cpu_seconds"], after["cpu_seconds"])
    table = []
    for row in rows:
        table.append(
            {
                "method": row["method"],
                "nside_reference": nside,
                "lmax": lmax,
                "nthreads": args.nthreads,
                "template_s": row["seconds"],
                "template_cpu_s": row["cpu_seconds"],
                "spin2_synthesis_s": unit,
                "ratio": row["seconds"] / unit,
                "spin2_synthesis_cpu_s": unit_cpu,
                "cpu_ratio": row["cpu_seconds"] / unit_cpu,
                "peak_rss_mb": row["peak_rss_mb"],
                "inputs_rss_mb": row["inputs_rss_mb"],
            }
        )
    table.append(
        {
            "method": "first_order / remap",
            "ratio": table[1]["template_s"] / table[0]["template_s"],
            "cpu_ratio": table[1]["template_cpu_s"] / table[0]["template_cpu_s"],
        }
    )
    report("delensing_quick" if args.quick else "delensing", table)
    return 0


if __name__ == "__main__":
    sys.exit(main())
