"""unitlens/dist.py: mining and synthesis split over ranks with torch.distributed (gloo on 127.0.0.1).

The oracle is the same work done in one process (whose own results test_mining.py checks against
brute force): a two-rank job must keep the same exemplar ids, positions and scores bit for bit and
the same per-image values, with statistics equal up to float64 summation order.
"""
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import torch
from PIL import Image

from conftest import ROOT, TESTS, run_cli

from unitlens import MineConfig, SynthConfig, load_model, mine, open_corpus, parse_layers, run_all
from unitlens.synth import OVERNIGHT
from unitlens import dist
from unitlens.errors import UnitlensError
from unitlens.tally import merge_ranks

NET = f"{TESTS / 'nets.py'}:digits_net"
LAYERS = ["3:0-15", "6"]
EXACT = ("units", "count", "top_score", "top_image", "top_y", "top_x", "bottom_score", "bottom_image", "bottom_y",
         "bottom_x", "fire_rate", "low", "high", "hist", "class_count", "shape")
SUMS = ("mean_max", "std_max", "mean_mean", "class_mean", "csi")  # float64 sums added in another order


def _corpus(d: Path, n: int) -> Path:
    rng = np.random.default_rng(3)
    for i in range(n):
        c = d / ("stripes" if i % 3 else "dots")
        c.mkdir(parents=True, exist_ok=True)
        h, w = int(rng.integers(30, 60)), int(rng.integers(30, 60))
        base = rng.random((h // 6 + 2, w // 6 + 2, 3))
        Image.fromarray((base * 255).astype(np.uint8)).resize((w, h), Image.BICUBIC).save(c / f"im{i:03d}.png")
    (d / "stripes" / "broken.png").write_bytes(b"")  # skipped by whichever rank owns it
    return d


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    from nets import digits_net

    root = tmp_path_factory.mktemp("dist")
    torch.manual_seed(0)
    torch.save(digits_net().state_dict(), root / "digits.pth")
    return root, _corpus(root / "small", 40), root / "digits.pth"


def _port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _reference(weights, corpus, out, batch, synth_steps=None):
    """The single-process answer, in this process, with one thread like each rank."""
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        m = load_model(NET, str(weights), size=32)
        layers = parse_layers(m, LAYERS if synth_steps else LAYERS[:1])
        c = open_corpus(corpus, labels="folders" if synth_steps else None)
        cfg = MineConfig(top_k=4, batch_size=batch, workers=0)
        if synth_steps:
            return run_all(m, c, layers, out, cfg, SynthConfig(steps=synth_steps, size=32, **OVERNIGHT), log=lambda msg: None)
        return mine(m, c, layers, out, cfg)
    finally:
        torch.set_num_threads(threads)


def _same_mining(a: Path, b: Path, layers) -> None:
    for layer in layers:
        ia, ib = np.load(a / "mine" / layer / "index.npz"), np.load(b / "mine" / layer / "index.npz")
        for k in EXACT:
            np.testing.assert_array_equal(ia[k], ib[k], err_msg=f"{layer}/{k}")
        for k in SUMS:
            np.testing.assert_allclose(ia[k], ib[k], rtol=1e-9, atol=1e-12, err_msg=f"{layer}/{k}")
        for kind in ("values", "means"):
            np.testing.assert_array_equal(np.load(a / "mine" / layer / f"{kind}.npy"),
                                          np.load(b / "mine" / layer / f"{kind}.npy"), err_msg=f"{layer}/{kind}")
    import json

    ma, mb = (json.loads((p / "manifest.json").read_text()) for p in (a, b))
    assert ma["corpus"]["skipped"] == mb["corpus"]["skipped"] == [{"file": "stripes/broken.png", "reason": "empty file"}]
    np.testing.assert_allclose(ma["mine"]["colour"]["cov"], mb["mine"]["colour"]["cov"], rtol=1e-9)
    assert mb["mine"]["done"]
    assert not [p.name for p in b.rglob("*rank*")]  # parts and checkpoints merged and removed


def _rank_env(rank: int, world: int, port: int, **extra) -> dict:
    return dict(os.environ, RANK=str(rank), LOCAL_RANK=str(rank), WORLD_SIZE=str(world), MASTER_ADDR="127.0.0.1",
                MASTER_PORT=str(port), OMP_NUM_THREADS="1", **extra)


@pytest.mark.slow
def test_torchrun_run_equals_one_process(setup):
    import json

    root, corpus, weights = setup
    ref = root / "ref-run"
    _reference(weights, corpus, ref, batch=8, synth_steps=8)
    out = root / "torchrun-run"
    r = subprocess.run([sys.executable, "-m", "torch.distributed.run", "--nproc-per-node", "2", "--master-port",
                        str(_port()), "-m", "unitlens", "run", NET, "--weights", weights, "--size", "32", "--corpus",
                        corpus, "--labels", "folders", *[a for lay in LAYERS for a in ("--layers", lay)], "--top", "4",
                        "--batch-size", "8", "--workers", "0", "--steps", "8", "--synth-size", "32", "--out", out],
                       capture_output=True, text=True, cwd=ROOT, timeout=300, env=dict(os.environ, OMP_NUM_THREADS="1"))
    assert r.returncode == 0, r.stderr[-3000:]
    _same_mining(ref, out, ["3", "6"])
    assert (out / "atlas" / "index.html").is_file()
    for layer in ("3", "6"):
        ua, ub = (json.loads((p / "synth" / layer / "units.json").read_text())["units"] for p in (ref, out))
        assert sorted(ua, key=int) == sorted(ub, key=int) == [str(u) for u in parse_layers(
            load_model(NET, str(weights), size=32), [LAYERS[0] if layer == "3" else "6"])[0].units]
        for u, rec in ua.items():
            # the seed of a unit depends on (seed, layer, unit, image) only; the pixels differ only by the rounding
            # of batched convolutions (8 batch-mates instead of 16), as for another batch size in one process
            assert [im["steps"] for im in rec["images"]] == [im["steps"] for im in ub[u]["images"]]
            np.testing.assert_allclose(rec["images"][0]["objective"], ub[u]["images"][0]["objective"], rtol=1e-4, atol=1e-6)
            pa, pb = (np.asarray(Image.open(p / "synth" / layer / rec["images"][0]["file"]), dtype=int) for p in (ref, out))
            assert np.abs(pa - pb).max() <= 2, (layer, u)
    m = json.loads((out / "manifest.json").read_text())
    assert m["synth"]["done"] and all(v["complete"] for v in m["synth"]["layers"].values())


@pytest.mark.slow
def test_a_killed_rank_stops_the_other_naming_it_and_a_rerun_resumes(setup):
    root, _, weights = setup
    corpus = _corpus(root / "large", 200)
    out, port = root / "killed", _port()
    cmd = [sys.executable, "-m", "unitlens", "mine", NET, "--weights", weights, "--size", "32", "--corpus", corpus,
           "--layers", LAYERS[0], "--top", "4", "--batch-size", "2", "--workers", "0", "--checkpoint-every", "0",
           "--out", out]
    procs = [subprocess.Popen(cmd, env=_rank_env(r, 2, port, UNITLENS_DIST_TIMEOUT="5"), cwd=ROOT, text=True,
                              stdout=subprocess.PIPE, stderr=subprocess.STDOUT) for r in range(2)]
    state = out / "mine" / "state-rank1of2.json"
    t0 = time.monotonic()
    while not state.is_file() and time.monotonic() - t0 < 120 and procs[1].poll() is None:
        time.sleep(0.02)
    assert state.is_file(), procs[1].communicate()[0]
    procs[1].send_signal(signal.SIGKILL)  # no goodbye: only the missing heartbeat tells rank 0
    text = procs[0].communicate(timeout=90)[0]  # a survivor that never noticed would hang here and fail
    assert procs[0].returncode == 1, text
    assert "rank 1 has given no sign of life" in text and "Error: rank 0" in text, text
    assert not (out / "mine" / "3" / "index.npz").exists()

    # one process cannot take over the two ranks' checkpoints: it is refused, and nothing is lost
    r = run_cli(*cmd[3:], check=False)
    assert r.returncode == 1 and "another number of processes" in r.stderr, r.stderr
    assert state.is_file()

    # the same command again: each rank resumes from its own checkpoint
    port = _port()
    procs = [subprocess.Popen(cmd, env=_rank_env(r, 2, port), cwd=ROOT, text=True, stdout=subprocess.PIPE,
                              stderr=subprocess.STDOUT) for r in range(2)]
    for p in procs:
        text = p.communicate(timeout=180)[0]
        assert p.returncode == 0, text
    ref = root / "killed-ref"
    _reference(weights, corpus, ref, batch=2)
    _same_mining(ref, out, ["3"])


@pytest.mark.slow
def test_torchrun_fails_the_job_naming_the_rank_that_died(setup):
    root, corpus, weights = setup
    corpus = root / "large" if (root / "large").is_dir() else _corpus(root / "large", 200)
    out = root / "torchrun-killed"
    p = subprocess.Popen([sys.executable, "-m", "torch.distributed.run", "--nproc-per-node", "2", "--master-port",
                          str(_port()), "-m", "unitlens", "mine", NET, "--weights", weights, "--size", "32", "--corpus",
                          corpus, "--layers", LAYERS[0], "--batch-size", "2", "--workers", "0", "--checkpoint-every",
                          "0", "--out", out], cwd=ROOT, text=True, stdout=subprocess.PIPE, stderr=subprocess.STDOUT)
    state = out / "mine" / "state-rank1of2.json"
    t0 = time.monotonic()
    while not state.is_file() and time.monotonic() - t0 < 120 and p.poll() is None:
        time.sleep(0.02)
    victim = [c for c in _children(p.pid) if b"RANK=1\0" in Path(f"/proc/{c}/environ").read_bytes()]
    assert len(victim) == 1
    os.kill(victim[0], signal.SIGKILL)
    text = p.communicate(timeout=90)[0]  # a job that never noticed would hang here and fail
    assert p.returncode != 0
    assert "rank: 1" in text and "Signal 9" in text, text[-2000:]  # torchrun's failure summary


def _children(pid: int) -> list[int]:
    return [int(c) for t in Path(f"/proc/{pid}/task").iterdir() for c in (t / "children").read_text().split()]


def test_one_process_has_no_process_group_and_splits_nothing():
    assert not dist.launched()
    g = dist.group()
    assert (g.rank, g.world, g.main) == (0, 1, True)
    assert not torch.distributed.is_initialized()
    assert list(g.blocks(10, 4)) == list(range(10)) and g.part(Path("a/values.npy")) == Path("a/values.npy")
    assert g.gather({"x": 1}, "test") == [{"x": 1}] and g.share(5, "test") == 5


@pytest.mark.parametrize("n, block, world", [(10, 4, 3), (41, 8, 2), (7, 2, 5), (3, 32, 4), (64, 8, 4)])
def test_shards_partition_the_corpus_in_whole_batches_and_reassemble(tmp_path, n, block, world):
    """Oracle: numpy's own batches of `block` rows, dealt round-robin (common practice, "block-cyclic")."""
    full = np.random.default_rng(n).standard_normal((n, 3)).astype(np.float16)
    groups = [dist.Group(r, world) for r in range(world)]
    shards = [list(g.blocks(n, block)) for g in groups]
    assert sorted(i for s in shards for i in s) == list(range(n))
    batches = [list(range(s, min(n, s + block))) for s in range(0, n, block)]
    for r, s in enumerate(shards):
        assert s == [i for b in batches[r::world] for i in b]  # the same batches one process makes
        np.testing.assert_array_equal(groups[r].row(np.array(s, dtype=np.int64), block), np.arange(len(s)))
        np.save(groups[r].part(tmp_path / "values.npy"), full[s])
    dist.assemble_rows(groups[0], tmp_path / "values.npy", n, block)
    np.testing.assert_array_equal(np.load(tmp_path / "values.npy"), full)


def test_cuda_is_refused_clearly_where_there_is_none(setup):
    _, _, weights = setup
    m = load_model(NET, str(weights), size=32)
    with pytest.raises(UnitlensError, match="takes cpu, cuda or cuda:N"):
        dist.place(m, "tpu")
    if torch.cuda.is_available():
        pytest.skip("this machine has CUDA")
    with pytest.raises(UnitlensError, match="CUDA is not available here"):
        dist.place(m, "cuda")
    assert dist.place(m, "cpu") is m and m.device == "cpu"


def test_merged_colour_sums_keep_the_channel_count_of_a_grey_model():
    from types import SimpleNamespace

    # two ranks that both measured the same grey pixels: the merge is exactly twice one rank's sums
    colour = [torch.tensor([3.0], dtype=torch.float64), torch.tensor([[5.0]], dtype=torch.float64), 7]
    g = SimpleNamespace(world=2, main=True, gather=lambda obj, what: [obj, obj])
    _tallies, total, _skipped = merge_ranks(g, {}, colour, [], [])
    assert total[0].tolist() == [6.0] and total[1].tolist() == [[10.0]] and total[2] == 14
