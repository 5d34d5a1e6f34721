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

import service.app as app_module
from service.app import create_app
from service.settings import Settings


def _served_bundle_is_frozen(shared_store, **options) -> bool:
    """Whether, while an app built with ``options`` runs, the bundle it serves is out of the
    collector's reach (``gc.get_objects`` lists every tracked object except frozen ones)."""
    gc.unfreeze()
    app = create_app(Settings(store_root=shared_store.root, poll_seconds=3600.0), environ={},
                     write_log=lambda event: None, **options)
    try:
        with TestClient(app) as client:
            assert client.get("/readyz").status_code == 200
            bundle = app.state.services.registry.serving("iris").bundle
            return not any(tracked is bundle for tracked in gc.get_objects())
    finally:
        gc.unfreeze()  # give this test process's objects back to the collector


def test_a_serving_app_freezes_the_bundles_it_loaded_at_start_up(shared_store):
    assert _served_bundle_is_frozen(shared_store, freeze_startup=True)


def test_an_app_built_by_default_freezes_nothing(shared_store):
    assert not _served_bundle_is_frozen(shared_store)
    assert gc.get_freeze_count() == 0


def test_the_app_rbfgate_serve_runs_asks_for_the_freeze(monkeypatch, tmp_path):
    built = {}
    monkeypatch.setattr(app_module, "_one_blas_thread", lambda: None)  # process-wide; not in a test
    monkeypatch.setattr(app_module, "create_app", lambda settings, **options: built.update(options))
    monkeypatch.setenv("RBFGATE_STORE", str(tmp_path))
    app_module.create_app_from_environ()
    assert built == {"freeze_startup": True}
