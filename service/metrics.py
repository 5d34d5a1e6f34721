"""Prometheus metrics of one service (prometheus-client, text exposition format).

With one worker the metrics live in a registry owned by the app. With several
workers, ``rbfgate serve`` points ``PROMETHEUS_MULTIPROC_DIR`` at a fresh
temporary directory before the workers start; each worker then writes its
values to files there and ``/metrics`` on any worker aggregates all of them
(prometheus-client's multiprocess mode). Gauges use the ``livemax`` mode: a
version shows as active while any live worker serves it.

Requests are counted behind their answers: each one is noted (an append), and a writer thread
counts the notes together at most ``COUNT_SECONDS`` later (``service.write_behind``), one update
per series touched. ``/metrics`` and the traffic totals count this worker's notes first, so a
worker reports every request it has answered; another worker's last ``COUNT_SECONDS`` may be
missing from one scrape and appear in the next. A worker that stops normally counts its notes
before it goes.

Files in that directory that cannot be read (truncated by a full disk, damaged,
or put there by something else) are left out of ``/metrics`` and named once in
the log, so that one bad file never turns the whole answer into a 500: the
metrics of every readable file, the live workers' among them, are answered.

Label values come only from names the service has checked (model names and
versions from the store, feature names from the manifest, fixed outcomes and
route templates), never from raw request text, so a caller cannot inflate the
number of series.
"""

from __future__ import annotations

import glob
import json
import logging
import os
import struct
from collections import Counter as _Tally
from collections.abc import Iterable

import numpy as np
from prometheus_client import CONTENT_TYPE_LATEST, CollectorRegistry, Counter, Gauge, Histogram, generate_latest
from prometheus_client import multiprocess
from prometheus_client.mmap_dict import MmapedDict

from service.write_behind import WriteBehind

__all__ = ["COUNT_SECONDS", "DISTANCE_BUCKETS", "TRAFFIC_KEYS", "ServiceMetrics", "observe_many"]

_LATENCY_BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)
# Distances live in the scaled space, where one unit is about one training
# standard deviation for a standard scaler; doubling steps cover near and far.
DISTANCE_BUCKETS = (0.125, 0.25, 0.5, 1.0, 2.0, 4.0, 8.0, 16.0, 32.0, 64.0)
_PERCENTILE_BUCKETS = (10.0, 25.0, 50.0, 75.0, 90.0, 95.0, 99.0, 100.0)
TRAFFIC_KEYS = ("requests", "scored", "refused", "typical", "unusual", "outside")
_METHODS = frozenset({"GET", "POST", "PUT", "PATCH", "DELETE", "HEAD", "OPTIONS"})
_FILE_KINDS = frozenset({"counter", "gauge", "histogram", "summary"})  # prometheus-client's file name prefixes
_log = logging.getLogger("rbfgate.service")
# How late a request may be counted: /metrics on the same worker counts everything first; another
# worker's last 0.05 s of requests may be missing from one scrape (Prometheus scrapes every 15 s or so).
COUNT_SECONDS = 0.05
_REQUEST, _SCORING = "request", "scoring"


class ServiceMetrics:
    """All metrics of one app. ``multiprocess_dir`` switches on multiprocess mode."""

    def __init__(self, multiprocess_dir: str | None = None, flush_seconds: float = COUNT_SECONDS) -> None:
        self.multiprocess_dir = multiprocess_dir
        self._files = None if multiprocess_dir is None else _ReadableFiles(multiprocess_dir)
        self._registry = CollectorRegistry()
        registry = self._registry
        self.http_requests = Counter(
            "rbfgate_http_requests", "HTTP requests by route template, method and status.",
            ["route", "method", "status"], registry=registry,
        )
        self.latency = Histogram(
            "rbfgate_http_request_duration_seconds", "Time from request start to response end, by route template.",
            ["route"], buckets=_LATENCY_BUCKETS, registry=registry,
        )
        self.score_requests = Counter(
            "rbfgate_score_requests", "Scoring requests by model, version and outcome (scored, partial, refused).",
            ["model", "version", "outcome"], registry=registry,
        )
        self.records = Counter(
            "rbfgate_records", "Records by model, version and status (scored, refused).",
            ["model", "version", "status"], registry=registry,
        )
        self.refusals = Counter(
            "rbfgate_refusals", "Refusal problems by model, version, feature and reason.",
            ["model", "version", "feature", "reason"], registry=registry,
        )
        self.distance = Histogram(
            "rbfgate_nearest_support_distance", "Distance of scored records to the nearest support vector (scaled space).",
            ["model", "version"], buckets=DISTANCE_BUCKETS, registry=registry,
        )
        self.percentile = Histogram(
            "rbfgate_nearest_support_percentile",
            "Percentile of that distance among the bundle's reference rows (0-100); a drift signal.",
            ["model", "version"], buckets=_PERCENTILE_BUCKETS, registry=registry,
        )
        self.domain_verdicts = Counter(
            "rbfgate_domain_verdicts",
            "Domain verdicts (typical, unusual, outside) of the records that passed the range rules, by model "
            "and version; outside ones were refused unless the model only flags them.",
            ["model", "version", "verdict"], registry=registry,
        )
        self.active = Gauge(
            "rbfgate_active_version_info", "1 for the version each model is served with.",
            ["model", "version", "digest"], registry=registry, multiprocess_mode="livemax",
        )
        self.load_failing = Gauge(
            "rbfgate_load_failing", "1 while the store's active version of a model fails to load and an older one serves.",
            ["model", "version"], registry=registry, multiprocess_mode="livemax",
        )
        self.switches = Counter(
            "rbfgate_version_switches", "Version switches carried out by the workers.", ["model"], registry=registry,
        )
        self.load_failures = Counter(
            "rbfgate_load_failures", "Bundles that failed their checks when a worker tried to load them.",
            ["model", "version"], registry=registry,
        )
        self._children: dict[tuple, object] = {}
        # Requests are counted behind their answers (service.write_behind): per request an append,
        # not a dozen locked updates (in multiprocess mode each one a write to a shared file).
        self._batch = WriteBehind(self._count, seconds=flush_seconds, name="rbfgate-metrics")

    def observe_request(self, route: str, method: str, status: int, seconds: float) -> None:
        """One HTTP request: its route template, method, status and duration."""
        self._batch.add((_REQUEST, route, method, status, seconds))

    def observe_scoring(
        self,
        model: str,
        version: str,
        *,
        scored: int,
        refused: int,
        problems: Iterable[tuple[str, str]],
        distances: np.ndarray,
        percentiles: np.ndarray,
        verdicts: np.ndarray = np.empty(0),
    ) -> None:
        """One scoring request: counts, (feature, reason) of each problem, (n,) distances, percentiles and
        verdicts. The arrays are kept until the batch is counted: the caller must not change them."""
        self._batch.add((_SCORING, model, version, scored, refused, list(problems), distances, percentiles, verdicts))

    def flush(self) -> None:
        """Count every observation made so far (``render``, ``traffic`` and shutdown do this first)."""
        self._batch.flush()

    def _count(self, observations: list[tuple]) -> None:
        """Count a batch of observations: one update per series it touches, not one per request."""
        requests: _Tally = _Tally()
        latencies: dict[str, list[float]] = {}
        tallies: _Tally = _Tally()  # (metric, labels) -> amount
        distances: dict[tuple[str, str], list[np.ndarray]] = {}
        percentiles: dict[tuple[str, str], list[np.ndarray]] = {}
        for observation in observations:
            if observation[0] is _REQUEST:
                _, route, method, status, seconds = observation
                requests[route, method if method in _METHODS else "other", str(status)] += 1
                latencies.setdefault(route, []).append(seconds)
                continue
            _, model, version, scored, refused, problems, distance, percentile, verdicts = observation
            tallies[self.score_requests, (model, version, "refused" if scored == 0 else
                                          "partial" if refused else "scored")] += 1
            if scored:
                tallies[self.records, (model, version, "scored")] += scored
            if refused:
                tallies[self.records, (model, version, "refused")] += refused
            for (feature, reason), count in _Tally(problems).items():
                tallies[self.refusals, (model, version, feature, reason)] += count
            distances.setdefault((model, version), []).append(distance)
            percentiles.setdefault((model, version), []).append(percentile)
            # Verdicts are the three fixed words of model_store.domain, never request text.
            for verdict, count in _Tally(verdicts.tolist()).items():
                tallies[self.domain_verdicts, (model, version, str(verdict))] += count
        for labels, count in requests.items():
            self._child(self.http_requests, *labels).inc(count)
        for route, seconds in latencies.items():
            observe_many(self._child(self.latency, route), np.array(seconds))
        for (metric, labels), amount in tallies.items():
            self._child(metric, *labels).inc(amount)
        for histogram, arrays in ((self.distance, distances), (self.percentile, percentiles)):
            for labels, parts in arrays.items():
                observe_many(self._child(histogram, *labels), np.concatenate(parts))

    def _child(self, metric, *labels: str):
        """``metric.labels(*labels)``, remembered: label values come from a bounded set (module docstring),
        and ``labels`` takes a lock and builds a key on every call."""
        key = (metric, labels)
        child = self._children.get(key)
        if child is None:
            child = self._children[key] = metric.labels(*labels)
        return child

    def switched(self, model: str, old: tuple[str, str] | None, new: tuple[str, str]) -> None:
        """A worker now serves ``new`` (version, digest) instead of ``old``."""
        if old is not None:
            self.active.labels(model, *old).set(0)
        self.active.labels(model, *new).set(1)
        self.switches.labels(model).inc()

    def load_failed(self, model: str, version: str) -> None:
        self.load_failures.labels(model, version).inc()
        self.load_failing.labels(model, version).set(1)

    def load_recovered(self, model: str, version: str) -> None:
        self.load_failing.labels(model, version).set(0)

    def traffic(self) -> dict[str, dict[str, int]]:
        """Per model, summed over versions and (in multiprocess mode) workers: scoring requests,
        records scored and refused, and domain verdicts, ``{model: {key: count}}`` for ``TRAFFIC_KEYS``."""
        totals: dict[str, dict[str, int]] = {}
        for metric in self._collected():
            for sample in metric.samples:
                if sample.name == "rbfgate_score_requests_total":
                    key = "requests"
                elif sample.name == "rbfgate_records_total":
                    key = sample.labels["status"]
                elif sample.name == "rbfgate_domain_verdicts_total":
                    key = sample.labels["verdict"]
                else:
                    continue
                counts = totals.setdefault(sample.labels["model"], dict.fromkeys(TRAFFIC_KEYS, 0))
                counts[key] = counts.get(key, 0) + int(sample.value)
        return totals

    def _collected(self):
        self.flush()
        if self.multiprocess_dir is None:
            return self._registry.collect()
        return self._files.collect()

    def render(self) -> tuple[bytes, str]:
        """The exposition text and its content type."""
        self.flush()
        if self.multiprocess_dir is None:
            return generate_latest(self._registry), CONTENT_TYPE_LATEST
        _forget_dead_workers(self.multiprocess_dir)
        registry = CollectorRegistry()
        registry.register(self._files)
        return generate_latest(registry), CONTENT_TYPE_LATEST

    def worker_exited(self) -> None:
        """Count what is pending, then drop this worker's live gauges (multiprocess mode only)."""
        self.flush()
        if self.multiprocess_dir is not None:
            multiprocess.mark_process_dead(os.getpid(), path=self.multiprocess_dir)


class _ReadableFiles:
    """prometheus-client's multiprocess merge over the files of ``directory`` that can be read whole.

    ``MultiProcessCollector`` raises on the first file it cannot parse (a truncated header is a
    ``struct.error``, a cut entry a ``RuntimeError``, a damaged key a ``ValueError``), which made
    ``/metrics`` answer 500 for as long as the file stayed. Each file is read through once here
    (they are small: 64 KiB as created), and the bad ones are left out and logged once each (again
    only when the file changes).
    """

    def __init__(self, directory: str) -> None:
        self._directory = directory
        self._reported: set[tuple[str, int, int]] = set()

    def collect(self):
        for _ in range(2):  # a file forgotten (deleted) between the check and the merge: check again, once
            files = [path for path in sorted(glob.glob(os.path.join(self._directory, "*.db"))) if self._readable(path)]
            try:
                return multiprocess.MultiProcessCollector.merge(files, accumulate=True)
            except FileNotFoundError:
                continue
        return multiprocess.MultiProcessCollector.merge([], accumulate=True)

    def _readable(self, path: str) -> bool:
        try:
            _check_file(path)
            return True
        except FileNotFoundError:
            return False  # a dead worker's live gauges, forgotten meanwhile
        except (OSError, RuntimeError, ValueError, IndexError, TypeError, struct.error) as exc:
            try:
                found = os.stat(path)
                seen = (path, found.st_size, found.st_mtime_ns)
            except OSError:
                seen = (path, -1, -1)
            if seen not in self._reported:
                self._reported.add(seen)
                _log.error("metrics: left out %s, which cannot be read as a prometheus-client multiprocess file "
                           "(%s); the other files' metrics are answered; remove it if no live worker writes it",
                           path, exc)
            return False


def _check_file(path: str) -> None:
    """Read ``path`` through as ``MultiProcessCollector`` will: the name says the kind (and, for a gauge, the
    mode and the pid), the used length fits the file, and each entry's key is the JSON list it writes."""
    kind, *rest = os.path.basename(path).removesuffix(".db").split("_")
    if kind not in _FILE_KINDS or (kind == "gauge" and (len(rest) != 2 or not rest[1].isdigit())):
        raise ValueError("the file name is not one prometheus-client makes")
    for key, _value, _timestamp, _position in MmapedDict.read_all_values_from_file(path):
        metric_name, name, labels, help_text = json.loads(key)
        if not (isinstance(metric_name, str) and isinstance(name, str) and isinstance(labels, dict)):
            raise ValueError(f"entry {key[:60]!r} is not [metric, sample, labels, help]")


_ONE_BY_ONE = 8  # a few values are observed one by one: cheaper than the numpy calls of a batch


def observe_many(histogram, values: np.ndarray) -> None:
    """``histogram.observe(v)`` for every v of ``values`` (n,), with one bucket count and one sum per call.

    prometheus-client has no batch observe; its Histogram keeps one (non-cumulative) count per
    bucket in ``_buckets``, indexed by the first upper bound >= the value, and the sum in ``_sum``
    (prometheus-client 0.20 to 0.26). When those are not there, each value is observed on its own.
    tests/service checks that both give the same exposition.
    """
    if not len(values):
        return
    if len(values) <= _ONE_BY_ONE:
        for value in values.tolist():
            histogram.observe(value)
        return
    bounds, buckets, total = (getattr(histogram, name, None) for name in ("_upper_bounds", "_buckets", "_sum"))
    if bounds is None or buckets is None or total is None:
        for value in values.tolist():
            histogram.observe(value)
        return
    counts = np.bincount(np.searchsorted(np.asarray(bounds, dtype=np.float64), values, side="left"),
                         minlength=len(bounds))
    for bucket in np.flatnonzero(counts).tolist():
        buckets[bucket].inc(int(counts[bucket]))
    total.inc(float(np.sum(values)))


def _forget_dead_workers(directory: str) -> None:
    """Drop the live gauges of workers that died without shutting down (SIGKILL, OOM).

    A worker that exits cleanly removes its own (``worker_exited``); one that is killed
    leaves its ``gauge_livemax_<pid>.db`` behind, and prometheus-client would go on
    counting it as live, showing for example the version it served before a switch as
    still active. uvicorn replaces such a worker, and the next /metrics forgets it.
    """
    for entry in os.listdir(directory):
        prefix, _, rest = entry.partition("_livemax_")
        pid_text = rest.removesuffix(".db")
        if prefix != "gauge" or not pid_text.isdigit() or _alive(int(pid_text)):
            continue
        try:
            multiprocess.mark_process_dead(int(pid_text), path=directory)
        except FileNotFoundError:
            pass  # another worker forgot it first


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)  # signal 0: only checks that the process exists
    except ProcessLookupError:
        return False
    except PermissionError:
        return True  # exists, owned by someone else
    return True
