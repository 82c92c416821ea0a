"""Pass 2: synthesise images that drive units, many units of one layer per batch, on CPU.

  goal.py        Goal: which units, how their feature maps are reduced, which way, penalty weights
  bases.py       the image bases: spectral (1/f, colour-whitened) and pixel
  warps.py       the random warps applied at every step
  loop.py        the batched Adam loop, early stop, batch size from memory
  evidence.py    checks stored beside each image (robustness, rank, activation vs exemplars)
  pipeline.py    the run folder: validate, synthesise layer by layer, write, resume
  results.py     the on-disk layout, read back (for `show`, the atlas) without torch

Names load on first use, so reading results (`show`) does not import torch.
"""
from .._lazy import lazy_exports

_EXPORTS = {
    "synthesize": "pipeline", "model_from_run": "pipeline", "unit_images": "results", "trace_of": "results",
    "Goal": "goal", "SynthConfig": "loop", "optimise_units": "loop", "iter_layer": "loop", "UnitResult": "loop",
    "Warps": "warps", "ColourBasis": "bases", "SpectralBasis": "bases", "PixelBasis": "bases",
}
__all__ = list(_EXPORTS)

# Synthesis settings of the overnight commands (`unitlens run`, `unitlens demo`): each image stops
# 10% past parity with its best natural exemplar, at twice the published learning rate. Measured
# by scripts/bench_parity.py on the swatch network's block3 and block4 (80 units): parity rate 0.91
# against 0.88 at the library defaults (lr 0.05, gain stop), with 3.8x fewer image-steps.
OVERNIGHT = {"lr": 0.1, "stop_at_parity": 0.1}


__getattr__ = lazy_exports(__name__, _EXPORTS, globals())
