"""HTML of the pages under ``/view/`` and of the offline model card.

A served page is a small fixed shell: it holds no model data, only which page it is and the
names in its path, and loads its data with the caller's token from the JSON routes
(``assets/client.js``), so each page follows exactly the role rules of the data it shows.
The offline card (``rbfgate card``) is one file: the same scripts and style inlined, and the card
document embedded as JSON, so it opens with no network and no server.
"""

from __future__ import annotations

import html
import json
from typing import Any

from model_store.view.assets import asset_text

__all__ = ["PAGES", "VENDOR_SCRIPTS", "offline_card_html", "page_html"]

VENDOR_SCRIPTS = ("vendor/vega.min.js", "vendor/vega-lite.min.js", "vendor/vega-interpreter.js")
# page kind -> (title, the page's own script)
PAGES = {
    "models": ("Models", "models.js"),
    "timeline": ("Timeline", "timeline.js"),
    "card": ("Model card", "cardpage.js"),
    "try": ("Try a record", "try.js"),
    "preview": ("Preview a switch", "preview.js"),
}
_ASSETS = "/view/assets/"


def page_html(kind: str, *, model: str | None = None, version: str | None = None) -> str:
    """The shell of one page; ``model`` and ``version`` are names already checked by the caller."""
    title, script = PAGES[kind]
    heading = " ".join(part for part in (title, model, version) if part)
    attributes = f'data-page="{kind}"'
    for name, value in (("model", model), ("version", version)):
        if value is not None:
            attributes += f' data-{name}="{html.escape(value, quote=True)}"'
    scripts = [*VENDOR_SCRIPTS, "charts.js", "card.js", "client.js", script]
    tags = "\n".join(f'<script src="{_ASSETS}{name}"></script>' for name in scripts)
    return f"""<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{html.escape(heading)} - rbfgate</title>
<link rel="icon" href="data:,">
<link rel="stylesheet" href="{_ASSETS}view.css">
</head>
<body {attributes}>
<header class="bar">
<a class="brand" href="/view/">rbfgate</a>
<nav id="nav" aria-label="pages"></nav>
<div id="session" class="session"></div>
</header>
<main id="main"><h1>{html.escape(heading)}</h1><p class="muted" id="status">Loading...</p></main>
{tags}
</body>
</html>
"""


def offline_card_html(card: dict[str, Any]) -> str:
    """One self-contained HTML file drawing ``card`` (``model_store.view.card.bundle_card``)."""
    data = json.dumps(card, ensure_ascii=False, allow_nan=False)
    # Inside <script>, "</" could close the element early; "<\/" is the same text in JSON and JS.
    data = data.replace("</", "<\\/").replace("<!--", "<\\!--")
    scripts = "\n".join(
        f"<script>\n{_inline(asset_text(name))}\n</script>"
        for name in (*VENDOR_SCRIPTS, "charts.js", "card.js", "offline.js")
    )
    title = html.escape(f"Model card {card['model']} {card['version']}")
    return f"""<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta http-equiv="Content-Security-Policy" content="default-src 'none'; script-src 'unsafe-inline'; style-src 'unsafe-inline'; img-src data:">
<title>{title}</title>
<link rel="icon" href="data:,">
<style>
{asset_text("view.css")}
</style>
</head>
<body data-page="offline-card">
<header class="bar"><span class="brand">rbfgate</span><span class="muted">model card, written by rbfgate card</span></header>
<main id="main"><h1>{title}</h1><p class="muted" id="status">Drawing...</p></main>
<script type="application/json" id="card-data">{data}</script>
{scripts}
</body>
</html>
"""


def _inline(script: str) -> str:
    """A script's text made safe to inline: no sequence in it may end the <script> element."""
    return script.replace("</script", "<\\/script").replace("</SCRIPT", "<\\/SCRIPT")
