"""SIGTERM on a real server: it stops accepting connections, finishes the requests in flight (they get their
normal answers) and exits with status 0.

The requests in flight: a fit whose worker process is seen running (a grandchild of the server, forked by its
forkserver), and an assign whose head and half its body were sent before the fit (so the server is inside the
request, reading the body) and whose rest is sent only after SIGTERM. Deadlines only guard against a hang.
"""

from __future__ import annotations

import http.client
import json
import signal
import socket
import threading
import time

import httpx2
import pytest
from sklearn.datasets import load_digits

from tests.conftest import records_from
from tests.serving import fit_workers_under, segscore_command, start_server, stop_process

DEADLINE = 120.0


def wait_for(check, what: str):
    started = time.monotonic()
    while not (outcome := check()):
        assert time.monotonic() - started < DEADLINE, f"{what}: not seen after {DEADLINE} s"
        time.sleep(0.02)
    return outcome


def refused(port: int) -> bool:
    try:
        socket.create_connection(("127.0.0.1", port), timeout=5).close()
    except ConnectionRefusedError:
        return True
    return False


@pytest.mark.parametrize("workers", [1, 2])
def test_sigterm_finishes_requests_in_flight_and_exits_zero(tmp_path, iris, workers):
    command = segscore_command("--workers", str(workers), "--store", str(tmp_path / "store"))
    port = int(command[-1])
    server, base = start_server(command, tmp_path)
    try:
        records = records_from(iris, id_prefix="r")
        assert httpx2.post(f"{base}/v1/segmentations/shop/fit", json={"records": records, "k": 3,
                                                                       "id_column": "id"},
                           timeout=DEADLINE).status_code == 201

        slow = None
        if workers == 1:
            # With one process the head sent first is read before the fit below starts (one event loop);
            # with two, another worker might hold it unaccepted, so only the fit is in flight there.
            body = json.dumps({"records": records}).encode()
            slow = socket.create_connection(("127.0.0.1", port), timeout=DEADLINE)
            slow.sendall(b"POST /v1/segmentations/shop/assign HTTP/1.1\r\nHost: test\r\n"
                         b"Content-Type: application/json\r\nContent-Length: %d\r\n\r\n" % len(body)
                         + body[: len(body) // 2])

        # A fit of about a second (more on a busy machine, its worker being niced): scikit-learn's digits
        # (1797 x 64), k searched over 2..8. SIGTERM follows within milliseconds of its worker process appearing.
        digits = records_from(load_digits())
        fit_answer = {}
        fit = threading.Thread(target=lambda: fit_answer.update(response=httpx2.post(
            f"{base}/v1/segmentations/digits/fit",
            json={"records": digits, "k": {"min": 2, "max": 8}, "n_init": 10}, timeout=DEADLINE)))
        fit.start()
        wait_for(lambda: fit_workers_under(server.pid), "the fit's worker process")

        server.send_signal(signal.SIGTERM)
        # Still unanswered after the signal went, so it was in flight when the server received it.
        assert "response" not in fit_answer, "the fit was answered before SIGTERM: nothing was in flight"
        if workers == 1:
            # (With workers, the listening socket belongs to the parent, which closes it when they are done.)
            wait_for(lambda: refused(port), "new connections refused")

        if slow is not None:
            slow.sendall(body[len(body) // 2:])
            answer = http.client.HTTPResponse(slow)
            answer.begin()
            assert answer.status == 200
            results = json.loads(answer.read())["results"]
            assert [r["id"] for r in results] == [r["id"] for r in records]
            slow.close()

        fit.join(DEADLINE)
        assert not fit.is_alive()
        response = fit_answer["response"]
        assert response.status_code == 201, response.text
        assert response.json()["version"] == 1 and response.json()["n_records"] == len(digits)

        assert server.wait(DEADLINE) == 0, (tmp_path / "server.log").read_text()
        assert refused(port)
    finally:
        if server.poll() is None:
            stop_process(server)
