"""tallchain from Python, end to end, on INVENTED data.

The scenario is made up: a fictional bakery chain asks how many loaves each shop sells per
day (Poisson counts) given the temperature, a market-day flag and the shop's floor area.
The data are simulated from known coefficients, so you can see the posterior recover them.

Run:  python examples/quickstart.py
"""

from pathlib import Path

import numpy as np

import tallchain as tc

# 1. Invented data: 100,000 shop-days, three features.
rng = np.random.default_rng(42)
n = 100_000
X = np.column_stack([
    rng.normal(15.0, 6.0, n),            # temperature, degrees C
    rng.binomial(1, 0.2, n),             # market day
    rng.uniform(0.5, 3.0, n),            # floor area, 100 m^2
])
true_beta = np.array([3.0, -0.01, 0.25, 0.15])   # intercept first
y = rng.poisson(np.exp(true_beta[0] + X @ true_beta[1:]))

# 2. The model: a Poisson GLM with a weakly informative Gaussian prior.
model = tc.PoissonRegression(X, y, prior=tc.GaussianPrior(sd=5.0),
                             coef_names=["temperature", "market_day", "floor_area"])

# 3. Sample: minibatch Metropolis-Hastings with the penalty correction, control variates
#    around the mode, step size and batch size tuned during warmup.
result = tc.sample(model, method="penalty-mala", step_size="auto", batch_size="auto",
                   control_variates=True, chains=4, draws=1000, warmup=500, seed=1)

# 4. Summary: per-coefficient mean, sd, 90% interval, ESS, R-hat, and the cost of the run.
summary = result.summary()
print(f"{'coef':<12}{'true':>8}{'mean':>9}{'sd':>9}{'ess_bulk':>10}{'r_hat':>8}")
for j, name in enumerate(summary.table["coef"]):
    print(f"{name:<12}{true_beta[j]:>8.3f}{summary.table['mean'][j]:>9.4f}"
          f"{summary.table['sd'][j]:>9.4f}{summary.table['ess_bulk'][j]:>10.0f}"
          f"{summary.table['r_hat'][j]:>8.3f}")
print(f"acceptance {result.acceptance_rate:.2f}, batch size {result.tuned['batch_size']}, "
      f"{result.data_passes:.1f} passes over the data, "
      f"{summary.run['ess_per_second']:.0f} ESS per second")

# 5. Save posterior.nc, summary.csv and run.json.
out = Path("runs/quickstart")
result.save(out)
print(f"wrote {out}/posterior.nc, summary.csv, run.json")

# 6. Hand the draws to ArviZ for anything else (plots, other diagnostics).
tree = result.to_arviz()
market = tree["posterior"]["beta"].sel(coef="market_day")
print(f"posterior mean of market_day, computed from the ArviZ data: {market.mean().item():.4f}")
