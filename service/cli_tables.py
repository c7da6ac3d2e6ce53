"""The API's answers as ``rich`` tables for the terminal commands (``segscore fit``, ``show``, ``compare``...).

Pure functions from the decoded JSON answer to renderables; the numbers are the answer's, rounded for reading
only (``--json`` prints them whole).
"""

from __future__ import annotations

from typing import Any

from rich.console import Group
from rich.table import Table
from rich.text import Text

# Features shown per segment: the ones whose segment mean is furthest from the overall mean, in sd units.
DISTINCTIVE_FEATURES = 3
_STATUS_RANK = {"alert": 0, "watch": 1, "stable": 2}
_STATUS_STYLE = {"alert": "bold red", "watch": "yellow", "stable": "green"}


def number(value: Any, digits: int = 4) -> str:
    """A number as ``digits`` significant figures; an int as is; None as an empty cell."""
    if value is None:
        return ""
    if isinstance(value, bool) or isinstance(value, int):
        return str(value)
    return f"{value:.{digits}g}"


def share(value: float | None) -> str:
    return "" if value is None else f"{100 * value:.1f}%"


def distinctive(segment: dict[str, Any], count: int = DISTINCTIVE_FEATURES) -> list[tuple[str, dict[str, Any]]]:
    """The segment's ``count`` features with the largest |z| (ties by name), with their profile entries."""
    ranked = sorted(segment["profile"].items(), key=lambda item: (-abs(item[1]["z"]), item[0]))
    return ranked[:count]


def describe(name: str, entry: dict[str, Any]) -> str:
    """``name mean (z +1.2)``: the segment mean in the feature's original units and its z score."""
    return f"{name} {number(entry['mean'])} (z {entry['z']:+.2f})"


def k_curve(report: dict[str, Any]) -> Table:
    selection = report["selection"]
    table = Table(title=f"k curve ({selection['method']}; chosen k={selection['chosen']})")
    for column in ("k", "distortion", "silhouette", "chosen"):
        table.add_column(column, justify="right" if column != "chosen" else "center")
    for row in selection["curve"]:
        table.add_row(str(row["k"]), number(row["distortion"]), number(row.get("silhouette")),
                      "*" if row["k"] == selection["chosen"] else "")
    return table


def segments(report: dict[str, Any]) -> Table:
    table = Table(title=f"segments of '{report['name']}' version {report['version']}")
    for column, justify in (("segment", "right"), ("size", "right"), ("share", "right"), ("label", "left"),
                            ("most distinctive features: segment mean (z)", "left")):
        table.add_column(column, justify=justify)
    for segment in report["segments"]:
        table.add_row(str(segment["id"]), str(segment["size"]), share(segment["share"]), segment["label"] or "",
                      "\n".join(describe(name, entry) for name, entry in distinctive(segment)))
    return table


def report_summary(report: dict[str, Any]) -> Text:
    live = "live" if report.get("live") else "not live"
    components = report.get("components")
    lines = [f"'{report['name']}' version {report['version']} ({live}), created {report['created_at']}",
             f"{report['n_records']} records, {len(report['features'])} features, k={report['k']}, "
             f"{'no PCA' if components is None else f'{components} PCA components'}"]
    lines += [f"warning: {w['message'] if isinstance(w, dict) else w}" for w in report.get("warnings") or []]
    return Text("\n".join(lines))


def fit_report(report: dict[str, Any]) -> Group:
    """A fit report: a summary line, the k curve, and the segments."""
    parts: list[Any] = [report_summary(report)]
    if report.get("selection"):
        parts.append(k_curve(report))
    parts.append(segments(report))
    return Group(*parts)


def versions(name: str, rows: list[dict[str, Any]]) -> Table:
    table = Table(title=f"versions of '{name}'")
    for column in ("version", "live", "k", "records", "created", "by"):
        table.add_column(column, justify="right" if column in ("version", "k", "records") else "left")
    for row in rows:
        table.add_row(str(row["version"]), "*" if row["live"] else "", str(row["k"]), str(row["n_records"]),
                      row["created_at"], row.get("created_by") or "")
    return table


def jobs(rows: list[dict[str, Any]]) -> Table | str:
    """Background fit jobs, newest first; a failed job shows its error's first line."""
    from service.client._errors import detail_lines

    if not rows:
        return "no background fit jobs"
    table = Table(title="background fit jobs (newest first)")
    for column in ("job", "segmentation", "state", "step", "progress", "version", "created", "updated", "error"):
        table.add_column(column, justify="right" if column in ("progress", "version") else "left")
    for row in rows:
        error = detail_lines(row["error"])[0] if row.get("error") is not None else ""
        table.add_row(row["id"], row["segmentation"], row["state"], row["step"], f"{100 * row['progress']:.0f}%",
                      "" if row["version"] is None else str(row["version"]), row["created_at"], row["updated_at"],
                      error)
    return table


def comparison(answer: dict[str, Any]) -> Group:
    """The crosswalk of two versions: ARI, the contingency table, best matches and label suggestions."""
    v, w = answer["from_version"], answer["to_version"]
    head = Text(f"'{answer['name']}' version {v} -> version {w}, on {answer['n_records']} training rows of "
                f"version {answer['sample_version']}: adjusted Rand index {answer['adjusted_rand_index']:.4f}")
    contingency = Table(title=f"rows: segments of v{v}; columns: segments of v{w}")
    contingency.add_column(f"v{v} \\ v{w}", justify="right")
    for segment in answer["to_segments"]:
        contingency.add_column(str(segment["id"]), justify="right")
    for segment, row in zip(answer["from_segments"], answer["contingency"]):
        contingency.add_row(str(segment["id"]), *(str(count) for count in row))
    matches = Table(title=f"best match of each segment of v{v} in v{w}")
    for column in ("segment", "label", "size", "best match", "overlap share"):
        matches.add_column(column, justify="left" if column == "label" else "right")
    for segment in answer["from_segments"]:
        matches.add_row(str(segment["id"]), segment["label"] or "", str(segment["size"]),
                        number(segment["best_match"]), share(segment["share"]))
    parts: list[Any] = [head, contingency, matches]
    if answer["suggestions"]:
        suggestions = Table(title=f"labels of v{v} suggested for v{w} (overlap share >= {share(answer['min_share'])})")
        for column in ("segment", "suggested label", "current label"):
            suggestions.add_column(column, justify="right" if column == "segment" else "left")
        for suggestion in answer["suggestions"]:
            suggestions.add_row(str(suggestion["segment"]), suggestion["label"], suggestion["current_label"] or "")
        parts.append(suggestions)
    else:
        parts.append(Text(f"no label suggestions (a labelled segment of v{v} and a segment of v{w} must share at "
                          f"least {share(answer['min_share'])} of each one's rows)"))
    return Group(*parts)


def drift_items(report: dict[str, Any]) -> list[dict[str, Any]]:
    """Every graded item of a drift report (features, segment mix, outlier rate, residual), worst first:
    by status (alert, watch, stable), then by smallest p-value, then by name."""
    items = []
    for feature in report["features"]:
        items.append({"item": f"feature {feature['name']}", "status": feature["status"], "psi": feature["psi"],
                      "p_value": feature["p_value"], "q_value": feature.get("q_value"),
                      "detail": f"mean shift {feature['mean_shift_sd']:+.2f} sd"
                      + (f"; {', '.join(feature['reasons'])}" if feature.get("reasons") else "")})
    segments_part = report["segments"]
    items.append({"item": "segment mix", "status": segments_part["status"], "psi": segments_part["psi"],
                  "p_value": segments_part["p_value"], "q_value": None,
                  "detail": f"{segments_part.get('test') or 'chi-square'} {number(segments_part['chi2'])}"})
    outliers = report["outliers"]
    items.append({"item": "outlier rate", "status": outliers["status"], "psi": None,
                  "p_value": outliers["p_value"], "q_value": None,
                  "detail": f"{share(outliers['observed_rate'])} vs {share(outliers['expected_rate'])} in training"})
    residual = report["residual"]
    items.append({"item": "PCA residual", "status": residual["status"], "psi": None,
                  "p_value": residual["p_value"], "q_value": None,
                  "detail": (f"median {number(residual['observed_median'])} vs {number(residual['expected_median'])}"
                             if residual.get("available", True) else "no PCA residual")})
    return sorted(items, key=lambda item: (_STATUS_RANK[item["status"]], item["p_value"], item["item"]))


def drift(report: dict[str, Any]) -> Group:
    status = report["status"]
    head = Text.assemble(f"'{report['name']}' version {report['version']}: {report['n_records']} records, "
                         "overall ", (status, _STATUS_STYLE[status]))
    table = Table(title="drift items, worst first")
    for column in ("item", "status", "PSI", "p-value", "q-value", "detail"):
        table.add_column(column, justify="right" if column in ("PSI", "p-value", "q-value") else "left")
    for item in drift_items(report):
        table.add_row(item["item"], Text(item["status"], _STATUS_STYLE[item["status"]]), number(item["psi"], 3),
                      number(item["p_value"], 3), number(item["q_value"], 3), item["detail"])
    parts: list[Any] = [head, table]
    if report.get("skipped_records"):
        parts.append(Text(f"{report['skipped_records']} record(s) skipped"))
    return Group(*parts)
