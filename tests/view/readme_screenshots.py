"""Write the README's screenshots of the pages: ``python -m tests.view.readme_screenshots``.

Runs what the page tests run (the invented pallet data, two versions, a real ``rbfgate serve``
with tokens, Debian chromium) and keeps one small PNG per page in model_store/view/screenshots/,
beside the code that draws them (not shipped in the package: package-data lists assets/ only).
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

import httpx
from PIL import Image

from tests.view.browser import Tab, chromium
from tests.view.conftest import MODEL, serve, train_demo_bundles

OUT = Path(__file__).resolve().parents[2] / "model_store" / "view" / "screenshots"
_WIDTH = 760  # pixels in the README


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=OUT)
    args = parser.parse_args()
    args.out.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory() as folder:
        work = Path(folder)
        bundles = train_demo_bundles(work / "data")
        with serve(work, bundles, tokens=True) as site, chromium(work / "profile", viewport={"width": 1100, "height": 900}) as context:
            records = [dict(zip(bundles["1.0.0"].feature_names, row)) for row in bundles["1.0.0"].manifest.golden.inputs[:20]]
            records.append({**records[0], "core_temp_c": 40.0})
            httpx.post(f"{site.url}/score/{MODEL}", json={"records": records},
                       headers={"Authorization": f"Bearer {site.tokens['score']}"}).raise_for_status()
            tab = Tab.open(context)
            tab.set_token(site.url, site.tokens["operate"])
            shots = {
                "models": "/view/",
                "timeline": f"/view/models/{MODEL}",
                "card": f"/view/models/{MODEL}/versions/2.0.0",
                "preview": f"/view/models/{MODEL}/preview",
            }
            for name, path in shots.items():
                page = tab.visit(site.url + path)
                if name == "preview":
                    page.wait_for_selector("#report #contract")
                if name == "card":  # past the identity table, to the plots
                    page.evaluate("document.querySelectorAll('section.panel')[2].scrollIntoView()")
                _keep(tab, args.out / f"{name}.png")
            tab.assert_clean()
            tab = Tab.open(context)  # a new tab starts without a token (sessionStorage is per tab)
            tab.set_token(site.url, site.tokens["score"])
            page = tab.visit(f"{site.url}/view/models/{MODEL}/try")
            page.fill("#field-core_temp_c", "9.5")
            page.click("#record-form ~ .actions button[type=submit]")
            page.wait_for_selector("#answer[data-status]")
            _keep(tab, args.out / "try.png")
            tab.assert_clean()
    for file in sorted(args.out.glob("*.png")):
        print(f"{file}: {file.stat().st_size // 1024} KiB")


def _keep(tab: Tab, path: Path) -> None:
    """The first screen of the page, scaled to the README's width, in 256 colours."""
    tab.page.screenshot(path=str(path))
    image = Image.open(path).convert("RGB")
    image = image.resize((_WIDTH, round(image.height * _WIDTH / image.width)), Image.LANCZOS)
    image.quantize(colors=256, method=Image.Quantize.MEDIANCUT).save(path, optimize=True)


if __name__ == "__main__":
    main()
