"""``rbfgate demo``: the quick-start scenario end to end, offline.

Generates the invented pallet-check data, trains and exports a bundle,
scores a file of incoming pallets (four of which are refused, one of them as
outside the model's domain although each reading is in range), and
publishes and activates the bundle in a store ready for ``rbfgate serve``.
"""

from __future__ import annotations

import shutil
from pathlib import Path

from model_store.errors import InputError

__all__ = ["DEMO_MODEL", "DEMO_VERSION", "register"]

DEMO_MODEL = "pallet-checks"
DEMO_VERSION = "1.0.0"
_MARKER = ".rbfgate-demo"


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "demo", help="generate the pallet-check demo, train, export, score and publish it (offline)"
    )
    parser.add_argument("--out", type=Path, default=Path("rbfgate-demo"), metavar="DIR",
                        help="folder for the demo files (default ./rbfgate-demo); rerunning replaces an earlier demo")
    parser.add_argument("--rows", type=int, default=1200, help="training rows to generate (default 1200)")
    parser.add_argument("--seed", type=int, default=7, help="generator seed (default 7)")
    parser.set_defaults(handler=_demo)


def _demo(args) -> int:
    from model_store.batch_scoring import score_file
    from model_store.cli.bundle_commands import read_feature_info
    from model_store.demo import TARGET, write_demo_files
    from model_store.store import Store
    from model_store.trainer import TrainRequest, train_bundle

    if args.rows < 60:
        raise InputError(f"--rows {args.rows} is too few for a three-class demo; use at least 60")
    out = _fresh_folder(args.out)
    files = write_demo_files(out, rows=args.rows, seed=args.seed)
    print(f"generated {files['training']} ({args.rows} pallets) and {files['incoming']}")
    bundle = train_bundle(
        TrainRequest(
            data=files["training"], target=TARGET, name=DEMO_MODEL, version=DEMO_VERSION,
            out=out / "bundles" / f"{DEMO_MODEL}-{DEMO_VERSION}", calibration="sigmoid",
            feature_info=read_feature_info(files["feature_info"]),
        )
    )
    metrics = bundle.manifest.training["holdout_metrics"]
    print(f"trained and exported {bundle.source}: holdout balanced accuracy {metrics['balanced_accuracy']:.3f}, "
          f"digest {bundle.digest[:16]}...")
    scored = out / "incoming_scored.csv"
    summary = score_file(bundle, files["incoming"], scored, keep=["pallet_id"], progress=False)
    print(f"scored {files['incoming']} -> {scored}: {summary.scored} scored, {summary.refused} refused")
    verdict = _domain_verdict_of_last_row(scored)
    print(f"  pallet P-0016 has every reading in range but its surface is colder than its core (probes swapped?): "
          f"domain verdict {verdict or 'none'}; see the domain_verdict and problems columns of {scored.name}")
    store = Store(out / "store", create=True)
    store.publish(Path(bundle.source), actor="rbfgate-demo")
    store.activate(DEMO_MODEL, DEMO_VERSION, reason="quick-start demo", actor="rbfgate-demo")
    print(f"published and activated {DEMO_MODEL} {DEMO_VERSION} in {store.root}")
    print(_next_steps(store.root))
    return 0


def _domain_verdict_of_last_row(scored: Path) -> str | None:
    import csv

    with open(scored, newline="", encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    return rows[-1]["domain_verdict"] or None if rows else None


def _fresh_folder(folder: Path) -> Path:
    folder = Path(folder)
    if folder.exists() and any(folder.iterdir()):
        if not (folder / _MARKER).exists():
            raise InputError(f"{folder}: exists and is not an earlier demo folder; choose another --out")
        shutil.rmtree(folder)
    folder.mkdir(parents=True, exist_ok=True)
    (folder / _MARKER).write_text("created by rbfgate demo; rerunning the demo replaces this folder\n")
    return folder


def _next_steps(store_root: Path) -> str:
    record = '{"records": [{"core_temp_c": 3.2, "surface_temp_c": 4.4, "humidity_pct": 81, "transit_hours": 9.5, "door_open_min": 4, "peak_shock_g": 1.3}]}'
    refused = '{"records": [{"core_temp_c": 19.0, "surface_temp_c": 4.4, "humidity_pct": 81, "transit_hours": 9.5, "door_open_min": 4}]}'
    return "\n".join(
        [
            "",
            f"serve it:   rbfgate serve --store {store_root}",
            "then open the pages (models, timeline, model card, try a record, preview a switch):",
            "  http://127.0.0.1:8000/view/",
            "score one pallet:",
            f"  curl -s -X POST http://127.0.0.1:8000/score/{DEMO_MODEL} -H 'Content-Type: application/json' -d '{record}'",
            "a refused one (core temperature out of range, peak_shock_g missing):",
            f"  curl -s -X POST http://127.0.0.1:8000/score/{DEMO_MODEL} -H 'Content-Type: application/json' -d '{refused}'",
        ]
    )

