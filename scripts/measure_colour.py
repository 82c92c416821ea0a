"""Measure the colour correlation of natural photographs: the default of the synthesis colour basis
(`unitlens.synth.bases.DEFAULT_CORR`) for runs without a corpus of their own.

    python scripts/measure_colour.py

The photographs are the everyday scenes bundled with scikit-image (no download): astronaut,
chelsea (a cat), coffee, rocket. Each photograph counts once whatever its size: the correlation
matrix of its RGB pixels, averaged over the four, rounded to two decimals. Four photographs are a
thin sample (pooling their pixels instead weighs the large blue sky of `rocket` and moves R-B from
0.68 to 0.48), so the default is a typical photo's colour, not a property of any corpus;
tests/test_synth.py compares the constant with a fresh run of `measure()`.
"""
from __future__ import annotations

import numpy as np

PHOTOS = ("astronaut", "chelsea", "coffee", "rocket")


def measure() -> np.ndarray:
    """(3, 3) mean over PHOTOS of each photograph's RGB correlation matrix, rounded to 2 decimals."""
    from skimage import data

    per_photo = [np.corrcoef(getattr(data, name)().reshape(-1, 3).astype(np.float64), rowvar=False)
                 for name in PHOTOS]  # each (3, 3)
    return np.round(np.mean(per_photo, axis=0), 2)


if __name__ == "__main__":
    corr = measure()
    print(f"RGB correlation, mean over {', '.join(PHOTOS)} (scikit-image):")
    print("DEFAULT_CORR = (" + ", ".join("(" + ", ".join(f"{v:.2f}" for v in row) + ")" for row in corr) + ")")
