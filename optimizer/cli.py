"""The `stagefit` command: a thin door onto the optimizer package.

Exit codes (also in ``stagefit --help`` and the README):
0 done (search: a design meets every limit), 3 the spec was answered but no design meets
every limit (the nearest misses are printed, ranked), 2 bad input (one line saying what to
change), 4 environment or storage error (a file, the disk, the database, a search busy in
another process), 1 internal error (a bug: please report it with the command you ran).
"""

from __future__ import annotations

import argparse
import contextlib
import gc
import json
import os
import re
import signal
import sys
import threading
import time
from typing import TYPE_CHECKING, Callable, Iterator, Sequence

from optimizer.errors import InputError, StorageError
from optimizer.metrics import METRICS

if TYPE_CHECKING:  # the parser stays light: pydantic is imported by the commands that read a spec
    from optimizer.spec import Spec

EXIT_OK, EXIT_INTERNAL, EXIT_BAD_INPUT, EXIT_INFEASIBLE, EXIT_ENVIRONMENT = 0, 1, 2, 3, 4
EXIT_CODES = (
    "exit codes: 0 done (search: a design meets every limit); 3 no design meets every limit "
    "(the nearest misses are printed, ranked); 2 bad input; 4 environment or storage error "
    "(file, disk, database, search busy elsewhere); 1 internal error (a bug)"
)
BUSY_WAIT = 120.0  # s a run waits for another process's trials in a search it joined
SPEC_HELP = "path to a spec file (YAML or JSON), or the name of a bundled example (e.g. contact_pickup_buffer)"


def _cmd_check(args: argparse.Namespace) -> int:
    from optimizer.catalog import load_catalog
    from optimizer.spec import describe_spec, load_spec, spec_to_dict
    from optimizer.validation import eligibility_text, input_coupling_text, validate_spec

    spec = load_spec(args.spec)
    verdicts = validate_spec(spec, load_catalog(spec.parts.catalog))
    if args.format == "json":
        print(json.dumps(spec_to_dict(spec), indent=2))
    else:
        print(f"{args.spec}: valid")
        print(describe_spec(spec))
        print(f"  eligible          {eligibility_text(spec, verdicts)}")
        coupling = input_coupling_text(spec, verdicts)
        if coupling:
            print(f"  input coupling    {coupling}")
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
                facts.append(
                    f"{section['unique_values']} values {format_value(low, unit)} .. {format_value(high, unit)}"
                )
            if section.get("series"):
                facts.append("series " + "/".join(section["series"]))
            if section.get("devices"):
                facts.append(", ".join(section["devices"]))
            stock = section["stock_total"]
            facts.append("stock not tracked" if stock is None else f"{stock} in stock")
            print(f"  {kind:<12} " + "; ".join(facts))
    return EXIT_OK


SERIES_SPAN = (1e-12, 1e12)  # the values `stagefit series` lists from and up to


def _cmd_series(args: argparse.Namespace) -> int:
    from optimizer.eseries import series_values
    from optimizer.units import format_value, parse_quantity

    low = parse_quantity(args.decade, where="--decade", allow_zero=False)
    high = low * 10 if args.upto is None else parse_quantity(args.upto, where="--upto", allow_zero=False)
    for where, value in (("--decade", low), ("--upto", high)):
        if not SERIES_SPAN[0] <= value <= SERIES_SPAN[1]:
            raise InputError.single(where, value, "a value from 1 p to 1 T (twelve decades either side of 1)")
    if high < low:
        raise InputError.single("--upto", high, f"a value at or above --decade ({format_value(low)})")
    values = series_values(args.series, low, high)
    if high == low * 10:
        values = values[values < high]  # one decade: 1k..8k2, not 10k again
    if args.format == "json":
        print(json.dumps([float(v) for v in values]))
    else:
        print(" ".join(format_value(float(v)) for v in values))
    return EXIT_OK


def _cmd_topologies(args: argparse.Namespace) -> int:
    from optimizer.topologies import TOPOLOGIES

    described = [t.describe() for t in TOPOLOGIES.values()]
    if args.format == "json":
        print(json.dumps({"topologies": described}, indent=2))
        return EXIT_OK
    for t in described:
        print(f"{t['name']}: {t['description']}")
        print(
            f"  {t['gain_sign']}; {'/'.join(t['polarities'])} transistors ({t['transistors']}); "
            f"supplies: {', '.join(t['supplies'])}"
        )
        print(
            "  roles: "
            + ", ".join(f"{r['name']} ({r['kind']}{', optional' if r['optional'] else ''})" for r in t["roles"])
        )
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
    from optimizer.report import show, show_noise
    from optimizer.spec import load_spec
    from optimizer.validation import validate_spec

    spec = load_spec(args.spec)
    catalog = load_catalog(spec.parts.catalog)
    validate_spec(spec, catalog)
    record = assess(spec, catalog, args.topology, _parse_settings(args.set), args.device, samples=args.samples)
    if args.format == "json":
        print(json.dumps(record, indent=2))
        return EXIT_OK
    verdict = "meets every limit" if record["feasible"] else "MISSES: " + ", ".join(record["violations"])
    print(f"{record['topology']} with {record['transistor']['id']}: {verdict}")
    print("parts:  " + "  ".join(f"{role}={part['label']}" for role, part in record["parts"].items()))
    absent = [key for key, value in record["metrics"].items() if value is None]
    print(f"metrics (no figure for this stage: {', '.join(absent)}):" if absent else "metrics:")
    for key, value in record["metrics"].items():
        if value is None:
            continue
        spread = record["worst_case"].get(key)
        shown = show_noise(record) if key == "noise_ein_v" else show(key, value, catalog.currency)
        span = f"   worst case {show(key, spread[0])} .. {show(key, spread[1])}" if spread else ""
        print(f"  {key:<18} {shown}{span}")
    print("operating point:")
    for key, value in record["operating_point"].items():
        print(f"  {key:<18} {show(key, value)}")
    print("ratings (stress / rating):")
    for key, rating in record["ratings"].items():
        print(f"  {key:<18} {show(key, rating['value'])} / {show(key, rating['limit'])}")
    for caution in record["cautions"]:
        print(f"caution: {caution}")
    return EXIT_OK


# ---- search and kitting -------------------------------------------------------------


#: the ranked table's columns: name -> (heading, cell of a candidate record given the currency)
def _metric_cell(metric: str) -> Callable[[dict, str], str]:
    def cell(c: dict, currency: str) -> str:
        from optimizer.report import show

        return show(metric, (c.get("metrics") or {}).get(metric), currency)

    return cell


def _why_cell(c: dict, currency: str) -> str:
    from optimizer.report import why

    return why(c)


def _noise_cell(c: dict, currency: str) -> str:
    from optimizer.report import show_noise

    return show_noise(c)


def _verdict(c: dict, currency: str) -> str:
    """The basis label ("meets every limit in 97 % of 2,000 builds"), what it misses, and how
    many near-identical variants were folded into it."""
    verdict = (c.get("basis") or {}).get("label") or ("meets every limit" if c["feasible"] else "misses the spec")
    if not c["feasible"]:
        verdict += f"; misses {c.get('binding') or ', '.join(c['violations'])}"
    if c.get("variants", 1) > 1:
        verdict += f" (+{c['variants'] - 1} near-identical variants)"
    return verdict


_CELLS: dict[str, Callable[[dict, str], str]] = {"noise_ein_v": _noise_cell}  # metrics written their own way
COLUMNS: dict[str, tuple[str, Callable[[dict, str], str]]] = {
    "rank": ("rank", lambda c, _: str(c.get("rank", ""))),
    "topology": ("topology", lambda c, _: str(c["topology"])),
    "device": ("device", lambda c, _: str((c.get("transistor") or {}).get("id", ""))),
    "parts": ("parts", lambda c, _: " ".join(f"{role}={p['label']}" for role, p in c["parts"].items())),
    **{m.column[0]: (m.column[1], _CELLS.get(m.key) or _metric_cell(m.key)) for m in METRICS if m.column},
    "why": ("why (top score terms)", _why_cell),
    "verdict": ("verdict", _verdict),
}
DEFAULT_COLUMNS = (
    "rank",
    "topology",
    "device",
    "parts",
    "gain",
    "swing",
    "zin",
    "current",
    "noise",
    "yield",
    "cost",
    "why",
    "verdict",
)
PROGRESS_EVERY = 5.0  # s between progress lines when stderr is not a terminal


def _columns(text: str | None) -> tuple[str, ...]:
    """The --columns list, checked (before any search runs)."""
    if text is None:
        return DEFAULT_COLUMNS
    names = tuple(n.strip().lower() for n in text.split(",") if n.strip())
    unknown = [n for n in names if n not in COLUMNS]
    if unknown or not names:
        raise InputError.single("--columns", text, "a comma-separated list of: " + ", ".join(COLUMNS))
    return names


def _progress_printer(stream=sys.stderr, quiet: bool = False) -> Callable[[int, int], None] | None:
    """Progress on stderr: a bar on a terminal; piped or logged, one line every
    PROGRESS_EVERY seconds; nothing with ``quiet``."""
    import time

    if quiet:
        return None
    started = time.monotonic()
    last = [started - PROGRESS_EVERY]

    def show(done: int, budget: int) -> None:
        if stream.isatty():
            width = 30
            filled = int(width * done / max(budget, 1))
            stream.write(f"\r  searching [{'#' * filled}{'.' * (width - filled)}] {done}/{budget} trials")
            if done >= budget:
                stream.write("\n")
        else:
            now = time.monotonic()
            if now - last[0] < PROGRESS_EVERY and done < budget:
                return
            last[0] = now
            stream.write(f"searching: {done}/{budget} trials, {now - started:.0f} s\n")
        stream.flush()

    return show


def _run_or_reuse(args: argparse.Namespace, spec, *, every: bool = False):
    """The finished search of ``spec`` in --storage: reused when the very same spec (and seed
    and budget) was searched before, resumed when it was interrupted, run otherwise. Its
    first --top candidates (at least --rank), or with ``every`` every ranked design (a front
    plot draws them all)."""
    from optuna.exceptions import DuplicatedStudyError

    from optimizer.search import (
        INTERRUPTED,
        create_search,
        delete_search,
        extend_search,
        fail_search,
        list_searches,
        load_search,
        open_storage,
        run_search,
        search_status,
        spec_search_id,
        with_search,
    )
    from optimizer.storage import recover_stale_trials, save_replay_when_worth, stale_after_seconds

    spec = with_search(spec, trials=args.trials, seed=args.seed)
    storage = open_storage(args.storage)
    search_id = spec_search_id(spec)
    known = {s["id"]: s for s in list_searches(storage)}
    if search_id in known and args.fresh:
        delete_search(storage, search_id)
        del known[search_id]
    if search_id not in known:
        print(
            f"no stored search of this spec in {args.storage}: running one ({spec.search.trials} trials)",
            file=sys.stderr,
        )
        try:
            create_search(spec, storage, search_id=search_id)
        except DuplicatedStudyError:  # another stagefit run of this spec created it meanwhile
            print(f"another run is searching this spec ({search_id}); joining it", file=sys.stderr)
    elif known[search_id]["status"] == "done":
        print(
            f"reusing the stored search {search_id} of this spec from {args.storage} (--fresh to run it again)",
            file=sys.stderr,
        )
    elif known[search_id]["status"] in ("cancelled", "failed"):
        print(f"resuming the interrupted search {search_id} of this spec from {args.storage}", file=sys.stderr)
        extend_search(storage, search_id, 0)  # queue it again; finished trials are kept
    done = search_id in known and known[search_id]["status"] == "done"
    deadline = time.monotonic() + BUSY_WAIT
    while True:  # runs sharing a search split its budget; each waits for the others' last trials
        with _stop_on_ctrl_c() as interrupted:
            run_search(
                storage, search_id, progress=_progress_printer(quiet=args.quiet or done), should_stop=interrupted.is_set
            )
        if interrupted.is_set():  # stopped after the batch in hand: no trial left running
            fail_search(storage, search_id, INTERRUPTED)
            raise KeyboardInterrupt
        status = search_status(storage, search_id)
        if status["status"] in ("done", "failed", "cancelled"):
            break
        if recover_stale_trials(storage, search_id, stale_after_seconds())[0]:
            continue  # trials left running by a run that died: failed, asked again now
        if time.monotonic() > deadline:
            raise StorageError(
                f"search {search_id} is busy: {status['trials_running']} of its trials are "
                "held by another process; try again when it has finished"
            )
        time.sleep(0.5)
    if status["status"] == "failed":
        raise StorageError(f"search {search_id} failed: {status.get('reason') or 'see the log'}")
    if not done:
        save_replay_when_worth(storage)  # the next command on this journal restores this search, not replays it
    wanted = max(args.top, getattr(args, "rank", 1), 1)
    return load_search(storage, search_id, top=max(args.top, 1), limit=None if every else wanted)


@contextlib.contextmanager
def _stop_on_ctrl_c() -> Iterator[threading.Event]:
    """While the block runs, a first Ctrl-C (SIGINT) sets the event (the search stops after
    the batch in hand, every trial told) and a second one interrupts at once."""
    interrupted = threading.Event()

    def on_sigint(signum: int, frame: object) -> None:
        if interrupted.is_set():
            raise KeyboardInterrupt
        interrupted.set()
        print("stopping after the batch in hand (Ctrl-C again to stop at once)", file=sys.stderr)

    if threading.current_thread() is not threading.main_thread():  # signals reach the main thread only
        yield interrupted
        return
    previous = signal.signal(signal.SIGINT, on_sigint)
    try:
        yield interrupted
    finally:
        signal.signal(signal.SIGINT, previous)


def _table(rows: list[list[str]], markdown: bool = False) -> str:
    if markdown:
        lines = ["| " + " | ".join(rows[0]) + " |", "|" + "|".join(" --- " for _ in rows[0]) + "|"]
        return "\n".join(lines + ["| " + " | ".join(r) + " |" for r in rows[1:]])
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    return "\n".join("  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in rows)


def _candidate_rows(
    candidates: list[dict], columns: Sequence[str], first: str = "rank", currency: str = ""
) -> list[list[str]]:
    heads = [first if name == "rank" else COLUMNS[name][0] for name in columns]
    return [heads] + [[COLUMNS[name][1](c, currency) for name in columns] for c in candidates]


def _checked_spec(args: argparse.Namespace):
    """The spec of ``args.spec``, validated against its catalog and the topologies (exit 2
    before any trial runs), with the catalog."""
    from optimizer.catalog import load_catalog
    from optimizer.spec import load_spec
    from optimizer.validation import validate_spec

    spec = load_spec(args.spec)
    catalog = load_catalog(spec.parts.catalog)
    validate_spec(spec, catalog)
    return spec, catalog


def _cmd_search(args: argparse.Namespace) -> int:
    import numpy as np

    from optimizer.search import candidates_csv
    from optimizer.spec import spec_digest

    columns = _columns(args.columns)
    plots = [(target, _plot_kind(target)) for target in args.plot]  # flags checked before the search
    spec, catalog = _checked_spec(args)
    result = _run_or_reuse(args, spec, every=any(kind == "front" for _, (kind, _) in plots))
    shown = result.candidates[: args.top]
    front = result.front
    best = shown[0] if shown else None
    if args.format == "json":
        print(
            json.dumps(
                {
                    "search": result.id,
                    "status": result.status["status"],
                    "candidates": shown,
                    "front": front if args.front else None,
                },
                indent=2,
            )
        )
    elif args.format == "csv":
        print(
            f'# stagefit candidates: spec "{spec.name}" (digest {spec_digest(spec)}), search {result.id}, '
            f"catalog {catalog.name}; values in SI units (ohm, F, V, A, Hz, W)"
        )
        if best:
            print(f"# rank 1 basis: {(best.get('basis') or {}).get('label') or 'basis not stated'}")
            for caution in best.get("cautions", []):
                print(f"# caution: {caution}")
        print(candidates_csv(shown), end="")
    else:
        markdown = args.format == "markdown"
        status = result.status
        print(f"{spec.name}: {status['trials_done']} designs evaluated (search {result.id})")
        print(f"basis: {_BASIS_TEXT[spec.robustness](spec)}")
        if result.infeasible:
            print(result.infeasible["text"])
        print(_table(_candidate_rows(shown, columns, currency=catalog.currency), markdown))
        if args.explain:
            print(
                "\nwhy each ranks where it does: score = weighted geometric mean of these terms "
                "(each 1 at its ideal), times the yield of its builds"
            )
            for c in shown:
                terms = c.get("score_terms") or {}
                shown_terms = ", ".join(f"{k} {v:.3f}" for k, v in sorted(terms.items(), key=lambda kv: kv[1]))
                print(f"  {c['rank']:>3}  score {c['score']:.4g}: {shown_terms or 'no score terms (misses a limit)'}")
        if args.front:
            picked = (
                sorted(set(np.linspace(0, len(front) - 1, min(len(front), max(args.top, 2))).round().astype(int)))
                if front
                else []
            )
            note = f", {len(picked)} of them shown, evenly along it" if len(picked) < len(front) else ""
            print(
                f"\nPareto front ({' vs '.join(f'{d} {m}' for m, d in spec.objective_directions)}): "
                f"{len(front)} designs{note}"
            )
            print(
                _table(
                    _candidate_rows([{**front[i], "rank": i + 1} for i in picked], columns, "point", catalog.currency),
                    markdown,
                )
            )
        if best:
            for caution in best.get("cautions", []):
                print(f"caution: {caution}")
    for target, kind in plots:
        _write_plot(target, kind, result, args.rank)
    if not shown or not shown[0]["feasible"]:
        print("no design meets every limit: the nearest misses are listed above, ranked", file=sys.stderr)
        return EXIT_INFEASIBLE
    return EXIT_OK


def _supply_spread_text(spec: Spec) -> str:
    """How the supply moves in the builds: "supply 11.4..12.6 V", or a split supply's rails each on
    its own ("V+ 11.4..12.6 V and V- -12.6..-11.4 V, each on its own")."""
    spread = spec.supply_spread
    if isinstance(spread[0], tuple) and isinstance(spread[1], tuple):
        (p_lo, p_hi), (n_lo, n_hi) = spread
        return f"V+ {p_lo:.4g}..{p_hi:.4g} V and V- {-n_hi:.4g}..{-n_lo:.4g} V, each on its own"
    return f"supply {spec.supply_min:.4g}..{spec.supply_max:.4g} V"


_BASIS_TEXT = {
    "yield": lambda spec: (
        f"a design meets the spec when every hard limit holds in at least "
        f"{100 * spec.limits.yield_min:.3g} % of Monte Carlo builds (part tolerances, hFE "
        f"spread, {spec.temperature[0]:g}..{spec.temperature[1]:g} °C, {_supply_spread_text(spec)}); robustness: yield"
    ),
    "worst_case": lambda spec: (
        "a design meets the spec when every hard limit holds at every corner; robustness: worst_case"
    ),
    "nominal": lambda spec: "limits judged at nominal values only (robustness: nominal): spread is not checked",
}


PLOT_KINDS = ("front", "response", "transfer")


def _plot_kind(target: str) -> tuple[str, str]:
    """(kind, format) of a --plot file name, checked before any search runs."""
    from pathlib import Path

    path = Path(target)
    fmt = path.suffix.lower().lstrip(".")
    kind = next((k for k in PLOT_KINDS if k in path.stem.lower()), None)
    if fmt not in ("svg", "png") or kind is None:
        raise InputError.single(
            "--plot",
            target,
            "a file named for what it shows: front.svg, response.svg or transfer.svg (or .png; e.g. runs/front.svg)",
        )
    return kind, fmt


def _write_plot(target: str, kind_fmt: tuple[str, str], result, rank: int) -> None:
    from pathlib import Path

    from optimizer import plots

    kind, fmt = kind_fmt
    path = Path(target)
    path.parent.mkdir(parents=True, exist_ok=True)
    chosen = result.candidate(rank)
    if kind == "front":
        points = [dict(c) for c in result.candidates]
        plots.front_plot(
            points,
            [tuple(o) for o in result.spec.objective_directions],
            chosen=chosen,
            front=result.front,
            fmt=fmt,
            path=path,
        )
    elif kind == "response":
        plots.response_plot(chosen, fmt=fmt, path=path)
    else:
        plots.transfer_plot(chosen, fmt=fmt, path=path, spec_swing=result.spec.limits.swing_min)
    print(f"wrote {path}", file=sys.stderr)


def _ranked(args: argparse.Namespace):
    """(spec, catalog, candidate at --rank) of a stored or fresh search of ``args.spec``."""
    spec, catalog = _checked_spec(args)
    args.top = max(args.rank, 1)
    result = _run_or_reuse(args, spec)
    return spec, catalog, result.candidate(args.rank)


def _cmd_bom(args: argparse.Namespace) -> int:
    from optimizer.bom import kit

    spec, catalog, candidate = _ranked(args)
    bill = kit(candidate, catalog, args.units, spec)
    if args.format == "csv":
        print(bill.to_csv(), end="")
    elif args.format == "json":
        print(json.dumps(bill.to_dict(), indent=2))
    else:
        t = bill.totals
        print(
            f"kit for {args.units} x rank {args.rank} ({candidate['topology']}) of {spec.name}, "
            f"catalog {spec.parts.catalog}"
        )
        print(f"basis: {bill.basis}")
        rows = [
            [
                "designators",
                "value",
                "tolerance",
                "rating",
                "technology",
                "part_id",
                "per unit",
                "total",
                "stock",
                "short by",
                "line price",
                "note",
            ]
        ]
        for line in bill.to_dict()["lines"]:
            rows.append(
                [
                    line["designators"],
                    line["label"],
                    line["tolerance"],
                    line["rating"],
                    line["technology"] or line["package"],
                    str(line["part_id"] or "-"),
                    str(line["qty_per_unit"]),
                    str(line["qty_total"]),
                    "untracked" if line["stock"] is None else str(line["stock"]),
                    str(line["short_by"] or ""),
                    "-" if line["line_price"] is None else f"{line['line_price']:.2f} {t['currency']}",
                    "; ".join(n for n in (line["orientation"], line.get("note") or "") if n),
                ]
            )
        print(_table(rows))
        print(
            f"total {t['parts_total']} parts, {t['cost_total']:.2f} {t['currency']} "
            f"({t['cost_per_unit']:.2f} {t['currency']} per unit)"
        )
        if bill.short:
            print(f"STOCK IS SHORT on {t['lines_short']} line(s): order before kitting")
        for caution in bill.cautions:
            print(f"caution: {caution}")
    return EXIT_OK


def _cmd_netlist(args: argparse.Namespace) -> int:
    from optimizer.netlist import candidate_netlist

    if args.spec in (None, "-"):
        if sys.stdin.isatty():
            raise InputError.single("spec", args.spec, "a spec file, or a candidate record (JSON) on stdin")
        try:
            candidate = json.loads(sys.stdin.read())
        except json.JSONDecodeError as error:
            raise InputError.single(
                "stdin", error.doc[error.pos : error.pos + 20], f"a candidate record in JSON ({error.msg})"
            ) from None
        title = f"stagefit candidate: {candidate.get('topology') if isinstance(candidate, dict) else '?'}"
    else:
        spec, _, candidate = _ranked(args)
        title = f"stagefit {spec.name} rank {args.rank}: {candidate['topology']}"
    text = candidate_netlist(candidate, title=title)
    if args.out:
        from pathlib import Path

        Path(args.out).write_text(text, encoding="utf-8")
        print(f"wrote {args.out}", file=sys.stderr)
    else:
        print(text, end="")
    return EXIT_OK


def _cmd_report(args: argparse.Namespace) -> int:
    from pathlib import Path

    from optimizer.report import design_sheet

    spec, catalog, candidate = _ranked(args)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    path = out / f"rank{args.rank}.html"
    path.write_text(design_sheet(candidate, spec, catalog, units=args.units), encoding="utf-8")
    print(f"wrote {path}", file=sys.stderr)
    return EXIT_OK


def _cmd_serve(args: argparse.Namespace) -> int:
    from api.server import serve  # Flask and waitress are imported only for this command

    config = {
        k: v for k, v in (("STAGEFIT_WORKERS", args.workers), ("STAGEFIT_STORAGE", args.storage)) if v is not None
    }
    if args.threads is not None:
        config["STAGEFIT_THREADS"] = args.threads
    open_path = None if args.open is None else ("/" if args.open == "" else f"/searches/{args.open}")
    serve(args.host, args.port, config=config, open_path=open_path)
    return EXIT_OK


def _cmd_worker(args: argparse.Namespace) -> int:
    import logging

    from optimizer.worker import run_worker

    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(name)s %(levelname)s %(message)s")
    run_worker(args.storage, poll=args.poll, once=args.once)
    return EXIT_OK


def _cmd_storage(args: argparse.Namespace) -> int:
    from optimizer.storage import check_journal, repair_journal

    if args.action == "check":
        report = check_journal(args.file)
        print(report.describe())
        if not report.clean:
            print(
                f"the service skips the damaged lines; `stagefit storage repair {args.file}` rewrites the "
                "file without them (stop the service first)",
                file=sys.stderr,
            )
        return EXIT_OK if report.clean else EXIT_ENVIRONMENT
    report = repair_journal(args.file)
    print(report.describe())
    if report.backup:
        print(
            f"rewrote {report.path} with its {report.records} readable records; the original is kept as {report.backup}"
        )
    else:
        print("nothing to repair")
    return EXIT_OK


_WHOLE = re.compile(r"[+-]?[0-9]{1,12}")  # ASCII digits only: int() also takes '٣' and '²'


def _whole(low: int, high: int) -> Callable[[str], int]:
    """An argparse type: a whole number from ``low`` to ``high`` written in ASCII digits."""

    def parse(text: str) -> int:
        if not _WHOLE.fullmatch(text.strip()) or not low <= int(text) <= high:
            raise argparse.ArgumentTypeError(f"got {text[:40]!r}; a whole number from {low} to {high}")
        return int(text)

    parse.__name__ = "whole number"
    return parse


class _Parser(argparse.ArgumentParser):
    """argparse with a one-line error (exit code 2) instead of the usage block."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.exit(EXIT_BAD_INPUT, f"error: {self.prog}: {message} (see {self.prog} --help)\n")


def _search_options(parser: argparse.ArgumentParser) -> None:
    from optimizer.limits import MAX_TRIALS

    parser.add_argument(
        "--storage",
        default="runs/stagefit.journal",
        help="where searches are kept: a journal file (default runs/stagefit.journal) "
        "or a database URL such as postgresql://user@host/db",
    )
    parser.add_argument(
        "--trials",
        type=_whole(1, MAX_TRIALS),
        default=None,
        help=f"trial budget, 1 to {MAX_TRIALS} (default: the spec's)",
    )
    parser.add_argument("--seed", type=_whole(0, 2**32 - 1), default=None, help="random seed (default: the spec's)")
    parser.add_argument("--fresh", action="store_true", help="run again even if this spec was searched before")
    parser.add_argument("--quiet", action="store_true", help="no progress report on stderr")


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the `stagefit` command (sub-commands and options)."""
    from optimizer.limits import MAX_SAMPLES, MAX_TOP, MAX_UNITS

    parser = _Parser(
        prog="stagefit",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description=(
            "Choose the topology and every resistor and capacitor of a small-signal "
            "transistor stage from preferred values you can buy or have in stock."
        ),
        epilog="Start with: stagefit check specs/contact_pickup_buffer.yaml\n\n"
        + EXIT_CODES.replace("; ", "\n  ").replace("exit codes: ", "exit codes:\n  "),
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True, parser_class=_Parser)

    check = sub.add_parser("check", help="validate a requirements spec and print it with units")
    check.add_argument("spec", help=SPEC_HELP)
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

    topologies = sub.add_parser(
        "topologies", help="list the stage topologies: description, roles, polarity, supply and gain sign"
    )
    topologies.add_argument("--format", choices=("table", "json"), default="table")
    topologies.set_defaults(handler=_cmd_topologies)

    evaluate = sub.add_parser("evaluate", help="metrics, spread, yield and ratings of a design you already have")
    evaluate.add_argument("spec", help="the spec that sets supply, source, load, band and limits")
    evaluate.add_argument("--topology", required=True, help="a topology name, as `stagefit topologies` lists them")
    evaluate.add_argument(
        "--set",
        action="append",
        default=[],
        metavar="ROLE=VALUE",
        help="a part value, e.g. --set r_top=68k (repeat; capacitors left out are sized)",
    )
    evaluate.add_argument("--device", default=None, help="transistor id (default: the spec's first device)")
    evaluate.add_argument(
        "--samples",
        type=_whole(1, MAX_SAMPLES),
        default=1000,
        help=f"Monte Carlo builds for the yield, 1 to {MAX_SAMPLES} (default 1000)",
    )
    evaluate.add_argument("--format", choices=("table", "json"), default="table")
    evaluate.set_defaults(handler=_cmd_evaluate)

    search = sub.add_parser("search", help="search parts and topologies for a spec; ranked designs and the front")
    search.add_argument("spec", help=SPEC_HELP)
    _search_options(search)
    search.add_argument(
        "--top",
        type=_whole(1, MAX_TOP),
        default=10,
        help=f"how many ranked designs to show, 1 to {MAX_TOP} (default 10)",
    )
    search.add_argument("--format", choices=("table", "json", "csv", "markdown"), default="table")
    search.add_argument("--front", action="store_true", help="also print the Pareto front")
    search.add_argument(
        "--explain", action="store_true", help="print each shown design's score broken down term by term"
    )
    search.add_argument(
        "--plot",
        action="append",
        default=[],
        metavar="FILE",
        help="write front.svg, response.svg or transfer.svg (or .png) of --rank; repeat",
    )
    search.add_argument("--rank", type=_whole(1, MAX_TOP), default=1, help="the design --plot draws (default 1)")
    search.add_argument(
        "--columns",
        default=None,
        metavar="LIST",
        help="table columns, comma-separated, from: "
        + ", ".join(COLUMNS)
        + " (default: "
        + ",".join(DEFAULT_COLUMNS)
        + ")",
    )
    search.set_defaults(handler=_cmd_search)

    bom = sub.add_parser("bom", help="bill of materials and kitting of a ranked design against the catalog's stock")
    bom.add_argument("spec", help=SPEC_HELP)
    bom.add_argument("--rank", type=_whole(1, MAX_TOP), default=1, help="which ranked design (default 1)")
    bom.add_argument(
        "--units", type=_whole(1, MAX_UNITS), default=1, help=f"how many stages to kit, 1 to {MAX_UNITS} (default 1)"
    )
    bom.add_argument("--format", choices=("table", "csv", "json"), default="table")
    _search_options(bom)
    bom.set_defaults(handler=_cmd_bom)

    netlist = sub.add_parser("netlist", help="SPICE netlist of a ranked design (or of a candidate JSON on stdin)")
    netlist.add_argument(
        "spec",
        nargs="?",
        default=None,
        help="path to a spec file; '-' or none: read a candidate record (JSON) from stdin",
    )
    netlist.add_argument("--rank", type=_whole(1, MAX_TOP), default=1, help="which ranked design (default 1)")
    netlist.add_argument("--out", default=None, help="write the netlist to this file (default: stdout)")
    _search_options(netlist)
    netlist.set_defaults(handler=_cmd_netlist)

    report = sub.add_parser("report", help="one self-contained HTML design sheet of a ranked design")
    report.add_argument("spec", help=SPEC_HELP)
    report.add_argument("--rank", type=_whole(1, MAX_TOP), default=1, help="which ranked design (default 1)")
    report.add_argument("--out", required=True, help="directory to write rankN.html into")
    report.add_argument(
        "--units",
        type=_whole(1, MAX_UNITS),
        default=1,
        help=f"units the sheet's BOM is kitted for, 1 to {MAX_UNITS} (default 1)",
    )
    _search_options(report)
    report.set_defaults(handler=_cmd_report)

    serve = sub.add_parser("serve", help="run the REST service (waitress; settings also from STAGEFIT_* variables)")
    serve.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1)")
    serve.add_argument(
        "--open",
        nargs="?",
        const="",
        default=None,
        metavar="SEARCH",
        help="open the browser view once serving: the searches list, or the page of search SEARCH",
    )
    serve.add_argument("--port", type=_whole(0, 65535), default=8750, help="port (default 8750; 0 picks a free one)")
    serve.add_argument(
        "--workers", type=_whole(1, 64), default=None, help="searches run at once (STAGEFIT_WORKERS, default 1)"
    )
    serve.add_argument(
        "--threads",
        type=_whole(2, 1024),
        default=None,
        help="request threads (STAGEFIT_THREADS, default 8); at most half of them wait on "
        "?wait= posts (STAGEFIT_MAX_WAITERS), the rest always serve other requests",
    )
    serve.add_argument(
        "--storage",
        default=None,
        help="Optuna storage URL or journal file (STAGEFIT_STORAGE, default runs/stagefit.journal)",
    )
    serve.set_defaults(handler=_cmd_serve)

    worker = sub.add_parser(
        "worker",
        help="run the trials of searches queued in a shared storage (any number of "
        "workers on any number of machines; stops cleanly on SIGTERM/Ctrl-C)",
    )
    worker.add_argument(
        "--storage",
        default=os.environ.get("STAGEFIT_STORAGE"),
        required=not os.environ.get("STAGEFIT_STORAGE"),
        help="storage URL shared with the API server, e.g. redis://:secret@host:6379/0 or "
        "postgresql://user:pw@db/stagefit (STAGEFIT_STORAGE)",
    )
    worker.add_argument(
        "--poll", type=float, default=2.0, help="seconds to wait when there is nothing to do (default 2)"
    )
    worker.add_argument("--once", action="store_true", help="exit when no stored search has budget left")
    worker.set_defaults(handler=_cmd_worker)

    storage = sub.add_parser(
        "storage",
        help="check a journal file for damaged records, or repair it "
        "(keeps a backup); exit 4 from check when damage is found",
    )
    storage.add_argument(
        "action",
        choices=("check", "repair"),
        help="check: report damaged lines by byte offset; repair: rewrite the file "
        "without them, the original kept as FILE.bak-<time> (stop the service first)",
    )
    storage.add_argument("file", metavar="FILE", help="the journal file, e.g. runs/stagefit.journal")
    storage.set_defaults(handler=_cmd_storage)
    return parser


class _RedisForItsStorageOnly:
    """An import finder that refuses the Redis client until stagefit's own Redis journal
    (:mod:`optimizer.redis_journal`, the redis:// storage) is loaded. Optuna imports its own
    Redis journal backend, and with it the Redis client and its asyncio stack (about 0.1 s
    CPU), whenever redis is installed; a command never uses that backend, and Optuna defers
    the refused import's error to a use of it. Only public names: the import system's finders
    and ``sys.modules``."""

    def find_spec(self, name: str, path: object = None, target: object = None) -> None:
        if name.split(".")[0] == "redis" and "optimizer.redis_journal" not in sys.modules:
            raise ModuleNotFoundError(f"{name} is imported by the redis:// storage only", name=name)
        return None


def defer_unused_imports() -> None:
    """What the command does before it imports anything heavy: the Redis client is left
    unimported unless the redis:// storage is used (:class:`_RedisForItsStorageOnly`). Nothing
    once Optuna is imported."""
    if "optuna" not in sys.modules and not any(isinstance(f, _RedisForItsStorageOnly) for f in sys.meta_path):
        sys.meta_path.insert(0, _RedisForItsStorageOnly())


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the process exit code. Without ``argv`` (the process's
    own command line, which exits next) the objects left in memory are frozen out of the
    cyclic garbage collector first (gc.freeze): its passes at the interpreter's exit would
    otherwise traverse every one of them (about 0.3 s CPU after a 4,000-trial search) only
    to find what the process's end frees anyway."""
    try:
        return _main(argv)
    finally:
        if argv is None:
            gc.freeze()


def _main(argv: Sequence[str] | None) -> int:
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as done:  # --help (0) or a bad argument (2, one line printed)
        return done.code if isinstance(done.code, int) else EXIT_BAD_INPUT
    handler: Callable[[argparse.Namespace], int] = args.handler
    defer_unused_imports()
    try:
        return handler(args)
    except InputError as error:
        print(f"error: {error}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except BrokenPipeError:  # output piped into head or similar: not an error
        sys.stderr.close()
        return EXIT_OK
    except KeyboardInterrupt:  # a search marks its running trials failed first (resumable)
        print(
            "interrupted"
            + (": the search is kept; run the same command again to resume it" if args.command == "search" else ""),
            file=sys.stderr,
        )
        return EXIT_INTERNAL
    except Exception as error:
        if _environmental(error):  # the disk, a file, the database: not the user's input, not a bug
            print(f"error: {type(error).__name__}: {error}".splitlines()[0] + _extra_hint(error), file=sys.stderr)
            return EXIT_ENVIRONMENT
        if os.environ.get("STAGEFIT_DEBUG"):  # a bug, not the user's fault
            raise
        print(
            f"internal error: {type(error).__name__}: {error}\n"
            "This is a bug in stagefit; set STAGEFIT_DEBUG=1 for the traceback and report it.",
            file=sys.stderr,
        )
        return EXIT_INTERNAL


def _environmental(error: BaseException) -> bool:
    """A storage or operating-system failure, or an optional dependency not installed (exit code 4)."""
    return (
        isinstance(error, (StorageError, OSError, MemoryError))
        or _extra_hint(error) != ""
        or type(error).__module__.split(".")[0] in ("sqlalchemy", "psycopg", "redis", "grpc")
    )


#: the optional extra (pyproject.toml) that installs each optional import
OPTIONAL_EXTRAS = {
    "matplotlib": "plots",
    "flask": "server",
    "waitress": "server",
    "psycopg": "postgres",
    "redis": "redis",
}


def _extra_hint(error: BaseException) -> str:
    """How to install the optional dependency whose import failed, or ""."""
    if isinstance(error, ModuleNotFoundError) and (error.name or "").split(".")[0] in OPTIONAL_EXTRAS:
        return f" (install it with: pip install 'stagefit[{OPTIONAL_EXTRAS[(error.name or '').split('.')[0]]}]')"
    return ""


if __name__ == "__main__":
    sys.exit(main())
