"""Score a CSV file with a bundle, streaming, one output row per input row.

Rows are read and scored in chunks, so a file larger than memory works. Blank
lines carry no record and are skipped; the ``row`` column counts data rows. Rows
with a missing, empty, non-numeric, NaN, infinite or out-of-range feature are
refused (never scored) and the rest are scored; a scored row whose domain verdict
is ``outside`` is refused as ``outside_domain`` (its domain columns filled in)
unless ``outside_action`` is ``flag``. The output is written to a
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
from model_store.domain_policy import DEFAULT_OUTSIDE_ACTION, apply_outside_policy, domain_answer
from model_store.errors import CsvError, InputError
from model_store.refusal import Problem, check_records, from_text
from model_store.scoring import Scores
from model_store.tables import CsvFile, CsvRow

__all__ = ["CHUNK_ROWS", "DOMAIN_COLUMNS", "ScoreSummary", "output_columns", "score_csv"]

CHUNK_ROWS = 4096
DOMAIN_COLUMNS = ("domain_verdict", "domain_score")


@dataclass(frozen=True)
class ScoreSummary:
    scored: int
    refused: int


def output_columns(bundle: Bundle) -> list[str]:
    """The output header: row, status, label, decision column(s), probabilities, diagnostics, domain, problems.

    The one place the columns are defined; ``_scored_fields`` fills them in this order.
    """
    classes = [str(label) for label in bundle.classes]
    if len(classes) == 2:
        decision = ["decision"]
    else:
        decision = [f"decision[{label}]" for label in classes]
    probability = [f"probability[{label}]" for label in classes] if bundle.manifest.is_calibrated else []
    diagnostics = ["nearest_distance", "nearest_similarity", "nearest_label", "nearest_percentile"]
    return ["row", "status", "label", *decision, *probability, *diagnostics, *DOMAIN_COLUMNS, "problems"]


def score_csv(bundle: Bundle, source: Path, out: Path, *, progress: bool | None = None,
              outside_action: str = DEFAULT_OUTSIDE_ACTION) -> ScoreSummary:
    """Score every row of ``source`` into ``out``; refused rows get status ``refused`` and their problems.

    Without a domain model (format 1 bundles) the domain columns stay empty.
    """
    out = Path(out)
    with CsvFile(source) as rows:
        missing = [name for name in bundle.feature_names if name not in rows.header]
        if missing:
            raise CsvError(
                str(source), f"feature column {missing[0]!r} not found; the bundle needs {bundle.feature_names}"
            )
        if out.is_dir():
            raise InputError(f"--out {out} is a directory; give the path of the CSV file to write")
        if not out.parent.is_dir():
            raise InputError(f"--out {out}: folder {out.parent} does not exist; create it first")
        columns = output_columns(bundle)
        descriptor, temporary = tempfile.mkstemp(prefix=f".{out.name}.", dir=out.parent)
        try:
            # mkstemp creates the file private; give the result the usual permissions.
            os.fchmod(descriptor, 0o666 & ~_umask())
            with os.fdopen(descriptor, "w", newline="", encoding="utf-8") as sink:
                writer = csv.writer(sink)
                writer.writerow(columns)
                summary = _stream(bundle, rows, writer, len(columns), progress, outside_action)
            os.replace(temporary, out)
        except BaseException:
            Path(temporary).unlink(missing_ok=True)
            raise
    return summary


def _umask() -> int:
    current = os.umask(0)
    os.umask(current)
    return current


def _stream(bundle: Bundle, rows: CsvFile, writer, width: int, progress: bool | None, action: str) -> ScoreSummary:
    scored = refused = 0
    bar = tqdm(unit="rows", desc="scoring", disable=None if progress is None else not progress)
    chunk: list[CsvRow] = []
    for row in rows:
        chunk.append(row)
        if len(chunk) == CHUNK_ROWS:
            ok = _score_chunk(bundle, rows.header, chunk, writer, width, action)
            scored, refused = scored + ok, refused + len(chunk) - ok
            bar.update(len(chunk))
            chunk = []
    if chunk:
        ok = _score_chunk(bundle, rows.header, chunk, writer, width, action)
        scored, refused = scored + ok, refused + len(chunk) - ok
        bar.update(len(chunk))
    bar.close()
    return ScoreSummary(scored, refused)


def _score_chunk(bundle: Bundle, header: list[str], chunk: list[CsvRow], writer, width: int, action: str) -> int:
    """Write one output row per input row; return how many were scored."""
    records = []
    malformed: dict[int, list[Problem]] = {}
    for index, row in enumerate(chunk):
        if len(row.fields) > len(header):
            malformed[index] = [Problem("(row)", len(row.fields), "malformed_row", None)]
        records.append(dict(zip(header, row.fields)))
    batch = check_records(bundle.manifest.features, records, from_text, allow_extra=True)
    keep = [position for position, index in enumerate(batch.accepted.tolist()) if index not in malformed]
    batch.accepted, batch.values = batch.accepted[keep], batch.values[keep]
    scores = bundle.scorer.score(batch.values) if keep else None
    outside = apply_outside_policy(batch, scores, action)
    problems = {**batch.problems, **malformed}
    position_of = {int(index): slot for slot, index in enumerate(batch.accepted.tolist())}
    empty = [""] * (width - 3 - len(DOMAIN_COLUMNS))
    for index, row in enumerate(chunk):
        slot = position_of.get(index)
        if slot is not None and not outside[slot]:
            writer.writerow([row.number, "scored", *_scored_fields(scores, slot)])
            continue
        described = "; ".join(problem.describe() for problem in problems[index])
        domain = [] if slot is None else _domain_fields(scores, slot)
        writer.writerow([row.number, "refused", *empty, *(domain or ["", ""]), described])
    return len(position_of) - int(outside.sum())


def _scored_fields(scores: Scores, at: int) -> list:
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
            *(_domain_fields(scores, at) or ["", ""]),
            "",
        ]
    )
    return fields


def _domain_fields(scores: Scores, at: int) -> list:
    answer = domain_answer(scores, at)
    return [] if answer is None else [answer["verdict"], answer["score"]]
