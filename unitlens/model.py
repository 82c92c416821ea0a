"""Model specs, safe weight loading, preprocessing and the layer table.

A model spec is one of
  ``torchvision:<arch>``      any classification architecture in torchvision.models
  ``path/to/file.py:function`` the user's own code; ``function()`` returns an nn.Module
  ``package.module:function``  the same from an installed package (recorded so: files move on reinstall)
  ``path/to/model.pt``         a TorchScript archive (or, with ``allow_pickle``, a pickled module)
"""
from __future__ import annotations

import hashlib
import importlib.util
import pickle
import sys
import warnings
from contextlib import contextmanager, nullcontext
from dataclasses import dataclass, field
from pathlib import Path

import torch
from torch import nn

from ._specs import MODULE_SPEC, canonical_spec
from .errors import UnitlensError, UnitlensWarning, closest

IMAGENET_MEAN = (0.485, 0.456, 0.406)
IMAGENET_STD = (0.229, 0.224, 0.225)


@dataclass(frozen=True)
class Preprocess:
    """How an image becomes a network input: scaled to cover `size` = (height, width), centre crop,
    `len(mean)` channels (3: RGB, 1: grey), normalised per channel."""

    size: tuple[int, int]
    mean: tuple[float, ...]
    std: tuple[float, ...]
    source: str  # where these numbers came from, shown in the manifest and the atlas
    interpolation: str = "bilinear"

    def __post_init__(self):
        if isinstance(self.size, int):  # a square input given by its side
            object.__setattr__(self, "size", (self.size, self.size))

    @property
    def channels(self) -> int:
        return len(self.mean)

    @property
    def frame(self):
        """The corpus.Frame images are decoded to."""
        from .corpus import Frame

        return Frame(*self.size, self.channels, self.interpolation)

    @property
    def side(self) -> int:
        """The longer side: synthesised images are squares of this size unless told otherwise."""
        return max(self.size)

    def size_text(self) -> str:
        """'224' for a square input, '96x160' (height x width) otherwise."""
        h, w = self.size
        return str(h) if h == w else f"{h}x{w}"


@dataclass(frozen=True)
class LayerInfo:
    name: str
    channels: int
    height: int
    width: int
    block: bool  # a module with children (a block), not a single operation
    field: object | None = None  # geometry.Field at the preprocessing size
    layout: str = "NCHW"  # the module's own output: "NCHW", "NHWC" (read permuted), "?" (cannot tell)
    module: str = ""  # the module whose output it is
    call: int = 0  # which call of that module (a module run twice in a forward gives two layers)


SUPPORTED = "feature maps of shape N x C x H x W or N x H x W x C"


@dataclass
class LoadedModel:
    """A model in eval mode with everything unitlens needs to know about it."""

    spec: str
    module: nn.Module
    preprocess: Preprocess
    weights: dict  # {"kind": "none" | "file" | "torchvision" | "pickle", ...}
    arch_options: dict = field(default_factory=dict)
    _layers: dict | None = field(default=None, repr=False)
    _tokens: dict | None = field(default=None, repr=False)  # {layer: (T, C)}: token sequences
    device: str = "cpu"  # where the network runs (dist.place); inputs and feature maps stay on the CPU

    # -- layers --------------------------------------------------------------------------
    def layers(self) -> dict[str, LayerInfo]:
        """Every module call whose output is a 4-D feature map, in execution order."""
        if self._layers is None:
            self._layers, self._tokens = _layer_table(self)
        return self._layers

    def token_layers(self) -> dict[str, tuple[int, int]]:
        """{layer: (T, C)} for module calls whose output is a token sequence (N x T x C): not supported."""
        self.layers()
        return self._tokens

    def layer(self, name: str) -> LayerInfo:
        table = self.layers()
        if name in self._tokens:
            t, c = self._tokens[name]
            raise UnitlensError(
                f"Layer '{name}' of {self.spec} outputs a token sequence (N x {t} x {c}); unitlens reads "
                f"{SUPPORTED} only (vision transformers' token layers are not supported). "
                f"Run `unitlens layers {self.spec}` to list the layers it can read."
            )
        if name not in table:
            from ._extract import function_outputs

            fn = function_outputs(self).get(name)
            if fn:
                raise UnitlensError(
                    f"'{name}' is made by a function in the forward of {self.spec} (torch.cat, +, F.relu...), "
                    f"not by a module, so it cannot be chosen: layers are module outputs. Nearest layer: "
                    f"{fn[0]} ({fn[1]})."
                )
            near = closest(name, table)
            hint = f" Closest: {', '.join(near)}." if near else ""
            raise UnitlensError(
                f"Unknown layer '{name}' in {self.spec}.{hint} "
                f"Run `unitlens layers {self.spec}` to list all."
            )
        info = table[name]
        if info.layout == "?":
            raise UnitlensError(
                f"Cannot tell whether layer '{name}' of {self.spec} (output 1x{info.channels}x{info.height}x"
                f"{info.width}) is channels-first (N x C x H x W) or channels-last (N x H x W x C): its "
                "shape does not follow the input size and its receptive field is unknown. Choose another layer."
            )
        return info

    def extractor(self, names):
        """A callable x -> {name: (B, C, H, W) feature map} that runs the network only as far as needed."""
        from ._extract import make_extractor

        infos = [self.layer(n) for n in names]
        reused = {i.module for i in self.layers().values() if i.call > 0}
        run = make_extractor(self, list(names), [i.name for i in infos if i.layout == "NHWC"], reused)
        if self.device == "cpu":
            return run
        return lambda x: {k: v.to(x.device) for k, v in run(x.to(self.device, non_blocking=True)).items()}

    def check_size(self, size: int, names) -> None:
        """Raise a clear error before any work when the network refuses a size x size input
        (a vision transformer's fixed 224, a model whose maps vanish at a small size)."""
        try:
            with torch.no_grad():
                maps = self.extractor(names)(torch.zeros(1, self.preprocess.channels, size, size))
        except UnitlensError:
            raise
        except Exception as e:  # noqa: BLE001  (whatever the model raises is reported below)
            maps = f"{e.__class__.__name__}: {str(e)[:200]}"
        if isinstance(maps, str) or any(0 in v.shape[2:] for v in maps.values()):
            why = maps if isinstance(maps, str) else "a feature map is empty"
            p = self.preprocess.size_text()
            raise UnitlensError(f"{self.spec} does not take {size}x{size} images up to {', '.join(names)} "
                                f"({why}); its input size is {p}. Synthesise at that size (--synth-size {p}), or leave --synth-size out.")

    def normalize(self, images: torch.Tensor) -> torch.Tensor:
        """uint8 (B,C,H,W) or float in [0,1] -> normalised network input (float32)."""
        x = images.float()
        if images.dtype == torch.uint8:
            x = x / 255.0
        mean = torch.tensor(self.preprocess.mean, dtype=x.dtype, device=x.device).view(1, -1, 1, 1)
        std = torch.tensor(self.preprocess.std, dtype=x.dtype, device=x.device).view(1, -1, 1, 1)
        return (x - mean) / std

    def describe(self) -> dict:
        p = self.preprocess
        h, w = p.size
        pre = {"size": h if h == w else [h, w], "mean": list(p.mean), "std": list(p.std), "source": p.source}
        if p.interpolation != "bilinear":  # recorded only when it differs, so older manifests still match
            pre["interpolation"] = p.interpolation
        return {
            "spec": self.spec,
            "weights": self.weights,
            "arch_options": self.arch_options,
            "preprocess": pre,
        }


# -- loading -------------------------------------------------------------------------------

def load_model(
    spec: str,
    weights: str | None = None,
    *,
    size: int | tuple[int, int] | None = None,
    mean: tuple[float, ...] | None = None,
    std: tuple[float, ...] | None = None,
    allow_pickle: bool = False,
    arch_options: dict | None = None,
) -> LoadedModel:
    """Build the model named by `spec`, load `weights` (a file or a torchvision weights name).

    >>> m = load_model("torchvision:resnet18")       # random weights
    >>> sorted(m.layers())[:2]
    ['avgpool', 'bn1']
    """
    arch_options = dict(arch_options or {})
    if spec.startswith("torchvision:"):
        module, wdesc, pre, arch_options = _torchvision(spec.split(":", 1)[1], weights, arch_options)
    elif ".py:" in spec or (MODULE_SPEC.fullmatch(spec) and not Path(spec).is_file()):
        if arch_options:
            raise UnitlensError("Architecture options apply to torchvision:<arch> models only.")
        spec = canonical_spec(spec)  # code of an installed package goes by its module: files move
        module, declared, file = _user_code(spec)
        if ".py:" in spec:
            spec = f"{Path(file).resolve()}:{spec.rsplit(':', 1)[1]}"  # found again from any directory
        wdesc = _load_weights_file(module, weights, spec) if weights else {"kind": "none"}
        pre = _declared_preprocess(declared, Path(file).name) or _carried_preprocess(module) or _DEFAULT
    elif Path(spec).is_file():
        if weights:
            raise UnitlensError(
                f"'{spec}' is a whole model file; --weights is for architectures given as "
                "torchvision:<arch> or file.py:function."
            )
        module, wdesc = _model_file(Path(spec), allow_pickle)
        spec = str(Path(spec).resolve())  # like user code and weights: the run opens from any directory
        pre = _DEFAULT
    else:
        raise UnitlensError(_bad_spec_message(spec))

    overridden = [k for k, v in (("size", size), ("mean", mean), ("std", std)) if v is not None]
    if overridden:
        pre = Preprocess(
            _height_width(size) if size is not None else pre.size,
            tuple(mean) if mean else pre.mean,
            tuple(std) if std else pre.std,
            pre.source + f"; overridden: {', '.join(overridden)}",
            pre.interpolation,
        )
    pre = _check_preprocess(pre, _input_channels(module), given={k for k in ("mean", "std") if k in overridden})
    module.eval()
    for p in module.parameters():
        p.requires_grad_(False)
    if wdesc["kind"] == "none":
        _warn_random(spec)
    return LoadedModel(spec, module, pre, wdesc, arch_options)


_DEFAULT = Preprocess((224, 224), IMAGENET_MEAN, IMAGENET_STD, "ImageNet statistics (default)")
# Decoding makes grey (1 channel) or RGB (3 channels) images; other channel counts have no image to come from.
_DECODED = {1: "grey", 3: "RGB"}
# The largest feature map of common architectures is about 21 times the input (VGG's first convolution:
# 64 channels at full resolution for 3 input channels) [E]; 32 leaves room for the rest of the pass.
_MEMORY_PER_INPUT = 32


def _height_width(size) -> tuple[int, int]:
    if isinstance(size, int):
        return (size, size)
    h, w = size
    return (int(h), int(w))


def _input_channels(module: nn.Module) -> int | None:
    """Channels the network's first convolution takes (the first module with a 4-D weight), None if
    it has none. A grouped convolution's weight holds in_channels / groups of them."""
    for m in module.modules():
        w = getattr(m, "weight", None)
        if isinstance(w, torch.Tensor) and w.dim() == 4:
            return int(getattr(m, "in_channels", None) or w.shape[1] * int(getattr(m, "groups", 1)))
    return None


def _check_preprocess(pre: Preprocess, channels: int | None, given: set) -> Preprocess:
    """One mean and std per input channel (default statistics averaged for a grey model), a size that
    is large enough and fits in memory, a known interpolation."""
    from ._memory import available_memory
    from .corpus import RESAMPLING

    h, w = pre.size
    if min(h, w) < 16:
        raise UnitlensError(f"Input size {pre.size_text()} is too small (at least 16 px a side).")
    want = channels or len(pre.mean)
    if want not in _DECODED:
        raise UnitlensError(f"The model's first convolution takes {want} input channels; images decode to 1 (grey) "
                            "or 3 (RGB) channels, so it cannot be fed from image files.")
    if len(pre.mean) != len(pre.std):
        raise UnitlensError(f"--mean has {len(pre.mean)} numbers and --std {len(pre.std)}; give one per input "
                            f"channel ({want} for this model).")
    if len(pre.mean) != want:
        if want == 1 and len(pre.mean) == 3 and not given:
            # common practice for a grey model with RGB statistics: their average over the channels
            pre = Preprocess(pre.size, (sum(pre.mean) / 3,), (sum(pre.std) / 3,),
                             pre.source + ", averaged over R,G,B for a 1-channel model", pre.interpolation)
        else:
            names = "R,G,B" if want == 3 else "grey"
            raise UnitlensError(f"--mean and --std need {want} number(s) ({names}): the model's first convolution "
                                f"takes {want} input channel(s); got {len(pre.mean)}.")
    if any(s <= 0 for s in pre.std):
        raise UnitlensError(f"--std values must be positive, got {list(pre.std)}.")
    if pre.interpolation not in RESAMPLING:
        raise UnitlensError(f"Unknown interpolation '{pre.interpolation}'; valid: {', '.join(RESAMPLING)}.")
    need, free = _MEMORY_PER_INPUT * 4 * want * h * w, available_memory()
    if need > free:
        raise UnitlensError(f"Input size {pre.size_text()} needs about {need / 2**30:.1f} GiB for one image's feature "
                            f"maps; {free / 2**30:.1f} GiB are free. Give a smaller --size (this model's usual "
                            "inputs are a few hundred pixels a side).")
    return pre


def _carried_preprocess(module: nn.Module) -> Preprocess | None:
    """The data configuration a module carries (timm models: `pretrained_cfg`, older ones `default_cfg`,
    a dict with input_size (C, H, W), mean, std, interpolation), or None."""
    from .corpus import RESAMPLING

    for attr in ("pretrained_cfg", "default_cfg"):
        cfg = getattr(module, attr, None)
        if not isinstance(cfg, dict) or "input_size" not in cfg:
            continue
        try:
            _c, h, w = (int(v) for v in cfg["input_size"])
            mean = tuple(float(v) for v in cfg.get("mean", IMAGENET_MEAN))
            std = tuple(float(v) for v in cfg.get("std", IMAGENET_STD))
        except (TypeError, ValueError):
            raise UnitlensError(f"The model's {attr} has an input_size, mean or std that are not numbers: "
                                f"{ {k: cfg.get(k) for k in ('input_size', 'mean', 'std')} }.") from None
        interp = str(cfg.get("interpolation", "bilinear"))
        used = interp if interp in RESAMPLING else "bilinear"
        note = "" if used == interp else f" (its interpolation '{interp}' is not one we have: bilinear)"
        return Preprocess((h, w), mean, std, f"the model's {attr} (input_size, mean, std, interpolation){note}", used)
    return None


_WARNED: set[str] = set()  # specs warned about in this process


def _warn_random(spec: str) -> None:
    # A random network's units respond to nothing learnt, and every load draws new ones, so a run
    # cannot be reopened with the same units; warn wherever such a model is built (once per spec).
    if spec.startswith("torchvision:"):
        what = f"{spec} has no weights: its units are a random initialisation"
    else:
        what = f"{spec} was given no weights: unless the function sets them, its units are a random initialisation"
    # Once per spec and process ourselves: Python's own once-registry is cleared whenever any code
    # changes the warning filters, which loading does (torchvision's constructors are silenced).
    if spec in _WARNED:
        return
    _WARNED.add(spec)
    warnings.warn(f"{what}, drawn anew at every load. Pass trained weights with --weights.", UnitlensWarning, stacklevel=2)


def _bad_spec_message(spec: str) -> str:
    import torchvision

    hint = ""
    if spec in torchvision.models.list_models(module=torchvision.models):
        hint = f" Did you mean torchvision:{spec}?"
    elif ":" in spec and not spec.split(":", 1)[0].endswith(".py"):
        hint = " User code is given as path/to/file.py:function."
    return (
        f"Cannot understand model '{spec}'.{hint} Valid forms: torchvision:<arch> (e.g. "
        "torchvision:resnet50), path/to/file.py:function, package.module:function (an installed "
        "package), or an existing TorchScript file."
    )


def _torchvision(arch: str, weights: str | None, options: dict):
    import torchvision
    from torchvision.models import get_model, get_model_weights

    archs = torchvision.models.list_models(module=torchvision.models)
    if arch not in archs:
        near = closest(arch, archs)
        hint = f" Closest: {', '.join(near)}." if near else ""
        raise UnitlensError(
            f"Unknown torchvision classification architecture '{arch}'.{hint} "
            "See torchvision.models.list_models() for all."
        )
    enum = get_model_weights(arch)
    if weights and not _looks_like_path(weights):
        if weights not in enum.__members__:
            raise UnitlensError(
                f"'{weights}' is neither a file nor a weights name of {arch}. "
                f"Valid names: {', '.join(enum.__members__)}; or pass a local state-dict file."
            )
        w = enum[weights]
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                module = get_model(arch, weights=w, **options)
        except (OSError, RuntimeError) as e:  # URLError is an OSError
            if isinstance(e, RuntimeError) and "download" not in str(e).lower():
                raise
            raise UnitlensError(
                f"Could not download {w} ({e.__class__.__name__}: {e}). Offline? Fetch {w.url} "
                f"on a machine with internet and pass the file: --weights /path/to/{Path(w.url).name}"
            ) from None
        t = w.transforms()
        pre = Preprocess(_height_width(int(t.crop_size[0])), tuple(t.mean), tuple(t.std), f"torchvision metadata of {w}")
        return module, {"kind": "torchvision", "name": str(w), "url": w.url}, pre, options

    t = enum.DEFAULT.transforms()
    pre = Preprocess(
        _height_width(int(t.crop_size[0])), tuple(t.mean), tuple(t.std),
        f"torchvision metadata of {enum.DEFAULT} (the architecture's default recipe)",
    )
    build = _builder(arch, options)
    if not weights:
        return build(), {"kind": "none"}, pre, options

    # Adapt the constructor to what the checkpoint holds: a fine-tuned head, or no auxiliary heads.
    module = build()
    sd = _unprefixed(_read_state_dict(Path(weights)), module.state_dict(), Path(weights))
    head = _last_linear(module)
    if head and f"{head}.weight" in sd and "num_classes" not in options:
        n = sd[f"{head}.weight"].shape[0]
        if n != module.get_submodule(head).out_features:
            options["num_classes"] = n
    if arch in ("inception_v3", "googlenet") and "aux_logits" not in options:
        if not any(k.startswith(("AuxLogits.", "aux1.", "aux2.")) for k in sd):
            options["aux_logits"] = False
    build = _builder(arch, options)
    module = build()
    return module, _apply_state_dict(module, sd, Path(weights), "pass constructor options with --arch-option "
                                     "key=value"), pre, options


def _builder(arch: str, options: dict):
    from torchvision.models import get_model

    def build():
        kw = dict(options)
        if arch in ("inception_v3", "googlenet"):
            kw.setdefault("init_weights", False)  # scipy-based init is slow and pointless before loading
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                return get_model(arch, weights=None, **kw)
        except TypeError as e:
            raise UnitlensError(f"Bad architecture option for {arch}: {e}") from None

    return build


def _last_linear(module: nn.Module) -> str | None:
    names = [n for n, m in module.named_modules() if isinstance(m, nn.Linear)]
    return names[-1] if names else None


def _looks_like_path(s: str) -> bool:
    return Path(s).exists() or "/" in s or s.endswith((".pt", ".pth", ".bin", ".ckpt"))


def _read_state_dict(path: Path) -> dict:
    if not path.is_file():
        raise UnitlensError(f"Weights file not found: {path}")
    try:
        obj = torch.load(path, map_location="cpu", weights_only=True)
    except pickle.UnpicklingError as e:
        raise UnitlensError(
            f"{path} holds more than tensors (a pickled object), so it was not loaded: "
            "unpickling can run code. Save a state dict instead (torch.save(model.state_dict(), f)), "
            f"or, if you trust the file, give it as the model with --allow-pickle. ({str(e)[:120]})"
        ) from None
    except Exception as e:  # noqa: BLE001  (torch.load raises many types for damaged files)
        raise UnitlensError(f"Cannot read weights file {path}: {e.__class__.__name__}: {e}") from None
    if isinstance(obj, dict) and not _tensors(obj):
        # A training checkpoint: the weights sit under one entry beside epoch, optimiser state, ...
        held = [k for k, v in obj.items() if _tensors(v)]
        held.sort(key=lambda k: _NESTS.index(k) if k in _NESTS else len(_NESTS))
        if held:
            if len(held) > 1:
                print(f"Note: {path} holds several sets of weights ({', '.join(held)}); using '{held[0]}'.",
                      file=sys.stderr)
            obj = obj[held[0]]
    if not _tensors(obj):
        raise UnitlensError(f"{path} is not a state dict (a mapping of names to tensors), nor a checkpoint "
                            "holding one (e.g. under 'state_dict' or 'model').")
    return obj


# Entries under which training frameworks keep the network's weights, most usual first (common practice).
_NESTS = ("state_dict", "model_state_dict", "model", "net", "network", "module", "weights", "state_dict_ema",
          "model_ema")


def _tensors(obj) -> bool:
    return isinstance(obj, dict) and bool(obj) and all(isinstance(v, torch.Tensor) for v in obj.values())


def _unprefixed(sd: dict, own: dict, path: Path) -> dict:
    """The checkpoint's keys with the one prefix removed that makes them the model's own: the attribute
    that held the network in training (`module.` of DataParallel, `model.`, `net.`, `backbone.`, ...).
    Keys outside that prefix (a loss, an EMA copy) are left out, and the note says so."""
    if any(k in own for k in sd):
        return sd
    prefixes = dict.fromkeys(".".join(k.split(".")[:n]) + "." for k in sd for n in (1, 2) if k.count(".") >= n)
    best, hits = None, 0
    for p in prefixes:
        n = sum(k[len(p):] in own for k in sd if k.startswith(p))
        if n > hits:
            best, hits = p, n
    if best is None:
        return sd
    out = {k[len(best):]: v for k, v in sd.items() if k.startswith(best)}
    rest = [k for k in sd if not k.startswith(best)]
    left = f"; {len(rest)} other keys left out (first: {', '.join(rest[:3])})" if rest else ""
    print(f"Note: loading the weights of {path} under the prefix '{best}' ({len(out)} keys){left}.", file=sys.stderr)
    return out


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _apply_state_dict(module: nn.Module, sd: dict, path: Path, remedy: str) -> dict:
    own = module.state_dict()
    sd = _unprefixed(sd, own, path)
    missing = [k for k in own if k not in sd]
    unexpected = [k for k in sd if k not in own]
    wrong = [k for k in own if k in sd and tuple(own[k].shape) != tuple(sd[k].shape)]
    if missing or unexpected or wrong:
        parts = []
        if missing:
            parts.append(f"{len(missing)} missing (first: {', '.join(missing[:3])})")
        if unexpected:
            parts.append(f"{len(unexpected)} unexpected (first: {', '.join(unexpected[:3])})")
        if wrong:
            k = wrong[0]
            parts.append(
                f"{len(wrong)} with other shapes (first: {k} is {tuple(sd[k].shape)} in the file, "
                f"{tuple(own[k].shape)} in the model)"
            )
        raise UnitlensError(
            f"Weights in {path} do not fit the model: " + "; ".join(parts) + f". Check the architecture, or {remedy}."
        )
    module.load_state_dict(sd, strict=True)
    return {"kind": "file", "path": str(path.resolve()), "sha256": _sha256(path)}


def _load_weights_file(module: nn.Module, weights: str, code: str) -> dict:
    return _apply_state_dict(module, _read_state_dict(Path(weights)), Path(weights),
                             f"make {code} build the network the checkpoint was saved from")


def _declared_preprocess(declared, file: str) -> Preprocess | None:
    """A user's code file may declare its input: PREPROCESS = {"size": 96 or (96, 160), "mean": (..),
    "std": (..)}, one mean and std per input channel."""
    if declared is None:
        return None
    if not isinstance(declared, dict) or not set(declared) <= {"size", "mean", "std"}:
        raise UnitlensError(f"PREPROCESS in {file} must be a dict with keys size, mean, std; got {declared!r}.")
    try:
        return Preprocess(_height_width(declared.get("size", 224)),
                          tuple(float(v) for v in declared.get("mean", IMAGENET_MEAN)),
                          tuple(float(v) for v in declared.get("std", IMAGENET_STD)), f"PREPROCESS in {file}")
    except (TypeError, ValueError):
        raise UnitlensError(f"PREPROCESS in {file} needs a size (an integer, or height and width) and one number "
                            f"per input channel for mean and std; got {declared!r}.") from None


def _user_code(spec: str) -> tuple[nn.Module, object, str]:
    """The module built by `function()` in the code file or Python module, the code's PREPROCESS
    declaration (or None), and the code's file."""
    file, func = spec.rsplit(":", 1)
    path = Path(file) if file.endswith(".py") else None
    with _beside(path) if path is not None else nullcontext():
        mod = _import_file(path) if path is not None else _import_module(file)
        file = getattr(mod, "__file__", None) or file
        fn = getattr(mod, func, None)
        if not callable(fn):
            found = [n for n in dir(mod) if callable(getattr(mod, n)) and not n.startswith("_")]
            near = closest(func, found)
            hint = f" Closest: {', '.join(near)}." if near else ""
            raise UnitlensError(f"{file} has no function '{func}'.{hint}")
        try:
            module = fn()
        except SystemExit as e:
            raise UnitlensError(f"{spec}() called sys.exit({e.code!r}) instead of returning a model.") from None
        except Exception as e:  # noqa: BLE001  (user code: any failure becomes one error)
            raise UnitlensError(f"{spec}() failed: {e.__class__.__name__}: {e}") from None
    if not isinstance(module, nn.Module):
        raise UnitlensError(f"{spec}() returned {type(module).__name__}, not a torch.nn.Module.")
    return module, getattr(mod, "PREPROCESS", None), file


def _import_file(path: Path):
    if not path.is_file():
        raise UnitlensError(f"Model code file not found: {path}")
    name = f"unitlens_user_{hashlib.sha1(str(path.resolve()).encode()).hexdigest()[:10]}"
    mod_spec = importlib.util.spec_from_file_location(name, path)
    mod = importlib.util.module_from_spec(mod_spec)
    sys.modules[name] = mod  # lets dataclasses / pickling inside user code find their module
    try:
        mod_spec.loader.exec_module(mod)
    except SystemExit as e:
        raise UnitlensError(f"Importing {path} called sys.exit({e.code!r}), so no model was built. Keep "
                            "script code under `if __name__ == \"__main__\":` in that file.") from None
    except Exception as e:  # noqa: BLE001  (user code: any failure becomes one error)
        raise UnitlensError(f"Importing {path} failed: {e.__class__.__name__}: {e}") from None
    return mod


def _import_module(name: str):
    try:
        return importlib.import_module(name)
    except ModuleNotFoundError as e:
        raise UnitlensError(f"Cannot import the model's module '{name}' ({e}). Install the package that "
                            "holds it, or give its code file as path/to/file.py:function.") from None
    except Exception as e:  # noqa: BLE001  (user code: any failure becomes one error)
        raise UnitlensError(f"Importing {name} failed: {e.__class__.__name__}: {e}") from None


@contextmanager
def _beside(path: Path):
    """The code file's folder on the import path while it loads, so it can import the files beside it
    (as `python file.py` would)."""
    folder = str(path.resolve().parent)
    added = folder not in sys.path
    if added:
        sys.path.insert(0, folder)
    try:
        yield
    finally:
        if added and folder in sys.path:
            sys.path.remove(folder)


def _model_file(path: Path, allow_pickle: bool):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            module = torch.jit.load(str(path), map_location="cpu")
            return module, {"kind": "torchscript", "path": str(path.resolve()), "sha256": _sha256(path)}
        except RuntimeError:
            pass  # not TorchScript
    if not allow_pickle:
        raise UnitlensError(
            f"{path} is not a TorchScript archive. If it is a state dict, name the architecture and "
            f"pass the file as --weights (e.g. torchvision:resnet50 --weights {path}). If it is a whole "
            "pickled module and you trust its source, add --allow-pickle (unpickling can run code)."
        )
    warnings.warn(f"loading a pickled module from {path}; this runs code from the file.", UnitlensWarning, stacklevel=2)
    try:
        obj = torch.load(path, map_location="cpu", weights_only=False)
    except Exception as e:  # noqa: BLE001  (unpickling runs the file's code: any failure becomes one error)
        raise UnitlensError(f"Cannot unpickle {path}: {e.__class__.__name__}: {e}") from None
    if not isinstance(obj, nn.Module):
        raise UnitlensError(f"{path} holds a {type(obj).__name__}, not a torch.nn.Module.")
    return obj, {"kind": "pickle", "path": str(path.resolve()), "sha256": _sha256(path)}


# -- layer table ---------------------------------------------------------------------------

def layer_notes(model: LoadedModel) -> list[str]:
    """What the layer table leaves out or names specially, in words (printed under `unitlens layers`)."""
    notes = ["Layers are outputs of modules; a module run several times in one forward pass gives one layer "
             "per call (name, name_1, name_2, ...). Units are channels; channels-last maps are read along "
             "their last dim."]
    from ._extract import function_outputs

    made = function_outputs(model)
    if made:
        shown = "; ".join(f"{n} -> {layer}" for n, (layer, _) in list(made.items())[:4])
        more = f" and {len(made) - 4} more" if len(made) > 4 else ""
        notes.append(f"Feature maps made by functions (torch.cat, +, F.relu) are not layers; nearest layer "
                     f"(the block returning it, else the first module applied to it): {shown}{more}.")
    tokens = model.token_layers()
    if tokens:
        first, (t, c) = next(iter(tokens.items()))
        notes.append(f"Not listed: {len(tokens)} layers output token sequences (N x T x C, e.g. {first}: "
                     f"{t} x {c}); unitlens reads {SUPPORTED} only.")
    return notes


def _layer_table(model: LoadedModel) -> tuple[dict[str, LayerInfo], dict[str, tuple[int, int]]]:
    """({layer: LayerInfo} for 4-D outputs, {layer: (T, C)} for token sequences), in execution order."""
    from ._calls import Calls
    from ._extract import observe_shapes
    from .geometry import receptive_fields

    p = model.preprocess
    shapes = observe_shapes(model, p.size)  # {layer: (shape without batch, is_block)} in execution order
    # Spatial dims follow the input size, channels do not: a second, larger input tells them apart
    # where the receptive-field trace cannot (after attention, as in Swin).
    grown = observe_shapes(model, (p.size[0] + _GROW, p.size[1] + _GROW), partial=True)
    try:
        # Squeeze-excitation gates are global, but where a unit fires is decided locally: treat
        # them like normalisation statistics, or every crop after the first gate is the whole image.
        fields = receptive_fields(_observable(model), p.size, global_context=False)
    except UnitlensError as e:
        warnings.warn(f"receptive fields unavailable: {e}", stacklevel=2)
        fields = {}
    calls = Calls(n for n, _ in _observable(model).named_modules())
    table, tokens = {}, {}
    for name, (shape, block) in shapes.items():
        if len(shape) == 3:
            layout = _layout(shape, fields.get(name), grown.get(name, (None,))[0])
            c, h, w = (shape[2], shape[0], shape[1]) if layout == "NHWC" else shape
            module, call = calls.split(name) or (name, 0)
            table[name] = LayerInfo(name, c, h, w, block, fields.get(name), layout, module, call)
        else:
            tokens[name] = shape
    return table, tokens


_GROW = 32  # px added for the second input: one more position at stride 32


def _layout(shape: tuple[int, int, int], field, grown: tuple[int, ...] | None) -> str:
    """'NCHW' or 'NHWC' for a 4-D output of per-image `shape`, '?' when nothing tells."""
    if field is not None:  # the trace followed the spatial axes through every permute
        return "NHWC" if field.channels_last else "NCHW"
    moved = {i for i in range(3) if grown is not None and len(grown) == 3 and grown[i] != shape[i]}
    if moved and moved <= {1, 2} and 2 in moved:
        return "NCHW"
    if moved and moved <= {0, 1} and 0 in moved:
        return "NHWC"
    if not moved and shape[1:] == (1, 1):  # a pooled vector: only one reading has channels
        return "NCHW"
    if not moved and shape[:2] == (1, 1):
        return "NHWC"
    return "?"


def _observable(model: LoadedModel) -> nn.Module:
    from ._extract import script_sequence

    seq = script_sequence(model.module)
    return seq if seq is not None else model.module


def layer_rows(model: LoadedModel) -> list[dict]:
    """One dict per selectable feature map (`unitlens layers --json`): shape, receptive field, kind."""
    rows = []
    for info in model.layers().values():
        f = info.field
        rows.append({
            "name": info.name, "channels": info.channels, "height": info.height, "width": info.width,
            "rf_size": max(f.size) if f else None, "rf_stride": max(f.stride) if f else None,
            "rf_offset": max(f.offset) if f else None,
            "rf_size_hw": list(f.size) if f else None, "rf_stride_hw": list(f.stride) if f else None,
            "rf_offset_hw": list(f.offset) if f else None, "rf_exact": f.exact if f else None,
            "block": info.block, "layout": info.layout, "module": info.module, "call": info.call,
        })
    return rows


def layers_text(model: LoadedModel) -> str:
    """The table `unitlens layers` prints: one line per feature map, then notes on what it shows."""
    rows = layer_rows(model)
    p = model.preprocess
    lines = [f"{model.spec}  input {p.channels}x{p.size[0]}x{p.size[1]}  ({p.source})",
             f"{'layer':<34} {'C x H x W':>16} {'field':>9} {'stride':>7} {'offset':>8}  kind"]
    reused = {r["module"] for r in rows if r["call"]}
    wide = pooled = False
    for r in rows:
        shape = f"{r['channels']}x{r['height']}x{r['width']}"
        fs = "x".join(map(str, dict.fromkeys(r["rf_size_hw"]))) if r["rf_size_hw"] else "?"
        st = "x".join(map(str, dict.fromkeys(r["rf_stride_hw"]))) if r["rf_stride_hw"] else "?"
        off = "/".join(f"{v:g}" for v in dict.fromkeys(r["rf_offset_hw"])) if r["rf_offset_hw"] else "?"
        kind = ["block" if r["block"] else "op"]
        kind += [f"call {r['call'] + 1} of {r['module']}"] if r["module"] in reused else []
        kind += {"NHWC": ["channels-last"], "?": ["layout unknown: not selectable"]}.get(r["layout"], [])
        if r["rf_stride_hw"] and 0 in r["rf_stride_hw"]:  # geometry's mark of a global pool
            fs, st, off, pooled = "global", "-", "-", True
        elif r["rf_size"] and r["rf_size"] > max(p.size):
            fs, wide = fs + "*", True
        lines.append(f"{r['name']:<34} {shape:>16} {fs:>9} {st:>7} {off:>8}  {', '.join(kind)}")
    if wide:
        lines.append(f"* wider than the {p.size_text()} px input: the field counts the padding beyond the edges; "
                     "crops are clipped to the image.")
    if pooled:
        lines.append("global: every value pools the whole input (as a global average pool does), so each "
                     "position's crop is the whole image.")
    return "\n".join(lines + layer_notes(model))
