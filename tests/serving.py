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


def start_server(command: list[str], workdir: Path, *, settings_env: dict[str, str] | None = None,
                 cwd: Path | None = None) -> tuple[subprocess.Popen, str]:
    """Start ``command`` (a server on 127.0.0.1 whose port is the last argument) and wait until /readyz
    answers 200 with status "ready"; return the process and its base URL. The caller stops it.

    The server's output goes to ``workdir/server.log`` (shown when it fails to start); SEGSCORE_* variables
    of the calling environment are not passed on, those of ``settings_env`` are."""
    port = int(command[-1])
    env = {k: v for k, v in os.environ.items() if not k.startswith("SEGSCORE_")} | (settings_env or {})
    log_path = workdir / "server.log"
    with log_path.open("w") as log:
        server = subprocess.Popen(command, stdout=log, stderr=subprocess.STDOUT, env=env, cwd=cwd or workdir)
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
    except BaseException:
        stop_process(server)
        raise
    return server, base


@contextmanager
def server_process(command: list[str], workdir: Path, *, settings_env: dict[str, str] | None = None,
                   cwd: Path | None = None) -> Iterator[str]:
    """``start_server``; yield the base URL; stop the server with SIGTERM (SIGKILL after 30 s)."""
    server, base = start_server(command, workdir, settings_env=settings_env, cwd=cwd)
    try:
        yield base
    finally:
        stop_process(server)


def segscore_command(*arguments: str) -> list[str]:
    """``segscore serve *arguments --port P`` on a free port P."""
    segscore = Path(sys.executable).with_name("segscore")
    return [str(segscore), "serve", *arguments, "--port", str(free_port())]


@contextmanager
def segscore_server(workdir: Path, *arguments: str, settings_env: dict[str, str] | None = None) -> Iterator[str]:
    """``segscore serve *arguments --port P`` in ``workdir``, as ``server_process`` runs it."""
    with server_process(segscore_command(*arguments), workdir, settings_env=settings_env) as base:
        yield base


def _processes() -> dict[int, tuple[int, str]]:
    """pid -> (parent pid, command line) of every process, from /proc."""
    table = {}
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                stat = (entry / "stat").read_text()
                cmdline = (entry / "cmdline").read_bytes().replace(b"\0", b" ").decode(errors="replace")
            except OSError:
                continue
            table[int(entry.name)] = (int(stat.rsplit(")", 1)[1].split()[1]), cmdline)
    return table


def fit_workers_under(server_pid: int) -> list[int]:
    """Processes below ``server_pid`` forked by a forkserver (the fit workers: service/fitting.py)."""
    table = _processes()

    def below(pid: int) -> bool:
        while pid in table and pid > 1:
            pid = table[pid][0]
            if pid == server_pid:
                return True
        return False

    return [pid for pid, (parent, cmdline) in table.items()
            if "forkserver" in cmdline and parent in table and "forkserver" in table[parent][1] and below(pid)]
