"""selection.png: distortion and silhouette against k, the chosen k and the Kneedle knee marked."""

from __future__ import annotations

from typing import Any

from matplotlib.ticker import MaxNLocator

from service.charts.style import OKABE_ITO, new_figure, to_png

CHOSEN = {"colour": OKABE_ITO["vermillion"], "marker": "*", "linestyle": ":"}
KNEE = {"colour": OKABE_ITO["reddish_purple"], "marker": "D", "linestyle": "--"}


def selection_png(report: dict[str, Any]) -> bytes:
    """Two panels sharing the k axis (distortion above, silhouette below) from a fit report."""
    selection = report["selection"]
    curve = sorted(selection["curve"], key=lambda row: row["k"])
    chosen, knee, method = selection["chosen"], selection.get("kneedle_k"), selection["method"]
    ks = [row["k"] for row in curve]
    figure = new_figure()
    top, bottom = figure.subplots(2, 1, sharex=True)
    how = (f"k fixed at {chosen} by the request: one fit, no search" if method == "fixed"
           else f"k searched over {ks[0]}..{ks[-1]}; chosen by the {method} rule")
    figure.suptitle(f"Choice of k: '{report['name']}' version {report['version']}\n{how}", fontsize=13)

    distortion = [row["distortion"] for row in curve]
    top.plot(ks, distortion, color=OKABE_ITO["blue"], marker="o", linewidth=1.8, label="distortion")
    top.set_ylabel("distortion\n(mean squared distance to own\ncentroid, clustering-space units²)")

    scored = [(row["k"], row["silhouette"]) for row in curve if row["silhouette"] is not None]
    if scored:
        bottom.plot([k for k, _ in scored], [s for _, s in scored], color=OKABE_ITO["bluish_green"], marker="s",
                    linewidth=1.8, label="mean silhouette")
    else:
        bottom.text(0.5, 0.5, "silhouette undefined for every k shown (needs 2 or more segments)",
                    transform=bottom.transAxes, ha="center", va="center")
    bottom.set_ylabel("mean silhouette\n(unitless, -1 to 1)")
    bottom.set_xlabel("number of segments k")
    bottom.xaxis.set_major_locator(MaxNLocator(integer=True))

    by_k = {row["k"]: row for row in curve}
    agrees = knee is not None and knee == chosen and method != "fixed"
    marks = [(chosen, CHOSEN, f"chosen k = {chosen}" + (" (the Kneedle knee agrees)" if agrees else ""))]
    if knee is not None and knee != chosen:
        marks.append((knee, KNEE, f"Kneedle knee k = {knee}"))
    for axes, field in ((top, "distortion"), (bottom, "silhouette")):
        for k, style, text in marks:
            axes.axvline(k, color=style["colour"], linestyle=style["linestyle"], linewidth=1.4)
            value = by_k.get(k, {}).get(field)
            if value is not None:
                axes.plot([k], [value], linestyle="none", marker=style["marker"], markersize=15,
                          markerfacecolor=style["colour"], markeredgecolor="black", label=text)
        axes.grid(True, color="#dddddd", linewidth=0.8)
        if axes.get_legend_handles_labels()[0]:
            axes.legend(loc="best", fontsize=9, framealpha=0.95)
    if len(ks) == 1:
        top.set_xlim(ks[0] - 1, ks[0] + 1)
    return to_png(figure)
