"""One difference between the contracts of two versions, as the contract comparison lists it.

Shared by the feature, range, class and probability checks (``model_store.store.contract``) and
the domain check (``model_store.store.contract_domain``).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

__all__ = ["TRAINING_RANGE_BASIS", "ContractChange", "recent_basis", "refused_share"]

# What a narrowed range is judged on without recent inputs (see model_store.store.contract).
TRAINING_RANGE_BASIS = "active version's training range"


def recent_basis(count: int) -> str:
    """The basis of a judgement made on ``count`` recent inputs."""
    return f"recent inputs: {count}"


def refused_share(count: int, of: int) -> dict[str, Any]:
    """``{"count", "of", "share"}``: ``count`` of ``of`` recent inputs would be refused (``of`` > 0)."""
    return {"count": count, "of": of, "share": count / of}


@dataclass(frozen=True)
class ContractChange:
    """One difference. ``subject`` is the feature or class (None for probability, calibration and the
    domain model); ``recent_refused`` is ``{"count", "of", "share"}`` when recent inputs were counted;
    ``basis`` says what a judgement that needs data was made on (``recent_basis(n)``,
    ``TRAINING_RANGE_BASIS``, or ``"refuse rates"`` for the domain model), None where none is needed."""

    kind: str
    subject: str | int | None
    active: Any
    candidate: Any
    breaking: bool
    detail: str
    recent_refused: dict[str, Any] | None = None
    basis: str | None = None

    def to_dict(self) -> dict[str, Any]:
        return {
            "kind": self.kind, "subject": self.subject, "active": self.active, "candidate": self.candidate,
            "breaking": self.breaking, "detail": self.detail, "recent_refused": self.recent_refused,
            "basis": self.basis,
        }
