"""Crops with context on the atlas: a 5-px receptive field is shown with at least the stated number of
original pixels around it, outlined, and the whole image with its box is one click away. The field's
box is recomputed here by plain arithmetic (5x5 convolution, stride 1, padding 2; the input is the
centred region of the original scaled to 40 px), and the crops' pixels are compared with PIL cuts
of the originals. The card shows more exemplars than before (four of 50 px) without growing."""
import json
import math
import re
from types import SimpleNamespace

import numpy as np
import pytest
import torch
from PIL import Image

from conftest import TESTS
from test_atlas import _clean, _open, _units_data
from unitlens import MineConfig, load_model, mine, open_corpus, parse_layers, render_atlas
from unitlens.store import read_npz

W, H, S, K = 80, 64, 40, 8  # originals W x H, network input S x S, exemplars kept
CELL, WHOLE_SHOW = 96, 320  # the unit view's crop size and whole-image size (atlas.js)


@pytest.fixture(scope="module")
def ctx(tmp_path_factory):
    d = tmp_path_factory.mktemp("context")
    rng = np.random.default_rng(3)
    (d / "corpus").mkdir()
    for n in range(10):  # textured noise: every cut of it is unique, so a crop's pixels say where it came from
        Image.fromarray(rng.integers(0, 255, (H, W, 3), dtype=np.uint8)).save(d / "corpus" / f"im{n}.png")
    torch.manual_seed(0)
    model = load_model(f"{TESTS / 'nets.py'}:field5_net", size=S)
    run = mine(model, open_corpus(d / "corpus"), parse_layers(model, ["0"]), d / "run", MineConfig(top_k=K, workers=0))
    index = render_atlas(run)
    return SimpleNamespace(run=run, atlas=index.parent, corpus=d / "corpus")


def field_box(y: int, x: int) -> tuple[int, int, int, int]:
    """Original-pixel box of feature position (y, x), by hand: input pixels x-2 .. x+2 (clipped to the
    input), the input being the original's centred 64 x 64 region scaled by 40/64 (5 input px cut off
    the left of the 50 px wide scaled image)."""
    scale, left = S / H, (W * S / H - S) / 2
    x0, x1 = max(x - 2, 0), min(x + 3, S)
    y0, y1 = max(y - 2, 0), min(y + 3, S)
    return (math.floor((x0 + left) / scale), math.floor(y0 / scale), math.ceil((x1 + left) / scale), math.ceil(y1 / scale))


def test_context_crop_of_a_5px_field_is_the_stated_minimum_and_holds_the_field(ctx, browser):
    idx = read_npz(ctx.run.layer_dir("0") / "index.npz")
    files = json.loads((ctx.run.path / "corpus.json").read_text())["files"]
    page = _open(browser, (ctx.atlas / "layer-0.html").as_uri())
    stated = re.search(r"at least (\d+) × \1 original pixels", page.js("document.querySelector('.pagehead').textContent"))
    assert stated, "the layer page states the least context"
    least = int(stated.group(1))
    assert least >= 3 * 8  # well above the field (5 input px = 8 original px): something to read around it
    checked = 0
    for u in range(2):
        page.js(f"location.hash = '#unit-{u}'")
        page.wait_for("document.getElementById('unit').dataset.complete")
        assert str(least) in page.js("document.querySelector('.uv-ex .ctx-note').textContent")
        figs = page.js("""[...document.querySelectorAll('.uv-ex figure.ex')].map(f => {
          const c = f.querySelector('.crop').getBoundingClientRect(), r = f.querySelector('.crop .ring').getBoundingClientRect();
          return [+f.dataset.rank, f.dataset.field.split(' ').map(Number), f.dataset.view.split(' ').map(Number),
                  [r.left - c.left, r.top - c.top, r.right - c.left, r.bottom - c.top], c.width];
        })""")
        assert len(figs) == K
        sheet = np.asarray(Image.open(ctx.run.layer_dir("0") / "sheet-000.jpg").convert("RGB"), dtype=np.float64)
        for rank, field, view, ring, size in figs:
            r = rank - 1
            want = field_box(int(idx["top_y"][u, r]), int(idx["top_x"][u, r]))  # from mining's stored position
            assert tuple(field) == want, (u, rank)
            assert view[2] - view[0] >= least and view[3] - view[1] >= least  # at least the stated context
            assert view[0] <= want[0] and view[1] <= want[1] and want[2] <= view[2] and want[3] <= view[3]
            assert 0 <= view[0] and 0 <= view[1] and view[2] <= W and view[3] <= H
            k = size / (view[2] - view[0])  # a square view fills the cell
            drawn = [(want[0] - view[0]) * k, (want[1] - view[1]) * k, (want[2] - view[0]) * k, (want[3] - view[1]) * k]
            assert np.allclose(ring, drawn, atol=1.01), (ring, drawn)  # the outline is where the field is
            # the crop's pixels are the original cut at the view (PIL), not the field alone
            with Image.open(ctx.corpus / files[int(idx["top_image"][u, r])]) as im:
                cut = np.asarray(im.convert("RGB").crop(tuple(view)).resize((CELL, CELL), Image.BILINEAR), dtype=np.float64)
            cell = sheet[u * CELL:(u + 1) * CELL, r * CELL:(r + 1) * CELL]
            with Image.open(ctx.corpus / files[int(idx["top_image"][u, r])]) as im:
                alone = np.asarray(im.convert("RGB").crop(want).resize((CELL, CELL), Image.BILINEAR), dtype=np.float64)
            assert np.abs(cell - cut).mean() < 0.5 * np.abs(cell - alone).mean(), (u, rank)
            checked += 1
    assert checked == 2 * K
    _clean(page)
    page.close()


def test_a_click_on_a_crop_shows_the_whole_image_with_its_box(ctx, browser):
    idx = read_npz(ctx.run.layer_dir("0") / "index.npz")
    page = _open(browser, (ctx.atlas / "layer-0.html").as_uri() + "#unit-1")
    page.wait_for("document.getElementById('unit').dataset.complete")
    for r in (0, 5):
        page.js(f"document.querySelectorAll('.uv-ex figure.ex .crop')[{r}].click()")
        page.wait_for("document.querySelector('.whole-view .whole-field') !== null")
        got = page.js("""(() => { const p = document.querySelector('.whole-pic').getBoundingClientRect();
          const b = document.querySelector('.whole-field').getBoundingClientRect();
          return [b.left - p.left, b.top - p.top, b.right - p.left, b.bottom - p.top]; })()""")
        # the whole 80 x 64 original in a 160 px cell: 2 px per original pixel, 16 px bars above and below,
        # shown at 320 px: 4 display px per original pixel
        x0, y0, x1, y1 = field_box(int(idx["top_y"][1, r]), int(idx["top_x"][1, r]))
        k = WHOLE_SHOW / 160
        assert np.allclose(got, [k * 2 * x0, k * (16 + 2 * y0), k * 2 * x1, k * (16 + 2 * y1)], atol=1.01), got
        assert page.js("getComputedStyle(document.querySelector('.whole-pic')).backgroundImage").count("whole-000.jpg")
        page.key("Escape")
        assert page.js("document.querySelector('.whole-view') === null")
        assert not page.js("document.getElementById('unit').hidden")  # Esc closed the picture, not the unit
    _clean(page)
    page.close()


def test_cards_show_more_exemplars_at_a_legible_size_without_growing(ctx, browser):
    cards = _units_data(ctx.atlas, "0")
    assert cards["ring"][0] is not None and cards["context"] > 0
    page = _open(browser, (ctx.atlas / "layer-0.html").as_uri(), width=300)  # one card of the least width
    seen = page.js("""(() => { const c = document.querySelector('.card'), q = c.querySelector('.quad').getBoundingClientRect();
      const crops = [...c.querySelectorAll('.quad .crop')].map(e => e.getBoundingClientRect())
        .filter(b => b.right <= q.right + 0.5 && b.bottom <= q.bottom + 0.5);
      return [c.getBoundingClientRect().height, crops.length, Math.min(...crops.map(b => b.width))]; })()""")
    height, shown, smallest = seen
    assert height == 214  # the card did not grow
    assert shown > 4 and smallest >= 40  # besides the first crop, more than the four 50 px crops of before
    assert page.js("document.querySelector('.card .hero .crop .ring') !== null")  # the first crop outlines its field
    _clean(page)
    page.close()
