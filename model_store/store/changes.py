"""Changing a store: publish, activate, rollback, prune, and the trusted-key setting.

Each change holds the store lock from its first read to its last write, so
concurrent operators are serialised and nothing is lost or interleaved.
Before changing a model it completes any change a crash interrupted
(``recovery.recover``) and refuses to continue on a tampered trail.
Refusals of checks (a conflicting digest, a bad signature, a bundle that
fails its checksums or golden self-test, a stored bundle that no longer
verifies) are written to the history before they are raised. The one
exception: a bundle that fails its checksums or golden self-test for a
model the store does not hold yet is refused without a trace, because a
model directory is not created from the claims of a bundle that does not
verify just to log its refusal.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any, NoReturn

from model_store.bundle import Bundle, load_bundle
from model_store.errors import (
    BreakingChangeError,
    CheckFailedError,
    InputError,
    NotFoundError,
    SignatureError,
    VersionConflictError,
)
from model_store.manifest import SIGNATURE_FILE
from model_store.refusal import Converter, from_json
from model_store.store.contract import ContractComparison, compare_contracts
from model_store.naming import check_name
from model_store.store.durable import atomic_write, fsync_directory
from model_store.store.files import store_entry_kind
from model_store.store.history import VIAS, check_text
from model_store.store.layout import require_model
from model_store.store.publishing import (
    PublishOutcome,
    VersionRecord,
    bundle_members,
    claimed_identity,
    clear_staging,
    discard_version,
    read_record,
    stage_version,
)
from model_store.store.recovery import commit, recover
from model_store.store.signing import TrustedKey, check_bundle_signature, key_id
from model_store.store.state import ModelState, rollback_refusal
from model_store.store.trust import change_trust, recover_trust, verified_keys

if TYPE_CHECKING:
    from model_store.store.store import Store

__all__ = [
    "activate", "add_trusted_key", "begin_change", "draft_entry", "prune", "publish", "remove_trusted_key", "rollback",
    "who",
]


def publish(store: "Store", source: Path, *, actor: str, via: str = "python") -> PublishOutcome:
    """Verify ``source`` (directory or single file), then store it as an immutable version."""
    actor, via = who(actor, via)
    try:
        bundle = load_bundle(source)
        bundle.self_test()
    except CheckFailedError as exc:
        _refuse_unverified(store, source, exc, actor, via)
    members = bundle_members(source, bundle)
    name, version, digest = bundle.name, bundle.version, bundle.digest
    layout = store.layout
    with store.locked():
        store_entry_kind(layout.root, layout.versions(name))  # no link on the way: mkdir would create it elsewhere
        layout.versions(name).mkdir(parents=True, exist_ok=True)
        state = begin_change(store, name, actor, via)
        if layout.version(name, version).is_dir():
            stored = read_record(layout, name, version)
            if stored.digest != digest:
                _refuse(store, state, "refused-publish", version, digest, None, VersionConflictError(
                    f"{name} {version} is already published with digest {stored.digest[:16]}..., this bundle has "
                    f"{digest[:16]}...; published versions never change, export it under a new version"
                ), actor=actor, via=via)
            _add_missing_signature(store, state, version, digest, members.get(SIGNATURE_FILE), actor, via)
            return PublishOutcome(name, version, digest, already_present=True)
        earlier = state.published_digest(version)
        if earlier is not None and earlier != digest:
            _refuse(store, state, "refused-publish", version, digest, None, VersionConflictError(
                f"{name} {version} was published before with digest {earlier[:16]}... (and pruned since); "
                "a version name is never reused for other content, export it under a new version"
            ), actor=actor, via=via)
        try:
            check_bundle_signature(members.get(SIGNATURE_FILE), digest, store.trusted_keys(), str(source))
        except SignatureError as exc:
            _refuse(store, state, "refused-publish", version, digest, None, exc, actor=actor, via=via)
        last = state.last_entry
        record = VersionRecord(
            name, version, digest, bundle.manifest.created, store.now(), actor, (last["seq"] if last else 0) + 1, via
        )
        staged = stage_version(layout.staging, record, members, store.publish_step)
        os.rename(staged, layout.version(name, version))
        fsync_directory(layout.versions(name))
        store.publish_step("stored")
        commit(layout, state, [draft_entry(store, actor, via, "publish", version, digest, None)])
        store.publish_step("recorded")
    return PublishOutcome(name, version, digest, already_present=False)


def activate(
    store: "Store",
    name: str,
    version: str,
    *,
    reason: str,
    actor: str,
    via: str = "python",
    accept_breaking: bool = False,
    recent: Sequence[Mapping[str, Any]] = (),
    convert: Converter = from_json,
    on_verified: Callable[[Bundle], None] | None = None,
    on_compared: Callable[[ContractComparison], None] | None = None,
) -> dict[str, Any]:
    """Re-verify the stored bundle and make it the active version; refuse (and record it) if it fails.

    A candidate whose contract would break callers of the active version
    (``model_store.store.contract``; ``recent`` input records judge narrowed ranges and the domain
    model) is refused with ``BreakingChangeError`` unless ``accept_breaking``; then the entry lists
    what was accepted. ``on_compared(comparison)`` is called with the contract comparison when one was
    made (a version was active and is not the candidate), so a caller can say what it was judged on.
    ``on_verified(bundle)`` is called with the bundle verified for the change once it is committed, so a
    caller that serves it (the service) need not load and verify it a second time.
    """
    check_name(name, what="model name")
    check_name(version, what="model version")
    reason = check_text(reason, what="reason", required=True)
    actor, via = who(actor, via)
    with store.locked():
        state = begin_change(store, name, actor, via)
        digest = _stored_digest(store, state, version)

        def check_contract(candidate: Bundle) -> list[str] | None:
            comparison = _comparison(store, state, candidate, recent, convert)
            if comparison is None:
                return None
            if on_compared is not None:
                on_compared(comparison)
            breaking = [change.detail for change in comparison.breaking]
            if breaking and not accept_breaking:
                listed = "; ".join(breaking)
                _refuse(store, state, "refused-activate", version, digest, reason, BreakingChangeError(
                    f"{name} {version} would break callers of the active version (narrowed ranges judged on: "
                    f"{comparison.range_basis}): {listed}; tell them, then activate with --accept-breaking "
                    "(HTTP: \"accept_breaking\": true)", tuple(breaking), comparison.range_basis,
                ), actor=actor, via=via)
            return breaking or None

        return _switch(store, state, "activate", version, digest, reason, actor, via, check=check_contract,
                       on_verified=on_verified)


def rollback(
    store: "Store", name: str, *, reason: str, actor: str, via: str = "python",
    on_verified: Callable[[Bundle], None] | None = None,
) -> dict[str, Any]:
    """Walk back one step of the activation stack (``model_store.store.state``), after re-verifying the target;
    ``on_verified`` as for ``activate``."""
    check_name(name, what="model name")
    reason = check_text(reason, what="reason", required=True)
    actor, via = who(actor, via)
    with store.locked():
        state = begin_change(store, name, actor, via)
        stack = state.stack()
        if len(stack) < 2:
            raise CheckFailedError(rollback_refusal(name, state.entries))
        target, current = stack[-2], stack[-1]
        if not store.layout.version(name, target.version).is_dir():
            _refuse(store, state, "refused-rollback", target.version, target.digest, reason, CheckFailedError(
                f"rollback of {name} would return to {target.version} (active before {current.version} was activated "
                f"at seq {current.seq}), which was pruned; activate a stored version instead"
            ), actor=actor, via=via)
        return _switch(store, state, "rollback", target.version, target.digest, reason, actor, via,
                       on_verified=on_verified)


def prune(store: "Store", name: str, *, keep: int, actor: str, via: str = "python") -> list[str]:
    """Remove all but the ``keep`` newest versions, never the active one or the rollback target."""
    check_name(name, what="model name")
    if isinstance(keep, bool) or not isinstance(keep, int) or keep < 0:
        raise InputError(f"--keep {keep!r}: expected a whole number of versions, 0 or more")
    actor, via = who(actor, via)
    with store.locked():
        state = begin_change(store, name, actor, via)
        ordered = [info.version for info in store.versions(name)]
        target = state.rollback_target()
        protected = {state.active_version(), target.version if target else None}
        newest = set(ordered[len(ordered) - keep:]) if keep else set()
        doomed = [version for version in ordered if version not in newest and version not in protected]
        if not doomed:
            return []
        kept = [version for version in ordered if version not in doomed]
        reason = (
            f"retention --keep {keep}: kept {', '.join(kept) or 'nothing'} "
            "(the newest, the active version and the rollback target are always kept)"
        )
        drafts = [
            draft_entry(store, actor, via, "prune", version, read_record(store.layout, name, version).digest, reason)
            for version in doomed
        ]
        commit(store.layout, state, drafts)  # the history says "pruned" before the files go (see recovery)
        for version in doomed:
            discard_version(store.layout.version(name, version), store.layout.staging)
    return doomed


def add_trusted_key(store: "Store", public_key: bytes, *, label: str, actor: str, via: str = "python") -> TrustedKey:
    """Trust ``public_key`` (32 raw Ed25519 bytes), recorded in the trust trail; from then on bundles must be signed."""
    if len(public_key) != 32:
        raise InputError(f"an Ed25519 public key is 32 bytes, got {len(public_key)}")
    label = check_text(label, what="label", required=False) or ""
    actor, via = who(actor, via)
    with store.locked():
        recover_trust(store.layout, now=store.now(), actor=actor, via=via)
        new_id = key_id(public_key)
        for key in verified_keys(store.layout):
            if key.key_id == new_id:
                return key
        key = TrustedKey(new_id, public_key.hex(), label, store.now(), actor)
        change_trust(store.layout, "trust-add", key, now=store.now(), actor=actor, via=via,
                     reason=f"trusted key {new_id}" + (f" ({label})" if label else ""))
    return key


def remove_trusted_key(store: "Store", key_id_: str, *, actor: str, via: str = "python") -> TrustedKey:
    """Stop trusting a key, recorded in the trust trail (so the end of a signature requirement is visible)."""
    actor, via = who(actor, via)
    with store.locked():
        recover_trust(store.layout, now=store.now(), actor=actor, via=via)
        existing = verified_keys(store.layout)
        removed = next((key for key in existing if key.key_id == key_id_), None)
        if removed is None:
            listed = ", ".join(key.key_id for key in existing) or "none"
            raise NotFoundError(f"key {key_id_!r} is not trusted by this store (trusted: {listed})")
        remaining = len(existing) - 1
        change_trust(store.layout, "trust-remove", removed, now=store.now(), actor=actor, via=via,
                     reason=f"stopped trusting key {removed.key_id}" + (
                         "" if remaining else "; no trusted keys remain, so signatures are no longer required"))
    return removed


def begin_change(store: "Store", name: str, actor: str, via: str) -> ModelState:
    """Start a change of ``name`` (store lock held): complete interrupted changes, refuse if verification fails."""
    require_model(store.layout, name)
    clear_staging(store.layout.staging)
    recover_trust(store.layout, now=store.now(), actor=actor, via=via)
    return recover(store.layout, name, now=store.now(), actor=actor, via=via)


def who(actor: str, via: str) -> tuple[str, str]:
    """The checked ``actor`` and ``via`` of a change."""
    actor = check_text(actor, what="actor", required=True)
    if via not in VIAS:
        raise InputError(f"via {via!r}: expected one of {', '.join(VIAS)} (through what the actor acts)")
    return actor, via


def _switch(
    store: "Store", state: ModelState, action: str, version: str, digest: str, reason: str, actor: str, via: str,
    *, check: Callable[[Bundle], list[str] | None] | None = None, on_verified: Callable[[Bundle], None] | None = None,
) -> dict[str, Any]:
    """Re-verify the stored ``version`` and make it active, recorded as ``action`` ("activate", "rollback").

    If the stored bundle no longer verifies, record "refused-<action>" and raise. ``check``, given
    the verified bundle, may refuse too; what it returns is recorded as ``accepted_breaking``.
    """
    try:
        bundle = store.load_verified(state.name, version)
    except CheckFailedError as exc:
        _refuse(store, state, f"refused-{action}", version, digest, reason, exc, actor=actor, via=via)
    accepted = check(bundle) if check is not None else None
    [entry] = commit(
        store.layout, state,
        [draft_entry(store, actor, via, action, version, bundle.digest, reason, accepted_breaking=accepted)],
        activate=(version, bundle.digest),
    )
    if on_verified is not None:
        on_verified(bundle)
    return entry


def _comparison(store: "Store", state: ModelState, candidate: Bundle, recent, convert) -> ContractComparison | None:
    """The contract comparison from the active version to ``candidate``, or None when there is none.

    Nothing to compare when no version is active or the candidate is the active one. An active
    version whose manifest cannot be read is not compared either: activating a good version is
    how an operator replaces a damaged one, and the damage is reported by the service already.
    The active bundle itself is loaded only to score recent inputs with its domain model; when it
    no longer verifies, the domain model is judged without them.
    """
    active_version = state.active_version()
    if active_version is None or active_version == candidate.version:
        return None
    try:
        _, active, _ = store.manifest(state.name, active_version)
    except (CheckFailedError, InputError):
        return None
    bundles = None
    if recent and (active.domain is not None or candidate.manifest.domain is not None):
        try:
            bundles = (store.load_verified(state.name, active_version), candidate)
        except (CheckFailedError, InputError):
            bundles = None
    return compare_contracts(active, candidate.manifest, recent, convert, bundles=bundles,
                             outside_action=store.outside_action(state.name))


def _refuse_unverified(store: "Store", source: Path, exc: CheckFailedError, actor: str, via: str) -> NoReturn:
    """Record a publish refused because the bundle failed its checksums or golden self-test, then raise.

    Recorded only when the manifest names a model the store already holds:
    a bundle that does not verify is not trusted to create a model directory.
    """
    claimed = claimed_identity(source)
    if claimed is not None and store.layout.model(claimed[0]).is_dir():
        name, version, digest = claimed
        with store.locked():
            _refuse(store, begin_change(store, name, actor, via), "refused-publish", version, digest, None, exc, actor=actor,
                    via=via)
    raise exc


def _stored_digest(store: "Store", state: ModelState, version: str) -> str:
    if not store.layout.version(state.name, version).is_dir():
        pruned = (state.last_event(version) or {}).get("action") == "prune"
        raise NotFoundError(
            f"{state.name} {version} is not in the store{' (it was pruned)' if pruned else ''}; "
            f"'rbfgate versions {state.name}' lists the stored versions"
        )
    return read_record(store.layout, state.name, version).digest


def _add_missing_signature(store, state, version, digest, signature: bytes | None, actor: str, via: str) -> None:
    """Re-publishing a signed copy of a stored unsigned version adds its signature (the digest is unchanged)."""
    target = store.layout.bundle(state.name, version) / SIGNATURE_FILE
    trusted = store.trusted_keys()
    if signature is None or os.path.lexists(target) or not trusted:
        return
    key = check_bundle_signature(signature, digest, trusted, f"{state.name} {version}")
    atomic_write(target, signature)
    reason = f"signature by trusted key {key.key_id} added to the stored version (its content is unchanged)"
    commit(store.layout, state, [draft_entry(store, actor, via, "add-signature", version, digest, reason)])


def _refuse(store, state, action, version, digest, reason, exc: CheckFailedError, *, actor: str, via: str) -> NoReturn:
    """Record a refused attempt in the history, then raise its error."""
    text = f"refused: {exc}" + (f" (reason given: {reason})" if reason else "")
    commit(store.layout, state, [draft_entry(store, actor, via, action, version, digest, text[:1000])])
    raise exc


def draft_entry(store, actor, via, action, version, digest, reason, **fields) -> dict[str, Any]:
    """The make_entry arguments of one entry; ``fields`` are those its kind declares (entry_kinds.KINDS),
    an optional one given as None is left out."""
    return {"time": store.now(), "actor": actor, "via": via, "action": action, "version": version, "digest": digest,
            "reason": reason, **{name: value for name, value in fields.items() if value is not None}}
