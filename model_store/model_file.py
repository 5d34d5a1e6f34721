"""Export a joblib model file: load it, find its features, and hand it to the exporter.

A joblib file is a pickle, and loading a pickle runs code: only export files
you trust. This is the one place rbfgate unpickles anything, and it happens at
export time on the operator's machine, never while serving.
"""

from __future__ import annotations

from pathlib import Path

from model_store.bundle import Bundle
from model_store.digest import sha256_file
from model_store.errors import CsvError, ModelFileError, NotFoundError
from model_store.estimator_parts import take_apart
from model_store.exporter import DEFAULT_MARGIN, DEFAULT_REFUSE_RATE, ExportRequest, export_bundle
from model_store.tables import read_table

__all__ = ["export_model_file", "load_model_file"]


def load_model_file(path: Path) -> object:
    """Unpickle a joblib file (trusted input only); any failure becomes ``ModelFileError``."""
    import joblib

    path = Path(path)
    if not path.is_file():
        raise NotFoundError(f"{path}: no such model file")
    try:
        return joblib.load(path)  # nosec B301 - export of a trusted, operator-supplied model file (documented)
    except Exception as exc:  # unpickling can fail with any exception type
        raise ModelFileError(
            f"{path}: not a readable joblib model file ({type(exc).__name__}: {exc}); "
            "save the fitted estimator with joblib.dump"
        ) from exc


def export_model_file(
    model_path: Path,
    reference_path: Path,
    *,
    name: str,
    version: str,
    out: Path,
    target: str | None = None,
    margin: float | None = DEFAULT_MARGIN,
    feature_info: dict[str, dict] | None = None,
    holdout_path: Path | None = None,
    refuse_rate: float = DEFAULT_REFUSE_RATE,
) -> Bundle:
    """Load ``model_path``, read the reference (and holdout) CSV in the model's feature order, export to ``out``."""
    parts = take_apart(load_model_file(model_path))
    table = read_table(reference_path, target=target, features=parts.feature_names)
    if table.values.shape[1] != parts.n_features:
        raise CsvError(
            str(reference_path),
            f"has {table.values.shape[1]} feature columns {table.features}, the model expects {parts.n_features}; "
            "pass --target to exclude the label column",
        )
    holdout = None
    if holdout_path is not None:
        holdout = read_table(holdout_path, target=target, features=table.features)
        if holdout.features != table.features:
            raise CsvError(str(holdout_path), f"has the feature columns {holdout.features}, the reference "
                           f"{table.features}; give the holdout the same columns")
    request = ExportRequest(
        parts=parts,
        features=table.features,
        reference=table.values,
        reference_labels=table.target,
        reference_file=str(reference_path),
        reference_sha256=sha256_file(reference_path),
        name=name,
        version=version,
        out=Path(out),
        margin=margin,
        feature_info=feature_info or {},
        holdout=None if holdout is None else holdout.values,
        holdout_labels=None if holdout is None else holdout.target,
        holdout_file=None if holdout_path is None else str(holdout_path),
        holdout_sha256=None if holdout_path is None else sha256_file(holdout_path),
        refuse_rate=refuse_rate,
    )
    return export_bundle(request)
