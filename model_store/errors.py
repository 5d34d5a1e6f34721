"""The one exception hierarchy of rbfgate.

Every error the project raises on purpose is a ``RbfgateError``. Each class
carries the CLI exit code it maps to; the HTTP status mapping lives in one
place in ``service/problems.py``.

    RbfgateError                      base; never raised directly
    ├── InputError              (2)   the caller gave something unusable
    │   ├── TableError          (2)   an input table (CSV file, Parquet part), naming file, row and column
    │   │   └── CsvError        (2)   a CSV file
    │   ├── ModelFileError      (2)   a model file rbfgate cannot export
    │   ├── InvalidNameError    (2)   a model name or version unsafe for a path
    │   ├── UnsafeArchiveError  (2)   a bundle archive with a dangerous entry
    │   └── BundleFormatError   (2)   a bundle whose manifest or arrays are malformed
    ├── NotFoundError           (2)   a bundle, model or version that does not exist
    ├── CheckFailedError        (1)   a check ran and said no
    │   ├── IntegrityError      (1)   a checksum does not match, naming the file
    │   ├── GoldenMismatchError (1)   the scorer disagrees with the golden vectors
    │   ├── SignatureError      (1)   a missing, untrusted or bad signature
    │   ├── VersionConflictError(1)   a published version exists with another digest
    │   ├── BreakingChangeError (1)   an activation would break callers and was not accepted
    │   └── HistoryError        (1)   the history trail fails verification
    └── StoreError              (2)   the store directory is unusable (missing, read-only, foreign)
        └── LockTimeoutError    (1)   another process held the store lock too long

Messages say what was expected, what was found, and what to do next.
"""

from __future__ import annotations

__all__ = [
    "BreakingChangeError",
    "BundleFormatError",
    "CheckFailedError",
    "CsvError",
    "GoldenMismatchError",
    "HistoryError",
    "InputError",
    "IntegrityError",
    "InvalidNameError",
    "LockTimeoutError",
    "ModelFileError",
    "NotFoundError",
    "RbfgateError",
    "SignatureError",
    "StoreError",
    "TableError",
    "UnsafeArchiveError",
    "VersionConflictError",
]


class RbfgateError(Exception):
    """Base of every rbfgate error; ``exit_code`` is what the CLI returns."""

    exit_code = 2


class InputError(RbfgateError):
    """The caller supplied input that cannot be used as given."""


class TableError(InputError):
    """An input table (a CSV file, a Parquet part) is unusable; the message names file, row and column."""

    def __init__(self, path: str, message: str, *, row: int | None = None, column: str | None = None):
        where = str(path)
        if row is not None:
            where += f", row {row}"
        if column is not None:
            where += f", column {column!r}"
        super().__init__(f"{where}: {message}")
        self.path = str(path)
        self.row = row
        self.column = column
        self._message = message

    def __reduce__(self):
        # Pickled when a Dask worker reports the error back to the client; the default
        # (class, args) form would call __init__ with the formatted text alone.
        return (_rebuild_table_error, (type(self), self.path, self._message, self.row, self.column))


class CsvError(TableError):
    """A CSV file is malformed; the message names file, row and column."""


def _rebuild_table_error(kind: type, path: str, message: str, row: int | None, column: str | None) -> TableError:
    return kind(path, message, row=row, column=column)


class ModelFileError(InputError):
    """A model file is not a fitted estimator rbfgate can export."""


class InvalidNameError(InputError):
    """A model name or version is not safe to use as a path component."""


class UnsafeArchiveError(InputError):
    """A bundle archive holds an entry that could escape or poison the target."""


class BundleFormatError(InputError):
    """A bundle's manifest or arrays do not follow the bundle format."""


class NotFoundError(RbfgateError):
    """A bundle, model or version does not exist."""


class CheckFailedError(RbfgateError):
    """A verification ran and refused."""

    exit_code = 1


class IntegrityError(CheckFailedError):
    """A file's SHA-256 does not match the manifest."""


class GoldenMismatchError(CheckFailedError):
    """The scorer's output differs from the golden vectors recorded at export."""


class SignatureError(CheckFailedError):
    """A signature is missing, from an untrusted key, or does not verify."""


class VersionConflictError(CheckFailedError):
    """A version with this name is already published with a different digest."""


class BreakingChangeError(CheckFailedError):
    """Activating a version would break callers of the active one; ``changes`` lists why (one line each),
    ``range_basis`` what narrowed ranges were judged on (``model_store.store.contract.range_basis``)."""

    changes: tuple[str, ...] = ()
    range_basis: str | None = None

    def __init__(self, message: str, changes: tuple[str, ...] = (), range_basis: str | None = None) -> None:
        super().__init__(message)
        self.changes = tuple(changes)
        self.range_basis = range_basis


class HistoryError(CheckFailedError):
    """The history trail fails its hash-chain verification."""


class StoreError(RbfgateError):
    """The store directory cannot be used (missing, read-only, foreign files)."""


class LockTimeoutError(StoreError):
    """Another process held the store lock for longer than the timeout."""

    exit_code = 1
