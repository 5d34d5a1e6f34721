"""How well the refusal policy tells real rows from shifted ones, dataset x shift x policy.

    python3 -m tests.benchmarks.domain_detection                 # the table, seeds 0-4
    python3 -m tests.benchmarks.domain_detection --seeds 0,1,2 --json OUT.json

Datasets (shipped with scikit-learn): iris (R. A. Fisher, 1936, UCI Iris), wine (M. Forina et al.,
PARVUS, 1988, UCI Wine), breast cancer (W. N. Street, W. H. Wolberg, O. L. Mangasarian, 1993, UCI
Breast Cancer Wisconsin (Diagnostic)), digits (E. Alpaydin, C. Kaynak, 1998, UCI Optical Recognition
of Handwritten Digits). Each is split 70/30, stratified, per seed; a StandardScaler + SVC(rbf) is
fitted on the 70 % and exported with the 70 % as reference rows and the new defaults (margin chosen
out of sample, refuse rate 0.01). The 30 % is never shown to export: it is the real rows the policy
is measured on ("holdout" in the table means these rows, fresh to the bundle).

Shifted copies of the 30 %:
- swap:  two features (drawn per row) exchange their values, as a client that mixes up columns;
- move:  one feature (drawn per row) moves by 3 reference standard deviations, up or down, as a
         unit or offset error would;
- indep: each feature drawn independently from its values in the 30 %, so every value is in range
         but the combination is not.
Features constant in the reference are never drawn for swap and move (moving them changes nothing).

Policies (share of rows refused):
- box-5%:   the policy before the domain model: reference min/max widened by 5 %;
- box-same: the same kind of box (reference min/max widened by m x span), with the smallest m on a
            grid of steps of 0.005 that refuses no more of the 30 % than the whole policy: a box
            alone at the same refusal rate of real rows. Its m is tuned on the very rows it is
            measured on, which favours the box: on rows it was not tuned on it refuses more (the
            third table);
- box-oos:  the same kind of box with its m chosen the way the bundle's margin is, out of sample
            from the reference rows alone (each row against the min/max of the other rows,
            ``model_store.policy_fit.leave_one_out_needs``), for the whole refuse rate instead of
            the ranges' half: a box alone that sees what the whole policy sees and spends all of
            its budget;
- ranges:   the bundle's range rule alone (margin chosen out of sample, non-negative bounds);
- domain:   the bundle's domain verdict ``outside`` alone;
- whole:    ranges or domain: what ``rbfgate`` refuses by default.

The second table gives, per dataset, the whole policy's share of the 30 % refused (the figure the
default-suite test tests/bundle/test_fresh_refusals.py bounds), the out-of-sample estimate the
bundle records, and the share refused of half the 30 % when the other half is given to export as
``--holdout``.

The third table measures what tuning box-same on the measured rows is worth: the 30 % is cut at
random into two halves (``HALVES`` times per seed); a box is tuned on one half as box-same is (no
more refused than the whole policy refuses of that half) and counted on the other half, and the
other way round. On the half it was tuned on it refuses what the whole policy does; on the other
half, rows new to it, it refuses more. By exchangeability, a margin set just wide enough for k of
n rows to fall outside refuses (k + 1) / (n + 1) of new rows on average (the rank argument behind
conformal prediction: Vovk, Gammerman and Shafer 2005, "Algorithmic Learning in a Random World").
"""

from __future__ import annotations

import argparse
import functools
import hashlib
import json
import tempfile
from pathlib import Path

import numpy as np
from sklearn.datasets import load_breast_cancer, load_digits, load_iris, load_wine
from sklearn.model_selection import train_test_split
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from model_store.bundle import Bundle
from model_store.estimator_parts import take_apart
from model_store.exporter import ExportRequest, export_bundle
from model_store.policy_fit import leave_one_out_needs, upper_threshold

__all__ = ["DATASETS", "HALVES", "POLICIES", "SHIFTS", "Case", "detection_case", "main", "render_table", "summarise"]

DATASETS = ("iris", "wine", "cancer", "digits")
SHIFTS = ("swap", "move", "indep")
POLICIES = ("box-5%", "box-same", "box-oos", "ranges", "domain", "whole")
HALVES = 20
REFUSE_RATE = 0.01
_LOADERS = {"iris": load_iris, "wine": load_wine, "cancer": load_breast_cancer, "digits": load_digits}
_MARGINS = np.round(np.arange(-0.5, 3.0001, 0.005), 3)


class Case:
    """One dataset and seed: counts of refused rows per shift and policy, and the shares of real rows."""

    def __init__(self, dataset: str, seed: int, reference_rows: int, rows: int, holdout_refused: dict[str, float],
                 refused: dict[str, dict[str, int]], estimate: float, with_holdout_refused: float,
                 box_same_halves: dict[str, float]) -> None:
        self.dataset, self.seed, self.rows = dataset, seed, rows
        self.reference_rows = reference_rows
        self.holdout_refused = holdout_refused
        self.refused = refused
        self.estimate = estimate
        self.with_holdout_refused = with_holdout_refused
        self.box_same_halves = box_same_halves

    def to_dict(self) -> dict:
        return dict(vars(self))


def _split(dataset: str, seed: int):
    X, y = _LOADERS[dataset](return_X_y=True)
    return train_test_split(X.astype(np.float64), y, test_size=0.3, stratify=y, random_state=seed)


def _export(reference, labels, holdout, holdout_labels, out: Path, name: str) -> Bundle:
    model = make_pipeline(StandardScaler(), SVC(kernel="rbf", C=1.0)).fit(reference, labels)
    return export_bundle(ExportRequest(
        parts=take_apart(model), features=[f"x{index}" for index in range(reference.shape[1])],
        reference=reference, reference_labels=list(labels), reference_file="reference.csv",
        reference_sha256=hashlib.sha256(reference.tobytes()).hexdigest(), name=name, version="1", out=out,
        holdout=holdout, holdout_labels=None if holdout is None else list(holdout_labels), refuse_rate=REFUSE_RATE,
    ))


def shifted_copies(reference: np.ndarray, holdout: np.ndarray, rng: np.random.Generator) -> dict[str, np.ndarray]:
    """The three shifted copies of ``holdout`` (m, f), each (m, f)."""
    rows, _ = holdout.shape
    std = reference.std(axis=0)
    varying = np.flatnonzero(std > 0)
    swap = holdout.copy()
    move = holdout.copy()
    for row in range(rows):
        a, b = rng.choice(varying, 2, replace=False)
        swap[row, [a, b]] = swap[row, [b, a]]
        feature = rng.choice(varying)
        move[row, feature] += rng.choice([-1.0, 1.0]) * 3.0 * std[feature]
    indep = np.column_stack([rng.choice(holdout[:, column], rows) for column in range(holdout.shape[1])])
    return {"swap": swap, "move": move, "indep": indep}


def _outside_box(rows: np.ndarray, low: np.ndarray, high: np.ndarray) -> np.ndarray:
    return ((rows < low) | (rows > high)).any(axis=1)


def _policies(bundle: Bundle, reference: np.ndarray, rows: np.ndarray, margin_same: float,
              margin_oos: float) -> dict[str, np.ndarray]:
    """(n,) bool refused per policy for ``rows``."""
    scores = bundle.score(rows)
    ranges = ~scores.in_range
    domain = scores.domain_verdict == "outside"
    low, high = reference.min(axis=0), reference.max(axis=0)
    span = high - low
    return {
        "box-5%": _outside_box(rows, low - 0.05 * span, high + 0.05 * span),
        "box-same": _outside_box(rows, low - margin_same * span, high + margin_same * span),
        "box-oos": _outside_box(rows, low - margin_oos * span, high + margin_oos * span),
        "ranges": ranges,
        "domain": domain,
        "whole": ranges | domain,
    }


def _same_rate_margin(reference: np.ndarray, holdout: np.ndarray, budget: int) -> float:
    """The tightest box margin (on the grid) that refuses at most ``budget`` holdout rows."""
    low, high = reference.min(axis=0), reference.max(axis=0)
    span = high - low
    for margin in _MARGINS:
        if _outside_box(holdout, low - margin * span, high + margin * span).sum() <= budget:
            return float(margin)
    return float(_MARGINS[-1])


def _out_of_sample_margin(reference: np.ndarray) -> float:
    """The plain box's margin for the whole ``REFUSE_RATE``, chosen on the reference rows alone (leave-one-out).

    Physical bounds of +-inf on every feature make ``leave_one_out_needs`` measure the plain box
    (min/max widened by m x span, no inferred non-negative floor), the box that box-same widens.
    """
    features = [f"x{index}" for index in range(reference.shape[1])]
    need = leave_one_out_needs(features, reference, {name: {"bounds": [-np.inf, np.inf]} for name in features})
    return max(0.0, upper_threshold(np.sort(need)[::-1], REFUSE_RATE * len(reference)))


def _box_same_on_halves(reference: np.ndarray, holdout: np.ndarray, whole: np.ndarray, seed: int) -> dict[str, float]:
    """Shares refused by a box tuned as box-same on one random half of ``holdout``, on that half and on the other.

    ``whole`` (m,) is the whole policy's verdict on ``holdout`` (m, f): the tuning budget on a half
    is what the whole policy refuses of it. Returns the shares of the tuning halves, of the other
    halves, and the whole policy's share of the other halves (``HALVES`` random cuts, both ways).
    """
    low, high = reference.min(axis=0), reference.max(axis=0)
    span = high - low
    rng = np.random.default_rng(2000 + seed)
    tuned = other = whole_other = tuned_rows = rows = 0
    for _ in range(HALVES):
        order = rng.permutation(len(holdout))
        first, second = order[: len(order) // 2], order[len(order) // 2:]
        for tune, count in ((first, second), (second, first)):
            margin = _same_rate_margin(reference, holdout[tune], int(whole[tune].sum()))
            box = _outside_box(holdout, low - margin * span, high + margin * span)
            tuned += int(box[tune].sum())
            tuned_rows += len(tune)
            other += int(box[count].sum())
            whole_other += int(whole[count].sum())
            rows += len(count)
    return {"tuning_half": tuned / tuned_rows, "other_half": other / rows, "whole_other_half": whole_other / rows}


@functools.cache
def detection_case(dataset: str, seed: int) -> Case:
    """Export, shift and count for one dataset and seed (cached: the test and the table share it)."""
    reference, holdout, labels, holdout_labels = _split(dataset, seed)
    with tempfile.TemporaryDirectory(prefix="rbfgate-domain-") as folder:
        bundle = _export(reference, labels, None, None, Path(folder) / "bundle", dataset)
        margin_oos = _out_of_sample_margin(reference)
        whole_on_holdout = _policies(bundle, reference, holdout, 0.0, margin_oos)["whole"]
        margin = _same_rate_margin(reference, holdout, int(whole_on_holdout.sum()))
        on_holdout = _policies(bundle, reference, holdout, margin, margin_oos)
        rng = np.random.default_rng(1000 + seed)
        refused = {
            shift: {policy: int(flags.sum())
                    for policy, flags in _policies(bundle, reference, rows, margin, margin_oos).items()}
            for shift, rows in shifted_copies(reference, holdout, rng).items()
        }
        halves = _box_same_on_halves(reference, holdout, whole_on_holdout, seed)
        calibrate, fresh, calibrate_labels, _ = train_test_split(
            holdout, holdout_labels, test_size=0.5, stratify=holdout_labels, random_state=seed)
        half = _export(reference, labels, calibrate, calibrate_labels, Path(folder) / "half", dataset)
        fresh_scores = half.score(fresh)
        with_holdout = float((~fresh_scores.in_range | (fresh_scores.domain_verdict == "outside")).mean())
        estimate = bundle.manifest.refusal_report.out_of_sample.estimate.refused_total
    return Case(dataset, seed, len(reference), len(holdout), {policy: float(flags.mean()) for policy, flags in on_holdout.items()},
                refused, estimate, with_holdout, halves)


def summarise(cases: list[Case]) -> dict[str, dict]:
    """Per dataset: share refused per shift and policy, over the three shifts, and on the holdout."""
    summary: dict[str, dict] = {}
    for dataset in dict.fromkeys(case.dataset for case in cases):
        mine = [case for case in cases if case.dataset == dataset]
        rows = sum(case.rows for case in mine)
        per_shift = {
            shift: {policy: sum(case.refused[shift][policy] for case in mine) / rows for policy in POLICIES}
            for shift in SHIFTS
        }
        together = {policy: sum(per_shift[shift][policy] for shift in SHIFTS) / len(SHIFTS) for policy in POLICIES}
        summary[dataset] = {
            "seeds": [case.seed for case in mine],
            "reference_rows": mine[0].reference_rows,
            "holdout_rows": mine[0].rows,
            "shifts": per_shift,
            "all_shifts": together,
            "caught_all_shifts": {policy: sum(case.refused[shift][policy] for case in mine for shift in SHIFTS)
                                  for policy in POLICIES},
            "holdout_refused": {policy: float(np.mean([case.holdout_refused[policy] for case in mine]))
                                for policy in POLICIES},
            "estimate_whole": float(np.mean([case.estimate for case in mine])),
            "with_holdout_refused_whole": float(np.mean([case.with_holdout_refused for case in mine])),
            "box_same_halves": {key: float(np.mean([case.box_same_halves[key] for case in mine]))
                                for key in mine[0].box_same_halves},
        }
    return summary


def render_table(summary: dict[str, dict]) -> str:
    """Markdown: one row per dataset and shift, one column per policy (percent of rows refused)."""
    header = "| dataset | rows refused | " + " | ".join(POLICIES) + " |"
    lines = [header, "|" + "---|" * (len(POLICIES) + 2)]
    for dataset, result in summary.items():
        for shift in SHIFTS:
            shares = result["shifts"][shift]
            lines.append(f"| {dataset} | {shift} | " + " | ".join(f"{100 * shares[p]:.1f}" for p in POLICIES) + " |")
        together = result["all_shifts"]
        lines.append(f"| {dataset} | **all three** | " + " | ".join(f"**{100 * together[p]:.1f}**" for p in POLICIES)
                     + " |")
        holdout = result["holdout_refused"]
        lines.append(f"| {dataset} | real rows (the 30 %) | "
                     + " | ".join(f"{100 * holdout[p]:.1f}" for p in POLICIES) + " |")
    lines.append("")
    lines.append("| dataset | reference rows | real rows | seeds | whole policy on the 30 % | estimate in the bundle "
                 "| with half the 30 % as --holdout, on the other half |")
    lines.append("|---|---|---|---|---|---|---|")
    for dataset, result in summary.items():
        seeds = ",".join(map(str, result["seeds"]))
        lines.append(f"| {dataset} | {result['reference_rows']} | {result['holdout_rows']} | {seeds} | "
                     f"{100 * result['holdout_refused']['whole']:.1f} % | {100 * result['estimate_whole']:.1f} % | "
                     f"{100 * result['with_holdout_refused_whole']:.1f} % |")
    lines.append("")
    lines.append("| dataset | box-same on the half it was tuned on | box-same on the other half "
                 "| whole policy on the other half |")
    lines.append("|---|---|---|---|")
    for dataset, result in summary.items():
        halves = result["box_same_halves"]
        lines.append(f"| {dataset} | {100 * halves['tuning_half']:.1f} % | {100 * halves['other_half']:.1f} % | "
                     f"{100 * halves['whole_other_half']:.1f} % |")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", default="0,1,2,3,4", help="comma-separated split seeds (default 0-4)")
    parser.add_argument("--json", type=Path, help="also write the numbers to this file")
    args = parser.parse_args(argv)
    seeds = [int(seed) for seed in args.seeds.split(",")]
    cases = [detection_case(dataset, seed) for dataset in DATASETS for seed in seeds]
    summary = summarise(cases)
    print(render_table(summary))
    if args.json:
        args.json.write_text(json.dumps(summary, indent=2) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
