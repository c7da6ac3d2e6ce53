"""Short import paths for users of segscore: ``from segscore.client import Client``."""
