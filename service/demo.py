"""Synthetic demo data for an invented business: Fernhollow Tea, a tea-subscription shop.

Five customer types with clear centres and overlapping spread; a little noise and a few missing
values, so the demo exercises imputation. Invented data: for the demo only, never a test reference.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

FEATURES = ["tenure_months", "orders_per_year", "avg_basket_eur", "discount_share",
            "days_since_last_order", "support_contacts"]

# type: (weight, tenure, orders/yr, basket EUR, discount share, days since last order, support contacts)
CUSTOMER_TYPES = {
    "steady_regulars":   (0.34, 36, 14, 32, 0.08, 20, 1.0),
    "deal_seekers":      (0.22, 14, 9, 21, 0.55, 35, 1.5),
    "new_trialists":     (0.18, 2, 3, 26, 0.30, 18, 0.5),
    "fading_regulars":   (0.16, 28, 4, 29, 0.12, 140, 2.5),
    "gift_buyers":       (0.10, 20, 3, 85, 0.05, 95, 0.7),
}


def demo_customers(n_rows: int = 4000, seed: int = 7, missing_share: float = 0.01) -> pd.DataFrame:
    """A DataFrame with ``customer_id`` and the six features; seeded and reproducible."""
    rng = np.random.default_rng(seed)
    names = list(CUSTOMER_TYPES)
    weights = np.array([CUSTOMER_TYPES[n][0] for n in names])
    kinds = rng.choice(len(names), size=n_rows, p=weights / weights.sum())
    centres = np.array([CUSTOMER_TYPES[n][1:] for n in names], dtype=float)
    c = centres[kinds]
    tenure = np.clip(rng.gamma(4.0, c[:, 0] / 4.0), 0.5, 120)
    orders = rng.poisson(c[:, 1]).astype(float)
    basket = np.clip(rng.lognormal(np.log(c[:, 2]), 0.25), 5, 400)
    discount = np.clip(rng.beta(2.0, 2.0 / np.maximum(c[:, 3], 0.02) - 2.0 + 0.01), 0, 1)
    days = np.clip(rng.exponential(c[:, 4]), 0, 720)
    support = rng.poisson(c[:, 5]).astype(float)
    frame = pd.DataFrame({
        "customer_id": [f"C{100000 + i}" for i in range(n_rows)],
        "tenure_months": tenure.round(1),
        "orders_per_year": orders,
        "avg_basket_eur": basket.round(2),
        "discount_share": discount.round(3),
        "days_since_last_order": days.round(0),
        "support_contacts": support,
    })
    holes = rng.random((n_rows, len(FEATURES))) < missing_share
    for j, name in enumerate(FEATURES):
        frame.loc[holes[:, j], name] = np.nan
    return frame
