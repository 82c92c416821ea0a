"""Inputs practitioners bring: non-square network inputs and grey (1-channel) models, end to end."""
import json

import numpy as np
import pytest
import torch
from PIL import Image

from conftest import TESTS, run_cli

NETS = TESTS / "nets.py"


def test_crop_boxes_of_a_non_square_input_land_on_a_planted_feature(tmp_path):
    # A red square at a known place in originals of assorted shapes. The red detector's 'relu' layer
    # has a 1-pixel receptive field, so each image's top position is inside the square, and its box
    # mapped back to the original must be too (to a pixel). The region the 48x80 input shows is
    # computed here independently: one scale s covering the input, centred.
    H, W = 48, 80
    rng = np.random.default_rng(3)
    corpus, squares = tmp_path / "corpus", {}
    corpus.mkdir()
    for n, (w0, h0) in enumerate([(240, 150), (150, 240), (320, 200), (200, 200), (401, 97), (130, 333)]):
        s = max(H / h0, W / w0)
        cw, ch = W / s, H / s  # the shown region, in original pixels
        x_lo, y_lo = (w0 - cw) / 2, (h0 - ch) / 2
        side = 12
        x0 = int(rng.integers(int(np.ceil(x_lo)) + 4, int(x_lo + cw) - side - 4))
        y0 = int(rng.integers(int(np.ceil(y_lo)) + 4, int(y_lo + ch) - side - 4))
        a = np.full((h0, w0, 3), 128, dtype=np.uint8) + rng.integers(0, 8, (h0, w0, 3), dtype=np.uint8)
        a[y0:y0 + side, x0:x0 + side] = (230, 20, 20)
        Image.fromarray(a).save(corpus / f"img{n}.png")
        squares[f"img{n}.png"] = (x0, y0, x0 + side, y0 + side)
    out = tmp_path / "run"
    run_cli("mine", f"{NETS}:red_detector", "--size", f"{H}x{W}", "--corpus", corpus, "--layers", "relu",
            "--top", len(squares), "--workers", 0, "--out", out)
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["model"]["preprocess"]["size"] == [H, W]
    s = json.loads(run_cli("show", out, "relu:0", "--json").stdout)
    assert len(s["exemplars"]) == len(squares)
    for e in s["exemplars"]:
        sx0, sy0, sx1, sy1 = squares[e["id"]]
        x0, y0, x1, y1 = e["box"]
        assert sx0 - 1 <= x0 < x1 <= sx1 + 1 and sy0 - 1 <= y0 < y1 <= sy1 + 1, (e["id"], e["box"], squares[e["id"]])
    sheet = Image.open(next((out / "mine" / "relu").glob("sheet-*.jpg")))
    assert sheet.size[1] >= 16  # the crops were cut
    run_cli("atlas", out)
    assert f"3 × {H} × {W} px" in (out / "atlas" / "index.html").read_text()


@pytest.fixture(scope="module")
def grey_corpus(tmp_path_factory):
    """Real grey images: scikit-learn's digits written as 24x24 8-bit grey PNGs (the network's input
    size, so decoding does not resample them), scikit-image's camera man and coins photos (grey,
    resized by decoding) and its astronaut (colour, turned grey by decoding)."""
    from skimage import data
    from sklearn.datasets import load_digits

    d = tmp_path_factory.mktemp("grey")
    digits = load_digits().images[:40]
    for i, img in enumerate(digits):
        a = Image.fromarray((img * (255 / 16)).round().astype(np.uint8)).resize((24, 24), Image.NEAREST)
        a.save(d / f"digit{i:02d}.png")
    Image.fromarray(data.camera()).save(d / "photo-camera.png")
    Image.fromarray(data.coins()).save(d / "photo-coins.png")
    Image.fromarray(data.astronaut()).save(d / "photo-astronaut.png")
    return d


def test_a_grey_model_mines_synthesises_and_draws_its_atlas(tmp_path, grey_corpus):
    out = tmp_path / "run"
    run_cli("mine", f"{NETS}:grey_net", "--size", 24, "--mean", "0.5", "--std", "0.25", "--corpus", grey_corpus,
            "--layers", "3:0-1", "--top", 50, "--workers", 0, "--out", out)  # every image is an exemplar
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["model"]["preprocess"]["mean"] == [0.5] and manifest["model"]["preprocess"]["std"] == [0.25]
    files = json.loads((out / "corpus.json").read_text())["files"]
    # Oracle: plain torch on the PNG's own pixels, for the digits that need no resampling.
    from nets import grey_net

    net = grey_net().eval()
    values = np.load(out / "mine" / "3" / "values.npy")  # units 0 and 1
    digits = [i for i, f in enumerate(files) if f.startswith("digit")]
    x = torch.stack([torch.from_numpy(np.asarray(Image.open(grey_corpus / files[i]), dtype=np.float32))
                     for i in digits])[:, None] / 255.0  # (N, 1, 24, 24)
    with torch.no_grad():
        want = net((x - 0.5) / 0.25)[:, :2].flatten(2).amax(2).numpy()
    np.testing.assert_allclose(values[digits], want, rtol=1e-5, atol=1e-6)
    # the colour image was decoded to ITU-R 601 luma like PIL's own conversion: compare its statistics
    colour = manifest["mine"]["colour"]
    assert len(colour["mean"]) == 1 and np.array(colour["cov"]).shape == (1, 1)
    pixels = []
    for f in files:
        img = Image.open(grey_corpus / f).convert("L")
        side = min(img.size)
        box = ((img.width - side) / 2, (img.height - side) / 2, (img.width + side) / 2, (img.height + side) / 2)
        pixels.append(np.asarray(img.resize((24, 24), Image.BILINEAR, box=box), dtype=np.float64).ravel() / 255)
    p = np.concatenate(pixels)
    assert colour["mean"][0] == pytest.approx(p.mean(), abs=2e-3)
    assert colour["cov"][0][0] == pytest.approx(p.var(), rel=2e-2)

    # crops show what the grey network saw: the astronaut's colours are gone from the sheet
    sheet = np.asarray(Image.open(out / "mine" / "3" / "sheet-000.jpg"), dtype=np.int16)  # (H, W, 3)
    assert np.abs(sheet[..., 0] - sheet[..., 1]).max() <= 3 and np.abs(sheet[..., 2] - sheet[..., 1]).max() <= 3
    assert "photo-astronaut.png" in [e["id"] for e in json.loads(run_cli("show", out, "3:0", "--json").stdout)["exemplars"]]

    run_cli("synth", out, "--layers", "3:0-1", "--steps", 12, "--synth-size", 24, "--batch-size", 2)
    units = json.loads((out / "synth" / "3" / "units.json").read_text())["units"]
    assert sorted(units) == ["0", "1"]
    for u, rec in units.items():
        for im in rec["images"]:
            img = Image.open(out / "synth" / "3" / im["file"])
            assert img.mode == "L" and img.size == (24, 24)  # one channel, saved as a grey PNG
            x = torch.from_numpy(np.asarray(img, dtype=np.float32))[None, None] / 255.0
            with torch.no_grad():  # the channel objective is the spatial mean, recomputed in plain torch
                assert im["activation"] == pytest.approx(float(net((x - 0.5) / 0.25)[0, int(u)].mean()), rel=1e-4,
                                                         abs=1e-5)
    # the grey image basis: the 1x1 Cholesky factor of the corpus variance, a scalar
    settings = json.loads((out / "manifest.json").read_text())["synth"]["settings"]
    basis = settings["colour"]
    assert basis["factor"] == [[pytest.approx(np.sqrt(colour["cov"][0][0]))]]
    index = run_cli("atlas", out).stdout.strip()
    html = (out / "atlas" / "index.html").read_text()
    assert index.endswith("index.html") and "1 × 24 × 24 px" in html and "mean (0.5), std (0.25)" in html
    pages = list((out / "atlas").rglob("*.html"))
    assert len(pages) > 1
