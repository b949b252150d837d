"""The command ``predict``: posterior predictions for new rows from a run folder."""

import json
from pathlib import Path

import numpy as np

from .._validation import fail
from ..mcmc import check_interval, predict_blocks, prediction_columns, rows_per_block
from ._config import DEFAULT_INTERVAL
from ._new_rows import read_blocks, table_columns, write_table
from ._registry import EXIT_OK, command

OUTPUT_NAME = "predictions.csv"


def _add_predict_arguments(parser):
    parser.add_argument("run_dir", metavar="RUN_DIR",
                        help="output folder of tallchain run (posterior.nc and run.json)")
    parser.add_argument("new_table", metavar="NEW_TABLE",
                        help="new rows: .csv or .parquet with the run's columns by name, or "
                             ".npy with them in the run's order")
    parser.add_argument("--out", default=None, metavar="FILE",
                        help=f".csv or .parquet (default: RUN_DIR/{OUTPUT_NAME})")
    parser.add_argument("--interval", type=float, default=DEFAULT_INTERVAL, metavar="P",
                        help=f"probability of the central intervals (default {DEFAULT_INTERVAL})")
    parser.add_argument("--offset", default=None, metavar="COLUMN",
                        help="column of NEW_TABLE holding the offset (default: the run's "
                             "offset column, when the run had one)")
    parser.add_argument("--seed", type=int, default=None, metavar="N",
                        help="seed of the simulated new observations (default: the run's seed)")
    parser.add_argument("--chunk-rows", type=int, default=None, metavar="N",
                        help="rows per block (default: a block of rows x draws within 2^22 "
                             "values)")
    parser.add_argument("--quiet", action="store_true", help="print only warnings and errors")


@command("predict", "predict new rows from a run: mean response and new-observation "
         "intervals", _add_predict_arguments)
def _predict(args):
    interval = check_interval(args.interval)
    run_dir = Path(args.run_dir)
    record, draws, run = load_run(run_dir)
    new_table = Path(args.new_table)
    offset_column = _offset_column(args.offset, run, new_table)
    out = Path(args.out) if args.out is not None else run_dir / OUTPUT_NAME
    rows = rows_per_block(draws.shape[0], args.chunk_rows)
    seed = args.seed if args.seed is not None else (run.get("settings", {}).get("seed") or 0)
    encoding = (run.get("data") or {}).get("encoding")
    if encoding is not None and encoding.get("kind") == "formula":
        blocks = _formula_blocks(encoding, new_table, offset_column, rows)
    else:
        blocks = read_blocks(new_table, record["feature_names"], offset_column, rows)
    columns = ["row", *prediction_columns(interval)]
    n = write_table(out, columns, _numbered(predict_blocks(draws, blocks, record,
                                                           interval=interval, seed=seed)))
    if not args.quiet:
        print(f"wrote {n:,} predictions ({100 * interval:.6g}% intervals, {draws.shape[0]:,} "
              f"draws) to {out}")
    return EXIT_OK


def load_run(run_dir):
    """The model record, the draws (flattened over chains) and run.json of a run folder."""
    if not (run_dir / "run.json").is_file() or not (run_dir / "posterior.nc").is_file():
        fail("RUN_DIR", f"{run_dir} holds no run.json and posterior.nc",
             "give the output folder of tallchain run")
    run = json.loads((run_dir / "run.json").read_text())
    record = run.get("model")
    if not isinstance(record, dict) or "feature_names" not in record:
        fail("RUN_DIR", f"{run_dir}/run.json has no model record (written by an older version)",
             "run the config again with this version of tallchain")
    import arviz as az

    beta = az.from_netcdf(run_dir / "posterior.nc")["posterior"]["beta"].values
    if beta.shape[0] * beta.shape[1] == 0:
        fail("RUN_DIR", f"{run_dir}/posterior.nc holds no draws", "finish the run (--resume)")
    return record, beta.reshape(-1, beta.shape[2]), run


def _offset_column(option, run, new_table):
    """The offset column: the option, else the run's offset when it was a column that the new
    table has too; a run with an offset needs one."""
    if option is not None:
        return option
    run_offset = (run.get("data") or {}).get("offset")
    if run_offset is None:
        return None
    columns = table_columns(new_table) or []
    if run_offset in columns:
        return run_offset
    fail("--offset", f"the run had an offset ({run_offset}) and {new_table.name} has no column "
         "of that name", "name the new rows' offset column with --offset COLUMN")


def _formula_blocks(encoding, new_table, offset_column, rows):
    """``(X, offset)`` blocks of new rows encoded by the run's saved formula (the same
    categorical levels, reference levels and transforms as the fit)."""
    from ..data import iter_new_rows

    if offset_column is not None:
        fail("--offset", "a run fitted from a formula takes no offset column in predict yet",
             "predict from a run without an offset")
    for _, X in iter_new_rows(encoding, new_table, batch_rows=rows):
        yield X, None


def _numbered(blocks):
    start = 0
    for block in blocks:
        n = len(next(iter(block.values())))
        yield {"row": np.arange(start, start + n), **block}
        start += n
