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


def _cmd_catalogs(args: argparse.Namespace) -> int:
    from optimizer.catalog import list_catalogs, load_catalog

    names = [args.name] if args.name else list_catalogs()
    summaries = {name: load_catalog(name).summary() for name in names}
    if args.format == "json":
        print(json.dumps(summaries, indent=2, default=str))
        return EXIT_OK
    for name, summary in summaries.items():
        print(name)
        for key, value in summary.items():
            print(f"  {key:<22} {value}")
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
