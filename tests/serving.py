"""A real server process on a free loopback port, for the tests that need one (the one helper for it)."""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from contextlib import contextmanager
from pathlib import Path
from typing import Any, Iterator

SERVER_START_TIMEOUT = 180      # the demo fit runs first; the machine may be busy
HTTP_TIMEOUT = 10


def free_port() -> int:
    """A TCP port free on the loopback address right now."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def stop_process(process: subprocess.Popen, timeout: float = 30) -> None:
    """SIGTERM, then SIGKILL if the process has not ended within ``timeout`` seconds."""
    process.send_signal(signal.SIGTERM)
    try:
        process.wait(timeout)
    except subprocess.TimeoutExpired:
        process.kill()
        process.wait(timeout)


def get_json(url: str) -> tuple[int, Any]:
    with urllib.request.urlopen(url, timeout=HTTP_TIMEOUT) as response:
        return response.status, json.loads(response.read())


@contextmanager
def segscore_server(workdir: Path, *arguments: str, settings_env: dict[str, str] | None = None) -> Iterator[str]:
    """Run ``segscore serve --port P *arguments`` in ``workdir`` until /readyz answers; yield its base URL.

    The server's output goes to ``workdir/server.log`` (shown when it fails to start); SEGSCORE_* variables
    of the calling environment are not passed on, those of ``settings_env`` are. The process gets SIGTERM
    on exit."""
    port = free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith("SEGSCORE_")} | (settings_env or {})
    segscore = Path(sys.executable).with_name("segscore")
    log_path = workdir / "server.log"
    with log_path.open("w") as log:
        server = subprocess.Popen([str(segscore), "serve", "--port", str(port), *arguments],
                                  stdout=log, stderr=subprocess.STDOUT, env=env, cwd=workdir)
        base = f"http://127.0.0.1:{port}"
        try:
            deadline = time.monotonic() + SERVER_START_TIMEOUT
            status, body = None, None
            while time.monotonic() < deadline:
                assert server.poll() is None, log_path.read_text()
                try:
                    status, body = get_json(f"{base}/readyz")
                    break
                except (urllib.error.URLError, ConnectionError, TimeoutError):
                    time.sleep(0.25)
            assert status == 200 and body["status"] == "ready", log_path.read_text()
            yield base
        finally:
            stop_process(server)
