"""Run every benchmark in one command; each prints ratios measured in the same run.

    python bench/run.py            # full sizes (long: tens of minutes)
    python bench/run.py --quick    # small sizes, a few minutes

Each benchmark is a separate process so that peak-memory figures do not mix.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent

# (script, full-size arguments, quick arguments)
BENCHES = [
    ("bench_reference.py", [], ["--rows", "100000"]),
    ("bench_models.py", [], ["--quick"]),
    ("bench_slopes.py", [], ["--rows", "10000", "--draws", "200"]),
    ("bench_design_check.py", [], ["--replicates", "20", "--fresh", "2", "--draws", "200"]),
    ("bench_scale.py", [], ["--rows", "1000000"]),
    ("bench_memory.py", [], ["--reps", "15,60"]),
    ("bench_speed.py", [], ["--quick"]),
    ("bench_ar1.py", [], ["--quick"]),
    ("bench_demo.py", ["--repeat", "2"], ["--repeat", "1"]),
    ("ar1_real_panels.py", [], []),
]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="small sizes")
    ap.add_argument("--only", help="comma-separated script names to run")
    args = ap.parse_args(argv)
    only = set(args.only.split(",")) if args.only else None
    failed = []
    for script, full, quick in BENCHES:
        if only and script not in only and script.removesuffix(".py") not in only:
            continue
        cmd = [sys.executable, str(HERE / script), *(quick if args.quick else full)]
        print(f"\n=== {' '.join(cmd[1:])}", flush=True)
        if subprocess.run(cmd).returncode != 0:
            failed.append(script)
    if failed:
        print(f"\nfailed: {', '.join(failed)}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
