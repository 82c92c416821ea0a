"""The comparison pages (unitlens/atlas/comparison_page.py): what they carry against compare.json,
the crops and thumbnails beside it, and that they open from file:// in a real browser without errors
or network requests. Two comparisons of one seeded net and a perturbed copy: of two mined and
synthesised runs (crops from the runs' sprite sheets), and of the two models (thumbnails).
"""
import json
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
from nets import digits_net
from test_atlas import FORBIDDEN, _clean, _text
from unitlens import CompareConfig, MineConfig, UnitlensError, compare, load_model, mine, open_corpus, parse_layers, render_atlas
from unitlens.atlas.comparison_data import SHOW, THUMB
from unitlens.atlas.comparison_page import render_comparison
from unitlens.store import read_npz

SPEC = f"{TESTS / 'nets.py'}:digits_net"
HOSTILE = "<img src=x onerror=alert(1)>"  # a corpus file name


@pytest.fixture(scope="module")
def cmp(tmp_path_factory):
    from unitlens.demo.swatches import write_corpus
    from unitlens.synth import Goal, SynthConfig, synthesize

    d = tmp_path_factory.mktemp("cmp")
    write_corpus(d / "corpus", count=18, size=48)
    (d / "corpus" / "factors.csv").unlink()
    Image.fromarray(np.full((40, 56, 3), (250, 250, 40), np.uint8)).save(d / "corpus" / "stripe" / f"{HOSTILE}.png")
    torch.manual_seed(0)
    net = digits_net()
    torch.save(net.state_dict(), d / "base.pth")
    with torch.no_grad():  # B: a perturbed copy; unit 4 of layer 6 made constant (dead in B only)
        net[4].weight.add_(0.3 * torch.randn_like(net[4].weight))
        net[6].weight[4] = 0.0
        net[6].bias[4] = 0.5
    torch.save(net.state_dict(), d / "tuned.pth")
    corpus = open_corpus(d / "corpus", labels="folders")
    runs = {}
    for name in ("base", "tuned"):
        m = load_model(SPEC, str(d / f"{name}.pth"), size=32)
        runs[name] = mine(m, corpus, parse_layers(m, ["3:0-11", "6"]), d / name, MineConfig(top_k=5, workers=0, thumb=32))
        synthesize(m, Goal("6:0-2"), d / name, SynthConfig(steps=8, checks=2, per_unit=1))
        render_atlas(runs[name])
    r = run_cli("compare", runs["base"].path, runs["tuned"].path, "--bootstrap", 20, "--workers", 0, "--threads", 1)
    run_dir = runs["base"].path / "compare" / "tuned"
    assert r.stdout.strip().splitlines()[-1] == str(run_dir / "atlas" / "index.html")  # the CLI prints the pages
    models = compare(load_model(SPEC, str(d / "base.pth"), size=32), load_model(SPEC, str(d / "tuned.pth"), size=32),
                     corpus=d / "corpus", layers=["3,6"], out=d / "models",
                     config=CompareConfig(workers=0, bootstrap=20, full_maps=True, batch_size=8))
    assert models["atlas"] == str(d / "models" / "atlas" / "index.html")
    compare(load_model(SPEC, str(d / "base.pth"), size=32), load_model(SPEC, str(d / "tuned.pth"), size=32),
            corpus=d / "corpus", layers=["3"], layers_b=["6"], out=d / "crossed", config=CompareConfig(workers=0, bootstrap=0))
    return SimpleNamespace(d=d, runs=runs, folders={"runs": run_dir, "models": d / "models"}, crossed=d / "crossed")


def _summary(folder: Path) -> dict:
    return json.loads((folder / "compare.json").read_text())


def _payload(folder: Path, layer: str) -> dict:
    text = (folder / "atlas" / "data" / f"pair-{layer}.js").read_text()
    return json.loads(text.split("=", 1)[1].strip().rstrip(";"))


# -- the data behind the pages -----------------------------------------------------------------

def test_every_number_of_compare_json_reaches_its_page_in_rank_order(cmp):
    for kind, folder in cmp.folders.items():
        s = _summary(folder)
        assert [e["layer"] for e in s["layers"]] == ["3", "6"]
        for e in s["layers"]:
            p = _payload(folder, e["layer"])
            assert p["cka"] == e["cka"] and p["cka_ci"] == e["cka_ci"] and p["cka_full_maps"] == e["cka_full_maps"]
            by_rank = sorted(e["units"], key=lambda u: u["rank"])
            assert [u["unit"] for u in p["units"]] == [u["unit"] for u in by_rank], (kind, e["layer"])
            for u, shown in zip(by_rank, p["units"]):
                for key, value in u.items():
                    if key in ("top_a", "top_b"):
                        assert [x[0] for x in shown[f"ex_{key[-1]}"]] == value[:SHOW]
                        other = set(u["top_b" if key == "top_a" else "top_a"])
                        assert [x[2] for x in shown[f"ex_{key[-1]}"]] == [int(i in other) for i in value[:SHOW]]
                    else:
                        assert shown[key] == value, (kind, e["layer"], u["unit"], key)
    dead = {u["unit"]: u for u in _summary(cmp.folders["runs"])["layers"][1]["units"]}[4]
    assert dead["dead_b"] and not dead["dead_a"] and dead["rank"] == 1  # the unit killed in B leads the ranking


def test_run_sides_use_the_runs_crops_and_synthesised_images(cmp):
    folder = cmp.folders["runs"]
    atlas = folder / "atlas"
    p = _payload(folder, "6")
    for k, run in (("a", cmp.runs["base"]), ("b", cmp.runs["tuned"])):
        idx = read_npz(run.layer_dir("6") / "index.npz")
        pos = {int(u): i for i, u in enumerate(idx["units"])}
        for u in p["units"]:
            assert u[f"pos_{k}"] == pos[u["unit"]]
            for r, (img, col, _) in enumerate(u[f"ex_{k}"]):
                assert col == r and int(idx["top_image"][pos[u["unit"]], r]) == img  # the run's own exemplar, its own crop
            assert (u[f"syn_{k}"] is not None) == (u["unit"] in (0, 1, 2))
        sheet = atlas / p["sides"][k]["sheets"]["dir"] / "sheet-000.jpg"
        assert sheet.stat().st_ino == (run.layer_dir("6") / "sheet-000.jpg").stat().st_ino  # linked, not copied
        assert (atlas / p["sides"][k]["img_dir"] / "unit-0000-0.png").is_file()
        view = (atlas / p["sides"][k]["href"]).resolve()  # links to the run's own unit view
        assert view == (run.path / "atlas" / "layer-6.html").resolve()
    assert p["thumbs"]["have"] == []  # every exemplar has its crop


def test_model_sides_get_bounded_thumbnails_of_the_centred_square(cmp):
    folder = cmp.folders["models"]
    p = _payload(folder, "3")
    assert p["sides"]["a"]["sheets"] is None and all(x[1] == -1 for u in p["units"] for x in u["ex_a"])
    files = json.loads((folder / "corpus.json").read_text())
    thumbs = folder / "atlas" / p["thumbs"]["dir"]
    shown = {x[0] for u in p["units"] for k in "ab" for x in u[f"ex_{k}"]}
    assert set(p["thumbs"]["have"]) == shown and len(list(thumbs.iterdir())) <= len(files["files"])
    for i in sorted(shown)[:4]:
        t = Image.open(thumbs / f"{i}.jpg")
        assert t.size == (THUMB, THUMB)
        # oracle: Pillow alone, the centred square of the original scaled to THUMB (common practice)
        src = Image.open(Path(files["root"]) / files["files"][i]).convert("RGB")
        side = min(src.size)
        box = ((src.width - side) // 2, (src.height - side) // 2, (src.width + side) // 2, (src.height + side) // 2)
        ref = np.asarray(src.crop(box).resize((THUMB, THUMB), Image.BICUBIC), dtype=float)
        assert np.abs(np.asarray(t.convert("RGB"), dtype=float) - ref).mean() < 12  # JPEG and resampling noise
    assert p["ids"][str(min(shown))] == files["files"][min(shown)]


def test_index_pages_and_the_run_atlas_link_the_comparison(cmp):
    for kind, folder in cmp.folders.items():
        s = _summary(folder)
        html = (folder / "atlas" / "index.html").read_text()
        assert 'href="pair-3.html"' in html and 'href="pair-6.html"' in html
        maps = ["pooled", "full_maps"] if kind == "models" else ["pooled"]
        assert html.count('class="plot heatmap"') == len(maps)
        for key in maps:
            M = s["cka_matrix"][key]
            for i, la in enumerate(s["cka_matrix"]["layers_a"]):
                for j, lb in enumerate(s["cka_matrix"]["layers_b"]):
                    assert f"A {la} × B {lb}: linear CKA {M[i][j]:.4f}" in html
    run_index = (cmp.runs["base"].path / "atlas" / "index.html").read_text()
    assert 'href="../compare/tuned/atlas/index.html"' in run_index and "Comparisons with this run" in run_index
    assert "Comparisons with this run" not in (cmp.runs["tuned"].path / "atlas" / "index.html").read_text()


def test_atlas_command_redraws_a_comparison_and_refuses_what_is_not_one(cmp, tmp_path):
    folder = cmp.folders["runs"]
    stamp = {p: p.stat().st_mtime_ns for p in (folder / "atlas").rglob("*") if p.is_file()}
    assert render_atlas(folder) == folder / "atlas" / "index.html"
    assert {p: p.stat().st_mtime_ns for p in stamp} == stamp  # nothing changed, nothing rewritten
    with pytest.raises(UnitlensError, match="drawn all at once"):
        render_atlas(folder, layers=["6"])
    with pytest.raises(UnitlensError, match="holds no comparison"):
        render_comparison(tmp_path)


def test_strip_paths_leaves_no_absolute_path_in_the_comparison_pages(cmp):
    import sys

    from test_atlas import _path_leaks

    roots = [str(cmp.d), str(TESTS), str(ROOT), sys.prefix, "/tmp/"]
    for kind, folder in cmp.folders.items():
        assert _path_leaks(folder / "atlas", roots), kind  # the check can see a leak
        index = run_cli("atlas", folder, "--strip-paths").stdout.strip()
        assert _path_leaks(folder / "atlas", roots) == [], kind
        assert "nets.py:digits_net" in _text(Path(index).read_text())  # the models are still named, as files
        render_comparison(folder)  # a later redraw keeps the choice
        assert _path_leaks(folder / "atlas", roots) == [], kind
        render_comparison(folder, strip_paths=False)
        assert _path_leaks(folder / "atlas", roots), kind
    out = cmp.d / "models-shared"  # compare's own option draws the pages stripped at once
    run_cli("compare", SPEC, SPEC, "--weights-a", cmp.d / "base.pth", "--weights-b", cmp.d / "tuned.pth", "--size", 32,
            "--corpus", cmp.d / "corpus", "--layers", "3", "--out", out, "--bootstrap", 0, "--workers", 0, "--strip-paths")
    assert _path_leaks(out / "atlas", roots) == []
    assert str(cmp.d) in (out / "compare.json").read_text()  # the folder's own record keeps them: the pages are redrawn from it


def test_runs_named_by_relative_paths_are_found_again(cmp, tmp_path, monkeypatch):
    for name in ("base", "tuned"):
        shutil.copytree(cmp.runs[name].path, tmp_path / name, ignore=shutil.ignore_patterns("compare"))
    monkeypatch.chdir(tmp_path)
    compare("base", "tuned", layers=["6"], config=CompareConfig(workers=0, bootstrap=0))
    monkeypatch.chdir(ROOT)  # redrawn from elsewhere: the runs are found from where the comparison ran
    render_comparison(tmp_path / "base" / "compare" / "tuned")
    p = _payload(tmp_path / "base" / "compare" / "tuned", "6")
    assert p["sides"]["a"]["note"] is None and p["sides"]["b"]["sheets"] is not None


def test_no_file_reaches_for_the_network_and_a_hostile_name_stays_text(cmp):
    checked = 0
    for folder in cmp.folders.values():
        for f in (folder / "atlas").rglob("*"):
            if f.suffix in (".html", ".js", ".css"):
                text = f.read_text()
                assert "<img src=x" not in text, f
                for pattern in FORBIDDEN:
                    assert not re.search(pattern, text), f"{f.name} matches {pattern}"
                if f.suffix == ".html":
                    assert "default-src 'none'" in text and "connect-src" not in text
                checked += 1
    assert checked >= 12
    ids = [v for folder in cmp.folders.values() for layer in ("3", "6") for v in _payload(folder, layer)["ids"].values()]
    assert f"stripe/{HOSTILE}.png" in ids  # it is shown, as data


# -- in a browser ------------------------------------------------------------------------------

def _open(browser, url, width=1280, height=1600, ready="document.documentElement.dataset.ready"):
    page = browser.page(width, height)
    page.goto(url)
    page.wait_for(ready)
    return page


IMAGES_LOAD = """Promise.all([
  ...[...document.querySelectorAll('#rows img')].map(i => { i.loading = 'eager'; return i.decode().then(() => i.naturalWidth, () => 0); }),
  ...[...new Set([...document.querySelectorAll('#rows .crop')].map(c => c.style.backgroundImage.slice(5, -2)))]
     .map(u => new Promise(ok => { const i = new Image(); i.onload = () => ok(i.naturalWidth); i.onerror = () => ok(0); i.src = u; }))
]).then(w => [w.length, w.filter(x => x > 0).length])"""


def test_pages_open_from_file_show_a_and_b_side_by_side(cmp, browser, tmp_path):
    for kind, folder in cmp.folders.items():
        page = _open(browser, (folder / "atlas" / "index.html").as_uri(), height=900,
                     ready="document.readyState === 'complete'")  # a page without scripts
        assert page.js("document.querySelectorAll('.heatmap rect.hm-cell title').length") >= 4
        _clean(page)
        page.close()
        for e in _summary(folder)["layers"]:
            page = _open(browser, (folder / "atlas" / f"pair-{e['layer']}.html").as_uri())
            rows = page.js("[...document.querySelectorAll('#rows .urow')].map(r => +r.dataset.unit)")
            assert rows == [u["unit"] for u in sorted(e["units"], key=lambda u: u["rank"])]
            assert page.js("document.querySelectorAll('#rows .urow:first-child .u-side').length") == 2
            total, loaded = page.js(IMAGES_LOAD)
            assert total > 0 and loaded == total, (kind, e["layer"], total, loaded)
            _clean(page)
            page.close()


def test_order_filter_and_deep_link(cmp, browser, tmp_path):
    folder = cmp.folders["runs"]
    e = _summary(folder)["layers"][1]
    page = _open(browser, (folder / "atlas" / "pair-6.html").as_uri() + "#unit-7")
    assert page.js("document.querySelector('.urow.target').dataset.unit") == "7"
    assert "dead in B" in page.js("document.getElementById('u-4').textContent")
    page.js("(() => { const s = document.getElementById('sort'); s.value = 'corr'; s.dispatchEvent(new Event('change')); })()")
    rows = page.js("[...document.querySelectorAll('#rows .urow')].map(r => +r.dataset.unit)")
    corr = np.array([np.inf if u["corr"] is None else u["corr"] for u in e["units"]])  # no value: last
    expect = [e["units"][i]["unit"] for i in np.lexsort(([u["rank"] for u in e["units"]], corr))]  # oracle: numpy
    assert rows == expect
    page.js("(() => { const s = document.getElementById('show'); s.value = 'dead'; s.dispatchEvent(new Event('change')); })()")
    assert page.js("[...document.querySelectorAll('#rows .urow')].map(r => +r.dataset.unit)") == [4]
    assert page.js("document.getElementById('count').textContent") == f"1 of {len(e['units'])} units"
    page.js("(() => { const s = document.getElementById('show'); s.value = 'all'; s.dispatchEvent(new Event('change')); })()")
    page.js("(() => { const s = document.getElementById('sort'); s.value = 'rank'; s.dispatchEvent(new Event('change')); })()")
    page.js("(() => { const f = document.getElementById('filter'); f.value = '1-3, 9'; f.dispatchEvent(new Event('input')); })()")
    rows = page.js("[...document.querySelectorAll('#rows .urow')].map(r => +r.dataset.unit)")
    assert rows == [u["unit"] for u in sorted(e["units"], key=lambda u: u["rank"]) if u["unit"] in (1, 2, 3, 9)]
    _clean(page)
    page.close()
    page = _open(browser, (folder / "atlas" / "pair-6.html").as_uri(), height=1150)
    page.js("(() => { const f = document.getElementById('filter'); f.value = '0-4'; f.dispatchEvent(new Event('input')); })()")
    time.sleep(0.3)  # the dead unit and those with synthesised images
    shots = tmp_path / "atlas-compare.png"
    page.screenshot(shots)
    print(f"\ncomparison page screenshot: {shots}")
    if os.environ.get("UNITLENS_DOCS_SCREENSHOTS"):
        shutil.copy(shots, ROOT / "docs" / "atlas-compare.png")
    page.close()
    page = _open(browser, (folder / "atlas" / "pair-6.html").as_uri(), width=420, height=1200)
    assert page.js("document.documentElement.scrollWidth <= innerWidth")  # nothing sticks out on a phone
    page.close()


def test_a_pair_of_different_layers_shows_its_cka_and_no_unit_table(cmp, browser):
    assert 'href="pair-3~6.html"' in (cmp.crossed / "atlas" / "index.html").read_text()
    page = _open(browser, (cmp.crossed / "atlas" / "pair-3~6.html").as_uri(), height=900)
    text = page.js("document.body.innerText")
    assert "3 of A and 6 of B are different layers" in text
    assert f"{_summary(cmp.crossed)['layers'][0]['cka']:.3f}" in text
    assert page.js("document.querySelectorAll('.urow, #rows').length") == 0
    _clean(page)
    page.close()


def test_cka_is_printed_with_enough_digits_to_tell_it_from_one():
    from unitlens.atlas.comparison_page import cka_text

    cases = [(1.0, "1.000"), (0.5, "0.500"), (0.98, "0.980"), (0.999, "0.999"), (0.9994, "0.9994"), (0.9996, "0.9996"),
             (0.99997, "0.99997"), (None, "–")]
    for x, want in cases:
        assert cka_text(x) == want, x
    for x in np.linspace(0.99, 1 - 1e-6, 50):  # below 1 never reads as 1
        assert float(cka_text(x)) < 1, x
