"""Concepts from annotations: planted units, IoU and thresholds against brute force, AUC against
scikit-learn, COCO rasterisation against hand-written masks, resume."""
import json

import numpy as np
import pytest
import torch
from PIL import Image

from conftest import TESTS, cli
from shapes import write_corpus
from unitlens import MineConfig, UnitlensError, load_model, mine, open_corpus, parse_layers
from unitlens.concepts import BINS, TOP, label, read_annotations, roc_auc, unit_concepts
from unitlens.corpus import decode_original, fit

SPEC = f"{TESTS}/shapes.py:shape_net"


@pytest.fixture(scope="module")
def shapes(tmp_path_factory):
    """The shapes corpus mined at 64 px for both layers: (root, model, corpus, run)."""
    root = tmp_path_factory.mktemp("shapes")
    images, _, _ = write_corpus(root)
    with pytest.warns(UserWarning):
        model = load_model(SPEC, size=64, mean=(0, 0, 0), std=(1, 1, 1))
    corpus = open_corpus(images)
    run = mine(model, corpus, parse_layers(model, ["act", "pool"]), root / "run",
               MineConfig(top_k=4, batch_size=8, workers=0))
    return root, model, corpus, run


def _labelled(shapes, name, **kw):
    """A copy of the mined run labelled with the shapes' label maps (and `kw` for read_annotations)."""
    import shutil

    root, model, corpus, run = shapes
    out = root / name
    shutil.copytree(run.path, out)
    from unitlens.store import Run

    ann = read_annotations(corpus, masks=[kw.pop("masks", root / "masks")], legends=[root / "legend.csv"], **kw)
    return Run(out), ann


def _maps(model, corpus, layer):
    """Oracle: every image's whole map of `layer` from a plain forward hook, with its placement."""
    out, seen = [], []
    h = model.module.get_submodule(layer).register_forward_hook(lambda m, a, o: seen.append(o[0]))
    for i in range(len(corpus)):
        img, size, _ = decode_original(corpus.path(i))
        x, place = fit(img, model.preprocess.frame, size)
        with torch.no_grad():
            model.module(torch.from_numpy(x)[None].float() / 255)
        out.append((seen.pop().numpy().astype(np.float64), place))  # (U, h, w)
    h.remove()
    return out


def test_planted_units_are_named_by_their_shape(shapes):
    run, ann = _labelled(shapes, "planted")
    label(run, ann, ["act"], model=shapes[1], workers=0)
    red, green, random = (unit_concepts(run, "act", u) for u in range(3))
    assert red["label"] == "red square" and red["iou"] >= 0.5
    assert green["label"] == "green disc" and green["iou"] >= 0.5
    # the seeded random filter responds to strong colour edges a little, never like the planted units
    assert random["iou"] < 0.25


def test_overlap_equals_brute_force_and_unannotated_images_are_left_out(shapes, tmp_path):
    """IoU from the stored threshold equals numpy on full-resolution masks, the map brought to the
    original's pixels with scipy's bilinear interpolation at the analytic receptive-field centres
    (3x3 conv, padding 1, then 2x2 average pooling: position y is centred on input pixel 2y + 0.5).
    Four label maps are removed: those images count for no concept."""
    import shutil

    from scipy.ndimage import map_coordinates

    root, model, corpus, _ = shapes
    masks = tmp_path / "masks"
    shutil.copytree(root / "masks", masks)
    gone = {corpus.files[i] for i in (1, 5, 9, 12)}
    for f in gone:
        (masks / f).unlink()
    run, ann = _labelled(shapes, "brute", masks=masks)
    label(run, ann, ["pool"], model=model, workers=0)
    z = np.load(run.path / "concepts/pool/overlap.npz")
    T = z["threshold"]
    inter, union = np.zeros((3, 2)), np.zeros((3, 2))
    for i, (f, place) in enumerate(_maps(model, corpus, "pool")):
        if corpus.files[i] in gone:
            continue
        lab = np.asarray(Image.open(masks / corpus.files[i]))
        H, W = lab.shape
        yy, xx = np.mgrid[:H, :W]
        u = (xx + 0.5) * place.scale - place.left  # network-input coordinates of the pixel centres
        v = (yy + 0.5) * place.scale - place.top
        seen = (u >= 0) & (u < 64) & (v >= 0) & (v < 64)
        for k in range(3):
            up = map_coordinates(f[k], [(v - 0.5 - 0.5) / 2, (u - 0.5 - 0.5) / 2], order=1, mode="nearest")
            above = (up > T[k]) & seen
            for c in range(2):
                m = (lab == c + 1) & seen
                inter[k, c] += (above & m).sum()
                union[k, c] += (above | m).sum()
    np.testing.assert_allclose(z["intersection"], inter, rtol=1e-3, atol=2)
    np.testing.assert_allclose(z["union"], union, rtol=1e-3, atol=2)
    np.testing.assert_allclose(z["iou"], inter / union, atol=1e-3)
    assert z["images"].tolist() == [len(corpus) - 4] * 2
    assert run.manifest()["concepts"]["sources"][0]["unannotated"] == 4


def test_threshold_equals_numpy_quantile_within_the_stated_error(shapes):
    root, model, corpus, mined = shapes
    run, ann = _labelled(shapes, "quantile")
    label(run, ann, model=model, workers=0)
    for layer in ("act", "pool"):
        maps = _maps(model, corpus, layer)
        every = np.concatenate([f.reshape(3, -1) for f, _ in maps], 1)  # (U, all positions)
        z = np.load(run.path / f"concepts/{layer}/threshold.npz")
        for k in range(3):
            exact = np.quantile(every[k], 1 - TOP, method="inverted_cdf")
            # stated error: one bin of BINS between the unit's smallest and largest activation
            bound = (every[k].max() - every[k].min()) / BINS
            np.testing.assert_allclose(z["error"][k], bound, rtol=1e-5)
            assert abs(z["threshold"][k] - exact) <= bound * (1 + 1e-6) + 1e-7


def test_stopped_passes_resume_to_the_same_result(shapes):
    import shutil

    root, model, corpus, _ = shapes
    whole, ann = _labelled(shapes, "whole")
    label(whole, ann, model=model, workers=0)
    first, ann = _labelled(shapes, "stopped-first")  # stopped in the threshold pass
    assert label(first, ann, model=model, workers=0, batch_size=4, _stop_after=9) == {}
    assert (first.path / "concepts/state-thresholds.npz").is_file()
    second, ann = _labelled(shapes, "stopped-second")  # thresholds known, stopped in the overlap pass
    for layer in ("act", "pool"):
        (second.path / "concepts" / layer).mkdir(parents=True)
        shutil.copy(whole.path / f"concepts/{layer}/threshold.npz", second.path / f"concepts/{layer}/threshold.npz")
    assert label(second, ann, model=model, workers=0, batch_size=4, _stop_after=9) == {}
    assert (second.path / "concepts/state-overlaps.npz").is_file()
    for part in (first, second):
        assert label(part, ann, model=model, workers=0, batch_size=4)["done"]
        for layer in ("act", "pool"):
            a, b = (np.load(r.path / f"concepts/{layer}/overlap.npz") for r in (whole, part))
            np.testing.assert_allclose(a["threshold"], b["threshold"], rtol=1e-12)
            assert np.array_equal(a["intersection"], b["intersection"]) and np.array_equal(a["union"], b["union"])
        assert not list((part.path / "concepts").glob("state*"))


def test_tag_auc_equals_scikit_learn(shapes):
    from sklearn.metrics import roc_auc_score

    root, model, corpus, _ = shapes
    listed = [i for i in range(len(corpus)) if i != 3]  # one image untagged: left out, not a negative
    red = [int(corpus.files[i][-6:-4]) % 4 == 0 for i in listed]  # the images shapes.py gave a red square
    lines = ["image,tags"] + [f"{corpus.files[i]},{'red' if r else ''}{';odd' if i % 2 else ''}"
                              for i, r in zip(listed, red)]
    (root / "tags.csv").write_text("\n".join(lines) + "\n")
    run, ann = _labelled(shapes, "tags", tags=root / "tags.csv")
    entry = label(run, ann, ["act"], model=model, workers=0)
    assert entry["tags"]["untagged"] == 1 and entry["tags"]["tags"] == ["odd", "red"]
    maxima = np.stack([f.reshape(3, -1).max(1) for f, _ in _maps(model, corpus, "act")])[listed]  # (n, U)
    z = np.load(run.path / "concepts/act/tags.npz")
    for j, truth in enumerate(([i % 2 == 1 for i in listed], red)):
        for u in range(3):
            assert z["auc"][u, j] == pytest.approx(roc_auc_score(truth, maxima[:, u]), abs=1e-9)
    assert unit_concepts(run, "act", 0)["tags"][0] == {"name": "red", "auc": 1.0, "images": 23, "tagged": sum(red)}


def test_roc_auc_with_ties_equals_scikit_learn():
    from sklearn.metrics import roc_auc_score

    rng = np.random.default_rng(1)
    scores = rng.integers(0, 5, (60, 4)).astype(float)  # many ties
    y = rng.random(60) < 0.3
    np.testing.assert_allclose(roc_auc(scores, y), [roc_auc_score(y, scores[:, u]) for u in range(4)], atol=1e-12)
    assert np.isnan(roc_auc(scores, np.zeros(60, bool))).all()


class _Corpus:
    def __init__(self, files):
        self.files = tuple(files)


def test_coco_fixture_rasterises_to_the_expected_masks(tmp_path):
    """Written by hand: an L-shaped polygon on a 10x8 image, a box and an uncompressed run-length
    mask on a 6x5 one. Pillow draws a polygon with its vertices at pixel centres, edges included."""
    from unitlens._annotations import coco

    doc = {"images": [{"id": 1, "file_name": "a/one.png", "width": 10, "height": 8},
                      {"id": 2, "file_name": "two.png", "width": 6, "height": 5},
                      {"id": 3, "file_name": "elsewhere.png", "width": 6, "height": 5}],
           "categories": [{"id": 7, "name": "bracket"}, {"id": 9, "name": "dent"}],
           "annotations": [{"image_id": 1, "category_id": 7,
                            "segmentation": [[2, 1, 7, 1, 7, 3, 4, 3, 4, 6, 2, 6]]},
                           {"image_id": 2, "category_id": 9, "bbox": [1, 2, 3, 2]},
                           {"image_id": 2, "category_id": 7,
                            "segmentation": {"size": [5, 6], "counts": [5, 2, 23]}}]}
    (tmp_path / "c.json").write_text(json.dumps(doc))
    src = coco(tmp_path / "c.json", _Corpus(["a/one.png", "two.png", "three.png"]))
    assert src.concepts == ("bracket", "dent") and src.unmatched == 1
    one = np.zeros((2, 8, 10), bool)
    one[0, 1:4, 2:8] = True  # the top bar: columns 2-7, rows 1-3
    one[0, 3:7, 2:5] = True  # the stem: columns 2-4, rows 3-6
    two = np.zeros((2, 5, 6), bool)
    two[1, 2:4, 1:4] = True  # the box: x 1-3, y 2-3
    two[0, 0:2, 1] = True  # run lengths, column-major: 5 off, 2 on (column 1, rows 0-1)
    assert np.array_equal(src.masks("a/one.png", (10, 8)), one)
    assert np.array_equal(src.masks("two.png", (6, 5)), two)


def test_compressed_run_lengths_without_a_decoder_say_what_to_do(tmp_path, monkeypatch):
    from unitlens._annotations import coco

    monkeypatch.setitem(__import__("sys").modules, "pycocotools", None)  # as if not installed
    doc = {"images": [{"id": 1, "file_name": "x.png", "width": 4, "height": 4}],
           "categories": [{"id": 1, "name": "spot"}],
           "annotations": [{"image_id": 1, "category_id": 1, "segmentation": {"size": [4, 4], "counts": "04L4"}}]}
    (tmp_path / "c.json").write_text(json.dumps(doc))
    with pytest.raises(UnitlensError, match="pycocotools"):
        coco(tmp_path / "c.json", _Corpus(["x.png"]))


@pytest.mark.parametrize("legend, match", [
    ("value,name\n1,a\n1,b\n", "twice"),
    ("value,name\nred,1\n", "not a whole number"),
    ("value,name\n", "names no concept"),
])
def test_bad_legends_are_one_clear_error(tmp_path, legend, match):
    from unitlens._annotations import read_legend

    (tmp_path / "l.csv").write_text(legend)
    with pytest.raises(UnitlensError, match=match):
        read_legend(tmp_path / "l.csv")


def test_label_command_show_and_json(shapes, capsys):
    root, model, corpus, _ = shapes
    run, _ = _labelled(shapes, "cli")
    code, out, err = cli(capsys, "label", run.path, "--masks", root / "masks", "--legend", root / "legend.csv",
                         "--layers", "act", "--workers", "0")
    assert code == 0, err
    assert "act: 3 of 3 units detect a concept" in out and "24 images annotated, 0 without annotations" in out
    code, out, _ = cli(capsys, "show", run.path, "act:0")
    assert "detects red square" in out
    code, out, _ = cli(capsys, "show", run.path, "act:0", "--json")
    c = json.loads(out)["concepts"]
    assert c["label"] == "red square" and c["concepts"][0]["images"] == 24
    code, out, err = cli(capsys, "label", run.path, "--masks", root / "nowhere")
    assert code == 1 and err.strip().splitlines()[-1].startswith("Error: Label-map folder")


def test_notebook_objects_carry_the_concepts(shapes):
    from unitlens import load_run

    run, ann = _labelled(shapes, "view")
    label(run, ann, ["act"], model=shapes[1], workers=0)
    view = load_run(run.path)
    assert view.unit("act:0").concepts == unit_concepts(run, "act", 0)
    rows = {r["unit"]: r for r in view.units("act")}
    assert rows[0]["concept"] == "red square" and rows[1]["concept"] == "green disc"
    assert rows[0]["iou"] == pytest.approx(unit_concepts(run, "act", 0)["iou"])
    assert view.layer("act").concepts["labelled"] == sum(r["concept"] is not None for r in rows.values())
    assert view.layer("pool").concepts is None  # not labelled


def test_atlas_shows_chips_filter_order_summary_and_mask_outlines(shapes, browser):
    from test_atlas import _clean, _open, _units_data

    from unitlens import render_atlas

    run, ann = _labelled(shapes, "atlas")
    label(run, ann, ["act"], model=shapes[1], workers=0)
    atlas = render_atlas(run).parent
    cards = _units_data(atlas, "act")
    assert cards["concept"][:2] == ["red square", "green disc"]
    assert cards["concept_summary"]["labelled"] == sum(c is not None for c in cards["concept"])
    details = _units_data(atlas, "act", "units")
    # the outline of the red unit's best exemplar traces the red square drawn in that image's label map
    o = details["outlines"][0]
    assert o["concept"] == "red square" and o["paths"][0]
    page = _open(browser, (atlas / "layer-act.html").as_uri(), height=1400)
    chips = page.js("Object.fromEntries([...document.querySelectorAll('#grid .card')].map(c => [c.dataset.unit, "
                    "c.querySelector('.concept-chip') ? c.querySelector('.concept-chip span').textContent : null]))")
    assert chips["0"] == "red square" and chips["1"] == "green disc"
    assert page.js("document.querySelectorAll('.concept-summary [data-plot=concepts] rect.bar').length") == \
        len(cards["concept_summary"]["share"])
    shown = "[...document.querySelectorAll('#grid .card')].map(c => +c.dataset.unit).sort()"
    page.js("(s => { s.value = 'red square'; s.dispatchEvent(new Event('change')); })(document.getElementById('concept'))")
    assert page.js(shown) == [u for u, c in enumerate(cards["concept"]) if c == "red square"]
    page.js("(s => { s.value = ''; s.dispatchEvent(new Event('change')); })(document.getElementById('concept'))")
    page.js("(s => { s.value = 'iou'; s.dispatchEvent(new Event('change')); })(document.getElementById('sort'))")
    order = page.js("[...document.querySelectorAll('#grid .card')].sort((a, b) => parseFloat(a.style.top) - "
                    "parseFloat(b.style.top) || parseFloat(a.style.left) - parseFloat(b.style.left)).map(c => +c.dataset.unit)")
    assert order == sorted(range(3), key=lambda u: -cards["iou"][u])
    page.close()
    page = _open(browser, (atlas / "layer-act.html").as_uri() + "#unit-0", height=1400)
    page.wait_for("document.getElementById('unit').dataset.complete")
    assert page.js("document.querySelectorAll('.uv-concepts [data-plot=concepts] rect.bar').length") == 2
    drawn = page.js("document.querySelectorAll('.uv-ex .ex svg.outline path').length")
    assert drawn == sum(p is not None and p != "" for p in o["paths"][:len(details["top"][0])]) and drawn > 0
    _clean(page)
    page.close()


def test_demo_label_maps_agree_with_the_factors_and_stain_units_find_stains(tmp_path):
    """The swatch generator's label maps against its own factors file: stains exactly on the swatches
    it lists as stained, stripes by their orientation; the shipped network's units labelled "stain"
    have mostly stained swatches among their top exemplars (by factors.csv)."""
    from unitlens.demo import net, swatches
    from unitlens.demo.build import demo_model

    corpus_dir, maps = tmp_path / "corpus", tmp_path / "maps"
    swatches.write_corpus(corpus_dir, count=72, size=net.INPUT_SIZE, label_maps=maps)
    factors = swatches.read_factors(corpus_dir)
    for path, s in factors:
        lab = np.asarray(Image.open(maps / path.relative_to(corpus_dir)))
        assert (lab == 1).any() == s.stain, path
        assert (lab == 2).any() == (s.kind == "dots"), path
        assert (lab == 3).any() == (s.kind == "stripe" and s.orientation == 0), path
        assert (lab == 4).any() == (s.kind == "stripe" and s.orientation == 90), path
    model = demo_model()
    corpus = open_corpus(corpus_dir, labels="folders")
    run = mine(model, corpus, parse_layers(model, ["block3"]), tmp_path / "run", MineConfig(top_k=8, workers=0))
    label(run, read_annotations(corpus, masks=[maps]), model=model, workers=0)
    stained = {path.relative_to(corpus_dir).as_posix(): s.stain for path, s in factors}
    idx = run.index("block3")
    named = [u for u in idx["units"].tolist() if (unit_concepts(run, "block3", u) or {}).get("label") == "stain"]
    for u in named:
        top = [corpus.files[i] for i in idx["top_image"][list(idx["units"]).index(u)]]
        assert np.mean([stained[f] for f in top]) >= 0.75, (u, top)
    print(f"block3 units labelled stain: {named}")


def test_tags_alone_need_no_pass_and_show_prints_them(shapes, capsys):
    root, model, corpus, _ = shapes
    run, _ = _labelled(shapes, "tags-only")
    (root / "few-tags.csv").write_text("".join(f"{f},{'even' if i % 2 == 0 else ''}\n" for i, f in enumerate(corpus.files)))
    code, out, err = cli(capsys, "label", run.path, "--tags", root / "few-tags.csv")
    assert code == 0, err
    assert "1 tags over 24 images; 0 images not listed" in out
    assert not (run.path / "concepts/act/threshold.npz").exists()  # no forward pass for tags
    code, out, _ = cli(capsys, "show", run.path, "pool:2")
    assert "tags (ROC AUC of the per-image maximum):" in out and "even  (12 of 24 images)" in out
    code, out, err = cli(capsys, "label", run.path, "--tags", root / "nowhere.csv")
    assert code == 1 and "Error: The tags file" in err


def test_outline_paths_trace_the_mask_edges_but_not_the_crop_border():
    from unitlens.atlas.concept_data import outline_path

    square = np.zeros((4, 4), bool)
    square[1:3, 1:3] = True  # a 2x2 block inside: its perimeter is 8 unit edges
    assert sorted(outline_path(square).split("M")[1:]) == sorted(
        ["1 1h1", "2 1h1", "1 3h1", "2 3h1", "1 1v1", "1 2v1", "3 1v1", "3 2v1"])
    half = np.zeros((4, 4), bool)
    half[:, 2:] = True  # runs off the crop: only the line at x = 2
    assert sorted(outline_path(half).split("M")[1:]) == ["2 0v1", "2 1v1", "2 2v1", "2 3v1"]
    assert outline_path(np.ones((4, 4), bool)) == ""


def test_annotations_that_cannot_match_are_refused_before_any_pass(tmp_path):
    images, masks, legend = write_corpus(tmp_path, n=4)
    corpus = open_corpus(images)
    first = corpus.files[0]
    Image.new("L", (7, 5)).save(masks / first)  # not the image's size
    with pytest.raises(UnitlensError, match="annotations are in the image's own pixels"):
        read_annotations(corpus, masks=[masks], legends=[legend])
    with pytest.raises(UnitlensError, match="2 legends for 1 label-map folders"):
        read_annotations(corpus, masks=[masks], legends=[legend, legend])
    with pytest.raises(UnitlensError, match="No legend for the label maps"):
        read_annotations(corpus, masks=[masks])  # no masks/legend.csv and no --legend
    empty = tmp_path / "elsewhere"
    empty.mkdir()
    with pytest.raises(UnitlensError, match="No image of the corpus has an annotation"):
        read_annotations(corpus, masks=[empty], legends=[legend])
    with pytest.raises(UnitlensError, match="No annotations given"):
        read_annotations(corpus)
