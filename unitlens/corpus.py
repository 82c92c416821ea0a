"""The user's images: find them, give them stable ids, decode them into network inputs, and
remember how each input was cut from its original file so crops can go back to it.

>>> corpus = open_corpus("photos/", labels="folders")          # doctest: +SKIP
>>> for batch in batches(corpus, size=224):                      # doctest: +SKIP
...     batch.images.shape, batch.failures                       # (B, C, H, W) uint8, [(i, reason)]
"""
from __future__ import annotations

import hashlib
import json
import math
import os
import threading
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from functools import partial
from pathlib import Path, PurePosixPath
from typing import TYPE_CHECKING, NamedTuple

import numpy as np
from PIL import Image, ImageOps, UnidentifiedImageError

from .errors import UnitlensError

if TYPE_CHECKING:
    import torch

IMAGE_EXTENSIONS = (".jpg", ".jpeg", ".png", ".webp", ".bmp", ".tif", ".tiff", ".gif")
LABEL_CHOICES = (None, "folders")
DEFAULT_MAX_PIXELS = 178_956_970  # the size at which PIL itself refuses a file (about 13400 x 13400)
_ACCEPTED = (f"Give a folder of images ({', '.join(IMAGE_EXTENSIONS)}; searched recursively, hidden "
             "files skipped) or a text file listing image paths, one per line.")
_ORIENTATION = 0x0112  # EXIF tag


# ----------------------------------------------------------------------------- discovery

@dataclass(frozen=True)
class Corpus:
    """An ordered, fingerprinted list of image files. Ids are posix paths relative to `root`."""
    root: Path
    files: tuple[str, ...] = field(repr=False)
    labels: tuple[str | None, ...] | None = field(repr=False)
    classes: tuple[str, ...]
    fingerprint: str
    ignored: tuple[str, ...] = field(repr=False)
    stamps: tuple[tuple[int, int], ...] = field(default=(), repr=False)  # (size, mtime_ns) per file

    def path(self, i: int) -> Path:
        return self.root / self.files[i]  # an absolute id replaces the root

    def __len__(self) -> int:
        return len(self.files)

    def describe_change(self, old_files: Sequence[str], old_fingerprint: str,
                        old_stamps: Sequence[Sequence[int]] | None = None) -> str | None:
        """None when unchanged; else e.g. '3 added, 0 removed, 1 changed' ('changed': size or
        modification time differs; counted only when the old `stamps` are given)."""
        if old_fingerprint == self.fingerprint:
            return None
        old_at = {f: i for i, f in enumerate(old_files)}
        now = set(self.files)
        added = sum(f not in old_at for f in self.files)
        removed = sum(f not in now for f in old_files)
        parts = [f"{added} added", f"{removed} removed"]
        known = old_stamps is not None and len(old_stamps) == len(old_files) and bool(self.stamps)
        changed = known and sum(tuple(old_stamps[old_at[f]]) != s
                                for f, s in zip(self.files, self.stamps) if f in old_at)
        if known:
            parts.append(f"{changed} changed")
        if [f for f in self.files if f in old_at] != [f for f in old_files if f in now]:
            parts.append("order changed")
        elif not (added or removed or changed):
            # the fingerprint covers ids, sizes, times and labels; whatever is left must be it
            parts.append("labels changed" if known else "sizes, dates or labels changed")
        return ", ".join(parts)

    def to_json(self) -> dict:
        return {"root": str(self.root), "files": list(self.files),
                "labels": None if self.labels is None else list(self.labels),
                "classes": list(self.classes), "fingerprint": self.fingerprint,
                "ignored": list(self.ignored), "stamps": [list(s) for s in self.stamps]}

    @classmethod
    def from_json(cls, d: dict) -> Corpus:
        missing = [k for k in ("root", "files", "classes", "fingerprint") if k not in d]
        if missing:
            raise UnitlensError(f"The saved corpus record lacks {', '.join(missing)}; "
                                "the run folder may be damaged. Start a new run folder.")
        labels = d.get("labels")
        return cls(Path(d["root"]), tuple(d["files"]), None if labels is None else tuple(labels),
                   tuple(d["classes"]), d["fingerprint"], tuple(d.get("ignored", ())),
                   tuple(tuple(s) for s in d.get("stamps", ())))


def open_corpus(source: str | Path, labels: str | None = None) -> Corpus:
    """Find the images of a folder (recursively, sorted by id) or of a list file (in listed order).

    `labels="folders"` labels each image by the first folder below the root. Links to folders
    are not followed (links to files are), so a corpus cannot loop.
    """
    if labels not in LABEL_CHOICES:
        raise UnitlensError(f"Unknown labels option {labels!r}. Valid: 'folders' (each image is "
                            "labelled by its first folder below the corpus root), or unset for none.")
    src = Path(source).expanduser()
    if src.is_dir():
        root = Path(os.path.abspath(src))
        found = _walk(root)
    elif src.is_file():
        if src.suffix.lower() in IMAGE_EXTENSIONS:
            raise UnitlensError(f"'{source}' is a single image, not a corpus. {_ACCEPTED}")
        root = Path(os.path.abspath(src)).parent
        found = _read_list(src, root)
    else:
        raise UnitlensError(f"Corpus '{source}' does not exist. {_ACCEPTED}")
    files = tuple(f for f in found if PurePosixPath(f).suffix.lower() in IMAGE_EXTENSIONS)
    ignored = tuple(f for f in found if PurePosixPath(f).suffix.lower() not in IMAGE_EXTENSIONS)
    if not files:
        seen = (f" It holds {len(ignored)} file(s) of other types, e.g. {', '.join(ignored[:3])}."
                if ignored else "")
        raise UnitlensError(f"No images in '{source}'.{seen} {_ACCEPTED}")
    per_file = tuple(_folder_label(f) for f in files) if labels == "folders" else None
    stamps = tuple(file_stamp(root / f) for f in files)
    lines = [f"unitlens corpus v1, labels={labels}"]
    lines += [json.dumps([f, *s, None if per_file is None else per_file[i]])
              for i, (f, s) in enumerate(zip(files, stamps))]
    return Corpus(root, files, per_file,
                  tuple(sorted({c for c in per_file or () if c is not None})),
                  hashlib.sha256("\n".join(lines).encode()).hexdigest(), ignored, stamps)


def _walk(root: Path) -> list[str]:
    def fail(err: OSError):
        raise UnitlensError(f"Cannot read folder '{err.filename}' ({err.strerror}). "
                            "Fix its permissions or move it out of the corpus.")
    found = []
    for folder, dirs, names in os.walk(root, onerror=fail):
        dirs[:] = [d for d in dirs if not d.startswith(".")]
        found += [Path(folder, n).relative_to(root).as_posix() for n in names if not n.startswith(".")]
    return sorted(found)


def _read_list(list_file: Path, root: Path) -> list[str]:
    try:
        text = list_file.read_text(encoding="utf-8-sig")
    except (UnicodeDecodeError, ValueError):
        raise UnitlensError(f"'{list_file}' is not a folder or a text file. {_ACCEPTED}") from None
    except OSError as e:
        raise UnitlensError(f"Cannot read '{list_file}' ({e.strerror}).") from None
    ids: dict[str, None] = {}  # insertion-ordered set: duplicates keep their first place
    missing = []
    for n, line in enumerate(text.splitlines(), 1):
        entry = line.strip()
        if not entry or entry.startswith("#"):
            continue
        path = Path(os.path.normpath(root / Path(entry).expanduser()))
        if not path.exists():
            missing.append(f"line {n}: {entry}")
            continue
        try:
            ids.setdefault(path.relative_to(root).as_posix())
        except ValueError:
            ids.setdefault(path.as_posix())
    if missing:
        more = ", ..." if len(missing) > 3 else ""
        raise UnitlensError(f"{len(missing)} entries of '{list_file}' do not exist ({'; '.join(missing[:3])}"
                            f"{more}). Relative paths are read from the list file's folder, {root}.")
    return list(ids)


def _folder_label(fid: str) -> str | None:
    parts = PurePosixPath(fid).parts
    return parts[0] if len(parts) > 1 and not PurePosixPath(fid).is_absolute() else None


def file_stamp(path: Path) -> tuple[int, int]:
    try:
        st = os.stat(path)
    except OSError:  # kept: it will be reported as unreadable when decoded
        return (-1, -1)
    return (st.st_size, st.st_mtime_ns)


# ----------------------------------------------------------------------------- decoding

class ImageProblem(Exception):
    """A file that cannot become a network input; `reason` is a short phrase for the run summary."""

    def __init__(self, reason: str):
        super().__init__(reason)
        self.reason = reason


# Signatures of formats PIL reads: if PIL still cannot identify the file, its header was cut off.
_KNOWN_STARTS = (b"\xff\xd8\xff", b"\x89PNG", b"GIF8", b"II*\x00", b"MM\x00*", b"RIFF")
_SIXTEEN_BIT = ("I;16", "I;16B", "I;16L", "I;16N")
_limit_lock = threading.Lock()
_limit_users = 0
_saved_limit: int | None = None


@contextmanager
def _own_pixel_limit():
    """PIL's bomb check reads a module global that the caller may have set to anything. Switch it
    off while we decode (we check the header size ourselves) and put back whatever was there."""
    global _limit_users, _saved_limit
    with _limit_lock:
        if _limit_users == 0:
            _saved_limit, Image.MAX_IMAGE_PIXELS = Image.MAX_IMAGE_PIXELS, None
        _limit_users += 1
    try:
        yield
    finally:
        with _limit_lock:
            _limit_users -= 1
            if _limit_users == 0:
                Image.MAX_IMAGE_PIXELS = _saved_limit


def decode(path: Path, size: int | None = None, max_pixels: int = DEFAULT_MAX_PIXELS) -> Image.Image:
    """Open one image as RGB, EXIF orientation applied. With `size`, JPEGs decode at reduced scale
    while the shorter side stays >= size. Raises ImageProblem(reason) for files that cannot be used."""
    return _decode(Path(path), size, max_pixels)[0]


def decode_original(path: Path, size: int | None = None, max_pixels: int = DEFAULT_MAX_PIXELS
                    ) -> tuple[Image.Image, tuple[int, int], tuple[float, float]]:
    """decode() plus the original (width, height) after orientation and the decoded image's pixels
    per original pixel (x, y): what cutting a box of the original out of a reduced decode needs."""
    img, original = _decode(Path(path), size, max_pixels)
    return img, original, _reduction(img.size, original)


def upright_size(path: Path) -> tuple[int, int]:
    """(width, height) of an image as mining sees it (after EXIF orientation), from its header alone.
    Raises OSError when the file cannot be opened."""
    with Image.open(path) as stored:
        w, h = stored.size
        try:
            turned = stored.getexif().get(_ORIENTATION, 1) in (5, 6, 7, 8)
        except Exception:  # noqa: BLE001  (a broken EXIF block: the picture is used as stored, see _decode)
            turned = False
    return (h, w) if turned else (w, h)


def _decode(path: Path, size: int | None, max_pixels: int) -> tuple[Image.Image, tuple[int, int]]:
    """decode(), also returning the original (width, height) after orientation."""
    try:
        if path.stat().st_size == 0:
            raise ImageProblem("empty file")
    except OSError:
        raise ImageProblem("unreadable") from None
    with _own_pixel_limit():
        try:
            with Image.open(path) as stored:
                w, h = stored.size  # from the header; no pixels decoded yet
                if w * h > max_pixels:
                    raise ImageProblem(f"too many pixels ({w} x {h} > {max_pixels})")
                if size:
                    stored.draft(None, (size, size))  # JPEG only; a no-op for other formats
                stored.load()  # decode everything now so truncation shows up here
                try:
                    turned = stored.getexif().get(_ORIENTATION, 1) in (5, 6, 7, 8)
                    upright = ImageOps.exif_transpose(stored)
                except Exception:  # noqa: BLE001  (a broken EXIF block should not cost the picture: use it as stored)
                    turned, upright = False, stored
                return _to_rgb(upright), ((h, w) if turned else (w, h))
        except ImageProblem:
            raise
        except Exception as err:  # noqa: BLE001  (PIL raises many types for hostile or damaged files)
            raise ImageProblem(_reason(err, path)) from None


def _reason(err: Exception, path: Path) -> str:
    if isinstance(err, UnidentifiedImageError):
        try:
            with open(path, "rb") as f:
                head = f.read(512)
        except OSError:
            return "unreadable"
        if head.startswith(_KNOWN_STARTS):
            return "truncated"
        # HTML error pages and notes saved under an image name; real binary formats have NUL bytes early
        looks_like_text = b"\0" not in head and head.decode("utf-8", "replace").count("\ufffd") <= 2
        return "not an image" if looks_like_text else "unsupported format"
    if isinstance(err, OSError) and err.errno is not None:
        return "unreadable"  # permission, a folder, a vanished file, a disk error
    text = str(err).lower()
    if isinstance(err, NotImplementedError) or any(
            w in text for w in ("not supported", "unsupported", "not available", "unrecognized")):
        return "unsupported format"
    return "truncated"  # PIL words cut-off and corrupt pixel data alike ("image file is truncated", EOF)


def _to_rgb(img: Image.Image) -> Image.Image:
    """Any PIL mode to 8-bit RGB. Always returns a new image."""
    if img.mode in _SIXTEEN_BIT or img.mode in ("I", "F"):
        gray = _to_8bit(np.asarray(img), sixteen_bit=img.mode in _SIXTEEN_BIT)  # (H, W)
        return Image.fromarray(np.stack([gray] * 3, axis=-1))  # (H, W, 3)
    if img.mode in ("RGBA", "LA", "La", "RGBa", "PA") or "transparency" in img.info:
        # Composite over white, as viewers show it; black would draw dark edges a unit may fire on.
        white = Image.new("RGBA", img.size, (255, 255, 255, 255))
        return Image.alpha_composite(white, img.convert("RGBA")).convert("RGB")
    return img.convert("RGB")  # 1, L, P, CMYK (PIL undoes Adobe's inverted CMYK), YCbCr, RGBX, RGB


def _to_8bit(a: np.ndarray, sixteen_bit: bool) -> np.ndarray:
    """Scale to 0..255 with numpy; PIL's own convert clips 16-bit values instead of scaling them."""
    a = np.nan_to_num(a.astype(np.float64))
    if sixteen_bit:
        full = 65535.0
    else:  # modes I and F carry no bit depth: take the smallest usual full scale that holds the data
        top = float(a.max(initial=0.0))
        full = next((f for f in (1.0, 255.0, 65535.0) if top <= f), top)
    return np.clip(np.rint(a * (255.0 / full)), 0, 255).astype(np.uint8)


# ----------------------------------------------------------------------------- geometry of the input

RESAMPLING = ("bilinear", "bicubic", "nearest", "lanczos", "box", "hamming")


@dataclass(frozen=True)
class Frame:
    """The network input an image is brought to: height x width pixels of `channels` (1: grey,
    3: RGB), resized with `resample` (a PIL filter name). An int size n means Frame(n, n)."""
    height: int
    width: int
    channels: int = 3
    resample: str = "bilinear"

    @property
    def side(self) -> int:
        """The longer side: an original whose shorter side has this many pixels covers the frame."""
        return max(self.height, self.width)


def as_frame(size: int | tuple[int, int] | Frame) -> Frame:
    if isinstance(size, Frame):
        return size
    if isinstance(size, int):
        return Frame(size, size)
    return Frame(int(size[0]), int(size[1]))


@dataclass(frozen=True)
class Placement:
    """How a network input was cut from the original image (after EXIF orientation)."""
    width: int
    height: int    # original image size, EXIF orientation applied
    scale: float   # network-input pixels per original pixel (the same along x and y)
    left: float
    top: float     # offset, in network-input pixels, of the centre crop within the resized image

    def to_original(self, box: tuple[float, float, float, float]) -> tuple[int, int, int, int]:
        """Map (x0, y0, x1, y1) in network-input pixels (x1/y1 exclusive) to original pixels,
        widened to whole pixels and clipped to the image."""
        u0, v0, u1, v1 = ((c + offset) / self.scale for c, offset in zip(box, (self.left, self.top) * 2))
        eps = 1e-6  # float noise (249.9999) must not widen the box by a whole pixel
        w, h = self.width, self.height
        return (min(max(math.floor(u0 + eps), 0), w), min(max(math.floor(v0 + eps), 0), h),
                min(max(math.ceil(u1 - eps), 0), w), min(max(math.ceil(v1 - eps), 0), h))


def fit(img: Image.Image, size: int | tuple[int, int] | Frame, original: tuple[int, int]
        ) -> tuple[np.ndarray, Placement]:
    """Scale the original by one factor until it covers the frame (for a square frame: its shorter
    side to the frame's), centre-crop the frame. Returns uint8 (C, H, W) and the Placement in
    ORIGINAL pixels, even when `img` is a draft-reduced decode of it. One factor for both axes
    keeps every box mapping back exactly, also for non-square frames."""
    f = as_frame(size)
    width, height = original
    cw, ch = _covered(width, height, f)
    x0, y0 = (width - cw) / 2, (height - ch) / 2  # the centred region, in original pixels
    rx, ry = _reduction(img.size, original)
    # Resampling straight from that region (PIL takes a float box) keeps the crop exact; bilinear
    # is what torchvision's Resize uses, and PIL widens the filter when shrinking (antialiased).
    out = img.resize((f.width, f.height), Image.Resampling[f.resample.upper()],
                     box=(x0 * rx, y0 * ry, (x0 + cw) * rx, (y0 + ch) * ry))
    if f.channels == 1:
        out = out.convert("L")  # ITU-R 601 luma, as PIL converts; grey originals come back unchanged
    a = np.asarray(out, dtype=np.uint8).reshape(f.height, f.width, -1)  # (H, W, C)
    # one copy at most: a grey (H, W, 1) transposes to a contiguous but read-only view of PIL's buffer
    return np.require(a.transpose(2, 0, 1), requirements=["C", "W"]), placement(width, height, f)  # (C, H, W)


def _covered(width: int, height: int, f: Frame) -> tuple[float, float]:
    """Width and height, in original pixels, of the centred region the frame shows."""
    if f.width * height <= f.height * width:  # the original is wider than the frame: its height fits
        return f.width * height / f.height, float(height)
    return float(width), f.height * width / f.width


def placement(width: int, height: int, size: int | tuple[int, int] | Frame) -> Placement:
    """The Placement `fit` gives an image of this original size: the centred region, scaled to the frame."""
    f = as_frame(size)
    cw, ch = _covered(width, height, f)
    scale = f.height / ch if ch == height else f.width / cw
    return Placement(width, height, scale, (width - cw) / 2 * scale, (height - ch) / 2 * scale)


def _reduction(size: tuple[int, int], original: tuple[int, int]) -> tuple[float, float]:
    """Image pixels per original pixel. JPEG draft mode shrinks by an integer k and rounds the size
    up, so there the ratio is exactly 1/k rather than size / original."""
    (w, h), (width, height) = size, original
    k = round(width / w)
    if k >= 1 and -(-width // k) == w and -(-height // k) == h:
        return 1 / k, 1 / k
    return w / width, h / height


# ----------------------------------------------------------------------------- batches

class Batch(NamedTuple):
    indices: torch.Tensor            # (B,) int64 corpus indices of the decoded images
    images: torch.Tensor             # (B, C, H, W) uint8
    placements: list[Placement]      # B of them
    failures: list[tuple[int, str]]  # (corpus index, reason) of files that could not be used


class CorpusDataset:
    """Item k: (corpus index, uint8 (C, H, W) or None, Placement or None, reason or None).

    A map-style dataset for torch's DataLoader (which needs only __len__ and __getitem__); not a
    subclass of torch's Dataset, so reading a run's corpus (`show`, the atlas) never imports torch."""

    def __init__(self, corpus: Corpus, size: int | tuple[int, int] | Frame, indices: Sequence[int] | None = None,
                 max_pixels: int = DEFAULT_MAX_PIXELS):
        self.corpus, self.frame, self.max_pixels = corpus, as_frame(size), max_pixels
        self.indices = range(len(corpus)) if indices is None else list(indices)

    def __len__(self) -> int:
        return len(self.indices)

    def __getitem__(self, k: int):
        i = self.indices[k]
        try:
            img, original = _decode(self.corpus.path(i), self.frame.side, self.max_pixels)
        except ImageProblem as problem:
            return i, None, None, problem.reason
        import torch

        pixels, placement = fit(img, self.frame, original)
        return i, torch.from_numpy(pixels), placement, None


def collate(items, size: int | tuple[int, int] | Frame = 0) -> Batch:
    """Stack the decoded items; `size` shapes the empty tensor of a batch where every file failed."""
    import torch

    good = [item for item in items if item[3] is None]
    if good:
        images = torch.stack([pixels for _, pixels, _, _ in good])
    else:
        f = as_frame(size)
        images = torch.empty((0, f.channels, f.height, f.width), dtype=torch.uint8)
    return Batch(torch.tensor([i for i, *_ in good], dtype=torch.long), images,
                 [placement for _, _, placement, _ in good],
                 [(i, reason) for i, _, _, reason in items if reason is not None])


def default_workers() -> int:
    cpus = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    return min(4, max(cpus - 1, 0))  # leave one core for the network


def batches(corpus: Corpus, size: int | tuple[int, int] | Frame, start: int = 0, batch_size: int = 32, workers: int | None = None,
            max_pixels: int = DEFAULT_MAX_PIXELS, indices: Sequence[int] | None = None) -> Iterator[Batch]:
    """Decode corpus[start:] (or the `indices` from `start` on, e.g. one rank's shard) in DataLoader
    workers, in corpus order. Bad files come back in Batch.failures and never stop the run; a batch
    may hold zero images."""
    if not 0 <= start <= len(corpus):
        raise ValueError(f"start {start} outside the corpus (0-{len(corpus)})")
    from torch.utils.data import DataLoader

    todo = range(start, len(corpus)) if indices is None else [i for i in indices if i >= start]
    dataset = CorpusDataset(corpus, size, todo, max_pixels)
    yield from DataLoader(
        dataset, batch_size=batch_size, shuffle=False, collate_fn=partial(collate, size=size),
        num_workers=default_workers() if workers is None else workers)
