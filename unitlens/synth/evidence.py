"""Checks on a finished image, stored beside it, because a visualisation can mislead.

Synthetic references help people less than natural exemplars (Borowski et al., ICLR 2021), a
network can be built to show one unit's visualisation for another (Geirhos et al. 2024), and an
explanation must at least change when the weights do (Adebayo et al. 2018). So each image gets:

  activation      the unit's reduced value under the goal (e.g. the spatial mean) on the saved 8-bit image
  max_activation  the spatial maximum of the channel, the statistic mining ranks exemplars by,
                  on the image as mining would see it (resized to the model's input size if the
                  synthesis size differs, then normalised the same way)
  robustness      the activation under `checks` fresh random transforms: mean, std, and mean /
                  activation; a value far below 1 means the image works only as it stands
  rank            where the target channel stands among all channels of the layer on this image, in
                  the goal's direction (1 = the image drives this unit further than any other channel)

Everything is computed from the 8-bit image that is written to disk, i.e. what a reader sees.
"""
from __future__ import annotations

import numpy as np
import torch
import torch.nn.functional as F

from .loop import seed_for
from .warps import Warps, warp


def assess(model, layer: str, images: torch.Tensor, targets, scorer, spec: Warps,
           fill, seed: int, ms, checks: int = 32, extract=None) -> list[dict]:
    """images (N, C, S, S) uint8; targets (N,) channels; ms (N,) image numbers within their unit.

    `scorer` is the goal's Scorer for `layer`; `extract` an extractor that returns `layer` (made here if not given).
    """
    name, sign = layer, scorer.sign
    extract = extract or model.extractor([name])
    x = images.float() / 255.0
    size = model.preprocess.size  # (H, W)
    out = []
    with torch.no_grad():
        stat = scorer.per_channel(extract(model.normalize(x))[name])  # (N, C)
        xm = x if tuple(x.shape[-2:]) == size else F.interpolate(x, size=size, mode="bilinear",
                                                                 antialias=True, align_corners=False)
        # the resize gives floats; round to 8 bits like a decoded corpus image
        xm = (xm * 255).round().clamp(0, 255) / 255.0
        fmax = extract(model.normalize(xm))[name].flatten(2).max(2).values  # (N, C)
        for i, (t, m) in enumerate(zip(targets, ms)):
            t = int(t)
            act = float(stat[i, t])
            rank = 1 + int((sign * stat[i] > sign * stat[i, t]).sum())
            rec = {"activation": act, "max_activation": float(fmax[i, t]), "rank": rank,
                   "channels": int(stat.shape[1]), "robustness": None}
            if checks and not spec.identity:
                rng = np.random.default_rng(seed_for(seed, layer, t, int(m), "check"))
                draws = torch.from_numpy(np.stack([spec.draw(rng) for _ in range(checks)]))
                warped = warp(x[i:i + 1].expand(checks, -1, -1, -1), draws, spec.pad, fill, spec.pad_mode)
                v = scorer.per_channel(extract(model.normalize(warped))[name])[:, t].double()
                mean, std = float(v.mean()), float(v.std(unbiased=False))
                rec["robustness"] = {"n": checks, "mean": mean, "std": std,
                                     "relative": mean / act if abs(act) > 1e-12 else None}
            out.append(rec)
    return out
