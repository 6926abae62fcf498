"""A real Mosquitto broker on 127.0.0.1 for the integration tests.

Each broker gets its own free port, its own config file written here, and persistence in its own
folder, so a test can stop and restart it and the persistent sessions (and the QoS 1 messages they
hold) survive, as they would on a site's broker.

A port found free can be taken by someone else before the broker binds it (other tests, other
suites on a shared machine, any outgoing connection's local port). So ports come from below the
kernel's ephemeral range, where outgoing connections never land, and a broker whose first start
finds its port taken tries again on a new one; it counts as started only once its own log says it
is running, so a listener that belongs to another process is never mistaken for it.
"""

from __future__ import annotations

import getpass
import random
import shutil
import socket
import subprocess
import time
from dataclasses import dataclass, field
from pathlib import Path

from limitwatch.children import end_process


def mosquitto_path() -> str | None:
    return shutil.which("mosquitto") or (
        "/usr/sbin/mosquitto" if Path("/usr/sbin/mosquitto").exists() else None
    )


def _ephemeral_low() -> int:
    try:
        return int(Path("/proc/sys/net/ipv4/ip_local_port_range").read_text().split()[0])
    except (OSError, ValueError, IndexError):
        return 32768


def free_port() -> int:
    """A loopback port that is free now, chosen at random below the ephemeral range."""
    high = max(_ephemeral_low(), 12_000)
    for _ in range(200):
        port = random.randrange(10_000, high)
        with socket.socket() as sock:
            try:
                sock.bind(("127.0.0.1", port))
            except OSError:
                continue
            return port
    with socket.socket() as sock:  # a crowded range: let the kernel choose
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
    started: bool = False
    """Set at the first start: from then on the port is the clients' and never changes."""

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
            "log_type information",  # "... running" once the listeners are bound
            *self.extra,
        ]
        self.config_path.write_text("\n".join(lines) + "\n")

    def start(self, attempts: int = 5) -> Broker:
        exe = mosquitto_path()
        if exe is None:
            raise RuntimeError("mosquitto is not installed (apt-get install mosquitto)")
        for _ in range(attempts):
            self.write_config()
            offset = self.log_path.stat().st_size if self.log_path.exists() else 0
            with self.log_path.open("ab") as log:  # the child keeps its own copy of the handle
                self.process = subprocess.Popen(
                    [exe, "-c", str(self.config_path)], stdout=log, stderr=log
                )
            outcome = self._wait_running(offset)
            if outcome == "running":
                self.started = True
                return self
            self.stop()
            if outcome != "port taken" or self.started:
                break
            self.port = free_port()  # lost the race for the port: take another
        raise RuntimeError(f"mosquitto did not start: {self.log_path.read_text()[-2000:]}")

    def _wait_running(self, offset: int, timeout: float = 10.0) -> str:
        """'running' once this broker's log says so and its port answers, else why not."""
        assert self.process is not None
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            with self.log_path.open("rb") as log:
                log.seek(offset)
                text = log.read().decode(errors="replace")
            if self.process.poll() is not None:
                return "port taken" if "Address already in use" in text else "exited"
            if " running" in text:
                wait_for_port(self.port, timeout=max(0.1, deadline - time.monotonic()))
                return "running"
            time.sleep(0.02)
        return "timed out"

    def stop(self) -> None:
        """Stop gracefully, so the broker writes its persistence file."""
        if self.process is not None:
            end_process(self.process)
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
