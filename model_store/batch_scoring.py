"""Score a CSV file with a bundle, streaming, one output row per input row.

Rows are read and scored in chunks, so a file larger than memory works. Rows
with a missing, empty, non-numeric, NaN, infinite or out-of-range feature are
refused (never scored) and the rest are scored. The output is written to a
temporary file beside the target and renamed into place at the end, so a
failed run never leaves a half-written output.
"""

from __future__ import annotations

import csv
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path

from tqdm import tqdm

from model_store.bundle import Bundle
from model_store.errors import CsvError
from model_store.refusal import Problem, check_records, from_text
from model_store.scoring import Scores
from model_store.tables import open_csv

__all__ = ["CHUNK_ROWS", "ScoreSummary", "output_columns", "score_csv"]

CHUNK_ROWS = 4096


@dataclass(frozen=True)
class ScoreSummary:
    scored: int
    refused: int


def output_columns(bundle: Bundle) -> list[str]:
    """The output header: row, status, label, decision column(s), probabilities, diagnostics, problems."""
    classes = [str(label) for label in bundle.classes]
    if len(classes) == 2:
        decision = ["decision"]
    else:
        decision = [f"decision[{label}]" for label in classes]
    probability = [f"probability[{label}]" for label in classes] if bundle.manifest.is_calibrated else []
    diagnostics = ["nearest_distance", "nearest_similarity", "nearest_label", "nearest_percentile"]
    return ["row", "status", "label", *decision, *probability, *diagnostics, "problems"]


def score_csv(bundle: Bundle, source: Path, out: Path, *, progress: bool | None = None) -> ScoreSummary:
    """Score every row of ``source`` into ``out``; refused rows get status ``refused`` and their problems."""
    header, rows, handle = open_csv(source)
    out = Path(out)
    missing = [name for name in bundle.feature_names if name not in header]
    try:
        if missing:
            raise CsvError(
                str(source), f"feature column {missing[0]!r} not found; the bundle needs {bundle.feature_names}"
            )
        columns = output_columns(bundle)
        descriptor, temporary = tempfile.mkstemp(prefix=f".{out.name}.", dir=out.parent if str(out.parent) else ".")
        try:
            with os.fdopen(descriptor, "w", newline="", encoding="utf-8") as sink:
                writer = csv.writer(sink)
                writer.writerow(columns)
                summary = _stream(bundle, header, rows, writer, progress)
            os.replace(temporary, out)
        except BaseException:
            Path(temporary).unlink(missing_ok=True)
            raise
    finally:
        handle.close()
    return summary


def _stream(bundle: Bundle, header: list[str], rows, writer, progress: bool | None) -> ScoreSummary:
    scored = refused = 0
    number = 0
    bar = tqdm(unit="rows", desc="scoring", disable=None if progress is None else not progress)
    chunk: list[list[str]] = []
    for fields in rows:
        chunk.append(fields)
        if len(chunk) == CHUNK_ROWS:
            ok, bad = _score_chunk(bundle, header, chunk, number, writer)
            scored, refused, number = scored + ok, refused + bad, number + len(chunk)
            bar.update(len(chunk))
            chunk = []
    if chunk:
        ok, bad = _score_chunk(bundle, header, chunk, number, writer)
        scored, refused = scored + ok, refused + bad
        bar.update(len(chunk))
    bar.close()
    return ScoreSummary(scored, refused)


def _score_chunk(bundle: Bundle, header: list[str], chunk: list[list[str]], first: int, writer) -> tuple[int, int]:
    records = []
    malformed: dict[int, list[Problem]] = {}
    for index, fields in enumerate(chunk):
        if len(fields) > len(header):
            malformed[index] = [Problem("(row)", len(fields), "malformed_row", None)]
        records.append(dict(zip(header, fields)))
    batch = check_records(bundle.manifest.features, records, from_text, allow_extra=True)
    problems = {**batch.problems, **malformed}
    keep = [position for position, index in enumerate(batch.accepted.tolist()) if index not in malformed]
    scores = bundle.scorer.score(batch.values[keep]) if keep else None
    position_of = {int(batch.accepted[position]): slot for slot, position in enumerate(keep)}
    width = len(output_columns(bundle))
    for index in range(len(chunk)):
        row_number = first + index + 1
        if index in position_of:
            writer.writerow([row_number, "scored", *_scored_fields(bundle, scores, position_of[index])])
        else:
            described = "; ".join(problem.describe() for problem in problems[index])
            writer.writerow([row_number, "refused", *([""] * (width - 3)), described])
    return len(position_of), len(chunk) - len(position_of)


def _scored_fields(bundle: Bundle, scores: Scores, at: int) -> list:
    decision = scores.decision[at]
    fields = [scores.labels[at], *(decision.tolist() if decision.ndim else [float(decision)])]
    if scores.probabilities is not None:
        fields.extend(scores.probabilities[at].tolist())
    fields.extend(
        [
            float(scores.nearest_distance[at]),
            float(scores.nearest_similarity[at]),
            scores.nearest_label[at],
            float(scores.nearest_percentile[at]),
            "",
        ]
    )
    return fields
