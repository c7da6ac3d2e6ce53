"""Charts of a version and of its drift history, drawn as PNG with matplotlib (no web imports).

Every function here is a pure function of plain data: report dicts and numpy arrays in, PNG bytes out.
The HTTP layer (``service.api.charts``) fetches the data and caches the bytes (``ChartCache``).
"""

from service.charts.cache import ChartCache
from service.charts.history import drift_history_png
from service.charts.map import MapLayout, map_layout, map_png
from service.charts.profiles import profiles_png
from service.charts.selection import selection_png

__all__ = ["ChartCache", "MapLayout", "drift_history_png", "map_layout", "map_png", "profiles_png",
           "selection_png"]
