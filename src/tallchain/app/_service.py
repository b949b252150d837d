"""The run service: build the model of a config, sample, map back to the original scale, write."""

import dataclasses
import time
from pathlib import Path

import numpy as np

from ..data import load_data
from ..exceptions import SamplingInterrupted
from ..mcmc import sample
from ..models import FAMILIES
from ..outputs import save_result
from ._registry import option_or


def build_model(config):
    """Load the data of a `RunConfig` and build its model.

    Returns
    -------
    model : LinearRegression, LogisticRegression, PoissonRegression or NegativeBinomialRegression
    dataset : tallchain.data.Dataset
    """
    d, m = config.data, config.model
    with config.named_fields():
        dataset = load_data(d.x, d.y, offset=d.offset, columns=d.columns,
                            add_intercept=d.add_intercept, standardize=d.standardize)
        family = FAMILIES[m.family]
        options = {"noise_sd": m.noise_sd, "noise_sd_prior": m.noise_sd_prior,
                   "dispersion_prior": m.dispersion_prior, "offset": dataset.offset}
        model = family(dataset.X, dataset.y, prior=m.prior(), add_intercept=d.add_intercept,
                       coef_names=dataset.feature_names,
                       **{k: v for k, v in options.items()
                          if k in family.family_options and v is not None})
    return model, dataset


def run_config(config, *, progress=False, resume=False, scheduler=None, workers=None):
    """Build the model, sample, map back to the original scale and write the output files.

    ``scheduler`` and ``workers`` (where the chains run) override the config's ``[compute]``
    section; without either, the chains run in threads of this process.

    Returns
    -------
    result : SampleResult
        With ``setup_seconds`` including the data loading.
    summary : tallchain.mcmc.Summary
    dataset : tallchain.data.Dataset
    """
    t0 = time.perf_counter()
    model, dataset = build_model(config)
    load_seconds = time.perf_counter() - t0
    checkpoint = Path(config.output_dir) / CHECKPOINT_NAME
    try:
        with config.named_fields():
            result = sample(model, config.sampler, progress=progress, checkpoint=checkpoint,
                            resume=resume,
                            scheduler=option_or(scheduler, config.compute.get("scheduler", "threads")),
                            workers=option_or(workers, config.compute.get("workers")))
    except SamplingInterrupted as stop:
        partial = _to_original_scale(stop.result, dataset, load_seconds, model.n_beta)
        save_result(partial, config.output_dir)
        raise KeyboardInterrupt(
            f"{partial.completed_draws} draws per chain kept in "
            f"{Path(config.output_dir) / 'posterior.nc'}; continue with: tallchain run "
            f"{config.path or 'CONFIG'} --resume (with the same options)") from None
    result = _to_original_scale(result, dataset, load_seconds, model.n_beta)
    scaling = dataset.standardization
    extra = {"config": None if config.path is None else str(config.path.absolute()),
             "family": config.model.family,
             "data": {"x": str(config.data.x), "y": str(config.data.y),
                      "offset": None if config.data.offset is None else str(config.data.offset),
                      "add_intercept": config.data.add_intercept,
                      "standardization": None if scaling is None else scaling.as_dict()}}
    try:
        summary = save_result(result, config.output_dir, wall_seconds=time.perf_counter() - t0,
                              extra=extra)
    except KeyboardInterrupt:
        # The checkpoint holds every draw (the driver writes it at the end): keep it.
        raise KeyboardInterrupt(
            f"while writing the outputs; every draw is kept in {checkpoint}; write them with: "
            f"tallchain run {config.path or 'CONFIG'} --resume (with the same options)") from None
    checkpoint.unlink(missing_ok=True)   # only once the outputs are safely written
    return result, summary, dataset


CHECKPOINT_NAME = "checkpoint.npz"


def _to_original_scale(result, dataset, load_seconds, n_beta):
    """Add the data loading to the set-up time and map standardised draws back (the first
    ``n_beta`` columns, the coefficients; a noise sd after them is on y's scale, unchanged)."""
    changes = {"setup_seconds": result.setup_seconds + load_seconds}
    scaling = dataset.standardization
    if scaling is not None:
        for key in ("draws", "laplace_mode"):
            value = getattr(result, key)
            if value is not None:
                value = np.array(value, dtype=float)
                value[..., :n_beta] = scaling.to_original(value[..., :n_beta])
                changes[key] = value
    return dataclasses.replace(result, **changes)


