"""The optimisation loop: many units of one layer per forward/backward pass.

One batch holds B images, image i optimising its own target (a channel of the layer), all through
ONE truncated forward and ONE backward (the network's weights are frozen, so only input gradients
are computed). Images are independent rows everywhere: their own Adam state and step count, their
own random generators for the start image and the transforms, seeded from (seed, layer, target,
m). So a unit's result does not depend on the batch it happened to be in (up to the rounding of
batched convolutions), and a resumed run gives the same images.

Batches are refilled as units finish (an image stops early once its objective stops improving),
so the batch stays full until the queue runs dry. The batch size starts from an estimate of
memory per image (the difference in bytes autograd saves between trial steps of one and two
images) against half the free memory, and halves if the allocator still runs out.

Adam (Kingma & Ba 2015) is written out here because every row needs its own step count. Note
that on an objective linear in the parameters Adam's step is lr * sign(gradient), so under a norm
constraint it converges to sign(w), not w; the "gradient" optimizer (plain ascent, as in Erhan et
al. 2009) reaches the analytic optimum there.
"""
from __future__ import annotations

import hashlib
from collections import deque
from dataclasses import dataclass, field, fields
from typing import ClassVar

import numpy as np
import torch

from .._memory import available_memory, heap_reuse
from ..errors import UnitlensError
from .bases import ColourBasis, make_basis
from .goal import Context, Goal, Scorer
from .results import stalled as _stalled
from .warps import Warps, warp

MAX_REDRAWS = 4  # new random starts for a unit silent at its start (contrast x3 each time)
BETAS = (0.9, 0.999)
ADAM_EPS = 1e-8


@dataclass(frozen=True)
class SynthConfig:
    """Settings of one synthesis. None means "use the default" (given in the comment)."""

    steps: int = 256  # per image, at most; Olah et al. 2017 used 2560, a CPU run wants fewer
    size: int | None = None  # image side in px; None: the model's input size
    per_unit: int = 1  # images per unit (with a diversity term they differ from each other)
    seed: int = 0
    lr: float = 0.05  # Adam, as in Olah et al. 2017
    optimizer: str = "adam"  # or "gradient": plain ascent p += lr * grad (Erhan et al. 2009)
    basis: str = "spectral"  # or "pixel" (bases.py)
    whiten_colour: bool = True  # colour factor from the corpus covariance; False: plain RGB
    falloff: float = 1.0  # spectral amplitude ~ 1 / f^falloff
    init_std: float = 0.1
    squash: str = "sigmoid"  # "sigmoid", "clip" or "none" (see bases.py)
    warps: Warps = field(default_factory=Warps)
    norm: float | None = None  # project each whitened image onto the sphere of this L2 radius
    blur_period: int = 0  # 0: never; else blur the parameters once per this many steps (Yosinski et al. 2015)
    blur_sigma: float = 0.5
    stop_window: int = 32  # early stop: compare the mean objective over the last two windows ...
    stop_gain: float | None = 0.01  # ... and stop below this relative gain; None: always run all steps
    batch_size: int | None = None  # images per pass; None: from memory, at most max_batch
    max_batch: int = 32
    checks: int = 32  # fresh random transforms for the robustness check (0: skip)
    # Parity with the best natural exemplar (needs its objective, given to the loop as `references`):
    # checked every `parity_every` steps on the mean of the last `parity_window` traced values.
    stop_at_parity: float | None = None  # stop an image once it is that fraction past parity; None: never
    parity_every: int = 4
    parity_window: int = 8

    # fields added after run folders existed: left out of describe() at their default, so that a
    # folder made before them keeps its settings and resumes (the check ones change no image)
    _LATER: ClassVar[dict] = {"stop_at_parity": None, "parity_every": 4, "parity_window": 8}

    def validate(self) -> None:
        for name, v, lo in (("steps", self.steps, 1), ("per_unit", self.per_unit, 1),
                            ("max_batch", self.max_batch, 1), ("stop_window", self.stop_window, 1),
                            ("checks", self.checks, 0), ("blur_period", self.blur_period, 0),
                            ("parity_every", self.parity_every, 1), ("parity_window", self.parity_window, 1)):
            if v < lo:
                raise UnitlensError(f"{name} must be at least {lo}, got {v}.")
        if self.size is not None and self.size < 16:
            raise UnitlensError(f"Image size {self.size} is too small (at least 16 px).")
        if self.batch_size is not None and self.batch_size < self.per_unit:
            raise UnitlensError(f"batch_size {self.batch_size} cannot hold the {self.per_unit} images of one unit.")
        if self.lr <= 0:
            raise UnitlensError(f"lr must be positive, got {self.lr}.")
        if self.optimizer not in ("adam", "gradient"):
            raise UnitlensError(f"optimizer must be 'adam' or 'gradient', got '{self.optimizer}'.")
        if self.stop_at_parity is not None and self.stop_at_parity < 0:
            raise UnitlensError(f"stop_at_parity is a margin past parity (0 or more, e.g. 0.1), got {self.stop_at_parity}.")

    def describe(self, size: int) -> dict:
        d = {k: getattr(self, k) for k in (f.name for f in fields(self)) if k not in ("warps", "batch_size", "max_batch")
             and not (k in self._LATER and getattr(self, k) == self._LATER[k])}
        d["size"] = size
        d["warps"] = None if self.warps.identity else self.warps.describe(size)
        return d


@dataclass
class UnitResult:
    """The finished images of one target."""

    index: int  # position in the targets given
    target: int
    images: np.ndarray  # (M, H, W, C) float32, in [0, 1] unless squash is "none"
    traces: list[np.ndarray]  # M objective traces (value under that step's transform), one per step run
    steps: list[int]  # steps used per image (<= config.steps when stopped early)
    layer: str = ""
    parity_steps: list[int | None] = field(default_factory=list)  # first step at parity per image (None: not
    # reached, or no reference given); from the traced values, so only a cheap early sign of the final check


def seed_for(seed: int, layer: str, target: int, m: int, purpose: str) -> int:
    """A 63-bit seed that depends only on what the image is, never on its batch."""
    h = hashlib.sha256(f"{seed}/{layer}/{target}/{m}/{purpose}".encode()).digest()
    return int.from_bytes(h[:8], "little") >> 1


class _Unit:
    """One target's M images in flight: parameters, Adam moments, steps, generators, traces."""

    def __init__(self, index: int, target: int, engine: _Engine):
        c, M = engine.config, engine.config.per_unit
        self.index, self.target = index, target
        gens = [torch.Generator().manual_seed(seed_for(c.seed, engine.layer, target, m, "init")) for m in range(M)]
        self.params = torch.stack([engine.basis.init(g) for g in gens])  # (M, *shape)
        self.m1 = torch.zeros_like(self.params)
        self.m2 = torch.zeros_like(self.params)
        self.step = torch.zeros(M, dtype=torch.long)
        self.done = torch.zeros(M, dtype=torch.bool)
        self.redraws = torch.zeros(M, dtype=torch.long)  # new starts drawn because the unit was silent
        self.parity = torch.full((M,), -1, dtype=torch.long)  # first step at parity, -1 until then
        self.rngs = [np.random.default_rng(seed_for(c.seed, engine.layer, target, m, "transforms")) for m in range(M)]
        self.traces: list[list[float]] = [[] for _ in range(M)]


class _Batch:
    """The units in flight packed into batch tensors (rebuilt only when the membership changes)."""

    def __init__(self, units: list[_Unit], M: int):
        self.M = M
        self.P = torch.cat([u.params for u in units])  # (B, *shape)
        self.m1 = torch.cat([u.m1 for u in units])
        self.m2 = torch.cat([u.m2 for u in units])
        self.step = torch.cat([u.step for u in units])  # (B,)
        self.done = torch.cat([u.done for u in units])
        self.redraws = torch.cat([u.redraws for u in units])
        self.parity = torch.cat([u.parity for u in units])
        self.targets = torch.tensor([u.target for u in units for _ in range(M)])
        self.groups = torch.arange(len(units)).repeat_interleave(M)
        self.rngs = [r for u in units for r in u.rngs]
        self.traces = [t for u in units for t in u.traces]  # shared lists: appends reach the units

    def unpack(self, units: list[_Unit]) -> None:
        for k, u in enumerate(units):
            rows = slice(k * self.M, (k + 1) * self.M)
            u.params, u.m1, u.m2 = self.P[rows], self.m1[rows], self.m2[rows]
            u.step, u.done, u.redraws = self.step[rows], self.done[rows], self.redraws[rows]
            u.parity = self.parity[rows]


class _Engine:
    def __init__(self, model, layer: str, targets, config: SynthConfig, goal: Goal | None,
                 colour: ColourBasis | None, references: dict[int, float] | None = None):
        config.validate()
        self.model, self.layer, self.config = model, layer, config
        self.targets = [int(t) for t in targets]
        goal = goal if goal is not None else Goal()
        goal.check(model, layer, self.targets)  # before the first step
        self.score: Scorer = goal.scorer(layer)
        # parity threshold per target, in the score's direction (the exemplar's objective times the sign)
        self.reference = {t: self.score.sign * float(v) for t, v in (references or {}).items()}
        self.size = config.size or model.preprocess.side
        C = model.preprocess.channels
        mean = colour.mean if colour else ColourBasis.default(C).mean
        if not config.whiten_colour:
            colour = ColourBasis.plain(mean)
        self.colour = colour or ColourBasis.default(C)
        if len(self.colour.mean) != C:
            raise UnitlensError(f"The colour basis has {len(self.colour.mean)} channels and the model takes {C}.")
        options = {"squash": config.squash, "init_std": config.init_std}
        if config.basis == "spectral":
            options["falloff"] = config.falloff
        self.basis = make_basis(config.basis, self.size, self.colour, **options)
        self.spec = config.warps.at(self.size)
        self.extract = model.extractor(self.score.layers())

    # -- one step for a packed batch ------------------------------------------------------
    def values_and_grads(self, params, targets, groups, draws):
        p = params.detach().requires_grad_(True)
        with torch.enable_grad():
            pixels = self.basis.pixels(p)  # (B, C, S, S)
            x = pixels if draws is None else warp(pixels, draws, self.spec.pad, self.colour.mean, self.spec.pad_mode)
            feats = self.extract(self.model.normalize(x))
            values = self.score(feats, Context(self.layer, targets, groups, pixels))  # (B,)
            (grad,) = torch.autograd.grad(-values.sum(), p)
        return values.detach(), grad

    def _draws(self, rngs) -> torch.Tensor | None:
        if self.spec.identity:
            return None
        return torch.from_numpy(np.stack([self.spec.draw(r) for r in rngs]))

    # -- batch size ---------------------------------------------------------------------------
    def capacity(self) -> int:
        """Images per pass: the configured batch, else what memory allows (at most max_batch)."""
        c, M = self.config, self.config.per_unit
        total = len(self.targets) * M
        if c.batch_size:
            return max(M, min(c.batch_size, total) // M * M)
        one, two = self.saved_bytes(1), self.saved_bytes(2)
        per_image = max(two - one, 1)  # the difference leaves out what every batch saves once (weights)
        fit = int((available_memory() * 0.5 - (one - per_image)) // (2 * per_image))
        return max(M, min(fit, c.max_batch, total) // M * M)

    def bytes_per_image(self) -> int:
        return self.saved_bytes(2) - self.saved_bytes(1)

    def saved_bytes(self, n: int) -> int:
        """Bytes autograd saves for the backward of a trial step of n images (most of the memory)."""
        seen = [0]

        def pack(t):
            seen[0] += t.numel() * t.element_size()
            return t

        p = torch.zeros((n, *self.basis.shape))
        draws = None if self.spec.identity else torch.tensor([[0, 0, 1.0, 0, 0, 0]] * n)
        t = torch.tensor([self.targets[0]] * n)
        with torch.autograd.graph.saved_tensors_hooks(pack, lambda t: t):
            self.values_and_grads(p, t, torch.zeros(n, dtype=torch.long), draws)
        return seen[0]

    # -- the loop -------------------------------------------------------------------------
    def run(self, on_step=None):
        """Yield lists of finished UnitResults, in order of completion. `on_step(units, step)` is
        called after every step: units done so far, the running ones counted by the fraction of
        their steps taken (so a progress bar moves within a batch), and the batch's furthest step."""
        M = self.config.per_unit
        if not self.targets:
            return
        self._on_step, self._finished = on_step, 0
        cap = self.capacity()
        queue: deque = deque(range(len(self.targets)))  # unit indices, or paused _Unit objects
        active: list[_Unit] = []
        while queue or active:
            while queue and (not active or (len(active) + 1) * M <= cap):
                u = queue.popleft()
                active.append(u if isinstance(u, _Unit) else _Unit(u, self.targets[u], self))
            try:
                self._steps_until_one_finishes(active)
            except RuntimeError as e:
                if not is_out_of_memory(e) or cap <= M:
                    raise
                cap = max(M, cap // 2 // M * M)
                while len(active) * M > cap:  # the newest wait, their state kept
                    queue.appendleft(active.pop())
                continue
            finished = [u for u in active if bool(u.done.all())]
            active = [u for u in active if not bool(u.done.all())]
            self._finished += len(finished)
            yield [self._result(u) for u in finished]

    def _steps_until_one_finishes(self, units: list[_Unit]) -> None:
        b = _Batch(units, self.config.per_unit)
        total = self.config.steps * self.config.per_unit
        try:
            while True:
                stop = self.step(b)
                if self._on_step is not None:  # a unit whose images all stopped early counts as done
                    taken = torch.where(b.done, self.config.steps, b.step).view(-1, b.M).sum(1)  # (units,)
                    self._on_step(self._finished + float(taken.sum()) / total, int(b.step.max()))
                if stop:
                    break
        finally:  # on success or an out-of-memory error, the units keep the last completed step
            b.unpack(units)

    def step(self, b: _Batch) -> bool:
        """One step for every image of the batch; True once some unit has all its images done."""
        c = self.config
        states = [r.bit_generator.state for r in b.rngs]
        try:
            values, g = self.values_and_grads(b.P, b.targets, b.groups, self._draws(b.rngs))
        except RuntimeError:  # a retry after halving the batch sees the same transforms
            for r, st in zip(b.rngs, states):
                r.bit_generator.state = st
            raise
        live = ~b.done & ~self._redraw_silent(b, values, g)
        self._update(b.P, b.m1, b.m2, g, b.step, None if bool(live.all()) else torch.nonzero(live).flatten())
        b.step += live.long()
        vals, steps_now = values.tolist(), b.step.tolist()
        targets = b.targets.tolist()
        for i in torch.nonzero(live).flatten().tolist():
            b.traces[i].append(vals[i])
            past = self._parity(b, i, steps_now[i], targets[i])
            if steps_now[i] >= c.steps or past or _stalled(b.traces[i], c.stop_window, c.stop_gain):
                b.done[i] = True
        return bool(b.done.view(-1, b.M).all(1).any())

    def _parity(self, b: _Batch, i: int, step: int, target: int) -> bool:
        """Record the first checked step at which image i's recent values reach its reference; True
        when it should stop there (stop_at_parity: that far past the reference)."""
        c, ref = self.config, self.reference.get(target)
        if ref is None or step % c.parity_every or len(b.traces[i]) < c.parity_window:
            return False
        recent = sum(b.traces[i][-c.parity_window:]) / c.parity_window
        if recent >= ref and b.parity[i] < 0:
            b.parity[i] = step
        return c.stop_at_parity is not None and recent >= ref + c.stop_at_parity * abs(ref)

    def _redraw_silent(self, b: _Batch, values: torch.Tensor, g: torch.Tensor) -> torch.Tensor:
        """Rows that start where the unit is silent (objective exactly 0, no gradient: e.g. a ReLU
        unit off everywhere on a near-grey start) would never move. Before their first step they
        get a new random start with 3x the contrast, up to MAX_REDRAWS times; those rows skip this
        step. Seeds depend on the image and the attempt only, never on the batch."""
        flat = g.flatten(1)
        silent = (b.step == 0) & ~b.done & (values == 0) & (flat == 0).all(1) & (b.redraws < MAX_REDRAWS)
        for i in torch.nonzero(silent).flatten().tolist():
            m = i % b.M
            b.redraws[i] += 1
            k = int(b.redraws[i])
            gen = torch.Generator().manual_seed(seed_for(self.config.seed, self.layer, int(b.targets[i]), m, f"init-{k}"))
            b.P[i] = self.basis.init(gen) * 3.0**k
        return silent

    def _update(self, P, m1, m2, g, step, rows) -> None:
        """One Adam step, in place, for all rows (rows None) or the given ones; then blur / project."""
        if rows is not None:
            part = [x[rows] for x in (P, m1, m2, g)]
            self._update(*part, step[rows], None)
            for whole, p in zip((P, m1, m2), part):
                whole[rows] = p
            return
        c = self.config
        if c.optimizer == "gradient":
            P.add_(g, alpha=-c.lr)
        else:
            adam_step(P, m1, m2, g, step, c.lr)
        if c.blur_period:
            due = torch.nonzero((step + 1) % c.blur_period == 0).flatten()
            if len(due):
                P[due] = self.basis.blur(P[due], c.blur_sigma)
        if c.norm is not None:
            P.copy_(self.basis.project(P, c.norm))

    def _result(self, u: _Unit) -> UnitResult:
        with torch.no_grad():
            px = self.basis.pixels(u.params)  # (M, C, S, S)
        return UnitResult(u.index, u.target, px.permute(0, 2, 3, 1).numpy().astype(np.float32),
                          [np.array(t, dtype=np.float32) for t in u.traces], [int(s) for s in u.step], self.layer,
                          [int(p) if p >= 0 else None for p in u.parity.tolist()])


def adam_step(P: torch.Tensor, m1: torch.Tensor, m2: torch.Tensor, g: torch.Tensor, step: torch.Tensor,
              lr: float) -> None:
    """Adam (Kingma & Ba 2015), in place, minimising: P, its moments m1, m2 and gradient g are
    (B, ...); row i takes its step number step[i] + 1 (rows start at different times)."""
    b1, b2 = BETAS
    shape = (-1,) + (1,) * (P.dim() - 1)
    t = (step + 1).to(P.dtype).view(shape)  # (B, 1, ...): each row has its own step count
    m1.mul_(b1).add_(g, alpha=1 - b1)
    m2.mul_(b2).addcmul_(g, g, value=1 - b2)
    denom = (m2 / (1 - b2**t)).sqrt_().add_(ADAM_EPS)
    P.addcdiv_(m1 * (lr / (1 - b1**t)), denom, value=-1.0)


def is_out_of_memory(e: BaseException) -> bool:
    s = str(e).lower()
    return "out of memory" in s or "can't allocate memory" in s or "not enough memory" in s


def iter_layer(model, layer: str, targets, config: SynthConfig = SynthConfig(), goal: Goal | None = None,
               colour: ColourBasis | None = None, on_step=None, references: dict[int, float] | None = None):
    """Optimise one image set per target of `layer` (the goal's units aside); yield lists of
    UnitResult as units finish. The goal is checked against `targets` before the first step.
    `on_step(units, step)`, if given, hears after every step how far the work is (see _Engine.run).
    `references` {target: objective of its best natural exemplar} lets the loop note (and with
    config.stop_at_parity, stop at) the step where an image reaches it."""
    yield from _Engine(model, layer, targets, config, goal, colour, references).run(on_step)


@heap_reuse()
def step_seconds(model, layer: str, targets, config: SynthConfig = SynthConfig(), goal: Goal | None = None,
                 colour: ColourBasis | None = None, repeats: int = 2) -> tuple[float, int]:
    """(seconds per step, images per step) of one full batch of `targets`, timed on the real loop:
    image basis, warps, truncated forward, backward and Adam. For the time-budget planner."""
    import time
    from dataclasses import replace

    most = max(repeats, 20)
    e = _Engine(model, layer, targets, replace(config, steps=most + 2, stop_gain=None), goal, colour)
    n = max(1, e.capacity() // config.per_unit)
    b = _Batch([_Unit(i, t, e) for i, t in enumerate(e.targets[:n])], config.per_unit)
    e.step(b)  # warm-up (allocations, lazy initialisation)
    # Steps of a few tens of milliseconds are timed over at least half a second (up to `most` steps),
    # and the median taken: one step's time swings with the timer and the machine's other work.
    times: list[float] = []
    start = time.perf_counter()
    while len(times) < repeats or (len(times) < most and time.perf_counter() - start < 0.5):
        t = time.perf_counter()
        e.step(b)
        times.append(time.perf_counter() - t)
    return sorted(times)[len(times) // 2], n * config.per_unit


@heap_reuse()
def optimise_units(model, goal: Goal, config: SynthConfig = SynthConfig(),
                   colour: ColourBasis | None = None) -> list[UnitResult]:
    """In-memory synthesis (no run folder): one UnitResult per unit of the goal, layer by layer in
    the model's order, units in the order given. The whole goal is checked before the first step.

    >>> m = load_model("torchvision:resnet18", size=64)                              # doctest: +SKIP
    >>> r = optimise_units(m, Goal("layer2:0,5"), SynthConfig(steps=64))             # doctest: +SKIP
    >>> r[0].images.shape                                                            # doctest: +SKIP
    (1, 64, 64, 3)
    """
    layers = goal.layers(model)
    out = []
    for lu in layers:
        got = {r.index: r for batch in iter_layer(model, lu.layer, lu.units, config, goal, colour) for r in batch}
        out += [got[i] for i in range(len(got))]
    return out
