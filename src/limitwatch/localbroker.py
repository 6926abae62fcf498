"""A private Mosquitto on a free loopback port, for the demo and the benchmark.

It runs as the current user (the Debian default would drop root to ``mosquitto``, which cannot
write into our folders) and is stopped, and if need be killed, when the block ends.
"""

from __future__ import annotations

import contextlib
import getpass
import shutil
import socket
import subprocess
import time
from collections.abc import Iterator
from pathlib import Path

from limitwatch.children import end_process


def mosquitto_path() -> str | None:
    return shutil.which("mosquitto") or (
        "/usr/sbin/mosquitto" if Path("/usr/sbin/mosquitto").exists() else None
    )


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


@contextlib.contextmanager
def private_broker(folder: Path, queued: int) -> Iterator[int]:
    """A Mosquitto on a free loopback port that may queue ``queued`` messages per session."""
    exe = mosquitto_path()
    if exe is None:
        raise RuntimeError("mosquitto is not installed")
    folder.mkdir(parents=True, exist_ok=True)
    port = _free_port()
    conf = folder / "mosquitto.conf"
    conf.write_text(
        f"listener {port} 127.0.0.1\nallow_anonymous true\nuser {getpass.getuser()}\n"
        f"max_queued_messages {queued}\nmax_inflight_messages 1000\n"
        "log_dest stderr\nlog_type error\n"
    )
    with (folder / "mosquitto.log").open("ab") as log:
        broker = subprocess.Popen([exe, "-c", str(conf)], stdout=log, stderr=log)
    try:
        deadline = time.monotonic() + 10
        while True:
            try:
                socket.create_connection(("127.0.0.1", port), timeout=0.2).close()
                break
            except OSError:
                if time.monotonic() > deadline or broker.poll() is not None:
                    raise RuntimeError(f"mosquitto did not start; see {folder}") from None
                time.sleep(0.05)
        yield port
    finally:
        end_process(broker)
