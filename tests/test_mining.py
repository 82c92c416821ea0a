"""Mining: streaming top-K against brute force, determinism, resume, statistics."""
import json
import os
import re
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
import torch

from conftest import ROOT, TESTS, run_cli
from unitlens import MineConfig, load_model, mine, open_corpus, parse_layers, unit_summary
from unitlens.tally import HIST_BINS, PAD, LayerTally, class_selectivity, hist_edges, keep_best
from unitlens.store import Run


def _brute_force(model, corpus, layer, units):
    """Independent oracle: the WHOLE network with a plain forward hook, every value kept, sorted at the end."""
    from unitlens.corpus import batches

    seen = []
    h = model.module.get_submodule(layer).register_forward_hook(lambda m, i, o: seen.append(o[:, units]))
    ids = []
    with torch.no_grad():
        for b in batches(corpus, model.preprocess.frame, batch_size=5, workers=0):
            model.module(model.normalize(b.images))
            ids.append(b.indices)
    h.remove()
    f = torch.cat(seen).flatten(2)  # (N, U, HW)
    return torch.cat(ids), f.max(2), f.min(2), f


def test_top_k_equals_brute_force(tmp_path, smooth_corpus, r18_weights):
    model = load_model("torchvision:resnet18", str(r18_weights), size=64)
    corpus = open_corpus(smooth_corpus)
    layers = parse_layers(model, ["layer2:0-7", "layer3:3,9,100"])
    run = mine(model, corpus, layers, tmp_path / "run", MineConfig(top_k=5, batch_size=4, workers=0))
    for lu in layers:
        idx = run.index(lu.layer)
        ids, (mx, amx), (mn, amn), f = _brute_force(model, corpus, lu.layer, list(lu.units))
        W = model.layer(lu.layer).width
        for u in range(len(lu.units)):
            # sort by score, ties by corpus order (np.lexsort: last key is primary)
            order = np.lexsort((ids.numpy(), -mx[:, u].numpy()))[:5]
            assert idx["top_image"][u].tolist() == ids[order].tolist()
            np.testing.assert_allclose(idx["top_score"][u], mx[order, u].numpy(), rtol=0, atol=1e-5)
            assert (idx["top_y"][u] * W + idx["top_x"][u]).tolist() == amx[order, u].tolist()
            order = np.lexsort((ids.numpy(), mn[:, u].numpy()))[:5]
            assert idx["bottom_image"][u].tolist() == ids[order].tolist()
            # statistics against numpy on the same per-image maxima
            m = mx[:, u].double().numpy()
            np.testing.assert_allclose(idx["mean_max"][u], m.mean(), rtol=1e-6)
            np.testing.assert_allclose(idx["std_max"][u], m.std(), rtol=1e-4, atol=1e-7)
            np.testing.assert_allclose(idx["mean_mean"][u], f[:, u].double().mean(1).mean().item(), rtol=1e-5)
            assert idx["fire_rate"][u] == pytest.approx((m > 0).mean())
            assert idx["hist"][u].sum() == len(corpus)
        # per-image values on disk match the brute force
        vals = np.load(run.layer_dir(lu.layer) / "values.npy")
        np.testing.assert_allclose(vals[ids.numpy()], mx.numpy(), rtol=2e-3, atol=2e-3)


def test_same_result_for_any_batch_size_and_worker_count(tmp_path, smooth_corpus, r18_weights):
    model = load_model("torchvision:resnet18", str(r18_weights), size=64)
    corpus = open_corpus(smooth_corpus)
    layers = parse_layers(model, ["layer3:0-31"])
    results = []
    for i, (bs, workers) in enumerate([(1, 0), (7, 0), (32, 2)]):
        run = mine(model, corpus, layers, tmp_path / f"r{i}", MineConfig(top_k=6, batch_size=bs, workers=workers))
        results.append(run.index("layer3"))
    for other in results[1:]:
        for key in ("top_image", "top_y", "top_x", "bottom_image", "bottom_y", "bottom_x", "hist"):
            np.testing.assert_array_equal(results[0][key], other[key], err_msg=key)
        np.testing.assert_allclose(results[0]["top_score"], other["top_score"], atol=1e-6)


def test_merge_breaks_ties_by_corpus_order_like_lexsort():
    # worked check against numpy's lexsort over the full list (numpy as the reference library)
    rng = np.random.default_rng(1)
    scores = rng.integers(0, 4, size=(3, 40)).astype(np.float32)  # many ties
    k = 7
    val = torch.full((3, k), -np.inf)
    img = torch.full((3, k), PAD, dtype=torch.long)
    pos = torch.zeros((3, k), dtype=torch.long)
    for lo in range(0, 40, 6):  # arbitrary batch boundaries
        ids = torch.arange(lo, min(lo + 6, 40)).view(1, -1).expand(3, -1)
        val, img, pos = keep_best(val, img, pos, torch.from_numpy(scores[:, lo:lo + 6]), ids, ids, k, True)
    for u in range(3):
        expect = np.lexsort((np.arange(40), -scores[u]))[:k]
        assert img[u].tolist() == expect.tolist()


def test_tallies_merge_exactly_across_disjoint_shards():
    torch.manual_seed(0)
    f = torch.randn(30, 4, 3, 3)
    ids = torch.arange(30)
    cls = ids % 3
    whole = LayerTally((0, 1, 2, 3), 4, 3, 5, 3)
    whole.update(f, ids, cls)
    a, b = LayerTally((0, 1, 2, 3), 4, 3, 5, 3), LayerTally((0, 1, 2, 3), 4, 3, 5, 3)
    a.update(f[::2], ids[::2], cls[::2])
    b.update(f[1::2], ids[1::2], cls[1::2])
    b.merge(a)
    for k in LayerTally.STATE:
        np.testing.assert_allclose(getattr(whole, k).numpy(), getattr(b, k).numpy(), err_msg=k)


def test_histogram_bins_agree_with_numpy():
    x = torch.tensor([[-3.0], [-0.001], [0.0], [0.02], [0.5], [7.0], [7.0], [1e6]])
    t = LayerTally((0,), 1, 1, 2, 0)
    t.update(x.view(-1, 1, 1, 1), torch.arange(len(x)), None)
    edges = hist_edges()
    expect = np.histogram(np.clip(x.numpy().ravel(), edges[0], edges[-1] - 1e-9), bins=edges)[0]
    np.testing.assert_array_equal(t.hist[0].numpy(), expect)
    assert t.hist.shape[1] == HIST_BINS


def test_class_selectivity_worked_example():
    # Morcos et al. 2018: CSI = (mu_max - mu_-max) / (mu_max + mu_-max). By hand: class means
    # (4, 2, 0) -> mu_max = 4, mu_-max = (2 + 0) / 2 = 1, CSI = 3 / 5 = 0.6; equal means -> 0;
    # one class only -> 1.
    means = np.array([[4.0, 1.0, 5.0], [2.0, 1.0, 0.0], [0.0, 1.0, 0.0]])
    np.testing.assert_allclose(class_selectivity(means), [0.6, 0.0, 1.0], atol=1e-6)


def test_rerun_is_a_no_op_and_other_settings_are_refused(tmp_path, smooth_corpus, r18_weights):
    from unitlens import UnitlensError

    model = load_model("torchvision:resnet18", str(r18_weights), size=64)
    corpus = open_corpus(smooth_corpus)
    layers = parse_layers(model, ["layer1:0-3"])
    run = mine(model, corpus, layers, tmp_path / "r", MineConfig(top_k=3, workers=0))
    stamp = (run.layer_dir("layer1") / "index.npz").stat().st_mtime_ns
    mine(model, corpus, layers, tmp_path / "r", MineConfig(top_k=3, workers=0))
    assert (run.layer_dir("layer1") / "index.npz").stat().st_mtime_ns == stamp
    with pytest.raises(UnitlensError, match="other settings"):
        mine(model, corpus, layers, tmp_path / "r", MineConfig(top_k=4, workers=0))


def _mine_cmd(corpus, weights, out, *extra):
    return [sys.executable, "-m", "unitlens", "mine", "torchvision:resnet18", "--weights", str(weights),
            "--size", "96", "--corpus", str(corpus), "--layers", "layer2,layer3", "--top", "4",
            "--batch-size", "2", "--workers", "0", "--out", str(out), *extra]


def test_resume_after_sigkill_matches_uninterrupted(tmp_path, r18_weights):
    from PIL import Image

    corpus = tmp_path / "c"
    corpus.mkdir()
    rng = np.random.default_rng(3)
    for i in range(80):
        Image.fromarray(rng.integers(0, 255, (96, 96, 3), dtype=np.uint8)).save(corpus / f"{i:03d}.png")
    run_cli(*_mine_cmd(corpus, r18_weights, tmp_path / "whole")[3:])
    out = tmp_path / "killed"
    # Held for good on the 21st tally update (batch 11 of 40, tests/pause.py), checkpointing every batch,
    # so the kill lands part-way on any machine.
    marker = tmp_path / "paused"
    p = subprocess.Popen([sys.executable, str(ROOT / "tests" / "pause.py"), "unitlens.mining:LayerTally.added", "21",
                          str(marker), "--", *_mine_cmd(corpus, r18_weights, out, "--checkpoint-every", "0")[3:]],
                         cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    state = out / "mine" / "state.json"
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and p.poll() is None and not marker.is_file():
        time.sleep(0.05)
    os.kill(p.pid, signal.SIGKILL)
    assert p.wait() == -signal.SIGKILL and marker.is_file()
    done_before = json.loads(state.read_text())["next"]
    assert done_before == 20, "the kill should land part-way"
    run_cli(*_mine_cmd(corpus, r18_weights, out)[3:])
    for layer in ("layer2", "layer3"):
        a, b = Run(tmp_path / "whole").index(layer), Run(out).index(layer)
        for key in a:
            if a[key].dtype.kind in "iub":
                np.testing.assert_array_equal(a[key], b[key], err_msg=key)
            else:
                np.testing.assert_allclose(a[key], b[key], atol=1e-6, equal_nan=True, err_msg=key)
        np.testing.assert_array_equal(np.load(Run(tmp_path / "whole").layer_dir(layer) / "values.npy"),
                                      np.load(Run(out).layer_dir(layer) / "values.npy"))


def test_show_json_lists_exemplars_with_source_paths_and_boxes(tmp_path, smooth_corpus, r18_weights):
    out = tmp_path / "r"
    run_cli("mine", "torchvision:resnet18", "--weights", r18_weights, "--size", "64", "--corpus", smooth_corpus,
            "--layers", "layer3", "--units", "0-3", "--top", "3", "--workers", "0", "--out", out)
    r = run_cli("show", out, "layer3:2", "--json")
    s = json.loads(r.stdout)
    assert len(s["exemplars"]) == 3
    for e in s["exemplars"]:
        assert os.path.isfile(e["image"])
        x0, y0, x1, y1 = e["box"]
        assert 0 <= x0 < x1 and 0 <= y0 < y1
    assert s["exemplars"][0]["score"] >= s["exemplars"][-1]["score"]
    text = run_cli("show", out, "layer3:2").stdout
    assert "top exemplars" in text
    bad = run_cli("show", out, "layer3:9", check=False)
    assert bad.returncode == 1 and "was not mined" in bad.stderr


def test_digit_logits_top_nine_are_that_digit(tmp_path):
    # scikit-learn's bundled digits (UCI optical digits): a small CNN trained here; the top-9
    # exemplars of each digit's logit must be (at least 8 of 9) images of that digit.
    from PIL import Image

    from digits import MEAN, SIZE, STD, digit_images, train_digits_net

    acc = train_digits_net(tmp_path / "digits.pth", epochs=20)
    assert acc > 0.95
    images, labels = digit_images()
    d = tmp_path / "digits"
    for i in range(0, len(images), 2):  # 899 images, in folders named by digit
        (d / str(int(labels[i]))).mkdir(parents=True, exist_ok=True)
        Image.fromarray(images[i].permute(1, 2, 0).numpy()).save(d / str(int(labels[i])) / f"{i:04d}.png")
    model = load_model(f"{TESTS / 'nets.py'}:digits_net", str(tmp_path / "digits.pth"), size=SIZE, mean=MEAN, std=STD)
    corpus = open_corpus(d, labels="folders")
    run = mine(model, corpus, parse_layers(model, ["7"]), tmp_path / "run", MineConfig(top_k=9, workers=0))
    for digit in range(10):
        labels_top = [e["label"] for e in unit_summary(run, "7", digit)["exemplars"]]
        assert sum(label == str(digit) for label in labels_top) >= 8, (digit, labels_top)
    # the logits are class-selective: CSI (Morcos et al. 2018) well above that of an untrained net
    s = unit_summary(run, "7", 3)["stats"]
    assert s["class_means"]["3"] == max(s["class_means"].values())


def test_changed_corpus_is_detected_and_reported(tmp_path, r18_weights):
    from PIL import Image

    from unitlens import UnitlensError

    d = tmp_path / "c"
    d.mkdir()
    for i in range(6):
        Image.new("RGB", (40, 40), (40 * i, 10, 10)).save(d / f"{i}.png")
    model = load_model("torchvision:resnet18", str(r18_weights), size=32)
    layers = parse_layers(model, ["layer1:0"])
    mine(model, open_corpus(d), layers, tmp_path / "r", MineConfig(workers=0, batch_size=2), stop=lambda done: done >= 2)
    Image.new("RGB", (40, 40)).save(d / "new.png")
    with pytest.raises(UnitlensError, match="corpus changed since this run started.*1 added"):
        mine(model, open_corpus(d), layers, tmp_path / "r", MineConfig(workers=0, batch_size=2))


def test_a_run_stopped_while_finishing_completes_when_run_again(tmp_path, smooth_corpus, r18_weights, monkeypatch):
    import unitlens.facets
    from unitlens import UnitlensError

    model = load_model("torchvision:resnet18", str(r18_weights), size=64)
    corpus = open_corpus(smooth_corpus)
    layers = parse_layers(model, ["layer1:0-3"])  # a subset of 64 channels: pooled.npy feeds the embedding

    def stop(*args, **kw):
        raise KeyboardInterrupt

    monkeypatch.setattr(unitlens.facets, "finish_layers", stop)
    with pytest.raises(KeyboardInterrupt):
        mine(model, corpus, layers, tmp_path / "r", MineConfig(top_k=3, workers=0))
    assert not Run(tmp_path / "r").manifest()["mine"]["done"]
    monkeypatch.undo()
    run = mine(model, corpus, layers, tmp_path / "r", MineConfig(top_k=3, workers=0))
    entry = run.manifest()["mine"]["layers"]["layer1"]
    assert run.manifest()["mine"]["done"] and "embedding" in entry and "facets" in entry
    # Resuming over a lost or foreign per-image file is refused instead of leaving zeros in earlier rows.
    from unitlens.mining import open_rows

    values = run.layer_dir("layer1") / "values.npy"
    assert open_rows(values, (len(corpus), 4), fresh=False).shape == (len(corpus), 4)
    with pytest.raises(UnitlensError, match="Cannot resume mining: .*holds float32"):
        open_rows(values, (len(corpus), 5), fresh=False)
    values.unlink()
    with pytest.raises(UnitlensError, match="Cannot resume mining: .*values.npy is missing"):
        open_rows(values, (len(corpus), 4), fresh=False)


def test_a_checkpoint_whose_json_lags_its_tallies_resumes_without_counting_twice(tmp_path, smooth_corpus, r18_weights,
                                                                                  monkeypatch):
    # A process killed between writing state.npz and state.json leaves new tallies beside an old
    # resume point; the resume point saved inside the npz wins.
    import unitlens.corpus as corpus_module
    from unitlens import UnitlensError

    model = load_model("torchvision:resnet18", str(r18_weights), size=64)
    corpus = open_corpus(smooth_corpus)
    layers = parse_layers(model, ["layer1:0-3"])
    cfg = MineConfig(top_k=3, workers=0, batch_size=4, checkpoint_seconds=0.0)
    whole = mine(model, corpus, layers, tmp_path / "whole", cfg)
    real = corpus_module.batches

    def three_then_stop(*args, **kw):
        for n, b in enumerate(real(*args, **kw)):
            if n == 3:
                raise KeyboardInterrupt
            yield b

    monkeypatch.setattr(corpus_module, "batches", three_then_stop)
    with pytest.raises(UnitlensError, match="Interrupted after 12 of 24"):
        mine(model, corpus, layers, tmp_path / "r", cfg)
    monkeypatch.undo()
    state = tmp_path / "r" / "mine" / "state.json"
    state.write_text(json.dumps({**json.loads(state.read_text()), "next": 4}))  # as if the json write was lost
    run = mine(model, corpus, layers, tmp_path / "r", cfg)
    a, b = whole.index("layer1"), run.index("layer1")
    assert int(b["count"]) == len(corpus) == 24
    for key in ("top_image", "top_score", "bottom_image", "mean_max", "hist"):
        np.testing.assert_array_equal(a[key], b[key])


@pytest.mark.parametrize("where", ["forward", "after_tally"])
def test_an_interrupt_inside_a_batch_resumes_to_the_uninterrupted_result(tmp_path, smooth_corpus, r18_weights,
                                                                         monkeypatch, where):
    # KeyboardInterrupt raised inside the forward pass, or just after the first layer's tally took the
    # batch: the checkpoint must hold whole batches only, so the resumed run equals a run never stopped.
    import shutil

    import unitlens.mining as mining_module
    from unitlens import UnitlensError

    d = tmp_path / "c"
    d.mkdir()
    for p in sorted(smooth_corpus.iterdir())[:10]:
        shutil.copy(p, d / p.name)
    (d / "img03b.png").write_bytes(b"not an image")  # a skipped file in the interrupted batch
    model = load_model("torchvision:resnet18", str(r18_weights), size=32)
    corpus = open_corpus(d)
    layers = parse_layers(model, ["layer1:0-3", "layer2:0-5"])
    cfg = MineConfig(top_k=3, workers=0, batch_size=3, checkpoint_seconds=0.0)
    whole = mine(model, corpus, layers, tmp_path / "whole", cfg)
    target, real = {"forward": ("forward_batch", mining_module.forward_batch),
                    "after_tally": ("_fit", mining_module._fit)}[where]
    calls = []

    def interrupt_on_second_batch(*args, **kw):
        calls.append(1)
        out = real(*args, **kw)
        if len(calls) == (2 if where == "forward" else 7):  # _fit: 3 calls per layer and batch
            raise KeyboardInterrupt
        return out

    monkeypatch.setattr(mining_module, target, interrupt_on_second_batch)
    with pytest.raises(UnitlensError, match="Interrupted after 3 of 11 images"):
        mine(model, corpus, layers, tmp_path / "r", cfg)
    monkeypatch.undo()
    run = mine(model, corpus, layers, tmp_path / "r", cfg)
    for lu in layers:
        a, b = whole.index(lu.layer), run.index(lu.layer)
        assert int(b["count"]) == 10
        for key in a:
            np.testing.assert_array_equal(a[key], b[key], err_msg=key)
        np.testing.assert_array_equal(np.load(whole.layer_dir(lu.layer) / "values.npy"),
                                      np.load(run.layer_dir(lu.layer) / "values.npy"))
    ma, mb = whole.manifest(), run.manifest()
    assert ma["corpus"]["skipped"] == mb["corpus"]["skipped"] and len(mb["corpus"]["skipped"]) == 1
    assert ma["mine"]["colour"] == mb["mine"]["colour"]


def test_a_corpus_without_one_usable_image_is_an_error_naming_the_skipped_files(tmp_path, r18_weights):
    d = tmp_path / "c"
    d.mkdir()
    (d / "a.png").write_bytes(b"not an image")
    (d / "b.jpg").write_bytes(b"\xff\xd8\xff\xe0 truncated")
    r = run_cli("mine", "torchvision:resnet18", "--weights", r18_weights, "--size", "32", "--corpus", d,
                "--layers", "layer1:0", "--workers", "0", "--out", tmp_path / "r", check=False)
    assert r.returncode == 1 and "Traceback" not in r.stderr, r.stderr
    line = r.stderr.strip().splitlines()[-1]
    assert line.startswith("Error: No usable image") and "a.png: " in line and "b.jpg: " in line, line
    assert not Run(tmp_path / "r").manifest()["mine"]["done"]
    shown = run_cli("show", tmp_path / "r", "layer1:0", check=False)  # not a TypeError from an empty index
    assert shown.returncode == 1 and shown.stderr.startswith("Error: Layer 'layer1' has not been mined"), shown.stderr


def test_force_deletes_only_what_the_manifest_says_mining_wrote(tmp_path, smooth_corpus, r18_weights):
    from unitlens import UnitlensError

    model = load_model("torchvision:resnet18", str(r18_weights), size=32)
    corpus = open_corpus(smooth_corpus)
    layers = parse_layers(model, ["layer1:0-1"])
    cfg = MineConfig(top_k=2, workers=0)
    # a folder that is not a run: its mine/ is the user's, with or without --force
    notes = tmp_path / "notes" / "mine" / "todo.txt"
    notes.parent.mkdir(parents=True)
    notes.write_text("mine the quarry on monday")
    for force in (False, True):
        with pytest.raises(UnitlensError, match="holds a mine/ folder but no manifest.json"):
            mine(model, corpus, layers, tmp_path / "notes", cfg, force=force)
        assert notes.read_text() == "mine the quarry on monday"
    # a run: --force replaces the mined layers and checkpoints, and keeps what the user put beside them
    run = mine(model, corpus, layers, tmp_path / "r", cfg)
    mine_dir = run.path / "mine"
    (mine_dir / "todo.txt").write_text("keep")
    (mine_dir / "state.json").write_text("{}")  # as a stale checkpoint
    mine(model, corpus, parse_layers(model, ["layer2:0"]), tmp_path / "r", cfg, force=True)
    assert (mine_dir / "todo.txt").read_text() == "keep"
    assert not run.layer_dir("layer1").exists() and (run.layer_dir("layer2") / "index.npz").is_file()
    assert not (mine_dir / "state.json").exists()


def test_a_finished_run_loses_the_checkpoint_a_kill_during_clean_up_left(tmp_path, smooth_corpus, r18_weights):
    model = load_model("torchvision:resnet18", str(r18_weights), size=32)
    layers = parse_layers(model, ["layer1:0"])
    run = mine(model, open_corpus(smooth_corpus), layers, tmp_path / "r", MineConfig(top_k=2, workers=0))
    # what a process killed between marking the run done and removing its checkpoint leaves
    (run.path / "mine" / "state.json").write_text(json.dumps({"next": 24}))
    (run.path / "mine" / "layer1" / ".index.npz.x1.tmp").write_bytes(b"half")
    mine(model, open_corpus(smooth_corpus), layers, tmp_path / "r", MineConfig(top_k=2, workers=0))
    assert sorted(p.name for p in (run.path / "mine").rglob("*") if "state" in p.name or p.suffix == ".tmp") == []


def test_per_image_arrays_take_their_disk_blocks_when_created(tmp_path):
    # A sparse memory map takes its blocks at the first write into each page; on a full disk that
    # write kills the process with SIGBUS. Allocated up front, a full disk is an error at creation.
    from unitlens.mining import open_rows

    a = open_rows(tmp_path / "values.npy", (2000, 512), fresh=True)
    st = os.stat(tmp_path / "values.npy")
    assert st.st_blocks * 512 >= a.nbytes, (st.st_blocks * 512, a.nbytes)


def _no_space(free):
    import shutil

    real = shutil.disk_usage
    return lambda path: real(path)._replace(free=free)


def test_too_little_free_space_is_refused_before_anything_is_written(tmp_path, smooth_corpus, r18_weights,
                                                                      monkeypatch):
    import shutil

    from unitlens import UnitlensError
    from unitlens.mining import space_needed
    from unitlens.store import disk_bytes

    model = load_model("torchvision:resnet18", str(r18_weights), size=32)
    corpus = open_corpus(smooth_corpus)
    layers = parse_layers(model, ["layer2", "layer3:0-99"])
    cfg = MineConfig(top_k=4, workers=0)
    monkeypatch.setattr(shutil, "disk_usage", _no_space(72_000))
    with pytest.raises(UnitlensError, match=r"Not enough free space for this mining pass .*needs about [\d.]+ MB, "
                                            r"and the disk has 72 KB free.*resumes"):
        mine(model, corpus, layers, tmp_path / "r", cfg)
    assert not (tmp_path / "r").exists()
    monkeypatch.undo()
    run = mine(model, corpus, layers, tmp_path / "r", cfg)
    # the estimate against what the pass really left on disk (the checkpoint, gone now, came on top)
    written, estimate = disk_bytes(run.path / "mine"), space_needed(model, corpus, layers, cfg)
    assert written <= estimate <= 4 * written, (written, estimate)


def test_a_disk_filling_up_mid_pass_is_one_error_line_and_the_rerun_resumes(tmp_path, smooth_corpus, r18_weights,
                                                                           monkeypatch, capsys):
    import errno

    import unitlens.store as store
    from conftest import cli

    args = ["mine", "torchvision:resnet18", "--weights", r18_weights, "--size", "32", "--corpus", smooth_corpus,
            "--layers", "layer1:0-7", "--top", "3", "--workers", "0", "--batch-size", "4", "--checkpoint-every", "0"]
    code, _, err = cli(capsys, *args, "--out", tmp_path / "whole")
    assert code == 0, err
    real, writes = store.atomic_write, []

    def full_at_the_third_checkpoint(path, write):
        writes.append(path.name)
        if writes.count("state.npz") == 3:  # the write itself fails, as on a full disk

            def write(f):
                raise OSError(errno.ENOSPC, "No space left on device")
        real(path, write)

    monkeypatch.setattr(store, "atomic_write", full_at_the_third_checkpoint)
    code, _, err = cli(capsys, *args, "--out", tmp_path / "r")
    assert code == 1 and "Traceback" not in err and err.count("Error: ") == 1, err
    line = err.strip().splitlines()[-1]
    assert line.startswith("Error: The disk holding") and "writing " in line and "state.npz" in line, line
    assert re.search(r"needed about [\d.]+ [KM]B", line) and "resumes" in line, line
    monkeypatch.undo()
    assert json.loads((tmp_path / "r" / "mine" / "state.json").read_text())["next"] == 8  # two batches kept
    assert not list((tmp_path / "r").rglob("*.tmp"))
    code, _, err = cli(capsys, *args, "--out", tmp_path / "r")
    assert code == 0, err
    a, b = Run(tmp_path / "whole").index("layer1"), Run(tmp_path / "r").index("layer1")
    for key in a:
        np.testing.assert_array_equal(a[key], b[key], err_msg=key)


def test_stored_per_image_values_keep_activations_beyond_float16(tmp_path, smooth_corpus):
    # Oracle: the same network in float64, plain torch. float16's relative precision is 2**-11
    # (IEEE 754 binary16: 11 significant bits); the stored values must be at least that close.
    from unitlens.corpus import batches

    model = load_model(f"{TESTS / 'nets.py'}:extreme_net", size=32)
    corpus = open_corpus(smooth_corpus)
    layers = parse_layers(model, ["1", "2"])
    run = mine(model, corpus, layers, tmp_path / "r", MineConfig(top_k=3, workers=0))
    ref = {"1": [], "2": []}
    net = model.module.double()
    with torch.no_grad():
        for b in batches(corpus, 32, batch_size=8, workers=0):
            x = model.normalize(b.images).double()
            h1 = net[1](net[0](x))
            for name, f in (("1", h1), ("2", net[2](h1))):
                ref[name].append(torch.stack([f.flatten(2).amax(2), f.flatten(2).mean(2)]))
    model.module.float()
    for name in ("1", "2"):
        mx, mean = torch.cat(ref[name], 1).numpy()  # (N, C) each
        for kind, want in (("values", mx), ("means", mean)):
            got = np.load(run.layer_dir(name) / f"{kind}.npy")
            np.testing.assert_allclose(got, want, rtol=2**-11, atol=0)
    assert np.load(run.layer_dir("1") / "values.npy").max() > 65504 * 10
    small = np.load(run.layer_dir("2") / "means.npy")
    assert 0 < small[small > 0].min() and small.max() < 6e-8


def test_a_mining_pass_started_by_an_older_version_with_float16_files_resumes(tmp_path, smooth_corpus, r18_weights):
    model = load_model("torchvision:resnet18", str(r18_weights), size=64)
    corpus = open_corpus(smooth_corpus)
    layers = parse_layers(model, ["layer1:0-3"])
    cfg = MineConfig(top_k=3, workers=0, batch_size=4)
    whole = mine(model, corpus, layers, tmp_path / "whole", cfg)
    asked = []  # `stop` is asked after each batch with the corpus position reached
    mine(model, corpus, layers, tmp_path / "r", cfg, stop=lambda done: asked.append(done) or done >= 8)
    assert asked == [4, 8] and json.loads((tmp_path / "r" / "mine" / "state.json").read_text())["next"] == 8
    d = Run(tmp_path / "r").layer_dir("layer1")
    for f in ("values.npy", "means.npy", "pooled.npy"):
        np.save(d / f, np.load(d / f).astype(np.float16))  # as earlier versions wrote them
    run = mine(model, corpus, layers, tmp_path / "r", cfg)
    got, want = np.load(d / "values.npy"), np.load(whole.layer_dir("layer1") / "values.npy")
    assert got.dtype == np.float16
    np.testing.assert_allclose(got, want, rtol=2**-10, atol=1e-6)
    assert unit_summary(run, "layer1", 0)["exemplars"]
