"""With the default settings, the whole refusal policy refuses at most 2 x --refuse-rate of rows export never saw.

Datasets shipped with scikit-learn, loaded with ``sklearn.datasets``: iris (R. A. Fisher 1936, UCI
Iris, 150 rows, 4 features), wine (M. Forina et al., PARVUS 1988, UCI Wine, 178 x 13), breast
cancer (W. N. Street, W. H. Wolberg, O. L. Mangasarian 1993, UCI Breast Cancer Wisconsin
(Diagnostic), 569 x 30) and digits (E. Alpaydin, C. Kaynak 1998, UCI Optical Recognition of
Handwritten Digits, 1797 x 64, all ten classes).

Each dataset is split 70/30, stratified, with seeds 0 to 4. A StandardScaler + SVC(rbf) is
fitted on the 70 % and exported with the 70 % as reference rows and the default settings (the
margin chosen out of sample, ``--refuse-rate`` 0.01). The 30 % is never shown to export, not even
as ``--holdout``: to the bundle those rows are new, as a client's rows are. That is stricter than
measuring on a holdout given to export, whose rows would also widen the ranges and sit among the
rows the thresholds are chosen on.

What is averaged: the share of the 30 % that the whole policy (ranges or domain ``outside``)
refuses, averaged over the five seeds; every seed's 30 % has the same size, so this is the share
of all 5 x 30 % rows. Why averaged: the bound is on the expected share, and one seed cannot
measure it: iris's 30 % is 45 rows, so a single refused row is 2.2 %, over the 2 % bound by itself,
and whether a seed's 45 rows hold that row is mostly chance. Five seeds give 225 to 2,700 rows.
"""

from __future__ import annotations

import hashlib

import numpy as np
import pytest
from sklearn.datasets import load_breast_cancer, load_digits, load_iris, load_wine
from sklearn.model_selection import train_test_split
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from model_store.estimator_parts import take_apart
from model_store.exporter import ExportRequest, export_bundle

LOADERS = {"iris": load_iris, "wine": load_wine, "cancer": load_breast_cancer, "digits": load_digits}
SEEDS = (0, 1, 2, 3, 4)
REFUSE_RATE = 0.01  # the export default


def _fresh_share(name: str, seed: int, folder) -> float:
    """Share of the 30 % refused by a bundle exported from the 70 % with the defaults."""
    X, y = LOADERS[name](return_X_y=True)
    reference, fresh, labels, _ = train_test_split(X.astype(np.float64), y, test_size=0.3, stratify=y,
                                                   random_state=seed)
    model = make_pipeline(StandardScaler(), SVC()).fit(reference, labels)
    bundle = export_bundle(ExportRequest(
        parts=take_apart(model), features=[f"x{index}" for index in range(X.shape[1])], reference=reference,
        reference_labels=list(labels), reference_file="reference.csv",
        reference_sha256=hashlib.sha256(reference.tobytes()).hexdigest(), name=name, version=f"s{seed}",
        out=folder / f"{name}-{seed}",
    ))
    assert bundle.manifest.refusal_report.refuse_rate == REFUSE_RATE  # the default, not set here
    scores = bundle.score(fresh)
    return float(np.mean(~scores.in_range | (scores.domain_verdict == "outside")))


@pytest.mark.parametrize("name", list(LOADERS))
def test_the_whole_policy_refuses_at_most_twice_the_refuse_rate_of_fresh_rows(name, tmp_path_factory):
    folder = tmp_path_factory.mktemp(name)
    shares = [_fresh_share(name, seed, folder) for seed in SEEDS]
    assert np.mean(shares) <= 2 * REFUSE_RATE, {"per seed": shares, "mean": np.mean(shares)}
