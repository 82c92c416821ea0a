"""Exemplar boxes and crops land on what fired, in the ORIGINAL image's displayed orientation."""
import numpy as np
from PIL import Image

from conftest import TESTS, run_cli
from unitlens import MineConfig, load_model, mine, open_corpus, parse_layers, unit_summary
from unitlens.crops import SHEET_ROWS, sheet_cell

NETS = TESTS / "nets.py"


def _photo_with_red_square(w, h, x0, y0, side, seed):
    rng = np.random.default_rng(seed)
    a = np.full((h, w, 3), 110, np.uint8) + rng.integers(0, 20, (h, w, 3), dtype=np.uint8)
    a[y0:y0 + side, x0:x0 + side] = (230, 20, 20)
    return Image.fromarray(a)


def test_exif_rotated_red_square_lands_inside_the_box_and_the_crop(tmp_path):
    d = tmp_path / "c"
    d.mkdir()
    # As displayed: 160 x 120 with a red square at x 100-111, y 30-41. Stored rotated, with EXIF
    # orientation 6 (rotate 90 degrees clockwise to display), as phone cameras do.
    shown = _photo_with_red_square(160, 120, 100, 30, 12, 0)
    exif = Image.Exif()
    exif[0x0112] = 6
    shown.transpose(Image.Transpose.ROTATE_90).save(d / "rotated.jpg", exif=exif, quality=95)
    for i in range(3):  # distractors: squares elsewhere, but dimmer red
        img = _photo_with_red_square(140, 140, 20 + 30 * i, 70, 12, i + 1)
        a = np.asarray(img).copy()
        a[a[..., 0] == 230] = (150, 60, 60)
        Image.fromarray(a).save(d / f"plain{i}.png")
    model = load_model(f"{NETS}:red_detector", size=64)
    field = model.layer("spread").field
    assert field.size == (13, 13) and field.stride == (4, 4)  # 1 + 4 + 4*2, stride 2*2 (worked by hand)
    run = mine(model, open_corpus(d), parse_layers(model, ["spread"]), tmp_path / "run",
               MineConfig(top_k=2, workers=0, thumb=48))
    top = unit_summary(run, "spread", 0)["exemplars"][0]
    assert top["id"] == "rotated.jpg"
    x0, y0, x1, y1 = top["box"]
    assert x0 <= 100 and y0 <= 30 and x1 >= 112 and y1 >= 42, top["box"]  # the whole square is inside
    assert x1 - x0 < 40 and y1 - y0 < 40  # and the box is a receptive field, not the whole image
    sheet = np.asarray(Image.open(run.layer_dir("spread") / sheet_cell(0, 0)[0])).astype(int)
    cell = sheet[:48, :48]
    r, g, b = cell[18:30, 18:30].reshape(-1, 3).mean(0)
    assert r > 150 and g < 90 and b < 90, (r, g, b)  # the crop shows the red square, upright
    assert sheet.shape[0] == 48 * 1 and SHEET_ROWS >= 1


def test_real_photos_mine_and_crop(tmp_path):
    # scikit-image's bundled sample photos: real images no one here made
    import skimage.data as data

    d = tmp_path / "photos"
    d.mkdir()
    for name in ("astronaut", "coffee", "chelsea", "rocket", "camera"):
        img = getattr(data, name)()
        Image.fromarray(img if img.ndim == 3 else np.stack([img] * 3, -1)).save(d / f"{name}.jpg", quality=92)
    out = tmp_path / "run"
    run_cli("mine", "torchvision:resnet18", "--corpus", d, "--layers", "layer2:0-7", "--top", "3",
            "--size", "128", "--workers", "0", "--out", out)
    import json

    s = json.loads(run_cli("show", out, "layer2:5", "--json").stdout)
    for e in s["exemplars"]:
        w, h = Image.open(e["image"]).size
        x0, y0, x1, y1 = e["box"]
        assert 0 <= x0 < x1 <= w and 0 <= y0 < y1 <= h
        assert (x1 - x0) < w  # a receptive field of layer2 is smaller than these photos


def _sample_photo_corpus(folder, fmt):
    """scikit-image's bundled sample photos, a few EXIF-rotated, in one format."""
    import skimage.data as data

    folder.mkdir()
    for k, name in enumerate(("astronaut", "coffee", "chelsea", "rocket", "camera", "immunohistochemistry")):
        img = getattr(data, name)()
        img = Image.fromarray(img if img.ndim == 3 else np.stack([img] * 3, -1))
        exif = Image.Exif()
        exif[0x0112] = 6 if k % 3 == 1 else 1
        img.save(folder / f"{name}.{fmt}", exif=exif, **({"quality": 92} if fmt == "jpg" else {}))


def _mined(tmp_path, fmt):
    torch_model = load_model("torchvision:resnet18", size=64)
    _sample_photo_corpus(tmp_path / fmt, fmt)
    corpus = open_corpus(tmp_path / fmt)
    # conv1 goes negative (bottom exemplars too); 40 units each: a full sheet and a part one
    layers = parse_layers(torch_model, ["conv1:0-39", "layer1:0-39"])
    run = mine(torch_model, corpus, layers, tmp_path / f"run-{fmt}", MineConfig(top_k=3, workers=0, thumb=16))
    return torch_model, corpus, layers, run


def _reference_sheets(run, model, corpus, layer, thumb):
    """Each crop cut on its own with PIL from decode_original, the way the sheet layout documents:
    the decode of an image for a sheet is as large as its smallest box there needs to fill a cell,
    and the cell shows the index's stored view, checked here to hold the field and at least
    CONTEXT original pixels a side (the whole side of a smaller image), centred on the field
    unless an image edge is in the way."""
    from unitlens.crops import CONTEXT

    import functools

    from unitlens.corpus import decode_original, placement
    from unitlens.crops import input_box
    from unitlens.store import read_npz

    idx, size, field = read_npz(run.layer_dir(layer) / "index.npz"), model.preprocess.side, model.layer(layer).field
    U, K = idx["top_image"].shape
    kinds = [("top", 0)] + ([("bottom", K)] if (idx["low"] < 0).any() else [])
    crops = [(u, c0 + r, kind, r, int(idx[f"{kind}_image"][u, r]), input_box(field, idx[f"{kind}_y"][u, r],
                                                                           idx[f"{kind}_x"][u, r], size))
             for kind, c0 in kinds for u in range(U) for r in range(K) if idx[f"{kind}_image"][u, r] < len(corpus)]
    smallest: dict = {}  # (sheet, image) -> shortest box side there
    for u, _col, _kind, _r, i, b in crops:
        key = (u // SHEET_ROWS, i)
        smallest[key] = min(smallest.get(key, np.inf), max(1.0, min(b[2] - b[0], b[3] - b[1])))
    decode = functools.lru_cache(None)(decode_original)  # deterministic: caching only saves time
    sheets, boxes = {}, {}
    for u, col, kind, r, i, b in crops:
        s = u // SHEET_ROWS
        img, (W, H), (rx, ry) = decode(corpus.path(i), size=int(np.ceil(thumb * size / smallest[s, i])))
        box = placement(W, H, size).to_original(b)
        view = tuple(int(v) for v in idx[f"{kind}_view"][u, r])
        for lo, hi, vlo, vhi, limit in ((box[0], box[2], view[0], view[2], W), (box[1], box[3], view[1], view[3], H)):
            assert 0 <= vlo <= lo and hi <= vhi <= limit  # holds the field, inside the image
            assert vhi - vlo == max(hi - lo, min(CONTEXT, limit))  # the stated least context, no more
            assert vlo in (0, limit - (vhi - vlo)) or abs((vlo + vhi) - (lo + hi)) <= 1  # centred unless at an edge
        x0, y0, x1, y1 = (view[0] * rx, view[1] * ry, view[2] * rx, view[3] * ry)
        crop = img.crop((x0, y0, max(x1, x0 + 1), max(y1, y0 + 1)))
        f = thumb / max(crop.size)
        w, h = max(1, round(crop.width * f)), max(1, round(crop.height * f))
        cell = Image.new("RGB", (thumb, thumb), (128, 128, 128))
        cell.paste(crop.resize((w, h), Image.BILINEAR, reducing_gap=2.0), ((thumb - w) // 2, (thumb - h) // 2))
        rows = min(SHEET_ROWS, U - s * SHEET_ROWS)
        sheet = sheets.setdefault(s, Image.new("RGB", (len(kinds) * K * thumb, rows * thumb), (128, 128, 128)))
        sheet.paste(cell, (col * thumb, (u % SHEET_ROWS) * thumb))
        boxes[kind, u, r] = box
    return sheets, boxes, idx


def test_sheets_are_byte_identical_to_crops_cut_one_by_one(tmp_path):
    import io

    from unitlens.crops import cut_exemplars

    for fmt in ("jpg", "png"):  # JPEG decodes go through draft reduction; PNG ones never do
        model, corpus, layers, run = _mined(tmp_path, fmt)
        for memory in (None, 1):  # all sheets in one group; one sheet per group
            if memory:
                cut_exemplars(run, model, corpus, layers, 16, memory=memory)
            for lu in layers:
                sheets, boxes, idx = _reference_sheets(run, model, corpus, lu.layer, 16)
                files = sorted(p.name for p in run.layer_dir(lu.layer).glob("sheet-*.jpg"))
                assert files == [f"sheet-{s:03d}.jpg" for s in range(2)] == sorted(sheet_cell(32 * s, 0)[0]
                                                                                   for s in sheets)
                for s, sheet in sheets.items():
                    buf = io.BytesIO()
                    sheet.save(buf, format="JPEG", quality=88)
                    assert (run.layer_dir(lu.layer) / f"sheet-{s:03d}.jpg").read_bytes() == buf.getvalue(), \
                        (fmt, lu.layer, s)
                for (kind, u, r), box in boxes.items():
                    assert tuple(idx[f"{kind}_box"][u, r]) == box
                assert (idx["bottom_box"] >= 0).all() if lu.layer == "conv1" else "bottom_box" not in idx


def test_each_original_is_decoded_once_per_call(tmp_path, monkeypatch):
    import unitlens.corpus as ucorpus
    from unitlens.crops import cut_exemplars
    from unitlens.store import read_npz

    model, corpus, layers, run = _mined(tmp_path, "png")  # no JPEG drafts: one decode size serves all crops
    used, per_sheet = set(), set()  # exemplar images; (layer, sheet, image) triples
    for lu in layers:
        idx = read_npz(run.layer_dir(lu.layer) / "index.npz")
        for key in ("top_image", "bottom_image") if (idx["low"] < 0).any() else ("top_image",):
            for (u, _r), i in np.ndenumerate(idx[key]):
                if i < len(corpus):
                    used.add(int(i))
                    per_sheet.add((lu.layer, u // SHEET_ROWS, int(i)))
    assert len(per_sheet) > len(used)  # decoding per sheet would cost more: the count below can fail
    real, calls = ucorpus.decode_original, []

    def counting(path, *a, **kw):
        calls.append(path)
        return real(path, *a, **kw)

    monkeypatch.setattr(ucorpus, "decode_original", counting)
    cut_exemplars(run, model, corpus, layers, 16)
    assert sorted(calls) == sorted(corpus.path(i) for i in used)
    calls.clear()
    cut_exemplars(run, model, corpus, layers, 16, memory=1)  # one sheet per group: once per group
    assert len(calls) == len(per_sheet)
