"""Names a generated typed client cannot keep apart, found at export so the exporter can warn.

A per-model OpenAPI document (``model_store.api_document``) makes each feature a property of
``Record`` (beside the record's ``id``) and each string class label a member of the ``Label``
enum. Client generators turn those into attribute and enum-member names by folding case and
replacing what is not a letter or digit (common practice), so two names that agree after

    normalised(name) = case-folded, each run of non-alphanumerics replaced by "_", "_" trimmed

may become one attribute or one member: "a-b" and "a_b", "Temp" and "temp", a feature "ID" and
the record's "id". The exporter warns about every such group and records the warning in the
manifest's ``training.notes``.

What openapi-python-client 0.29 does with them (read from its source, ``strings.py`` and
``parser/properties``, and checked by running it in tests/cli/test_client_names.py):

- properties (features): it snake-cases each name; when two collide it retries with the names'
  case kept and only letters, digits and "_" left. "a-b"/"a_b" and "ID"/"id" survive that retry
  (as ``ab``/``a_b`` and ``ID``/``id``); "a-b"/"a.b" and "x%"/"x" do not, and it then leaves
  ``Record`` out, with ``ScoreRequest`` and both score operations (and the column form's
  ``Columns``, whose properties are the features too, with ``ScoreColumnsRequest``).
- enum members (string labels): a label starting with a letter is upper-cased and snake-cased,
  others become ``VALUE_<position>``; two labels with one member name make it stop ("Duplicate
  key") or keep only one of them, so the client rejects the other label.
"""

from __future__ import annotations

import re
from collections.abc import Sequence

from model_store.record_ids import RECORD_ID

__all__ = ["client_name_warnings", "normalised"]

_GENERATOR = "openapi-python-client 0.29"
_DELIMITERS = ". _-"  # the delimiters openapi-python-client keeps while sanitising a name


def normalised(name: str) -> str:
    """``name`` as typical client generators make an identifier of it (see the module docstring)."""
    folded = "".join(character if character.isalnum() else "_" for character in name.casefold())
    return re.sub(r"_+", "_", folded).strip("_")


def client_name_warnings(features: Sequence[str], classes: Sequence[object]) -> list[str]:
    """One line per group of features (with the record ``id``) or string class labels that share a
    normalised name; empty when every name stays distinct."""
    warnings = []
    for group in _groups([*features, RECORD_ID] if RECORD_ID not in features else list(features)):
        shown = " and ".join(f"the record id {name!r}" if name == RECORD_ID and RECORD_ID not in features
                             else f"feature {name!r}" for name in group)
        kept = len({_kept_property(name) for name in group}) == len(group)
        warnings.append(
            f"{shown} are one name ({normalised(group[0])!r}) once case is folded and non-alphanumerics become "
            f"'_', as generated typed clients name record attributes: "
            + (f"{_GENERATOR} keeps them apart, other generators may not" if kept
               else f"{_GENERATOR} leaves the Record type and the score operations out")
            + "; rename the feature before fitting"
        )
    labels = [label for label in classes if isinstance(label, str)]
    for group in _groups(labels):
        members = {_enum_member(label, labels.index(label)) for label in group}
        warnings.append(
            " and ".join(f"class {label!r}" for label in group)
            + f" are one name ({normalised(group[0])!r}) once case is folded and non-alphanumerics become '_', as "
            "generated typed clients name label enum members: "
            + (f"{_GENERATOR} keeps them apart, other generators may not" if len(members) == len(group)
               else f"{_GENERATOR} cannot build the Label enum (it stops, or keeps only one of them)")
            + "; relabel the classes before fitting"
        )
    return warnings


def _groups(names: Sequence[str]) -> list[list[str]]:
    by_name: dict[str, list[str]] = {}
    for name in names:
        by_name.setdefault(normalised(name), []).append(name)
    return [group for group in by_name.values() if len(group) > 1]


def _sanitised(name: str) -> str:
    return "".join(c for c in name if c.isidentifier() or c.isdecimal() or c in _DELIMITERS)


def _kept_property(name: str) -> str:
    """openapi-python-client's retry name for colliding properties: case kept, only letters, digits, "_"."""
    return re.sub(r"[^\w]+", "", _sanitised(name))


def _enum_member(label: str, position: int) -> str:
    """openapi-python-client's enum member name for a string value at ``position``."""
    key = label.upper() if label[:1].isalpha() else f"VALUE_{position}"
    words = re.findall(rf"[^{re.escape(_DELIMITERS)}]+", _sanitised(key))
    return "_".join(words).upper()
