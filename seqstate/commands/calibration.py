"""Calibration measures: reliability tables, expected calibration error, Brier score.

Engine-free maths on plain arrays.  A *forecast* is a probability in [0, 1] (a base's
posterior of a label, or a feature's ``segment_probability``); an *outcome* is 0 or 1
(the base truly carries the label; every base of the feature truly carries it).

Forecasts are put into ``bins`` equal-width bins over [0, 1]: bin ``b`` holds
``b / bins <= p < (b + 1) / bins`` and the last bin also holds ``p == 1``.  Per bin the
table keeps the count, the sum of forecasts and the sum of outcomes, so records can be
added one at a time in bounded memory.  Measures:

- expected calibration error (Guo, Pleiss, Sun & Weinberger 2017, "On calibration of
  modern neural networks", ICML): ``sum_b n_b / n * |mean forecast_b - fraction true_b|``;
- Brier score (Brier 1950, Monthly Weather Review 78:1): ``mean (p - y)^2`` over every
  forecast, summed exactly (not from the bins).

An empty bin has no mean and no fraction: :meth:`Reliability.rows` gives None there,
never NaN.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["CHUNK", "Reliability", "bin_of"]

#: Forecasts handled at a time by :meth:`Reliability.add` (bounded scratch memory).
CHUNK = 1 << 20


def bin_of(prob: np.ndarray, bins: int) -> np.ndarray:
    """The bin index (0 .. bins-1) of each forecast in [0, 1]; 1.0 falls in the last bin."""
    p = np.asarray(prob, dtype=np.float64)
    return np.minimum((p * bins).astype(np.int64), bins - 1).clip(0, bins - 1)


@dataclass
class Reliability:
    """Binned forecasts against outcomes, accumulated in bounded memory."""

    bins: int
    count: np.ndarray = field(init=False)
    sum_prob: np.ndarray = field(init=False)
    sum_true: np.ndarray = field(init=False)
    brier_sum: float = field(default=0.0, init=False)

    def __post_init__(self) -> None:
        if self.bins < 1:
            raise ValueError("bins must be at least 1")
        self.count = np.zeros(self.bins, dtype=np.int64)
        self.sum_prob = np.zeros(self.bins, dtype=np.float64)
        self.sum_true = np.zeros(self.bins, dtype=np.float64)

    def add(self, prob: np.ndarray, outcome: np.ndarray) -> None:
        """Add forecasts ``prob`` (floats in [0, 1]) and their outcomes (bool or 0/1).

        Worked through in chunks of :data:`CHUNK` forecasts, so the float64 scratch stays
        small at any record length.
        """
        prob, outcome = np.asarray(prob), np.asarray(outcome)
        if prob.shape != outcome.shape:
            raise ValueError("prob and outcome must have the same shape")
        prob, outcome = prob.reshape(-1), outcome.reshape(-1)
        for lo in range(0, prob.shape[0], CHUNK):
            p = np.clip(prob[lo : lo + CHUNK].astype(np.float64), 0.0, 1.0)
            y = outcome[lo : lo + CHUNK].astype(np.float64)
            b = bin_of(p, self.bins)
            self.count += np.bincount(b, minlength=self.bins)
            self.sum_prob += np.bincount(b, weights=p, minlength=self.bins)
            self.sum_true += np.bincount(b, weights=y, minlength=self.bins)
            self.brier_sum += float(np.sum((p - y) ** 2))

    @property
    def n(self) -> int:
        """Number of forecasts added."""
        return int(self.count.sum())

    def ece(self) -> float | None:
        """Expected calibration error (Guo et al. 2017); None with no forecast."""
        n = self.n
        if n == 0:
            return None
        full = self.count > 0
        gap = np.abs(self.sum_prob[full] - self.sum_true[full])  # n_b * |mean_p - frac|
        return float(gap.sum() / n)

    def max_gap(self) -> float | None:
        """Largest |mean forecast - fraction true| over the bins that hold forecasts."""
        full = self.count > 0
        if not full.any():
            return None
        c = self.count[full]
        return float(np.max(np.abs(self.sum_prob[full] - self.sum_true[full]) / c))

    def brier(self) -> float | None:
        """Brier score (Brier 1950), mean squared difference; None with no forecast."""
        n = self.n
        return self.brier_sum / n if n else None

    def rows(self) -> list[dict[str, Any]]:
        """One row per bin: bounds, count, mean forecast and fraction true (None when empty)."""
        out = []
        for b in range(self.bins):
            c = int(self.count[b])
            out.append(
                {
                    "bin_low": b / self.bins,
                    "bin_high": (b + 1) / self.bins,
                    "count": c,
                    "mean_forecast": float(self.sum_prob[b] / c) if c else None,
                    "fraction_true": float(self.sum_true[b] / c) if c else None,
                }
            )
        return out

    def summary(self) -> dict[str, Any]:
        """Measures and table as plain data (for JSON)."""
        return {
            "forecasts": self.n,
            "ece": self.ece(),
            "brier": self.brier(),
            "max_gap": self.max_gap(),
            "bins": self.rows(),
        }
