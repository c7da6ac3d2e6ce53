"""The read-only web console: server-rendered HTML pages over the store, with the charts as images."""

from __future__ import annotations

from fastapi import FastAPI
from fastapi.staticfiles import StaticFiles

from service.console.pages import STATIC_DIR, router

__all__ = ["install"]


def install(app: FastAPI) -> None:
    """Add the console's pages under /console and its stylesheet under /console/static."""
    app.include_router(router)
    app.mount("/console/static", StaticFiles(directory=STATIC_DIR), name="console-static")
