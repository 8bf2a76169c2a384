"""The browser pages in a real browser: Debian's headless Chromium driven by selenium, against
the real server (`stagefit serve` under waitress on a loopback port, with an API token).

One walk through the desk: token, example spec, a small search, the ranked table and the
front, the design page of the first front point (its figures checked against the API's JSON
for the same rank, parsed from the page's text with units), the BOM CSV download (checked
against optimizer.bom.kit on that JSON), compare, the searches list with a delete, and a bad
spec whose error shows next to its field. Every page: no console error, no 5xx, every form
control labelled, every text colour at a WCAG 2.x contrast ratio of at least 4.5:1.
Screenshots go to test-artifacts/screenshots/ (a CI artefact).

Skipped, saying why, only where Chromium or its driver is absent and CI is not set.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import urllib.error
import urllib.request
from pathlib import Path

import pytest
import yaml

from test_api_server import live_server  # the suite's one way of starting the real server
from wcag import contrast_ratio

ROOT = Path(__file__).resolve().parents[1]
SHOTS = ROOT / "test-artifacts" / "screenshots"
TOKEN = "browser-test-token"
CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
DRIVER = shutil.which("chromedriver")
if not (CHROMIUM and DRIVER):
    if os.environ.get("CI") == "true":
        pytest.fail(
            "the browser tests must run under CI, but chromium or chromedriver is missing "
            "(.ci/run installs Debian's chromium and chromium-driver)",
            pytrace=False,
        )
    pytest.skip(
        "chromium and chromium-driver are not installed (apt-get install chromium chromium-driver); "
        "CI installs them and runs these tests",
        allow_module_level=True,
    )

from selenium import webdriver  # noqa: E402
from selenium.webdriver.chrome.service import Service  # noqa: E402
from selenium.webdriver.common.by import By  # noqa: E402
from selenium.webdriver.support import expected_conditions as EC  # noqa: E402
from selenium.webdriver.support.ui import Select, WebDriverWait  # noqa: E402

#: display unit -> factor to SI (the pages show the plots' units)
UNIT_TO_SI = {"V/V": 1.0, "Vpp": 1.0, "mA": 1e-3, "kΩ": 1e3, "Ω": 1.0, "dB": 1.0, "%": 1e-2}


# --- fixtures -----------------------------------------------------------------------------


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("browser")
    with live_server(tmp, tmp / "pages.journal", env={"STAGEFIT_API_TOKEN": TOKEN}, name="pages") as (base, _):
        yield base, tmp / "pages.log"


@pytest.fixture(scope="module")
def downloads(tmp_path_factory):
    return tmp_path_factory.mktemp("downloads")


@pytest.fixture(scope="module")
def browser(tmp_path_factory, downloads):
    options = webdriver.ChromeOptions()
    options.binary_location = CHROMIUM
    for flag in (
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--no-first-run",
        "--window-size=1280,1000",
        f"--user-data-dir={tmp_path_factory.mktemp('chromium-profile')}",
    ):
        options.add_argument(flag)
    options.add_experimental_option(
        "prefs", {"download.default_directory": str(downloads), "download.prompt_for_download": False}
    )
    options.set_capability("goog:loggingPrefs", {"browser": "ALL", "performance": "ALL"})
    driver = webdriver.Chrome(options=options, service=Service(DRIVER))
    driver.execute_cdp_cmd("Browser.setDownloadBehavior", {"behavior": "allow", "downloadPath": str(downloads)})
    SHOTS.mkdir(parents=True, exist_ok=True)
    yield driver
    driver.quit()


def api_json(base: str, path: str) -> dict:
    request = urllib.request.Request(
        base + path, headers={"Accept": "application/json", "Authorization": f"Bearer {TOKEN}"}
    )
    with urllib.request.urlopen(request, timeout=60) as response:
        return json.loads(response.read())


# --- per-page checks ------------------------------------------------------------------------


def wait(driver, seconds: float = 60):
    return WebDriverWait(driver, seconds)


def page_problems(driver, allowed: tuple[str, ...] = ()) -> list[str]:
    """Console errors and 5xx responses since the last call (the logs are read once)."""
    problems = [
        e["message"]
        for e in driver.get_log("browser")
        if e["level"] == "SEVERE" and not any(a in e["message"] for a in allowed)
    ]
    for entry in driver.get_log("performance"):
        message = json.loads(entry["message"])["message"]
        if message["method"] == "Network.responseReceived":
            response = message["params"]["response"]
            if response["status"] >= 500:
                problems.append(f"{response['status']} from {response['url']}")
            assert TOKEN not in response["url"], "the API token must never appear in a URL"
    return problems


ACCESSIBILITY_PROBE = """
function opaque(el, prop) {
  for (; el && el.nodeType === 1; el = el.parentElement) {
    var c = getComputedStyle(el)[prop];
    if (c && c !== 'transparent' && !/rgba\\(.*, 0\\)$/.test(c)) return c;
  }
  return 'rgb(255, 255, 255)';
}
var unlabelled = [];
document.querySelectorAll('input, select, textarea').forEach(function (el) {
  if (el.type === 'hidden') return;
  var named = (el.labels && el.labels.length) || el.getAttribute('aria-label') || el.getAttribute('aria-labelledby');
  if (!named) unlabelled.push(el.outerHTML.slice(0, 120));
});
var texts = [];
document.querySelectorAll('body *').forEach(function (el) {
  var own = Array.prototype.some.call(el.childNodes, function (n) { return n.nodeType === 3 && n.textContent.trim(); });
  if (!own || !el.getClientRects().length) return;
  var style = getComputedStyle(el);
  if (style.visibility === 'hidden' || el.closest('[hidden]') || el.tagName === 'title' || el.tagName === 'OPTION') return;
  var svgText = el instanceof SVGElement;
  texts.push([svgText ? style.fill : style.color, opaque(el, 'backgroundColor'), el.tagName, el.textContent.trim().slice(0, 40)]);
});
return [unlabelled, texts];
"""


def rgb_hex(css: str) -> str:
    r, g, b = [int(float(v)) for v in re.findall(r"[\d.]+", css)[:3]]
    return f"#{r:02x}{g:02x}{b:02x}"


def check_page(driver, name: str, allowed: tuple[str, ...] = ()) -> None:
    """Screenshot (the full page), then labels, contrast, console and network of this page."""
    height = driver.execute_script("return document.documentElement.scrollHeight")
    driver.set_window_size(1280, min(max(height + 20, 700), 6000))
    driver.save_screenshot(str(SHOTS / f"{name}.png"))
    driver.set_window_size(1280, 1000)
    unlabelled, texts = driver.execute_script(ACCESSIBILITY_PROBE)
    assert not unlabelled, f"{name}: form controls without a label: {unlabelled}"
    low = [
        (tag, text, fg, bg, round(contrast_ratio(rgb_hex(fg), rgb_hex(bg)), 2))
        for fg, bg, tag, text in texts
        if contrast_ratio(rgb_hex(fg), rgb_hex(bg)) < 4.5
    ]
    assert texts and not low, f"{name}: text below 4.5:1 contrast: {low[:5]}"
    assert not page_problems(driver, allowed), f"{name}: {page_problems(driver, allowed)}"


def shown_si(text: str) -> float:
    """A figure as the page shows it ("−30.37 V/V", "0.7166 mA") in SI units."""
    number, unit = re.fullmatch(r"([−\-\d.e+]+)\s*(.*)", text.strip()).groups()
    return float(number.replace("−", "-")) * UNIT_TO_SI[unit]


# --- the walk -------------------------------------------------------------------------------


def test_design_desk_in_a_browser(server, browser, downloads):
    base, log = server
    driver = browser
    driver.get(base + "/")
    # the token: kept in sessionStorage, sent as a bearer header
    driver.find_element(By.ID, "token").send_keys(TOKEN)
    driver.find_element(By.CSS_SELECTOR, "#token-form button").click()
    wait(driver).until(lambda d: d.execute_script("return sessionStorage.getItem('stagefit-token')") == TOKEN)

    # spec form from an example, a small search
    Select(driver.find_element(By.ID, "example")).select_by_value("bench_stock_preamp")
    driver.find_element(By.CSS_SELECTOR, "#example-form button").click()
    name = driver.find_element(By.NAME, "name")
    wait(driver).until(lambda d: name.get_attribute("value") == "bench_stock_preamp")
    assert driver.find_element(By.NAME, "supply").get_attribute("value") == "15 V"
    trials = driver.find_element(By.NAME, "search.trials")
    trials.clear()
    trials.send_keys("300")
    check_page(driver, "spec")
    driver.find_element(By.CSS_SELECTOR, "#spec-form button[type=submit]").click()
    wait(driver).until(EC.url_matches(r"/searches/s-[0-9a-f]+$"))
    search_id = driver.current_url.rsplit("/", 1)[1]

    # live progress, then the ranked table and the front
    wait(driver, 180).until(EC.presence_of_element_located((By.CSS_SELECTOR, "#ranked tbody tr")))
    assert driver.find_element(By.ID, "status").text == "done"
    assert driver.find_element(By.ID, "trials").text.startswith("300 of 300")
    status = api_json(base, f"/v1/searches/{search_id}")
    assert driver.find_element(By.ID, "feasible").text == str(status["trials_feasible"])
    ranks = [int(r.get_attribute("data-rank")) for r in driver.find_elements(By.CSS_SELECTOR, "#ranked tbody tr")]
    assert ranks == sorted(ranks) and ranks[0] == 1
    # sorting by rank again reverses it (the second click sorts descending)
    rank_header = driver.find_element(By.CSS_SELECTOR, "#ranked th button")
    rank_header.click()
    rank_header.click()
    ranks = [int(r.get_attribute("data-rank")) for r in driver.find_elements(By.CSS_SELECTOR, "#ranked tbody tr")]
    assert ranks == sorted(ranks, reverse=True)
    rank_header.click()
    front = driver.find_elements(By.CSS_SELECTOR, "#front a.pt.on-front")
    assert front, "the front has points"
    assert driver.find_elements(By.CSS_SELECTOR, "#front a.pt.ok circle")
    # infeasible designs are drawn as crosses (a shape), feasible ones as discs
    assert all(p.find_elements(By.TAG_NAME, "path") for p in driver.find_elements(By.CSS_SELECTOR, "#front a.pt.bad"))
    hover = front[0].find_element(By.TAG_NAME, "circle")
    webdriver.ActionChains(driver).move_to_element(hover).perform()
    tip = driver.find_element(By.ID, "tip")
    wait(driver).until(lambda d: tip.is_displayed() and tip.text.startswith("rank "))
    check_page(driver, "search")

    # the first front point opens its design; its figures match the API's JSON
    first = min(front, key=lambda p: int(re.search(r"/designs/(\d+)$", p.get_dom_attribute("href")).group(1)))
    rank = int(re.search(r"/designs/(\d+)$", first.get_dom_attribute("href")).group(1))
    first.find_element(By.TAG_NAME, "circle").click()
    wait(driver).until(EC.url_matches(rf"/designs/{rank}$"))
    wait(driver).until(EC.presence_of_element_located((By.ID, "fig-gain")))
    record = api_json(base, f"/v1/searches/{search_id}/candidates/{rank}")
    for metric in ("gain", "swing_vpp", "input_impedance", "supply_current"):
        figure = driver.find_element(By.ID, f"fig-{metric}")
        assert float(figure.get_attribute("data-si")) == record["metrics"][metric]
        assert shown_si(figure.text) == pytest.approx(record["metrics"][metric], rel=6e-4), (metric, figure.text)
    wait(driver).until(lambda d: len(d.find_elements(By.CSS_SELECTOR, ".plots img")) == 2)
    wait(driver).until(
        lambda d: d.execute_script(
            "return Array.from(document.querySelectorAll('.plots img')).every(i => i.complete && i.naturalWidth > 0)"
        )
    )

    # the BOM CSV download is the kit of that very record
    from optimizer.bom import kit
    from optimizer.catalog import load_catalog

    driver.find_element(By.XPATH, "//button[normalize-space()='BOM (CSV)']").click()
    target = downloads / f"{search_id}-rank{rank}-bom.csv"
    wait(driver).until(lambda d: target.exists() and target.stat().st_size > 0)
    spec = yaml.safe_load((ROOT / "specs" / "bench_stock_preamp.yaml").read_text())
    got = target.read_text().splitlines()
    want = kit(record, load_catalog(spec["parts"]["catalog"]), 1).to_csv().splitlines()
    assert got[0].startswith(f'# stagefit BOM: spec "{spec["name"]}" (digest ')  # the service names the spec
    assert got[1:] == want[1:]
    check_page(driver, "design")

    # compare two designs: differences marked
    driver.get(f"{base}/searches/{search_id}")
    wait(driver, 60).until(EC.presence_of_element_located((By.ID, "cmp-2")))
    driver.find_element(By.ID, "cmp-1").click()
    driver.find_element(By.ID, "cmp-2").click()
    driver.find_element(By.CSS_SELECTOR, "#compare-form button[type=submit]").click()
    wait(driver).until(EC.presence_of_element_located((By.CSS_SELECTOR, "#compare tbody tr")))
    one, two = (api_json(base, f"/v1/searches/{search_id}/candidates/{r}") for r in (1, 2))
    differs = {row.get_attribute("data-key") for row in driver.find_elements(By.CSS_SELECTOR, "#compare tr.diff")}
    assert ("metric-supply_current" in differs) == (
        one["metrics"]["supply_current"] != two["metrics"]["supply_current"]
    )
    assert differs, "two distinct designs differ somewhere"
    check_page(driver, "compare")

    # the searches list, and a delete
    spare = json.loads(
        urllib.request.urlopen(
            urllib.request.Request(
                base + "/v1/searches?wait=60",
                data=json.dumps({**spec, "name": "spare", "search": {"trials": 64}}).encode(),
                headers={"Content-Type": "application/json", "Authorization": f"Bearer {TOKEN}"},
            ),
            timeout=90,
        ).read()
    )
    spare_id = spare["search"]["id"]
    driver.get(f"{base}/searches")
    wait(driver).until(EC.presence_of_element_located((By.CSS_SELECTOR, f"tr[data-id='{spare_id}']")))
    row = driver.find_element(By.CSS_SELECTOR, f"tr[data-id='{search_id}']")
    assert "done" in row.text and "300 of 300" in row.text
    check_page(driver, "searches")
    driver.find_element(By.CSS_SELECTOR, f"button[data-delete='{spare_id}']").click()
    driver.switch_to.alert.accept()
    wait(driver).until(lambda d: not d.find_elements(By.CSS_SELECTOR, f"tr[data-id='{spare_id}']"))
    assert [s["id"] for s in api_json(base, "/v1/searches")["searches"]] == [search_id]

    # a bad spec: the error stands next to the field it names
    driver.get(base + "/")
    Select(driver.find_element(By.ID, "example")).select_by_value("bench_stock_preamp")
    driver.find_element(By.CSS_SELECTOR, "#example-form button").click()
    gain = driver.find_element(By.NAME, "gain.target")
    wait(driver).until(lambda d: gain.get_attribute("value") == "-30")
    gain.clear()
    gain.send_keys("loud")
    driver.find_element(By.CSS_SELECTOR, "#spec-form button[type=submit]").click()
    error = wait(driver).until(EC.presence_of_element_located((By.CSS_SELECTOR, ".field-error")))
    field = error.find_element(By.XPATH, "..")
    assert field.find_element(By.TAG_NAME, "input").get_attribute("name") == "gain.target"
    assert gain.get_attribute("aria-invalid") == "true"
    # the very words of the API's validator for that field
    request = urllib.request.Request(
        base + "/v1/searches",
        method="POST",
        data=json.dumps({**spec, "gain": {**spec["gain"], "target": "loud"}}).encode(),
        headers={"Content-Type": "application/json", "Authorization": f"Bearer {TOKEN}"},
    )
    with pytest.raises(urllib.error.HTTPError) as rejected:
        urllib.request.urlopen(request, timeout=60)
    assert rejected.value.code == 422
    expected = [e["expected"] for e in json.loads(rejected.value.read())["errors"] if e["field"] == "gain.target"]
    assert expected and error.text.startswith(expected[0]) and '"loud"' in error.text
    assert driver.current_url == base + "/"
    check_page(driver, "spec-error", allowed=("status of 422",))  # the rejected POST itself
    assert "unexpected error" not in log.read_text()
