"""What the domain check adds to scoring one record: the same bundle with and without its domain model.

    python3 -m tests.benchmarks.domain_overhead            # the table; target: at most 1.30

For each dataset shipped with scikit-learn (iris, wine, breast cancer, digits; sources in
tests/benchmarks/domain_detection.py), a StandardScaler + SVC is exported with its 30 % holdout.
One record goes the way the service takes it: the range rules (``check_records``), the scorer,
the outside-domain policy. "without" is the same bundle's scorer with its domain model removed
(``Scorer.domain = None``), so the only difference is the domain check. The two are timed
alternately in one run (tests/benchmarks/timing.py), medians of wall time; the ratio is
with / without. Both run with one BLAS thread, as a service worker scores: with OpenBLAS's
default two, the classifier's product over digits' 664 support vectors was split across threads
and the domain model's small one was not, which made the domain check look like half as much
again (1.50) where the worker sees 1.13 (2026-12-03).
"""

from __future__ import annotations

import copy
import tempfile
from pathlib import Path

import numpy as np

from model_store.domain_policy import apply_outside_policy
from model_store.refusal import check_records

from .domain_detection import DATASETS, _export, _split
from .machine import blas_threads
from .timing import alternate

__all__ = ["TARGET_RATIO", "measure", "render"]

TARGET_RATIO = 1.30


def _one_record(bundle, scorer, record):
    checked = check_records(bundle.manifest.features, [record])
    scores = scorer.score(checked.values)
    apply_outside_policy(checked, scores, "refuse")
    return scores


def measure(budget: float = 1.0) -> list[dict]:
    """One row per dataset: support vectors of both models, medians in microseconds, the ratio."""
    results = []
    with tempfile.TemporaryDirectory(prefix="rbfgate-overhead-") as folder:
        for dataset in DATASETS:
            reference, holdout, labels, holdout_labels = _split(dataset, 0)
            bundle = _export(reference, labels, holdout, holdout_labels, Path(folder) / dataset, dataset)
            plain = copy.copy(bundle.scorer)
            plain.domain = None
            record = dict(zip(bundle.feature_names, holdout[0].tolist()))
            with blas_threads(1):
                with_domain, without = alternate(
                    [lambda: _one_record(bundle, bundle.scorer, record), lambda: _one_record(bundle, plain, record)],
                    budget=budget, most=20000, rounds=20,  # fine alternation: the machine drifts within seconds
                )
            same = np.array_equal(_one_record(bundle, bundle.scorer, record).decision,
                                  _one_record(bundle, plain, record).decision)
            results.append({
                "dataset": dataset,
                "features": len(bundle.feature_names),
                "support_vectors": len(bundle.support_vectors),
                "domain_support_vectors": bundle.manifest.domain.support_vectors,
                "with_us": 1e6 * with_domain.wall,
                "without_us": 1e6 * without.wall,
                "ratio": with_domain.wall / without.wall,
                "same_decision": bool(same),
            })
    return results


def render(results: list[dict]) -> str:
    lines = ["| dataset | features | support vectors (classifier, domain) | one record without | with domain | "
             "ratio | met (<= 1.30) |", "|---|---|---|---|---|---|---|"]
    for row in results:
        lines.append(
            f"| {row['dataset']} | {row['features']} | {row['support_vectors']}, {row['domain_support_vectors']} | "
            f"{row['without_us']:.0f} us | {row['with_us']:.0f} us | {row['ratio']:.2f} | "
            f"{'yes' if row['ratio'] <= TARGET_RATIO else 'no'} |"
        )
    return "\n".join(lines)


if __name__ == "__main__":
    print(render(measure()))
