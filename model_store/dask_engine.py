"""File scoring on a Dask cluster (``rbfgate score --engine dask``): one task per input part.

Needs the ``batch`` extra (``pip install 'rbfgate[batch]'``); nothing else in
rbfgate imports this module, so the core and the serving image stay free of
Dask. How a run goes:

1. Connect to ``--scheduler ADDRESS``, or start a ``LocalCluster`` with one
   single-threaded worker process per core (``--workers N``).
2. Register a worker plugin holding the bundle's bytes: every worker, and every
   worker that joins later (a restarted one), pins BLAS to one thread, loads the
   bundle from the bytes and verifies it (checksums, digest, golden vectors)
   before it scores any partition.
3. Row numbers: Parquet parts give their row counts in their footers; CSV parts
   are counted first, by tasks that read them without scoring.
4. One task per part reads it, scores it chunk by chunk and writes its output
   part (Parquet, or headerless CSV) under a hidden name in the staging
   directory, renamed when complete. A task that fails, or whose worker dies,
   is run again by Dask (``--retries``); input errors are reported, not retried.
5. When every part is done the staged output is moved into place (a CSV output
   is joined from its parts); on any failure it is removed and nothing appears.

Paths are opened by the workers, so on a cluster of several machines the input
and the output's folder must be at the same path on every worker (a shared volume).
"""

from __future__ import annotations

import logging
import os
import uuid
from collections.abc import Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import pyarrow as pa
from tqdm import tqdm

from model_store.batch_inputs import InputPart, check_part, count_rows, discover_parts, kept_types, open_part
from model_store.batch_outputs import OutputTarget, PartWriter, csv_header, identity, part_name
from model_store.batch_scoring import ScoreSummary, check_keep, summary_document
from model_store.bundle import Bundle
from model_store.bundle_transport import bundle_bytes, verified_bundle
from model_store.chunk_scoring import output_schema, score_chunk
from model_store.domain_policy import DEFAULT_OUTSIDE_ACTION
from model_store.errors import InputError, RbfgateError, TableError
from model_store.result_columns import result_columns

try:
    from distributed import Client, LocalCluster, WorkerPlugin, as_completed, get_worker
except ImportError as exc:  # pragma: no cover - exercised only without the extra
    raise InputError("--engine dask needs Dask; install the batch extra: pip install 'rbfgate[batch]'") from exc

__all__ = ["BundlePlugin", "DaskRun", "score_with_dask"]

_CONNECT_SECONDS = 30


@dataclass(frozen=True)
class DaskRun:
    """How to run: an existing scheduler, or a local cluster of ``workers`` processes; ``retries`` per part."""

    scheduler: str | None = None
    workers: int | None = None
    retries: int = 2


class BundlePlugin(WorkerPlugin):
    """Verifies the bundle on each worker, once, before the worker scores anything."""

    def __init__(self, data: bytes, digest: str):
        self.data = data
        self.digest = digest
        self.name = plugin_name(digest)

    def setup(self, worker=None) -> None:
        from threadpoolctl import threadpool_limits

        # A worker runs one task per thread and the cluster one worker per core: more BLAS
        # threads would only compete for the same cores. Kept for the worker's lifetime.
        self._limits = threadpool_limits(limits=1)
        verified_bundle(self.data, self.digest, source=f"bundle {self.digest[:16]}... on worker {os.getpid()}")


def plugin_name(digest: str) -> str:
    return f"rbfgate-bundle-{digest[:16]}"


@dataclass(frozen=True)
class _PartTask:
    part: InputPart
    index: int
    first_row: int
    digest: str
    keep: tuple[str, ...]
    kept: tuple[pa.Field, ...]
    staging: str
    output_format: str
    metadata: dict
    outside_action: str


def score_with_dask(bundle: Bundle, source: Path, out: Path, *, keep: Sequence[str] = (), origin: str | None = None,
                    progress: bool | None = None, run: DaskRun = DaskRun(),
                    outside_action: str = DEFAULT_OUTSIDE_ACTION) -> ScoreSummary:
    """Score ``source`` into ``out`` on a Dask cluster; the same output as ``score_file``."""
    keep = check_keep(bundle, keep)
    parts = discover_parts(source)
    target = OutputTarget(out)
    first = open_part(parts[0])
    check_part(first, bundle.manifest.features, keep)
    kept = tuple(kept_types(first, keep))
    about = identity(bundle, source=origin or bundle.source)
    schema = output_schema(bundle, kept)
    data = bundle_bytes(bundle)
    with _client(run) as client:
        client.register_plugin(BundlePlugin(data, bundle.digest))
        offsets = _first_rows(client, parts, run.retries)
        staging = target.stage()
        token = uuid.uuid4().hex[:12]
        futures = []
        try:
            tasks = [_PartTask(part, index, offsets[index], bundle.digest, tuple(keep), kept, str(staging),
                               target.format, about, outside_action) for index, part in enumerate(parts)]
            futures = [client.submit(_score_part, task, key=f"rbfgate-score-{task.index:05d}-{token}",
                                     retries=run.retries, pure=False) for task in tasks]
            done = _gather(futures, len(parts), progress)
            summary = ScoreSummary(sum(s for s, _ in done), sum(r for _, r in done), len(parts))
            csv_parts = None
            if target.format == "csv":
                csv_parts = [csv_header(schema, staging / "header.csv"),
                             *(staging / part_name(index, "csv") for index in range(len(parts)))]
            target.commit(csv_parts, summary_document(about, source, summary, schema, engine="dask"))
        except BaseException:
            if futures:
                client.cancel(futures)
            target.abort()
            raise
    return summary


@contextmanager
def _client(run: DaskRun):
    if run.scheduler is not None:
        try:
            client = Client(run.scheduler, timeout=_CONNECT_SECONDS)
        except (OSError, TimeoutError) as exc:
            raise InputError(f"--scheduler {run.scheduler}: cannot reach a Dask scheduler there ({exc}); check the "
                             "address (tcp://host:8786) and that the cluster is up") from exc
        try:
            yield client
        finally:
            client.close()
        return
    cluster = LocalCluster(n_workers=run.workers or os.cpu_count() or 1, threads_per_worker=1, processes=True,
                           dashboard_address=":0", silence_logs=logging.CRITICAL)
    try:
        with Client(cluster) as client:
            yield client
    finally:
        cluster.close()


def _first_rows(client, parts: list[InputPart], retries: int) -> list[int]:
    """The row number each part starts at: footers for Parquet, a counting pass for CSV parts after the first."""
    counts = [None] * len(parts)
    for index, part in enumerate(parts):
        if part.format == "parquet" or index == len(parts) - 1:
            counts[index] = open_part(part).num_rows if part.format == "parquet" else 0
    pending = [index for index, count in enumerate(counts) if count is None]
    if pending:
        futures = client.map(_count_part, [parts[index] for index in pending], retries=retries, pure=False,
                             key=[f"rbfgate-count-{index:05d}-{uuid.uuid4().hex[:12]}" for index in pending])
        for index, result in zip(pending, client.gather(futures)):
            counts[index] = _unwrap(result)
    firsts, next_row = [], 1
    for count in counts:
        firsts.append(next_row)
        next_row += count
    return firsts


def _gather(futures, total: int, progress: bool | None) -> list[tuple[int, int]]:
    results = []
    with tqdm(total=total, unit="parts", desc="scoring", disable=None if progress is None else not progress) as bar:
        for future in as_completed(futures):
            results.append(_unwrap(future.result()))
            bar.update(1)
    return results


def _unwrap(result):
    """Task results are values or the RbfgateError the task met (returned, so that Dask does not retry it)."""
    if isinstance(result, RbfgateError):
        raise result
    return result


def _worker_bundle(digest: str) -> Bundle:
    plugin = get_worker().plugins.get(plugin_name(digest))
    if plugin is None:
        raise RuntimeError(f"worker {os.getpid()} has no verified bundle {digest[:16]}...; it was not set up")
    return verified_bundle(plugin.data, plugin.digest)


def _count_part(part: InputPart):
    try:
        return count_rows(open_part(part))
    except RbfgateError as exc:
        return exc


def _score_part(task: _PartTask):
    """Score one part into its output part; returns (scored, refused) or the input error met."""
    try:
        bundle = _worker_bundle(task.digest)
        reader = open_part(task.part)
        check_part(reader, bundle.manifest.features, task.keep)
        for expected, found in zip(task.kept, kept_types(reader, task.keep)):
            if expected.type != found.type:
                raise TableError(str(task.part.path), f"has type {found.type}, but {expected.type} in the first "
                                 "part; every part must have the same schema", column=expected.name)
        schema = output_schema(bundle, list(task.kept))
        columns = result_columns(bundle)
        needed = list(dict.fromkeys([*bundle.feature_names, *task.keep]))
        path = Path(task.staging) / part_name(task.index, task.output_format)
        writer = PartWriter(path, schema, task.output_format, header=False, metadata=task.metadata)
        scored = refused = 0
        try:
            for chunk in reader.chunks(needed, first_row=task.first_row):
                result = score_chunk(bundle, columns, chunk, task.keep, schema, task.outside_action)
                writer.write(result.table)
                scored, refused = scored + result.scored, refused + result.refused
            writer.commit()
        except BaseException:
            writer.abort()
            raise
        return scored, refused
    except RbfgateError as exc:
        return exc
