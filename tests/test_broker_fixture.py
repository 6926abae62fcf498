"""The broker fixture itself: a retained message survives a restart (persistence works), which
the service's restart tests depend on."""

from __future__ import annotations

import socket
import subprocess

import pytest

from tests.broker import Broker, mosquitto_path

pytestmark = pytest.mark.integration  # a real Mosquitto


def test_broker_keeps_a_retained_message_across_restart(broker):
    broker.publish("plant/status", "hello", retain=True)
    broker.restart()
    got = subprocess.run(
        [
            "mosquitto_sub",
            "-h",
            "127.0.0.1",
            "-p",
            str(broker.port),
            "-t",
            "plant/status",
            "-C",
            "1",
            "-W",
            "5",
        ],
        capture_output=True,
        text=True,
        timeout=30,
    )
    assert got.stdout.strip() == "hello"


def test_a_broker_whose_port_is_taken_starts_on_another(tmp_path):
    """Another process binding the chosen port first must not fail the test that wanted it."""
    if mosquitto_path() is None:
        pytest.skip("mosquitto is not installed")
    with socket.socket() as holder:
        holder.bind(("127.0.0.1", 0))
        holder.listen()
        taken = holder.getsockname()[1]
        broker = Broker(tmp_path / "broker", port=taken).start()
        try:
            assert broker.port != taken
            assert "Address already in use" in broker.log_path.read_text()
            broker.publish("plant/status", "moved", retain=True)
            broker.restart()  # keeps the port it ended up with
            assert broker.process is not None and broker.process.poll() is None
        finally:
            broker.stop()
