"""Exact order statistics (medians, quantiles) of data read in chunks, by bin refinement.

No approximation: each wanted order statistic (the r-th smallest observed value of one column within one group
of rows) is found exactly in a few passes over the data, holding at most ``COLLECT_CAP`` values per target:

1. counts, minimum and maximum of each (group, column);
2. a histogram of ``BINS`` equal-width bins between them; the bin holding rank r is kept, and the ranks of the
   values below it are subtracted;
3. when the kept bin holds at most ``COLLECT_CAP`` values they are collected and the r-th is selected
   (``np.partition``); otherwise its own minimum and maximum are found (equal: that is the answer, the common
   case of a tied value such as a count feature's 2) and step 2 is repeated inside it.

Continuous data of any size finish in three passes. Bin membership is recomputed with the same floating-point
expression in every pass, so a value is in the same bin each time (the expression is monotone in x, so each bin
is an interval). Quantiles between order statistics use numpy's default ("linear") interpolation and medians
the mean of the two middle values, as ``np.quantile`` / ``np.median`` do.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable, Iterable, Iterator

import numpy as np

BINS = 4096
COLLECT_CAP = 200_000

# (values (rows, columns), group of each row (rows,) int or None for one group)
Chunks = Callable[[], Iterator[tuple[np.ndarray, np.ndarray | None]]]


@dataclass
class _Target:
    group: int
    column: int
    need: int                                   # rank (0-based) within the current interval
    count: int                                  # values in the current interval
    lo: float
    hi: float
    chain: list[tuple[float, float, int]] = field(default_factory=list)
    phase: str = "hist"                         # hist | collect | minmax
    value: float | None = None
    parts: list[np.ndarray] = field(default_factory=list)
    hist: np.ndarray | None = None

    def key(self) -> tuple:
        return (self.group, self.column, tuple(self.chain))


def _bin(x: np.ndarray, lo: float, hi: float) -> np.ndarray:
    index = ((x - lo) / (hi - lo) * BINS).astype(np.int64)
    return np.clip(index, 0, BINS - 1, out=index)


def _group_rows(groups: np.ndarray | None, n_rows: int, wanted: set[int]) -> dict[int, np.ndarray | slice]:
    if groups is None:
        return {0: slice(None)}
    order = np.argsort(groups, kind="stable")
    sorted_groups = groups[order]
    out: dict[int, np.ndarray | slice] = {}
    for g in wanted:
        a, b = np.searchsorted(sorted_groups, [g, g + 1])
        out[g] = order[a:b]
    return out


def counts_and_ranges(chunks: Chunks, n_groups: int, n_columns: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(counts, minima, maxima) of the observed (non-NaN) values per (group, column)."""
    counts = np.zeros((n_groups, n_columns), dtype=np.int64)
    lows = np.full((n_groups, n_columns), np.inf)
    highs = np.full((n_groups, n_columns), -np.inf)
    for values, groups in chunks():
        rows = _group_rows(groups, values.shape[0], set(range(n_groups)))
        for g, index in rows.items():
            part = values[index]
            if part.shape[0] == 0:
                continue
            observed = ~np.isnan(part)
            counts[g] += observed.sum(axis=0)
            with np.errstate(invalid="ignore"):
                lows[g] = np.fmin(lows[g], np.nanmin(np.where(observed, part, np.inf), axis=0))
                highs[g] = np.fmax(highs[g], np.nanmax(np.where(observed, part, -np.inf), axis=0))
    return counts, lows, highs


def order_statistics(chunks: Chunks, wanted: Iterable[tuple[int, int, int]], *, counts: np.ndarray,
                     lows: np.ndarray, highs: np.ndarray) -> dict[tuple[int, int, int], float]:
    """{(group, column, rank): the rank-th smallest observed value} (rank 0-based, < the count)."""
    targets: dict[tuple[int, int, int], _Target] = {}
    for g, j, rank in wanted:
        if (g, j, rank) in targets:
            continue
        n = int(counts[g, j])
        if not 0 <= rank < n:
            raise ValueError(f"rank {rank} outside [0, {n}) for group {g}, column {j}")
        target = _Target(g, j, rank, n, float(lows[g, j]), float(highs[g, j]))
        _next_phase(target)
        targets[(g, j, rank)] = target
    while True:
        pending = [t for t in targets.values() if t.value is None]
        if not pending:
            break
        for t in pending:
            t.parts, t.hist = [], None
            if t.phase == "minmax":
                t.lo, t.hi = math.inf, -math.inf
        wanted_groups = {t.group for t in pending}
        for values, groups in chunks():
            rows = _group_rows(groups, values.shape[0], wanted_groups)
            selected: dict[tuple, np.ndarray] = {}
            histograms: dict[tuple, np.ndarray] = {}
            for t in pending:
                key = t.key()
                x = selected.get(key)
                if x is None:
                    x = values[rows[t.group], t.column]
                    x = x[~np.isnan(x)]
                    for lo, hi, b in t.chain:
                        x = x[_bin(x, lo, hi) == b]
                    selected[key] = x
                if x.size == 0:
                    continue
                if t.phase == "hist":
                    hkey = (key, t.lo, t.hi)
                    h = histograms.get(hkey)
                    if h is None:
                        h = histograms[hkey] = np.bincount(_bin(x, t.lo, t.hi), minlength=BINS)
                    t.hist = h.copy() if t.hist is None else t.hist + h
                elif t.phase == "collect":
                    t.parts.append(x)
                else:
                    t.lo, t.hi = min(t.lo, float(x.min())), max(t.hi, float(x.max()))
        for t in pending:
            if t.phase == "collect":
                values_in = np.concatenate(t.parts)
                t.value = float(np.partition(values_in, t.need)[t.need])
                t.parts = []
            elif t.phase == "hist":
                cumulative = np.cumsum(t.hist)
                b = int(np.searchsorted(cumulative, t.need, side="right"))
                below = int(cumulative[b - 1]) if b > 0 else 0
                t.chain.append((t.lo, t.hi, b))
                t.need -= below
                t.count = int(t.hist[b])
                t.hist = None
                t.phase = "collect" if t.count <= COLLECT_CAP else "minmax"
            else:
                _next_phase(t)
    return {key: t.value for key, t in targets.items()}


def _next_phase(t: _Target) -> None:
    """After the interval's minimum and maximum are known: done (all equal), collect, or histogram."""
    if t.lo == t.hi:
        t.value = t.lo
    elif t.count <= COLLECT_CAP:
        t.phase = "collect"
    else:
        t.phase = "hist"


# --------------------------------------------------------------------------- ranks of medians and quantiles
def median_ranks(n: int) -> tuple[int, int]:
    """0-based ranks whose mean is the median of n values (the same rank twice for odd n)."""
    return (n - 1) // 2, n // 2


def median_from(values: dict, g: int, j: int, n: int) -> float:
    a, b = median_ranks(n)
    low, high = values[(g, j, a)], values[(g, j, b)]
    return low if a == b else (low + high) / 2.0


def quantile_ranks(n: int, q: float) -> tuple[int, int, float]:
    """numpy's "linear" method: virtual index n q + (1 - q) - 1, its floor and the next rank, and the weight."""
    virtual = n * q + (1.0 + q * -1.0) - 1.0
    previous = min(max(int(math.floor(virtual)), 0), n - 1)
    following = min(previous + 1, n - 1)
    return previous, following, virtual - math.floor(virtual)


def quantile_from(values: dict, g: int, j: int, n: int, q: float) -> float:
    a, b, t = quantile_ranks(n, q)
    low, high = values[(g, j, a)], values[(g, j, b)]
    difference = high - low
    # numpy's _lerp: from the nearer end, so that t = 1 gives exactly the upper value.
    return high - difference * (1.0 - t) if t >= 0.5 else low + difference * t
