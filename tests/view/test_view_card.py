"""The model card: the served page (laptop and phone) and ``rbfgate card``'s offline file."""

from __future__ import annotations

import subprocess
import sys

from model_store import load_bundle
from tests.view.browser import PHONE, Tab, chromium, drawn_marks
from tests.view.conftest import MODEL


def _assert_every_plot_drawn(page, bundle) -> None:
    marks = drawn_marks(page)
    assert len(marks["feature"]) == len(bundle.feature_names), marks
    plots = ["confusion", "reliability", "distance", "domain"]  # both versions are calibrated and have a domain model
    assert all(marks[name] and min(marks[name]) > 0 for name in plots), marks
    assert min(marks["feature"]) > 0, marks
    overflowing = page.evaluate("""() => [...document.querySelectorAll('.chart')].filter((chart) =>
        chart.querySelector('svg').getBoundingClientRect().width > chart.getBoundingClientRect().width + 1
    ).map((chart) => chart.dataset.chart)""")
    assert overflowing == []  # each plot fits the width of its cell


def test_card_page_shows_identity_classes_metrics_and_every_plot_to_an_audit_token(site, browser, tmp_path):
    bundle = site.bundles["2.0.0"]
    tab = browser.tab()
    tab.set_token(site.url, site.tokens["audit"])
    page = tab.visit(f"{site.url}/view/models/{MODEL}/versions/2.0.0")
    text = page.inner_text("main")
    assert bundle.digest in text
    assert "passed" in text and f"{len(bundle.manifest.golden.inputs)} vectors" in text
    for label, count in zip(bundle.classes, bundle.manifest.classifier.support_per_class):
        assert page.inner_text(f"xpath=//td[text()='{label}']/following-sibling::td[1]") == str(count)
    assert "balanced accuracy" in text and "On the holdout rows." in text
    thresholds = bundle.manifest.domain.thresholds
    assert f"outside below {thresholds.outside_below:.4g}" in text.replace("e-0", "e-")
    report = page.inner_text("#refusal-report")
    assert f"{100 * bundle.manifest.refusal_report.reference.refused_total:.2f} %" in report
    sample = bundle.manifest.refusal_report.out_of_sample
    assert f"new rows (estimated)\t{sample.rows}\t{100 * sample.estimate.refused_range:.2f} %" in report
    _assert_every_plot_drawn(page, bundle)
    with page.expect_download() as download:
        page.click("#download")
    saved = tmp_path / "downloaded.tar"
    download.value.save_as(saved)
    assert load_bundle(saved).digest == bundle.digest  # the bundle itself, and it passes its checks
    tab.screenshot(tmp_path / "card.png")
    tab.assert_clean()


def test_card_page_is_readable_on_a_phone(site, tmp_path):
    bundle = site.bundles["1.0.0"]
    with chromium(tmp_path / "phone-profile", viewport=PHONE) as context:
        tab = Tab.open(context)
        tab.set_token(site.url, site.tokens["audit"])
        page = tab.visit(f"{site.url}/view/models/{MODEL}/versions/1.0.0")
        _assert_every_plot_drawn(page, bundle)
        # Nothing wider than the screen: no sideways scrolling to read the card.
        assert page.evaluate("document.documentElement.scrollWidth") <= PHONE["width"]
        tab.screenshot(tmp_path / "card-phone.png")
        tab.assert_clean()


def test_rbfgate_card_writes_one_file_that_draws_every_plot_with_the_network_blocked(site, tmp_path):
    bundle = site.bundles["2.0.0"]
    out = tmp_path / "card.html"
    result = subprocess.run([sys.executable, "-m", "model_store", "card", bundle.source, "--out", str(out)],
                            capture_output=True, text=True, timeout=120, check=False)
    assert result.returncode == 0, result.stderr
    with chromium(tmp_path / "offline-profile", offline=True) as context:
        asked = []

        def refuse(route):
            asked.append(route.request.url)
            route.abort()

        context.route("http*://**/*", refuse)  # any request that leaves the file fails, and is recorded
        tab = Tab.open(context)
        page = tab.visit(out.as_uri())
        _assert_every_plot_drawn(page, bundle)
        assert bundle.digest in page.inner_text("main")
        assert asked == [] and tab.requests == [out.as_uri()]
        tab.screenshot(tmp_path / "offline-card.png")
        tab.assert_clean()
