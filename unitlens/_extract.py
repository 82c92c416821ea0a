"""Truncated forward passes: run a network only as far as the deepest requested layer.

Three strategies behind one callable, chosen once per extractor:
  fx        torchvision's graph feature extractor; layers after the requested ones are pruned
  hooks     forward hooks that stop the forward (an exception) once every layer has been seen;
            for models that do not trace (data-dependent control flow)
  sequence  a TorchScript nn.Sequential, stepped child by child (its children cannot be hooked)
"""
from __future__ import annotations

import warnings
from collections import OrderedDict

import torch
from torch import nn

from .errors import UnitlensError


class _Stop(Exception):
    pass


def script_sequence(module: nn.Module) -> nn.Sequential | None:
    """A TorchScript Sequential as a Python Sequential of its (scripted) children, else None."""
    if isinstance(module, torch.jit.ScriptModule) and getattr(module, "original_name", "") == "Sequential":
        return nn.Sequential(OrderedDict(module.named_children()))
    return None


def _not_observable(spec: str) -> UnitlensError:
    return UnitlensError(
        f"{spec} is TorchScript with a compiled forward, so its inner layers cannot be observed. "
        "Pass the architecture as torchvision:<arch> or file.py:function and its weights with --weights "
        "(torch.jit.load(f).state_dict() gives them); a scripted nn.Sequential works as it is."
    )


def observe_shapes(model, size: int | tuple[int, int]) -> dict[str, tuple[tuple[int, int, int], bool]]:
    """{name: ((C, H, W), is_block)} for every submodule whose output is 4-D, in the order produced."""
    module = model.module
    h, w = (size, size) if isinstance(size, int) else size
    x = torch.zeros(1, model.preprocess.channels, h, w)
    seen: dict[str, tuple[tuple[int, int, int], bool]] = {}
    seq = script_sequence(module)
    if isinstance(module, torch.jit.ScriptModule) and seq is None:
        raise _not_observable(model.spec)
    try:
        with torch.no_grad():
            if seq is not None:
                for name, child in seq.named_children():
                    x = child(x)
                    if isinstance(x, torch.Tensor) and x.dim() == 4:
                        seen[name] = (tuple(x.shape[1:]), False)
                return seen
            handles = []
            for name, m in module.named_modules():
                if not name:
                    continue

                def hook(_m, _i, out, name=name, block=any(True for _ in m.children())):
                    if name not in seen and isinstance(out, torch.Tensor) and out.dim() == 4:
                        seen[name] = (tuple(out.shape[1:]), block)

                handles.append(m.register_forward_hook(hook))
            try:
                module(x)
            finally:
                for h in handles:
                    h.remove()
    except UnitlensError:
        raise
    except Exception as e:
        raise UnitlensError(
            f"{model.spec} failed on a 1x3x{size}x{size} input ({e.__class__.__name__}: {e}). "
            "Check the input size (--size) and that the model takes RGB images."
        ) from None
    return seen


class Extractor:
    """x (B,3,S,S) normalised -> {layer: (B,C,H,W)}; computes nothing after the deepest layer."""

    def __init__(self, model, names: list[str]):
        self.names = list(dict.fromkeys(names))
        self.spec = model.spec
        module = model.module
        self._seq = script_sequence(module)
        if self._seq is not None:
            self.strategy = "sequence"
            order = list(dict(self._seq.named_children()))
            self._last = max(order.index(n) for n in self.names)
            return
        if isinstance(module, torch.jit.ScriptModule):
            raise _not_observable(model.spec)
        self._module = module
        self.strategy = "hooks"
        self._graph = None
        try:
            from torchvision.models.feature_extraction import create_feature_extractor

            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                self._graph = create_feature_extractor(module, return_nodes={n: n for n in self.names})
            self._graph.eval()
            self.strategy = "fx"
        except Exception:  # does not trace: fall back to hooks with an early exit
            self._graph = None

    def __call__(self, x: torch.Tensor) -> dict[str, torch.Tensor]:
        if self.strategy == "fx":
            return dict(self._graph(x))
        if self.strategy == "sequence":
            out = {}
            for k, (name, child) in enumerate(self._seq.named_children()):
                x = child(x)
                if name in self.names:
                    out[name] = x
                if k == self._last:
                    break
            return out
        return self._hooked(x)

    def _hooked(self, x):
        out: dict[str, torch.Tensor] = {}
        wanted = set(self.names)

        def hook(_m, _i, o, name):
            if name not in out:
                out[name] = o
            if len(out) == len(wanted):
                raise _Stop

        handles = [
            self._module.get_submodule(n).register_forward_hook(lambda m, i, o, n=n: hook(m, i, o, n))
            for n in self.names
        ]
        try:
            self._module(x)
        except _Stop:
            pass
        finally:
            for h in handles:
                h.remove()
        missing = wanted - set(out)
        if missing:
            raise UnitlensError(f"Layers {sorted(missing)} produced no output in {self.spec}.")
        return out


def make_extractor(model, names: list[str]) -> Extractor:
    return Extractor(model, names)


def forward_batch(extractor, x: torch.Tensor) -> dict[str, torch.Tensor]:
    """Run the truncated model. A batch of one is padded to two: the CPU convolution library takes
    another code path for a single image whose results differ in the last bits, and mining must
    give the same scores whatever the batch size (a final partial batch is often one image)."""
    if x.shape[0] != 1:
        return extractor(x)
    return {k: v[:1] for k, v in extractor(torch.cat([x, x])).items()}
