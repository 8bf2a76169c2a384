"""Browser pages: how fast the search page and a design page load on a 20,000-trial stored
search, and how heavy they are with their assets.

Runs the real server (`stagefit serve`, waitress) on a loopback port over a journal file
holding one finished 20,000-trial search (made first, in this process, with the same
optimizer.search functions the service uses). For each page it measures over loopback:

* time to first byte and full transfer of the page shell, of the data fragment the page
  script fetches, and of the assets (urllib, median of ``--repeat`` runs);
* with Debian's headless Chromium present: the browser's first paint and the time until the
  page's data is on screen (Navigation Timing and Paint Timing; median of ``--repeat``);
* bytes of the shell + fragment + CSS + JS (the plots on the design page listed apart).

Targets (from the issue): first paint under 300 ms on loopback; page + assets under 200 KB.

    .venv/bin/python benchmarks/bench_pages.py [--trials 20000] [--repeat 7]
writes benchmarks/results/pages.md.
"""

from __future__ import annotations

import argparse
import contextlib
import os
import re
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
SPEC = ROOT / "specs" / "bench_stock_preamp.yaml"


def make_search(journal: Path, trials: int) -> tuple[str, float]:
    from optimizer.search import create_search, run_search, with_search
    from optimizer.spec import load_spec
    from optimizer.storage import open_storage

    storage = open_storage(str(journal))
    spec = with_search(load_spec(SPEC), trials=trials)
    started = time.perf_counter()
    search_id = create_search(spec, storage)
    run_search(storage, search_id)
    return search_id, time.perf_counter() - started


@contextlib.contextmanager
def server(journal: Path, log: Path):
    env = {k: v for k, v in os.environ.items() if not k.startswith("STAGEFIT_")}
    with open(log, "w") as out:
        proc = subprocess.Popen(
            [sys.executable, "-m", "optimizer.cli", "serve", "--port", "0", "--storage", str(journal)],
            cwd=ROOT,
            env=env,
            stdout=out,
            stderr=subprocess.STDOUT,
        )
    try:
        deadline = time.monotonic() + 120
        while not (found := re.search(r"serving on (http://127\.0\.0\.1:\d+)/", log.read_text())):
            if proc.poll() is not None or time.monotonic() > deadline:
                raise SystemExit(f"server did not start: {log.read_text()}")
            time.sleep(0.05)
        yield found.group(1)
    finally:
        proc.terminate()
        proc.wait(60)


def fetch(url: str, accept: str = "text/html") -> tuple[float, float, int]:
    """(time to first byte, time to last byte, bytes) of one GET, seconds."""
    started = time.perf_counter()
    with urllib.request.urlopen(urllib.request.Request(url, headers={"Accept": accept}), timeout=120) as response:
        first = response.read(1)
        ttfb = time.perf_counter() - started
        body = first + response.read()
    return ttfb, time.perf_counter() - started, len(body)


def http_figures(base: str, page: str, fragment: str, repeat: int) -> dict:
    fetch(base + fragment)  # warm: the finished search is read from the journal once and kept
    shell = [fetch(base + page) for _ in range(repeat)]
    data = [fetch(base + fragment) for _ in range(repeat)]
    assets = sum(fetch(base + a, "*/*")[2] for a in ("/assets/pages.css", "/assets/pages.js", "/palette.css"))
    return {
        "shell_ttfb": statistics.median(s[0] for s in shell),
        "shell_total": statistics.median(s[1] for s in shell),
        "data_ttfb": statistics.median(d[0] for d in data),
        "data_total": statistics.median(d[1] for d in data),
        "bytes": shell[0][2] + data[0][2] + assets,
        "shell_bytes": shell[0][2],
        "data_bytes": data[0][2],
        "asset_bytes": assets,
    }


def browser_figures(base: str, page: str, ready_selector: str, repeat: int) -> dict | None:
    chromium, driver_path = shutil.which("chromium"), shutil.which("chromedriver")
    if not (chromium and driver_path):
        return None
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    paints, readies = [], []
    with tempfile.TemporaryDirectory() as profile:
        options = webdriver.ChromeOptions()
        options.binary_location = chromium
        for flag in (
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--no-first-run",
            f"--user-data-dir={profile}",
        ):
            options.add_argument(flag)
        driver = webdriver.Chrome(options=options, service=Service(driver_path))
        try:
            for k in range(repeat + 1):
                driver.get("about:blank")
                driver.get(base + page)
                WebDriverWait(driver, 120).until(lambda d: d.find_elements(By.CSS_SELECTOR, ready_selector))
                ready = driver.execute_script("return performance.now()")
                paint = driver.execute_script(
                    "var p = performance.getEntriesByName('first-contentful-paint')[0]"
                    " || performance.getEntriesByName('first-paint')[0]; return p ? p.startTime : null"
                )
                if k:  # the first load warms the browser's cache of the assets
                    paints.append(paint)
                    readies.append(ready)
        finally:
            driver.quit()
    return {"first_paint": statistics.median(paints) / 1e3, "data_shown": statistics.median(readies) / 1e3}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--trials", type=int, default=20000)
    parser.add_argument("--repeat", type=int, default=7)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        journal = Path(tmp) / "pages.journal"
        search_id, made = make_search(journal, args.trials)
        print(f"stored search {search_id}: {args.trials} trials in {made:.1f} s")
        pages = {
            "search page": (f"/searches/{search_id}", f"/ui/searches/{search_id}/results", "#ranked tbody tr"),
            "design page (rank 1)": (
                f"/searches/{search_id}/designs/1",
                f"/ui/searches/{search_id}/designs/1",
                ".plots img",
            ),
        }
        rows = []
        with server(journal, Path(tmp) / "server.log") as base:
            for name, (page, fragment, ready) in pages.items():
                figures = http_figures(base, page, fragment, args.repeat)
                figures.update(browser_figures(base, page, ready, args.repeat) or {})
                if name.startswith("design"):
                    figures["plot_bytes"] = sum(
                        fetch(f"{base}/v1/searches/{search_id}/candidates/1/{p}", "image/svg+xml")[2]
                        for p in ("response.svg", "transfer.svg")
                    )
                rows.append((name, figures))
                print(name, {k: round(v, 4) if isinstance(v, float) else v for k, v in figures.items()})
    write(rows, args, made)


def write(rows: list[tuple[str, dict]], args: argparse.Namespace, made: float) -> None:
    ms = lambda v: f"{v * 1e3:.0f} ms" if v is not None else "n/a"  # noqa: E731
    kb = lambda v: f"{v / 1024:.0f} KB"  # noqa: E731
    lines = [
        "# Browser pages: load time and size",
        "",
        f"`benchmarks/bench_pages.py --trials {args.trials} --repeat {args.repeat}`: one finished "
        f"{args.trials:,}-trial search of `specs/bench_stock_preamp.yaml` (made in {made:.0f} s) on a journal "
        "file, the real server (waitress) on loopback, medians. Machine: 2 cores shared with other work.",
        "",
        "Targets: first paint under 300 ms on loopback; page with its assets under 200 KB.",
        "",
        "| page | shell TTFB | shell full | data TTFB | data full | first paint (Chromium) | data on screen (Chromium) "
        "| shell + data + CSS/JS | plots (SVG, apart) |",
        "| --- | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: |",
    ]
    for name, f in rows:
        lines.append(
            f"| {name} | {ms(f['shell_ttfb'])} | {ms(f['shell_total'])} | {ms(f['data_ttfb'])} | "
            f"{ms(f['data_total'])} | {ms(f.get('first_paint'))} | {ms(f.get('data_shown'))} | "
            f"{kb(f['bytes'])} ({kb(f['shell_bytes'])} + {kb(f['data_bytes'])} + {kb(f['asset_bytes'])}) | "
            f"{kb(f['plot_bytes']) if 'plot_bytes' in f else '—'} |"
        )
    lines += [
        "",
        "The shell paints before any data arrives (it carries none: the data fragment is fetched with "
        'the API token); "data on screen" is from navigation start until the ranked table (search page) or '
        "both plots (design page) are in the page. The design page's plots are matplotlib SVGs drawn per request "
        "by the REST routes and are listed apart from the page weight.",
        "",
    ]
    out = ROOT / "benchmarks" / "results" / "pages.md"
    out.write_text("\n".join(lines))
    print(f"wrote {out}")


if __name__ == "__main__":
    main()
