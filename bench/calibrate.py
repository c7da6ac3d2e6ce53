"""Calibration sweeps (not a test): the figures the README quotes for the outlier flag and the drift report.

1. Per-segment flag rates at q = 0.99 on fresh draws from three generators with known truth (separated
   blobs, a skewed lognormal/gamma mixture, a 2 % segment off the PCA plane; ``tests/generators.py``),
   averaged over independent training draws, with the spread across draws. Reference: split-conformal
   coverage (Vovk, Gammerman & Shafer 2005; Lei et al., JASA 2018): a fresh record of a segment is flagged
   with probability 1 - q up to 1 / (n_c + 1).
2. Null calibration of every p-value a drift report shows: independent (training, batch) pairs from one
   distribution, training sets of 1,000 and 10,000 rows, batches of 500, 2,000 and 20,000 rows. Reference:
   the definition of a p-value (below 0.01 in 1 % of null batches; discrete tests such as Fisher's may be
   below that).
3. Power: a 10 % segment going to 20 % (2,000-row batches), the 5s of a 0-5 count feature going from 1 % to
   9 %, one feature's mean moved by 0.5 SD.

BLAS/OpenMP pools are limited to one thread (two shared vCPUs).

    python bench/calibrate.py [--draws 50] [--pairs 200] [--batches 200] [--quick]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # the repository root: tests.generators

from tests.calibration_runs import null_reports, power_rates, segment_flag_rates  # noqa: E402
from tests.generators import DRIFT_WEIGHTS, GENERATORS, drift_model, fives_to  # noqa: E402

Q = 0.99


def per_segment(draws: int) -> None:
    print(f"\n## Per-segment flag rates, q = {Q} (nominal {1 - Q:.1%}), {draws} training draws each")
    print("| generator | training rows | component | mean training rows of its segment | mean rate | "
          "spread across draws (5th-95th pct) | mean / nominal |")
    print("|---|---|---|---|---|---|---|")
    for name, (draw, k, components) in GENERATORS.items():
        for n_train in (1_000, 10_000) if name != "off-plane-2pct" else (1_000, 20_000):
            found = segment_flag_rates(draw, k, components, n_train=n_train, n_fresh=50_000, draws=draws, q=Q)
            for component, rows in sorted(found.items()):
                rate = np.array(rows["rate"])
                low, high = np.percentile(rate, [5, 95])
                print(f"| {name} | {n_train:,} | {component} | {np.mean(rows['train_rows']):,.0f} | "
                      f"{rate.mean():.2%} | {low:.2%} - {high:.2%} | {rate.mean() / (1 - Q):.2f} |")


def null_sweep(pairs: int) -> None:
    print(f"\n## Null calibration: share of {pairs} (training, batch) pairs with p < 0.01")
    print("| training rows | batch rows | slots | worst slot (its share) | median slot share | "
          "pooled share (p-values of real tests) | statuses |")
    print("|---|---|---|---|---|---|---|")
    for n_train in (1_000, 10_000):
        found = null_reports(n_train=n_train, batch_sizes=(500, 2_000, 20_000), pairs=pairs, seed=1)
        for n, result in found.items():
            shares = {slot: float(np.mean(p < 0.01)) for slot, p in result["p"].items()}
            worst = max(shares, key=shares.get)
            tests = [p for slot, p in result["p"].items() if slot.endswith(" p") and np.any(p < 1.0)]
            pooled = float(np.mean(np.concatenate(tests) < 0.01))
            print(f"| {n_train:,} | {n:,} | {len(shares)} | {worst} ({shares[worst]:.1%}) | "
                  f"{np.median(list(shares.values())):.1%} | {pooled:.2%} | {result['status']} |")
            for slot in ("segment mix p", "outlier rate p", "residual p"):
                print(f"|  |  | | {slot}: {shares[slot]:.1%} | | | |")


def power(batches: int) -> None:
    print(f"\n## Power, {batches} batches of 2,000 rows, training 10,000 rows")
    doubled = DRIFT_WEIGHTS.copy()
    doubled[3] = 0.2
    doubled[:3] *= 0.8 / DRIFT_WEIGHTS[:3].sum()

    def smallest_segment(report):
        items = report["segments"]["by_segment"]
        return min(items, key=lambda item: abs(item["expected_share"] - 0.1))["status"]

    cases = {
        "10 % segment -> 20 %": (lambda rng: drift_model(2_000, rng, weights=doubled), smallest_segment),
        "count feature: 5s 1 % -> 9 %": (lambda rng: drift_model(2_000, rng, count_probs=fives_to(0.09)),
                                          lambda report: report["features"][6]["status"]),
        "f2 mean + 0.5 SD": (lambda rng: _shifted(drift_model(2_000, rng)), lambda report: report["features"][2]["status"]),
    }
    print("| change | stable | watch | alert |")
    print("|---|---|---|---|")
    for name, (make, pick) in cases.items():
        rates = power_rates(make, pick, n_train=10_000, batches=batches, seed=3)
        print(f"| {name} | {rates['stable']:.1%} | {rates['watch']:.1%} | {rates['alert']:.1%} |")


def _shifted(batch: np.ndarray) -> np.ndarray:
    reference = drift_model(200_000, np.random.default_rng(99))
    batch[:, 2] += 0.5 * np.nanstd(reference[:, 2])
    return batch


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--draws", type=int, default=50, help="training draws per generator")
    parser.add_argument("--pairs", type=int, default=200, help="(training, batch) pairs per size")
    parser.add_argument("--batches", type=int, default=200, help="shifted batches per power case")
    parser.add_argument("--quick", action="store_true", help="a few repetitions (smoke run)")
    args = parser.parse_args()
    if args.quick:
        args.draws, args.pairs, args.batches = 3, 10, 10
    started = time.time()
    with threadpool_limits(1):
        per_segment(args.draws)
        null_sweep(args.pairs)
        power(args.batches)
    print(f"\n({time.time() - started:.0f} s)")


if __name__ == "__main__":
    main()
