"""Compare two versions of a segmentation: how v's segments map onto w's, and which labels carry over."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Path, Query

from schemas import VersionComparison
from service.api.payload import check_name
from service.api.validation import StrictQuery, VersionNumber, error_responses
from service.core.compare import SUGGESTION_MIN_SHARE, Crosswalk, Match, compare_versions
from service.deps import ReadScope, StoreDep

router = APIRouter(prefix="/segmentations", tags=["compare"])


def _matches(matches: list[Match], labels: dict[int, str]) -> list[dict[str, Any]]:
    return [{"id": m.segment, "label": labels.get(m.segment), "size": m.size, "best_match": m.partner,
             "share": m.share} for m in matches]


def comparison_body(name: str, v: int, w: int, sample_version: int, features: list[str], result: Crosswalk,
                    from_labels: dict[int, str], to_labels: dict[int, str], min_share: float) -> dict[str, Any]:
    suggestions = [
        {"segment": s.to_segment, "label": from_labels[s.from_segment], "from_segment": s.from_segment,
         "from_share": s.from_share, "to_share": s.to_share, "current_label": to_labels.get(s.to_segment)}
        for s in result.suggestions if s.from_segment in from_labels
    ]
    return {
        "name": name, "from_version": v, "to_version": w, "sample_version": sample_version,
        "n_records": result.n_records, "features": features,
        "adjusted_rand_index": result.adjusted_rand_index,
        "contingency": result.table.tolist(),
        "from_segments": _matches(result.from_matches, from_labels),
        "to_segments": _matches(result.to_matches, to_labels),
        "min_share": min_share,
        "suggestions": suggestions,
    }


@router.get("/{name}/versions/{v}/compare/{w}", response_model=VersionComparison,
            dependencies=[ReadScope, StrictQuery],
            summary="How the segments of version v map onto those of version w",
            responses=error_responses(401, 403, 404, 422, 500, 503))
def compare(
    name: str,
    v: Annotated[VersionNumber, Path()],
    w: Annotated[VersionNumber, Path()],
    store: StoreDep,
    min_share: float = Query(SUGGESTION_MIN_SHARE, gt=0.5, le=1.0,
                             description="suggest v's label for a w segment when at least this share of the v "
                                         "segment lands in it and at least this share of it comes from the v "
                                         "segment (above 0.5, so suggestions are one-to-one)"),
) -> dict[str, Any]:
    # A plain ``def``: FastAPI runs it in its thread pool, where loading two artifacts may block.
    check_name(name)
    older, newer = store.load(name, min(v, w)), store.load(name, max(v, w))
    from_version, to_version = (older, newer) if v <= w else (newer, older)
    sample_features = list(newer.compiled.features)
    result = compare_versions(from_version.compiled, to_version.compiled, newer.bundle.reference.sample,
                              sample_features, min_share=min_share)
    return comparison_body(name, v, w, newer.version, sample_features, result, store.labels(name, v),
                           store.labels(name, w), min_share)
