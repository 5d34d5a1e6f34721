"""The kinds of history entry: what each action means, which trail holds it, and its own fields.

Every entry has the core fields (``model_store.store.history``). An entry
written by this version of rbfgate also has ``via`` (through what the actor
acted: ``cli``, ``http`` or ``python``) and the fields its kind declares here;
entries written before ``via`` existed have the core fields only and still
verify, since their hashes cover exactly what they hold.

Adding a kind of entry (say, a per-model choice recorded like an activation):

1. add an ``EntryKind`` to ``KINDS`` with its action name, its trail, a one-line
   meaning and its own fields (``fields``: always present; ``optional``: may be
   present) with their checks (each check returns None when the value is
   acceptable, else what is wrong);
2. write it through ``recovery.commit`` with a draft holding those fields
   (``changes._draft(..., **fields)``), under the store lock, after ``_begin``;
3. if it changes what a model's history says is in force, fold it in
   ``model_store.store.state`` the way ``activation_stack`` folds activations;
4. add a row to the README's history format table.

Readers never need changing: ``read_trail`` accepts every declared kind, and an
unknown action or an undeclared field is reported as an edited trail.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

__all__ = ["KINDS", "MODEL_TRAIL", "STORE_TRAIL", "VIAS", "EntryKind", "check_fields"]

MODEL_TRAIL = "model"   # models/NAME/history.jsonl
STORE_TRAIL = "store"   # trust.jsonl at the store root: changes that concern every model
VIAS = ("cli", "http", "python")

FieldCheck = Callable[[Any], "str | None"]


def _hex(length: int) -> FieldCheck:
    pattern = re.compile(f"[0-9a-f]{{{length}}}")

    def check(value: Any) -> str | None:
        if isinstance(value, str) and pattern.fullmatch(value):
            return None
        return f"expected {length} lower-case hex characters"

    return check


def _text(value: Any) -> str | None:
    return None if isinstance(value, str) and len(value) <= 1000 and value.isprintable() else "expected one line of text"


def _lines(value: Any) -> str | None:
    if isinstance(value, list) and value and all(isinstance(item, str) for item in value):
        return None
    return "expected a non-empty list of text"


@dataclass(frozen=True)
class EntryKind:
    """One action: its trail, its meaning, and the fields it carries besides the core ones."""

    action: str
    trail: str
    meaning: str
    fields: Mapping[str, FieldCheck] = field(default_factory=dict)
    optional: Mapping[str, FieldCheck] = field(default_factory=dict)  # fields an entry of this kind may carry


_KEY_FIELDS = {"key_id": _hex(16), "public_key": _hex(64), "label": _text}

KINDS: dict[str, EntryKind] = {kind.action: kind for kind in (
    EntryKind("publish", MODEL_TRAIL, "a version was stored"),
    EntryKind("add-signature", MODEL_TRAIL, "a trusted signature was added beside an already published version"),
    EntryKind("activate", MODEL_TRAIL, "the active pointer moved to a version",
              optional={"accepted_breaking": _lines}),  # the breaking changes the operator accepted
    EntryKind("rollback", MODEL_TRAIL, "the active pointer moved back one step (see model_store.store.state)"),
    EntryKind("prune", MODEL_TRAIL, "a version was removed by retention"),
    EntryKind("refused-publish", MODEL_TRAIL, "a publish was refused (conflicting digest, bad signature, checksum or "
              "golden mismatch); only recorded for a model the store already holds"),
    EntryKind("refused-activate", MODEL_TRAIL, "an activation was refused because the stored bundle failed its checks"),
    EntryKind("refused-rollback", MODEL_TRAIL, "a rollback was refused because its target failed its checks"),
    EntryKind("recover", MODEL_TRAIL, "a change interrupted by a crash was completed by the next command"),
    EntryKind("repair-pointer", MODEL_TRAIL, "an operator rebuilt the active pointer from the verified trail "
              "(model_store.store.pointer_repair); version and digest are what it names, unchanged by the entry"),
    EntryKind("outside-domain-refuse", MODEL_TRAIL, "operators chose to refuse records outside the model's domain "
              "(the default; model_store.store.domain_choice)"),
    EntryKind("outside-domain-flag", MODEL_TRAIL, "operators chose to answer records outside the domain, flagged"),
    EntryKind("trust-add", STORE_TRAIL, "the store started accepting signatures by a key", _KEY_FIELDS),
    EntryKind("trust-remove", STORE_TRAIL, "the store stopped accepting signatures by a key", _KEY_FIELDS),
    EntryKind("trust-recover", STORE_TRAIL, "a trust change interrupted by a crash was completed by the next command"),
)}


def check_fields(action: str, extra: Mapping[str, Any]) -> str | None:
    """None when ``extra`` (the entry's fields besides the core ones and ``via``) fits ``action``, else why not."""
    kind = KINDS.get(action)
    if kind is None:
        return f"unknown action {action!r}"
    if not set(kind.fields) <= set(extra) <= set(kind.fields) | set(kind.optional):
        allowed = sorted(kind.fields) + [f"{name} (optional)" for name in sorted(kind.optional)]
        return f"action {action!r} carries the fields {allowed or 'none'} besides the core ones, found {sorted(extra)}"
    checks = {**kind.fields, **kind.optional}
    for name in extra:
        problem = checks[name](extra[name])
        if problem is not None:
            return f"{name} {extra[name]!r}: {problem}"
    return None
