"""The connection process is recognisable in `ps`: which module it runs and for which source
(it showed as `python3 -c from limitwatch...`). Real `limitwatch serve`, real Mosquitto."""

from __future__ import annotations

from pathlib import Path

from tests.service_harness import ServiceProcess, mqtt_config, wait_until


def test_the_connection_process_names_its_module_and_source_in_ps(broker, tmp_path):
    svc = ServiceProcess(mqtt_config(tmp_path, broker.port)).start()
    try:
        wait_until(lambda: "connected to" in svc.logs() and svc.children(), what="connected")
        (child,) = svc.children()
        argv = Path(f"/proc/{child}/cmdline").read_bytes().rstrip(b"\0").split(b"\0")
    finally:
        assert svc.stop() == 0
    assert b"-c" not in argv
    assert argv[1:3] == [b"-m", b"limitwatch.ingest.mqtt.process"]
    assert argv[-2:] == [b"--source", b"gateway"]
