"""How the segments of one version map onto those of another (a crosswalk after a refit).

Both versions assign the same rows (the newer version's stored training sample) with the assign rule; the
crosswalk is then a contingency table of the two assignments and what follows from it:

- ``table[i, j]``: rows that version *from* puts in segment i and version *to* puts in segment j;
- the adjusted Rand index of the two assignments (Hubert & Arabie, 1985; ``sklearn.metrics.adjusted_rand_score``):
  1 for the same partition up to renaming, about 0 for unrelated ones;
- for each segment i of *from*: its best match ``j = argmax_j table[i, j]`` and ``share = table[i, j] / row
  total`` (the share of i's rows that land in j); for each segment j of *to*: its best match ``i = argmax_i
  table[i, j]`` and ``share = table[i, j] / column total`` (the share of j's rows that came from i). Ties go
  to the lower id; a segment that holds no row of the sample has no match;
- a label of *from* is suggested for segment j of *to* when some pair (i, j) has both shares at least
  ``min_share``. A share above one half can hold for at most one partner on each side, so with
  ``min_share > 0.5`` the suggestions are one-to-one and the pair is each other's best match. Both
  directions are required because each one alone misses a failure: a *from* segment that is split in two
  passes the backward share in both halves, and two *from* segments merged into one pass the forward share
  both; neither label describes the result. The default 0.6 is our own choice (not a published rule): a clear
  majority both ways, with a margin over the 0.5 that one-to-one needs.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from sklearn.metrics import adjusted_rand_score

from service.core.assign import CompiledBundle, assign, impute
from service.errors import InvalidInput

SUGGESTION_MIN_SHARE = 0.6


@dataclass(frozen=True)
class Match:
    """One segment's best partner on the other side (``partner`` None when the segment has no rows)."""

    segment: int
    size: int              # rows of the sample in this segment
    partner: int | None
    share: float | None    # partner's overlap / size


@dataclass(frozen=True)
class Suggestion:
    """Carry ``from_segment``'s label to ``to_segment``: both overlap shares are at least the rule's minimum."""

    from_segment: int
    to_segment: int
    from_share: float      # share of from_segment's rows that land in to_segment
    to_share: float        # share of to_segment's rows that came from from_segment


@dataclass(frozen=True)
class Crosswalk:
    table: np.ndarray                # (k_from, k_to) int counts
    adjusted_rand_index: float
    from_matches: list[Match]
    to_matches: list[Match]
    suggestions: list[Suggestion]    # sorted by to_segment

    @property
    def n_records(self) -> int:
        return int(self.table.sum())


def feature_order(from_features: list[str] | tuple[str, ...], to_features: list[str] | tuple[str, ...]) -> np.ndarray:
    """Column indices that put rows in ``to_features`` order into ``from_features`` order.

    Two versions are comparable only on the same feature set (the order may differ): otherwise one version
    would have to impute whole columns. Raises InvalidInput (field ``features``) naming the difference.
    """
    only_from = [f for f in from_features if f not in set(to_features)]
    only_to = [f for f in to_features if f not in set(from_features)]
    if only_from or only_to:
        parts = []
        if only_from:
            parts.append(f"only in the first version: {only_from[:30]}")
        if only_to:
            parts.append(f"only in the second version: {only_to[:30]}")
        raise InvalidInput("the versions do not share their features (" + "; ".join(parts) + ")",
                           field="features")
    position = {name: j for j, name in enumerate(to_features)}
    return np.array([position[name] for name in from_features], dtype=np.intp)


def contingency(from_segments: np.ndarray, to_segments: np.ndarray, k_from: int, k_to: int) -> np.ndarray:
    """(k_from, k_to) counts of rows per pair of segments; every segment gets a row or column, empty or not."""
    pairs = np.asarray(from_segments, dtype=np.intp) * k_to + np.asarray(to_segments, dtype=np.intp)
    return np.bincount(pairs, minlength=k_from * k_to).reshape(k_from, k_to)


def _best_matches(table: np.ndarray) -> list[Match]:
    """For each row of ``table``: the column holding most of it, and that column's share of the row."""
    sizes = table.sum(axis=1)
    best = np.argmax(table, axis=1)           # the first maximum: ties go to the lower id
    return [
        Match(i, int(sizes[i]), int(best[i]), float(table[i, best[i]] / sizes[i]))
        if sizes[i] else Match(i, 0, None, None)
        for i in range(table.shape[0])
    ]


def crosswalk(from_segments: np.ndarray, to_segments: np.ndarray, k_from: int, k_to: int, *,
              min_share: float = SUGGESTION_MIN_SHARE) -> Crosswalk:
    """Compare two assignments of the same rows (segment ids ``0..k-1`` each). ``min_share`` must exceed 0.5."""
    if not 0.5 < min_share <= 1.0:
        raise ValueError(f"min_share must be in (0.5, 1]; got {min_share}")
    table = contingency(from_segments, to_segments, k_from, k_to)
    from_matches = _best_matches(table)
    to_matches = _best_matches(table.T)
    suggestions = []
    for forward in from_matches:
        if forward.partner is None or forward.share < min_share:
            continue
        backward = to_matches[forward.partner]
        if backward.partner == forward.segment and backward.share >= min_share:
            suggestions.append(Suggestion(forward.segment, forward.partner, forward.share, backward.share))
    suggestions.sort(key=lambda s: s.to_segment)
    return Crosswalk(table=table, adjusted_rand_index=float(adjusted_rand_score(from_segments, to_segments)),
                     from_matches=from_matches, to_matches=to_matches, suggestions=suggestions)


def segments_of(compiled: CompiledBundle, rows: np.ndarray, columns: tuple[str, ...] | list[str]) -> np.ndarray:
    """Assign raw ``rows`` (NaN = missing; columns named by ``columns``) with the assign rule of ``compiled``:
    its own training medians fill the gaps, then the nearest centroid."""
    values = np.ascontiguousarray(rows[:, feature_order(compiled.features, columns)], dtype=np.float64)
    filled, _ = impute(compiled, values)
    return assign(compiled, filled).segment


def compare_versions(from_compiled: CompiledBundle, to_compiled: CompiledBundle, sample: np.ndarray,
                     sample_features: tuple[str, ...] | list[str], *,
                     min_share: float = SUGGESTION_MIN_SHARE) -> Crosswalk:
    """The crosswalk of two versions on ``sample`` (raw rows in ``sample_features`` order, NaN = missing).

    Raises InvalidInput when the versions do not share their features."""
    feature_order(from_compiled.features, to_compiled.features)
    return crosswalk(segments_of(from_compiled, sample, sample_features),
                     segments_of(to_compiled, sample, sample_features),
                     from_compiled.k, to_compiled.k, min_share=min_share)
