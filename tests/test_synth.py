"""Pass 2 (unitlens/synth): image bases, warps, goals, the batched loop, the run folder."""
import json
import math
import re
import sys

import numpy as np
import pytest
import torch

from conftest import ROOT, TESTS, cli, run_cli
from unitlens import UnitlensError, load_model
from unitlens.synth import (ColourBasis, Goal, PixelBasis, SpectralBasis, SynthConfig, Warps, optimise_units,
                            synthesize, unit_images)
from unitlens.synth.goal import Context, diversity
from unitlens.synth.bases import DEFAULT_CORR, DEFAULT_STD, default_covariance
from unitlens.synth.warps import warp
from unitlens.store import Run

PLANTED = f"{TESTS / 'planted.py'}"
NETS = f"{TESTS / 'nets.py'}"
QUICK = dict(stop_gain=None, checks=0)  # fixed step counts, no robustness check
NO_WARPS = Warps.none()


# -- parameterisations ---------------------------------------------------------------------

@pytest.mark.parametrize("size", [32, 33])
def test_spectral_image_matches_numpy_fft(size):
    p = SpectralBasis(size, ColourBasis.default())
    params = torch.randn(2, *p.shape, generator=torch.Generator().manual_seed(0))
    # reference: numpy.fft on the same coefficients and scale
    c = params[..., 0].double().numpy() + 1j * params[..., 1].double().numpy()
    z = np.fft.irfft2(c * p.scale.double().numpy(), s=(size, size), norm="ortho")  # (2, 3, S, S)
    np.testing.assert_allclose(p.whitened(params).numpy(), z, atol=1e-5)
    # and the colour + sigmoid squash, written out in numpy from the docstring's formula
    mu = np.array(p.colour.mean).reshape(1, 3, 1, 1)
    u = mu + np.einsum("ij,bjhw->bihw", np.array(p.colour.factor), z)
    x = 1 / (1 + np.exp(-(np.log(mu / (1 - mu)) + (u - mu) / (mu * (1 - mu)))))
    np.testing.assert_allclose(p.pixels(params).numpy(), x, atol=1e-5)


@pytest.mark.parametrize("decay", [1.0, 1.5])
def test_spectral_scale_gives_the_intended_amplitude_slope(decay):
    S = 64
    p = SpectralBasis(S, ColourBasis.default(), falloff=decay)
    z = p.whitened(torch.randn(16, *p.shape, generator=torch.Generator().manual_seed(1))).numpy()
    amp = np.abs(np.fft.fft2(z)).mean((0, 1))  # (S, S), numpy as the reference FFT
    f = np.hypot(*np.meshgrid(np.fft.fftfreq(S), np.fft.fftfreq(S), indexing="ij"))
    ok = (f >= 2 / S) & (f <= 0.4)
    slope = np.polyfit(np.log(f[ok]), np.log(amp[ok]), 1)[0]
    assert slope == pytest.approx(-decay, abs=0.05)


def test_colour_factor_whitens_the_corpus_colours():
    from skimage import data  # bundled photographs as the corpus

    px = np.concatenate([im.reshape(-1, 3) for im in (data.astronaut(), data.coffee(), data.chelsea())]) / 255.0
    mu, cov = px.mean(0), np.cov(px, rowvar=False)  # numpy as the reference
    cb = ColourBasis.from_covariance(cov, mu, "skimage photos")
    m = np.array(cb.factor)
    np.testing.assert_allclose(m @ m.T, cov, atol=1e-12)
    white = np.linalg.solve(m, (px - mu).T)  # M^-1 (x - mu)
    np.testing.assert_allclose(np.cov(white), np.eye(3), atol=1e-6)
    assert np.allclose(np.triu(m, 1), 0)  # Cholesky, as in Feature Visualization (Distill 2017)
    # the default is written as a covariance with its provenance marked
    d = ColourBasis.default()
    np.testing.assert_allclose(d.covariance(), default_covariance(), atol=1e-12)
    s = np.sqrt(np.diag(d.covariance()))
    np.testing.assert_allclose(d.covariance() / np.outer(s, s), DEFAULT_CORR, atol=1e-12)
    np.testing.assert_allclose(s, DEFAULT_STD, atol=1e-12)
    assert "scikit-image" in d.source
    # a grey corpus has a singular covariance: a small ridge keeps colours reachable, and is recorded
    grey = ColourBasis.from_covariance(np.full((3, 3), 0.04), (0.5, 0.5, 0.5), "grey")
    assert 0 < grey.ridge < 1e-4


def test_default_colour_correlation_agrees_with_a_fresh_measurement_of_real_photos():
    sys.path.insert(0, str(ROOT / "scripts"))
    try:
        from measure_colour import measure  # scikit-image's bundled photographs
    finally:
        sys.path.remove(str(ROOT / "scripts"))
    # the default is a value from memory; a fresh measurement on real photographs must stay close to it
    np.testing.assert_allclose(DEFAULT_CORR, measure(), atol=0.15)
    assert np.all(np.diag(measure()) == 1.0)


def test_adam_rows_match_torch_optim_adam_each_at_its_own_step():
    from unitlens.synth.loop import ADAM_EPS, BETAS, adam_step

    # Two rows of a (2, 3, 5, 5) batch minimise a quadratic; row 1 joins three steps late, as a
    # unit that enters the batch when another finishes. Reference: torch.optim.Adam, one per row.
    torch.manual_seed(0)
    target = torch.randn(2, 3, 5, 5, dtype=torch.float64)
    start = torch.randn(2, 3, 5, 5, dtype=torch.float64)
    weight = torch.linspace(0.5, 2.0, 75, dtype=torch.float64).view(1, 3, 5, 5)  # a badly scaled bowl
    P, m1, m2 = start.clone(), torch.zeros_like(start), torch.zeros_like(start)
    step = torch.tensor([0, 0])
    refs = [start[i].clone().requires_grad_() for i in range(2)]
    opts = [torch.optim.Adam([r], lr=0.05, betas=BETAS, eps=ADAM_EPS) for r in refs]
    joins = (0, 3)
    for k in range(12):
        rows = [i for i in range(2) if k >= joins[i]]
        g = (P - target) * weight  # (2, 3, 5, 5): the gradient of the quadratic
        idx = torch.tensor(rows)
        part = [x[idx] for x in (P, m1, m2)]
        adam_step(*part, g[idx], step[idx], 0.05)
        for x, p in zip((P, m1, m2), part):
            x[idx] = p
        step[idx] += 1
        for i in rows:
            opts[i].zero_grad()
            (0.5 * (weight[0] * (refs[i] - target[i]) ** 2).sum()).backward()
            opts[i].step()
    for i in range(2):
        np.testing.assert_allclose(P[i].numpy(), refs[i].detach().numpy(), rtol=0, atol=1e-12)


def test_blur_matches_a_periodic_gaussian_filter():
    from scipy.ndimage import gaussian_filter  # reference implementation

    for cls in (SpectralBasis, PixelBasis):
        p = cls(32, ColourBasis.plain())
        params = torch.randn(1, *p.shape, generator=torch.Generator().manual_seed(2))
        got = p.whitened(p.blur(params, 1.5)).numpy()
        want = gaussian_filter(p.whitened(params).numpy(), sigma=(0, 0, 1.5, 1.5), mode="wrap", truncate=4)
        edge = slice(None) if cls is SpectralBasis else slice(8, -8)  # the pixel blur pads at the border
        np.testing.assert_allclose(got[..., edge, edge], want[..., edge, edge], atol=2e-3, err_msg=cls.__name__)


# -- transforms ----------------------------------------------------------------------------

def test_transforms_against_numpy_shifts_and_rotations():
    rng = np.random.default_rng(0)
    img = torch.from_numpy(rng.random((1, 3, 20, 20))).float()
    fill = (0.25, 0.5, 0.75)

    def draw(tx=0, ty=0, s=1.0, a=0, fx=0, fy=0):
        return torch.tensor([[tx, ty, s, a, fx, fy]], dtype=torch.float64)

    np.testing.assert_allclose(warp(img, draw(), 4, fill).numpy(), img.numpy(), atol=1e-6)
    # a jitter of (3, -2) and a fine jitter of (-1, 1) move content by (2, -1): numpy shift with fill
    ref = np.broadcast_to(np.array(fill).reshape(1, 3, 1, 1), img.shape).copy()
    ref[:, :, 0:19, 2:20] = img.numpy()[:, :, 1:20, 0:18]
    np.testing.assert_allclose(warp(img, draw(3, -2, fx=-1, fy=1), 4, fill).numpy(), ref, atol=1e-5)
    # 90 degrees maps pixel centres onto pixel centres: numpy.rot90 is exact
    out = warp(img, draw(a=90), 4, fill).numpy()
    assert min(np.abs(out - np.rot90(img.numpy(), k, axes=(2, 3))).max() for k in (1, -1)) < 1e-5
    # reflect padding mirrors instead of filling
    out = warp(img, draw(3, 0), 4, fill, "reflect").numpy()
    np.testing.assert_allclose(out[..., :3], img.numpy()[..., 1:4][..., ::-1], atol=1e-5)
    # pixel amounts scale with the image below the 224 px reference, not above
    assert Warps().at(112) == Warps(8, 8, fine_jitter=4)
    assert Warps().at(448) == Warps()
    assert Warps().at(16).fine_jitter == 1
    # differentiable, and each image of a batch has its own transform
    x = img.repeat(2, 1, 1, 1).requires_grad_(True)
    y = warp(x, torch.cat([draw(a=3), draw(a=-4, s=1.05)]), 4, fill)
    assert not torch.allclose(y[0], y[1])
    y.sum().backward()
    assert x.grad.abs().sum() > 0


# -- goals ---------------------------------------------------------------------------------

def test_goal_scores_against_plain_torch():
    g = torch.Generator().manual_seed(0)
    f = torch.randn(4, 6, 5, 7, generator=g)
    px = torch.rand(4, 3, 8, 8, generator=g)
    t = torch.tensor([2, 0, 5, 2])
    groups = torch.tensor([0, 0, 1, 1])
    ctx = Context("L", t, groups, px)
    feats = {"L": f}
    mean_t = torch.stack([f[i, t[i]].mean() for i in range(4)])
    tv = torch.stack([((px[i, :, :-1, 1:] - px[i, :, :-1, :-1]) ** 2
                       + (px[i, :, 1:, :-1] - px[i, :, :-1, :-1]) ** 2).mean() for i in range(4)])
    cases = [
        (Goal("L"), mean_t),
        (Goal("L", reduce="centre"), torch.stack([f[i, t[i], 2, 3] for i in range(4)])),
        (Goal("L", reduce="at:4,0"), torch.stack([f[i, t[i], 4, 0] for i in range(4)])),
        (Goal("L", drive="down"), -mean_t),
        (Goal("L", reduce="direction", direction=torch.eye(6)[1] * 3), f[:, 1].mean((1, 2))),
        (Goal("L", reduce="direction", direction=torch.eye(6)), mean_t),
        (Goal("L", smoothness=0.5), mean_t - 0.5 * tv),
        (Goal("L", smoothness=0.5, tv_beta=1.0),
         mean_t - 0.5 * torch.stack([((px[i, :, :-1, 1:] - px[i, :, :-1, :-1]) ** 2
                                      + (px[i, :, 1:, :-1] - px[i, :, :-1, :-1]) ** 2 + 1e-8).sqrt().mean()
                                     for i in range(4)])),
        (Goal("L", grey_pull=2.0, grey_power=1.0), mean_t - 2 * (px - 0.5).abs().flatten(1).mean(1)),
    ]
    for goal, expect in cases:
        torch.testing.assert_close(goal.scorer("L")(feats, ctx), expect, msg=repr(goal))
    # diversity: minus the mean Gram cosine with the other images of the same unit (brute force in numpy)
    a = f.flatten(2).numpy()
    gram = [(x @ x.T).ravel() for x in a]

    def cos(u, v):
        return u @ v / np.linalg.norm(u) / np.linalg.norm(v)

    expect = [-cos(gram[0], gram[1]), -cos(gram[1], gram[0]), -cos(gram[2], gram[3]), -cos(gram[3], gram[2])]
    np.testing.assert_allclose(diversity(f, groups).numpy(), expect, rtol=1e-5)
    both = Goal("L", diversity=0.5).scorer("L")(feats, ctx) - mean_t
    np.testing.assert_allclose(both.numpy(), 0.5 * np.array(expect), rtol=1e-5)
    import doctest

    from unitlens.synth import goal

    assert doctest.testmod(goal).failed == 0  # the module's own example runs


def test_goal_syntax_is_refused_at_once():
    cases = [
        (dict(reduce="max"), "Unknown reduction 'max'; valid: mean, centre, at:Y,X, direction"),
        (dict(reduce="at:3"), "needs a row and a column"),
        (dict(reduce="at"), "needs a position"),
        (dict(reduce="mean", position=(1, 2)), "applies to reduce 'at' only"),
        (dict(reduce="direction"), "go together"),
        (dict(drive="sideways"), "drive must be up or down"),
        (dict(smoothness=-1), "smoothness must be a finite number >= 0"),
        (dict(tv_beta=0), "tv_beta must be"),
        (dict(direction=[[1, 2], [3]]), "go together"),
        (dict(reduce="direction", direction=[[1.0, float("nan")]]), "finite numbers"),
        (dict(reduce="at", position=(1, None)), "two whole numbers"),
        (dict(reduce="direction", direction=[[1.0, 2.0], [3.0]]), "every row as long as the others"),
        (dict(reduce="direction", direction="no-such.npy"), "Cannot read direction vectors from no-such.npy"),
        (dict(diversity="lots"), "diversity must be a finite number >= 0 (> 0 for an exponent), got 'lots'"),
    ]
    for fields, message in cases:
        with pytest.raises(UnitlensError, match=re.escape(message)):
            Goal("layer3", **fields)
    # the same goal from its record (what a manifest keeps) and from text
    g = Goal("layer3:0-3", reduce="at:2,5", drive="down", diversity=0.5, smoothness=0.1)
    assert Goal("layer3:0-3", **g.record()) == g and g.position == (2, 5) and g.reduce == "at"
    assert json.loads(json.dumps(g.record())) == g.record()  # plain fields
    with pytest.raises(TypeError):  # no arithmetic on goals
        g + g  # noqa: B018


# -- the loop, against analytic and planted optima -----------------------------------------

def test_linear_unit_under_a_norm_reaches_the_cauchy_schwarz_optimum():
    # max w . x subject to ||x|| = r is x = r w / ||w|| (Cauchy-Schwarz), value r ||w||
    m = load_model(f"{PLANTED}:linear_unit", size=16, mean=(0, 0, 0), std=(1, 1, 1))
    w = m.module[0].weight[0].permute(1, 2, 0).numpy()  # (16, 16, 3), like the images
    base = dict(steps=100, basis="pixel", whiten_colour=False, squash="none", warps=NO_WARPS, norm=4.0, **QUICK)
    plain = ColourBasis.plain((0, 0, 0))  # image = z: what the norm constrains is the input itself
    r = optimise_units(m, Goal("0:0"), SynthConfig(optimizer="gradient", **base), colour=plain)[0]
    x = r.images[0]
    assert np.corrcoef(x.ravel(), w.ravel())[0, 1] >= 0.95
    assert np.linalg.norm(x) == pytest.approx(4.0, rel=1e-4)
    assert r.traces[0][-1] == pytest.approx(4.0 * np.linalg.norm(w), rel=1e-3)
    # driven down, along a direction (one channel, scaled: the same unit vector), the optimum is
    # x = -r w / ||w||, where the score (minus the projection) is again r ||w||
    down = Goal("0:0", reduce="direction", direction=[[2.5]], drive="down")
    r = optimise_units(m, down, SynthConfig(optimizer="gradient", **base), colour=plain)[0]
    assert np.corrcoef(r.images[0].ravel(), w.ravel())[0, 1] <= -0.95
    assert r.traces[0][-1] == pytest.approx(4.0 * np.linalg.norm(w), rel=1e-3)
    # Adam's step on a linear objective is lr * sign(gradient), so it converges to sign(w) instead
    r = optimise_units(m, Goal("0:0"), SynthConfig(**base), colour=plain)[0]
    assert np.corrcoef(r.images[0].ravel(), np.sign(w).ravel())[0, 1] >= 0.99


def _orientation(image: np.ndarray) -> float:
    """Dominant orientation (degrees, mod 180) of the 2-D FFT peak of the grey image (numpy.fft):
    the power-weighted doubled-angle mean over the bins within half of the peak power, which
    resolves the angle finer than the frequency grid does."""
    g = image.mean(2)
    P = np.abs(np.fft.fft2(g - g.mean())) ** 2
    f = np.fft.fftfreq(g.shape[0])
    fy, fx = np.meshgrid(f, f, indexing="ij")
    phi = np.arctan2(fy, fx)
    w = np.where(P >= 0.5 * P.max(), P, 0)
    return math.degrees(0.5 * math.atan2((w * np.sin(2 * phi)).sum(), (w * np.cos(2 * phi)).sum())) % 180


def test_planted_gabor_detectors_get_gratings_at_their_orientation():
    from planted import ORIENTATIONS

    m = load_model(f"{PLANTED}:gabor_net", size=32)
    results = optimise_units(m, Goal(f"1:0-{len(ORIENTATIONS) - 1}"), SynthConfig(steps=80, checks=0))  # defaults otherwise
    for r, planted in zip(results, ORIENTATIONS):
        found = _orientation(r.images[0])
        err = abs((found - planted + 90) % 180 - 90)
        assert err <= 10, f"unit at {planted} deg gave {found:.1f} deg"


@pytest.fixture(scope="module")
def r18(r18_weights):
    return load_model("torchvision:resnet18", str(r18_weights), size=32)


def test_a_unit_gives_the_same_image_in_a_batch_of_16_as_alone(r18):
    cfg = SynthConfig(steps=16, **QUICK)
    batch = optimise_units(r18, Goal("layer2:0-15"), SynthConfig(batch_size=16, steps=16, **QUICK))
    alone = optimise_units(r18, Goal("layer2:5"), cfg)[0]
    assert batch[5].target == 5
    # batched convolutions round differently; over 16 Adam steps that stays below 1e-3 of the pixel range
    np.testing.assert_allclose(batch[5].images, alone.images, atol=1e-3)
    np.testing.assert_allclose(batch[5].traces[0], alone.traces[0], rtol=1e-3)
    assert not np.allclose(batch[4].images, batch[5].images, atol=1e-2)


@pytest.fixture(scope="session")
def digits_model(tmp_path_factory):
    from digits import MEAN, SIZE, STD, train_digits_net

    path = tmp_path_factory.mktemp("digits") / "digits.pth"
    acc = train_digits_net(path)
    assert acc > 0.85, f"the digits net trained to only {acc:.2f}"
    return load_model(f"{NETS}:digits_net", str(path), size=SIZE, mean=MEAN, std=STD)


def test_each_digit_logit_image_beats_every_natural_digit(digits_model):
    # Olah et al. 2017 (Feature Visualization, Distill): optimised inputs drive a unit beyond what
    # natural inputs do. A bound, too: every natural digit lies in the parameterisation's image box,
    # so the true maximum is at least the best digit, and a good optimiser must get there. The bound
    # is for the plain objective; random transforms optimise an expectation over jitter instead, so
    # they are off here, and so is the early stop. Here: each logit's image against all 1,797 digits.
    from digits import digit_images

    images, _ = digit_images()
    ex = digits_model.extractor(["7"])
    with torch.no_grad():
        natural = ex(digits_model.normalize(images))["7"].flatten(1)  # (N, 10)
    results = optimise_units(digits_model, Goal("7:0-9"), SynthConfig(checks=0, stop_gain=None, warps=NO_WARPS))
    synth = torch.from_numpy(np.stack([np.round(r.images[0] * 255) for r in results])).permute(0, 3, 1, 2)
    with torch.no_grad():
        got = ex(digits_model.normalize(synth.to(torch.uint8)))["7"].flatten(1)  # as saved: 8-bit
    for c in range(10):
        assert got[c, c] > natural[:, c].max(), f"logit {c}: {got[c, c]:.2f} <= {natural[:, c].max():.2f}"


def test_diversity_spreads_the_images_of_a_unit(digits_model):
    ex = digits_model.extractor(["4"])

    def gram_cosine(weight):  # mean pairwise cosine of the images' Gram matrices, what diversity lowers
        goal = Goal("4:3", diversity=weight)
        r = optimise_units(digits_model, goal, SynthConfig(per_unit=3, steps=40, **QUICK))[0]
        x = torch.from_numpy(r.images).permute(0, 3, 1, 2)
        with torch.no_grad():
            f = ex(digits_model.normalize(x))
        return float(-diversity(f["4"], torch.zeros(3, dtype=torch.long)).mean())

    assert gram_cosine(1.0) < gram_cosine(0.0) - 0.2


def test_early_stop_is_per_image_and_others_keep_going(digits_model):
    cfg = SynthConfig(steps=200, stop_window=8, stop_gain=0.05, checks=0, batch_size=10)
    results = optimise_units(digits_model, Goal("7:0-9"), cfg)
    steps = [r.steps[0] for r in results]
    assert min(steps) < 200 and len(set(steps)) > 1, steps
    for r in results:
        assert len(r.traces[0]) == r.steps[0]


def test_batch_halves_when_memory_runs_out_and_results_do_not_change(digits_model, monkeypatch):
    from unitlens.synth import loop as optimise

    cfg = SynthConfig(steps=12, batch_size=8, **QUICK)
    want = optimise_units(digits_model, Goal("7:0-9"), SynthConfig(steps=12, batch_size=2, **QUICK))
    real = optimise._Engine.values_and_grads
    seen = []

    def tight(self, params, *a):
        seen.append(len(params))
        if len(params) > 2:
            raise RuntimeError("DefaultCPUAllocator: can't allocate memory: you tried to allocate 1 bytes")
        return real(self, params, *a)

    monkeypatch.setattr(optimise._Engine, "values_and_grads", tight)
    got = optimise_units(digits_model, Goal("7:0-9"), cfg)
    assert seen[0] == 8 and max(seen[-5:]) <= 2
    for a, b in zip(want, got):
        np.testing.assert_allclose(a.images, b.images, atol=1e-5)


def test_batch_size_estimate_grows_with_memory_per_image(digits_model):
    from unitlens.synth.loop import _Engine

    small, large = (_Engine(digits_model, "5", range(32), SynthConfig(size=s, max_batch=10**6), None, None)
                    for s in (16, 48))
    b16, b48 = small.bytes_per_image(), large.bytes_per_image()
    assert 0 < b16 < b48 and b48 / b16 == pytest.approx(9, rel=0.3)  # activations grow with the area
    assert 1 <= large.capacity() <= 32 and small.capacity() == 32  # never more images than the work
    assert _Engine(digits_model, "5", range(32), SynthConfig(per_unit=3), None, None).capacity() % 3 == 0


def test_bad_targets_fail_before_the_first_step(r18):
    cases = [
        (Goal("layer2:128"), SynthConfig(), "Channel 128 is out of range for layer2"),
        (Goal("layer2:0", reduce="at:9,0"), SynthConfig(), "outside layer2"),
        (Goal("layer9:0"), SynthConfig(), "Unknown layer 'layer9'"),
        (Goal("layer2:0"), SynthConfig(basis="wavelet"), "Unknown image basis"),
        (Goal("layer2:0"), SynthConfig(batch_size=1, per_unit=2), "cannot hold"),
        (Goal("layer2:0", reduce="direction", direction=torch.ones(5)), SynthConfig(), "needs 128 numbers"),
        (Goal("layer2:0-3", reduce="direction", direction=torch.ones(2, 128)), SynthConfig(), "Target 2 has no direction"),
        (Goal("layer2:0", diversity=1, diversity_layer="layer7"), SynthConfig(), "Unknown layer 'layer7'"),
        (Goal(), SynthConfig(), "No layers given"),
    ]
    for goal, config, message in cases:
        with pytest.raises(UnitlensError, match=message):
            optimise_units(r18, goal, config)


# -- the run folder and the command ---------------------------------------------------------

@pytest.fixture(scope="module")
def mined(tmp_path_factory, smooth_corpus, r18_weights):
    out = tmp_path_factory.mktemp("synth") / "run"
    r = run_cli("mine", "torchvision:resnet18", "--weights", r18_weights, "--size", "32", "--corpus", smooth_corpus,
                "--layers", "layer3", "--units", "0-3", "--top", "3", "--workers", "0", "--out", out)
    assert r.returncode == 0
    return out


def test_synth_on_a_mined_run_then_show_and_resume(mined, capsys):
    code, out, err = cli(capsys, "synth", mined, "--steps", "6", "--units", "0,1")
    assert code == 0, err
    d = mined / "synth" / "layer3"
    stamps = {p.name: p.stat().st_mtime_ns for p in d.glob("unit-*")}
    assert sorted(stamps) == ["unit-0000-0.png", "unit-0000.npz", "unit-0001-0.png", "unit-0001.npz"]
    man = json.loads((mined / "manifest.json").read_text())
    assert man["synth"]["colour"]["source"].startswith("measured on this run's corpus")
    assert man["synth"]["layers"]["layer3"] == {"done": 2, "complete": True, "units": 2, "channels": "0-1"}
    assert man["synth"]["settings"]["config"]["steps"] == 6

    code, out, err = cli(capsys, "show", mined, "layer3:1", "--json")
    s = json.loads(out)
    (entry,) = s["synth"]
    from PIL import Image

    assert Image.open(entry["image"]).size == (32, 32)
    assert entry["steps"] == 6 and entry["rank"] >= 1 and entry["robustness"]["n"] == 32
    best = s["exemplars"][0]["score"]
    assert entry["vs_best_exemplar"] == pytest.approx(entry["max_activation"] / best)

    # no --units: all mined units; the two finished ones are not redone
    code, out, err = cli(capsys, "synth", mined, "--steps", "6")
    assert code == 0, err
    for name, t in stamps.items():
        assert (d / name).stat().st_mtime_ns == t, f"{name} was redone"
    assert {p.name for p in d.glob("unit-*.png")} == {f"unit-000{i}-0.png" for i in range(4)}
    assert json.loads((mined / "manifest.json").read_text())["synth"]["done"] is True
    # other settings are refused rather than mixed in
    code, out, err = cli(capsys, "synth", mined, "--steps", "7")
    assert code == 1 and "other settings" in err and "config.steps" in err


def test_bad_names_give_one_line_errors(mined, capsys):
    cases = [
        (["--layers", "layer9"], "Unknown layer 'layer9'"),
        (["--layers", "layer3:0-999"], "Channel 999 is out of range for layer3 (0-255)"),
        (["--units", "x"], "'x' is not a channel or range"),
        (["--reduce", "class"], "Unknown reduction 'class'; valid: mean, centre, at:Y,X"),
        (["--reduce", "at:9,9"], "Position y=9 is outside layer3's feature map (2x2)"),
    ]
    for extra, message in cases:
        code, out, err = cli(capsys, "synth", mined, "--steps", "2", *extra)
        assert code == 1 and message in err, (extra, err)
        assert err.strip().count("\n") == 0 and err.startswith("Error: ")
    # usage mistakes: exit 2, typer's usage line and a hint to --help
    for extra, message in [(["--weights", "w.pth"], "apply only when TARGET is a model"),
                           (["--drive", "sideways"], "'sideways' is not one of 'up', 'down'")]:
        code, out, err = cli(capsys, "synth", mined, "--steps", "2", *extra)
        assert code == 2 and message in err and "Try 'unitlens synth --help'" in err, (extra, err)
    # and as a real process: exit status 1, one line, no traceback
    r = run_cli("synth", mined, "--layers", "layer9", check=False)
    assert r.returncode == 1 and r.stderr.strip().startswith("Error: Unknown layer") and "Traceback" not in r.stderr


def test_synth_from_a_model_without_a_run(tmp_path, capsys):
    out = tmp_path / "r"
    code, _, err = cli(capsys, "synth", f"{PLANTED}:gabor_net", "--layers", "1:0,3", "--size", "32",
                       "--steps", "4", "--out", out)
    assert code == 0, err
    man = json.loads((out / "manifest.json").read_text())
    assert man["model"]["spec"].endswith("planted.py:gabor_net") and man["model"]["preprocess"]["size"] == 32
    assert man["synth"]["colour"]["source"].startswith("natural-image default")
    (e,) = unit_images(out, "1", 3)
    assert e["vs_best_exemplar"] is None and e["steps"] == 4
    code, _, err = cli(capsys, "synth", f"{PLANTED}:gabor_net", "--layers", "1")
    assert code == 2 and "--out" in err
    # --size is the network's input, as in every command; --synth-size the synthesised image's side
    code, _, err = cli(capsys, "synth", f"{PLANTED}:gabor_net", "--layers", "1:3", "--size", "32",
                       "--synth-size", "24", "--steps", "2", "--out", tmp_path / "r24")
    assert code == 0, err
    assert json.loads((tmp_path / "r24" / "manifest.json").read_text())["model"]["preprocess"]["size"] == 32
    from PIL import Image

    assert Image.open(unit_images(tmp_path / "r24", "1", 3)[0]["image"]).size == (24, 24)
    code, _, err = cli(capsys, "synth", out, "--size", "32")
    assert code == 2 and "--size apply only when TARGET is a model" in err


def test_a_goal_from_python_and_from_the_command_line_gives_the_same_images(tmp_path, capsys):
    code = tmp_path / "gabor.py"  # the planted net with its own input size, so no size option is needed
    code.write_text(f"import sys\nsys.path.insert(0, {str(TESTS)!r})\nfrom planted import gabor_net  # noqa\n"
                    "PREPROCESS = {'size': 32, 'mean': (0.5, 0.5, 0.5), 'std': (0.25, 0.25, 0.25)}\n")
    c, _, err = cli(capsys, "synth", f"{code}:gabor_net", "--layers", "1:0,3", "--steps", "5", "--per-unit", "2",
                    "--reduce", "at:3,4", "--drive", "up", "--diversity", "0.5", "--smoothness", "0.1",
                    "--grey-pull", "0.05", "--out", tmp_path / "cli")
    assert c == 0, err
    goal = Goal("1:0,3", reduce="at:3,4", drive="up", diversity=0.5, smoothness=0.1, grey_pull=0.05)
    synthesize(load_model(f"{code}:gabor_net"), goal, tmp_path / "py", SynthConfig(steps=5, per_unit=2))
    from PIL import Image

    settings = [json.loads((tmp_path / k / "manifest.json").read_text())["synth"]["settings"] for k in ("cli", "py")]
    assert settings[0] == settings[1] and settings[0]["goal"] == goal.record()
    assert settings[0]["goal"]["position"] == [3, 4] and settings[0]["goal"]["smoothness"] == 0.1
    files = sorted(p.name for p in (tmp_path / "py" / "synth" / "1").glob("unit-*.png"))
    assert files == ["unit-0000-0.png", "unit-0000-1.png", "unit-0003-0.png", "unit-0003-1.png"]
    for f in files:
        a, b = (np.asarray(Image.open(tmp_path / k / "synth" / "1" / f)) for k in ("cli", "py"))
        assert np.array_equal(a, b), f
    a, b = (np.asarray(Image.open(tmp_path / "py" / "synth" / "1" / f)) for f in files[:2])
    assert not np.array_equal(a, b)  # two different images of one unit: the comparison can tell images apart


def test_a_run_folder_written_with_the_old_setting_names_opens_shows_and_redraws(mined, tmp_path, capsys):
    import shutil

    from unitlens import render_atlas
    from unitlens.synth import model_from_run

    run = tmp_path / "old"
    shutil.copytree(mined, run)
    shutil.rmtree(run / "synth", ignore_errors=True)
    m = json.loads((run / "manifest.json").read_text())
    m.pop("synth", None)
    (run / "manifest.json").write_text(json.dumps(m))
    synthesize(model_from_run(run), Goal("layer3:0-1", smoothness=0.1), run, SynthConfig(steps=3))
    m = json.loads((run / "manifest.json").read_text())
    # what format 1 wrote for these settings, by hand: the old names and the weighted terms
    m["format"] = 1
    m["synth"]["settings"] = {
        "config": {"steps": 3, "size": 32, "per_unit": 1, "seed": 0, "lr": 0.05, "optimizer": "adam",
                   "param": "spectral", "decorrelate": True, "decay": 1.0, "init_std": 0.1, "squash": "sigmoid",
                   "transforms": {"pad": 2, "jitter": 2, "scales": [1.0, 0.975, 1.025, 0.95, 1.05],
                                  "degrees": [-5, -4, -3, -2, -1, 0, 1, 2, 3, 4, 5], "fine_jitter": 1,
                                  "pad_mode": "constant",
                                  "note": "pixel amounts for 32 px images (given for 224 px, scaled down below it)"},
                   "norm": None, "blur_every": 0, "blur_sigma": 0.5, "stop_window": 32, "stop_gain": 0.01,
                   "checks": 32},
        "objective": [{"weight": 1.0, "term": "channel", "layer": None},
                      {"weight": -0.1, "term": "total_variation", "beta": 2.0}],
        "colour": m["synth"]["colour"]}
    (run / "manifest.json").write_text(json.dumps(m))
    stamps = {p.name: p.stat().st_mtime_ns for p in (run / "synth" / "layer3").glob("unit-*")}

    code, out, err = cli(capsys, "show", run, "layer3:1", "--json")  # shows
    assert code == 0, err
    assert len(json.loads(out)["synth"]) == 1
    page = render_atlas(run).read_text()  # draws, under today's names
    for label in ("basis", "whiten_colour", "blur_period", "warps.jitter", "goal.reduce", "goal.smoothness"):
        assert f">{label}<" in page, label
    for label in ("param", "decorrelate", "blur_every", "transforms.jitter", "objective"):
        assert f">{label}<" not in page, label
    # the same settings stated today resume the folder: nothing is redone, and the manifest moves on
    code, _, err = cli(capsys, "synth", run, "--layers", "layer3:0-1", "--steps", "3", "--smoothness", "0.1")
    assert code == 0, err
    assert {p.name: p.stat().st_mtime_ns for p in (run / "synth" / "layer3").glob("unit-*")} == stamps
    m = json.loads((run / "manifest.json").read_text())
    assert m["format"] == 2 and m["synth"]["settings"]["goal"]["smoothness"] == 0.1
    assert "objective" not in m["synth"]["settings"] and m["synth"]["settings"]["config"]["basis"] == "spectral"


def test_a_killed_synthesis_resumes_without_redoing_finished_units(tmp_path, digits_model, monkeypatch):
    from unitlens.synth import pipeline

    layers = Goal("7:0-5")
    cfg = SynthConfig(steps=10, batch_size=2, **QUICK)
    whole = synthesize(digits_model, layers, tmp_path / "whole", cfg)
    real = pipeline.iter_layer

    def killed(*a, **k):
        it = real(*a, **k)
        yield next(it)
        raise KeyboardInterrupt  # like Ctrl-C after the first batch

    monkeypatch.setattr(pipeline, "iter_layer", killed)
    with pytest.raises(UnitlensError, match="Interrupted after 2 of 6 units"):
        synthesize(digits_model, layers, tmp_path / "cut", cfg)
    monkeypatch.setattr(pipeline, "iter_layer", real)
    d = Run(tmp_path / "cut").layer_dir("7", "synth")
    stamps = {p.name: p.stat().st_mtime_ns for p in d.glob("*.png")}
    assert len(stamps) == 2
    synthesize(digits_model, layers, tmp_path / "cut", cfg)
    for name, t in stamps.items():
        assert (d / name).stat().st_mtime_ns == t
    from PIL import Image

    for c in range(6):
        a = np.asarray(Image.open(Run(whole.path).layer_dir("7", "synth") / f"unit-{c:04d}-0.png"))
        b = np.asarray(Image.open(d / f"unit-{c:04d}-0.png"))
        assert np.abs(a.astype(int) - b.astype(int)).max() <= 1  # same seeds, same images (8-bit rounding)


def test_a_unit_silent_at_its_start_gets_new_starts(tmp_path, monkeypatch):
    # A ReLU unit that needs contrast: the horizontal difference of neighbouring pixels, minus a
    # threshold. A near-grey random start leaves it at exactly 0 with no gradient anywhere, so
    # without a new start it can never move (common practice in activation maximisation: restart
    # a dead start).
    code = tmp_path / "edge.py"
    code.write_text(
        "import torch\n"
        "def build():\n"
        "    conv = torch.nn.Conv2d(3, 1, (1, 2))\n"
        "    with torch.no_grad():\n"
        "        conv.weight.zero_(); conv.weight[0, :, 0, 0] = 1.0; conv.weight[0, :, 0, 1] = -1.0\n"
        "        conv.bias.fill_(-2.0)\n"
        "    return torch.nn.Sequential(conv, torch.nn.ReLU())\n")
    model = load_model(f"{code}:build", size=32, mean=(0.5,) * 3, std=(0.25,) * 3)
    cfg = SynthConfig(steps=24, checks=0, basis="pixel", warps=NO_WARPS)
    ex = model.extractor(["1"])

    def reached():
        r = optimise_units(model, Goal("1:0"), cfg)[0]
        with torch.no_grad():
            return float(ex(model.normalize(torch.from_numpy(r.images[0]).permute(2, 0, 1)[None]))["1"].max())

    import unitlens.synth.loop as opt

    monkeypatch.setattr(opt, "MAX_REDRAWS", 0)
    assert reached() == 0.0  # the plain start is dead
    monkeypatch.setattr(opt, "MAX_REDRAWS", 4)
    assert reached() > 1.0


def test_synth_refuses_a_run_whose_mining_is_unfinished(tmp_path, smooth_corpus, r18):
    from unitlens import MineConfig, mine, open_corpus

    from unitlens import parse_layers

    layers = parse_layers(r18, ["layer2:0-1"])
    mine(r18, open_corpus(smooth_corpus), layers, tmp_path / "r", MineConfig(top_k=2, workers=0, batch_size=4),
         stop=lambda done: done >= 8)
    with pytest.raises(UnitlensError, match=r"Mining in .* is not finished \(8 of 24 images\).*Finish mining first"):
        synthesize(r18, Goal("layer2:0-1"), tmp_path / "r", SynthConfig(steps=2, **QUICK))
    assert not (tmp_path / "r" / "synth").exists() and "synth" not in Run(tmp_path / "r").manifest()


def test_resumed_synthesis_leaves_no_temporary_files_and_force_keeps_foreign_ones(tmp_path, digits_model, monkeypatch):
    from unitlens.synth import pipeline

    layers = Goal("7:0-3")
    cfg = SynthConfig(steps=4, batch_size=2, **QUICK)
    real = pipeline.iter_layer

    def killed(*a, **k):
        it = real(*a, **k)
        yield next(it)
        raise KeyboardInterrupt

    monkeypatch.setattr(pipeline, "iter_layer", killed)
    with pytest.raises(UnitlensError, match="Interrupted after 2 of 4 units"):
        synthesize(digits_model, layers, tmp_path / "r", cfg)
    monkeypatch.setattr(pipeline, "iter_layer", real)
    d = Run(tmp_path / "r").layer_dir("7", "synth")
    (d / ".unit-0002-0.png.k9x.tmp").write_bytes(b"\x89PNG half")  # what a SIGKILL mid-write leaves
    synthesize(digits_model, layers, tmp_path / "r", cfg)
    assert not list((tmp_path / "r").rglob("*.tmp"))
    assert len(list(d.glob("unit-*.png"))) == 4
    # --force with other settings redoes the layers the manifest names, and nothing else
    (tmp_path / "r" / "synth" / "README.txt").write_text("mine")
    synthesize(digits_model, layers, tmp_path / "r", SynthConfig(steps=5, batch_size=2, **QUICK), force=True)
    assert (tmp_path / "r" / "synth" / "README.txt").read_text() == "mine"
    assert json.loads((d / "units.json").read_text())["units"]["0"]["images"][0]["steps"] == 5


def test_synthesis_is_refused_up_front_when_its_images_do_not_fit_on_the_disk(tmp_path, r18, monkeypatch):
    import shutil

    real = shutil.disk_usage
    monkeypatch.setattr(shutil, "disk_usage", lambda p: real(p)._replace(free=50_000))
    layers = Goal("layer2:0-7")  # 8 units of 32x32 RGB: about 8 x (3 KB + 64 KB)
    with pytest.raises(UnitlensError, match=r"Not enough free space for this synthesis .* needs about 5\d\d KB, "
                                            r"and the disk has 50 KB free"):
        synthesize(r18, layers, tmp_path / "r", SynthConfig(steps=2, **QUICK))
    assert not (tmp_path / "r" / "synth").exists()


def test_progress_moves_with_every_step_not_only_per_batch(tmp_path, monkeypatch):
    from unitlens import _progress

    seen = []

    class Recorder:  # stands in for the terminal bar
        def __init__(self, total, done, *args, **kw):
            seen.append(("start", total, done))

        def advance(self, done, note=""):
            seen.append((done, note))

        def close(self):
            seen.append(("close",))

    monkeypatch.setattr(_progress, "Progress", Recorder)
    m = load_model(f"{NETS}:digits_net", size=16)
    steps = 5
    synthesize(m, Goal("2:0-3"), tmp_path / "r", SynthConfig(steps=steps, batch_size=2, **QUICK),
               progress=True)
    assert seen[0] == ("start", 4, 0) and seen[-1] == ("close",)
    ticks = seen[1:-1]
    # two batches of two units, every image runs all 5 steps: one tick per step, in units of work
    assert [d for d, _ in ticks] == pytest.approx([k / steps * 2 for k in range(1, steps + 1)]
                                                  + [2 + k / steps * 2 for k in range(1, steps + 1)])
    assert [n for _, n in ticks] == [f"step {k}/{steps}" for k in range(1, steps + 1)] * 2


# -- parity with the best natural exemplar ----------------------------------------------------

def test_parity_step_is_the_first_step_the_trace_reaches_the_reference(digits_model):
    """Oracle: numpy on the full trace of a run that never stops (a unit's images do not depend on
    when it stops, so the stopped run's trace is a prefix of it)."""
    from unitlens.synth.loop import iter_layer

    full = SynthConfig(steps=60, parity_every=1, parity_window=1, **QUICK)
    free = {r.target: r for b in iter_layer(digits_model, "7", range(6), full) for r in b}
    refs = {t: float(r.traces[0][[10, 25, 40, 59, 20, 5][t]]) for t, r in free.items()}
    refs[5] = float(free[5].traces[0].max()) + 1.0  # never reached
    stop = SynthConfig(steps=60, parity_every=1, parity_window=1, stop_at_parity=0.0, **QUICK)
    for cfg, stops in ((full, False), (stop, True)):
        got = {r.target: r for b in iter_layer(digits_model, "7", range(6), cfg, references=refs) for r in b}
        for t, r in got.items():
            hit = np.nonzero(free[t].traces[0] >= refs[t])[0]
            want = int(hit[0]) + 1 if len(hit) else None
            assert r.parity_steps == [want], (t, r.parity_steps, want)
            assert r.steps == [want if stops and want else 60]


def test_parity_against_the_best_exemplar_in_show_json(mined, tmp_path, capsys):
    """Oracle: the exemplar's channel mean from a hand-written resnet18 forward (no warps, so the
    reference is the value on the image as mining saw it: shorter side resized, centre crop)."""
    import shutil

    import torchvision
    from PIL import Image

    from unitlens.synth import model_from_run

    run = tmp_path / "run"
    shutil.copytree(mined, run)
    shutil.rmtree(run / "synth", ignore_errors=True)
    m = json.loads((run / "manifest.json").read_text())
    m.pop("synth", None)  # what earlier tests synthesised there
    (run / "manifest.json").write_text(json.dumps(m))
    synthesize(model_from_run(run), Goal("layer3:0-1"), run, SynthConfig(steps=8, warps=NO_WARPS))
    net = torchvision.models.resnet18()
    net.load_state_dict(torch.load(json.loads((run / "manifest.json").read_text())["model"]["weights"]["path"]))
    net.eval()
    for unit in (0, 1):
        code, out, err = cli(capsys, "show", run, f"layer3:{unit}", "--json")
        assert code == 0, err
        s = json.loads(out)
        img = Image.open(s["exemplars"][0]["image"]).convert("RGB")
        w, h = img.size
        side = min(w, h)
        box = ((w - side) / 2, (h - side) / 2, (w + side) / 2, (h + side) / 2)
        x = torch.from_numpy(np.asarray(img.resize((32, 32), Image.BILINEAR, box=box), dtype=np.float32) / 255)
        x = (x.permute(2, 0, 1)[None] - torch.tensor([0.485, 0.456, 0.406]).view(1, 3, 1, 1)) \
            / torch.tensor([0.229, 0.224, 0.225]).view(1, 3, 1, 1)
        with torch.no_grad():
            f = net.layer3(net.layer2(net.layer1(net.maxpool(net.relu(net.bn1(net.conv1(x)))))))
        want = float(f[0, unit].mean())
        (entry,) = s["synth"]
        p = entry["parity"]
        # JPEG exemplars decode at reduced scale (draft mode) in the project, fully here
        assert p["exemplar"] == pytest.approx(want, rel=0.03, abs=1e-3)
        assert p["synthesised"] == entry["activation"] and p["reached"] == (entry["activation"] >= p["exemplar"])
        assert p["step"] is None or 1 <= p["step"] <= entry["steps"]
