"""rbfgate's core: pickle-free bundles of fitted RBF-kernel classifiers.

    from model_store import load_bundle
    bundle = load_bundle("path/to/bundle")      # directory or .tar, checksums verified
    scores = bundle.score(X)                    # X: (n, f) raw units in feature order, or a DataFrame (by name)
    scores.labels, scores.decision, scores.probabilities, scores.nearest_distance

Importing this package never imports scikit-learn, joblib or the service.
"""

from model_store.bundle import GOLDEN_TOLERANCE, Bundle, load_bundle
from model_store.errors import (
    BundleFormatError,
    CheckFailedError,
    CsvError,
    GoldenMismatchError,
    HistoryError,
    InputError,
    IntegrityError,
    InvalidNameError,
    LockTimeoutError,
    ModelFileError,
    NotFoundError,
    RbfgateError,
    SignatureError,
    StoreError,
    TableError,
    UnsafeArchiveError,
    VersionConflictError,
)
from model_store.manifest import FORMAT, Manifest
from model_store.scoring import Scores

__version__ = "0.1.0"

__all__ = [
    "FORMAT",
    "GOLDEN_TOLERANCE",
    "Bundle",
    "BundleFormatError",
    "CheckFailedError",
    "CsvError",
    "GoldenMismatchError",
    "HistoryError",
    "InputError",
    "IntegrityError",
    "InvalidNameError",
    "LockTimeoutError",
    "Manifest",
    "ModelFileError",
    "NotFoundError",
    "RbfgateError",
    "Scores",
    "SignatureError",
    "StoreError",
    "TableError",
    "UnsafeArchiveError",
    "VersionConflictError",
    "load_bundle",
]
