"""A 10^7-row Parquet table through a formula: peak memory and time to the first draw.

The script writes an invented flights-like table (this script's own simulation: hour, distance,
carrier with 16 levels, origin with 3, month with 12, a late flag from known coefficients, an
identifier and two columns the formula does not use), 10^7 rows in row groups of 2^20, and
runs in a fresh process, twice (first start: the table is read and encoded into the cache;
second start: the cache is memory-mapped):

    [data] table = "flights.parquet"
    [model] formula = "late ~ I(hour - 14) + np.log(distance / 1000) + C(carrier)
                       + C(origin) + C(month)"

and samples one penalty-mala draw (one chain, no warmup, fixed step and batch), so that the
time to the first draw is the time of the read and encoding, the set-up (mode, Laplace mass
matrix, control-variate row cache) and one transition. The numeric terms are centred and
scaled in the formula itself because mode finding on raw-scale columns is slow (a known issue
handled elsewhere).

Memory: peak RssAnon (private memory: pyarrow batches, pandas frames, the control-variate row
cache of 32 bytes a row, y) and peak VmHWM (all resident pages, with the memory-mapped design
matrix's file pages, which the kernel can drop), sampled every 20 ms in a thread.

Run:  .venv/bin/python benchmarks/bench_table_formula.py [--quick] [--dir DIR]
Needs about 3 GB of free disk (10^7 rows; --quick: 10^6 rows).
"""

import argparse
import json
import subprocess
import sys
import tempfile
import textwrap
from pathlib import Path

import numpy as np

FORMULA = ("late ~ I(hour - 14) + np.log(distance / 1000) + C(carrier) + C(origin) "
           "+ C(month)")
CHILD = textwrap.dedent("""
    import json, sys, threading, time, warnings
    t0 = time.perf_counter()
    peak = {"RssAnon": 0, "VmRSS": 0}
    def status():
        out = {}
        for line in open("/proc/self/status"):
            key = line.split(":")[0]
            if key in ("RssAnon", "VmRSS", "VmHWM"):
                out[key] = int(line.split()[1]) * 1024
        return out
    def watch():
        while True:
            s = status()
            for k in peak:
                peak[k] = max(peak[k], s[k])
            time.sleep(0.02)
    threading.Thread(target=watch, daemon=True).start()
    import tallchain as tc
    from tallchain.app import load_config
    from tallchain.app._service import build_model
    warnings.simplefilter("ignore")
    t = time.perf_counter()
    model, dataset = build_model(load_config(sys.argv[1]))
    t_load = time.perf_counter() - t
    r = tc.sample(model, method="penalty-mala", chains=1, draws=1, warmup=0, step_size=0.1,
                  batch_size=1000, seed=1)
    t_first = time.perf_counter() - t0
    time.sleep(0.05)
    print(json.dumps({"load": t_load, "setup": r.setup_seconds, "first": t_first,
                      "rss_anon": peak["RssAnon"], "hwm": status()["VmHWM"],
                      "rows": model.n_rows, "coef": model.n_coef,
                      "cache": dataset.table_report["cache"]}))
""")


def write_table(path, n_rows, rng):
    """The invented table, written one row group at a time (never whole in memory)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    carriers = np.array([f"C{k:02d}" for k in range(16)])
    origins = np.array(["EWR", "JFK", "LGA"])
    effect_c = np.linspace(-0.5, 0.5, 16)
    writer = None
    block = 1 << 20
    for start in range(0, n_rows, block):
        n = min(block, n_rows - start)
        hour = rng.integers(5, 24, n)
        distance = rng.lognormal(np.log(1000), 0.6, n)
        c, o, m = rng.integers(0, 16, n), rng.integers(0, 3, n), rng.integers(1, 13, n)
        eta = (-1.2 + 0.08 * (hour - 14) + 0.1 * np.log(distance / 1000) + effect_c[c]
               + 0.1 * o + 0.3 * np.sin(m))
        batch = pa.table({
            "id": np.arange(start, start + n), "hour": hour, "distance": distance,
            "carrier": carriers[c], "origin": origins[o], "month": m,
            "late": rng.random(n) < 1 / (1 + np.exp(-eta)),
            "dep_delay": rng.normal(10, 30, n), "tailnum": carriers[(c + o) % 16]})
        if writer is None:
            writer = pq.ParquetWriter(path, batch.schema)
        writer.write_table(batch, row_group_size=block)
    writer.close()


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="10^6 rows instead of 10^7")
    parser.add_argument("--dir", default=None, help="folder for the table (default: a temp)")
    args = parser.parse_args()
    n_rows = 10**6 if args.quick else 10**7
    with tempfile.TemporaryDirectory(dir=args.dir) as tmp:
        folder = Path(tmp)
        write_table(folder / "flights.parquet", n_rows, np.random.default_rng(13))
        (folder / "run.toml").write_text(f'[data]\ntable = "flights.parquet"\n[model]\n'
                                         f'family = "logistic"\nformula = "{FORMULA}"\n')
        size = (folder / "flights.parquet").stat().st_size
        print(f"{n_rows:,} rows, Parquet {size / 2**20:,.0f} MiB; formula {FORMULA}")
        print(f"{'start':<8}{'read+encode s':>14}{'set-up s':>10}{'first draw s':>14}"
              f"{'peak RssAnon':>14}{'peak VmHWM':>12}")
        for label in ("first", "cached"):
            out = subprocess.run([sys.executable, "-c", CHILD, str(folder / "run.toml")],
                                 capture_output=True, text=True, check=True)
            r = json.loads(out.stdout.strip().splitlines()[-1])
            print(f"{label:<8}{r['load']:>14.1f}{r['setup']:>10.1f}{r['first']:>14.1f}"
                  f"{r['rss_anon'] / 2**30:>12.2f}Gi{r['hwm'] / 2**30:>10.2f}Gi")
        cache = Path(r["cache"])
        x_bytes = (cache / "X.npy").stat().st_size
        print(f"design matrix {r['rows']:,} x {r['coef'] - 1} (+ intercept): "
              f"{x_bytes / 2**30:.2f} GiB memory-mapped from {cache.parent.name}/")


if __name__ == "__main__":
    main()
