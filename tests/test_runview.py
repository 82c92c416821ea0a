"""A run folder as Python objects (unitlens/runview.py) and their inline display (unitlens/_view_html.py):
the numbers are `show --json`'s, crops are the original's pixels at the stored box, the HTML escapes
hostile names, carries no script and stays small."""
import json
from html.parser import HTMLParser
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
import torch
from conftest import TESTS, cli
from PIL import Image

from unitlens import (
    UnitlensError,
    load_model,
    load_run,
    mine,
    open_corpus,
    parse_layers,
)

HOSTILE = "<img src=x onerror=alert(1)>"  # a corpus file name
HOSTILE_CLASS = "<script>alert(2)</script>"  # a folder name, so a class label


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    """Swatches plus a hostile file and class, mined with a small net (layer 3: ReLU; 6: goes negative),
    a few units of 6 synthesised."""
    from unitlens.demo.swatches import write_corpus
    from unitlens.synth import Goal, SynthConfig, synthesize

    d = tmp_path_factory.mktemp("view")
    corpus = d / "corpus"
    write_corpus(corpus, count=14, size=48)
    (corpus / "factors.csv").unlink(missing_ok=True)
    rng = np.random.default_rng(3)
    Image.fromarray(rng.integers(0, 255, (40, 56, 3), dtype=np.uint8)).save(corpus / "stripe" / f"{HOSTILE}.png")
    (corpus / HOSTILE_CLASS.replace("/", "_")).mkdir()
    Image.fromarray(rng.integers(0, 255, (44, 52, 3), dtype=np.uint8)).save(corpus / HOSTILE_CLASS.replace("/", "_") / "r.png")
    torch.manual_seed(0)
    model = load_model(f"{TESTS / 'nets.py'}:digits_net", size=32)
    run = mine(model, open_corpus(corpus, labels="folders"), parse_layers(model, ["3", "6"]), d / "run",
               __import__("unitlens").MineConfig(top_k=5, workers=0, thumb=32))
    synthesize(model, Goal(("6:0-1",)), d / "run", SynthConfig(steps=6, checks=2, per_unit=2))
    return SimpleNamespace(path=run.path, view=load_run(run.path))


def test_unit_numbers_are_those_of_show_json(tiny, capsys):
    for layer, ch in (("3", 0), ("6", 1)):
        code, out, err = cli(capsys, "show", tiny.path, f"{layer}:{ch}", "--json")
        assert code == 0, err
        shown = json.loads(out)
        u = tiny.view.unit(f"{layer}:{ch}")
        assert json.loads(json.dumps(u.summary)) == shown
        assert u.stats == shown["stats"] and u.histogram == shown["histogram"]
        assert [(e.rank, e.id, str(e.path), e.score, list(e.box)) for e in u.exemplars] == \
            [(e["rank"], e["id"], e["image"], e["score"], e["box"]) for e in shown["exemplars"]]
        assert [e.id for e in u.negative_exemplars] == [e["id"] for e in shown.get("negative_exemplars", [])]
        assert [str(s.path) for s in u.synthesised] == [s["image"] for s in shown["synth"]]
        # the layer table's row of the same unit holds the same numbers
        row = next(r for r in tiny.view.units(layer) if r["unit"] == ch)
        st = shown["stats"]
        assert (row["peak"], row["mean"], row["fire_rate"], row["class_selectivity"]) == \
            (st["max"], st["mean_max"], st["fire_rate"], st["class_selectivity"])
        ratios = [s["vs_best_exemplar"] for s in shown["synth"] if s.get("vs_best_exemplar") is not None]
        assert row["ratio"] == (max(ratios) if ratios else None)
        assert row["synthesised"] == len(shown["synth"])
    assert tiny.view.unit("6:0").negative_exemplars, "layer 6 goes negative: it has negative exemplars"


def test_crop_is_the_original_cut_at_the_stored_box(tiny):
    u = tiny.view.unit("6:0")
    checked = 0
    for e in [*u.exemplars, *u.negative_exemplars]:
        with Image.open(e.path) as im:  # PIL as the reference: no EXIF in these files, so no turn
            ref = np.asarray(im.convert("RGB").crop(e.box))
        got = np.asarray(e.crop())
        assert got.shape == ref.shape and (got == ref).all(), e.id
        sheet = e.crop(sheet=True)
        assert sheet.size == (32, 32)  # the sprite-sheet cell: thumb x thumb
        checked += 1
    assert checked >= 5


def test_synthesised_images_evidence_and_nearest(tiny):
    u = tiny.view.unit("6:1")
    assert len(u.synthesised) == 2
    s = u.synthesised[0]
    with Image.open(s.path) as im:
        assert (np.asarray(s.image()) == np.asarray(im.convert("RGB"))).all()
    assert {"max_activation", "rank", "channels", "robustness"} <= set(s.evidence)
    corpus = tiny.view.corpus_files
    for p in u.nearest:
        assert p.path == corpus.path(corpus.files.index(p.id))
    # facets group the unit's top 64 images; with 16 readable images that is every one, once
    members = sorted(p.id for g in u.facets for p in g)
    assert members == sorted(corpus.files) and len(members) == 16


class _Tags(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags, self.handlers, self.urls = [], [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.handlers += [k for k, _ in attrs if k.lower().startswith("on")]
        self.urls += [v for k, v in attrs if k in ("src", "href") and v and not v.startswith("data:image/")]


def _parse(html: str) -> _Tags:
    p = _Tags()
    p.feed(html)
    p.close()
    return p


def test_html_escapes_hostile_names_and_has_no_script(tiny):
    label = HOSTILE_CLASS.replace("/", "_")
    units = [tiny.view.unit(f"3:{c}") for c in range(32)]
    file_seen = label_seen = 0
    for html in [u._repr_html_() for u in units] + [tiny.view.layer("3")._repr_html_(), tiny.view._repr_html_(),
                                                    tiny.view.unit("6:0")._repr_html_(), tiny.view.units("6")._repr_html_()]:
        p = _parse(html)
        assert "script" not in p.tags and not p.handlers and not p.urls
        assert HOSTILE not in html and label not in html
        file_seen += "&lt;img src=x onerror=alert(1)&gt;" in html  # the file name, as text
        label_seen += "&lt;script&gt;alert(2)&lt;_script&gt;" in html  # the class label, as text
    assert file_seen and label_seen


def test_html_of_a_unit_with_64_exemplars_stays_bounded(tmp_path):
    from test_atlas import fake_run

    from unitlens import _view_html

    layer = "<svg onload=alert(3)>"
    fake_run(tmp_path / "run", layer=layer, units=2, k=64, images=128, thumb=64, negative=True)  # noise cells
    c = json.loads((tmp_path / "run" / "corpus.json").read_text())  # the atlas needs less of it than a unit
    (tmp_path / "run" / "corpus.json").write_text(json.dumps({**c, "classes": ["a", "b", "c", "d"], "fingerprint": "x"}))
    u = load_run(tmp_path / "run").unit((layer, 1))
    assert len(u.exemplars) == len(u.negative_exemplars) == 64 and len(u.synthesised) == 1
    html = u._repr_html_()
    p = _parse(html)
    assert p.tags.count("img") == _view_html.SHOW_TOP + _view_html.SHOW_NEGATIVE + 1
    assert "48 more not drawn" in html and "56 more not drawn" in html
    print(f"unit HTML: {len(html):,} characters")
    assert len(html) < 200_000, len(html)  # 25 pictures of at most 96 px of noise (JPEG's worst case)
    assert "script" not in p.tags and not p.handlers and not p.urls
    assert layer not in html and "&lt;svg onload=alert(3)&gt;" in html


def test_units_table_as_records_and_dataframe(tiny):
    t = tiny.view.units("3")
    assert [r["unit"] for r in t] == list(range(len(t))) and len(t) > 0
    import pandas  # a test dependency (pyproject [test]); the library only needs it for .frame()
    f = t.frame()
    assert isinstance(f, pandas.DataFrame) and list(f["unit"]) == [r["unit"] for r in t]
    assert list(f.columns) == list(t[0])


def test_plain_reprs_are_short(tiny):
    for obj in (tiny.view, tiny.view.layer("6"), tiny.view.unit("6:0"), tiny.view.units("6")):
        r = repr(obj)
        assert "\n" not in r and len(r) < 300, r


def test_bad_input_is_one_clear_error(tiny, tmp_path):
    with pytest.raises(UnitlensError, match="not a unitlens run folder"):
        load_run(tmp_path)
    with pytest.raises(UnitlensError, match="No layer 'nope'.*Layers: 3, 6"):
        tiny.view.layer("nope")
    with pytest.raises(UnitlensError, match="not mined"):
        tiny.view.unit("3:999")


def test_package_names_for_completion_and_type_checkers():
    import ast

    import unitlens

    assert set(unitlens.__all__) == {*unitlens._EXPORTS, "__version__"}
    assert set(unitlens.__all__) <= set(dir(unitlens))
    # every export is imported under TYPE_CHECKING, from the module the lazy table names
    tree = ast.parse(Path(unitlens.__file__).read_text())
    typed = {a.name: n.module for n in ast.walk(tree) if isinstance(n, ast.ImportFrom) and n.level == 1
             for a in n.names}
    assert {k: typed.get(k) for k in unitlens._EXPORTS} == unitlens._EXPORTS
    assert (Path(unitlens.__file__).parent / "py.typed").is_file()


def test_probe_and_comparison_results_draw_and_keep_their_json(tiny, tmp_path):
    import csv

    from unitlens import (
        CompareConfig,
        MineConfig,
        ProbeConfig,
        compare,
        probe,
        unit_summary,
    )

    p = probe(tiny.path, "6:0", config=ProbeConfig(top_k=3, attribute=2, methods=("gxi",), workers=0))
    assert json.loads(json.dumps(p)) == json.loads((p.folder / "probe.json").read_text())
    assert p.unit.summary == unit_summary(tiny.path, "6", 0)
    html = p._repr_html_()
    t = _parse(html)
    assert "script" not in t.tags and not t.handlers and not t.urls
    assert html.count("gradient-x-input") >= 2  # the heat maps of both attributed exemplars
    assert "\n" not in repr(p)

    torch.manual_seed(1)
    model = load_model(f"{TESTS / 'nets.py'}:digits_net", size=32)
    b = mine(model, open_corpus(tiny.path.parent / "corpus", labels="folders"), parse_layers(model, ["6"]),
             tmp_path / "b", MineConfig(top_k=5, workers=0, thumb=32))
    c = compare(tiny.path, b.path, layers=["6"], out=tmp_path / "cmp", config=CompareConfig(workers=0, bootstrap=20),
                atlas=False)
    assert json.loads(json.dumps(c)) == json.loads((tmp_path / "cmp" / "compare.json").read_text())
    [row] = c.layers()
    assert row["layer"] == "6" and row["cka"] == c["layers"][0]["cka"]
    with open(tmp_path / "cmp" / "units_6.csv") as f:  # the table the comparison wrote, as the reference
        written = {int(r["unit"]): r for r in csv.DictReader(f)}
    units = c.units("6")
    assert sorted(r["unit"] for r in units) == sorted(written)
    assert [r["rank"] for r in units] == sorted(int(r["rank"]) for r in written.values())
    for r in units:
        assert float(written[r["unit"]]["corr"] or "nan") == pytest.approx(r["corr"] if r["corr"] is not None
                                                                           else float("nan"), nan_ok=True)
    pair = c.pair("6", 3)
    assert pair.a.summary == unit_summary(tiny.path, "6", 3) and pair.b.summary == unit_summary(b.path, "6", 3)
    for html in (c._repr_html_(), pair._repr_html_()):
        t = _parse(html)
        assert "script" not in t.tags and not t.handlers and not t.urls
    assert pair._repr_html_().count('<span class="uv-unit">3</span>') == 2  # A and B side by side
    with pytest.raises(UnitlensError, match="No layer '3' in this comparison"):
        c.units("3")


def test_tables_need_no_pandas(tiny, monkeypatch):
    import sys

    monkeypatch.setitem(sys.modules, "pandas", None)  # as if not installed: importing it fails
    t = tiny.view.units("6")
    assert len(t) == 10 and all(isinstance(r, dict) for r in t) and "<table" in t._repr_html_()
    with pytest.raises(UnitlensError, match=r"needs pandas.*unitlens\[tables\]"):
        t.frame()


def test_reading_a_run_needs_no_torch(tiny):
    import subprocess
    import sys

    code = ("import sys; from unitlens import load_run; r = load_run(sys.argv[1]); u = r.unit('6:0'); "
            "u._repr_html_(); u.exemplars[0].crop(); u.synthesised[0].image(); r.units('6'); r._repr_html_(); "
            "print(sorted(m for m in ('torch', 'torchvision', 'faiss') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code, str(tiny.path)], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]", out.stderr


def test_a_unit_draws_each_facet_with_its_kept_crops(tiny):
    u = next(u for u in (tiny.view.unit(f"3:{c}") for c in range(32)) if len(u.facets) >= 2)
    html = u._repr_html_()
    assert html.count('<div class="facet">') == len(u.facets)
    for k, g in enumerate(u.facets):
        kept = sum(p.id in {e.id for e in u.exemplars} for p in g)
        assert f"facet {k + 1}: {len(g)} images, {min(kept, 4)} kept exemplars shown" in html
