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
