"""The weighted mean per texel of samples from several views."""

from __future__ import annotations

import numpy as np


class TexelAverage:
    """Accumulates weighted samples per texel, view after view, in float64.

    Sums run in the order samples are added (np.bincount adds its inputs in order), so the mean is
    the same whether the samples come one view at a time or all at once.
    """

    def __init__(self, n: int, channels: int = 3):
        self.acc = np.zeros((n, channels), np.float64)   # sum of weight x value per texel
        self.wsum = np.zeros(n, np.float64)              # sum of weights per texel

    def add(self, idx: np.ndarray, value: np.ndarray, weight: np.ndarray) -> None:
        """idx: (M,) int64 flat texel indices; value: (M, C); weight: (M,) float64 >= 0."""
        n = len(self.wsum)
        w = np.asarray(weight, np.float64)
        self.wsum += np.bincount(idx, w, n)
        for c in range(self.acc.shape[1]):
            self.acc[:, c] += np.bincount(idx, w * value[:, c], n)

    def mean(self) -> np.ndarray:
        """(n, C) float64 weighted mean per texel; 0 where no weight fell."""
        out = np.zeros_like(self.acc)
        np.divide(self.acc, self.wsum[:, None], out=out, where=self.wsum[:, None] > 0)
        return out

    @property
    def seen(self) -> np.ndarray:
        """(n,) bool: texels with some weight."""
        return self.wsum > 0
