"""Model specs, safe weight loading, preprocessing and the layer table.

A model spec is one of
  ``torchvision:<arch>``      any classification architecture in torchvision.models
  ``path/to/file.py:function`` the user's own code; ``function()`` returns an nn.Module
  ``path/to/model.pt``         a TorchScript archive (or, with ``allow_pickle``, a pickled module)
"""
from __future__ import annotations

import hashlib
import importlib.util
import pickle
import sys
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import torch
from torch import nn

from .errors import UnitlensError, UnitlensWarning, closest

IMAGENET_MEAN = (0.485, 0.456, 0.406)
IMAGENET_STD = (0.229, 0.224, 0.225)


@dataclass(frozen=True)
class Preprocess:
    """How an image becomes a network input: shorter side resized to `size`, centre crop, normalised."""

    size: int
    mean: tuple[float, float, float]
    std: tuple[float, float, float]
    source: str  # where these numbers came from, shown in the manifest and the atlas


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
                maps = self.extractor(names)(torch.zeros(1, 3, size, size))
        except UnitlensError:
            raise
        except Exception as e:
            maps = f"{e.__class__.__name__}: {str(e)[:200]}"
        if isinstance(maps, str) or any(0 in v.shape[2:] for v in maps.values()):
            why = maps if isinstance(maps, str) else "a feature map is empty"
            p = self.preprocess.size
            raise UnitlensError(f"{self.spec} does not take {size}x{size} images up to {', '.join(names)} "
                                f"({why}); its input size is {p}x{p}. Use --size {p}, or leave --size out.")

    def normalize(self, images: torch.Tensor) -> torch.Tensor:
        """uint8 (B,3,H,W) or float in [0,1] -> normalised network input (float32)."""
        x = images.float()
        if images.dtype == torch.uint8:
            x = x / 255.0
        mean = torch.tensor(self.preprocess.mean, dtype=x.dtype, device=x.device).view(1, 3, 1, 1)
        std = torch.tensor(self.preprocess.std, dtype=x.dtype, device=x.device).view(1, 3, 1, 1)
        return (x - mean) / std

    def describe(self) -> dict:
        p = self.preprocess
        return {
            "spec": self.spec,
            "weights": self.weights,
            "arch_options": self.arch_options,
            "preprocess": {"size": p.size, "mean": list(p.mean), "std": list(p.std), "source": p.source},
        }


# -- loading -------------------------------------------------------------------------------

def load_model(
    spec: str,
    weights: str | None = None,
    *,
    size: int | None = None,
    mean: tuple[float, float, float] | None = None,
    std: tuple[float, float, float] | None = None,
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
    elif ".py:" in spec:
        if arch_options:
            raise UnitlensError("Architecture options apply to torchvision:<arch> models only.")
        module, declared = _user_code(spec)
        file, func = spec.rsplit(":", 1)
        spec = f"{Path(file).resolve()}:{func}"  # a run folder must find the code from any directory
        wdesc = _load_weights_file(module, weights) if weights else {"kind": "none"}
        pre = _declared_preprocess(declared, Path(file).name)
    elif Path(spec).is_file():
        if weights:
            raise UnitlensError(
                f"'{spec}' is a whole model file; --weights is for architectures given as "
                "torchvision:<arch> or file.py:function."
            )
        module, wdesc = _model_file(Path(spec), allow_pickle)
        pre = Preprocess(224, IMAGENET_MEAN, IMAGENET_STD, "ImageNet statistics (default)")
    else:
        raise UnitlensError(_bad_spec_message(spec))

    overridden = [k for k, v in (("size", size), ("mean", mean), ("std", std)) if v is not None]
    if overridden:
        pre = Preprocess(
            size or pre.size,
            tuple(mean) if mean else pre.mean,
            tuple(std) if std else pre.std,
            pre.source + f"; overridden: {', '.join(overridden)}",
        )
    if pre.size < 16:
        raise UnitlensError(f"Input size {pre.size} is too small (at least 16 px).")
    for name, v in (("mean", pre.mean), ("std", pre.std)):
        if len(v) != 3:
            raise UnitlensError(f"--{name} needs three numbers (R,G,B), got {len(v)}.")
    if any(s <= 0 for s in pre.std):
        raise UnitlensError(f"--std values must be positive, got {list(pre.std)}.")
    module.eval()
    for p in module.parameters():
        p.requires_grad_(False)
    return LoadedModel(spec, module, pre, wdesc, arch_options)


def _bad_spec_message(spec: str) -> str:
    import torchvision

    hint = ""
    if spec in torchvision.models.list_models(module=torchvision.models):
        hint = f" Did you mean torchvision:{spec}?"
    elif ":" in spec and not spec.split(":", 1)[0].endswith(".py"):
        hint = " User code is given as path/to/file.py:function."
    return (
        f"Cannot understand model '{spec}'.{hint} Valid forms: torchvision:<arch> (e.g. "
        "torchvision:resnet50), path/to/file.py:function, or an existing TorchScript file."
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
        pre = Preprocess(int(t.crop_size[0]), tuple(t.mean), tuple(t.std), f"torchvision metadata of {w}")
        return module, {"kind": "torchvision", "name": str(w), "url": w.url}, pre, options

    t = enum.DEFAULT.transforms()
    pre = Preprocess(
        int(t.crop_size[0]), tuple(t.mean), tuple(t.std),
        f"torchvision metadata of {enum.DEFAULT} (the architecture's default recipe)",
    )
    build = _builder(arch, options)
    if not weights:
        return build(), {"kind": "none"}, pre, options

    sd = _read_state_dict(Path(weights))
    # Adapt the constructor to what the checkpoint holds: a fine-tuned head, or no auxiliary heads.
    module = build()
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
    return module, _apply_state_dict(module, sd, Path(weights)), pre, options


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
    except Exception as e:
        raise UnitlensError(f"Cannot read weights file {path}: {e.__class__.__name__}: {e}") from None
    if isinstance(obj, dict):
        for key in ("state_dict", "model_state_dict", "model"):
            if key in obj and isinstance(obj[key], dict):
                obj = obj[key]
                break
    if not isinstance(obj, dict) or not all(isinstance(v, torch.Tensor) for v in obj.values()):
        raise UnitlensError(f"{path} is not a state dict (a mapping of names to tensors).")
    if obj and all(k.startswith("module.") for k in obj):  # saved from DataParallel / DDP
        obj = {k[len("module."):]: v for k, v in obj.items()}
    return obj


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _apply_state_dict(module: nn.Module, sd: dict, path: Path) -> dict:
    own = module.state_dict()
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
            f"Weights in {path} do not fit the model: " + "; ".join(parts) + ". "
            "Check the architecture, or pass constructor options with --arch-option key=value."
        )
    module.load_state_dict(sd, strict=True)
    return {"kind": "file", "path": str(path.resolve()), "sha256": _sha256(path)}


def _load_weights_file(module: nn.Module, weights: str) -> dict:
    return _apply_state_dict(module, _read_state_dict(Path(weights)), Path(weights))


def _declared_preprocess(declared, file: str) -> Preprocess:
    """A user's code file may declare its input: PREPROCESS = {"size": 96, "mean": (..), "std": (..)}."""
    if declared is None:
        return Preprocess(224, IMAGENET_MEAN, IMAGENET_STD, "ImageNet statistics (default)")
    if not isinstance(declared, dict) or not set(declared) <= {"size", "mean", "std"}:
        raise UnitlensError(f"PREPROCESS in {file} must be a dict with keys size, mean, std; got {declared!r}.")
    try:
        return Preprocess(int(declared.get("size", 224)), tuple(float(v) for v in declared.get("mean", IMAGENET_MEAN)),
                          tuple(float(v) for v in declared.get("std", IMAGENET_STD)), f"PREPROCESS in {file}")
    except (TypeError, ValueError):
        raise UnitlensError(f"PREPROCESS in {file} needs an integer size and three numbers each for mean and std; "
                            f"got {declared!r}.") from None


def _user_code(spec: str) -> tuple[nn.Module, object]:
    """The module built by `function()` in the file, and the file's PREPROCESS declaration (or None)."""
    file, func = spec.rsplit(":", 1)
    path = Path(file)
    if not path.is_file():
        raise UnitlensError(f"Model code file not found: {file}")
    name = f"unitlens_user_{hashlib.sha1(str(path.resolve()).encode()).hexdigest()[:10]}"
    mod_spec = importlib.util.spec_from_file_location(name, path)
    mod = importlib.util.module_from_spec(mod_spec)
    sys.modules[name] = mod  # lets dataclasses / pickling inside user code find their module
    try:
        mod_spec.loader.exec_module(mod)
    except Exception as e:
        raise UnitlensError(f"Importing {file} failed: {e.__class__.__name__}: {e}") from None
    fn = getattr(mod, func, None)
    if not callable(fn):
        found = [n for n in dir(mod) if callable(getattr(mod, n)) and not n.startswith("_")]
        near = closest(func, found)
        hint = f" Closest: {', '.join(near)}." if near else ""
        raise UnitlensError(f"{file} has no function '{func}'.{hint}")
    try:
        module = fn()
    except Exception as e:
        raise UnitlensError(f"{spec}() failed: {e.__class__.__name__}: {e}") from None
    if not isinstance(module, nn.Module):
        raise UnitlensError(f"{spec}() returned {type(module).__name__}, not a torch.nn.Module.")
    return module, getattr(mod, "PREPROCESS", None)


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
    except Exception as e:
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

    size = model.preprocess.size
    shapes = observe_shapes(model, size)  # {layer: (shape without batch, is_block)} in execution order
    # Spatial dims follow the input size, channels do not: a second, larger input tells them apart
    # where the receptive-field trace cannot (after attention, as in Swin).
    grown = observe_shapes(model, size + _GROW, partial=True)
    try:
        # Squeeze-excitation gates are global, but where a unit fires is decided locally: treat
        # them like normalisation statistics, or every crop after the first gate is the whole image.
        fields = receptive_fields(_observable(model), (size, size), global_context=False)
    except UnitlensError as e:
        warnings.warn(f"receptive fields unavailable: {e}")
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
