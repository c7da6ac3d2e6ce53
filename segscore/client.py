"""``from segscore.client import Client``: the same objects as ``service.client``."""

from service.client import *  # noqa: F401,F403
from service.client import __all__  # noqa: F401
