"""Fixtures for the page tests: a store with two versions of the demo model, tokens, real servers.

The data is rbfgate's invented pallet-check scenario (``model_store.demo``). Version 1.0.0 is an
RBF SVC with sigmoid calibration; 2.0.0 has another C, isotonic calibration and a wider range
margin, so a switch changes probabilities and the contract comparison lists changes. The history
is written with a fixed clock: 1.0.0 activated on 2026-01-05, 2.0.0 on 2026-02-01, and a rollback
to 1.0.0 on 2026-03-01, so "live at" has known answers.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import pytest

from model_store import Bundle
from model_store.demo import TARGET, write_demo_files
from model_store.store import Store
from model_store.trainer import TrainRequest, train_bundle
from service.tokens import add_token
from tests.service.http_api.server import ServeProcess
from tests.view.browser import Tab, chromium

MODEL = "pallet-checks"
SWITCHES = (
    ("2026-01-05T10:00:00Z", "activate", "1.0.0", "first release after the pilot"),
    ("2026-02-01T09:30:00Z", "activate", "2.0.0", "retrained on January's pallets"),
    ("2026-03-01T08:15:00Z", "rollback", "1.0.0", "2.0.0 held too many pallets"),
)
ROLES = ("score", "operate", "audit")


@dataclass(frozen=True)
class Site:
    """A running ``rbfgate serve`` on the store, and a token per role (None without tokens)."""

    url: str
    store: Path
    tokens: dict[str, str] | None
    bundles: dict[str, Bundle]


def train_demo_bundles(folder: Path) -> dict[str, Bundle]:
    """Both versions, trained on the same invented pallet data in ``folder``."""
    files = write_demo_files(folder, rows=600, seed=11)
    bundles = {}
    for version, C, calibration, margin in (("1.0.0", 3.0, "sigmoid", 0.05), ("2.0.0", 30.0, "isotonic", 0.10)):
        bundles[version] = train_bundle(TrainRequest(
            data=files["training"], target=TARGET, name=MODEL, version=version, out=folder / f"bundle-{version}",
            sigma=1.5, C=C, calibration=calibration, margin=margin, progress=False,
            feature_info={"core_temp_c": {"unit": "degC", "description": "product core temperature"},
                          "humidity_pct": {"unit": "%RH", "bounds": [0, 100]}},
        ))
    return bundles


@pytest.fixture(scope="session")
def demo_bundles(tmp_path_factory) -> dict[str, Bundle]:
    return train_demo_bundles(tmp_path_factory.mktemp("demo-data"))


def make_store(root: Path, bundles: dict[str, Bundle]) -> Path:
    """Publish both versions the day before the first switch, then write the three switches."""
    moment = ["2026-01-04T12:00:00Z"]
    store = Store(root, create=True,
                  clock=lambda: datetime.strptime(moment[0], "%Y-%m-%dT%H:%M:%SZ").replace(tzinfo=timezone.utc))
    for bundle in bundles.values():
        store.publish(Path(bundle.source), actor="ci-publisher")
    for when, action, version, reason in SWITCHES:
        moment[0] = when
        if action == "activate":
            store.activate(MODEL, version, reason=reason, actor="ops-alice")
        else:
            store.rollback(MODEL, reason=reason, actor="ops-alice")
    return root


@contextmanager
def serve(workdir: Path, bundles: dict[str, Bundle], *, tokens: bool) -> Iterator[Site]:
    store = make_store(workdir / "store", bundles)
    arguments = ["--store", str(store)]
    issued = None
    if tokens:
        tokens_file = workdir / "tokens.json"
        issued = {role: add_token(tokens_file, f"{role}-user", role)[0] for role in ROLES}
        arguments += ["--tokens", str(tokens_file)]
    with ServeProcess(workdir, *arguments) as server:
        yield Site(server.url, store, issued, bundles)


@pytest.fixture
def site(tmp_path, demo_bundles) -> Iterator[Site]:
    """A fresh store and a real server with a tokens file (one token per role)."""
    with serve(tmp_path, demo_bundles, tokens=True) as running:
        yield running


@pytest.fixture
def open_site(tmp_path, demo_bundles) -> Iterator[Site]:
    """The same, without a tokens file: pages are open exactly where the JSON routes are."""
    with serve(tmp_path, demo_bundles, tokens=False) as running:
        yield running


@pytest.fixture
def browser(tmp_path):
    """A headless Chromium with a fresh profile; ``browser.tab()`` opens a recorded tab."""
    with chromium(tmp_path / "profile") as context:
        yield _Browser(context)


@dataclass
class _Browser:
    context: object

    def tab(self) -> Tab:
        return Tab.open(self.context)
