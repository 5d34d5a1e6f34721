"""Preview a switch, activating from the page, and the role rules as the pages apply them."""

from __future__ import annotations

import httpx

from tests.view.browser import drawn_marks
from tests.view.conftest import MODEL


def _send_some_traffic(site) -> None:
    bundle = site.bundles["1.0.0"]
    rows = bundle.manifest.golden.inputs[:10]
    records = [dict(zip(bundle.feature_names, row)) for row in rows]
    with httpx.Client(base_url=site.url, headers={"Authorization": f"Bearer {site.tokens['score']}"}) as client:
        assert client.post(f"/score/{MODEL}", json={"records": records}).status_code == 200


def test_preview_shows_flips_changes_and_contract_then_activates_with_a_reason_the_history_shows(site, browser, tmp_path):
    _send_some_traffic(site)
    tab = browser.tab()
    tab.set_token(site.url, site.tokens["operate"])
    page = tab.visit(f"{site.url}/view/models/{MODEL}/preview")
    page.wait_for_selector("#report #contract")
    with httpx.Client(base_url=site.url, headers={"Authorization": f"Bearer {site.tokens['operate']}"}) as client:
        expected = client.post(f"/models/{MODEL}/preview", json={"version": "2.0.0"}).json()["report"]
    assert page.inner_text("#flips").split()[0] == str(expected["label_flips"]["count"])
    assert "10 inputs" in page.inner_text("#report")  # the records this worker scored
    assert "calibration changed" in page.inner_text("#contract")  # sigmoid -> isotonic
    assert drawn_marks(page)["changes"][0] > 0
    tab.screenshot(tmp_path / "preview.png")
    reason = "isotonic calibration reviewed by the risk desk"
    page.fill("#reason", reason)
    page.click("#activate")
    assert "Activate pallet-checks 2.0.0" in page.inner_text("#confirm")  # the confirmation names the version
    page.click("#confirm-yes")
    page.wait_for_selector("#switched")
    newest = page.inner_text("#recent-switches tbody tr:first-child")
    assert "activate" in newest and "2.0.0" in newest and reason in newest and "operate-user" in newest
    page = tab.visit(f"{site.url}/view/models/{MODEL}")
    assert reason in page.inner_text("#switches tbody tr:first-child")
    with httpx.Client(base_url=site.url, headers={"Authorization": f"Bearer {site.tokens['audit']}"}) as client:
        entry = client.get(f"/models/{MODEL}/history").json()["entries"][-1]
    assert (entry["action"], entry["version"], entry["reason"], entry["actor"]) == ("activate", "2.0.0", reason, "operate-user")
    tab.assert_clean()


def test_a_score_token_is_offered_no_switch_and_the_service_refuses_one_sent_from_the_page(site, browser):
    tab = browser.tab()
    tab.set_token(site.url, site.tokens["score"])
    page = tab.visit(f"{site.url}/view/models/{MODEL}/preview")
    assert "need role operate" in page.inner_text("#not-allowed")
    assert page.query_selector("#activate") is None and page.query_selector("#rollback") is None
    # The same request the page would send, with the token the page keeps: refused by the role table.
    status = page.evaluate(
        """async (model) => (await fetch(`/models/${model}/activate`, {method: 'POST',
              headers: {'Authorization': 'Bearer ' + sessionStorage.getItem('rbfgate.token'), 'Content-Type': 'application/json'},
              body: JSON.stringify({version: '2.0.0', reason: 'from a score token'})})).status""", MODEL)
    assert status == 403
    with httpx.Client(base_url=site.url, headers={"Authorization": f"Bearer {site.tokens['audit']}"}) as client:
        assert client.get(f"/models/{MODEL}/history").json()["entries"][-1]["action"] == "rollback"  # nothing changed


def test_an_audit_token_sees_the_card_and_the_timeline_but_no_switch(site, browser):
    tab = browser.tab()
    tab.set_token(site.url, site.tokens["audit"])
    card = drawn_marks(tab.visit(f"{site.url}/view/models/{MODEL}/versions/1.0.0"))
    assert card["distance"][0] > 0 and tab.page.query_selector("#download") is not None
    assert drawn_marks(tab.visit(f"{site.url}/view/models/{MODEL}"))["timeline"][0] > 0
    assert "need role operate" in tab.visit(f"{site.url}/view/models/{MODEL}/preview").inner_text("#not-allowed")
    tab.assert_clean()


def test_a_score_token_sees_the_card_without_the_download_and_is_refused_the_timeline(site, browser):
    tab = browser.tab()
    tab.set_token(site.url, site.tokens["score"])
    page = tab.visit(f"{site.url}/view/models/{MODEL}/versions/1.0.0")
    assert page.query_selector("#download") is None and "needs role operate or audit" in page.inner_text("main")
    page = tab.visit(f"{site.url}/view/models/{MODEL}", ready="error")
    assert "HTTP 403" in page.inner_text(".problem") and "role audit or operate" in page.inner_text(".problem")


def test_a_page_asks_for_a_token_once_and_keeps_it_for_the_tab_only(site, browser):
    tab = browser.tab()
    page = tab.visit(f"{site.url}/view/", ready="token")
    assert page.query_selector("input[name=token]") is not None
    tab.set_token(site.url, site.tokens["audit"])
    for path in (f"/view/models/{MODEL}", f"/view/models/{MODEL}/versions/1.0.0"):
        assert tab.visit(site.url + path).query_selector("input[name=token]") is None  # not asked again
    assert page.context.cookies() == []  # the token is no cookie
    other = browser.tab()  # a new tab starts without it (sessionStorage is per tab)
    assert other.visit(f"{site.url}/view/", ready="token").query_selector("input[name=token]") is not None
    tab.assert_clean()


def test_without_a_tokens_file_pages_are_open_exactly_where_the_json_routes_are(open_site, browser):
    tab = browser.tab()
    with httpx.Client(base_url=open_site.url) as client:
        card_status = client.get(f"/models/{MODEL}/versions/1.0.0").status_code
        history_status = client.get(f"/models/{MODEL}/history").status_code
        preview_status = client.post(f"/models/{MODEL}/preview", json={"version": "2.0.0"}).status_code
    assert (card_status, history_status, preview_status) == (200, 403, 403)
    assert drawn_marks(tab.visit(f"{open_site.url}/view/models/{MODEL}/versions/1.0.0"))["distance"][0] > 0
    assert tab.visit(f"{open_site.url}/view/models/{MODEL}/try").query_selector("#record-form") is not None
    assert "tokens file" in tab.visit(f"{open_site.url}/view/models/{MODEL}/preview").inner_text("#not-allowed")
    tab.assert_clean()
    problem = tab.visit(f"{open_site.url}/view/models/{MODEL}", ready="error").inner_text(".problem")
    assert "HTTP 403" in problem and "tokens file" in problem
