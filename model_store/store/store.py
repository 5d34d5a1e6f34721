"""The store: reading versions, pointers and history, and loading verified bundles.

Reading never takes the exclusive lock, so any number of service replicas
can read one store (also a read-only one) while an operator changes it.
Changes (publish, activate, rollback, prune, trust) live in
``model_store.store.changes`` and are reached through the same ``Store``.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from model_store.bundle import Bundle, load_bundle
from model_store.digest import canonical_json, sha256_bytes
from model_store.errors import (
    BundleFormatError,
    HistoryError,
    IntegrityError,
    NotFoundError,
    StoreError,
    UnsafeArchiveError,
)
from model_store.manifest import MANIFEST_FILE, SIGNATURE_FILE, Manifest, parse_manifest_bytes
from model_store.refusal import Converter, from_json
from model_store.store import changes, domain_choice
from model_store.store.audit import check_active, check_chain, check_head, check_tail, check_versions, head_position
from model_store.store.contract import ContractComparison
from model_store.store.files import UnsafeStoreEntry, check_tree, check_work_entry, read_store_file, store_entry_kind
from model_store.store.folders import binding_problem, folder_fingerprint, read_stored_version, read_stored_versions
from model_store.store.history import format_time, read_trail
from model_store.store.layout import StoreLayout, model_names, open_layout, require_model, version_names
from model_store.store.locking import exclusive_lock, shared_lock
from model_store.store.pointer import ActiveRecord, read_pointer
from model_store.store.pointer_repair import PointerRepair, repair_pointer
from model_store.store.publishing import PublishOutcome, StepHook, read_record
from model_store.store.signing import TrustedKey, check_bundle_signature
from model_store.store.state import activation_stack, stored_versions
from model_store.store.timeline import LiveAt, live_at
from model_store.store.trust import check_trail_kept, check_trust_settled, trust_entries, verified_keys

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
        try:
            active = self.active(name)
        except HistoryError:  # a pointer put there by hand marks nothing active; verify and the service say why
            active = None
        records = []
        for version in version_names(self._layout, name):
            try:
                records.append(read_record(self._layout, name, version))
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
        """The pointer's active version, as the file says: one small read, cheap enough to poll every second.

        Not checked against the history; ``explained_active`` is.
        """
        pointer = read_pointer(self._layout.pointer(name), root=self.root)
        return pointer.active_record() if pointer is not None else None

    def explained_active(self, name: str, *, followed_seq: int = 0) -> ActiveRecord | None:
        """The active version, only if the verified trail explains the pointer; ``HistoryError`` saying why not.

        Read without the lock (pointer first, then the trail), so a change in
        progress only ever adds entries after the pointer's head; a pointer
        behind the trail's end is explained when what follows it is one
        interrupted command (``audit.check_tail``). ``followed_seq`` is the
        head's seq of a pointer state the caller already followed: a change
        only moves the head forward, so a pointer back behind it while the
        trail goes on is an older copy of ``active.json`` put back by hand.
        """
        pointer = read_pointer(self._layout.pointer(name), root=self.root)
        trail = read_trail(self._layout.history(name), name, root=self.root)
        if pointer is None:
            check_head(trail.lines, None, name)  # a trail without its pointer: deleted
            return None
        check_chain(trail.lines, name, pointer.history_head)
        position = head_position(trail.lines, pointer.history_head)
        if position is None:
            check_head(trail.lines, pointer, name)  # raises: truncated, or the head was edited
        if position < len(trail.lines) - 1:
            again = read_pointer(self._layout.pointer(name), root=self.root)
            if again != pointer:  # a change moved it meanwhile: explain the new state on the next look
                return again.active_record() if again is not None else None
            check_tail(trail.lines, position, pointer, name)
            if pointer.history_seq < followed_seq:
                raise HistoryError(
                    f"history of {name}: the active pointer went back to seq {pointer.history_seq} (version "
                    f"{pointer.version}) after it had recorded seq {followed_seq}, while the trail goes on to seq "
                    f"{trail.lines[-1].seq}; a change only moves it forward, so an older copy of active.json was put "
                    "back by hand; restore the current one from a backup so that it matches the trail, or rebuild it "
                    f"with 'rbfgate repair-pointer {name} --reason TEXT'"
                )
        check_active(pointer, activation_stack([item.entry for item in trail.lines[: position + 1]]), name)
        return pointer.active_record()

    def bundle_dir(self, name: str, version: str) -> Path:
        path = self._layout.bundle(name, version)
        if store_entry_kind(self.root, path) != "directory":
            raise NotFoundError(
                f"{name} {version} is not in the store {self.root}; 'rbfgate versions {name}' lists what is"
            )
        return path

    def load_verified(self, name: str, version: str) -> Bundle:
        """The stored bundle after its binding to the trail, checksums, golden self-test and the signature policy."""
        bundle, _ = self._load_checked(name, version, with_members=False)
        return bundle

    def verified_members(self, name: str, version: str) -> tuple[Bundle, dict[str, bytes]]:
        """The verified bundle and the bytes of its files (manifest, arrays, signature), read once, for shipping."""
        return self._load_checked(name, version, with_members=True)

    def manifest(self, name: str, version: str) -> tuple[dict[str, Any], Manifest, str]:
        """The stored manifest (document, parsed, digest), read without following links; its arrays are not read.

        The folder must be bound to its publish entry (``folders``), so that metadata never shows one
        version's manifest under another's name.
        """
        path = self.bundle_dir(name, version) / MANIFEST_FILE
        publish = self._check_binding(name, version)
        try:
            data = read_store_file(self.root, path)
        except UnsafeStoreEntry as exc:
            raise IntegrityError(f"stored bundle {name} {version}: {exc}") from exc
        if data is None:
            raise IntegrityError(f"stored bundle {name} {version}: {MANIFEST_FILE} is missing; publish a new version")
        document, manifest = parse_manifest_bytes(data, source=str(path))
        digest = sha256_bytes(canonical_json(document))
        if digest != publish["digest"]:
            raise IntegrityError(f"stored bundle {name} {version} changed while it was read; try again")
        return document, manifest, digest

    def signature(self, name: str, version: str) -> bytes | None:
        """The stored ``signature.json`` (read without following links), or None when the version is unsigned."""
        try:
            return read_store_file(self.root, self.bundle_dir(name, version) / SIGNATURE_FILE)
        except UnsafeStoreEntry as exc:
            raise IntegrityError(f"stored bundle {name} {version}: {exc}") from exc

    def history(self, name: str) -> list[dict[str, Any]]:
        """Every history entry, oldest first, read without waiting for a writer.

        Entries are appended whole, so a concurrent append shows up entirely or
        not at all; an unfinished last line left by a crashed writer is skipped.
        """
        require_model(self._layout, name)
        return [item.entry for item in read_trail(self._layout.history(name), name, root=self.root).lines]

    def verify_history(self, name: str) -> int:
        """Check everything the history vouches for; return the number of entries.

        The hash chain, the pointer's head and active version, every version
        folder against its publish entry (``folders``), every version the
        trail says is stored, the trust trail against the settings, and that
        ``staging/`` and ``lock`` are the store's own (``check_work_entries``).
        Raises ``HistoryError`` naming the first problem (``UnsafeStoreEntry``, a ``StoreError``, for
        ``staging/`` or ``lock``: the store itself is unusable). Holds the lock shared,
        so that everything is read at one moment between two changes.
        """
        require_model(self._layout, name)
        self.check_work_entries()  # a StoreError, as the lock's own check under shared_lock raises
        with shared_lock(self._layout.lock, self.lock_timeout):
            trail = read_trail(self._layout.history(name), name, root=self.root)
            pointer = read_pointer(self._layout.pointer(name), root=self.root)
            stored = read_stored_versions(self._layout, name)
            verified_keys(self._layout)
            check_trust_settled(self._layout)  # a trust change written to trust.jsonl only: not in force yet
        lines = trail.lines
        if trail.unfinished:
            raise HistoryError(
                f"history of {name}, line {len(lines) + 1}: unfinished (cut off without a line end); a writer was "
                "killed while appending it, and the next change to this model removes it"
            )
        check_chain(lines, name, pointer.history_head if pointer else None)
        check_head(lines, pointer, name)
        check_active(pointer, activation_stack([item.entry for item in lines]), name)
        check_versions(stored, lines, name, auditing=True)
        check_trail_kept(self._layout, [item.entry for item in lines], name)
        return len(lines)

    def check_work_entries(self) -> None:
        """``UnsafeStoreEntry`` (a ``StoreError``) naming ``staging/`` or ``lock`` when either is a link, FIFO,
        device, socket or the wrong kind of entry: rbfgate makes both itself, so that was put there by hand."""
        check_work_entry(self._layout.staging)
        check_work_entry(self._layout.lock)

    def history_document(self, name: str, *, verify: bool = True) -> dict[str, Any]:
        """What ``history --json`` prints and ``GET /models/{model}/history`` answers: the same keys in both.

        ``{"model", "entries", "verification": {"ok", "entries", "problem"}}``.
        """
        entries = self.history(name)
        document: dict[str, Any] = {"model": name, "entries": entries}
        if verify:
            try:
                document["verification"] = {"ok": True, "entries": self.verify_history(name), "problem": None}
            except HistoryError as exc:
                document["verification"] = {"ok": False, "entries": len(entries), "problem": str(exc)}
        return document

    def outside_action(self, name: str) -> str:
        """``refuse`` or ``flag``: what the model does with records outside its domain (from the history).

        The choice in force is the last one the pointer's head covers: a choice whose command was killed before
        it moved the pointer is not in force until the next change completes it, like an interrupted activation.
        """
        entries = self.history(name)
        try:
            pointer = read_pointer(self._layout.pointer(name), root=self.root)
        except HistoryError:
            pointer = None
        if pointer is not None:
            entries = [entry for entry in entries if entry["seq"] <= pointer.history_seq]
        return domain_choice.outside_action_from(entries)

    def live_at(self, name: str, moment: datetime) -> LiveAt:
        """The version live at ``moment``, from the verified trail; ``HistoryError`` when it does not verify."""
        try:
            self.verify_history(name)
        except HistoryError as exc:
            raise HistoryError(f"cannot say what was live: the history does not verify: {exc}") from exc
        return live_at(name, self.history(name), moment)

    def trusted_keys(self) -> list[TrustedKey]:
        """The keys whose signatures the store accepts (checked against the trust trail); empty: none required."""
        return verified_keys(self._layout)

    def trust_history(self) -> list[dict[str, Any]]:
        """The trust trail's entries, oldest first."""
        return trust_entries(self._layout)

    def _load_checked(self, name: str, version: str, *, with_members: bool) -> tuple[Bundle, dict[str, bytes]]:
        """Check the folder is bound to its publish entry and holds regular files only, then load and verify it."""
        path = self.bundle_dir(name, version)
        publish = self._check_binding(name, version)
        try:
            names = check_tree(self.root, path)
            members = {entry: read_store_file(self.root, path / entry) for entry in names if with_members}
            signature = read_store_file(self.root, path / SIGNATURE_FILE)
        except UnsafeStoreEntry as exc:
            raise IntegrityError(f"stored bundle {name} {version}: {exc}; publish a new version") from exc
        try:
            bundle = load_bundle(path)
        except (BundleFormatError, UnsafeArchiveError) as exc:
            raise IntegrityError(f"stored bundle {name} {version} is damaged: {exc}; publish a new version") from exc
        if bundle.digest != publish["digest"]:
            raise IntegrityError(
                f"stored bundle {name} {version}: its digest is {bundle.digest[:16]}..., but it was published with "
                f"{str(publish['digest'])[:16]}...; the stored manifest was altered, publish a new version"
            )
        bundle.self_test()
        check_bundle_signature(signature, bundle.digest, self.trusted_keys(), f"{name} {version} in the store")
        if with_members:
            # The bytes shipped must be the bytes verified: the manifest's digest, each file's checksum.
            if sha256_bytes(canonical_json(json.loads(members[MANIFEST_FILE]))) != bundle.digest or any(
                sha256_bytes(members.get(entry) or b"") != spec.sha256 for entry, spec in bundle.manifest.files.items()
            ):
                raise IntegrityError(f"stored bundle {name} {version} changed while it was read; try again")
            listed = {MANIFEST_FILE, SIGNATURE_FILE, *bundle.manifest.files}
            members = {entry: data for entry, data in members.items() if entry in listed and data is not None}
        return bundle, members

    def check_binding(self, name: str, version: str) -> None:
        """``HistoryError`` unless the folder of ``version`` holds what its publish entry recorded (folder name,
        record, manifest and its digest; ``folders``); its arrays are not read (their checksums are checked on
        every load)."""
        self._check_binding(name, version)

    def folder_fingerprint(self, name: str, version: str) -> tuple:
        """Changes whenever what ``check_binding`` reads may have changed (``folders.folder_fingerprint``)."""
        return folder_fingerprint(self._layout, name, version)

    def _check_binding(self, name: str, version: str) -> dict[str, Any]:
        """The publish entry of ``version``, after checking its folder says what that entry recorded."""
        publish = self._publish_entry(name, version)
        stored = read_stored_version(self._layout, name, version)
        problem = binding_problem(name, stored)
        if problem is not None:
            raise problem
        if stored.record.digest != publish["digest"] or stored.record.publish_seq != publish["seq"]:
            raise HistoryError(
                f"stored version {name} {version}: its record names digest {stored.record.digest[:16]}... and "
                f"publish seq {stored.record.publish_seq}, but the history published it at seq {publish['seq']} "
                f"with digest {str(publish['digest'])[:16]}...; the version folder was replaced by hand"
            )
        return publish

    def _publish_entry(self, name: str, version: str) -> dict[str, Any]:
        """The publish entry that put ``version`` in the store, from the hash-verified trail."""
        trail = read_trail(self._layout.history(name), name, root=self.root)
        pointer = read_pointer(self._layout.pointer(name), root=self.root)
        check_chain(trail.lines, name, pointer.history_head if pointer else None)
        entry = stored_versions([item.entry for item in trail.lines]).get(version)
        if entry is None:
            raise HistoryError(
                f"stored version {name} {version}: the history has no publish entry for it (or records it pruned); "
                "it was added by hand or its publisher was interrupted (the next change records it); "
                f"'rbfgate history {name} --verify' says which"
            )
        return entry

    # ----- changing (each takes the store lock) ----------------------------------------------

    # ``via`` says through what the actor acts ("cli", "http", "python"); the history records it.

    def publish(self, bundle_path: Path, *, actor: str, via: str = "python") -> PublishOutcome:
        return changes.publish(self, Path(bundle_path), actor=actor, via=via)

    def activate(self, name: str, version: str, *, reason: str, actor: str, via: str = "python",
                 accept_breaking: bool = False, recent: Sequence[Mapping[str, Any]] = (),
                 convert: Converter = from_json, on_verified: Callable[[Bundle], None] | None = None,
                 on_compared: Callable[[ContractComparison], None] | None = None) -> dict[str, Any]:
        """See ``changes.activate``: refuses a candidate that breaks callers unless ``accept_breaking``."""
        return changes.activate(self, name, version, reason=reason, actor=actor, via=via,
                                accept_breaking=accept_breaking, recent=recent, convert=convert,
                                on_verified=on_verified, on_compared=on_compared)

    def rollback(self, name: str, *, reason: str, actor: str, via: str = "python",
                 on_verified: Callable[[Bundle], None] | None = None) -> dict[str, Any]:
        return changes.rollback(self, name, reason=reason, actor=actor, via=via, on_verified=on_verified)

    def set_outside_action(self, name: str, action: str, *, reason: str, actor: str,
                           via: str = "python") -> dict[str, Any]:
        return domain_choice.set_outside_action(self, name, action, reason=reason, actor=actor, via=via)

    def prune(self, name: str, *, keep: int, actor: str, via: str = "python") -> list[str]:
        return changes.prune(self, name, keep=keep, actor=actor, via=via)

    def repair_pointer(self, name: str, *, reason: str, actor: str, via: str = "python") -> PointerRepair:
        """See ``pointer_repair.repair_pointer``: rebuild the active pointer from the verified trail."""
        return repair_pointer(self, name, reason=reason, actor=actor, via=via)

    def add_trusted_key(self, public_key: bytes, *, label: str, actor: str, via: str = "python") -> TrustedKey:
        return changes.add_trusted_key(self, public_key, label=label, actor=actor, via=via)

    def remove_trusted_key(self, key_id: str, *, actor: str, via: str = "python") -> TrustedKey:
        return changes.remove_trusted_key(self, key_id, actor=actor, via=via)

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
