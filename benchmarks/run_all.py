"""Run every benchmarks/bench_*.py in its own process (so each reports its own peak RSS).

    python benchmarks/run_all.py [--quick] [name ...]

``--quick`` passes a smaller size to each benchmark that supports it (for a smoke run).
"""

from __future__ import annotations

import glob
import os
import subprocess
import sys


def main() -> int:
    here = os.path.dirname(os.path.abspath(__file__))
    args = [a for a in sys.argv[1:] if not a.startswith("--")]
    flags = [a for a in sys.argv[1:] if a.startswith("--")]
    scripts = sorted(glob.glob(os.path.join(here, "bench_*.py")))
    if args:
        scripts = [s for s in scripts if any(name in os.path.basename(s) for name in args)]
    failed = 0
    for script in scripts:
        print(f"\n### {os.path.basename(script)}", flush=True)
        result = subprocess.run([sys.executable, script, *flags])
        failed += result.returncode != 0
    print(f"\n{len(scripts) - failed} benchmark scripts ran, {failed} failed; results in benchmarks/results/")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
