"""The built-in demo: an invented logistic-regression problem with known coefficients.

The scenario is made up for this package: Harbourline, a fictional ferry cooperative, asks which
sailings leave more than 15 minutes late. Every number is simulated from the coefficients in
`TRUE_COEFFICIENTS`; nothing comes from a real operator.
"""

import json
from pathlib import Path

import numpy as np

FOLDER = "tallchain-demo"
N_ROWS = 200_000
SEED = 20_240_611

#: Column name (the config's ``[data] columns``, as the summary shows it), what it stands
#: for, true coefficient; in the order of the columns of X.npy.
FEATURES = (
    ("wind_speed", "wind speed at departure, m/s", 0.16),
    ("wave_height", "wave height, m", 0.55),
    ("passengers_booked", "passengers booked, hundreds", 0.30),
    ("weekend", "weekend sailing (1) or weekday (0)", -0.40),
    ("inbound_late", "the inbound crossing arrived late (1) or not (0)", 1.10),
)
TRUE_INTERCEPT = -3.6
TRUE_COEFFICIENTS = {"intercept": TRUE_INTERCEPT, **{name: b for name, _, b in FEATURES}}

DESCRIPTION = (
    "INVENTED DATA. Harbourline, a fictional ferry cooperative, asks which of its sailings "
    "leave more than 15 minutes late. {n:,} sailings are simulated from known coefficients, "
    "and the posterior is sampled with penalty-mala (minibatch Metropolis-Hastings with the "
    "penalty correction), control variates and an automatically chosen batch size."
)

CONFIG = """\
# tallchain demo. The data are INVENTED: simulated sailings of a fictional ferry cooperative.
[data]
x = "X.npy"
y = "y.npy"
columns = [{columns}]   # the names of the columns of X.npy, in order
add_intercept = true
standardize = true

[model]
family = "logistic"
prior_sd = 10.0

[sampler]
method = "penalty-mala"
step_size = "auto"
batch_size = "auto"
control_variates = true
chains = 4
draws = 1000
warmup = 500
seed = 1

[output]
dir = "."
"""


def simulate(n_rows=N_ROWS, seed=SEED):
    """Simulate the invented sailings.

    Parameters
    ----------
    n_rows : int, default=200_000
    seed : int, default=SEED

    Returns
    -------
    X : ndarray of shape (n_rows, 5)
        Columns as in `FEATURES`.
    y : ndarray of shape (n_rows,), dtype int8
        1 when the sailing left more than 15 minutes late.
    """
    rng = np.random.default_rng(seed)
    wind = rng.gamma(shape=3.0, scale=2.5, size=n_rows)
    waves = np.clip(0.12 * wind + rng.normal(0.0, 0.35, n_rows), 0.0, None)
    passengers = rng.uniform(0.2, 4.0, n_rows)
    weekend = (rng.random(n_rows) < 2 / 7).astype(float)
    inbound_late = (rng.random(n_rows) < 0.15 + 0.01 * wind).astype(float)
    X = np.column_stack([wind, waves, passengers, weekend, inbound_late])
    eta = TRUE_INTERCEPT + X @ np.array([b for _, _, b in FEATURES])
    y = (rng.random(n_rows) < 1.0 / (1.0 + np.exp(-eta))).astype(np.int8)
    return X, y


def write_demo(folder, *, n_rows=N_ROWS):
    """Write X.npy, y.npy, truth.json and config.toml into ``folder`` (created if needed).

    Parameters
    ----------
    folder : path-like
    n_rows : int, default=200_000

    Returns
    -------
    pathlib.Path
        The config file.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    X, y = simulate(n_rows)
    np.save(folder / "X.npy", X, allow_pickle=False)
    np.save(folder / "y.npy", y, allow_pickle=False)
    truth = {"note": "invented data; these are the coefficients the data were simulated from",
             "coefficients": TRUE_COEFFICIENTS,
             "features": {name: meaning for name, meaning, _ in FEATURES}}
    (folder / "truth.json").write_text(json.dumps(truth, indent=2) + "\n")
    config = folder / "config.toml"
    config.write_text(CONFIG.format(columns=", ".join(f'"{name}"' for name, _, _ in FEATURES)))
    return config
