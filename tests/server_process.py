"""A real ``segscore serve`` process on a free loopback port, for end-to-end tests."""

from __future__ import annotations

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
from typing import Iterator

SERVER_START_TIMEOUT = 180      # a --demo server fits first; the machine may be busy


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


@contextmanager
def serving(workdir: Path, *arguments: str, env: dict[str, str] | None = None) -> Iterator[str]:
    """Run ``segscore serve --port P *arguments`` (SEGSCORE_* variables cleared, then ``env`` added) until
    ``/readyz`` answers 200; yield the base URL; stop the process with SIGTERM (kill after 30 s).

    The server's output goes to ``workdir / "server.log"``, shown when it fails to start."""
    port = free_port()
    environment = {k: v for k, v in os.environ.items() if not k.startswith("SEGSCORE_")} | (env or {})
    segscore = Path(sys.executable).with_name("segscore")
    log_path = workdir / "server.log"
    with log_path.open("w") as log:
        server = subprocess.Popen([str(segscore), "serve", "--port", str(port), *arguments], stdout=log,
                                  stderr=subprocess.STDOUT, env=environment, cwd=workdir)
        base = f"http://127.0.0.1:{port}"
        try:
            deadline = time.monotonic() + SERVER_START_TIMEOUT
            while True:
                assert server.poll() is None, log_path.read_text()
                try:
                    with urllib.request.urlopen(f"{base}/readyz", timeout=10) as response:
                        if response.status == 200:
                            break
                except (urllib.error.URLError, ConnectionError, TimeoutError):
                    pass
                assert time.monotonic() < deadline, log_path.read_text()
                time.sleep(0.25)
            yield base
        finally:
            server.send_signal(signal.SIGTERM)
            try:
                server.wait(30)
            except subprocess.TimeoutExpired:
                server.kill()
                server.wait(30)
