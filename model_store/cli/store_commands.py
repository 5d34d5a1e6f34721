"""Store commands: publish, versions, activate, rollback, outside-domain, history, preview, prune, repair-pointer,
keygen, sign, trust.

Every command that reads or changes a store takes ``--store DIR``; without
it the store is ``$RBFGATE_STORE``, else ``$XDG_DATA_HOME/rbfgate/store``,
else ``~/.local/share/rbfgate/store``. Commands that change a store take
``--actor NAME`` (default: the operating-system user), which the history
records with ``via: cli``. ``publish`` and ``trust add`` create the store when the directory
is missing or empty; every other command needs an existing store.
"""

from __future__ import annotations

import argparse
import functools
import json
import os
import pwd
import sys
from collections.abc import Mapping, Sequence
from datetime import datetime, timezone
from pathlib import Path

from model_store.errors import CsvError, NotFoundError, RbfgateError
from model_store.refusal import from_text
from model_store.store import Store, resolve_store_root
from model_store.store.history import format_time
from model_store.store.preview import preview
from model_store.store.signer import generate_key_files, sign_bundle
from model_store.store.signing import parse_public_key
from model_store.store.state import stack_before
from model_store.store.timeline import parse_moment
from model_store.tables import CsvFile

__all__ = ["count_argument", "default_actor", "read_preview_inputs", "register"]


def register(subparsers, environ: Mapping[str, str] | None = None) -> None:
    """Add the store commands; ``environ`` (default ``os.environ``) supplies RBFGATE_STORE, HOME and USER."""
    environ = os.environ if environ is None else environ

    def add(name: str, handler, help_text: str, *, store: bool = True, actor: bool = False):
        parser = subparsers.add_parser(name, help=help_text, description=help_text)
        if store:
            parser.add_argument("--store", metavar="DIR", help="store directory (default: $RBFGATE_STORE, "
                                "else $XDG_DATA_HOME/rbfgate/store, else ~/.local/share/rbfgate/store)")
        if actor:
            parser.add_argument("--actor", metavar="NAME", help="who is acting, for the history (default: the OS user)")
        parser.set_defaults(handler=functools.partial(_guarded, handler, environ=environ))
        return parser

    parser = add("publish", _publish, "verify a bundle and store it as an immutable version", actor=True)
    parser.add_argument("bundle", metavar="BUNDLE", help="bundle directory or its single-file .tar")
    parser = add("versions", _versions, "list every stored version, its digest and times, and which is active")
    parser.add_argument("name", metavar="NAME")
    parser = add("activate", _activate, "re-verify a stored version and make it the active one", actor=True)
    parser.add_argument("name", metavar="NAME")
    parser.add_argument("version", metavar="VERSION")
    parser.add_argument("--reason", metavar="TEXT", required=True, help="why (kept in the history)")
    parser.add_argument("--accept-breaking", action="store_true",
                        help="activate even if the candidate would break callers (the history records what changed)")
    parser.add_argument("--inputs", metavar="CSV", help="recent inputs, one column per feature of the active version: "
                        "a narrowed range breaks callers if some of them fall outside it (without inputs, if it "
                        "excludes part of the active version's training range)")
    parser = add("rollback", _rollback, "return to the version that was active before the current one", actor=True)
    parser.add_argument("name", metavar="NAME")
    parser.add_argument("--reason", metavar="TEXT", required=True, help="why (kept in the history)")
    parser = add("outside-domain", _outside_domain, "show or choose what a model does with records outside its "
                 "domain: refuse them (the default) or answer them flagged; the choice is kept in the history",
                 actor=True)
    parser.add_argument("name", metavar="NAME")
    parser.add_argument("action", metavar="ACTION", nargs="?", choices=("refuse", "flag"),
                        help="refuse or flag; omit it to show the current choice")
    parser.add_argument("--reason", metavar="TEXT", help="why (required with ACTION, kept in the history)")
    parser = add("history", _history, "print the history of a model; --verify checks everything it vouches for; "
                 "--at TIME says which version was live then")
    parser.add_argument("name", metavar="NAME")
    parser.add_argument("--verify", action="store_true", help="check the hash chain, the active pointer, every "
                        "version folder against its publish entry, and the trust trail")
    parser.add_argument("--at", metavar="TIME", help="RFC 3339 date-time (e.g. 2026-11-30T14:00:00Z): the version live "
                        "then, the entry that made it live and the one that ended it, from the verified history")
    parser.add_argument("--json", action="store_true", help="print JSON instead of text")
    parser = add("preview", _preview, "compare a candidate version with the active one; changes nothing")
    parser.add_argument("name", metavar="NAME")
    parser.add_argument("version", metavar="VERSION")
    parser.add_argument("--inputs", metavar="CSV", help="recent inputs to compare on, one record per row and one column "
                        "per feature of the active version (other columns, such as an id, are ignored)")
    parser = add("prune", _prune, "remove old versions, never the active one or the rollback target", actor=True)
    parser.add_argument("name", metavar="NAME")
    parser.add_argument("--keep", metavar="N", type=count_argument, required=True, help="how many newest versions to keep")
    parser = add("repair-pointer", _repair_pointer, "rebuild a model's active pointer (active.json) from its verified "
                 "history, when it is missing or disagrees with the history (say, after a restore from a backup); "
                 "refused, changing nothing, while anything else fails verification", actor=True)
    parser.add_argument("name", metavar="NAME")
    parser.add_argument("--reason", metavar="TEXT", required=True, help="why (kept in the history)")
    parser = add("keygen", _keygen, "create an Ed25519 key pair PREFIX.key (secret) and PREFIX.pub", store=False)
    parser.add_argument("--out", metavar="PREFIX", required=True, help="path prefix of the two key files")
    parser = add("sign", _sign, "verify a bundle and sign its digest (signature.json beside the manifest)", store=False)
    parser.add_argument("bundle", metavar="BUNDLE", help="bundle directory or its single-file .tar")
    parser.add_argument("--key", metavar="PRIVATE_KEY", required=True, help="the .key file from 'rbfgate keygen'")
    _register_trust(subparsers.add_parser(
        "trust", help="manage the public keys a store accepts signatures from",
        description="Manage the public keys a store accepts signatures from. With at least one trusted key, "
                    "publish and activate refuse unsigned and badly signed bundles.",
    ), environ)


def _register_trust(parser, environ) -> None:
    actions = parser.add_subparsers(dest="trust_command", metavar="ACTION", required=True)
    for name, handler, help_text in (
        ("add", _trust_add, "trust a public key (a .pub file from 'rbfgate keygen', or 64 hex characters)"),
        ("list", _trust_list, "list the trusted keys"),
        ("remove", _trust_remove, "stop trusting a key (by its key id)"),
        ("history", _trust_history, "print the trust trail: every key added or removed, by whom and when"),
    ):
        sub = actions.add_parser(name, help=help_text, description=help_text)
        sub.add_argument("--store", metavar="DIR", help="store directory (default as for the other store commands)")
        if name == "history":
            sub.add_argument("--json", action="store_true", help="print JSON instead of text")
        if name in ("add", "remove"):
            sub.add_argument("--actor", metavar="NAME", help="who is acting (default: the OS user)")
        sub.set_defaults(handler=functools.partial(_guarded, handler, environ=environ))
        if name == "add":
            sub.add_argument("public_key", metavar="PUBLIC_KEY")
            sub.add_argument("--label", metavar="TEXT", help="whose key this is, shown by 'trust list'")
        elif name == "remove":
            sub.add_argument("key_id", metavar="KEY_ID")


def default_actor(environ: Mapping[str, str]) -> str:
    """``$USER``, else ``$LOGNAME``, else the password-database name of the process's user."""
    for variable in ("USER", "LOGNAME"):
        if environ.get(variable, "").strip():
            return environ[variable].strip()
    try:
        return pwd.getpwuid(os.getuid()).pw_name
    except KeyError:
        return f"uid-{os.getuid()}"


def read_preview_inputs(
    path: Path, features: Sequence[str] | None = None, model: str = "the model"
) -> tuple[list[dict[str, str]], list[int]]:
    """CSV rows as text records (read as ``rbfgate score`` reads them) and their data-row numbers.

    With ``features`` (the active version's, named ``model`` in messages), a header that lacks any of
    them is refused: recent inputs without a feature's column cannot say whether callers stay inside
    its range, and a file of other columns would otherwise pass as "no recent inputs".
    """
    records, numbers = [], []
    with CsvFile(path) as rows:
        if features is not None:
            _check_columns(path, rows.header, features, model)
        for row in rows:
            if len(row.fields) > len(rows.header):
                raise CsvError(str(path), f"has {len(row.fields)} fields, the header has {len(rows.header)}", row=row.number)
            records.append(dict(zip(rows.header, row.fields)))
            numbers.append(row.number)
    return records, numbers


def _check_columns(path: Path, header: Sequence[str], features: Sequence[str], model: str) -> None:
    missing = [name for name in features if name not in header]
    if not missing:
        return
    has = ", ".join(header) or "(no columns)"
    if len(missing) == len(features):
        raise CsvError(str(path), f"holds none of the feature columns of {model} (expected {', '.join(features)}; "
                                  f"the header has {has}); give recent inputs with one column per feature, named so")
    raise CsvError(str(path), f"lacks the feature column(s) {', '.join(missing)} of {model} (the header has {has}); "
                              "give recent inputs with every feature's column")


def _inputs(store: Store, name: str, path: str | None) -> tuple[list[dict[str, str]], list[int]]:
    """The ``--inputs`` records, checked against the active version's features (nothing to check
    against when no version is active or its manifest cannot be read: the command itself says so)."""
    if path is None:
        return [], []
    features, model = None, "the model"
    active = store.active(name)
    if active is not None:
        try:
            _, manifest, _ = store.manifest(name, active.version)
        except RbfgateError:
            manifest = None
        if manifest is not None:
            features, model = manifest.feature_names, f"{name} {active.version} (the active version)"
    return read_preview_inputs(Path(path), features, model)


def count_argument(text: str) -> int:
    """argparse type: a whole number, 0 or more."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"{value} is negative; give 0 or more")
    return value


def _guarded(handler, args, *, environ) -> int:
    # An OSError the store modules did not already explain is reported by cli.main as one line.
    return handler(args, environ)


def _store(args, environ, *, create: bool = False) -> Store:
    """The store of ``--store``, after refusing a link, FIFO, device or socket in place of its ``staging/`` or
    ``lock``, so that every command (reading ones too) names it in one line."""
    store = Store(resolve_store_root(args.store, environ), create=create)
    store.check_work_entries()
    return store


def _actor(args, environ) -> str:
    return args.actor if args.actor is not None else default_actor(environ)


def _publish(args, environ) -> int:
    if not Path(args.bundle).exists():  # before the store is created: a typo must not leave an empty store
        raise NotFoundError(f"{args.bundle}: no such bundle; pass a bundle directory or its .tar file")
    store = _store(args, environ, create=True)
    outcome = store.publish(Path(args.bundle), actor=_actor(args, environ), via="cli")
    if outcome.already_present:
        print(f"{outcome.name} {outcome.version} is already published with digest {outcome.digest}; nothing changed")
    else:
        print(f"published {outcome.name} {outcome.version} (digest {outcome.digest}) to {store.root}")
    return 0


def _versions(args, environ) -> int:
    rows = [("VERSION", "DIGEST", "CREATED", "PUBLISHED", "ACTIVE")]
    for info in _store(args, environ).versions(args.name):
        rows.append((info.version, info.digest, info.created, info.published_at, "active" if info.active else ""))
    widths = [max(len(row[column]) for row in rows) for column in range(5)]
    for row in rows:
        print("  ".join(value.ljust(width) for value, width in zip(row, widths)).rstrip())
    return 0


def _activate(args, environ) -> int:
    store = _store(args, environ)
    records, _ = _inputs(store, args.name, args.inputs)
    compared: list = []
    entry = store.activate(
        args.name, args.version, reason=args.reason, actor=_actor(args, environ), via="cli",
        accept_breaking=args.accept_breaking, recent=records, convert=from_text, on_compared=compared.append,
    )
    print(f"activated {args.name} {entry['version']} (digest {entry['digest']}); history entry seq {entry['seq']}")
    if compared:
        print(f"contract compared with the previous active version; narrowed ranges judged on: "
              f"{compared[0].range_basis}")
    for change in entry.get("accepted_breaking", []):
        print(f"accepted breaking change: {change}")
    return 0


def _rollback(args, environ) -> int:
    store = _store(args, environ)
    entry = store.rollback(args.name, reason=args.reason, actor=_actor(args, environ), via="cli")
    undone = stack_before(store.history(args.name), entry["seq"])[-1]
    print(f"rolled {args.name} back from {undone.version} to {entry['version']} (digest {entry['digest']}): "
          f"{entry['version']} was active before {undone.version} was activated at seq {undone.seq}; "
          f"history entry seq {entry['seq']}")
    return 0


def _outside_domain(args, environ) -> int:
    store = _store(args, environ)
    if args.action is None:
        print(f"{args.name}: records outside the domain are {_CHOSEN[store.outside_action(args.name)]}")
        return 0
    entry = store.set_outside_action(args.name, args.action, reason=args.reason, actor=_actor(args, environ), via="cli")
    print(f"{args.name}: records outside the domain are now {_CHOSEN[args.action]}; history entry seq {entry['seq']}")
    return 0


_CHOSEN = {"refuse": "refused (outside_domain)", "flag": "answered, flagged with domain verdict outside"}


def _history(args, environ) -> int:
    store = _store(args, environ)
    if args.at is not None:
        return _history_at(store, args)
    document = store.history_document(args.name, verify=args.verify)
    verification = document.get("verification")
    problem = None if verification is None else verification["problem"]
    if args.json:
        print(json.dumps(document, indent=2, ensure_ascii=False))
    else:
        for entry in document["entries"]:
            print(_entry_line(entry))
        if verification is not None and problem is None:
            print(f"verified: {verification['entries']} entries, the hash chain is intact, its last entry matches the "
                  "active pointer, every version folder holds what its publish entry recorded, and the trusted keys "
                  "match the trust trail")
    if problem is not None:
        print(f"rbfgate history: verification failed: {problem}", file=sys.stderr)
        return 1
    return 0


def _history_at(store: Store, args) -> int:
    live = store.live_at(args.name, parse_moment(args.at))
    if args.json:
        print(json.dumps(live.to_dict(), indent=2, ensure_ascii=False))
        return 0
    print(f"{args.name} at {live.at}: version {live.version} (digest {live.digest})")
    print(f"made live by: {_entry_line(live.made_live)}")
    print(f"ended by:     {_entry_line(live.ended)}" if live.ended else "ended by:     - (still live)")
    return 0


def _entry_line(entry: dict) -> str:
    digest = f"{entry['digest'][:16]}..." if entry["digest"] else "-"
    key = f"  key {entry['key_id']}" if "key_id" in entry else ""
    return (f"seq {entry['seq']}  {entry['time']}  {entry['action']}  {entry['version'] or '-'}  digest {digest}{key}  "
            f"by {entry['actor']} via {entry.get('via') or '-'}  reason: {entry['reason'] or '-'}"
            + "".join(f"  accepted breaking: {change}" for change in entry.get("accepted_breaking", [])))


def _preview(args, environ) -> int:
    store = _store(args, environ)
    records, numbers = _inputs(store, args.name, args.inputs)
    report = preview(store, args.name, args.version, records, record_rows=numbers, convert=from_text, allow_extra=True)
    print(report.render_text())
    return 0


def _prune(args, environ) -> int:
    removed = _store(args, environ).prune(args.name, keep=args.keep, actor=_actor(args, environ), via="cli")
    print(f"removed from {args.name}: {', '.join(removed)}" if removed else f"nothing to remove from {args.name}")
    return 0


def _repair_pointer(args, environ) -> int:
    store = _store(args, environ)
    repair = store.repair_pointer(args.name, reason=args.reason, actor=_actor(args, environ), via="cli")
    if repair.entry is None:
        print(f"nothing to repair: the active pointer of {args.name} is what its verified history leads to")
        return 0
    entry = repair.entry
    names = f"version {entry['version']} (digest {entry['digest']})" if entry["version"] else "no active version"
    print(f"rebuilt the active pointer of {args.name}: it names {names}, as the verified history says; "
          f"history entry seq {entry['seq']}")
    print(f"found: {repair.found}")
    return 0


def _keygen(args, environ) -> int:
    keys = generate_key_files(Path(args.out))
    print(f"wrote {keys.private_path} (secret: keep it private) and {keys.public_path}; key id {keys.key_id}")
    print(f"trust it in a store with: rbfgate trust add {keys.public_path} --store DIR")
    return 0


def _sign(args, environ) -> int:
    document = sign_bundle(Path(args.bundle), Path(args.key), format_time(datetime.now(timezone.utc)))
    print(f"signed {args.bundle}: digest {document['digest']}, key id {document['key_id']}")
    return 0


def _trust_add(args, environ) -> int:
    public_key = parse_public_key(args.public_key)
    key = _store(args, environ, create=True).add_trusted_key(
        public_key, label=args.label or "", actor=_actor(args, environ), via="cli"
    )
    print(f"trusted key {key.key_id} ({key.label or 'no label'}); this store now requires signed bundles")
    return 0


def _trust_list(args, environ) -> int:
    keys = _store(args, environ).trusted_keys()
    if not keys:
        print("no trusted keys: this store does not require signatures")
    for key in keys:
        print(f"{key.key_id}  {key.public_key}  added {key.added_at} by {key.added_by}  {key.label}".rstrip())
    return 0


def _trust_remove(args, environ) -> int:
    store = _store(args, environ)
    key = store.remove_trusted_key(args.key_id, actor=_actor(args, environ), via="cli")
    remaining = store.trusted_keys()
    print(f"removed trusted key {key.key_id}" + ("" if remaining else "; no trusted keys remain, so signatures are no "
                                                  "longer required"))
    return 0


def _trust_history(args, environ) -> int:
    entries = _store(args, environ).trust_history()
    if args.json:
        print(json.dumps({"entries": entries}, indent=2, ensure_ascii=False))
    elif not entries:
        print("no trust changes recorded")
    for entry in [] if args.json else entries:
        print(_entry_line(entry))
    return 0
