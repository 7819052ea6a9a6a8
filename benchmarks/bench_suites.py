"""Throughput of lensing suites (simulate → filter → reconstruct → pair estimates) per executor.

Measured side by side in one run, each in a fresh suite folder:

- sims per minute of a full lensing suite (data + simulations + pair stage) at nside 512: serial with
  1 thread, serial with 2 threads, a process pool of 2 workers with 1 thread each, and a dask LocalCluster
  of 2 single-threaded workers;
- the scheduling overhead per task of dask against the process pool, from many tiny tasks of the runner's
  reference task (so that the work itself is negligible), and each executor's start-up time;
- peak RSS of this process and of its (reaped) worker processes.

Run: ``.venv/bin/python benchmarks/bench_suites.py`` (several minutes) or ``--quick`` (nside 64).
"""

from __future__ import annotations

import argparse
import os
import resource
import shutil
import sys
import tempfile
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

from _common import peak_rss_mb, report  # noqa: E402


def children_rss_mb() -> float:
    """Peak RSS of the largest reaped child process so far, in MB."""
    return resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0


def suite_rate(settings: dict, executor: str, workers: int, threads: int) -> dict:
    from lensrec.suites import run_lensing_suite

    settings = dict(settings, nthreads=threads)
    folder = tempfile.mkdtemp(prefix="bench_suite_")
    client = cluster = None
    try:
        start = time.perf_counter()
        if executor == "dask":
            from distributed import Client, LocalCluster

            cluster = LocalCluster(
                n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=None, silence_logs=50
            )
            client = Client(cluster)
            target = client
        else:
            target = executor
        startup = time.perf_counter() - start
        suite = run_lensing_suite(settings, folder, executor=target, workers=workers, progress=False)
        seconds = time.perf_counter() - start
        stages = {stage: run.seconds for stage, run in suite.runs.items()}
    finally:
        if client is not None:
            client.close()
        if cluster is not None:
            cluster.close()
        shutil.rmtree(folder, ignore_errors=True)
    n = settings["n_sims"]
    return {
        "executor": executor,
        "workers": workers,
        "nthreads": threads,
        "n_sims": n,
        "seconds": seconds,
        "startup_seconds": startup,
        "sims_per_minute": 60.0 * n / seconds,
        "simulation_stage_s": stages["simulations"],
        "pair_stage_s": stages["pairs"],
        "peak_rss_mb": peak_rss_mb(),
        "children_peak_rss_mb": children_rss_mb(),
    }


def scheduling_overhead(n_tasks: int) -> list[dict]:
    """Wall time per tiny task (a 16-nside Gaussian field) on the pool and on dask, after start-up."""
    from distributed import Client, LocalCluster

    from lensrec.suite_runner import gaussian_field_task, run_suite

    settings = {"seed": 1, "nside": 16, "lmax": 32, "nthreads": 1, "n_sims": n_tasks}
    rows = []
    for name in ("processes", "dask"):
        folder = tempfile.mkdtemp(prefix="bench_overhead_")
        client = cluster = None
        try:
            start = time.perf_counter()
            if name == "dask":
                cluster = LocalCluster(
                    n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None, silence_logs=50
                )
                client = Client(cluster)
                client.submit(sum, [1], pure=False).result()  # workers are up
            startup = time.perf_counter() - start
            run = run_suite(
                settings,
                folder,
                gaussian_field_task,
                executor=client if client else "processes",
                workers=2,
                progress=False,
            )
            # the pool's start-up (spawning and importing in 2 workers) happens inside the run
            rows.append(
                {
                    "executor": name,
                    "tasks": n_tasks,
                    "startup_seconds": startup,
                    "run_seconds": run.seconds,
                    "ms_per_task": 1e3 * run.seconds / n_tasks,
                }
            )
        finally:
            if client is not None:
                client.close()
            if cluster is not None:
                cluster.close()
            shutil.rmtree(folder, ignore_errors=True)
    return rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="tiny size (nside 64) for a smoke test")
    args = parser.parse_args()
    from lensrec.suites import lensing_suite_settings

    if args.quick:
        settings = lensing_suite_settings(
            "deep_highland", nside=64, lmax=128, lmax_L=100, estimators="MV", n_sims=4, seed=1, lmax_margin=64
        )
        tiny_tasks = 20
    else:
        settings = lensing_suite_settings(
            "deep_highland", nside=512, lmax=1000, lmax_L=800, estimators="MV", n_sims=4, seed=1, lmax_margin=500
        )
        tiny_tasks = 100
    # warm-up: imports, the fiducial spectra and per-process caches, so the first measured run is not penalised
    warm = lensing_suite_settings(
        "deep_highland", nside=32, lmax=64, lmax_L=48, estimators="MV", n_sims=4, seed=1, lmax_margin=32
    )
    suite_rate(warm, "serial", 1, 1)
    rows = []
    for executor, workers, threads in (("serial", 1, 1), ("serial", 1, 2), ("processes", 2, 1), ("dask", 2, 1)):
        row = suite_rate(settings, executor, workers, threads)
        rows.append(row)
        print(
            f"  {executor} x{workers} ({threads} thread/task): {row['sims_per_minute']:.2f} sims/min "
            f"({row['seconds']:.1f} s)",
            flush=True,
        )
    base = {r["executor"] + str(r["nthreads"]): r["sims_per_minute"] for r in rows}
    for row in rows:
        row["speed_vs_serial_1_thread"] = row["sims_per_minute"] / base["serial1"]
        row["speed_vs_serial_2_threads"] = row["sims_per_minute"] / base["serial2"]
    overhead = scheduling_overhead(tiny_tasks)
    pool_ms = next(r["ms_per_task"] for r in overhead if r["executor"] == "processes")
    for row in overhead:
        row["ms_per_task_vs_pool"] = row["ms_per_task"] / pool_ms
    size = f"nside{settings['nside']}_lmax{settings['lmax']}_{'-'.join(settings['estimators'])}"
    report(
        "suites_quick" if args.quick else "suites",
        [{"size": size, **row} for row in rows] + [{"size": "overhead_nside16", **row} for row in overhead],
    )


if __name__ == "__main__":
    main()
