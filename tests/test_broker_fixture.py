"""The broker fixture itself: a retained message survives a restart (persistence works), which
the service's restart tests depend on."""

from __future__ import annotations

import subprocess


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
