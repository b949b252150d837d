"""Write the invented data sets that the example configs in configs/ run on.

Every data set here is INVENTED: simulated from known coefficients, in scenarios made up for
this package. Nothing describes a real organisation.

* ``orchard_X.npy``, ``orchard_y.npy`` (linear): a fictional community orchard relates the
  weight of its apples (grams above 150 g) to sun hours, watering and tree age; the noise sd is
  known (4 g, from the scale).
* ``webshop.csv`` (logistic): visits to a fictional coffee roaster's web shop; does the visit
  end in an order?
* ``streetlights.npz`` (Poisson): faults reported per district and month in a fictional town,
  with the log of the number of lamps as offset.
* ``nursery.parquet`` (binomial): trays of a fictional tree nursery, seeds sown and seedlings
  that came up, by soil mix (a categorical column read through a formula), night temperature
  and whether the seeds were coated.

Usage::

    python examples/make_example_data.py            # writes into examples/data/
    tallchain run configs/linear.toml
"""

import argparse
import json
from pathlib import Path

import numpy as np

TRUTH = {
    "linear": {"intercept": 12.0, "sun_hours": 1.5, "watering": 3.0, "tree_age": -0.4},
    "logistic": {"intercept": -4.0, "pages_viewed": 0.35, "minutes_on_site": 0.05,
                 "returning": 1.2, "mobile": -0.5},
    "poisson": {"intercept": -3.0, "older_lamp_type": 0.8, "temperature": -0.3,
                "years_since_rewiring": 0.02},
    "binomial": {"intercept": -0.4, "C(soil_mix)[T.peat]": 0.5, "C(soil_mix)[T.sand]": -0.3,
                 "night_temperature": 0.08, "coated": 0.6},
}
SOIL_MIXES = ("loam", "peat", "sand")   # loam first: the reference level of C(soil_mix)
NOISE_SD = 4.0


def orchard(rng, n):
    sun = rng.uniform(2.0, 10.0, n)
    water = rng.binomial(1, 0.6, n).astype(float)
    age = rng.uniform(1.0, 30.0, n)
    X = np.column_stack([sun, water, age])
    b = TRUTH["linear"]
    y = b["intercept"] + X @ [b["sun_hours"], b["watering"], b["tree_age"]] \
        + rng.normal(0.0, NOISE_SD, n)
    return X, y


def webshop(rng, n):
    pages = rng.poisson(4.0, n).astype(float)
    minutes = rng.gamma(2.0, 4.0, n)
    returning = rng.binomial(1, 0.3, n).astype(float)
    mobile = rng.binomial(1, 0.55, n).astype(float)
    b = TRUTH["logistic"]
    eta = (b["intercept"] + b["pages_viewed"] * pages + b["minutes_on_site"] * minutes
           + b["returning"] * returning + b["mobile"] * mobile)
    ordered = (rng.random(n) < 1.0 / (1.0 + np.exp(-eta))).astype(int)
    visit_id = np.arange(1, n + 1)
    return np.column_stack([visit_id, pages, minutes, returning, mobile, ordered])


def streetlights(rng, n):
    lamps = rng.integers(50, 2000, n).astype(float)
    X = np.column_stack([rng.binomial(1, 0.4, n),          # older lamp type (1) or not
                         rng.normal(0.0, 1.0, n),          # standardised temperature
                         rng.uniform(0.0, 40.0, n)])       # years since rewiring
    b = TRUTH["poisson"]
    eta = b["intercept"] + X @ [b["older_lamp_type"], b["temperature"],
                                b["years_since_rewiring"]] + np.log(lamps)
    return X, rng.poisson(np.exp(eta)).astype(float), np.log(lamps)


def nursery(rng, n):
    """A table (dict of columns): soil mix, night temperature (deg C), coated, sown, came_up."""
    soil = rng.choice(SOIL_MIXES, n, p=[0.5, 0.3, 0.2])
    temperature = rng.normal(12.0, 3.0, n)
    coated = rng.binomial(1, 0.5, n)
    sown = rng.integers(20, 61, n)
    b = TRUTH["binomial"]
    eta = (b["intercept"] + b["night_temperature"] * (temperature - 12.0) + b["coated"] * coated
           + np.select([soil == "peat", soil == "sand"], [b["C(soil_mix)[T.peat]"],
                                                          b["C(soil_mix)[T.sand]"]], 0.0))
    came_up = rng.binomial(sown, 1.0 / (1.0 + np.exp(-eta)))
    return {"soil_mix": soil, "night_temperature": np.round(temperature - 12.0, 2),
            "coated": coated, "seeds_sown": sown, "came_up": came_up}


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default=Path(__file__).parent / "data", type=Path)
    parser.add_argument("--rows", default=20_000, type=int)
    args = parser.parse_args(argv)
    out = args.out
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(7)
    X, y = orchard(rng, args.rows)
    np.save(out / "orchard_X.npy", X, allow_pickle=False)
    np.save(out / "orchard_y.npy", y, allow_pickle=False)
    table = webshop(rng, args.rows)
    np.savetxt(out / "webshop.csv", table, delimiter=",",
               fmt=["%d", "%d", "%.3f", "%d", "%d", "%d"],
               header="visit_id,pages_viewed,minutes_on_site,returning,mobile,ordered",
               comments="")
    X, y, offset = streetlights(rng, args.rows)
    np.savez(out / "streetlights.npz", x=X, y=y, offset=offset)
    import pyarrow as pa
    import pyarrow.parquet as pq

    pq.write_table(pa.table(nursery(rng, args.rows)), out / "nursery.parquet")
    (out / "truth.json").write_text(json.dumps(
        {"note": "invented data; the coefficients they were simulated from",
         "noise_sd_linear": NOISE_SD, **TRUTH}, indent=2) + "\n")
    print(f"wrote invented example data to {out}")


if __name__ == "__main__":
    main()
