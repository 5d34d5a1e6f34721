"""Loading, verifying and writing bundles.

A bundle is a directory (or its single-file tar form) holding
``manifest.json`` and the ``.npy`` arrays it lists:

    support_vectors.npy      (n_sv, f) float64, support vectors in scaled space
    dual_coef.npy            (k - 1, n_sv) float64, scikit-learn's dual_coef_
    reference_quantiles.npy  (q,) float64, quantiles of the reference nearest distance
    domain_support_vectors.npy  (n_d, f) float64, the domain model's support vectors (format 2)
    domain_alpha.npy         (n_d,) float64, their one-class SVM coefficients (format 2)
    domain_whitening.npy     (f, f) float64, the map from scaled rows to the domain model's space
                             (format 2 bundles whose domain ``space`` is ``whitened``)

Each file is read once, its SHA-256 checked against the manifest, and parsed
from the same bytes with ``allow_pickle=False``, so what was verified is what
is used and nothing in a bundle is ever unpickled or executed.
"""

from __future__ import annotations

import io
import json
import math
import os
import shutil
import tempfile
from pathlib import Path
from typing import Any

import numpy as np

from model_store.archive import is_archive, read_archive
from model_store.calibration import Calibrator
from model_store.columns import feature_matrix
from model_store.domain import DomainModel
from model_store.digest import canonical_json, sha256_bytes
from model_store.errors import BundleFormatError, GoldenMismatchError, InputError, IntegrityError, NotFoundError
from model_store.manifest import (
    MANIFEST_FILE,
    MAX_MANIFEST_BYTES,
    Manifest,
    parse_manifest,
    parse_manifest_bytes,
    read_bounded,
)
from model_store.scoring import Scorer, Scores

__all__ = ["GOLDEN_TOLERANCE", "Bundle", "load_bundle", "load_bundle_bytes", "write_bundle"]

# |ours - reference| <= GOLDEN_TOLERANCE * max(1, |reference|): relative for large
# values, absolute near zero where a decision is a difference of O(1) kernel sums.
GOLDEN_TOLERANCE = 1e-9

_ARRAYS = ("support_vectors.npy", "dual_coef.npy", "reference_quantiles.npy")
_DOMAIN_ARRAYS = ("domain_alpha.npy", "domain_support_vectors.npy")
_WHITENING_ARRAY = "domain_whitening.npy"
_NPY_MAGIC = b"\x93NUMPY"


class Bundle:
    """A verified bundle, ready to score. Build it with ``load_bundle``."""

    def __init__(self, document: dict[str, Any], manifest: Manifest, arrays: dict[str, np.ndarray], source: str):
        self.document = document
        self.manifest = manifest
        self.source = source
        canonical = canonical_json(document)
        self.digest = sha256_bytes(canonical)
        self._scorer = _build_scorer(manifest, arrays, source)
        self._resident_bytes = self._scorer.resident_bytes + 4 * len(canonical)
        # Listed once: score() needs the names for every call, the manifest builds a new list each time.
        self._feature_names = manifest.feature_names

    @property
    def name(self) -> str:
        return self.manifest.name

    @property
    def version(self) -> str:
        return self.manifest.version

    @property
    def feature_names(self) -> list[str]:
        return list(self._feature_names)  # a copy: the manifest's names, listed once at load

    @property
    def classes(self) -> list:
        return list(self.manifest.classifier.classes)

    @property
    def support_vectors(self) -> np.ndarray:
        """(n_sv, f) support vectors in scaled space (read-only view)."""
        view = self._scorer.support_vectors.view()
        view.flags.writeable = False
        return view

    @property
    def scorer(self) -> Scorer:
        return self._scorer

    @property
    def resident_bytes(self) -> int:
        """Memory held by this loaded bundle, in bytes: its scorer's arrays (which dominate) plus
        the manifest's canonical size (its parsed form costs a few times that in Python objects)."""
        return self._resident_bytes

    def score(self, X) -> Scores:
        """Score ``X``: n rows of f finite values in raw units.

        A DataFrame, a mapping of feature name -> 1-D array or a structured array is matched
        by feature name (unused columns ignored); a plain (n, f) array or list of rows must be
        in ``feature_names`` order (``model_store.columns``).
        """
        raw = feature_matrix(X, self._feature_names)
        if raw.ndim != 2 or raw.shape[1] != self._scorer.n_features:
            raise InputError(
                f"expected a 2-D array of shape (n, {self._scorer.n_features}) in the order "
                f"{self.feature_names}; got shape {raw.shape}"
            )
        if not np.isfinite(raw).all():
            row, column = np.argwhere(~np.isfinite(raw))[0]
            raise InputError(
                f"row {row}, feature {self.feature_names[column]!r}: {raw[row, column]} is not finite; "
                "refuse such rows before scoring"
            )
        return self._scorer.score(raw)

    def self_test(self) -> None:
        """Score the golden vectors and compare with what scikit-learn answered at export."""
        golden = self.manifest.golden
        scores = self._scorer.score(np.asarray(golden.inputs, dtype=np.float64).reshape(-1, self._scorer.n_features))
        for row, (got, want) in enumerate(zip(scores.labels.tolist(), golden.labels)):
            if got != want:
                raise GoldenMismatchError(
                    f"{self.source}: golden vector {row}: label {got!r}, expected {want!r}; "
                    "the bundle does not reproduce the exported model"
                )
        _compare(self.source, "decision", scores.decision, golden.decisions)
        if golden.pairwise_decisions is not None:
            _compare(self.source, "pairwise decision", scores.pairwise_decision, golden.pairwise_decisions)
        if golden.probabilities is not None:
            _compare(self.source, "probability", scores.probabilities, golden.probabilities)


def load_bundle(path: str | os.PathLike) -> Bundle:
    """Load a bundle directory or archive, checking every file's SHA-256 against the manifest."""
    path = Path(path)
    if not path.exists():
        raise NotFoundError(f"{path}: no such bundle; pass a bundle directory or its .tar file")
    return _load(path, read_archive(path) if is_archive(path) else None)


def load_bundle_bytes(data: bytes, source: str) -> Bundle:
    """A bundle from its single-file form held in memory (what a Dask worker receives), checked
    exactly as ``load_bundle`` checks a file; ``source`` names it in messages."""
    return _load(Path(source), read_archive(Path(source), data=data))


def _load(path: Path, contents: dict[str, bytes] | None) -> Bundle:
    source = str(path / MANIFEST_FILE)
    if contents is not None:
        manifest_bytes = contents[MANIFEST_FILE]
    else:
        manifest_bytes = _read(path / MANIFEST_FILE, path, MAX_MANIFEST_BYTES, "a manifest may hold at most")
    document, manifest = parse_manifest_bytes(manifest_bytes, source=source)
    expected_files = sorted(_ARRAYS + _domain_arrays(manifest))
    if sorted(manifest.files) != expected_files:
        raise BundleFormatError(f"{source}: field files: must list exactly the files {expected_files}")
    if contents is not None:
        files = {name: contents.get(name) for name in manifest.files}
    else:
        # The manifest says how large each array is; a larger file is refused before it is read.
        files = {
            name: _read(path / name, path, entry.bytes, "the manifest says")
            for name, entry in manifest.files.items()
        }
    arrays = {}
    for name, entry in manifest.files.items():
        data = files[name]
        if data is None:
            raise IntegrityError(f"{path}: {name} is listed in the manifest but missing; the bundle is incomplete")
        actual = sha256_bytes(data)
        if actual != entry.sha256:
            raise IntegrityError(
                f"{path}/{name}: SHA-256 is {actual}, the manifest says {entry.sha256}; "
                "the file was altered or damaged, re-export or re-publish the bundle"
            )
        if len(data) != entry.bytes:
            raise BundleFormatError(
                f"{path}/{name}: {len(data)} bytes, the manifest says {entry.bytes}; re-export the bundle"
            )
        arrays[name] = _parse_array(data, name, entry, path)
    return Bundle(document, manifest, arrays, str(path))


def write_bundle(out_dir: Path, document: dict[str, Any], arrays: dict[str, np.ndarray]) -> Path:
    """Write arrays and the manifest (``files`` filled in here) to ``out_dir`` atomically.

    The bundle is assembled in a temporary sibling directory and renamed into
    place, so ``out_dir`` either holds a complete bundle or does not exist.
    """
    out_dir = Path(out_dir)
    if out_dir.exists():
        raise InputError(f"{out_dir}: already exists; choose a new --out directory or remove it first")
    out_dir.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.", dir=out_dir.parent))
    try:
        entries = {}
        for name, array in sorted(arrays.items()):
            buffer = io.BytesIO()
            np.save(buffer, np.ascontiguousarray(array, dtype=np.float64), allow_pickle=False)
            data = buffer.getvalue()
            (staging / name).write_bytes(data)
            entries[name] = {"sha256": sha256_bytes(data), "bytes": len(data), "dtype": "<f8", "shape": list(array.shape)}
        complete = {**document, "files": entries}
        parse_manifest(complete, source="exported manifest")
        text = json.dumps(complete, indent=2, sort_keys=True, ensure_ascii=False, allow_nan=False)
        (staging / MANIFEST_FILE).write_text(text + "\n", encoding="utf-8")
        os.rename(staging, out_dir)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise
    return out_dir


def _read(file: Path, bundle: Path, limit: int, what: str) -> bytes | None:
    try:
        return read_bounded(file, limit, what=what)
    except FileNotFoundError:
        if file.name == MANIFEST_FILE:
            raise BundleFormatError(f"{bundle}: no {MANIFEST_FILE}; this is not a bundle directory") from None
        return None
    except OSError as exc:
        raise BundleFormatError(f"{file}: cannot read: {exc.strerror}") from exc


_NPY_HEADER_READERS = {(1, 0): np.lib.format.read_array_header_1_0, (2, 0): np.lib.format.read_array_header_2_0}


def _parse_array(data: bytes, name: str, entry, path: Path) -> np.ndarray:
    """Parse .npy bytes after checking the header against the manifest, so a forged header
    cannot make numpy allocate more than the file holds."""
    # np.load would open zip bytes as an .npz archive; only the .npy format is part of a bundle.
    if not data.startswith(_NPY_MAGIC):
        raise BundleFormatError(f"{path}/{name}: not a .npy file (it does not start with the .npy magic string)")
    stream = io.BytesIO(data)
    try:
        read_header = _NPY_HEADER_READERS.get(np.lib.format.read_magic(stream))
        if read_header is None:
            raise ValueError("unsupported .npy format version")
        shape, fortran_order, dtype = read_header(stream, max_header_size=10_000)
    # numpy evaluates the header text as a Python literal: a deeply nested one ends in RecursionError
    # or MemoryError inside the parser; either way it is a damaged header, not our failure.
    except (ValueError, EOFError, OSError, SyntaxError, TypeError, RecursionError, MemoryError) as exc:
        raise BundleFormatError(f"{path}/{name}: not a plain numeric .npy array: {str(exc)[:200]}") from exc
    if dtype != np.dtype("<f8") or fortran_order or list(shape) != entry.shape:
        raise BundleFormatError(
            f"{path}/{name}: expected little-endian float64 of shape {entry.shape} in C order, "
            f"got {dtype} of shape {list(shape)}{' in Fortran order' if fortran_order else ''}"
        )
    offset = stream.tell()
    # Python integers: a product of dimensions cannot wrap around as an int64 product would.
    promised = 8 * math.prod(shape)
    if len(data) - offset != promised:
        raise BundleFormatError(
            f"{path}/{name}: holds {len(data) - offset} data bytes, its header promises {promised} (shape {shape})"
        )
    array = np.frombuffer(data, dtype="<f8", offset=offset).reshape(shape)
    if not np.isfinite(array).all():
        raise BundleFormatError(f"{path}/{name}: holds NaN or infinite values")
    return array


def _build_scorer(manifest: Manifest, arrays: dict[str, np.ndarray], source: str) -> Scorer:
    classifier = manifest.classifier
    n_features = len(manifest.features)
    n_support = sum(classifier.support_per_class)
    support_vectors = arrays["support_vectors.npy"]
    dual_coef = arrays["dual_coef.npy"]
    quantiles = arrays["reference_quantiles.npy"]
    expected = {
        "support_vectors.npy": (n_support, n_features),
        "dual_coef.npy": (manifest.n_classes - 1, n_support),
    }
    for name, shape in expected.items():
        if arrays[name].shape != shape:
            raise BundleFormatError(f"{source}/{name}: expected shape {shape}, got {arrays[name].shape}")
    if quantiles.ndim != 1 or len(quantiles) < 2 or np.any(np.diff(quantiles) < 0):
        raise BundleFormatError(f"{source}/reference_quantiles.npy: expected at least 2 non-decreasing values")
    scale = np.asarray(manifest.scaler.scale)
    if np.any(scale == 0):
        raise BundleFormatError(f"{source}/{MANIFEST_FILE}: scaler.scale holds a zero; it must be nonzero")
    calibrator = Calibrator(manifest.calibration, manifest.n_classes) if manifest.is_calibrated else None
    return Scorer(
        domain=_build_domain(manifest, arrays, source),
        classes=list(classifier.classes),
        center=np.asarray(manifest.scaler.center),
        scale=scale,
        gamma=manifest.kernel.gamma,
        support_vectors=support_vectors,
        support_per_class=classifier.support_per_class,
        dual_coef=dual_coef,
        intercepts=np.asarray(classifier.intercepts),
        allowed_low=np.array([feature.allowed[0] for feature in manifest.features]),
        allowed_high=np.array([feature.allowed[1] for feature in manifest.features]),
        reference_quantiles=quantiles,
        calibrator=calibrator,
        break_ties=classifier.break_ties,
        calibrate_pairwise=classifier.decision_function_shape == "ovo" and manifest.n_classes > 2,
    )


def _domain_arrays(manifest: Manifest) -> tuple[str, ...]:
    if manifest.domain is None:
        return ()
    return _DOMAIN_ARRAYS + ((_WHITENING_ARRAY,) if manifest.domain.space == "whitened" else ())


def _build_domain(manifest: Manifest, arrays: dict[str, np.ndarray], source: str) -> DomainModel | None:
    spec = manifest.domain
    if spec is None:
        return None
    expected = {
        "domain_support_vectors.npy": (spec.support_vectors, len(manifest.features)),
        "domain_alpha.npy": (spec.support_vectors,),
    }
    if spec.space == "whitened":
        expected[_WHITENING_ARRAY] = (len(manifest.features), len(manifest.features))
    for name, shape in expected.items():
        if arrays[name].shape != shape:
            raise BundleFormatError(f"{source}/{name}: expected shape {shape}, got {arrays[name].shape}")
    return DomainModel(
        support_vectors=arrays["domain_support_vectors.npy"],
        alpha=arrays["domain_alpha.npy"],
        whitening=arrays.get(_WHITENING_ARRAY),
        intercept=spec.intercept,
        gamma=spec.gamma,
        unusual_below=spec.thresholds.unusual_below,
        outside_below=spec.thresholds.outside_below,
    )


def _compare(source: str, what: str, got: np.ndarray, want) -> None:
    want = np.asarray(want, dtype=np.float64)
    got = np.asarray(got, dtype=np.float64).reshape(want.shape)
    # Written as "not within" so that a NaN on either side counts as a mismatch.
    within = np.abs(got - want) <= GOLDEN_TOLERANCE * np.maximum(1.0, np.abs(want))
    if not within.all():
        index = np.unravel_index(np.argmin(within), within.shape)
        raise GoldenMismatchError(
            f"{source}: golden vector {index[0]}: {what} {float(got[index])!r}, expected {float(want[index])!r} "
            f"(tolerance {GOLDEN_TOLERANCE:g} x max(1, |expected|)); the bundle does not reproduce the exported model"
        )
