"""Prometheus metrics and a health check on one small HTTP listener.

``/metrics`` is the Prometheus text format from a registry of our own (not the process-global
one, so two services in one test process do not collide). ``/health`` answers JSON and status
200 while the worker is committing batches and every source is connected, 503 otherwise, so a
container orchestrator or a site monitor can act on it.
"""

from __future__ import annotations

import json
import logging
import socket
import threading
from collections.abc import Callable
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, generate_latest
from prometheus_client.exposition import CONTENT_TYPE_LATEST

log = logging.getLogger("limitwatch.metrics")


class Metrics:
    """The service's counters. Label sets are small and fixed (rule ids, reasons, sources)."""

    def __init__(self) -> None:
        self.registry = CollectorRegistry()
        r = self.registry
        self.readings = Counter(
            "limitwatch_readings", "Readings evaluated, by result.", ["result"], registry=r
        )
        self.signals = Counter(
            "limitwatch_signals", "Signals raised, by rule.", ["rule"], registry=r
        )
        self.alerts_opened = Counter("limitwatch_alerts_opened", "Alerts opened.", registry=r)
        self.floods = Counter(
            "limitwatch_floods",
            "Floods of incidents (many opening or clearing at once), by edge: started, ended.",
            ["edge"],
            registry=r,
        )
        self.dead_letters = Counter(
            "limitwatch_dead_letters", "Inputs set aside, by reason.", ["reason"], registry=r
        )
        self.batch_seconds = Histogram(
            "limitwatch_batch_seconds",
            "Time to evaluate and commit one batch.",
            buckets=(0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5),
            registry=r,
        )
        self.batch_size = Histogram(
            "limitwatch_batch_size",
            "Items per committed batch.",
            buckets=(1, 2, 5, 10, 20, 50, 100, 200, 500, 1000, 2000),
            registry=r,
        )
        self.queue_depth = Gauge(
            "limitwatch_queue_depth", "Items waiting in the intake queue.", registry=r
        )
        self.streams = Gauge("limitwatch_streams", "Streams held in memory.", registry=r)
        self.source_connected = Gauge(
            "limitwatch_source_connected", "1 when a source is connected.", ["source"], registry=r
        )
        self.connection_restarts = Gauge(
            "limitwatch_connection_restarts",
            "Times an MQTT source's connection process died and was started again, since start.",
            ["source"],
            registry=r,
        )
        self.worker_last_round = Gauge(
            "limitwatch_worker_last_round_seconds",
            "Seconds since the worker last came round its loop or committed a batch.",
            registry=r,
        )
        self.source_streams = Gauge(
            "limitwatch_source_streams",
            "Streams each source has fed since start (capped by its max_streams).",
            ["source"],
            registry=r,
        )
        self.streams_refused = Counter(
            "limitwatch_streams_refused",
            "Readings refused because their source already fed max_streams streams.",
            ["source"],
            registry=r,
        )
        self.job_failures = Counter(
            "limitwatch_job_failures",
            "Scheduled jobs (stale checks, reminders, refits, ...) that failed and will run again.",
            ["job"],
            registry=r,
        )

    def text(self) -> bytes:
        return generate_latest(self.registry)


class _BoundedHTTPServer(ThreadingHTTPServer):
    """A thread per connection, but at most ``max_clients`` at once: a connection beyond that
    is closed at once rather than given a thread (300 half-open requests once made 307
    threads). Slow clients are cut off by the handler's socket timeout, freeing their slot."""

    daemon_threads = True
    block_on_close = False
    request_queue_size = 64  # connections the kernel holds until accepted (and then refused)

    def __init__(self, address: tuple[str, int], handler: Any, max_clients: int) -> None:
        self.address_family = socket.AF_INET6 if ":" in address[0] else socket.AF_INET
        self._slots = threading.BoundedSemaphore(max_clients)
        super().__init__(address, handler)

    def process_request(self, request: Any, client_address: Any) -> None:
        if not self._slots.acquire(blocking=False):
            log.debug("status http: busy, closing a connection from %s", client_address)
            self.shutdown_request(request)
            return
        try:
            super().process_request(request, client_address)
        except BaseException:
            self._slots.release()
            raise

    def process_request_thread(self, request: Any, client_address: Any) -> None:
        try:
            super().process_request_thread(request, client_address)
        finally:
            self._slots.release()


class StatusServer:
    """Serves ``/metrics`` and ``/health`` on ``host:port`` (``[v6 address]:port`` for IPv6)
    in a daemon thread, to at most ``max_clients`` clients at once, each cut off after
    ``client_timeout_s`` without progress."""

    def __init__(
        self,
        listen: str,
        metrics: Metrics,
        health: Callable[[], dict[str, Any]],
        *,
        max_clients: int = 8,
        client_timeout_s: float = 5.0,
    ) -> None:
        from limitwatch.config import split_address

        host, port = split_address(listen)
        self.metrics = metrics
        self.health = health
        handler = self._handler()
        handler.timeout = client_timeout_s
        self.server = _BoundedHTTPServer((host, port), handler, max_clients)
        self.thread = threading.Thread(
            target=self.server.serve_forever, name="status-http", daemon=True
        )

    @property
    def address(self) -> tuple[str, int]:
        host, port = self.server.server_address[:2]
        return str(host), int(port)

    def start(self) -> None:
        self.thread.start()

    def close(self) -> None:
        self.server.shutdown()
        self.server.server_close()

    def _handler(self) -> type[BaseHTTPRequestHandler]:
        outer = self

        class Handler(BaseHTTPRequestHandler):
            def do_GET(self) -> None:
                if self.path.split("?")[0] == "/metrics":
                    self._send(200, outer.metrics.text(), CONTENT_TYPE_LATEST)
                elif self.path.split("?")[0] == "/health":
                    status = outer.health()
                    code = 200 if status.get("status") == "ok" else 503
                    self._send(code, json.dumps(status).encode(), "application/json")
                else:
                    self._send(404, b"not found: try /metrics or /health\n", "text/plain")

            def _send(self, code: int, body: bytes, content_type: str) -> None:
                self.send_response(code)
                self.send_header("Content-Type", content_type)
                self.send_header("Content-Length", str(len(body)))
                self.end_headers()
                self.wfile.write(body)

            def log_message(self, format: str, *args: Any) -> None:
                log.debug("status http: " + format, *args)

        return Handler
