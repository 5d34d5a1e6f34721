"""The bundle manifest: a typed, validated view of ``manifest.json``.

The manifest is plain JSON, so an auditor can read it with any tool. Parsing
it here checks every field once, at the boundary; the scorer then trusts it.
Large arrays (support vectors, coefficients, reference quantiles) live in
``.npy`` files listed under ``files`` with their SHA-256, dtype and shape.
"""

from __future__ import annotations

import json
import math
import os
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, StrictInt, StrictStr, ValidationError, model_validator

from model_store.errors import BundleFormatError
from model_store.naming import check_name
from model_store.strict_json import StrictJsonError, loads_strict

__all__ = [
    "FORMAT",
    "FORMATS",
    "MAX_ARRAY_BYTES",
    "MAX_GOLDEN_ROWS",
    "MAX_MANIFEST_BYTES",
    "MAX_MANIFEST_DEPTH",
    "Calibration",
    "ClassifierSpec",
    "DomainSpec",
    "DomainThresholds",
    "DomainWhitening",
    "FeatureSpec",
    "FileEntry",
    "GoldenVectors",
    "KernelSpec",
    "Manifest",
    "OutOfSample",
    "RefusalEstimate",
    "RefusalReport",
    "RuleShares",
    "ScalerSpec",
    "parse_manifest",
    "parse_manifest_bytes",
    "read_bounded",
    "read_manifest",
]

# Format 2 added the domain model (``domain``, its two arrays) and the refusal report; format 1
# bundles have neither and keep loading (their answers carry ``domain: null``).
FORMAT = "rbfgate-bundle/2"
FORMATS = ("rbfgate-bundle/1", "rbfgate-bundle/2")
MANIFEST_FILE = "manifest.json"
SIGNATURE_FILE = "signature.json"

# What one bundle read may cost, decided before anything is allocated. The exporter writes
# manifests of a few hundred KiB (isotonic maps hold at most one threshold per reference row),
# nesting 5 levels deep, 40 golden rows, and arrays of support vectors x features x 8 bytes
# (100,000 x 50 is 40 MB); the limits leave room for that and refuse what only an attack needs.
MAX_MANIFEST_BYTES = 64 * 1024 * 1024
MAX_MANIFEST_DEPTH = 64
MAX_GOLDEN_ROWS = 10_000
MAX_ARRAY_BYTES = 2 * 1024**3

Label = StrictInt | StrictStr
# RFC 3339 date-time in UTC, as the exporter writes it (seconds, optional fraction, Z).
_RFC3339_UTC = r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}(\.\d+)?Z$"


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)


class FeatureStats(_Strict):
    """Training statistics of one feature, raw units."""

    min: float
    max: float
    mean: float
    std: float


class FeatureSpec(_Strict):
    name: str = Field(min_length=1, max_length=200)
    unit: str | None = None
    description: str | None = None
    allowed: tuple[float, float]
    training: FeatureStats
    # True when the lower bound 0 was inferred because every reference and holdout value is >= 0
    # (common practice: counts, areas and concentrations cannot be negative).
    non_negative: bool = False

    @model_validator(mode="after")
    def _range_ordered(self) -> "FeatureSpec":
        low, high = self.allowed
        if not low <= high:
            raise ValueError(f"feature {self.name!r}: allowed range [{low}, {high}] has low > high")
        return self


class ScalerSpec(_Strict):
    """Per-feature affine map to the kernel's space: ``scaled = (raw - center) / scale``."""

    kind: Literal["none", "standard", "minmax", "robust", "maxabs"]
    center: list[float]
    scale: list[float]


class KernelSpec(_Strict):
    """RBF width, stored both ways: ``gamma = 1 / (2 sigma^2)``; the scorer uses gamma."""

    kind: Literal["rbf"] = "rbf"
    gamma: float = Field(gt=0)
    sigma: float = Field(gt=0)

    @model_validator(mode="after")
    def _same_width(self) -> "KernelSpec":
        # Both are shown to auditors; they must describe one kernel.
        implied = 1.0 / math.sqrt(2.0 * self.gamma)
        if abs(self.sigma - implied) > 1e-9 * implied:
            raise ValueError(
                f"sigma {self.sigma} does not match gamma {self.gamma} (expected 1/sqrt(2 gamma) = {implied})"
            )
        return self


class ClassifierSpec(_Strict):
    estimator: Literal["SVC", "NuSVC"]
    classes: list[StrictInt] | list[StrictStr]
    support_per_class: list[int]
    intercepts: list[float]
    break_ties: bool = False
    decision_function_shape: Literal["ovr", "ovo"] = "ovr"

    @model_validator(mode="after")
    def _classes_unique(self) -> ClassifierSpec:
        # scikit-learn's classes_ are np.unique of the labels; a repeated class would make two
        # decision columns answer to one name in every result object.
        repeated = sorted({label for label in self.classes if self.classes.count(label) > 1})
        if repeated:
            raise ValueError(f"classifier.classes repeats {repeated[0]!r}; each class must appear once "
                             "(as in scikit-learn's classes_)")
        return self


class SigmoidParams(_Strict):
    """Platt sigmoid ``p = 1 / (1 + exp(a * decision + b))``."""

    a: float
    b: float


class IsotonicParams(_Strict):
    """Piecewise-linear map through ``(x_thresholds, y_thresholds)``, clipped to its ends."""

    x_thresholds: list[float]
    y_thresholds: list[float]


class Calibration(_Strict):
    """How decisions become probabilities (scikit-learn CalibratedClassifierCV, ensemble=False).

    sigmoid and isotonic hold one map per calibrated decision column (one for
    binary, one per class otherwise); temperature holds the inverse temperature
    ``beta`` applied as ``softmax(beta * logits)``.
    """

    method: Literal["none", "sigmoid", "isotonic", "temperature"]
    sigmoid: list[SigmoidParams] | None = None
    isotonic: list[IsotonicParams] | None = None
    beta: float | None = None

    @model_validator(mode="after")
    def _parameters_present(self) -> "Calibration":
        if self.method == "temperature" and not (self.beta is not None and self.beta > 0):
            raise ValueError("temperature calibration needs a positive beta")
        if self.method == "sigmoid" and not self.sigmoid:
            raise ValueError("sigmoid calibration needs at least one (a, b) pair")
        if self.method == "isotonic":
            if not self.isotonic:
                raise ValueError("isotonic calibration needs at least one threshold map")
            for index, mapping in enumerate(self.isotonic):
                x, y = mapping.x_thresholds, mapping.y_thresholds
                if not x or len(x) != len(y) or any(b < a for a, b in zip(x, x[1:])):
                    raise ValueError(
                        f"isotonic map {index}: x_thresholds must be non-decreasing and as long as y_thresholds"
                    )
        return self

    @property
    def maps(self) -> int:
        """Number of per-column maps (sigmoid or isotonic), 0 for the other methods."""
        return len(self.sigmoid or self.isotonic or [])


class DomainThresholds(_Strict):
    """One-class scores below ``unusual_below`` are unusual, below ``outside_below`` outside."""

    unusual_below: float
    outside_below: float

    @model_validator(mode="after")
    def _ordered(self) -> "DomainThresholds":
        if not self.outside_below <= self.unusual_below:
            raise ValueError(f"outside_below {self.outside_below} must not exceed unusual_below {self.unusual_below}")
        return self


class DomainCalibration(_Strict):
    """Where the thresholds come from: the share of real rows each verdict may take.

    ``cross-fitting``: chosen with the range margin on out-of-sample rows (``refusal_report.out_of_sample``);
    ``holdout`` and ``cross-validation``: bundles exported before that, thresholds alone.
    """

    source: Literal["cross-fitting", "holdout", "cross-validation"]
    rows: int = Field(ge=1)
    refuse_rate: float = Field(ge=0, le=1)
    unusual_rate: float = Field(ge=0, le=1)


class DomainWhitening(_Strict):
    """The map ``W`` (f, f) from the scaled space to the domain model's, ``domain_whitening.npy``.

    ``ledoit-wolf``: ``W = D^-1 R^(-1/2)`` for ``D`` the standard deviations of the rows the model
    is fitted on and ``R`` the Ledoit-Wolf shrunk covariance of those rows divided by them
    (``model_store.domain_fit``); ``shrinkage`` is its weight on the scaled identity, None when
    there were fewer than 3 rows or no variance and ``W`` is the identity.
    """

    method: Literal["ledoit-wolf"] = "ledoit-wolf"
    shrinkage: float | None = Field(default=None, ge=0, le=1)


class DomainSpec(_Strict):
    """scikit-learn OneClassSVM (Schölkopf et al. 2001) on the classifier's scaled rows, whitened.

    Its support vectors and coefficients are ``domain_support_vectors.npy`` (n, f) and
    ``domain_alpha.npy`` (n,); the score is ``sum_j alpha_j exp(-gamma |w - s_j|^2) + intercept``,
    scikit-learn's ``decision_function`` of ``w``. ``space`` ``whitened``: ``w = z W`` for the
    scaled row ``z`` and ``W`` in ``domain_whitening.npy``; ``scaled`` (bundles exported before
    the whitening): ``w = z``.
    """

    method: Literal["one-class-svm"] = "one-class-svm"
    space: Literal["scaled", "whitened"] = "scaled"
    whitening: DomainWhitening | None = None
    gamma: float = Field(gt=0)
    nu: float = Field(gt=0, le=1)
    intercept: float
    support_vectors: int = Field(ge=1)
    fit_rows: int = Field(ge=1)
    reference_rows: int = Field(ge=1)
    subsample_seed: int | None = None
    thresholds: DomainThresholds
    calibration: DomainCalibration

    @model_validator(mode="after")
    def _whitening_matches_space(self) -> "DomainSpec":
        if (self.space == "whitened") != (self.whitening is not None):
            raise ValueError(f"space {self.space!r} with whitening {self.whitening!r}: a whitened domain model "
                             "needs its whitening section, a scaled one has none")
        return self


class RuleShares(_Strict):
    """Shares (0-1) of ``rows`` refused by each rule, flagged unusual, and refused in total."""

    rows: int = Field(ge=0)
    refused_range: float = Field(ge=0, le=1)
    refused_domain: float = Field(ge=0, le=1)
    flagged_unusual: float = Field(ge=0, le=1)
    refused_total: float = Field(ge=0, le=1)


class RefusalEstimate(_Strict):
    """Shares (0-1) of rows refused by a policy chosen without them: per rule and in total."""

    refused_range: float = Field(ge=0, le=1)
    refused_domain: float = Field(ge=0, le=1)
    refused_total: float = Field(ge=0, le=1)


class OutOfSample(_Strict):
    """How the margin and the domain thresholds were chosen on cross-fitted rows (``model_store.policy_fit``)."""

    method: str
    folds: int = Field(ge=1)
    seed: int = Field(ge=0)
    rows: int = Field(ge=1)
    range_share: float = Field(ge=0, le=1)
    margin: float = Field(ge=0)
    margin_source: Literal["chosen", "given"]
    estimate: RefusalEstimate


class RefusalReport(_Strict):
    """What the refusal policy does to the rows the bundle was exported with, and to rows it never saw.

    ``reference`` and ``holdout`` are in-sample shares; ``out_of_sample`` (absent in bundles exported
    before it) holds the estimate for new rows.
    """

    refuse_rate: float = Field(ge=0, le=1)
    reference: RuleShares
    holdout: RuleShares | None = None
    out_of_sample: OutOfSample | None = None


class FileEntry(_Strict):
    """One array: its checksum, its size in bytes (``.npy`` header included), dtype and 1-D or 2-D shape."""

    sha256: str = Field(pattern=r"^[0-9a-f]{64}$")
    bytes: int = Field(ge=0, le=MAX_ARRAY_BYTES)
    dtype: str
    shape: list[Annotated[int, Field(ge=0, le=MAX_ARRAY_BYTES // 8)]] = Field(min_length=1, max_length=2)


class GoldenVectors(_Strict):
    """Probe rows (raw units) and what scikit-learn answered for them at export."""

    inputs: list[list[float]] = Field(max_length=MAX_GOLDEN_ROWS)
    labels: list[Label]
    decisions: list[float] | list[list[float]]
    pairwise_decisions: list[list[float]] | None = None
    probabilities: list[list[float]] | None = None


class Manifest(_Strict):
    format: Literal["rbfgate-bundle/1", "rbfgate-bundle/2"]
    name: str
    version: str
    created: str = Field(pattern=_RFC3339_UTC)
    creator: str
    features: list[FeatureSpec]
    scaler: ScalerSpec
    kernel: KernelSpec
    classifier: ClassifierSpec
    calibration: Calibration
    training: dict[str, Any]
    reference_distance: dict[str, Any]
    golden: GoldenVectors
    files: dict[str, FileEntry]
    domain: DomainSpec | None = None
    refusal_report: RefusalReport | None = None

    @model_validator(mode="after")
    def _consistent(self) -> "Manifest":
        check_name(self.name, what="model name")
        if self.format == "rbfgate-bundle/1" and (self.domain is not None or self.refusal_report is not None):
            raise ValueError("format rbfgate-bundle/1 has no domain model or refusal report; use rbfgate-bundle/2")
        check_name(self.version, what="model version")
        n_features = len(self.features)
        if len(self.scaler.center) != n_features or len(self.scaler.scale) != n_features:
            raise ValueError(f"scaler has {len(self.scaler.center)} centers for {n_features} features")
        n_classes = len(self.classifier.classes)
        if n_classes < 2:
            raise ValueError("a classifier needs at least two classes")
        if len(self.classifier.support_per_class) != n_classes:
            raise ValueError("support_per_class must have one count per class")
        if len(self.classifier.intercepts) != n_classes * (n_classes - 1) // 2:
            raise ValueError("intercepts must have one value per pair of classes")
        names = [feature.name for feature in self.features]
        if len(set(names)) != len(names):
            raise ValueError("feature names must be unique")
        if min(self.classifier.support_per_class) < 0 or sum(self.classifier.support_per_class) < 1:
            raise ValueError("support_per_class must be non-negative counts with at least one support vector")
        # scikit-learn fits one calibrator for two classes, else one per class.
        expected_maps = 1 if n_classes == 2 else n_classes
        if self.calibration.method in ("sigmoid", "isotonic") and self.calibration.maps != expected_maps:
            raise ValueError(
                f"{self.calibration.method} calibration has {self.calibration.maps} maps, expected {expected_maps}"
            )
        self._check_golden(n_features, n_classes)
        return self

    def _check_golden(self, n_features: int, n_classes: int) -> None:
        golden = self.golden
        rows = len(golden.inputs)
        if rows == 0 or any(len(row) != n_features for row in golden.inputs):
            raise ValueError(f"golden.inputs must be one or more rows of {n_features} values")
        decision_width = None if n_classes == 2 else n_classes
        pairwise_width = n_classes * (n_classes - 1) // 2
        shapes = {
            "labels": (golden.labels, None),
            "decisions": (golden.decisions, decision_width),
            "pairwise_decisions": (golden.pairwise_decisions, pairwise_width),
            "probabilities": (golden.probabilities, n_classes),
        }
        for field_name, (values, width) in shapes.items():
            if values is None:
                continue
            if len(values) != rows or any(_width(value) != width for value in values):
                raise ValueError(f"golden.{field_name} must have {rows} rows of width {width or 1}")
        if n_classes == 2 and golden.pairwise_decisions is not None:
            raise ValueError("golden.pairwise_decisions is for more than two classes only")
        if (golden.probabilities is not None) != self.is_calibrated:
            raise ValueError("golden.probabilities must be present exactly when the bundle is calibrated")
        classes = self.classifier.classes
        for label in golden.labels:
            if label not in classes or type(label) is not type(classes[0]):
                raise ValueError(f"golden label {label!r} is not one of the classes {classes}")

    @property
    def feature_names(self) -> list[str]:
        return [feature.name for feature in self.features]

    @property
    def n_classes(self) -> int:
        return len(self.classifier.classes)

    @property
    def is_calibrated(self) -> bool:
        return self.calibration.method != "none"


def _width(value: Any) -> int | None:
    return len(value) if isinstance(value, list) else None


def parse_manifest(document: Any, *, source: str = MANIFEST_FILE) -> Manifest:
    """Validate a parsed manifest document strictly; raise ``BundleFormatError`` naming the field.

    Strict JSON validation: a number must be a JSON number (the string "NaN" or
    "1" is refused), finite, and every field of the right type.
    """
    try:
        return Manifest.model_validate_json(json.dumps(document, allow_nan=False), strict=True)
    except ValueError as exc:  # pydantic's ValidationError, or NaN that json.dumps refuses
        if not isinstance(exc, ValidationError):
            raise BundleFormatError(f"{source}: holds NaN or an infinite number; JSON numbers must be finite") from exc
        first = exc.errors()[0]
        where = ".".join(str(part) for part in first["loc"]) or "(top level)"
        raise BundleFormatError(
            f"{source}: field {where}: {first['msg']} ({exc.error_count()} problem(s)); "
            "re-export the bundle with this version of rbfgate"
        ) from exc


def parse_manifest_bytes(data: bytes, *, source: str = MANIFEST_FILE) -> tuple[dict[str, Any], Manifest]:
    """Parse manifest bytes once: the raw document (for the digest) and the validated model.

    Strict JSON (``model_store.strict_json``): a duplicate member name at any depth, NaN,
    an overflowing number, an unpaired surrogate or nesting past ``MAX_MANIFEST_DEPTH`` is refused,
    so two readers can never see two different manifests under one digest.
    """
    if len(data) > MAX_MANIFEST_BYTES:
        raise BundleFormatError(
            f"{source}: {len(data)} bytes, over the {MAX_MANIFEST_BYTES}-byte manifest limit; this is not a bundle manifest"
        )
    try:
        document = loads_strict(data.decode("utf-8"), max_depth=MAX_MANIFEST_DEPTH)
    except UnicodeDecodeError as exc:
        raise BundleFormatError(f"{source}: not UTF-8 (byte {exc.start}); a manifest is UTF-8 JSON") from exc
    except StrictJsonError as exc:
        raise BundleFormatError(f"{source}: {exc}; re-export the bundle") from exc
    except ValueError as exc:  # an integer literal past Python's digit limit
        raise BundleFormatError(f"{source}: not valid JSON: {exc}") from exc
    if not isinstance(document, dict):
        raise BundleFormatError(f"{source}: expected a JSON object at the top level")
    return document, parse_manifest(document, source=source)


def read_manifest(path: Path) -> tuple[dict[str, Any], Manifest]:
    """Read and validate ``path``; return the raw document (for the digest) and the model."""
    try:
        data = read_bounded(Path(path), MAX_MANIFEST_BYTES, what="a manifest may hold at most")
    except FileNotFoundError as exc:
        raise BundleFormatError(f"{path}: no manifest; a bundle directory holds {MANIFEST_FILE}") from exc
    except OSError as exc:
        raise BundleFormatError(f"{path}: cannot read the manifest: {exc.strerror}") from exc
    return parse_manifest_bytes(data, source=str(path))


def read_bounded(path: Path, limit: int, *, what: str) -> bytes:
    """The bytes of ``path``, refused before reading when the open file is larger than ``limit``.

    ``what`` completes the message "<path>: <size> bytes, <what> <limit>", e.g. "the manifest says".
    The size comes from ``fstat`` of the open handle, so the file that is measured is the one read.
    Raises ``BundleFormatError`` for a file that is too large, ``OSError`` as the caller handles it.
    """
    with open(path, "rb") as handle:
        size = os.fstat(handle.fileno()).st_size
        data = handle.read(limit + 1) if size <= limit else b""
    if size > limit or len(data) > limit:  # the second: the file grew while it was read
        raise BundleFormatError(
            f"{path}: {max(size, len(data))} bytes, {what} {limit}; the bundle is damaged or forged, re-export it"
        )
    return data
