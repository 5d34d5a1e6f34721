"""What a worker does once at start-up, after its models are loaded.

``rbfgate serve`` freezes start-up's objects (``gc.freeze``, Python standard library): a full
cyclic collection then walks only what was made after start-up. Without it, a worker scoring
1,000-record requests ran a full collection of ~110-130 ms every few hundred requests (measured
in process, ``service.app._freeze_startup_objects``). Apps built in tests do not freeze, since
one test process builds many.
"""

from __future__ import annotations

import gc

from fastapi.testclient import TestClient

from service.app import create_app
from service.settings import Settings


def _started(shared_store, **options) -> int:
    """The frozen-object count while an app built with ``options`` is running."""
    app = create_app(Settings(store_root=shared_store.root, poll_seconds=3600.0), environ={},
                     write_log=lambda event: None, **options)
    try:
        with TestClient(app) as client:
            assert client.get("/readyz").status_code == 200
            return gc.get_freeze_count()
    finally:
        gc.unfreeze()  # give this test process's objects back to the collector


def test_a_serving_app_freezes_the_objects_start_up_made(shared_store):
    gc.unfreeze()
    assert _started(shared_store, freeze_startup=True) > 10_000  # modules, the app, the loaded bundles


def test_an_app_built_by_default_freezes_nothing(shared_store):
    gc.unfreeze()
    assert _started(shared_store) == 0
