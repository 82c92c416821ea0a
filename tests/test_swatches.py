"""The swatch corpus: determinism, layout, and that the recorded factors are the truth, checked
against an independent oracle (numpy's 2-D FFT of the rendered pixels)."""
from __future__ import annotations

import math
import subprocess
import sys

import numpy as np
import pytest
from PIL import Image

from unitlens.demo.swatches import CLASSES, Swatch, read_factors, render, sample, write_corpus
from unitlens.errors import UnitlensError


def _pixels(s: Swatch, size: int = 96) -> np.ndarray:
    return np.asarray(render(s, size))


def _spectrum(img: np.ndarray, pad: int = 4):
    """|FFT| of the grey image and each bin's wave vector (kx, ky) in cycles per image width.

    Mean removed, Hann-windowed and zero-padded `pad` times, so peaks land between integer
    bins to within 1/pad cycle (patterns need not fit the image a whole number of times)."""
    g = img.astype(float).mean(axis=2)
    g -= g.mean()
    n = g.shape[0]
    g *= np.outer(np.hanning(n), np.hanning(n))
    mag = np.abs(np.fft.fftshift(np.fft.fft2(g, s=(pad * n, pad * n))))   # (pad*n, pad*n)
    k = (np.arange(pad * n) - pad * n // 2) / pad
    ky, kx = np.meshgrid(k, k, indexing="ij")                               # ky counts down the rows
    return mag, kx, ky


def _fft_peak(img: np.ndarray) -> tuple[float, float]:
    """(line orientation in degrees, radius in cycles per width) of the strongest FFT peak."""
    mag, kx, ky = _spectrum(img)
    radius = np.hypot(kx, ky)
    # Ignore DC and the window's spread of it, where the soft lighting gradient also lives;
    # every patterned swatch repeats at least 4 times across the image.
    mag[radius < 2.5] = 0
    i = np.argmax(mag)
    # The peak's wave vector points ACROSS the lines (along their normal), so the lines run at
    # its angle minus 90 degrees. Rows grow downwards: flip ky to measure counter-clockwise as
    # displayed, matching the swatch convention.
    normal = math.degrees(math.atan2(-ky.flat[i], kx.flat[i]))
    return (normal - 90) % 180, float(radius.flat[i])


def _angle_gap(a: float, b: float) -> float:
    """Difference between two line orientations, which wrap at 180 degrees."""
    d = abs(a - b) % 180
    return min(d, 180 - d)


def _of_kind(kind: str, count: int, seed: int = 0) -> list[Swatch]:
    first = CLASSES.index(kind)
    return [sample(first + len(CLASSES) * j, seed) for j in range(count)]


def test_same_arguments_same_pixels_and_seed_changes_them():
    for i in range(len(CLASSES)):
        assert sample(i, 0) == sample(i, 0)
        assert np.array_equal(_pixels(sample(i, 0)), _pixels(sample(i, 0)))
        assert sample(i, 1) != sample(i, 0)
        assert not np.array_equal(_pixels(sample(i, 1)), _pixels(sample(i, 0)))


def test_corpus_bytes_are_reproducible(tmp_path):
    a = write_corpus(tmp_path / "a", count=12, size=32, seed=5)
    b = write_corpus(tmp_path / "b", count=12, size=32, seed=5)
    for (pa, _), (pb, _) in zip(a, b):
        assert pa.read_bytes() == pb.read_bytes()
    assert (tmp_path / "a/factors.csv").read_bytes() == (tmp_path / "b/factors.csv").read_bytes()


def test_folder_layout_and_class_balance(tmp_path):
    written = write_corpus(tmp_path, count=24, size=32)
    assert sorted(p.name for p in tmp_path.iterdir() if p.is_dir()) == sorted(CLASSES)
    for kind in CLASSES:
        assert len(list((tmp_path / kind).glob("*.png"))) == 24 // len(CLASSES)
    for index, (path, s) in enumerate(written):
        assert path == tmp_path / s.kind / f"{s.kind}-{index:05d}.png"
        assert s == sample(index) and s.kind == CLASSES[index % len(CLASSES)]
        assert np.array_equal(np.asarray(Image.open(path)), _pixels(s, 32))


def test_factors_csv_matches_returned_factors(tmp_path):
    written = write_corpus(tmp_path, count=18, size=32, seed=2)
    header = (tmp_path / "factors.csv").read_text().splitlines()[0]
    assert header.startswith("file,kind,orientation,frequency,dye_r,dye_g,dye_b,")
    back = read_factors(tmp_path)
    assert [p for p, _ in back] == [p for p, _ in written]
    assert back == written   # Swatch equality treats NaN ("none") as equal to NaN


def test_swatch_equality_and_hash_treat_nan_as_none():
    s = sample(2)                                   # a check: no orientation
    twin = Swatch(s.kind, float("nan"), s.frequency, s.dye, s.ground, s.stain, s.seed)
    assert math.isnan(s.orientation) and s == twin and hash(s) == hash(twin) and len({s, twin}) == 1
    assert s != Swatch(s.kind, 0.0, s.frequency, s.dye, s.ground, s.stain, s.seed)


# (kind, orientation is defined, frequency is defined)
FACTOR_DOMAINS = [
    ("twill", True, True), ("stripe", True, True), ("check", False, True),
    ("dots", False, True), ("herringbone", True, True), ("stained", False, False),
]


def test_factor_domains():
    for kind, has_orientation, has_frequency in FACTOR_DOMAINS:
        for s in _of_kind(kind, 30):
            assert math.isnan(s.orientation) != has_orientation, s
            assert math.isnan(s.frequency) != has_frequency, s
            assert has_orientation <= (0 <= s.orientation < 180)
            assert all(0 <= c <= 255 and isinstance(c, int) for c in s.dye + s.ground)
            if kind == "stripe":
                assert s.orientation in (0.0, 90.0)
            if kind == "stained":
                assert s.stain
    stained_patterns = [s.stain for kind in CLASSES[:-1] for s in _of_kind(kind, 30)]
    assert 0 < sum(stained_patterns) < len(stained_patterns)   # stains vary apart from kind


def test_orientation_is_the_fft_orientation():
    # Oracle: numpy.fft. Stripes and twill have one set of lines, so one peak pair.
    for kind in ("stripe", "twill"):
        for seed in (0, 1):
            for s in _of_kind(kind, 20, seed):
                theta, _ = _fft_peak(_pixels(s))
                assert _angle_gap(theta, s.orientation) < 10, (s, theta)


def test_herringbone_lines_turn_45_degrees_off_the_spine():
    for s in _of_kind("herringbone", 20):
        theta, _ = _fft_peak(_pixels(s))
        assert abs(_angle_gap(theta, s.orientation) - 45) < 10, (s, theta)


def test_frequency_is_the_fft_peak_radius():
    # Check and dots repeat along both axes at `frequency`; their strongest peak sits on an axis.
    for kind in ("stripe", "twill", "check", "dots", "herringbone"):
        for s in _of_kind(kind, 20):
            _, radius = _fft_peak(_pixels(s))
            assert abs(radius - s.frequency) < 0.15 * s.frequency, (s, radius)


def _features(img: np.ndarray) -> np.ndarray:
    """Share of spectral energy per (orientation, radius) cell: 8 x 5, orientations folded."""
    mag, kx, ky = _spectrum(img, pad=1)
    radius, angle = np.hypot(kx, ky), np.degrees(np.arctan2(-ky, kx)) % 180
    keep = radius >= 2.5
    hist, _, _ = np.histogram2d(angle[keep], radius[keep], bins=[np.linspace(0, 180, 9), [2.5, 6, 10, 17, 28, 70]],
                                weights=mag[keep] ** 2)
    hist = hist.ravel()
    return np.sqrt(hist / hist.sum())


def test_kinds_are_separable_by_nearest_neighbour_on_fft_features():
    # Sanity that the kinds differ in what a small CNN can see: fit on seed 0, test on seed 1.
    # Nearest neighbour rather than nearest centroid: stripes come vertical or horizontal, and
    # the mean of the two looks like a check.
    def data(seed, n):
        return np.stack([_features(_pixels(sample(i, seed))) for i in range(n)]), np.arange(n) % len(CLASSES)

    x_train, y_train = data(0, 180)
    x_test, y_test = data(1, 120)
    nearest = np.argmin(((x_test[:, None] - x_train[None]) ** 2).sum(axis=2), axis=1)   # (120,)
    accuracy = (y_train[nearest] == y_test).mean()
    assert accuracy > 0.9, accuracy   # chance is 1/6


BAD_INPUTS = [
    (lambda: sample(-1), "index"),
    (lambda: render(Swatch("twil", 45.0, 10.0, (0, 0, 0), (255, 255, 255), False, 0)), "twill"),
    (lambda: render(sample(0), size=8), "16"),
    (lambda: write_corpus("unused", count=0), "count"),
]


def test_bad_inputs_say_what_is_valid():
    for call, hint in BAD_INPUTS:
        with pytest.raises(UnitlensError, match=hint):
            call()


def test_command_line_writes_a_corpus(tmp_path):
    out = tmp_path / "mill"
    done = subprocess.run([sys.executable, "-m", "unitlens.demo.swatches", str(out), "--count", "12",
                           "--size", "32", "--seed", "3"], capture_output=True, text=True, check=True)
    assert done.stdout.strip() == f"wrote 12 swatches (6 kinds) to {out}"
    assert len(read_factors(out)) == 12 and (out / "dots" / "dots-00003.png").exists()
