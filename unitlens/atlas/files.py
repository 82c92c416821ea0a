"""The files of an atlas folder: rewritten only when their bytes change, readable by anyone the folder
is shared with; images hard-linked from the run (or copied) rather than written again.

Shared by the atlas of a run (render.py) and the pages of a comparison folder (comparison_page.py).
"""
from __future__ import annotations

import os
import shutil
from pathlib import Path

from ..store import atomic_write

STATE = ".render.json"  # what each page of an atlas folder was drawn from, and how (e.g. paths stripped)


def _readable_mode() -> int:
    """Mode of a new file under the user's umask (temporary files are created private)."""
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


READABLE = _readable_mode()  # an atlas is made to be shared or served: its files are readable like any new file


def write_if_changed(path: Path, data: bytes) -> None:
    """Write `data` to `path` atomically, unless the file already holds exactly these bytes."""
    try:
        if path.read_bytes() == data:
            return
    except FileNotFoundError:
        pass
    atomic_write(path, lambda f: f.write(data))
    os.chmod(path, READABLE)


def place_all(wanted: dict[str, Path], d: Path, keep: tuple[str, ...] = ()) -> None:
    """Make folder `d` hold exactly `wanted` ({name: source}) and the files named in `keep`: hard links
    where possible, else copies."""
    d.mkdir(parents=True, exist_ok=True)
    for p in d.iterdir():
        if p.name not in wanted and p.name not in keep:
            p.unlink()
    for name, src in wanted.items():
        _place(src, d / name)


def _place(src: Path, dst: Path) -> None:
    s = src.stat()
    try:
        t = dst.stat()
        if (t.st_ino == s.st_ino and t.st_dev == s.st_dev) or (t.st_size == s.st_size and t.st_mtime_ns == s.st_mtime_ns):
            return  # the same file, or an unchanged copy
    except FileNotFoundError:
        pass
    tmp = dst.with_name(f".{dst.name}.tmp")
    tmp.unlink(missing_ok=True)
    readable = (s.st_mode & 0o444) & READABLE == READABLE & 0o444
    try:
        if not readable:  # a private file of the run: copy it, rather than change the run's own file
            raise OSError
        os.link(src, tmp)
    except OSError:  # another file system, links not allowed, or private: copy (keeps the time stamp)
        shutil.copy2(src, tmp)
        os.chmod(tmp, READABLE)
    os.replace(tmp, dst)
