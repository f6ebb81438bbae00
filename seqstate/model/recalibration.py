"""Recalibration maps: monotone functions from a raw score to the observed frequency.

Engine-free maths on plain arrays (no I/O).  A *map* takes a forecast ``p`` in [0, 1]
(a base's posterior of a track, a feature's ``segment_probability``,
``exon_probability`` or ``structure_probability``) to the frequency with which such
forecasts came true on a trusted annotation.  Two kinds:

- ``isotonic``: the pool-adjacent-violators fit of a non-decreasing step function to
  the outcomes (Zadrozny & Elkan 2002, "Transforming classifier scores into accurate
  multiclass probability estimates", KDD; the algorithm of Ayer et al. 1955, Ann.
  Math. Stat. 26:641), kept as knots (block mean forecast, block frequency) and read
  between knots by linear interpolation, constant beyond the first and last knot;
- ``temperature``: ``sigmoid(logit(p) / T)`` with one parameter ``T > 0`` (Guo, Pleiss,
  Sun & Weinberger 2017, "On calibration of modern neural networks", ICML), for thin
  data; 0 and 1 map to themselves.

Both are non-decreasing and take [0, 1] into [0, 1], so applying one never reorders
forecasts (ties stay ties, an order may become a tie).

Fitting works on :class:`FineBins`: forecasts accumulated per fold in narrow bins on
the log-odds scale (count, sum of forecasts, sum of log-odds, sum of outcomes), so any
number of forecasts fits in bounded memory.  :func:`choose_map` measures both kinds by
cross-validation over the folds (Brier score of the held-out fold) and fits the winner
on all folds.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

__all__ = [
    "KINDS",
    "SCORES",
    "FineBins",
    "Map",
    "MapChoice",
    "Recalibration",
    "choose_map",
    "fit_isotonic",
    "fit_temperature",
    "pav",
]

#: The scores a map may be fitted for, in the order tables list them.
SCORES = ("posterior", "segment_probability", "exon_probability", "structure_probability")
#: The kinds of map.
KINDS = ("isotonic", "temperature")
#: Forecasts are clipped to [EPS, 1 - EPS] before taking log-odds.
EPS = 1e-12
#: Fine bins: this many over log-odds [-LOGIT_SPAN, LOGIT_SPAN], the two outermost
#: catching everything beyond.
FINE_BINS = 2000
LOGIT_SPAN = 16.0
#: Fewer held-in forecasts of either outcome than this: isotonic is not tried (thin data).
MIN_ISOTONIC = 50
#: Range of the temperature searched (log scale): at most a fivefold sharpening or
#: flattening of the log-odds.
T_RANGE = (0.2, 5.0)


def logit(p: np.ndarray) -> np.ndarray:
    """Natural log-odds of ``p`` clipped to [EPS, 1 - EPS]."""
    q = np.clip(np.asarray(p, dtype=np.float64), EPS, 1.0 - EPS)
    return np.log(q) - np.log1p(-q)


def sigmoid(z: np.ndarray) -> np.ndarray:
    """The logistic function, without overflow."""
    z = np.asarray(z, dtype=np.float64)
    out = np.empty_like(z)
    pos = z >= 0
    out[pos] = 1.0 / (1.0 + np.exp(-z[pos]))
    ez = np.exp(z[~pos])
    out[~pos] = ez / (1.0 + ez)
    return out


# ---------------------------------------------------------------- maps
@dataclass
class Map:
    """One monotone map (see the module docstring).

    ``isotonic``: ``knots_x`` strictly increasing, ``knots_y`` non-decreasing, both in
    [0, 1].  ``temperature``: ``temperature > 0``.
    """

    kind: str
    knots_x: np.ndarray = field(default_factory=lambda: np.zeros(0))
    knots_y: np.ndarray = field(default_factory=lambda: np.zeros(0))
    temperature: float = 1.0

    def apply(self, p: np.ndarray | float) -> np.ndarray:
        """The calibrated values of forecasts ``p`` (floats in [0, 1]; clipped)."""
        q = np.clip(np.asarray(p, dtype=np.float64), 0.0, 1.0)
        if self.kind == "isotonic":
            return np.interp(q, self.knots_x, self.knots_y)
        out = sigmoid(logit(q) / self.temperature)
        out = np.where(q <= 0.0, 0.0, np.where(q >= 1.0, 1.0, out))
        return np.clip(out, 0.0, 1.0)

    def value(self, p: float) -> float:
        """:meth:`apply` for one forecast."""
        return float(self.apply(np.array([p]))[0])

    def equals(self, other: Map) -> bool:
        """Same kind and the same numbers."""
        return (
            self.kind == other.kind
            and self.temperature == other.temperature
            and np.array_equal(self.knots_x, other.knots_x)
            and np.array_equal(self.knots_y, other.knots_y)
        )


@dataclass
class Recalibration:
    """A model's recalibration table: maps by (group, score) and the table's header notes.

    ``group`` is a track name (``CDS.plus``), or ``mRNA.plus``/``mRNA.minus`` for the
    ``structure_probability`` of a gene model; ``notes`` are the header comment lines
    (without ``# ``): how each map was chosen.
    """

    maps: dict[tuple[str, str], Map] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)

    def get(self, group: str, score: str) -> Map | None:
        """The map of one group's score, or None."""
        return self.maps.get((group, score))

    def equals(self, other: Recalibration | None) -> bool:
        """Same maps (the notes are not compared)."""
        if other is None or set(self.maps) != set(other.maps):
            return False
        return all(m.equals(other.maps[k]) for k, m in self.maps.items())


# ---------------------------------------------------------------- fitting
def pav(y: np.ndarray, w: np.ndarray | None = None) -> np.ndarray:
    """Pool-adjacent-violators: the non-decreasing sequence closest to ``y`` in weighted
    least squares (weights ``w`` > 0, default 1).  ``y`` is taken in the order given
    (sort by forecast first)."""
    y = np.asarray(y, dtype=np.float64)
    w = np.ones_like(y) if w is None else np.asarray(w, dtype=np.float64)
    if y.shape != w.shape or np.any(w <= 0):
        raise ValueError("pav needs one positive weight per value")
    means: list[float] = []
    weights: list[float] = []
    sizes: list[int] = []
    for i in range(y.shape[0]):
        m, wt, sz = float(y[i]), float(w[i]), 1
        while means and means[-1] > m:
            pw = weights.pop()
            m = (means.pop() * pw + m * wt) / (pw + wt)
            wt += pw
            sz += sizes.pop()
        means.append(m)
        weights.append(wt)
        sizes.append(sz)
    return np.repeat(np.array(means), np.array(sizes, dtype=np.int64))


def fit_isotonic(x: np.ndarray, y: np.ndarray, w: np.ndarray) -> Map:
    """Isotonic map from points ``x`` (forecasts), ``y`` (frequencies), weights ``w``.

    Points are sorted by ``x``; the knots are the PAV blocks' weighted mean forecast
    and value (blocks of one value pooled into one knot).
    """
    x, y, w = (np.asarray(a, dtype=np.float64) for a in (x, y, w))
    keep = w > 0
    x, y, w = x[keep], y[keep], w[keep]
    if x.shape[0] == 0:
        return Map("isotonic", np.array([0.0, 1.0]), np.array([0.0, 1.0]))
    order = np.argsort(x, kind="stable")
    x, y, w = x[order], y[order], w[order]
    fit = pav(y, w)
    # one knot per run of equal fitted values: its weighted mean forecast
    starts = np.flatnonzero(np.r_[True, np.diff(fit) != 0])
    wx = np.add.reduceat(w * x, starts)
    ww = np.add.reduceat(w, starts)
    kx = np.clip(wx / ww, 0.0, 1.0)
    ky = np.clip(fit[starts], 0.0, 1.0)
    # knots strictly increasing in x (equal means cannot occur for distinct blocks
    # except by rounding; pool them)
    ux, inv = np.unique(kx, return_inverse=True)
    if ux.shape[0] < kx.shape[0]:
        uy = np.zeros(ux.shape[0])
        uw = np.zeros(ux.shape[0])
        np.add.at(uy, inv, ky * ww)
        np.add.at(uw, inv, ww)
        kx, ky = ux, np.maximum.accumulate(uy / uw)
    return Map("isotonic", kx, ky)


def _log_loss(t: float, z: np.ndarray, n: np.ndarray, s: np.ndarray) -> float:
    # mean log loss of sigmoid(z / t) on bins of n forecasts with s outcomes true
    q = np.clip(sigmoid(z / t), EPS, 1 - EPS)
    return float(-(s * np.log(q) + (n - s) * np.log1p(-q)).sum())


def fit_temperature(z: np.ndarray, n: np.ndarray, s: np.ndarray) -> Map:
    """Temperature map by maximum likelihood: bins of mean log-odds ``z``, ``n``
    forecasts, ``s`` true; golden-section search over log T in :data:`T_RANGE`."""
    z, n, s = (np.asarray(a, dtype=np.float64) for a in (z, n, s))
    keep = n > 0
    z, n, s = z[keep], n[keep], s[keep]
    if z.shape[0] == 0:
        return Map("temperature", temperature=1.0)
    lo, hi = math.log(T_RANGE[0]), math.log(T_RANGE[1])
    g = (math.sqrt(5) - 1) / 2
    a, b = lo, hi
    c, d = b - g * (b - a), a + g * (b - a)
    fc, fd = _log_loss(math.exp(c), z, n, s), _log_loss(math.exp(d), z, n, s)
    for _ in range(80):
        if fc <= fd:
            b, d, fd = d, c, fc
            c = b - g * (b - a)
            fc = _log_loss(math.exp(c), z, n, s)
        else:
            a, c, fc = c, d, fd
            d = a + g * (b - a)
            fd = _log_loss(math.exp(d), z, n, s)
    return Map("temperature", temperature=float(math.exp((a + b) / 2)))


@dataclass
class FineBins:
    """Forecasts and outcomes per fold in :data:`FINE_BINS` log-odds bins (bounded memory)."""

    folds: int
    count: np.ndarray = field(init=False)
    sum_p: np.ndarray = field(init=False)
    sum_z: np.ndarray = field(init=False)
    sum_y: np.ndarray = field(init=False)

    def __post_init__(self) -> None:
        shape = (self.folds, FINE_BINS)
        self.count = np.zeros(shape, dtype=np.int64)
        self.sum_p = np.zeros(shape)
        self.sum_z = np.zeros(shape)
        self.sum_y = np.zeros(shape)

    def add(self, fold: int, prob: np.ndarray, outcome: np.ndarray) -> None:
        """Add forecasts ``prob`` and outcomes (bool or 0/1) to fold ``fold``."""
        p = np.clip(np.asarray(prob, dtype=np.float64).reshape(-1), 0.0, 1.0)
        y = np.asarray(outcome, dtype=np.float64).reshape(-1)
        z = logit(p)
        b = np.floor((z + LOGIT_SPAN) / (2 * LOGIT_SPAN) * FINE_BINS).astype(np.int64)
        b = np.clip(b, 0, FINE_BINS - 1)
        self.count[fold] += np.bincount(b, minlength=FINE_BINS)
        self.sum_p[fold] += np.bincount(b, weights=p, minlength=FINE_BINS)
        self.sum_z[fold] += np.bincount(b, weights=z, minlength=FINE_BINS)
        self.sum_y[fold] += np.bincount(b, weights=y, minlength=FINE_BINS)

    @property
    def n(self) -> int:
        """Forecasts added, all folds."""
        return int(self.count.sum())

    def pooled(self, folds: list[int]) -> tuple[np.ndarray, ...]:
        """(count, mean forecast, mean log-odds, true count) per non-empty bin of ``folds``."""
        n = self.count[folds].sum(axis=0).astype(np.float64)
        full = n > 0
        sp, sz, sy = (a[folds].sum(axis=0)[full] for a in (self.sum_p, self.sum_z, self.sum_y))
        return n[full], sp / n[full], sz / n[full], sy


def _fit(kind: str, n: np.ndarray, p: np.ndarray, z: np.ndarray, s: np.ndarray) -> Map:
    if kind == "isotonic":
        return fit_isotonic(p, s / n, n)
    return fit_temperature(z, n, s)


def _brier(m: Map | None, n: np.ndarray, p: np.ndarray, s: np.ndarray) -> float:
    # sum over bins of sum_i (f(p_b) - y_i)^2 = n f^2 - 2 f s + s  (y in {0, 1})
    f = p if m is None else m.apply(p)
    return float((n * f * f - 2 * f * s + s).sum())


@dataclass
class MapChoice:
    """The map chosen for one score and the held-out figures it was chosen by."""

    map: Map
    forecasts: int
    true: int
    #: held-out Brier score (mean over all forecasts) by kind, and of the raw forecasts
    held_out: dict[str, float]
    thin: bool
    #: the raw forecasts won: the map is the identity (temperature 1)
    raw: bool = False

    def note(self, group: str, score: str, folds: int) -> str:
        """The header line of the table for this map."""
        figs = ", ".join(f"{k} {v:.6f}" for k, v in self.held_out.items())
        why = f"lowest held-out Brier score over {folds} folds"
        if self.thin:
            why += f", isotonic not tried (fewer than {MIN_ISOTONIC} forecasts of an outcome)"
        if not self.held_out:
            why = "a single fold: nothing held out, the raw forecasts kept"
        kind = "identity (temperature 1: the raw forecasts won)" if self.raw else self.map.kind
        return (
            f"{group} {score}: {kind} ({why}; held-out Brier {figs or 'none'}; "
            f"{self.forecasts:,} forecasts, {self.true:,} true)"
        )


def choose_map(bins: FineBins) -> MapChoice:
    """Cross-validate isotonic against temperature over ``bins``' folds (Brier score of
    each held-out fold under the map fitted on the others) and fit the winner on all.

    The raw forecasts (the identity, a temperature of 1) compete too: a fitted map is
    kept only when it beats them on the held-out folds.  With fewer than
    :data:`MIN_ISOTONIC` true or false forecasts isotonic is not tried (``thin``); with a
    single non-empty fold nothing can be held out and the identity is kept.
    """
    every = list(range(bins.folds))
    n, p, z, s = bins.pooled(every)
    total, true = int(n.sum()), int(round(float(s.sum())))
    filled = [f for f in every if bins.count[f].sum() > 0]
    thin = min(true, total - true) < MIN_ISOTONIC or len(filled) < 2
    kinds = ("temperature",) if thin else KINDS
    held: dict[str, float] = {}
    if len(filled) >= 2:
        sums = {k: 0.0 for k in (*kinds, "raw")}
        for f in filled:
            rest = [g for g in every if g != f]
            tn, tp, tz, ts = bins.pooled(rest)
            hn, hp, _, hs = bins.pooled([f])
            for k in kinds:
                sums[k] += _brier(_fit(k, tn, tp, tz, ts), hn, hp, hs)
            sums["raw"] += _brier(None, hn, hp, hs)
        held = {k: v / max(total, 1) for k, v in sums.items()}
    if not held:
        return MapChoice(Map("temperature", temperature=1.0), total, true, held, thin)
    best = min((*kinds, "raw"), key=lambda k: (held[k], k != "raw"))
    if best == "raw":
        return MapChoice(Map("temperature", temperature=1.0), total, true, held, thin, raw=True)
    return MapChoice(_fit(best, n, p, z, s), total, true, held, thin)
