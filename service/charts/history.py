"""history.png: per-feature PSI over the stored drift reports, with the watch/alert bands and each
report's status."""

from __future__ import annotations

from typing import Any

import numpy as np
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import FuncFormatter

from service.charts.style import STATUS_STYLE, new_figure, series_style, to_png

MAX_TICK_LABELS = 8      # 'mm-dd hh:mm' labels that fit side by side under the plot
MAX_STATUS_WORDS = 15    # above this many reports the status words would overlap: shapes only
MAX_FEATURE_LINES = 10   # more lines than this cannot be told apart: the features with the highest PSI are drawn
SQRT_SCALE_ABOVE = 1.0   # a PSI above this would squash the bands on a linear axis: use a square-root axis


def _tick_label(report: dict[str, Any]) -> str:
    created = report["created_at"]          # 2026-12-02T06:30:12Z
    return f"{created[5:10]} {created[11:16]}\nv{report['version']}"


def drift_history_png(name: str, reports: list[dict[str, Any]], *, psi_watch: float, psi_alert: float) -> bytes:
    """``reports`` newest first (as the store lists them); drawn oldest to newest, left to right."""
    ordered = list(reversed(reports))
    figure = new_figure()
    status_axes, axes = figure.subplots(2, 1, sharex=True, height_ratios=[1, 7])
    figure.suptitle(f"Drift history: '{name}', per-feature PSI of the last {len(ordered)} stored reports"
                    if ordered else f"Drift history: '{name}'", fontsize=13)

    features: list[str] = []
    for report in ordered:
        features += [f["name"] for f in report["features"] if f["name"] not in features]
    psi = np.full((len(features), len(ordered)), np.nan)
    for j, report in enumerate(ordered):
        for item in report["features"]:
            psi[features.index(item["name"]), j] = item["psi"]
    top = max(psi_alert * 1.4, float(np.nanmax(psi)) * 1.08 if np.isfinite(psi).any() else 0.0)
    drawn = list(range(len(features)))
    if len(features) > MAX_FEATURE_LINES:
        highest = np.nanmax(np.where(np.isnan(psi), -np.inf, psi), axis=1)
        drawn = sorted(np.argsort(-highest, kind="stable")[:MAX_FEATURE_LINES].tolist())
        figure.suptitle(f"Drift history: '{name}', PSI of the {MAX_FEATURE_LINES} features (of {len(features)}) "
                        f"with the highest PSI in the last {len(ordered)} stored reports", fontsize=13)

    positions = np.arange(len(ordered))
    for line, i in enumerate(drawn):
        style = series_style(line)
        axes.plot(positions, psi[i], color=style["colour"], marker=style["marker"], markersize=7, linewidth=1.5,
                  label=features[i])
    bands = [(0.0, psi_watch, "stable"), (psi_watch, psi_alert, "watch"), (psi_alert, top, "alert")]
    for low, high, status in bands:
        axes.axhspan(low, high, color=STATUS_STYLE[status]["colour"], alpha=0.10, linewidth=0)
    for level in (psi_watch, psi_alert):
        axes.axhline(level, color="#444444", linestyle="--", linewidth=1.0)
    transform = axes.get_yaxis_transform()
    for y, word, align in ((psi_watch / 2, "stable", "center"), ((psi_watch + psi_alert) / 2, "watch", "center"),
                           (psi_alert, "alert", "bottom")):
        axes.text(1.01, y, word, transform=transform, va=align, fontsize=9)
    if top > SQRT_SCALE_ABOVE:
        axes.set_yscale("function", functions=(np.sqrt, np.square))
        axes.set_ylabel("PSI (unitless; square-root axis)")
    else:
        axes.set_ylabel("PSI (population stability index, unitless)")
    axes.set_ylim(0, top)
    # The band limits as ticks, so the thresholds can be read off the axis.
    ticks = [t for t in axes.get_yticks() if 0 <= t <= top and min(abs(t - psi_watch), abs(t - psi_alert)) > 0.03]
    axes.set_yticks(sorted({0.0, psi_watch, psi_alert, *ticks}))
    axes.yaxis.set_major_formatter(FuncFormatter(lambda value, _: f"{value:g}"))
    axes.grid(True, axis="y", color="#dddddd", linewidth=0.8)

    status_axes.set_yticks([])
    status_axes.set_ylabel("status", rotation=0, ha="right", va="center")
    for j, report in enumerate(ordered):
        style = STATUS_STYLE[report["status"]]
        status_axes.plot([j], [0.62], marker=style["marker"], markersize=11, color=style["colour"],
                         markeredgecolor="black", linestyle="none")
        if len(ordered) <= MAX_STATUS_WORDS:
            status_axes.text(j, 0.05, report["status"], ha="center", va="bottom", fontsize=7)
    status_axes.set_ylim(0, 1)
    for spine in ("top", "right", "left"):
        status_axes.spines[spine].set_visible(False)

    if ordered:
        step = max(1, int(np.ceil(len(ordered) / MAX_TICK_LABELS)))
        shown = positions[::step]
        axes.set_xticks(shown, labels=[_tick_label(ordered[j]) for j in shown], fontsize=8)
        axes.set_xlim(-0.5, len(ordered) - 0.5)
    else:
        axes.set_xticks([])
        axes.set_xlim(0, 1)
        axes.text(0.5, 0.55, f"No drift report stored yet for '{name}'.\nPOST a batch to "
                  f"/v1/segmentations/{name}/drift to start this history.", transform=axes.transAxes,
                  ha="center", va="center", fontsize=13,
                  bbox={"boxstyle": "round,pad=0.6", "facecolor": "white", "edgecolor": "#777777"})
    axes.set_xlabel("stored drift report, oldest to newest (created, UTC month-day hour:minute; version)")

    status_keys = [Line2D([], [], marker=s["marker"], color=s["colour"], markeredgecolor="black", linestyle="none",
                          markersize=9, label=f"report status: {name_}") for name_, s in STATUS_STYLE.items()]
    band_keys = [Patch(color=STATUS_STYLE[status]["colour"], alpha=0.25, label=f"{status} band")
                 for _, _, status in bands]
    feature_keys = axes.get_legend_handles_labels()[0]
    axes.legend(handles=feature_keys + status_keys + band_keys, loc="upper left", bbox_to_anchor=(1.09, 1.0),
                fontsize=8, frameon=False, title="features and marks", title_fontsize=9)
    return to_png(figure)
