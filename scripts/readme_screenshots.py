"""Redraw the README's atlas screenshots from the demo: docs/atlas-index.png, atlas-layer.png,
atlas-unit.png and atlas-unit-dark.png.

Builds (or resumes) the demo in --work with `unitlens demo`'s own code, then photographs its pages
in headless Chromium through tests/cdp.py (our DevTools client). The unit shown is block3's unit
whose exemplars are most of one swatch kind (factors.csv), so the picture shows a unit that reads.

    python scripts/readme_screenshots.py --count 600 --units 16 --steps 64   # the README's pictures
    python scripts/readme_screenshots.py --count 2000 --units 0   # the whole demo (every unit)
"""
from __future__ import annotations

import argparse
import csv
import sys
import time
from collections import Counter
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

import cdp  # noqa: E402 (the tests folder goes on the path first)

from unitlens import build_demo  # noqa: E402
from unitlens.store import Run, read_npz  # noqa: E402


def clearest_unit(run: Run, layer: str) -> int:
    """The unit of `layer` whose top exemplars are most often one kind of swatch (ties: lower id)."""
    with open(run.path / "corpus" / "factors.csv") as fh:
        kinds = {r["file"]: r["kind"] for r in csv.DictReader(fh)}
    files = run.corpus().files
    idx = read_npz(run.layer_dir(layer) / "index.npz")
    best, best_n = int(idx["units"][0]), -1
    for p, u in enumerate(idx["units"]):
        top = [kinds.get(files[i], "?") for i in idx["top_image"][p] if i < len(files)]
        n = Counter(top).most_common(1)[0][1] if top else 0
        if n > best_n:
            best, best_n = int(u), n
    return best


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--work", type=Path, default=Path("/tmp/unitlens-readme-demo"))
    ap.add_argument("--count", type=int, default=1000)
    ap.add_argument("--units", type=int, default=32, help="units per layer (0: all)")
    ap.add_argument("--steps", type=int, default=128)
    ap.add_argument("--docs", type=Path, default=ROOT / "docs")
    a = ap.parse_args()
    chromium = cdp.find_chromium()
    if chromium is None:
        sys.exit("Error: no Chromium or Chrome on PATH; install one (Debian: apt install chromium).")
    index = build_demo(a.work, count=a.count, units=a.units or None, steps=a.steps)
    atlas, run = index.parent, Run(a.work)
    unit = clearest_unit(run, "block3")
    a.docs.mkdir(exist_ok=True)
    b = cdp.Browser(chromium)
    try:
        for name, url, width, height, dark, ready in (
                ("atlas-index.png", index.as_uri(), 1280, 900, False, "document.readyState === 'complete'"),
                ("atlas-layer.png", (atlas / "layer-block3.html").as_uri(), 1280, 900, False, "document.documentElement.dataset.ready"),
                ("atlas-unit.png", (atlas / "layer-block3.html").as_uri() + f"#unit-{unit}", 1280, 1400, False,
                 "document.getElementById('unit').dataset.complete"),
                ("atlas-unit-dark.png", (atlas / "layer-block3.html").as_uri() + f"#unit-{unit}", 420, 1500, True,
                 "document.getElementById('unit').dataset.complete")):
            page = b.page(width, height, dark)
            page.goto(url)
            page.wait_for(ready)
            time.sleep(0.5)  # let the images decode
            page.screenshot(a.docs / name)
            page.close()
            print(a.docs / name)
    finally:
        b.close()


if __name__ == "__main__":
    main()
