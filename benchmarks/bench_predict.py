"""``tallchain predict``: throughput and peak memory against the number of new rows.

A logistic run folder (10 coefficients, 4 chains x 1000 draws) predicts tables of new rows
(Parquet, 9 feature columns) of growing size, each in a fresh process. Predictions are
computed in blocks of rows x draws (2^22 values), so the peak memory of the process should not
grow with the number of rows; the table of (rows x draws) values a one-shot implementation
would hold is printed beside it. Reported: rows per second and the peak resident memory of the
predicting process (``resource.getrusage(RUSAGE_CHILDREN).ru_maxrss``, one child at a time).

Check first: the ``mean`` column of the first rows equals the mean over the draws of
expit(x . beta) computed here with NumPy (to 1e-12: another summation order).

    .venv/bin/python benchmarks/bench_predict.py [--rows 100000 1000000] [--quick]
"""

import argparse
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np


def _make_run(folder):
    from scipy import special

    import tallchain as tc

    rng = np.random.default_rng(1)
    X = rng.standard_normal((20_000, 9))
    y = (rng.random(20_000) < special.expit(0.2 + X @ np.linspace(-0.5, 0.5, 9))).astype(float)
    result = tc.sample(tc.LogisticRegression(X, y), chains=4, draws=1000, warmup=300, seed=1,
                       progress=False)
    result.save(folder / "run")
    return result.draws.reshape(-1, 10)


def _new_table(path, n_rows):
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(2)
    with pq.ParquetWriter(path, pa.schema([(f"x{j}", pa.float64()) for j in range(9)])) as w:
        for start in range(0, n_rows, 100_000):
            block = rng.standard_normal((min(100_000, n_rows - start), 9))
            w.write_table(pa.table({f"x{j}": block[:, j] for j in range(9)}))


def _predict(folder, n_rows):
    """Run ``tallchain predict`` in a child; return (seconds, peak RSS in MiB)."""
    table = folder / f"new_{n_rows}.parquet"
    _new_table(table, n_rows)
    code = (f"import resource, sys, time; from tallchain.app._cli import main; "
            f"t = time.perf_counter(); c = main(['predict', {str(folder / 'run')!r}, "
            f"{str(table)!r}, '--out', {str(folder / f'p_{n_rows}.parquet')!r}, '--quiet']); "
            f"print(time.perf_counter() - t, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss);"
            f" sys.exit(c)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         env={**os.environ}, check=True).stdout.split()
    return float(out[0]), float(out[1]) / 1024.0


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, nargs="+", default=[100_000, 1_000_000])
    ap.add_argument("--quick", action="store_true", help="10^4 and 10^5 rows")
    args = ap.parse_args(argv)
    rows = [10_000, 100_000] if args.quick else args.rows
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        draws = _make_run(folder)
        import pyarrow.parquet as pq
        from scipy import special

        _predict(folder, 1000)
        X = pq.read_table(folder / "new_1000.parquet").to_pandas().to_numpy()[:20]
        mean = pq.read_table(folder / "p_1000.parquet").column("mean").to_numpy()[:20]
        expected = special.expit(draws[:, 0][None, :] + X @ draws[:, 1:].T).mean(axis=1)
        ok = np.allclose(mean, expected, rtol=0, atol=1e-12)
        print(f"check: mean response equals NumPy's mean of expit over the draws: "
              f"{'ok' if ok else 'FAILED'}")
        if not ok:
            return 1
        print(f"{'rows':>10} {'seconds':>8} {'rows/s':>9} {'peak RSS MiB':>13} "
              f"{'rows x draws MiB':>17}")
        for n in rows:
            seconds, rss = _predict(folder, n)
            print(f"{n:>10,} {seconds:>8.1f} {n / seconds:>9,.0f} {rss:>13.0f} "
                  f"{n * draws.shape[0] * 8 / 2**20:>17,.0f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
