"""Bundle commands: train, export, inspect, verify, pack (score lives in ``score_command``).

scikit-learn and joblib are imported inside the export and train handlers
only, so inspecting never loads them.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from model_store.api_document import DEFAULT_MAX_RECORDS, api_document
from model_store.bundle import load_bundle
from model_store.client_names import client_name_warnings
from model_store.errors import InputError
from model_store.inspection import describe, refusal_report_lines, refusal_warning, render_description

__all__ = ["register"]

_JOBLIB_WARNING = (
    "A joblib file is a pickle: loading it runs code, so export only files you trust. "
    "The bundle written is pickle-free."
)


def register(subparsers) -> None:
    """Add the bundle commands to the ``rbfgate`` parser."""
    _add_export(subparsers)
    _add_train(subparsers)
    inspect = subparsers.add_parser("inspect", help="show a bundle's identity, features, kernel width and metrics")
    inspect.add_argument("bundle", type=Path, help="bundle directory or .tar file")
    shown = inspect.add_mutually_exclusive_group()
    shown.add_argument("--json", action="store_true", help="print the description as JSON")
    shown.add_argument("--openapi", action="store_true",
                       help="print the OpenAPI 3.1 document for scoring this bundle, as "
                       "GET /models/NAME/versions/VERSION/openapi.json serves it")
    inspect.add_argument("--max-records", type=int, default=None, metavar="N",
                         help=f"with --openapi: the records-per-request limit of the service (default {DEFAULT_MAX_RECORDS}, "
                         "as rbfgate serve)")
    inspect.set_defaults(handler=_inspect)
    verify = subparsers.add_parser("verify", help="check a bundle's checksums and replay its golden vectors")
    verify.add_argument("bundle", type=Path, help="bundle directory or .tar file")
    verify.set_defaults(handler=_verify)
    pack = subparsers.add_parser("pack", help="write a bundle directory as its single-file .tar form")
    pack.add_argument("bundle", type=Path, help="bundle directory")
    pack.add_argument("--out", type=Path, required=True, metavar="FILE.tar", help="new archive file")
    pack.set_defaults(handler=_pack)


def _add_export(subparsers) -> None:
    parser = subparsers.add_parser(
        "export",
        help="export a fitted scikit-learn RBF SVC/NuSVC (joblib file) to a bundle",
        description="Export a fitted SVC or NuSVC (kernel='rbf'), bare, in a Pipeline with one scaler, and/or in "
        "CalibratedClassifierCV(ensemble=False). " + _JOBLIB_WARNING,
    )
    parser.add_argument("model", type=Path, metavar="MODEL.joblib")
    parser.add_argument("--reference", type=Path, required=True, metavar="DATA.csv",
                        help="reference rows (usually the training data): ranges, golden vectors, fingerprint")
    _identity_arguments(parser)
    parser.add_argument("--target", help="label column of the reference and holdout CSV (excluded from the features)")
    parser.add_argument("--holdout", type=Path, metavar="HOLDOUT.csv",
                        help="rows not used in fitting, same columns as the reference: metrics, and more rows for "
                        "the ranges, the choice of the margin and domain thresholds and the refusal report")
    parser.set_defaults(handler=_export)


def _add_train(subparsers) -> None:
    parser = subparsers.add_parser("train", help="train an RBF SVC on a CSV file and export it as a bundle")
    parser.add_argument("data", type=Path, metavar="DATA.csv")
    parser.add_argument("--target", required=True, help="label column")
    _identity_arguments(parser)
    width = parser.add_mutually_exclusive_group()
    width.add_argument("--sigma", type=float, help="kernel width in scaled units (gamma = 1 / (2 sigma^2))")
    width.add_argument("--gamma", type=float, help="kernel coefficient gamma")
    parser.add_argument("--C", type=float, help="regularisation; searched with --gamma/--sigma when omitted")
    parser.add_argument("--calibration", choices=("sigmoid", "isotonic", "temperature", "none"), default="sigmoid")
    parser.add_argument("--test-size", type=float, default=0.25, help="holdout fraction (default 0.25)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the split and the folds (default 0)")
    parser.set_defaults(handler=_train)


def _identity_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--name", required=True, help="model name (letters, digits, . _ -)")
    parser.add_argument("--version", required=True, help="model version (letters, digits, . _ -)")
    parser.add_argument("--out", type=Path, required=True, metavar="DIR", help="new bundle directory")
    parser.add_argument("--margin", type=float, default=None,
                        help="widen each feature's allowed range by this fraction of its reference range (default: "
                        "chosen out of sample so that the ranges refuse half of --refuse-rate of new rows)")
    parser.add_argument("--refuse-rate", type=float, default=0.01, metavar="F",
                        help="share of new rows (never seen at export) the refusal policy (ranges and domain model) "
                        "should refuse, estimated by cross-fitting (default 0.01)")
    parser.add_argument("--feature-info", type=Path, metavar="FILE.json",
                        help='units, descriptions and ranges: {"feature": {"unit": ..., "description": ..., '
                        '"allowed": [low, high] (replaces the derived range), "bounds": [low, high] (physical limits '
                        'the derived range is clipped to)}}')


def _export(args) -> int:
    from model_store.model_file import export_model_file  # scikit-learn lives behind this import

    bundle = export_model_file(
        args.model, args.reference, name=args.name, version=args.version, out=args.out, target=args.target,
        margin=args.margin, feature_info=read_feature_info(args.feature_info), holdout_path=args.holdout,
        refuse_rate=args.refuse_rate,
    )
    _report_written(bundle)
    return 0


def _train(args) -> int:
    from model_store.trainer import TrainRequest, train_bundle

    bundle = train_bundle(
        TrainRequest(
            data=args.data, target=args.target, name=args.name, version=args.version, out=args.out,
            sigma=args.sigma, gamma=args.gamma, C=args.C, calibration=args.calibration, test_size=args.test_size,
            seed=args.seed, margin=args.margin, feature_info=read_feature_info(args.feature_info),
            refuse_rate=args.refuse_rate,
        )
    )
    _report_written(bundle)
    metrics = bundle.manifest.training.get("holdout_metrics", {})
    if metrics:
        print(f"holdout: accuracy {metrics['accuracy']:.3f}, balanced accuracy {metrics['balanced_accuracy']:.3f}, "
              f"macro F1 {metrics['macro_f1']:.3f} on {metrics['rows']} rows")
    return 0


def _inspect(args) -> int:
    if args.max_records is not None and not args.openapi:
        raise InputError(f"--max-records {args.max_records}: it sets the records limit of the --openapi document; "
                         "add --openapi or leave --max-records out")
    max_records = DEFAULT_MAX_RECORDS if args.max_records is None else args.max_records
    if max_records < 1:
        raise InputError(f"--max-records {max_records}: expected 1 or more records per request")
    bundle = load_bundle(args.bundle)
    if args.openapi:
        print(json.dumps(api_document(bundle.manifest, bundle.digest, max_records=max_records),
                         indent=2, ensure_ascii=False))
        return 0
    description = describe(bundle)
    if args.json:
        print(json.dumps(description, indent=2, ensure_ascii=False))
    else:
        print(render_description(description))
    return 0


def _verify(args) -> int:
    bundle = load_bundle(args.bundle)
    print(f"{args.bundle}: checksums ok ({len(bundle.manifest.files)} files)")
    bundle.self_test()
    print(f"{args.bundle}: golden vectors ok ({len(bundle.manifest.golden.labels)} rows); digest {bundle.digest}")
    return 0


def _pack(args) -> int:
    from model_store.archive import pack_directory

    if not args.bundle.is_dir():
        raise InputError(f"{args.bundle}: not a bundle directory; pack takes the directory form")
    if args.out.exists():
        raise InputError(f"{args.out}: already exists; choose a new --out file or remove it first")
    bundle = load_bundle(args.bundle)
    bundle.self_test()  # never ship a bundle that does not reproduce its model
    pack_directory(args.bundle, args.out)
    packed = load_bundle(args.out)
    print(f"wrote {args.out}: {packed.name} {packed.version}, digest {packed.digest}")
    return 0


def _report_written(bundle) -> None:
    manifest = bundle.manifest
    warnings = set(client_name_warnings(manifest.feature_names, manifest.classifier.classes))
    for note in manifest.training.get("notes", []):
        print(f"{'warning' if note in warnings else 'note'}: {note}", file=sys.stderr)
    print(f"wrote {bundle.source}: {bundle.name} {bundle.version}, digest {bundle.digest}")
    print("checked against scikit-learn on the golden vectors: labels equal, decisions, probabilities and domain "
          "scores within 1e-9")
    for line in refusal_report_lines(bundle.manifest):
        print(line)
    warning = refusal_warning(bundle.manifest)
    if warning:
        print(f"warning: {warning}", file=sys.stderr)


def read_feature_info(path: Path | None) -> dict[str, dict]:
    """Read a feature-info JSON file: ``{feature: {"unit", "description", "allowed", "bounds"}}``.

    ``allowed`` replaces the range derived from the reference rows; ``bounds``
    clips the derived range to physical limits.
    """
    if path is None:
        return {}
    try:
        document = json.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError as exc:
        raise InputError(f"{path}: no such feature-info file") from exc
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        raise InputError(f"{path}: not a readable JSON file: {exc}") from exc
    if not isinstance(document, dict):
        raise InputError(f"{path}: expected a JSON object mapping feature names to their info")
    for name, info in document.items():
        if not isinstance(info, dict) or set(info) - {"unit", "description", "allowed", "bounds"}:
            raise InputError(
                f"{path}: feature {name!r}: expected an object with only unit, description, allowed and bounds"
            )
        for key in ("unit", "description"):
            if key in info and not isinstance(info[key], str):
                raise InputError(f"{path}: feature {name!r}: {key} must be a string")
        for key in ("allowed", "bounds"):
            if info.get(key) is not None and not _is_range(info[key]):
                raise InputError(f"{path}: feature {name!r}: {key} must be [low, high] numbers with low <= high")
    return document


def _is_range(value) -> bool:
    return (
        isinstance(value, list) and len(value) == 2
        and all(isinstance(bound, (int, float)) and not isinstance(bound, bool) for bound in value)
        and value[0] <= value[1]
    )

