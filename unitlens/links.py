"""How units connect: which channels of an earlier layer feed a unit, and which later units a unit feeds.

For a unit u of layer L (the target) and an earlier layer K (the source), each channel k of K gets a
signed contribution to u on every one of u's top exemplars (the images mining kept), taken at the
layer-K activations with the rest of the network as it is:

  integrated gradients   (a_k - b_k) * integral_0^1 du(b + t (a - b))/da_k dt, summed over positions
                         (Sundararajan et al. 2017), so the channels' contributions add up to
                         u(a) - u(b) (completeness); b is zero, or the activations of the blurred image
  gradient x activation  (a_k - b_k) * du(a)/da_k summed over positions: the first-order term of the
                         above, one backward instead of steps + 1

u is the unit's activation at the exemplar's argmax position (the position mining recorded), as in
probing.py: a fixed position is one smooth-enough function, so completeness holds for exactly the
score shown. Positive contributions drive u up, negative ones hold it down. The stored number per
(u, k) is the mean over u's exemplars.

Where K feeds L through one convolution, the kernel slice [u, k] is stored beside: its norm, and the
weight itself for a 1x1 kernel. The reverse reading (which units of L a unit of K feeds most) is a
column of the same table.

The network from K to L is cut out of torch.fx's graph of the model (torchvision's tracer, as the
truncated forward uses): K's node becomes an input, L's node the output, and what L does not need
is dropped, so nothing before K is computed again (unless L also reads the image by another path).

Files, per layer pair (open formats):
  links/<L>/from-<K>.npz    units (U,), contribution (U, C_K) mean over exemplars, done (U,),
                            exemplars (U,) counted, change (U,) mean u(a) - u(b), gap (U,) largest
                            completeness error relative to |u(a) - u(b)| (integrated gradients),
                            image (U, R) the exemplars used (a re-mined layer makes them stale),
                            weight_norm / weight (U, C_K) for one convolution apart,
                            target, source, method, baseline (strings), steps
The manifest's "links" entry names each pair with its settings and whether it is complete. A killed
or interrupted pass keeps the units it finished (checkpoint every few seconds) and resumes.
"""
from __future__ import annotations

import time
import warnings
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np

from .errors import UnitlensError, UnitlensWarning, interrupted, shown
from .store import Run, read_npz, safe_name, write_npz

METHODS = ("ig", "gxa")  # integrated gradients, gradient x activation
BASELINES = ("zero", "blur")
METHOD_NAMES = {"ig": "integrated gradients", "gxa": "gradient x activation"}


@dataclass(frozen=True)
class LinkConfig:
    """How contributions are measured. The defaults cost steps + 1 forward/backward rows per exemplar."""

    method: str = "ig"
    steps: int = 16  # trapezoid steps of integrated gradients (Sundararajan et al. 2017 found 20-300 enough for 5%)
    baseline: str = "zero"  # or "blur": the activations of the exemplar under a Gaussian blur (attribution.baseline_of)
    exemplars: int | None = None  # the top exemplars per unit used; None: all that mining kept
    batch: int = 64  # rows (exemplars x path points) per forward and backward
    checkpoint_seconds: float = 10.0

    def validate(self) -> None:
        if self.method not in METHODS:
            raise UnitlensError(f"Unknown link method '{self.method}'. Valid: ig (integrated gradients), "
                                "gxa (gradient x activation, one backward).")
        if self.baseline not in BASELINES:
            raise UnitlensError(f"Unknown baseline '{self.baseline}'. Valid: {', '.join(BASELINES)}.")
        for name, v in (("steps", self.steps), ("batch", self.batch), ("exemplars", self.exemplars or 1)):
            if v < 1:
                raise UnitlensError(f"{name} must be at least 1, got {v}.")

    def record(self) -> dict:
        """The settings a stored table was made with (a resumed pass must use the same)."""
        d = asdict(self)
        del d["batch"], d["checkpoint_seconds"]  # how fast, not what
        if self.method == "gxa":
            del d["steps"]
        return d


# -- the network between two layers ---------------------------------------------------------------

@dataclass
class Between:
    """The network between two layers: `forward(z, x)` maps source activations z (N, C_K, H, W) (and the images
    x, only when `needs_input`) to the target map (N, C_L, H', W'); `conv` is the one convolution
    between them, or None."""

    forward: object
    needs_input: bool
    conv: object | None


def between(model, source: str, target: str) -> Between:
    """Cut the network from layer `source` to layer `target` out of the model's traced graph."""
    import torch

    from ._extract import layer_nodes

    src, dst = model.layer(source), model.layer(target)
    if source == target:
        raise UnitlensError(f"A layer cannot feed itself: give an earlier layer than {target} to link from.")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            graph, nodes = layer_nodes(model.module, {source: (src.module, src.call), target: (dst.module, dst.call)},
                                       {i.module for i in model.layers().values() if i.call > 0})
    except Exception as e:  # noqa: BLE001  (whatever tracing raises becomes one error)
        raise UnitlensError(f"Links need a network that torch.fx can trace, and {model.spec} does not "
                            f"({e.__class__.__name__}: {str(e)[:160]}).") from None
    image = next(n for n in graph.nodes if n.op == "placeholder")
    with graph.inserting_after(image):
        z = graph.placeholder("source_activations")
    nodes[source].replace_all_uses_with(z)
    out = next(n for n in graph.nodes if n.op == "output")
    out.args = (nodes[target],)
    gm = torch.fx.GraphModule(model.module, graph).eval()
    gm.graph.eliminate_dead_code()  # what the target does not need, the part before the source above all
    gm.recompile()
    if not z.users:
        raise UnitlensError(f"{target} is not computed from {source} in {model.spec}: give an earlier layer "
                            f"(`unitlens layers {model.spec}` lists them in order).")
    convs = [gm.get_submodule(n.target) for n in gm.graph.nodes
             if n.op == "call_module" and isinstance(gm.get_submodule(n.target), torch.nn.Conv2d)]
    needs_input = bool(image.users)
    conv = convs[0] if (len(convs) == 1 and not needs_input and convs[0].groups == 1
                        and convs[0].in_channels == src.channels and convs[0].out_channels == dst.channels) else None
    src_last, dst_last = src.layout == "NHWC", dst.layout == "NHWC"

    def forward(z, x=None):
        z = z.permute(0, 2, 3, 1) if src_last else z.clone()  # the graph may work on its input in place
        y = gm(x, z)
        return y.permute(0, 3, 1, 2) if dst_last else y

    return Between(forward, needs_input, conv)


def adjacent_weights(conv, units) -> tuple[np.ndarray, np.ndarray | None]:
    """The kernel slices [u, k] of `conv` for the target `units`: norms (U, C_K), and the weights
    themselves (U, C_K) for a 1x1 kernel (else None)."""
    w = conv.weight.detach()[list(units)].double()  # (U, C_K, kh, kw)
    norm = w.flatten(2).norm(dim=2).float().numpy()
    one = w[:, :, 0, 0].float().numpy() if w.shape[2:] == (1, 1) else None
    return norm, one


# -- computing ------------------------------------------------------------------------------------

def links_path(run: Run, target: str, source: str) -> Path:
    return run.path / "links" / safe_name(target) / f"from-{safe_name(source)}.npz"


def previous_mined(run: Run, model, target: str) -> str:
    """The mined layer that comes last before `target` in the model's order."""
    order = list(model.layers())
    mined = [n for n in run.mined_layers() if n in order]
    before = [n for n in mined if order.index(n) < order.index(target)]
    if not before:
        raise UnitlensError(f"No layer mined in {run.path} comes before {target} (mined: {', '.join(mined) or 'none'}). "
                            "Mine an earlier layer too, or name one to link from.")
    return max(before, key=order.index)


def link(run: Run | str | Path, target: str, source: str | None = None, *, units=None,
         config: LinkConfig = LinkConfig(), model=None, progress: bool = False, force: bool = False,
         allow_pickle: bool = False) -> Path:
    """Measure how every channel of `source` feeds the mined units of `target` (all, or `units`: a
    sequence of channels or text like '0-9,37'); store and return links/<target>/from-<source>.npz.
    Resumes a pass that was stopped; a pass with other settings needs `force`.

    >>> link("runs/r18", "layer3", "layer2", units="37")   # doctest: +SKIP
    """
    from .units import parse_ranges

    config.validate()
    run = Run(run) if not isinstance(run, Run) else run
    run.manifest()
    if model is None:
        from .synth.pipeline import model_from_run

        model = model_from_run(run, allow_pickle)
    info = model.layer(target)
    idx = run.index(target)
    mined = [int(u) for u in idx["units"]]
    if source is None:
        source = previous_mined(run, model, target)
    src = model.layer(source)
    order = list(model.layers())
    if order.index(source) > order.index(target):
        raise UnitlensError(f"{source} comes after {target} in {model.spec}: links run from an earlier layer to a "
                            "later one. Swap them.")
    if units is None:
        chosen = mined
    else:
        chosen = list(parse_ranges(units, info.channels, layer=target)) if isinstance(units, str) else [int(u) for u in units]
        missing = [u for u in chosen if u not in mined]
        if missing:
            raise UnitlensError(f"Channel {missing[0]} of {target} was not mined in {run.path}; links need its "
                                f"exemplars. Mined: {len(mined)} channels ({mined[0]}-{mined[-1]}).")
    net = between(model, source, target)
    R = idx["top_image"].shape[1] if config.exemplars is None else min(config.exemplars, idx["top_image"].shape[1])
    images = idx["top_image"][:, :R].astype(np.int64)
    settings = {"target": target, "source": source, **config.record()}

    path = links_path(run, target, source)
    state = _fresh(mined, src.channels, images, net, config, target, source)
    old = read_npz(path) if path.is_file() and not force else None
    if old is not None:
        same = (_settings_of(old) == settings and np.array_equal(old["units"], state["units"])
                and np.array_equal(old["image"], images))
        if not same:
            raise UnitlensError(f"{shown(path)} holds links made with other settings or exemplars "
                                f"({_settings_of(old)}). Add --force to measure them again with these settings.")
        state = old
    pos = {u: p for p, u in enumerate(mined)}
    todo = [pos[u] for u in chosen if not state["done"][pos[u]]]
    corpus = run.corpus()
    extract = model.extractor([source])
    frame = model.preprocess.frame
    exemplars = [(p, r) for p in todo for r in range(R) if images[p, r] < len(corpus)
                 and np.isfinite(idx["top_score"][p, r])]
    per_pass = 1 if config.method == "gxa" else config.steps + 1  # rows one exemplar takes
    group = max(1, config.batch // per_pass)
    sums = {p: np.zeros(src.channels, np.float64) for p in todo}
    change = {p: 0.0 for p in todo}
    gap = {p: 0.0 for p in todo}
    count = {p: 0 for p in todo}
    left = {p: 0 for p in todo}
    for p, _ in exemplars:
        left[p] += 1
    for p in todo:
        if not left[p]:
            state["done"][p] = True  # no usable exemplar: nothing to measure
    mismatch, last, stopped = [], time.monotonic(), False
    bar = None
    if progress:
        from ._progress import Progress

        bar = Progress(len(exemplars), 0, f"links {target} <- {source}", "exemplars")
    try:
        for start in range(0, len(exemplars), group):
            part = exemplars[start:start + group]
            contrib, f_a, f_b = _measure(model, net, extract, source, corpus, frame, idx, images, part, config)
            for j, (p, r) in enumerate(part):
                sums[p] += contrib[j]
                d = f_a[j] - f_b[j]
                change[p] += d
                if config.method == "ig":
                    gap[p] = max(gap[p], abs(contrib[j].sum() - d) / max(abs(d), 1e-12))
                count[p] += 1
                left[p] -= 1
                score = float(idx["top_score"][p, r])
                if abs(f_a[j] - score) > 1e-3 * max(abs(score), 1.0):
                    mismatch.append((mined[p], r, f_a[j], score))
                if not left[p]:
                    _finish_unit(state, p, sums, change, gap, count)
            if bar:
                bar.advance(start + len(part))
            if time.monotonic() - last > config.checkpoint_seconds:
                _save(run, path, state, settings)
                last = time.monotonic()
    except KeyboardInterrupt:
        stopped = True
    finally:
        if bar:
            bar.close()
    _save(run, path, state, settings)
    if mismatch:
        u, r, got, want = mismatch[0]
        warnings.warn(f"{len(mismatch)} exemplar(s) of {target} give another value than the run recorded (unit {u}, "
                      f"rank {r + 1}: {got:.6g} vs {want:.6g}): these are not the weights it was mined with (a model "
                      "without --weights is initialised at random anew on every load).", UnitlensWarning, stacklevel=2)
    if stopped:
        raise interrupted(f"after {int(state['done'].sum())} of {len(mined)} units of {target}; they are saved. "
                          "Run the same command to resume.")
    return path


def link_unit(run: Run, model, layer: str, channel: int, progress: bool = False) -> bool:
    """Links into one unit from the mined layer just before, with the default settings, for `probe`;
    False (nothing done) where no earlier layer is mined or links stored with other settings exist."""
    try:
        source = previous_mined(run, model, layer)
    except UnitlensError:
        return False
    path = links_path(run, layer, source)
    if path.is_file() and _settings_of(read_npz(path)) != {"target": layer, "source": source, **LinkConfig().record()}:
        return False
    link(run, layer, source, units=[channel], model=model, progress=progress)
    return True


def _fresh(mined, channels, images, net, config, target, source) -> dict:
    U = len(mined)
    state = {"units": np.asarray(mined, np.int64), "contribution": np.zeros((U, channels), np.float32),
             "done": np.zeros(U, bool), "exemplars": np.zeros(U, np.int64), "change": np.full(U, np.nan, np.float32),
             "gap": np.full(U, np.nan, np.float32), "image": images, "target": np.array(target),
             "source": np.array(source), "method": np.array(config.method), "baseline": np.array(config.baseline),
             "steps": np.array(config.steps if config.method == "ig" else 0),
             "exemplars_wanted": np.array(-1 if config.exemplars is None else config.exemplars)}
    if net.conv is not None:
        norm, one = adjacent_weights(net.conv, mined)
        state["weight_norm"] = norm
        if one is not None:
            state["weight"] = one
    return state


def _settings_of(z: dict) -> dict:
    s = {"target": str(z["target"]), "source": str(z["source"]), "method": str(z["method"]),
         "baseline": str(z["baseline"])}
    wanted = int(z["exemplars_wanted"])
    rec = {"method": s["method"], "steps": int(z["steps"]), "baseline": s["baseline"],
           "exemplars": None if wanted < 0 else wanted}
    if s["method"] == "gxa":
        del rec["steps"]
    return {"target": s["target"], "source": s["source"], **rec}


def _finish_unit(state, p, sums, change, gap, count) -> None:
    n = max(count[p], 1)
    state["contribution"][p] = (sums[p] / n).astype(np.float32)
    state["change"][p] = change[p] / n
    state["gap"][p] = gap[p] if state["method"] == "ig" else np.nan
    state["exemplars"][p] = count[p]
    state["done"][p] = True


def _save(run: Run, path: Path, state: dict, settings: dict) -> None:
    write_npz(path, **state)
    m = run.manifest()
    entry = {**settings, "file": str(path.relative_to(run.path)), "units": int(len(state["done"])),
             "done_units": int(state["done"].sum()), "done": bool(state["done"].all())}
    links = dict(m.get("links") or {})
    links[f"{settings['target']}<-{settings['source']}"] = entry
    run.update_manifest(links=links)


def _measure(model, net: Between, extract, source, corpus, frame, idx, images, part, config):
    """Contributions (B, C_K) and u(a), u(b) (B,) for a group of (unit place, rank) exemplars: one
    forward and one backward per `config.batch` rows."""
    import torch

    from . import attribution as A
    from ._extract import forward_batch
    from .corpus import CorpusDataset

    wanted = list(dict.fromkeys(int(images[p, r]) for p, r in part))
    ds = CorpusDataset(corpus, frame, wanted)
    pix = {}
    for k in range(len(ds)):
        i, pixels, _place, reason = ds[k]
        if reason is not None:
            raise UnitlensError(f"Cannot decode exemplar {shown(corpus.files[i])} ({reason}); links need the "
                                "images the run was mined on.")
        pix[i] = pixels.float() / 255.0  # (3, S, S)
    x = torch.stack([pix[int(images[p, r])] for p, r in part])  # (B, 3, S, S) in [0, 1]
    with torch.no_grad():
        a = forward_batch(extract, model.normalize(x))[source]  # (B, C_K, H, W)
        if config.baseline == "zero":
            b = torch.zeros_like(a)
        else:
            from .attribution import baseline_of

            blurred = torch.stack([baseline_of(v, "blur") for v in x])
            b = forward_batch(extract, model.normalize(blurred))[source]
    xin = model.normalize(x) if net.needs_input else None
    unit = torch.tensor([int(idx["units"][p]) for p, _ in part])
    ys = torch.tensor([int(idx["top_y"][p, r]) for p, r in part])
    xs = torch.tensor([int(idx["top_x"][p, r]) for p, r in part])
    B = len(part)

    def f(points):  # (n, B, C_K, H, W) -> (n,): the sum over the group of each exemplar's unit value
        n = points.shape[0]
        rows = points.reshape(n * B, *points.shape[2:])
        inp = xin.repeat(n, 1, 1, 1) if xin is not None else None
        out = net.forward(rows, inp)  # (n*B, C_L, H', W')
        k = torch.arange(n * B)
        return out[k, unit.repeat(n), ys.repeat(n), xs.repeat(n)].view(n, B).sum(1)

    def each(points):  # (N, C_K, H, W) -> (N,) one value per exemplar, without gradients
        with torch.no_grad():
            out = net.forward(points, xin)
            return out[torch.arange(len(points)), unit, ys, xs]

    if config.method == "ig":
        att = A.integrated_gradients(f, a, b, config.steps, rule="trapezoid", batch=max(1, config.batch // B))
        values = att.values  # (B, C_K, H, W)
    else:
        _, g = A.gradients(f, a.unsqueeze(0), 1)
        values = (a - b) * g[0]
    contrib = values.double().sum((2, 3)).numpy()  # (B, C_K): summed over positions
    f_a, f_b = each(a).double().numpy(), each(b).double().numpy()
    return contrib, f_a, f_b


# -- reading --------------------------------------------------------------------------------------

def stored_pairs(run: Run) -> list[Path]:
    """Every stored links table of a run."""
    return sorted((run.path / "links").glob("*/from-*.npz"))


def concentration(contribution: np.ndarray) -> np.ndarray:
    """How many feeders a unit effectively has: (sum |c|)^2 / sum c^2 per row, between 1 (one channel
    carries everything) and C_K (all equal): the participation ratio (common practice)."""
    c = np.abs(np.asarray(contribution, np.float64))
    s2 = (c * c).sum(-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(s2 > 0, c.sum(-1) ** 2 / np.where(s2 > 0, s2, 1), np.nan)


def stale(run: Run, z: dict) -> bool:
    """Whether the target layer was mined again since its links were measured (other exemplars)."""
    path = run.layer_dir(str(z["target"])) / "index.npz"
    if not path.is_file():
        return True
    idx = read_npz(path)
    R = z["image"].shape[1]
    return not (np.array_equal(idx["units"], z["units"]) and idx["top_image"].shape[1] >= R
                and np.array_equal(idx["top_image"][:, :R], z["image"]))


def _entry(z: dict, p: int, k: int) -> dict:
    c = z["contribution"][p]
    total = float(np.abs(c).sum()) or 1.0
    e = {"unit": int(k), "contribution": float(c[k]), "share": float(c[k]) / total}
    if "weight_norm" in z:
        e["weight_norm"] = float(z["weight_norm"][p, k])
    if "weight" in z:
        e["weight"] = float(z["weight"][p, k])
    return e


def unit_links(run: Run | str | Path, layer: str, channel: int, top: int = 5) -> dict | None:
    """What the stored links say about one unit: its strongest feeders up and down in each earlier
    layer it was linked from, and the later units it feeds most. None when nothing is stored.

    {"feeders": [{"layer", "method", "baseline", "steps", "exemplars", "change", "gap", "effective",
                  "up": [{"unit", "contribution", "share", "weight_norm"?, "weight"?}], "down": [...]}],
     "feeds": [{"layer", "method", "units": [{"unit", "contribution", "share"}, ...]}]}
    `share` is the contribution over the sum of the unit's absolute contributions (signed).
    """
    run = Run(run) if not isinstance(run, Run) else run
    feeders, feeds = [], []
    for path in stored_pairs(run):
        z = read_npz(path)
        target, source = str(z["target"]), str(z["source"])
        done = z["done"].astype(bool)
        if target == layer:
            at = np.flatnonzero(z["units"] == channel)
            if not len(at) or not done[at[0]] or not int(z["exemplars"][at[0]]):
                continue
            p = int(at[0])
            c = z["contribution"][p]
            ordered = np.argsort(-c, kind="stable")
            feeders.append({
                "layer": source, "method": METHOD_NAMES[str(z["method"])], "baseline": str(z["baseline"]),
                "steps": int(z["steps"]) or None, "exemplars": int(z["exemplars"][p]),
                "change": float(z["change"][p]), "gap": None if np.isnan(z["gap"][p]) else float(z["gap"][p]),
                "effective": float(concentration(c)), "stale": stale(run, z),
                "up": [_entry(z, p, k) for k in ordered[:top] if c[k] > 0],
                "down": [_entry(z, p, k) for k in ordered[::-1][:top] if c[k] < 0],
            })
        if source == layer and done.any() and channel < z["contribution"].shape[1]:
            c = z["contribution"][done]
            totals = np.abs(c).sum(1)
            share = np.where(totals > 0, c[:, channel] / np.where(totals > 0, totals, 1), 0.0)
            places = np.flatnonzero(done)
            ordered = np.argsort(-np.abs(share), kind="stable")[:top]
            feeds.append({"layer": target, "method": METHOD_NAMES[str(z["method"])],
                          "units": [_entry(z, int(places[j]), channel) | {"unit": int(z["units"][places[j]])}
                                    for j in ordered if share[j] != 0]})
    if not feeders and not feeds:
        return None
    return {"feeders": feeders, "feeds": feeds}


def links_text(links: dict | None) -> list[str]:
    """The lines `show` and `probe` print for `unit_links(...)`."""
    if not links:
        return []
    lines = []
    for f in links["feeders"]:
        how = f"{f['method']}, {f['baseline']} baseline" + (f", {f['steps']} steps" if f["steps"] else "")
        gap = f"; completeness within {100 * f['gap']:.1f}%" if f["gap"] is not None else ""
        lines.append(f"  fed from {shown(f['layer'])} ({how}; {f['exemplars']} exemplars, mean change "
                     f"{f['change']:.4g}{gap}; {f['effective']:.1f} effective feeders):")
        if f["stale"]:
            lines.append("    (stale: the layer was mined again since; measure again with `unitlens link ... --force`)")
        for title, key in (("drive it up", "up"), ("hold it down", "down")):
            if f[key]:
                lines.append(f"    {title}: " + ", ".join(_feeder_text(e) for e in f[key]))
    for f in links["feeds"]:
        lines.append(f"  feeds in {shown(f['layer'])} ({f['method']}): "
                     + ", ".join(f"{e['unit']} ({100 * e['share']:+.0f}%)" for e in f["units"]))
    return lines


def _feeder_text(e: dict) -> str:
    w = f", w {e['weight']:+.3g}" if "weight" in e else f", |w| {e['weight_norm']:.3g}" if "weight_norm" in e else ""
    return f"{e['unit']} ({e['contribution']:+.4g}, {100 * e['share']:+.0f}%{w})"


def link_text(path: Path) -> str:
    """What `unitlens link` prints when it finishes."""
    z = read_npz(path)
    done = z["done"].astype(bool)
    eff = concentration(z["contribution"][done]) if done.any() else np.array([])
    lines = [f"{str(z['target'])} <- {str(z['source'])}: {int(done.sum())} of {len(done)} units linked "
             f"({METHOD_NAMES[str(z['method'])]}, {str(z['baseline'])} baseline)"]
    if len(eff):
        lines.append(f"  effective feeders per unit: median {np.nanmedian(eff):.1f} of {z['contribution'].shape[1]}")
    gaps = z["gap"][done]
    if str(z["method"]) == "ig" and np.isfinite(gaps).any():
        lines.append(f"  completeness: worst exemplar {100 * np.nanmax(gaps):.2f}% off u(a) - u(b)")
    if "weight_norm" in z:
        lines.append("  one convolution apart: kernel norms stored beside" + (" (1x1: the weights)" if "weight" in z else ""))
    lines.append(shown(path))
    return "\n".join(lines)
