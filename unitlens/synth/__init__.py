"""Pass 2: synthesise images that drive units, many units of one layer per batch, on CPU.

  param.py       spectral (1/f, colour-decorrelated) and pixel parameterisations
  transforms.py  the random transforms applied at every step
  objectives.py  channel, neuron, direction, diversity, regularisers; combined with + - *
  optimise.py    the batched Adam loop, early stop, batch size from memory
  evidence.py    checks stored beside each image (robustness, rank, activation vs exemplars)
  pipeline.py    the run folder: validate, synthesise layer by layer, write, resume
  results.py     the on-disk layout, read back (for `show`, the atlas) without torch

Names load on first use, so reading results (`show`) does not import torch.
"""
from .._lazy import lazy_exports

_EXPORTS = {
    "synthesize": "pipeline", "model_from_run": "pipeline", "unit_images": "results", "trace_of": "results",
    "SynthConfig": "loop", "optimise_units": "loop", "iter_units": "loop", "UnitResult": "loop",
    "TransformSpec": "warps",
    "ColourBasis": "bases", "SpectralImage": "bases", "PixelImage": "bases",
    "Objective": "goal", "channel": "goal", "neuron": "goal", "direction": "goal",
    "negative": "goal", "diversity": "goal", "total_variation": "goal",
    "pixel_norm": "goal",
}
__all__ = list(_EXPORTS)


__getattr__ = lazy_exports(__name__, _EXPORTS, globals())
