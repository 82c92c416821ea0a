"""Local paths out of what an atlas shows: the model named as a file, and every absolute path cut to
its last part when the atlas is drawn for sharing (`unitlens atlas --strip-paths`).

An absolute path says where things lie on one machine (a home folder, a virtual environment);
a colleague who opens the folder needs only the file names.
"""
from __future__ import annotations

import re
from pathlib import PurePath

_PART = r"[^\s/\\:'\"<>|*?,;()\[\]{}]+"
# a POSIX root, a home folder or a Windows drive, at least one folder, then the last part; not
# inside a relative path ("stripe/a.png") or a URL ("file:///..."), hence the look-behind
ABSOLUTE = re.compile(rf"(?<![\w.~/-])(?:[A-Za-z]:[\\/]|~[\\/]|/)(?:{_PART}[\\/])+({_PART})")
ROOTED = re.compile(rf"(?:[A-Za-z]:[\\/]|~[\\/]|/)({_PART})")  # a whole string that is a path one level deep ("/data")


def model_name(spec: str) -> str:
    """A model as a reader knows it: `net.py:swatch_net` for `/home/me/net.py:swatch_net`, a file name for a
    TorchScript file; `torchvision:resnet18` and `package.module:function` as given."""
    spec = str(spec)
    if ".py:" in spec:
        file, func = spec.rsplit(":", 1)
        return f"{PurePath(file).name}:{func}"
    if "/" in spec or "\\" in spec:
        return PurePath(spec).name
    return spec


def strip_paths(obj):
    """`obj` (JSON-like: dicts, lists, strings, numbers) with every absolute path in its strings (keys
    too) cut to the path's last part."""
    if isinstance(obj, str):
        whole = ROOTED.fullmatch(obj)
        return whole.group(1) if whole else ABSOLUTE.sub(lambda m: m.group(1), obj)
    if isinstance(obj, dict):
        return {strip_paths(k): strip_paths(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [strip_paths(v) for v in obj]
    return obj
