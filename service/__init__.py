"""segscore: fit, version and serve customer segmentations."""

__version__ = "0.1.0"
