"""Facets, near-duplicates and nearest images (faiss) against brute-force numpy on the same data."""
import json

import numpy as np
import pytest
import torch
from PIL import Image

import cdp
from conftest import TESTS, chromium_or_skip
from unitlens import MineConfig, load_model, mine, open_corpus, parse_layers, render_atlas
from unitlens import dedupe, embedding, facets, neighbours
from unitlens.store import read_npz

FACETED = f"{TESTS / 'faceted.py'}:two_faced"
SIZE = 32


# -- faiss against numpy -----------------------------------------------------------------------

def test_kmeans_assignment_is_the_nearest_centroid_and_silhouette_matches_scikit_learn():
    from sklearn.metrics import silhouette_score

    rng = np.random.default_rng(0)
    x = np.concatenate([rng.normal(c, 0.3, (20, 8)) for c in (-2, 0, 2)]).astype(np.float32)
    for k in (2, 3, 4):
        cent, a = facets.kmeans(x, k)
        d = ((x[:, None, :].astype(np.float64) - cent[None].astype(np.float64)) ** 2).sum(2)
        np.testing.assert_array_equal(a, d.argmin(1))
        # scikit-learn's silhouette_score (Rousseeuw 1987) as the reference implementation
        assert facets.silhouette(x, a) == pytest.approx(silhouette_score(x, a), abs=1e-6)
    again = facets.kmeans(x, 3)[1]
    np.testing.assert_array_equal(facets.kmeans(x, 3)[1], again)  # seeded: the same every time
    centres = rng.normal(size=(3, 8)) * 3  # three blobs in different directions
    y = np.concatenate([rng.normal(c, 0.3, (20, 8)) for c in centres])
    labels, s = facets.facets_of(embedding.normalise(y - y.mean(0)))
    assert labels.max() == 2 and np.bincount(labels).tolist() == [20, 20, 20] and s > 0.5
    one, s1 = facets.facets_of(embedding.normalise(rng.normal(size=(40, 8))))  # no structure: one facet
    assert one.max() == 0 and s1 == 0.0


def test_inner_product_search_equals_numpy_argsort():
    rng = np.random.default_rng(1)
    base = embedding.normalise(rng.normal(size=(300, 16)))
    q = embedding.normalise(rng.normal(size=(7, 16)))
    sim, rows = embedding.nearest(base, q, 5)
    dots = q.astype(np.float64) @ base.T.astype(np.float64)
    np.testing.assert_array_equal(rows, np.argsort(-dots, axis=1, kind="stable")[:, :5])
    np.testing.assert_allclose(sim, np.take_along_axis(dots, rows, 1), atol=1e-5)


def _groups_numpy(thumbs: np.ndarray, thr: float) -> np.ndarray:
    """The grouping rule by brute force: pairwise cosine of mean-subtracted, normalised rows."""
    x = thumbs.astype(np.float64)
    x -= x.mean(1, keepdims=True)
    n = np.linalg.norm(x, axis=1, keepdims=True)
    x = np.where(n > 0, x / np.where(n > 0, n, 1), 0)
    cos = x @ x.T
    g = np.arange(len(x))
    for i in range(len(x)):
        earlier = np.nonzero(cos[i, :i] >= thr)[0]
        if len(earlier):
            g[i] = g[earlier[0]]
    return g


def test_range_search_groups_equal_numpy_pairwise_cosine_for_any_chunking():
    rng = np.random.default_rng(2)
    base = rng.integers(0, 256, (40, 3 * 16 * 16))
    dup = np.clip(base[[3, 3, 17, 30]] + rng.integers(-2, 3, (4, base.shape[1])), 0, 255)  # tiny noise
    t = np.concatenate([base, dup, base[[8]]]).astype(np.uint8)  # an exact copy too
    want = _groups_numpy(t, 0.99)
    assert (want != np.arange(len(t))).sum() == 5  # the planted copies, nothing else
    for chunks in ([len(t)], [1] * len(t), [7, 13, 20, len(t)]):
        nd = dedupe.NearDuplicates(t, 0.99)
        upto = 0
        for c in chunks:
            upto = min(len(t), upto + c)
            nd.extend(upto)
        np.testing.assert_array_equal(nd.groups.numpy(), want)


# -- mining with and without --dedupe on real photos -------------------------------------------

@pytest.fixture(scope="module")
def photo_corpus(tmp_path_factory):
    """32x32 tiles of scikit-image's sample photos; one saved again through JPEG re-encoding,
    one with +-1 noise, one copied byte for byte (three planted near-duplicate pairs)."""
    from skimage import data

    d = tmp_path_factory.mktemp("photos")
    tiles = []
    for name in ("astronaut", "coffee", "chelsea", "rocket"):
        im = Image.fromarray(getattr(data, name)()).resize((128, 128), Image.BILINEAR)
        a = np.asarray(im)
        tiles += [a[y:y + 32, x:x + 32] for y in (0, 48, 96) for x in (0, 48, 96)]
    for k, a in enumerate(tiles):
        Image.fromarray(a).save(d / f"t{k:02d}.png")
    Image.open(d / "t05.png").save(d / "t05-again.jpg", quality=95)
    noise = np.random.default_rng(3).integers(-1, 2, tiles[20].shape)
    Image.fromarray(np.clip(tiles[20].astype(int) + noise, 0, 255).astype(np.uint8)).save(d / "t20-noisy.png")
    (d / "t31-copy.png").write_bytes((d / "t31.png").read_bytes())
    return d


def _brute(model, corpus, layer):
    """Per-image spatial max, mean and min through a plain forward hook on the whole network, and
    thumbnails by numpy block means (32 = 16 x 2, so the 16x16 area average is a 2x2 mean)."""
    from unitlens.corpus import batches

    seen, ids, thumbs = [], [], []
    h = model.module.get_submodule(layer).register_forward_hook(lambda m, i, o: seen.append(o))
    with torch.no_grad():
        for b in batches(corpus, SIZE, batch_size=5, workers=0):
            model.module(model.normalize(b.images))
            ids.append(b.indices)
            px = b.images.numpy().astype(np.float64).reshape(-1, 3, 16, 2, 16, 2).mean((3, 5))
            thumbs.append(np.round(px).reshape(len(px), -1))
    h.remove()
    f = torch.cat(seen).flatten(2)
    return torch.cat(ids).numpy(), f.max(2).values.numpy(), f.mean(2).numpy(), np.concatenate(thumbs), f.min(2).values.numpy()


def _ranked(ids, scores, k, groups=None):
    order = np.lexsort((ids, -scores))
    out, seen = [], set()
    for j in order:
        if groups is not None:
            if groups[ids[j]] in seen:
                continue
            seen.add(groups[ids[j]])
        out.append(int(ids[j]))
    return out[:k]


def test_dedupe_keeps_one_of_each_planted_group_and_off_keeps_the_exact_top_k(tmp_path, photo_corpus):
    model = load_model(FACETED, size=SIZE)
    corpus = open_corpus(photo_corpus)
    layers = parse_layers(model, ["2:0-2"])
    ids, mx, _, thumbs, mn = _brute(model, corpus, "2")
    groups = _groups_numpy(thumbs[np.argsort(ids)], 0.99)
    planted = [(corpus.files.index(a), corpus.files.index(b)) for a, b in
               (("t05.png", "t05-again.jpg"), ("t20.png", "t20-noisy.png"), ("t31.png", "t31-copy.png"))]
    assert sorted(tuple(sorted(p)) for p in planted) == sorted(
        (int(groups[i]), i) for i in range(len(groups)) if groups[i] != i)  # exactly the planted pairs
    K = 20
    on = mine(model, corpus, layers, tmp_path / "on", MineConfig(top_k=K, batch_size=4, workers=0, dedupe=True))
    off = mine(model, corpus, layers, tmp_path / "off", MineConfig(top_k=K, batch_size=7, workers=0))
    i_on, i_off = on.index("2"), off.index("2")
    for u in range(3):
        assert i_off["top_image"][u].tolist() == _ranked(ids, mx[:, u], K)  # off: the brute-force top-K
        want = _ranked(ids, mx[:, u], K, groups)
        got = [i for i in i_on["top_image"][u].tolist() if i < len(corpus)]
        assert got == want
        for a, b in planted:
            assert not (a in got and b in got)
        bottom = [int(i) for i in i_on["bottom_image"][u] if i < len(corpus)]
        assert bottom == _ranked(ids, -mn[:, u], K, groups)
    assert any(a in i_off["top_image"][u] and b in i_off["top_image"][u] for u in range(3) for a, b in planted)
    m_on, m_off = on.manifest()["mine"], off.manifest()["mine"]
    assert m_on["dedupe"]["on"] and m_on["dedupe"]["threshold"] == 0.99 and m_on["dedupe"]["duplicates"] == 3
    assert m_off["dedupe"] == {"on": False}
    again = mine(model, corpus, layers, tmp_path / "on2", MineConfig(top_k=K, batch_size=32, workers=0, dedupe=True))
    np.testing.assert_array_equal(again.index("2")["top_image"], i_on["top_image"])  # any batch size


# -- facets and nearest images on a planted two-faceted unit -----------------------------------

@pytest.fixture(scope="module")
def faceted_run(tmp_path_factory):
    """14 red images and 14 black-and-white vertical stripe images, each with its own noise;
    the faceted net mined and synthesised, then the atlas drawn."""
    from unitlens.synth import Goal, SynthConfig, synthesize

    root = tmp_path_factory.mktemp("faceted")
    d = root / "corpus"
    d.mkdir()
    rng = np.random.default_rng(4)
    for k in range(14):
        red = np.zeros((SIZE, SIZE, 3))
        red[..., 0] = rng.uniform(0.6, 1.0)
        red += rng.uniform(0, 0.15, red.shape)
        Image.fromarray((np.clip(red, 0, 1) * 255).astype(np.uint8)).save(d / f"red{k:02d}.png")
        st = np.zeros((SIZE, SIZE, 3))
        st[:, ::2] = rng.uniform(0.6, 1.0)
        st += rng.uniform(0, 0.1, st.shape)
        Image.fromarray((np.clip(st, 0, 1) * 255).astype(np.uint8)).save(d / f"stripe{k:02d}.png")
    model = load_model(FACETED, size=SIZE)
    corpus = open_corpus(d)
    run = mine(model, corpus, parse_layers(model, ["2"]), root / "run", MineConfig(top_k=8, workers=0))
    synthesize(model, Goal("2:2"), root / "run", SynthConfig(steps=8, checks=2))
    return model, corpus, run, render_atlas(run)


def test_a_unit_that_responds_to_red_or_stripes_has_two_facets_that_separate_them(faceted_run):
    _, corpus, run, _ = faceted_run
    z = read_npz(run.layer_dir("2") / "facets.npz")
    u = list(z["units"]).index(2)
    assert z["k"][u] == 2
    members = z["image"][u][z["facet"][u] >= 0]
    kind = np.array([corpus.files[i].startswith("red") for i in members])
    fac = z["facet"][u][z["facet"][u] >= 0]
    assert len(members) == len(corpus)  # top-N covers the small corpus
    assert set(fac[kind]) != set(fac[~kind]) and len(set(fac[kind])) == 1 and len(set(fac[~kind])) == 1
    first = [i for i in run.index("2")["top_image"][u] if i < len(corpus)]
    assert members[:len(first)].tolist() == first  # the kept exemplars lead, in rank order


def test_embedding_manifest_entry_is_right(faceted_run, tmp_path, monkeypatch):
    model, corpus, run, _ = faceted_run
    e = run.manifest()["mine"]["layers"]["2"]["embedding"]
    path = run.path / e["path"]
    assert e["path"] == "mine/2/means.npy"  # every channel of a narrow layer mined: the means are the embedding
    assert e["bytes"] == path.stat().st_size and e["dtype"] == "float32" and e["shape"] == [len(corpus), 3]
    # a wider layer than EMBED_DIM, one unit mined: pooled features reduced by PCA (scikit-learn's PCA as reference)
    from sklearn.decomposition import PCA

    monkeypatch.setattr(embedding, "EMBED_DIM", 2)
    r = mine(model, corpus, parse_layers(model, ["2:2"]), tmp_path / "pca", MineConfig(top_k=4, workers=0))
    e = r.manifest()["mine"]["layers"]["2"]["embedding"]
    path = r.path / e["path"]
    assert e["path"] == "mine/2/embed.npy" and e["shape"] == [len(corpus), 2] and "PCA" in e["kind"]
    assert e["bytes"] == path.stat().st_size and not (r.layer_dir("2") / "pooled.npy").exists()
    ids, _, mean, _, _ = _brute(model, corpus, "2")
    pooled = mean[np.argsort(ids)]
    want = PCA(n_components=2).fit(pooled).transform(pooled)
    got = np.load(path).astype(np.float64)
    np.testing.assert_allclose(np.abs(got), np.abs(want), rtol=2e-2, atol=2e-3)  # PCA axes have no sign


def test_nearest_natural_images_of_a_synthesised_image_equal_brute_force(faceted_run):
    model, corpus, run, _ = faceted_run
    rec = json.loads((run.layer_dir("2", "synth") / "units.json").read_text())["units"]["2"]
    assert (run.layer_dir("2", "synth") / rec["nearest_strip"]).is_file()
    im = rec["images"][0]
    png = np.array(Image.open(run.layer_dir("2", "synth") / im["file"]).convert("RGB"))
    x = torch.from_numpy(png).permute(2, 0, 1)[None].float() / 255
    with torch.no_grad():
        q = model.module(model.normalize(x)).double().amax((2, 3)).numpy()  # the whole net ends at layer 2
    units = np.load(run.layer_dir("2") / "index.npz")["units"]
    q = q[:, units]
    # the search space: per-image channel maxima minus their mean, unit 2's own channel weighted x4
    base = np.load(run.layer_dir("2") / "values.npy").astype(np.float64)
    w = np.where(units == 2, neighbours.OWN_WEIGHT, 1.0)
    centre = base.mean(0)
    b = (base - centre) * w
    b /= np.linalg.norm(b, axis=1, keepdims=True)
    q = (q - centre) * w
    q /= np.linalg.norm(q)
    cos = (b @ q.T)[:, 0]
    want = np.argsort(-cos, kind="stable")[:neighbours.NEAR_K]
    assert [n["index"] for n in im["nearest"]] == want.tolist()
    np.testing.assert_allclose([n["similarity"] for n in im["nearest"]], cos[want], atol=1e-4)
    assert [n["id"] for n in im["nearest"]] == [corpus.files[i] for i in want]


def test_unit_view_shows_facets_and_nearest_images_without_errors(faceted_run):
    chromium = chromium_or_skip()
    _, _, run, index = faceted_run
    browser = cdp.Browser(chromium)
    try:
        page = browser.page(1280, 1400)
        page.goto((index.parent / "layer-2.html").as_uri() + "#unit-2")
        page.wait_for("document.getElementById('unit').dataset.complete")
        heads = page.js("[...document.querySelectorAll('.uv-facets .facet-head')].map(e => e.textContent)")
        assert len(heads) == 2 and all("of 28 images" in h for h in heads), heads
        assert page.js("document.querySelectorAll('.uv-facets .facet-grid .crop').length") == 8  # the kept crops
        sims = page.js("[...document.querySelectorAll('.syn-near .near figcaption')].map(e => e.textContent)")
        assert len(sims) == neighbours.NEAR_K
        strip = page.js("getComputedStyle(document.querySelector('.syn-near .crop')).backgroundImage")
        assert "near-0002.jpg" in strip
        assert page.errors == [] and all(u.startswith("file://") for u in page.requests), page.errors
        page.close()
    finally:
        browser.close()
