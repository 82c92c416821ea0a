"""Speed of the atlas and of the demo's swatches; prints a table, tests nothing.

    python scripts/bench_atlas.py              # needs Chromium on PATH for the page rows

Rows and their targets (on a quiet developer machine):
- drawing the atlas of a ResNet-50 layer4-sized layer (2,048 units, 16 exemplars each);
- drawing it again with nothing changed (target: under 1 s: only the state is compared);
- that layer's page interactive in Chromium, navigation start to handlers set (target: under 1 s);
- re-sorting its 2,048 cards by peak (target: under 300 ms);
- rendering one procedural swatch (target: 5 ms; a per-pixel Python loop costs hundreds).
The fake run is the one the atlas tests draw (tests/test_atlas.py: fake_run).
"""
from __future__ import annotations

import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path[:0] = [str(ROOT), str(ROOT / "tests")]

REPEAT = 3


def seconds(fn) -> float:
    t = time.perf_counter()
    fn()
    return time.perf_counter() - t


def page_rows(layer_page: Path, index: Path) -> list[tuple[str, float, str]]:
    import cdp

    chromium = cdp.find_chromium()
    if chromium is None:
        print("no Chromium or Chrome on PATH: the page rows are left out", file=sys.stderr)
        return []
    browser = cdp.Browser(chromium)
    try:
        warm = browser.page(1280, 900)
        warm.goto(index.as_uri())  # a first page pays for the browser's own start
        warm.close()
        ready, resort = [], []
        sort = ("(() => { const t = performance.now(); const e = document.getElementById('sort'); "
                "e.value = 'peak'; e.dispatchEvent(new Event('change')); return performance.now() - t; })()")
        for _ in range(REPEAT):
            page = browser.page(1280, 900)
            page.goto(layer_page.as_uri())
            page.wait_for("document.readyState === 'complete' && document.documentElement.dataset.ready")
            ready.append(max(float(page.js("document.documentElement.dataset.ready")),
                             page.js("performance.getEntriesByType('navigation')[0].domContentLoadedEventEnd")))
            resort.append(page.js(sort))
            page.close()
    finally:
        browser.close()
    return [("2,048-unit layer page interactive", statistics.median(ready), "ms, target < 1000"),
            ("re-sorting 2,048 cards by peak", statistics.median(resort), "ms, target < 300")]


def main() -> None:
    from test_atlas import fake_run

    from unitlens import render_atlas
    from unitlens.demo.swatches import render, sample

    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        run = fake_run(Path(tmp) / "run")
        first = seconds(lambda: render_atlas(run))
        again = statistics.median(seconds(lambda: render_atlas(run)) for _ in range(REPEAT))
        rows += [("drawing a 2,048-unit atlas", first * 1000, "ms"),
                 ("drawing it again, nothing changed", again * 1000, "ms, target < 1000")]
        rows += page_rows(run.path / "atlas" / "layer-layer4.html", run.path / "atlas" / "index.html")
    swatches = [sample(i) for i in range(60)]
    per = statistics.median(seconds(lambda: [render(s) for s in swatches]) for _ in range(REPEAT)) / len(swatches)
    rows.append(("rendering one swatch", per * 1000, "ms, target 5"))
    for what, value, unit in rows:
        print(f"{what:<40} {value:10.1f} {unit}")


if __name__ == "__main__":
    main()
