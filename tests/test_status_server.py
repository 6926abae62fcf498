"""The status listener over real loopback sockets: IPv6 literals, and slow or half-open clients
that must neither pile up threads nor keep /health from answering."""

from __future__ import annotations

import contextlib
import json
import socket
import threading
import time
import urllib.request
from collections.abc import Iterator

import pytest

from limitwatch.config import config_from_dict
from limitwatch.metrics import Metrics, StatusServer
from tests.broker import free_port


def _health() -> dict:
    return {"status": "ok", "sources": {}}


@contextlib.contextmanager
def serving(listen: str, **options: float) -> Iterator[StatusServer]:
    server = StatusServer(listen, Metrics(), _health, **options)  # type: ignore[arg-type]
    server.start()
    try:
        yield server
    finally:
        server.close()


def ipv6_loopback() -> bool:
    if not socket.has_ipv6:
        return False
    try:
        with socket.socket(socket.AF_INET6, socket.SOCK_STREAM) as probe:
            probe.bind(("::1", 0))
    except OSError:
        return False
    return True


def get(url: str) -> tuple[int, bytes]:
    with urllib.request.urlopen(url, timeout=10) as answer:
        return answer.status, answer.read()


@pytest.mark.skipif(not ipv6_loopback(), reason="this kernel has no IPv6 loopback")
def test_an_ipv6_literal_as_the_validator_suggests_it_serves_health() -> None:
    with socket.socket(socket.AF_INET6) as probe:
        probe.bind(("::1", 0))
        port = probe.getsockname()[1]
    listen = f"[::1]:{port}"
    config = config_from_dict({"service": {"metrics_listen": listen}})
    with serving(config.service.metrics_listen) as server:  # type: ignore[arg-type]
        assert server.address == ("::1", port)
        status, body = get(f"http://[::1]:{port}/health")
    assert status == 200 and json.loads(body)["status"] == "ok"


def test_half_open_clients_get_no_more_threads_than_the_limit_and_are_cut_off() -> None:
    with serving(f"127.0.0.1:{free_port()}", max_clients=4, client_timeout_s=0.5) as server:
        host, port = server.address
        before = threading.active_count()
        idle = []
        for _ in range(60):
            conn = socket.create_connection((host, port), timeout=5)
            conn.sendall(b"GET /metr")  # a request that never finishes
            idle.append(conn)
        time.sleep(0.2)
        most = threading.active_count() - before
        assert most <= 4, f"{most} threads for 60 half-open connections"
        # Every slow client is closed: at once when the slots are full, else on its timeout.
        deadline = time.monotonic() + 10
        for conn in idle:
            conn.settimeout(max(deadline - time.monotonic(), 0.01))
            try:
                data = conn.recv(4096)  # TimeoutError here: a slow client kept its slot
            except ConnectionResetError:
                data = b""
            assert data == b"", data
            conn.close()
        status, body = get(f"http://{host}:{port}/health")
        assert status == 200 and json.loads(body)["status"] == "ok"


def test_a_scrape_still_answers_once_slow_clients_time_out() -> None:
    with serving(f"127.0.0.1:{free_port()}", max_clients=2, client_timeout_s=0.3) as server:
        host, port = server.address
        slow = [socket.create_connection((host, port), timeout=5) for _ in range(2)]
        for conn in slow:
            conn.sendall(b"GET /health HTTP/1.1\r\n")  # headers never end
        time.sleep(0.6)  # past the client timeout: both slots are free again
        status, _ = get(f"http://{host}:{port}/metrics")
        assert status == 200
        for conn in slow:
            conn.close()
