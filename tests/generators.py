"""Generators with known truth for the calibration checks (tests/core/test_calibration.py, bench/calibrate.py).

Each draws n rows and the generating component of each row from a fixed mixture, with numpy's Generator
(seeded by the caller). Invented distributions, used only as generators whose truth is known: the checks
compare the service's rates with the definitions (a level-q rule flags 1 - q of fresh draws; a level-0.01
test is below 0.01 in about 1 % of null batches), never with numbers from these generators.
"""

from __future__ import annotations

import numpy as np

# Separated blobs: 4 unit-variance Gaussian components in 6 features, centres 15-18 SD apart, unequal weights.
BLOB_CENTRES = np.array([[0, 0, 0, 0, 0, 0], [9, 9, 0, 0, 9, 0], [0, 9, 9, 9, 0, 0], [9, 0, 0, 9, 0, 9]], float)
BLOB_WEIGHTS = np.array([0.4, 0.3, 0.2, 0.1])

# Skewed: 3 components of lognormal and gamma noise around separated offsets in 5 features.
SKEW_OFFSETS = np.array([[0, 0, 0, 0, 0], [10, 0, 10, 0, 0], [0, 10, 0, 10, 5]], float)
SKEW_WEIGHTS = np.array([0.5, 0.3, 0.2])

# Off the PCA plane: 6 features; three large components spread over the first 4 (a plane PCA(4) finds), with
# noise of SD 0.3 in the last 2; a 2 % component sits 4 units off that plane (feature 5) with the same noise.
PLANE_CENTRES = np.array([[0, 0, 0, 0, 0, 0], [10, 0, 0, 0, 0, 0], [0, 10, 0, 0, 0, 0], [0, 0, 10, 10, 4, 0]], float)
PLANE_SPREAD = np.array([2.0, 2.0, 2.0, 2.0, 0.3, 0.3])
PLANE_WEIGHTS = np.array([0.5, 0.3, 0.18, 0.02])

# Drift model: 4 Gaussian blobs (SD 1.5) in 6 features with fixed centres, 5 % of f0 missing completely at
# random, and a 7th feature: a count 0-5 with fixed probabilities (independent of the blob).
DRIFT_CENTRES = np.random.default_rng(3).uniform(-6.0, 6.0, size=(4, 6))
DRIFT_WEIGHTS = np.array([0.4, 0.3, 0.2, 0.1])
COUNT_PROBS = np.array([0.35, 0.25, 0.2, 0.12, 0.07, 0.01])
MISSING_F0 = 0.05


def _components(n: int, weights: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    return np.repeat(np.arange(weights.size), rng.multinomial(n, weights))


def separated_blobs(n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    comp = _components(n, BLOB_WEIGHTS, rng)
    return BLOB_CENTRES[comp] + rng.standard_normal((n, 6)), comp


def skewed_mixture(n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    comp = _components(n, SKEW_WEIGHTS, rng)
    noise = np.empty((n, 5))
    lognormal = comp != 1
    noise[lognormal] = rng.lognormal(mean=0.0, sigma=0.6, size=(int(lognormal.sum()), 5))
    noise[~lognormal] = rng.gamma(shape=2.0, scale=1.0, size=(int((~lognormal).sum()), 5))
    return SKEW_OFFSETS[comp] + noise, comp


def off_plane(n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    comp = _components(n, PLANE_WEIGHTS, rng)
    return PLANE_CENTRES[comp] + rng.standard_normal((n, 6)) * PLANE_SPREAD, comp


GENERATORS = {
    # name: (draw, k, PCA components)
    "separated-blobs": (separated_blobs, 4, 3),
    "skewed-mixture": (skewed_mixture, 3, 3),
    "off-plane-2pct": (off_plane, 4, 4),
}


def drift_model(n: int, rng: np.random.Generator, weights: np.ndarray = DRIFT_WEIGHTS,
                count_probs: np.ndarray = COUNT_PROBS) -> np.ndarray:
    """n rows of the drift model (7 features; see above); ``weights`` and ``count_probs`` can be changed."""
    comp = _components(n, weights, rng)
    x = np.empty((n, 7))
    x[:, :6] = DRIFT_CENTRES[comp] + 1.5 * rng.standard_normal((n, 6))
    x[:, 6] = rng.choice(6, size=n, p=count_probs)
    x[rng.random(n) < MISSING_F0, 0] = np.nan
    return x[rng.permutation(n)]


def fives_to(share: float) -> np.ndarray:
    """COUNT_PROBS with the share of 5s set to ``share``, the other values scaled to keep the total 1."""
    probs = COUNT_PROBS[:5] * (1.0 - share) / COUNT_PROBS[:5].sum()
    return np.append(probs, share)
