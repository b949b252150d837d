"""The run service: build the model of a config, sample, map back to the original scale, write."""

import dataclasses
import time
from pathlib import Path

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
    model : LinearRegression, LogisticRegression or PoissonRegression
    dataset : tallchain.data.Dataset
    """
    d, m = config.data, config.model
    with config.named_fields():
        dataset = load_data(d.x, d.y, offset=d.offset, columns=d.columns,
                            add_intercept=d.add_intercept, standardize=d.standardize,
                            table=None if d.table is None else d.table.path,
                            formula=m.formula, missing=d.missing, cache_dir=d.cache_dir)
        family = FAMILIES[m.family]
        options = {"noise_sd": m.noise_sd, "offset": dataset.offset}
        model = family(dataset.X, dataset.y, prior=m.prior(), add_intercept=dataset.add_intercept,
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
        partial = _to_original_scale(stop.result, dataset, load_seconds)
        save_result(partial, config.output_dir)
        raise KeyboardInterrupt(
            f"{partial.completed_draws} draws per chain kept in "
            f"{Path(config.output_dir) / 'posterior.nc'}; continue with: tallchain run "
            f"{config.path or 'CONFIG'} --resume (with the same options)") from None
    result = _to_original_scale(result, dataset, load_seconds)
    extra = {"config": None if config.path is None else str(config.path.absolute()),
             "family": config.model.family,
             "data": _data_record(config, dataset)}
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


def _data_record(config, dataset):
    """run.json's ``data``: where the data came from, how a table was encoded (for new rows),
    rows dropped for missing values, the cache entry, the standardisation."""
    d, scaling = config.data, dataset.standardization
    text = (lambda v: None if v is None else str(v))
    return {"x": text(d.x), "table": text(d.table), "y": text(d.y), "offset": text(d.offset),
            "formula": config.model.formula, "add_intercept": dataset.add_intercept,
            "rows": dataset.table_report,
            "encoding": None if dataset.encoding is None else dataset.encoding.to_dict(),
            "standardization": None if scaling is None else scaling.as_dict()}


def _to_original_scale(result, dataset, load_seconds):
    """Add the data loading to the set-up time and map standardised draws back."""
    changes = {"setup_seconds": result.setup_seconds + load_seconds}
    scaling = dataset.standardization
    if scaling is not None:
        changes["draws"] = scaling.to_original(result.draws)
        if result.laplace_mode is not None:
            changes["laplace_mode"] = scaling.to_original(result.laplace_mode)
    return dataclasses.replace(result, **changes)


