"""The checking commands: ``validate``, ``sweep`` and ``calibrate`` (registered with the CLI)."""

import argparse
import json
import time
from pathlib import Path

from ..outputs import write_json
from ._config import named_fields
from ._registry import (EXIT_CHECK_FAILED, EXIT_INCONCLUSIVE, EXIT_OK, add_config_arguments,
                        command, config_from_args, option_or, warnings_as_lines)
from ._service import checked_model

# The exit code of each verdict of a check.
_EXIT_FOR = {"passed": EXIT_OK, "failed": EXIT_CHECK_FAILED, "inconclusive": EXIT_INCONCLUSIVE}


def _verdict_word(verdict):
    """A check's verdict as printed: a failure in capitals, so that it stands out."""
    return verdict.upper() if verdict == "failed" else verdict


def _scheduler_argument(parser):
    parser.add_argument("--scheduler", default=None, metavar="WHERE",
                        help='where runs execute: "processes" (default), "dask-local", or a '
                             "Dask scheduler address such as tcp://host:8786")
    parser.add_argument("--workers", type=int, default=None, metavar="N",
                        help="worker processes (default: the number of cores)")
    parser.add_argument("--quiet", action="store_true", help="print only warnings and errors")


def _load(args):
    """The config, its model and the (created, writable) output folder of a checking command;
    the folder and a scheduler address are checked before the data are read."""
    config = config_from_args(args)
    uses_workers = hasattr(args, "scheduler")   # validate runs its chains in this process
    model = checked_model(config, getattr(args, "scheduler", None),
                          "processes" if uses_workers else None)
    return config, model, Path(config.output_dir)


def _level_argument(parser, what):
    parser.add_argument("--level", type=float, default=0.05, metavar="A",
                        help=f"false-alarm rate of the whole check, Bonferroni over {what} "
                             "(default 0.05)")


def _add_validate_arguments(parser):
    add_config_arguments(parser)
    _level_argument(parser, "coefficients")
    parser.add_argument("--quiet", action="store_true", help="print only warnings and errors")


@command("validate", "run the configured sampler on the conjugate twin of the problem and "
         "compare with its exact posterior", _add_validate_arguments)
def _validate(args):
    from ..checks import check_on_twin

    config, model, out = _load(args)
    with warnings_as_lines(), config.named_fields(), named_fields({"level": "--level"}):
        check = check_on_twin(model, config.sampler, level=args.level)
    write_json(out / "validate.json", check.as_dict())
    if not args.quiet:
        k = check.ks
        print(f"conjugate twin ({check.response} response, noise sd {check.noise_sd:.4g}), "
              f"method {check.result.method}")
        w = max(14, *(len(name) + 1 for name in k.coef_names))
        print(f"{'coef':<{w}}{'KS':>9}{'floor':>9}{'KS/floor':>10}  verdict")
        for name, ks, fl, ratio, v in zip(k.coef_names, k.ks, k.floor, k.ratio, k.verdicts):
            print(f"{name:<{w}}{ks:>9.4f}{fl:>9.4f}{ratio:>10.2f}  {v}")
        for note in check.notes:
            print(f"note: {note}")
        print(f"{_verdict_word(check.verdict)} "
              f"(false-alarm rate {check.level:g} over {len(k.coef_names)} coefficients, "
              f"threshold {k.tolerance:.3f} floors): wrote validate.json to {out}")
    return _EXIT_FOR[check.verdict]


def _number_list(kind, example):
    def convert(text):
        try:
            return [kind(v) for v in text.split(",") if v.strip()]
        except ValueError:
            what = "whole numbers" if kind is int else "numbers"
            raise argparse.ArgumentTypeError(
                f"must be {what} separated by commas, like {example}; got {text!r}") from None

    return convert


_float_list = _number_list(float, "0.5,1,2")
_int_list = _number_list(int, "32,100,300")


def _add_sweep_arguments(parser):
    add_config_arguments(parser, exclude=("--step-size", "--batch-size", "--method"))
    parser.add_argument("--methods", type=lambda s: [m.strip() for m in s.split(",")],
                        default=None, metavar="M1,M2", help="methods (default penalty-mala,sgld)")
    parser.add_argument("--step-sizes", type=_float_list, default=None, metavar="H1,H2",
                        help="step sizes (default: the tuned step x 1/8 ... 8)")
    parser.add_argument("--batch-sizes", type=_int_list, default=None, metavar="N1,N2",
                        help="batch sizes (default: the tuned batch size)")
    parser.add_argument("--level", type=float, default=0.05, metavar="A",
                        help="false-alarm rate of the whole table: the chance that a setting "
                             "without bias is called biased anywhere in it (default 0.05)")
    parser.add_argument("--no-extrapolate", dest="extrapolate", action="store_false",
                        help="skip the extrapolated estimates (sgld: paired runs at h and h/2, "
                             "about 3x the cost of its points; penalty methods: the jackknife "
                             "across batch sizes)")
    parser.add_argument("--resume", action="store_true",
                        help="skip grid points finished by an interrupted sweep")
    _scheduler_argument(parser)


def _print_extrapolation(rows):
    """One line per row with an extrapolated estimate: the bias it attributes to the row."""
    for r in rows:
        if r.get("extrapolation") and r.get("bias_estimate_sd") == r.get("bias_estimate_sd"):
            e = r["extrapolation"]
            print(f"extrapolation ({e['kind']}, from {e['from'][0]:.4g} and "
                  f"{e['from'][1]:.4g}): {r['method']} at step {r['step_size']:.4g}"
                  + (f", batch {r['batch_size']}" if r["batch_size"] else "")
                  + f" is off by {r['bias_estimate_sd']:.3g} +- "
                  f"{r['bias_estimate_mcse_sd']:.2g} posterior sds; the extrapolated values are "
                  f"{r['extrapolated_error_mcse']:.2g} MC errors from the reference")


@command("sweep", "run a grid of methods and step sizes: bias against cost, and a "
         "recommended setting", _add_sweep_arguments)
def _sweep(args):
    from ..checks import SweepJournal, sweep, write_sweep

    config, model, out = _load(args)
    partial = out / "sweep.partial.jsonl"
    done = []
    if args.resume and partial.exists():
        done = [json.loads(line) for line in partial.read_text().splitlines() if line.strip()]
    elif partial.exists():
        partial.unlink()

    def keep(row):
        with open(partial, "a") as fh:
            fh.write(json.dumps(row) + "\n")

    # The grid sets method, step and batch size; the sweep's own defaults (seed 1) apply to
    # the keys the config leaves out.
    settings = config.sampler_given()
    for key in ("method", "step_size", "batch_size"):
        settings.pop(key, None)
    compute = config.compute
    scheduler = option_or(args.scheduler, compute.get("scheduler", "processes"))
    workers = option_or(args.workers, compute.get("workers"))
    t = time.perf_counter()
    with warnings_as_lines(), config.named_fields(), named_fields({"level": "--level"}):
        res = sweep(model, methods=args.methods or ("penalty-mala", "sgld"),
                    step_sizes=args.step_sizes, batch_sizes=args.batch_sizes, level=args.level,
                    scheduler=scheduler, workers=workers, cache_dir=out, progress=not args.quiet,
                    journal=SweepJournal(done_rows=done, on_row=keep),
                    extrapolate=args.extrapolate, **settings)
    write_sweep(res, out)
    partial.unlink(missing_ok=True)
    if not args.quiet:
        print(f"{'method':<14}{'step':>10}{'batch':>7}{'KS/floor':>10}{'ESS/s':>10}"
              f"{'accept':>8}  verdict")
        for r in res.rows:
            print(f"{r['method']:<14}{r['step_size']:>10.4g}{str(r['batch_size'] or '-'):>7}"
                  f"{r['ks_ratio_max']:>10.2f}{r['ess_per_second']:>10.4g}"
                  f"{r['acceptance_rate']:>8.3f}  {r['verdict']}")
        _print_extrapolation(res.rows)
        best = res.recommended
        if best is not None:
            print(f"recommended: method = {best['method']}, step_size = {best['step_size']:.4g}"
                  + (f", batch_size = {best['batch_size']}" if best["batch_size"] else "")
                  + f" ({best['ess_per_second']:.4g} ESS/s, reference: {res.reference})")
        print(f"verdicts: {res.false_alarm_rule()}")
        for note in res.notes:
            print(f"note: {note}")
        print(f"wrote sweep.csv, sweep.json, sweep.png to {out} in {time.perf_counter() - t:.0f} s")
    return EXIT_OK


def _add_calibrate_arguments(parser):
    add_config_arguments(parser)
    parser.add_argument("--replications", type=int, default=100, metavar="R",
                        help="simulated data sets (default 100)")
    parser.add_argument("--thinned-draws", type=int, default=99, metavar="L",
                        help="thinned posterior draws each true value is ranked among "
                             "(default 99), out of the chains x draws a replication keeps")
    parser.add_argument("--prior", choices=("laplace", "model"), default="laplace",
                        metavar="laplace|model",
                        help="calibration prior (default: Laplace approximation of the posterior)")
    _level_argument(parser, "coefficients")
    _scheduler_argument(parser)


# calibrate()'s own arguments, named as the options that set them.
_CALIBRATE_OPTIONS = {"thinned_draws": "--thinned-draws", "replications": "--replications",
                      "level": "--level"}


@command("calibrate", "simulation-based calibration of the configured sampler on this X",
         _add_calibrate_arguments)
def _calibrate(args):
    from ..checks import MAX_SHORT_SHARE, calibrate
    from ..plots import plot_calibration

    config, model, out = _load(args)
    # A replication's own defaults (shorter chains) apply to the keys the config leaves out;
    # the config's seed seeds the replications.
    settings = config.sampler_given()
    seed = settings.pop("seed", None) or 1
    compute = config.compute
    t = time.perf_counter()
    with warnings_as_lines(), config.named_fields(), named_fields(_CALIBRATE_OPTIONS):
        res = calibrate(model, replications=args.replications,
                        thinned_draws=args.thinned_draws, prior=args.prior, level=args.level,
                        seed=seed,
                        scheduler=option_or(args.scheduler, compute.get("scheduler", "processes")),
                        workers=option_or(args.workers, compute.get("workers")),
                        progress=not args.quiet, **settings)
    seconds = time.perf_counter() - t
    record = res.as_dict()
    record["seconds"] = seconds
    write_json(out / "calibrate.json", record)
    plot_calibration(res, out / "calibrate.png")
    if not args.quiet:
        per = res.level / len(res.coef_names)
        print(f"simulation-based calibration: R = {args.replications}, "
              f"L = {args.thinned_draws}, prior {args.prior}, level {res.level} "
              f"(per coefficient {per:.3g})")
        w = max(14, *(len(name) for name in res.coef_names))
        for name, p in zip(res.coef_names, res.p_values):
            print(f"  {name:<{w}} p = {p:.4f}  {'calibrated' if p > per else 'MISCALIBRATED'}")
        if res.refits.sum():
            print(f"note: {int(res.refits.sum())} simulated data sets could not be fitted "
                  "(no posterior mode) and were replaced by fresh draws")
        if res.verdict == "inconclusive":
            print(f"note: {res.short_share:.0%} of the replications have fewer effective "
                  f"draws than the {res.n_draws} they rank among (limit "
                  f"{MAX_SHORT_SHARE:.0%}): their ranks are over-dispersed; raise draws or "
                  "lower --thinned-draws")
        print(f"{_verdict_word(res.verdict)} in "
              f"{seconds:.0f} s: wrote calibrate.json, calibrate.png to {out}")
    return _EXIT_FOR[res.verdict]
