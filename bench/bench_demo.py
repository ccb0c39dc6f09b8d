"""Benchmark of issue 18, item 6: the demo end to end, this code against an earlier commit.

    python bench/bench_demo.py                     # against BASELINE, one timed run each
    python bench/bench_demo.py --baseline REF --repeat 2

``python -m bayespanel demo`` (all five models at the default 4 chains x 1,000 draws,
the six reference fits, LOO at both levels, the comparison, results.json and the report)
runs in fresh processes: once with this tree and once with the tree of ``--baseline``
(default :data:`BASELINE`, the main branch before the issue's item 6), extracted with
``git archive`` into a temporary folder (the repository's worktrees are not touched), so
the old path stays callable after the change lands. Each side runs from a folder outside
the repository (``python -m`` puts the working directory first on the path: run from the
repository's root, the old side imported this tree, so runs before 2026-12-03 compared
the new code with itself), and the bench checks which package each side imports before
timing. Each side first runs once untimed (numba's and PyTensor's caches, in a private
compile directory shared by both, so both find their compiled code); then the timed runs
alternate old, new, old, new, ... so that a change of the machine's load during the run
hits both sides alike. Prints the wall-clock seconds of each run, the ratio new / old of
the medians (target: at most 0.5) and the load average at the start and end (the machine
is shared: the ratio is the figure to read), and the same for the CPU seconds (user +
system) of each run, which other work on the machine inflates less than the wall clock.
"""

from __future__ import annotations

import argparse
import os
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
#: main on 2026-12-02 before issue 18 items 4 to 6 landed
BASELINE = "ecd5cc0"


def _load():
    return " ".join(f"{x:.1f}" for x in os.getloadavg())


def extract(ref: str, into: Path) -> Path:
    """The package tree of commit ``ref`` in ``into`` (``git archive``, no worktree)."""
    into.mkdir(parents=True, exist_ok=True)
    archive = subprocess.run(["git", "-C", str(ROOT), "archive", ref, "bayespanel"],
                             capture_output=True, check=True).stdout
    subprocess.run(["tar", "-x", "-C", str(into)], input=archive, check=True)
    return into


def _child_cpu() -> float:
    u = resource.getrusage(resource.RUSAGE_CHILDREN)
    return u.ru_utime + u.ru_stime


def package_file(tree: Path, env: dict, where: Path) -> str:
    """The ``bayespanel/__init__.py`` a demo run with ``tree`` on the path imports."""
    full = dict(os.environ, **env, PYTHONPATH=str(tree))
    return subprocess.run([sys.executable, "-c", "import bayespanel; print(bayespanel.__file__)"],
                          env=full, capture_output=True, text=True, cwd=where,
                          check=True).stdout.strip()


def run_demo(tree: Path, out: Path, env: dict) -> tuple[float, float]:
    """Wall-clock seconds and CPU seconds (user + system, the process and its children)
    of one ``python -m bayespanel demo`` with ``tree`` first on the path, in a fresh
    process."""
    shutil.rmtree(out, ignore_errors=True)
    full = dict(os.environ, **env, PYTHONPATH=str(tree))
    # run from the output's parent folder: ``python -m`` puts the working directory first
    # on the path, so from the repository's root both sides would import this tree
    where = out.parent
    c0 = _child_cpu()
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-m", "bayespanel", "demo", "--out", str(out),
                           "--quiet"], env=full, capture_output=True, text=True, cwd=where)
    seconds = time.perf_counter() - t0
    cpu = _child_cpu() - c0
    if proc.returncode not in (0, 1):  # 1: a sampling problem reported, still a full run
        raise RuntimeError(f"demo failed in {tree}:\n{proc.stderr[-2000:]}")
    if not (out / "report.html").exists():
        raise RuntimeError(f"demo in {tree} wrote no report:\n{proc.stderr[-2000:]}")
    return seconds, cpu


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--baseline", default=BASELINE, help="commit of the old path")
    ap.add_argument("--repeat", type=int, default=1, help="timed runs of each side")
    args = ap.parse_args(argv)
    tmp = Path(tempfile.mkdtemp(prefix="bayespanel_bench_demo_"))
    env = {"PYTENSOR_FLAGS": f"base_compiledir={tmp / 'compiledir'}"}
    try:
        old = extract(args.baseline, tmp / "old")
        sides = {"old": old, "new": ROOT}
        print(f"# bench_demo: {os.cpu_count()} CPUs; load average at start {_load()}; old "
              f"= {args.baseline}, new = {ROOT}", flush=True)
        for name, tree in sides.items():  # each side imports its own tree
            found = Path(package_file(tree, env, tmp)).resolve()
            if not found.is_relative_to(tree.resolve()):
                raise RuntimeError(f"the {name} side imports {found}, not {tree}")
        for name, tree in sides.items():
            s, c = run_demo(tree, tmp / f"out_{name}", env)
            print(f"  warm-up {name}: {s:.1f} s, CPU {c:.1f} s", flush=True)
        times = {"old": [], "new": []}
        cpus = {"old": [], "new": []}
        for r in range(args.repeat):
            for name, tree in sides.items():
                s, c = run_demo(tree, tmp / f"out_{name}", env)
                times[name].append(s)
                cpus[name].append(c)
                print(f"  run {r + 1} {name}: {s:.1f} s, CPU {c:.1f} s (load {_load()})",
                      flush=True)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    old_s, new_s = statistics.median(times["old"]), statistics.median(times["new"])
    old_c, new_c = statistics.median(cpus["old"]), statistics.median(cpus["new"])
    print(f"\n# load average at end {_load()} (other work on the machine inflates wall-clock "
          "times)")
    print("\n# ratios (all measured in this run)")
    print(f"  {'demo end to end, new / old (median of ' + str(args.repeat) + ')':<60} "
          f"{new_s / old_s:8.2f}   target <= 0.5 (issue 18, item 6)")
    print(f"  {'demo seconds: old, new':<60} {old_s:8.1f} {new_s:8.1f}")
    print(f"  {'demo CPU seconds, new / old (median; load inflates it less)':<60} "
          f"{new_c / old_c:8.2f}")
    print(f"  {'demo CPU seconds: old, new':<60} {old_c:8.1f} {new_c:8.1f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
