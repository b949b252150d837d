"""Run every ``bench_*.py`` in this folder, one after another, each in its own interpreter.

``make bench`` calls this. A fresh process per benchmark keeps one benchmark's thread settings,
numba compilation and caches from colouring the next one. The exit code is non-zero when any
benchmark fails, including a failed correctness check.

    python benchmarks/run_all.py [--quick] [-k SUBSTRING]

``--quick`` is passed on to every benchmark (the one option they all accept: fewer repeats);
``-k`` runs only the scripts whose name contains SUBSTRING. Benchmark-specific options: run
that script directly.
"""

import argparse
import subprocess
import sys
import time
from pathlib import Path


def main(argv=None):
    ap = argparse.ArgumentParser(description="Run every bench_*.py in benchmarks/.")
    ap.add_argument("--quick", action="store_true", help="pass --quick to every benchmark")
    ap.add_argument("-k", dest="select", default="", help="only scripts whose name contains this")
    args = ap.parse_args(argv)
    here = Path(__file__).resolve().parent
    scripts = [s for s in sorted(here.glob("bench_*.py")) if args.select in s.name]
    if not scripts:
        print(f"no bench_*.py matching {args.select!r} in {here}", file=sys.stderr)
        return 1
    failed = []
    for script in scripts:
        print(f"=== {script.name} ===", flush=True)
        t0 = time.perf_counter()
        cmd = [sys.executable, str(script)] + (["--quick"] if args.quick else [])
        code = subprocess.call(cmd, cwd=here.parent)
        print(f"=== {script.name}: exit {code}, {time.perf_counter() - t0:.1f} s ===\n",
              flush=True)
        if code:
            failed.append(script.name)
    if failed:
        print("failed: " + ", ".join(failed), file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
