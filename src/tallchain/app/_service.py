"""The run service: build the model of a config, sample, map back to the original scale, write."""

import dataclasses
import shlex
import time
from pathlib import Path

import numpy as np

from .._addresses import CONNECT_SECONDS, looks_like_address, probe_address
from ..data import cache_folder, load_data
from ..executors import check_scheduler
from ..exceptions import SamplingInterrupted
from ..mcmc import load_or_prepare, sample
from ..models import FAMILIES
from ..outputs import check_writable, removed_if_left_empty, save_result
from ._config import named_fields
from ._folder import CHECKPOINT_NAME, prepare_folder
from ._registry import option_or, warnings_as_lines


def build_model(config):
    """Load the data of a `RunConfig` and build its model.

    Returns
    -------
    model : LinearRegression, LogisticRegression, PoissonRegression, NegativeBinomialRegression
        or BinomialRegression
        Frequency weights (``[data] weights``) go to every family; the family's own options
        (trials, offset, noise sd, priors) only to a family that takes them.
    dataset : tallchain.data.Dataset
    """
    d, m = config.data, config.model
    with config.named_fields():
        dataset = load_data(d.x, d.y, offset=d.offset, trials=d.trials, weights=d.weights,
                            columns=d.columns,
                            add_intercept=d.add_intercept, standardize=d.standardize,
                            table=None if d.table is None else d.table.path,
                            formula=m.formula, missing=d.missing, cache_dir=d.cache_dir)
        family = FAMILIES[m.family]
        options = {"noise_sd": m.noise_sd, "noise_sd_prior": m.noise_sd_prior,
                   "dispersion_prior": m.dispersion_prior, "offset": dataset.offset,
                   "trials": dataset.trials}
        model = family(dataset.X, dataset.y, prior=m.prior(), add_intercept=dataset.add_intercept,
                       coef_names=dataset.feature_names, weights=dataset.weights,
                       **{k: v for k, v in options.items()
                          if k in family.family_options and v is not None})
    return model, dataset


def check_before_work(config, scheduler=None, default_scheduler="threads"):
    """The checks that need no pass over the data but the world outside the config: the output
    folder can be created and written, and a scheduler address (``--scheduler`` or
    ``compute.scheduler``) is well formed and answers within ``compute.connect_seconds``.

    ``default_scheduler`` None: the command uses no scheduler (validate), nothing to probe.
    Returns the scheduler the command uses.
    """
    check_writable(_output_label(config), config.output_dir)
    if default_scheduler is None:
        return None
    compute = config.compute
    if scheduler is not None:
        with named_fields({"scheduler": "--scheduler", "workers": "--workers"}):
            check_scheduler(scheduler, threads=default_scheduler == "threads")
    chosen = option_or(scheduler, compute.get("scheduler", default_scheduler))
    if looks_like_address(chosen):
        where = "--scheduler" if scheduler is not None else "compute.scheduler"
        probe_address(chosen, compute.get("connect_seconds", CONNECT_SECONDS), where,
                      "raise compute.connect_seconds")
    return chosen


def checked_model(config, scheduler, default_scheduler):
    """`check_before_work`, then `build_model` with its warnings as lines: the model of a
    checking command. An output folder that the checks created is removed again when the
    config or its data are refused (nothing was written into it yet)."""
    with removed_if_left_empty(config.output_dir):
        check_before_work(config, scheduler, default_scheduler)
        with warnings_as_lines():
            model, _ = build_model(config)
    return model


def run_config(config, *, progress=False, resume=False, scheduler=None, workers=None,
               extend=None, overwrite=False, command=None):
    """Build the model, sample, map back to the original scale and write the output files.

    ``scheduler`` and ``workers`` (where the chains run) override the config's ``[compute]``
    section; without either, the chains run in threads of this process. A folder holding a
    run is refused unless ``resume``, ``extend`` (that many more draws per chain, from the
    checkpoint) or ``overwrite`` says what to do with it (`_folder.prepare_folder`).
    ``command`` (the run's command-line words without --resume, --extend, --overwrite)
    makes the hint printed on interruption.

    Returns
    -------
    result : SampleResult
        With ``load_seconds`` (reading and checking the data) and ``total_seconds`` from
        the start of the command to the last draw.
    summary : tallchain.mcmc.Summary
    dataset : tallchain.data.Dataset
    """
    t0 = time.perf_counter()
    scheduler = check_before_work(config, scheduler)
    config = prepare_folder(config, _output_label(config), resume=resume, extend=extend,
                            overwrite=overwrite)
    resume = resume or extend is not None
    hint = _resume_hint(config, command, extend)
    model, dataset = build_model(config)
    load_seconds = time.perf_counter() - t0
    checkpoint = Path(config.output_dir) / CHECKPOINT_NAME
    try:
        with config.named_fields():
            stored = stored_setup(config, model, resume=resume)
            result = sample(model, config.sampler, progress=progress, checkpoint=checkpoint,
                            preparation=None if stored is None else stored[0],
                            resume=resume, checkpoint_extra=_data_identity(config, dataset),
                            scheduler=scheduler,
                            workers=option_or(workers, config.compute.get("workers")),
                            connect_seconds=config.compute.get("connect_seconds",
                                                               CONNECT_SECONDS))
    except SamplingInterrupted as stop:
        partial = _to_original_scale(_with_store(stop.result, stored), dataset, load_seconds,
                                     model.n_beta, time.perf_counter() - t0)
        save_result(partial, config.output_dir, interval=config.interval)
        raise KeyboardInterrupt(
            f"{partial.completed_draws} of {config.sampler.draws} draws per chain kept in "
            f"{Path(config.output_dir) / 'posterior.nc'} (status interrupted); continue with: "
            f"{hint}") from None
    result = _to_original_scale(_with_store(result, stored), dataset, load_seconds, model.n_beta,
                                time.perf_counter() - t0)
    extra = {"config": None if config.path is None else str(config.path.absolute()),
             "family": config.model.family, "interval": config.interval,
             "data": _data_record(config, dataset)}
    try:
        summary = save_result(result, config.output_dir, wall_seconds=time.perf_counter() - t0,
                              extra=extra, interval=config.interval)
    except KeyboardInterrupt:
        # The checkpoint holds every draw (the driver writes it at the end): keep it.
        raise KeyboardInterrupt(
            f"while writing the outputs; every draw is kept in {checkpoint}; write them with: "
            f"{hint}") from None
    # The checkpoint stays: --extend continues the finished run from it.
    return result, summary, dataset


def setup_store_folder(config):
    """Where ``run`` keeps its set-up for later runs (`tallchain.mcmc.load_or_prepare`): the
    data's cache folder (``[data] cache_dir``, or ``.tallchain-cache`` beside the table or x
    file); None with ``[data] reuse_setup = false``."""
    d = config.data
    if not d.reuse_setup:
        return None
    return cache_folder((d.table if d.table is not None else d.x).path, d.cache_dir)


def stored_setup(config, model, *, resume=False):
    """``(preparation, record)`` of `load_or_prepare` for a run of ``config`` on ``model``, or
    None when the run needs no mode (nothing costly to keep), the store is turned off, or a
    ``resume`` finds no entry. The settings are checked against the model first, so a bad
    one is still refused before any pass over the data; a resume only reads the store, so
    that `sample` refuses a changed problem before the mode is searched for."""
    settings = config.sampler
    folder = setup_store_folder(config)
    if folder is None or not settings.needs_laplace:
        return None
    settings.check_against(model)
    orders = (settings.proxy_order_used,) if settings.spec.minibatch else ()
    stored = load_or_prepare(model, folder, proxy_orders=orders, make=not resume)
    return None if stored[0] is None else stored


def _with_store(result, stored):
    """``result`` with the set-up of a `stored_setup` counted in: its time in
    ``setup_seconds``, its passes (none when loaded) in ``setup_parts``, and ``store``
    ("loaded", "written" or "not written") with the entry and its seconds."""
    if stored is None:
        return result
    prep, record = stored
    parts = dict(result.setup_parts)
    for key, value in prep.parts.items():
        parts[key] = parts.get(key, 0) + value
    parts.update(store=record["store"], store_seconds=record["seconds"],
                 store_entry=record["entry"])
    return dataclasses.replace(result, setup_parts=parts,
                               setup_seconds=result.setup_seconds + record["seconds"])


def _output_label(config):
    return ("output.dir (from the command line)" if "output.dir" in config.overridden
            else "output.dir")


def _resume_hint(config, command, extend):
    """The command that continues this run: its own words and --resume; after --extend, the
    draws it was extended to (a resume may ask for more draws, never fewer)."""
    words = list(command) if command is not None else [str(config.path or "CONFIG")]
    if extend is not None:
        words = [w for i, w in enumerate(words)
                 if w != "--draws" and (i == 0 or words[i - 1] != "--draws")]
        words += ["--draws", str(config.sampler.draws)]
    return shlex.join(["tallchain", "run", *words, "--resume"])


def _data_identity(config, dataset):
    """What a resume must match beyond the model: how the columns were chosen and scaled."""
    scaling = dataset.standardization
    return {"data.columns": None if config.data.columns is None else list(config.data.columns),
            "standardization": None if scaling is None else scaling.as_dict()}


def _data_record(config, dataset):
    """run.json's ``data``: where the data came from, how a table was encoded (for new rows),
    rows dropped for missing values, the cache entry, the standardisation."""
    d, scaling = config.data, dataset.standardization
    text = (lambda v: None if v is None else str(v))
    return {"x": text(d.x), "table": text(d.table), "y": text(d.y), "offset": text(d.offset),
            "trials": text(d.trials), "weights": text(d.weights),
            "formula": config.model.formula, "add_intercept": dataset.add_intercept,
            "rows": dataset.table_report,
            "encoding": None if dataset.encoding is None else dataset.encoding.to_dict(),
            "standardization": None if scaling is None else scaling.as_dict()}


def _to_original_scale(result, dataset, load_seconds, n_beta, total_seconds):
    """Record the data loading and the time to the last draw, and map standardised draws
    back (the first ``n_beta`` columns, the coefficients; a noise sd after them is on y's
    scale, unchanged)."""
    changes = {"load_seconds": load_seconds, "total_seconds": total_seconds}
    scaling = dataset.standardization
    if scaling is not None:
        for key in ("draws", "laplace_mode"):
            value = getattr(result, key)
            if value is not None:
                value = np.array(value, dtype=float)
                value[..., :n_beta] = scaling.to_original(value[..., :n_beta])
                changes[key] = value
        if result.laplace_cov is not None:
            # to_original is linear on the coefficients, b -> M b (applied to the last axis):
            # the covariance's coefficient block maps to M C M^T, its cross block with the
            # family parameters to M C_bf. Applied to the rows of C[:, :nb] it gives C M^T,
            # applied to the rows of the transpose of C[:nb, :] it gives (M C)^T.
            cov = np.array(result.laplace_cov, dtype=float)
            cov[:n_beta, :] = scaling.to_original(cov[:n_beta, :].T).T
            cov[:, :n_beta] = scaling.to_original(cov[:, :n_beta])
            changes["laplace_cov"] = cov
    return dataclasses.replace(result, **changes)


