"""Attribution methods (unitlens/attribution.py) against analytic answers, their published axioms and
plain-torch autograd, on real conv nets and a real photograph (scikit-image's astronaut)."""
import numpy as np
import pytest
import torch
import torch.nn.functional as F

from conftest import TESTS
from unitlens import UnitlensError, load_model
from unitlens.attribution import RULES, gradient, gradient_x_input, integrated_gradients, smoothgrad
from unitlens.probing import unit_function


def photo(size: int) -> torch.Tensor:
    """scikit-image's astronaut photograph as (3, size, size) in [0, 1]."""
    from skimage import data

    x = torch.from_numpy(data.astronaut().astype(np.float32) / 255).permute(2, 0, 1)[None]
    return F.interpolate(x, size=(size, size), mode="bilinear", antialias=True, align_corners=False)[0].clamp(0, 1)


def argmax_unit(model, layer: str, channel: int, x: torch.Tensor):
    """The unit's activation at its argmax position on x, as a function of the pixels."""
    with torch.no_grad():
        fmap = model.extractor([layer])(model.normalize(x[None]))[layer][0, channel]
    y, col = divmod(int(fmap.argmax()), fmap.shape[1])
    return unit_function(model, layer, channel, y, col), (y, col)


@pytest.fixture(scope="module")
def small_net():
    torch.manual_seed(3)
    return load_model(f"{TESTS / 'nets.py'}:digits_net", size=32)


def test_linear_model_gets_exactly_x_minus_baseline_times_w():
    # For f(x) = w.x + b the gradient is w everywhere, so IG = (x - x') * w for every rule and any
    # number of steps (Sundararajan et al. 2017, sec. 3: IG of a linear model); gradient x input is x * w.
    g = torch.Generator().manual_seed(0)
    w = torch.randn(3, 5, 7, generator=g, dtype=torch.float64)
    x = torch.rand(3, 5, 7, generator=g, dtype=torch.float64)
    base = torch.rand(3, 5, 7, generator=g, dtype=torch.float64)
    f = lambda b: (b * w).flatten(1).sum(1) + 0.5  # noqa: E731
    for rule in RULES:
        for steps in (1, 3, 16):
            a = integrated_gradients(f, x, base, steps, rule=rule, batch=4)
            torch.testing.assert_close(a.values, (x - base) * w, rtol=1e-12, atol=1e-12)
            assert a.f_input == pytest.approx(float(f(x[None])[0])) and a.f_baseline == pytest.approx(float(f(base[None])[0]))
            assert a.gap < 1e-10
    torch.testing.assert_close(gradient_x_input(f, x).values, x * w, rtol=1e-12, atol=1e-12)


def test_quadrature_rules_on_a_known_integral():
    # f(x) = sum(x^3) from a zero baseline: the exact IG is x^3 (integral of 3 a^2 x^3 da); the
    # trapezoid rule's error on 3a^2 is x^3 / (2 m^2), the midpoint rule's -x^3 / (4 m^2) (the
    # standard error terms of both rules, exact for a quadratic integrand).
    x = torch.linspace(0.1, 1.0, 12, dtype=torch.float64).view(3, 2, 2)
    f = lambda b: (b**3).flatten(1).sum(1)  # noqa: E731
    m = 8
    tr = integrated_gradients(f, x, torch.zeros_like(x), m, rule="trapezoid").values
    mid = integrated_gradients(f, x, torch.zeros_like(x), m, rule="midpoint").values
    torch.testing.assert_close(tr, x**3 * (1 + 1 / (2 * m * m)))
    torch.testing.assert_close(mid, x**3 * (1 - 1 / (4 * m * m)))


@pytest.mark.parametrize("arch, layer, channel, size", [("digits_net", "3", 5, 32), ("resnet18", "layer2", 11, 48)])
def test_completeness_on_a_real_net_and_photo(small_net, arch, layer, channel, size):
    # Completeness axiom (Sundararajan et al. 2017, Prop. 1): the attributions sum to f(x) - f(x');
    # the paper reports 20-300 steps suffice to get within 5%; we ask for 1% at 128.
    if arch == "digits_net":
        model = small_net
    else:
        torch.manual_seed(0)
        model = load_model(f"torchvision:{arch}", size=size)
    x = photo(size)
    f, _ = argmax_unit(model, layer, channel, x)
    bases = [torch.zeros_like(x)] + ([torch.full_like(x, 0.5)] if arch == "digits_net" else [])
    for base in bases:  # black, and a grey image
        a = integrated_gradients(f, x, base, 128, batch=32)
        change = a.f_input - a.f_baseline
        assert abs(change) > 1e-3  # a test of a sum that must be 0 would prove little
        assert a.total == pytest.approx(change, rel=0.01), (a.total, change)
        assert a.f_input == pytest.approx(float(f(x[None])[0]), rel=1e-5)


def test_refinement_doubles_steps_and_reuses_points(small_net):
    x = photo(32)
    f, _ = argmax_unit(small_net, "3", 5, x)
    base = torch.zeros_like(x)
    coarse = integrated_gradients(f, x, base, 2)
    refined = integrated_gradients(f, x, base, 2, tolerance=0.01, max_steps=1024)
    assert coarse.gap > 0.01  # two steps are not enough on a ReLU net: refinement has work to do
    assert refined.gap <= 0.01 and refined.steps > 2 and refined.steps & (refined.steps - 1) == 0
    # the refined sum reuses earlier points; it must equal a fresh trapezoid rule at its step count
    direct = integrated_gradients(f, x, base, refined.steps)
    torch.testing.assert_close(refined.values, direct.values, rtol=1e-4, atol=1e-6)
    capped = integrated_gradients(f, x, base, 2, tolerance=1e-9, max_steps=8)
    assert capped.steps == 8


def _plain_torch_gradient(module, x, channel, pos, mean, std):
    """d unit / d pixels with nothing of unitlens: the Sequential's first four modules, by hand."""
    xi = x.clone().requires_grad_(True)
    z = (xi[None] - torch.tensor(mean).view(1, 3, 1, 1)) / torch.tensor(std).view(1, 3, 1, 1)
    out = module[:4](z)[0, channel, pos[0], pos[1]]
    (g,) = torch.autograd.grad(out, xi)
    return float(out.detach()), g


def test_gradient_x_input_matches_plain_autograd(small_net):
    x = photo(32)
    f, pos = argmax_unit(small_net, "3", 5, x)
    p = small_net.preprocess
    score, g = _plain_torch_gradient(small_net.module, x, 5, pos, p.mean, p.std)
    a = gradient_x_input(f, x)
    assert a.f_input == pytest.approx(score, rel=1e-5)
    torch.testing.assert_close(a.values, x * g, rtol=1e-5, atol=1e-7)
    torch.testing.assert_close(gradient(f, x).values, g, rtol=1e-5, atol=1e-7)


def test_smoothgrad_without_noise_is_the_gradient(small_net):
    x = photo(32)
    f, pos = argmax_unit(small_net, "3", 5, x)
    p = small_net.preprocess
    _, g = _plain_torch_gradient(small_net.module, x, 5, pos, p.mean, p.std)
    torch.testing.assert_close(smoothgrad(f, x, noise=0.0, samples=5).values, g, rtol=1e-5, atol=1e-7)


def test_smoothgrad_mean_converges_to_the_expected_gradient():
    # f = sum(x^3): E[3 (x + e)^2] = 3 x^2 + 3 sigma^2 for e ~ N(0, sigma^2) (Gaussian second moment),
    # sigma = noise * (x_max - x_min) as in Smilkov et al. 2017.
    g = torch.Generator().manual_seed(1)
    x = torch.rand(3, 8, 8, generator=g, dtype=torch.float64)
    f = lambda b: (b**3).flatten(1).sum(1)  # noqa: E731
    sigma = 0.15 * float(x.max() - x.min())
    expect = 3 * x**2 + 3 * sigma**2
    err = {n: float((smoothgrad(f, x, 0.15, n, seed=0, batch=512).values - expect).abs().mean())
           for n in (16, 4096)}
    assert err[4096] < 0.02 and err[4096] < err[16] / 4  # error shrinks like 1/sqrt(n): 16x fewer here
    a, b = smoothgrad(f, x, 0.15, 64, seed=5), smoothgrad(f, x, 0.15, 64, seed=5)
    assert torch.equal(a.values, b.values)
    assert not torch.equal(a.values, smoothgrad(f, x, 0.15, 64, seed=6).values)


def test_bad_arguments_are_refused_clearly():
    x = torch.zeros(3, 4, 4)
    f = lambda b: b.flatten(1).sum(1)  # noqa: E731
    cases = [
        (lambda: integrated_gradients(f, x, x, rule="simpson"), "Unknown integration rule 'simpson'"),
        (lambda: integrated_gradients(f, x, torch.zeros(3, 2, 2)), "Baseline shape"),
        (lambda: integrated_gradients(f, x, x, 0), "at least 1 step"),
        (lambda: integrated_gradients(f, x, x, rule="left", tolerance=0.1), "trapezoid"),
        (lambda: smoothgrad(f, x, -0.1), "noise must be >= 0"),
        (lambda: integrated_gradients(lambda b: b.sum(), x, x), "one score per input"),
    ]
    for call, text in cases:
        with pytest.raises(UnitlensError, match=text):
            call()
