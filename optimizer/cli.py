"""The `stagefit` command: a thin door onto the optimizer package.

Exit codes: 0 success, 2 bad input (the message says what to change),
1 internal error (a bug: please report it with the command you ran).
"""
from __future__ import annotations

import argparse
import json
import os
import sys
from typing import Callable, Sequence

from optimizer.errors import InputError

EXIT_OK, EXIT_INTERNAL, EXIT_BAD_INPUT = 0, 1, 2


def _cmd_check(args: argparse.Namespace) -> int:
    from optimizer.catalog import load_catalog
    from optimizer.spec import check_against_catalog, describe_spec, load_spec, spec_to_dict

    spec = load_spec(args.spec)
    check_against_catalog(spec, load_catalog(spec.parts.catalog))
    if args.format == "json":
        print(json.dumps(spec_to_dict(spec), indent=2))
    else:
        print(f"{args.spec}: valid")
        print(describe_spec(spec))
    return EXIT_OK


def _cmd_schema(args: argparse.Namespace) -> int:
    from optimizer.spec import spec_json_schema

    print(json.dumps(spec_json_schema(), indent=2))
    return EXIT_OK


def _cmd_catalogs(args: argparse.Namespace) -> int:
    from optimizer.catalog import list_catalogs, load_catalog
    from optimizer.units import format_value

    names = [args.name] if args.name else list_catalogs()
    summaries = {name: load_catalog(name).summary() for name in names}
    if args.format == "json":
        print(json.dumps(summaries, indent=2, default=str))
        return EXIT_OK
    for name, summary in summaries.items():
        print(f"{name}: {summary['description']}")
        for kind, unit in (("resistors", "ohm"), ("capacitors", "F"), ("transistors", "")):
            section = summary[kind]
            facts = [f"{section['count']} parts"]
            if section.get("range"):
                low, high = section["range"]
                facts.append(f"{section['unique_values']} values {format_value(low, unit)} .. {format_value(high, unit)}")
            if section.get("series"):
                facts.append("series " + "/".join(section["series"]))
            if section.get("devices"):
                facts.append(", ".join(section["devices"]))
            stock = section["stock_total"]
            facts.append("stock not tracked" if stock is None else f"{stock} in stock")
            print(f"  {kind:<12} " + "; ".join(facts))
    return EXIT_OK


def _cmd_series(args: argparse.Namespace) -> int:
    from optimizer.eseries import series_values
    from optimizer.units import format_value, parse_quantity

    low = parse_quantity(args.decade, where="--decade", allow_zero=False)
    high = low * 10 if args.upto is None else parse_quantity(args.upto, where="--upto", allow_zero=False)
    values = series_values(args.series, low, high)
    if high == low * 10:
        values = values[values < high]  # one decade: 1k..8k2, not 10k again
    if args.format == "json":
        print(json.dumps([float(v) for v in values]))
    else:
        print(" ".join(format_value(float(v)) for v in values))
    return EXIT_OK


def _parse_settings(settings: Sequence[str]) -> dict[str, float]:
    from optimizer.units import parse_quantity

    parts = {}
    for setting in settings:
        role, sep, text = setting.partition("=")
        if not sep or not role:
            raise InputError.single("--set", setting, 'ROLE=VALUE, e.g. "r_top=68k" or "c_in=2.2u"')
        unit = "F" if role.startswith("c_") else "ohm"
        parts[role.strip()] = parse_quantity(text.strip(), unit, where=f"--set {role.strip()}")
    return parts


def _cmd_evaluate(args: argparse.Namespace) -> int:
    from optimizer.candidates import assess
    from optimizer.catalog import load_catalog
    from optimizer.spec import check_against_catalog, load_spec
    from optimizer.units import format_value

    spec = load_spec(args.spec)
    catalog = load_catalog(spec.parts.catalog)
    check_against_catalog(spec, catalog)
    record = assess(spec, catalog, args.topology, _parse_settings(args.set), args.device,
                    samples=args.samples)
    if args.format == "json":
        print(json.dumps(record, indent=2))
        return EXIT_OK
    verdict = "meets every limit" if record["feasible"] else "MISSES: " + ", ".join(record["violations"])
    print(f"{record['topology']} with {record['transistor']['id']}: {verdict}")
    print("parts:  " + "  ".join(f"{role}={part['label']}" for role, part in record["parts"].items()))
    units = {"gain": "V/V", "gain_db": "dB", "gain_error_db": "dB", "swing_vpp": "Vpp",
             "input_impedance": "ohm", "output_impedance": "ohm", "supply_current": "A",
             "f_low": "Hz", "f_high": "Hz", "noise_ein_v": "V", "noise_figure_db": "dB",
             "q_power": "W"}
    print("metrics:")
    for key, value in record["metrics"].items():
        unit = units.get(key, "")

        def show(number: float) -> str:
            if unit in ("V/V", "dB", "") or not number:
                return f"{number:.4g} {unit}".rstrip()
            return format_value(number, unit)

        spread = record["worst_case"].get(key)
        shown = show(value)
        span = f"   worst case {show(spread[0])} .. {show(spread[1])}" if spread else ""
        print(f"  {key:<18} {shown}{span}")
    print("operating point:")
    for key, value in record["operating_point"].items():
        print(f"  {key:<18} {value:.4g}")
    print("ratings (value / limit):")
    for key, rating in record["ratings"].items():
        print(f"  {key:<18} {rating['value']:.3g} / {rating['limit']:.3g}")
    for caution in record["cautions"]:
        print(f"caution: {caution}")
    return EXIT_OK


def _cmd_serve(args: argparse.Namespace) -> int:
    from api.server import serve  # Flask and waitress are imported only for this command

    config = {k: v for k, v in (("STAGEFIT_WORKERS", args.workers), ("STAGEFIT_STORAGE", args.storage))
              if v is not None}
    serve(args.host, args.port, threads=args.threads, config=config)
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the `stagefit` command (sub-commands and options)."""
    parser = argparse.ArgumentParser(
        prog="stagefit",
        description=(
            "Choose the topology and every resistor and capacitor of a small-signal "
            "transistor stage from preferred values you can buy or have in stock."
        ),
        epilog="Start with: stagefit check specs/contact_pickup_buffer.yaml",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    check = sub.add_parser("check", help="validate a requirements spec and print it with units")
    check.add_argument("spec", help="path to a spec file (YAML or JSON)")
    check.add_argument("--format", choices=("table", "json"), default="table")
    check.set_defaults(handler=_cmd_check)

    schema = sub.add_parser("schema", help="print the JSON Schema of a requirements spec")
    schema.set_defaults(handler=_cmd_schema)

    catalogs = sub.add_parser("catalogs", help="list the parts catalogs, or summarise one")
    catalogs.add_argument("name", nargs="?", help="catalog name, e.g. bench_stock")
    catalogs.add_argument("--format", choices=("table", "json"), default="table")
    catalogs.set_defaults(handler=_cmd_catalogs)

    series = sub.add_parser("series", help="print the values of a preferred-number series (IEC 60063)")
    series.add_argument("series", help="E3, E6, E12, E24, E48, E96 or E192")
    series.add_argument("--decade", default="1", help="start of the decade, e.g. 1k (default 1)")
    series.add_argument("--upto", default=None, help="print up to this value instead of one decade, e.g. 1M")
    series.add_argument("--format", choices=("table", "json"), default="table")
    series.set_defaults(handler=_cmd_series)

    evaluate = sub.add_parser("evaluate", help="metrics, spread, yield and ratings of a design you already have")
    evaluate.add_argument("spec", help="the spec that sets supply, source, load, band and limits")
    evaluate.add_argument("--topology", required=True, help="divider_ce, divider_ce_split, feedback_ce or ce_follower")
    evaluate.add_argument("--set", action="append", default=[], metavar="ROLE=VALUE",
                          help="a part value, e.g. --set r_top=68k (repeat; capacitors left out are sized)")
    evaluate.add_argument("--device", default=None, help="transistor id (default: the spec's first device)")
    evaluate.add_argument("--samples", type=int, default=1000, help="Monte Carlo builds for the yield")
    evaluate.add_argument("--format", choices=("table", "json"), default="table")
    evaluate.set_defaults(handler=_cmd_evaluate)

    serve = sub.add_parser("serve", help="run the REST service (waitress; settings also from STAGEFIT_* variables)")
    serve.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1)")
    serve.add_argument("--port", type=int, default=8750, help="port (default 8750; 0 picks a free one)")
    serve.add_argument("--workers", type=int, default=None, help="searches run at once (STAGEFIT_WORKERS, default 1)")
    serve.add_argument("--threads", type=int, default=8, help="request threads (default 8)")
    serve.add_argument("--storage", default=None,
                       help="Optuna storage URL or journal file (STAGEFIT_STORAGE, default runs/stagefit.journal)")
    serve.set_defaults(handler=_cmd_serve)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the process exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    handler: Callable[[argparse.Namespace], int] = args.handler
    try:
        return handler(args)
    except InputError as error:
        print(f"error: {error}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except BrokenPipeError:  # output piped into head or similar: not an error
        sys.stderr.close()
        return EXIT_OK
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return EXIT_INTERNAL
    except Exception as error:  # a bug, not the user's fault
        if os.environ.get("STAGEFIT_DEBUG"):
            raise
        print(
            f"internal error: {type(error).__name__}: {error}\n"
            "This is a bug in stagefit; set STAGEFIT_DEBUG=1 for the traceback and report it.",
            file=sys.stderr,
        )
        return EXIT_INTERNAL


if __name__ == "__main__":
    sys.exit(main())
