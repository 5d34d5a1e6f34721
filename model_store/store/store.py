"""The store: reading versions, pointers and history, and loading verified bundles.

Reading never takes the exclusive lock, so any number of service replicas
can read one store (also a read-only one) while an operator changes it.
Changes (publish, activate, rollback, prune, trust) live in
``model_store.store.changes`` and are reached through the same ``Store``.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from model_store.bundle import Bundle, load_bundle
from model_store.errors import (
    BundleFormatError,
    HistoryError,
    IntegrityError,
    NotFoundError,
    StoreError,
    UnsafeArchiveError,
)
from model_store.manifest import SIGNATURE_FILE
from model_store.refusal import Converter, from_json
from model_store.store import changes, domain_choice
from model_store.store.audit import check_active, check_chain, check_head, check_versions
from model_store.store.history import format_time, read_trail
from model_store.store.layout import StoreLayout, model_names, open_layout, read_settings, require_model, version_names
from model_store.store.locking import exclusive_lock, shared_lock
from model_store.store.pointer import ActiveRecord, read_pointer
from model_store.store.publishing import PublishOutcome, StepHook, read_record, read_records
from model_store.store.signing import TrustedKey, check_bundle_signature
from model_store.store.state import activation_stack

__all__ = ["Store", "VersionInfo"]


@dataclass(frozen=True)
class VersionInfo:
    version: str
    digest: str
    created: str          # when the bundle was exported (manifest "created")
    published_at: str     # when it entered this store
    active: bool


class Store:
    """A store directory. ``create=True`` makes a new store in a missing or empty directory.

    ``clock`` returns an aware datetime (default: now, UTC); ``publish_step``
    is called with each publishing step (tests use it to kill a publisher
    mid-copy; a CLI could show progress).
    """

    def __init__(
        self,
        root: Path,
        *,
        create: bool = False,
        lock_timeout: float = 30.0,
        clock: Callable[[], datetime] | None = None,
        publish_step: StepHook | None = None,
    ):
        self._clock = clock or (lambda: datetime.now(timezone.utc))
        self._layout = open_layout(Path(root), create=create, created_at=self.now())
        self.lock_timeout = lock_timeout
        self.publish_step: StepHook = publish_step or (lambda step: None)

    @property
    def root(self) -> Path:
        return self._layout.root

    @property
    def layout(self) -> StoreLayout:
        return self._layout

    def now(self) -> str:
        return format_time(self._clock())

    # ----- reading -------------------------------------------------------------------------

    def models(self) -> list[str]:
        """Sorted names of the models that have at least one version."""
        return model_names(self._layout)

    def versions(self, name: str) -> list[VersionInfo]:
        """Every stored version in publish order, marking the active one."""
        require_model(self._layout, name)
        active = self.active(name)
        records = []
        for version in version_names(self._layout, name):
            try:
                records.append(read_record(self._layout.record(name, version)))
            except NotFoundError:
                continue  # pruned between listing and reading
        records.sort(key=lambda record: (record.publish_seq, record.version))
        return [
            VersionInfo(
                record.version,
                record.digest,
                record.created,
                record.published_at,
                active is not None and active.version == record.version,
            )
            for record in records
        ]

    def active(self, name: str) -> ActiveRecord | None:
        """The active version: one small file read, cheap enough to poll every second."""
        pointer = read_pointer(self._layout.pointer(name))
        return pointer.active_record() if pointer is not None else None

    def bundle_dir(self, name: str, version: str) -> Path:
        path = self._layout.bundle(name, version)
        if not path.is_dir():
            raise NotFoundError(
                f"{name} {version} is not in the store {self.root}; 'rbfgate versions {name}' lists what is"
            )
        return path

    def load_verified(self, name: str, version: str) -> Bundle:
        """The stored bundle after checksums, digest, golden self-test and the signature policy."""
        path = self.bundle_dir(name, version)
        record = read_record(self._layout.record(name, version))
        try:
            bundle = load_bundle(path)
        except (BundleFormatError, UnsafeArchiveError) as exc:
            raise IntegrityError(f"stored bundle {name} {version} is damaged: {exc}; publish a new version") from exc
        if bundle.digest != record.digest:
            raise IntegrityError(
                f"stored bundle {name} {version}: its digest is {bundle.digest[:16]}..., but it was published with "
                f"{record.digest[:16]}...; the stored manifest was altered, publish a new version"
            )
        bundle.self_test()
        signature = path / SIGNATURE_FILE
        check_bundle_signature(
            signature.read_bytes() if signature.is_file() else None,
            bundle.digest,
            self.trusted_keys(),
            f"{name} {version} in the store",
        )
        return bundle

    def history(self, name: str) -> list[dict[str, Any]]:
        """Every history entry, oldest first, read without waiting for a writer.

        Entries are appended whole, so a concurrent append shows up entirely or
        not at all; an unfinished last line left by a crashed writer is skipped.
        """
        require_model(self._layout, name)
        return [item.entry for item in read_trail(self._layout.history(name), name).lines]

    def verify_history(self, name: str) -> int:
        """Check the hash chain, the pointer's head and the stored versions; return the number of entries.

        Raises ``HistoryError`` naming the first problem. Holds the lock shared,
        so that the trail, the pointer and the versions are read at one moment
        between two changes (it waits for a change in progress).
        """
        require_model(self._layout, name)
        with shared_lock(self._layout.lock, self.lock_timeout):
            trail = read_trail(self._layout.history(name), name)
            pointer = read_pointer(self._layout.pointer(name))
            records = read_records(self._layout, name)
        lines = trail.lines
        if trail.unfinished:
            raise HistoryError(
                f"history of {name}, line {len(lines) + 1}: unfinished (cut off without a line end); a writer was "
                "killed while appending it, and the next change to this model removes it"
            )
        check_chain(lines, name, pointer.history_head if pointer else None)
        check_head(lines, pointer, name)
        check_active(pointer, activation_stack([item.entry for item in lines]), name)
        check_versions(records, lines, name, auditing=True)
        return len(lines)

    def outside_action(self, name: str) -> str:
        """``refuse`` or ``flag``: what the model does with records outside its domain (from the history)."""
        return domain_choice.outside_action_from(self.history(name))

    def trusted_keys(self) -> list[TrustedKey]:
        """The keys whose signatures the store accepts; empty means signatures are not required."""
        keys = read_settings(self._layout).get("trusted_keys", [])
        try:
            return [TrustedKey(**key) for key in keys]
        except TypeError as exc:
            raise StoreError(f"{self._layout.settings}: a trusted key entry is malformed ({exc})") from exc

    # ----- changing (each takes the store lock) ----------------------------------------------

    def publish(self, bundle_path: Path, *, actor: str) -> PublishOutcome:
        return changes.publish(self, Path(bundle_path), actor=actor)

    def activate(self, name: str, version: str, *, reason: str, actor: str, accept_breaking: bool = False,
                 recent: Sequence[Mapping[str, Any]] = (), convert: Converter = from_json) -> dict[str, Any]:
        """See ``changes.activate``: refuses a candidate that breaks callers unless ``accept_breaking``."""
        return changes.activate(self, name, version, reason=reason, actor=actor, accept_breaking=accept_breaking,
                                recent=recent, convert=convert)

    def rollback(self, name: str, *, reason: str, actor: str) -> dict[str, Any]:
        return changes.rollback(self, name, reason=reason, actor=actor)

    def set_outside_action(self, name: str, action: str, *, reason: str, actor: str) -> dict[str, Any]:
        return domain_choice.set_outside_action(self, name, action, reason=reason, actor=actor)

    def prune(self, name: str, *, keep: int, actor: str) -> list[str]:
        return changes.prune(self, name, keep=keep, actor=actor)

    def add_trusted_key(self, public_key: bytes, *, label: str, actor: str) -> TrustedKey:
        return changes.add_trusted_key(self, public_key, label=label, actor=actor)

    def remove_trusted_key(self, key_id: str, *, actor: str) -> TrustedKey:
        return changes.remove_trusted_key(self, key_id, actor=actor)

    @contextmanager
    def locked(self):
        """Hold the store lock exclusively; OS errors while changing the store become ``StoreError``."""
        with exclusive_lock(self._layout.lock, self.lock_timeout):
            try:
                yield
            except OSError as exc:
                raise StoreError(
                    f"{self.root}: the change failed: {exc.strerror or exc} ({exc.filename}); the store is unchanged "
                    "or completed by the next command; check that the store is writable and has free space"
                ) from exc
