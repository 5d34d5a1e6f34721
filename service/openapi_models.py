"""The shapes of the service's request and response bodies, for its OpenAPI document only.

Nothing on the request path validates through these pydantic models (the routes read
and check their bodies themselves, see ``service.body``), so documenting costs no time
per request; ``service.openapi`` turns them into the document's components, and the
fuzzing tests (tests/reliability) check the running service against them.
"""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field

from model_store.manifest import DomainSpec, FeatureSpec, FileEntry, KernelSpec, RefusalReport
from model_store.naming import MAX_NAME_LENGTH
from model_store.record_ids import MAX_ID_INTEGER, MAX_ID_LENGTH
from model_store.refusal import REASONS

__all__ = [
    "ActivateRequest", "Alive", "BreakingChangesProblem", "DOCUMENTED_MODELS", "History", "LiveAt", "ModelDetail",
    "ModelList", "NAME_PATTERN",
    "OutsideDomainChoice", "OutsideDomainRequest", "Preview", "PreviewRequest", "Problem", "Readiness",
    "RecordsRefusedProblem", "RollbackRequest", "ScoreColumnsRequest", "ScoreColumnsResponse", "ScoreRequest",
    "ScoreResponse", "Switched", "VersionDetail",
]

# model_store.naming.check_name; its "no '..'" rule is not expressed (a name with '..' is a 404).
NAME_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9._-]*$"
# Printable (Python's str.isprintable) has no portable JSON Schema pattern; a reason with a
# control character or only spaces is refused with 422, which the document lists.
_REASON = "one line of printable text, not only spaces, kept in the history"


class _Doc(BaseModel):
    model_config = ConfigDict(extra="forbid")


Label = str | int  # class labels keep their type: JSON strings or integers
_ID = Field(default=None, description=f"the record's id when it sent one (a string of at most {MAX_ID_LENGTH} "
            f"characters without control characters, or an integer within ±{MAX_ID_INTEGER})")


class Problem(BaseModel):
    """RFC 9457 problem details; extension members (``problems``, ``results``...) vary by problem."""

    model_config = ConfigDict(extra="allow")
    type: str
    title: str
    status: int
    detail: str


class RecordProblem(_Doc):
    feature: str | None = Field(description="the feature, or null for a record-level problem (outside_domain)")
    value: Any = Field(description="the value sent (a nested value or over-long text is abbreviated); the domain "
                       "score for outside_domain")
    reason: Literal[REASONS]  # type: ignore[valid-type]
    allowed: tuple[float, float] | None = Field(description="the allowed range [low, high], inclusive")
    message: str | None = Field(default=None, description="invalid_id only: which rule the id breaks, with its limit")


class NearestSupport(_Doc):
    distance: float = Field(ge=0, description="Euclidean distance in the model's scaled space")
    similarity: float = Field(ge=0, le=1, description="exp(-gamma distance^2)")
    label: Label
    index: int = Field(ge=0)
    percentile: float = Field(ge=0, le=100, description="of the distance among the reference rows")


class DomainAnswer(_Doc):
    verdict: Literal["typical", "unusual", "outside"] = Field(
        description="from the bundle's domain thresholds (GET /models/{model}/versions/{version}, domain.thresholds)")
    score: float = Field(description="the one-class SVM decision over the reference rows; larger is more typical")


class ScoredResult(_Doc):
    id: str | int | None = _ID
    status: Literal["scored"]
    label: Label
    decision: float | dict[str, float] = Field(description="a number for a binary model, class -> number otherwise")
    probability: dict[str, float] | None = Field(description="class -> probability; null when uncalibrated")
    nearest_support: NearestSupport
    domain: DomainAnswer | None = Field(description="null for a bundle without a domain model (format 1)")


class RefusedResult(_Doc):
    id: str | int | None = _ID
    status: Literal["refused"]
    problem_count: int = Field(ge=1)
    problems: list[RecordProblem] | None = Field(
        min_length=1,
        description="every problem of the record, or null when the answer summarises it (see refusals)",
    )
    domain: DomainAnswer | None = Field(None, description="present when the record was refused as outside_domain")


class RefusalGroup(_Doc):
    """One distinct problem of an answer and the records that have it."""

    feature: str | None = Field(description="null: a record-level reason (outside_domain), or unknown features past the first 32 distinct names")
    reason: Literal[REASONS]  # type: ignore[valid-type]
    allowed: tuple[float, float] | None
    count: int = Field(ge=1, description="problems in this group")
    records: list[tuple[int, int]] = Field(
        min_length=1, description="runs [first, last] of consecutive record indices (inclusive), in request order")


class FlatRecordProblem(RecordProblem):
    record: int = Field(ge=0, description="index of the record in the request")
    id: str | int | None = _ID


class RecordsRefusedProblem(_Doc):
    """422 when every record was refused: problem details with every result, the refusal summary and a
    flat list of the problems given in full (service.refusal_answer bounds its size)."""

    model_config = ConfigDict(extra="allow")
    type: Literal["/problems/records-refused"]
    title: str
    status: Literal[422]
    detail: str
    model: str
    version: str
    bundle_sha256: str
    refusals: list[RefusalGroup] = Field(min_length=1, description="each distinct problem once, with its records")
    summarised: bool = Field(description="true when some result has problems null (past the detail budget)")
    results: list[RefusedResult]
    problems: list[FlatRecordProblem] = Field(description="the problems given in full, each with its record index")


class ScoreRequest(_Doc):
    records: list[dict[str, Any]] = Field(min_length=1, description="records: feature name -> number")


class _AnswerHead(_Doc):
    """What both forms of a scoring answer begin with."""

    model: str
    version: str
    bundle_sha256: str
    refusals: list[RefusalGroup] | None = Field(
        None, description="present when a record was refused: each distinct problem once, with its records")
    summarised: bool | None = Field(
        None, description="present with refusals: true when some refused record has problems null")


class ScoreResponse(_AnswerHead):
    results: list[ScoredResult | RefusedResult]


RowId = str | int | None  # a record id, or null for none
Cell = list[float | None]  # one value per row; null on a refused row


def _no_default(schema: dict[str, Any]) -> None:
    """An optional member without a ``default`` in the document (its absence is not a null)."""
    schema.pop("default", None)


class ScoreColumnsRequest(_Doc):
    """The column form: row i is scored as the record {name: columns[name][i]} with the id ids[i]."""

    columns: dict[str, Annotated[list[Any], Field(min_length=1)]] = Field(
        description="feature name -> one value per row; every array (and ids) has the same length")
    ids: list[RowId] = Field(
        None, min_length=1, json_schema_extra=_no_default,
        description="one per row: its record id (as in a record's id), or null for none")


class ColumnNearestSupport(_Doc):
    """NearestSupport's members, one entry per row; null on a refused row."""

    distance: list[Annotated[float, Field(ge=0)] | None]
    similarity: list[Annotated[float, Field(ge=0, le=1)] | None]
    label: list[Label | None]
    index: list[Annotated[int, Field(ge=0)] | None]
    percentile: list[Annotated[float, Field(ge=0, le=100)] | None]


class ColumnDomain(_Doc):
    """Each row's domain verdict and score; null on a refused row, except one refused as outside_domain."""

    verdict: list[Literal["typical", "unusual", "outside"] | None]
    score: Cell


class ColumnResults(_Doc):
    """One array per member of a scored result, one entry per row; null on a refused row."""

    status: list[Literal["scored", "refused"]]
    label: list[Label | None]
    decision: Cell | dict[str, Cell] = Field(description="an array for a binary model, class -> array otherwise")
    probability: dict[str, Cell] | None = Field(description="class -> array; null when uncalibrated")
    nearest_support: ColumnNearestSupport
    domain: ColumnDomain | None = Field(description="null for a bundle without a domain model (format 1)")


class RefusedRow(_Doc):
    row: int = Field(ge=0, description="index of the row in the request")
    problem_count: int = Field(ge=1)
    problems: list[RecordProblem] | None = Field(
        min_length=1, description="every problem of the row, or null when the answer summarises it (see refusals)")


class ScoreColumnsResponse(_AnswerHead):
    """The answer to the column form: the same values as the record form, a column at a time."""

    ids: list[RowId] | None = Field(
        None, description="present when the request sent ids: each row's id, null when it had none or it was refused")
    columns: ColumnResults
    refused: list[RefusedRow] = Field(description="the refused rows in row order; empty when none")


class ServedVersion(_Doc):
    version: str
    bundle_sha256: str


class ActiveVersion(_Doc):
    version: str
    bundle_sha256: str
    activated_at: str


class LoadFailureInfo(_Doc):
    version: str
    bundle_sha256: str
    error: str
    detail: str
    at: str


class ModelSummary(_Doc):
    model: str
    active: ActiveVersion | None
    served_by_this_worker: ServedVersion | None
    load_failure: LoadFailureInfo | None
    unexplained_pointer: str | None = Field(
        description="why this worker does not follow the pointer (its history does not explain it), or null")
    folder_mismatch: str | None = Field(
        description="why the active version's folder is not served (it does not hold what its publish entry "
                    "recorded), or null")


class ModelList(_Doc):
    models: list[ModelSummary]


class PublishedVersion(_Doc):
    version: str
    bundle_sha256: str
    created: str
    published_at: str
    active: bool


class ModelDetail(ModelSummary):
    versions: list[PublishedVersion]
    outside_domain: Literal["refuse", "flag"] = Field(
        description="what the model does with records whose domain verdict is outside (chosen by operators)")


class Classifier(_Doc):
    estimator: Literal["SVC", "NuSVC"]
    classes: list[Label]
    support_vectors: int
    support_per_class: list[int]
    break_ties: bool
    decision_function_shape: Literal["ovr", "ovo"]


class GoldenSummary(_Doc):
    vectors: int
    with_probabilities: bool


class VersionLinks(_Doc):
    schema_: str = Field(alias="schema")
    bundle: str
    score: str


class VersionDetail(_Doc):
    model: str
    version: str
    bundle_sha256: str
    published_at: str
    active: bool
    served_by_this_worker: bool
    signed: bool
    format: str
    created: str
    creator: str
    features: list[FeatureSpec]
    scaler: dict[str, str]
    kernel: KernelSpec
    classifier: Classifier
    calibration: dict[str, str]
    training: dict[str, Any] | None
    reference_distance: dict[str, Any] | None
    domain: DomainSpec | None = Field(description="the domain model and its verdict thresholds; null for format 1")
    refusal_report: RefusalReport | None
    golden: GoldenSummary
    files: dict[str, FileEntry]
    links: VersionLinks


class HistoryEntry(_Doc):
    seq: int = Field(ge=1)
    time: str
    actor: str
    via: Literal["cli", "http", "python"] | None = Field(
        default=None, description="through what the actor acted; absent in entries written before it was recorded")
    action: str
    version: str | None
    digest: str | None
    reason: str | None
    accepted_breaking: list[str] | None = Field(
        default=None, description="on an activation that broke callers: the breaking changes the operator accepted")
    prev_hash: str
    hash: str


class Verification(_Doc):
    ok: bool
    entries: int
    problem: str | None


class LiveAt(_Doc):
    model: str
    at: str
    version: str
    bundle_sha256: str
    made_live: HistoryEntry
    ended: HistoryEntry | None


class Undone(_Doc):
    version: str
    bundle_sha256: str
    activated_at_seq: int


class History(_Doc):
    model: str
    entries: list[HistoryEntry]
    verification: Verification


class ActivateRequest(_Doc):
    version: str = Field(min_length=1, max_length=MAX_NAME_LENGTH, pattern=NAME_PATTERN)
    reason: str = Field(min_length=1, max_length=1000, description=_REASON)
    accept_breaking: bool = Field(
        default=False, description="activate even when the candidate would break callers (recorded in the history)")


class RollbackRequest(_Doc):
    reason: str = Field(min_length=1, max_length=1000, description=_REASON)


class OutsideDomainRequest(_Doc):
    action: Literal["refuse", "flag"] = Field(description="refuse records outside the domain, or answer them flagged")
    reason: str = Field(min_length=1, max_length=1000, description=_REASON)


class OutsideDomainChoice(_Doc):
    model: str
    outside_domain: Literal["refuse", "flag"]
    entry: "HistoryEntry"


class PreviewRequest(_Doc):
    version: str = Field(min_length=1, max_length=MAX_NAME_LENGTH, pattern=NAME_PATTERN)


_RANGE_BASIS = ("what narrowed allowed ranges were judged on: \"recent inputs: N\" (this worker's recently "
                "scored records) or \"active version's training range\" (it has none, e.g. after a restart)")


class Switched(_Doc):
    model: str
    entry: HistoryEntry
    served_by_this_worker: ServedVersion | None
    load_failure: LoadFailureInfo | None
    undid: Undone | None = Field(default=None, description="rollback only: the activation it undid")
    range_basis: str | None = Field(
        default=None, description=f"activation only, null when no version was active to compare with: {_RANGE_BASIS}")


class BreakingChangesProblem(_Doc):
    """409 when activating would break callers of the active version (``/problems/breaking-changes``)."""

    model_config = ConfigDict(extra="allow")
    type: Literal["/problems/breaking-changes"]
    title: str
    status: Literal[409]
    detail: str
    error: Literal["BreakingChangeError"]
    breaking_changes: list[str] = Field(
        min_length=1, description="each breaking change, one line each, as the contract comparison words it")
    range_basis: str | None = Field(description=_RANGE_BASIS)


class Preview(_Doc):
    model: str
    candidate: str
    recent_records: int
    report: dict[str, Any]


class Alive(_Doc):
    status: Literal["alive"]


class ReadyModel(_Doc):
    model: str
    active: ServedVersion | None  # null while the pointer cannot be read (unexplained_pointer says why)
    serving: ServedVersion | None
    failure: LoadFailureInfo | None
    unexplained_pointer: str | None
    folder_mismatch: str | None


class TokensStatus(_Doc):
    enabled: bool
    tokens: int
    error: str | None


class Readiness(_Doc):
    state: Literal["ready", "degraded"]
    store_error: str | None
    models: list[ReadyModel]
    tokens: TokensStatus


DOCUMENTED_MODELS = [
    Problem, RecordsRefusedProblem, BreakingChangesProblem, ScoreRequest, ScoreResponse, ScoreColumnsRequest,
    ScoreColumnsResponse, ModelList, ModelDetail, VersionDetail, History, LiveAt,
    ActivateRequest, RollbackRequest, PreviewRequest, Switched, Preview, Alive, Readiness, OutsideDomainRequest,
    OutsideDomainChoice,
]
