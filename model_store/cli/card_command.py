"""``rbfgate card BUNDLE --out card.html``: the model card as one self-contained HTML file.

The file holds the card document, the plotting scripts and the style sheet, so it opens in a
browser with no network and no server, for an auditor's records. The bundle is loaded and
self-tested first; a bundle that fails gets no card.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

from model_store.errors import InputError

__all__ = ["register"]


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "card", help="write a bundle's model card (identity, metrics, plots) as one self-contained HTML file"
    )
    parser.add_argument("bundle", type=Path, help="bundle directory or .tar file")
    parser.add_argument("--out", type=Path, required=True, metavar="FILE",
                        help="HTML file to write (replaced if it exists); it opens offline")
    parser.set_defaults(handler=_card)


def _card(args) -> int:
    from model_store.view.pages import offline_card_html
    from model_store.view.sources import file_card

    out: Path = args.out
    if out.is_dir():
        raise InputError(f"--out {out}: is a directory; give a file name such as {out / 'card.html'}")
    if not out.parent.is_dir():
        raise InputError(f"--out {out}: the folder {out.parent} does not exist; create it first")
    card = file_card(args.bundle)
    text = offline_card_html(card)
    # Written beside the target and renamed into place: never a half-written card.
    handle, staging = tempfile.mkstemp(prefix=f".{out.name}.", dir=out.parent)
    try:
        with os.fdopen(handle, "w", encoding="utf-8") as stream:
            stream.write(text)
        os.replace(staging, out)
    except BaseException:
        Path(staging).unlink(missing_ok=True)
        raise
    print(f"wrote the model card of {card['model']} {card['version']} to {out} ({len(text.encode('utf-8')) // 1024} KiB); "
          "it opens in a browser with no network")
    return 0
