"""``lensrec suite``: run a lensing simulation suite (resumable, on processes or dask) and report its bias budget."""

from __future__ import annotations

import os
import time

from ..labels import COMPONENTS, ESTIMATORS

HELP = "run a cached, resumable suite of lensing simulations, or report its debiased bandpowers and bias budget"
EXAMPLES = """examples:
  lensrec suite run --experiment deep_highland --nside 256 --lmax 512 --lmax-L 400 --estimators EB \\
      --n-sims 16 --seed 1 --n1 --executor processes --workers 2 --out suite/
  lensrec suite run ... --executor dask --workers 2              # a dask LocalCluster on this machine
  lensrec suite run ... --executor dask --scheduler tcp://host:8786  # an existing dask cluster
  lensrec suite report suite/ --out report/

'suite run' resumes a folder that holds the same suite (more simulations may be asked for) and refuses
one made with other settings unless --force (which deletes that suite's results first). 'suite report'
writes report/bandpowers.json (bandpowers, covariance, A_lens, chi2 for every estimator and component),
report/bias_budget_<estimator>_<component>.{json,txt,png} and report/run.json (provenance)."""


def add_arguments(parser) -> None:
    from ..suites import DEFAULT_LMAX_MARGIN
    from .options import add_deprecated_option, add_weights_option

    sub = parser.add_subparsers(dest="suite_command", metavar="ACTION", required=True)
    run = sub.add_parser("run", help="compute or resume a suite", description="compute or resume a lensing suite")
    run.add_argument(
        "--experiment", default="deep_highland", help="experiment TOML file or shipped name (default: %(default)s)"
    )
    run.add_argument("--nside", type=int, required=True, help="HEALPix nside of the maps (a power of two)")
    run.add_argument("--lmax", type=int, required=True, help="CMB band limit (<= 3*nside-1)")
    run.add_argument(
        "--lmax-L", dest="lmax_L", type=int, default=None, help="highest lensing multipole (default: the CMB lmax)"
    )
    run.add_argument(
        "--estimators", default="MV", help=f"comma-separated labels from {','.join(ESTIMATORS)} (default MV)"
    )
    run.add_argument("--n-sims", dest="n_sims", type=int, required=True, help="number of simulations (>= 4)")
    run.add_argument("--seed", type=int, default=0, help="seed of the simulations (default: %(default)s)")
    run.add_argument("--data-seed", type=int, default=None, help="seed of the simulated data (default: seed + 1)")
    run.add_argument("--data-maps", default=None, help="analyze these T, Q, U FITS maps as the data instead")
    run.add_argument(
        "--lensing-iterations",
        dest="lensing_iterations",
        type=int,
        default=0,
        help="iterate each auto estimate N steps (estimator EB, full sky, no --n1; default 0 = quadratic)",
    )
    add_weights_option(run, default="lensed")
    run.add_argument("--n1", action="store_true", help="also compute the Monte-Carlo N1 (three lensings per sim)")
    run.add_argument(
        "--n1-sims",
        dest="n1_sims",
        type=int,
        default=None,
        help="with --n1, only the first K simulations carry N1 pairs (default: all)",
    )
    run.add_argument("--mask", default=None, help="apodized HEALPix FITS mask (values in [0, 1], same nside)")
    run.add_argument("--no-noise", action="store_true", help="noise-free simulations")
    run.add_argument(
        "--lmax-margin",
        type=int,
        default=DEFAULT_LMAX_MARGIN,
        help="unlensed multipoles beyond lmax (default: %(default)s)",
    )
    run.add_argument(
        "--nthreads", type=int, default=1, help="threads of each simulation's transforms (default: %(default)s)"
    )
    add_deprecated_option(run, "--threads-per-task", "--nthreads", dest="nthreads", type=int)
    run.add_argument(
        "--executor",
        choices=("serial", "processes", "dask"),
        default=None,
        help="where simulations run (default: serial, or dask with --scheduler)",
    )
    run.add_argument("--workers", type=int, default=2, help="worker processes (default: %(default)s)")
    run.add_argument("--scheduler", default=None, help="address of a running dask scheduler (implies dask)")
    run.add_argument("--out", required=True, help="the suite folder")
    run.add_argument("--force", action="store_true", help="delete a different suite's results in --out first")
    run.add_argument("--quiet", action="store_true", help="no progress bars")

    report = sub.add_parser(
        "report",
        help="bandpowers, bias budget and A_lens of a finished suite",
        description="bandpowers, bias budget and A_lens of a finished suite",
    )
    report.add_argument("suite", help="the suite folder written by 'lensrec suite run'")
    report.add_argument("--out", required=True, help="report folder")
    report.add_argument("--force", action="store_true", help="overwrite existing report files")
    report.add_argument("--L-min", dest="L_min", type=int, default=8, help="lowest bandpower edge (default: 8)")
    report.add_argument("--n-bins", dest="n_bins", type=int, default=8, help="number of bandpowers (default: 8)")


def run(args) -> int:
    if args.suite_command == "run":
        return _run_suite(args)
    return _report(args)


def _arguments(args) -> dict:
    return {key: value for key, value in vars(args).items() if not key.startswith("_")}


def _executor(args):
    executor = args.executor or ("dask" if args.scheduler else "serial")
    if args.scheduler and executor != "dask":
        raise ValueError(f"--scheduler {args.scheduler!r} needs --executor dask, got --executor {executor}")
    if args.workers < 1:
        raise ValueError(f"--workers must be >= 1, got {args.workers}")
    return executor


def _run_suite(args) -> int:
    from ..io import provenance, write_json
    from ..suites import lensing_suite_settings, run_lensing_suite

    executor = _executor(args)
    start = time.perf_counter()
    settings = lensing_suite_settings(
        args.experiment,
        nside=args.nside,
        lmax=args.lmax,
        lmax_L=args.lmax_L,
        estimators=args.estimators,
        n_sims=args.n_sims,
        seed=args.seed,
        n1=args.n1,
        n1_sims=args.n1_sims,
        mask=args.mask,
        noise=not args.no_noise,
        lmax_margin=args.lmax_margin,
        nthreads=args.nthreads,
        data_seed=args.data_seed,
        data_maps=args.data_maps,
        lensing_iterations=args.lensing_iterations,
        weights=args.weights,
    )
    client = cluster = None
    try:
        if executor == "dask":
            from distributed import Client, LocalCluster

            if args.scheduler:
                client = Client(args.scheduler)
            else:
                cluster = LocalCluster(
                    n_workers=args.workers,
                    threads_per_worker=1,
                    processes=True,
                    dashboard_address=None,
                    silence_logs=40,
                )
                client = Client(cluster)
            target = client
        else:
            target = executor
        suite = run_lensing_suite(
            settings, args.out, executor=target, workers=args.workers, progress=not args.quiet, force=args.force
        )
    finally:
        if client is not None:
            client.close()
        if cluster is not None:
            cluster.close()
    seconds = time.perf_counter() - start
    stages = {
        stage: {
            "computed": len(r.computed),
            "reused": len(r.reused),
            "recomputed_corrupt": r.recomputed_corrupt,
            "seconds": r.seconds,
        }
        for stage, r in suite.runs.items()
    }
    from ..experiment import load_experiment

    record = provenance(
        "suite run",
        arguments=_arguments(args),
        experiment=load_experiment(args.experiment),
        seed=args.seed,
        timings={"total": seconds},
        extra={"settings": settings, "executor": executor, "stages": stages},
    )
    write_json(os.path.join(args.out, "run.json"), record, force=True)  # the suite folder's own record
    done = ", ".join(f"{stage}: {s['computed']} computed, {s['reused']} reused" for stage, s in stages.items())
    print(f"suite {args.out}: {done} ({seconds:.1f} s)")
    for stage, details in stages.items():
        if details["recomputed_corrupt"]:
            print(f"  {stage}: recomputed {details['recomputed_corrupt']} whose stored file failed its checksum")
    return 0


def _report(args) -> int:
    from ..bandpowers import default_binning, lensing_bandpowers
    from ..io import check_outputs_free, provenance, write_json
    from ..report_bandpowers import write_bias_report
    from ..suites import open_lensing_suite

    start = time.perf_counter()
    suite = open_lensing_suite(args.suite)
    binning = default_binning(suite.settings["lmax_L"], L_min=args.L_min, n_bins=args.n_bins)
    stems = [f"bias_budget_{e}_{c}" for e in suite.estimators for c in COMPONENTS]
    names = ["bandpowers.json", "run.json"] + [f"{s}.{ext}" for s in stems for ext in ("json", "txt", "png")]
    check_outputs_free([os.path.join(args.out, name) for name in names], force=args.force)  # before any work
    if not suite.complete:
        raise ValueError(
            f"suite {args.suite!r} is not finished; run 'lensrec suite run' again with the same "
            "settings (it resumes) before the report"
        )
    record = provenance(
        "suite report",
        arguments=_arguments(args),
        extra={"suite_settings": suite.settings, "suite_directory": suite.directory},
    )
    summary = {"estimators": {}, "provenance": record}
    for estimator in suite.estimators:
        for component in COMPONENTS:
            result = lensing_bandpowers(suite, estimator, component, binning)
            write_bias_report(
                result, args.out, force=args.force, provenance=record, stem=f"bias_budget_{estimator}_{component}"
            )
            summary["estimators"].setdefault(estimator, {})[component] = result.to_dict()
            if result.amplitude is not None:
                print(
                    f"{estimator}: A_lens = {result.amplitude:.4f} +- {result.amplitude_error:.4f}, chi2 = "
                    f"{result.chi2:.2f} for {result.dof} bandpowers (PTE {result.pte:.3f})"
                )
            else:
                print(
                    f"{estimator} {component}: chi2 to zero = {result.chi2:.2f} for {result.dof} bandpowers "
                    f"(PTE {result.pte:.3f})"
                )
    record["timings_seconds"] = {"report": time.perf_counter() - start}
    write_json(os.path.join(args.out, "bandpowers.json"), summary, force=args.force)
    write_json(os.path.join(args.out, "run.json"), record, force=args.force)
    print(f"wrote {args.out}/bandpowers.json, run.json and {len(stems)} bias budgets (json, txt, png)")
    return 0
