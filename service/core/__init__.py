"""Numerical core: numpy, pandas and scikit-learn only (no web framework imports)."""
