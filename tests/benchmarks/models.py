"""Fitted benchmark models, cached as joblib files and bundles so that reruns are fast.

A model is StandardScaler + SVC(C=1e-3) fitted on standard-normal features
with random 0/1 labels: with so small a C nearly every row ends up a bounded
support vector, which is the quickest way to get tens of thousands of support
vectors from a real libsvm fit (measured here: 50,000 rows x 10 features fit
in about 110 s). Each cached model is the pipeline as joblib (what a team
would deploy with scikit-learn) and the bundle exported from it by rbfgate's
own exporter, which checks the bundle against scikit-learn before writing.

    cache/svc-<rows>x<features>/model.joblib
    cache/svc-<rows>x<features>/bundle/
    cache/svc-<rows>x<features>/reference.npy    (rows, features) the training rows
"""

from __future__ import annotations

import hashlib
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

__all__ = ["CachedModel", "cached_model", "prepare_cache_dir"]

_C = 1e-3


@dataclass(frozen=True)
class CachedModel:
    """One fitted pipeline and its bundle; ``fit_seconds`` is None when it came from the cache."""

    rows: int
    features: int
    n_support: int
    joblib_path: Path
    bundle_path: Path
    reference: np.ndarray
    fit_seconds: float | None

    @property
    def key(self) -> str:
        return f"svc-{self.rows}x{self.features}"


def prepare_cache_dir(cache: Path) -> Path:
    """Create ``cache`` with a .gitignore of its own, so fitted models are never committed."""
    cache.mkdir(parents=True, exist_ok=True)
    ignore = cache / ".gitignore"
    if not ignore.exists():
        ignore.write_text("# fitted benchmark models: large and rebuilt on demand\n*\n")
    return cache


def training_data(rows: int, features: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """(rows, features) standard-normal X and random 0/1 labels, from a fixed seed."""
    rng = np.random.default_rng([seed, rows, features])
    return rng.normal(size=(rows, features)), rng.integers(0, 2, size=rows)


def cached_model(cache: Path, rows: int, features: int, log=print) -> CachedModel:
    """Fit (or reuse) StandardScaler + SVC(C=1e-3) on ``rows`` x ``features`` and export its bundle."""
    import joblib

    folder = prepare_cache_dir(cache) / f"svc-{rows}x{features}"
    joblib_path, bundle_path, reference_path = folder / "model.joblib", folder / "bundle", folder / "reference.npy"
    fit_seconds = None
    if not (joblib_path.exists() and bundle_path.exists() and reference_path.exists()):
        fit_seconds = _fit_and_export(folder, rows, features, log)
    model = joblib.load(joblib_path)
    return CachedModel(
        rows=rows,
        features=features,
        n_support=int(model[-1].n_support_.sum()),
        joblib_path=joblib_path,
        bundle_path=bundle_path,
        reference=np.load(reference_path),
        fit_seconds=fit_seconds,
    )


def _fit_and_export(folder: Path, rows: int, features: int, log) -> float:
    import shutil

    import joblib
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVC

    from model_store.estimator_parts import take_apart
    from model_store.exporter import ExportRequest, export_bundle

    shutil.rmtree(folder, ignore_errors=True)
    staging = folder.with_name(folder.name + ".tmp")
    shutil.rmtree(staging, ignore_errors=True)
    staging.mkdir(parents=True)
    X, y = training_data(rows, features)
    log(f"  fitting StandardScaler + SVC(C={_C:g}) on {rows} x {features} (cached for later runs) ...")
    started = time.perf_counter()
    model = make_pipeline(StandardScaler(), SVC(C=_C)).fit(X, y)
    fit_seconds = time.perf_counter() - started
    log(f"  fitted in {fit_seconds:.1f} s, {int(model[-1].n_support_.sum())} support vectors; exporting the bundle")
    joblib.dump(model, staging / "model.joblib")
    np.save(staging / "reference.npy", X)
    export_bundle(ExportRequest(
        parts=take_apart(model),
        features=[f"x{index:02d}" for index in range(features)],
        reference=X,
        reference_labels=None,  # random labels: holdout metrics would mean nothing and cost a full predict
        reference_file="reference.npy",
        reference_sha256=hashlib.sha256(X.tobytes()).hexdigest(),
        name="bench",
        version=f"{rows}x{features}",
        out=staging / "bundle",
    ))
    staging.rename(folder)
    return fit_seconds
