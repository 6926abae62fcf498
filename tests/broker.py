"""A real Mosquitto broker on 127.0.0.1 for the integration tests.

Each broker gets its own free port, its own config file written here, and persistence in its own
folder, so a test can stop and restart it and the persistent sessions (and the QoS 1 messages they
hold) survive, as they would on a site's broker.
"""

from __future__ import annotations

import getpass
import shutil
import socket
import subprocess
import time
from dataclasses import dataclass, field
from pathlib import Path


def mosquitto_path() -> str | None:
    return shutil.which("mosquitto") or (
        "/usr/sbin/mosquitto" if Path("/usr/sbin/mosquitto").exists() else None
    )


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def wait_for_port(port: int, timeout: float = 10.0, host: str = "127.0.0.1") -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            with socket.create_connection((host, port), timeout=0.2):
                return
        except OSError:
            time.sleep(0.05)
    raise TimeoutError(f"nothing listening on {host}:{port} after {timeout} s")


@dataclass
class Broker:
    """``extra`` holds listener options (TLS files, require_certificate, ...)."""

    folder: Path
    port: int = field(default_factory=free_port)
    extra: list[str] = field(default_factory=list)
    process: subprocess.Popen[bytes] | None = None

    @property
    def config_path(self) -> Path:
        return self.folder / "mosquitto.conf"

    @property
    def log_path(self) -> Path:
        return self.folder / "mosquitto.log"

    def write_config(self) -> None:
        self.folder.mkdir(parents=True, exist_ok=True)
        lines = [
            f"listener {self.port} 127.0.0.1",
            "allow_anonymous true",
            # Stay the user who started us: the default drops root to 'mosquitto', which cannot
            # write persistence into the test's folder. Ignored when not started as root.
            f"user {getpass.getuser()}",
            "persistence true",
            f"persistence_location {self.folder}/",
            "autosave_interval 1",
            "max_queued_messages 100000",
            "max_inflight_messages 100",
            "log_dest stderr",
            "log_type error",
            "log_type warning",
            *self.extra,
        ]
        self.config_path.write_text("\n".join(lines) + "\n")

    def start(self) -> Broker:
        exe = mosquitto_path()
        if exe is None:
            raise RuntimeError("mosquitto is not installed (apt-get install mosquitto)")
        self.write_config()
        with self.log_path.open("ab") as log:  # the child keeps its own copy of the handle
            self.process = subprocess.Popen(
                [exe, "-c", str(self.config_path)], stdout=log, stderr=log
            )
        try:
            wait_for_port(self.port)
        except TimeoutError:
            self.stop()
            raise RuntimeError(
                f"mosquitto did not start: {self.log_path.read_text()[-2000:]}"
            ) from None
        return self

    def stop(self) -> None:
        """Stop gracefully, so the broker writes its persistence file."""
        if self.process is not None and self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait()
        self.process = None

    def restart(self) -> None:
        self.stop()
        self.start()

    def publish(self, topic: str, payload: str, qos: int = 1, retain: bool = False) -> None:
        """Publish with Debian's mosquitto_pub, as an integrator's script would."""
        args = [
            "mosquitto_pub",
            "-h",
            "127.0.0.1",
            "-p",
            str(self.port),
            "-t",
            topic,
            "-m",
            payload,
            "-q",
            str(qos),
        ]
        if retain:
            args.append("-r")
        subprocess.run(args, check=True, timeout=30, capture_output=True)
