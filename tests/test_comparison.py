"""Comparison: CKA and unbiased HSIC against their definitions, relabelled units, a fine-tuning
experiment and twin networks on scikit-learn's digits, dead units, and the `compare` command."""
import copy
import csv
import itertools
import json

import numpy as np
import pytest
import torch

from conftest import TESTS, run_cli
from digits import MEAN, SIZE, STD, digit_images, normalize
from digits_finetune import BLOCKS, accuracy, permute_block, seeded_net, silence_unit, train, write_corpus
from unitlens import CompareConfig, MineConfig, UnitlensError, compare, load_model, mine, open_corpus, parse_layers
from unitlens._cka import resampled_cka, hsic_unbiased, linear_cka, minibatch_cka

SPEC = f"{TESTS / 'digits_finetune.py'}:digits_bn_net"
PROBE = 600  # the first 600 digits are the probe corpus; the networks train on the other 1197
QUICK = CompareConfig(workers=0, bootstrap=50)


@pytest.fixture(scope="module", autouse=True)
def one_thread():
    # These tensors are tiny: a second thread only adds synchronisation (10x slower on a busy machine).
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


@pytest.fixture(scope="module")
def digits(tmp_path_factory):
    """The probe corpus on disk and the networks: base (seed 0), twin (seed 1, independent), and
    tuned (base with blocks 3 and the class map retrained on parity, blocks 0-2 frozen)."""
    d = tmp_path_factory.mktemp("digits")
    x, y = digit_images()
    write_corpus(d / "corpus", x[:PROBE])
    xt, yt = x[PROBE:], y[PROBE:]
    base = train(seeded_net(0), xt, yt, epochs=4, seed=0)
    twin = train(seeded_net(1), xt, yt, epochs=4, seed=1)
    tuned = train(copy.deepcopy(base), xt, yt % 2, epochs=2, seed=2, tune=("3", "4"))
    assert accuracy(base, x[:PROBE], y[:PROBE]) > 0.9 and accuracy(twin, x[:PROBE], y[:PROBE]) > 0.9
    assert accuracy(tuned, x[:PROBE], y[:PROBE] % 2) > 0.9  # it did learn the new task
    nets = {"base": base, "twin": twin, "tuned": tuned}
    for name, net in nets.items():
        torch.save(net.state_dict(), d / f"{name}.pth")
    return {"dir": d, "corpus": d / "corpus", "images": x[:PROBE], "nets": nets,
            **{name: d / f"{name}.pth" for name in nets}}


def _load(path):
    return load_model(SPEC, str(path), size=SIZE, mean=MEAN, std=STD)


def _save(digits, net, name):
    p = digits["dir"] / f"{name}.pth"
    torch.save(net.state_dict(), p)
    return p


def _by_layer(summary):
    return {e["layer"]: e for e in summary["layers"]}


# ----------------------------------------------------------------------------- CKA and HSIC

def _hsic_gretton(K, L):
    """HSIC = tr(KHLH) / (n-1)^2 with H = I - 11'/n (Gretton et al. 2005), written out with numpy."""
    n = len(K)
    H = np.eye(n) - np.ones((n, n)) / n
    return np.trace(K @ H @ L @ H) / (n - 1) ** 2


def test_linear_cka_invariances():
    # Kornblith et al. 2019, section 3: invariant to orthogonal transforms, isotropic scaling and
    # (through centring) translation; not to arbitrary invertible linear maps or per-feature scaling.
    rng = np.random.default_rng(0)
    X = rng.normal(size=(60, 10)) @ rng.normal(size=(10, 10))
    Q, _ = np.linalg.qr(rng.normal(size=(10, 10)))
    A = rng.normal(size=(10, 10))
    cases = [
        ("itself", X, True),
        ("orthogonal", X @ Q, True),
        ("isotropic scaling", 3.7 * X, True),
        ("orthogonal, scaled, shifted", 0.2 * X @ Q + 5.0, True),
        ("invertible linear map", X @ A, False),
        ("per-feature scaling", X * np.geomspace(0.1, 10, 10), False),
    ]
    for name, Y, invariant in cases:
        value = linear_cka(X, Y)
        assert value == pytest.approx(linear_cka(Y, X), abs=1e-12), name  # symmetric
        if invariant:
            assert value == pytest.approx(1.0, abs=1e-10), name
        else:
            assert value < 0.95, name


def test_linear_cka_equals_the_hsic_formula_in_numpy():
    rng = np.random.default_rng(1)
    for n, p1, p2 in [(50, 6, 4), (20, 40, 30)]:  # more examples than features, and fewer (both code paths)
        X = rng.normal(size=(n, p1))
        Y = np.tanh(X[:, :1] * rng.normal(size=(1, p2))) + rng.normal(size=(n, p2))
        K, L = X @ X.T, Y @ Y.T
        expect = _hsic_gretton(K, L) / np.sqrt(_hsic_gretton(K, K) * _hsic_gretton(L, L))
        assert linear_cka(X, Y) == pytest.approx(expect, rel=1e-10)


def test_hsic_unbiased_is_the_u_statistic_over_distinct_quadruples():
    # Song et al. 2012 (JMLR, "Feature selection via dependence maximization"): HSIC_1 is the
    # U-statistic of E[k_ij l_ij] + E[k_ij] E[l_qr] - 2 E[k_ij l_iq], each over distinct indices.
    # Brute force over all 7*6*5*4 ordered quadruples checks the closed form given for it.
    rng = np.random.default_rng(2)
    n = 7
    X, Y = rng.normal(size=(n, 3)), rng.normal(size=(n, 2))
    K, L = X @ X.T, np.exp(-((Y[:, None] - Y[None]) ** 2).sum(-1))  # a linear and an RBF kernel
    terms = [K[i, j] * L[i, j] + K[i, j] * L[q, r] - 2 * K[i, j] * L[i, q]
             for i, j, q, r in itertools.permutations(range(n), 4)]
    assert hsic_unbiased(K, L) == pytest.approx(np.mean(terms), rel=1e-10)


def test_hsic_unbiased_has_the_population_value_as_its_mean():
    # With linear kernels the population HSIC is ||Cov(x, y)||_F^2 (Gretton et al. 2005). For
    # y = A x + noise, x ~ N(0, I), that is ||A||_F^2 = 6.25; for independent x, y it is 0. The
    # mean of HSIC_1 over many samples of n = 8 must hit both; the biased tr(KHLH)/(n-1)^2 misses.
    rng = np.random.default_rng(3)
    A = np.array([[1.0, 0.5, 0.0], [0.0, -1.0, 2.0]])
    for truth, make_y in [((A**2).sum(), lambda x: x @ A.T + 0.5 * rng.normal(size=(8, 2))),
                          (0.0, lambda x: rng.normal(size=(8, 2)))]:
        unbiased, biased = [], []
        for _ in range(4000):
            x = rng.normal(size=(8, 3))
            y = make_y(x)
            K, L = x @ x.T, y @ y.T
            unbiased.append(hsic_unbiased(K, L))
            biased.append(_hsic_gretton(K, L))
        se = np.std(unbiased) / np.sqrt(len(unbiased))
        assert abs(np.mean(unbiased) - truth) < 4 * se
        assert abs(np.mean(biased) - truth) > 10 * se


def test_minibatch_cka_agrees_with_the_full_estimate():
    # Nguyen, Raghu & Kornblith 2021: the minibatch estimator with HSIC_1 approximates full-data CKA.
    # Measured here: within 6e-4 of the unbiased full CKA and 8e-3 of the (biased) linear CKA for
    # 2048 examples in batches of 256; the bounds below leave room for other seeds.
    rng = np.random.default_rng(4)
    X = rng.normal(size=(2048, 20))
    Y = np.tanh(X @ rng.normal(size=(20, 15))) + 0.5 * rng.normal(size=(2048, 15))
    K, L = X @ X.T, Y @ Y.T
    unbiased_full = hsic_unbiased(K, L) / np.sqrt(hsic_unbiased(K, K) * hsic_unbiased(L, L))
    mb = minibatch_cka(X, Y, batch_size=256)
    assert mb == pytest.approx(unbiased_full, abs=5e-3)
    assert mb == pytest.approx(linear_cka(X, Y), abs=2e-2)
    assert minibatch_cka(X, 2 * X @ np.linalg.qr(rng.normal(size=(20, 20)))[0], batch_size=256) == pytest.approx(1.0)
    with pytest.raises(UnitlensError, match="at least 4"):
        minibatch_cka(X[:3], Y[:3])


def test_bootstrap_reweighting_equals_resampled_images():
    # Oracle: linear CKA of explicitly resampled rows (numpy indexing) for the same draws.
    rng = np.random.default_rng(5)
    x = rng.normal(size=(30, 4))
    y = x[:, :2] + rng.normal(size=(30, 2))
    draws = rng.integers(0, 30, (6, 30))
    W = np.stack([np.bincount(d, minlength=30) for d in draws], 1).astype(float)
    np.testing.assert_allclose(resampled_cka(x, y, W), [linear_cka(x[d], y[d]) for d in draws], rtol=1e-10)


# ----------------------------------------------------------------------------- networks

def test_relabelled_units_keep_cka_and_are_found_by_best_match(digits):
    net = copy.deepcopy(digits["nets"]["base"])
    perm = torch.arange(32)
    moved = torch.tensor([0, 3, 4, 9, 12, 17, 21, 25, 30, 31])
    perm[moved] = moved.roll(1)  # new channel j is old channel perm[j]; every listed channel moves
    permute_block(net, "1", perm)
    with torch.no_grad():
        x = normalize(digits["images"])
        torch.testing.assert_close(net(x), digits["nets"]["base"](x), rtol=0, atol=1e-5)  # same function
    s = compare(_load(digits["base"]), _load(_save(digits, net, "permuted")), corpus=digits["corpus"],
                layers=[",".join(BLOCKS)], config=CompareConfig(workers=0, bootstrap=0, full_maps=True))
    layers = _by_layer(s)
    inverse = torch.argsort(perm).tolist()  # old channel i is now at inverse[i]
    for name, e in layers.items():
        assert e["cka"] == pytest.approx(1.0, abs=1e-6), name
        assert e["cka_full_maps"] == pytest.approx(1.0, abs=1e-6), name
        for u in e["units"]:
            if u["dead"]:
                continue
            expect = inverse[u["unit"]] if name == "1" else u["unit"]
            assert u["best_match"] == expect, (name, u["unit"])
            assert u["best_match_corr"] == pytest.approx(1.0, abs=1e-5)
            if name == "1" and u["unit"] in moved.tolist():
                assert u["corr"] < 0.99, u["unit"]
            else:
                assert u["corr"] == pytest.approx(1.0, abs=1e-5), (name, u["unit"])
    live_moved = {u["unit"] for u in layers["1"]["units"] if u["unit"] in moved.tolist() and not u["dead"]}
    assert len(live_moved) >= 8
    assert set(layers["1"]["most_changed"][:len(live_moved)]) == live_moved  # flagged first


def test_changed_means_significantly_changed(digits):
    # a copy with 1% multiplicative weight noise computes nearly the same function: (almost) no unit
    # counts as changed; the same network with block 1's channels relabelled (every one moved) changes
    # every live unit of block 1 and, as a function, nothing else
    torch.manual_seed(0)
    noisy = copy.deepcopy(digits["nets"]["base"])
    with torch.no_grad():
        for p in noisy.parameters():
            p.mul_(1 + 0.01 * torch.randn_like(p))
    perm = torch.roll(torch.arange(32), 5)  # a derangement: new channel j is old channel j - 5
    moved = copy.deepcopy(digits["nets"]["base"])
    permute_block(moved, "1", perm)
    cfg = CompareConfig(workers=0, bootstrap=100)
    base = _load(digits["base"])
    s_noisy = _by_layer(compare(base, _load(_save(digits, noisy, "noisy")), corpus=digits["corpus"],
                                layers=[",".join(BLOCKS)], config=cfg))
    s_moved = _by_layer(compare(base, _load(_save(digits, moved, "moved")), corpus=digits["corpus"],
                                layers=[",".join(BLOCKS)], config=cfg))
    for name, e in s_noisy.items():
        live = [u for u in e["units"] if not u["dead"]]
        assert e["mean_corr"] > 0.98, (name, e["mean_corr"])  # it is a small change
        assert any(u["change"] > 0 for u in live)  # which the old rule (change > 0) counted everywhere
        assert e["changed"] <= max(1, len(e["units"]) // 20), (name, e["changed"])
        for u in live:  # the interval is about the point estimate
            assert u["corr_ci"][0] <= u["corr"] + 1e-9 and u["corr"] <= u["corr_ci"][1] + 1e-9
    for name, e in s_moved.items():
        live = [u for u in e["units"] if not u["dead"]]
        if name == "1":
            assert len(live) >= 24 and all(u["changed"] for u in live), [u["corr"] for u in live if not u["changed"]]
        else:
            assert e["changed"] == 0, name


def test_fine_tuning_changes_only_the_tuned_layers(digits):
    s = compare(_load(digits["base"]), _load(digits["tuned"]), corpus=digits["corpus"],
                layers=[",".join(BLOCKS) + ",4"], config=CompareConfig(workers=0, full_maps=True))
    layers = _by_layer(s)
    for name in ("0", "1", "2"):  # frozen: the same computation, so identical activations
        e = layers[name]
        assert e["cka"] == pytest.approx(1.0, abs=1e-9) and e["cka_full_maps"] == pytest.approx(1.0, abs=1e-9)
        assert all(u["corr"] == pytest.approx(1.0, abs=1e-6) and u["jaccard"] == 1.0
                   for u in e["units"] if not u["dead"])
        assert e["most_changed"] == []  # nothing changed, so nothing is listed
    for name in ("3", "4"):  # tuned on the new task
        e = layers[name]
        assert e["cka"] < 0.9 and e["cka_full_maps"] < 0.9, (name, e["cka"], e["cka_full_maps"])
        assert e["cka_ci"][0] <= e["cka"] <= e["cka_ci"][1] and e["cka_ci"][1] < 0.95
        assert e["mean_corr"] < 0.9 and e["mean_jaccard"] < 0.5
        assert e["units"][0]["change"] >= 0 and len(e["most_changed"]) == min(20, e["units_compared"])
    # the interval from resampling 150 of the 600 images, its spread scaled by sqrt(150/600)
    sub = compare(_load(digits["base"]), _load(digits["tuned"]), corpus=digits["corpus"], layers=["3"],
                  config=CompareConfig(workers=0, bootstrap_images=150))["layers"][0]
    lo, hi = layers["3"]["cka_ci"]
    assert sub["cka"] == layers["3"]["cka"] and "150 of 600" in sub["cka_ci_method"]
    assert sub["cka_ci"][0] <= sub["cka"] <= sub["cka_ci"][1]
    assert 0.5 < (sub["cka_ci"][1] - sub["cka_ci"][0]) / (hi - lo) < 2


def test_twin_networks_match_layers_at_the_same_depth(digits):
    # Kornblith et al. 2019, Table 2: for each layer of one network, the most similar layer of an
    # independently trained twin is the one at the same depth (99.3% for linear CKA on their CIFAR-10
    # nets, logits excluded). Our four blocks include two of the same width at the same resolution
    # (1 and 2), the hardest pair to tell apart: over five seed pairs we measured 37 of 40 row and
    # column checks right with pooled features and 35 of 40 with whole maps, 6 to 8 of 8 per pair.
    s = compare(_load(digits["base"]), _load(digits["twin"]), corpus=digits["corpus"],
                layers=[",".join(BLOCKS)], config=CompareConfig(workers=0, bootstrap=0, full_maps=True))
    for kind in ("pooled", "full_maps"):
        M = np.array(s["cka_matrix"][kind])
        hits = (M.argmax(1) == np.arange(4)).sum() + (M.argmax(0) == np.arange(4)).sum()
        assert hits >= 6, (kind, M.round(3))  # most: each layer's best match in the twin, both ways


def test_dead_units_are_flagged_and_ranked_without_nan(digits):
    a, b = copy.deepcopy(digits["nets"]["base"]), copy.deepcopy(digits["nets"]["base"])
    silence_unit(a, "2", 5)
    silence_unit(b, "2", 5)  # dead in both
    silence_unit(b, "2", 7)  # dead in B only
    s = compare(_load(_save(digits, a, "dead_a")), _load(_save(digits, b, "dead_b")), corpus=digits["corpus"],
                layers=["2"], config=QUICK)
    json.dumps(s, allow_nan=False)  # no NaN anywhere
    e = s["layers"][0]
    units = {u["unit"]: u for u in e["units"]}
    both, one = units[5], units[7]
    assert both["dead"] and both["dead_a"] and both["dead_b"] and both["corr"] is None and both["jaccard"] is None
    assert one["dead"] and not one["dead_a"] and one["dead_b"] and one["corr"] is None
    assert both["best_match"] is None and one["best_match"] not in (5, 7)
    assert one["rank"] == 1 and e["most_changed"][0] == 7  # a unit that died changed most
    assert both["change"] == 0.0 and e["dead"] == 2
    assert all(isinstance(u["change"], float) and 0 <= u["change"] <= 1 for u in e["units"])
    assert all(u["best_match"] not in (5, 7) for u in e["units"] if u["best_match"] is not None)


# ----------------------------------------------------------------------------- the command

def _cmd(digits, a, b, out, *extra):
    return ["compare", SPEC, SPEC, "--weights-a", digits[a], "--weights-b", digits[b], "--corpus", digits["corpus"],
            "--size", SIZE, "--mean", ",".join(map(str, MEAN)), "--std", ",".join(map(str, STD)), "--workers", 0,
            "--threads", 1, "--bootstrap", 50, "--out", out, *extra]


def test_cli_models_writes_the_summary_and_tables(digits, tmp_path):
    out = tmp_path / "cmp"
    r = run_cli(*_cmd(digits, "base", "tuned", out, "--layers", "1,3", "--layers", "4:0-4", "--json"))
    s = json.loads(r.stdout)
    assert [e["layer"] for e in s["layers"]] == ["1", "3", "4"]
    for e in s["layers"]:
        assert 0 <= e["cka"] <= 1 and e["units"]
        for u in e["units"]:
            assert {"unit", "corr", "best_match", "best_match_corr", "jaccard"} <= set(u)
    assert [u["unit"] for u in _by_layer(s)["4"]["units"]] == [0, 1, 2, 3, 4]  # the selection
    assert json.loads((out / "compare.json").read_text())["layers"] == s["layers"]
    rows = list(csv.reader((out / "cka_matrix.csv").open()))
    assert rows[0][1:] == ["1", "3", "4"] and [r[0] for r in rows[1:]] == ["1", "3", "4"]
    assert float(rows[2][2]) == pytest.approx(_by_layer(s)["3"]["cka"], abs=1e-9)
    table = list(csv.DictReader((out / "units_3.csv").open()))
    assert len(table) == 48 and int(table[0]["best_match"]) == _by_layer(s)["3"]["units"][0]["best_match"]
    text = run_cli(*_cmd(digits, "base", "tuned", tmp_path / "t", "--layers", "3")).stdout
    assert "most changed" in text and str(tmp_path / "t") in text


def test_another_architecture_gets_layer_similarity_only(digits):
    other = load_model(f"{TESTS / 'nets.py'}:digits_net", size=SIZE)  # untrained, no BatchNorm
    s = compare(_load(digits["base"]), other, corpus=digits["corpus"], layers=["0,3"], layers_b=["1,5"],
                config=CompareConfig(workers=0, bootstrap=0, full_maps=True))
    assert not s["same_architecture"] and np.array(s["cka_matrix"]["full_maps"]).shape == (2, 2)
    assert [(e["layer"], e["layer_b"]) for e in s["layers"]] == [("0", "1"), ("3", "5")]
    assert all(e["units"] == [] and "architectures" in e["units_note"] and 0 < e["cka"] < 1 for e in s["layers"])
    with pytest.raises(UnitlensError, match="as many of each"):
        compare(_load(digits["base"]), other, corpus=digits["corpus"], layers=["0,3"], layers_b=["1"])


def test_cli_runs_uses_what_they_hold_and_says_what_it_recomputes(digits, tmp_path):
    corpus = open_corpus(digits["corpus"])
    runs = {}
    for name in ("base", "tuned"):
        m = _load(digits[name])
        runs[name] = mine(m, corpus, parse_layers(m, ["1", "3:0-15"]), tmp_path / name,
                          MineConfig(top_k=8, workers=0)).path
    r = run_cli("compare", runs["base"], runs["tuned"], "--json", "--bootstrap", 50, "--workers", 0, "--threads", 1)
    s = json.loads(r.stdout)
    assert "recomputing per-image means of all 48 channels of 3" in r.stderr
    assert [(x["model"], x["layer"]) for x in s["recomputed"]] == [("a", "3"), ("b", "3")]
    assert s["a"]["source"] == "run" and s["layers"][0]["top_k"] == 8
    assert (runs["base"] / "compare" / "tuned" / "compare.json").is_file()  # the default folder
    e1, e3 = _by_layer(s)["1"], _by_layer(s)["3"]
    assert [u["unit"] for u in e3["units"]] == list(range(16))  # the mined units
    # the same numbers as comparing the models (runs store float32 values)
    ref = _by_layer(compare(_load(digits["base"]), _load(digits["tuned"]), corpus=digits["corpus"],
                            layers=["1,3"], config=CompareConfig(workers=0, bootstrap=0, top_k=8)))
    assert e1["cka"] == pytest.approx(ref["1"]["cka"], abs=1e-3)
    assert e3["cka"] == pytest.approx(ref["3"]["cka"], abs=1e-6)  # recomputed in float32, as there
    for u, v in zip(e3["units"], ref["3"]["units"]):
        assert u["corr"] == pytest.approx(v["corr"], abs=2e-3)
        assert u["top_a"] == v["top_a"] and u["top_b"] == v["top_b"]  # mining's exemplars, same ties
    assert not [x for x in s["recomputed"] if x["layer"] == "1"]  # held: no recompute note
    # mismatched corpora: a clear error, no traceback
    other = tmp_path / "other_corpus"
    write_corpus(other, digits["images"][:50])
    m = _load(digits["base"])
    mine(m, open_corpus(other), parse_layers(m, ["1"]), tmp_path / "other", MineConfig(top_k=4, workers=0))
    bad = run_cli("compare", runs["base"], tmp_path / "other", check=False)
    assert bad.returncode == 1 and "different corpora" in bad.stderr and "Traceback" not in bad.stderr
    with pytest.raises(UnitlensError, match="two models or two run folders"):
        compare(runs["base"], _load(digits["base"]))
