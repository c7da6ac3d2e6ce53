"""Repeated seeded runs behind the calibration checks: the suite runs them small, ``bench/calibrate.py`` large.

- ``segment_flag_rates``: fit on a training draw, flag fresh draws of the same generator, per segment; repeated
  over independent training draws (a conformal threshold is valid on average over training sets).
- ``null_reports``: pairs of (training draw, batch draw) from one distribution; every p-value of each report.
- ``power_rates``: one training draw, many shifted batches; the share reaching each status.
"""

from __future__ import annotations

from collections import defaultdict
from typing import Callable

import numpy as np

from service.core.assign import assign, compile_bundle
from service.core.bundle import FitConfig
from service.core.drift import DriftRules, drift_of_batch
from service.core.fit import fit_bundle
from tests.generators import drift_model

RULES = DriftRules()
# Cheap but faithful fits: k and the component count fixed (as the generators know them), two k-means starts,
# a small silhouette sample (the silhouette plays no part in thresholds or drift).
FAST = {"n_init": 2, "silhouette_sample": 500}


def config(n_features: int, k: int, components: int | None, q: float = 0.99, **extra) -> FitConfig:
    return FitConfig(features=[f"f{j}" for j in range(n_features)], components=components, k_min=k, k_max=k,
                     k_fixed=True, outlier_quantile=q, **{**FAST, **extra})


def segment_flag_rates(draw: Callable, k: int, components: int, *, n_train: int, n_fresh: int, draws: int,
                       q: float = 0.99, seed: int = 0) -> dict[int, dict[str, list]]:
    """Per generating component: each training draw's flag rate on fresh rows of the segment matched to it.

    A fitted segment is matched to the component most of its fresh rows come from. Returns
    ``{component: {"rate": [...], "train_rows": [...]}}`` with one entry per training draw.
    """
    out: dict[int, dict[str, list]] = defaultdict(lambda: {"rate": [], "train_rows": []})
    for i in range(draws):
        rng = np.random.default_rng([seed, i])
        x, _ = draw(n_train, rng)
        bundle = fit_bundle(x, config(x.shape[1], k, components, q, seed=i))
        fresh, truth = draw(n_fresh, rng)
        result = assign(compile_bundle(bundle), fresh)
        for c in range(k):
            members = result.segment == c
            if not members.any():
                continue
            component = int(np.bincount(truth[members]).argmax())
            out[component]["rate"].append(float(result.outlier[members].mean()))
            out[component]["train_rows"].append(int(bundle.reference.segment_counts[c]))
    return dict(out)


def p_value_slots(report: dict) -> dict[str, float]:
    """Every p-value and q-value a drift report shows, by a stable slot name."""
    slots = {}
    for row in report["features"]:
        name = row["name"]
        slots[f"feature {name} p"] = row["p_value"]
        slots[f"feature {name} q"] = row["q_value"]
        slots[f"missing {name} p"] = row["missing_share"]["p_value"]
        slots[f"missing {name} q"] = row["missing_share"]["q_value"]
    slots["segment mix p"] = report["segments"]["p_value"]
    for item in report["segments"]["by_segment"]:
        slots[f"segment {item['id']} p"] = item["p_value"]
        slots[f"segment {item['id']} q"] = item["q_value"]
    slots["outlier rate p"] = report["outliers"]["p_value"]
    slots["residual p"] = report["residual"]["p_value"]
    return slots


def null_reports(*, n_train: int, batch_sizes: tuple[int, ...], pairs: int, seed: int = 0) -> dict[int, dict]:
    """For each batch size: ``{"p": {slot: array of p-values}, "status": {status: count}}`` over ``pairs``
    independent (training, batch) draws from the drift model (one training draw serves every batch size)."""
    found: dict[int, dict] = {n: {"p": defaultdict(list), "status": defaultdict(int)} for n in batch_sizes}
    for i in range(pairs):
        rng = np.random.default_rng([seed, n_train, i])
        bundle = fit_bundle(drift_model(n_train, rng), config(7, 4, 3, seed=i))
        compiled = compile_bundle(bundle)
        for n in batch_sizes:
            report = drift_of_batch(bundle, compiled, drift_model(n, rng), RULES)
            for slot, value in p_value_slots(report).items():
                found[n]["p"][slot].append(value)
            found[n]["status"][report["status"]] += 1
    return {n: {"p": {s: np.array(v) for s, v in f["p"].items()}, "status": dict(f["status"])}
            for n, f in found.items()}


def power_rates(make_batch: Callable[[np.random.Generator], np.ndarray], pick: Callable[[dict], str], *,
                n_train: int, batches: int, seed: int = 0) -> dict[str, float]:
    """Share of ``batches`` shifted batches whose picked status (``pick(report)``) is each of the statuses."""
    rng = np.random.default_rng([seed, n_train])
    bundle = fit_bundle(drift_model(n_train, rng), config(7, 4, 3, seed=seed))
    compiled = compile_bundle(bundle)
    counts: dict[str, int] = defaultdict(int)
    for _ in range(batches):
        counts[pick(drift_of_batch(bundle, compiled, make_batch(rng), RULES))] += 1
    return {status: counts[status] / batches for status in ("stable", "watch", "alert")}
