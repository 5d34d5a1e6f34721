"""Per model: refuse or only flag records whose domain verdict is ``outside``, chosen by operators.

The choice is a history entry, recorded like an activation (hash-chained, with actor and a
required reason) under the action ``outside-domain-refuse`` or ``outside-domain-flag``; the latest
such entry decides, and a model without one refuses (``DEFAULT_OUTSIDE_ACTION``). Every entry moves
the active pointer's history head, so a service that polls the pointer notices a new choice without
reading the trail on every request. The choice applies to every version of the model.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from model_store.domain_policy import DEFAULT_OUTSIDE_ACTION, OUTSIDE_ACTIONS
from model_store.errors import InputError
from model_store.naming import check_name
from model_store.store.changes import begin_change, draft_entry, who
from model_store.store.history import check_text
from model_store.store.recovery import commit

if TYPE_CHECKING:
    from model_store.store.store import Store

__all__ = ["CHOICE_ACTIONS", "outside_action_from", "set_outside_action"]

CHOICE_ACTIONS = {"refuse": "outside-domain-refuse", "flag": "outside-domain-flag"}
_ACTION_OF = {entry: action for action, entry in CHOICE_ACTIONS.items()}


def outside_action_from(entries: list[dict[str, Any]]) -> str:
    """``refuse`` or ``flag``: the latest choice in a model's history entries, else the default."""
    for entry in reversed(entries):
        action = _ACTION_OF.get(entry["action"])
        if action is not None:
            return action
    return DEFAULT_OUTSIDE_ACTION


def set_outside_action(
    store: "Store", name: str, action: str, *, reason: str, actor: str, via: str = "python"
) -> dict[str, Any]:
    """Record ``action`` (refuse or flag) for ``name``; return the history entry.

    Like every change, refused while the model fails verification (``changes.begin_change``).
    """
    check_name(name, what="model name")
    if action not in OUTSIDE_ACTIONS:
        raise InputError(f"outside-domain action {action!r}: expected one of {', '.join(OUTSIDE_ACTIONS)}")
    reason = check_text(reason, what="reason", required=True)
    actor, via = who(actor, via)
    with store.locked():
        state = begin_change(store, name, actor, via)
        draft = draft_entry(store, actor, via, CHOICE_ACTIONS[action], None, None, reason)
        [entry] = commit(store.layout, state, [draft])
    return entry
