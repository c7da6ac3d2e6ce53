"""map.png: the stored training sample on its first two principal components, coloured by segment.

``map_layout`` does the arithmetic (which plane, which coordinates), ``map_png`` the drawing.
"""

from __future__ import annotations

import textwrap
from dataclasses import dataclass
from typing import Any

import numpy as np

from service.charts.style import new_figure, segment_name, series_style, to_png

JITTER_SEED = 0
TITLE_WIDTH = 110        # characters per title line (12-point type on a 1000-pixel figure)


@dataclass(frozen=True)
class MapLayout:
    """Where to draw: ``points`` (n, 2) and ``centroids`` (k, 2) in one plane, with the words for it."""

    points: np.ndarray
    centroids: np.ndarray
    x_label: str
    y_label: str
    plane: str            # how the plane was obtained, for the title


def _principal_axes(centred: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """First two principal axes (2, p) of a centred matrix and the share of its variance each holds.

    Signs are fixed as scikit-learn's ``svd_flip`` does (the largest loading of each axis is positive), so the
    same sample always gives the same picture.
    """
    _, singular, axes = np.linalg.svd(centred, full_matrices=False)
    axes = axes[:2]
    signs = np.sign(axes[np.arange(axes.shape[0]), np.argmax(np.abs(axes), axis=1)])
    axes = axes * np.where(signs == 0, 1.0, signs)[:, None]
    total = float(np.sum(singular ** 2))
    shares = singular[:2] ** 2 / total if total > 0 else np.zeros(2)
    return axes, shares


def _pc_label(number: int, units: str, share: float | None) -> str:
    of_variance = "" if share is None else f"; {share:.0%} of the variance"
    return f"principal component {number} ({units}{of_variance})"


def map_layout(filled: np.ndarray, projected: np.ndarray, centroids: np.ndarray, segment: np.ndarray, *,
               has_pca: bool, explained_variance_ratio: list[float], scaling: str) -> MapLayout:
    """The plane of the map.

    ``filled`` (n, p): the sample with missing values imputed; ``projected`` (n, d) and ``centroids`` (k, d):
    the sample and the centroids in the version's clustering space; ``segment`` (n,): each row's segment.

    - PCA with two or more components: the clustering space's first two axes are PC 1 and PC 2.
    - No PCA, d >= 2: the clustering space is the scaled space; its first two PCs, computed here.
    - One dimension (PCA keeping one component, or a single feature): the sample is standardised here
      (population SD) and its first two PCs computed; the centroids (which live on one axis) are shown as
      segment means in that plane. With one feature, the second axis is a seeded random jitter.
    """
    units = "scaled units" if scaling != "none" else "original units"
    if projected.shape[1] >= 2 and has_pca:
        shares = list(explained_variance_ratio[:2]) + [None, None]
        return MapLayout(projected[:, :2], centroids[:, :2], _pc_label(1, units, shares[0]),
                         _pc_label(2, units, shares[1]), "the version's own PCA")
    if projected.shape[1] >= 2:
        mean = projected.mean(axis=0)
        axes, shares = _principal_axes(projected - mean)
        return MapLayout((projected - mean) @ axes.T, (centroids - mean) @ axes.T,
                         _pc_label(1, units, shares[0]), _pc_label(2, units, shares[1]),
                         "PCs of the scaled sample, computed for this picture (the version has no PCA)")
    std = filled.std(axis=0)
    standardised = (filled - filled.mean(axis=0)) / np.where(std > 0, std, 1.0)
    if filled.shape[1] >= 2:
        axes, shares = _principal_axes(standardised)
        points = standardised @ axes.T
        x_label = _pc_label(1, "standardised units", shares[0])
        y_label = _pc_label(2, "standardised units", shares[1])
        plane = ("PCs of the standardised sample, computed for this picture (the version clusters on one "
                 "component); centroids shown as segment means")
    else:
        jitter = np.random.default_rng(JITTER_SEED).uniform(-0.5, 0.5, size=filled.shape[0])
        points = np.column_stack([standardised[:, 0], jitter])
        x_label, y_label = "the one feature (standardised units)", "random jitter (no meaning; spreads the points)"
        plane = "one feature, standardised, with random vertical jitter; centroids shown as segment means"
    means = np.array([points[segment == c].mean(axis=0) if np.any(segment == c) else [np.nan, np.nan]
                      for c in range(centroids.shape[0])])
    return MapLayout(points, means, x_label, y_label, plane)


def map_png(report: dict[str, Any], layout: MapLayout, segment: np.ndarray, outlier: np.ndarray) -> bytes:
    """Draw the map: one marker shape and colour per segment, outliers hollow, centroids large and labelled."""
    figure = new_figure()
    axes = figure.subplots()
    points = layout.points
    for seg in report["segments"]:
        c = seg["id"]
        style = series_style(c)
        mine = segment == c
        inside, outside = mine & ~outlier, mine & outlier
        axes.scatter(points[inside, 0], points[inside, 1], s=14, marker=style["marker"], color=style["colour"],
                     alpha=0.55, linewidths=0, label=f"{segment_name(seg)} ({int(mine.sum()):,} in the sample)")
        axes.scatter(points[outside, 0], points[outside, 1], s=34, marker=style["marker"], facecolors="none",
                     edgecolors=style["colour"], linewidths=1.1)
    for seg in report["segments"]:
        c = seg["id"]
        x, y = layout.centroids[c]
        if not np.isfinite([x, y]).all():
            continue
        style = series_style(c)
        axes.scatter([x], [y], s=260, marker=style["marker"], color=style["colour"], edgecolors="black",
                     linewidths=1.8, zorder=5)
        axes.annotate(segment_name(seg), (x, y), xytext=(10, 8), textcoords="offset points", fontsize=10,
                      fontweight="bold", zorder=6,
                      bbox={"boxstyle": "round,pad=0.2", "facecolor": "white", "edgecolor": "#555555", "alpha": 0.9})
    # Legend keys for the two marks that are not segments.
    axes.scatter([], [], s=34, marker="o", facecolors="none", edgecolors="#333333", label="outlier (hollow)")
    axes.scatter([], [], s=200, marker="o", color="#999999", edgecolors="black", linewidths=1.8,
                 label="centroid (large, outlined)")
    axes.set_xlabel(layout.x_label)
    axes.set_ylabel(layout.y_label)
    axes.grid(True, color="#e5e5e5", linewidth=0.8)
    axes.set_axisbelow(True)
    axes.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=9, markerscale=1.6, frameon=False)
    n_outliers = int(outlier.sum())
    figure.suptitle(f"Segment map: '{report['name']}' version {report['version']}, {len(points):,} training records "
                    f"({n_outliers:,} outliers)\n" + textwrap.fill(f"plane: {layout.plane}", TITLE_WIDTH), fontsize=12)
    return to_png(figure)
