"""Live drift counts: what assign sees, kept as counts on a version's training bins (numpy only).

A ``CountLayout`` lays one version's counters out in one integer vector (a "slot" per counter), so that a
time bucket is a vector, buckets merge by addition, and the store keeps ``(bucket, slot) -> count`` rows:

==============  ===========================================================================================
slots           what is counted
==============  ===========================================================================================
``0``           records
per feature     one slot per training bin of the feature (``ReferenceProfile.bin_kinds`` / ``bin_edges``:
                quantile bins (e[i-1], e[i]], or the training categories then "other"), then one for missing
per segment     records assigned to it
3 outlier       flagged for distance ("far"), for residual ("off plane"), for either (a record flagged for
slots           both counts once in the third)
residual        one slot per bin of the training residual quantiles (``residual_edges``); none without a
                PCA residual
==============  ===========================================================================================

No record value is kept: a bucket holds only these counts. The bins are exactly those of the batch drift
report (``service.core.drift.batch_bin_counts``), so a live report over the same records finds the same
shares.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

# Inner quantile levels of the residual histogram: every 5 %, plus 99 % for the far tail (where a residual
# drift shows first). np.unique merges equal edges (a residual that is often exactly 0).
RESIDUAL_LEVELS = np.append(np.arange(1, 20) / 20.0, 0.99)
# Above this many rows, quantile features are binned one column at a time (np.searchsorted: O(n log bins));
# up to it, one broadcast comparison over all columns (fewer numpy calls, which dominate for a few rows).
BROADCAST_ROWS = 256
OUTLIER_REASONS = ("distance", "residual", "either")


def residual_edges(residual_sample: np.ndarray) -> np.ndarray:
    """Inner edges of the residual histogram: quantiles of the held-out training residuals (``RESIDUAL_LEVELS``)."""
    if residual_sample.size == 0:
        return np.empty(0)
    return np.unique(np.quantile(residual_sample, RESIDUAL_LEVELS))


@dataclass(frozen=True)
class CountLayout:
    """Slot positions of one version's counters (see the module docstring). Shapes: p features, k segments."""

    n_features: int
    bin_sizes: np.ndarray           # (p,) training bins per feature (missing not included)
    feature_offsets: np.ndarray     # (p,) first slot of each feature
    segment_offset: int
    k: int
    outlier_offset: int
    residual_offset: int
    residual_edges: np.ndarray      # inner edges; residual bins = size + 1 (0 bins without a residual)
    n_slots: int
    # Binning, prepared once: quantile columns and their edges padded with +inf; category columns and their
    # values padded with NaN (never equal to anything).
    quantile_columns: np.ndarray
    quantile_edges: np.ndarray      # (len(quantile_columns), max edges)
    quantile_edge_lists: tuple[np.ndarray, ...]
    category_columns: np.ndarray
    category_values: np.ndarray     # (len(category_columns), max categories)
    category_sizes: np.ndarray      # categories per category column ("other" is the next bin)

    @property
    def residual_bins(self) -> int:
        return 0 if self.residual_offset == self.n_slots else self.residual_edges.size + 1

    def feature_slice(self, j: int) -> slice:
        """Slots of feature ``j``'s training bins (its missing slot follows)."""
        start = int(self.feature_offsets[j])
        return slice(start, start + int(self.bin_sizes[j]))

    def missing_slot(self, j: int) -> int:
        return int(self.feature_offsets[j] + self.bin_sizes[j])


def build_layout(bin_kinds: list[str], bin_edges: list[np.ndarray], k: int, residual_sample: np.ndarray,
                 has_residual: bool) -> CountLayout:
    """The layout of a version from its reference profile's bins, its k and its held-out residuals."""
    p = len(bin_kinds)
    sizes = np.array([edges.size + 1 for edges in bin_edges], dtype=np.int64)   # quantiles: edges + 1;
    #                                                                            categories: values + "other"
    offsets = 1 + np.concatenate(([0], np.cumsum(sizes + 1)[:-1])).astype(np.int64)
    segment_offset = int(1 + np.sum(sizes + 1))
    outlier_offset = segment_offset + k
    residual_offset = outlier_offset + len(OUTLIER_REASONS)
    edges = residual_edges(residual_sample) if has_residual else np.empty(0)
    n_slots = residual_offset + (edges.size + 1 if has_residual else 0)
    quantile = np.array([j for j in range(p) if bin_kinds[j] == "quantiles"], dtype=np.intp)
    category = np.array([j for j in range(p) if bin_kinds[j] == "categories"], dtype=np.intp)
    q_width = max((bin_edges[j].size for j in quantile), default=0)
    q_edges = np.full((quantile.size, q_width), np.inf)
    for row, j in enumerate(quantile):
        q_edges[row, :bin_edges[j].size] = bin_edges[j]
    c_width = max((bin_edges[j].size for j in category), default=0)
    c_values = np.full((category.size, c_width), np.nan)
    for row, j in enumerate(category):
        c_values[row, :bin_edges[j].size] = bin_edges[j]
    return CountLayout(
        n_features=p, bin_sizes=sizes, feature_offsets=offsets, segment_offset=segment_offset, k=k,
        outlier_offset=outlier_offset, residual_offset=residual_offset, residual_edges=edges, n_slots=n_slots,
        quantile_columns=quantile, quantile_edges=q_edges,
        quantile_edge_lists=tuple(np.asarray(bin_edges[j], dtype=np.float64) for j in quantile),
        category_columns=category, category_values=c_values,
        category_sizes=np.array([bin_edges[j].size for j in category], dtype=np.int64),
    )


def tally(layout: CountLayout, values: np.ndarray, segment: np.ndarray, far: np.ndarray, off_plane: np.ndarray,
          residual: np.ndarray) -> np.ndarray:
    """Counts of one batch of assigned records: an int64 vector of ``layout.n_slots``.

    Parameters
    ----------
    values : ndarray of shape (n, p)
        The checked records as assign saw them before imputation (NaN = missing).
    segment, far, off_plane, residual : ndarray of shape (n,)
        The assignment (``service.core.assign.Assignment``).

    Few rows: each value's bin, then one ``np.bincount``. Many rows: no per-value bin at all; for each inner
    edge, the count of values above it in every column at once (a bin's count is the difference of two such
    counts), which is a few passes of elementwise comparisons instead of a binary search per value.
    """
    n = values.shape[0]
    counts = (_tally_by_value if n <= BROADCAST_ROWS else _tally_by_edge)(layout, values)
    counts[layout.segment_offset:layout.segment_offset + layout.k] = np.bincount(segment, minlength=layout.k)
    o = layout.outlier_offset
    counts[0] = n
    counts[o] = np.count_nonzero(far)
    counts[o + 1] = np.count_nonzero(off_plane)
    counts[o + 2] = np.count_nonzero(far | off_plane)
    if layout.residual_bins:
        counts[layout.residual_offset:] = np.bincount(np.searchsorted(layout.residual_edges, residual, side="left"),
                                                      minlength=layout.residual_bins)
    return counts


def _tally_by_value(layout: CountLayout, values: np.ndarray) -> np.ndarray:
    """Feature counts via each value's bin (a few rows: one broadcast comparison, one bincount)."""
    n = values.shape[0]
    bins = np.empty((n, layout.n_features), dtype=np.int64)
    if layout.quantile_columns.size:
        block = values[:, layout.quantile_columns]
        # Bin i holds (e[i-1], e[i]]: the number of edges strictly below the value (searchsorted 'left').
        bins[:, layout.quantile_columns] = np.count_nonzero(block[:, :, None] > layout.quantile_edges, axis=2)
    if layout.category_columns.size:
        block = values[:, layout.category_columns]
        match = block[:, :, None] == layout.category_values
        bins[:, layout.category_columns] = np.where(match.any(axis=2), match.argmax(axis=2), layout.category_sizes)
    slots = bins + layout.feature_offsets
    missing = np.isnan(values)
    if missing.any():
        slots[missing] = np.broadcast_to(layout.feature_offsets + layout.bin_sizes, slots.shape)[missing]
    return np.bincount(slots.ravel(), minlength=layout.n_slots)


def _tally_by_edge(layout: CountLayout, values: np.ndarray) -> np.ndarray:
    """Feature counts via counts above each edge, all columns at once (many rows; see ``tally``)."""
    n = values.shape[0]
    counts = np.zeros(layout.n_slots, dtype=np.int64)
    missing = np.count_nonzero(np.isnan(values), axis=0)
    for j in range(layout.n_features):
        counts[layout.missing_slot(j)] = missing[j]
    if layout.quantile_columns.size:
        # One row per column, contiguous: each comparison then runs along whole rows (about 2x faster on
        # 100,000 x 20 than comparing the row-major matrix and counting down its columns).
        block = np.ascontiguousarray(values[:, layout.quantile_columns].T)
        edges = layout.quantile_edges
        above = np.empty((edges.shape[0], edges.shape[1] + 2), dtype=np.int64)   # [observed, > e_0, ..., 0]
        above[:, 0] = n - missing[layout.quantile_columns]
        above[:, -1] = 0
        for m in range(edges.shape[1]):
            np.sum(block > edges[:, m:m + 1], axis=1, out=above[:, m + 1])       # NaN is never above an edge
        for row, j in enumerate(layout.quantile_columns.tolist()):
            size = int(layout.bin_sizes[j])                                     # inner edges + 1
            column = np.append(above[row, :size], 0)
            counts[layout.feature_slice(j)] = column[:-1] - column[1:]
    for row, j in enumerate(layout.category_columns.tolist()):
        categories = layout.category_values[row, :layout.category_sizes[row]]
        found = np.count_nonzero(values[:, j, None] == categories, axis=0)
        counts[layout.feature_slice(j)] = np.append(found, n - missing[j] - found.sum())
    return counts


@dataclass(frozen=True)
class WindowCounts:
    """A count vector read back by item (what a live report is computed from)."""

    n_records: int
    feature_bins: list[np.ndarray]      # per feature: counts on its training bins
    feature_missing: np.ndarray         # (p,)
    segments: np.ndarray                # (k,)
    far: int
    off_plane: int
    flagged: int
    residual_bins: np.ndarray           # (residual bins,), empty without a residual


def read_counts(layout: CountLayout, counts: np.ndarray) -> WindowCounts:
    counts = np.asarray(counts, dtype=np.int64)
    o = layout.outlier_offset
    return WindowCounts(
        n_records=int(counts[0]),
        feature_bins=[counts[layout.feature_slice(j)].copy() for j in range(layout.n_features)],
        feature_missing=np.array([counts[layout.missing_slot(j)] for j in range(layout.n_features)], dtype=np.int64),
        segments=counts[layout.segment_offset:layout.segment_offset + layout.k].copy(),
        far=int(counts[o]), off_plane=int(counts[o + 1]), flagged=int(counts[o + 2]),
        residual_bins=counts[layout.residual_offset:layout.residual_offset + layout.residual_bins].copy(),
    )
