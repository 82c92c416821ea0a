"""Benchmark of mining split over processes: 2 processes x 1 thread against 1 process x 2 threads.

Both variants run the same mining call (`unitlens.mine`, under `torchrun --nproc-per-node 2` for
the second) on the same generated swatch corpus, interleaved A B A B so machine load hits both
alike; medians are reported. Each worker times the mining pass itself, from a point where every
rank has loaded the model to the return of `mine` (decoding, forward, tallies, the merge between
ranks and rank 0's crops), so interpreter start-up and model loading are left out.

Decoding runs in the mining processes (--workers 0) in both variants, so each process does the
same kind of work. Random weights (nothing can be downloaded here; speed does not depend on them).

    python scripts/bench_dist.py            # ResNet-18 to layer3 at 128 px, 384 images, 2 repeats
    python scripts/bench_dist.py --quick    # a smoke run
"""
from __future__ import annotations

import argparse
import os
import shutil
import socket
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def _port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _run(variant: str, corpus: Path, out: Path, args) -> float:
    worker = [__file__, "--worker", "--corpus", str(corpus), "--out", str(out), "--size", str(args.size),
              "--layers", args.layers]
    if variant == "1x2":
        cmd, env = [sys.executable, *worker, "--threads", "2"], dict(os.environ, OMP_NUM_THREADS="2")
    else:
        cmd = [sys.executable, "-m", "torch.distributed.run", "--nproc-per-node", "2", "--master-port", str(_port()),
               *worker, "--threads", "1"]
        env = dict(os.environ, OMP_NUM_THREADS="1")
    shutil.rmtree(out, ignore_errors=True)
    r = subprocess.run(cmd, env=env, cwd=ROOT, capture_output=True, text=True)
    if r.returncode != 0:
        sys.exit(f"{variant} failed:\n{r.stderr[-3000:]}")
    return float(r.stdout.strip().splitlines()[-1].split()[-1])


def worker(args) -> None:
    import torch

    from unitlens import MineConfig, dist, load_model, mine, open_corpus, parse_layers

    torch.set_num_threads(args.threads)
    m = load_model("torchvision:resnet18", size=args.size)
    layers = parse_layers(m, [args.layers])
    corpus = open_corpus(args.corpus)
    g = dist.group()
    g.barrier("the start of the benchmark")
    t = time.perf_counter()
    mine(m, corpus, layers, args.out, MineConfig(top_k=4, batch_size=32, workers=0, checkpoint_seconds=60))
    if g.main:
        print(f"mining seconds {time.perf_counter() - t:.3f}")


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--images", type=int, default=384)
    p.add_argument("--size", type=int, default=128)
    p.add_argument("--layers", default="layer3:0-63")
    p.add_argument("--repeats", type=int, default=2)
    p.add_argument("--quick", action="store_true")
    p.add_argument("--worker", action="store_true", help=argparse.SUPPRESS)
    p.add_argument("--corpus", type=Path, help=argparse.SUPPRESS)
    p.add_argument("--out", type=Path, help=argparse.SUPPRESS)
    p.add_argument("--threads", type=int, default=1, help=argparse.SUPPRESS)
    args = p.parse_args()
    if args.worker:
        return worker(args)
    if args.quick:
        args.images, args.size, args.repeats = 64, 64, 1

    from unitlens.demo.swatches import write_corpus

    load0 = os.getloadavg()[0]  # other work on the machine: OpenMP threads suffer most from it
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        corpus = tmp / "corpus"
        write_corpus(corpus, count=args.images, size=160)
        times = {v: [] for v in ("1x2", "2x1")}
        for k in range(args.repeats):
            for v in (("1x2", "2x1") if k % 2 == 0 else ("2x1", "1x2")):
                times[v].append(_run(v, corpus, tmp / "out", args))
                print(f"  {v}: {times[v][-1]:.1f} s", file=sys.stderr)
    med = {v: statistics.median(t) for v, t in times.items()}
    print(f"\nResNet-18 to {args.layers} at {args.size} px, {args.images} images, {os.cpu_count()} cores, "
          f"median of {args.repeats} (all runs: {times}); load average {load0:.1f} before, "
          f"{os.getloadavg()[0]:.1f} after")
    print(f"{'variant':<24} {'mining (s)':>10} {'img/s':>7} {'img/s per process':>18}")
    for v, name, procs in (("1x2", "1 process x 2 threads", 1), ("2x1", "2 processes x 1 thread", 2)):
        rate = args.images / med[v]
        print(f"{name:<24} {med[v]:>10.1f} {rate:>7.1f} {rate / procs:>18.1f}")
    print(f"\nspeed of 2 processes x 1 thread relative to 1 process x 2 threads: {med['1x2'] / med['2x1']:.2f}")

if __name__ == "__main__":
    main()
