"""Pieces of the Dask fit that run on the workers: per-block functions, and exact order statistics.

Every block function here takes one block of the raw training matrix (rows x features, float64, NaN = missing)
and returns a small aggregate (sums, counts, a histogram, a few rows); ``COMBINE`` names, for each, the function
that merges a list of such aggregates into one of the same form. The engine runs the merges on the workers too
(a tree of small fan-in), so the server receives one merged aggregate per step, whatever the number of blocks;
the rows stay on the workers. Functions are module-level so the workers import them by name (the workers must
run the same segscore and library versions as the server).

Exact order statistics (``select``) narrow an interval around each requested rank with histograms, one pass
per step, until few enough values remain to be picked exactly on the server (``PULL_LIMIT`` per query):
medians and quantiles are exact, not approximations.
"""

from __future__ import annotations

import operator
from dataclasses import dataclass
from functools import reduce
from typing import Any, Callable

import numpy as np

# Histogram bins per narrowing pass: each pass shrinks the candidates of a rank by about this factor on
# smooth data (10^7 rows -> ~5,000 after one pass).
BINS = 2048
# Values of one query's interval small enough to send to the server and sort there.
PULL_LIMIT = 50_000
# Passes after which the interval is pulled whatever its size (only many tied or adjacent floats get here).
MAX_NARROWING_PASSES = 10
# Distinct values kept per column when probing whether a feature is categorical (drift bins).
DISTINCT_PROBE = 21
N_FOLDS = 5


@dataclass(frozen=True)
class Where:
    """A block's place in the matrix: its index and its first row's global index."""

    index: int
    offset: int


@dataclass(frozen=True)
class Steps:
    """The affine steps of one model in elementwise form (see ``service.core.assign.elementwise_scaling``):
    imputed = x with NaN -> medians; scaled = (imputed - centre) * scale + after; space = (scaled - pca_mean)
    @ axes.T (scaled itself without PCA)."""

    medians: np.ndarray
    centre: np.ndarray
    scale: np.ndarray
    after: np.ndarray
    pca_mean: np.ndarray | None = None
    axes: np.ndarray | None = None        # (d, p)

    def scaled(self, block: np.ndarray) -> np.ndarray:
        imputed = np.where(np.isnan(block), self.medians, block)
        return (imputed - self.centre) * self.scale + self.after

    def space(self, block: np.ndarray, residual: bool = False) -> tuple[np.ndarray, np.ndarray]:
        """(space, residual) of each row; residual 0 unless asked for and PCA drops dimensions."""
        z = self.scaled(block)
        if self.axes is None:
            return z, np.zeros(z.shape[0])
        centred = z - self.pca_mean
        scores = centred @ self.axes.T
        if not residual or self.axes.shape[0] == z.shape[1]:
            return scores, np.zeros(z.shape[0])
        return scores, np.linalg.norm(centred - scores @ self.axes, axis=1)


def sq_distances(space: np.ndarray, centroids: np.ndarray) -> np.ndarray:
    """(n, k) squared Euclidean distances, one centroid at a time (exact; memory n x k)."""
    out = np.empty((space.shape[0], centroids.shape[0]))
    for c in range(centroids.shape[0]):
        diff = space - centroids[c]
        out[:, c] = np.einsum("ij,ij->i", diff, diff)
    return out


def row_bits(where: Where, n_rows: int, seed: int, stream: int, round_: int = 0) -> np.ndarray:
    """64 random bits for each row of a block, drawn at the rows' global indices from a counter-based generator
    (Philox, keyed by seed, stream and round): every pass agrees, and the same rows get the same bits however
    files, partitions and workers split them. Philox yields 4 words per counter step, hence the // 4."""
    generator = np.random.Philox(key=np.array([seed, (stream << 32) | round_], dtype=np.uint64))
    generator.advance(where.offset // 4)
    return generator.random_raw(n_rows + where.offset % 4)[where.offset % 4:]


def folds_of(where: Where, n_rows: int, seed: int) -> np.ndarray:
    """Fold number of each row of a block (not stratified by segment; 2^64 mod 5 = 1: no visible bias)."""
    return (row_bits(where, n_rows, seed, 15) % N_FOLDS).astype(np.intp)


# --------------------------------------------------------------------------- column statistics
def column_moments(block: np.ndarray, where: Where) -> dict[str, Any]:
    """Observed count, sum, min, max, infinities and a distinct-value probe of a block's columns."""
    finite = np.isfinite(block)
    observed = ~np.isnan(block)
    safe = np.where(finite, block, 0.0)
    probe = []
    for j in range(block.shape[1]):
        probe.append(smallest_distinct([block[finite[:, j], j]]))
    return {
        "rows": block.shape[0],
        "observed": observed.sum(axis=0),
        "infinite": (observed & ~finite).sum(axis=0),
        "sum": safe.sum(axis=0),
        "min": np.where(finite, block, np.inf).min(axis=0, initial=np.inf),
        "max": np.where(finite, block, -np.inf).max(axis=0, initial=-np.inf),
        "abs_max": np.abs(safe).max(axis=0, initial=0.0),
        "probe": probe,
    }


def squared_deviations(block: np.ndarray, where: Where, centre: np.ndarray) -> np.ndarray:
    """Sum over observed values of (x - centre)^2 per column (the second pass of a two-pass variance)."""
    deviation = np.where(np.isnan(block), 0.0, block - centre)
    return np.einsum("ij,ij->j", deviation, deviation)


def imputed_moments(block: np.ndarray, where: Where, medians: np.ndarray, centre: np.ndarray | None) -> dict:
    """Sum (or squared deviations from ``centre``), min and max of the imputed values per column."""
    imputed = np.where(np.isnan(block), medians, block)
    out = {"min": imputed.min(axis=0, initial=np.inf), "max": imputed.max(axis=0, initial=-np.inf)}
    if centre is None:
        out["sum"] = imputed.sum(axis=0)
    else:
        deviation = imputed - centre
        out["ss"] = np.einsum("ij,ij->j", deviation, deviation)
    return out


def scaled_centred(block: np.ndarray, steps: Steps, mean: np.ndarray) -> np.ndarray:
    """The scaled block minus the scaled data's mean (the matrix PCA decomposes); a ``map_blocks`` function."""
    return steps.scaled(block) - mean


# --------------------------------------------------------------------------- k-means
def seed_rows(block: np.ndarray, where: Where, rows: np.ndarray) -> np.ndarray:
    """Raw rows at global indices ``rows`` that fall in this block (sorted)."""
    local = rows[(rows >= where.offset) & (rows < where.offset + block.shape[0])] - where.offset
    return block[local]


def candidate_cost(block: np.ndarray, where: Where, steps: Steps, candidates: np.ndarray) -> float:
    """Sum of squared distances to the nearest candidate (phi of k-means||)."""
    space, _ = steps.space(block)
    return float(sq_distances(space, candidates).min(axis=1).sum())


def candidate_draw(block: np.ndarray, where: Where, steps: Steps, candidates: np.ndarray, phi: float,
                   oversampling: float, seed: int, round_: int) -> np.ndarray:
    """Rows drawn independently with probability min(1, l d^2 / phi) (Bahmani et al. 2012, k-means||)."""
    space, _ = steps.space(block)
    d2 = sq_distances(space, candidates).min(axis=1)
    uniform = (row_bits(where, space.shape[0], seed, 16, round_) >> np.uint64(11)) * 2.0 ** -53   # [0, 1), 53 bits
    keep = uniform < np.minimum(1.0, oversampling * d2 / phi)
    return space[keep]


def candidate_weights(block: np.ndarray, where: Where, steps: Steps, candidates: np.ndarray) -> np.ndarray:
    """Rows nearest each candidate (the weights of the local re-clustering)."""
    space, _ = steps.space(block)
    return np.bincount(sq_distances(space, candidates).argmin(axis=1), minlength=candidates.shape[0])


def _member_sums(space: np.ndarray, labels: np.ndarray, k: int) -> np.ndarray:
    return np.stack([np.bincount(labels, weights=space[:, j], minlength=k) for j in range(space.shape[1])], axis=1)


def lloyd_step(block: np.ndarray, where: Where, steps: Steps, centroid_sets: list[np.ndarray]) -> list[tuple]:
    """For each centroid set: member sums, member counts and inertia of the nearest-centroid assignment."""
    space, _ = steps.space(block)
    out = []
    for centroids in centroid_sets:
        d2 = sq_distances(space, centroids)
        labels = d2.argmin(axis=1)
        k = centroids.shape[0]
        out.append((_member_sums(space, labels, k), np.bincount(labels, minlength=k),
                    float(d2[np.arange(labels.size), labels].sum())))
    return out


def fold_lloyd_step(block: np.ndarray, where: Where, fold_steps: list[Steps], fold_centroids: list[np.ndarray],
                    seed: int) -> list[tuple]:
    """Lloyd sums of each fold's model over the rows NOT in that fold (the fold's training part)."""
    folds = folds_of(where, block.shape[0], seed)
    out = []
    for f, (steps, centroids) in enumerate(zip(fold_steps, fold_centroids)):
        rows = block[folds != f]
        space, _ = steps.space(rows)
        labels = sq_distances(space, centroids).argmin(axis=1)
        k = centroids.shape[0]
        out.append((_member_sums(space, labels, k), np.bincount(labels, minlength=k)))
    return out


def fold_statistics(block: np.ndarray, where: Where, medians: np.ndarray, shift: np.ndarray, steps: Steps,
                    centroids: np.ndarray, seed: int) -> dict[str, np.ndarray]:
    """Per fold: rows, sums and cross products of (imputed - shift), min, max, and member sums of the final
    segments (nearest centroid) in imputed units: what each fold's complement model is built from."""
    imputed = np.where(np.isnan(block), medians, block)
    space, _ = steps.space(block)
    segments = sq_distances(space, centroids).argmin(axis=1)
    folds = folds_of(where, block.shape[0], seed)
    k, p = centroids.shape[0], block.shape[1]
    out = {"rows": np.zeros(N_FOLDS), "sum": np.zeros((N_FOLDS, p)), "cross": np.zeros((N_FOLDS, p, p)),
           "min": np.full((N_FOLDS, p), np.inf), "max": np.full((N_FOLDS, p), -np.inf),
           "member_sum": np.zeros((N_FOLDS, k, p)), "member_rows": np.zeros((N_FOLDS, k))}
    for f in range(N_FOLDS):
        mine = folds == f
        x = imputed[mine] - shift
        out["rows"][f] = x.shape[0]
        out["sum"][f] = x.sum(axis=0)
        out["cross"][f] = x.T @ x
        if x.shape[0]:
            out["min"][f] = imputed[mine].min(axis=0)
            out["max"][f] = imputed[mine].max(axis=0)
        out["member_sum"][f] = _member_sums(imputed[mine], segments[mine], k)
        out["member_rows"][f] = np.bincount(segments[mine], minlength=k)
    return out


# --------------------------------------------------------------------------- segment statistics
def segment_moments(block: np.ndarray, where: Where, steps: Steps, centroids: np.ndarray,
                    centre: np.ndarray | None) -> dict[str, np.ndarray]:
    """Per segment (nearest centroid): rows, observed counts and sums (or squared deviations from the
    segment's ``centre`` row) of the raw values."""
    space, _ = steps.space(block)
    segments = sq_distances(space, centroids).argmin(axis=1)
    k, p = centroids.shape[0], block.shape[1]
    observed = ~np.isnan(block)
    values = np.where(observed, block, 0.0) if centre is None else np.where(observed, block - centre[segments], 0.0)
    weights = values if centre is None else values * values
    return {
        "rows": np.bincount(segments, minlength=k),
        "observed": np.stack([np.bincount(segments, weights=observed[:, j], minlength=k) for j in range(p)], axis=1),
        "sum": np.stack([np.bincount(segments, weights=weights[:, j], minlength=k) for j in range(p)], axis=1),
    }


def bin_counts(block: np.ndarray, where: Where, kinds: list[str], edges: list[np.ndarray]) -> list[np.ndarray]:
    """Drift-reference counts of each feature's observed values in its bins (as ``core.fit.feature_bins``)."""
    out = []
    for j, (kind, edge) in enumerate(zip(kinds, edges)):
        column = block[:, j]
        column = column[~np.isnan(column)]
        if kind == "categories":
            out.append(np.append(np.bincount(np.searchsorted(edge, column), minlength=edge.size), 0)[:edge.size + 1])
        else:
            out.append(np.bincount(np.searchsorted(edge, column, side="left"), minlength=edge.size + 1))
    return out


def scores_above(block: np.ndarray, where: Where, producer: Callable, groups: np.ndarray,
                 limits: np.ndarray) -> np.ndarray:
    """For each (group, limit): how many of the group's values exceed the limit."""
    values, value_groups = producer(block, where)
    return np.array([np.count_nonzero(values[value_groups == g] > limit) for g, limit in zip(groups, limits)])


def gather_values(block: np.ndarray, where: Where, producer: Callable, rows: np.ndarray, group: int) -> np.ndarray:
    """Values of one group at global row indices ``rows`` (the producer yields one value of it per row)."""
    values, value_groups = producer(block, where)
    mine = values[value_groups == group]
    local = rows[(rows >= where.offset) & (rows < where.offset + block.shape[0])] - where.offset
    return mine[local]


# --------------------------------------------------------------------------- exact order statistics
def _sorted_by_group(producer: Callable, block: np.ndarray, where: Where) -> tuple[np.ndarray, np.ndarray]:
    values, groups = producer(block, where)
    order = np.lexsort((values, groups))
    return values[order], groups[order]


def group_extent(block: np.ndarray, where: Where, producer: Callable, groups: np.ndarray) -> np.ndarray:
    """(len(groups), 3): count, min and max of each group's values in the block."""
    values, value_groups = _sorted_by_group(producer, block, where)
    out = np.zeros((groups.size, 3))
    out[:, 1], out[:, 2] = np.inf, -np.inf
    for i, g in enumerate(groups):
        a, b = np.searchsorted(value_groups, [g, g + 1])
        if b > a:
            out[i] = (b - a, values[a], values[b - 1])
    return out


def narrow(block: np.ndarray, where: Where, producer: Callable, groups: np.ndarray, low: np.ndarray,
           high: np.ndarray, high_closed: np.ndarray, pull: np.ndarray, histogram: np.ndarray
           ) -> tuple[np.ndarray, dict[int, np.ndarray]]:
    """One narrowing pass: per query still narrowing (``histogram`` set), a BINS-bin histogram of its group's
    values in [low, high) (or [low, high]): row i of the counts for the i-th such query, none for the others;
    per query with ``pull`` set, those values themselves."""
    values, value_groups = _sorted_by_group(producer, block, where)
    counts = np.zeros((int(np.count_nonzero(histogram)), BINS), dtype=np.int64)
    row_of = {int(q): i for i, q in enumerate(np.flatnonzero(histogram))}
    pulled: dict[int, np.ndarray] = {}
    for q, g in enumerate(groups):
        if not (pull[q] or histogram[q]):
            continue
        a, b = np.searchsorted(value_groups, [g, g + 1])
        own = values[a:b]
        start = np.searchsorted(own, low[q], side="left")
        stop = np.searchsorted(own, high[q], side="right" if high_closed[q] else "left")
        inside = own[start:stop]
        if pull[q]:
            pulled[q] = inside.copy()
        else:
            edges = np.linspace(low[q], high[q], BINS + 1)
            index = np.clip(np.searchsorted(edges, inside, side="right") - 1, 0, BINS - 1)
            counts[row_of[q]] = np.bincount(index, minlength=BINS)
    return counts, pulled


def select(compute_blocks: Callable, producer: Callable, queries: list[tuple[int, int]]) -> np.ndarray:
    """Exact order statistics: for each query (group, rank) the rank-th smallest (0-based) value of the group's
    values, NaN when the group is empty (rank clipped to the group's count).

    ``compute_blocks(fn, *args)`` runs ``fn(block, where, *args)`` on every block on the cluster and returns
    their results merged by ``COMBINE[fn]``; ``producer(block, where) -> (values, groups)`` yields each block's
    values.
    """
    n_queries = len(queries)
    answer = np.full(n_queries, np.nan)
    if not n_queries:
        return answer
    groups = np.array([g for g, _ in queries], dtype=np.int64)
    ranks = np.array([r for _, r in queries], dtype=np.int64)
    extent = compute_blocks(group_extent, producer, groups)
    count = extent[:, 0].astype(np.int64)
    low, high = extent[:, 1].copy(), extent[:, 2].copy()
    ranks = np.clip(ranks, 0, np.maximum(count - 1, 0))
    high_closed = np.ones(n_queries, dtype=bool)
    below = np.zeros(n_queries, dtype=np.int64)      # the group's values under ``low``
    inside = count.copy()
    done = count == 0
    for passes in range(MAX_NARROWING_PASSES + 1):
        settled = ~done & (low == high)               # every value left is the same number
        answer[settled] = low[settled]
        done |= settled
        if done.all():
            break
        pull = ~done & ((inside <= PULL_LIMIT) | (passes == MAX_NARROWING_PASSES))
        histogram = ~done & ~pull
        totals, pulled = compute_blocks(narrow, producer, groups, low, high, high_closed, pull, histogram)
        for q in np.flatnonzero(pull):
            values = np.sort(pulled[int(q)])
            answer[q] = values[ranks[q] - below[q]]
            done[q] = True
        for i, q in enumerate(np.flatnonzero(histogram)):
            edges = np.linspace(low[q], high[q], BINS + 1)
            cumulative = np.cumsum(totals[i])
            b = int(np.searchsorted(cumulative, ranks[q] - below[q], side="right"))
            below[q] += cumulative[b - 1] if b else 0
            inside[q] = totals[i, b]
            high_closed[q] = high_closed[q] and b == BINS - 1
            low[q], high[q] = edges[b], edges[b + 1]
            if b < BINS - 1 and low[q] == high[q]:
                high_closed[q] = True                 # a bin [x, x) cannot hold values; keep x itself
    return answer


def linear_quantiles(compute_blocks: Callable, producer: Callable, counts: dict[int, int],
                     quantiles: dict[int, np.ndarray]) -> dict[int, np.ndarray]:
    """Quantiles with numpy's default ("linear") interpolation, exactly: per group g, the values at virtual
    index (n_g - 1) q from the two order statistics around it."""
    queries, layout = [], {}
    for g, qs in quantiles.items():
        position = (counts[g] - 1) * np.asarray(qs, dtype=float)
        lower = np.floor(position).astype(np.int64)
        upper = np.minimum(lower + 1, max(counts[g] - 1, 0))
        layout[g] = (len(queries), position - lower, lower.size)
        queries += [(g, int(r)) for r in lower] + [(g, int(r)) for r in upper]
    values = select(compute_blocks, producer, queries)
    out = {}
    for g, (start, fraction, size) in layout.items():
        lo, hi = values[start:start + size], values[start + size:start + 2 * size]
        out[g] = lo + (hi - lo) * fraction
    return out


# --------------------------------------------------------------------------- value producers
# Each returns (values, groups) for one block; functools.partial binds their parameters.
def observed_by_feature(block: np.ndarray, where: Where) -> tuple[np.ndarray, np.ndarray]:
    """Observed values, grouped by feature (group j)."""
    observed = ~np.isnan(block)
    groups = np.broadcast_to(np.arange(block.shape[1]), block.shape)
    return block[observed], groups[observed]


def imputed_by_feature(block: np.ndarray, where: Where, medians: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Imputed values, grouped by feature (group j)."""
    imputed = np.where(np.isnan(block), medians, block)
    return imputed.ravel(), np.broadcast_to(np.arange(block.shape[1]), block.shape).ravel()


def observed_by_segment_feature(block: np.ndarray, where: Where, steps: Steps,
                                centroids: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Observed raw values grouped by (segment, feature): group segment * p + j."""
    space, _ = steps.space(block)
    segments = sq_distances(space, centroids).argmin(axis=1)
    groups = segments[:, None] * block.shape[1] + np.arange(block.shape[1])
    observed = ~np.isnan(block)
    return block[observed], groups[observed]


def final_scores(block: np.ndarray, where: Where, steps: Steps, centroids: np.ndarray
                 ) -> tuple[np.ndarray, np.ndarray]:
    """In-sample distance to the own centroid (group segment) and PCA residual (group k + segment)."""
    space, residual = steps.space(block, residual=True)
    d2 = sq_distances(space, centroids)
    segments = d2.argmin(axis=1)
    distance = np.sqrt(d2[np.arange(segments.size), segments])
    k = centroids.shape[0]
    return np.concatenate([distance, residual]), np.concatenate([segments, k + segments])


def fold_in_sample_scores(block: np.ndarray, where: Where, final: Steps, centroids: np.ndarray,
                          fold_steps: list[Steps], fold_centroids: list[np.ndarray], seed: int
                          ) -> tuple[np.ndarray, np.ndarray]:
    """Each fold model's in-sample scores of its training rows (the rows not in the fold), by final segment.

    Groups: distance (f, segment) -> f * 2(k+1) + segment, fold-wide distance -> f * 2(k+1) + k; residual
    likewise shifted by k + 1.
    """
    space, _ = final.space(block)
    segments = sq_distances(space, centroids).argmin(axis=1)
    folds = folds_of(where, block.shape[0], seed)
    k = centroids.shape[0]
    values, groups = [], []
    for f, (steps, own) in enumerate(zip(fold_steps, fold_centroids)):
        train = folds != f
        fs, fr = steps.space(block[train], residual=True)
        seg = segments[train]
        fd = np.linalg.norm(fs - own[seg], axis=1)
        base = f * 2 * (k + 1)
        values += [fd, fd, fr, fr]
        groups += [base + seg, np.full(seg.size, base + k), base + k + 1 + seg, np.full(seg.size, base + 2 * k + 1)]
    return np.concatenate(values), np.concatenate(groups).astype(np.int64)


def held_out_scores(block: np.ndarray, where: Where, final: Steps, centroids: np.ndarray,
                    fold_steps: list[Steps], fold_centroids: list[np.ndarray], d_scale: np.ndarray,
                    r_scale: np.ndarray | None, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Each row's held-out score max(d / D, r / R) under its own fold's model (group = final segment, and
    again group k + 1: the pool of all segments), then its held-out residual (group k), in row order within
    each group."""
    space, _ = final.space(block)
    segments = sq_distances(space, centroids).argmin(axis=1)
    folds = folds_of(where, block.shape[0], seed)
    k = centroids.shape[0]
    score = np.empty(block.shape[0])
    residual = np.zeros(block.shape[0])
    for f, (steps, own) in enumerate(zip(fold_steps, fold_centroids)):
        test = folds == f
        fs, fr = steps.space(block[test], residual=True)
        seg = segments[test]
        s = np.linalg.norm(fs - own[seg], axis=1) / d_scale[f, seg]
        if r_scale is not None:
            s = np.maximum(s, fr / r_scale[f, seg])
            residual[test] = fr
        score[test] = s
    n = block.shape[0]
    return (np.concatenate([score, score, residual]),
            np.concatenate([segments, np.full(n, k + 1), np.full(n, k)]))


# --------------------------------------------------------------------------- merging block results
# Each merge takes the results of consecutive blocks, in block order, and returns one result of the same form,
# so merges can be merged again (a tree) and row-ordered results stay in row order.
def apply_block(fn: Callable, block: np.ndarray, where: Where, args: tuple) -> Any:
    """``fn(block, where, *args)``: the arguments arrive as one object, shared by every block's task."""
    return fn(block, where, *args)


def smallest_distinct(arrays: list[np.ndarray]) -> np.ndarray:
    """The DISTINCT_PROBE smallest distinct values of the arrays together (sorted): a feature with at most
    MAX_CATEGORIES distinct values gets them all, and more than that is all the drift bins need to know."""
    return np.unique(np.concatenate(arrays))[:DISTINCT_PROBE]


def combine_sums(parts: list[Any]) -> Any:
    """Elementwise sum of results of one form: numbers, arrays, and lists, tuples or dicts of them."""
    first = parts[0]
    if isinstance(first, dict):
        return {key: combine_sums([part[key] for part in parts]) for key in first}
    if isinstance(first, (list, tuple)):
        return type(first)(combine_sums([part[i] for part in parts]) for i in range(len(first)))
    return reduce(operator.add, parts)


def combine_statistics(parts: list[dict[str, Any]]) -> dict[str, Any]:
    """Merge dicts of column or fold statistics: "min" by minimum, "max" and "abs_max" by maximum, "probe"
    (per column) by ``smallest_distinct``, every other entry by sum."""
    out = {}
    for key in parts[0]:
        values = [part[key] for part in parts]
        if key == "min":
            out[key] = reduce(np.minimum, values)
        elif key in ("max", "abs_max"):
            out[key] = reduce(np.maximum, values)
        elif key == "probe":
            out[key] = [smallest_distinct([value[j] for value in values]) for j in range(len(values[0]))]
        else:
            out[key] = combine_sums(values)
    return out


def combine_rows(parts: list[np.ndarray]) -> np.ndarray:
    """Rows (or values) of consecutive blocks, in order."""
    return np.concatenate(parts, axis=0)


def combine_extents(parts: list[np.ndarray]) -> np.ndarray:
    """``group_extent`` results: counts added, minima and maxima kept."""
    stacked = np.stack(parts)
    return np.column_stack([stacked[:, :, 0].sum(axis=0), stacked[:, :, 1].min(axis=0), stacked[:, :, 2].max(axis=0)])


def combine_narrowing(parts: list[tuple[np.ndarray, dict[int, np.ndarray]]]
                      ) -> tuple[np.ndarray, dict[int, np.ndarray]]:
    """``narrow`` results: histograms added, each pulled query's values put together."""
    counts = combine_sums([part[0] for part in parts])
    pulled = {q: np.concatenate([part[1][q] for part in parts if q in part[1]])
              for q in sorted({q for part in parts for q in part[1]})}
    return counts, pulled


# How the results of each block function merge.
COMBINE: dict[Callable, Callable[[list[Any]], Any]] = {
    column_moments: combine_statistics,
    squared_deviations: combine_sums,
    imputed_moments: combine_statistics,
    seed_rows: combine_rows,
    candidate_cost: combine_sums,
    candidate_draw: combine_rows,
    candidate_weights: combine_sums,
    lloyd_step: combine_sums,
    fold_lloyd_step: combine_sums,
    fold_statistics: combine_statistics,
    segment_moments: combine_sums,
    bin_counts: combine_sums,
    scores_above: combine_sums,
    gather_values: combine_rows,
    group_extent: combine_extents,
    narrow: combine_narrowing,
}
