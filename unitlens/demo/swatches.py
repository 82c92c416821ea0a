"""Cloth swatches from an imaginary textile mill: a procedural image corpus whose generating
factors (kind, orientation, frequency, colours, stain) are known for every image, so a unit that
"responds to diagonal lines" or "to stains" can be checked against the truth.

>>> s = sample(7)                      # the factors of image 7: a stripe swatch
>>> render(s, size=96).size
(96, 96)
>>> write_corpus(Path("swatches"), count=600)   # doctest: +SKIP

Conventions. Orientation is the direction of the lines in degrees, counter-clockwise from the
image's horizontal axis as displayed (y up), in [0, 180): 0 = horizontal stripes, 90 = vertical,
45 = lines rising to the right like denim. Frequency is in cycles per image width, measured
across the lines, so a swatch looks the same at any `size`. NaN means "the kind has none".
"""
from __future__ import annotations

import argparse
import colorsys
import csv
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image

from ..errors import UnitlensError, closest

CLASSES = ("twill", "stripe", "check", "dots", "herringbone", "stained")
INCIDENTAL_STAIN = 0.2   # chance that a patterned swatch carries a stain too: stains vary apart from kind
WEAVE_PERIOD_PX = 4      # the fine over-under texture is pixel-scale; scaled with `size` it would alias
_FACTOR_COLUMNS = ("file", "kind", "orientation", "frequency", "dye_r", "dye_g", "dye_b",
                   "ground_r", "ground_g", "ground_b", "stain", "seed")


@dataclass(frozen=True, eq=False)
class Swatch:
    """The generating factors of one swatch. `seed` fixes the nuisance details (phases, jitter,
    stain shapes, lighting, noise), so `render(s)` is a pure function of `s`."""
    kind: str
    orientation: float               # degrees in [0, 180) of the dominant lines; NaN where none
    frequency: float                 # cycles per image width of the main pattern; NaN where none
    dye: tuple[int, int, int]        # the main colour (RGB); stains are darkened dye, the only dye on "stained"
    ground: tuple[int, int, int]     # the undyed cloth underneath
    stain: bool
    seed: int

    # NaN != NaN (and its hash is per object), which would make identical swatches unequal:
    # compare "none" as equal to "none".
    def _key(self) -> tuple:
        return tuple(None if isinstance(x, float) and math.isnan(x) else x
                     for x in (getattr(self, name) for name in self.__dataclass_fields__))

    def __eq__(self, other) -> bool:
        return isinstance(other, Swatch) and self._key() == other._key()

    def __hash__(self) -> int:
        return hash(self._key())


# ----------------------------------------------------------------------------- factors

def _rgb(h: float, s: float, v: float) -> tuple[int, int, int]:
    return tuple(int(round(255 * c)) for c in colorsys.hsv_to_rgb(h, s, v))


def sample(index: int, seed: int = 0) -> Swatch:
    """The factors of image `index` of the corpus drawn with `seed`; kinds cycle through CLASSES.

    >>> sample(0).kind, sample(1).kind, sample(6).kind
    ('twill', 'stripe', 'twill')
    """
    if index < 0 or seed < 0:
        raise UnitlensError(f"Swatch index and seed must be >= 0 (got index={index}, seed={seed}).")
    rng = np.random.default_rng((seed, index))
    kind = CLASSES[index % len(CLASSES)]
    # A dark saturated dye on a pale linen ground: the pattern always shows in grey, too.
    dye = _rgb(rng.uniform(), rng.uniform(0.45, 0.9), rng.uniform(0.3, 0.62))
    ground = _rgb(rng.uniform(0.06, 0.16), rng.uniform(0.02, 0.18), rng.uniform(0.82, 0.95))
    orientation, frequency = {
        "twill": lambda: (rng.choice([rng.uniform(30, 60), rng.uniform(120, 150)]), rng.uniform(9, 16)),
        "stripe": lambda: (rng.choice([0.0, 90.0]), rng.uniform(4, 11)),
        "check": lambda: (math.nan, rng.uniform(4, 9)),
        "dots": lambda: (math.nan, rng.uniform(5, 9)),
        "herringbone": lambda: (rng.choice([0.0, 90.0]), rng.uniform(9, 14)),  # the spine
        "stained": lambda: (math.nan, math.nan),
    }[kind]()
    stain = kind == "stained" or bool(rng.uniform() < INCIDENTAL_STAIN)
    # Rounded so the factors survive a round trip through factors.csv exactly.
    return Swatch(kind, round(float(orientation), 2), round(float(frequency), 2), dye, ground,
                  stain, int(rng.integers(2**31)))


# ----------------------------------------------------------------------------- patterns
# Each pattern maps plane coordinates (u, v), in image widths with the origin at the centre and
# v up, to a dye mask in [0, 1] of shape (H, W).

def _lines(t: np.ndarray, duty: float, px_per_cycle: float) -> np.ndarray:
    """Anti-aliased bands: 1 within duty/2 cycles of an integer value of `t` (in cycles)."""
    dist = np.abs((t + 0.5) % 1.0 - 0.5)                                # cycles to nearest line
    return np.clip((duty / 2 - dist) * px_per_cycle + 0.5, 0.0, 1.0)   # one-pixel soft edge


def _across(u, v, degrees: float) -> np.ndarray:
    """Position across lines running at `degrees` (along their normal)."""
    a = math.radians(degrees)
    return -math.sin(a) * u + math.cos(a) * v


def _pattern(s: Swatch, u, v, rng, size: int) -> np.ndarray:
    f = s.frequency
    px = 0.0 if math.isnan(f) else size / f                  # pixels per cycle, for soft edges
    if s.kind in ("twill", "stripe"):
        duty = rng.uniform(0.3, 0.5) if s.kind == "twill" else rng.uniform(0.35, 0.6)
        return _lines(f * _across(u, v, s.orientation) + rng.uniform(), duty, px)
    if s.kind == "check":  # gingham: where the two stripe sets cross, the dye doubles
        return (_lines(f * u + rng.uniform(), 0.5, px) + _lines(f * v + rng.uniform(), 0.5, px)) / 2
    if s.kind == "dots":
        gu, gv = f * u + rng.uniform(), f * v + rng.uniform()             # grid cells, (H, W)
        i, j = np.floor(gu).astype(int), np.floor(gv).astype(int)
        radius = rng.uniform(0.22, 0.32)                                  # in cells
        room = rng.uniform(0.03, 0.1)                                     # jitter keeps dots whole
        jitter = rng.uniform(-room, room, (i.max() - i.min() + 1, j.max() - j.min() + 1, 2))
        jit = jitter[i - i.min(), j - j.min()]                            # (H, W, 2)
        d = np.hypot(gu - i - 0.5 - jit[..., 0], gv - j - 0.5 - jit[..., 1])
        return np.clip((radius - d) * px + 0.5, 0.0, 1.0)
    if s.kind == "herringbone":
        # Bands along the spine; the twill lines inside turn +-45 degrees off it, band by band.
        along, side = _across(u, v, s.orientation - 90), _across(u, v, s.orientation)
        band = np.floor(side * rng.integers(3, 6) + rng.uniform())
        turn = np.where(band % 2 == 0, 1.0, -1.0)
        t = f * (along * math.cos(math.pi / 4) + turn * side * math.sin(math.pi / 4))
        return _lines(t + rng.uniform(), 0.5, px)
    return np.zeros_like(u)                                               # stained: plain weave


def _stains(u, v, rng, count: int) -> np.ndarray:
    """Irregular blots: a wobbly-edged disc each, darkest at the rim like a dried drop. (H, W)."""
    alpha = np.zeros_like(u)
    size = u.shape[0]
    for _ in range(count):
        cu, cv = rng.uniform(-0.35, 0.35, 2)
        radius, wobble = rng.uniform(0.05, 0.16), rng.uniform(0, 0.3 / np.arange(2, 6))
        turns = rng.uniform(0, 2 * math.pi, 4)
        # Work in the blot's bounding box only: the wobble at most reaches 1.39 radii out.
        reach = radius * (1 + wobble.sum()) + 0.02
        rows = slice(max(0, int((0.5 - cv - reach) * size)), int((0.5 - cv + reach) * size) + 1)
        cols = slice(max(0, int((0.5 + cu - reach) * size)), int((0.5 + cu + reach) * size) + 1)
        du, dv = u[rows, cols] - cu, v[rows, cols] - cv
        r, phi = np.hypot(du, dv), np.arctan2(dv, du)
        edge = radius * (1 + sum(w * np.cos(k * phi + p) for k, w, p in zip(range(2, 6), wobble, turns)))
        inside = np.clip((edge - r) / 0.015, 0.0, 1.0)
        rim = np.exp(-(((edge - r) / 0.02) ** 2))
        box = alpha[rows, cols]
        np.maximum(box, rng.uniform(0.5, 0.75) * inside + 0.2 * rim * inside, out=box)
    return alpha


# ----------------------------------------------------------------------------- rendering

def render(s: Swatch, size: int = 96) -> Image.Image:
    """The swatch as an RGB image of `size` x `size` pixels; the same `s` gives the same pixels."""
    return _draw(s, size)[0]


# A label map per swatch (pixel value -> concept), for `unitlens label`: what the generator knows.
LEGEND = ((1, "stain"), (2, "dots"), (3, "horizontal stripes"), (4, "vertical stripes"))


def legend_text() -> str:
    """The legend CSV of the label maps."""
    return "value,name\n" + "".join(f"{v},{n}\n" for v, n in LEGEND)


def label_map(s: Swatch, size: int = 96) -> Image.Image:
    """The swatch's concepts per pixel (values of LEGEND, 0: none of them): stains where a blot
    covers at least a quarter, then dots and stripes (by orientation) where the dye covers half."""
    return _labels(s, *_draw(s, size)[1:])


def _labels(s: Swatch, mask: np.ndarray, alpha: np.ndarray | None) -> Image.Image:
    lab = np.zeros(mask.shape[:2], np.uint8)
    dyed = mask[..., 0] >= 0.5
    if s.kind == "dots":
        lab[dyed] = 2
    elif s.kind == "stripe":
        lab[dyed] = 3 if s.orientation == 0 else 4
    if alpha is not None:
        lab[alpha[..., 0] >= 0.25] = 1
    return Image.fromarray(lab, "L")


def _draw(s: Swatch, size: int) -> tuple[Image.Image, np.ndarray, np.ndarray | None]:
    """(image, dye mask (H, W, 1), stain alpha (H, W, 1) or None)."""
    if s.kind not in CLASSES:
        hint = ", ".join(closest(s.kind, CLASSES)) or ", ".join(CLASSES)
        raise UnitlensError(f"Unknown swatch kind {s.kind!r}. Closest: {hint}. Valid: {', '.join(CLASSES)}.")
    if size < 16:
        raise UnitlensError(f"Swatch size must be at least 16 pixels (got {size}).")
    rng = np.random.default_rng(s.seed)
    x = (np.arange(size) + 0.5) / size - 0.5
    u, v = np.meshgrid(x, -x)                                 # (H, W); rows run downwards, v up
    mask = _pattern(s, u, v, rng, size)[..., None]            # (H, W, 1)
    dye, ground = np.array(s.dye, float), np.array(s.ground, float)
    rgb = ground * (1 - mask) + dye * mask                    # (H, W, 3)
    alpha = None
    if s.stain:
        alpha = _stains(u, v, rng, rng.integers(2, 5) if s.kind == "stained" else 1)[..., None]
        rgb = rgb * (1 - alpha) + 0.45 * dye * alpha          # stains are darkened dye
    # Realism: over-under weave with uneven threads, a soft light falling across, colour noise.
    k = np.arange(size) * (2 * math.pi / WEAVE_PERIOD_PX)
    weave = 1 + 0.05 * np.outer(np.cos(k), np.cos(k))
    weave *= (1 + 0.03 * rng.standard_normal(size))[:, None] * (1 + 0.03 * rng.standard_normal(size))
    a = rng.uniform(0, 2 * math.pi)
    light = 1 + rng.uniform(0.04, 0.1) * 2 * (math.cos(a) * u + math.sin(a) * v)
    rgb = rgb * (weave * light)[..., None] + 3.0 * rng.standard_normal(rgb.shape, dtype=np.float32)
    return Image.fromarray(np.clip(np.round(rgb), 0, 255).astype(np.uint8), "RGB"), mask, alpha


# ----------------------------------------------------------------------------- corpus

def write_corpus(out: Path, count: int = 600, size: int = 96, seed: int = 0,
                 label_maps: Path | None = None) -> list[tuple[Path, Swatch]]:
    """Write `count` swatches as out/<kind>/<kind>-<index:05d>.png plus out/factors.csv; with
    `label_maps`, also each swatch's label map under the same name there, and its legend.csv.

    Class folders make the kinds usable as labels (`open_corpus(out, labels="folders")`); the
    same arguments give the same bytes.
    """
    if count < 1:
        raise UnitlensError(f"Corpus count must be at least 1 (got {count}).")
    out = Path(out)
    written = []
    for index in range(count):
        s = sample(index, seed)
        path = out / s.kind / f"{s.kind}-{index:05d}.png"
        path.parent.mkdir(parents=True, exist_ok=True)
        img, mask, alpha = _draw(s, size)
        img.save(path, format="PNG")
        if label_maps is not None:
            lpath = Path(label_maps) / path.relative_to(out)
            lpath.parent.mkdir(parents=True, exist_ok=True)
            _labels(s, mask, alpha).save(lpath, format="PNG")
        written.append((path, s))
    if label_maps is not None:
        (Path(label_maps) / "legend.csv").write_text(legend_text())
    with open(out / "factors.csv", "w", newline="") as fh:
        rows = csv.writer(fh)
        rows.writerow(_FACTOR_COLUMNS)
        for path, s in written:
            rows.writerow([path.relative_to(out).as_posix(), s.kind, s.orientation, s.frequency,
                           *s.dye, *s.ground, int(s.stain), s.seed])
    return written


def read_factors(out: Path) -> list[tuple[Path, Swatch]]:
    """The (path, factors) list of a corpus written by `write_corpus`, read back from factors.csv."""
    with open(Path(out) / "factors.csv", newline="") as fh:
        return [(Path(out) / r["file"],
                 Swatch(r["kind"], float(r["orientation"]), float(r["frequency"]),
                        (int(r["dye_r"]), int(r["dye_g"]), int(r["dye_b"])),
                        (int(r["ground_r"]), int(r["ground_g"]), int(r["ground_b"])),
                        r["stain"] == "1", int(r["seed"])))
                for r in csv.DictReader(fh)]


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(prog="python -m unitlens.demo.swatches",
                                     description="Write a demo corpus of cloth swatches with known factors.")
    parser.add_argument("out", type=Path, help="folder to write (one subfolder per kind, plus factors.csv)")
    parser.add_argument("--count", type=int, default=600, help="number of images (default 600)")
    parser.add_argument("--size", type=int, default=96, help="image side in pixels (default 96)")
    parser.add_argument("--seed", type=int, default=0, help="corpus seed (default 0)")
    args = parser.parse_args(argv)
    try:
        written = write_corpus(args.out, args.count, args.size, args.seed)
    except UnitlensError as e:
        raise SystemExit(f"Error: {e}") from None
    print(f"wrote {len(written)} swatches ({len(CLASSES)} kinds) to {args.out}")


if __name__ == "__main__":
    main()
