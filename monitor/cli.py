"""The ``monitor`` command line.

Examples (see ``monitor COMMAND --help`` for each)::

    monitor check --config config/demo.yaml
    monitor replay --config config/demo.yaml --data readings.csv --out signals.jsonl
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import IO

from monitor.alerts import ADVISORY
from monitor.config import ChartConfig, Config, ConfigProblems, load_config, storage_url
from monitor.replay import ChartReplay, DataError, ReplaySummary, replay
from monitor.report import add_report_command
from monitor.spc import ChartKind, MonitorError, constants

__all__ = ["ADVISORY", "main"]


EXIT_OK, EXIT_PROBLEM, EXIT_USAGE = 0, 1, 2


def _load(path: str) -> Config:
    return load_config(Path(path))


# ---------------------------------------------------------------- check


def _describe_limits(chart: ChartConfig) -> str:
    limits = chart.limits
    if limits.baseline is not None:
        b = limits.baseline
        estimator = b.sigma_from.value if b.sigma_from else "the usual estimator for the kinds"
        exclusion = "with" if b.exclude_out_of_control else "without"
        return (
            f"from a baseline of the first {b.subgroups} subgroups "
            f"(sigma from {estimator}, {exclusion} exclusion)"
        )
    if chart.kinds[0] is ChartKind.P:
        return f"standard proportion p0 = {limits.proportion:g}"
    if chart.kinds[0] is ChartKind.U:
        return f"standard rate u0 = {limits.rate:g}"
    mean, sigma = limits.mean or 0.0, limits.sigma or 0.0
    text = f"standard values mean = {mean:g}, sigma = {sigma:g}"
    n = chart.subgroup.size
    if n is not None:
        half = chart.limit_sigma * sigma / n**0.5
        name = "individuals" if n == 1 else f"means of {n}"
        text += f"; {name}: {mean - half:.6g} to {mean + half:.6g}"
        if n >= 2 and ChartKind.XBAR_R in chart.kinds:
            k = constants(n)
            text += f"; ranges below {(k.d2 + chart.limit_sigma * k.d3) * sigma:.6g}"
    return text


def _check_summary(config: Config) -> list[dict[str, str | list[str] | None]]:
    out: list[dict[str, str | list[str] | None]] = []
    for chart in config.charts:
        sub = chart.subgroup
        grouping = (
            f"{sub.size} reading{'s' if sub.size != 1 else ''}"
            if sub.size is not None
            else f"{sub.window:g} s windows (at least {sub.min_size})"
        )
        out.append(
            {
                "id": chart.id,
                "topic": chart.topic,
                "subgroup": grouping,
                "kinds": [k.value for k in chart.kinds],
                "limits": _describe_limits(chart),
                "rules": [r.id.value for r in chart.rule_objects()],
            }
        )
    return out


def cmd_check(args: argparse.Namespace) -> int:
    """Validate a configuration and describe each chart."""
    config = _load(args.config)
    summary = _check_summary(config)
    b, a = config.broker, config.alerts
    daemon = {
        "broker": f"{b.host}:{b.port} as {b.client_id}" + (" with TLS" if b.tls else ""),
        "storage": storage_url(config, Path(args.config)),
        "alerts": f"{a.prefix}/alerts/<chart>, states on {a.prefix}/status/<chart>, "
        f"acknowledgements on {a.prefix}/ack/<chart>",
    }
    from monitor.design import chart_budget  # noqa: PLC0415 - the ARL chains are only needed here

    budgets = [chart_budget(c, budget_per_day=a.false_alarm_budget) for c in config.charts]
    if args.json:
        charts = [{**item, "budget": b.to_json()} for item, b in zip(summary, budgets, strict=True)]
        print(json.dumps({"valid": True, **daemon, "charts": charts, "advisory": ADVISORY}, indent=2))
        return EXIT_OK
    print(f"{args.config}: valid, {len(summary)} chart(s)")
    for key, value in daemon.items():
        print(f"  {key + ':':9s}{value}")
    for item, budget in zip(summary, budgets, strict=True):
        print(f"\n{item['id']}" + (f"  (topic {item['topic']})" if item["topic"] else ""))
        print(f"  subgroups: {item['subgroup']}")
        print(f"  kinds:     {', '.join(item['kinds'] or [])}")
        print(f"  limits:    {item['limits']}")
        print(f"  rules:     {', '.join(item['rules'] or [])}")
        print(f"  parent:    {budget.parent}")
        for panel in budget.panels:
            print(f"  in-control ARL, {panel.panel}: {panel.arl:.4g} subgroups ({panel.method})")
        if budget.false_alarms_per_day is not None and budget.false_alarms_per_shift is not None:
            day, shift = budget.false_alarms_per_day, budget.false_alarms_per_shift
            print(
                f"  false alarms expected ({budget.parent.split(' (')[0]} process, panels combined, about): "
                f"{day:.3g} a day, {shift:.3g} an 8-hour shift"
            )
        if budget.note:
            print(f"  note:      {budget.note}")
        if budget.warning:
            print(f"  WARNING:   {budget.warning}")
    print(f"\n{ADVISORY}")
    return EXIT_OK


# ---------------------------------------------------------------- replay


class _Progress:
    """A progress bar over the charts of a replay (on a terminal only)."""

    def __init__(self, total: int) -> None:
        from tqdm import tqdm  # noqa: PLC0415 - only interactive replays show progress

        self._bar = tqdm(total=total, unit="chart", file=sys.stderr, leave=False)

    def __call__(self, chart: str) -> None:
        self._bar.set_description_str(chart)
        self._bar.update(1)

    def close(self) -> None:
        self._bar.close()


def _print_summary(summary: ReplaySummary, stream: IO[str]) -> None:
    for chart in summary.charts:
        print(f"{chart.chart}: {chart.readings} readings, {chart.subgroups} subgroups", file=stream)
        if chart.pending:
            print(
                f"  {chart.pending} readings at the end did not fill a subgroup (pending)",
                file=stream,
            )
        if chart.late or chart.short_windows:
            print(
                f"  {chart.late} late readings dropped; {chart.short_windows} windows "
                f"({chart.short_readings} readings) too short to chart",
                file=stream,
            )
        if chart.estimate is not None:
            e = chart.estimate
            sigma = "" if e.parameters.sigma is None else f", sigma {e.parameters.sigma:.6g}"
            print(
                f"  baseline: {e.used} of {e.subgroups} subgroups used, mean {e.parameters.mean:.6g}{sigma}"
                f" ({e.estimator}); excluded {[x.subgroup for x in e.excluded] or 'none'}",
                file=stream,
            )
        elif chart.monitoring_from is None:
            print("  still collecting its baseline: not enough subgroups to set limits", file=stream)
        if not chart.signals:
            print("  no signals", file=stream)
        for (kind, statistic, rule), count in sorted(chart.signals.items()):
            print(f"  {count:6d}  {rule} on {statistic} ({kind})", file=stream)
        _print_rates(chart, stream)
    if summary.rows_skipped:
        print(f"{summary.rows_skipped} rows skipped:", file=stream)
        for problem in summary.problems:
            print(f"  line {problem.line}: {problem.reason}", file=stream)
        if summary.rows_skipped > len(summary.problems):
            print(f"  ... and {summary.rows_skipped - len(summary.problems)} more", file=stream)
    if summary.unrouted:
        print(f"{summary.unrouted} rows matched no configured chart", file=stream)


def _print_rates(chart: ChartReplay, stream: IO[str]) -> None:
    if not chart.rates:
        return
    stretch = "labelled in control" if chart.labelled else "all charted, no labels: assumed in control"
    print(
        f"  false alarms over {chart.in_control_subgroups} subgroups ({stretch}); "
        "expected for a normal process:",
        file=stream,
    )
    for rate in chart.rates:
        expected = "-" if rate.expected is None else f"{rate.expected:.3g}"
        ratio = ""
        if rate.expected:
            ratio = f"  ({rate.observed / rate.expected:.2g} x)"
        print(
            f"    {rate.rule} on {rate.statistic}: {rate.observed} observed, {expected} expected{ratio}",
            file=stream,
        )
    for change in chart.changes:
        if change.first_signal is None:
            print(f"  change {change.label!r} at subgroup {change.subgroup}: no signal after it", file=stream)
            continue
        seconds = "" if change.delay_seconds is None else f", {change.delay_seconds:.0f} s"
        print(
            f"  change {change.label!r} at subgroup {change.subgroup}: first signal at subgroup "
            f"{change.first_signal} ({change.rule}), {change.delay_subgroups} subgroups later{seconds}",
            file=stream,
        )


def cmd_replay(args: argparse.Namespace) -> int:
    """Replay a file of readings through the configured charts."""
    config = _load(args.config)
    show = sys.stderr.isatty() and not args.quiet
    progress = _Progress(len(config.charts)) if show else None
    try:
        if args.out:
            out_path = Path(args.out)
            out_path.parent.mkdir(parents=True, exist_ok=True)
            with out_path.open("wb") as out:
                summary = replay(config, args.data, out, points=not args.signals_only, progress=progress)
        else:
            summary = replay(
                config, args.data, sys.stdout.buffer, points=not args.signals_only, progress=progress
            )
            sys.stdout.flush()
    finally:
        if progress is not None:
            progress.close()
    _print_summary(summary, sys.stderr)
    return EXIT_OK


# ---------------------------------------------------------------- run


def cmd_run(args: argparse.Namespace) -> int:
    """Run the daemon until SIGTERM or SIGINT."""
    import asyncio  # noqa: PLC0415 - only the daemon needs the event loop

    from monitor.daemon import run_daemon  # noqa: PLC0415 - keeps the other commands light
    from monitor.logs import configure_logging  # noqa: PLC0415

    config = _load(args.config)
    configure_logging(level=args.log_level)
    return asyncio.run(run_daemon(config, Path(args.config)))


# ---------------------------------------------------------------- baseline


def cmd_baseline(args: argparse.Namespace) -> int:
    """Phase I limits for one chart from a file of readings or from its stored history."""
    import asyncio  # noqa: PLC0415

    from monitor.baseline import parse_moment, print_result, run_baseline  # noqa: PLC0415
    from monitor.spc import SigmaEstimator  # noqa: PLC0415

    config = _load(args.config)
    chart = next((c for c in config.charts if c.id == args.chart), None)
    if chart is None:
        known = ", ".join(c.id for c in config.charts)
        print(f"error: no chart {args.chart!r} in {args.config} (charts: {known})", file=sys.stderr)
        return EXIT_PROBLEM
    result = asyncio.run(
        run_baseline(
            chart,
            url=storage_url(config, Path(args.config)),
            data=args.data,
            since=None if args.since is None else parse_moment(args.since),
            until=None if args.until is None else parse_moment(args.until),
            first=args.first,
            estimator=None if args.sigma_from is None else SigmaEstimator(args.sigma_from),
            exclude=args.exclude,
            write=args.save,
        )
    )
    if args.json:
        print(json.dumps(result.to_json(), indent=2))
    else:
        print_result(result, sys.stdout)
    return EXIT_OK


def _add_baseline(commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    baseline = commands.add_parser(
        "baseline",
        help="Phase I limits for a chart from good history (a file or the store)",
        description=(
            "Estimate a chart's in-control mean and sigma from a stretch of good history: "
            "subgroups formed from a CSV or Parquet file as the daemon forms them, or the "
            "subgroups stored by the daemon. Reports excluded subgroups, normality, the "
            "fitted parent model, and the true false-alarm rate of normal-theory limits for the "
            "mean under that parent at the chart's subgroup size and at other sizes, with a "
            "suggested size; --save stores the limits as a new version, which a running "
            "daemon puts in force within storage.limits_poll seconds."
        ),
        epilog=(
            "examples:\n"
            "  monitor baseline --config plant.yaml --chart press-1/thickness --data good-week.csv\n"
            "  monitor baseline --config plant.yaml --chart press-1/thickness \\\n"
            "      --since 2026-11-23T06:00Z --until 2026-11-30T06:00Z --save\n"
            "  monitor baseline --config plant.yaml --chart kiln-1/zone-3-temperature --first 50 --json"
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    baseline.add_argument("--config", required=True, help="YAML configuration file")
    baseline.add_argument("--chart", required=True, help="chart id")
    baseline.add_argument("--data", help="CSV or Parquet file of readings (default: the stored history)")
    baseline.add_argument("--since", help="only subgroups ending at or after this time (ISO 8601)")
    baseline.add_argument("--until", help="only subgroups ending before this time (ISO 8601)")
    baseline.add_argument("--first", type=int, help="only the first N subgroups (after --since)")
    baseline.add_argument(
        "--sigma-from",
        choices=["range", "sd", "pooled", "moving_range"],
        help="sigma estimator (default: the chart's)",
    )
    baseline.add_argument(
        "--exclude",
        action=argparse.BooleanOptionalAction,
        default=None,
        help="leave out out-of-control subgroups and estimate again (default: the chart's setting)",
    )
    baseline.add_argument("--save", action="store_true", help="store the limits as a new version")
    baseline.add_argument("--json", action="store_true", help="print the result as JSON")
    baseline.set_defaults(run=cmd_baseline)


# ---------------------------------------------------------------- design


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1, got {value}")
    return value


def _probability(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number, got {text!r}") from None
    if not 0.0 < value < 0.5:
        raise argparse.ArgumentTypeError(f"must be a probability in (0, 0.5), got {value}")
    return value


def _print_result(args: argparse.Namespace, result: dict[str, object], lines: list[str]) -> int:
    if args.json:
        print(json.dumps(result, indent=2))
    else:
        print("\n".join(lines))
    return EXIT_OK


def cmd_design_arl(args: argparse.Namespace) -> int:
    """The average run length of one chart design at a shift (normal or a parent's law)."""
    from monitor.spc import rule_preset  # noqa: PLC0415
    from monitor.spc.arl import ZCdf, cusum_arl, ewma_arl, normal_cdf, shewhart_arl  # noqa: PLC0415

    cdf: ZCdf = normal_cdf
    parent = "normal"
    if args.parent is not None:
        from monitor.spc.laws import standardized_mean_cdf  # noqa: PLC0415 - the laws load only when asked
        from monitor.spc.parents import parse_parent  # noqa: PLC0415

        model = parse_parent(args.parent)
        cdf = standardized_mean_cdf(model, args.n)
        parent = model.describe()
    if args.chart == "cusum":
        run = cusum_arl(args.k, args.h, shift=args.shift, head_start=args.head_start, cdf=cdf)
        params: dict[str, object] = {"k": args.k, "h": args.h, "head_start": args.head_start}
    elif args.chart == "ewma":
        run = ewma_arl(
            args.smoothing,
            args.width,
            shift=args.shift,
            cdf=cdf,
            fast_initial_response=args.fast_initial_response,
            time_varying_limits=args.time_varying_limits,
        )
        params = {"lambda": args.smoothing, "width": args.width}
    else:
        rules = rule_preset(args.rules)
        run = shewhart_arl(rules, limit_sigma=args.limit_sigma, shift=args.shift, cdf=cdf)
        params = {"rules": [r.id.value for r in rules], "limit_sigma": args.limit_sigma}
    result: dict[str, object] = {
        "chart": args.chart,
        "params": params,
        "shift": args.shift,
        "arl": run.arl,
        "sd": run.sd,
        "method": run.method,
        "error": run.error,
        "parent": parent,
        "n": args.n,
    }
    line = f"{args.chart} ARL at a shift of {args.shift:g} sigma: {run.arl:.4g} subgroups ({run.method})"
    if args.parent is not None:
        line += f"; readings {parent}, subgroups of {args.n}"
    return _print_result(args, result, [line])


def cmd_design_tail(args: argparse.Namespace) -> int:
    """P(mean of n >= at) under a parent model, beside the normal approximation."""
    from monitor.design import tail_report  # noqa: PLC0415

    result = tail_report(args.parent, args.n, args.at)
    upper = (
        f"  P(mean >= {args.at:g}) = {result['p_value']:.6g} ({result['method']}; "
        f"normal approximation {result['normal_approx']:.6g})"
    )
    lower = (
        f"  P(mean <= {args.at:g}) = {result['lower_tail']:.6g} "
        f"(normal approximation {result['normal_lower_tail']:.6g})"
    )
    lines = [f"{result['parent']}, mean of {args.n} readings:", upper, lower]
    return _print_result(args, result, lines)


def cmd_design_limits(args: argparse.Namespace) -> int:
    """True false-alarm rate of normal-theory limits under a parent, and probability limits."""
    from monitor.design import limits_report  # noqa: PLC0415

    upper = args.upper_tail if args.upper_tail is not None else args.tail
    lower = args.lower_tail if args.lower_tail is not None else args.tail
    result = limits_report(
        args.parent, args.n, limit_sigma=args.limit_sigma, lower_tail=lower, upper_tail=upper
    )
    normal = result["normal_limits"]
    exact = result["probability_limits"]
    if not isinstance(normal, dict) or not isinstance(exact, dict):  # pragma: no cover - for the type checker
        raise TypeError("limits_report returned an unexpected shape")
    rates = (
        f"  {args.limit_sigma:g}-sigma limits {normal['lower']:.6g} to {normal['upper']:.6g}: false alarms "
        f"{result['false_alarm_below']:.4g} below and {result['false_alarm_above']:.4g} above per subgroup "
        f"(normal theory: {result['nominal_each_side']:.4g} each); in-control ARL "
        f"{result['arl_normal_limits']:.4g} instead of {result['arl_nominal']:.4g}"
    )
    fixed = (
        f"  probability limits {exact['lower']:.6g} to {exact['upper']:.6g} give "
        f"{lower:g} below and {upper:g} above"
    )
    lines = [f"{result['parent']}, means of {args.n} readings ({result['method']}):", rates, fixed]
    return _print_result(args, result, lines)


def cmd_design_recommend(args: argparse.Namespace) -> int:
    """The EWMA or CUSUM design that detects a shift fastest for a wanted in-control ARL."""
    from monitor.spc.arl import recommend_cusum, recommend_ewma  # noqa: PLC0415

    design = (
        recommend_ewma(args.arl0, args.shift)
        if args.chart == "ewma"
        else recommend_cusum(args.arl0, args.shift)
    )
    params = {("lambda" if k == "smoothing" else k): v for k, v in design.params.items()}
    result: dict[str, object] = {
        "chart": design.chart,
        **params,
        "params": params,
        "arl0": design.arl0,
        "arl1": design.arl1,
        "shift": design.shift,
    }
    shown = ", ".join(f"{k} = {v:.4g}" for k, v in params.items())
    lines = [
        f"{design.chart}: {shown}",
        f"  in-control ARL {design.arl0:.4g}; ARL at a shift of {design.shift:g} sigma: {design.arl1:.4g}",
    ]
    return _print_result(args, result, lines)


def _add_design(commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    design = commands.add_parser(
        "design",
        help="average run lengths, tail probabilities and chart designs",
        description="Calculations for choosing chart parameters (normal process unless a parent is given).",
    )
    tools = design.add_subparsers(dest="design", required=True, metavar="CALCULATION")
    arl = tools.add_parser(
        "arl",
        help="average run length of a chart at a mean shift",
        epilog=(
            "examples:\n"
            "  monitor design arl --chart cusum --k 0.5 --h 4 --shift 1.0 --json\n"
            "  monitor design arl --chart ewma --lambda 0.1 --width 2.814 --shift 0 --json\n"
            "  monitor design arl --chart shewhart --rules western-electric --shift 0 --json"
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    arl.add_argument("--chart", required=True, choices=["shewhart", "ewma", "cusum"])
    arl.add_argument("--shift", type=float, default=0.0, help="mean shift in sigma of the plotted point")
    arl.add_argument("--rules", default="western-electric", help="shewhart: western-electric, nelson or none")
    arl.add_argument("--limit-sigma", type=float, default=3.0, help="shewhart: limits at this many sigma")
    arl.add_argument(
        "--lambda", dest="smoothing", type=float, default=0.2, help="ewma: weight of the newest point"
    )
    arl.add_argument("--width", type=float, default=3.0, help="ewma: limits at this many sigma of the EWMA")
    arl.add_argument("--fast-initial-response", action="store_true", help="ewma: narrowed first limits")
    arl.add_argument(
        "--time-varying-limits", action="store_true", help="ewma: exact limits from the first point"
    )
    arl.add_argument("--k", type=float, default=0.5, help="cusum: reference value")
    arl.add_argument("--h", type=float, default=5.0, help="cusum: decision interval")
    arl.add_argument("--head-start", type=float, default=0.0, help="cusum: starting value of both sums")
    arl.add_argument(
        "--parent",
        help="in-control model of single readings, NAME:key=value,... (default: the plotted point is normal)",
    )
    arl.add_argument(
        "--n", type=_positive_int, default=1, help="with --parent: readings per subgroup (default 1)"
    )
    arl.add_argument("--json", action="store_true")
    arl.set_defaults(run=cmd_design_arl)
    tail = tools.add_parser(
        "tail",
        help="probability that the mean of n readings reaches a value, under a parent model",
        description=(
            "P(mean of n readings >= AT) from the exact law of the mean under the parent model "
            "(closed form or convolution), beside the normal approximation. Parents are written "
            "NAME:key=value,... : normal (mean, sd), lognormal (log_mean, log_sd), gamma (shape, "
            "scale), exponential (mean), weibull (shape, scale), uniform (low, high), triangular "
            "(low, mode, high)."
        ),
        epilog=(
            "examples:\n"
            "  monitor design tail --parent triangular:low=0,mode=16,high=32 --n 25 --at 18 --json\n"
            "  monitor design tail --parent lognormal:log_mean=2.7,log_sd=0.25 --n 5 --at 20"
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    tail.add_argument(
        "--parent", required=True, help="in-control model of single readings, NAME:key=value,..."
    )
    tail.add_argument("--n", type=_positive_int, required=True, help="readings per subgroup")
    tail.add_argument("--at", type=float, required=True, help="the value of the mean")
    tail.add_argument("--json", action="store_true")
    tail.set_defaults(run=cmd_design_tail)
    limits = tools.add_parser(
        "limits",
        help="true false-alarm rate of normal-theory limits under a parent, and probability limits",
        description=(
            "For means of n readings from the parent model: how often normal-theory limits "
            "(mean +/- L sigma / sqrt n) are crossed in control on each side, and the exact "
            "quantiles of the mean (probability limits) that give the wanted tails instead."
        ),
        epilog=(
            "examples:\n"
            "  monitor design limits --parent exponential:mean=1 --n 4 --json\n"
            "  monitor design limits --parent weibull:shape=1.5,scale=10 --n 5 --tail 0.001"
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    limits.add_argument(
        "--parent", required=True, help="in-control model of single readings, NAME:key=value,..."
    )
    limits.add_argument("--n", type=_positive_int, required=True, help="readings per subgroup")
    limits.add_argument(
        "--limit-sigma", type=float, default=3.0, help="normal-theory limits at this many sigma"
    )
    limits.add_argument(
        "--tail", type=_probability, default=0.00135, help="wanted tail on each side (default 0.00135)"
    )
    limits.add_argument("--lower-tail", type=_probability, help="wanted lower tail (default --tail)")
    limits.add_argument("--upper-tail", type=_probability, help="wanted upper tail (default --tail)")
    limits.add_argument("--json", action="store_true")
    limits.set_defaults(run=cmd_design_limits)
    recommend = tools.add_parser(
        "recommend",
        help="EWMA or CUSUM parameters for a wanted in-control ARL and a shift to detect",
        epilog="examples:\n  monitor design recommend --chart ewma --arl0 500 --shift 1.0 --json",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    recommend.add_argument("--chart", required=True, choices=["ewma", "cusum"])
    recommend.add_argument("--arl0", type=float, required=True, help="wanted in-control ARL")
    recommend.add_argument(
        "--shift", type=float, required=True, help="shift to detect, sigma of the plotted point"
    )
    recommend.add_argument("--json", action="store_true")
    recommend.set_defaults(run=cmd_design_recommend)


# ---------------------------------------------------------------- entry point


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``monitor`` command."""
    parser = argparse.ArgumentParser(
        prog="monitor",
        description="Streaming statistical process monitoring for factory lines. " + ADVISORY,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    check = commands.add_parser(
        "check",
        help="validate a configuration and describe its charts",
        description="Validate a configuration file; every mistake is reported as file:line: field: problem.",
        epilog="example:\n  monitor check --config config/demo.yaml",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    check.add_argument("--config", required=True, help="YAML configuration file")
    check.add_argument("--json", action="store_true", help="print the description as JSON")
    check.set_defaults(run=cmd_check)

    rep = commands.add_parser(
        "replay",
        help="run the charts over a CSV or Parquet file of past readings",
        description=(
            "Run the configured charts over a file of readings (columns: chart or topic, timestamp, "
            "value[, exposure]) with the same engine as the daemon. Writes one JSON line per "
            "plotted point, signal or baseline; a summary goes to standard error."
        ),
        epilog=(
            "example:\n  monitor replay --config config/demo.yaml --data readings.csv --out signals.jsonl"
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    rep.add_argument("--config", required=True, help="YAML configuration file")
    rep.add_argument("--data", required=True, help="CSV or Parquet file of readings")
    rep.add_argument("--out", help="write the JSON lines here instead of standard output")
    rep.add_argument("--signals-only", action="store_true", help="leave out the plotted points")
    rep.add_argument("--quiet", action="store_true", help="no progress bar")
    rep.set_defaults(run=cmd_replay)

    run = commands.add_parser(
        "run",
        help="run the daemon: MQTT in, charts, storage, alerts out",
        description=(
            "Subscribe to the configured topics, keep every chart current, store everything and "
            "publish alerts until stopped (SIGTERM or SIGINT stop it cleanly). " + ADVISORY
        ),
        epilog="example:\n  monitor run --config config/demo.yaml",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    run.add_argument("--config", required=True, help="YAML configuration file")
    run.add_argument("--log-level", default="info", choices=["debug", "info", "warning", "error"])
    run.set_defaults(run=cmd_run)
    add_report_command(commands)
    _add_baseline(commands)
    _add_design(commands)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit status (0 ok, 1 bad input, 2 usage)."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.run(args))
    except ConfigProblems as exc:
        print(str(exc), file=sys.stderr)
        return EXIT_PROBLEM
    except (DataError, MonitorError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_PROBLEM
    except KeyboardInterrupt:
        return EXIT_OK
    except BrokenPipeError:
        return EXIT_OK


if __name__ == "__main__":
    sys.exit(main())
