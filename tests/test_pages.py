"""The browser pages through Flask's test client: shells open without the token, data behind
it, the palette's text contrast (WCAG 2.x), the transfer.svg route and its problem+json."""

from __future__ import annotations

import re
from html.parser import HTMLParser

import pytest
import yaml

from api import create_app
from optimizer.palette import PALETTE, PLOT_COLOURS, TEXT_PAIRS
from wcag import contrast_ratio

TOKEN = "pages-token"
AUTH = {"Authorization": f"Bearer {TOKEN}"}


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    app = create_app({"STAGEFIT_DATA_DIR": str(tmp_path_factory.mktemp("runs")), "STAGEFIT_API_TOKEN": TOKEN})
    yield app.test_client()
    app.extensions["stagefit"].jobs.stop()


@pytest.fixture(scope="module")
def search_id(client):
    spec = yaml.safe_load(open("specs/bench_stock_preamp.yaml"))
    spec["search"] = {"trials": 128, "seed": 3}
    response = client.post("/v1/searches?wait=60", json=spec, headers=AUTH)
    assert response.status_code == 200, response.data
    return response.get_json()["search"]["id"]


def test_contrast_formula_on_published_values():
    # WCAG 2.x: black on white is the maximum 21:1; #777777 on white is the customary
    # example of a grey just short of 4.5:1 (4.48:1) -- common practice among contrast checkers
    assert contrast_ratio("#000000", "#ffffff") == pytest.approx(21.0)
    assert contrast_ratio("#777777", "#ffffff") == pytest.approx(4.48, abs=0.01)
    assert contrast_ratio("#ffffff", "#ffffff") == pytest.approx(1.0)


def test_palette_text_contrast_meets_wcag_aa():
    # WCAG 2.x success criterion 1.4.3: at least 4.5:1 for text
    for text, background in TEXT_PAIRS:
        assert contrast_ratio(PALETTE[text], PALETTE[background]) >= 4.5, (text, background)
    # not the blue/red/grey of a well-known plotting library's default cycle
    assert not {"#1f77b4", "#d62728", "#7f7f7f", "#b0b0b0"} & set(PLOT_COLOURS.values())


class _Controls(HTMLParser):
    """Form controls and the ids that labels point at."""

    def __init__(self) -> None:
        super().__init__()
        self.controls, self.labelled = [], set()

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "label" and attrs.get("for"):
            self.labelled.add(attrs["for"])
        if tag in ("input", "select", "textarea") and attrs.get("type") != "hidden":
            self.controls.append(attrs)


def unlabelled(html: str) -> list[dict]:
    parser = _Controls()
    parser.feed(html)
    return [
        c
        for c in parser.controls
        if c.get("id") not in parser.labelled and not c.get("aria-label") and not c.get("aria-labelledby")
    ]


def test_shells_open_data_behind_the_token(client, search_id):
    for url in (
        "/",
        "/searches",
        f"/searches/{search_id}",
        f"/searches/{search_id}/designs/1",
        f"/compare?search={search_id}&ranks=1,2",
    ):
        response = client.get(url)
        assert response.status_code == 200 and response.mimetype == "text/html", url
        assert not unlabelled(response.get_data(as_text=True)), url
    for url in ("/assets/pages.js", "/assets/pages.css", "/palette.css"):
        assert client.get(url).status_code == 200, url
    assert PALETTE["teal"] in client.get("/palette.css").get_data(as_text=True)
    for url in (
        "/ui/searches",
        f"/ui/searches/{search_id}/results",
        f"/ui/searches/{search_id}/designs/1",
        f"/ui/compare?search={search_id}&ranks=1,2",
        "/ui/examples/bench_stock_preamp",
    ):
        assert client.get(url).status_code == 401, url
        response = client.get(url, headers=AUTH)
        assert response.status_code == 200, url
        if response.mimetype == "text/html":
            assert not unlabelled(response.get_data(as_text=True)), url


def test_fragments_show_the_api_figures(client, search_id):
    record = client.get(f"/v1/searches/{search_id}/candidates/1", headers=AUTH).get_json()
    html = client.get(f"/ui/searches/{search_id}/designs/1", headers=AUTH).get_data(as_text=True)
    for metric in ("gain", "swing_vpp", "input_impedance", "supply_current"):
        found = re.search(rf'id="fig-{metric}" data-si="([^"]+)"', html)
        assert found and float(found.group(1)) == record["metrics"][metric]
    results = client.get(f"/ui/searches/{search_id}/results", headers=AUTH).get_data(as_text=True)
    count = len(client.get(f"/v1/searches/{search_id}/candidates?top=1000", headers=AUTH).get_json()["candidates"])
    assert len(re.findall(r'<tr class="(?:ok|bad)" data-rank=', results)) == min(50, count)
    status = client.get(f"/v1/searches/{search_id}", headers=AUTH).get_json()
    assert 0 <= status["trials_feasible"] <= status["trials_done"] == 128


def test_transfer_svg_route_and_its_problems(client, search_id):
    response = client.get(f"/v1/searches/{search_id}/candidates/1/transfer.svg", headers=AUTH)
    assert response.status_code == 200 and response.mimetype == "image/svg+xml"
    assert b"<svg" in response.data
    for url, status in (
        (f"/v1/searches/{search_id}/candidates/999/transfer.svg", 404),
        ("/v1/searches/nothing/candidates/1/transfer.svg", 404),
        (f"/ui/searches/{search_id}/designs/999", 404),
        ("/ui/examples/..%2Fpyproject", 404),
        (f"/ui/compare?search={search_id}&ranks=1", 400),
    ):
        response = client.get(url, headers=AUTH)
        assert response.status_code == status and response.mimetype == "application/problem+json", url
    # a design beyond the shortlist plots too (its record carries the full transistor block)
    last = client.get(f"/v1/searches/{search_id}", headers=AUTH).get_json()["trials_done"]
    count = len(client.get(f"/v1/searches/{search_id}/candidates?top=1000", headers=AUTH).get_json()["candidates"])
    assert count <= last
    assert client.get(f"/v1/searches/{search_id}/candidates/{count}/transfer.svg", headers=AUTH).status_code == 200
