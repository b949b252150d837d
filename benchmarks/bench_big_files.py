"""Tall data from files: memory of a fit on a 2-GB .npy, and CSV first read vs cached start.

* A logistic fit (penalty-mala, control variates) on a .npy of about 2 GB that this script
  writes (float64, 10 columns): peak anonymous resident memory (RssAnon, /proc/self/status,
  sampled every 20 ms in a thread) against the file size. X is memory-mapped and never copied;
  what is private is the control-variate row cache (32 bytes per row: y, eta*, f'*, f''*) and
  the per-row response vector.
* A CSV of 10^6 rows x 10 columns: wall time of the first load (parse in chunks, write the
  cached .npy pair) and of the second (memory-map the cache), each in a fresh process.

Run:  .venv/bin/python benchmarks/bench_big_files.py [--quick] [--dir DIR]
Needs about 2.5 GB of free disk (1 GB with --quick).
"""

import argparse
import json
import os
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

import numpy as np

CHILD_FIT = textwrap.dedent("""
    import json, sys, threading, time, warnings
    import numpy as np
    import tallchain as tc
    peak = [0]
    def rss_anon():
        for line in open("/proc/self/status"):
            if line.startswith("RssAnon:"):
                return int(line.split()[1]) * 1024
    def watch():
        while True:
            peak[0] = max(peak[0], rss_anon()); time.sleep(0.02)
    threading.Thread(target=watch, daemon=True).start()
    base = rss_anon()
    X = np.load(sys.argv[1], mmap_mode="r")
    y = np.load(sys.argv[2], mmap_mode="r")
    warnings.simplefilter("ignore")
    t = time.perf_counter()
    model = tc.LogisticRegression(X, y)
    r = tc.sample(model, method="penalty-mala", chains=2, draws=1000, warmup=300, seed=1)
    wall = time.perf_counter() - t
    time.sleep(0.05)
    print(json.dumps({"peak": peak[0], "base": base, "wall": wall,
                      "setup": r.setup_seconds, "sampling": r.sampling_seconds,
                      "batch": r.tuned["batch_size"], "acc": r.acceptance_rate}))
""")

CHILD_CSV = textwrap.dedent("""
    import sys, time
    t = time.perf_counter()
    from tallchain.app import load_config
    from tallchain.app._service import build_model
    model, _ = build_model(load_config(sys.argv[1]))
    print(time.perf_counter() - t, model.n_rows)
""")


def write_npy(folder, n_rows, rng):
    X = np.lib.format.open_memmap(folder / "X.npy", mode="w+", dtype=np.float64,
                                  shape=(n_rows, 10))
    y = np.lib.format.open_memmap(folder / "y.npy", mode="w+", dtype=np.float64,
                                  shape=(n_rows,))
    beta = np.linspace(-0.5, 0.5, 10)
    block = 1 << 20
    for s in range(0, n_rows, block):
        xb = rng.standard_normal((min(block, n_rows - s), 10))
        X[s:s + xb.shape[0]] = xb
        y[s:s + xb.shape[0]] = rng.random(xb.shape[0]) < 1 / (1 + np.exp(-(xb @ beta)))
    X.flush()
    y.flush()
    del X, y


def write_csv(folder, n_rows, rng):
    cols = [f"c{j}" for j in range(10)]
    with open(folder / "data.csv", "w") as fh:
        fh.write(",".join(cols + ["y"]) + "\n")
        block = 100_000
        for s in range(0, n_rows, block):
            xb = rng.standard_normal((min(block, n_rows - s), 10))
            yb = (rng.random(xb.shape[0]) < 1 / (1 + np.exp(-xb[:, 0]))).astype(int)
            np.savetxt(fh, np.column_stack([xb, yb]), fmt=["%.6f"] * 10 + ["%d"], delimiter=",")
    (folder / "csv.toml").write_text(
        '[data]\nx = "data.csv"\ny = "y"\n[model]\nfamily = "logistic"\n')


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--dir", default=None)
    args = ap.parse_args()
    rng = np.random.default_rng(5)
    n_npy = 5_000_000 if args.quick else 25_000_000      # x 80 bytes: 0.4 or 2 GB
    with tempfile.TemporaryDirectory(dir=args.dir) as tmp:
        folder = Path(tmp)
        t = time.perf_counter()
        write_npy(folder, n_npy, rng)
        size = (folder / "X.npy").stat().st_size
        print(f"wrote X.npy: {n_npy:,} rows, {size / 2**30:.2f} GiB in "
              f"{time.perf_counter() - t:.0f} s")
        out = subprocess.run([sys.executable, "-c", CHILD_FIT, folder / "X.npy",
                              folder / "y.npy"], capture_output=True, text=True, check=True)
        fit = json.loads(out.stdout.strip().splitlines()[-1])
        private = fit["peak"] - fit["base"]
        print(f"fit: set-up {fit['setup']:.1f} s, sampling {fit['sampling']:.1f} s, batch "
              f"{fit['batch']}, acceptance {fit['acc']:.2f}")
        print(f"peak RssAnon above start {private / 2**30:.2f} GiB = {private / size:.2f} x "
              f"the file ({32 * n_npy / 2**30:.2f} GiB is the row cache, "
              f"{8 * n_npy / 2**30:.2f} GiB the response)")
        os.remove(folder / "X.npy")
        n_csv = 200_000 if args.quick else 1_000_000
        write_csv(folder, n_csv, rng)
        times = []
        for _ in range(2):
            out = subprocess.run([sys.executable, "-c", CHILD_CSV, folder / "csv.toml"],
                                 capture_output=True, text=True, check=True)
            times.append(float(out.stdout.split()[0]))
        print(f"CSV {n_csv:,} x 10 ({(folder / 'data.csv').stat().st_size / 2**20:.0f} MiB): "
              f"first load {times[0]:.2f} s, cached start {times[1]:.2f} s "
              f"(ratio {times[0] / times[1]:.1f}x)")


if __name__ == "__main__":
    main()
