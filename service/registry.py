"""The models one worker serves, following the store's active pointers.

The registry holds an immutable table ``{model name: LoadedModel}``. A request
reads the table once and keeps the ``LoadedModel`` it found, so it finishes on
the version it started with whatever happens meanwhile. A switch loads the new
version with ``Store.load_verified`` (checksums, golden vectors, signature
policy) and only then replaces the table in one reference assignment; a
bundle that fails is never served, the previous version keeps serving, and the
failure is kept for /readyz and the metrics.

A background thread polls the store's pointers every ``poll_seconds``
(``Store.active`` is one small read per model), so every worker, and every
replica on the same store, follows an activation within one interval.

Only pointer states the verified history explains are followed: when a
pointer changes, ``Store.explained_active`` checks the hash chain, the
pointer's head and that the trail's activations lead to the version it
names. A pointer edited by hand (or a trail that no longer verifies) is not
followed: the last verified version keeps serving, and the model is reported
not ready with the reason (``/readyz``, ``/models/{model}``). A poll that
runs past its deadline (a hung read on a network filesystem) also makes the
worker not ready; tokens are refreshed by their own thread, never behind it.
The folder of the version being served must go on holding what its publish
entry recorded (``Store.check_binding``: folder name, record, manifest and
its digest), checked again on a poll whenever ``lstat`` shows that one of
those entries changed: a folder swapped, copied over or edited under a
running worker is reported (not ready, ``folder_mismatch``) while the bundle
verified when it was loaded keeps serving; a version whose folder fails the
check when it is loaded is never served, and reported the same way.
The operators' outside-domain choice (refuse or flag) lives in the history;
the pointer's history head moves with every entry, so the trail is read
again only when the head has moved.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from datetime import datetime, timezone
from types import MappingProxyType

from model_store.bundle import Bundle
from model_store.domain_policy import DEFAULT_OUTSIDE_ACTION
from model_store.errors import HistoryError, InvalidNameError, NotFoundError, RbfgateError, StoreError
from model_store.naming import check_name
from service.metrics import ServiceMetrics
from service.pinned_versions import PinnedVersions
from service.settings import DEFAULT_PINNED_CACHE_BYTES

__all__ = ["LoadFailure", "LoadedModel", "ModelRegistry"]

_log = logging.getLogger("rbfgate.service")

# A version that failed is tried again after this long, in case the failure
# was transient (a file briefly unreadable); a bad bundle stays bad.
_RETRY_FAILED_SECONDS = 30.0


@dataclass(frozen=True)
class LoadedModel:
    """One verified bundle, as served."""

    name: str
    version: str
    digest: str
    bundle: Bundle
    loaded_at: str


@dataclass(frozen=True)
class LoadFailure:
    """The store's active version of a model could not be loaded."""

    name: str
    version: str
    digest: str
    error: str
    detail: str
    at: str
    monotonic: float

    def to_dict(self) -> dict[str, str]:
        return {
            "version": self.version, "bundle_sha256": self.digest, "error": self.error, "detail": self.detail, "at": self.at,
        }


class ModelRegistry:
    """Per-worker table of loaded models; ``store`` is a ``model_store.store.Store``."""

    def __init__(
        self,
        store,
        metrics: ServiceMetrics,
        *,
        on_event: Callable[[dict], None] | None = None,
        clock: Callable[[], float] = time.monotonic,
        poll_deadline: float = 10.0,
        pinned_cache_bytes: int = DEFAULT_PINNED_CACHE_BYTES,
    ) -> None:
        self._store = store
        self.poll_deadline = poll_deadline
        self._metrics = metrics
        self._on_event = on_event or (lambda event: None)
        self._clock = clock
        self._table: Mapping[str, LoadedModel] = MappingProxyType({})
        self._pointers: Mapping[str, tuple[str, str]] = MappingProxyType({})
        self._failures: Mapping[str, LoadFailure] = MappingProxyType({})
        self._outside: Mapping[str, tuple[str, str]] = MappingProxyType({})  # name -> (history head, action)
        self._poll_error: str | None = None
        self._logged_poll_error: str | None = None  # logged once, not on every poll that finds it again
        self._explained: Mapping[str, tuple[str, str, str]] = MappingProxyType({})  # pointers the history explains
        self._unexplained: Mapping[str, str] = MappingProxyType({})  # model -> why its pointer is not followed
        self._followed_seq: Mapping[str, int] = MappingProxyType({})  # the furthest pointer head followed
        self._unbound: Mapping[str, str] = MappingProxyType({})  # model -> why its active folder is not as published
        self._bound: Mapping[str, tuple] = MappingProxyType({})  # model -> (version, fingerprint) found bound
        self._poll_started: float | None = None
        self._started = False
        self._refresh_lock = threading.RLock()
        self._pinned = PinnedVersions(pinned_cache_bytes)

    # ---- reading (any thread, lock-free: the mappings are replaced, never changed)

    def serving(self, name: str) -> LoadedModel | None:
        return self._table.get(name)

    def table(self) -> Mapping[str, LoadedModel]:
        return self._table

    def failure(self, name: str) -> LoadFailure | None:
        return self._failures.get(name)

    def unexplained(self, name: str) -> str | None:
        """Why this worker does not follow ``name``'s pointer (the history does not explain it), or None."""
        return self._unexplained.get(name)

    def folder_mismatch(self, name: str) -> str | None:
        """Why the folder of ``name``'s active version is not served: it does not hold what its publish entry
        recorded (swapped, copied over or edited by hand), or None."""
        return self._unbound.get(name)

    def poll_overrun(self) -> str | None:
        """Set while the current store poll has run past its deadline (a store read hangs)."""
        started = self._poll_started
        if started is None:
            return None
        running = self._clock() - started
        if running <= self.poll_deadline:
            return None
        return (f"the store poll has been running for {running:.0f} s (deadline {self.poll_deadline:g} s): a store "
                "read hangs; serving the versions already loaded")

    def outside_action(self, name: str) -> str:
        """``refuse`` or ``flag`` for records outside ``name``'s domain, as of the last poll."""
        known = self._outside.get(name)
        return DEFAULT_OUTSIDE_ACTION if known is None else known[1]

    def readiness(self) -> tuple[bool, dict]:
        """(ready, report): ready when every model with an active pointer has a loaded version that the
        verified history explains, whose folder still holds what was published, and the store poll is not
        stuck past its deadline."""
        table, pointers, failures, unexplained = self._table, self._pointers, self._failures, self._unexplained
        unbound = self._unbound
        models = []
        for name in sorted(set(pointers) | set(unexplained) | set(unbound)):
            loaded = table.get(name)
            failure = failures.get(name)
            pointer = pointers.get(name)
            models.append({
                "model": name,
                "active": None if pointer is None else {"version": pointer[0], "bundle_sha256": pointer[1]},
                "serving": None if loaded is None else {"version": loaded.version, "bundle_sha256": loaded.digest},
                "failure": None if failure is None else failure.to_dict(),
                "unexplained_pointer": unexplained.get(name),
                "folder_mismatch": unbound.get(name),
            })
        overrun = self.poll_overrun()
        ready = (
            self._started and overrun is None
            and all(entry["serving"] is not None and entry["unexplained_pointer"] is None
                    and entry["folder_mismatch"] is None for entry in models)
        )
        degraded = bool(failures) or self._poll_error is not None
        status = "ready" if ready and not degraded else ("degraded" if ready else "not_ready")
        return ready, {"state": status, "store_error": overrun or self._poll_error, "models": models}

    # ---- following the store

    def refresh_all(self) -> None:
        """Bring every model in line with the store's active pointers.

        The poll's start is noted before it waits for the lock, so a poll stuck
        behind another refresh counts against its deadline too.
        """
        self._poll_started = self._clock()
        try:
            with self._refresh_lock:
                self._refresh_all()
        finally:
            self._poll_started = None

    def _refresh_all(self) -> None:
        try:
            if not self._store.root.is_dir():
                raise StoreError(f"{self._store.root}: the store directory no longer exists; serving the "
                                 "versions already loaded until it is back")
            names = self._store.models()
        except RbfgateError as exc:
            self._note_poll_error(exc)
            return
        self._poll_error = None  # a refresh below sets it again if a pointer cannot be read
        try:
            self._store.check_work_entries()  # a link or FIFO as staging/ or lock: say so, keep serving
        except RbfgateError as exc:
            self._note_poll_error(exc)
        for name in names:
            self.refresh(name)
        for gone in (set(self._table) | set(self._pointers) | set(self._unexplained)) - set(names):
            self._lost(gone)
        if self._poll_error is None:
            self._logged_poll_error = None  # a problem that comes back is logged again
        self._started = True

    def refresh(self, name: str, *, force: bool = False) -> LoadedModel | None:
        """Follow ``name``'s active pointer; return what this worker now serves for it."""
        with self._refresh_lock:
            try:
                record = self._store.active(name)
            except (NotFoundError, InvalidNameError):
                record = None
            except HistoryError as exc:  # a link, a FIFO or a non-pointer in place of active.json
                self._mark_unexplained(name, "the store's pointer cannot be followed", exc)
                return self._table.get(name)
            except RbfgateError as exc:
                self._note_poll_error(exc)
                return self._table.get(name)
            if record is None:
                return self._pointer_gone(name)
            target = (record.version, record.digest)
            self._pointers = MappingProxyType({**self._pointers, name: target})
            if not self._follows(name, record):
                return self._table.get(name)  # nor its outside-domain choice: the history does not verify
            self._follow_outside_choice(name, record.history_head)
            current = self._table.get(name)
            if current is not None and (current.version, current.digest) == target:
                self._clear_failure(name)
                self._check_live_folder(name, current)
                return current
            failure = self._failures.get(name)
            if (
                not force
                and failure is not None
                and (failure.version, failure.digest) == target
                and self._clock() - failure.monotonic < _RETRY_FAILED_SECONDS
            ):
                return current
            return self._switch(name, record.version, record.digest, current)

    def adopt(self, name: str, bundle: Bundle) -> LoadedModel | None:
        """Serve ``bundle``, just verified by an activation or rollback in this worker, if the store's pointer
        (explained by its history) names it; otherwise follow the pointer as a poll would."""
        with self._refresh_lock:
            try:
                record = self._store.active(name)
            except RbfgateError:
                record = None
            current = self._table.get(name)
            if (
                record is None
                or (record.version, record.digest) != (bundle.version, bundle.digest)
                or not self._follows(name, record)
            ):
                return self.refresh(name, force=True)
            self._pointers = MappingProxyType({**self._pointers, name: (record.version, record.digest)})
            if current is not None and (current.version, current.digest) == (bundle.version, bundle.digest):
                return current
            return self._install(name, bundle, current, load_seconds=0.0)

    def _follows(self, name: str, record) -> bool:
        """Whether the verified history explains ``record`` (checked once per pointer state)."""
        state = (record.version, record.digest, record.history_head)
        if self._explained.get(name) == state and name not in self._unexplained:
            return True
        try:
            explained = self._store.explained_active(name, followed_seq=self._followed_seq.get(name, 0))
        except HistoryError as exc:
            self._mark_unexplained(name, f"the store's pointer names {record.version}, which its history does not "
                                         "explain", exc, version=record.version)
            return False
        except RbfgateError as exc:
            self._note_poll_error(exc)
            return False
        if explained is None or (explained.version, explained.digest, explained.history_head) != state:
            return False  # the pointer moved between the two reads: the next poll looks again
        self._explained = MappingProxyType({**self._explained, name: state})
        self._followed_seq = MappingProxyType({**self._followed_seq, name: max(
            record.history_seq, self._followed_seq.get(name, 0))})
        self._unexplained = MappingProxyType({key: value for key, value in self._unexplained.items() if key != name})
        return True

    def _mark_unexplained(self, name: str, what: str, exc: HistoryError, *, version: str | None = None) -> None:
        """Keep serving the last verified version of ``name``; report it not ready, saying why."""
        reason = f"{what} ({exc}); serving the last verified version"
        if self._unexplained.get(name) != reason:
            _log.error("not following %s: %s", name, reason)
            self._on_event({"event": "pointer_unexplained", "model": name, "version": version, "detail": str(exc)})
        self._unexplained = MappingProxyType({**self._unexplained, name: reason})

    def _check_live_folder(self, name: str, loaded: LoadedModel) -> None:
        """Check again that the folder of the version being served holds what its publish entry recorded, when
        ``lstat`` says something it reads changed since the last check (a few ``lstat`` calls otherwise)."""
        try:
            fingerprint = self._store.folder_fingerprint(name, loaded.version)
        except RbfgateError as exc:
            self._note_poll_error(exc)
            return
        if self._bound.get(name) == (loaded.version, fingerprint):
            return
        try:
            self._store.check_binding(name, loaded.version)
        except HistoryError as exc:
            self._mark_unbound(name, loaded.version, exc)
            return
        except RbfgateError as exc:  # an OS error reading the folder: perhaps passing, tried again next poll
            self._note_poll_error(exc)
            return
        self._bound = MappingProxyType({**self._bound, name: (loaded.version, fingerprint)})
        self._unbound = MappingProxyType({key: value for key, value in self._unbound.items() if key != name})

    def _mark_unbound(self, name: str, version: str, exc: HistoryError) -> None:
        """Keep serving the last verified bundle of ``name`` (if any); report it not ready, saying why."""
        loaded = self._table.get(name)
        serving = ("no verified bundle of it is loaded in this worker" if loaded is None else
                   f"serving the bundle of {loaded.version} (digest {loaded.digest[:16]}...) verified when it was "
                   "loaded")
        reason = (f"the folder of {version}, the active version, does not hold what its publish entry recorded "
                  f"({exc}); {serving}")
        if self._unbound.get(name) != reason:
            _log.error("not serving the folder of %s %s: %s", name, version, reason)
            self._on_event({"event": "folder_mismatch", "model": name, "version": version, "detail": str(exc)})
        self._unbound = MappingProxyType({**self._unbound, name: reason})
        self._bound = MappingProxyType({key: value for key, value in self._bound.items() if key != name})

    def _pointer_gone(self, name: str) -> LoadedModel | None:
        """No pointer: a model not activated yet, or (beside a trail) a pointer deleted by hand."""
        try:
            self._store.explained_active(name)
        except HistoryError as exc:
            self._mark_unexplained(name, "the store's pointer is gone", exc)
            return self._table.get(name)
        except RbfgateError as exc:
            self._note_poll_error(exc)
        return self._lost(name)

    def _follow_outside_choice(self, name: str, head: str) -> None:
        known = self._outside.get(name)
        if known is not None and known[0] == head:
            return
        try:
            action = self._store.outside_action(name)
        except RbfgateError as exc:  # keep the last known choice; the next poll tries again
            self._note_poll_error(exc)
            return
        self._outside = MappingProxyType({**self._outside, name: (head, action)})
        if known is not None and known[1] != action:
            self._on_event({"event": "outside_domain_action", "model": name, "action": action})

    def _switch(self, name: str, version: str, digest: str, current: LoadedModel | None) -> LoadedModel | None:
        started = self._clock()
        try:
            bundle = self._store.load_verified(name, version)
            if bundle.digest != digest:
                raise _DigestMoved(
                    f"the store's pointer names digest {digest} but version {version} has digest {bundle.digest}"
                )
        except Exception as exc:  # noqa: BLE001 - whatever a bundle does, the old version keeps serving
            self._record_failure(name, version, digest, exc)
            if isinstance(exc, HistoryError):  # the folder is not what was published (the pointer was explained)
                self._mark_unbound(name, version, exc)
            return current
        return self._install(name, bundle, current, load_seconds=self._clock() - started)

    def _install(self, name: str, bundle: Bundle, current: LoadedModel | None, *, load_seconds: float) -> LoadedModel:
        loaded = LoadedModel(name, bundle.version, bundle.digest, bundle, _now())
        self._table = MappingProxyType({**self._table, name: loaded})  # the switch: one assignment
        self._clear_failure(name)
        self._unbound = MappingProxyType({key: value for key, value in self._unbound.items() if key != name})
        self._bound = MappingProxyType({key: value for key, value in self._bound.items() if key != name})
        old = None if current is None else (current.version, current.digest)
        self._metrics.switched(name, old, (bundle.version, bundle.digest))
        self._on_event({"event": "switch", "model": name, "version": bundle.version, "bundle_sha256": bundle.digest,
                        "previous": None if current is None else current.version,
                        "load_seconds": round(load_seconds, 3)})
        return loaded

    def _record_failure(self, name: str, version: str, digest: str, exc: Exception) -> None:
        if not isinstance(exc, (RbfgateError, _DigestMoved)):
            _log.exception("unexpected error loading %s %s", name, version)
        failure = LoadFailure(name, version, digest, type(exc).__name__, str(exc), _now(), self._clock())
        earlier = self._failures.get(name)
        if earlier is not None and earlier.version != version:
            self._metrics.load_recovered(name, earlier.version)  # the pointer moved on: that one no longer fails
        self._failures = MappingProxyType({**self._failures, name: failure})
        self._metrics.load_failed(name, version)
        self._on_event({"event": "load_failed", "model": name, "version": version, "bundle_sha256": digest,
                        "error": failure.error, "detail": failure.detail})

    def _clear_failure(self, name: str) -> None:
        failure = self._failures.get(name)
        if failure is not None:
            self._failures = MappingProxyType({key: value for key, value in self._failures.items() if key != name})
            self._metrics.load_recovered(name, failure.version)

    def _lost(self, name: str) -> LoadedModel | None:
        """The store no longer shows ``name`` active. No rbfgate command deactivates or deletes a
        model, so only damage or removal of the store does that: keep serving what is loaded."""
        current = self._table.get(name)
        if current is None:
            self._drop(name)
            return None
        self._note_poll_error(StoreError(
            f"{name}: the store no longer shows an active version (was the store moved or damaged?); "
            f"serving the loaded version {current.version}"
        ))
        return current

    def _drop(self, name: str) -> None:
        self._unexplained = MappingProxyType({key: value for key, value in self._unexplained.items() if key != name})
        self._unbound = MappingProxyType({key: value for key, value in self._unbound.items() if key != name})
        if name not in self._table and name not in self._pointers and name not in self._failures:
            return
        self._table = MappingProxyType({key: value for key, value in self._table.items() if key != name})
        self._pointers = MappingProxyType({key: value for key, value in self._pointers.items() if key != name})
        self._clear_failure(name)

    def _note_poll_error(self, exc: RbfgateError) -> None:
        if self._logged_poll_error != str(exc):
            self._logged_poll_error = str(exc)
            _log.error("cannot read the store's active pointers, serving what is loaded: %s", exc)
        self._poll_error = str(exc)

    # ---- pinned versions

    def pinned(self, name: str, version: str) -> LoadedModel:
        """A published version, loaded and verified on first use (``service.pinned_versions``)."""
        check_name(name, what="model name")
        check_name(version, what="model version")
        self._store.bundle_dir(name, version)  # NotFoundError once pruned, even if cached
        current = self._table.get(name)
        if current is not None and current.version == version:
            return current
        return self._pinned.get(name, version, self._load_pinned)

    def pinned_cache(self) -> tuple[int, int]:
        """(versions, bytes) in the pinned-version cache of this worker."""
        return self._pinned.size()

    def _load_pinned(self, name: str, version: str) -> LoadedModel:
        bundle = self._store.load_verified(name, version)
        return LoadedModel(name, version, bundle.digest, bundle, _now())


class _DigestMoved(Exception):
    """The pointer and the bundle disagree on the digest (a publish race or a damaged store)."""


def _now() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")
