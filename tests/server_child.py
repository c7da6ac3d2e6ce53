"""A real server process for the connection tests (``python -m tests.server_child PORT``; not a test module).

The service's own app and uvicorn settings (``service.cli.run_server``; settings from ``SEGSCORE_*``), plus
test-only routes that fail the way a bug would, so the tests can see what a client sees after a 500."""

from __future__ import annotations

import sys

from service.app import create_app
from service.cli import run_server
from service.errors import BundleCorrupt
from service.logs import configure_logging
from service.settings import Settings


def main() -> None:
    settings = Settings(port=int(sys.argv[1]))
    configure_logging(settings.log_level)
    app = create_app(settings)

    @app.get("/test-only/fails")
    async def fails_get():
        raise RuntimeError("a bug")

    @app.post("/test-only/fails")
    async def fails_post():
        raise RuntimeError("a bug, before the body was read")

    @app.get("/test-only/fails-handled")
    async def fails_handled():
        raise BundleCorrupt("shop", 1)        # a deliberate 500 from the error table

    run_server(app, settings)


if __name__ == "__main__":
    main()
