"""The version crosswalk: contingency table, adjusted Rand index, best matches and label suggestions."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import adjusted_rand_score
from sklearn.metrics.cluster import contingency_matrix

from service.core.compare import contingency, crosswalk, feature_order
from service.errors import InvalidInput

# A 14-row toy pair worked out by hand (see test_hand_worked_example).
FROM = np.array([0, 0, 0, 0, 0, 1, 1, 1, 1, 1, 2, 2, 2, 2])
TO = np.array([2, 2, 2, 2, 2, 1, 1, 1, 1, 0, 0, 0, 1, 1])


def test_hand_worked_example():
    result = crosswalk(FROM, TO, 3, 3)
    # Counted by hand from the two rows above.
    assert result.table.tolist() == [[0, 0, 5], [1, 4, 0], [2, 2, 0]]
    assert result.n_records == 14
    # Hubert & Arabie (1985) by hand: sum C(n_ij, 2) = 10 + 6 + 1 + 1 = 18; rows C(5,2)+C(5,2)+C(4,2) = 26;
    # columns C(3,2)+C(6,2)+C(5,2) = 28; expected 26 * 28 / C(14,2) = 8; max (26 + 28) / 2 = 27.
    assert result.adjusted_rand_index == pytest.approx((18 - 8) / (27 - 8), abs=1e-12)
    # Forward: 0 -> 2 (5/5); 1 -> 1 (4/5); 2 ties between 0 and 1 (2/4 each): the lower id.
    assert [(m.segment, m.size, m.partner, m.share) for m in result.from_matches] == [
        (0, 5, 2, 1.0), (1, 5, 1, 0.8), (2, 4, 0, 0.5)]
    # Backward: to-0 (3 rows) mostly from 2 (2/3); to-1 (6 rows) from 1 (4/6); to-2 (5 rows) from 0 (5/5).
    assert [(m.segment, m.size, m.partner) for m in result.to_matches] == [(0, 3, 2), (1, 6, 1), (2, 5, 0)]
    assert [m.share for m in result.to_matches] == pytest.approx([2 / 3, 4 / 6, 1.0])
    # At 0.6 both ways: 0 -> 2 and 1 -> 1; segment 2's forward share is only 0.5.
    assert [(s.from_segment, s.to_segment) for s in result.suggestions] == [(1, 1), (0, 2)]
    # At 0.7, 1 -> 1 fails on its backward share (4/6).
    assert [(s.from_segment, s.to_segment) for s in crosswalk(FROM, TO, 3, 3, min_share=0.7).suggestions] == [(0, 2)]


def test_table_and_ari_agree_with_scikit_learn():
    # Reference: sklearn.metrics.cluster.contingency_matrix and sklearn.metrics.adjusted_rand_score.
    rng = np.random.default_rng(5)
    a = rng.integers(0, 4, 500)
    b = np.where(rng.random(500) < 0.7, (a + 1) % 4, rng.integers(0, 5, 500))
    result = crosswalk(a, b, 4, 5)
    assert result.table.tolist() == contingency_matrix(a, b).tolist()
    assert result.adjusted_rand_index == pytest.approx(adjusted_rand_score(a, b), abs=1e-12)


def test_renamed_partition_maps_one_to_one_with_ari_one():
    a = np.repeat([0, 1, 2], [30, 20, 10])
    renamed = np.array([2, 0, 1])[a]
    result = crosswalk(a, renamed, 3, 3)
    assert result.adjusted_rand_index == 1.0
    assert [(s.from_segment, s.to_segment, s.from_share, s.to_share) for s in result.suggestions] == [
        (1, 0, 1.0, 1.0), (2, 1, 1.0, 1.0), (0, 2, 1.0, 1.0)]


def test_a_split_or_a_merge_suggests_nothing_for_the_parts():
    # Split: from-segment 0 (40 rows) becomes to-segments 0 and 1 at 55/45; the backward shares are 1.0.
    split = crosswalk(np.repeat([0, 1], [40, 30]), np.repeat([0, 1, 2], [22, 18, 30]), 2, 3)
    assert [(s.from_segment, s.to_segment) for s in split.suggestions] == [(1, 2)]
    # Merge: from-segments 0 and 1 (20 rows each) both land in to-segment 0; each forward share is 1.0.
    merge = crosswalk(np.repeat([0, 1, 2], [20, 20, 30]), np.repeat([0, 1], [40, 30]), 3, 2)
    assert [(s.from_segment, s.to_segment) for s in merge.suggestions] == [(2, 1)]


def test_a_segment_without_rows_has_no_match_and_keeps_its_table_row():
    result = crosswalk(np.array([0, 0, 1]), np.array([1, 1, 0]), 3, 2)
    assert result.table.tolist() == [[0, 2], [1, 0], [0, 0]]
    empty = result.from_matches[2]
    assert (empty.size, empty.partner, empty.share) == (0, None, None)


def test_contingency_counts_every_pair():
    table = contingency(np.array([0, 1, 1, 1]), np.array([1, 1, 1, 0]), 2, 2)
    assert table.tolist() == [[0, 1], [1, 2]]


@pytest.mark.parametrize("min_share", [0.5, 0.2, 1.01])
def test_min_share_must_keep_suggestions_one_to_one(min_share):
    with pytest.raises(ValueError, match="min_share"):
        crosswalk(FROM, TO, 3, 3, min_share=min_share)


def test_feature_order_maps_names_and_names_the_difference():
    assert feature_order(["b", "a", "c"], ["a", "b", "c"]).tolist() == [1, 0, 2]
    with pytest.raises(InvalidInput) as caught:
        feature_order(["a", "b", "x"], ["a", "b", "y", "z"])
    (item,) = caught.value.detail
    assert item["field"] == "features"
    assert "only in the first version: ['x']" in item["message"]
    assert "only in the second version: ['y', 'z']" in item["message"]

