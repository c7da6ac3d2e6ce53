"""profiles.png: a heat map of segment z-scores by feature, centred on zero, values printed in the cells."""

from __future__ import annotations

from typing import Any

import matplotlib
import numpy as np

from service.charts.style import DIVERGING_COLOURMAP, new_figure, segment_name, to_png

MIN_COLOUR_LIMIT = 1.0   # |z| that gets the darkest colour when every |z| is smaller: small z stay pale


def z_matrix(report: dict[str, Any]) -> np.ndarray:
    """(k, p) z-scores of the report's segments by feature; NaN where the report has none."""
    features = report["features"]
    return np.array([[np.nan if seg["profile"][f]["z"] is None else seg["profile"][f]["z"] for f in features]
                     for seg in report["segments"]], dtype=float)


def _cell_font_size(figure, axes, shape: tuple[int, int]) -> float:
    """Points at which '+0.00' (5 characters, ~0.62 em each in DejaVu Sans) fills at most 70 % of a cell."""
    figure.canvas.draw()                            # lay out first, so the axes' size in pixels is known
    box = axes.get_window_extent()
    cell_width, cell_height = box.width / shape[1], box.height / shape[0]
    points_per_pixel = 72.0 / figure.dpi
    by_width = 0.7 * cell_width / (5 * 0.62) * points_per_pixel
    by_height = 0.5 * cell_height * points_per_pixel
    return max(5.0, min(11.0, by_width, by_height))


def profiles_png(report: dict[str, Any]) -> bytes:
    features, segments = report["features"], report["segments"]
    z = z_matrix(report)
    limit = max(MIN_COLOUR_LIMIT, float(np.nanmax(np.abs(z))) if np.isfinite(z).any() else 0.0)
    figure = new_figure()
    axes = figure.subplots()
    colourmap = matplotlib.colormaps[DIVERGING_COLOURMAP].with_extremes(bad="#bbbbbb")   # grey: no z
    image = axes.imshow(np.ma.masked_invalid(z), cmap=colourmap, vmin=-limit, vmax=limit, aspect="auto")
    # The printed value carries the information (the colour only helps find it): as large as fits the cell.
    size = _cell_font_size(figure, axes, z.shape)
    for (i, j), value in np.ndenumerate(z):
        text = "n/a" if np.isnan(value) else f"{value:+.2f}"
        dark = not np.isnan(value) and abs(value) > 0.6 * limit
        axes.text(j, i, text, ha="center", va="center", fontsize=size, color="white" if dark else "black")
    axes.set_xticks(range(len(features)), labels=features, rotation=30, ha="right", rotation_mode="anchor")
    axes.set_yticks(range(len(segments)),
                    labels=[f"{segment_name(s)}\n{s['size']:,} records, {s['share']:.0%}" for s in segments])
    axes.set_xlabel("feature")
    axes.set_ylabel("segment")
    axes.set_xticks(np.arange(len(features) + 1) - 0.5, minor=True)
    axes.set_yticks(np.arange(len(segments) + 1) - 0.5, minor=True)
    axes.grid(which="minor", color="white", linewidth=2)
    axes.tick_params(which="minor", length=0)
    colourbar = figure.colorbar(image, ax=axes, shrink=0.9)
    colourbar.set_label("z = (segment mean - overall mean) / overall SD\n[standard deviations]; "
                        "red above, blue below average")
    figure.suptitle(f"Segment profiles: '{report['name']}' version {report['version']}\n"
                    "how far each segment's mean lies from the overall mean, feature by feature", fontsize=13)
    return to_png(figure)
