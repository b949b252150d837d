"""How table columns become the design matrix: named columns or a Wilkinson formula (private).

A formula (Wilkinson & Rogers, Applied Statistics 22, 1973) is read by the ``formulaic``
library. Streaming needs every batch of rows encoded identically, so the levels of each
categorical variable are collected in a first pass over the table (`scan`) and every batch
then carries them as a `pandas.Categorical` with exactly those categories: treatment coding
against the first level (sorted, or in the order of a pandas categorical's categories) unless
the formula says otherwise, e.g. ``C(carrier, contr.treatment("UA"))``. An `Encoding` holds
all of it, saves as JSON, and encodes new rows the same way later (`encode_new_rows`).
"""

import re
from dataclasses import asdict, dataclass, field

import numpy as np

from .._validation import fail, show_value

ENCODING_VERSION = 1
#: Per-row values read from a column of their own, as given (not through the formula).
ROW_ROLES = ("offset", "trials", "weights")
MAX_LEVELS = 10_000
# Transforms that learn from the data they see (a mean, a scale, knots, a lag) would learn
# from one batch only; the linear-predictor transforms of formulaic (log, exp, I, C, ...)
# are pointwise.
_STATEFUL = ("center", "scale", "standardize", "poly", "bs", "cr", "cs", "cc", "te", "lag",
             "hashed")
_STATEFUL_CALL = re.compile(r"\b(" + "|".join(_STATEFUL) + r")\s*\(")
_CATEGORICAL_CALL = re.compile(r"\bC\(\s*(`[^`]+`|[A-Za-z_][\w.]*)")


@dataclass
class Encoding:
    """What turns rows of a table into rows of X (and y, offset): saved with every run.

    Attributes
    ----------
    kind : {"formula", "columns"}
    formula : str or None
        The formula as written (``"late ~ hour + C(carrier)"``).
    response : str or None
        The response: a column name, or the left-hand side of the formula.
    offset : str or None
        The offset column.
    trials : str or None
        The column of trials per row (binomial regression).
    weights : str or None
        The column of frequency weights.
    variables : list of str
        The table columns X is computed from.
    levels : dict of str to list
        The levels of each categorical variable, the reference level first.
    columns : list of str
        The names of X's columns (the coefficient names, without the intercept).
    intercept : bool
        Whether the model adds an intercept (from the formula: ``- 1`` or ``0 +`` removes it).
    """

    kind: str
    formula: str | None
    response: str | None
    offset: str | None
    variables: list
    levels: dict = field(default_factory=dict)
    columns: list = field(default_factory=list)
    intercept: bool = True
    version: int = ENCODING_VERSION
    trials: str | None = None
    weights: str | None = None

    def to_dict(self):
        """A JSON-ready dict (`from_dict` reads it back)."""
        return {**asdict(self), "levels": {k: [_plain(v) for v in vals]
                                           for k, vals in self.levels.items()}}

    @classmethod
    def from_dict(cls, record):
        """The `Encoding` of a dict written by `to_dict` (e.g. ``run.json["data"]["encoding"]``)."""
        if not isinstance(record, dict) or record.get("version") != ENCODING_VERSION:
            fail("encoding", f"is not a tallchain encoding of version {ENCODING_VERSION}",
                 'give run.json["data"]["encoding"] of a run, or its run folder')
        return cls(**record)

    @property
    def needed(self):
        """Every table column read for a fit: response, row columns and the variables of X."""
        names = [] if self.response_columns is None else list(self.response_columns)
        names += list(self.row_columns.values())
        return list(dict.fromkeys(names + list(self.variables)))

    @property
    def row_columns(self):
        """``{role: column}`` of the per-row values given (offset, trials, weights), each
        copied into an array of its own beside y."""
        return {role: getattr(self, role) for role in ROW_ROLES if getattr(self, role)}

    @property
    def response_columns(self):
        if self.kind == "columns":
            return None if self.response is None else [self.response]
        from formulaic import Formula

        return sorted(Formula(self.formula).lhs.required_variables)


def check_row_roles(response_columns, row_columns):
    """Refuse a per-row column (offset, trials, weights) that is the response or already has
    another role: one column, one role.

    Returns ``{column: role}`` of the response and the per-row columns.
    """
    roles = dict.fromkeys(response_columns, "response")
    for role, name in row_columns.items():
        if name in roles:
            fail(role, f'is the {roles[name]} column "{name}"', f"give a separate {role} column")
        roles[name] = role
    return roles


def formula_encoding(formula, names, *, row_columns=None, field="formula"):
    """Parse a formula and check its variables against the table's column names.

    Returns
    -------
    Encoding
        Without levels and columns yet (`scan` and the first encoded batch fill them).
    categorical : set of str
        The variables inside ``C(...)``.
    """
    from formulaic import Formula
    from formulaic.errors import FormulaicError

    if not isinstance(formula, str) or "~" not in formula:
        fail(field, f"must be a formula with a response, got {show_value(formula)}",
             'write it as "response ~ terms", e.g. "late ~ hour + C(carrier)"')
    bad = _STATEFUL_CALL.search(formula)
    if bad:
        fail(field, f"uses {bad[1]}(), which learns from the data and would learn from one "
             "batch of rows only", "transform the column in the table beforehand (or set "
             "data.standardize = true for centring and scaling)")
    try:
        parsed = Formula(formula)
        lhs, rhs = parsed.lhs, parsed.rhs
    except (FormulaicError, AttributeError, ValueError) as exc:
        fail(field, f"cannot be read ({_first_line(exc)})",
             'write it as "response ~ terms", e.g. "late ~ hour + C(carrier)"')
    variables = sorted(rhs.required_variables)
    for name in sorted(lhs.required_variables) + variables:
        if name not in names:
            from .._validation import did_you_mean

            fail(field, f'uses "{name}", which is not a column of the table',
                 f"{did_you_mean(name, names)}the columns are: {', '.join(names)}")
    if not lhs.required_variables:
        fail(field, "has no response variable on the left of ~", "name the response column")
    roles = check_row_roles(sorted(lhs.required_variables), row_columns or {})
    for name in variables:
        if roles.get(name, "response") != "response":
            fail(field, f'uses "{name}", which is the {roles[name]} column',
                 f"leave it out of the terms, or give the {roles[name]} a column of its own "
                 "(a copy under another name)")
    categorical = {m.strip("`") for m in _CATEGORICAL_CALL.findall(formula)}
    row_columns = dict(row_columns or {})
    return Encoding(kind="formula", formula=formula, response=str(lhs),
                    offset=row_columns.pop("offset", None), variables=variables,
                    **row_columns), categorical


def encode_block(encoding, frame, state, sparse=False):
    """Encode a pandas frame of complete rows: ``(X block, y block or None)``.

    ``state`` is a dict kept across batches (formulaic's model specs, built on the first).
    With ``sparse`` (formulas only) the X block is a scipy CSR matrix: formulaic's sparse
    output, never dense.
    """
    if encoding.kind == "columns":
        X = np.column_stack([frame[c].to_numpy(dtype=np.float64) for c in encoding.variables]) \
            if encoding.variables else np.empty((len(frame), 0))
        y = None if encoding.response is None else frame[encoding.response].to_numpy(np.float64)
        return X, y
    from formulaic import Formula, model_matrix

    frame = with_levels(frame, encoding.levels)
    parsed = Formula(encoding.formula)
    if "rhs" not in state:
        state["rhs"] = _materialise(model_matrix, parsed.rhs, frame).model_spec
        names = list(state["rhs"].column_names)
        encoding.intercept = "Intercept" in names
        encoding.columns = [n for n in names if n != "Intercept"]
    spec = state["rhs"]
    if sparse:
        import scipy.sparse as sp
        if "rhs_sparse" not in state:
            state["rhs_sparse"] = spec.update(output="sparse")
        X = sp.csr_matrix(_materialise(state["rhs_sparse"].get_model_matrix, None, frame),
                          dtype=np.float64)
    else:
        X = np.asarray(_materialise(spec.get_model_matrix, None, frame), dtype=np.float64)
    if encoding.intercept:
        X = X[:, [j for j, n in enumerate(spec.column_names) if n != "Intercept"]]
    y = None
    if encoding.response_columns and set(encoding.response_columns) <= set(frame.columns):
        if "lhs" not in state:
            lhs = _materialise(model_matrix, parsed.lhs, frame)
            if lhs.shape[1] != 1:
                fail("formula", f"makes {lhs.shape[1]} response columns "
                     f"({', '.join(map(str, lhs.columns))}) from {encoding.response}",
                     "give a numeric or true/false response, or a comparison such as "
                     f'I({encoding.response} == "yes")')
            state["lhs"] = lhs.model_spec
        y = np.asarray(_materialise(state["lhs"].get_model_matrix, None, frame),
                       dtype=np.float64).reshape(-1)
    return X, y


def with_levels(frame, levels):
    """``frame`` with each categorical variable as a `pandas.Categorical` of exactly ``levels``.

    A value outside the levels is an error naming the column and the row (``frame``'s index).
    """
    import pandas as pd

    frame = frame.copy(deep=False)
    for name, cats in levels.items():
        if name not in frame.columns:
            continue
        values = frame[name]
        if isinstance(values.dtype, pd.CategoricalDtype):
            values = values.astype(object)
        unseen = np.flatnonzero(~np.asarray(values.isin(cats)) & np.asarray(values.notna()))
        if unseen.size:
            row = frame.index[unseen[0]]
            fail(name, f"has the level {show_value(_plain(values.iloc[unseen[0]]))} in row "
                 f"{row}, which the fitted model did not see (its levels: "
                 f"{_level_text(cats)})", "drop those rows, or refit with them")
        frame[name] = pd.Categorical(values, categories=cats)
    return frame


def _materialise(call, spec, frame):
    from formulaic.errors import FormulaicError

    try:
        args = (frame,) if spec is None else (spec, frame)
        with np.errstate(all="ignore"):   # log(0) and the like: refused, by row, afterwards
            return call(*args, na_action="ignore")
    except FormulaicError as exc:
        fail("formula", f"cannot be evaluated on the table ({_first_line(exc)})",
             "check the spelling of the functions and columns it uses")


def _first_line(exc):
    text = re.sub(r"\x1b\[[0-9;]*m|[⧛⧚]", "", str(exc))
    return text.strip().splitlines()[0] if text.strip() else type(exc).__name__


def _plain(value):
    return value.item() if isinstance(value, np.generic) else value


def _level_text(levels, limit=8):
    shown = ", ".join(map(str, levels[:limit]))
    return shown + (f", ... ({len(levels)} in all)" if len(levels) > limit else "")
