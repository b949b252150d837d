"""The ``estimate`` command: unbiased estimates from coupled chains (registered with the CLI)."""

import argparse
import time
from pathlib import Path

from ..outputs import atomic_write, write_json
from ._check_commands import _scheduler_argument
from ._config import named_fields
from ._registry import (EXIT_INCONCLUSIVE, EXIT_OK, add_config_arguments, command,
                        config_from_args, option_or, warnings_as_lines)
from ._service import checked_model


def _span(text):
    try:
        k, m = (int(v) for v in text.split(","))
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"must be two whole numbers k,m like 100,1000; got {text!r}") from None
    return (k, m)


def _add_estimate_arguments(parser):
    add_config_arguments(parser, exclude=("--draws", "--chains"))
    parser.add_argument("--replicates", type=int, default=20, metavar="R",
                        help="independent coupled pairs (default 20)")
    parser.add_argument("--lag", type=int, default=1, metavar="L",
                        help="lag between the two chains of a pair (default 1)")
    parser.add_argument("--span", type=_span, default=None, metavar="K,M",
                        help="iterations k..m the estimator averages (default: k the 0.99 "
                             "quantile of 20 pilot pairs' meeting times, m = 10 k)")
    parser.add_argument("--max-iterations", type=int, default=100_000, metavar="N",
                        help="stop a pair that has not met after N iterations (default 100000)")
    parser.add_argument("--level", type=float, default=0.95, metavar="P",
                        help="probability of the intervals (default 0.95)")
    _scheduler_argument(parser)


# estimate()'s own arguments, named as the options that set them.
_ESTIMATE_OPTIONS = {"replicates": "--replicates", "lag": "--lag", "span": "--span",
                     "max_iterations": "--max-iterations", "level": "--level"}


@command("estimate", "unbiased estimates of posterior means and sds from coupled chains, "
         "with intervals and a bound on the warmup needed", _add_estimate_arguments)
def _estimate(args):
    from ..mcmc import check_coupled_settings, check_estimate_arguments, estimate

    config = config_from_args(args)
    # every option and setting is checked before the data are read
    with config.named_fields(), named_fields(_ESTIMATE_OPTIONS):
        check_estimate_arguments(args.replicates, args.lag, args.span, args.max_iterations,
                                 args.level)
        check_coupled_settings(config.sampler)
    model = checked_model(config, args.scheduler, "processes")
    out = Path(config.output_dir)
    settings = config.sampler_given()
    for key in ("draws", "chains"):   # the tuning run's own (only its warmup is used)
        settings.pop(key, None)
    compute = config.compute
    t = time.perf_counter()
    with warnings_as_lines(), config.named_fields(), named_fields(_ESTIMATE_OPTIONS):
        res = estimate(model, replicates=args.replicates, lag=args.lag, span=args.span,
                       max_iterations=args.max_iterations, level=args.level,
                       scheduler=option_or(args.scheduler, compute.get("scheduler", "processes")),
                       workers=option_or(args.workers, compute.get("workers")),
                       progress=not args.quiet, **settings)
    record = res.to_dict()
    record["seconds"] = time.perf_counter() - t
    write_json(out / "estimate.json", record)
    atomic_write(out / "estimate.csv", res.write_csv)
    res.plot(out / "tv_bound.png")
    if not args.quiet:
        _print(res, out, record["seconds"])
    return EXIT_INCONCLUSIVE if res.unmet else EXIT_OK


def _print(res, out, seconds):
    k, m = res.span
    q = res.meeting_quantiles()
    print(f"{res.method}: {res.meeting_times.size} coupled pairs, lag {res.lag}, k = {k}, "
          f"m = {m}, step {res.step_size:.4g}"
          + (f", batch {res.batch_size}" if res.batch_size else ""))
    w = max(14, *(len(name) + 1 for name in res.coef_names))
    pct = f"{res.level:.0%}"
    print(f"{'coef':<{w}}{'mean':>11}{'se':>10}{pct + ' low':>11}{pct + ' high':>11}{'sd':>10}")
    for j, name in enumerate(res.coef_names):
        print(f"{name:<{w}}{res.mean[j]:>11.4g}{res.se[j]:>10.3g}{res.lower[j]:>11.4g}"
              f"{res.upper[j]:>11.4g}{res.sd[j]:>10.4g}")
    print("meeting times: " + ", ".join(f"{key} quantile {v:g}" if key != "1.0" else f"max {v:g}"
                                         for key, v in q.items() if v is not None))
    warm = res.warmup_for_tv
    print("bound on the distance to the posterior below 0.01 after "
          + (f"{warm} iterations (a warmup long enough for this method and start)"
             if warm is not None else "no iteration reached"))
    if res.unmet:
        print(f"note: {res.unmet} pairs did not meet within {res.max_iterations} iterations "
              "and are left out: the estimates are not unbiased; raise --max-iterations")
    print(f"{'INCONCLUSIVE' if res.unmet else 'done'} in {seconds:.0f} s: wrote "
          f"estimate.json, estimate.csv, tv_bound.png to {out}")
