"""Benchmark of `unitlens.mine` on CPU; prints ratios measured side by side in one run.

  1. mining vs the bare truncated forward, on the same pre-decoded batches (crop stage apart)
  2. end to end from JPEG files, decoding in DataLoader workers
  3. vs a straightforward script (hook, whole network, every per-image max kept, sort at the end):
     speed and peak resident memory, each variant in a fresh subprocess

The machine is noisy, so variants are interleaved (part 1 batch by batch, the rest in alternating
order) and medians reported. Models have random weights: nothing can be downloaded here, and speed
does not depend on the weight values. Linux only (part 3 reads /proc).

    python scripts/bench_mine.py            # full run, about 15 min on two busy cores
    python scripts/bench_mine.py --quick    # every part on tiny inputs, for a smoke test
"""
from __future__ import annotations

import argparse
import contextlib
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np
import torch
from PIL import Image

import unitlens
import unitlens.corpus as ucorpus
import unitlens.crops as ucrops
from unitlens import MineConfig, load_model, open_corpus, parse_layers

warnings.filterwarnings("ignore", message="receptive fields unavailable")


@contextlib.contextmanager
def patched(module, name, value):
    old = getattr(module, name)
    setattr(module, name, value)
    try:
        yield
    finally:
        setattr(module, name, old)


def table(title: str, header: list[str], rows: list[list]) -> None:
    def fmt(c):
        if not isinstance(c, float):
            return str(c)
        return f"{c:.0f}" if abs(c) >= 100 else f"{c:.1f}" if abs(c) >= 10 else f"{c:.2f}"

    cells = [header] + [[fmt(c) for c in r] for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(header))]
    print(f"\n{title}")
    for k, r in enumerate(cells):
        print("  " + "  ".join(c.rjust(w) if i else c.ljust(w) for i, (c, w) in enumerate(zip(r, widths))))
        if k == 0:
            print("  " + "  ".join("-" * w for w in widths))


def write_jpegs(folder: Path, n: int, big_every: int) -> None:
    """Smooth random scenes with mild grain (file sizes like photos'); every big_every-th is 1600x1200."""
    rng = np.random.default_rng(0)
    for i in range(n):
        w, h = (1600, 1200) if big_every and i % big_every == big_every - 1 else (640, 480)
        low = Image.fromarray((rng.random((h // 40, w // 40, 3)) * 255).astype(np.uint8))
        px = np.asarray(low.resize((w, h), Image.BICUBIC), dtype=np.float32)
        px += rng.normal(0, 6, px.shape)
        Image.fromarray(px.clip(0, 255).astype(np.uint8)).save(folder / f"img{i:05d}.jpg", quality=90)


def timed_mine(model, corpus, layers, out, cfg, source=None, crops=True) -> dict:
    """Run the real mine(); split its wall time into setup, batch loop, finish and crop stage.

    `source(corpus, size, **kw)` replaces the corpus decoder (pre-built batches); None: the real one.
    `windows` are the seconds mine() spent on each batch (from handing it over to asking for the next).
    """
    marks, windows, decodes = {}, [], []
    feed = source or ucorpus.batches
    real_cut, real_decode = ucrops.cut_exemplars, ucorpus._decode  # every file decode goes through it

    def batches(corpus, size, **kw):
        marks["first"] = time.perf_counter()
        for b in feed(corpus, size, **kw):
            t = time.perf_counter()
            yield b
            windows.append(time.perf_counter() - t)
        marks["loop_end"] = time.perf_counter()

    def cut(*a, **kw):
        t = time.perf_counter()
        if crops:
            real_cut(*a, **kw)
        marks["crops"] = time.perf_counter() - t

    def decode(path, *a, **kw):
        decodes.append(path)
        return real_decode(path, *a, **kw)

    with patched(ucorpus, "batches", batches), patched(ucrops, "cut_exemplars", cut), \
            patched(ucorpus, "_decode", decode):
        t0 = time.perf_counter()
        unitlens.mine(model, corpus, layers, out, cfg)
        total = time.perf_counter() - t0
    loop = marks["loop_end"] - marks["first"]
    return {"setup": marks["first"] - t0, "loop": loop, "windows": windows, "crops": marks["crops"],
            "finish": total - marks["first"] + t0 - loop - marks["crops"], "no_crops": total - marks["crops"],
            "decodes": len(decodes), "decoded_images": len(set(decodes))}


def bare_forward(extractor, x, layer) -> float:
    t = time.perf_counter()
    with torch.inference_mode():
        extractor(x)[layer]
    return time.perf_counter() - t


def parts_1_2(args, tmp: Path) -> None:
    torch.manual_seed(0)  # the same random weights, so the same exemplars and crop work, every run
    model = load_model(f"torchvision:{args.model}", size=args.size)
    layers = parse_layers(model, [args.layer])  # also builds the layer table once, outside the timing
    n_units = len(layers[0].units)
    folder = tmp / "jpegs"
    folder.mkdir()
    write_jpegs(folder, args.images, big_every=4)
    corpus = open_corpus(folder)
    cfg = MineConfig(top_k=16)
    prebuilt = list(ucorpus.batches(corpus, args.size, batch_size=cfg.batch_size, workers=0))
    inputs = [model.normalize(b.images) for b in prebuilt]  # (B, 3, S, S) float32
    extractor = model.extractor([args.layer])
    bare_forward(extractor, inputs[0], args.layer)  # warm-up: the first oneDNN calls pick kernels
    N, med = args.images, statistics.median
    bare: list[list[float]] = []

    def paired_source(corpus, size, start=0, **_):
        """The pre-built batches, each also run through the bare extractor just before (even
        batches) or after (odd) mine() works on it, so both meet the same machine load."""
        bare.append([])
        for k, (b, x) in enumerate((b, x) for b, x in zip(prebuilt, inputs) if int(b.indices[0]) >= start):
            if k % 2 == 0:
                bare[-1].append(bare_forward(extractor, x, args.layer))
            yield b
            if k % 2 == 1:
                bare[-1].append(bare_forward(extractor, x, args.layer))

    def decode_only() -> float:
        t = time.perf_counter()
        for _ in ucorpus.batches(corpus, args.size, batch_size=cfg.batch_size):
            pass
        return time.perf_counter() - t

    mined, e2e, dec = [], [], []
    for r in range(args.reps):  # the order reverses each round
        jobs = [lambda: mined.append(timed_mine(model, corpus, layers, tmp / f"mine{r}", cfg,
                                                paired_source, crops=r == 0)),
                lambda: e2e.append(timed_mine(model, corpus, layers, tmp / f"e2e{r}", cfg, crops=False)),
                lambda: dec.append(decode_only())]
        for job in (jobs if r % 2 == 0 else jobs[::-1]):
            job()
    bare_s = med(sum(b) for b in bare)
    loop_s = med(sum(m["windows"]) for m in mined)
    whole_s = med(m["no_crops"] - sum(b) for m, b in zip(mined, bare))  # bare ran inside the call
    per_batch = [b / w for bs, m in zip(bare, mined) for b, w in zip(bs, m["windows"])]
    e2e_s = med(m["no_crops"] for m in e2e)
    table(f"Part 1: mining vs bare truncated forward ({args.model} to {args.layer}, {args.size} px, "
          f"{n_units} channels, top-{cfg.top_k}, batch {cfg.batch_size}, {args.threads} threads, "
          f"{N} pre-decoded images; bare and mine() alternate batch by batch; median of {args.reps})",
          ["variant", "img/s", "vs bare"],
          [["bare extractor (inference_mode)", N / bare_s, 1.0],
           ["mine(), per-batch work only", N / loop_s, bare_s / loop_s],
           ["mine(), whole call minus crops", N / whole_s, bare_s / whole_s],
           [f"  median of {len(per_batch)} per-batch ratios", "", med(per_batch)]])
    m0 = mined[0]
    table("Part 1: mine() stages (seconds, median; crop stage from the first call only)", ["stage", "s"],
          [["setup (manifest, value files, extractor)", med(m["setup"] for m in mined)],
           ["batches (sum of per-batch work)", loop_s],
           ["finish (index, manifest)", med(m["finish"] for m in mined)],
           [f"crop stage: {m0['decodes']} decodes of {m0['decoded_images']} images", m0["crops"]]])
    table(f"Part 2: end to end from JPEG files ({N} images: 3/4 640x480, 1/4 1600x1200, draft decoding; "
          f"{ucorpus.default_workers()} DataLoader workers (default); crops off; median of {args.reps})",
          ["variant", "img/s", "vs part-1 mine"],
          [["decode only (DataLoader, default workers)", N / med(dec), ""],
           ["mine() from files, batch loop", N / med(m["loop"] for m in e2e), loop_s / med(m["loop"] for m in e2e)],
           ["mine() from files, whole call minus crops", N / e2e_s, whole_s / e2e_s]])
    args.summary += [f"mine/bare = {bare_s / whole_s:.2f} (target >= 0.9; per-batch work alone "
                     f"{bare_s / loop_s:.2f}; crop stage {m0['crops']:.0f} s more for {N} images)",
                     f"end-to-end from JPEG = {N / e2e_s:.2f} img/s = {whole_s / e2e_s:.2f} x part-1 mine "
                     "(no target)"]


# ----------------------------------------------------------------------------- part 3

def generated_batches(n: int, size: int, batch: int):
    """Deterministic smooth random uint8 images, made batch by batch so none are held in memory."""
    import torch.nn.functional as F

    for s in range(0, n, batch):
        g = torch.Generator().manual_seed(s)
        b = min(batch, n - s)
        low = torch.rand(b, 3, max(size // 8, 1), max(size // 8, 1), generator=g)
        x = F.interpolate(low, size=(size, size), mode="bilinear", align_corners=False)
        x = x + 0.03 * torch.randn(x.shape, generator=g)
        yield torch.arange(s, s + b), (x.clamp(0, 1) * 255).to(torch.uint8)  # (b,), (b, 3, S, S)


def resident(field: str) -> float:
    """MiB from /proc/self/status: VmRSS (resident now) or VmHWM (its peak, the mm's own counter
    behind ru_maxrss; ru_maxrss itself also keeps the parent's size from before exec)."""
    with open("/proc/self/status") as f:
        return next(int(line.split()[1]) for line in f if line.startswith(field + ":")) / 1024


def loop_start_rss() -> float:
    """Resident MiB now, after resetting the peak to it, so the peak read after the loop is the
    loop's own rather than that of importing torch."""
    with open("/proc/self/clear_refs", "w") as f:  # Linux >= 4.0: "5" resets the high-water mark
        f.write("5")
    return resident("VmRSS")


def variant(model, kind: str, n: int, layer: str, out: Path) -> dict:
    """Top-16 of every channel of `layer` over n generated images, the unitlens way or the plain way."""
    K, size = 16, model.preprocess.side
    if kind == "naive":
        vals, pos = [], []

        def hook(_m, _i, out):  # (B, C, H, W)
            v, p = out.flatten(2).max(2)  # (B, C)
            vals.append(v)
            pos.append(p)

        handle = model.module.get_submodule(layer).register_forward_hook(hook)
        before = loop_start_rss()
        t = time.perf_counter()
        with torch.no_grad():
            for _, images in generated_batches(n, size, 32):
                model.module(model.normalize(images))
        v = torch.cat(vals)  # (N, C)
        top = torch.argsort(v, dim=0, descending=True)[:K]  # (K, C) image ids per channel
        torch.cat(pos).gather(0, top)
        handle.remove()
    else:
        layers = parse_layers(model, [layer])
        files = tuple(f"generated/{i:06d}.png" for i in range(n))
        corpus = ucorpus.Corpus(out, files, None, (), f"generated-{n}-{size}", ())
        place = ucorpus.placement(size, size, size)

        def source(corpus, size, start=0, **_):
            for ids, images in generated_batches(n, size, 32):
                yield ucorpus.Batch(ids, images, [place] * len(ids), [])

        before = loop_start_rss()
        t = time.perf_counter()
        with patched(ucorpus, "batches", source), patched(ucrops, "cut_exemplars", lambda *a, **k: None):
            unitlens.mine(model, corpus, layers, out / f"run{n}", MineConfig(top_k=K))
    return {"n": n, "seconds": time.perf_counter() - t, "before_mb": before, "peak_mb": resident("VmHWM")}


def child(args) -> None:
    """Part-3 variant(s) in this fresh process; prints one JSON list."""
    torch.set_num_threads(args.threads)
    torch.manual_seed(0)
    model = load_model(f"torchvision:{args.model3}", size=args.size3)
    model.layers()
    counts = [int(c) for c in args._child_n.split(",")]
    print(json.dumps([variant(model, args._child, n, args.layer3, Path(args._child_out)) for n in counts]))


def part_3(args, tmp: Path) -> None:
    t_start = time.perf_counter()
    small, target = args.counts

    results: dict[tuple[int, str], list[dict]] = {}

    def run(kind: str, counts: list[int]) -> None:
        """Variant `kind` at each of `counts`, in one fresh process."""
        cmd = [sys.executable, __file__, "--_child", kind, "--_child-n", ",".join(map(str, counts)),
               "--_child-out", tempfile.mkdtemp(dir=tmp), "--threads", str(args.threads),
               "--model3", args.model3, "--size3", str(args.size3), "--layer3", args.layer3]
        t0 = time.perf_counter()
        proc = subprocess.run(cmd, capture_output=True, text=True)
        if proc.returncode:
            sys.exit(f"part 3 child failed:\n{proc.stderr}")
        res = json.loads(proc.stdout.strip().splitlines()[-1])
        startup = time.perf_counter() - t0 - sum(r["seconds"] for r in res)
        for r in res:
            results.setdefault((r["n"], kind), []).append(dict(r, startup=startup))

    if args.quick:  # a smoke run: one process per variant does both counts
        for kind in ("mine", "naive"):
            run(kind, [small, target])
        big = target
    else:
        # A-B-B-A at the small count cancels a steady drift in the machine's load; the B-A half
        # only if the first pair took under a quarter of the budget, to leave time for the large count
        for r, pair in enumerate([("mine", "naive"), ("naive", "mine")] * args.reps):
            if r >= args.reps or (r and time.perf_counter() - t_start > args.budget3 * 15):
                break
            for kind in pair:
                run(kind, [small])
        # the largest count that still fits the time budget, at the speeds just measured
        per_image = sum(statistics.median(x["seconds"] for x in results[small, k]) / small
                        for k in ("mine", "naive"))
        startup = statistics.median(x["startup"] for x in results[small, "mine"])
        spare = args.budget3 * 60 - (time.perf_counter() - t_start) - 2 * startup
        fits = int(spare / per_image) if spare > 0 else 0
        big = target if fits >= target else fits // 1000 * 1000
        if big < target:
            args.summary.append(f"part 3: {target} images would need about {target * per_image / 60:.0f} min "
                                f"on this machine now, over the {args.budget3:g}-min budget; ran "
                                f"{big if big > small else 'no larger count'} instead")
        if big > small:
            run("naive", [big])
            run("mine", [big])
    med = lambda n, k, key: statistics.median(x[key] for x in results[n, k])
    counts = [n for n in (small, big) if (n, "mine") in results]
    rows = []
    for n in counts:
        for kind, label in (("mine", "unitlens.mine (crops off)"), ("naive", "hook + whole net + sort")):
            peak, before = med(n, kind, "peak_mb"), med(n, kind, "before_mb")
            rows.append([n, label, n / med(n, kind, "seconds"), peak, peak - before])
    table(f"Part 3: vs a straightforward script that keeps every image's max and argmax per channel "
          f"and sorts at the end ({args.model3} {args.layer3}, {args.size3} px, all channels, "
          f"top-16, batch 32, {args.threads} threads, images generated in memory, each run in a fresh "
          f"process; loop peak = peak resident set (VmHWM) after resetting it just before the loop, "
          f"so importing torch is not counted; growth = loop peak minus resident set at loop start; "
          f"{len(results[small, 'mine'])} run(s) each at {small}" + (f", 1 at {big})" if big > small else ")"),
          ["images", "variant", "img/s", "loop peak MiB", "growth MiB"], rows)
    for n in counts:
        speed = med(n, "naive", "seconds") / med(n, "mine", "seconds")
        grow = [med(n, k, "peak_mb") - med(n, k, "before_mb") for k in ("mine", "naive")]
        args.summary.append(f"mine/straightforward at {n} images: speed {speed:.2f}x, "
                            f"memory growth {grow[0]:.0f} vs {grow[1]:.0f} MiB")


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--quick", action="store_true", help="tiny smoke run of every part (under a minute on two idle cores)")
    p.add_argument("--images", type=int, default=96, help="images for parts 1 and 2")
    p.add_argument("--threads", type=int, default=2, help="torch threads")
    p.add_argument("--reps", type=int, default=2, help="repetitions per variant (median reported)")
    p.add_argument("--model", default="resnet50", help="torchvision architecture for parts 1-2")
    p.add_argument("--size", type=int, default=224, help="input size for parts 1-2")
    p.add_argument("--layer", default="layer3", help="layer for parts 1-2 (all its channels)")
    p.add_argument("--counts", type=int, nargs=2, default=[2000, 20000], help="image counts of part 3")
    p.add_argument("--model3", default="resnet18", help="architecture for part 3")
    p.add_argument("--size3", type=int, default=64, help="input size for part 3")
    p.add_argument("--layer3", default="layer3", help="layer for part 3")
    p.add_argument("--budget3", type=float, default=10, help="minutes for part 3; the large count shrinks to fit")
    p.add_argument("--parts", default="123", help="parts to run, e.g. 3 (1 and 2 share their images, so run together)")
    for hidden in ("--_child", "--_child-n", "--_child-out"):
        p.add_argument(hidden, help=argparse.SUPPRESS)
    args = p.parse_args()
    if args._child:
        return child(args)
    if args.quick:
        args.images, args.reps, args.model, args.size, args.layer = 16, 1, "resnet18", 64, "layer2"
        args.counts = [32, 96]
    torch.set_num_threads(args.threads)
    args.summary = []
    t0 = time.perf_counter()
    print(f"unitlens mining benchmark: torch {torch.__version__}, {torch.get_num_threads()} threads, "
          f"random weights (no downloads possible here); load average at the start "
          f"{os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    took = []
    with tempfile.TemporaryDirectory(prefix="bench_mine_") as tmp:
        for part, numbers, run in (("parts 1-2", "12", parts_1_2), ("part 3", "3", part_3)):
            if set(numbers) & set(args.parts):
                t = time.perf_counter()
                run(args, Path(tmp))
                took.append(f"{part} {time.perf_counter() - t:.0f} s")
    print("\nSummary")
    for line in args.summary:
        print("  " + line)
    print(f"  (took {time.perf_counter() - t0:.0f} s: {', '.join(took)}; load average at the end "
          f"{os.getloadavg()[0]:.1f} on {os.cpu_count()} cores)")


if __name__ == "__main__":
    main()
