"""Tests for unitlens/corpus.py. Every fixture is generated here, in tmp_path."""
from __future__ import annotations

import io
import json
import os
import struct
import zlib
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest
import torch
from PIL import Image

from unitlens.corpus import (Corpus, CorpusDataset, ImageProblem, Placement, batches, decode, fit,
                             open_corpus, placement)
from unitlens.errors import UnitlensError


def _save(path: Path, pixels, **kw) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    img = pixels if isinstance(pixels, Image.Image) else Image.fromarray(np.asarray(pixels))
    img.save(path, **kw)
    return path


def _noise(h: int, w: int, seed: int = 0) -> np.ndarray:
    return np.random.default_rng(seed).integers(0, 256, (h, w, 3), dtype=np.uint8)


def _png(width: int, height: int, bit_depth: int, colour_type: int, rows: bytes) -> bytes:
    """A PNG written by hand (PNG spec, ISO/IEC 15948): formats PIL cannot write, and huge
    headers over a few bytes of data."""
    def chunk(kind: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))
    header = struct.pack(">IIBBBBB", width, height, bit_depth, colour_type, 0, 0, 0)
    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", header) + chunk(b"IDAT", zlib.compress(rows))
            + chunk(b"IEND", b""))


def _reason(path: Path, **kw) -> str:
    with pytest.raises(ImageProblem) as caught:
        decode(path, **kw)
    return caught.value.reason


# ----------------------------------------------------------------------------- discovery

def test_folder_discovery_order_hidden_and_ignored(tmp_path):
    for rel in ["b/z.png", "a/deep/x.JPG", "a/y.jpeg", "top.webp", ".hidden.png", ".cache/c.png",
                "b/.DS_Store"]:
        _save(tmp_path / rel, _noise(4, 4), format="PNG")
    (tmp_path / "notes.txt").write_text("not an image")
    (tmp_path / "b" / "raw.heic").write_bytes(b"\0" * 10)
    corpus = open_corpus(tmp_path)
    assert corpus.files == ("a/deep/x.JPG", "a/y.jpeg", "b/z.png", "top.webp")
    assert corpus.ignored == ("b/raw.heic", "notes.txt")
    assert corpus.root == tmp_path and len(corpus) == 4
    assert corpus.path(2) == tmp_path / "b" / "z.png"
    assert corpus.labels is None and corpus.classes == ()


def test_labels_from_folders(tmp_path):
    for rel in ["dog/1.png", "cat/2.png", "cat/sub/3.png", "loose.png"]:
        _save(tmp_path / rel, _noise(4, 4))
    corpus = open_corpus(str(tmp_path), labels="folders")
    assert corpus.files == ("cat/2.png", "cat/sub/3.png", "dog/1.png", "loose.png")
    assert corpus.labels == ("cat", "cat", "dog", None)
    assert corpus.classes == ("cat", "dog")


def test_list_file(tmp_path):
    here, elsewhere = tmp_path / "here", tmp_path / "elsewhere"
    for rel in ["b.png", "sub/a.png", "c.png"]:
        _save(here / rel, _noise(4, 4))
    outside = _save(elsewhere / "far.png", _noise(4, 4))
    listing = here / "images.txt"
    listing.write_text("# my probe set\n\nc.png\n  sub/a.png  \n./c.png\n" + f"{outside}\n"
                       "notes.md\n# b.png is left out\n")
    (here / "notes.md").write_text("x")
    corpus = open_corpus(listing, labels="folders")
    assert corpus.root == here
    assert corpus.files == ("c.png", "sub/a.png", outside.as_posix())  # listed order, duplicate dropped
    assert corpus.path(2) == outside and corpus.path(1) == here / "sub" / "a.png"
    assert corpus.labels == (None, "sub", None)
    assert corpus.ignored == ("notes.md",)


def _source(tmp_path: Path, kind: str) -> Path:
    """A corpus source of the given broken kind."""
    if kind == "only text":
        (tmp_path / "a.txt").write_text("x")
    elif kind == "one image":
        return _save(tmp_path / "one.png", _noise(4, 4))
    elif kind == "binary list":
        (tmp_path / "l.bin").write_bytes(b"\xff\xfe\x00\x81" * 8)
        return tmp_path / "l.bin"
    elif kind == "list with gap":
        _save(tmp_path / "ok.png", _noise(4, 4))
        (tmp_path / "l.txt").write_text("ok.png\ngone.png\n")
        return tmp_path / "l.txt"
    return tmp_path / "nope" if kind == "missing" else tmp_path


@pytest.mark.parametrize("kind, labels, words", [
    ("missing", None, ["nope", "does not exist", "folder of images", "text file"]),
    ("empty", None, ["No images", ".jpg", "text file"]),
    ("only text", None, ["No images", "1 file(s) of other types", "a.txt"]),
    ("one image", None, ["single image", "folder of images"]),
    ("binary list", None, ["not a folder or a text file"]),
    ("list with gap", None, ["1 entries", "line 2: gone.png", "list file's folder"]),
    ("empty", "classes", ["'classes'", "'folders'"]),
])
def test_bad_sources_say_what_was_given_and_what_works(tmp_path, kind, labels, words):
    with pytest.raises(UnitlensError) as caught:
        open_corpus(_source(tmp_path, kind), labels=labels)
    for word in words:
        assert word in str(caught.value)


def test_fingerprint_tracks_changes(tmp_path):
    for name in "abc":
        _save(tmp_path / f"{name}.png", _noise(8, 8))
    old = open_corpus(tmp_path)
    assert open_corpus(tmp_path).fingerprint == old.fingerprint
    assert old.describe_change(old.files, old.fingerprint, old.stamps) is None

    _save(tmp_path / "b.png", _noise(9, 9))  # changed
    (tmp_path / "c.png").unlink()
    _save(tmp_path / "d.png", _noise(8, 8))
    new = open_corpus(tmp_path)
    assert new.fingerprint != old.fingerprint
    assert new.describe_change(old.files, old.fingerprint, old.stamps) == "1 added, 1 removed, 1 changed"
    assert new.describe_change(old.files, old.fingerprint) == "1 added, 1 removed"

    labelled = open_corpus(tmp_path, labels="folders")  # labels are part of what was mined
    assert labelled.describe_change(new.files, new.fingerprint, new.stamps) == \
        "0 added, 0 removed, 0 changed, labels changed"
    (tmp_path / "l.txt").write_text("d.png\na.png\nb.png\n")
    reordered = open_corpus(tmp_path / "l.txt")
    assert reordered.describe_change(new.files, new.fingerprint, new.stamps) == \
        "0 added, 0 removed, 0 changed, order changed"

    again = Corpus.from_json(json.loads(json.dumps(new.to_json())))
    assert again == new
    with pytest.raises(UnitlensError, match="lacks files"):
        Corpus.from_json({"root": "/x", "classes": [], "fingerprint": "f"})


# ----------------------------------------------------------------------------- bad files

def _bad_files(folder: Path) -> dict[str, str]:
    """Write one file of each bad kind; returns {id: expected reason}."""
    folder.mkdir(parents=True, exist_ok=True)
    jpeg, png = io.BytesIO(), io.BytesIO()
    Image.fromarray(_noise(64, 96)).save(jpeg, "JPEG", quality=90)
    Image.fromarray(_noise(64, 96)).save(png, "PNG")
    jpeg, png = jpeg.getvalue(), png.getvalue()
    files = {
        "empty.jpg": (b"", "empty file"),
        "page.jpg": (b"<html><body>404 Not Found</body></html>\n", "not an image"),
        "half.jpg": (jpeg[: len(jpeg) // 2], "truncated"),
        "half.png": (png[: len(png) // 2], "truncated"),
        "header.jpg": (jpeg[:20], "truncated"),  # cut inside the header: PIL cannot even identify it
        "made-up.png": (b"UNLX\x00\x01\x07" + bytes(64), "unsupported format"),
        "phone.jpg": (b"\x00\x00\x00\x18ftypheic" + bytes(64), "unsupported format"),  # HEIC renamed
    }
    for name, (data, _) in files.items():
        (folder / name).write_bytes(data)
    # A bomb: compresses to a few kB, would need 9 MB decoded; tested against a lowered limit.
    _save(folder / "bomb.png", Image.new("1", (3000, 3000)), optimize=True)
    (folder / "folder.jpg").mkdir()  # a directory with an image name cannot be read as a file
    return {**{n: r for n, (_, r) in files.items()}, "bomb.png": "too many pixels (3000 x 3000 > 1000000)",
            "folder.jpg": "unreadable"}


def test_each_bad_file_has_its_reason(tmp_path):
    for name, reason in _bad_files(tmp_path).items():
        assert _reason(tmp_path / name, size=32, max_pixels=1_000_000) == reason, name


def test_os_errors_are_unreadable(tmp_path, monkeypatch):
    """Without root's bypass: the OS refusing the file is 'unreadable', not a format problem."""
    path = _save(tmp_path / "ok.png", _noise(8, 8))

    def refuse(*args, **kwargs):
        raise PermissionError(13, "Permission denied", str(path))
    monkeypatch.setattr(Image, "open", refuse)
    assert _reason(path) == "unreadable"
    assert _reason(tmp_path / "gone.png") == "unreadable"  # vanished after discovery


@pytest.mark.skipif(hasattr(os, "geteuid") and os.geteuid() == 0,
                    reason="root reads files regardless of mode")
def test_permission_denied_is_unreadable(tmp_path):
    locked = _save(tmp_path / "locked.png", _noise(8, 8))
    locked.chmod(0)
    try:
        assert _reason(locked) == "unreadable"
    finally:
        locked.chmod(0o644)


def test_pixel_limit_is_ours_and_pil_global_left_alone(tmp_path, monkeypatch):
    # 100000 x 100000 in a 70-byte file: PIL would raise its own DecompressionBombError on open
    huge = tmp_path / "huge.png"
    huge.write_bytes(_png(100_000, 100_000, 1, 0, b"\x00" * 16))
    before = Image.MAX_IMAGE_PIXELS
    assert _reason(huge) == "too many pixels (100000 x 100000 > 178956970)"
    assert Image.MAX_IMAGE_PIXELS == before
    monkeypatch.setattr(Image, "MAX_IMAGE_PIXELS", 50)  # someone else's setting must not decide for us
    ok = _save(tmp_path / "ok.png", _noise(20, 20))
    with ThreadPoolExecutor(4) as pool:  # decoding threads overlap; the setting must survive them all
        sizes = list(pool.map(lambda _: decode(ok).size, range(32)))
    assert sizes == [(20, 20)] * 32
    assert Image.MAX_IMAGE_PIXELS == 50


def test_batches_over_good_and_bad_files_never_raise(tmp_path):
    expected = _bad_files(tmp_path)
    good = {"g1.png": _noise(40, 60, 1), "g2.jpg": _noise(50, 30, 2), "g3.png": _noise(33, 33, 3)}
    for name, pixels in good.items():
        _save(tmp_path / name, pixels)
    (tmp_path / "all.txt").write_text("\n".join(sorted([*expected, *good])))
    corpus = open_corpus(tmp_path / "all.txt")
    got = list(batches(corpus, 24, batch_size=3, workers=2, max_pixels=1_000_000))
    failures = {corpus.files[i]: reason for b in got for i, reason in b.failures}
    decoded = [corpus.files[i] for b in got for i in b.indices.tolist()]
    assert failures == expected
    assert decoded == sorted(good)
    assert sum(len(b.placements) for b in got) == len(good)
    assert any(b.images.shape == (0, 3, 24, 24) for b in got)  # a batch of only bad files
    for b in got:
        assert b.images.dtype == torch.uint8 and b.images.shape[1:] == (3, 24, 24)


# ----------------------------------------------------------------------------- modes

def _rgb16_png(path: Path, values: list[int]) -> Path:
    row = b"".join(struct.pack(">HHH", v, v, v) for v in values)
    path.write_bytes(_png(len(values), 1, 16, 2, b"\x00" + row))
    return path


def _palette(path: Path, transparent: int | None) -> tuple[Path, np.ndarray]:
    img = Image.fromarray(_noise(6, 8)).quantize(colors=5)
    index = np.asarray(img)
    colours = np.array(img.getpalette()[:3 * 256]).reshape(-1, 3)
    expected = colours[index]
    if transparent is not None:
        expected[index == transparent] = 255
    return _save(path, img, **({} if transparent is None else {"transparency": transparent})), expected


def _mode_cases(tmp: Path):
    """(file, expected uint8 (H, W, 3) from plain numpy arithmetic, tolerance)."""
    gray16 = np.array([[0, 32768, 65535, 257]], dtype=np.uint16)
    int32 = np.array([[0, 1000, 65535]], dtype=np.int32)
    floats = np.array([[0.0, 0.5, 1.0]], dtype=np.float32)
    rgba = np.array([[[200, 100, 0, 0], [200, 100, 0, 255], [200, 100, 0, 128]]], dtype=np.uint8)
    a = rgba[..., 3:] / 255.0
    over_white = np.rint(rgba[..., :3] * a + 255 * (1 - a))
    bits = np.array([[True, False, True]])
    palette, palette_rgb = _palette(tmp / "p.png", None)
    palette_t, palette_t_rgb = _palette(tmp / "pt.png", transparent=2)
    photo = _noise(5, 7)
    gif = tmp / "anim.gif"
    blue = Image.new("RGB", (4, 4), (0, 0, 255))
    Image.new("RGB", (4, 4), (255, 0, 0)).save(gif, save_all=True, append_images=[blue])
    return [
        (_save(tmp / "g16.png", gray16), np.repeat([[0, 128, 255, 1]], 3, 0).T[None], 1),
        (_rgb16_png(tmp / "rgb16.png", [0, 32768, 65535]), np.repeat([[0, 128, 255]], 3, 0).T[None], 1),
        (_save(tmp / "i32.tif", int32), np.repeat(np.rint(int32 * 255 / 65535), 3, 0).T[None], 0),
        (_save(tmp / "f.tif", floats), np.repeat([[0, 128, 255]], 3, 0).T[None], 1),
        (_save(tmp / "cmyk.jpg", Image.new("CMYK", (8, 8), (255, 0, 0, 0)), quality=95),
         np.full((8, 8, 3), (0, 255, 255)), 12),
        (_save(tmp / "rgba.png", rgba), over_white, 1),
        (_save(tmp / "la.png", Image.fromarray(rgba[..., [0, 3]], mode="LA")),
         np.repeat(np.rint(200 * a + 255 * (1 - a)), 3, -1), 1),
        (_save(tmp / "bits.png", Image.fromarray(bits)), np.repeat(bits[..., None] * 255, 3, -1), 0),
        (palette, palette_rgb, 0),
        (palette_t, palette_t_rgb, 0),
        (gif, np.full((4, 4, 3), (255, 0, 0)), 0),  # first frame only
        (_save(tmp / "rgb.bmp", photo), photo, 0),
        (_save(tmp / "rgb.tif", photo, compression="tiff_lzw"), photo, 0),
        (_save(tmp / "rgb.webp", photo, lossless=True), photo, 0),
    ]


def test_modes_come_out_as_8bit_rgb(tmp_path):
    for path, expected, tolerance in _mode_cases(tmp_path):
        img = decode(path)
        assert img.mode == "RGB", path.name
        diff = np.abs(np.asarray(img).astype(int) - np.asarray(expected).astype(int))
        assert diff.max() <= tolerance, (path.name, np.asarray(img), expected)


# ----------------------------------------------------------------------------- geometry

_SQUARE = (24, 8, 44, 28)  # red square in the picture as a viewer sees it (x0, y0, x1, y1)

# How a camera stores the viewed picture V for each EXIF orientation (TIFF 6.0 / EXIF 2.3 tag 0x0112:
# e.g. 6 = "row 0 is the visual right side, column 0 the visual top").
_STORED = {1: lambda v: v, 2: lambda v: v[:, ::-1], 3: lambda v: v[::-1, ::-1], 4: lambda v: v[::-1],
           5: lambda v: v.transpose(1, 0, 2), 6: lambda v: np.rot90(v, 1),
           7: lambda v: np.rot90(v, 1)[:, ::-1], 8: lambda v: np.rot90(v, -1)}


def _red_box(pixels: np.ndarray) -> tuple[int, int, int, int]:
    """Bounding box of red-ish pixels in (H, W, 3)."""
    p = pixels.astype(int)
    ys, xs = np.nonzero((p[..., 0] - p[..., 1] > 60) & (p[..., 0] - p[..., 2] > 60))
    return xs.min(), ys.min(), xs.max() + 1, ys.max() + 1


@pytest.mark.parametrize("orientation", range(1, 9))
def test_exif_orientation_and_the_way_back(tmp_path, orientation):
    viewed = np.full((80, 120, 3), 128, np.uint8)
    x0, y0, x1, y1 = _SQUARE
    viewed[y0:y1, x0:x1] = (255, 0, 0)
    exif = Image.Exif()
    exif[0x0112] = orientation
    stored = np.ascontiguousarray(_STORED[orientation](viewed))
    path = _save(tmp_path / "cam.jpg", stored, exif=exif, quality=95)

    img = decode(path)
    assert img.size == (120, 80)
    found = _red_box(np.asarray(img))
    assert np.abs(np.subtract(found, _SQUARE)).max() <= 1

    pixels, place = fit(img, 40, img.size)  # input covers x 20..100 at half scale
    assert place == Placement(120, 80, 0.5, 10.0, 0.0)
    back = place.to_original(_red_box(pixels.transpose(1, 2, 0)))
    assert back[0] <= x0 + 1 and back[1] <= y0 + 1 and back[2] >= x1 - 1 and back[3] >= y1 - 1
    assert np.abs(np.subtract(back, _SQUARE)).max() <= 4


def test_to_original_clips_and_rounds_outwards():
    place = Placement(width=2000, height=1500, scale=224 / 1500, left=224 * 250 / 1500, top=0.0)
    assert place.to_original((0, 0, 224, 224)) == (250, 0, 1750, 1500)
    assert place.to_original((-50, -50, 400, 400)) == (0, 0, 2000, 1500)
    assert place.to_original((0.1, 0, 1, 1)) == (250, 0, 257, 7)  # 0.1 / scale = 0.67: floor, ceil
    assert place.to_original((300, 0, 400, 10)) == (2000, 0, 2000, 67)  # wholly outside: empty, in bounds


def _stripes(h: int, w: int) -> np.ndarray:
    """Fine stripes: a crop that is off by a fraction of a pixel shows up in the mean difference."""
    y, x = np.mgrid[0:h, 0:w]
    channels = [128 + 120 * np.sin(x / 9.0), 128 + 120 * np.cos(y / 11.0), 255 * x / w]
    return np.stack(channels, -1).astype(np.uint8)


@pytest.mark.parametrize("orientation, width, height, draft, square", [
    (1, 2000, 1500, (500, 375), (250, 0, 1750, 1500)),  # scaled by 1/4 while decoding; 1/8 < 224
    (6, 2000, 1500, (500, 375), (250, 0, 1750, 1500)),  # stored 1500 x 2000, turned by EXIF
    (1, 2047, 1535, (512, 384), (256, 0, 1791, 1535)),  # draft rounds sizes up: ratio is 1/4, not 512/2047
])
def test_draft_decode_keeps_original_geometry(tmp_path, orientation, width, height, draft, square):
    exif = Image.Exif()
    exif[0x0112] = orientation
    viewed = _stripes(height, width)
    stored = np.ascontiguousarray(_STORED[orientation](viewed))
    path = _save(tmp_path / "big.jpg", stored, exif=exif, quality=95)

    assert decode(path, size=224).size == draft
    _, pixels, place, reason = CorpusDataset(open_corpus(tmp_path), 224)[0]
    assert reason is None and (place.width, place.height) == (width, height)
    assert np.abs(np.subtract(place.to_original((0, 0, 224, 224)), square)).max() <= 2
    full_pixels, full_place = fit(decode(path), 224, (width, height))  # no draft: the oracle
    assert full_place == place == placement(width, height, 224)
    assert np.abs(pixels.numpy().astype(int) - full_pixels.astype(int)).mean() < 1.5


# ----------------------------------------------------------------------------- real photos

def _sample_photos(folder: Path) -> dict[str, np.ndarray]:
    """scikit-image's bundled photographs, cropped to 1:1 or 3:2 so that at 96 px the resized image
    has whole-pixel sides (the oracle below can then resize and crop without sub-pixel shifts)."""
    data = pytest.importorskip("skimage.data")
    photos = {"astronaut.png": data.astronaut(), "coffee.png": data.coffee(),
              "chelsea.png": data.chelsea()[:, :450], "rocket.png": data.rocket()[:420, :630]}
    for name, pixels in photos.items():
        _save(folder / name, pixels)
    return photos


def test_sample_photos_match_torch_antialiased_resize(tmp_path):
    photos = _sample_photos(tmp_path)
    size = 96
    for name, photo in photos.items():
        h, w, _ = photo.shape
        rh, rw = size * h // min(h, w), size * w // min(h, w)
        resized = torch.nn.functional.interpolate(  # independent implementation: resize, then crop
            torch.from_numpy(photo).permute(2, 0, 1)[None].double(), size=(rh, rw),
            mode="bilinear", antialias=True, align_corners=False)[0].round().clamp(0, 255)
        top, left = (rh - size) // 2, (rw - size) // 2
        reference = resized[:, top:top + size, left:left + size].numpy().astype(int)
        img = decode(tmp_path / name)
        pixels, _ = fit(img, size, img.size)
        diff = np.abs(pixels.astype(int) - reference)
        assert diff.mean() < 0.3 and diff.max() <= 2, (name, diff.mean(), diff.max())

    _save(tmp_path / "astronaut.jpg", photos["astronaut.png"], quality=95)
    jpeg = np.asarray(decode(tmp_path / "astronaut.jpg")).astype(int)
    assert np.abs(jpeg - photos["astronaut.png"]).mean() < 3


def test_batches_are_deterministic_across_workers_and_batch_sizes(tmp_path):
    _sample_photos(tmp_path)
    for k in range(5):
        _save(tmp_path / f"gen/{k}.jpg", _noise(30 + 7 * k, 50 - 3 * k, k))
    (tmp_path / "gen" / "broken.jpg").write_bytes(b"\xff\xd8\xff")
    corpus = open_corpus(tmp_path)

    def run(**kw):
        got = list(batches(corpus, 48, **kw))
        return (torch.cat([b.indices for b in got]), torch.cat([b.images for b in got]),
                [p for b in got for p in b.placements], [f for b in got for f in b.failures])

    first = run(workers=0, batch_size=3)
    assert first[0].tolist() == [i for i in range(len(corpus)) if corpus.files[i] != "gen/broken.jpg"]
    assert first[3] == [(corpus.files.index("gen/broken.jpg"), "truncated")]
    for kw in [dict(workers=2, batch_size=4), dict(workers=1, batch_size=1), dict(batch_size=64)]:
        other = run(**kw)
        assert torch.equal(first[0], other[0]) and torch.equal(first[1], other[1])
        assert first[2:] == other[2:]
    tail = run(start=5, workers=0, batch_size=2)
    assert torch.equal(tail[0], first[0][first[0] >= 5]) and torch.equal(tail[1], first[1][first[0] >= 5])


@pytest.mark.parametrize("width,height,frame", [(300, 170, (48, 80)), (170, 300, (48, 80)), (90, 211, (40, 40)),
                                                (257, 101, (64, 21))])
def test_every_input_pixel_maps_back_to_the_original_pixel_it_came_from(tmp_path, width, height, frame):
    # Each original pixel carries its own coordinates (R, B: x; G: y). With nearest resampling an
    # input pixel holds exactly one original pixel; Placement.to_original of that input pixel's box
    # must contain it and be at most one scaled pixel (plus rounding) wide.
    from unitlens.corpus import Frame

    ys, xs = np.mgrid[0:height, 0:width]
    coded = np.stack([xs % 256, ys, xs // 256], axis=-1).astype(np.uint8)  # (H, W, 3)
    path = _save(tmp_path / "coded.png", coded)
    f = Frame(*frame, resample="nearest")
    pixels, place = fit(decode(path), f, (width, height))
    assert pixels.shape == (3, *frame)
    x_of = pixels[0].astype(int) + 256 * pixels[2].astype(int)  # (H, W) original x of each input pixel
    y_of = pixels[1].astype(int)
    assert x_of.max() - x_of.min() < width and len(np.unique(x_of)) > 1
    reach = 1 / place.scale + 2
    for i in range(frame[0]):
        for j in range(frame[1]):
            x0, y0, x1, y1 = place.to_original((j, i, j + 1, i + 1))
            assert x0 <= x_of[i, j] < x1 and y0 <= y_of[i, j] < y1, (i, j)
            assert x1 - x0 <= reach and y1 - y0 <= reach
    # the frame is centred in the original and covers it along one side exactly
    whole = place.to_original((0, 0, frame[1], frame[0]))
    assert whole[0] + whole[2] == width or whole[1] + whole[3] == height
    assert (whole[0], whole[2]) == (0, width) or (whole[1], whole[3]) == (0, height)
