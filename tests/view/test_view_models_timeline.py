"""The Models and Timeline pages in headless Chromium against a real ``rbfgate serve``."""

from __future__ import annotations

import httpx

from tests.service.http_api.server import ServeProcess
from tests.view.browser import drawn_marks
from tests.view.conftest import MODEL, SWITCHES, make_store


def _typical(bundle) -> dict[str, float]:
    return {feature.name: feature.training.mean for feature in bundle.manifest.features}


def test_models_page_lists_the_model_with_its_active_version_last_switch_and_traffic(site, browser, tmp_path):
    record = _typical(site.bundles["1.0.0"])
    with httpx.Client(base_url=site.url, headers={"Authorization": f"Bearer {site.tokens['score']}"}) as client:
        assert client.post(f"/score/{MODEL}", json={"records": [record, record]}).status_code == 200
        assert client.post(f"/score/{MODEL}", json={"records": [{**record, "core_temp_c": 99.0}, record]}).status_code == 200
    tab = browser.tab()
    tab.set_token(site.url, site.tokens["audit"])
    page = tab.visit(site.url + "/view/")
    row = page.inner_text(f"tr[data-model='{MODEL}']")
    assert "1.0.0" in row  # the rollback in the history made 1.0.0 active again
    assert "rollback by ops-alice" in row and SWITCHES[-1][3] in row
    assert "2 requests, 3 scored, 1 refused" in row and "25.0 % of records refused" in row
    assert drawn_marks(page)["traffic"][0] >= 2  # scored and refused bars
    tab.screenshot(tmp_path / "models.png")
    tab.assert_clean()


def test_serve_prints_the_address_of_the_pages(tmp_path, demo_bundles):
    store = make_store(tmp_path / "store", demo_bundles)
    with ServeProcess(tmp_path, "--store", str(store)) as server:
        assert f"pages at {server.url}/view/" in server.stderr_path.read_text()
        answer = httpx.get(f"{server.url}/view/")
    assert answer.status_code == 200 and answer.headers["content-type"].startswith("text/html")


def test_the_root_redirects_to_the_pages(site):
    answer = httpx.get(site.url + "/", follow_redirects=False)
    assert answer.status_code == 307 and answer.headers["location"] == "/view/"


def test_timeline_plots_the_live_versions_and_answers_live_at_for_any_moment(site, browser, tmp_path):
    tab = browser.tab()
    tab.set_token(site.url, site.tokens["audit"])
    page = tab.visit(f"{site.url}/view/models/{MODEL}")
    assert page.inner_text("#chain") == "verified"
    assert drawn_marks(page)["timeline"][0] >= 3 + 3  # three live stretches and three switch points
    newest = page.inner_text("#switches tbody tr:first-child")
    assert "rollback" in newest and SWITCHES[-1][3] in newest
    # (moment, version live then): from the switches the fixture wrote, SWITCHES.
    for moment, expected in (("2026-01-20T00:00:00Z", "1.0.0"), ("2026-02-15T12:00:00+01:00", "2.0.0"),
                             ("2026-03-01T08:15:00Z", "1.0.0")):
        page.fill("#live-at", moment)
        page.click("#live-at ~ button")
        page.wait_for_selector("#live-answer .answer")
        assert page.inner_text("#live-answer .label") == expected, moment
    tab.screenshot(tmp_path / "timeline.png")
    tab.assert_clean()
    # Before the first activation the store's lookup answers 404, and the page says why.
    page.fill("#live-at", "2025-12-31T23:59:59Z")
    page.click("#live-at ~ button")
    page.wait_for_selector("#live-answer .problem")
    assert "no version of pallet-checks was live at 2025-12-31T23:59:59Z" in page.inner_text("#live-answer")
