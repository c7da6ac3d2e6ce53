"""Live drift: counts of what assign sees (``counts``), kept off the assign path and flushed to the store
(``recorder``), read back over a time window as a drift report (``window``, ``report``) and as Prometheus
figures (``gauges``). No web imports here."""

from service.live.recorder import LiveOff, LiveRecorder, open_live

__all__ = ["LiveOff", "LiveRecorder", "open_live"]
