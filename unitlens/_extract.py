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

from ._calls import Calls
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


def observe_shapes(model, size: int | tuple[int, int], *,
                   partial: bool = False) -> dict[str, tuple[tuple[int, ...], bool]]:
    """{layer: (shape without the batch dim, is_block)} for every call of a submodule whose output
    is a 3-D or 4-D tensor, in the order produced; a module called k times gives k layers (_calls).

    `partial`: a model that fails on this size (a fixed input size, a classifier sized for one
    input) still tells the shapes of the layers it produced before failing."""
    module = model.module
    h, w = (size, size) if isinstance(size, int) else size
    param = next((p for p in module.parameters() if p.is_floating_point()), None)
    x = torch.zeros(1, model.preprocess.channels, h, w, dtype=param.dtype if param is not None else None)
    seen: dict[str, tuple[tuple[int, ...], bool]] = {}
    seq = script_sequence(module)
    if isinstance(module, torch.jit.ScriptModule) and seq is None:
        raise _not_observable(model.spec)
    try:
        with torch.no_grad():
            if seq is not None:
                for name, child in seq.named_children():
                    x = child(x)
                    if isinstance(x, torch.Tensor) and x.dim() in (3, 4):
                        seen[name] = (tuple(x.shape[1:]), False)
                return seen
            names = [n for n, _ in module.named_modules()]
            calls, handles = Calls(names), []
            for name, m in module.named_modules():
                if not name:
                    continue

                def hook(_m, _i, out, name=name, block=any(True for _ in m.children())):
                    layer = calls.next(name)
                    if isinstance(out, torch.Tensor) and out.dim() in (3, 4):
                        seen[layer] = (tuple(out.shape[1:]), block)

                handles.append(m.register_forward_hook(hook))
            try:
                module(x)
            finally:
                for h in handles:
                    h.remove()
    except UnitlensError:
        raise
    except Exception as e:  # noqa: BLE001  (whatever the model raises becomes one error)
        if partial:
            return seen
        raise UnitlensError(
            f"{model.spec} failed on a 1x{model.preprocess.channels}x{h}x{w} input ({e.__class__.__name__}: {e}). "
            "Check the input size (--size) and the number of input channels (--mean/--std take one number each)."
        ) from None
    return seen


def _clone_outputs(graph) -> None:
    """Copy each returned value right after the node that makes it: a later in-place op (ResNet's
    ReLU(inplace=True) after bn1) would otherwise change what an earlier layer reports."""
    g = graph.graph
    out = next(n for n in g.nodes if n.op == "output")
    for src in list(dict.fromkeys(out.all_input_nodes)):
        with g.inserting_after(src):
            copy = g.call_method("clone", (src,))
        out.replace_input_with(src, copy)
    graph.recompile()


def _traced(module: nn.Module):
    """torchvision's traced graph of `module`: [(node, node name)] in order, and {node: layer name}
    for module calls. Its node names differ from ours where a module is called twice or is named
    like a repeated call (a module 'act_1' beside 'act'), so module calls are named by target."""
    from torchvision.models import feature_extraction as fe

    tracer = fe.NodePathTracer(**fe._set_default_tracer_kwargs(None))
    graph = tracer.trace(module)
    calls, layer_of = Calls(n for n, _ in module.named_modules()), {}
    for node in tracer.node_to_qualname:
        if node.op == "call_module":
            layer_of[node] = calls.next(node.target)
    return graph, list(tracer.node_to_qualname.items()), layer_of


def _layer_qualnames(order, layer_of, layers: dict[str, tuple[str, int]], reused: set[str]) -> dict[str, str]:
    """{layer: graph node name} for `layers` ({layer: (module, call)}); several layers may share a
    node (a block and its last op)."""
    qualname = dict(order)
    node_of = {layer: qualname[node] for node, layer in layer_of.items()}
    leaves = {node.target for node in layer_of}
    nodes = {}
    for layer, (mod, k) in layers.items():
        if layer in node_of:
            nodes[layer] = node_of[layer]
        elif k == 0 and mod not in reused and mod not in leaves:
            # a block: its output is the last node inside it, as torchvision reads blocks
            nodes[layer] = [q for _, q in order if q.startswith(mod + ".")][-1]  # IndexError: none inside
        else:
            raise LookupError(f"{layer}: no graph node is this call")
    return nodes


def layer_nodes(module: nn.Module, layers: dict[str, tuple[str, int]], reused: set[str]):
    """The traced graph of `module` and {layer: its node} for `layers` (links.py cuts the graph there)."""
    graph, order, layer_of = _traced(module)
    names = _layer_qualnames(order, layer_of, layers, reused)
    by_name = {q: node for node, q in order}
    return graph, {layer: by_name[q] for layer, q in names.items()}


def _fx_graph(module: nn.Module, layers: dict[str, tuple[str, int]], reused: set[str]):
    """torchvision's graph feature extractor for `layers` ({layer: (module, call)}), and
    {layer: graph node name}; several layers may share a node (a block and its last op)."""
    from torchvision.models import feature_extraction as fe

    _, order, layer_of = _traced(module)
    nodes = _layer_qualnames(order, layer_of, layers, reused)
    graph = fe.create_feature_extractor(module, return_nodes={q: q for q in set(nodes.values())})
    _clone_outputs(graph)
    return graph.eval(), nodes


def function_outputs(model) -> dict[str, tuple[str, str]]:
    """{graph node name: (nearest layer, how it relates)} for feature maps made by functions in a
    forward (torch.cat, x + y, F.relu): they are not module outputs, so not layers. Empty when the
    model does not trace. The nearest layer is the block returning the map, else the first module
    applied to it."""
    from torch.fx.passes.shape_prop import ShapeProp

    table = model.layers()
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            graph, order, layer_of = _traced(model.module)
            gm = torch.fx.GraphModule(model.module, graph)
            p = next(iter(model.module.parameters()), torch.zeros(()))  # the input's dtype and device
            ShapeProp(gm).propagate(torch.zeros(1, model.preprocess.channels, *model.preprocess.size,
                                                dtype=p.dtype, device=p.device))
    except Exception:  # noqa: BLE001  (does not trace: the hooks see module outputs only)
        return {}
    out = {}
    for node, name in order:
        shape = getattr(node.meta.get("tensor_meta"), "shape", None)
        if node.op not in ("call_function", "call_method") or shape is None or len(shape) != 4:
            continue
        block = name.rpartition(".")[0]
        inside = [q for _, q in order if q.startswith(block + ".")]
        if block in table and inside and inside[-1] == name:
            out[name] = (block, f"{block} returns it")
            continue
        todo, seen = list(node.users), set()
        while todo:  # breadth first through functions to the first module applied to it
            user = todo.pop(0)
            if user in seen:
                continue
            seen.add(user)
            if user in layer_of and layer_of[user] in table:
                out[name] = (layer_of[user], "the first module applied to it")
                break
            todo += list(user.users)
    return out


class Extractor:
    """x (B,3,S,S) normalised -> {layer: (B,C,H,W)}; computes nothing after the deepest layer.

    Channels-last layers (B,H,W,C), e.g. inside ConvNeXt blocks and all of Swin, are returned
    permuted to (B,C,H,W), so every consumer reads units along dim 1."""

    def __init__(self, model, names: list[str], channels_last=(), reused=()):
        self.names = list(dict.fromkeys(names))
        self.spec = model.spec
        self._last = set(channels_last)
        module = model.module
        self._seq = script_sequence(module)
        if self._seq is not None:
            self.strategy = "sequence"
            order = list(dict(self._seq.named_children()))
            self._end = max(order.index(n) for n in self.names)
            return
        if isinstance(module, torch.jit.ScriptModule):
            raise _not_observable(model.spec)
        self._module = module
        self._modules = [n for n, _ in module.named_modules()]
        calls = Calls(self._modules)
        self._calls = {n: calls.split(n) for n in self.names}
        self.strategy = "hooks"
        self._graph = None
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                self._graph, self._nodes = _fx_graph(module, self._calls, set(reused))
            self.strategy = "fx"
        except Exception:  # noqa: BLE001  (does not trace: fall back to hooks with an early exit)
            self._graph = None

    def __call__(self, x: torch.Tensor) -> dict[str, torch.Tensor]:
        if self.strategy == "fx":
            got = self._graph(x)
            out = {n: got[q] for n, q in self._nodes.items()}
        elif self.strategy == "sequence":
            out = {}
            for k, (name, child) in enumerate(self._seq.named_children()):
                x = child(x)
                if name in self.names:
                    out[name] = x.clone()  # the next child may work in place
                if k == self._end:
                    break
        else:
            out = self._hooked(x)
        return {n: v.permute(0, 3, 1, 2) if n in self._last else v for n, v in out.items()}

    def _hooked(self, x):
        out: dict[str, torch.Tensor] = {}
        wanted = set(self.names)
        calls = Calls(self._modules)

        def hook(_m, _i, o, module):
            layer = calls.next(module)
            if layer in wanted and layer not in out:
                out[layer] = o.clone()  # a later in-place op must not change it
            if len(out) == len(wanted):
                raise _Stop

        handles = [
            self._module.get_submodule(m).register_forward_hook(lambda _m, i, o, m=m: hook(_m, i, o, m))
            for m in dict.fromkeys(m for m, _ in self._calls.values())
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


def make_extractor(model, names: list[str], channels_last=(), reused=()) -> Extractor:
    return Extractor(model, names, channels_last, reused)


def forward_batch(extractor, x: torch.Tensor) -> dict[str, torch.Tensor]:
    """Run the truncated model. A batch of one is padded to two: the CPU convolution library takes
    another code path for a single image whose results differ in the last bits, and mining must
    give the same scores whatever the batch size (a final partial batch is often one image)."""
    if x.shape[0] != 1:
        return extractor(x)
    return {k: v[:1] for k, v in extractor(torch.cat([x, x])).items()}
