"""Receptive fields of conv-net feature maps: which input pixels one feature position sees.

Per axis a field is (r, S, P): position y sees input rows [y*S - P, y*S - P + r - 1]
(Araujo, Norris & Sim 2019, "Computing Receptive Fields of Convolutional Neural Networks",
Distill, doi:10.23915/distill.00021). Pixels are 0-based and pixel i is centred at i.

How: one forward pass on zeros under a TorchDispatchMode, which sees every aten op whether
it comes from a module, a functional call or TorchScript code. Each tensor computed from the
input carries a geometry: where its two spatial axes live and, per axis, the span of
position 0 plus the stride. Window ops (convolution, pooling, padding, slicing) compose it
with the paper's recurrence; resampling ops (adaptive pooling, interpolation) are probed on
one-hot rows; any other op is taken as elementwise or channel-only and gets the union of its
inputs' spans, unless it names a spatial dim (a reduction or softmax over H: the whole axis;
anything else, e.g. cat along W: unknown). Ops that move pixels in ways we do not model
make a map unknown, and asking for it raises, so nobody gets a silently wrong box.
Forward hooks say which module produced which tensor.

Conventions:
- Normalisation statistics (batch/group/layer norm) count as constants, as in the usual
  receptive-field definition. Global pooling does not: a map gated by a squeeze-excitation
  branch depends on the whole image and gets stride 0 (every position sees the same box),
  unless global_context=False asks to treat such gates as constants too.
- Reflect/replicate padding is treated like zero padding (border boxes leave the image).
- A module called several times (a shared ReLU) gives one layer per call, named as in
  unitlens._calls (``relu``, ``relu_1``, ...).
- Maps may be channels-first (B, C, H, W) or channels-last (B, H, W, C), as inside ConvNeXt
  blocks; the tracer knows which dims are spatial, and `Field.channels_last` says which.
"""
from __future__ import annotations

import math
import re
import weakref
from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np
import torch
from torch.utils._python_dispatch import TorchDispatchMode
from torch.utils._pytree import tree_leaves, tree_map_only

from unitlens._calls import Calls
from unitlens.errors import UnitlensError, closest


@dataclass(frozen=True)
class Field:
    """Receptive field of one feature map. Per axis: (rows, cols)."""
    size: tuple[int, int]      # r: input pixels seen by one feature position (h, w)
    stride: tuple[int, int]    # S: input pixels between neighbouring positions (0: all see one box)
    padding: tuple[int, int]   # P: feature position y sees input rows [y*S - P, y*S - P + r - 1]
    exact: bool = True         # False when the box is a covering (a superset), not the exact span
    channels_last: bool = field(default=False, repr=False)  # the map is (B, H, W, C), not (B, C, H, W)

    @property
    def offset(self) -> tuple[float, float]:
        """Centre of position 0 in input coordinates: (r - 1)/2 - P."""
        return tuple((r - 1) / 2 - p for r, p in zip(self.size, self.padding))

    def box(self, y: int, x: int) -> tuple[int, int, int, int]:
        """(x0, y0, x1, y1) in input pixels, x1/y1 exclusive, NOT clipped to the image.

        >>> Field(size=(3, 3), stride=(2, 2), padding=(1, 1)).box(0, 0)
        (-1, -1, 2, 2)
        """
        y0 = y * self.stride[0] - self.padding[0]
        x0 = x * self.stride[1] - self.padding[1]
        return (x0, y0, x0 + self.size[1], y0 + self.size[0])


def receptive_fields(module: torch.nn.Module, input_size: int | tuple[int, int],
                     layers: Iterable[str] | None = None, *,
                     global_context: bool = True) -> dict[str, Field]:
    """Field of every submodule call whose output is a 4-D map, for an (h, w) input.

    Names are those of ``module.named_modules()`` ('layer3', 'features.10', '' for the root);
    a module called several times gives one name per call ('relu', 'relu_1', see _calls).
    Maps may be (B, C, H, W) or (B, H, W, C) (``Field.channels_last``).
    ``layers`` restricts the result (and the checks) to those names. The inside of a
    TorchScript module cannot be observed: only its own output is reported.
    ``global_context=False`` treats inputs shared by every position (squeeze-excitation
    gates, pooled context) as constants, like normalisation statistics, so fields stay local;
    with True, such maps see the whole image (stride 0), as their gradients do.

    >>> import torchvision
    >>> receptive_fields(torchvision.models.resnet18(), 224)["layer4"]
    Field(size=(435, 435), stride=(32, 32), padding=(217, 217), exact=True)
    """
    h, w = (input_size, input_size) if isinstance(input_size, int) else tuple(input_size)
    if not all(isinstance(v, int) and v > 0 for v in (h, w)):
        raise UnitlensError(f"input_size must be a positive int or (h, w), got {input_size!r}.")
    scripted = isinstance(module, torch.jit.ScriptModule)
    names = [""] if scripted else [n for n, _ in module.named_modules()]
    wanted = None if layers is None else [layers] if isinstance(layers, str) else list(layers)
    calls = Calls(names)
    for n in wanted or ():
        if calls.split(n) is None:
            hint = ", ".join(closest(n, names)) or "none"
            raise UnitlensError(f"Unknown layer {n!r} in {type(module).__name__}. Closest: {hint}."
                                + (" TorchScript modules expose only their output ('')."
                                   if scripted else ""))
    hooked = set(names) if wanted is None else {calls.split(n)[0] for n in wanted}
    param = next((p for p in module.parameters() if p.is_floating_point()), None)
    dtype, device = (param.dtype, param.device) if param is not None else (None, None)
    first_conv = next((m for m in module.modules() if isinstance(m, torch.nn.Conv2d)), None)
    channels = first_conv.in_channels if first_conv is not None else next(
        (p.shape[1] for p in module.parameters() if p.ndim == 4), 3)
    shape = (1, channels, h, w)
    modes = {m: m.training for m in module.modules()}
    try:
        module.eval()  # batch statistics would mix positions, and must not be updated
        try:  # shapes are all we need: meta tensors skip the arithmetic and the memory
            x = torch.zeros(shape, dtype=dtype, device="meta")
            seen = _trace(module, x, hooked, names, _Tracer(True, global_context))
        except Exception:  # noqa: BLE001  (an op without a meta kernel, or data-dependent control flow)
            seen = _trace(module, torch.zeros(shape, dtype=dtype, device=device), hooked,
                          names, _Tracer(False, global_context))
    except Exception as e:
        raise UnitlensError(f"Running {type(module).__name__} on a zero image of shape "
                            f"{shape} failed: {e}") from e
    finally:
        for m, training in modes.items():
            m.train(training)
    fields = {}
    for n in seen if wanted is None else wanted:
        g = seen.get(n)
        if isinstance(g, _Unknown):
            if layers is None:  # a table of every layer: leave out the ones we cannot model
                continue
            raise UnitlensError(f"Cannot compute the receptive field of {n!r}: it depends on "
                                f"{g.op}, which moves pixels in a way unitlens does not model. "
                                "Choose a layer before that op.")
        dims = None if g is None or g.pos is None else [(p.dim, p.inner) for p in g.pos]
        if g is None or dims not in (None, [(2, 1), (3, 1)], [(1, 1), (2, 1)]):
            # not computed from the image, or neither (B, C, H, W) nor (B, H, W, C)
            if layers is not None:
                raise UnitlensError(f"Layer {n!r} does not output a 4-D feature map (B, C, H, W) or "
                                    "(B, H, W, C) computed from the image, so it has no receptive field.")
            continue
        ax = _global(g) if g.pos is None else g.ax
        fields[n] = Field(size=tuple(a.hi - a.lo + 1 for a in ax), stride=tuple(a.S for a in ax),
                          padding=tuple(-a.lo for a in ax), exact=g.exact,
                          channels_last=dims == [(1, 1), (2, 1)])
    return fields


class _Watch(torch.nn.Module):
    """Stands in for a TorchScript child (which cannot be hooked) and reports its output."""

    def __init__(self, inner, name, record):
        super().__init__()
        self.inner, self.name, self.record = inner, name, record

    def forward(self, *args, **kwargs):
        out = self.inner(*args, **kwargs)
        self.record(self.name, self, args, out)
        return out


def _trace(module, x: torch.Tensor, hooked: set[str], names: list[str], tracer) -> dict:
    """Geometry of the 4-D output of every call of the `hooked` modules, after one forward
    pass on x, by layer name (one per call, see unitlens._calls)."""
    seen, calls = {}, Calls(names)
    scripted = isinstance(module, torch.jit.ScriptModule)
    tracer.put(x, _Geo((_Pos(2, 1, x.shape[2]), _Pos(3, 1, x.shape[3])), (_Axis(1, 0, 0),) * 2, True))

    def record(name, _mod, _args, out):
        layer = calls.next(name)
        if isinstance(out, torch.Tensor) and out.ndim == 4:
            seen[layer] = tracer.get(out)     # snapshot: later in-place ops change the entry

    mods = [] if scripted else list(module.named_modules())
    hooks = [m.register_forward_hook(lambda *a, n=n: record(n, *a)) for n, m in mods
             if n in hooked and not isinstance(m, torch.jit.ScriptModule)]
    swapped = [(parent, leaf, child) for n, parent in mods
               if not isinstance(parent, torch.jit.ScriptModule)
               for leaf, child in parent.named_children()
               if isinstance(child, torch.jit.ScriptModule)]
    for parent, leaf, child in swapped:  # e.g. a Python Sequential of scripted blocks
        name = next(n for n, m in mods if m is parent)
        parent._modules[leaf] = _Watch(child, f"{name}.{leaf}".lstrip("."), record)
    try:
        with torch.no_grad(), tracer:
            out = module(x)
    finally:
        for handle in hooks:
            handle.remove()
        for parent, leaf, child in swapped:
            parent._modules[leaf] = child
    if scripted:
        record("", module, (x,), out)
    return seen


# --- geometry of one tensor ------------------------------------------------------------

class _Axis(NamedTuple):
    """One spatial axis: position y sees input pixels [y*S + lo, y*S + hi]."""
    S: int
    lo: int
    hi: int

    def window(self, k: int, s: int, p: int, d: int = 1) -> _Axis:
        # Output u reads positions u*s - p ... u*s - p + d*(k-1): the paper's recurrence
        # r' = r + (k_eff - 1)*S, S' = S*s, P' = P + p*S, written on the span of position 0.
        return _Axis(self.S * s, self.lo - p * self.S, self.hi + (d * (k - 1) - p) * self.S)

    def spans(self, idx) -> tuple[np.ndarray, np.ndarray]:
        idx = np.asarray(idx)
        return idx * self.S + self.lo, idx * self.S + self.hi


class _Pos(NamedTuple):
    """Where a spatial axis lives: index = (i // inner) % size along tensor dim `dim`.
    inner > 1 once a view merged it with later dims: (B, H, W, C) -> (B*H*W, C) in ConvNeXt."""
    dim: int
    inner: int
    size: int


class _Geo(NamedTuple):
    pos: tuple[_Pos, _Pos] | None   # None: every element sees the same box (a global feature)
    ax: tuple[_Axis, _Axis]
    exact: bool


class _Unknown(NamedTuple):
    op: str


def _global(g: _Geo) -> tuple[_Axis, _Axis]:
    """Union over all positions of a map: what a global reduction of it sees."""
    if g.pos is None:
        return g.ax
    return tuple(_Axis(0, a.lo, a.hi + (p.size - 1) * a.S) for a, p in zip(g.ax, g.pos))


def _cover(y, lo, hi, single_stride: int = 0) -> tuple[_Axis, bool] | None:
    """Tightest integer (S, lo, hi) whose boxes contain span [lo[i], hi[i]] of position y[i],
    and whether it is exact. None when no stride fits within one stride of slack.
    A single position has no stride of its own: `single_stride` is kept for it."""
    y, lo, hi = (np.asarray(v, dtype=np.int64) for v in (y, lo, hi))
    if len(y) == 1:
        return _Axis(single_stride, int(lo[0]), int(hi[0])), True
    slopes = [(v[-1] - v[0]) / (y[-1] - y[0]) for v in (lo, hi)]
    cands = [_Axis(S, int((lo - S * y).min()), int((hi - S * y).max()))
             for S in {f(s) for s in slopes for f in (math.floor, math.ceil)} if S >= 0]
    if not cands:
        return None
    best = min(cands, key=lambda a: (a.hi - a.lo, -a.S))
    if best.hi - best.lo > (hi - lo).max() + best.S:
        return None
    got_lo, got_hi = best.spans(y)
    return best, bool((got_lo == lo).all() and (got_hi == hi).all())


def _union(axes) -> tuple[_Axis, _Axis]:
    """One box holding all the given (h, w) position-independent boxes."""
    return tuple(_Axis(0, min(a[i].lo for a in axes), max(a[i].hi for a in axes)) for i in range(2))


def _view(g: _Geo, shape_in, shape_out) -> _Geo | None:
    """Views keep the flat element order, so an axis keeps its suffix (elements after it)."""
    if g.pos is None:
        return g
    new = []
    for p in g.pos:
        suffix = p.inner * math.prod(shape_in[p.dim + 1:])
        for d in range(len(shape_out)):
            after = math.prod(shape_out[d + 1:])
            if suffix % after == 0 and shape_out[d] % (suffix // after * p.size) == 0:
                new.append(_Pos(d, suffix // after, p.size))
                break
        else:  # the axis was split across dims: only a flat feature vector is still meaningful
            return _Geo(None, _global(g), g.exact) if len(shape_out) <= 2 else None
    return g._replace(pos=tuple(new))


def _probe(func, args, kwargs, src: torch.Tensor, dim: int) -> tuple[np.ndarray, np.ndarray]:
    """First and last input index read by each output index of a resampling op along `dim`
    (2 or 3 of a 4-D map), found by running the op on one-hot rows in float64."""
    n, dev, hits = src.shape[dim], "cpu" if src.is_meta else src.device, []
    eye = torch.eye(n, dtype=torch.float64, device=dev)
    chunk = max(1, 2 ** 22 // math.prod(src.shape[2:]))   # keeps each probe near 32 MB
    for start in range(0, n, chunk):
        rows = eye[start:start + chunk]                                     # (k, n)
        shape = (len(rows), 1, n, 1) if dim == 2 else (len(rows), 1, 1, n)
        y = func(rows.view(shape).expand(len(rows), 1, *src.shape[2:]), *args[1:], **kwargs)
        y = y[0] if isinstance(y, tuple) else y                             # (k, 1, H', W')
        hits.append(y.abs().amax(dim=(1, 5 - dim)) > 0)                     # (k, n_out)
    hit = torch.cat(hits).cpu().numpy()                                     # (n, n_out)
    return hit.argmax(0), n - 1 - hit[::-1].argmax(0)


def _transposed(a: _Axis, n_in: int, n_out: int, k: int, s: int, p: int, d: int):
    """Transposed conv: output y receives input x when y = x*s - p + j*d for some j < k."""
    y = np.arange(n_out)
    first = np.maximum(0, -(-(y + p - d * (k - 1)) // s))
    last = np.minimum(n_in - 1, (y + p) // s)
    ok = first <= last                       # other outputs see only the bias
    return _cover(y[ok], a.spans(first[ok])[0], a.spans(last[ok])[1])


# --- the tracer ---------------------------------------------------------------------------

_WINDOW = re.compile(r"(max|avg)_pool([123])d(_with_indices)?|_?convolution")
_PAD = re.compile(r"constant_pad_nd|(reflection|replication)_pad[123]d|_pad_circular")
_RESAMPLE = re.compile(r"_?upsample_\w+2d(_aa)?|_?adaptive_(avg|max)_pool2d")
_VIEWS = {"view", "_unsafe_view", "reshape", "_reshape_alias", "unsqueeze", "squeeze",
          "flatten", "unflatten", "alias", "view_as"}
# Ops along a dim whose every output depends on the whole input axis.
_REDUCE = {"mean", "sum", "amax", "amin", "max", "min", "var", "std", "var_mean", "std_mean",
           "norm", "linalg_vector_norm", "logsumexp", "prod", "any", "all", "argmax", "argmin",
           "median", "nanmean", "nansum"}
_MIX_ALONG = {"_softmax", "_log_softmax", "cumsum", "cumprod", "cummax", "cummin",
              "logcumsumexp", "sort", "topk"}
# Ops that read positions chosen by data or by strides, whatever the shapes say.
_UNMODELLED = {"grid_sampler_2d", "grid_sampler", "cudnn_grid_sampler", "as_strided", "take",
               "unfold", "flip", "roll", "rot90", "_unsafe_index"}
_INDEX = {"index", "index_put", "index_put_", "_index_put_impl_"}
_MATMUL = {"mm": "self", "addmm": "mat1", "bmm": "self", "baddbmm": "batch1", "addbmm": "batch1"}


def _named(func, args, kwargs) -> dict:
    """Arguments by schema name, defaults filled in."""
    schema = func._schema.arguments
    out = {a.name: a.default_value for a in schema if a.has_default_value()}
    out.update(zip((a.name for a in schema), args))
    out.update(kwargs)
    return out


def _per_dim(v, n: int) -> list[int]:
    v = [v] if isinstance(v, int) else list(v)
    return v * n if len(v) == 1 else v


def _dims(name: str, a: dict, nd: int) -> set[int]:
    """Tensor dims an op works along: reduces, concatenates, indexes, contracts..."""
    if name in _MATMUL:
        return {nd - 1}
    if name in _INDEX:
        return {i for i, t in enumerate(a["indices"]) if t is not None}
    d = a.get("dim", a.get("dims", a.get("dimension", ())))
    if d is None or d == []:  # reductions: all dims
        return set(range(nd))
    return {v % nd for v in _per_dim(d, 1)} if nd else set()


class _Tracer(TorchDispatchMode):
    """Attaches a _Geo (or _Unknown) to every tensor computed from a traced one."""

    def __init__(self, meta: bool, global_context: bool):
        super().__init__()
        self.meta, self.global_context = meta, global_context
        self._geo: dict[int, tuple[weakref.ref, _Geo | _Unknown]] = {}

    def get(self, t):
        e = self._geo.get(id(t)) if isinstance(t, torch.Tensor) else None
        return e[1] if e is not None and e[0]() is t else None  # a dead tensor's id is reused

    def put(self, t: torch.Tensor, g) -> None:
        self._geo[id(t)] = (weakref.ref(t), g)

    def __torch_dispatch__(self, func, types, args=(), kwargs=None):
        kwargs = kwargs or {}
        if self.meta:  # parameters and constants join the meta graph; tracked ones already are
            args, kwargs = tree_map_only(torch.Tensor, lambda t: t.to("meta"), (args, kwargs))
        if self.meta and func is torch.ops.aten.native_batch_norm.default:
            x = args[0]  # its meta kernel is a slow Python decomposition; the shapes are known
            out = (torch.empty_like(x), x.new_empty(0), x.new_empty(0))
        else:
            out = func(*args, **kwargs)
        ins = [(t, g) for t in tree_leaves((args, kwargs)) if (g := self.get(t)) is not None]
        if ins:  # tensors not computed from the image (weights, constants) carry nothing
            unknown = next((g for _, g in ins if isinstance(g, _Unknown)), None)
            for o in (t for t in tree_leaves(out) if isinstance(t, torch.Tensor)):
                self.put(o, unknown or self._rule(func, args, kwargs, ins, o))
        return out

    def _rule(self, func, args, kwargs, ins, o):
        name, a = func._overloadpacket.__name__, _named(func, args, kwargs)
        op = f"{func.namespace}.{name}"
        if func.namespace != "aten" or name in _UNMODELLED:
            return _Unknown(op)
        src = a.get(_MATMUL.get(name, "self"), a.get("input"))   # the main tensor argument
        g = self.get(src)
        nd = src.ndim if isinstance(src, torch.Tensor) else o.ndim
        dims = _dims(name, a, nd)
        hit = {i for t, gt in ins if t.ndim == nd and gt.pos       # our spatial axes among dims
               for i, p in enumerate(gt.pos) if p.dim in dims and p.size > 1}
        if _WINDOW.fullmatch(name) or _PAD.fullmatch(name) or _RESAMPLE.fullmatch(name) \
                or name == "slice" and hit:
            return self._spatial(func, name, a, args, kwargs, src, g, ins, o, op)
        if name in _VIEWS and g is not None:
            return _view(g, src.shape, o.shape) or _Unknown(op)
        if name in ("permute", "transpose", "t") and g is not None:
            perm = [d % nd for d in a["dims"]] if name == "permute" else list(range(nd))
            if name != "permute" and nd > 1:
                i, j = (a["dim0"] % nd, a["dim1"] % nd) if name == "transpose" else (0, 1)
                perm[i], perm[j] = perm[j], perm[i]
            return g._replace(pos=g.pos and tuple(p._replace(dim=perm.index(p.dim)) for p in g.pos))
        if name in _REDUCE and dims and g is not None:
            return _reduce(g, dims, bool(a.get("keepdim", False)))
        if name in _MATMUL and (g is None or len({id(t) for t, _ in ins}) > 1) \
                or hit and name not in _MIX_ALONG:
            return _Unknown(op)  # mixes positions: attention, cat along W, softmax over H...
        if not self.global_context:  # drop inputs every position shares, if a real map is there
            ins = [(t, g) for t, g in ins if g.pos is not None and any(a.S for a in g.ax)] or ins
        out = _pointwise(ins, o)
        if hit and out is not None:  # softmax, cumsum, ... along a spatial axis: the whole axis
            whole = _global(out)
            out = out._replace(ax=tuple(whole[i] if i in hit else out.ax[i] for i in range(2)))
        return out or _Unknown(op)

    def _spatial(self, func, name, a, args, kwargs, src, g, ins, o, op):
        """Window, padding, slicing and resampling ops on (..., H, W) maps."""
        if g is None or len({id(t) for t, _ in ins}) > 1:
            return _Unknown(op)  # filters or padding computed from the image
        if g.pos is None:
            return g
        if any(p.inner != 1 or p.size != src.shape[p.dim] for p in g.pos):
            return _Unknown(op)  # spatial dims merged with others by a view
        nd, conv = src.ndim, name.endswith("convolution")
        if conv or _WINDOW.fullmatch(name):  # the op's own spatial dims are its last n
            n = a["weight"].ndim - 2 if conv else int(re.search(r"[123]", name).group())
            if conv and nd - n - 1 in [p.dim for p in g.pos]:
                return _Unknown(op)  # the conv's channel dim is one of our spatial axes
            k = list(a["weight"].shape[2:]) if conv else _per_dim(a["kernel_size"], n)
            s = _per_dim(a["stride"] or k, n)
            pad, dil = _per_dim(a["padding"], n), _per_dim(a.get("dilation", 1), n)
        ax, exact = list(g.ax), g.exact
        for i, p in enumerate(g.pos):
            got = (ax[i], True)
            if name == "slice":
                if a["dim"] % nd == p.dim:
                    start = a["start"] or 0
                    start = min(max(start + p.size if start < 0 else start, 0), p.size)
                    got = (ax[i].window(1, a["step"], -start), True)
            elif _PAD.fullmatch(name):
                pads, j = a.get("pad", a.get("padding")), 2 * (nd - 1 - p.dim)  # last dim first
                got = (ax[i].window(1, 1, pads[j] if j < len(pads) else 0), True)
            elif _RESAMPLE.fullmatch(name):
                if nd != 4:
                    return _Unknown(op)
                first, last = _probe(func, args, kwargs, src, p.dim)
                got = _cover(np.arange(len(first)), ax[i].spans(first)[0], ax[i].spans(last)[1])
            elif (d := p.dim - (nd - n)) >= 0:
                got = (_transposed(ax[i], p.size, o.shape[p.dim], k[d], s[d], pad[d], dil[d])
                       if conv and a["transposed"] else (ax[i].window(k[d], s[d], pad[d], dil[d]), True))
            if got is None:
                return _Unknown(op + " (output grid finer than one input pixel)")
            ax[i], exact = got[0], exact and got[1]
        return _Geo(tuple(p._replace(size=o.shape[p.dim]) for p in g.pos), tuple(ax), exact)


def _reduce(g: _Geo, dims: set[int], keepdim: bool) -> _Geo:
    """mean/sum/max... over `dims`: a reduced spatial axis sees the whole axis."""
    if g.pos is None:
        return g
    whole = _global(g)
    if not keepdim and any(p.dim in dims and p.size > 1 for p in g.pos):
        return _Geo(None, whole, g.exact)
    pos = tuple(p._replace(inner=1, size=1) if p.dim in dims else
                p._replace(dim=p.dim - (0 if keepdim else sum(d < p.dim for d in dims)))
                for p in g.pos)
    ax = tuple(whole[i] if p.dim in dims else g.ax[i] for i, p in enumerate(g.pos))
    return _Geo(pos, ax, g.exact)


def _pointwise(ins, o: torch.Tensor) -> _Geo | None:
    """Elementwise / channel-only op: union of the inputs' spans, broadcasting from the right."""
    exact = all(g.exact for _, g in ins)
    pos = None
    for t, g in ins:
        if g.pos is None:
            continue
        off = o.ndim - t.ndim
        new = tuple(_Pos(p.dim + off, p.inner, p.size if t.shape[p.dim] == o.shape[p.dim + off]
                         else o.shape[p.dim + off]) for p in g.pos if p.dim + off >= 0)
        fits = len(new) == 2 and all(
            t.shape[p.dim] == o.shape[q.dim] or t.shape[p.dim] == 1 == p.inner
            for p, q in zip(g.pos, new))
        if not fits or pos not in (None, new):
            # a feature vector (flatten, linear) is not a map: it sees everything
            return _Geo(None, _union([_global(g) for _, g in ins]), exact) if o.ndim <= 2 else None
        pos = new
    if pos is None:
        return _Geo(None, _union([_global(g) for _, g in ins]), exact)
    ax = []
    for i, p in enumerate(pos):
        y = np.arange(p.size)
        los, his = [], []
        for _, g in ins:   # a size-1 (broadcast) or global input shows position 0 everywhere
            idx = y if g.pos is not None and g.pos[i].size == p.size else np.zeros_like(y)
            lo, hi = g.ax[i].spans(idx)
            los.append(lo)
            his.append(hi)
        keep = max(g.ax[i].S for _, g in ins)  # e.g. a relu on a 1x1 map keeps its stride
        got = _cover(y, np.min(los, 0), np.max(his, 0), keep)
        if got is None:
            return None
        ax.append(got[0])
        exact &= got[1]
    return _Geo(pos, tuple(ax), exact)
