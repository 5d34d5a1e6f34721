"""Headless Chromium (Debian's ``chromium`` package) driven by Playwright, for the page tests.

Playwright uses the installed browser (``executable_path``); it never downloads one. Without it
the page tests are skipped, except in CI, where they fail (``require_chromium``). The flags
are the ones this machine needs (/work/.library/env/machines/python.md): no sandbox as root, no
GPU, and no background networking, whose connections the closed network would refuse. Each
browser gets a fresh profile folder under the test's tmp_path.

``Tab`` records what a person would notice: console errors, uncaught exceptions and failed
requests, and asserts there were none.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path

import pytest
from playwright.sync_api import BrowserContext, Page, sync_playwright

__all__ = ["CHROMIUM", "PHONE", "Tab", "chromium", "drawn_marks", "require_chromium"]

CHROMIUM = "/usr/bin/chromium"
_FLAGS = [
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
]
LAPTOP = {"width": 1280, "height": 900}
PHONE = {"width": 390, "height": 844}
_READY_MS = 30_000


def require_chromium() -> None:
    """Skip the calling test when Debian's Chromium is not installed, except in CI (``CI=true``),
    where .ci/run installs it and its absence fails the test (as the scale-out test does for nginx)."""
    if os.access(CHROMIUM, os.X_OK):
        return
    reason = (f"headless Chromium is not installed at {CHROMIUM} (apt-get install chromium); "
              "the page tests drive it")
    if os.environ.get("CI") == "true":
        pytest.fail(f"{reason}; in CI it must run (.ci/run installs it)")
    pytest.skip(reason)


@contextmanager
def chromium(profile: Path, *, viewport=LAPTOP, offline: bool = False) -> Iterator[BrowserContext]:
    """A browser with a fresh profile in ``profile``; ``offline`` blocks every network request.
    Skips the test when Chromium is missing (``require_chromium``)."""
    require_chromium()
    with sync_playwright() as playwright:
        context = playwright.chromium.launch_persistent_context(
            str(profile), executable_path=CHROMIUM, args=_FLAGS, headless=True, viewport=viewport,
            accept_downloads=True, offline=offline,
        )
        try:
            yield context
        finally:
            context.close()


@dataclass
class Tab:
    """One page of a browser, with what went wrong on it."""

    page: Page
    errors: list[str] = field(default_factory=list)
    failed: list[str] = field(default_factory=list)
    requests: list[str] = field(default_factory=list)

    @classmethod
    def open(cls, context: BrowserContext) -> "Tab":
        tab = cls(context.new_page())
        tab.page.on("console", lambda message: tab.errors.append(message.text) if message.type == "error" else None)
        tab.page.on("pageerror", lambda error: tab.errors.append(f"uncaught: {error}"))
        tab.page.on("requestfailed", lambda request: tab.failed.append(f"{request.url}: {request.failure}"))
        tab.page.on("request", lambda request: tab.requests.append(request.url))
        return tab

    def visit(self, url: str, *, ready: str = "true") -> Page:
        """Go to ``url`` and wait until the page script says it is done (``body[data-ready]``)."""
        self.page.goto(url)
        # Selectors, not wait_for_function: the pages' Content-Security-Policy forbids the eval it uses.
        self.page.wait_for_selector("body[data-ready]", state="attached", timeout=_READY_MS)
        state = self.page.evaluate("document.body.dataset.ready")
        assert state == ready, f"{url}: page ended in state {state!r}: {self.page.inner_text('main')[:600]}"
        return self.page

    def set_token(self, origin: str, token: str) -> None:
        """Enter the token the way a person does: in the page's token form (kept in sessionStorage)."""
        self.page.goto(origin + "/view/")
        self.page.wait_for_selector("body[data-ready=token]", state="attached", timeout=_READY_MS)
        self.page.fill("input[name=token]", token)
        self.page.click("form.token-form button[type=submit]")
        self.page.wait_for_selector("body[data-ready=true]", state="attached", timeout=_READY_MS)

    def assert_clean(self) -> None:
        assert self.errors == [], f"console errors: {self.errors}"
        assert self.failed == [], f"failed requests: {self.failed}"

    def screenshot(self, path: Path) -> Path:
        self.page.screenshot(path=str(path), full_page=True)
        assert path.stat().st_size > 10_000, f"{path}: a blank page?"
        return path


def drawn_marks(page: Page) -> dict[str, list[int]]:
    """For every chart on the page: how many mark items its SVG holds with a non-zero size."""
    return page.evaluate(
        """() => {
            const found = {};
            for (const chart of document.querySelectorAll('.chart')) {
                const name = chart.dataset.chart || '?';
                const marks = [...chart.querySelectorAll('svg g.role-mark > *')].filter((item) => {
                    const box = item.getBBox();
                    return box.width > 0 || box.height > 0;
                });
                (found[name] = found[name] || []).push(chart.dataset.drawn === 'true' ? marks.length : -1);
            }
            return found;
        }"""
    )
