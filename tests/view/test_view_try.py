"""Try a record: the form from the schema, the answer, the record on the strips, refusals by their field."""

from __future__ import annotations

import httpx

from tests.view.browser import drawn_marks
from tests.view.conftest import MODEL


def _record_marks(page) -> dict[str, int]:
    """Per chart, the points of the tried record (the diamond on a strip, the line on the histogram)."""
    return page.evaluate(
        """() => Object.fromEntries([...document.querySelectorAll('.chart')].map((chart) => [
            (chart.closest('[data-feature]') || {dataset: {}}).dataset.feature || chart.dataset.chart,
            chart.querySelectorAll('g.mark-symbol path[fill="#c2410c"], g.mark-symbol path[fill="#b91c1c"], '
                                   + 'g.mark-rule line[stroke="#c2410c"]').length]))"""
    )


def test_try_form_scores_a_typical_record_as_the_scoring_route_does_and_places_it_on_each_plot(site, browser, tmp_path):
    bundle = site.bundles["1.0.0"]  # active after the fixture's rollback
    tab = browser.tab()
    tab.set_token(site.url, site.tokens["score"])
    page = tab.visit(f"{site.url}/view/models/{MODEL}/try")
    form = {name: page.input_value(f"#field-{name}") for name in bundle.feature_names}
    assert all(form.values()), form  # pre-filled with a typical record
    before = drawn_marks(page)
    assert min(before["feature"]) > 0 and before["distance"][0] > 0
    page.click("#record-form ~ .actions button[type=submit]")
    page.wait_for_selector("#answer[data-status=scored]")
    record = {name: float(value) for name, value in form.items()}
    with httpx.Client(base_url=site.url, headers={"Authorization": f"Bearer {site.tokens['score']}"}) as client:
        expected = client.post(f"/score/{MODEL}", json={"records": [record]}).json()["results"][0]
    assert page.inner_text("#answer-label") == str(expected["label"])
    answer = page.inner_text("#answer")
    for label, probability in expected["probability"].items():
        assert f"{label} {100 * probability:.1f} %" in answer
    marks = _record_marks(page)
    assert all(marks[name] == 1 for name in bundle.feature_names), marks  # one diamond per strip
    assert marks["distance"] == 1 and marks["domain"] == 1
    assert f"{expected['domain']['verdict']} (score" in answer
    tab.screenshot(tmp_path / "try.png")
    tab.assert_clean()


def test_a_refused_record_shows_each_problem_next_to_its_field(site, browser, tmp_path):
    bundle = site.bundles["1.0.0"]
    low, high = bundle.manifest.features[0].allowed
    first, second = bundle.feature_names[0], bundle.feature_names[1]
    tab = browser.tab()
    tab.set_token(site.url, site.tokens["score"])
    page = tab.visit(f"{site.url}/view/models/{MODEL}/try")
    page.fill(f"#field-{first}", str(high + 50))
    page.fill(f"#field-{second}", "warm")
    page.click("#record-form ~ .actions button[type=submit]")
    page.wait_for_selector("#answer[data-status=refused]")
    near_first = page.inner_text(f"[data-field='{first}'] .refusal")
    assert "outside the allowed range" in near_first and f"{high + 50:g}" in near_first
    assert "is not a number" in page.inner_text(f"[data-field='{second}'] .refusal")
    assert page.inner_text(f"[data-field='{bundle.feature_names[2]}'] .refusal") == ""
    tab.screenshot(tmp_path / "try-refused.png")
    tab.assert_clean()


def test_a_record_outside_the_domain_is_refused_with_its_domain_score_above_the_fields(site, browser, tmp_path):
    bundle = site.bundles["1.0.0"]
    # Core warmer than the surface, inside every allowed range: the demo's "temperatures swapped" pallet.
    record = {name: feature.training.mean for name, feature in zip(bundle.feature_names, bundle.manifest.features)}
    record.update(core_temp_c=7.0, surface_temp_c=2.0)
    with httpx.Client(base_url=site.url, headers={"Authorization": f"Bearer {site.tokens['score']}"}) as client:
        expected = client.post(f"/score/{MODEL}", json={"records": [record]}).json()["results"][0]
    assert [problem["reason"] for problem in expected["problems"]] == ["outside_domain"]
    tab = browser.tab()
    tab.set_token(site.url, site.tokens["score"])
    page = tab.visit(f"{site.url}/view/models/{MODEL}/try")
    for name, value in record.items():
        page.fill(f"#field-{name}", repr(value))
    page.click("#record-form ~ .actions button[type=submit]")
    page.wait_for_selector("#answer[data-status=refused]")
    assert "outside the domain" in page.inner_text("#answer .problem")
    assert all(page.inner_text(f"[data-field='{name}'] .refusal") == "" for name in record)  # no field is to blame
    assert _record_marks(page)["domain"] == 1  # the record on the domain axis
    tab.assert_clean()
