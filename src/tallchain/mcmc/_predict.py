"""Predictions for new rows from posterior draws: the posterior of the mean response and the
posterior predictive distribution of a new observation, block by block of rows."""

import numpy as np

from .._validation import check_finite_matrix, check_seed, fail, positive_int
from ..models import response_from_record
from ._summary import check_interval, interval_columns

#: Elements of one (rows x draws) block: 2^22 float64 values, 32 MiB per array. A block holds
#: three such arrays at a time (eta, the mean response, the simulated observations).
BLOCK_ELEMENTS = 1 << 22


def prediction_columns(interval):
    """The output columns for a central interval of probability ``interval``: ``mean``
    (posterior mean of the mean response), its interval ``lower_90``/``upper_90`` (for 0.9),
    and the interval of a new observation ``predictive_lower_90``/``predictive_upper_90``."""
    lower, upper = interval_columns(interval)
    return ["mean", lower, upper, f"predictive_{lower}", f"predictive_{upper}"]


def rows_per_block(n_draws, rows=None):
    """Rows per block so that a block of rows x draws stays within `BLOCK_ELEMENTS`, or the
    ``rows`` given (checked)."""
    if rows is not None:
        return positive_int("chunk_rows", rows)
    return max(1, BLOCK_ELEMENTS // max(1, n_draws))


def predict_block(coef, X, offset, *, intercept, response, interval, rng):
    """Predictions for the rows of one block.

    Parameters
    ----------
    coef : ndarray of shape (n_draws, n_params)
        Posterior draws, the intercept first when ``intercept``, then one coefficient per
        column of X; any further columns are the family's other parameters, passed to
        ``response.draw``.
    X : ndarray of shape (n_rows, n_features)
    offset : ndarray of shape (n_rows,) or None
    intercept : bool
    response : tallchain.models.Response
        Gives the mean response E[y | eta] and draws a new observation given eta.
    interval : float
    rng : numpy.random.Generator
        Advanced by one draw per (row, posterior draw), row by row: blocks of any size
        consume the stream in the same order.

    Returns
    -------
    dict of str to ndarray of shape (n_rows,)
        The columns of `prediction_columns`.
    """
    k = int(intercept)
    n_coef = k + X.shape[1]
    eta = X @ coef[:, k:n_coef].T               # (rows, draws)
    if k:
        eta += coef[:, 0]
    if offset is not None:
        eta += offset[:, None]
    mu = response.mean(eta)
    y_new = response.draw(eta, rng, coef[:, n_coef:])   # one new observation per draw
    tail = (1.0 - interval) / 2.0
    mu_q = np.quantile(mu, [tail, 1.0 - tail], axis=1)
    y_q = np.quantile(y_new, [tail, 1.0 - tail], axis=1)
    names = prediction_columns(interval)
    return dict(zip(names, (mu.mean(axis=1), mu_q[0], mu_q[1], y_q[0], y_q[1])))


def predict_blocks(coef, blocks, record, *, interval=0.9, seed=0):
    """Predictions for a stream of row blocks.

    Parameters
    ----------
    coef : ndarray of shape (n_draws, n_coef)
    blocks : iterable of (X, offset)
        ``X`` of shape (rows, n_features) in the run's feature order, ``offset`` of shape
        (rows,) or None.
    record : dict
        The model's record (`tallchain.models` ``model.record()``): family, its options,
        ``add_intercept``.
    interval : float, default=0.9
    seed : int, default=0

    Yields
    ------
    dict of str to ndarray
        One block of the columns of `prediction_columns`.
    """
    interval = check_interval(interval)
    rng = np.random.default_rng(check_seed(seed))
    response = response_from_record(record)
    coef = np.ascontiguousarray(coef, dtype=float)
    for X, offset in blocks:
        yield predict_block(coef, X, offset, intercept=record["add_intercept"],
                            response=response, interval=interval, rng=rng)


def predict(result, new_X, *, interval=0.9, offset=None, seed=None, chunk_rows=None):
    """Posterior predictions for new rows; see `SampleResult.predict`."""
    record = result.model_record
    if record is None:
        fail("result", "has no model record (made by an older version)",
             "sample again with this version of tallchain")
    interval = check_interval(interval)
    names = record["feature_names"]
    X = design_of(new_X, names)
    n_rows = X.shape[0]
    if offset is not None:
        offset = np.asarray(offset, dtype=float).reshape(-1)
        if offset.shape[0] != n_rows:
            fail("offset", f"has {offset.shape[0]} values but new_X has {n_rows} rows",
                 "give one offset per new row")
        check_finite_matrix("offset", offset)
    coef = result.draws.reshape(-1, result.draws.shape[2])
    step = rows_per_block(coef.shape[0], chunk_rows)
    blocks = ((X[i:i + step], None if offset is None else offset[i:i + step])
              for i in range(0, n_rows, step))
    if seed is None:   # the run's seed when it was a number (a generator would be advanced)
        run_seed = result.settings.seed
        seed = run_seed if isinstance(run_seed, (int, np.integer)) else 0
    parts = list(predict_blocks(coef, blocks, record, interval=interval, seed=seed))
    return {name: np.concatenate([p[name] for p in parts]) if parts else np.empty(0)
            for name in prediction_columns(interval)}


def design_of(new_X, names):
    """New rows as a float array with the run's columns in the run's order.

    A table with named columns (pandas, polars or pyarrow table, dict of columns) is read by
    name; a plain array must have one column per feature, in the run's order.
    """
    columns = _column_names(new_X)
    if columns is not None:
        missing = [n for n in names if n not in columns]
        if missing:
            fail("new_X", f"has no column {missing[0]!r}",
                 f"give the run's columns by name: {', '.join(names)}")
        try:
            X = (np.column_stack([np.asarray(new_X[n], dtype=float) for n in names]) if names
                 else np.empty((len(new_X[columns[0]]) if columns else 0, 0)))
        except (TypeError, ValueError):
            bad = next(n for n in names if not _numeric(new_X[n]))
            fail("new_X", f"column {bad!r} is not numeric", "give numbers in every column")
    else:
        X = np.asarray(new_X, dtype=float) if not isinstance(new_X, np.ndarray) else new_X
        if X.ndim == 1:
            X = X.reshape(-1, 1) if len(names) == 1 else X.reshape(1, -1)
        if X.ndim != 2 or X.shape[1] != len(names):
            fail("new_X", f"has shape {X.shape}, but the run has {len(names)} columns "
                 f"({', '.join(names)})", "give one column per feature, in that order")
        X = X.astype(float, copy=False)
    check_finite_matrix("new_X", X)
    return X


def _column_names(table):
    for attr in ("columns", "column_names"):
        cols = getattr(table, attr, None)
        if cols is not None and not callable(cols):
            return [str(c) for c in cols]
    if isinstance(table, dict):
        return [str(c) for c in table]
    return None


def _numeric(values):
    try:
        np.asarray(values, dtype=float)
        return True
    except (TypeError, ValueError):
        return False
