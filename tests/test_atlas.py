"""The static atlas (unitlens/atlas/): what it shows, that it escapes everything, that it opens from
file:// in a real browser without errors or network requests, and that a 2,048-unit layer is fast.

Browser checks drive headless Chromium over the DevTools protocol (tests/cdp.py). Screenshots go to
a temporary folder (printed); with UNITLENS_DOCS_SCREENSHOTS=1 they are also copied into docs/.
"""
import json
import math
import os
import re
import shutil
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
import torch
from PIL import Image

from conftest import ROOT, TESTS, run_cli
from unitlens import MineConfig, UnitlensError, load_model, mine, open_corpus, parse_layers, render_atlas
from unitlens.atlas.data import SPARK, rebin, spark
from unitlens.crops import SHEET_ROWS, sheet_cell
from unitlens.tally import LayerTally, hist_edges, index_arrays
from unitlens.store import Run, read_npz, safe_name, write_json, write_npz
from unitlens.units import LayerUnits

HOSTILE = "<img src=x onerror=alert(1)>"  # a corpus file name
HOSTILE_CLASS = "<i onmouseover=alert(2)>"  # a folder name, so a class label
HOSTILE_LAYER = "<svg onload=alert(3)>"  # a module name of a user's model
SOURCES = (".html", ".js", ".css")


# -- runs to draw ------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    """A real run: swatches + hostile names, mined with a small net (layers 3: ReLU, 6: goes negative),
    synthesised for a few units of layer 6 and for layer 1, which was never mined."""
    from unitlens.demo.swatches import write_corpus
    from unitlens.synth import Goal, SynthConfig, synthesize

    d = tmp_path_factory.mktemp("tiny")
    corpus = d / "corpus"
    write_corpus(corpus, count=18, size=48)
    (corpus / "factors.csv").unlink(missing_ok=True)
    Image.fromarray(np.full((40, 56, 3), 255, np.uint8)).save(corpus / "stripe" / f"{HOSTILE}.png")
    (corpus / HOSTILE_CLASS).mkdir()
    Image.fromarray(np.full((44, 44, 3), (250, 40, 40), np.uint8)).save(corpus / HOSTILE_CLASS / "red.png")
    (corpus / "dots" / f"{HOSTILE}.jpg").write_bytes(b"not a jpeg")  # skipped, with a reason
    torch.manual_seed(0)
    model = load_model(f"{TESTS / 'nets.py'}:digits_net", size=32)
    run = mine(model, open_corpus(corpus, labels="folders"), parse_layers(model, ["3", "6"]), d / "run",
               MineConfig(top_k=5, workers=0, thumb=32))
    synthesize(model, Goal(("6:0-2", "1:0-1")), d / "run", SynthConfig(steps=8, checks=2, per_unit=2))
    index = render_atlas(run)
    return SimpleNamespace(run=run, atlas=index.parent, index=index)


def fake_run(root: Path, layer: str = "layer4", units: int = 2048, k: int = 16, images: int = 64, thumb: int = 16,
             synth: bool = True, negative: bool = False) -> Run:
    """A run folder in the real on-disk format with made-up numbers (nothing is mined): the index
    comes from mining's own LayerTally and index_arrays, fed random feature maps."""
    run, rng = Run(root), np.random.default_rng(0)
    classes = ["a", "b", "c", "d"]
    t = LayerTally(tuple(range(units)), units, 2, k, len(classes))
    scale = torch.from_numpy(rng.uniform(0.2, 3, units)).float().view(1, -1, 1, 1)
    shift = torch.from_numpy(rng.normal(0, 1, units)).float().view(1, -1, 1, 1)
    g = torch.Generator().manual_seed(0)
    for s in range(0, images, 32):
        f = torch.randn(32, units, 2, 2, generator=g) * scale + shift  # (B, U, 2, 2)
        t.update(f if negative else torch.relu(f), torch.arange(s, s + 32), torch.arange(s, s + 32) % 4)
    lu = LayerUnits(layer, tuple(range(units)))
    idx = index_arrays(t, SimpleNamespace(channels=units, height=2, width=2), lu)
    kinds = ["top", "bottom"] if negative else ["top"]
    idx.update({f"{kd}_box": rng.integers(0, 40, (units, k, 4)) for kd in kinds})
    idx.update(sheet_rows=np.array(SHEET_ROWS), sheet_cols=np.array(k * len(kinds)), thumb=np.array(thumb))
    d = run.layer_dir(layer)
    d.mkdir(parents=True)
    write_npz(d / "index.npz", **idx)
    for s in range(0, units, SHEET_ROWS):
        rows = min(SHEET_ROWS, units - s)
        px = rng.integers(0, 255, (rows * thumb, k * len(kinds) * thumb, 3), dtype=np.uint8)
        Image.fromarray(px).save(d / sheet_cell(s, 0)[0], quality=60)
    files = [f"{classes[i % 4]}/img{i:04d}.jpg" for i in range(images)]
    write_json(root / "corpus.json", {"root": "/data", "files": files, "labels": [f[0] for f in files]})
    m = {"model": {"spec": "torchvision:resnet50", "weights": {"kind": "file", "path": "/w/r50.pth", "sha256": "ab" * 32},
                   "arch_options": {}, "preprocess": {"size": 224, "mean": [0.485, 0.456, 0.406],
                                                      "std": [0.229, 0.224, 0.225], "source": "made up"}},
         "corpus": {"source": "/data", "count": images, "classes": classes, "labelled": True, "skipped": [],
                    "ignored": []},
         "mine": {"done": True, "layers": {layer: {"units": units, "done": True}}, "config": {"top_k": k}}}
    if synth:
        sd = run.layer_dir(layer, "synth")
        sd.mkdir(parents=True)
        recs = {}
        for u in range(units):
            name = f"unit-{u:04d}-0.png"
            Image.fromarray(rng.integers(0, 255, (16, 16, 3), dtype=np.uint8)).save(sd / name)
            n = int(rng.integers(20, 64))
            trace = np.full((1, 64), np.nan, np.float32)
            trace[0, :n] = np.log1p(np.arange(n))
            np.savez(sd / f"unit-{u:04d}.npz", trace=trace, steps=np.array([n]))
            best = float(idx["top_score"][u, 0])
            mx = best * float(rng.uniform(0.5, 4))
            recs[str(u)] = {"unit": u, "best_exemplar": best, "trace": f"unit-{u:04d}.npz", "images": [
                {"file": name, "steps": n, "objective": 1.0, "activation": 1.0, "max_activation": mx,
                 "rank": int(rng.integers(1, 4)), "channels": units, "vs_best_exemplar": mx / best if best > 0 else None,
                 "robustness": {"n": 8, "mean": 0.9, "std": 0.1, "relative": 0.9}}]}
        write_json(sd / "units.json", {"layer": layer, "units": recs})
        m["synth"] = {"settings": {"config": {"steps": 64}}, "done": True,
                      "layers": {layer: {"done": units, "complete": True, "units": units}}}
    run.save_manifest(m)
    return run


@pytest.fixture(scope="module")
def big(tmp_path_factory):
    """A ResNet-50 layer4-sized layer: 2,048 units, 16 exemplars and one synthesised image each."""
    run = fake_run(tmp_path_factory.mktemp("big") / "run")
    index = render_atlas(run)
    return SimpleNamespace(run=run, atlas=index.parent, index=index)


def _units_data(atlas: Path, layer: str, which: str = "cards") -> dict:
    text = (atlas / "data" / f"{safe_name(layer)}.{which}.js").read_text()
    return json.loads(text.split("=", 1)[1].strip().rstrip(";"))


def _text(html: str) -> str:
    """The visible text of a page, roughly: tags dropped, entities kept as they are."""
    return re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", html))


# -- numbers -----------------------------------------------------------------------------------

HIST_CASES = [  # (name, per-image maxima)
    ("relu-like, a spike at zero", lambda r: np.maximum(0, r.normal(0.5, 1, 4000))),
    ("goes negative", lambda r: r.normal(-2, 3, 4000)),
    ("large values", lambda r: r.lognormal(3, 0.5, 4000)),
    ("bimodal", lambda r: np.concatenate([r.normal(1, 0.1, 2000), r.normal(5, 0.3, 2000)])),
]


def test_rebinned_histogram_matches_numpy_on_the_raw_values():
    rng = np.random.default_rng(1)
    for name, draw in HIST_CASES:
        v = draw(rng).astype(np.float32)
        t = LayerTally((0,), 1, 1, 1, 0)  # mining's own asinh histogram of per-image maxima
        t.update(torch.from_numpy(v).view(-1, 1, 1, 1), torch.arange(len(v)), None)
        lo, hi, counts = rebin(t.hist[0].numpy(), hist_edges(), float(v.min()), float(v.max()))
        assert lo <= v.min() and hi == pytest.approx(float(v.max())), name
        assert sum(counts) == pytest.approx(len(v)), name  # no image lost or invented
        truth, _ = np.histogram(v, bins=np.linspace(lo, hi, len(counts) + 1))  # the oracle: numpy on raw values
        moved = np.abs(np.array(counts) - truth).sum() / 2 / len(v)
        assert moved < 0.04, f"{name}: {moved:.1%} of the images land in another bin than numpy puts them"


def test_rebin_edge_cases():
    edges = hist_edges()
    for name, counts, low, high, expect in [
        ("dead unit: every maximum is 0", {240: 50}, 0.0, 0.0, (0.0, 0.0, [50])),
        ("one value", {300: 7}, 3.0, 3.0, (3.0, 3.0, [7])),
        ("nothing counted", {}, 0.0, 1.0, (None, None, [])),
    ]:
        c = np.zeros(len(edges) - 1)
        for j, n in counts.items():
            c[j] = n
        assert rebin(c, edges, low, high) == expect, name


def test_spark_string_keeps_shape_and_never_hides_an_occupied_bin():
    s = spark([0, 1, 50, 100, 0.01])
    assert len(s) == 5 and s[0] == SPARK[0] and s[3] == SPARK[63] and s[4] == SPARK[1]
    assert SPARK.index(s[2]) == round(63 * 0.5)
    assert spark([]) == "" and spark([0, 0]) == ""


# -- pages as files ----------------------------------------------------------------------------

def test_index_page_summarises_the_run(tiny):
    html = tiny.index.read_text()
    text = _text(html)
    m = tiny.run.manifest()
    for expected in [
        "nets.py:digits_net", "none (random initialisation)",  # model and weights
        "3 × 32 × 32 px", "mean (0.485, 0.456, 0.406)",  # input size and preprocessing
        f"{m['corpus']['count'] - 1} of {m['corpus']['count']} files read",  # corpus size
        "not an image",  # the reason a file was skipped
        "top_k", "steps",  # parameters of both passes
        m["created"], "unitlens 0.1.0",  # date and version
        "evidence about a unit, not proof", "check before you share or publish", "decisions about people",
    ]:
        assert expected in text, expected
    for layer in ("3", "6", "1"):
        assert f'href="layer-{layer}.html"' in html
    assert re.search(r'data-layer="3".*?mined</td>', html, re.S)
    assert re.search(r'data-layer="1".*?synthesised</td>', html, re.S)


def test_cards_and_unit_view_carry_parity_with_the_best_exemplar(tiny):
    """The card's share of images at parity is recomputed here from units.json's own numbers:
    robustness mean against the exemplar's objective (the channel mean drives up)."""
    for layer, mined in (("6", True), ("1", False)):
        cards, details = _units_data(tiny.atlas, layer), _units_data(tiny.atlas, layer, "units")
        table = json.loads((tiny.run.layer_dir(layer, "synth") / "units.json").read_text())["units"]
        for i, u in enumerate(cards["units"]):
            rec = table.get(str(u))
            if rec is None:
                assert cards["parity"][i] is None
                continue
            if not mined:
                assert cards["parity"][i] is None and all(im["parity"] is None for im in details["synth"][i]["images"])
                continue
            ref = rec["exemplar_objective"]
            reached = [im["robustness"]["mean"] >= ref for im in rec["images"]]
            assert cards["parity"][i] == pytest.approx(sum(reached) / len(reached))
            assert [im["parity"]["reached"] for im in details["synth"][i]["images"]] == reached


def test_an_image_stopped_at_parity_is_not_called_unconverged(tmp_path):
    """The loop stops an image once it is past parity (stop_at_parity), so its trace still rises: the
    early-stop test on it would say "did not converge". Cases: (steps, the run's stop_at_parity,
    expected converged), on a trace rising in a straight line, which never stalls (its last 32 steps gain
    32 slopes over the 32 before: a relative gain near 0.5, far above 0.01)."""
    from unitlens.atlas.data import _synth_payload

    cases = [(80, 0.1, None),    # stopped at step 80 of 128 past parity: the loop's own stop
             (80, None, False),  # the same trace in a run without the parity stop: it stopped rising nowhere
             (128, 0.1, False)]  # ran every step and still rose: not converged, whatever the parity rule
    for steps, margin, want in cases:
        trace = np.full((1, 128), np.nan, np.float32)
        trace[0, :steps] = np.arange(steps) * 0.01 + 1  # (T,) rising in a straight line
        np.savez(tmp_path / "unit-0000.npz", trace=trace, steps=np.array([steps]))
        rec = {"unit": 0, "best_exemplar": 1.0, "trace": "unit-0000.npz", "images": [
            {"file": "unit-0000-0.png", "steps": steps, "activation": 2.0, "max_activation": 2.0, "vs_best_exemplar": 2.0,
             "rank": 1, "channels": 4, "robustness": {"n": 8, "mean": 1.9, "std": 0.1, "relative": 0.95},
             "parity": {"reached": True, "step": steps - 16, "synthesised": 1.9, "exemplar": 1.5}}]}
        card, detail, _ = _synth_payload(tmp_path, rec, (32, 0.01), (margin, 128))
        im = detail["images"][0]
        assert im["converged"] is want, (steps, margin)
        assert ("did not converge" in im["doubts"]) == (want is False), (steps, margin)
        assert im["checks"] == (3 if want is None else 4) and card["trust"] == (1.0 if want is None else 0.75)


def test_hostile_names_are_text_everywhere(tiny, tmp_path):
    run = fake_run(tmp_path / "run", layer=HOSTILE_LAYER, units=3, k=2, images=8, synth=False)
    atlas = render_atlas(run).parent
    for folder in (tiny.atlas, atlas):
        for f in folder.rglob("*"):
            if f.suffix in SOURCES:
                s = f.read_text()
                for raw in (HOSTILE, HOSTILE_CLASS, HOSTILE_LAYER, "<img src=x", "<i on", "<svg onload"):
                    assert raw not in s, f"{raw!r} reached {f.name} unescaped"
    index = tiny.index.read_text()
    assert f"dots/{HOSTILE}.jpg".replace("<", "&lt;").replace(">", "&gt;") in index  # the skipped file, as text
    details = (tiny.atlas / "data" / "6.units.js").read_text()
    assert f"stripe/{HOSTILE}.png".replace("<", "\\u003c").replace(">", "\\u003e") in details  # an exemplar, as data
    assert "&lt;svg onload=alert(3)&gt;" in (atlas / "index.html").read_text()
    page = (atlas / f"layer-{safe_name(HOSTILE_LAYER)}.html").read_text()
    assert "<h1>&lt;svg onload=alert(3)&gt;</h1>" in page


FORBIDDEN = [r"https?://", r"\bfetch\s*\(", r"XMLHttpRequest", r"WebSocket", r"EventSource", r"sendBeacon",
             r"innerHTML", r"outerHTML", r"insertAdjacentHTML", r"document\.write", r"\beval\s*\(",
             r"new\s+Function", r"@import", r"url\(\s*['\"]?//", r"(src|href)=\"//", r"\bimport\s*\("]


def test_no_file_reaches_for_the_network_or_parses_data_as_markup(tiny, big):
    checked = 0
    for folder in (tiny.atlas, big.atlas):
        for f in folder.rglob("*"):
            if f.suffix not in SOURCES:
                continue
            s = f.read_text()
            for pattern in FORBIDDEN:
                assert not re.search(pattern, s), f"{f.name} matches {pattern}"
            if f.suffix == ".html":
                assert "default-src 'none'" in s and "connect-src" not in s  # all connections refused
            checked += 1
    assert checked >= 12


def test_partial_runs_show_what_exists(tiny, tmp_path):
    mined_only, both, synth_only = (_units_data(tiny.atlas, n) for n in ("3", "6", "1"))
    assert mined_only["mined"] and mined_only["synthesised"] == 0 and not any(mined_only["synth_src"])
    assert both["mined"] and both["synthesised"] == 3 and both["units"] == list(range(10))
    assert [bool(s) for s in both["synth_src"]] == [True] * 3 + [False] * 7
    assert not synth_only["mined"] and synth_only["units"] == [0, 1] and "sheets" not in synth_only
    assert (tiny.atlas / "img" / "1" / "unit-0000-1.png").is_file()
    # mining started but unfinished, nothing synthesised: the index says so and links nothing
    run = Run(tmp_path / "r")
    run.save_manifest({"model": {"spec": "torchvision:resnet18", "weights": {"kind": "none"}},
                       "mine": {"done": False, "layers": {"layer3": {"units": 8, "done": False}}}})
    html = render_atlas(run).read_text()
    assert "mining in progress" in html and "layer-layer3.html" not in html
    run.save_manifest({"model": {"spec": "torchvision:resnet18"}})
    assert "Nothing mined or synthesised yet" in render_atlas(run).read_text()


def test_redrawing_touches_only_what_changed(tiny, tmp_path):
    run = Run(tmp_path / "run")
    shutil.copytree(tiny.run.path, run.path, ignore=shutil.ignore_patterns("atlas"))
    render_atlas(run)
    atlas = run.path / "atlas"
    stamp = {p: p.stat().st_mtime_ns for p in atlas.rglob("*") if p.is_file()}
    render_atlas(run)
    assert {p: p.stat().st_mtime_ns for p in stamp} == stamp  # nothing rewritten
    # the synthesis of layer 6 loses a unit: only layer 6 is redrawn, and its stale images go
    table = json.loads((run.layer_dir("6", "synth") / "units.json").read_text())
    del table["units"]["2"]
    write_json(run.layer_dir("6", "synth") / "units.json", table)
    render_atlas(run, layers=["6"])
    assert _units_data(atlas, "6")["synthesised"] == 2
    assert not (atlas / "img" / "6" / "unit-0002-0.png").exists()
    assert (atlas / "data" / "3.cards.js").stat().st_mtime_ns == stamp[atlas / "data" / "3.cards.js"]
    # sprite sheets are hard links to the run's own (same inode) and everything is readable as shared
    sheet = atlas / "img" / "3" / "sheet-000.jpg"
    assert sheet.stat().st_ino == (run.layer_dir("3") / "sheet-000.jpg").stat().st_ino
    umask = os.umask(0)
    os.umask(umask)
    assert all(p.stat().st_mode & 0o777 == 0o666 & ~umask for p in atlas.rglob("*")
               if p.is_file() and not p.name.startswith(".") and p.suffix != ".jpg")


def test_unknown_layer_is_refused_with_the_known_ones(tiny):
    with pytest.raises(UnitlensError, match=r"Layer 'layer9'.*Known: 3, 6, 1"):
        render_atlas(tiny.run, layers=["layer9"])


def test_cli_prints_the_index(tiny):
    r = run_cli("atlas", tiny.run.path, "--layers", "3")
    assert r.stdout.strip() == str(tiny.run.path / "atlas" / "index.html")
    r = run_cli("atlas", tiny.run.path, "--layers", "nope", check=False)
    assert r.returncode == 1 and r.stderr.startswith("Error: Layer 'nope'")


def atlas_files(units: int, per_unit: int = 1, synthesised: bool = True) -> int:
    """Files of a one-layer atlas: 8 pages, styles, scripts, icon and data + sprite sheets + synthesised PNGs."""
    return 8 + math.ceil(units / SHEET_ROWS) + (units * per_unit if synthesised else 0)


def test_file_count_of_a_resnet50_layer4_atlas(big):
    files = [p for p in big.atlas.rglob("*") if p.is_file() and not p.name.startswith(".")]
    assert len(files) == atlas_files(2048) == 2120  # 16 exemplars per unit change the sheets' width, not their number
    print(f"\nResNet-50 layer4 atlas: {len(files)} files (+ one state file)")


# -- in a browser ------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def shots(tmp_path_factory):
    d = tmp_path_factory.mktemp("screenshots")
    yield d
    print(f"\natlas screenshots: {d}")
    if os.environ.get("UNITLENS_DOCS_SCREENSHOTS"):
        (ROOT / "docs").mkdir(exist_ok=True)
        for name in ("atlas-layer.png", "atlas-unit.png", "atlas-unit-dark.png"):
            if (d / name).is_file():
                shutil.copy(d / name, ROOT / "docs" / name)


def _open(browser, url: str, width=1280, height=900, dark=False, ready=True):
    page = browser.page(width, height, dark)
    page.goto(url)
    if ready:
        page.wait_for("document.documentElement.dataset.ready")
    return page


def _clean(page):
    """No console error, uncaught exception or dialog, and no request that left file://."""
    assert page.errors == [], page.errors
    assert page.dialogs == []
    assert page.requests and all(u.startswith("file://") for u in page.requests), page.requests


def test_harness_notices_errors_requests_and_dialogs(browser, tmp_path):
    # the checks below are only worth something if they can fail: a page that does everything wrong
    bad = tmp_path / "bad.html"
    bad.write_text('<!doctype html><img src="http://unitlens.invalid/x.png"><img src="missing.png">'
                   '<script>console.error("boom"); alert("hi");</script>')
    page = _open(browser, bad.as_uri(), ready=False)
    time.sleep(0.3)
    assert any(u.startswith("http://unitlens.invalid") for u in page.requests)
    assert any("boom" in e for e in page.errors) and any("missing.png" in e for e in page.errors)
    assert page.dialogs == ["hi"]
    page.close()


def test_pages_open_from_file_with_no_errors_and_no_network(tiny, browser, shots):
    page = _open(browser, tiny.index.as_uri(), ready=False)
    page.wait_for("document.readyState === 'complete'")
    _clean(page)
    body = page.js("document.body.innerText")
    assert f"dots/{HOSTILE}.jpg" in body and "not an image" in body
    assert page.js("document.querySelectorAll('img').length") == page.js("document.querySelectorAll('td.overview img').length")
    page.close()
    for layer, units in (("3", 32), ("6", 10), ("1", 2)):
        page = _open(browser, (tiny.atlas / f"layer-{layer}.html").as_uri(), height=2400)  # tall: every card fits
        cards = page.js("[...document.querySelectorAll('#grid .card[data-unit]')].map(c => +c.dataset.unit)")
        assert sorted(cards) == list(range(units)), layer
        assert page.js("document.getElementById('count').textContent") == f"{units} units"
        time.sleep(0.2)  # let the crops and synthesised images load
        _clean(page)
        page.close()


def test_unit_view_deep_link_keys_and_hostile_exemplar(tiny, browser, shots):
    details = _units_data(tiny.atlas, "6", "units")
    hostile = details["files"].index(f"stripe/{HOSTILE}.png")
    unit = next(u for u, top in enumerate(details["top"]) if any(e[0] == hostile for e in top))
    page = _open(browser, (tiny.atlas / "layer-6.html").as_uri() + f"#unit-{unit}", height=1400)
    page.wait_for("document.getElementById('unit').dataset.complete")
    assert page.js("document.getElementById('grid').hidden") is True
    assert page.js("document.getElementById('unit').dataset.unit") == str(unit)
    files = page.js("[...document.querySelectorAll('.uv-ex .ex-file')].map(e => e.textContent)")
    assert f"stripe/{HOSTILE}.png" in files and len(files) == len(details["top"][unit])
    assert page.js("document.querySelectorAll('.uv-neg .ex').length") == len(details["bottom"][unit])  # layer 6 goes negative
    assert page.js("document.querySelectorAll('[data-plot=histogram] rect.bar').length") == len(details["hist"][unit])
    labels = page.js("[...document.querySelectorAll('[data-plot=classes] .rowlabel')].map(e => e.dataset.label)")
    assert HOSTILE_CLASS in labels
    assert page.js("document.querySelectorAll('img[src=x], i[onmouseover]').length") == 0
    page.close()

    page = _open(browser, (tiny.atlas / "layer-6.html").as_uri() + "#unit-1", height=1300)
    page.wait_for("document.getElementById('unit').dataset.complete")
    assert page.js("document.querySelectorAll('[data-plot=trace] path.line').length") == 2  # two images per unit
    assert page.js("document.querySelectorAll('.uv-synth .syn').length") == 2
    assert page.js("document.querySelector('.uv-synth').textContent.includes('parity with best exemplar')")
    page.screenshot(shots / "atlas-unit.png")
    for key, expect in (("ArrowRight", 2), ("j", 3), ("k", 2), ("ArrowLeft", 1)):
        page.key(key)
        page.wait_for(f"location.hash === '#unit-{expect}' && document.getElementById('unit').dataset.unit === '{expect}'")
    page.key("Escape")
    page.wait_for("!document.getElementById('grid').hidden && document.getElementById('unit').hidden")
    assert page.js("document.querySelectorAll('#grid .card[data-unit]').length") == 10
    _clean(page)
    page.close()

    page = _open(browser, (tiny.atlas / "layer-1.html").as_uri() + "#unit-0")  # synthesised, never mined
    page.wait_for("document.getElementById('unit').dataset.complete")
    assert page.js("[document.querySelectorAll('.uv-synth .syn').length, document.querySelectorAll('.uv-ex').length]") == [2, 0]
    _clean(page)
    page.close()
    page = _open(browser, (tiny.atlas / "layer-6.html").as_uri())
    time.sleep(0.3)
    page.screenshot(shots / "atlas-layer.png")
    page.close()
    page = _open(browser, (tiny.atlas / "layer-6.html").as_uri() + "#unit-1", width=420, height=1500, dark=True)
    page.wait_for("document.getElementById('unit').dataset.complete")
    assert page.js("getComputedStyle(document.body).backgroundColor") != "rgb(244, 241, 234)"  # the dark palette
    assert page.js("document.documentElement.scrollWidth <= innerWidth")  # nothing sticks out on a phone
    page.screenshot(shots / "atlas-unit-dark.png")
    _clean(page)
    page.close()


def test_firing_share_and_class_selectivity_carry_information(tiny):
    from unitlens.summary import FIRE_QUANTILE

    for layer in ("3", "6"):
        c = _units_data(tiny.atlas, layer)
        values = np.load(tiny.run.layer_dir(layer) / "values.npy").astype(np.float64)  # (N, U) per-image maxima
        files = json.loads((tiny.run.path / "corpus.json").read_text())["files"]
        skipped = {s["file"] for s in tiny.run.manifest()["corpus"]["skipped"]}
        values = values[[f not in skipped for f in files]]  # a file that could not be read has no maxima
        t = c["fire_at"]
        # brute force: the threshold is the layer's pooled quantile, and each share is counted on the raw maxima
        assert np.mean(values >= t) <= 1 - FIRE_QUANTILE + 1e-9
        assert np.mean(values >= np.nextafter(np.float32(t), -np.inf)) > 0  # some maxima reach it
        np.testing.assert_allclose(c["fire"], (values >= np.float32(t)).mean(0), atol=1e-3)
        assert 0 < min(c["fire"]) or max(c["fire"]) < 1  # not every unit at 100 %
        page = (tiny.atlas / f"layer-{layer}.html").read_text()
        assert "90th percentile" in _text(page)
    # class selectivity only where activations are non-negative: layer 3 follows a ReLU, layer 6 goes negative
    assert all(v is not None and v >= 0 for v in _units_data(tiny.atlas, "3")["csi"])
    assert all(v is None for v in _units_data(tiny.atlas, "6")["csi"])


def test_every_card_number_is_labelled_and_explained(tiny, browser):
    for layer in ("3", "6", "1"):
        page = _open(browser, (tiny.atlas / f"layer-{layer}.html").as_uri(), height=2400)
        nums = page.js("[...document.querySelectorAll('#grid .card .num-l')].map(e => [e.className, e.title, "
                       "e.querySelector('.lab') ? e.querySelector('.lab').textContent : '', e.textContent])")
        assert nums, layer
        for cls, title, label, text in nums:
            assert len(title) > 10, (cls, title)  # a tooltip that says what the number is
            assert label or "uid" in cls, (cls, text)  # a visible label (the unit id is the card's title)
        # every text on a card with a digit in it is one of those labelled numbers
        stray = page.js("[...document.querySelectorAll('#grid .card')].flatMap(c => [...c.querySelectorAll('*')]"
                        ".filter(e => e.children.length === 0 && /\\d/.test(e.textContent) && !e.closest('.num-l, .doubt[title]')"
                        " && !e.closest('svg')).map(e => e.outerHTML))")
        assert stray == [], stray[:3]
        sel = page.js("[...document.querySelectorAll('#sort option')].filter(o => o.value === 'csi').map(o => o.disabled)")
        assert sel == [layer != "3"]  # not sortable where it is not defined
        if layer == "1":  # synthesised, never mined: no empty exemplar boxes
            assert page.js("document.querySelectorAll('#grid .crop, #grid .quad, #grid .hero.empty').length") == 0
            assert page.js("document.querySelectorAll('#grid .card img.synthimg').length") == 2
        _clean(page)
        page.close()


def _path_leaks(atlas: Path, roots: list[str]) -> list[str]:
    """'file: what' for every absolute path left in any file of an atlas: the given roots in any file (images
    too), and anything shaped like an absolute path in its pages and data (our own static files excluded)."""
    from unitlens.atlas.paths import ABSOLUTE
    from unitlens.atlas.render import STATIC

    leaks = []
    for f in sorted(p for p in atlas.rglob("*") if p.is_file()):
        raw = f.read_bytes()
        leaks += [f"{f.name}: {r}" for r in roots if r.encode() in raw]
        if f.suffix in (".html", ".js", ".json") and f.name not in STATIC + ("compare.js",):
            leaks += [f"{f.name}: {m.group(0)}" for m in ABSOLUTE.finditer(raw.decode())]
    return leaks


def test_strip_paths_leaves_no_absolute_path_in_the_atlas(tiny, tmp_path):
    import sys

    run = tmp_path / "shared-run"
    shutil.copytree(tiny.run.path, run)
    roots = [str(tiny.run.path.parent), str(TESTS), str(ROOT), sys.prefix, "/tmp/"]
    before = _path_leaks(run / "atlas", roots)
    assert any(str(TESTS) in x for x in before) and any("corpus" in x for x in before)  # the check can see a leak
    index = run_cli("atlas", run, "--strip-paths").stdout.strip()
    assert _path_leaks(run / "atlas", roots) == []
    text = _text(Path(index).read_text())
    assert "nets.py:digits_net" in text  # the model is still named, as a file
    render_atlas(run)  # a later redraw (as `run` does after each layer) keeps the choice
    assert _path_leaks(run / "atlas", roots) == []
    render_atlas(run, strip_paths=False)
    assert _path_leaks(run / "atlas", roots)


def test_index_names_the_model_by_file_folds_settings_and_previews_layers(tiny):
    html = tiny.index.read_text()
    lede = re.search(r'<p class="lede">(.*?)</p>', html).group(1)
    assert "<code>nets.py:digits_net</code>" in lede and str(TESTS) not in lede
    assert re.search(r'<details class="settings">', html) and " open" not in re.search(r"<details[^>]*>", html).group(0)
    for layer in ("3", "6", "1"):
        row = re.search(rf'<tr data-layer="{layer}">(.*?)</tr>', html).group(1)
        pics = re.findall(r'<a href="layer-[^"]+#unit-(\d+)"[^>]*class="ov">', row)
        srcs = re.findall(r'(?:src|href)="(img/[^"]+)"', row)
        assert pics and len(srcs) == len(pics), layer
        assert all((tiny.atlas / s).is_file() for s in srcs), srcs


def test_index_previews_load_in_the_browser(tiny, browser, shots):
    page = _open(browser, tiny.index.as_uri(), ready=False)
    page.wait_for("document.readyState === 'complete'")
    time.sleep(0.3)
    n = page.js("[...document.querySelectorAll('td.overview img')].filter(i => i.complete && i.naturalWidth > 0).length")
    assert n == 2 + 3  # layer 1 has two synthesised units, layer 6 three; layer 3 shows crops
    assert page.js("document.querySelectorAll('td.overview svg image').length") == 6
    page.screenshot(shots / "atlas-index.png")
    _clean(page)
    page.close()


def test_facets_carry_pictures_and_a_stated_margin(tiny):
    from unitlens.atlas.data import FACET_COSINE
    from unitlens.embedding import Embedding

    checked = 0
    for layer in ("3", "6"):
        D = _units_data(tiny.atlas, layer, "units")
        z = read_npz(tiny.run.layer_dir(layer) / "facets.npz")
        emb = Embedding(tiny.run, layer)
        for u, f in enumerate(D["facets"]):
            if not f or f["k"] < 2:
                continue
            checked += 1
            # brute force: centres of each facet's unit vectors, their largest pairwise cosine
            x = emb.of_images(z["image"][u][:f["n"]]).astype(np.float64)
            lab = z["facet"][u][:f["n"]]
            c = np.stack([x[lab == a].mean(0) / np.linalg.norm(x[lab == a].mean(0)) for a in range(f["k"])])
            cos = max(float(c[a] @ c[b]) for a in range(f["k"]) for b in range(f["k"]) if a != b)
            assert f["cosine"] == pytest.approx(cos, abs=2e-3) and f["distinct"] == (cos < FACET_COSINE)
            kept = len(D["top"][u])
            for a in range(f["k"]):  # every facet has pictures: kept crops, else whole-image thumbnails
                assert (np.asarray(f["ranks"][:kept]) == a).any() or len(f["thumbs"][a]) == min(4, f["sizes"][a])
    assert checked
    sheet = tiny.atlas / "img" / "3" / "facets.jpg"
    assert sheet.is_file() or (tiny.atlas / "img" / "6" / "facets.jpg").is_file()


def test_every_facet_shows_pictures_in_the_browser(tiny, browser):
    opened = 0
    for layer in ("3", "6"):
        D = _units_data(tiny.atlas, layer, "units")
        units = [u for u, f in enumerate(D["facets"]) if f and f["k"] > 1 and any(f.get("thumbs") or [])]
        for u in units[:2]:
            page = _open(browser, (tiny.atlas / f"layer-{layer}.html").as_uri() + f"#unit-{u}", height=1600)
            page.wait_for("document.getElementById('unit').dataset.complete")
            counts = page.js("[...document.querySelectorAll('.uv-facets .facet')].map(f => f.querySelectorAll('.crop').length)")
            assert len(counts) == D["facets"][u]["k"] and min(counts) > 0, (layer, u, counts)
            assert page.js("document.querySelectorAll('.uv-facets .crop.whole').length") > 0
            text = page.js("document.querySelector('.uv-facets .note').textContent")
            assert ("different things" in text) == D["facets"][u]["distinct"] and "cosine" in text
            time.sleep(0.2)
            _clean(page)
            page.close()
            opened += 1
    assert opened  # some facet of the fixture has no kept crop


@pytest.fixture(scope="module")
def doubtful(tmp_path_factory):
    """Four synthesised units whose evidence is set by hand: 0 passes every check, 1 ran 80 steps still
    rising (the loop's own early-stop test, window 32, says it did not converge), 2 is rank 3 on its own
    image, 3 keeps a third of its effect under warps and stays below the best natural exemplar."""
    run = fake_run(tmp_path_factory.mktemp("doubtful") / "run", units=4, k=4, images=32)
    sd = run.layer_dir("layer4", "synth")
    table = json.loads((sd / "units.json").read_text())
    for u, rec in table["units"].items():
        u = int(u)
        trace = np.full((1, 80), 5.0, np.float32) if u != 1 else np.arange(80, dtype=np.float32)[None]
        np.savez(sd / rec["trace"], trace=trace, steps=np.array([80]))
        im = rec["images"][0]
        im.update(steps=80, rank=3 if u == 2 else 1, vs_best_exemplar=0.7 if u == 3 else 1.5,
                  robustness={"n": 8, "mean": 0.3, "std": 0.1, "relative": 0.33 if u == 3 else 0.9})
    write_json(sd / "units.json", table)
    m = run.manifest()
    m["synth"]["settings"]["config"].update(stop_window=32, stop_gain=0.01)
    run.save_manifest(m)
    index = render_atlas(run)
    return SimpleNamespace(run=run, atlas=index.parent)


def test_synthesis_doubts_follow_the_evidence(doubtful):
    c = _units_data(doubtful.atlas, "layer4")
    assert c["doubts"][0] == [] and c["trust"][0] == 1
    assert c["doubts"][1] == ["did not converge"]
    assert c["doubts"][2] == ["rank 3 on its own image: 2 other channels of the layer reach more on it (raw values)"]
    assert c["own_rank"][2] == 3
    assert set(c["doubts"][3]) == {"below the best natural exemplar", "loses most of its effect under small warps"}
    assert c["trust"][3] == 0.5 and c["robust"][3] == pytest.approx(0.33)


def test_cards_mark_doubtful_synthesis_and_filter_by_it(doubtful, browser):
    page = _open(browser, (doubtful.atlas / "layer-layer4.html").as_uri())
    marks = page.js("Object.fromEntries([...document.querySelectorAll('#grid .card')].map(c => [c.dataset.unit, "
                    "c.querySelector('.doubt') ? [c.querySelector('.doubt').className, c.querySelector('.doubt').title] : null]))")
    assert marks["0"] is None
    assert "unconverged" in marks["1"][0] and "did not converge" in marks["1"][1]
    assert marks["2"] and "rank 3" in marks["2"][1] and "unconverged" not in marks["2"][0]
    shown = "[...document.querySelectorAll('#grid .card')].map(c => +c.dataset.unit).sort()"
    for value, want in (("unconverged", [1]), ("doubtful", [1, 2, 3]), ("trusted", [0]), ("all", [0, 1, 2, 3])):
        page.js(f"(s => {{ s.value = '{value}'; s.dispatchEvent(new Event('change')); }})(document.getElementById('trust'))")
        assert page.js(shown) == want, value
    page.js("(s => { s.value = 'trust'; s.dispatchEvent(new Event('change')); })(document.getElementById('sort'))")
    order = page.js("[...document.querySelectorAll('#grid .card')].sort((a, b) => parseFloat(a.style.top) - "
                    "parseFloat(b.style.top) || parseFloat(a.style.left) - parseFloat(b.style.left)).map(c => +c.dataset.unit)")
    assert order[0] == 0 and order[-1] == 3  # all checks passed first, two failed last
    _clean(page)
    page.close()


def test_the_folder_also_works_from_a_static_web_server(tiny, browser):
    import functools
    import http.server
    import threading

    class Quiet(http.server.SimpleHTTPRequestHandler):
        def log_message(self, *args):
            pass

    handler = functools.partial(Quiet, directory=str(tiny.atlas))
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), handler)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    origin = f"http://127.0.0.1:{server.server_address[1]}/"
    try:
        page = _open(browser, origin + "layer-6.html#unit-1")
        page.wait_for("document.getElementById('unit').dataset.complete")
        assert page.errors == [] and page.dialogs == []
        assert all(u.startswith(origin) for u in page.requests), page.requests
        page.close()
    finally:
        server.shutdown()


def test_a_2048_unit_layer_mounts_only_visible_cards_and_sorts_like_numpy(big, browser, shots):
    # How fast this page becomes interactive is measured by scripts/bench_atlas.py, not here.
    url = (big.atlas / "layer-layer4.html").as_uri()
    page = _open(browser, url)
    idx = read_npz(big.run.layer_dir("layer4") / "index.npz")
    mounted = page.js("document.querySelectorAll('#grid .card[data-unit]').length")
    assert 0 < mounted < 200  # only the cards near the viewport exist
    assert page.js("document.getElementById('count').textContent") == "2048 units"
    js_sort = "s => { const e = document.getElementById('sort'); e.value = s; e.dispatchEvent(new Event('change')); }"
    page.js(f"({js_sort})('peak')")
    first = page.js("(() => { const c = [...document.querySelectorAll('#grid .card')]; "
                    "c.sort((a, b) => parseFloat(a.style.top) - parseFloat(b.style.top) || parseFloat(a.style.left) - parseFloat(b.style.left)); "
                    "return +c[0].dataset.unit; })()")
    shown = np.array([float(f"{v:.4g}") for v in idx["high"]])  # the peak as the page holds it (4 digits)
    assert first == int(np.lexsort((np.arange(2048), -shown))[0])  # oracle: numpy, ties by id
    page.js("(() => { const f = document.getElementById('filter'); f.value = '100-199'; f.dispatchEvent(new Event('input')); })()")
    assert page.js("document.getElementById('count').textContent") == "100 of 2048 units"
    page.js(f"({js_sort})('id')")
    page.js("(() => { const f = document.getElementById('filter'); f.value = ''; f.dispatchEvent(new Event('input')); })()")
    page.js("window.scrollTo(0, document.body.scrollHeight)")
    page.wait_for("document.querySelector('#grid .card[data-unit=\"2047\"]') !== null")  # the last card, drawn on scrolling
    page.js("location.hash = '#unit-2000'")
    page.wait_for("document.getElementById('unit').dataset.complete", timeout=20)
    assert page.js("document.getElementById('unit').dataset.unit") == "2000"
    assert page.js("document.querySelectorAll('.uv-ex .ex').length") == 16
    _clean(page)
    page.close()


def test_the_page_skeleton_keeps_plain_text_as_text():
    # The skeleton is an autoescaping template: plain text passed anywhere stays text, and only markup
    # built by the helpers (Html) goes in as markup. Oracle: the standard library's html.unescape.
    import html

    from unitlens.atlas.html import page, tag

    hostile = '<script>alert("x")</script> & <b>'
    out = page("t", "index", [hostile], hostile)
    main = out.split("<main>\n", 1)[1].split("\n</main>", 1)[0]
    assert "<" not in main and html.unescape(main) == hostile
    crumbs = out.split('<div class="crumbs">', 1)[1].split("</div>", 1)[0]
    assert "<" not in crumbs and html.unescape(crumbs) == hostile
    built = page("t", "index", [], tag("p", hostile))
    assert "<p>&lt;script&gt;" in built and "<script>alert" not in built
